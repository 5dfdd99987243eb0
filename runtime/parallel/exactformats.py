"""Exact mode's integer formats: how :class:`~shardmill.parallel.summation.ExactSum` holds the sum of its chunks.

:class:`WideFormat` (``run.exact_format = "wide"``): 3 × 40-bit int64 limbs per value (``kernels.exactsum``),
resolution 2⁻⁸⁸, |g| < 2³¹, read back correctly rounded; 24 bytes per parameter reduce-scattered, one call per limb
row. :class:`CompactFormat` (``"compact"``): one int64 per value on a power-of-two scale per block of
:data:`~shardmill.parallel.ownership.BLOCK` values, fixed before any value is converted from the largest |g| in that
block over all K chunks (a MAX allreduce: order-free, so the same for every P), with ceil(log2 K) bits of headroom
(``kernels.compactsum``); 8 bytes per parameter, within K·2^(h−51) of each block's largest value (h = ceil(log2 K))
before the final rounding to the dtype. :class:`NarrowFormat` (``"narrow"``): the same on int32 and a 30-bit grid,
4 bytes per parameter (the bytes of fast mode), within K·2^(h−30). All are bit-identical for every P and rerun.

A format receives this rank's chunks (:meth:`buffer`, :meth:`add`), completes its sums (:meth:`complete`: the
compact formats agree on the scales and convert then), reduce-scatters them and reads a slice (or, on one rank,
everything) back to floating point; it states the collectives of its sum (:meth:`collectives`).
"""

from __future__ import annotations

import math
from typing import TYPE_CHECKING

import numpy as np
from shardmill.errors import JobError
from shardmill.kernels import compactsum, exactsum
from shardmill.parallel.collectives import Collective
from shardmill.parallel.ownership import BLOCK

if TYPE_CHECKING:  # the cost model reads the statements below without MPI
    from shardmill.config import RunSpec
    from shardmill.parallel.comm import Comm

NARROW_MAX_CHUNKS = 64
"""The narrow format's error bound K·2^(h−30) of a scale block's largest value grows with the chunks K per step:
at 64 it is 2^-18, near float32's own rounding; beyond, the compact format is the honest choice."""


class WideFormat:
    """3 int64 limbs per value. ``grads``: the params-layout gradient (its shape and dtype); ``chunks``: K;
    ``mine``: this rank's chunks; ``most``: the most chunks of any rank; ``read``: the slice this rank reads back;
    ``lanes``: how many chunks are computed at once (``run.threads``), each into a buffer of its own.

    A rank with two or more chunks computes its first two into separate buffers and writes their digits in one
    pass (``exactsum.assign_pair``): one read-and-write of the limbs fewer per step. The first chunk overwrites the
    limbs: no zeroing pass, no read. Chunk i computes into buffer i mod (number of buffers); chunks are added in
    order, after the chunks computed at the same time as them are complete.
    """

    def __init__(self, grads: np.ndarray, chunks: int, mine: int, most: int, read: slice, lanes: int = 1) -> None:
        # every rank compiles the pair kernel when any rank pairs
        self.buffers = [np.zeros_like(grads) for _ in range(max(lanes, 2 if most >= 2 else 1))]
        self.chunk_grads = self.buffers[0]
        self.pair_grads = self.buffers[1] if most >= 2 else None
        self.paired = self.pair_grads is not None and mine >= 2
        self.limbs = exactsum.new_accumulator(grads.size)
        self.slice_limbs = exactsum.new_accumulator(read.stop - read.start)

    @staticmethod
    def check(run: RunSpec) -> None:
        """Any number of chunks fits (up to ``exactsum.MAX_TERMS``, far beyond a batch)."""

    @staticmethod
    def collectives(n_params: int) -> tuple[Collective, ...]:
        """The limbs reduce-scattered one row per call: ``exactsum.LIMBS`` calls of n_params·8 bytes."""
        return (Collective("reduce_scatter", float(n_params * 8), calls=exactsum.LIMBS),)

    def buffer(self, i: int) -> np.ndarray:
        """Where this rank's chunk ``i`` (0, 1, …) computes its gradient."""
        return self.buffers[i % len(self.buffers)]

    def add(self, i: int, part_grads: np.ndarray) -> str | None:
        """Chunk ``i``'s gradient into the limbs; a value outside their range (|g| ≥ 2^31, inf, NaN) is named."""
        if self.paired and i < 2:
            if i == 0:
                return None  # the first of a pair waits for the second
            largest = exactsum.assign_pair(self.chunk_grads, self.pair_grads, self.limbs)
        else:
            largest = exactsum.accumulate(part_grads, self.limbs, replace=i == 0)
        if largest < exactsum.MAX_ABS:
            return None
        return f"a gradient element is {largest!r}, outside the exact accumulator's range (|g| < 2^31)"

    def complete(self, comm: Comm) -> str | None:
        """Nothing left to do: the limbs hold the sum of this rank's chunks."""
        return None

    def read_all(self, out: np.ndarray) -> None:
        """One rank: the whole sum, correctly rounded into ``out`` (the params layout)."""
        exactsum.to_float(self.limbs, out)

    def reduce_scatter(self, comm: Comm, counts: list[int]) -> None:
        """This rank's slice of the limbs summed over ranks, into ``slice_limbs``.

        One call per limb row: MPICH slows sharply on single messages past ~22 MB.
        """
        for limb, mine in zip(self.limbs, self.slice_limbs, strict=True):
            comm.reduce_scatter_sum(limb, mine, counts)

    def read_back(self, out: np.ndarray, offset: int) -> None:
        """This rank's slice of the summed limbs, correctly rounded into ``out`` (flat elements from ``offset``)."""
        exactsum.to_float(self.slice_limbs, out)

    def conversion_bound(self) -> float:
        """0: the read-back is correctly rounded."""
        return 0.0

    def warm_up(self) -> None:
        """Compile (or load from Numba's cache) the format's kernels on scratch buffers."""
        grads = np.zeros_like(self.chunk_grads)
        limbs = np.zeros_like(self.limbs)
        exactsum.accumulate(grads, limbs)
        if self.pair_grads is not None:
            exactsum.assign_pair(grads, grads.copy(), limbs)
        exactsum.to_float(limbs, grads)


class CompactFormat:
    """One int64 per value on a scale per block; arguments as :class:`WideFormat`'s.

    A rank keeps its chunks' gradients until the scales are known (only the blocks' largest magnitudes are taken
    as they arrive), converts and adds them in int64 (exact, associative) in :meth:`complete`. Every chunk has a
    buffer of its own, so ``lanes`` (chunks computed at once) needs none more.
    """

    integer: type = np.int64
    most_chunks = compactsum.MAX_CHUNKS
    hint = ""  # what to use instead beyond most_chunks

    def __init__(self, grads: np.ndarray, chunks: int, mine: int, most: int, read: slice, lanes: int = 1) -> None:
        self.bits = compactsum.term_bits(self.integer)
        self.chunks = chunks
        self.dtype = grads.dtype
        self.chunk_buffers = [np.zeros_like(grads) for _ in range(mine)]
        # One scale per block of BLOCK values: block b is [bounds[b], bounds[b + 1]).
        self.bounds = np.append(np.arange(0, grads.size, BLOCK, dtype=np.int64), np.int64(grads.size))
        self.largest = np.zeros(self.bounds.size - 1)  # per block, max |g| over the chunks seen this step
        self.sums = np.zeros(grads.size, dtype=self.integer)
        self.slice_sums = np.zeros(read.stop - read.start, dtype=self.integer)
        self.shifts = np.zeros(self.bounds.size - 1, dtype=np.int64)

    @classmethod
    def check(cls, run: RunSpec) -> None:
        """Raise JobError if the chunks per step exceed what the format's headroom and accuracy allow."""
        if run.global_batch // run.exact_chunk > cls.most_chunks:
            raise JobError(f"`run.exact_format` = {run.exact_format!r} allows at most {cls.most_chunks} chunks per "
                           f"step (global_batch / exact_chunk); got {run.global_batch // run.exact_chunk}" + cls.hint)

    @classmethod
    def collectives(cls, n_params: int) -> tuple[Collective, ...]:
        """The MAX allreduce of one float64 per block, then the integer sums reduce-scattered (one call)."""
        blocks = -(-n_params // BLOCK)
        return (Collective("allreduce", float(blocks * 8)),
                Collective("reduce_scatter", float(n_params * np.dtype(cls.integer).itemsize)))

    def buffer(self, i: int) -> np.ndarray:
        """Where this rank's chunk ``i`` computes its gradient: kept until the scales are known."""
        return self.chunk_buffers[i]

    def add(self, i: int, part_grads: np.ndarray) -> str | None:
        """Only the blocks' largest magnitudes now; the values are converted once every scale is known."""
        if i == 0:
            self.largest.fill(0.0)
        largest = compactsum.block_max_abs(part_grads, self.bounds, self.largest)
        if math.isfinite(largest):
            return None
        np.nan_to_num(self.largest, copy=False, nan=np.inf)  # MAX is well defined on inf, not on NaN
        return f"a gradient element is {largest!r}; exact mode cannot sum it"

    def complete(self, comm: Comm) -> str | None:
        """Agree on the scales (MAX allreduce), then convert and add this rank's chunks; a non-finite maximum
        anywhere is named instead (the same on every rank)."""
        comm.allreduce_max(self.largest)
        if not np.all(np.isfinite(self.largest)):
            return "a gradient element on another rank is not finite"
        self.shifts = compactsum.shifts(self.largest, self.chunks, self.bits)
        limit = 2.0 ** (self.bits - compactsum.headroom_bits(self.chunks))
        for i, buffer in enumerate(self.chunk_buffers):
            largest = compactsum.accumulate(buffer, self.bounds, self.shifts, self.sums, replace=i == 0)
            if not largest < limit:  # cannot happen for chunks that went into the maxima: a bug, not bad data
                raise FloatingPointError(f"compact exact sum: a term of {largest!r} is outside its grid (< {limit})")
        return None

    def read_all(self, out: np.ndarray) -> None:
        """One rank: the whole sum read back into ``out`` (the params layout)."""
        compactsum.to_float(self.sums, self.bounds, self.shifts, out)

    def reduce_scatter(self, comm: Comm, counts: list[int]) -> None:
        """This rank's slice of the integer sums, summed over ranks, into ``slice_sums``."""
        comm.reduce_scatter_sum(self.sums, self.slice_sums, counts)

    def read_back(self, out: np.ndarray, offset: int) -> None:
        """This rank's slice of the summed integers into ``out`` (flat elements from ``offset``)."""
        compactsum.to_float(self.slice_sums, self.bounds, self.shifts, out, offset=offset)

    def conversion_bound(self) -> np.ndarray:
        """K·2^(−S_b−1) per element: each of the K chunks' values was rounded once to its block's grid."""
        sizes = np.diff(self.bounds)
        return np.repeat(self.chunks * np.ldexp(1.0, -self.shifts - 1), sizes)

    def warm_up(self) -> None:
        """Compile (or load from Numba's cache) the format's kernels on scratch buffers."""
        grads = np.zeros(self.sums.size, dtype=self.dtype)
        largest = np.zeros(self.bounds.size - 1)
        compactsum.block_max_abs(grads, self.bounds, largest)
        shifts = compactsum.shifts(largest, self.chunks, self.bits)
        sums = np.zeros_like(self.sums)
        compactsum.accumulate(grads, self.bounds, shifts, sums, replace=True)
        compactsum.accumulate(grads, self.bounds, shifts, sums)
        compactsum.to_float(sums, self.bounds, shifts, grads)


class NarrowFormat(CompactFormat):
    """The compact format on int32 and a 30-bit grid: 4 bytes per parameter, at most 64 chunks per step."""

    integer = np.int32
    most_chunks = NARROW_MAX_CHUNKS
    hint = "; use 'compact' for more"


FORMATS: dict[str, type[WideFormat] | type[CompactFormat]] = {
    "wide": WideFormat, "compact": CompactFormat, "narrow": NarrowFormat}
"""The format of each ``run.exact_format``."""
