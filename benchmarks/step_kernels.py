"""Inside the step, kernel by kernel: where the time outside BLAS goes at one thread and at two.

One process trains the mid model (784-1024-1024-10, G = 512, float32, Adam; ``shardmill bench``'s made-up data)
with ``run.threads`` = 1 and = 2, each in a fresh child process (the thread pools and their waits are set when the
libraries load), the two in turn for ``--rounds`` rounds; per figure the median over rounds.

In the child, after warm-up steps have compiled every kernel, each call into our kernel modules
(``shardmill.kernels.*``: every Numba kernel and every Python driver, wherever the package holds a reference to it)
and each ``numpy.matmul`` is wrapped in a timer charged to the step phase it runs in (data, forward, backward,
update; the phase follows the trainer's own calls: taking rows, ``Workspace.forward_loss``, the backward pass,
``Optimizer.step``). Only the outermost call is timed, so a driver and the Numba kernel it calls count once. The
wrappers cost about a microsecond a call, some thirty calls a step.

Per phase and thread count: the phase's time (the trainer's phase timer, per step), the GEMMs' time inside it, the
time outside BLAS (phase − its GEMMs), each kernel's time, and what no kernel accounts for (Python between the
calls). Also the phase's GEMM floor: the same GEMMs alone, back to back, at the same thread count (forward:
Z = A W per layer; backward: dW = Aᵀ dZ per layer and dA = dZ Wᵀ above the first layer), so phase − floor adds the
cost of handing the cores between BLAS's threads and the kernels' threads. Ratios T2 / T1 below 1 are gains.

``parallel_loop_us``: what a parallel loop over a tiny array costs right after another one and right after a GEMM,
during which the kernels' threads went to sleep: the price of each hand-over from BLAS's threads to ours; and
``triad_us``, STREAM's triad over the values of one (512, 1024) layer on the kernel threads, whose T2 / T1 is the
most any kernel that streams its arrays through memory can gain from a second thread here.

Usage: ``python benchmarks/step_kernels.py [--quick] [--rounds N] [--steps N] [--layers W0,W1,… --batch G]``.
"""

from __future__ import annotations

import argparse
import json
import sys
import time
from collections import defaultdict
from collections.abc import Callable
from typing import Any

from benchsupport import MID_MODEL, LoadMeter, emit_measured, log, run_child
from shardmill.timing import median

BATCH = 512
PHASES = ("data", "forward", "backward", "update")
TARGETS = {"forward_backward_outside_blas_T2_over_T1_at_most": 0.6}


class Clock:
    """Per (phase, name) seconds of the outermost timed calls; ``phase`` is where the step is now."""

    def __init__(self) -> None:
        self.phase = "data"
        self.depth = 0
        self.totals: dict[tuple[str, str], float] = defaultdict(float)
        self.calls: dict[tuple[str, str], int] = defaultdict(int)

    def timed(self, name: str, fn: Callable[..., Any]) -> Callable[..., Any]:
        def call(*args: Any, **kwargs: Any) -> Any:
            if self.depth:
                return fn(*args, **kwargs)
            self.depth = 1
            start = time.perf_counter()
            try:
                return fn(*args, **kwargs)
            finally:
                key = (self.phase, name)
                self.totals[key] += time.perf_counter() - start
                self.calls[key] += 1
                self.depth = 0
        return call

    def entering(self, phase: str, fn: Callable[..., Any]) -> Callable[..., Any]:
        """``fn`` that sets the phase to ``phase`` when it is called (a generator: when it is created)."""
        def call(*args: Any, **kwargs: Any) -> Any:
            self.phase = phase
            return fn(*args, **kwargs)
        return call


def instrument(trainer: Any, clock: Clock) -> None:
    """Wrap every kernel the package references, numpy.matmul, and the phase boundaries (see the module doc)."""
    import numpy as np
    from shardmill.kernels import activations, data, layers, losses, optim, threaded
    from shardmill.model.mlp import Workspace

    originals: dict[int, tuple[str, Any]] = {}
    for module in (threaded, layers, activations, losses, data, optim):
        short = module.__name__.rsplit(".", 1)[-1]
        for name, value in vars(module).items():
            if callable(value) and not isinstance(value, type) and not name.startswith("_") and \
                    getattr(value, "__module__", module.__name__) == module.__name__:
                originals[id(value)] = (f"{short}.{name}", value)
    wrapped = {key: clock.timed(name, fn) for key, (name, fn) in originals.items()}
    for module_name, module in list(sys.modules.items()):
        if module is None or not module_name.startswith("shardmill"):
            continue
        for name, value in list(vars(module).items()):
            if id(value) in wrapped:
                setattr(module, name, wrapped[id(value)])
    entry = trainer.model.loss_entry
    if id(entry.kernel) in originals:
        object.__setattr__(entry, "kernel", wrapped[id(entry.kernel)])
    else:
        object.__setattr__(entry, "kernel", clock.timed(f"loss.{entry.kernel.__name__}", entry.kernel))
    np.matmul = clock.timed("gemm", np.matmul)
    trainer.take_inputs = clock.entering("data", trainer.take_inputs)
    Workspace.forward_loss = clock.entering("forward", Workspace.forward_loss)  # quality_sum follows: forward too
    Workspace.backward = clock.entering("backward", Workspace.backward)
    trainer.optimizer.step = clock.entering("update", trainer.optimizer.step)


def kernel_signatures() -> int:
    """How many compiled specialisations our kernel modules hold (a change means something compiled)."""
    from shardmill.kernels import activations, data, layers, losses, optim, threaded

    return sum(len(getattr(value, "signatures", ())) for module in (threaded, layers, activations, losses, data, optim)
               for value in vars(module).values())


def phase_floors(trainer: Any, repeats: int) -> dict[str, float]:
    """Seconds of the forward and backward GEMMs alone (median of ``repeats``; ``scaling.measure.floor_gemms``
    without the first layer's input gradient, which the step never forms), the step's own buffers."""
    from shardmill.scaling.measure import floor_gemms
    from shardmill.timing import time_call

    forward, backward = floor_gemms(trainer, first_layer_dA=False)
    return {"forward": median([time_call(forward) for _ in range(repeats)]),
            "backward": median([time_call(backward) for _ in range(repeats)])}


def stream_triad_us(repeats: int = 50) -> float:
    """µs of a = b + s·c over 524,288 float32 values in blocks of 8,192 on the kernel threads (the access pattern
    of an activation kernel on a (512, 1024) layer: two arrays read, one written; STREAM's triad, McCalpin 1995),
    median: what memory lets any element-wise kernel of that size reach at this thread count."""
    import numpy as np
    from numba import njit, prange

    @njit(parallel=True, nogil=True)
    def triad(a, b, c, s):
        for k in prange(a.size // 8192):
            for i in range(k * 8192, (k + 1) * 8192):
                a[i] = b[i] + s * c[i]

    a, b, c = np.zeros(524288, np.float32), np.ones(524288, np.float32), np.ones(524288, np.float32)
    triad(a, b, c, np.float32(0.5))
    times = []
    for _ in range(repeats):
        start = time.perf_counter()
        triad(a, b, c, np.float32(0.5))
        times.append(time.perf_counter() - start)
    return 1e6 * median(times)


def wake_cost(repeats: int = 200) -> dict[str, float]:
    """µs of a parallel loop over a tiny array (64 blocks of one row): straight after another one (the kernel
    threads still spinning), and straight after a GEMM (they went to sleep during it, as in the step); medians."""
    import numpy as np
    from shardmill.kernels import activations, threaded

    Z, b = np.zeros((64, 64), np.float32), np.zeros(64, np.float32)
    X, W, out = np.ones((512, 1024), np.float32), np.ones((1024, 1024), np.float32), np.empty((512, 1024), np.float32)
    hot, after_gemm = [], []
    for _ in range(repeats):
        threaded.activation_blocks(Z, b, Z, Z, activations.RELU, 1, False)
        start = time.perf_counter()
        threaded.activation_blocks(Z, b, Z, Z, activations.RELU, 1, False)
        hot.append(time.perf_counter() - start)
        np.matmul(X, W, out=out)
        start = time.perf_counter()
        threaded.activation_blocks(Z, b, Z, Z, activations.RELU, 1, False)
        after_gemm.append(time.perf_counter() - start)
    return {"hot_us": 1e6 * median(hot), "after_gemm_us": 1e6 * median(after_gemm), "triad_us": stream_triad_us()}


def child(threads: int, steps: int, layers: list[int], batch: int) -> dict[str, Any]:
    """One thread count: the instrumented steps, per phase and kernel, in ms per step."""
    from shardmill.commands.bench import synthetic_dataset
    from shardmill.config import job_from_dict
    from shardmill.parallel.comm import Comm
    from shardmill.parallel.exchange import blas_threads
    from shardmill.training.trainer import Trainer
    from threadpoolctl import threadpool_limits

    job = job_from_dict({"model": {"layers": layers, "dtype": "float32"},
                         "optimizer": {"method": "adam", "learning_rate": 1e-4},
                         "run": {"global_batch": batch, "threads": threads, "epochs": 1}})
    comm = Comm()
    with threadpool_limits(limits=blas_threads(job, comm.size), user_api="blas"):
        trainer = Trainer(job, comm, dataset=synthetic_dataset(layers, job.model.loss, 4 * batch, "float32"))
        spe = trainer.sampler.steps_per_epoch
        for s in range(5):
            trainer.step(0, s % spe)
        floors = phase_floors(trainer, 10)
        wake = wake_cost()  # before the wrappers: its GEMMs are not the step's
        clock = Clock()
        instrument(trainer, clock)
        compiled = kernel_signatures()
        trainer.step(0, 0)  # the wrappers' first calls
        clock.totals.clear()
        clock.calls.clear()
        trainer.timer.reset()
        for s in range(steps):
            trainer.step(0, s % spe)
        phase_s, _ = trainer.reduce_phases()
        if kernel_signatures() != compiled:  # a kernel compiled under the wrappers would time its compilation
            raise RuntimeError("a kernel compiled during the timed steps; warm up more steps")
    per_step = 1e3 / steps
    result: dict[str, Any] = {"threads": threads, "threads_used": blas_threads(job, comm.size),
                              "parallel_loop_us": wake, "phases": {}}
    for phase in PHASES:
        kernels = {name: seconds * per_step for (p, name), seconds in sorted(clock.totals.items())
                   if p == phase and name != "gemm"}
        gemm = clock.totals.get((phase, "gemm"), 0.0) * per_step
        total = phase_s.get(phase, 0.0) * per_step
        row = {"phase_ms": total, "gemm_ms": gemm, "outside_blas_ms": total - gemm, "kernels_ms": kernels,
               "unaccounted_ms": total - gemm - sum(kernels.values())}
        if phase in floors:
            row["gemm_floor_ms"] = floors[phase] * 1e3
            row["over_floor_ms"] = total - floors[phase] * 1e3
        result["phases"][phase] = row
    return result


def summarise(runs: dict[int, list[dict[str, Any]]]) -> dict[str, Any]:
    """Medians over rounds per thread count, and T2 / T1 per figure."""
    def med(threads: int, *path: str) -> float:
        values = []
        for run in runs[threads]:
            value: Any = run["phases"]
            for key in path:
                value = value.get(key, 0.0) if isinstance(value, dict) else 0.0
            values.append(float(value))
        return median(values)

    table: dict[str, Any] = {}
    for phase in PHASES:
        names = sorted({name for run in runs[1] + runs[2] for name in run["phases"][phase]["kernels_ms"]})
        row: dict[str, Any] = {}
        for figure in ("phase_ms", "gemm_ms", "outside_blas_ms", "unaccounted_ms", "gemm_floor_ms", "over_floor_ms"):
            if figure in runs[1][0]["phases"][phase]:
                row[figure] = ratio_row(med(1, phase, figure), med(2, phase, figure))
        row["kernels_ms"] = {name: ratio_row(med(1, phase, "kernels_ms", name), med(2, phase, "kernels_ms", name))
                             for name in names}
        table[phase] = row
    fb = {t: med(t, "forward", "outside_blas_ms") + med(t, "backward", "outside_blas_ms") for t in (1, 2)}
    over = {t: med(t, "forward", "over_floor_ms") + med(t, "backward", "over_floor_ms") for t in (1, 2)}
    loop: dict[Any, Any] = {t: {key: median([run["parallel_loop_us"][key] for run in runs[t]])
                                for key in ("hot_us", "after_gemm_us", "triad_us")} for t in (1, 2)}
    loop["triad_T2_over_T1"] = round(loop[2]["triad_us"] / loop[1]["triad_us"], 3)
    return {"phases": table, "parallel_loop_us": loop, "forward_backward_outside_blas_ms": ratio_row(fb[1], fb[2]),
            "forward_backward_over_floor_ms": ratio_row(over[1], over[2])}


def ratio_row(t1: float, t2: float) -> dict[str, float | None]:
    return {"T1": round(t1, 4), "T2": round(t2, 4), "T2_over_T1": round(t2 / t1, 3) if t1 > 0 else None}


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--quick", action="store_true", help="one round of 20 steps")
    parser.add_argument("--rounds", type=int, default=3)
    parser.add_argument("--steps", type=int, default=40)
    parser.add_argument("--layers", default=",".join(map(str, MID_MODEL)), help="layer widths (default: the mid model)")
    parser.add_argument("--batch", type=int, default=BATCH, help="global batch G (default: 512)")
    parser.add_argument("--child", type=int, default=0, help=argparse.SUPPRESS)
    args = parser.parse_args()
    layers = [int(width) for width in args.layers.split(",")]
    if args.child:
        print(json.dumps(child(args.child, args.steps, layers, args.batch)))
        return
    rounds, steps = (1, 20) if args.quick else (args.rounds, args.steps)
    begin, meter = time.time(), LoadMeter()
    runs: dict[int, list[dict[str, Any]]] = {1: [], 2: []}
    for r in range(rounds):
        for threads in ((1, 2) if r % 2 == 0 else (2, 1)):
            log(f"round {r + 1}/{rounds}: T = {threads}")
            runs[threads].append(run_child([__file__, "--child", str(threads), "--steps", str(steps), "--layers",
                                            args.layers, "--batch", str(args.batch)], timeout=600))
    summary = summarise(runs)
    ratio = summary["forward_backward_outside_blas_ms"]["T2_over_T1"]
    result = {"benchmark": "step_kernels", "layers": layers, "global_batch": args.batch, "dtype": "float32",
              "method": "adam", "rounds": rounds, "steps": steps, "statistic": "median over rounds",
              **summary, "targets": TARGETS,
              "met": {"forward_backward_outside_blas": ratio is not None
                      and ratio <= TARGETS["forward_backward_outside_blas_T2_over_T1_at_most"]},
              "runs": runs}
    emit_measured(result, begin, meter)


if __name__ == "__main__":
    main()
