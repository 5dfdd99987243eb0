"""Who updates which parameters: every rank all of them (:class:`Replicated`) or each rank its own slice
(:class:`Sharded`). The other choice of a strategy, how the gradient is summed, is ``summation.py``'s.

An ownership says which parameters this rank updates (``owned``, the length of its optimizer state), how the
updated parameters become every rank's again (:meth:`publish`), how an array of the owned layout is joined into a
whole one (:meth:`full`, for checkpoints and ``verify``), and what of that it sends each step (:meth:`collectives`).
``sharded`` is a property of the class, the same on every rank: never derive a collective's presence from a rank's
own slice (a rank of a tiny model may own everything or nothing while the others still run the collectives).
"""

from __future__ import annotations

from typing import TYPE_CHECKING

import numpy as np
from shardmill.data.rows import block_range
from shardmill.parallel.collectives import Collective

if TYPE_CHECKING:  # the cost model reads the statements below without MPI
    from shardmill.parallel.comm import Comm

BLOCK = 256
"""Owned slices start at multiples of BLOCK elements, so that the fixed blocks of exact mode's sum of squares and
of the compact format's scales never straddle two ranks (each block's result then has the same bits whatever P is)."""


def owner_bounds(n: int, processes: int) -> list[tuple[int, int]]:
    """[lo, hi) of the contiguous slice of an n-element flat array that each rank owns, in rank order.

    Whole blocks of :data:`BLOCK` elements, as even as they come (a rank may own nothing in a tiny model).
    """
    blocks = -(-n // BLOCK)
    return [(min(lo * BLOCK, n), min(hi * BLOCK, n)) for lo, hi in (block_range(blocks, r, processes)
                                                                    for r in range(processes))]


class Replicated:
    """Every rank updates every parameter with the whole summed gradient; nothing to publish.

    ``bounds`` / ``counts``: each rank's block-aligned slice (:func:`owner_bounds`), which exact mode reads back
    of its sum before it gathers the whole gradient.
    """

    sharded = False

    def __init__(self, comm: Comm, n: int) -> None:
        self.comm = comm
        self.bounds = owner_bounds(n, comm.size)
        self.counts = [hi - lo for lo, hi in self.bounds]  # elements in each rank's slice, rank order
        self.owned = slice(0, n)  # the parameters this rank updates
        self.owned_size = n  # the length of this rank's optimizer state arrays

    @staticmethod
    def collectives(n_params: int, itemsize: int) -> tuple[Collective, ...]:
        """What the ownership sends per step (the sum's collectives are the summation's): nothing."""
        return ()

    def publish(self, params: np.ndarray) -> None:
        """After the update of ``params[owned]``: every rank holds every parameter (here it already does)."""

    def full(self, owned_values: np.ndarray) -> np.ndarray:
        """Every rank's ``owned`` part of a params-layout array, joined: (n_params,) on every rank."""
        return owned_values


class Sharded:
    """Each rank updates its own block-aligned slice (:func:`owner_bounds`), with optimizer state for that slice
    alone ((P−1)/P less memory per rank); :meth:`publish` allgathers the updated slices so every rank holds every
    parameter. The update is divided by P instead of repeated on every rank.
    """

    sharded = True

    def __init__(self, comm: Comm, n: int) -> None:
        self.comm = comm
        self.bounds = owner_bounds(n, comm.size)
        self.counts = [hi - lo for lo, hi in self.bounds]  # elements each rank owns, rank order
        self.owned = slice(*self.bounds[comm.rank])  # the parameters this rank updates
        self.owned_size = self.counts[comm.rank]  # the length of this rank's optimizer state arrays

    @staticmethod
    def collectives(n_params: int, itemsize: int) -> tuple[Collective, ...]:
        """The parameters allgathered by :meth:`publish`, n_params·itemsize bytes."""
        return (Collective("allgather", float(n_params * itemsize)),)

    def publish(self, params: np.ndarray) -> None:
        """Every rank's updated slice to every rank (in-place allgather of the parameters)."""
        self.comm.allgather(params, self.counts)

    def full(self, owned_values: np.ndarray) -> np.ndarray:
        """Every rank's slice of a params-layout array allgathered: (n_params,) on every rank (collective)."""
        out = np.zeros(sum(self.counts), dtype=owned_values.dtype)
        out[self.owned] = owned_values
        return self.comm.allgather(out, self.counts)


Ownership = Replicated | Sharded
"""Either ownership: the same attributes and methods, no shared base class."""
