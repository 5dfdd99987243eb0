"""One process: the optimizer update's achieved memory bandwidth against a streaming copy on the same machine.

Prints one JSON object. For each method (sgd, momentum, nesterov, adam, adamw), dtype (float32, float64) and size
(the mid model's parameter count, and a larger one of 16 M):

* ``update_gb_per_s``: bytes the update moves per call / median seconds per call, counting every array pass once:
  sgd reads params and grads and writes params (3 passes of n·itemsize bytes), momentum and nesterov also read and
  write the velocity (5 passes), adam and adamw read params, grads, m, v and write params, m, v (7 passes).
* ``copy_gb_per_s``: a streaming copy (read src, write dst: 2 passes) whose two arrays together are as large as
  the update's arrays together, so that both run from the same level of the memory hierarchy; the faster of
  ``np.copyto`` and a Numba copy loop. ``ratio`` = update / copy: 1 means the update runs at copy speed.
  Written bytes are counted once in both, although a copy's stores to a destination it has not read may cost
  an extra read for ownership; the update reads every array it writes, so its count is its whole traffic.
* ``large_copy_gb_per_s``: the same copy on arrays of LARGE_COPY_BYTES together (main memory), with
  ``ratio_to_large_copy``, for the machine record.
* ``fastest_call_ratio``: the ratio from the fastest call of each instead of the median (as STREAM reports).

The update and its copy take turns, one call each in round-robin order, after warm-up calls; the median of each.
The arrays are the flat layout the trainer passes (1-D contiguous), filled with values of an ordinary training
step so that no denormals or special values slow a path down.

Usage: ``python benchmarks/update_bandwidth.py [--quick]`` (full run about 1–2 min on 2 cores, --quick
under 30 s: the mid size only, fewer repetitions).
"""

from __future__ import annotations

import argparse
import sys
import time
from collections.abc import Callable
from typing import Any

import numpy as np
from benchsupport import MID_MODEL, LoadMeter, emit, log, machine_record
from numba import njit
from shardmill.kernels import optim as kernels
from shardmill.timing import median
from threadpoolctl import threadpool_limits

METHODS = ("sgd", "momentum", "nesterov", "adam", "adamw")
DTYPES = ("float32", "float64")
STATE_ARRAYS = {"sgd": 0, "momentum": 1, "nesterov": 1, "adam": 2, "adamw": 2}
"""Optimizer state arrays per method, each with the params' length and dtype."""
LARGE_PARAMS = 16_000_000
LARGE_COPY_BYTES = 1 << 30  # src + dst of the main-memory copy: far beyond any cache here
TARGET_RATIO = 0.7  # issue 9: the update at ≥ 0.7 × a streaming copy


def parameter_count(layers: list[int]) -> int:
    """Weights and biases of an MLP with these layer widths (input first)."""
    return sum(a * b + b for a, b in zip(layers[:-1], layers[1:], strict=True))


def update_passes(method: str) -> int:
    """Array passes per update: params and grads read, params written, and each state array read and written."""
    return 3 + 2 * STATE_ARRAYS[method]


@njit
def copy_loop(src, dst):
    """dst ← src element by element (the copy a Numba kernel can reach). src, dst: (n,) of one dtype."""
    for i in range(src.size):
        dst[i] = src[i]


def update_call(method: str, n: int, dtype: str) -> Callable[[], None]:
    """One update of ``method`` on fresh arrays of n elements, as a call without arguments (state kept between)."""
    rng = np.random.default_rng(0)
    params = rng.standard_normal(n).astype(dtype)
    grads = (1e-3 * rng.standard_normal(n)).astype(dtype)
    state = [np.zeros(n, dtype=dtype) for _ in range(STATE_ARRAYS[method])]
    lr, l2 = 1e-4, 1e-4
    if method == "sgd":
        return lambda: kernels.sgd(params, grads, lr, l2)
    if method in ("momentum", "nesterov"):
        kernel = getattr(kernels, method)
        return lambda: kernel(params, grads, state[0], lr, 0.9, l2)
    m, v = state
    steps = [0]
    l2, decay = (0.0, 1e-6) if method == "adamw" else (l2, 0.0)

    def adam_step() -> None:
        steps[0] += 1
        kernels.adam(params, grads, m, v, lr, 0.9, 0.999, 1e-8, float(steps[0]), l2, decay)

    return adam_step


def copy_calls(total_bytes: int, dtype: str) -> dict[str, Callable[[], None]]:
    """np.copyto and the Numba loop on src, dst of ``total_bytes`` together."""
    n = max(1, total_bytes // (2 * np.dtype(dtype).itemsize))
    src = np.random.default_rng(1).standard_normal(n).astype(dtype)
    dst = np.empty_like(src)
    return {"copyto": lambda: np.copyto(dst, src), "numba_loop": lambda: copy_loop(src, dst)}


def round_robin(actions: dict[str, Callable[[], None]], repeats: int, warmup: int) -> dict[str, list[float]]:
    """Seconds of each action, the actions taking turns one call at a time; ``warmup`` untimed rounds first."""
    for _ in range(warmup):
        for fn in actions.values():
            fn()
    times: dict[str, list[float]] = {name: [] for name in actions}
    for _ in range(repeats):
        for name, fn in actions.items():
            begin = time.perf_counter()
            fn()
            times[name].append(time.perf_counter() - begin)
    return times


def measure(method: str, dtype: str, n: int, repeats: int, warmup: int) -> dict[str, Any]:
    """One row: the update and its same-footprint copy in alternation; GB/s (10⁹ bytes/s) and the ratio."""
    itemsize = np.dtype(dtype).itemsize
    passes = update_passes(method)
    update_bytes = passes * n * itemsize
    footprint = (2 + STATE_ARRAYS[method]) * n * itemsize  # the distinct arrays: params, grads, state
    actions = {"update": update_call(method, n, dtype), **copy_calls(footprint, dtype)}
    times = round_robin(actions, repeats, warmup)
    seconds = {name: median(t) for name, t in times.items()}
    copy_n = max(1, footprint // (2 * itemsize))
    copy_gb = {name: 2 * copy_n * itemsize / seconds[name] / 1e9 for name in ("copyto", "numba_loop")}
    update_gb = update_bytes / seconds["update"] / 1e9
    reference = max(copy_gb.values())
    # The fastest call of each, as STREAM reports bandwidth: less sensitive to other processes on a shared machine.
    best_update = update_bytes / min(times["update"]) / 1e9
    best_copy = max(2 * copy_n * itemsize / min(times[name]) / 1e9 for name in ("copyto", "numba_loop"))
    return {
        "method": method, "dtype": dtype, "params": n, "bytes_per_update": update_bytes,
        "array_passes": passes, "footprint_bytes": footprint, "update_ms": seconds["update"] * 1e3,
        "update_gb_per_s": update_gb, "copy_gb_per_s": copy_gb, "ratio": update_gb / reference,
        "fastest_call_ratio": best_update / best_copy, "repetitions": repeats,
    }


def large_copy(repeats: int) -> dict[str, float]:
    """GB/s of np.copyto and of the Numba loop on LARGE_COPY_BYTES (float64), median, alternating."""
    calls = copy_calls(LARGE_COPY_BYTES, "float64")
    times = round_robin(calls, repeats, warmup=1)
    return {name: LARGE_COPY_BYTES / median(t) / 1e9 for name, t in times.items()}


def main(argv: list[str] | None = None) -> int:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--quick", action="store_true", help="short smoke version (< 30 s): mid size only")
    args = parser.parse_args(argv)
    begin = time.perf_counter()
    meter = LoadMeter()
    mid = parameter_count(MID_MODEL)
    sizes = (mid,) if args.quick else (mid, LARGE_PARAMS)
    rows = []
    with threadpool_limits(limits=1, user_api="blas"):
        for n in sizes:
            repeats, warmup = (7, 2) if args.quick else ((41, 5) if n == mid else (15, 2))
            for dtype in DTYPES:
                for method in METHODS:
                    row = measure(method, dtype, n, repeats, warmup)
                    log(f"{method:8s} {dtype} n={n}: {row['update_ms']:.2f} ms, {row['update_gb_per_s']:.1f} GB/s, "
                        f"ratio {row['ratio']:.3f}")
                    rows.append(row)
        main_memory = large_copy(5 if args.quick else 11)
    large_reference = max(main_memory.values())
    for row in rows:
        row["ratio_to_large_copy"] = row["update_gb_per_s"] / large_reference
    summary = [{"method": r["method"], "dtype": r["dtype"], "params": r["params"], "ratio": r["ratio"],
                "fastest_call_ratio": r["fastest_call_ratio"], "met": r["ratio"] >= TARGET_RATIO} for r in rows]
    emit({
        "benchmark": "update_bandwidth",
        "quick": args.quick,
        "processes": 1,
        "how": ("Each row: the update kernel (shardmill.kernels.optim) and a streaming copy of the same footprint "
                "(np.copyto and a Numba loop) take turns one call at a time after warm-up calls; median seconds of "
                "each. Bytes counted = array passes × n × itemsize (sgd 3, momentum/nesterov 5, adam/adamw 7; "
                "copy 2). ratio = update GB/s / the faster copy's GB/s (medians); fastest_call_ratio the same from the "
                "fastest call of each. One BLAS thread (threadpoolctl); the "
                "kernels run on one core. GB = 1e9 bytes."),
        "target": {"ratio_at_least": TARGET_RATIO},
        "large_copy_gb_per_s": main_memory,
        "summary": summary,
        "rows": rows,
        "seconds": time.perf_counter() - begin,
        "load": meter.stop(),
        "machine": machine_record(),
    })
    return 0


if __name__ == "__main__":
    sys.exit(main())
