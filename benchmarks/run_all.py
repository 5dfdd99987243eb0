"""Run the three benchmarks (quick or full) and write one combined JSON with the machine and every target.

Usage::

    python benchmarks/run_all.py                      # full, P = 1, 2 (about 6–7 min on 2 busy cores)
    python benchmarks/run_all.py --quick              # smoke run, about 1 min
    python benchmarks/run_all.py --ranks 1,2,4,8,16   # a 16-core machine (under 8 min)

Writes ``benchmarks/results/latest.json`` (``--out`` to change) and prints the same object on stdout.
Each script runs in its own process with one BLAS thread per rank and its own time limit; a script that
fails or runs out of time leaves an ``error`` record in its place and the others still run.
"""

from __future__ import annotations

import argparse
import json
import sys
import time
from pathlib import Path
from typing import Any

from benchsupport import LoadMeter, log, machine_record, run_child, wait_until_quiet

BENCHMARKS = Path(__file__).resolve().parent


def targets(results: dict[str, Any]) -> list[dict[str, Any]]:
    """Every benchmark target with the measured value and whether it is met (None: not measured)."""
    out: list[dict[str, Any]] = []
    step = results.get("step_vs_floor", {})
    for row in step.get("summary", []):
        if row.get("target") is not None:
            out.append({"name": f"ratio_to_floor {row['model']} {row['dtype']} {row['optimizer']}",
                        "value": row["ratio_to_floor"], "target": f">= {row['target']}", "met": row["met"]})
    for row in results.get("exchange_vs_raw", {}).get("summary", []):
        what = "overlap off" if not row["overlap"] else f"messages >= {row['message_mib']} MiB ({row['messages']})"
        out.append({"name": f"exchange_over_raw {row['dtype']} {what}", "value": row["exchange_over_raw"],
                    "target": "<= 1.05", "met": row["met"]})
    scaling = results.get("strong_scaling", {}).get("ratios", {})
    for row in scaling.get("strong", []):
        if "target_at_least" in row:
            out.append({"name": f"strong scaling efficiency P={row['P']}", "value": row["efficiency"],
                        "target": f">= {row['target_at_least']}", "met": row["met"]})
    for row in scaling.get("exact", []):
        out.append({"name": f"exact_over_fast {row.get('format', 'wide')} P={row['P']}",
                    "value": row["exact_over_fast"], "target": f"<= {row['target_at_most']}", "met": row["met"]})
    added = scaling.get("nothing_added")
    if added:
        out.append({"name": "step P=2 / (compute phases + raw allreduce)", "value": added["ratio"],
                    "target": f"<= {added['target_at_most']}", "met": added["met"]})
    for row in scaling.get("adam", []):
        if "update_met" in row:
            out.append({"name": f"sharded update / (update at 1 / P), P={row['P']}", "value": row["update_over_ideal"],
                        "target": f"<= {row['update_target_at_most']}", "met": row["update_met"]})
        if "memory_met" in row:
            out.append({"name": f"optimizer memory per rank P={row['P']} / P=1", "value": row["memory_over_P1"],
                        "target": f"<= {row['memory_target_at_most']}", "met": row["memory_met"]})
    bandwidth = results.get("update_bandwidth", {})
    for row in bandwidth.get("summary", []):
        if row.get("met") is not None:
            out.append({"name": f"update / streaming copy {row['method']} {row['dtype']} {row['params']} params",
                        "value": row["ratio"], "target": f">= {bandwidth.get('target')}", "met": row["met"]})
    for row in results.get("overlap_hidden", {}).get("summary", []):
        if row["configuration"] == "shaped_link":  # the stand-in for a cluster network (issue targets)
            out.append({"name": "hidden fraction, communication thread, shaped link", "value": row["hidden_thread"],
                        "target": ">= 0.7", "met": row["hidden_thread"] >= 0.7})
            ratio = row["thread_with_over_without"]
            out.append({"name": "step with / without overlap, thread, shaped link", "value": ratio,
                        "target": "<= 0.8", "met": ratio <= 0.8})
    layered = results.get("layers_cost", {})
    if "step_ratio" in layered:  # the targets for the hidden-layer concepts
        out.append({"name": "step with norm + dropout + skips / plain step, 784-1024-1024-10", "value":
                    layered["step_ratio"], "target": "<= 1.10", "met": layered["step_ratio"] <= 1.10})
        for name, row in layered.get("kernels", {}).items():
            out.append({"name": f"{name} / streaming copy of the same bytes", "value": row["ratio_to_copy"],
                        "target": ">= 0.7", "met": row["ratio_to_copy"] >= 0.7})
    quality = results.get("categorical_quality", {})
    if "embeddings_over_onehot" in quality:  # not speed: the error of embeddings against a one-hot MLP
        out.append({"name": "test RMSE, embeddings / scikit-learn one-hot MLP, diamonds",
                    "value": quality["embeddings_over_onehot"], "target": "<= 1.05", "met": quality["met"]})
    packing = results.get("variants_packing", {})
    if "ratio" in packing:
        out.append({"name": "8 variants packed (2 groups of 1) / one after the other on 2 ranks",
                    "value": packing["ratio"], "target": "<= 0.8", "met": packing["met"]})
    layout = results.get("threads_layout", {})
    ratios, limits = layout.get("ratios", {}), layout.get("targets", {})
    for name, limit_key, at_least in (("one_by_two_over_two_by_one", "one_by_two_over_two_by_one_at_least", True),
                                      ("kernel_phases_T2_over_T1", "kernel_phases_T2_over_T1_at_most", False),
                                      ("one_by_two_ratio_to_needed_floor", "one_by_two_ratio_to_needed_floor_at_least",
                                       True)):
        if name in ratios:
            value, limit = ratios[name], limits[limit_key]
            out.append({"name": f"threads_layout {name}", "value": value,
                        "target": f"{'>=' if at_least else '<='} {limit}",
                        "met": value >= limit if at_least else value <= limit})
    inside = results.get("step_kernels", {}).get("forward_backward_outside_blas_ms", {})
    if inside.get("T2_over_T1") is not None:
        out.append({"name": "step_kernels forward + backward outside BLAS, T2 / T1", "value": inside["T2_over_T1"],
                    "target": "<= 0.6", "met": inside["T2_over_T1"] <= 0.6})
    start = results.get("cold_start", {})
    if "cold_s" in start:
        for phase in ("cold", "warm"):
            limit = start["targets"][f"{phase}_s_at_most"]
            out.append({"name": f"{phase} start to one step, demo job, seconds", "value": start[f"{phase}_s"],
                        "target": f"<= {limit}", "met": start[f"{phase}_s"] <= limit})
    return out


def main(argv: list[str] | None = None) -> int:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--quick", action="store_true", help="smoke versions of every script")
    parser.add_argument("--sizes", default="1,2", help="process counts for strong_scaling (default 1,2)")
    parser.add_argument("--bind", action="store_true", help="strong_scaling: -bind-to core (MPICH mpiexec)")
    parser.add_argument("--wait-quiet", type=float, default=0.0, metavar="S",
                        help="before each script, wait up to S seconds for other processes to leave the cores idle")
    parser.add_argument("--out", type=Path, default=BENCHMARKS / "results" / "latest.json")
    args = parser.parse_args(argv)
    quick = ["--quick"] if args.quick else []
    scripts = {  # python arguments of each script (one BLAS thread, see run_child) and its time limit, seconds
        "step_vs_floor": ([str(BENCHMARKS / "step_vs_floor.py"), *quick], 150 if args.quick else 480),
        "exchange_vs_raw": ([str(BENCHMARKS / "exchange_vs_raw.py"), "--ranks", "2", *quick],
                            120 if args.quick else 300),
        "strong_scaling": ([str(BENCHMARKS / "strong_scaling.py"), "--sizes", args.sizes, *quick,
                            *(["--bind"] if args.bind else [])], 400 if args.quick else 900),
        "update_bandwidth": ([str(BENCHMARKS / "update_bandwidth.py"), *quick], 120 if args.quick else 300),
        "overlap_hidden": ([str(BENCHMARKS / "overlap_hidden.py"), *quick], 180 if args.quick else 600),
        "cold_start": ([str(BENCHMARKS / "cold_start.py"), *quick], 120 if args.quick else 300),
        "layers_cost": ([str(BENCHMARKS / "layers_cost.py"), *quick], 240 if args.quick else 600),
        "rank_memory": ([str(BENCHMARKS / "rank_memory.py")], 300),
        "kernel_threads": ([str(BENCHMARKS / "kernel_threads.py"), *quick], 120 if args.quick else 300),
        "step_kernels": ([str(BENCHMARKS / "step_kernels.py"), *quick], 120 if args.quick else 300),
        "variants_packing": ([str(BENCHMARKS / "variants_packing.py"), *quick], 240 if args.quick else 600),
        "threads_layout": ([str(BENCHMARKS / "threads_layout.py"), *quick,  # a 16-core node: its splits too
                            *(["--cores", str(most)] if (most := max(int(p) for p in args.sizes.split(","))) >= 4
                              else [])], (120 if args.quick else 300) * (3 if most >= 4 else 1)),
        "categorical_quality": ([str(BENCHMARKS / "categorical_quality.py"), *(["--epochs", "20"] if args.quick
                                                                               else [])], 300),
    }
    meter = LoadMeter()
    combined: dict[str, Any] = {"benchmark": "run_all", "quick": args.quick, "ranks": args.sizes,
                                "command": " ".join(["python", "benchmarks/run_all.py", *sys.argv[1:]])}
    seconds: dict[str, float] = {}
    waits: dict[str, Any] = {}
    for name, (cmd, timeout) in scripts.items():
        if args.wait_quiet > 0:
            waits[name] = wait_until_quiet(args.wait_quiet)
        log(f"{name}: {' '.join(cmd)}")
        begin = time.perf_counter()
        result = run_child(cmd, timeout)
        seconds[name] = time.perf_counter() - begin
        result.pop("machine", None)  # one machine record, at the top level
        combined[name] = result
    combined["targets"] = targets(combined)
    combined["seconds"] = seconds
    if waits:
        combined["waited_for_quiet"] = waits
    combined["load"] = meter.stop()
    combined["machine"] = machine_record()
    args.out.parent.mkdir(parents=True, exist_ok=True)
    text = json.dumps(combined, indent=1, allow_nan=True)
    args.out.write_text(text + "\n")
    print(text, flush=True)
    log(f"wrote {args.out}")
    for t in combined["targets"]:
        log(f"{'met   ' if t['met'] else 'MISSED'} {t['name']}: {t['value']:.4f} (target {t['target']})")
    return 0


if __name__ == "__main__":
    sys.exit(main())
