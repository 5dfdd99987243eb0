"""Many variants in one allocation: 8 variants of the demo's job on 2 ranks, packed as 2 groups of 1 rank
(`shardmill variants JOB PLAN --ranks 2 --group-ranks 1`), against the same 8 trained one after the other on 2 ranks
each (`shardmill train JOB --set … --ranks 2`, eight launches).

Wall time of each whole way, launches and start-up included (what a user waits), median over rounds run in
alternation; the ratio packed / one after the other (target ≤ 0.8), and the packed study's busy fraction of the
rank-seconds (from its variants.json). The demo model (16-128-128-5, G 256) is a small model whose data-parallel run
on 2 ranks pays little, which is the case packing is for. Usage: ``python benchmarks/variants_packing.py [--quick]``.
"""

from __future__ import annotations

import argparse
import json
import shutil
import sys
import tempfile
import time
from pathlib import Path

from benchsupport import LoadMeter, emit, log, machine_record
from shardmill.commands.demo import write_demo_files
from shardmill.parallel.launch import rank_environment, run_command
from shardmill.timing import median

TARGET = {"packed_over_one_after_other_at_most": 0.8}
RATES = [0.0005, 0.001, 0.002, 0.003, 0.004, 0.006, 0.008, 0.01]  # the 8 variants: optimizer.learning_rate


def timed(command: list[str], cwd: Path) -> float:
    env = rank_environment(threads=1, launched=False)
    begin = time.perf_counter()
    done = run_command([sys.executable, "-m", "shardmill", *command], env, timeout=1200, stdout=-1, stderr=-1,
                       cwd=cwd)
    if done.returncode != 0:
        raise RuntimeError(f"{' '.join(command)} failed: {done.stderr[-2000:]}")
    return time.perf_counter() - begin


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__)
    parser.add_argument("--quick", action="store_true", help="fewer rows and one round (a smoke test)")
    parser.add_argument("--rounds", type=int, default=3)
    args = parser.parse_args()
    rows, epochs, rounds = (3000, 2, 1) if args.quick else (12000, 4, args.rounds)
    meter = LoadMeter()
    with tempfile.TemporaryDirectory() as tmp:
        folder = Path(tmp)
        write_demo_files(folder, rows, epochs)  # the demo's table and job
        (folder / "plan.toml").write_text(f'[grid]\n"optimizer.learning_rate" = {RATES}\n')
        timed(["compile", "job.toml"], folder)  # the kernels in Numba's cache before anything is timed
        packed, alone, busy = [], [], []
        for r in range(rounds):
            shutil.rmtree(folder / "study", ignore_errors=True)
            packed.append(timed(["variants", "job.toml", "plan.toml", "--ranks", "2", "--group-ranks", "1"], folder))
            busy.append(json.loads((folder / "study" / "variants.json").read_text())["allocation"]["busy_fraction"])
            begin = time.perf_counter()
            for k, rate in enumerate(RATES):
                timed(["train", "job.toml", "--ranks", "2", "--no-progress", "--fresh", "--set",
                       f"optimizer.learning_rate={rate}", "--set", f"run.workdir=alone/{k}"], folder)
            alone.append(time.perf_counter() - begin)
            log(f"round {r + 1}: packed {packed[-1]:.1f} s, one after the other {alone[-1]:.1f} s")
    ratio = median(packed) / median(alone)
    emit({"benchmark": "variants_packing", "variants": len(RATES), "ranks": 2,
          "model": "demo 16-128-128-5, G 256", "rows": rows, "epochs": epochs, "rounds": rounds,
          "packed_s": median(packed), "one_after_other_s": median(alone), "ratio": ratio,
          "busy_fraction": median(busy), "target": TARGET,
          "met": ratio <= TARGET["packed_over_one_after_other_at_most"],
          "method": "wall time of each whole way, launches included; median of rounds run in alternation",
          "load": meter.stop(), "machine": machine_record()})


if __name__ == "__main__":
    main()
