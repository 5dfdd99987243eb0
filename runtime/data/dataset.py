"""A job's data set on one rank: inputs (possibly memory-mapped), checked targets, the split and statistics."""

from __future__ import annotations

import hashlib
import math
import os
from dataclasses import dataclass, field
from typing import Any

import numpy as np
from shardmill.config import Job
from shardmill.data.categories import Category
from shardmill.data.files import open_job_column, open_job_data, open_job_weights
from shardmill.data.rows import Split, as_numbers, block_range, column_statistics, first_of_ranks, split_rows
from shardmill.data.validation import join_validation, validation_job
from shardmill.errors import JobError, LocalJobError
from shardmill.model.activations import OUTPUTS
from shardmill.model.mlp import MLP, check_weights
from shardmill.parallel.comm import Comm, share_error


@dataclass
class Dataset:
    """Inputs (possibly memory-mapped), validated targets, the split, and standardisation statistics."""

    X: np.ndarray
    targets: np.ndarray
    split: Split
    mean: np.ndarray
    inv_std: np.ndarray
    feature_names: list[str] | None = None  # the inputs' column names when they came from a table with names
    weights: np.ndarray | None = None  # (n,) float64 per row: sample × class weight; None: every row weighs 1
    class_weights: list[float] | None = None  # the class weights used (data.class_weights resolved), or None
    categories: list[Category] = field(default_factory=list)  # the categorical columns' vocabularies and widths
    codes: np.ndarray | None = None  # (n, c) int64 category codes of every row (0: unknown); None without any
    target_mean: np.ndarray | None = None  # (k,) float64: the targets' scaling (data.standardize_targets), or None
    target_std: np.ndarray | None = None  # (k,) float64, > 0: ``targets`` holds (t − target_mean) / target_std
    inputs_file: tuple[str, int] | None = None  # memory-mapped inputs: (file, the bytes the array needs)

    def check_inputs_file(self) -> None:
        """Refuse (LocalJobError) to read memory-mapped inputs whose file has become shorter than the array: a read
        past its end would end the process with SIGBUS ("Bus error"), not a message. One ``os.stat`` per call."""
        if self.inputs_file is None:
            return
        name, needed = self.inputs_file
        try:
            size = os.stat(name).st_size
        except OSError as err:
            raise LocalJobError(f"`data.inputs` {name!r} cannot be read any more: {err.strerror or err}") from None
        if size < needed:
            raise LocalJobError(f"`data.inputs` {name!r} was cut to {size:,} bytes while the job reads it "
                                f"({needed:,} expected); something rewrote the file under the running job")

    def target_record(self) -> dict[str, list[float]] | None:
        """What a checkpoint keeps of the target scaling, to refuse a resume whose targets scale otherwise."""
        if self.target_mean is None or self.target_std is None:
            return None
        return {"mean": self.target_mean.tolist(), "std": self.target_std.tolist()}

    def weight_record(self) -> dict[str, Any] | None:
        """What a checkpoint keeps of the weights, to refuse a resume whose weights differ: the class weights, Σ w
        over the training rows (correctly rounded; for the message) and the SHA-256 of every row's weight (float64),
        or None for an unweighted run."""
        if self.weights is None:
            return None
        return {"class_weights": self.class_weights, "training_sum": math.fsum(self.weights[self.split.train]),
                "sha256": hashlib.sha256(np.ascontiguousarray(self.weights, dtype=np.float64).tobytes()).hexdigest()}


@dataclass(frozen=True)
class Arrays:
    """A job's data given in memory instead of files (``shardmill.train(job, inputs=…, targets=…)``): inputs
    (n, d) real, targets as the loss takes them ((n,) labels or (n, k) values), weights (n,) ≥ 0 or None. Every rank
    must hold the same arrays (checked)."""

    inputs: np.ndarray
    targets: np.ndarray
    weights: np.ndarray | None = None


def check_arrays(job: Job, arrays: Arrays, comm: Comm) -> None:
    """Refuse, alike on every rank, arrays given beside data files or categorical columns, and arrays that differ
    between ranks (every rank must train on the same rows)."""
    error: Exception | None = None
    given = [f"`data.{key}` = {value!r}" for key, value in (("inputs", job.data.inputs), ("targets", job.data.targets),
                                                          ("target", job.data.target), ("weights", job.data.weights))
             if value]
    if given:
        error = JobError(f"the data is given as arrays, so the job must not name data files or columns too; it has "
                         f"{', '.join(given)}")
    elif job.data.categorical:
        error = JobError("`data.categorical` needs a table (`data.inputs` = a .csv or .parquet file); arrays in memory "
                         "carry numbers only")
    share_error(comm, error)
    for name, array in (("inputs", arrays.inputs), ("targets", arrays.targets), ("weights", arrays.weights)):
        if array is not None and comm.size > 1 and not comm.all_equal(np.asarray(array)):
            raise JobError(f"the `{name}` array differs between ranks; every rank must pass the same data")


def load_dataset(job: Job, model: MLP, comm: Comm, categories: list[Category] | None = None,
                 codes: np.ndarray | None = None, arrays: Arrays | None = None) -> Dataset:
    """Open and check the data on every rank; any rank's failure is raised identically on all ranks.
    ``categories``, ``codes``: the categorical columns (``data/categories.py`` ``load_categories``), if any;
    ``arrays``: the data in memory instead of the job's files."""
    error: Exception | None = None
    targets = None
    n_train = None  # rows of data.inputs when data.validation adds its own after them
    if arrays is None:
        X, y, feature_names = open_job_data(job, comm)  # collective; its own failures are raised alike on every rank
        if job.data.validation:
            X, y, n_train = join_validation(job, X, y, feature_names, comm)
    else:  # checked by check_arrays first (the Trainer does, before the categorical columns would be read)
        X, y, feature_names = np.asarray(arrays.inputs), np.asarray(arrays.targets), None
    mapped = X if isinstance(X, np.memmap) and X.filename is not None else None
    inputs_file = None if mapped is None else (str(mapped.filename), int(mapped.offset + mapped.nbytes))
    where = "data.target" if job.data.target else "data.targets"
    try:
        X = as_numbers(np.asarray(X), "data.inputs")
        model.check_inputs(X, "data.inputs")
        if y.shape[0] != X.shape[0]:
            raise JobError(f"`{where}` has {y.shape[0]} rows but `data.inputs` has {X.shape[0]}")
        if codes is not None and codes.shape[0] != X.shape[0]:
            raise JobError(f"`data.categorical` read {codes.shape[0]} rows but `data.inputs` has {X.shape[0]}")
        targets = model.check_targets(y, X.shape[0], where)
    except (JobError, OSError, MemoryError) as err:
        error = err if isinstance(err, JobError) else JobError(f"data cannot be loaded: {err}")
    share_error(comm, error)
    split = job_split(job, X.shape[0], comm, n_train)
    if split.train.size == 0:
        raise JobError("`data.validation_fraction` leaves no training rows")
    mean, inv_std, (bad, rank) = column_statistics(X, split.train if job.data.standardize else split.train[:0],
                                                   comm)
    if bad < 0 and not job.data.standardize:  # the statistics pass above checked no training row
        bad, rank = _first_nonfinite(X, split.train, comm)
    if bad < 0 and split.validation.size:
        bad, rank = _first_nonfinite(X, split.validation, comm)
    if bad >= 0:
        where = f"[rank {rank}] " if comm.size > 1 else ""
        raise JobError(f"{where}`data.inputs` row {bad} holds a non-finite value (NaN or inf)")
    if not job.data.standardize:
        mean, inv_std = np.zeros(X.shape[1]), np.ones(X.shape[1])
    target_mean, target_std = target_statistics(job, model, targets, y, split)
    if target_mean is not None:
        targets = ((np.asarray(y, dtype=np.float64).reshape(targets.shape) - target_mean) / target_std
                   ).astype(targets.dtype)
    # collective; the same array on every rank, so the checks agree
    raw_weights = open_job_weights(job, comm) if arrays is None else arrays.weights
    if raw_weights is not None and n_train is not None:  # a weights column of both tables
        more = open_job_weights(validation_job(job), comm)
        raw_weights = np.concatenate([raw_weights.reshape(-1), more.reshape(-1)])
    weights, class_weights = row_weights(job, targets, split, raw_weights, model.sizes[-1])
    return Dataset(X=X, targets=targets, split=split, mean=mean, inv_std=inv_std, feature_names=feature_names,
                   weights=weights, class_weights=class_weights, categories=list(categories or []), codes=codes,
                   target_mean=target_mean, target_std=target_std, inputs_file=inputs_file)


def job_split(job: Job, n_rows: int, comm: Comm, n_train: int | None = None) -> Split:
    """The job's training and validation rows (:func:`rows.split_rows`), with the fold keys' groups read
    (collective: a group column or file is read alike on every rank). ``n_train``: with ``data.validation``, the
    first ``n_train`` rows train and the rest (the validation table's) validate."""
    data = job.data
    if n_train is not None:
        return Split(train=np.arange(n_train, dtype=np.int64), validation=np.arange(n_train, n_rows, dtype=np.int64))
    groups = open_job_column(job, comm, "data.groups") if data.groups else None
    return split_rows(n_rows, data.validation_fraction, job.run.seed, data.folds, data.fold, groups, data.split)


def scales_targets(job: Job, model: MLP) -> bool:
    """Whether the job trains on standardised targets: ``data.standardize_targets`` with a loss of real targets
    of any scale (squared_error, huber, absolute_error) and an identity output. A bounded output (sigmoid, tanh…)
    was chosen for the targets' own range, and poisson's counts and the classifiers' labels are not scaled."""
    return bool(job.data.standardize_targets and model.loss_entry.scaled_targets
                and OUTPUTS[model.output].unbounded)


def target_statistics(job: Job, model: MLP, targets: np.ndarray, raw: np.ndarray,
                      split: Split) -> tuple[np.ndarray | None, np.ndarray | None]:
    """The mean and standard deviation of each output's targets over the training rows, (k,) float64 each (a
    constant target's deviation counts as 1), from the ``raw`` targets in float64; (None, None) when the job does
    not scale them (:func:`scales_targets`). Every rank holds every target, so every rank and every P computes the
    same bits."""
    if not scales_targets(job, model):
        return None, None
    values = np.asarray(raw, dtype=np.float64).reshape(targets.shape)[split.train]
    mean = values.mean(axis=0)
    std = values.std(axis=0)
    std[~(std > 0)] = 1.0
    return mean, std


def row_weights(job: Job, targets: np.ndarray, split: Split, raw: np.ndarray | None,
                classes: int) -> tuple[np.ndarray | None, list[float] | None]:
    """Each row's weight, (n,) float64: ``data.weights`` × the weight of the row's class (``data.class_weights``),
    and the class weights used; (None, None) when the job has neither.

    "balanced" gives class c the weight n / (m · n_c) over the training rows, m the classes present there (as
    scikit-learn's ``compute_class_weight``); a class absent from the training rows weighs 1. Raises JobError,
    alike on every rank (every rank holds the same weights), for a negative or non-finite weight or weights that
    sum to zero over the training rows.
    """
    given = job.data.class_weights
    if raw is None and given == "":
        return None, None
    n = targets.shape[0]
    weights = np.ones(n) if raw is None else check_weights(np.asarray(raw), n, "data.weights")
    class_weights = None
    if given != "":
        if given == "balanced":
            counts = np.bincount(targets[split.train], minlength=classes)
            present = int(np.count_nonzero(counts))
            class_weights = [split.train.size / (present * c) if c else 1.0 for c in counts.tolist()]
        else:
            class_weights = list(given)
        weights = weights * np.asarray(class_weights)[targets]
    if not weights[split.train].any():
        raise JobError("the row weights (`data.weights` × `data.class_weights`) sum to zero over the training rows")
    if split.validation.size and not weights[split.validation].any():
        raise JobError("the row weights (`data.weights` × `data.class_weights`) sum to zero over the validation rows, "
                       "so validation.loss would mean nothing; give some of them weight, or set "
                       "`data.validation_fraction` = 0")
    return weights, class_weights


def _first_nonfinite(X: np.ndarray, rows: np.ndarray, comm: Comm) -> tuple[int, int]:
    """The first row of ``rows`` (in this rank's block order) holding a NaN or inf, and the rank that read it."""
    lo, hi = block_range(rows.size, comm.rank, comm.size)
    bad: int | None = None
    for start in range(lo, hi, 4096):  # blocks: a rank's part of a memory-mapped set may not fit in memory
        finite = np.isfinite(np.asarray(X[rows[start:min(start + 4096, hi)]])).all(axis=1)
        if not finite.all():
            bad = int(rows[start + int(np.argmin(finite))])
            break
    return first_of_ranks(bad, comm)
