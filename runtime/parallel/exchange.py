"""Exchange strategies: how a step turns this rank's rows into the summed gradient every rank holds.

The step calls one interface and does not know the mode (``Trainer.gradient`` and ``Trainer.step``)::

    for part, out in exchange.parts(rows):   # this rank's share of the global batch, and where its gradient goes
        forward, loss, backward into out      # calling exchange.layer_done(l) as each layer's gradient is complete
        exchange.add(out)                     # the part's gradient joins this rank's sum
    exchange.finish()                         # owned_gradient(): the mean gradient of params[exchange.owned]
    clip with exchange.sum_squares(); update params[exchange.owned]
    exchange.publish(params)                  # every rank holds every parameter again

:class:`MessageExchange` (``run.reduction = "fast"``, replicated update): one part, this rank's contiguous shard,
written straight into ``grads``; contiguous messages of whole layers are summed by non-blocking allreduces (or a
communication thread) started as backward finishes them. :class:`ShardedExchange` (fast, sharded update):
the same messages are reduce-scattered, so each rank holds the sum of its own slice (``owned``), updates that slice
alone and ``publish`` allgathers the parameters. :class:`ExactExchange` (``"exact"``): fixed chunks of the batch,
each chunk's gradient added exactly in fixed point (3 int64 limbs), so the sum has the same bits for every P;
:class:`CompactExchange` does the same on one int64 or int32 per value. Both exact strategies reduce-scatter, then
allgather either the gradient (replicated update) or the updated parameters (sharded).

Each strategy also says how metrics are summed (:meth:`Exchange.metric_sums`) and which rows a rank evaluates
(:meth:`Exchange.evaluation_rows`), so that exact mode's logged losses do not depend on P either.
"""

from __future__ import annotations

import dataclasses
import math
from collections.abc import Iterator
from typing import Any

import numpy as np
from shardmill.config import Job, RunSpec
from shardmill.data.rows import block_range, shard
from shardmill.errors import JobError
from shardmill.kernels import compactsum, exactsum
from shardmill.kernels import optim as kernels_optim
from shardmill.model.mlp import MLP
from shardmill.parallel.comm import Comm
from shardmill.parallel.progress import CommThread

BLOCK = 256
"""Owned slices start at multiples of BLOCK elements, so that the fixed blocks of exact mode's sum of squares never
straddle two ranks (each block's sum then has the same bits whatever P is)."""


def owner_bounds(n: int, processes: int) -> list[tuple[int, int]]:
    """[lo, hi) of the contiguous slice of an n-element flat array that each rank owns, in rank order.

    Whole blocks of :data:`BLOCK` elements, as even as they come (a rank may own nothing in a tiny model).
    """
    blocks = -(-n // BLOCK)
    return [(min(lo * BLOCK, n), min(hi * BLOCK, n)) for lo, hi in (block_range(blocks, r, processes)
                                                                    for r in range(processes))]


def block_sums_of_squares(values: np.ndarray) -> np.ndarray:
    """Σ v² of each consecutive block of :data:`BLOCK` elements (the last may be short), float64, (blocks,).

    Each block is summed alone in float64, left to right (``kernels.optim.block_sum_squares``), so a block has
    the same sum wherever it lies in a slice.
    """
    sums = np.empty(-(-values.size // BLOCK))
    kernels_optim.block_sum_squares(values, BLOCK, sums)
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


class ExactSums(FloatSums):
    """Per-part metric sums added exactly (fixed point), so the total has the same bits whatever P is."""

    def __init__(self, comm: Comm, k: int) -> None:
        super().__init__(comm, k)
        self.limbs = exactsum.new_accumulator(k)

    def add(self, values: np.ndarray) -> None:
        exactsum.accumulate(values, self.limbs)

    def reduce(self) -> np.ndarray:
        self.comm.allreduce_sum(self.limbs.reshape(-1))
        exactsum.to_float(self.limbs, self.values)
        self.limbs.fill(0)
        total = self.values.copy()
        self.values[:] = 0.0
        return total


class Exchange:
    """The interface the step calls; the defaults are those of a strategy that leaves the whole gradient everywhere.

    ``grads`` is the flat gradient buffer with the params layout, (n_params,) in the model's dtype.
    """

    def __init__(self, comm: Comm, model: MLP, grads: np.ndarray) -> None:
        self.comm = comm
        self.grads = grads
        self.owned = slice(0, grads.size)  # the parameters this rank updates
        # True when each rank updates only its slice (and keeps optimizer state for it alone). The same on every
        # rank, and set by the strategy, never read off ``owned``: a rank of a tiny model may own every parameter
        # (or none) while the others still run the sharded collectives.
        self.sharded = False
        self.problem: str | None = None  # why this step's sum cannot be trusted (a diverged run), or None

    @property
    def owned_size(self) -> int:
        """Number of parameters this rank updates: the length of its optimizer state arrays."""
        return self.owned.stop - self.owned.start

    def owned_gradient(self) -> np.ndarray:
        """After :meth:`finish`: the summed gradient of ``params[owned]``, (owned_size,) in the model's dtype."""
        return self.grads[self.owned]

    @classmethod
    def from_run(cls, comm: Comm, model: MLP, grads: np.ndarray, run: RunSpec) -> Exchange:
        """The strategy with the settings of a job's ``[run]`` table."""
        raise NotImplementedError

    @classmethod
    def check(cls, run: RunSpec, processes: int) -> None:
        """Raise JobError, identically on every rank, if the job cannot run on ``processes`` ranks."""
        if run.global_batch < processes:
            raise JobError(f"`run.global_batch` must be ≥ the number of processes {processes}; "
                           f"got {run.global_batch}")

    @staticmethod
    def part_rows(run: RunSpec, processes: int) -> int:
        """The most rows of one part: the batch size the workspaces are built for."""
        raise NotImplementedError

    def part_bounds(self, batch: int) -> list[tuple[int, int]]:
        """[lo, hi) of every part of a global batch of ``batch`` rows, over all ranks in rank order."""
        raise NotImplementedError

    def parts(self, rows: np.ndarray) -> Iterator[tuple[np.ndarray, np.ndarray]]:
        """(part rows, gradient buffer) for each part of this rank's share of the global batch ``rows``."""
        raise NotImplementedError

    def layer_done(self, layer: int) -> None:
        """Backward has finished ``layer`` of the current part."""

    def add(self, part_grads: np.ndarray) -> None:
        """The current part's gradient, complete in ``part_grads``, joins this rank's sum."""

    def finish(self) -> None:
        """Return once :meth:`owned_gradient` holds the global batch's mean gradient, summed over ranks."""
        raise NotImplementedError

    def sum_squares(self) -> float:
        """Σ g² over the whole reduced gradient (for the global-norm clip), the same on every rank."""
        total = np.array([kernels_optim.sum_squares(self.owned_gradient())])
        if self.sharded:
            self.comm.allreduce_sum(total)
        return float(total[0])

    def layer_sum_squares(self, slices: list[tuple[int, int]]) -> np.ndarray:
        """Σ g² of the reduced gradient over each [start, stop) of ``slices`` (the layers), float64, every rank."""
        gradient, lo, hi = self.owned_gradient(), self.owned.start, self.owned.stop
        out = np.array([kernels_optim.sum_squares(gradient[min(max(a, lo), hi) - lo:max(min(b, hi), lo) - lo])
                        for a, b in slices])
        if self.sharded:
            self.comm.allreduce_sum(out)
        return out

    def publish(self, params: np.ndarray) -> None:
        """After the update of ``params[owned]``: every rank holds every parameter."""

    def conversion_bound(self) -> np.ndarray | float:
        """How far, per element, the last :meth:`finish` may have moved the sum beyond a float sum's rounding
        (0 for a float sum or a correctly rounded exact one); ``verify`` adds it to Higham's bound."""
        return 0.0

    def full(self, owned_values: np.ndarray) -> np.ndarray:
        """Every rank's ``owned`` part of a params-layout array, joined: (n_params,) on every rank (collective)."""
        return owned_values

    def metric_sums(self, k: int) -> FloatSums:
        """An accumulator of k per-part metric sums (loss, counts), summed over ranks."""
        return FloatSums(self.comm, k)

    def evaluation_rows(self, rows: np.ndarray) -> np.ndarray:
        """The rows of an evaluation set that this rank evaluates (a contiguous run of ``rows``)."""
        lo, hi = block_range(rows.size, self.comm.rank, self.comm.size)
        return rows[lo:hi]

    def warm_up(self) -> None:
        """Compile (or load from Numba's cache) the kernels this strategy runs, on scratch buffers."""

    def close(self) -> None:
        """Release what the strategy started (a communication thread); idempotent."""


class MessageExchange(Exchange):
    """Fast mode: this rank's shard into ``grads``; messages of whole layers allreduced as backward finishes them.

    Layers are laid out last layer first, so backward fills ``grads`` from offset 0 upward. A message is a run of
    whole layers of at least ``message_mib`` megabytes; its non-blocking in-place SUM allreduce starts the moment
    backward has finished its last layer, and :meth:`finish` waits for them all. With ``overlap`` off, one
    blocking allreduce of the whole buffer runs in :meth:`finish` instead (for comparison in benchmarks).
    """

    def __init__(self, comm: Comm, model: MLP, grads: np.ndarray, message_mib: float, overlap: bool = True,
                 progress: str = "library") -> None:
        super().__init__(comm, model, grads)
        self.overlap = overlap
        # MPICH makes no progress on a non-blocking collective while this thread is inside BLAS; a communication
        # thread does, which pays on a network link (benchmarks/overlap_hidden.py) but costs a few % on one node.
        if progress == "auto":
            progress = "thread" if comm.spans_nodes() else "library"
        self.thread = CommThread(comm) if overlap and progress == "thread" and comm.size > 1 else None
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

    @classmethod
    def from_run(cls, comm: Comm, model: MLP, grads: np.ndarray, run: RunSpec) -> MessageExchange:
        return cls(comm, model, grads, run.message_mib, run.overlap, run.progress)

    @staticmethod
    def part_rows(run: RunSpec, processes: int) -> int:
        return -(-run.global_batch // processes)

    def part_bounds(self, batch: int) -> list[tuple[int, int]]:
        return [block_range(batch, r, self.comm.size) for r in range(self.comm.size)]

    def parts(self, rows: np.ndarray) -> Iterator[tuple[np.ndarray, np.ndarray]]:
        yield shard(rows, self.comm.rank, self.comm.size), self.grads  # contiguous [lo, hi)

    def layer_done(self, layer: int) -> None:
        """Start the reduction of the message ``layer`` completes, if any."""
        if self.overlap and layer in self._closing:
            self._requests.append(self.start_message(self._closing[layer]))

    def start_message(self, message: int) -> Any:
        """Start the in-place SUM allreduce of message ``message`` (non-blocking, or on the thread)."""
        start, stop = self.messages[message]
        if self.thread is not None:
            return self.thread.start_allreduce_sum(self.grads[start:stop])
        return self.comm.start_allreduce_sum(self.grads[start:stop])

    def reduce_all(self) -> None:
        """The blocking path (overlap off): one in-place SUM allreduce of the whole gradient."""
        self.comm.allreduce_sum(self.grads)

    def finish(self) -> None:
        """Wait for every message (or run the single blocking reduction without overlap)."""
        if self.overlap:
            if self.thread is not None:
                self.thread.wait(self._requests)
            else:
                self.comm.wait(self._requests)
            self._requests.clear()
        else:
            self.reduce_all()

    def close(self) -> None:
        if self.thread is not None:
            self.thread.close()


class ShardedExchange(MessageExchange):
    """Fast mode with a sharded update: messages are reduce-scattered, each rank updates its own slice.

    Each rank owns a contiguous slice of the flat parameters (:func:`owner_bounds`). As backward completes a message
    of whole layers, a non-blocking reduce-scatter sums it over ranks and delivers to each rank the part of the
    message inside its slice, into ``summed`` (the owned gradient). Each rank clips and updates only its slice, with
    optimizer state for that slice alone ((P−1)/P less memory per rank), and :meth:`publish` allgathers the updated
    slices so every rank holds every parameter. Traffic: a reduce-scatter and an allgather, as an allreduce, but
    the update is divided by P instead of repeated on every rank.
    """

    def __init__(self, comm: Comm, model: MLP, grads: np.ndarray, message_mib: float, overlap: bool = True,
                 progress: str = "library") -> None:
        super().__init__(comm, model, grads, message_mib, overlap, progress)
        bounds = owner_bounds(grads.size, comm.size)
        self.counts = [hi - lo for lo, hi in bounds]  # elements each rank owns
        self.owned = slice(*bounds[comm.rank])
        self.sharded = comm.size > 1
        self.summed = np.zeros(self.owned_size, dtype=grads.dtype)  # the owned slice of the summed gradient
        lo, hi = self.owned.start, self.owned.stop
        # Per message, fixed at build time: what is sent, the view of ``summed`` that receives this rank's part of
        # it, and how much of the message each rank owns.
        self._scatters = [(grads[start:stop], self.summed[min(max(start, lo), hi) - lo:max(min(stop, hi), lo) - lo],
                           [max(0, min(stop, b) - max(start, a)) for a, b in bounds])
                          for start, stop in self.messages]

    def start_message(self, message: int) -> Any:
        send, received, counts = self._scatters[message]
        if self.thread is not None:
            return self.thread.start_reduce_scatter_sum(send, received, counts)
        return self.comm.start_reduce_scatter_sum(send, received, counts)

    def reduce_all(self) -> None:
        self.comm.reduce_scatter_sum(self.grads, self.summed, self.counts)

    def owned_gradient(self) -> np.ndarray:
        return self.summed

    def publish(self, params: np.ndarray) -> None:
        """Every rank's updated slice to every rank (in-place allgather of the parameters)."""
        self.comm.allgather(params, self.counts)

    def full(self, owned_values: np.ndarray) -> np.ndarray:
        out = np.zeros(self.grads.size, dtype=owned_values.dtype)
        out[self.owned] = owned_values
        return self.comm.allgather(out, self.counts)


class ExactExchange(Exchange):
    """Exact mode: fixed chunks of the global batch, each chunk's gradient accumulated exactly in fixed point.

    Chunk k is rows[k·c:(k+1)·c] whatever P is, so every chunk's gradient has the same bits on any rank; each rank
    takes a contiguous run of chunks. Integer sums are associative, so the reduced gradient depends neither on P
    nor on the order of reduction. The limbs (3 × 40-bit int64 per value, resolution 2⁻⁸⁸, |g| < 2³¹) are
    reduce-scattered; each rank reads back its own contiguous slice to floating point, and the float gradient is
    allgathered: half the integer traffic of an allreduce, and 1/P of the read-back.
    """

    def __init__(self, comm: Comm, model: MLP, grads: np.ndarray, chunk: int, global_batch: int,
                 sharded: bool = False) -> None:
        super().__init__(comm, model, grads)
        self._layout(chunk, global_batch, sharded)
        self.chunk_grads = np.zeros_like(grads)
        # A rank with two or more chunks computes its first two into separate buffers and writes their digits
        # in one pass (exactsum.assign_pair): one read-and-write of the limbs fewer per step.
        most_chunks = -(-self.chunks // comm.size)
        self.pair_grads = np.zeros_like(grads) if most_chunks >= 2 else None
        self.limbs = exactsum.new_accumulator(grads.size)
        self.slice_limbs = exactsum.new_accumulator(self.slice_counts[comm.rank])

    def _layout(self, chunk: int, global_batch: int, sharded: bool) -> None:
        """Which chunks this rank computes, and which slice of the sum it reads back (and updates, if sharded)."""
        self.chunk = chunk
        self.chunks = global_batch // chunk  # K, the same for every P
        self.first, self.stop = block_range(self.chunks, self.comm.rank, self.comm.size)  # this rank's chunks
        bounds = owner_bounds(self.grads.size, self.comm.size)
        self.slice_counts = [hi - lo for lo, hi in bounds]
        self.slice = slice(*bounds[self.comm.rank])  # the part of the sum this rank reads back
        self.sharded = sharded and self.comm.size > 1
        if self.sharded:  # this rank updates only the slice it read back; the parameters are allgathered instead
            self.owned = self.slice
        self._current = self.first

    @classmethod
    def from_run(cls, comm: Comm, model: MLP, grads: np.ndarray, run: RunSpec) -> ExactExchange:
        return cls(comm, model, grads, run.exact_chunk, run.global_batch, sharded=run.update == "sharded")

    @classmethod
    def check(cls, run: RunSpec, processes: int) -> None:
        super().check(run, processes)
        if run.global_batch // run.exact_chunk < processes:
            raise JobError(f"`run.reduction` = 'exact' needs at least one chunk per process: global_batch / "
                           f"exact_chunk = {run.global_batch // run.exact_chunk} chunks < {processes} processes")

    @staticmethod
    def part_rows(run: RunSpec, processes: int) -> int:
        return run.exact_chunk

    def part_bounds(self, batch: int) -> list[tuple[int, int]]:
        c = self.chunk
        return [(k * c, (k + 1) * c) for k in range(batch // c)]

    def _paired(self, k: int) -> bool:
        """True for this rank's first two chunks when it has two or more: they go into the limbs in one pass."""
        return self.pair_grads is not None and self.stop - self.first >= 2 and k - self.first < 2

    def parts(self, rows: np.ndarray) -> Iterator[tuple[np.ndarray, np.ndarray]]:
        c = self.chunk
        for k in range(self.first, self.stop):
            self._current = k
            out = self.pair_grads if self._paired(k) and k == self.first + 1 else self.chunk_grads
            yield rows[k * c:(k + 1) * c], out

    def add(self, part_grads: np.ndarray) -> None:
        k = self._current
        if self._paired(k):
            if k == self.first + 1:
                self.check_range(exactsum.assign_pair(self.chunk_grads, self.pair_grads, self.limbs))
            return  # the first of a pair waits for the second
        # The first chunk overwrites the limbs: no zeroing pass, no read.
        self.check_range(exactsum.accumulate(part_grads, self.limbs, replace=k == self.first))

    def check_range(self, largest: float) -> None:
        """Note a chunk gradient the exact accumulator cannot hold (|g| ≥ 2^31, inf or NaN): the step then stops
        on every rank after the sum (the collectives still run, so no rank is left waiting)."""
        if not largest < exactsum.MAX_ABS and self.problem is None:
            self.problem = f"a gradient element is {largest!r}, outside the exact accumulator's range (|g| < 2^31)"

    def finish(self) -> None:
        """Reduce-scatter the limbs, read back this rank's slice, allgather the float gradient (replicated)."""
        self.sum_over_ranks()

    def sum_over_ranks(self) -> None:
        """The integer sums reduce-scattered, this rank's slice read back, and (replicated) the gradient gathered."""
        if self.comm.size == 1:
            self.read_all()
            return
        self.reduce_scatter_limbs()
        self.read_back()
        if not self.sharded:
            self.gather()

    def read_all(self) -> None:
        """One rank: the whole sum read back into ``grads``."""
        exactsum.to_float(self.limbs, self.grads)

    def reduce_scatter_limbs(self) -> None:
        """This rank's slice of the limbs summed over ranks, into ``slice_limbs``.

        One call per limb row: MPICH slows sharply on single messages past ~22 MB.
        """
        for limb, mine in zip(self.limbs, self.slice_limbs, strict=True):
            self.comm.reduce_scatter_sum(limb, mine, self.slice_counts)

    def read_back(self) -> None:
        """This rank's slice of the summed limbs, correctly rounded into ``grads[slice]``."""
        exactsum.to_float(self.slice_limbs, self.grads[self.slice])

    def gather(self) -> None:
        """Every rank's read-back slice to every rank: the whole gradient everywhere."""
        self.comm.allgather(self.grads, self.slice_counts)

    def sum_squares(self) -> float:
        """Σ g² with the same bits for every P and either update: fixed blocks, then an exactly rounded total.

        Each block of :data:`BLOCK` elements lies in one rank's slice and is summed alone; ``math.fsum`` of the
        block sums is correctly rounded, so the order in which they arrive does not matter.
        """
        sums = block_sums_of_squares(self.owned_gradient())
        if self.sharded:
            blocks = [-(-count // BLOCK) for count in self.slice_counts]
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
        gradient, lo, hi = self.owned_gradient(), self.owned.start, self.owned.stop
        sums = np.array([kernels_optim.sum_squares(gradient[start - lo:stop - lo]) if lo <= start < hi else 0.0
                         for _, start, stop in pieces])
        if self.sharded:
            self.comm.allreduce_sum(sums)
        out = np.zeros(len(slices))
        for layer in range(len(slices)):
            out[layer] = math.fsum(s for (owner, _, _), s in zip(pieces, sums, strict=True) if owner == layer)
        return out

    def publish(self, params: np.ndarray) -> None:
        if self.sharded:
            self.comm.allgather(params, self.slice_counts)

    def full(self, owned_values: np.ndarray) -> np.ndarray:
        if not self.sharded:
            return owned_values
        out = np.zeros(self.grads.size, dtype=owned_values.dtype)
        out[self.owned] = owned_values
        return self.comm.allgather(out, self.slice_counts)

    def metric_sums(self, k: int) -> FloatSums:
        return ExactSums(self.comm, k)

    def evaluation_rows(self, rows: np.ndarray) -> np.ndarray:
        """Whole chunks of ``chunk`` rows whatever P is (the last may be short), a contiguous run per rank."""
        c = self.chunk
        lo, hi = block_range(-(-rows.size // c), self.comm.rank, self.comm.size)
        return rows[lo * c:hi * c]

    def warm_up(self) -> None:
        grads = np.zeros_like(self.grads)
        limbs = np.zeros_like(self.limbs)
        exactsum.accumulate(grads, limbs)
        if self.pair_grads is not None:
            exactsum.assign_pair(grads, grads.copy(), limbs)
        exactsum.to_float(limbs, grads)
        block_sums_of_squares(grads)  # the clip norm's blocks
        sums = exactsum.new_accumulator(3)  # the metric sums' specialisation (float64)
        exactsum.accumulate(np.zeros(3), sums)
        exactsum.to_float(sums, np.zeros(3))


NARROW_MAX_CHUNKS = 64
"""The narrow format's error bound K·2^(h−30) of a scale block's largest value grows with the chunks K per step:
at 64 it is 2^-18, near float32's own rounding; beyond, the compact format is the honest choice."""


class CompactExchange(ExactExchange):
    """Exact mode, compact or narrow format (``run.exact_format``): one int64 (or int32) per value instead of three.

    The same fixed chunks; each bucket of :data:`BLOCK` values gets one power-of-two scale, fixed before any value
    is converted, from the largest |g| in that bucket over all K chunks (a MAX allreduce: order-free, so the
    same for every P), with ceil(log2 K) bits of headroom (``kernels.compactsum``). A rank keeps its chunks'
    gradients until the scales are known, converts and adds them in int64 (exact, associative), and the sums are
    reduce-scattered: 8 bytes per parameter instead of 24. Bit-identical for every P and rerun; accuracy: within
    K·2^(h−51) of each bucket's largest value (h = ceil(log2 K)) before the final rounding to the dtype. The narrow
    format sums int32 on a 30-bit grid: 4 bytes per parameter, the bytes of fast mode, within K·2^(h−30).
    """

    def __init__(self, comm: Comm, model: MLP, grads: np.ndarray, chunk: int, global_batch: int,
                 sharded: bool = False, narrow: bool = False) -> None:
        Exchange.__init__(self, comm, model, grads)
        integer = np.int32 if narrow else np.int64
        self.bits = compactsum.term_bits(integer)
        self._layout(chunk, global_batch, sharded)
        self.pair_grads = None
        self.chunk_buffers = [np.zeros_like(grads) for _ in range(self.stop - self.first)]
        # One scale per bucket of BLOCK values: bucket b is [bounds[b], bounds[b + 1]).
        self.bounds = np.append(np.arange(0, grads.size, BLOCK, dtype=np.int64), np.int64(grads.size))
        self.largest = np.zeros(self.bounds.size - 1)  # per bucket, max |g| over the chunks seen this step
        self.sums = np.zeros(grads.size, dtype=integer)
        self.slice_sums = np.zeros(self.slice_counts[comm.rank], dtype=integer)
        self.shifts = np.zeros(self.bounds.size - 1, dtype=np.int64)

    @classmethod
    def check(cls, run: RunSpec, processes: int) -> None:
        super().check(run, processes)
        most = NARROW_MAX_CHUNKS if run.exact_format == "narrow" else compactsum.MAX_CHUNKS
        if run.global_batch // run.exact_chunk > most:
            raise JobError(f"`run.exact_format` = {run.exact_format!r} allows at most {most} chunks per step "
                           f"(global_batch / exact_chunk); got {run.global_batch // run.exact_chunk}"
                           + ("; use 'compact' for more" if run.exact_format == "narrow" else ""))

    @classmethod
    def from_run(cls, comm: Comm, model: MLP, grads: np.ndarray, run: RunSpec) -> CompactExchange:
        return cls(comm, model, grads, run.exact_chunk, run.global_batch, sharded=run.update == "sharded",
                   narrow=run.exact_format == "narrow")

    def parts(self, rows: np.ndarray) -> Iterator[tuple[np.ndarray, np.ndarray]]:
        c = self.chunk
        for i, k in enumerate(range(self.first, self.stop)):
            self._current = k
            yield rows[k * c:(k + 1) * c], self.chunk_buffers[i]

    def add(self, part_grads: np.ndarray) -> None:
        """Only the buckets' largest magnitudes now; the values are converted once every scale is known."""
        if self._current == self.first:
            self.largest.fill(0.0)
        largest = compactsum.bucket_max_abs(part_grads, self.bounds, self.largest)
        if not math.isfinite(largest):
            np.nan_to_num(self.largest, copy=False, nan=np.inf)  # MAX is well defined on inf, not on NaN
            if self.problem is None:
                self.problem = f"a gradient element is {largest!r}; exact mode cannot sum it"

    def finish(self) -> None:
        """Agree on the scales, convert and add this rank's chunks, reduce-scatter, read back (and allgather)."""
        self.comm.allreduce_max(self.largest)
        if not np.all(np.isfinite(self.largest)):  # the same on every rank: all of them skip the sum together
            self.problem = self.problem or "a gradient element on another rank is not finite"
            return
        self.shifts = compactsum.shifts(self.largest, self.chunks, self.bits)
        limit = 2.0 ** (self.bits - compactsum.headroom_bits(self.chunks))
        for i, buffer in enumerate(self.chunk_buffers):
            largest = compactsum.accumulate(buffer, self.bounds, self.shifts, self.sums, replace=i == 0)
            if not largest < limit:  # cannot happen for chunks that went into the maxima: a bug, not bad data
                raise FloatingPointError(f"compact exact sum: a term of {largest!r} is outside its grid (< {limit})")
        self.sum_over_ranks()

    def read_all(self) -> None:
        compactsum.to_float(self.sums, self.bounds, self.shifts, self.grads)

    def reduce_scatter_limbs(self) -> None:
        """This rank's slice of the int64 sums, summed over ranks, into ``slice_sums``."""
        self.comm.reduce_scatter_sum(self.sums, self.slice_sums, self.slice_counts)

    def read_back(self) -> None:
        compactsum.to_float(self.slice_sums, self.bounds, self.shifts, self.grads[self.slice],
                            offset=self.slice.start)

    def conversion_bound(self) -> np.ndarray:
        """K·2^(−S_b−1) per element: each of the K chunks' values was rounded once to its bucket's grid."""
        sizes = np.diff(self.bounds)
        return np.repeat(self.chunks * np.ldexp(1.0, -self.shifts - 1), sizes)

    def warm_up(self) -> None:
        grads = np.zeros_like(self.grads)
        largest = np.zeros(self.bounds.size - 1)
        compactsum.bucket_max_abs(grads, self.bounds, largest)
        shifts = compactsum.shifts(largest, self.chunks, self.bits)
        sums = np.zeros_like(self.sums)
        compactsum.accumulate(grads, self.bounds, shifts, sums, replace=True)
        compactsum.accumulate(grads, self.bounds, shifts, sums)
        compactsum.to_float(sums, self.bounds, shifts, grads)
        block_sums_of_squares(grads)  # the clip norm's blocks
        metric = exactsum.new_accumulator(3)  # the metric sums stay in the wide format (they are tiny)
        exactsum.accumulate(np.zeros(3), metric)
        exactsum.to_float(metric, np.zeros(3))


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


def strategy(run: RunSpec) -> type[Exchange]:
    """The exchange strategy class for a job's ``run.reduction``, ``run.exact_format`` and ``run.update``."""
    if run.reduction == "exact":  # they read run.update themselves: exact mode reduce-scatters either way
        return ExactExchange if run.exact_format == "wide" else CompactExchange
    return ShardedExchange if run.update == "sharded" else MessageExchange
