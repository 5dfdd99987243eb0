"""Lanes: the parts of a step computed at once, each whole part on one thread (exact mode's ``run.threads``).

A lane is what one part's forward and backward need of their own: a workspace, the targets' and weights' batch
buffers, the part's metric sums and the reason its loss cannot be trusted. Lane 0 is the trainer's own (its
``ws``, ``batch_targets``, ``batch_weights``); :class:`Lanes` adds T − 1 more and a pool of T − 1 threads.

Why whole parts: a threaded GEMM may sum in another order than a single-threaded one, so exact mode keeps BLAS at
one thread (``parallel.exchange.blas_threads``) and divides its chunks over the threads instead. A chunk's
gradient then has the bits of one BLAS thread whichever thread computes it, and the exact sum does not depend on
the order of its terms, so the result is the same for every ``run.threads``. NumPy's matmul and the Numba kernels
(``nogil=True``) release the GIL, so the lanes really run at once.

The work goes in waves of up to T parts: lane 0 on the calling thread, the others on the pool; once a wave is
complete its parts join the sum and the metric sums in part order (their first problem, too), so every message and
logged value is the same for every T.
"""

from __future__ import annotations

from collections.abc import Iterator
from concurrent.futures import Future, ThreadPoolExecutor, wait
from typing import Any

import numpy as np
from shardmill.model.mlp import Workspace
from shardmill.timing import PhaseTimer

Trainer = Any  # training/trainer.py's Trainer, which imports this module (no import circle)


class Untimed(PhaseTimer):
    """A phase timer that charges nothing: lanes running at once cannot time phases of one clock."""

    def lap(self, phase: str) -> None:
        """Nothing: the wave as a whole is timed by the caller."""


class Lane:
    """One part's own buffers: ``ws`` (the workspace), ``targets`` and ``weights`` (the batch buffers, rows first),
    ``sums`` (weighted loss sum, quality sum, rows, Σ w; (4,) float64), ``problem`` (why the part's loss cannot
    be trusted, or None), ``timer`` (where the part's phases are charged)."""

    def __init__(self, ws: Workspace, targets: np.ndarray, weights: np.ndarray, timer: PhaseTimer) -> None:
        self.ws, self.targets, self.weights, self.timer = ws, targets, weights, timer
        self.sums = np.zeros(4)
        self.problem: str | None = None


class Lanes:
    """T lanes over one trainer: lane 0 is the trainer's, lanes 1 … T−1 get workspaces (``model.Workspace``, built
    directly: ``model.workspace`` caches one per size) and buffers of the same sizes."""

    def __init__(self, trainer: Trainer, count: int) -> None:
        untimed = Untimed()
        first = Lane(trainer.ws, trainer.batch_targets, trainer.batch_weights, untimed)
        self.lanes = [first] + [Lane(Workspace(trainer.model, trainer.ws.rows), np.zeros_like(first.targets),
                                     np.ones_like(first.weights), untimed) for _ in range(count - 1)]
        self.pool = ThreadPoolExecutor(max_workers=count - 1, thread_name_prefix="shardmill-lane")

    def run(self, trainer: Trainer, parts: Iterator[tuple[np.ndarray, np.ndarray]]) -> None:
        """Every part of ``parts`` (rows, gradient buffer) through ``trainer.part_gradient``, in waves of T; each
        wave's parts then join ``trainer.exchange`` and ``trainer.train_sums`` in part order."""
        wave: list[tuple[np.ndarray, np.ndarray]] = []
        for part in parts:
            wave.append(part)
            if len(wave) == len(self.lanes):
                self.run_wave(trainer, wave)
                wave = []
        if wave:
            self.run_wave(trainer, wave)

    def run_wave(self, trainer: Trainer, wave: list[tuple[np.ndarray, np.ndarray]]) -> None:
        """Up to T parts at once (lane 0 here, the others on the pool), then joined in order."""
        futures: list[Future] = [self.pool.submit(trainer.part_gradient, rows, grads, lane)
                                 for (rows, grads), lane in zip(wave[1:], self.lanes[1:], strict=False)]
        try:
            trainer.part_gradient(*wave[0], self.lanes[0])
        finally:
            wait(futures)  # no lane may still write into a buffer once this returns or raises
        for future in futures:
            future.result()  # a lane's exception, raised here
        for (rows, grads), lane in zip(wave, self.lanes, strict=False):
            trainer.join_part(rows, grads, lane)

    def close(self) -> None:
        """Stop the pool's threads; idempotent."""
        self.pool.shutdown(wait=True)
