"""How a step's gradient is summed over ranks: the other choice of a strategy (who updates is ``ownership.py``'s).

:class:`MessageSum` (``run.reduction = "fast"``): one part, this rank's contiguous shard of the global batch,
written straight into ``grads``; contiguous messages of whole layers are summed over ranks as backward finishes
them, by allreduce (replicated update) or reduce-scatter into the owned slice (sharded update).
:class:`ExactSum` (``"exact"``): fixed chunks of the batch whose size does not depend on P, each chunk's gradient
added exactly in integers in one of the formats of ``exactformats.py`` (wide, compact, narrow), so the sum has the
same bits for every P; the integer sums are reduce-scattered, each rank reads back its slice, and a replicated
update then allgathers the float gradient.

Both take the ownership they deliver to (its ``owned`` slice and ``sharded``), say how metrics are summed
(``metric_sums``) and which rows a rank evaluates (``evaluation_rows``), so that exact mode's logged losses do not
depend on P either, and state what they send per step (``collectives``).
"""

from __future__ import annotations

import math
from collections.abc import Iterator
from typing import TYPE_CHECKING, Any

import numpy as np
from shardmill.data.rows import block_range, shard
from shardmill.errors import JobError
from shardmill.kernels import exactsum, threaded
from shardmill.kernels import optim as kernels_optim
from shardmill.parallel.collectives import Collective
from shardmill.parallel.exactformats import FORMATS
from shardmill.parallel.ownership import BLOCK

if TYPE_CHECKING:  # the cost model reads the statements below without MPI
    from shardmill.config import RunSpec
    from shardmill.model.mlp import MLP
    from shardmill.parallel.comm import Comm
    from shardmill.parallel.ownership import Ownership


def block_sums_of_squares(values: np.ndarray) -> np.ndarray:
    """Σ v² of each consecutive block of :data:`BLOCK` elements (the last may be short), float64, (blocks,).

    Each block is summed alone in float64 in a fixed order (``kernels.optim.squares``), so a block has
    the same sum wherever it lies in a slice.
    """
    sums = np.empty(-(-values.size // BLOCK))
    threaded.block_sum_squares(values, BLOCK, sums)
    return sums


class FloatSums:
    """Per-part metric sums (k float64 values) added on this rank, summed over ranks by :meth:`reduce`."""

    def __init__(self, comm: Comm, k: int) -> None:
        self.comm = comm
        self.values = np.zeros(k)

    def add(self, values: np.ndarray) -> None:
        """Add one part's sums, (k,) float64."""
        self.values += values

    def reduce(self) -> np.ndarray:
        """The sums since the last call over every part of every rank, (k,) float64; starts again from zero."""
        total = self.comm.allreduce_sum(self.values.copy())
        self.values[:] = 0.0
        return total


class ExactSums:
    """Per-part metric sums added exactly (fixed point), so the total has the same bits whatever P is."""

    def __init__(self, comm: Comm, k: int) -> None:
        self.comm = comm
        self.values = np.zeros(k)
        self.limbs = exactsum.new_accumulator(k)

    def add(self, values: np.ndarray) -> None:
        """Add one part's sums, (k,) float64, exactly."""
        exactsum.accumulate(values, self.limbs)

    def reduce(self) -> np.ndarray:
        """The sums since the last call over every part of every rank, (k,) float64; starts again from zero."""
        self.comm.allreduce_sum(self.limbs.reshape(-1))
        exactsum.to_float(self.limbs, self.values)
        self.limbs.fill(0)
        total = self.values.copy()
        self.values[:] = 0.0
        return total


class MessageSum:
    """Fast mode: this rank's shard into ``grads``; messages of whole layers summed as backward finishes them.

    Layers are laid out last layer first, so backward fills ``grads`` from offset 0 upward. A message is a run of
    whole layers of at least ``message_mib`` megabytes; its non-blocking SUM starts the moment backward has
    finished its last layer, and :meth:`finish` waits for them all. Replicated update: an in-place allreduce of
    the message. Sharded update: a reduce-scatter that delivers to each rank the part of the message inside its
    owned slice, into ``summed`` (the owned gradient); the traffic is an allreduce's once the ownership publishes.
    With ``overlap`` off, one blocking reduction of the whole buffer runs in :meth:`finish` instead (benchmarks).
    """

    def __init__(self, comm: Comm, model: MLP, grads: np.ndarray, ownership: Ownership, message_mib: float,
                 overlap: bool = True, driver: str = "library") -> None:
        self.comm = comm
        self.grads = grads
        self.ownership = ownership
        self.problem: str | None = None  # never set: a float sum of non-finite values stays non-finite
        self.overlap = overlap
        # MPICH makes no progress on a non-blocking collective while this thread is inside BLAS; a communication
        # thread does, which pays on a network link (benchmarks/overlap_hidden.py) but costs a few % on one node.
        if driver == "auto":
            driver = "thread" if comm.spans_nodes() else "library"
        self.thread = None
        if overlap and driver == "thread" and comm.size > 1:
            from shardmill.parallel.commthread import CommThread  # MPI-threaded machinery, only when asked for

            self.thread = CommThread(comm)
        limit = message_mib * 2**20
        self.messages: list[tuple[int, int]] = []  # (start, stop) element offsets
        self._closing: dict[int, int] = {}  # layer whose completion closes message i -> i
        start = 0
        for l in reversed(range(model.n_layers)):  # the order backward produces gradients
            stop = model.slices[l][1]
            if (stop - start) * grads.itemsize >= limit or l == 0:
                self._closing[l] = len(self.messages)
                self.messages.append((start, stop))
                start = stop
        self._requests: list = []
        if ownership.sharded:
            self.summed = np.zeros(ownership.owned_size, dtype=grads.dtype)  # the owned slice of the sum
            lo, hi = ownership.owned.start, ownership.owned.stop
            # Per message, fixed at build time: what is sent, the view of ``summed`` that receives this rank's
            # part of it, and how much of the message each rank owns.
            self._scatters = [(grads[start:stop], self.summed[min(max(start, lo), hi) - lo:max(min(stop, hi), lo) - lo],
                               [max(0, min(stop, b) - max(start, a)) for a, b in ownership.bounds])
                              for start, stop in self.messages]

    @classmethod
    def from_run(cls, comm: Comm, model: MLP, grads: np.ndarray, ownership: Ownership, run: RunSpec) -> MessageSum:
        """The summation with the settings of a job's ``[run]`` table."""
        return cls(comm, model, grads, ownership, run.message_mib, run.overlap, run.comm_driver)

    @staticmethod
    def check(run: RunSpec, processes: int) -> None:
        """Nothing beyond the strategy's own check: any batch of at least one row per rank can be summed."""

    @staticmethod
    def collectives(n_params: int, itemsize: int, sharded: bool, exact_format: str) -> tuple[Collective, ...]:
        """The gradient (n_params·itemsize bytes) allreduced, or reduce-scattered for a sharded update; the
        messages are priced as one whole-vector call. ``exact_format`` is exact mode's and not read here."""
        return (Collective("reduce_scatter" if sharded else "allreduce", float(n_params * itemsize)),)

    @staticmethod
    def lanes(run: RunSpec) -> int:
        """Parts computed at once: 1 (one part per rank; ``run.threads`` go to BLAS)."""
        return 1

    @staticmethod
    def blas_threads(run: RunSpec) -> int:
        """BLAS threads per process: ``run.threads`` (the one part's GEMMs divide over them)."""
        return run.threads

    @staticmethod
    def part_rows(run: RunSpec, processes: int) -> int:
        """The most rows of one part: the largest shard, the batch size the workspaces are built for."""
        return -(-run.global_batch // processes)

    def part_bounds(self, batch: int) -> list[tuple[int, int]]:
        """[lo, hi) of every part of a global batch of ``batch`` rows, over all ranks in rank order."""
        return [block_range(batch, r, self.comm.size) for r in range(self.comm.size)]

    def parts(self, rows: np.ndarray) -> Iterator[tuple[np.ndarray, np.ndarray]]:
        """One part: this rank's contiguous shard [lo, hi) of the global batch, its gradient into ``grads``."""
        yield shard(rows, self.comm.rank, self.comm.size), self.grads

    def layer_done(self, layer: int) -> None:
        """Start the reduction of the message ``layer`` completes, if any."""
        if self.overlap and layer in self._closing:
            self._requests.append(self.start_message(self._closing[layer]))

    def add(self, part_grads: np.ndarray) -> None:
        """Nothing to add: the one part's gradient is already in ``grads``, its messages on their way."""

    def start_message(self, message: int) -> Any:
        """Start the SUM of message ``message`` (non-blocking, or on the communication thread)."""
        sender = self.comm if self.thread is None else self.thread  # the same method names
        if self.ownership.sharded:
            return sender.start_reduce_scatter_sum(*self._scatters[message])
        start, stop = self.messages[message]
        return sender.start_allreduce_sum(self.grads[start:stop])

    def finish(self) -> None:
        """Wait for every message (or run the single blocking reduction without overlap)."""
        if not self.overlap:
            self.reduce_all()
            return
        (self.comm if self.thread is None else self.thread).wait(self._requests)
        self._requests.clear()

    def reduce_all(self) -> None:
        """The blocking path (overlap off): one SUM of the whole gradient (allreduce, or reduce-scatter)."""
        if self.ownership.sharded:
            self.comm.reduce_scatter_sum(self.grads, self.summed, self.ownership.counts)
        else:
            self.comm.allreduce_sum(self.grads)

    def owned_gradient(self) -> np.ndarray:
        """After :meth:`finish`: the summed gradient of ``params[owned]``, (owned_size,) in the model's dtype."""
        return self.summed if self.ownership.sharded else self.grads[self.ownership.owned]

    def sum_squares(self) -> float:
        """Σ g² over the whole reduced gradient (for the global-norm clip), the same on every rank."""
        total = np.array([threaded.sum_squares(self.owned_gradient())])
        if self.ownership.sharded:
            self.comm.allreduce_sum(total)
        return float(total[0])

    def layer_sum_squares(self, slices: list[tuple[int, int]]) -> np.ndarray:
        """Σ g² of the reduced gradient over each [start, stop) of ``slices`` (the layers), float64, every rank."""
        gradient, lo, hi = self.owned_gradient(), self.ownership.owned.start, self.ownership.owned.stop
        out = np.array([kernels_optim.sum_squares(gradient[min(max(a, lo), hi) - lo:max(min(b, hi), lo) - lo])
                        for a, b in slices])
        if self.ownership.sharded:
            self.comm.allreduce_sum(out)
        return out

    def conversion_bound(self) -> float:
        """0: a float sum moves nothing beyond its own rounding (``verify`` adds this to Higham's bound)."""
        return 0.0

    def metric_sums(self, k: int) -> FloatSums:
        """An accumulator of k per-part metric sums (loss, counts), summed over ranks in floating point."""
        return FloatSums(self.comm, k)

    def evaluation_rows(self, rows: np.ndarray) -> np.ndarray:
        """The rows of an evaluation set that this rank evaluates (a contiguous run of ``rows``)."""
        lo, hi = block_range(rows.size, self.comm.rank, self.comm.size)
        return rows[lo:hi]

    def warm_up(self) -> None:
        """Nothing of its own to compile: the float sum is MPI's."""

    def close(self) -> None:
        """End the communication thread, if one runs; idempotent."""
        if self.thread is not None:
            self.thread.close()


class ExactSum:
    """Exact mode: fixed chunks of the global batch, each chunk's gradient added exactly in ``format``.

    Chunk k is rows[k·c:(k+1)·c] whatever P is, so every chunk's gradient has the same bits on any rank; each rank
    takes a contiguous run of chunks. Integer sums are associative, so the reduced gradient depends neither on P
    nor on the order of reduction. The integer sums are reduce-scattered; each rank reads back its own
    block-aligned slice (the ownership's ``bounds``) to floating point, and a replicated update allgathers the
    float gradient: half the integer traffic of an allreduce, and 1/P of the read-back. A sharded update keeps
    the read-back slice as its owned gradient.
    """

    def __init__(self, comm: Comm, grads: np.ndarray, ownership: Ownership, chunk: int, global_batch: int,
                 exact_format: str = "wide", lanes: int = 1) -> None:
        self.comm = comm
        self.grads = grads
        self.ownership = ownership
        self.problem: str | None = None  # why this step's sum cannot be trusted (a diverged run), or None
        self.chunk = chunk
        self.chunks = global_batch // chunk  # K, the same for every P
        self.first, self.stop = block_range(self.chunks, comm.rank, comm.size)  # this rank's chunks
        self.slice = slice(*ownership.bounds[comm.rank])  # the part of the sum this rank reads back
        self.format = FORMATS[exact_format](grads, self.chunks, self.stop - self.first, -(-self.chunks // comm.size),
                                            self.slice, lanes)
        self._added = 0  # this step's chunks added so far: the next add is chunk number _added of this rank

    @classmethod
    def from_run(cls, comm: Comm, model: MLP, grads: np.ndarray, ownership: Ownership, run: RunSpec) -> ExactSum:
        """The summation with the settings of a job's ``[run]`` table."""
        return cls(comm, grads, ownership, run.exact_chunk, run.global_batch, run.exact_format, run.threads)

    @staticmethod
    def check(run: RunSpec, processes: int) -> None:
        """Raise JobError, identically on every rank, if the chunks cannot be spread over ``processes`` ranks or
        are too many for the format."""
        if run.global_batch // run.exact_chunk < processes:
            raise JobError(f"`run.reduction` = 'exact' needs at least one chunk per process: global_batch / "
                           f"exact_chunk = {run.global_batch // run.exact_chunk} chunks < {processes} processes")
        FORMATS[run.exact_format].check(run)

    @staticmethod
    def collectives(n_params: int, itemsize: int, sharded: bool, exact_format: str) -> tuple[Collective, ...]:
        """The format's integer sums reduce-scattered (after its own agreement, if any), then, for a replicated
        update, the float gradient allgathered (n_params·itemsize bytes)."""
        summed = FORMATS[exact_format].collectives(n_params)
        return summed if sharded else (*summed, Collective("allgather", float(n_params * itemsize)))

    @staticmethod
    def lanes(run: RunSpec) -> int:
        """Chunks computed at once: ``run.threads``, each whole chunk on one thread (``training/lanes.py``)."""
        return run.threads

    @staticmethod
    def blas_threads(run: RunSpec) -> int:
        """1: a threaded GEMM may sum in another order than a single-threaded one (A·W of 32×784 by 784×64
        differs in float32 and float64 with OpenBLAS 0.3.31), so the threads take whole chunks instead and every
        chunk's bits are those of one BLAS thread, whatever ``run.threads`` is."""
        return 1

    @staticmethod
    def part_rows(run: RunSpec, processes: int) -> int:
        """The most rows of one part: one chunk, whatever P is."""
        return run.exact_chunk

    def part_bounds(self, batch: int) -> list[tuple[int, int]]:
        """[lo, hi) of every chunk of a global batch of ``batch`` rows, in order."""
        c = self.chunk
        return [(k * c, (k + 1) * c) for k in range(batch // c)]

    def parts(self, rows: np.ndarray) -> Iterator[tuple[np.ndarray, np.ndarray]]:
        """(chunk rows, the buffer the format wants its gradient in) for each of this rank's chunks.

        The chunks may be computed several at once (``run.threads``: each into a buffer of its own); :meth:`add`
        then takes them in this order."""
        c = self.chunk
        self._added = 0
        for i, k in enumerate(range(self.first, self.stop)):
            yield rows[k * c:(k + 1) * c], self.format.buffer(i)

    def layer_done(self, layer: int) -> None:
        """Nothing to start: the sum over ranks waits for every chunk."""

    def add(self, part_grads: np.ndarray) -> None:
        """The current chunk's gradient joins the format's sum; a value it cannot hold is noted in ``problem``
        (the step then stops on every rank after the sum: the collectives still run, so no rank is left waiting)."""
        problem = self.format.add(self._added, part_grads)
        self._added += 1
        if problem is not None and self.problem is None:
            self.problem = problem

    def finish(self) -> None:
        """Complete the integer sums, reduce-scatter them, read back this rank's slice (and allgather it)."""
        problem = self.format.complete(self.comm)
        if problem is not None:  # the same on every rank: all of them skip the sum together
            self.problem = self.problem or problem
            return
        if self.comm.size == 1:
            self.format.read_all(self.grads)
            return
        self.reduce_scatter()
        self.read_back()
        if not self.ownership.sharded:
            self.allgather_gradient()

    def reduce_scatter(self) -> None:
        """This rank's slice of the integer sums, summed over ranks."""
        self.format.reduce_scatter(self.comm, self.ownership.counts)

    def read_back(self) -> None:
        """This rank's slice of the summed integers, rounded into ``grads[slice]``."""
        self.format.read_back(self.grads[self.slice], self.slice.start)

    def allgather_gradient(self) -> None:
        """Every rank's read-back slice to every rank: the whole gradient everywhere (replicated update)."""
        self.comm.allgather(self.grads, self.ownership.counts)

    def owned_gradient(self) -> np.ndarray:
        """After :meth:`finish`: the summed gradient of ``params[owned]``, (owned_size,) in the model's dtype."""
        return self.grads[self.ownership.owned]

    def sum_squares(self) -> float:
        """Σ g² with the same bits for every P and either update: fixed blocks, then an exactly rounded total.

        Each block of :data:`BLOCK` elements lies in one rank's slice and is summed alone; ``math.fsum`` of the
        block sums is correctly rounded, so the order in which they arrive does not matter.
        """
        sums = block_sums_of_squares(self.owned_gradient())
        if self.ownership.sharded:
            blocks = [-(-count // BLOCK) for count in self.ownership.counts]
            every = np.zeros(sum(blocks))
            lo = sum(blocks[:self.comm.rank])
            every[lo:lo + sums.size] = sums
            sums = self.comm.allgather(every, blocks)
        return math.fsum(sums)

    def layer_sum_squares(self, slices: list[tuple[int, int]]) -> np.ndarray:
        """Per layer Σ g², the same bits for every P (health diagnostics go to metrics.jsonl, which is P-free here).

        Each piece of a layer within one block of :data:`BLOCK` elements lies in one rank's slice and is summed
        alone; every rank fills only its own pieces and zeros elsewhere, so the SUM allreduce adds each piece to
        zeros only (exact), and ``math.fsum`` per layer is correctly rounded, hence order-free.
        """
        pieces = [(layer, max(a, k * BLOCK), min(b, (k + 1) * BLOCK))
                  for layer, (a, b) in enumerate(slices) for k in range(a // BLOCK, -(-b // BLOCK))]
        gradient, lo, hi = self.owned_gradient(), self.ownership.owned.start, self.ownership.owned.stop
        sums = np.array([kernels_optim.sum_squares(gradient[start - lo:stop - lo]) if lo <= start < hi else 0.0
                         for _, start, stop in pieces])
        if self.ownership.sharded:
            self.comm.allreduce_sum(sums)
        out = np.zeros(len(slices))
        for layer in range(len(slices)):
            out[layer] = math.fsum(s for (owner, _, _), s in zip(pieces, sums, strict=True) if owner == layer)
        return out

    def conversion_bound(self) -> np.ndarray | float:
        """How far, per element, the last :meth:`finish` may have moved the sum beyond a float sum's rounding
        (0 for the correctly rounded wide format); ``verify`` adds it to Higham's bound."""
        return self.format.conversion_bound()

    def metric_sums(self, k: int) -> ExactSums:
        """An accumulator of k per-part metric sums (loss, counts), summed exactly (the wide format: tiny)."""
        return ExactSums(self.comm, k)

    def evaluation_rows(self, rows: np.ndarray) -> np.ndarray:
        """Whole chunks of ``chunk`` rows whatever P is (the last may be short), a contiguous run per rank."""
        c = self.chunk
        lo, hi = block_range(-(-rows.size // c), self.comm.rank, self.comm.size)
        return rows[lo * c:hi * c]

    def warm_up(self) -> None:
        """Compile (or load from Numba's cache) the format's kernels, the clip norm's and the metric sums'."""
        grads = np.zeros_like(self.grads)
        self.format.warm_up()
        block_sums_of_squares(grads)  # the clip norm's blocks
        sums = exactsum.new_accumulator(3)  # the metric sums' specialisation (float64)
        exactsum.accumulate(np.zeros(3), sums)
        exactsum.to_float(sums, np.zeros(3))

    def close(self) -> None:
        """Nothing started: no thread."""
