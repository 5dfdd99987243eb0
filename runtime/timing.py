"""Where the time of a training step goes: named phases, timed with ``time.perf_counter``."""

from __future__ import annotations

import time

import numpy as np

PHASES = ("data", "forward", "backward", "exchange", "update")
"""The phases of a step, in the order the step runs them."""


class PhaseTimer:
    """Seconds spent per phase since the last :meth:`reset`, one entry per name in :data:`PHASES`.

    ``start()`` marks the beginning of a step; ``lap("forward")`` charges the seconds since the previous mark
    to that phase and moves the mark. ``seconds`` is the (len(PHASES),) float64 array of totals.
    """

    def __init__(self) -> None:
        self.seconds = np.zeros(len(PHASES))
        self._index = {name: i for i, name in enumerate(PHASES)}
        self._last = 0.0

    def start(self) -> None:
        self._last = time.perf_counter()

    def lap(self, phase: str) -> None:
        now = time.perf_counter()
        self.seconds[self._index[phase]] += now - self._last
        self._last = now

    def reset(self) -> None:
        self.seconds[:] = 0.0

    def as_dict(self) -> dict[str, float]:
        """{phase: seconds} of the totals so far."""
        return dict(zip(PHASES, map(float, self.seconds), strict=True))
