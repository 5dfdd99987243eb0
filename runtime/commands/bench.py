"""Step timing against the BLAS floor (the same process timing only the GEMMs of the same shapes:
`scaling.measure.gemm_floor_step`, which the layouts study times too)."""

from __future__ import annotations

from typing import Any

import numpy as np
from shardmill.config import default, job_from_dict
from shardmill.data.dataset import Dataset
from shardmill.data.rows import Split
from shardmill.machine import machine, resident_bytes
from shardmill.model.losses import LOSSES
from shardmill.parallel.comm import Comm
from shardmill.parallel.exchange import blas_threads
from shardmill.scaling.measure import gemm_floor_step
from shardmill.timing import median, slowest_call
from shardmill.training.trainer import Trainer
from shardmill.training.warmup import warm_up_kernels
from threadpoolctl import threadpool_limits


def synthetic_dataset(layers: list[int], loss: str, rows: int, dtype: str, seed: int = 0) -> Dataset:
    """Random standard-normal inputs and random targets of the right kind, already standardised."""
    rng = np.random.default_rng(seed)
    X = rng.standard_normal((rows, layers[0])).astype(dtype)
    targets = LOSSES[loss].synthetic_targets(rng, rows, layers[-1], dtype)
    split = Split(train=np.arange(rows, dtype=np.int64), validation=np.zeros(0, dtype=np.int64))
    return Dataset(X=X, targets=targets, split=split, mean=np.zeros(layers[0]), inv_std=np.ones(layers[0]))


def run_bench(layers: list[int], batch: int, dtype: str = default("model.dtype"), threads: int = default("run.threads"),
              steps: int = 30, warmup: int = 5, reduction: str = default("run.reduction"),
              overlap: bool = default("run.overlap"), activation: str = default("model.activation"),
              loss: str = default("model.loss"), method: str = "sgd", message_mib: float = default("run.message_mib"),
              exact_chunk: int = 64, update: str = default("run.update"),
              exact_format: str = default("run.exact_format"), comm_driver: str = default("run.comm_driver"),
              norm: str = default("model.norm"), dropout: float | list[float] = default("model.dropout"),
              residual: bool = default("model.residual"), comm: Comm | None = None) -> dict[str, Any]:
    """Median time of full training steps (global batch ``batch`` over all ranks) and of the GEMM floor.

    Step and floor are measured in alternating blocks so that drifting machine load hits both alike. A block
    of steps starts after a barrier; each step counts as the slowest rank's seconds
    (``shardmill.timing.slowest_call``); the floors are each rank's own GEMMs, the slowest rank's per repetition.
    Returns global ``samples_per_s`` (G / median step), ``step_ms`` (the median), ``step_ms_mean`` (the mean, which
    ``phase_ms`` — each phase's total over the timed steps / steps, slowest rank per phase — adds up to; a few slow
    steps on a busy machine lift the mean above the median), ``floor_samples_per_s`` and
    ``ratio_to_floor`` (floor: three GEMMs per layer), and ``ratio_to_needed_floor`` (floor: only the GEMMs
    training needs, i.e. without the first layer's input gradient; ≤ 1, and 1 means no time outside BLAS).
    """
    comm = comm or Comm()
    job = job_from_dict({
        "model": {"layers": layers, "activation": activation, "loss": loss, "dtype": dtype, "norm": norm,
                  "dropout": dropout, "residual": residual},
        "optimizer": {"method": method, "learning_rate": 1e-4},
        "run": {"global_batch": batch, "threads": threads, "reduction": reduction, "overlap": overlap,
                "message_mib": message_mib, "exact_chunk": exact_chunk, "update": update,
                "exact_format": exact_format, "comm_driver": comm_driver, "epochs": 1},
    })
    rows = max(4 * batch, 1024)
    with threadpool_limits(limits=blas_threads(job, comm.size), user_api="blas"):
        trainer = Trainer(job, comm, dataset=synthetic_dataset(layers, loss, rows, dtype))
        compile_s = warm_up_kernels(trainer)
        spe = trainer.sampler.steps_per_epoch
        for s in range(warmup):
            trainer.step(0, s % spe)
            gemm_floor_step(trainer)
        step_times, floor_times, needed_times = [], [], []
        trainer.timer.reset()
        block = 5
        done = 0
        while done < steps:
            todo = min(block, steps - done)
            comm.barrier()  # one per block, as steps follow each other in training
            for s in range(todo):
                step_times.append(slowest_call(comm, lambda k=done + s: trainer.step(0, k % spe), barrier=False))
            for _ in range(todo):
                local = np.array([gemm_floor_step(trainer), gemm_floor_step(trainer, first_layer_dA=False)])
                comm.allreduce_max(local)
                floor_times.append(float(local[0]))
                needed_times.append(float(local[1]))
            done += todo
    phase_max, _ = trainer.reduce_phases()  # seconds over the timed steps, slowest rank per phase
    state_bytes = np.array([sum(a.nbytes for a in trainer.optimizer.state.values()), resident_bytes()],
                           dtype=np.int64)
    comm.allreduce_max(state_bytes)  # and the largest resident set of any rank
    step_s = median(step_times)
    floor_s = median(floor_times)
    needed_s = median(needed_times)
    n_params = trainer.model.n_params
    return {
        "layers": layers,
        "global_batch": batch,
        "processes": comm.size,
        "dtype": dtype,
        "norm": norm,
        "dropout": dropout,
        "residual": residual,
        "threads": threads,
        "threads_used": blas_threads(job, comm.size),  # BLAS's and the kernels' (1: exact mode, or a small model)
        "reduction": reduction,
        "update": update,
        "exact_format": exact_format,
        "comm_driver": comm_driver,
        "overlap": overlap,
        "params": n_params,
        "steps": steps,
        "untimed_steps": warmup,
        "statistic": "median",
        "samples_per_s": batch / step_s,
        "step_ms": step_s * 1e3,
        "floor_samples_per_s": batch / floor_s,
        "floor_ms": floor_s * 1e3,
        "ratio_to_floor": floor_s / step_s,
        "needed_floor_ms": needed_s * 1e3,
        "ratio_to_needed_floor": needed_s / step_s,
        "step_ms_min": min(step_times) * 1e3,
        "step_ms_mean": float(np.mean(step_times)) * 1e3,  # what phase_ms adds up to (phases are totals / steps)
        "floor_ms_min": min(floor_times) * 1e3,
        "compile_s": compile_s,
        "phase_ms": {phase: seconds * 1e3 / steps for phase, seconds in phase_max.items()},
        "optimizer_state_bytes_per_rank": int(state_bytes[0]),
        "resident_mib_per_rank": int(state_bytes[1]) / 2**20,  # the largest over the ranks, after the timed steps
        "machine": machine(),
    }

