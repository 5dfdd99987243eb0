"""One process (P = 1): what layer normalisation, dropout and residual skips cost.

Prints one JSON object:

* ``step_ratio``: median step of the 784-1024-1024-10 model with ``norm = "layer"``, ``dropout = 0.1`` and
  ``residual = true`` over the median step of the plain model of the same widths, G = 512, float32, SGD, both
  measured in the same run, one step of each in turn (so drifting load hits both alike). The issue's target: ≤ 1.10.
* ``kernels``: each new kernel of ``kernels/layers.py`` on one (512, 1024) float32 layer, against a streaming copy
  (``np.copyto``) that reads and writes the same number of bytes as the kernel (``bytes`` below, read + written),
  timed in turn; ``ratio_to_copy`` = copy seconds / kernel seconds (1: the kernel runs at memory speed). Target: ≥ 0.7.

Usage: ``python benchmarks/layers_cost.py [--quick]``. BLAS is pinned to one thread.
"""

from __future__ import annotations

import argparse
from collections.abc import Callable
from typing import Any

import numpy as np
from benchsupport import LoadMeter, emit, log, machine_record
from shardmill.commands.bench import synthetic_dataset
from shardmill.config import job_from_dict
from shardmill.kernels import layers as K
from shardmill.kernels.activations import RELU
from shardmill.parallel.comm import Comm
from shardmill.timing import median, time_call
from shardmill.training.trainer import Trainer
from shardmill.training.warmup import warm_up_kernels
from threadpoolctl import threadpool_limits

LAYERS = [784, 1024, 1024, 10]
BATCH = 512
NEW_KEYS = {"norm": "layer", "dropout": 0.1, "residual": True}


def trainer(keys: dict[str, Any]) -> Trainer:
    job = job_from_dict({"model": {"layers": LAYERS, "dtype": "float32", **keys},
                         "optimizer": {"method": "sgd", "learning_rate": 1e-4},
                         "run": {"global_batch": BATCH, "epochs": 1}})
    t = Trainer(job, Comm.alone(), dataset=synthetic_dataset(LAYERS, "softmax_cross_entropy", 4 * BATCH, "float32"))
    warm_up_kernels(t)
    return t


def paired(fns: dict[str, Callable[[], Any]], repeats: int) -> dict[str, float]:
    """Median seconds of each function, called one after the other ``repeats`` times (round robin)."""
    times: dict[str, list[float]] = {name: [] for name in fns}
    for _ in range(repeats):
        for name, fn in fns.items():
            times[name].append(time_call(fn))
    return {name: median(t) for name, t in times.items()}


def step_ratio(repeats: int) -> dict[str, Any]:
    plain, layered = trainer({}), trainer(NEW_KEYS)
    spe = plain.sampler.steps_per_epoch
    count = {"plain": 0, "layered": 0}

    def step(name: str, t: Trainer) -> Callable[[], None]:
        def run() -> None:
            t.step(0, count[name] % spe)
            count[name] += 1
        return run

    for _ in range(3):  # warm caches and pages
        step("plain", plain)()
        step("layered", layered)()
    seconds = paired({"plain": step("plain", plain), "layered": step("layered", layered)}, repeats)
    return {"plain_step_ms": seconds["plain"] * 1e3, "layered_step_ms": seconds["layered"] * 1e3,
            "step_ratio": seconds["layered"] / seconds["plain"], "keys": NEW_KEYS}


def kernel_ratios(repeats: int) -> dict[str, Any]:
    rng = np.random.default_rng(0)
    n, m = BATCH, LAYERS[1]
    f32 = np.float32

    def array() -> np.ndarray:
        return rng.standard_normal((n, m)).astype(f32)

    Z, H, S, A, D = (array() for _ in range(5))
    dg, ds = np.zeros(m, f32), np.zeros(m, f32)
    g, s = np.ones(m, f32), np.zeros(m, f32)  # D of the in-place norm backward then stays the same size call after call
    stats, scratch, zero = np.zeros((n, 2)), np.zeros((2, m)), np.zeros(m, f32)
    row_sums = np.zeros((2, m), f32)
    keep = np.zeros((n, m), np.uint8)
    rows = np.arange(n, dtype=np.int64)
    key = np.uint64(K.dropout_key(np.uint64(0), np.uint64(1), np.uint64(0)))
    threshold, scale = np.uint32(int(0.1 * 2**32)), f32(1 / 0.9)
    e = Z.nbytes
    kernels = {  # name: (call, bytes read + written)
        "norm_forward": (lambda: K.norm_forward(Z, zero, g, s, H, stats, scratch, RELU), 3 * e),
        "norm_backward": (lambda: K.norm_backward(Z, stats, g, s, H, D, dg, ds, row_sums, RELU), 3 * e),
        "dropout_forward": (lambda: K.dropout_forward(H, S, A, keep, rows, key, threshold, scale, True),
                            3 * e + e // 4),
        "dropout_backward": (lambda: K.dropout_backward(D, S, keep, scale, True), 3 * e + e // 4),
        "residual_forward": (lambda: K.residual_forward(H, S, A), 3 * e),
        "residual_backward": (lambda: K.residual_backward(D, S), 3 * e),
    }
    out = {}
    for name, (call, nbytes) in kernels.items():
        src = np.ones(nbytes // 2, np.uint8)
        dst = np.zeros_like(src)
        call()  # compile or load from the cache
        seconds = paired({"kernel": call, "copy": lambda s=src, d=dst: np.copyto(d, s)}, repeats)
        out[name] = {"bytes": nbytes, "kernel_us": seconds["kernel"] * 1e6, "copy_us": seconds["copy"] * 1e6,
                     "ratio_to_copy": seconds["copy"] / seconds["kernel"]}
    return out


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--quick", action="store_true", help="fewer repetitions")
    args = parser.parse_args()
    meter = LoadMeter()
    with threadpool_limits(limits=1, user_api="blas"):
        log("timing the steps")
        steps = step_ratio(10 if args.quick else 40)
        log("timing the kernels")
        kernels = kernel_ratios(50 if args.quick else 300)
    emit({"benchmark": "layers_cost", "layers": LAYERS, "global_batch": BATCH, "dtype": "float32",
          **steps, "kernels": kernels, "statistic": "median, round robin", "load": meter.stop(),
          "machine": machine_record()})


if __name__ == "__main__":
    main()
