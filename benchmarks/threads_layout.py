"""Ranks × threads on one node: samples/s of the layouts P×T = 1×1, 1×2, 2×1 of the mid model, and the shares
(``--cores C`` adds every split of C cores, for a larger node).

Prints one JSON object. Every figure is one ``mpiexec -n P python -m shardmill bench --threads T … --json`` run of
the mid model (784-1024-1024-10, G = 512, float32, Adam; median step after warm-up, see
shardmill.commands.bench.run_bench); the three layouts run once per round, the order reversed every other round,
and each figure is the median over rounds. Reported:

* ``samples_per_s`` per layout, and the ratios 1×2 / 2×1 (target ≥ 1.05) and 1×2 / its threaded GEMM floor
  (``ratio_to_needed_floor`` at T = 2, target ≥ 0.95: the floor times only the GEMMs the step runs; beside it
  ``ratio_to_floor``, against the three GEMMs of every layer, the floor ``step_vs_floor.py`` holds to 0.95);
* from the phase timers (``phase_ms``): the phases made only of our kernels (data + update) at T = 2 over T = 1
  (target ≤ 0.6), and the step's non-BLAS share s_T = (step − needed GEMM floor) / step at T = 1 and T = 2;
* the projected efficiency at T = 16 of one process, 1 / (1 + 15·s), for two readings of the shares: the non-BLAS
  time staying on one core (s = s_1, the issue's model), and the non-BLAS time dividing as it did from T = 1 to
  T = 2 (its serial fraction f = 2·n_2/n_1 − 1 by Amdahl's law, n_T the non-BLAS ms; s = s_1·f), both assuming
  BLAS itself scales perfectly; and the whole step's serial fraction from the two measured step times,
  f_step = 2·t_2/t_1 − 1, projected the same way.

Usage: ``python benchmarks/threads_layout.py [--quick] [--rounds N] [--steps N]``.
"""

from __future__ import annotations

import argparse
import sys
import time
from typing import Any

from benchsupport import MID_MODEL, LoadMeter, emit_measured, log, run_child
from shardmill.timing import median

BATCH = 512
LAYOUTS = [(1, 1), (1, 2), (2, 1)]  # (processes, threads per process)
TARGETS = {"kernel_phases_T2_over_T1_at_most": 0.6, "one_by_two_over_two_by_one_at_least": 1.05,
           "one_by_two_ratio_to_needed_floor_at_least": 0.95}
PROJECT_TO = 16


def bench_args(P: int, T: int, steps: int, warmup: int) -> list[str]:
    return ["-m", "shardmill", "bench", "--layers", ",".join(map(str, MID_MODEL)), "--global-batch", str(BATCH),
            "--dtype", "float32", "--threads", str(T), "--method", "adam", "--steps", str(steps), "--untimed",
            str(warmup), "--json"]


def name(P: int, T: int) -> str:
    return f"{P}x{T}"


def summary(runs: list[dict[str, Any]]) -> dict[str, Any]:
    """Medians over the rounds of one layout's bench records."""
    good = [run for run in runs if "step_ms" in run]
    if not good:
        return {"errors": runs}
    phases = {phase: median([run["phase_ms"][phase] for run in good]) for phase in good[0]["phase_ms"]}
    return {"samples_per_s": median([run["samples_per_s"] for run in good]),
            "step_ms": median([run["step_ms"] for run in good]),
            "step_ms_mean": median([run["step_ms_mean"] for run in good]),
            "needed_floor_ms": median([run["needed_floor_ms"] for run in good]),
            "ratio_to_needed_floor": median([run["ratio_to_needed_floor"] for run in good]),
            "ratio_to_floor": median([run["ratio_to_floor"] for run in good]),
            "phase_ms": phases,
            "kernel_phases_ms": phases["data"] + phases["update"],
            "step_ms_per_round": [run["step_ms"] for run in good],
            "errors": [run for run in runs if "step_ms" not in run]}


def projections(one: dict[str, Any], two: dict[str, Any]) -> dict[str, Any]:
    """The non-BLAS shares at T = 1, 2 and the projected efficiencies at T = PROJECT_TO (see the module)."""
    n1 = one["step_ms"] - one["needed_floor_ms"]
    n2 = two["step_ms"] - two["needed_floor_ms"]
    s1, s2 = n1 / one["step_ms"], n2 / two["step_ms"]
    serial_non_blas = min(1.0, max(0.0, 2.0 * n2 / n1 - 1.0)) if n1 > 0 else 1.0
    serial_step = min(1.0, max(0.0, 2.0 * two["step_ms"] / one["step_ms"] - 1.0))

    def efficiency(share: float) -> float:
        return 1.0 / (1.0 + (PROJECT_TO - 1) * share)

    return {"non_blas_ms_T1": n1, "non_blas_ms_T2": n2, "non_blas_share_T1": s1, "non_blas_share_T2": s2,
            "non_blas_serial_fraction": serial_non_blas, "step_serial_fraction": serial_step,
            f"efficiency_T{PROJECT_TO}_non_blas_on_one_core": efficiency(s1),
            f"efficiency_T{PROJECT_TO}_non_blas_divided_as_measured": efficiency(s1 * serial_non_blas),
            f"efficiency_T{PROJECT_TO}_from_step_times": efficiency(serial_step)}


def main(argv: list[str] | None = None) -> int:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--quick", action="store_true", help="short smoke version (< 30 s)")
    parser.add_argument("--steps", type=int, default=None, help="timed steps per run (default 30, quick 6)")
    parser.add_argument("--rounds", type=int, default=None, help="rounds over the layouts (default 3, quick 1)")
    parser.add_argument("--timeout", type=float, default=240.0, help="seconds per mpiexec run")
    parser.add_argument("--cores", type=int, default=0,
                        help="also time every split of this many cores into P×T (a larger node: 16 gives 1x16, 2x8, "
                             "4x4, 8x2, 16x1)")
    args = parser.parse_args(argv)
    extra = [(args.cores // t, t) for t in range(args.cores, 0, -1)
             if args.cores > 2 and args.cores % t == 0 and (args.cores // t, t) not in LAYOUTS]
    layouts_here = LAYOUTS + extra
    steps = args.steps or (6 if args.quick else 30)
    warmup = 2 if args.quick else 5
    rounds = args.rounds or (1 if args.quick else 3)
    meter = LoadMeter()
    begin = time.perf_counter()
    runs: dict[str, list[dict[str, Any]]] = {name(P, T): [] for P, T in layouts_here}
    for r in range(rounds):
        for P, T in layouts_here if r % 2 == 0 else list(reversed(layouts_here)):
            log(f"round {r + 1}/{rounds}: P×T = {name(P, T)}")
            out = run_child(bench_args(P, T, steps, warmup), args.timeout, ranks=P)
            out.pop("machine", None)
            runs[name(P, T)].append(out)
    layouts = {key: summary(value) for key, value in runs.items()}
    one, two, pair = layouts["1x1"], layouts["1x2"], layouts["2x1"]
    ratios: dict[str, Any] = {}
    if all("step_ms" in entry for entry in (one, two, pair)):
        ratios = {"one_by_two_over_two_by_one": two["samples_per_s"] / pair["samples_per_s"],
                  "one_by_two_over_one_by_one": two["samples_per_s"] / one["samples_per_s"],
                  "one_by_two_ratio_to_needed_floor": two["ratio_to_needed_floor"],
                  "one_by_two_ratio_to_floor": two["ratio_to_floor"],
                  "kernel_phases_T2_over_T1": two["kernel_phases_ms"] / one["kernel_phases_ms"],
                  **projections(one, two)}
    emit_measured({
        "benchmark": "threads_layout",
        "quick": args.quick,
        "layers": MID_MODEL,
        "global_batch": BATCH,
        "dtype": "float32",
        "optimizer": "adam",
        "how": (f"each layout: `mpiexec -n P python -m shardmill bench --threads T` ({warmup} warm-up steps, "
                f"{steps} timed steps, median; step and GEMM floor alternate in blocks of 5), {rounds} round(s) with "
                f"the order reversed every other round, median over rounds"),
        "targets": TARGETS,
        "ratios": ratios,
        "layouts": layouts,
        "best_layout": max((key for key, entry in layouts.items() if "samples_per_s" in entry),
                           key=lambda key: layouts[key]["samples_per_s"], default=None),
    }, begin, meter)
    return 0


if __name__ == "__main__":
    sys.exit(main())
