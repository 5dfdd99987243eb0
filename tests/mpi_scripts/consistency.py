"""Run under ``mpiexec -n P``: reduced gradients and short trainings, built from the runtime's own pieces.

Usage: ``python consistency.py SPEC.json OUT.json``. SPEC holds ``{"base": data folder, "cases": [...]}``;
each case is ``{"name", "kind": "gradient" | "train", "job": {...raw job tables...}, "steps": K}``.

For a gradient case every rank computes its part of the first global batch as a training step does
(``Trainer.gradient``: the job's exchange strategy, fast or exact) and rank 0 records the reduced gradient,
the batch rows, the standardisation and the initial parameters. For a train case the script runs K
``Trainer.step`` calls and records the final parameters, the global batches used, and the SHA-256 of the
parameters on every rank. Only rank 0 writes OUT (JSON; floats round-trip exactly through ``repr``).
"""

from __future__ import annotations

import hashlib
import json
import sys

import numpy as np
from shardmill.config import job_from_dict
from shardmill.parallel.comm import Comm
from shardmill.training.trainer import Trainer


def named_lists(trainer: Trainer, flat: np.ndarray) -> dict[str, list]:
    return {name: view.tolist() for name, view in trainer.model.named(flat).items()}


def gradient_case(trainer: Trainer) -> dict:
    params0 = trainer.model.params.copy()
    rows = trainer.sampler.batch(0, 0)
    trainer.timer.start()
    trainer.gradient(rows)
    return {"rows": rows.tolist(), "mean": trainer.data.mean.tolist(), "inv_std": trainer.data.inv_std.tolist(),
            "params": named_lists(trainer, params0), "grads": named_lists(trainer, trainer.grads),
            "train_rows": trainer.data.split.train.tolist()}


def train_case(trainer: Trainer, steps: int) -> dict:
    params0 = trainer.model.params.copy()
    per_epoch = trainer.sampler.steps_per_epoch
    batches = []
    for step in range(steps):
        epoch, in_epoch = divmod(step, per_epoch)
        batches.append(trainer.sampler.batch(epoch, in_epoch).tolist())
        trainer.step(epoch, in_epoch)
    digest = hashlib.sha256(np.ascontiguousarray(trainer.model.params).tobytes()).hexdigest()
    return {"params0": named_lists(trainer, params0), "params": named_lists(trainer, trainer.model.params),
            "batches": batches, "mean": trainer.data.mean.tolist(), "inv_std": trainer.data.inv_std.tolist(),
            "sha256_by_rank": trainer.comm.allgather_object(digest)}


def main() -> None:
    spec_path, out_path = sys.argv[1], sys.argv[2]
    with open(spec_path) as f:
        spec = json.load(f)
    comm = Comm()
    results: dict = {"processes": comm.size}
    for case in spec["cases"]:
        job = job_from_dict(case["job"], base=spec["base"])
        trainer = Trainer(job, comm)
        if case["kind"] == "gradient":
            results[case["name"]] = gradient_case(trainer)
        else:
            results[case["name"]] = train_case(trainer, case["steps"])
    if comm.rank == 0:
        with open(out_path, "w") as f:
            json.dump(results, f)


if __name__ == "__main__":
    main()
