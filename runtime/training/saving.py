"""A trainer's checkpoints: the plain state it saves, the save (rank 0 writes), and the resume (rank 0 reads).

The glue between a :class:`shardmill.training.trainer.Trainer` and ``checkpoint.py``, which knows nothing of the
trainer. Every function here is collective: every rank calls it at the same point.
"""

from __future__ import annotations

import sys
from typing import Any

import numpy as np
from shardmill import checkpoint
from shardmill.errors import LocalJobError
from shardmill.parallel.comm import lead_then_share
from shardmill.training.best import BestTracker


def training_state(trainer: Any, step: int) -> checkpoint.TrainingState:
    """The plain state a checkpoint holds: views of the parameters, the optimizer state at full size.

    Collective (every rank calls it): a sharded update's state slices are gathered.
    """
    model, data = trainer.model, trainer.data
    optimizer = {name: trainer.exchange.full(array) for name, array in trainer.optimizer.state.items()}
    return checkpoint.TrainingState(
        params=model.named(model.params), input_mean=data.mean, input_inv_std=data.inv_std,
        optimizer=optimizer, optimizer_updates=trainer.optimizer.updates, step=step,
        steps_per_epoch=trainer.sampler.steps_per_epoch, processes=trainer.comm.size, job=trainer.job,
        layers=model.sizes, dtype=model.dtype.name,
        feature_names=getattr(data, "feature_names", None),
        best=trainer.best.state() if trainer.best is not None else None,
        weights=data.weight_record(),
        categories=[c.record() for c in getattr(data, "categories", [])] or None,
        target_mean=data.target_mean, target_std=data.target_std)


def save(trainer: Any, step: int, best: bool = False) -> checkpoint.TrainingState:
    """Checkpoint ``step``: every rank calls it, rank 0 writes (parameters are identical on every rank).

    ``best``: the model of this step is the best so far (``run.best_metric``): the index marks the checkpoint,
    which is then kept beside the newest, and ``best.npz`` is rewritten. A write that fails (a full disk) is
    raised on every rank, naming the last complete checkpoint. Returns the state it saved.
    """
    state = training_state(trainer, step)
    job = trainer.job
    root = job.workdir / "checkpoints"

    def write() -> None:
        try:
            checkpoint.save(state, root, job.run.keep_checkpoints, best=best)
            if best:
                checkpoint.write_final(job.workdir / "best.npz", state)
        except OSError as err:  # a full disk, a read-only file system: the previous checkpoint is intact
            try:
                last = checkpoint.latest_name(root)
            except checkpoint.CheckpointError:
                last = None
            kept = f"the last complete checkpoint is {last}" if last else "no checkpoint was completed"
            raise LocalJobError(f"the checkpoint of step {step} cannot be written under {str(root)!r}: "
                                f"{err.strerror or err}; {kept}") from None

    lead_then_share(trainer.comm, write)
    return state


def resume(trainer: Any) -> int:
    """Restore params, optimizer state and position from the newest checkpoint that verifies; returns the step.

    Rank 0 reads and verifies; every rank receives the same arrays by broadcast (node-local disks work).
    Any refusal is raised identically on all ranks.
    """
    comm, model, job = trainer.comm, trainer.model, trainer.job
    arrays: dict[str, dict[str, np.ndarray]] = {}  # rank 0's parameters and optimizer state, as read

    def load() -> dict[str, Any]:
        state, arrays["params"], arrays["optimizer"], skipped = checkpoint.load_newest_verified(job.workdir)
        for reason in skipped:
            print(f"shardmill: warning: skipping a damaged checkpoint, {reason}", file=sys.stderr, flush=True)
        shapes = {name: view.shape for name, view in model.named(model.params).items()}
        optimizer_shapes = {name: (model.n_params,) for name in trainer.optimizer.state}
        checkpoint.check_compatible(job, shapes, optimizer_shapes, state, arrays["params"], arrays["optimizer"])
        ours = trainer.data.weight_record()
        if state.get("weights") != ours:
            raise checkpoint.CheckpointError(
                f"the checkpoint was trained with other row weights ({_weights_text(state.get('weights'))}) than "
                f"this job's data gives ({_weights_text(ours)}); the data or `data.weights` changed (the "
                f"weights' SHA-256 differs)")
        ours = [c.record() for c in getattr(trainer.data, "categories", [])] or None
        if state.get("categories") != ours:
            raise checkpoint.CheckpointError(
                "the checkpoint was trained with other categorical vocabularies than this job's data gives (the "
                "values of the training rows of a `data.categorical` column changed)")
        params = arrays["params"]
        saved = ({"mean": params["target_mean"].tolist(), "std": params["target_std"].tolist()}
                 if "target_mean" in params and "target_std" in params else None)
        ours = trainer.data.target_record()
        if saved != ours:
            raise checkpoint.CheckpointError(
                f"the checkpoint was trained on targets scaled otherwise ({_scaling_text(saved)}) than "
                f"this job's data gives ({_scaling_text(ours)}); the targets or `data.standardize_targets` changed")
        return state

    state = lead_then_share(comm, load, share=True)
    if comm.rank == 0:
        for name, view in model.named(model.params).items():
            view[...] = arrays["params"][name]
    comm.broadcast(model.params)
    for name, array in trainer.optimizer.state.items():  # saved at full size; this rank keeps what it updates
        full = arrays["optimizer"][name] if comm.rank == 0 else np.zeros(model.n_params, dtype=array.dtype)
        array[...] = comm.broadcast(np.ascontiguousarray(full, dtype=array.dtype))[trainer.exchange.owned]
    trainer.optimizer.updates = int(state["optimizer_updates"])
    trainer.step_count = int(state["step"])
    if trainer.best is not None:
        run = job.run
        trainer.best = BestTracker(run.best_metric, run.patience, run.min_improvement, state.get("best"))
    given = state.get("overrides") or []
    if comm.rank == 0 and given != list(job.overrides):
        now = " --set ".join(job.overrides)
        print(f"shardmill: note: the checkpoint was written by a run with "
              f"{'--set ' + ' --set '.join(given) if given else 'no --set'}; this resume has "
              f"{'--set ' + now if now else 'none'}", file=sys.stderr, flush=True)
    return trainer.step_count


def _weights_text(record: dict[str, Any] | None) -> str:
    if record is None:
        return "none"
    classes = record.get("class_weights")
    return (f"Σ w = {record.get('training_sum')!r} over the training rows"
            + (f", class weights {classes}" if classes else ""))


def _scaling_text(record: dict[str, Any] | None) -> str:
    if record is None:
        return "raw targets"
    return f"mean {record['mean']}, standard deviation {record['std']}"
