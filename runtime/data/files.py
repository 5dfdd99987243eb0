"""Reading the job's data files: one entry for arrays (.npy, .npz, plain .csv) and tables (.csv, .parquet).

``read_array`` reads any supported file whole; ``open_job_data`` opens a job's inputs and targets (collective);
``read_inputs`` reads rows for prediction, selecting columns by name.
"""

from __future__ import annotations

import zipfile
from pathlib import Path
from typing import TYPE_CHECKING

import numpy as np
from shardmill.config import Job
from shardmill.data.rows import squeeze_labels
from shardmill.data.tables import _errors, _listing, cached_columns, describe, is_table, read_table, select
from shardmill.errors import JobError
from shardmill.model.losses import LOSSES

if TYPE_CHECKING:
    from shardmill.parallel.comm import Comm  # not at run time: predict reads files without MPI


def read_array(path: Path, field_name: str, mmap: bool = True) -> np.ndarray:
    """Read a .npy (memory-mapped), .npz (its only array, or `x`/`y`), .csv (comma-separated numbers, with or
    without a header row) or .parquet (every column, float64, in memory; needs pyarrow).

    A .csv whose first row holds a field that is not a number, and any .parquet, are read by
    :mod:`shardmill.data.tables` (every column, float64, in memory); a plain numeric .csv by ``numpy.loadtxt``.
    """
    if not path.is_file():
        raise JobError(f"`{field_name}` file {str(path)!r} does not exist")
    suffix = path.suffix.lower()
    if suffix in (".csv", ".parquet"):
        from shardmill.data import tables

        table = tables.describe(path, field_name)
        if table.named:
            return tables.read_table(table, list(range(len(table.columns))))
    try:
        if suffix == ".npy":
            return np.load(path, mmap_mode="r" if mmap else None, allow_pickle=False)
        if suffix == ".npz":
            with np.load(path, allow_pickle=False) as archive:
                keys = list(archive.keys())
                key = keys[0] if len(keys) == 1 else next((k for k in ("x", "y", "X", "inputs", "targets")
                                                            if k in keys), None)
                if key is None:
                    raise JobError(f"`{field_name}` archive {str(path)!r} holds {keys}; store one array")
                return archive[key]
        if suffix == ".csv":
            return np.loadtxt(path, delimiter=",", ndmin=2, dtype=np.float64)
    except JobError:
        raise
    except (ValueError, OSError, EOFError, KeyError, zipfile.BadZipFile) as err:
        # numpy's own messages for an empty, truncated or damaged file (a bad CRC, a short header…)
        raise JobError(f"`{field_name}` file {str(path)!r} cannot be read: {err or type(err).__name__}") from None
    raise JobError(f"`{field_name}` must be a .npy, .npz, .csv or .parquet file; got {str(path)!r}")


def _names(value: str | list[str]) -> list[str]:
    return [value] if isinstance(value, str) and value else list(value or [])


def _labels(y: np.ndarray, loss: str) -> np.ndarray:
    """Class labels read from a table arrive as float64; whole numbers become int64 (as ``MLP.check_targets``
    takes them). Anything else is left for ``check_targets`` to refuse with its row (``Loss.table_labels``)."""
    return LOSSES[loss].table_labels(y)


def open_job_data(job: Job, comm: Comm) -> tuple[np.ndarray, np.ndarray, list[str] | None]:
    """X (n, d) as read_array gives it (memory-mapped where possible), raw targets y ((n,) or (n, k), in memory),
    and the input column names (None when the inputs are a plain array with no names).

    Collective (every rank calls it); any failure is raised as the same JobError on every rank. Tables (.csv,
    .parquet) become float64 caches under ``workdir/tables``; .npy (memory-mapped) and .npz read as before.
    ``data.target`` takes the targets from columns of the inputs table; ``data.features`` picks and orders the
    inputs' columns (default: every column that is not a target). One-column targets come out as (n,); whole-valued
    class labels read from a table as int64. A CSV without a header row gives names only through ``data.features``.
    """
    data = job.data
    target = _names(data.target)
    folder = job.workdir / "tables"

    def inspect():
        if not data.inputs:
            raise JobError("`data.inputs` must name a file")
        if not target and not data.targets:
            raise JobError("`data.targets` must name a file, or `data.target` the target column(s) of `data.inputs`")
        path = job.path(data.inputs)
        if (target or data.features) and not is_table(path):
            key = "data.target" if target else "data.features"
            raise JobError(f"`{key}` selects columns by name, but `data.inputs` {str(path)!r} is a "
                           f"{path.suffix or 'suffix-less'} array without column names; store the inputs as .csv "
                           f"or .parquet, or give `data.targets` (a file) and leave `{key}` empty")
        inputs = describe(path, "data.inputs", data.header) if is_table(path) else None
        features = None
        if inputs is not None:
            select(inputs, target, "data.target")
            select(inputs, list(data.features), "data.features")
            select(inputs, list(data.categorical), "data.categorical")
            weight_column = [] if weights_are_a_file(data.weights) else _names(data.weights)
            select(inputs, weight_column, "data.weights")
            group_column = [] if weights_are_a_file(data.groups) else _names(data.groups)
            select(inputs, group_column, "data.groups")
            taken = target + weight_column + group_column + list(data.categorical)
            features = list(data.features) or [c for c in inputs.columns if c not in taken]
            if not features:
                raise JobError(f"`data.inputs` {str(path)!r} has no column left for the inputs once the target "
                               f"column(s) {_listing(target)} are taken")
            _check_width(job, len(features), f"`data.inputs` {str(path)!r}")  # before any column is converted
        targets = None
        if not target and is_table(job.path(data.targets)):
            targets = describe(job.path(data.targets), "data.targets", data.header)
        return inputs, features, targets

    inputs, features, targets = _errors(comm, inspect)

    if inputs is None:
        def read_plain():
            X = read_array(job.path(data.inputs), "data.inputs")
            if X.ndim == 2:
                _check_width(job, X.shape[1], f"`data.inputs` {str(job.path(data.inputs))!r}")
            return X

        X = _errors(comm, read_plain)
        names = None
    else:
        parts = {"inputs": features, **({"targets": target} if target else {})}
        arrays = cached_columns(inputs, data.header, parts, folder, comm)
        X = arrays["inputs"]
        names = features if inputs.named or data.features else None
        if target:
            return X, _labels(squeeze_labels(np.array(arrays["targets"])), job.model.loss), names

    if targets is None:  # .npy / .npz: exactly as before
        y = _errors(comm, lambda: read_array(job.path(data.targets), "data.targets", mmap=False))
        return X, squeeze_labels(np.asarray(y)), names
    arrays = cached_columns(targets, data.header, {"targets": list(targets.columns)}, folder, comm)
    return X, _labels(squeeze_labels(np.array(arrays["targets"])), job.model.loss), names


def _check_width(job: Job, columns: int, source: str) -> None:
    """``model.layers[0]`` must count the numeric input columns plus one per categorical column (each becomes one
    embedding); a JobError naming the layer, its value and the columns ``source`` gives when it does not."""
    layers = job.model.layers
    categorical = len(job.data.categorical)
    if not layers or layers[0] == columns + categorical:
        return
    also = f" and {categorical} categorical column(s)" if categorical else ""
    raise JobError(f"`model.layers[0]` = {layers[0]} does not match the data: {source} gives {columns} numeric "
                   f"input column(s){also}; set `model.layers[0]` to {columns + categorical}")


FILE_SUFFIXES = (".npy", ".npz", ".csv", ".parquet")


def weights_are_a_file(value: str) -> bool:
    """``data.weights`` names a file when it ends in a data file's suffix, else a column of ``data.inputs``."""
    return value.lower().endswith(FILE_SUFFIXES)


def open_job_weights(job: Job, comm: Comm) -> np.ndarray | None:
    """The raw sample weights of every row ((n,) or (n, 1), in memory), or None without ``data.weights``.

    Collective, like :func:`open_job_data`: a file is read whole on every rank; a column of the inputs table comes
    from the table's cache (converted once, like the inputs). Checks of the values are the caller's.
    """
    return open_job_column(job, comm, "data.weights")


def open_job_column(job: Job, comm: Comm, key: str) -> np.ndarray | None:
    """One value per row named by the data key ``key`` (``data.weights``, ``data.groups``): a file, read
    whole on every rank, or a column of the inputs table from its cache; (n,) or (n, 1), or None when the key is
    empty. Collective; failures are raised alike on every rank."""
    value = getattr(job.data, key.split(".")[1])
    if not value:
        return None
    if weights_are_a_file(value):
        return np.asarray(_errors(comm, lambda: read_array(job.path(value), key, mmap=False)))
    path = job.path(job.data.inputs)

    def inspect():
        if not is_table(path):
            raise JobError(f"`{key}` = {value!r} names a column, but `data.inputs` {str(path)!r} is an array "
                           f"without column names; give a file ({', '.join(FILE_SUFFIXES)}) instead")
        table = describe(path, "data.inputs", job.data.header)
        select(table, [value], key)
        return table

    table = _errors(comm, inspect)
    part = key.split(".")[1]
    arrays = cached_columns(table, job.data.header, {part: [value]}, job.workdir / "tables", comm)
    return np.array(arrays[part])


def read_inputs(path: Path, field_name: str, features: list[str] | None = None, header: str = "auto",
                drop: list[str] | None = None) -> np.ndarray:
    """Inputs for prediction (in memory, float64): .npy/.npz/.csv/.parquet; select `features` by name when given
    (a table holding more columns, e.g. the training table with its target column), else every column not in drop.

    A plain array (.npy, .npz, a CSV without a header row) has no names: it is taken whole, and with ``features``
    given it must have exactly that many columns (a headerless CSV may also be picked by position names "0", …).
    Names in ``drop`` that the table lacks are ignored (a prediction table usually has no target column).
    """
    if not is_table(path):
        X = np.asarray(read_array(path, field_name, mmap=False))
        if X.dtype.kind not in "fiub":
            raise JobError(f"`{field_name}` must hold real numbers; got dtype {X.dtype}")
        X = np.asarray(X, dtype=np.float64)
        if features and (X.ndim != 2 or X.shape[1] != len(features)):
            raise JobError(f"`{field_name}` {str(path)!r} is an array of shape {X.shape} without column names; the "
                           f"model takes {len(features)} columns ({_listing(list(features))})")
        return X
    table = describe(path, field_name, header)
    if features:
        features = list(features)
        if table.named or all(name in table.columns for name in features):
            columns = select(table, features, field_name)
        elif len(table.columns) == len(features):
            columns = list(range(len(features)))
        else:
            raise JobError(f"{table.where()} has no header row and {len(table.columns)} columns; the model takes "
                           f"{len(features)} columns ({_listing(features)})")
    else:
        dropped = set(drop or [])
        columns = [j for j, name in enumerate(table.columns) if name not in dropped]
        if not columns:
            raise JobError(f"{table.where()} has no column left once {sorted(dropped)} are dropped")
    return read_table(table, columns)
