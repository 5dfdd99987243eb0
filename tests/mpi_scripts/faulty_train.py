"""Run under ``mpiexec -n P``: ``shardmill train JOB`` with one fault planted on rank 1.

Usage: ``python faulty_train.py MODE JOB [OUT.json]``. MODE is one of

- ``raise``: rank 1 raises RuntimeError when it starts its 3rd step (``Trainer.step`` wrapped);
- ``kill``: rank 1 sends itself SIGKILL when it starts its 3rd step;
- ``missing``: rank 1 is pointed at a ``data.inputs`` file that does not exist (the others are not);
- ``corrupt``: rank 1 sees a NaN appear in a row of its 3rd shard after the data were checked (as if the
  file changed on its disk mid-run); prints ``corrupt row R`` first;
- ``drift``: rank 1 nudges one parameter by 1e-9 before its 3rd step (a bug that breaks the data-parallel
  invariant; ``run.check_every`` must catch it);
- ``none``: no fault.

The job then runs through the ordinary command-line entry point, so its error handling is what is tested.
If the job finishes, rank 0 writes ``{"finished": true, "processes": P}`` into OUT (when given).
"""

from __future__ import annotations

import json
import os
import signal
import sys

import numpy as np
from mpi4py import MPI
from shardmill import config
from shardmill.commands import cli
from shardmill.data.rows import shard
from shardmill.training.trainer import Trainer

FAULTY_RANK = 1
FAULTY_STEP = 3  # 1-based


def plant(mode: str) -> None:
    rank = MPI.COMM_WORLD.Get_rank()
    original_step = Trainer.step
    original_load_job = config.load_job

    def step(self: Trainer, epoch: int, step_in_epoch: int) -> None:
        if rank == FAULTY_RANK and self.step_count + 1 == FAULTY_STEP:
            if mode == "raise":
                raise RuntimeError("planted failure")
            if mode == "kill":
                sys.stdout.flush()
                sys.stderr.flush()
                os.kill(os.getpid(), signal.SIGKILL)
            if mode == "corrupt":
                X = np.array(self.data.X)
                row = int(shard(self.sampler.batch(epoch, step_in_epoch), rank, MPI.COMM_WORLD.Get_size())[0])
                X[row, 0] = np.nan
                self.data.X = X
                print(f"corrupt row {row}", flush=True)
            if mode == "drift":
                self.model.params[0] += 1e-9
        original_step(self, epoch, step_in_epoch)

    def load_job(path, overrides=()):
        job = original_load_job(path, overrides=overrides)
        if rank == FAULTY_RANK:
            job.data.inputs = "no-such-inputs-on-this-node.npy"
        return job

    Trainer.step = step
    if mode == "missing":
        config.load_job = load_job  # cmd_train imports it from shardmill.config at call time


def main() -> int:
    mode, job = sys.argv[1], sys.argv[2]
    if mode not in ("raise", "kill", "missing", "corrupt", "drift", "none"):
        raise SystemExit(f"unknown mode {mode!r}")
    plant(mode)
    code = cli.main(["train", job, "--no-progress"])
    if code == 0 and len(sys.argv) > 3 and MPI.COMM_WORLD.Get_rank() == 0:
        with open(sys.argv[3], "w") as f:
            json.dump({"finished": True, "processes": MPI.COMM_WORLD.Get_size()}, f)
    return code


if __name__ == "__main__":
    sys.exit(main())
