"""Tables in: CSV (with or without a header row) and Parquet, read by column name into float64 arrays.

A training job's table is converted once into float64 ``.npy`` files under ``workdir/tables`` that every rank
then memory-maps, so a table larger than memory costs one chunk of CSV lines (:data:`CSV_CHUNK_LINES`) or one
Parquet row group per rank while it is converted, and ``rows × columns × 8`` bytes of disk. The cache is named by a
hash of the source (path, size, mtime) and the columns taken, so a resume finds it and does not convert again.
A CSV is converted by rank 0 (a text file cannot be cut into rows without reading it); a Parquet file's row groups
are cut into one contiguous block per rank, and each rank writes its rows into the one shared file.

Column names: a CSV header row's fields, or ``"0"``, ``"1"``, … for a CSV without one; a Parquet file's schema.
Rows count from 0 (as everywhere in shardmill); CSV lines count from 1 (as a text editor shows them).
"""

from __future__ import annotations

import csv
import difflib
import hashlib
import json
import os
import struct
import sys
import unicodedata
from collections.abc import Callable, Iterator
from dataclasses import dataclass, field
from itertools import islice
from pathlib import Path
from typing import TYPE_CHECKING, Any

import numpy as np
from shardmill.data.rows import block_range
from shardmill.errors import JobError

if TYPE_CHECKING:
    from shardmill.parallel.comm import Comm

CSV_CHUNK_LINES = 65536  # lines of text parsed at a time: memory while reading a CSV is about one such chunk
TABLE_SUFFIXES = (".csv", ".parquet")
PARQUET_INSTALL = 'pip install "shardmill[parquet]"'
_NPY_HEADER_BYTES = 128  # fixed .npy header (format 1.0) so the row count can be written after the rows
_LISTED_COLUMNS = 20  # at most this many column names in an error message
_CACHE_VERSION = 1  # part of the cache key: a change of the conversion invalidates old caches
FIELD_LIMIT = csv.field_size_limit()  # characters in one CSV field: the csv module's limit (131,072), kept
SHOWN_CHARACTERS = 60  # at most this many characters of a value in an error message


@dataclass
class Table:
    """What a table holds, read from its first line (CSV) or its metadata (Parquet), before any row is read.

    ``columns`` are the names in file order; ``named`` says whether the file names them (a header row, Parquet)
    or they are the positions ``"0"``, ``"1"``, …; ``rows`` is known up front for Parquet only (None for CSV).
    """

    path: Path
    field_name: str
    kind: str  # "csv" or "parquet"
    columns: list[str]
    named: bool
    first_line: int = 1  # CSV: 1-based line of the first row (the header row when there is one)
    rows: int | None = None
    group_rows: list[int] = field(default_factory=list)  # Parquet: rows of each row group, in file order
    types: list[str] = field(default_factory=list)  # Parquet: each column's Arrow type, as text

    def where(self) -> str:
        return f"`{self.field_name}` file {str(self.path)!r}"


def is_table(path: Path) -> bool:
    """True for the suffixes this module reads (.csv, .parquet)."""
    return path.suffix.lower() in TABLE_SUFFIXES


def _header_mode(header: str) -> str:
    if header not in ("auto", "yes", "no"):
        raise JobError(f"`data.header` must be one of auto, no, yes; got {header!r}")
    return header


def _is_number(text: str) -> bool:
    try:
        float(text)
    except ValueError:
        return False
    return True


def cut(text: str, limit: int = SHOWN_CHARACTERS) -> str:
    """``text`` as an error message shows it: repr'd, cut to about ``limit`` characters with its length said."""
    if len(text) <= limit:
        return repr(text)
    return f"{text[:limit]!r}… ({len(text):,} characters)"


def csv_fields(line: str, where: str, line_no: int, columns: list[str] | None = None) -> list[str]:
    """The raw fields of one CSV line (commas, double quotes as the csv module reads them).

    A field longer than :data:`FIELD_LIMIT` characters (the csv module's own limit) is a JobError naming ``where``
    (the file), the line, and the column (by name from ``columns``, else by position from 1).
    """
    try:
        return next(csv.reader([line]), [])
    except csv.Error as err:
        if "field limit" not in str(err):
            raise JobError(f"{where} line {line_no} cannot be read as CSV: {err}") from None
    previous = csv.field_size_limit(sys.maxsize)  # read the line once more, only to say which field is too long
    try:
        fields = next(csv.reader([line]), [])
    finally:
        csv.field_size_limit(previous)
    j = next(j for j, text in enumerate(fields) if len(text) > FIELD_LIMIT)
    column = cut(columns[j]) if columns is not None and j < len(columns) else f"{j + 1} (from 1)"
    raise JobError(f"{where} line {line_no}, column {column}: a field of {len(fields[j]):,} characters; at most "
                   f"{FIELD_LIMIT:,} are read")


def _split_line(line: str, where: str, line_no: int, columns: list[str] | None = None) -> list[str]:
    """The fields of one CSV line (as :func:`csv_fields`), stripped of blanks."""
    return [text.strip() for text in csv_fields(line, where, line_no, columns)]


def _check_names(names: list[str], where: str, line_no: int) -> None:
    """Refuse a header name holding a byte-order mark (a file that begins with two: one is read as the encoding's
    mark, the other would become part of the first name) or a control character (a NUL byte, …; a tab is allowed)."""
    for j, name in enumerate(names):
        bad = next((ch for ch in name if ch == "\ufeff" or (unicodedata.category(ch) == "Cc" and ch != "\t")), None)
        if bad is not None:
            what = "a second byte-order mark (U+FEFF)" if bad == "\ufeff" else f"the control character U+{ord(bad):04X}"
            raise JobError(f"{where} line {line_no}: the header name of column {j + 1} ({cut(name)}) holds {what}; "
                           f"save the file as plain UTF-8 text")


def _data_line(line: str) -> bool:
    """Blank lines and lines starting with # are skipped (numpy.loadtxt's default comment character)."""
    text = line.strip()
    return bool(text) and text[0] != "#"


def _open_text(path: Path, field_name: str):
    try:
        # utf-8-sig: a byte-order mark (spreadsheet exports write one) is not part of the first column's name
        return open(path, encoding="utf-8-sig", newline="")
    except OSError as err:
        raise JobError(f"`{field_name}` file {str(path)!r} cannot be read: {err.strerror or err}") from None


def _describe_csv(path: Path, field_name: str, header: str) -> Table:
    with _open_text(path, field_name) as f:
        try:
            first = next(((n, line) for n, line in enumerate(f, start=1) if _data_line(line)), None)
        except UnicodeDecodeError as err:
            raise JobError(f"`{field_name}` file {str(path)!r} is not UTF-8 text: {err.reason} at byte "
                           f"{err.start}") from None
    if first is None:
        raise JobError(f"`{field_name}` file {str(path)!r} holds no rows")
    line_no, line = first
    where = f"`{field_name}` file {str(path)!r}"
    fields = _split_line(line, where, line_no)
    has_header = header == "yes" or (header == "auto" and any(text and not _is_number(text) for text in fields))
    if has_header:
        _check_names(fields, where, line_no)
    columns = fields if has_header else [str(i) for i in range(len(fields))]
    return Table(path=path, field_name=field_name, kind="csv", columns=columns, named=has_header,
                 first_line=line_no)


def _parquet_module():
    try:
        import pyarrow.parquet as pq
    except ImportError:
        raise JobError(f"reading .parquet files needs pyarrow: {PARQUET_INSTALL}") from None
    return pq


def _parquet_file(path: Path, field_name: str):
    pq = _parquet_module()
    import pyarrow as pa

    try:
        return pq.ParquetFile(path)
    except (OSError, pa.ArrowException) as err:
        raise JobError(f"`{field_name}` file {str(path)!r} cannot be read as Parquet: {err}") from None


def _describe_parquet(path: Path, field_name: str) -> Table:
    pf = _parquet_file(path, field_name)
    schema = pf.schema_arrow
    meta = pf.metadata
    return Table(path=path, field_name=field_name, kind="parquet", columns=list(schema.names), named=True,
                 rows=meta.num_rows, group_rows=[meta.row_group(g).num_rows for g in range(meta.num_row_groups)],
                 types=[str(t) for t in schema.types])


def describe(path: Path, field_name: str, header: str = "auto") -> Table:
    """Column names (and, for Parquet, rows and types) of a .csv or .parquet table; no row is converted.

    ``header`` (CSV only): "yes", "no", or "auto" = the first row is a header when one of its non-empty fields
    does not parse as a number. Raises JobError for a missing, unreadable or empty file, or repeated names.
    """
    _header_mode(header)
    if not path.is_file():
        raise JobError(f"`{field_name}` file {str(path)!r} does not exist")
    suffix = path.suffix.lower()
    if suffix == ".csv":
        table = _describe_csv(path, field_name, header)
    elif suffix == ".parquet":
        table = _describe_parquet(path, field_name)
    else:
        raise JobError(f"`{field_name}` must be a .csv or .parquet table to select columns by name; got {str(path)!r}")
    seen: dict[str, int] = {}
    for i, name in enumerate(table.columns):
        if name in seen:
            raise JobError(f"{table.where()} names column {name!r} twice (columns {seen[name] + 1} and {i + 1}); "
                           f"column names must be unique")
        seen[name] = i
    return table


def _listing(columns: list[str]) -> str:
    shown = ", ".join(repr(c) for c in columns[:_LISTED_COLUMNS])
    return shown + (f", … ({len(columns)} in all)" if len(columns) > _LISTED_COLUMNS else "")


def select(table: Table, names: list[str], key: str) -> list[int]:
    """Positions of ``names`` in the table, in the order given; a missing name is a JobError naming ``key`` (the job
    key that asked for it), the column, the table's columns and the closest name."""
    positions = {name: i for i, name in enumerate(table.columns)}
    for name in names:
        if name not in positions:
            close = difflib.get_close_matches(name, table.columns, n=1, cutoff=0.6)
            hint = f" (did you mean {close[0]!r}?)" if close else ""
            unnamed = "" if table.named else " (the file has no header row, so columns are named by position)"
            raise JobError(f"`{key}` column {name!r} is not in {table.where()}{hint}; its columns are "
                           f"{_listing(table.columns)}{unnamed}")
    return [positions[name] for name in names]


# --- CSV ---------------------------------------------------------------------------------------------------------

def _csv_problem(table: Table, lines: list[str], numbers: list[int], columns: list[int]) -> JobError | None:
    """The first ragged row, empty field or non-number among ``lines`` (on the error path only)."""
    for line, line_no in zip(lines, numbers, strict=True):
        fields = _split_line(line, table.where(), line_no, table.columns)
        for j in columns:
            text = fields[j]
            if not text:
                return JobError(f"{table.where()} line {line_no}, column {table.columns[j]!r}: the field is empty; "
                                f"every field of a column read must hold a number")
            if not _is_number(text) or "_" in text:
                return JobError(f"{table.where()} line {line_no}, column {table.columns[j]!r}: {text!r} is not a "
                                f"number")
    return None


def _csv_block(table: Table, lines: list[str], numbers: list[int], columns: list[int]) -> np.ndarray:
    """Parse one chunk of data lines into (len(lines), len(columns)) float64."""
    width = len(table.columns)
    if any('"' in line for line in lines):  # a quoted field may hold a comma: count fields as csv does
        counts = [len(csv_fields(line, table.where(), line_no, table.columns))
                  for line, line_no in zip(lines, numbers, strict=True)]
    else:
        counts = [line.count(",") + 1 for line in lines]
    for count, line_no in zip(counts, numbers, strict=True):
        if count != width:
            first = "the header row" if table.named else "the first row"
            raise JobError(f"{table.where()} line {line_no} has {count} fields but {first} (line "
                           f"{table.first_line}) has {width}")
    try:
        # numpy.loadtxt parses the text (the same float64 values a plain numeric .csv always gave)
        return np.loadtxt(lines, delimiter=",", usecols=columns, ndmin=2, comments=None, quotechar='"',
                          dtype=np.float64)
    except ValueError as err:
        problem = _csv_problem(table, lines, numbers, columns)
        if problem is None:  # a text both parsers read differently: find its line with numpy alone
            for line, line_no in zip(lines, numbers, strict=True):
                try:
                    np.loadtxt([line], delimiter=",", usecols=columns, comments=None, quotechar='"')
                except ValueError as line_err:
                    problem = JobError(f"{table.where()} line {line_no}: {line_err}")
                    break
        raise (problem or JobError(f"{table.where()} cannot be read: {err}")) from None


def _csv_blocks(table: Table, columns: list[int]) -> Iterator[np.ndarray]:
    """The table's rows, ``columns`` only, in blocks of at most :data:`CSV_CHUNK_LINES` lines, float64."""
    header_lines = table.first_line if table.named else table.first_line - 1
    with _open_text(table.path, table.field_name) as f:
        try:
            line_no = header_lines
            for _ in islice(f, header_lines):
                pass
            while True:
                raw = list(islice(f, CSV_CHUNK_LINES))
                if not raw:
                    return
                numbers = [line_no + 1 + i for i, line in enumerate(raw) if _data_line(line)]
                lines = [raw[n - line_no - 1] for n in numbers]
                line_no += len(raw)
                if lines:
                    yield _csv_block(table, lines, numbers, columns)
        except UnicodeDecodeError as err:
            raise JobError(f"{table.where()} is not UTF-8 text after line {line_no}: {err.reason}") from None


def read_text(table: Table, names: list[str], key: str) -> list[list[Any]]:
    """Every row's value of each of ``names`` as the file holds it, column by column, in memory: a CSV field's text
    (unstripped; "" where a short row lacks it), a Parquet value as Python gives it (None for a null).
    ``key`` names what asked for the columns (a missing one is refused by :func:`select`)."""
    positions = select(table, names, key)
    if table.kind == "parquet":
        pf = _parquet_file(table.path, table.field_name)
        data = pf.read(columns=names)
        return [data.column(k).to_pylist() for k in range(len(names))]
    out: list[list[Any]] = [[] for _ in names]
    header_lines = table.first_line if table.named else table.first_line - 1
    with _open_text(table.path, table.field_name) as f:
        try:
            for line_no, line in enumerate(islice(f, header_lines, None), start=header_lines + 1):
                if not _data_line(line):
                    continue
                fields = csv_fields(line, table.where(), line_no, table.columns)
                for k, j in enumerate(positions):
                    out[k].append(fields[j] if j < len(fields) else "")
        except UnicodeDecodeError as err:
            raise JobError(f"{table.where()} is not UTF-8 text: {err.reason}") from None
    return out


# --- Parquet -----------------------------------------------------------------------------------------------------

def _check_parquet_types(table: Table, columns: list[int]) -> None:
    import pyarrow as pa

    pf = _parquet_file(table.path, table.field_name)
    schema = pf.schema_arrow
    for j in columns:
        kind = schema.types[j]
        if not (pa.types.is_integer(kind) or pa.types.is_floating(kind) or pa.types.is_boolean(kind)):
            raise JobError(f"{table.where()} column {table.columns[j]!r} has type {kind}; only integer, "
                           f"floating-point and boolean columns can be read")


def _parquet_group(table: Table, pf, group: int, columns: list[int]) -> np.ndarray:
    """Row group ``group``, ``columns`` only, as (rows, len(columns)) float64; a null is a JobError."""
    names = [table.columns[j] for j in columns]
    data = pf.read_row_group(group, columns=names)
    first_row = sum(table.group_rows[:group])
    out = np.empty((data.num_rows, len(names)), dtype=np.float64)
    for k, name in enumerate(names):
        column = data.column(k)
        if column.null_count:
            row = first_row + int(np.flatnonzero(column.is_null().to_numpy())[0])
            raise JobError(f"{table.where()} column {name!r} is null (missing) in row {row}; every value of a "
                           f"column read must be present")
        out[:, k] = column.to_numpy()  # integers and booleans become float64 (integers above 2**53 are rounded)
    return out


def _parquet_blocks(table: Table, columns: list[int], groups: range | None = None) -> Iterator[np.ndarray]:
    _check_parquet_types(table, columns)
    pf = _parquet_file(table.path, table.field_name)
    for group in groups if groups is not None else range(len(table.group_rows)):
        yield _parquet_group(table, pf, group, columns)


def blocks(table: Table, columns: list[int]) -> Iterator[np.ndarray]:
    """The rows of ``columns`` in file order, block by block (CSV chunks or Parquet row groups), float64."""
    return _csv_blocks(table, columns) if table.kind == "csv" else _parquet_blocks(table, columns)


def read_table(table: Table, columns: list[int]) -> np.ndarray:
    """``columns`` of every row, in memory: (rows, len(columns)) float64."""
    parts = list(blocks(table, columns))
    if not parts or sum(p.shape[0] for p in parts) == 0:
        raise JobError(f"{table.where()} holds no data rows")
    return np.concatenate(parts, axis=0)


# --- the cache ---------------------------------------------------------------------------------------------------

def _npy_header(rows: int, width: int) -> bytes:
    """A .npy format 1.0 header for (rows, width) native float64, padded to :data:`_NPY_HEADER_BYTES`."""
    text = f"{{'descr': '{np.dtype(np.float64).str}', 'fortran_order': False, 'shape': ({rows}, {width}), }}"
    text = text.ljust(_NPY_HEADER_BYTES - 10 - 1) + "\n"  # magic (6) + version (2) + length (2); ends in \n
    return b"\x93NUMPY\x01\x00" + struct.pack("<H", len(text)) + text.encode("latin1")


def cache_key(table: Table, header: str, parts: dict[str, list[str]]) -> str:
    """SHA-256 of what fixes the converted arrays: the source (resolved path, size, mtime in ns), its kind,
    whether it has a header row, the header setting, and the columns of each part, in order."""
    stat = table.path.stat()
    what = {"version": _CACHE_VERSION, "source": str(table.path.resolve()), "size": stat.st_size,
            "mtime_ns": stat.st_mtime_ns, "kind": table.kind, "named": table.named, "header": header,
            "parts": {name: list(cols) for name, cols in sorted(parts.items())}}
    return hashlib.sha256(json.dumps(what, sort_keys=True).encode()).hexdigest()


def _cache_paths(folder: Path, table: Table, key: str, parts: dict[str, list[str]]) -> tuple[dict[str, Path], Path]:
    stem = f"{table.path.stem}-{key[:16]}"
    return {name: folder / f"{stem}.{name}.npy" for name in parts}, folder / f"{stem}.json"


def _cached(files: dict[str, Path], sidecar: Path, key: str) -> bool:
    """True when a finished conversion with this key is in place (the sidecar is written last)."""
    try:
        record = json.loads(sidecar.read_text())
        return record.get("key") == key and all(p.is_file() for p in files.values())
    except (OSError, ValueError):
        return False


def _write_sidecar(sidecar: Path, table: Table, key: str, parts: dict[str, list[str]], rows: int) -> None:
    record = {"key": key, "source": str(table.path.resolve()), "kind": table.kind, "rows": rows,
              "parts": parts, "format": "float64 .npy per part, rows × columns"}
    tmp = sidecar.with_name(f".{sidecar.name}.{os.getpid()}.tmp")
    tmp.write_text(json.dumps(record, indent=1) + "\n")
    os.replace(tmp, sidecar)


def _convert_csv(table: Table, positions: dict[str, list[int]], files: dict[str, Path]) -> int:
    """Rank 0: stream the CSV once, writing each part's columns into its own .npy; returns the rows."""
    every = sorted({j for cols in positions.values() for j in cols})
    where = {name: [every.index(j) for j in cols] for name, cols in positions.items()}
    tmps = {name: p.with_name(f".{p.name}.{os.getpid()}.tmp") for name, p in files.items()}
    outs = {}
    rows = 0
    try:
        for name, tmp in tmps.items():
            outs[name] = open(tmp, "wb")
            outs[name].write(_npy_header(0, len(positions[name])))
        for block in _csv_blocks(table, every):
            for name, out in outs.items():
                np.ascontiguousarray(block[:, where[name]]).tofile(out)
            rows += block.shape[0]
        if rows == 0:
            raise JobError(f"{table.where()} holds no data rows")
        for name, out in outs.items():
            out.seek(0)
            out.write(_npy_header(rows, len(positions[name])))
            out.close()
        for name, tmp in tmps.items():
            os.replace(tmp, files[name])
    finally:
        for out in outs.values():
            out.close()
        for tmp in tmps.values():
            tmp.unlink(missing_ok=True)
    return rows


def _errors(comm: Comm, work: Callable[[], Any]) -> Any:
    """Run ``work()`` on every rank and share a failure: every rank raises the same JobError, or all get results."""
    from shardmill.parallel.comm import share_error  # here, not at the top: predict reads tables without MPI

    error: Exception | None = None
    result = None
    try:
        result = work()
    except JobError as err:
        error = err
    except (OSError, MemoryError) as err:
        error = JobError(f"data cannot be loaded: {err}")  # the wording load_dataset always used
    share_error(comm, error)
    return result


def cached_columns(table: Table, header: str, parts: dict[str, list[str]], folder: Path,
                   comm: Comm) -> dict[str, np.ndarray]:
    """Each part's columns (names, in order) as a memory-mapped read-only (rows, len(part)) float64 array.

    Collective: every rank calls it with the same arguments. A finished cache with the same key is reused;
    otherwise a CSV is converted by rank 0 and a Parquet file by all ranks (contiguous row-group blocks).
    Every stage ends with :func:`shardmill.parallel.comm.share_error`, so a failure anywhere is raised on every rank.
    """
    def prepare():
        positions = {name: select(table, cols, table.field_name) for name, cols in parts.items()}
        if table.kind == "parquet":
            _check_parquet_types(table, sorted({j for cols in positions.values() for j in cols}))
        if comm.rank == 0:
            folder.mkdir(parents=True, exist_ok=True)
        return positions, cache_key(table, header, parts)

    positions, key = _errors(comm, prepare)
    key = comm.broadcast_object(key)  # rank 0's view of the source names the files on every rank
    files, sidecar = _cache_paths(folder, table, key, parts)
    found = comm.broadcast_object(_cached(files, sidecar, key) if comm.rank == 0 else None)  # rank 0 decides
    if not found and table.kind == "csv":
        def convert_on_rank_0():
            if comm.rank == 0:
                rows = _convert_csv(table, positions, files)
                _write_sidecar(sidecar, table, key, parts, rows)
        _errors(comm, convert_on_rank_0)
    elif not found:
        _convert_parquet(table, key, parts, positions, files, sidecar, comm)

    def open_all():
        try:
            arrays = {name: np.load(path, mmap_mode="r", allow_pickle=False) for name, path in files.items()}
        except ValueError as err:  # numpy's message for a damaged header
            raise JobError(f"table cache in {str(folder)!r} cannot be read ({err}); delete it to convert "
                           f"again") from None
        for name, array in arrays.items():
            if array.dtype != np.float64 or array.ndim != 2 or array.shape[1] != len(parts[name]):
                raise JobError(f"table cache {str(files[name])!r} does not hold {len(parts[name])} float64 "
                               f"columns; delete {str(folder)!r} to convert again")
        return arrays

    return _errors(comm, open_all)


def _convert_parquet(table: Table, key: str, parts: dict[str, list[str]], positions: dict[str, list[int]],
                     files: dict[str, Path], sidecar: Path, comm: Comm) -> None:
    """All ranks: rank 0 sizes the files from the metadata, each rank writes its row groups, rank 0 publishes."""
    tmps = {name: p.with_name(f".{p.name}.partial") for name, p in files.items()}  # one writer: the workdir lock
    rows = table.rows or 0

    def create():
        if comm.rank == 0:
            if rows == 0:
                raise JobError(f"{table.where()} holds no data rows")
            for name, tmp in tmps.items():
                np.lib.format.open_memmap(tmp, mode="w+", dtype=np.float64, shape=(rows, len(positions[name])))
    _errors(comm, create)

    def write_my_groups():
        lo, hi = block_range(len(table.group_rows), comm.rank, comm.size)
        if lo == hi:
            return
        every = sorted({j for cols in positions.values() for j in cols})
        where = {name: [every.index(j) for j in cols] for name, cols in positions.items()}
        # Plain positioned writes, not a writable memory map: the written pages do not stay in this process.
        offsets = {name: np.load(tmp, mmap_mode="r", allow_pickle=False).offset for name, tmp in tmps.items()}
        outs = {name: open(tmp, "r+b") for name, tmp in tmps.items()}
        try:
            row = sum(table.group_rows[:lo])
            for block in _parquet_blocks(table, every, range(lo, hi)):
                for name, out in outs.items():
                    out.seek(offsets[name] + row * len(where[name]) * 8)
                    np.ascontiguousarray(block[:, where[name]]).tofile(out)
                row += block.shape[0]
        finally:
            for out in outs.values():
                out.close()
    _errors(comm, write_my_groups)

    def publish():
        if comm.rank == 0:
            for name, tmp in tmps.items():
                os.replace(tmp, files[name])
            _write_sidecar(sidecar, table, key, parts, rows)
    _errors(comm, publish)


# --- what the trainer and predict call -----------------------------------------------------------------------------


