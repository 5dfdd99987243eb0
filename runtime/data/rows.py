"""Data sets, the sampler and sharding.

Inputs are read lazily: ``.npy`` files are memory-mapped, so each rank touches only the rows of its shards
(tables, .csv and .parquet, are converted to memory-mapped .npy caches by ``shardmill.data.tables``).
The sampler draws a seeded permutation per epoch that does not depend on the number of processes; each
rank takes one contiguous slice of every global batch.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
from shardmill.errors import JobError, LocalJobError
from shardmill.kernels import data as data_kernels

_STATS_BLOCK = 1024  # smallest block of the standardisation pass; blocks are fixed, so statistics do not depend on P


def as_numbers(X: np.ndarray, field_name: str) -> np.ndarray:
    """Inputs in a dtype the kernels take: float32 or float64 in this machine's byte order.

    Integers, float16, long double and the other byte order are converted to float64 (loaded into memory);
    anything else (strings, objects, complex numbers) is refused.
    """
    if X.dtype.kind not in "fiu":
        raise JobError(f"`{field_name}` must hold real numbers; got dtype {X.dtype}")
    if X.dtype in (np.dtype(np.float32), np.dtype(np.float64)):
        return X
    return np.asarray(X, dtype=np.float64)


def squeeze_labels(y: np.ndarray) -> np.ndarray:
    """CSV labels arrive as (n, 1); class labels are (n,)."""
    return y[:, 0] if y.ndim == 2 and y.shape[1] == 1 else y


@dataclass
class Split:
    """Row indices (int64, into the full data set) of the training and validation parts."""

    train: np.ndarray
    validation: np.ndarray


def split_rows(n_rows: int, validation_fraction: float, seed: int, folds: int = 0, fold: int = 0,
               groups: np.ndarray | None = None, how: str = "random") -> Split:
    """The training and validation rows, both ascending, the same on every rank and for every P.

    ``how`` (``data.split``): "random" — validation takes the first ⌊f·n⌋ rows of a seeded permutation; "last" —
    the last ⌊f·n⌋ rows in file order (a time series validates on its future); "groups" — whole groups of
    ``groups`` ((n,) labels), taken in a seeded order of the groups until they hold ⌊f·n⌋ rows or more (at least
    one group when f > 0; never every group). With ``folds`` ≥ 2 (k-fold cross-validation, ``data.folds``) the
    split is instead fold ``fold`` of :func:`fold_of_rows` for validation and every other row for training.
    """
    if folds:
        where = fold_of_rows(n_rows, folds, groups) == fold
        return Split(train=np.flatnonzero(~where).astype(np.int64), validation=np.flatnonzero(where).astype(np.int64))
    n_val = int(validation_fraction * n_rows)
    if how == "last":
        held = np.zeros(n_rows, dtype=bool)
        held[n_rows - n_val:] = n_val > 0
        return Split(train=np.flatnonzero(~held).astype(np.int64), validation=np.flatnonzero(held).astype(np.int64))
    if how == "groups":
        return Split(*(np.flatnonzero(side).astype(np.int64) for side in _group_split(groups, n_rows, n_val, seed)))
    perm = np.random.default_rng([seed, 7919]).permutation(n_rows)
    return Split(train=np.sort(perm[n_val:]).astype(np.int64), validation=np.sort(perm[:n_val]).astype(np.int64))


def _group_split(groups: np.ndarray | None, n_rows: int, n_val: int, seed: int) -> tuple[np.ndarray, np.ndarray]:
    """(training mask, validation mask) of whole groups: a seeded order of the groups, validation taking them
    until it holds ``n_val`` rows or more."""
    labels = _group_labels(groups, n_rows, "data.groups")
    _, inverse, counts = np.unique(labels, return_inverse=True, return_counts=True)
    if n_val and counts.size < 2:
        raise JobError(f"`data.split` = 'groups' needs at least two groups in `data.groups`; got {counts.size}")
    order = np.random.default_rng([seed, 7919]).permutation(counts.size)
    taken = np.zeros(counts.size, dtype=bool)
    held = 0
    for g in order[:-1].tolist():  # the last group in the order always trains
        if held >= n_val:
            break
        taken[g], held = True, held + int(counts[g])
    validation = taken[inverse.reshape(-1)]
    return ~validation, validation


def fold_of_rows(n_rows: int, folds: int, groups: np.ndarray | None = None) -> np.ndarray:
    """The fold (0 … k−1) of every row, (n_rows,) int64, for k-fold cross-validation.

    Without ``groups``: contiguous blocks in row order, the first n mod k folds one row longer (so rows near in
    time stay together). With ``groups`` ((n_rows,) labels): every group goes whole into one fold; groups are
    taken largest first (ties: first seen first) and each joins the fold holding the fewest rows so far (ties: the
    lowest fold), which keeps the folds' sizes close. Raises JobError for more folds than rows or groups.
    """
    if folds > n_rows:
        raise JobError(f"`data.folds` = {folds} asks for more folds than the {n_rows} rows")
    if groups is None:
        sizes = np.full(folds, n_rows // folds, dtype=np.int64)
        sizes[:n_rows % folds] += 1
        return np.repeat(np.arange(folds, dtype=np.int64), sizes)
    labels = _group_labels(groups, n_rows, "data.groups")
    _, first, inverse, counts = np.unique(labels, return_index=True, return_inverse=True, return_counts=True)
    if counts.size < folds:
        raise JobError(f"`data.folds` = {folds} asks for more folds than the {counts.size} groups of "
                       f"`data.groups`")
    order = np.lexsort((first, -counts))  # largest first, then first seen
    load = np.zeros(folds, dtype=np.int64)
    fold_of_group = np.empty(counts.size, dtype=np.int64)
    for g in order.tolist():  # one pass over the groups (not the rows)
        target = int(np.argmin(load))
        fold_of_group[g] = target
        load[target] += counts[g]
    return fold_of_group[inverse.reshape(-1)]


def _group_labels(groups: np.ndarray | None, n_rows: int, key: str) -> np.ndarray:
    """The (n_rows,) group labels, checked: one per row, none NaN or inf."""
    if groups is None:
        raise JobError(f"`{key}` must name the group labels (a column of `data.inputs` or a file)")
    labels = np.asarray(groups).reshape(-1)
    if labels.dtype.kind == "f" and not np.isfinite(labels).all():
        raise JobError(f"`{key}` row {int(np.argmin(np.isfinite(labels)))} holds no group (NaN or inf)")
    if labels.size != n_rows:
        raise JobError(f"`{key}` holds {labels.size} labels for {n_rows} rows; give one per row")
    return labels


def block_range(n_blocks: int, rank: int, size: int) -> tuple[int, int]:
    """Contiguous share [lo, hi) of n_blocks items for ``rank`` of ``size`` (uneven when size ∤ n_blocks)."""
    return (rank * n_blocks) // size, ((rank + 1) * n_blocks) // size


def first_of_ranks(row: int | None, comm) -> tuple[int, int]:
    """The smallest of the rows the ranks report (None: nothing to report) and the rank that reported it; (−1, −1)
    when none did. One MIN allreduce of row·P + rank, so every rank gets the same answer."""
    code = np.array([np.iinfo(np.int64).max if row is None else row * comm.size + comm.rank], dtype=np.int64)
    comm.allreduce_min(code)
    if code[0] == np.iinfo(np.int64).max:
        return -1, -1
    return int(code[0] // comm.size), int(code[0] % comm.size)


def column_statistics(X: np.ndarray, rows: np.ndarray, comm) -> tuple[np.ndarray, np.ndarray, tuple[int, int]]:
    """Mean and inverse standard deviation per column over ``rows`` of X, identical on every rank and every P.

    The rows are cut into at most 1024 fixed blocks (their size does not depend on P); each rank sums its
    blocks in float64, every rank receives all block sums (allgather), and all ranks add them in the same
    fixed order. This pass is also the finite check of the data: returns the first non-finite row (index
    into X) and the rank that read it, or (−1, −1). Columns with (near) zero variance get inv_std = 1.

    The sums are of x − k and (x − k)², k the first row of ``rows`` (every rank reads it): σ² = mean((x − k)²) −
    mean(x − k)², the shifted-data algorithm (Chan, Golub & LeVeque 1983), so a column whose mean is large against
    its spread (timestamps, absolute positions) keeps its digits, where mean(x²) − mean(x)² would cancel them.
    A column whose squares overflow float64 (|x| near 10¹⁵⁴ and beyond) is refused (JobError naming it).
    """
    d = X.shape[1]
    block = max(_STATS_BLOCK, -(-rows.size // 1024))
    n_blocks = -(-rows.size // block)
    lo, hi = block_range(n_blocks, comm.rank, comm.size)
    sums = np.zeros((hi - lo, 2 * d), dtype=np.float64)
    first = np.asarray(X[rows[:1]], dtype=np.float64).reshape(-1)[:d] if rows.size else np.zeros(d)
    shift = np.where(np.isfinite(first), first, 0.0) if first.size == d else np.zeros(d)
    bad: int | None = None
    with np.errstate(over="ignore", invalid="ignore"):  # an overflow is found below and refused in words
        for k, b in enumerate(range(lo, hi)):
            chunk = np.asarray(X[rows[b * block:(b + 1) * block]], dtype=np.float64)
            finite = np.isfinite(chunk).all(axis=1)
            if not finite.all():
                row = int(rows[b * block + int(np.argmin(finite))])
                bad = row if bad is None else min(bad, row)
                continue
            centred = chunk - shift
            np.sum(centred, axis=0, out=sums[k, :d])
            np.sum(centred * centred, axis=0, out=sums[k, d:])
    first_bad = first_of_ranks(bad, comm)
    counts = [block_range(n_blocks, r, comm.size)[1] - block_range(n_blocks, r, comm.size)[0]
              for r in range(comm.size)]
    with np.errstate(over="ignore", invalid="ignore"):
        total = comm.allgather_rows(sums, counts).sum(axis=0)
    n = max(rows.size, 1)
    centre = total[:d] / n
    with np.errstate(over="ignore", invalid="ignore"):
        var = np.maximum(total[d:] / n - centre * centre, 0.0)
    if first_bad[0] < 0 and not (np.isfinite(centre).all() and np.isfinite(var).all()):
        column = int(np.argmin(np.isfinite(centre) & np.isfinite(var)))
        raise JobError(f"`data.inputs` column {column} (counting from 0) holds values too large to standardise: their "
                       f"squares overflow float64 (|x| up to about 1.3e154 can be standardised); rescale the column")
    mean = shift + centre
    std = np.sqrt(var)
    inv_std = np.where(std > 1e-12 * np.maximum(1.0, np.abs(mean)), 1.0 / np.where(std > 0, std, 1.0), 1.0)
    return mean, inv_std, first_bad


class Sampler:
    """The global batches of an epoch: batch s of epoch e is rows ``perm_e[s·G:(s+1)·G]`` of the training set.

    perm_e comes from ``default_rng([seed, e])``, so every rank and every process count P sees the same
    global batches. The last partial batch of an epoch is dropped.
    """

    def __init__(self, train_rows: np.ndarray, global_batch: int, seed: int) -> None:
        if global_batch > train_rows.size:
            raise JobError(f"`run.global_batch` must be ≤ the {train_rows.size} training rows; got {global_batch}")
        self.rows = train_rows
        self.global_batch = global_batch
        self.seed = seed
        self._epoch = -1
        self._perm = train_rows

    @property
    def steps_per_epoch(self) -> int:
        return self.rows.size // self.global_batch

    def batch(self, epoch: int, step_in_epoch: int) -> np.ndarray:
        """The G row indices (into the data set) of one global batch, int64 (G,)."""
        if epoch != self._epoch:
            self._perm = self.rows[np.random.default_rng([self.seed, epoch]).permutation(self.rows.size)]
            self._epoch = epoch
        G = self.global_batch
        return self._perm[step_in_epoch * G:(step_in_epoch + 1) * G]


def shard(global_rows: np.ndarray, rank: int, size: int) -> np.ndarray:
    """This rank's contiguous slice [lo, hi) of a global batch (uneven when P ∤ G)."""
    lo, hi = block_range(global_rows.size, rank, size)
    return global_rows[lo:hi]


def take_rows(X: np.ndarray, rows: np.ndarray, mean: np.ndarray, inv_std: np.ndarray, out: np.ndarray) -> None:
    """Copy the standardised rows of X into the batch buffer ``out[:len(rows)]``; raise on a non-finite row."""
    if rows.size > out.shape[0] or X.shape[1] != out.shape[1]:  # the kernel does not check bounds: never write past
        raise ValueError(f"take_rows: {rows.size} rows of width {X.shape[1]} do not fit a buffer of shape {out.shape}")
    bad = data_kernels.take_rows(X, rows, mean, inv_std, out)
    if bad >= 0:
        raise LocalJobError(f"`data.inputs` row {int(rows[bad])} holds a non-finite value (NaN or inf)")
