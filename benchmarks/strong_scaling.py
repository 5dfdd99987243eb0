"""Scaling of the mid model (784-1024-1024-10, float32, one BLAS thread per rank) over process counts.

Prints one JSON object. Every measurement is one ``mpiexec -n P python -m shardmill bench … --json`` run
(median step time after warm-up, see shardmill.commands.bench.run_bench); all variants run once per round, the order
reversed every other round, and each variant's figure is the median over rounds. Ratios:

* strong scaling (G = 512 at every P): efficiency T1 / (P·TP), target ≥ 0.92 at P = 2; beside it the same
  ratio of the GEMM floors, F1 / (P·FP), which says how well BLAS alone scales on the smaller shards;
* weak scaling (G = 512·P): efficiency T1 / TP;
* overlap: step time with one blocking allreduce after backward (``--no-overlap``) over the messageed,
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

from benchsupport import MID_MODEL, LoadMeter, emit, log, machine_record, run_child
from shardmill.scaling.study import add_speedup
from shardmill.timing import median, slowest_call

BATCH = 512
EXACT_CHUNK = 256  # 2 chunks of G = 512: P ≤ 2. Chunk 64 measured 1.53× fast mode at P = 1 (8 accumulations per step)
TARGETS = {"strong_efficiency_at_2_at_least": 0.88, "exact_over_fast_at_most": 1.25,
           "compact_exact_over_fast_at_most": 1.15, "update_at_P_over_update_at_1_per_P_at_most": 1.2,
           "optimizer_memory_at_4_over_1_at_most": 0.3, "step_over_compute_plus_raw_allreduce_at_most": 1.03}
ADAM = ["--method", "adam"]  # the update that the sharded step divides by P (sgd's is too small to see)


def variants(ranks: list[int]) -> list[dict[str, Any]]:
    """Every bench run of one round: (name, P, global batch, extra flags)."""
    out = [dict(kind="strong", P=P, G=BATCH, flags=[]) for P in ranks]
    out += [dict(kind="weak", P=P, G=BATCH * P, flags=[]) for P in ranks if P > 1]
    for P in sorted({2, max(ranks)} & set(ranks) - {1}):
        out.append(dict(kind="no_overlap", P=P, G=BATCH, flags=["--no-overlap"]))
    exact = ["--reduction", "exact", "--exact-chunk", str(EXACT_CHUNK)]
    for P in sorted({1, 2} & set(ranks)):
        if BATCH // EXACT_CHUNK >= P:
            out.append(dict(kind="exact", P=P, G=BATCH, flags=exact))
            out.append(dict(kind="exact_compact", P=P, G=BATCH, flags=[*exact, "--exact-format", "compact"]))
            out.append(dict(kind="exact_narrow", P=P, G=BATCH, flags=[*exact, "--exact-format", "narrow"]))
    out += [dict(kind="adam_replicated", P=P, G=BATCH, flags=[*ADAM, "--update", "replicated"]) for P in ranks]
    out += [dict(kind="adam_sharded", P=P, G=BATCH, flags=[*ADAM, "--update", "sharded"]) for P in ranks]
    return out


BIND = ("-bind-to", "core")  # MPICH Hydra's option: one core per rank


def bench_args(v: dict[str, Any], steps: int, warmup: int) -> list[str]:
    """``-m shardmill bench …`` for one variant (started under mpiexec on v["P"] ranks by run_rounds)."""
    layers = ",".join(map(str, MID_MODEL))
    return ["-m", "shardmill", "bench", "--layers", layers, "--global-batch", str(v["G"]), "--dtype",
            "float32", "--threads", "1", "--steps", str(steps), "--untimed", str(warmup), "--json", *v["flags"]]


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
            out = run_child(bench_args(v, steps, warmup), timeout, ranks=v["P"], launcher_args=BIND if bind else ())
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
            entry["update_ms"] = median([run["phase_ms"]["update"] for run in good])
            entry["optimizer_state_bytes_per_rank"] = good[0]["optimizer_state_bytes_per_rank"]
        entry["runs"] = [{k: run.get(k) for k in ("step_ms", "floor_ms", "ratio_to_floor", "step_ms_min",
                                                  "samples_per_s", "compile_s", "phase_ms", "error")}
                         for run in entry["runs"]]
    return results


def ratios(results: dict[str, dict[str, Any]], ranks: list[int]) -> dict[str, Any]:
    """Speedup and efficiency (shardmill.scaling.study.add_speedup, the formulas `shardmill scale` uses),
    overlap and exact-mode ratios from the per-variant medians."""
    def measured(kind: str, field: str, P: int) -> float | None:
        return results.get(f"{kind}_P{P}", {}).get(field)

    def scaled(times: dict[int, float | None], mode: str) -> dict[int, dict[str, Any]]:
        points = [{"p": P, "step_s": t} for P, t in times.items() if t]
        if not any(point["p"] == 1 for point in points):
            return {}
        add_speedup(points, mode)
        return {point["p"]: point for point in points}

    T1 = measured("strong", "step_ms", 1)
    strong = scaled({P: measured("strong", "step_ms", P) for P in ranks}, "strong")
    floors = scaled({P: measured("strong", "floor_ms", P) for P in ranks}, "strong")
    weak = scaled({P: measured("weak", "step_ms", P) if P > 1 else T1 for P in ranks}, "weak")
    out: dict[str, Any] = {"strong": [], "weak": [], "overlap": [], "exact": [], "adam": []}
    for P in ranks:
        if P in strong:
            row = {"P": P, "step_ms": strong[P]["step_s"], "speedup": strong[P]["speedup"],
                   "efficiency": strong[P]["efficiency"], "floor_efficiency": floors.get(P, {}).get("efficiency"),
                   "ratio_to_floor": results[f"strong_P{P}"]["ratio_to_floor"]}
            if P == 2:
                row["target_at_least"] = TARGETS["strong_efficiency_at_2_at_least"]
                row["met"] = row["efficiency"] >= row["target_at_least"]
            out["strong"].append(row)
        if P in weak:
            out["weak"].append({"P": P, "global_batch": BATCH * P, "step_ms": weak[P]["step_s"],
                                "efficiency": weak[P]["efficiency"]})
        off, on = measured("no_overlap", "step_ms", P), measured("strong", "step_ms", P)
        if off and on:
            out["overlap"].append({"P": P, "no_overlap_ms": off, "overlap_ms": on, "no_overlap_over_overlap": off / on})
        exact, fast = measured("exact", "step_ms", P), on
        if exact and fast:
            target = TARGETS["exact_over_fast_at_most"]
            out["exact"].append({"P": P, "exact_ms": exact, "fast_ms": fast, "exact_over_fast": exact / fast,
                                 "target_at_most": target, "met": exact / fast <= target})
        for form in ("compact", "narrow"):
            other = measured(f"exact_{form}", "step_ms", P)
            if other and fast:
                target = TARGETS["compact_exact_over_fast_at_most"]
                out["exact"].append({"P": P, "format": form, "exact_ms": other, "fast_ms": fast,
                                     "exact_over_fast": other / fast, "target_at_most": target,
                                     "met": other / fast <= target})
    adam = {update: scaled({P: measured(f"adam_{update}", "step_ms", P) for P in ranks}, "strong")
            for update in ("replicated", "sharded")}
    update_1 = measured("adam_replicated", "update_ms", 1)
    memory_1 = measured("adam_replicated", "optimizer_state_bytes_per_rank", 1)
    for P in ranks:
        row: dict[str, Any] = {"P": P}
        for update in ("replicated", "sharded"):
            if P in adam[update]:
                row[f"{update}_step_ms"] = adam[update][P]["step_s"]
                row[f"{update}_efficiency"] = adam[update][P]["efficiency"]
            row[f"{update}_update_ms"] = measured(f"adam_{update}", "update_ms", P)
            row[f"{update}_optimizer_bytes_per_rank"] = measured(f"adam_{update}", "optimizer_state_bytes_per_rank", P)
        sharded_update, sharded_memory = row["sharded_update_ms"], row["sharded_optimizer_bytes_per_rank"]
        if P > 1 and update_1 and sharded_update:
            ratio = sharded_update / (update_1 / P)
            target = TARGETS["update_at_P_over_update_at_1_per_P_at_most"]
            row.update(update_over_ideal=ratio, update_target_at_most=target, update_met=ratio <= target)
        if memory_1 and sharded_memory:
            row["memory_over_P1"] = sharded_memory / memory_1
            if P == 4:
                target = TARGETS["optimizer_memory_at_4_over_1_at_most"]
                row.update(memory_target_at_most=target, memory_met=row["memory_over_P1"] <= target)
        out["adam"].append(row)
    return out


def nothing_added(results: dict[str, dict[str, Any]], split: dict[str, Any] | None) -> dict[str, Any] | None:
    """The P = 2 step against its own compute phases (data, forward, backward, update; slowest rank, medians over
    the rounds) plus a raw blocking allreduce of the gradient bytes (the breakdown's): 1 means the step adds
    nothing but the unavoidable exchange."""
    runs = [run for run in results.get("strong_P2", {}).get("runs", []) if run.get("phase_ms")]
    raw = (split or {}).get("median_ms", {}).get("fast_allreduce")
    if not runs or raw is None:
        return None
    phases = ("data", "forward", "backward", "update")
    compute = sum(median([run["phase_ms"][phase] for run in runs]) for phase in phases)
    step = results["strong_P2"]["step_ms"]
    target = TARGETS["step_over_compute_plus_raw_allreduce_at_most"]
    ratio = step / (compute + raw)
    return {"P": 2, "step_ms": step, "compute_ms": compute, "raw_allreduce_ms": raw, "ratio": ratio,
            "target_at_most": target, "met": ratio <= target}


# --- breakdown of one exact step against one fast step (run under mpiexec -n 2 by the parent) --------------

def breakdown(repetitions: int) -> int:
    """Median ms per part of an exact step and of a fast step, max over ranks; rank 0 prints the JSON."""
    from shardmill.commands.bench import synthetic_dataset
    from shardmill.config import job_from_dict
    from shardmill.parallel.comm import Comm
    from shardmill.training.trainer import Trainer
    from shardmill.training.warmup import warm_up_kernels
    from threadpoolctl import threadpool_limits

    comm = Comm()
    dataset = synthetic_dataset(MID_MODEL, "softmax_cross_entropy", 4 * BATCH, "float32")

    def trainer(reduction: str, overlap: bool = True) -> Trainer:
        job = job_from_dict({
            "model": {"layers": MID_MODEL, "dtype": "float32"},
            "optimizer": {"method": "sgd", "learning_rate": 1e-4},
            "run": {"global_batch": BATCH, "reduction": reduction, "exact_chunk": EXACT_CHUNK, "epochs": 1,
                    "overlap": overlap},
        })
        t = Trainer(job, comm, dataset=dataset)
        warm_up_kernels(t)
        return t

    def timed(fn) -> float:
        return slowest_call(comm, fn)  # barrier, time, the slowest rank's seconds

    parts: dict[str, list[float]] = {}

    def record(name: str, seconds: float) -> None:
        parts.setdefault(name, []).append(seconds)

    with threadpool_limits(limits=1, user_api="blas"):
        # The parts of a step are timed one by one through the exchange strategies' own methods.
        exact, fast = trainer("exact"), trainer("fast")
        blocking = trainer("fast", overlap=False)  # its finish() is one blocking allreduce, timed on its own
        rows = exact.sampler.batch(0, 0)
        ex = exact.exchange.summation  # the exact sum's own steps, timed one by one
        chunks = list(ex.parts(rows))
        mine, _ = next(blocking.exchange.parts(rows))

        def chunk_gradients() -> None:
            for part, out in ex.parts(rows):
                exact.part_gradient(part, out)

        def accumulate_all() -> None:  # the strategy's own add: the first one or two chunks overwrite the limbs
            for _, out in ex.parts(rows):
                ex.add(out)

        for rep in range(repetitions + 2):
            keep = rep >= 2  # two warm-up repetitions
            t = {}
            t["exact_chunk_gradients"] = timed(chunk_gradients)
            t["exact_accumulate"] = timed(accumulate_all)
            t["exact_reduce_scatter_limbs"] = timed(ex.reduce_scatter)
            t["exact_to_float_slice"] = timed(ex.read_back)
            t["exact_allgather_grads"] = timed(ex.gather)
            t["exact_step"] = timed(lambda: exact.step(0, 0))
            t["fast_shard_gradient"] = timed(lambda: blocking.part_gradient(mine, blocking.grads))
            t["fast_allreduce"] = timed(blocking.exchange.finish)
            t["fast_step"] = timed(lambda: fast.step(0, 0))
            if keep:
                for name, seconds in t.items():
                    record(name, seconds)
    if comm.rank == 0:
        ms = {n: median(parts[n]) * 1e3 for n in sorted(parts)}
        emit({"processes": comm.size, "chunks_per_rank": len(chunks), "rows_per_chunk": EXACT_CHUNK,
              "fast_rows_per_rank": int(mine.size), "repetitions": repetitions, "median_ms": ms,
              "limb_bytes": int(ex.format.limbs.nbytes), "grad_bytes": int(fast.grads.nbytes),
              "how": "each part timed alone after a barrier, max over ranks per repetition, median"})
    return 0


def main(argv: list[str] | None = None) -> int:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--quick", action="store_true", help="short smoke version (< 30 s)")
    parser.add_argument("--sizes", default="1,2", help="process counts, e.g. 1,2,4,8,16 (default 1,2)")
    parser.add_argument("--steps", type=int, default=None, help="timed steps per run (default 30, quick 6)")
    parser.add_argument("--rounds", type=int, default=None,
                        help="rounds over all variants (default 3, or 2 with more than 8 runs per round; quick 1)")
    parser.add_argument("--bind", action="store_true", help="pass -bind-to core to (MPICH's) mpiexec")
    parser.add_argument("--timeout", type=float, default=240.0, help="seconds per mpiexec run")
    parser.add_argument("--breakdown", type=int, default=None, help=argparse.SUPPRESS)  # internal: child mode
    args = parser.parse_args(argv)
    if args.breakdown is not None:
        return breakdown(args.breakdown)
    ranks = sorted({int(p) for p in args.sizes.split(",")})
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
        split = run_child([str(Path(__file__).resolve()), "--breakdown", str(5 if args.quick else 20)],
                          args.timeout, ranks=2, launcher_args=BIND if args.bind else ())
    step_ratios = ratios(results, ranks)
    step_ratios["nothing_added"] = nothing_added(results, split)
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
        "ratios": step_ratios,
        "exact_breakdown": split,
        "runs": results,
        "seconds": time.perf_counter() - begin,
        "load": meter.stop(),
        "machine": machine_record(),
    })
    return 0


if __name__ == "__main__":
    sys.exit(main())
