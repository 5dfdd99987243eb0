"""Exchange strategies: how a step turns this rank's rows into the summed gradient every rank holds.

The step calls one interface and does not know the mode (``Trainer.gradient`` and ``Trainer.step``)::

    for part, out in exchange.parts(rows):   # this rank's share of the global batch, and where its gradient goes
        forward, loss, backward into out      # calling exchange.layer_done(l) as each layer's gradient is complete
        exchange.add(out)                     # the part's gradient joins this rank's sum
    exchange.finish()                         # owned_gradient(): the mean gradient of params[exchange.owned]
    clip with exchange.sum_squares(); update params[exchange.owned]
    exchange.publish(params)                  # every rank holds every parameter again

A strategy is two independent choices, composed in :class:`Exchange`:

* who updates (``run.update``, ``ownership.py``): :class:`~shardmill.parallel.ownership.Replicated` (every rank
  all parameters) or :class:`~shardmill.parallel.ownership.Sharded` (each rank its slice, then ``publish``
  allgathers the parameters);
* how the sum is formed (``run.reduction`` and ``run.exact_format``, ``summation.py``):
  :class:`~shardmill.parallel.summation.MessageSum` (fast: messages of whole layers summed as backward finishes
  them) or :class:`~shardmill.parallel.summation.ExactSum` (fixed chunks added exactly in the wide, compact or
  narrow format of ``exactformats.py``, the same bits for every P).

Each part states the collectives it sends per step (``collectives``); :meth:`Strategy.collectives` joins them, and
the cost model (``scaling/costmodel.py``) prices what it reads there. Nothing here imports MPI at module level.
"""

from __future__ import annotations

import dataclasses
from collections.abc import Iterator
from typing import TYPE_CHECKING

import numpy as np
from shardmill.errors import JobError
from shardmill.parallel.collectives import Collective
from shardmill.parallel.ownership import Ownership, Replicated, Sharded
from shardmill.parallel.summation import ExactSum, ExactSums, FloatSums, MessageSum

if TYPE_CHECKING:  # the cost model reads the statements without MPI
    from shardmill.config import Job, RunSpec
    from shardmill.model.mlp import MLP
    from shardmill.parallel.comm import Comm

Summation = MessageSum | ExactSum
"""Either summation: the same attributes and methods, no shared base class."""


class Exchange:
    """The interface the step calls: each call goes to the part that decides it, ownership or summation.

    ``sharded`` comes from the ownership and is the same on every rank: never derive a collective's presence
    from a rank's own slice (a rank of a tiny model may own every parameter, or none, while the others still run
    the sharded collectives).
    """

    def __init__(self, ownership: Ownership, summation: Summation) -> None:
        self.ownership = ownership
        self.summation = summation

    # -- who updates (the ownership) ----------------------------------------------------------------------------

    @property
    def owned(self) -> slice:
        """The parameters this rank updates: a contiguous slice of the flat layout."""
        return self.ownership.owned

    @property
    def owned_size(self) -> int:
        """Number of parameters this rank updates: the length of its optimizer state arrays."""
        return self.ownership.owned_size

    @property
    def sharded(self) -> bool:
        """True when each rank updates only its slice (and keeps optimizer state for it alone)."""
        return self.ownership.sharded

    def publish(self, params: np.ndarray) -> None:
        """After the update of ``params[owned]``: every rank holds every parameter."""
        self.ownership.publish(params)

    def full(self, owned_values: np.ndarray) -> np.ndarray:
        """Every rank's ``owned`` part of a params-layout array, joined: (n_params,) on every rank (collective)."""
        return self.ownership.full(owned_values)

    # -- how the sum is formed (the summation) ------------------------------------------------------------------

    @property
    def problem(self) -> str | None:
        """Why this step's sum cannot be trusted (a diverged run), or None; reset by each :meth:`parts`."""
        return self.summation.problem

    @problem.setter
    def problem(self, value: str | None) -> None:
        self.summation.problem = value

    def part_bounds(self, batch: int) -> list[tuple[int, int]]:
        """[lo, hi) of every part of a global batch of ``batch`` rows, over all ranks in rank order."""
        return self.summation.part_bounds(batch)

    def parts(self, rows: np.ndarray) -> Iterator[tuple[np.ndarray, np.ndarray]]:
        """(part rows, gradient buffer) for each part of this rank's share of the global batch ``rows``.

        A new step: the last step's problem, if any, is forgotten here.
        """
        self.summation.problem = None
        return self.summation.parts(rows)

    def layer_done(self, layer: int) -> None:
        """Backward has finished ``layer`` of the current part."""
        self.summation.layer_done(layer)

    def add(self, part_grads: np.ndarray) -> None:
        """The current part's gradient, complete in ``part_grads``, joins this rank's sum."""
        self.summation.add(part_grads)

    def finish(self) -> None:
        """Return once :meth:`owned_gradient` holds the global batch's mean gradient, summed over ranks."""
        self.summation.finish()

    def owned_gradient(self) -> np.ndarray:
        """After :meth:`finish`: the summed gradient of ``params[owned]``, (owned_size,) in the model's dtype."""
        return self.summation.owned_gradient()

    def sum_squares(self) -> float:
        """Σ g² over the whole reduced gradient (for the global-norm clip), the same on every rank."""
        return self.summation.sum_squares()

    def layer_sum_squares(self, slices: list[tuple[int, int]]) -> np.ndarray:
        """Σ g² of the reduced gradient over each [start, stop) of ``slices`` (the layers), float64, every rank."""
        return self.summation.layer_sum_squares(slices)

    def conversion_bound(self) -> np.ndarray | float:
        """How far, per element, the last :meth:`finish` may have moved the sum beyond a float sum's rounding
        (0 for a float sum or a correctly rounded exact one); ``verify`` adds it to Higham's bound."""
        return self.summation.conversion_bound()

    def metric_sums(self, k: int) -> FloatSums | ExactSums:
        """An accumulator of k per-part metric sums (loss, counts), summed over ranks."""
        return self.summation.metric_sums(k)

    def evaluation_rows(self, rows: np.ndarray) -> np.ndarray:
        """The rows of an evaluation set that this rank evaluates (a contiguous run of ``rows``)."""
        return self.summation.evaluation_rows(rows)

    def warm_up(self) -> None:
        """Compile (or load from Numba's cache) the kernels this strategy runs, on scratch buffers."""
        self.summation.warm_up()

    def close(self) -> None:
        """Release what the strategy started (a communication thread); idempotent."""
        self.summation.close()


@dataclasses.dataclass(frozen=True)
class Strategy:
    """A job's two choices before anything is built: the ownership class and the summation class (with exact
    mode's format, ``run.exact_format``, which fast mode does not read)."""

    ownership: type[Replicated] | type[Sharded]
    summation: type[MessageSum] | type[ExactSum]
    exact_format: str = "wide"

    def check(self, run: RunSpec, processes: int) -> None:
        """Raise JobError, identically on every rank, if the job cannot run on ``processes`` ranks."""
        if run.global_batch < processes:
            raise JobError(f"`run.global_batch` must be ≥ the number of processes {processes}; "
                           f"got {run.global_batch}")
        self.summation.check(run, processes)

    def part_rows(self, run: RunSpec, processes: int) -> int:
        """The most rows of one part: the batch size the workspaces are built for."""
        return self.summation.part_rows(run, processes)

    def lanes(self, run: RunSpec) -> int:
        """Parts computed at once, each on a thread of its own (exact mode: ``run.threads``; fast mode: 1)."""
        return self.summation.lanes(run)

    def from_run(self, comm: Comm, model: MLP, grads: np.ndarray, run: RunSpec) -> Exchange:
        """The exchange with the settings of a job's ``[run]`` table; ``grads``: the flat gradient buffer with the
        params layout, (n_params,) in the model's dtype. One rank owns everything: nothing to shard."""
        ownership = (self.ownership if comm.size > 1 else Replicated)(comm, grads.size)
        return Exchange(ownership, self.summation.from_run(comm, model, grads, ownership, run))

    def collectives(self, n_params: int, itemsize: int) -> tuple[Collective, ...]:
        """What one step sends, as the two parts state it: the sum's collectives, then the ownership's.

        n_params: parameters; itemsize: bytes per parameter of the model's dtype.
        """
        return (self.summation.collectives(n_params, itemsize, self.ownership.sharded, self.exact_format)
                + self.ownership.collectives(n_params, itemsize))


def choose(update: str, reduction: str, exact_format: str = "wide") -> Strategy:
    """The strategy of ``run.update`` ("sharded", else replicated), ``run.reduction`` ("exact", else fast) and
    ``run.exact_format``."""
    return Strategy(Sharded if update == "sharded" else Replicated,
                    ExactSum if reduction == "exact" else MessageSum, exact_format)


def strategy(run: RunSpec) -> Strategy:
    """The exchange strategy for a job's ``run.reduction``, ``run.exact_format`` and ``run.update``."""
    return choose(run.update, run.reduction, run.exact_format)


GEMM_THREADS_MIN = 2**24
"""Multiply-adds of a part's largest GEMM (rows × fan_in × fan_out) below which fast mode keeps one thread: measured
on the 2-core VM (G = 512, float32, Adam, one process), 16-128-128-5 (8.4 M) trained at 721 k samples/s on one
thread and 585 k on two, 16-256-256-5 (33.5 M) at 243 k and 277 k (benchmarks/README.md)."""


def blas_threads(job: Job, processes: int) -> int:
    """BLAS threads per process (and the kernels' threads, ``kernels.dispatch.use_threads``) for a job on
    ``processes`` ranks: ``run.threads`` in fast mode, 1 in exact mode (whose threads take whole chunks, so that its
    bits do not depend on ``run.threads``), and 1 for a model whose largest GEMM of one part is under
    :data:`GEMM_THREADS_MIN` multiply-adds (waking threads costs more than they save there)."""
    run = job.run
    threads = strategy(run).summation.blas_threads(run)
    layers = job.model.layers
    largest = max(a * b for a, b in zip(layers, layers[1:], strict=False)) * -(-run.global_batch // processes)
    return threads if largest >= GEMM_THREADS_MIN else 1


def resolve_update(job: Job, processes: int) -> RunSpec:
    """The job's ``[run]`` table with ``run.update = "auto"`` decided for ``processes`` ranks.

    Sharded when there are 2 or more ranks and the optimizer keeps state: its update and its memory then divide by
    P (measured at P = 2 with Adam: the step 2 % faster, the state halved); plain SGD's update is too cheap to pay
    for the parameter allgather that replaces half of the allreduce (measured 1–3 % slower), so it stays replicated.
    """
    update = job.run.update
    if update == "auto":
        update = "sharded" if processes > 1 and job.optimizer.method != "sgd" else "replicated"
    return dataclasses.replace(job.run, update=update)
