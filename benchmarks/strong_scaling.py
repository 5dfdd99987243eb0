"""Scaling of the mid model (784-1024-1024-10, float32, one BLAS thread per rank) over process counts.

Prints one JSON object. Every measurement is one ``mpiexec -n P python -m shardmill bench … --json`` run
(median step time after warm-up, see shardmill.bench.run_bench); all variants run once per round, the order
reversed every other round, and each variant's figure is the median over rounds. Ratios:

* strong scaling (G = 512 at every P): efficiency T1 / (P·TP), target ≥ 0.92 at P = 2; beside it the same
  ratio of the GEMM floors, F1 / (P·FP), which says how well BLAS alone scales on the smaller shards;
* weak scaling (G = 512·P): efficiency T1 / TP;
* overlap: step time with one blocking allreduce after backward (``--no-overlap``) over the bucketed,
  overlapped exchange, at P = 2 (and at the largest P);
* exact mode: step time with ``--reduction exact --exact-chunk 256`` over the fast mode at the same P, target
  ≤ 1.25; plus a breakdown of one exact step on 2 ranks (chunk gradients, fixed-point accumulation, the
  integer reduce-scatter, conversion back of each rank's slice, the allgather of the gradient) next to a fast
  step (one shard gradient, one float allreduce).

Usage: ``python benchmarks/strong_scaling.py [--quick] [--ranks 1,2,4,8,16] [--bind]``.
"""

from __future__ import annotations

import argparse
import os
import sys
import time
from pathlib import Path
from typing import Any

sys.path.insert(0, str(Path(__file__).resolve().parent))
from common import pin_blas  # noqa: E402

pin_blas()  # before numpy loads OpenBLAS
import numpy as np  # noqa: E402
from common import MID_MODEL, LoadMeter, emit, log, machine_record, median, mpiexec, run_child  # noqa: E402

BATCH = 512
EXACT_CHUNK = 256  # 2 chunks of G = 512: P ≤ 2. Chunk 64 measured 1.53× fast mode at P = 1 (8 accumulations per step)
TARGETS = {"strong_efficiency_at_2_at_least": 0.92, "exact_over_fast_at_most": 1.25}


def variants(ranks: list[int]) -> list[dict[str, Any]]:
    """Every bench run of one round: (name, P, global batch, extra flags)."""
    out = [dict(kind="strong", P=P, G=BATCH, flags=[]) for P in ranks]
    out += [dict(kind="weak", P=P, G=BATCH * P, flags=[]) for P in ranks if P > 1]
    for P in sorted({2, max(ranks)} & set(ranks) - {1}):
        out.append(dict(kind="no_overlap", P=P, G=BATCH, flags=["--no-overlap"]))
    for P in sorted({1, 2} & set(ranks)):
        if BATCH // EXACT_CHUNK >= P:
            out.append(dict(kind="exact", P=P, G=BATCH,
                            flags=["--reduction", "exact", "--exact-chunk", str(EXACT_CHUNK)]))
    return out


def bench_command(v: dict[str, Any], steps: int, warmup: int, bind: bool) -> list[str]:
    layers = ",".join(map(str, MID_MODEL))
    launcher = [mpiexec(), "-n", str(v["P"])] + (["-bind-to", "core"] if bind else [])
    return [*launcher, sys.executable, "-m", "shardmill", "bench", "--layers", layers, "--batch", str(v["G"]),
            "--dtype", "float32", "--threads", "1", "--steps", str(steps), "--warmup", str(warmup), "--json",
            *v["flags"]]


def key(v: dict[str, Any]) -> str:
    return f"{v['kind']}_P{v['P']}"


def run_rounds(todo: list[dict[str, Any]], rounds: int, steps: int, warmup: int, bind: bool,
               timeout: float) -> dict[str, dict[str, Any]]:
    """Run every variant once per round; returns per variant the rounds' results and their medians."""
    results: dict[str, dict[str, Any]] = {key(v): {**v, "runs": []} for v in todo}
    for r in range(rounds):
        order = todo if r % 2 == 0 else list(reversed(todo))
        for v in order:
            log(f"round {r + 1}/{rounds}: {key(v)} (G = {v['G']} {' '.join(v['flags'])})")
            out = run_child(bench_command(v, steps, warmup, bind), timeout)
            out.pop("machine", None)
            results[key(v)]["runs"].append(out)
    for entry in results.values():
        good = [run for run in entry["runs"] if "step_ms" in run]
        entry["errors"] = [run for run in entry["runs"] if "step_ms" not in run]
        if good:
            entry["step_ms"] = median([run["step_ms"] for run in good])
            entry["floor_ms"] = median([run["floor_ms"] for run in good])
            entry["ratio_to_floor"] = median([run["ratio_to_floor"] for run in good])
            entry["step_ms_per_round"] = [run["step_ms"] for run in good]
        entry["runs"] = [{k: run.get(k) for k in ("step_ms", "floor_ms", "ratio_to_floor", "step_ms_min",
                                                  "samples_per_s", "compile_s", "error")} for run in entry["runs"]]
    return results


def ratios(results: dict[str, dict[str, Any]], ranks: list[int]) -> dict[str, Any]:
    def step(kind: str, P: int) -> float | None:
        return results.get(f"{kind}_P{P}", {}).get("step_ms")

    def floor(kind: str, P: int) -> float | None:
        return results.get(f"{kind}_P{P}", {}).get("floor_ms")

    out: dict[str, Any] = {"strong": [], "weak": [], "overlap": [], "exact": []}
    T1, F1 = step("strong", 1), floor("strong", 1)
    for P in ranks:
        TP, FP = step("strong", P), floor("strong", P)
        if T1 and TP:
            row = {"P": P, "step_ms": TP, "speedup": T1 / TP, "efficiency": T1 / (P * TP),
                   "floor_efficiency": F1 / (P * FP) if F1 and FP else None,
                   "ratio_to_floor": results[f"strong_P{P}"]["ratio_to_floor"]}
            if P == 2:
                row["target_at_least"] = TARGETS["strong_efficiency_at_2_at_least"]
                row["met"] = row["efficiency"] >= row["target_at_least"]
            out["strong"].append(row)
        WP = step("weak", P) if P > 1 else T1
        if T1 and WP:
            out["weak"].append({"P": P, "global_batch": BATCH * P, "step_ms": WP, "efficiency": T1 / WP})
        off, on = step("no_overlap", P), step("strong", P)
        if off and on:
            out["overlap"].append({"P": P, "no_overlap_ms": off, "overlap_ms": on, "no_overlap_over_overlap": off / on})
        exact, fast = step("exact", P), step("strong", P)
        if exact and fast:
            target = TARGETS["exact_over_fast_at_most"]
            out["exact"].append({"P": P, "exact_ms": exact, "fast_ms": fast, "exact_over_fast": exact / fast,
                                 "target_at_most": target, "met": exact / fast <= target})
    return out


# --- breakdown of one exact step against one fast step (run under mpiexec -n 2 by the parent) --------------

def breakdown(repetitions: int) -> int:
    """Median ms per part of an exact step and of a fast step, max over ranks; rank 0 prints the JSON."""
    from shardmill.bench import synthetic_dataset
    from shardmill.config import job_from_dict
    from shardmill.data import block_range, shard
    from shardmill.kernels import exactsum
    from shardmill.parallel.comm import Comm
    from shardmill.trainer import Trainer, warm_up_kernels
    from threadpoolctl import threadpool_limits

    comm = Comm()
    dataset = synthetic_dataset(MID_MODEL, "softmax_cross_entropy", 4 * BATCH, "float32")

    def trainer(reduction: str) -> Trainer:
        job = job_from_dict({
            "model": {"layers": MID_MODEL, "dtype": "float32"},
            "optimizer": {"method": "sgd", "learning_rate": 1e-4},
            "run": {"global_batch": BATCH, "reduction": reduction, "exact_chunk": EXACT_CHUNK, "epochs": 1},
        })
        t = Trainer(job, comm, dataset=dataset)
        warm_up_kernels(t)
        return t

    def timed(fn) -> float:
        comm.barrier()
        begin = time.perf_counter()
        fn()
        return time.perf_counter() - begin

    parts: dict[str, list[float]] = {}

    def record(name: str, seconds: float) -> None:
        parts.setdefault(name, []).append(seconds)

    with threadpool_limits(limits=1, user_api="blas"):
        exact, fast = trainer("exact"), trainer("fast")
        rows = exact.sampler.batch(0, 0)
        lo, hi = block_range(rows.size // EXACT_CHUNK, comm.rank, comm.size)
        chunks = [rows[k * EXACT_CHUNK:(k + 1) * EXACT_CHUNK] for k in range(lo, hi)]
        mine = shard(rows, comm.rank, comm.size)
        for rep in range(repetitions + 2):
            keep = rep >= 2  # two warm-up repetitions
            t = {}
            t["exact_chunk_gradients"] = timed(
                lambda: [exact.compute_shard(c, exact.chunk_grads, launch=False) for c in chunks])

            def accumulate_all() -> None:  # as Trainer.exact_gradient: the first one or two chunks overwrite
                first = 0
                if len(chunks) >= 2:
                    exactsum.assign_pair(exact.chunk_grads, exact.pair_grads, exact.limbs)
                    first = 2
                for k in range(first, len(chunks)):
                    exactsum.accumulate(exact.chunk_grads, exact.limbs, replace=k == 0)

            t["exact_accumulate"] = timed(accumulate_all)
            t["exact_reduce_scatter_limbs"] = timed(exact.reduce_scatter_limbs)
            t["exact_to_float_slice"] = timed(lambda: exactsum.to_float(exact.slice_limbs, exact.grads[exact.slice]))
            t["exact_allgather_grads"] = timed(lambda: comm.allgather(exact.grads, exact.slice_counts))
            t["exact_step"] = timed(lambda: exact.step(0, 0))
            t["fast_shard_gradient"] = timed(lambda: fast.compute_shard(mine, fast.grads, launch=False))
            t["fast_allreduce"] = timed(lambda: comm.allreduce_sum(fast.grads))
            t["fast_step"] = timed(lambda: fast.step(0, 0))
            if keep:
                for name, seconds in t.items():
                    record(name, seconds)
    names = sorted(parts)
    local = np.array([parts[n] for n in names])
    comm.allreduce_max(local)
    if comm.rank == 0:
        ms = {n: median(local[i]) * 1e3 for i, n in enumerate(names)}
        emit({"processes": comm.size, "chunks_per_rank": len(chunks), "rows_per_chunk": EXACT_CHUNK,
              "fast_rows_per_rank": int(mine.size), "repetitions": repetitions, "median_ms": ms,
              "limb_bytes": int(exact.limbs.nbytes), "grad_bytes": int(fast.grads.nbytes),
              "how": "each part timed alone after a barrier, max over ranks per repetition, median"})
    return 0


def main(argv: list[str] | None = None) -> int:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--quick", action="store_true", help="short smoke version (< 30 s)")
    parser.add_argument("--ranks", default="1,2", help="process counts, e.g. 1,2,4,8,16 (default 1,2)")
    parser.add_argument("--steps", type=int, default=None, help="timed steps per run (default 30, quick 6)")
    parser.add_argument("--rounds", type=int, default=None,
                        help="rounds over all variants (default 3, or 2 with more than 8 runs per round; quick 1)")
    parser.add_argument("--bind", action="store_true", help="pass -bind-to core to (MPICH's) mpiexec")
    parser.add_argument("--timeout", type=float, default=240.0, help="seconds per mpiexec run")
    parser.add_argument("--breakdown", type=int, default=None, help=argparse.SUPPRESS)  # internal: child mode
    args = parser.parse_args(argv)
    if args.breakdown is not None:
        return breakdown(args.breakdown)
    ranks = sorted({int(p) for p in args.ranks.split(",")})
    if ranks[0] != 1:
        ranks = [1, *ranks]  # every efficiency needs T1
    todo = variants(ranks)
    steps = args.steps or (6 if args.quick else 30)
    warmup = 2 if args.quick else 5
    rounds = args.rounds or (1 if args.quick else 3 if len(todo) <= 8 else 2)
    meter = LoadMeter()
    begin = time.perf_counter()
    results = run_rounds(todo, rounds, steps, warmup, args.bind, args.timeout)
    split = None
    if 2 in ranks and (os.cpu_count() or 1) >= 1:
        log("breakdown of an exact step and a fast step on 2 ranks")
        launcher = [mpiexec(), "-n", "2"] + (["-bind-to", "core"] if args.bind else [])
        split = run_child([*launcher, sys.executable, str(Path(__file__).resolve()), "--breakdown",
                           str(5 if args.quick else 20)], args.timeout)
    emit({
        "benchmark": "strong_scaling",
        "quick": args.quick,
        "layers": MID_MODEL,
        "dtype": "float32",
        "threads_per_rank": 1,
        "ranks": ranks,
        "how": (f"each figure: `mpiexec -n P python -m shardmill bench` ({warmup} warm-up steps, {steps} timed "
                f"steps, median; step and GEMM floor alternate in blocks of 5), run once per round, {rounds} "
                f"round(s) with the order reversed every other round, median over rounds"),
        "steps": steps,
        "warmup": warmup,
        "rounds": rounds,
        "bind_to_core": args.bind,
        "targets": TARGETS,
        "ratios": ratios(results, ranks),
        "exact_breakdown": split,
        "runs": results,
        "seconds": time.perf_counter() - begin,
        "load": meter.stop(),
        "machine": machine_record(),
    })
    return 0


if __name__ == "__main__":
    sys.exit(main())
