"""Time measured one way everywhere: the phases of a training step, and repeat-and-median of any call.

All clocks are ``time.perf_counter`` (seconds). A timing over MPI ranks is the slowest rank's, after a barrier.
"""

from __future__ import annotations

import statistics
import time
from collections.abc import Callable, Sequence
from typing import Any

import numpy as np

PHASES = ("data", "forward", "backward", "exchange", "update")
"""The phases of a step, in the order the step runs them."""


class PhaseTimer:
    """Seconds spent per phase since the last :meth:`reset`, one entry per name in :data:`PHASES`.

    ``start()`` marks the beginning of a step; ``lap("forward")`` charges the seconds since the previous mark
    to that phase and moves the mark. A phase that another one interrupts (the exchange: the gradient's sum, then,
    after the update, the parameters' publish) is ``hold``-ed where it pauses and lapped once, where it ends.
    ``seconds`` is the (len(PHASES),) float64 array of totals.
    """

    def __init__(self) -> None:
        self.seconds = np.zeros(len(PHASES))
        self._held = np.zeros(len(PHASES))  # seconds of the current step set aside for a later lap
        self._index = {name: i for i, name in enumerate(PHASES)}
        self._last = 0.0

    def start(self) -> None:
        self._last = time.perf_counter()
        self._held[:] = 0.0

    def hold(self, phase: str) -> None:
        """Set the seconds since the mark aside for ``phase`` (charged by its next lap) and move the mark."""
        now = time.perf_counter()
        self._held[self._index[phase]] += now - self._last
        self._last = now

    def lap(self, phase: str) -> None:
        """Charge the seconds since the mark, and any held for ``phase``, to ``phase``; move the mark."""
        now = time.perf_counter()
        i = self._index[phase]
        self.seconds[i] += now - self._last + self._held[i]
        self._held[i] = 0.0
        self._last = now

    def reset(self) -> None:
        self.seconds[:] = 0.0
        self._held[:] = 0.0

    def as_dict(self) -> dict[str, float]:
        """{phase: seconds} of the totals so far."""
        return dict(zip(PHASES, map(float, self.seconds), strict=True))


# Repeat and take the median: the one way shardmill times a piece of code (bench, scale, benchmarks).


def median(values: Sequence[float]) -> float:
    """Median of a non-empty sequence (the mean of the two middle values for an even count)."""
    return float(statistics.median(values))


def time_call(fn: Callable[[], Any]) -> float:
    """Seconds taken by one call of ``fn`` (time.perf_counter)."""
    begin = time.perf_counter()
    fn()
    return time.perf_counter() - begin


def slowest_call(comm: Any, fn: Callable[[], Any], barrier: bool = True) -> float:
    """Seconds of one call of ``fn`` on every rank at once: barrier, time, the slowest rank's seconds.

    ``comm`` is a :class:`shardmill.parallel.comm.Comm`; every rank gets the same value (one MAX allreduce,
    outside the timed region), so decisions taken on it agree across ranks. ``barrier=False`` for calls in a
    row after one barrier (each call's MAX allreduce already lines the ranks up again).
    """
    if barrier:
        comm.barrier()
    seconds = np.array([time_call(fn)])
    comm.allreduce_max(seconds)
    return float(seconds[0])


def repeat_times(fn: Callable[[], Any], repeats: int, warmup: int = 2, comm: Any = None) -> list[float]:
    """Seconds of each of ``repeats`` calls of ``fn`` after ``warmup`` untimed ones.

    With ``comm`` (a Comm) each timed call is :func:`slowest_call`: all ranks call this with the same counts.
    """
    if repeats < 1:
        raise ValueError(f"`repeats` must be >= 1; got {repeats!r}")
    if warmup < 0:
        raise ValueError(f"`warmup` must be >= 0; got {warmup!r}")
    for _ in range(warmup):
        fn()
    if comm is None:
        return [time_call(fn) for _ in range(repeats)]
    return [slowest_call(comm, fn) for _ in range(repeats)]


def median_time(fn: Callable[[], Any], repeats: int, warmup: int = 2, comm: Any = None) -> float:
    """Median seconds of :func:`repeat_times` (``comm``: the slowest rank's seconds per call)."""
    return median(repeat_times(fn, repeats, warmup, comm))
