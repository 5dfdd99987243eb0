"""Validation rows from a table of their own (``data.validation``): read exactly as ``data.inputs`` is, then joined
after its rows, so the rest of the runtime sees one data set whose last rows validate.

The two tables' converted caches (``workdir/tables``) are joined into one memory-mapped .npy there by rank 0, in
blocks (a table larger than memory stays on disk); every rank then maps it. Collective throughout.
"""

from __future__ import annotations

import dataclasses
import hashlib
import os

import numpy as np
from shardmill.config import Job
from shardmill.data.files import open_job_data
from shardmill.data.tables import describe
from shardmill.errors import JobError
from shardmill.parallel.comm import Comm, lead_then_share, share_error

_BLOCK_ROWS = 65536  # rows copied at a time while joining


def validation_job(job: Job, features: list[str] | None = None) -> Job:
    """The job with ``data.inputs`` = ``data.validation``: its columns are read as the inputs' are (``features``:
    the inputs' own feature columns, so the validation table's are taken by name, in the same order)."""
    data = dataclasses.replace(job.data, inputs=job.data.validation, validation="",
                               features=list(features) if features else job.data.features)
    return dataclasses.replace(job, data=data)


def join_validation(job: Job, X: np.ndarray, y: np.ndarray, names: list[str] | None,
                    comm: Comm) -> tuple[np.ndarray, np.ndarray, int]:
    """(inputs of every row, targets of every row, rows of ``data.inputs``): the validation table's rows after the
    training table's, its columns taken by the inputs' names (others ignored). Refuses, alike on every rank, a
    validation table that lacks one of them."""
    data = job.data
    error = None
    try:
        table = describe(job.path(data.validation), "data.validation", data.header)
        weights = [] if not data.weights else [data.weights]
        targets = [data.target] if isinstance(data.target, str) else list(data.target)
        missing = [c for c in [*(names or []), *targets, *data.categorical, *weights] if c not in table.columns]
        if missing:
            raise JobError(f"`data.validation` {data.validation!r} lacks the column(s) {missing} that "
                           f"`data.inputs` has; the two tables must hold the same columns")
    except JobError as err:
        error = err
    share_error(comm, error)
    Xv, yv, _ = open_job_data(validation_job(job, names), comm)
    return _joined(X, Xv, job, comm), np.concatenate([np.asarray(y), np.asarray(yv)]), int(X.shape[0])


def _joined(X: np.ndarray, Xv: np.ndarray, job: Job, comm: Comm) -> np.ndarray:
    if not (isinstance(X, np.memmap) and isinstance(Xv, np.memmap) and X.filename and Xv.filename):
        return np.concatenate([np.asarray(X), np.asarray(Xv)])
    stamp = "|".join(f"{a.filename}:{a.shape}:{os.stat(a.filename).st_mtime_ns}" for a in (X, Xv))
    path = job.workdir / "tables" / f"joined-{hashlib.sha256(stamp.encode()).hexdigest()[:20]}.npy"
    n, d = X.shape[0] + Xv.shape[0], X.shape[1]

    def write() -> None:
        if path.is_file():  # written whole by an earlier start (renamed into place only when complete)
            return
        tmp = path.with_name(f".{path.name}.tmp-{os.getpid()}")
        try:
            out = np.lib.format.open_memmap(tmp, mode="w+", dtype=X.dtype, shape=(n, d))
            for source, offset in ((X, 0), (Xv, X.shape[0])):
                for start in range(0, source.shape[0], _BLOCK_ROWS):
                    block = source[start:start + _BLOCK_ROWS]
                    out[offset + start:offset + start + block.shape[0]] = block
            out.flush()
            del out
            os.replace(tmp, path)
        finally:
            tmp.unlink(missing_ok=True)

    lead_then_share(comm, write)
    return np.load(path, mmap_mode="r", allow_pickle=False)
