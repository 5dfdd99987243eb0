"""Compiling the step's kernels once before training: rank 0 first, then the others load Numba's cache."""

from __future__ import annotations

import time

import numpy as np
from shardmill.kernels import optim as kernels_optim
from shardmill.kernels import threaded
from shardmill.training.optim import Optimizer
from shardmill.training.trainer import Trainer


def warm_up_kernels(trainer: Trainer) -> float:
    """Compile (or load from Numba's disk cache) every kernel the step uses; rank 0 first, then the others.

    Ranks starting together would otherwise all compile and write the cache at once. Works on scratch
    copies, so the model is untouched. Returns the seconds it took on this rank.
    """
    comm = trainer.comm
    begin = time.perf_counter()

    def run() -> None:
        # two rows, or one where the workspace holds one (a global batch or exact chunk of one row)
        rows = trainer.data.split.train[: min(2, trainer.data.split.train.size, trainer.ws.rows)]
        grads = np.zeros_like(trainer.grads)
        trainer.take_inputs(rows)
        targets = trainer.take_targets(rows)
        # step and rows: the dropout kernels compile too (the mask is a pure function; the workspace is scratch)
        trainer.ws.forward_loss(rows.size, targets, trainer.take_weights(rows), 1.0, step=0, rows=rows)
        trainer.quality_sum(rows.size, targets)
        for _ in trainer.ws.backward(rows.size, grads):
            pass
        scratch = Optimizer(trainer.job.optimizer, grads.size, grads.dtype)
        kernels_optim.sum_squares(grads)  # the serial forms (the blocked ones call them)
        kernels_optim.block_sum_squares(grads, 256, np.zeros(-(-grads.size // 256)))
        kernels_optim.ordered_sum(np.zeros(2))
        kernels_optim.scale(grads, 1.0)
        scratch.step(trainer.model.params.copy(), grads, 1)
        trainer.exchange.warm_up()
        threaded.warm_up(trainer.model.dtype)  # the parallel forms, when kernels run on threads

    if comm.rank == 0:
        run()
    comm.barrier()
    if comm.rank != 0:
        run()
    comm.barrier()  # nobody's first timed step waits for another rank's compilation
    return time.perf_counter() - begin
