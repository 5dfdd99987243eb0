"""``shardmill expand JOB``: the job checked — its keys and its data — and printed with every default filled in.

The keys are checked as training checks them (``config.load_job``). The data is looked at without converting
anything: the files exist; every column the job names (``data.target``, ``data.features``, ``data.categorical``,
a ``data.weights`` column) is in the table; and the first :data:`PREVIEW_ROWS` rows of the columns that must hold
numbers (features, targets, weights) do. A .npy file is checked by its header (shape, dtype). The whole table is
checked when training converts it; this is the quick look before a job is queued.
"""

from __future__ import annotations

import csv
import math
from itertools import islice
from pathlib import Path

import numpy as np
from shardmill.config import Job
from shardmill.data.files import weights_are_a_file
from shardmill.data.tables import describe, is_table, select
from shardmill.errors import JobError

PREVIEW_ROWS = 1000
"""Rows of a CSV table whose numeric columns :func:`check_data` reads."""
_SHOWN = 40  # characters of a bad value shown in a message


def _names(value: str | list[str]) -> list[str]:
    return [value] if isinstance(value, str) and value else list(value or [])


def check_data(job: Job) -> list[str]:
    """Look at the job's data without converting it; returns what was checked, in words. Raises JobError naming
    the key, the file, the column and the value when something training would refuse is already visible."""
    data = job.data
    if not data.inputs:
        return ["no data files named (arrays in memory, or a job for bench): nothing to look at"]
    checked = []
    inputs = job.path(data.inputs)
    if not inputs.is_file():
        raise JobError(f"`data.inputs` file {str(inputs)!r} does not exist")
    if is_table(inputs):
        table = describe(inputs, "data.inputs", data.header)
        target, categorical = _names(data.target), list(data.categorical)
        weights = [] if not data.weights or weights_are_a_file(data.weights) else [data.weights]
        select(table, target, "data.target")
        select(table, list(data.features), "data.features")
        select(table, categorical, "data.categorical")
        select(table, weights, "data.weights")
        features = list(data.features) or [c for c in table.columns if c not in target + weights + categorical]
        numeric = features + target + weights
        if table.kind == "csv":
            rows = _preview_csv(table, numeric)
            checked.append(f"{str(inputs)!r}: the named columns exist; the first {rows} rows of {len(numeric)} "
                           f"numeric columns hold numbers")
        else:
            _parquet_types(inputs, numeric)
            checked.append(f"{str(inputs)!r}: the named columns exist and {len(numeric)} of them are numeric")
    else:
        checked.append(_array_header(inputs, "data.inputs"))
    for key, value in (("data.targets", data.targets),
                       ("data.weights", data.weights if weights_are_a_file(data.weights) else "")):
        if value:
            path = job.path(value)
            if not path.is_file():
                raise JobError(f"`{key}` file {str(path)!r} does not exist")
            if path.suffix.lower() == ".npy":
                checked.append(_array_header(path, key))
    return checked


def _short(text: str) -> str:
    return text if len(text) <= _SHOWN else text[:_SHOWN] + f"… ({len(text):,} characters)"


def _preview_csv(table, numeric: list[str]) -> int:
    """Read the first PREVIEW_ROWS rows of a CSV table; refuse a numeric column's field that is not a number."""
    positions = dict(zip(numeric, select(table, numeric, "data.inputs"), strict=True))
    csv.field_size_limit(max(csv.field_size_limit(), 1 << 24))
    count = 0
    with open(table.path, newline="", encoding="utf-8-sig", errors="replace") as f:
        reader = csv.reader(f)
        if table.named:
            next(reader, None)
        for count, row in enumerate(islice(reader, PREVIEW_ROWS), start=1):
            line = table.first_line + count - (0 if table.named else 1)
            for name, j in positions.items():
                field = row[j].strip() if j < len(row) else ""
                try:
                    value = float(field)
                except ValueError:
                    value = math.nan if field == "" else None
                if value is None:
                    raise JobError(f"{str(table.path)!r} line {line}, column {name!r}: {_short(field)!r} is not a "
                                   f"number; list the column in `data.categorical` if it holds categories")
    return count


def _parquet_types(path: Path, numeric: list[str]) -> None:
    import pyarrow.parquet as pq
    import pyarrow.types as pt

    schema = pq.read_schema(path)
    for name in numeric:
        kind = schema.field(name).type
        if not (pt.is_integer(kind) or pt.is_floating(kind) or pt.is_boolean(kind)):
            raise JobError(f"{str(path)!r} column {name!r} holds {kind}, not numbers; list it in `data.categorical` "
                           f"if it holds categories")


def _array_header(path: Path, key: str) -> str:
    if path.suffix.lower() != ".npy":
        return f"{str(path)!r}: exists"
    try:
        array = np.load(path, mmap_mode="r", allow_pickle=False)
    except (ValueError, OSError) as err:
        raise JobError(f"`{key}` file {str(path)!r} cannot be read as .npy: {_short(str(err))}") from None
    if array.dtype.kind not in "biuf":
        raise JobError(f"`{key}` file {str(path)!r} holds {array.dtype}, not real numbers")
    return f"{str(path)!r}: {array.shape} {array.dtype}"
