"""What a step sends, described without sending it: the statements the exchange strategies make about themselves.

Each part of a strategy (``parallel/ownership.py``, ``parallel/summation.py``) states its own collectives as
:class:`Collective` values; the cost model (``scaling/costmodel.py``) prices them. No MPI here, so the cost model
reads the statements without starting MPI.
"""

from __future__ import annotations

from dataclasses import dataclass

COLLECTIVES: tuple[str, ...] = ("allreduce", "reduce_scatter", "allgather")
"""The collectives a step sends (`Collective.kind`)."""


@dataclass(frozen=True)
class Collective:
    """One collective a step sends: kind (see `COLLECTIVES`), n_bytes of the whole vector (the paper's n, bytes),
    and calls, the number of such calls per step (exact mode's wide format reduce-scatters each limb row alone)."""

    kind: str
    n_bytes: float
    calls: int = 1
