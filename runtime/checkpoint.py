"""Checkpoints: atomic directories of numpy-readable arrays with SHA-256 checksums.

Layout under ``workdir/checkpoints/``::

    step-00000500/params.npz      W0, b0, W1, b1, … and the input standardisation (input_mean, input_inv_std)
    step-00000500/optimizer.npz   the optimizer's flat state arrays (velocity, or m and v), params layout
    step-00000500/state.json      step, epoch, sampler position, optimizer updates, job, job digest, checksums
    latest                        one line: the name of the newest complete checkpoint directory

A checkpoint is written into a temporary directory, every file is flushed and fsynced, the directory is
renamed into place, and ``latest`` is replaced with an atomic rename. An interrupted write therefore leaves
the previous checkpoint and pointer intact. Loading checks every checksum, shape and the job digest.
"""

from __future__ import annotations

import hashlib
import json
import os
import shutil
from pathlib import Path
from typing import TYPE_CHECKING, Any

import numpy as np
from shardmill.config import JobError

if TYPE_CHECKING:
    from shardmill.trainer import Trainer

FORMAT = "shardmill-checkpoint-1"


class CheckpointError(JobError):
    """A checkpoint that is missing, truncated, corrupted or belongs to another job."""


def sha256(path: Path) -> str:
    digest = hashlib.sha256()
    with open(path, "rb") as f:
        for block in iter(lambda: f.read(1 << 20), b""):
            digest.update(block)
    return digest.hexdigest()


def _fsync_dir(path: Path) -> None:
    fd = os.open(path, os.O_RDONLY)
    try:
        os.fsync(fd)
    finally:
        os.close(fd)


def _write_npz(path: Path, arrays: dict[str, np.ndarray]) -> None:
    with open(path, "wb") as f:
        np.savez(f, **arrays)
        f.flush()
        os.fsync(f.fileno())


def _write_text(path: Path, text: str) -> None:
    with open(path, "w") as f:
        f.write(text)
        f.flush()
        os.fsync(f.fileno())


def model_arrays(trainer: Trainer) -> dict[str, np.ndarray]:
    arrays = {name: np.ascontiguousarray(view) for name, view in trainer.model.named(trainer.model.params).items()}
    arrays["input_mean"] = trainer.data.mean
    arrays["input_inv_std"] = trainer.data.inv_std
    return arrays


def save(trainer: Trainer, step: int) -> Path | None:
    """Write the checkpoint of ``step`` atomically (rank 0 only; parameters are identical on every rank)."""
    if trainer.comm.rank != 0:
        return None
    root = trainer.job.workdir / "checkpoints"
    root.mkdir(parents=True, exist_ok=True)
    name = f"step-{step:08d}"
    final = root / name
    for stale in root.glob(".tmp-step-*"):  # left by a write that was interrupted; one writer per workdir
        shutil.rmtree(stale, ignore_errors=True)
    tmp = root / f".tmp-{name}-{os.getpid()}"
    tmp.mkdir()
    _write_npz(tmp / "params.npz", model_arrays(trainer))
    _write_npz(tmp / "optimizer.npz", dict(trainer.optimizer.state))
    spe = trainer.sampler.steps_per_epoch
    state = {
        "format": FORMAT,
        "step": step,
        "epoch": step // spe,
        "step_in_epoch": step % spe,
        "sampler": {"seed": trainer.job.run.seed, "global_batch": trainer.job.run.global_batch,
                    "steps_per_epoch": spe},
        "optimizer_updates": trainer.optimizer.updates,
        "processes": trainer.comm.size,
        "job": trainer.job.as_dict(),
        "job_digest": trainer.job.digest(),
        "layers": trainer.model.sizes,
        "dtype": trainer.model.dtype.name,
        "files": {f: sha256(tmp / f) for f in ("params.npz", "optimizer.npz")},
    }
    _write_text(tmp / "state.json", json.dumps(state, indent=1))
    _fsync_dir(tmp)
    if final.exists():
        shutil.rmtree(final)
    os.replace(tmp, final)
    _fsync_dir(root)
    pointer = root / f".latest-{os.getpid()}"
    _write_text(pointer, name + "\n")
    os.replace(pointer, root / "latest")
    _fsync_dir(root)
    for old in sorted(root.glob("step-*"))[:-trainer.job.run.keep_checkpoints]:
        shutil.rmtree(old, ignore_errors=True)  # only after `latest` points at the new one
    return final


def resolve(path: Path) -> Path:
    """A checkpoint directory from itself, from a ``checkpoints`` folder or a workdir (via ``latest``)."""
    for candidate in (path, path / "checkpoints"):
        pointer = candidate / "latest"
        if pointer.is_file():
            name = pointer.read_text().strip()
            if not name or "/" in name:
                raise CheckpointError(f"checkpoint pointer {str(pointer)!r} is damaged")
            return candidate / name
    return path


def load(directory: Path) -> tuple[dict[str, Any], dict[str, np.ndarray], dict[str, np.ndarray]]:
    """Read and verify one checkpoint directory: (state, params arrays, optimizer arrays)."""
    state_path = directory / "state.json"
    if not state_path.is_file():
        raise CheckpointError(f"no checkpoint at {str(directory)!r} (state.json missing)")
    try:
        state = json.loads(state_path.read_text())
    except (json.JSONDecodeError, UnicodeDecodeError) as err:
        raise CheckpointError(f"checkpoint {str(directory)!r} has a damaged state.json: {err}") from None
    if not isinstance(state, dict) or state.get("format") != FORMAT:
        raise CheckpointError(f"checkpoint {str(directory)!r} is not a {FORMAT} checkpoint")
    loaded = []
    for name in ("params.npz", "optimizer.npz"):
        path = directory / name
        if not path.is_file():
            raise CheckpointError(f"checkpoint {str(directory)!r} is missing {name}")
        expected = state.get("files", {}).get(name)
        actual = sha256(path)
        if actual != expected:
            raise CheckpointError(f"checkpoint file {str(path)!r} is corrupted or truncated: SHA-256 {actual[:16]}… "
                                  f"does not match the recorded {str(expected)[:16]}…")
        with np.load(path, allow_pickle=False) as archive:
            loaded.append({k: archive[k] for k in archive.files})
    return state, loaded[0], loaded[1]


def resume(trainer: Trainer) -> int:
    """Restore params, optimizer state and position from ``workdir/checkpoints/latest``; returns the step.

    Rank 0 reads and verifies; every rank receives the same arrays by broadcast (node-local disks work).
    Any refusal is raised identically on all ranks.
    """
    from shardmill.parallel.comm import agree

    comm, model = trainer.comm, trainer.model
    error: Exception | None = None
    state: dict[str, Any] | None = None
    if comm.rank == 0:
        try:
            root = trainer.job.workdir / "checkpoints"
            if not (root / "latest").is_file():
                raise CheckpointError(f"nothing to resume: no checkpoint under {str(root)!r}")
            state, params, opt = load(resolve(root))
            check_compatible(trainer, state, params, opt)
        except CheckpointError as err:
            error = err
    agree(comm, error)
    state = comm.broadcast_object(state)
    if comm.rank == 0:
        for name, view in model.named(model.params).items():
            view[...] = params[name]
        for name, array in trainer.optimizer.state.items():
            array[...] = opt[name]
    comm.broadcast(model.params)
    for array in trainer.optimizer.state.values():
        comm.broadcast(array)
    trainer.optimizer.updates = int(state["optimizer_updates"])
    trainer.step_count = int(state["step"])
    return int(state["step"])


def check_compatible(trainer: Trainer, state: dict[str, Any], params: dict, opt: dict) -> None:
    """Refuse a checkpoint of another model, optimizer or job trajectory, naming what differs."""
    model = trainer.model
    if state.get("job_digest") != trainer.job.digest():
        theirs = state.get("job", {})
        ours = trainer.job.as_dict()
        diffs = [f"{s}.{k}" for s in ("model", "data", "optimizer", "run") for k in ours.get(s, {})
                 if k in theirs.get(s, {}) and theirs[s][k] != ours[s][k]
                 and k not in ("epochs", "max_steps", "save_every", "keep_checkpoints", "workdir", "threads",
                               "check_every",
                               "health_every", "bucket_mb", "overlap")]
        raise CheckpointError("checkpoint belongs to another job (its job digest differs"
                              + (f"; changed: {', '.join(diffs)}" if diffs else "") + ")")
    for name, view in model.named(model.params).items():
        if name not in params or params[name].shape != view.shape:
            got = params[name].shape if name in params else "missing"
            raise CheckpointError(f"checkpoint tensor {name} has shape {got}; the model needs {view.shape}")
    for name, array in trainer.optimizer.state.items():
        if name not in opt or opt[name].shape != array.shape:
            raise CheckpointError(f"checkpoint optimizer state {name!r} is missing or has the wrong shape")


def write_final(path: Path, trainer: Trainer) -> None:
    """``final.npz``: W0, b0, …, input standardisation, and the model description as a JSON string."""
    arrays = model_arrays(trainer)
    arrays["model_json"] = np.array(json.dumps(trainer.job.as_dict()["model"]))
    tmp = path.with_name(f".{path.name}.tmp-{os.getpid()}")
    _write_npz(tmp, arrays)
    os.replace(tmp, path)
