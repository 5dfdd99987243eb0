"""Where a training rank's resident memory goes: a breakdown by part, measured in one fresh process.

The process imports and builds what a rank of the demo job does, one part at a time, and reads its resident set
size (``/proc/self/statm``, pages × page size) after each: the interpreter, numpy, Numba (which imports SciPy when it
is installed, to check its version), MPI (mpi4py and the library's initialisation), the rest of shardmill, the
job's data and model (a Trainer), Numba's JIT engine (LLVM, started by the first cached kernel), the job's other
kernels (warm-up: loaded from Numba's cache) and the first steps.
Each part's figure is the growth it caused. Prints one JSON object; the issue's target is 150 MB per rank, or a
breakdown showing that what remains above it is the libraries themselves.

Usage: ``python benchmarks/rank_memory.py [--rows N]``. BLAS is pinned to one thread.
"""

from __future__ import annotations

import argparse
import json
import os
import subprocess
import sys
import tempfile
from pathlib import Path

from benchsupport import emit, log, machine_record

CHILD = r"""
import json, os, sys
pages = lambda: int(open("/proc/self/statm").read().split()[1]) * os.sysconf("SC_PAGE_SIZE")
marks = [("interpreter", pages())]
import numpy
marks.append(("numpy", pages()))
import numba
marks.append(("numba (and the SciPy it checks)", pages()))
from mpi4py import MPI
MPI.COMM_WORLD.Barrier()
marks.append(("MPI (mpi4py, library initialised)", pages()))
import shardmill
from shardmill.training.trainer import Trainer
from shardmill.training.warmup import warm_up_kernels
marks.append(("shardmill's modules", pages()))
job = shardmill.load_job(sys.argv[1])
trainer = Trainer(job)
marks.append(("the job's data, model and workspaces", pages()))
from shardmill.kernels import optim as _optim
_optim.scale(numpy.ones(4, dtype=numpy.float32), 1.0)  # one small cached kernel: Numba's JIT engine starts
marks.append(("Numba's JIT engine (LLVM), first kernel", pages()))
warm_up_kernels(trainer)
marks.append(("the job's other kernels (warm-up)", pages()))
for s in range(5):
    trainer.step(0, s)
marks.append(("five training steps", pages()))
print(json.dumps(marks))
"""


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--rows", type=int, default=12000, help="rows of the demo's data set")
    args = parser.parse_args()
    from shardmill.commands.demo import write_demo_files
    from shardmill.parallel.launch import rank_environment

    with tempfile.TemporaryDirectory() as folder:
        root = Path(folder)
        write_demo_files(root, args.rows, epochs=1)
        env = rank_environment(threads=1, launched=False)
        for _ in range(2):  # the first run fills Numba's cache; the second is what a rank of a later job holds
            done = subprocess.run([sys.executable, "-c", CHILD, str(root / "job.toml")], capture_output=True,
                                  text=True, env=env, cwd=root, timeout=600)
            if done.returncode != 0:
                raise SystemExit(done.stderr[-3000:])
        marks = json.loads(done.stdout.strip().splitlines()[-1])
    parts, before = [], 0
    for name, rss in marks:
        parts.append({"part": name, "grew_mib": (rss - before) / 2**20, "resident_mib": rss / 2**20})
        before = rss
    total = marks[-1][1] / 2**20
    libraries = sum(p["grew_mib"] for p in parts[:4]) + parts[6]["grew_mib"]
    log(f"resident {total:.0f} MiB, of which {libraries:.0f} MiB interpreter, numpy, numba, MPI and LLVM")
    emit({"benchmark": "rank_memory", "job": "the demo job (18-128-128-5, embeddings, norm, dropout, skip)",
          "rows": args.rows, "parts": parts, "resident_mib": total, "libraries_mib": libraries,
          "ours_mib": total - libraries, "target_mib": 150 / 1.048576,
          "met": total <= 150 / 1.048576, "machine": machine_record(), "pid": os.getpid()})


if __name__ == "__main__":
    main()
