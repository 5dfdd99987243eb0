"""Each of our parallel kernels alone, on one thread and on two: the per-kernel part of a step's non-BLAS time.

The shapes are the mid model's (784-1024-1024-10, G = 512, float32, Adam): bias + ReLU forward and its backward on
a (512, 1024) layer, the column sums of a (512, 1024) delta, the row copy of 512 standardised rows of 784 columns
from a (4096, 784) float64 set, and Adam's update of the model's 1,863,690 parameters. Each kernel is timed with
the kernel threads set to 1 and to 2 (``kernels/dispatch.py`` ``use_threads``), BLAS at one thread, the two settings
in turn for each repetition; median. ``t2_over_t1`` below 1 is a gain. These are the kernels alone: inside a
step they also hand the cores back and forth with BLAS's threads (benchmarks/README.md, ``threads_layout.py``).

Usage: ``python benchmarks/kernel_threads.py [--quick]``.
"""

from __future__ import annotations

import argparse
import time
from collections.abc import Callable

import numpy as np
from benchsupport import LoadMeter, emit, log, machine_record
from shardmill.kernels import data, dispatch, threaded
from shardmill.kernels.activations import RELU
from shardmill.timing import median
from threadpoolctl import threadpool_limits


def kernels() -> dict[str, Callable[[], object]]:
    rng = np.random.default_rng(0)
    Z = rng.standard_normal((512, 1024)).astype(np.float32)
    b = rng.standard_normal(1024).astype(np.float32)
    A, D, db = np.empty_like(Z), rng.standard_normal((512, 1024)).astype(np.float32), np.empty(1024, np.float32)
    X = rng.standard_normal((4096, 784))
    rows = np.sort(rng.choice(4096, 512, replace=False)).astype(np.int64)
    mean, inv_std, out = np.zeros(784), np.ones(784), np.empty((512, 784), np.float32)
    n = 784 * 1024 + 1024 + 1024 * 1024 + 1024 + 1024 * 10 + 10
    params, grads = rng.standard_normal(n).astype(np.float32), rng.standard_normal(n).astype(np.float32) * 1e-3
    m, v = np.zeros(n, np.float32), np.zeros(n, np.float32)
    return {
        "bias_relu_forward (512, 1024)": lambda: threaded.bias_forward(Z, b, A, RELU),
        "relu_backward (512, 1024)": lambda: threaded.backward(Z, A, D, RELU),
        "column_sums (512, 1024)": lambda: threaded.column_sums(D, db),
        "take_rows 512 of (4096, 784)": lambda: data.take_rows(X, rows, mean, inv_std, out),
        "adam 1,863,690 parameters": lambda: threaded.adam(params, grads, m, v, 1e-4, 0.9, 0.999, 1e-8, 1, 0.0, 0.0),
    }


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--quick", action="store_true", help="fewer repetitions")
    args = parser.parse_args()
    repeats = 30 if args.quick else 200
    meter = LoadMeter()
    rows = []
    with threadpool_limits(limits=1, user_api="blas"):
        fns = kernels()
        for threads in (2, 1):  # compile both forms first
            dispatch.use_threads(threads)
            threaded.warm_up(np.dtype(np.float32))
            for fn in fns.values():
                fn()
        for name, fn in fns.items():
            times: dict[int, list[float]] = {1: [], 2: []}
            for _ in range(repeats):
                for threads in (1, 2):
                    dispatch.use_threads(threads)
                    begin = time.perf_counter()
                    fn()
                    times[threads].append(time.perf_counter() - begin)
            t1, t2 = median(times[1]), median(times[2])
            rows.append({"kernel": name, "t1_us": t1 * 1e6, "t2_us": t2 * 1e6, "t2_over_t1": t2 / t1})
            log(f"{name}: {t1 * 1e6:.1f} µs → {t2 * 1e6:.1f} µs at two threads ({t2 / t1:.2f})")
        dispatch.use_threads(1)
    total1, total2 = sum(r["t1_us"] for r in rows), sum(r["t2_us"] for r in rows)
    emit({"benchmark": "kernel_threads", "repeats": repeats, "statistic": "median", "kernels": rows,
          "sum_t1_us": total1, "sum_t2_us": total2, "sum_t2_over_t1": total2 / total1,
          "load": meter.stop(), "machine": machine_record()})


if __name__ == "__main__":
    main()
