"""What the cost model is fitted to, measured on this machine: allreduce times per message size, γ, and the GEMM
floor of a step (the BLAS part of the threaded compute term, `layoutmodel.py`).

Timed the shardmill way (`shardmill.timing`): a barrier before each call, the slowest rank's seconds, the
median over repetitions. The formulas these numbers feed are in `costmodel.py`, which needs no MPI.
"""

from __future__ import annotations

from collections.abc import Callable, Iterable
from typing import Any

import numpy as np
from shardmill.scaling.costmodel import check_non_negative
from shardmill.timing import median, repeat_times, time_call

MESSAGE_SIZES: tuple[int, ...] = tuple(4096 * 4**k for k in range(8))
"""Allreduce message sizes timed at every P > 1, bytes: 4 KiB, 16 KiB, …, 64 MiB (eight sizes)."""

COMM_BUDGET_S = 30.0
"""Seconds of allreduce timing allowed per run; larger sizes are skipped (and reported) once it would be exceeded."""


def measure_allreduce(
    comm: Any,
    sizes_bytes: Iterable[float],
    repeats: int = 10,
    warmup: int = 2,
    dtype: Any = np.float32,
) -> list[dict[str, Any]]:
    """Time an in-place SUM allreduce for each message size on `comm` (a Comm or an mpi4py communicator).

    Every rank must call this with the same arguments: it runs the same collectives everywhere. Each size is
    rounded down to whole elements of `dtype` (at least one). Per size: `warmup` untimed calls, then `repeats`
    timed ones, each after a barrier; a repetition's time is the slowest rank's (MAX allreduce of the local
    times, outside the timed region). The buffer holds zeros, so repeated sums never overflow or turn
    subnormal.

    Returns one dict per size on every rank: n_bytes (bytes actually sent), count (elements), dtype, p,
    repeats, warmup, median_s, min_s (seconds) and times_s (every repetition, seconds).
    """
    from mpi4py import MPI  # lazily: importing this module must not start MPI
    from shardmill.parallel.comm import Comm

    world = comm if isinstance(comm, Comm) else Comm(comm)
    raw = world.comm
    itemsize = np.dtype(dtype).itemsize
    results = []
    for size in sizes_bytes:
        count = max(1, int(check_non_negative(size, "sizes_bytes")) // itemsize)
        buffer = np.zeros(count, dtype=dtype)
        # Raw mpi4py on purpose: the model's α and β are MPI's, without our wrapper's few microseconds.
        times = repeat_times(lambda buffer=buffer: raw.Allreduce(MPI.IN_PLACE, buffer), int(repeats), int(warmup),
                             comm=world)
        results.append(
            {
                "n_bytes": count * itemsize,
                "count": count,
                "dtype": np.dtype(dtype).name,
                "p": world.size,
                "repeats": int(repeats),
                "warmup": int(warmup),
                "median_s": median(times),
                "min_s": min(times),
                "times_s": times,
            }
        )
    return results


def measure_reduction_gamma(n_bytes: float, repeats: int = 10, warmup: int = 2, dtype: Any = np.float32) -> float:
    """Estimate γ in seconds per byte: median time of a numpy in-place add `a += b` of `n_bytes` bytes,
    divided by the bytes reduced. Runs on this process only, no MPI. Choose n_bytes near the gradient
    message size: small sizes measure call overhead, sizes beyond the caches measure memory bandwidth.
    """
    itemsize = np.dtype(dtype).itemsize
    count = max(1, int(check_non_negative(n_bytes, "n_bytes")) // itemsize)
    accumulator = np.zeros(count, dtype=dtype)
    incoming = np.zeros(count, dtype=dtype)
    times = repeat_times(lambda: np.add(accumulator, incoming, out=accumulator), int(repeats), int(warmup))
    return median(times) / (count * itemsize)


def time_allreduce(comm: Any, sizes: tuple[int, ...], repeats: int, budget_s: float,
                   dtype: Any) -> tuple[list[dict[str, Any]], list[int]]:
    """`measure_allreduce` size by size, smallest first, within a budget of `budget_s` seconds.

    Before each size the time it would take is estimated from the previous one, scaled linearly with the
    bytes (the bandwidth term dominates beyond the latency regime); a size that would exceed the budget is
    skipped, as are all larger ones. Only the returned times (the slowest rank's, identical on every rank)
    enter the decision, so every rank skips the same sizes. Returns (timings, skipped sizes in bytes).
    """
    timings: list[dict[str, Any]] = []
    spent = 0.0
    for i, size in enumerate(sizes):
        if timings:
            last = timings[-1]
            estimate = last["median_s"] * size / last["n_bytes"] * (repeats + 1)
            if spent + estimate > budget_s:
                return timings, list(sizes[i:])
        (timing,) = measure_allreduce(comm, [size], repeats=repeats, warmup=1, dtype=dtype)
        spent += sum(timing["times_s"]) * (repeats + 1) / repeats  # the warm-up call costs about one more
        timings.append(timing)
    return timings, []


def floor_gemms(trainer: Any, first_layer_dA: bool = True) -> tuple[Callable[[], None], Callable[[], None]]:
    """The GEMMs of one step on this rank's local batch shapes, as two calls: the forward pass's (Z = A W per
    layer) and the backward pass's (dW = Aᵀ dZ per layer, dA = dZ Wᵀ above the first layer, and the first layer's
    too with ``first_layer_dA``), into the trainer's own buffers.

    trainer: a `training.trainer.Trainer` (its workspace, model and gradient buffer are used, not imported here).
    """
    ws, model = trainer.ws, trainer.model
    n = ws.rows
    dWs, _ = model.views(trainer.grads)

    def forward() -> None:
        for l in range(model.n_layers):
            np.matmul(ws.A[l][:n], model.weights[l], out=ws.Z[l][:n])

    def backward() -> None:
        for l in reversed(range(model.n_layers)):
            dZ = ws.delta(0, n, model.sizes[l + 1])
            np.matmul(ws.A[l][:n].T, dZ, out=dWs[l])
            if l > 0 or first_layer_dA:
                np.matmul(dZ, model.weights[l].T, out=ws.delta(1, n, model.sizes[l]))

    return forward, backward


def gemm_floor_step(trainer: Any, first_layer_dA: bool = True) -> float:
    """Seconds for the GEMMs of one step (:func:`floor_gemms`, forward then backward), at BLAS's current thread
    count.

    With ``first_layer_dA`` it includes the first layer's dA (the gradient with respect to the inputs), which
    training never needs: that floor is *more* work than the step does. Without it, the floor is exactly the GEMMs
    the step runs.
    """
    forward, backward = floor_gemms(trainer, first_layer_dA)

    def gemms() -> None:
        forward()
        backward()

    return time_call(gemms)
