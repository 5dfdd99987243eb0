"""How long a user waits before training starts: the demo's job, cold (an empty Numba cache) and warm.

Each measurement is one `python -m shardmill train JOB --fresh` of the demo's job with `run.max_steps = 1`, so the
wall time is start-up (imports, data, kernels) plus one step and the final checkpoint; the job's own
`compile_s` (the kernel warm-up, from metrics.jsonl) is reported beside it. Cold runs get a fresh, empty
`NUMBA_CACHE_DIR`; warm runs reuse the cache the cold run filled. Median over rounds. Targets: cold ≤ 10 s,
warm ≤ 3 s (2-core machine). Usage: ``python benchmarks/cold_start.py [--quick]``.
"""

from __future__ import annotations

import argparse
import json
import sys
import tempfile
import time
from pathlib import Path

from benchsupport import LoadMeter, emit, log, machine_record
from shardmill.commands.demo import write_demo_files
from shardmill.parallel.launch import rank_environment, run_command
from shardmill.timing import median

TARGETS = {"cold_s_at_most": 10.0, "warm_s_at_most": 3.0}


def run_once(job: Path, cache: Path) -> dict[str, float]:
    """Seconds of one single-process run of ``job`` with Numba's cache in ``cache``, and its compile_s."""
    env = rank_environment(threads=1, launched=False) | {"NUMBA_CACHE_DIR": str(cache)}
    begin = time.perf_counter()
    done = run_command([sys.executable, "-m", "shardmill", "train", str(job), "--fresh", "--no-progress"], env,
                       timeout=600, stdout=-1, stderr=-1)
    seconds = time.perf_counter() - begin
    if done.returncode != 0:
        raise RuntimeError(f"training failed: {done.stderr[-2000:]}")
    records = [json.loads(line) for line in (job.parent / "run" / "metrics.jsonl").read_text().splitlines()]
    return {"wall_s": seconds, "compile_s": float(records[-1]["compile_s"])}


def main(argv: list[str] | None = None) -> int:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--quick", action="store_true", help="one round (< 30 s)")
    parser.add_argument("--rounds", type=int, default=None, help="cold + warm pairs (default 3, quick 1)")
    args = parser.parse_args(argv)
    rounds = args.rounds or (1 if args.quick else 3)
    meter = LoadMeter()
    with tempfile.TemporaryDirectory(prefix="shardmill-cold-") as folder:
        root = Path(folder)
        write_demo_files(root, 12000, epochs=1, extra_run="max_steps = 1\n")  # the demo's data set and job
        job = root / "job.toml"
        cold, warm = [], []
        for r in range(rounds):
            cache = root / f"cache-{r}"
            log(f"round {r + 1}/{rounds}: cold")
            cold.append(run_once(job, cache))
            log(f"round {r + 1}/{rounds}: warm")
            warm.append(run_once(job, cache))
    cold_s, warm_s = median([c["wall_s"] for c in cold]), median([w["wall_s"] for w in warm])
    emit({
        "benchmark": "cold_start",
        "quick": args.quick,
        "how": "`shardmill train` of the demo job with run.max_steps = 1, one process, wall seconds from the "
               "launch to its exit; cold: an empty NUMBA_CACHE_DIR, warm: the same cache again; median of rounds",
        "rounds": rounds,
        "cold_s": cold_s,
        "warm_s": warm_s,
        "cold_compile_s": median([c["compile_s"] for c in cold]),
        "warm_compile_s": median([w["compile_s"] for w in warm]),
        "targets": TARGETS,
        "met": {"cold": cold_s <= TARGETS["cold_s_at_most"], "warm": warm_s <= TARGETS["warm_s_at_most"]},
        "runs": {"cold": cold, "warm": warm},
        "load": meter.stop(),
        "machine": machine_record(),
    })
    return 0


if __name__ == "__main__":
    sys.exit(main())
