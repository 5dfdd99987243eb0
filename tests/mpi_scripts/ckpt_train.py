"""Run under ``mpiexec -n P``: a sequence of trainings in one process, each optionally resuming.

Usage: ``python ckpt_train.py SPEC.json OUT.json``. SPEC holds ``{"base": folder, "runs": [...]}``; each run
is ``{"name", "job": {...raw job tables...}, "resume": bool}`` and goes through ``shardmill.training.loop.train``
exactly as ``shardmill train [--resume]`` does. Rank 0 writes OUT: per run the steps done and the SHA-256 of
the final flat parameters on every rank (so a test can see that all ranks hold the same bits).
"""

from __future__ import annotations

import hashlib
import json
import sys

import numpy as np
from shardmill.config import job_from_dict
from shardmill.parallel.comm import Comm
from shardmill.training.loop import train


def main() -> None:
    spec_path, out_path = sys.argv[1], sys.argv[2]
    with open(spec_path) as f:
        spec = json.load(f)
    comm = Comm()
    results: dict = {"processes": comm.size, "runs": {}}
    for run in spec["runs"]:
        job = job_from_dict(run["job"], base=spec["base"])
        result = train(job, comm, resume=run.get("resume", False), progress=False)
        digest = hashlib.sha256(np.ascontiguousarray(result["model"].params).tobytes()).hexdigest()
        results["runs"][run["name"]] = {"steps": result["steps"], "sha256_by_rank": comm.allgather_object(digest)}
    if comm.rank == 0:
        with open(out_path, "w") as f:
            json.dump(results, f)


if __name__ == "__main__":
    main()
