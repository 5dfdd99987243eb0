"""The gradient exchange: in-place SUM allreduce of contiguous buckets of the flat gradient buffer.

Layers are laid out last layer first, so backward fills ``grads`` from offset 0 upward. A bucket is a run
of whole layers of at least ``bucket_mb`` megabytes; it is started (non-blocking) the moment backward has
finished its last layer, and all buckets are waited for before the update. With ``overlap`` off, one
blocking allreduce of the whole buffer follows backward instead (for comparison in benchmarks).
"""

from __future__ import annotations

import numpy as np
from shardmill.model import MLP
from shardmill.parallel.comm import Comm


class GradientExchange:
    """Buckets of ``grads`` (a flat array with the params layout) and their in-flight requests."""

    def __init__(self, comm: Comm, model: MLP, grads: np.ndarray, bucket_mb: float, overlap: bool = True) -> None:
        self.comm = comm
        self.grads = grads
        self.overlap = overlap
        limit = bucket_mb * 1e6
        self.buckets: list[tuple[int, int]] = []  # (start, stop) element offsets
        self._closing: dict[int, int] = {}  # layer whose completion closes bucket i -> i
        start = 0
        for l in reversed(range(model.n_layers)):  # the order backward produces gradients
            stop = model.slices[l][1]
            if (stop - start) * grads.itemsize >= limit or l == 0:
                self._closing[l] = len(self.buckets)
                self.buckets.append((start, stop))
                start = stop
        self._requests: list = []

    def layer_done(self, layer: int) -> None:
        """Backward has finished ``layer``: start the allreduce of the bucket it completes, if any."""
        if self.overlap and layer in self._closing:
            start, stop = self.buckets[self._closing[layer]]
            self._requests.append(self.comm.start_allreduce_sum(self.grads[start:stop]))

    def wait(self) -> None:
        """Return once every bucket is reduced (or run the single blocking allreduce without overlap)."""
        if self.overlap:
            self.comm.wait(self._requests)
            self._requests.clear()
        else:
            self.comm.allreduce_sum(self.grads)
