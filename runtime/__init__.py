"""shardmill: data-parallel MLP training on CPUs over MPI.

Public contract::

    import shardmill as sm
    m = sm.MLP([64, 128, 10], activation="tanh", loss="softmax_cross_entropy", dtype="float64", seed=0)
    loss, grad = m.loss_and_grad(X, y)
    job = sm.load_job("job.toml"); result = sm.train(job)
"""

from __future__ import annotations

from typing import Any

from shardmill.config import Job, JobError, job_from_dict, load_job
from shardmill.model import MLP

__version__ = "0.1.0"
__all__ = ["MLP", "Job", "JobError", "job_from_dict", "load_job", "train", "__version__"]


def train(job: Job, resume: bool = False, progress: bool = True, fresh: bool = False) -> dict[str, Any]:
    """Train a job on every rank of MPI.COMM_WORLD (one process without a launcher); see trainer.train.

    A workdir that holds an earlier run is refused unless ``resume`` (continue it) or ``fresh`` (clear it first).
    """
    from shardmill.trainer import train as _train

    return _train(job, resume=resume, progress=progress, fresh=fresh)
