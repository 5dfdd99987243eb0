"""The records of ``workdir/metrics.jsonl`` a run writes (rank 0): start, epoch, early stop and health.

docs/metrics.md describes them field by field. Building an epoch record is collective (its sums, phase times
and validation metrics are reduced over ranks); appending is rank 0's.
"""

from __future__ import annotations

import json
import sys
from pathlib import Path
from typing import Any

import numpy as np
from shardmill import checkpoint
from shardmill.training.best import BestTracker
from shardmill.training.health import warnings
from shardmill.training.trainer import Trainer


def append(path: Path, record: dict[str, Any]) -> None:
    """Append one record to metrics.jsonl (rank 0), flushed as one line."""
    with open(path, "a") as out:
        out.write(json.dumps(record) + "\n")


def start_record(trainer: Trainer, start_step: int) -> dict[str, Any]:
    """The first record of each run segment (a fresh start, or a resume): what ran, where, with which job."""
    from shardmill.version import __version__

    job = trainer.job
    return {"kind": "start", "time": checkpoint.utc_now(), "version": __version__, "processes": trainer.comm.size,
            "resumed_from_step": start_step, "job": job.as_dict(), "job_digest": job.digest(),
            "overrides": list(job.overrides)}


def epoch_record(trainer: Trainer, epoch: int, step: int, steps: int, seconds: float,
                 compile_s: float) -> dict[str, Any]:
    """The record of an epoch that ends at global ``step`` after ``steps`` steps and ``seconds`` (collective)."""
    job, comm = trainer.job, trainer.comm
    train_metrics = trainer.summarise(trainer.take_train_sums())
    phase_max, phase_mean = trainer.reduce_phases()
    seconds_max = np.array([seconds])
    comm.allreduce_max(seconds_max)
    record: dict[str, Any] = {
        "kind": "epoch",
        "epoch": epoch + 1,
        "step": step,
        "processes": comm.size,
        "global_batch": job.run.global_batch,
        "reduction": job.run.reduction,
        "train": train_metrics,
        "learning_rate": trainer.learning_rate,
        "seconds": float(seconds_max[0]),
        "samples_per_s": float(steps * job.run.global_batch / max(seconds_max[0], 1e-12)),
        "phase_seconds_max": phase_max,
        "phase_seconds_mean": phase_mean,
        "compile_s": compile_s,
    }
    if trainer.data.split.validation.size:
        record["validation"] = trainer.evaluate(trainer.data.split.validation)
    return record


def early_stop_record(best: BestTracker, epoch: int, step: int) -> dict[str, Any]:
    """Early stopping ended the run at ``epoch`` (global ``step``): the tracker's best and its patience."""
    return {"kind": "early_stop", "epoch": epoch, "step": step, "metric": best.metric, "best_value": best.value,
            "best_epoch": best.epoch, "best_step": best.step, "patience": best.patience}


def write_health(records: list[dict[str, Any]], path: Path, lead: bool) -> None:
    """Append pending health records to metrics.jsonl and print their warnings (rank 0); empties ``records``."""
    if lead:
        for record in records:
            append(path, record)
            for text in warnings(record):
                print(f"shardmill: warning: {text}", file=sys.stderr, flush=True)
    records.clear()
