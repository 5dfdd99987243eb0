"""Checkpoints: atomic directories of numpy-readable arrays with SHA-256 checksums.

Layout under ``workdir/checkpoints/``::

    step-00000500/params.npz      W0, b0, W1, b1, … and the input standardisation (input_mean, input_inv_std;
                                  target_mean, target_std when the targets were standardised)
    step-00000500/optimizer.npz   the optimizer's flat state arrays (velocity, or m and v), params layout
    step-00000500/state.json      step, epoch, sampler position, optimizer updates, job, job digest, checksums
    index.json                    the complete checkpoints, oldest first (name, step, epoch, time written,
                                  SHA-256 of state.json), and the SHA-256 of that list; the last is the newest

A checkpoint is written into a temporary directory, every file is flushed and fsynced, the directory is
renamed into place, and ``index.json`` is replaced with an atomic rename. An interrupted write therefore
leaves the previous checkpoints and index intact. Loading checks the index's checksum and its entry of the folder,
every file's checksum, the archives' members, dtypes and shapes, the counters, the step against the folder's name
and the job digest. A folder from before the index (a one-line ``latest`` file) still resumes; a missing index is
rebuilt from the step folders that verify (:func:`rebuild_index`).

With a key configured (``SHARDMILL_CHECKPOINT_KEY`` holding it as hex digits, or ``SHARDMILL_CHECKPOINT_KEY_FILE``
naming a file that does; never the job file: ``checkpointkey.py``), each checkpoint also carries ``manifest.hmac``,
an HMAC-SHA-256 (RFC 2104) of its state.json (which records every file's SHA-256), and final.npz / best.npz a
``manifest_hmac`` member over every other member; while the key is configured, a checkpoint or model whose tag is
missing or does not match is refused.
"""

from __future__ import annotations

import hashlib
import hmac
import json
import os
import re
import shutil
import zipfile
from dataclasses import dataclass
from pathlib import Path
from typing import Any

import numpy as np
from shardmill.checkpointkey import configured_key, hmac_sha256
from shardmill.config import KEYS, Job, job_from_dict
from shardmill.errors import JobError

FORMAT = "shardmill-checkpoint-1"


class CheckpointError(JobError):
    """A checkpoint that is missing, truncated, corrupted or belongs to another job."""


@dataclass
class TrainingState:
    """What a checkpoint holds: plain arrays and numbers (the trainer builds it; nothing here knows the trainer).

    ``params``: {"W0": (fan_in, fan_out), "b0": (fan_out,), …} in the model's dtype; ``optimizer``: the flat
    state arrays (velocity, or m and v), (n_params,) each — full size whatever the update (a sharded run gathers
    its slices), so a run saved at P resumes at any P′ with either update; ``step``: global steps completed.
    """

    params: dict[str, np.ndarray]
    input_mean: np.ndarray
    input_inv_std: np.ndarray
    optimizer: dict[str, np.ndarray]
    optimizer_updates: int
    step: int
    steps_per_epoch: int
    processes: int
    job: Job
    layers: list[int]
    dtype: str
    feature_names: list[str] | None = None  # input column names, when the inputs came from a table with a header
    best: dict[str, Any] | None = None  # the best-model tracker (run.best_metric): resumes with the run
    weights: dict[str, Any] | None = None  # the row weights' record (class weights, Σ w of the training rows)
    categories: list[dict[str, Any]] | None = None  # categorical columns: {column, vocabulary, width} each
    target_mean: np.ndarray | None = None  # (k,) float64: the target scaling (data.standardize_targets), or None
    target_std: np.ndarray | None = None  # (k,) float64


STATISTICS = ("input_mean", "input_inv_std", "target_mean", "target_std")
"""The float64 arrays beside the parameters in params.npz and final.npz: the input standardisation and, when
``data.standardize_targets`` scaled the targets, their means and standard deviations (each (k,))."""


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


TAG_FILE = "manifest.hmac"
MODEL_TAG = "manifest_hmac"


def _manifest_tag(key: bytes, state_bytes: bytes) -> str:
    """The tag of a checkpoint: its state.json records every file's SHA-256, so it is the manifest."""
    return hmac_sha256(key, b"shardmill-checkpoint-manifest-1\0" + state_bytes)


def _check_tag(directory: Path, state_bytes: bytes) -> None:
    key = configured_key()
    if key is None:
        return
    path = directory / TAG_FILE
    if not path.is_file():
        raise CheckpointError(f"checkpoint {str(directory)!r} carries no HMAC tag ({TAG_FILE}) while a checkpoint "
                              f"key is configured; it was written without the key, or its tag was removed")
    try:
        recorded = json.loads(path.read_text())["tag"]
    except (OSError, ValueError, KeyError, TypeError):
        recorded = None
    if not isinstance(recorded, str) or not hmac.compare_digest(recorded, _manifest_tag(key, state_bytes)):
        raise CheckpointError(f"checkpoint {str(directory)!r}: its manifest does not match its HMAC tag under the "
                              f"configured key; state.json was rewritten without the key (or another key wrote it)")


def _model_manifest(arrays: dict[str, np.ndarray]) -> bytes:
    """Every member of a model file but the tag: name, dtype, shape and SHA-256 of the values, as canonical JSON."""
    listed = {name: [array.dtype.str, list(array.shape), hashlib.sha256(np.ascontiguousarray(array).tobytes())
                     .hexdigest()] for name, array in arrays.items() if name != MODEL_TAG}
    return b"shardmill-model-manifest-1\0" + json.dumps(listed, sort_keys=True).encode()


def check_model_tag(path: Path, arrays: dict[str, np.ndarray]) -> None:
    """Refuse a final.npz / best.npz (its ``arrays``) whose HMAC tag is missing or wrong while a key is configured."""
    key = configured_key()
    if key is None:
        return
    tag = arrays.get(MODEL_TAG)
    if tag is None:
        raise CheckpointError(f"{str(path)!r} carries no HMAC tag ({MODEL_TAG}) while a checkpoint key is "
                              f"configured; it was written without the key, or its tag was removed")
    if not hmac.compare_digest(str(tag), hmac_sha256(key, _model_manifest(arrays))):
        raise CheckpointError(f"{str(path)!r}: its members do not match its HMAC tag under the configured key; the "
                              f"file was rewritten without the key (or another key wrote it)")


def model_arrays(state: TrainingState) -> dict[str, np.ndarray]:
    arrays = {name: np.ascontiguousarray(view) for name, view in state.params.items()}
    arrays["input_mean"] = state.input_mean
    arrays["input_inv_std"] = state.input_inv_std
    if state.target_mean is not None and state.target_std is not None:
        arrays["target_mean"] = state.target_mean
        arrays["target_std"] = state.target_std
    return arrays


def save(state: TrainingState, root: Path, keep: int, best: bool = False) -> Path:
    """Write the checkpoint of ``state.step`` atomically under ``root``; keep the newest ``keep`` checkpoints.

    ``best``: this checkpoint holds the best model so far (``run.best_metric``); the index marks it and pruning keeps
    it beside the newest ``keep`` until a better one comes. One writer per workdir: the caller writes from one rank
    (parameters are identical on every rank).
    """
    step = state.step
    root.mkdir(parents=True, exist_ok=True)
    name = f"step-{step:08d}"
    final = root / name
    remove_stale(root)  # left by a write that was interrupted; one writer per workdir
    tmp = root / f".tmp-{name}-{os.getpid()}"
    tmp.mkdir()
    _write_npz(tmp / "params.npz", model_arrays(state))
    _write_npz(tmp / "optimizer.npz", dict(state.optimizer))
    spe, job = state.steps_per_epoch, state.job
    record = {
        "format": FORMAT,
        "step": step,
        "epoch": step // spe,
        "step_in_epoch": step % spe,
        "sampler": {"seed": job.run.seed, "global_batch": job.run.global_batch, "steps_per_epoch": spe},
        "optimizer_updates": state.optimizer_updates,
        "processes": state.processes,
        "job": job.as_dict(),
        "job_digest": job.digest(),
        "overrides": list(job.overrides),
        "feature_names": state.feature_names,
        "best": state.best,
        "weights": state.weights,
        **({"categories": state.categories} if state.categories else {}),
        "layers": state.layers,
        "dtype": state.dtype,
        "files": {f: sha256(tmp / f) for f in ("params.npz", "optimizer.npz")},
    }
    text = json.dumps(record, indent=1)
    _write_text(tmp / "state.json", text)
    key = configured_key()
    if key is not None:
        tag = {"algorithm": "HMAC-SHA-256", "tag": _manifest_tag(key, text.encode())}
        _write_text(tmp / TAG_FILE, json.dumps(tag))
    _fsync_dir(tmp)
    if final.exists():
        shutil.rmtree(final)
    os.replace(tmp, final)
    _fsync_dir(root)
    complete = [entry for entry in read_index(root) if entry["name"] != name and (root / entry["name"]).is_dir()]
    if best:
        for entry in complete:
            entry.pop("best", None)
    entry = {"name": name, "step": step, "epoch": record["epoch"], "written": utc_now(),
             "state_sha256": sha256(final / "state.json")}
    if best:
        entry["best"] = True
    complete.append(entry)
    complete.sort(key=lambda entry: entry["step"])
    # the newest `keep`, this one last (it is what a resume reads), and the best one wherever it is
    kept = [entry for i, entry in enumerate(complete) if i >= len(complete) - keep or entry.get("best")]
    write_index(root, kept)
    (root / "latest").unlink(missing_ok=True)  # the one-line pointer of earlier versions, replaced by the index
    prune(root, {entry["name"] for entry in kept})
    return final


def best_name(root: Path) -> str | None:
    """The name of the checkpoint the index marks as the best model (``run.best_metric``), or None."""
    marked = [entry["name"] for entry in read_index(root) if entry.get("best")]
    return marked[-1] if marked else None


INDEX = "index.json"
INDEX_FORMAT = "shardmill-checkpoint-index-1"


def utc_now() -> str:
    """The time now, UTC, ISO 8601 to the second (as the index and metrics.jsonl record it)."""
    import datetime

    return datetime.datetime.now(datetime.UTC).isoformat(timespec="seconds")


def _index_digest(entries: list[dict[str, Any]]) -> str:
    return hashlib.sha256(json.dumps(entries, sort_keys=True).encode()).hexdigest()


def write_index(root: Path, entries: list[dict[str, Any]]) -> None:
    """Replace ``root/index.json`` atomically: the complete checkpoints, oldest first, with their own SHA-256.

    Written to a temporary file, flushed and fsynced, then renamed over the old index: a reader sees the old
    index or the new one, never half of one.
    """
    text = json.dumps({"format": INDEX_FORMAT, "checkpoints": entries, "sha256": _index_digest(entries)}, indent=1)
    tmp = root / f".{INDEX}.tmp-{os.getpid()}"
    _write_text(tmp, text + "\n")
    os.replace(tmp, root / INDEX)
    _fsync_dir(root)


def read_index(root: Path) -> list[dict[str, Any]]:
    """The complete checkpoints ``root/index.json`` lists, oldest first ([] without an index).

    A checkpoint folder written before the index existed has a one-line ``latest`` file instead; it reads as an
    index of that one checkpoint. A damaged index is refused.
    """
    path = root / INDEX
    if path.exists() and not path.is_file():
        raise CheckpointError(f"checkpoint index {str(path)!r} is not a file")
    if not path.is_file():
        pointer = root / "latest"
        if pointer.is_file():
            name = pointer.read_text().strip()
            if not name or "/" in name:
                raise CheckpointError(f"checkpoint pointer {str(pointer)!r} is damaged")
            return [{"name": name, "step": _step_of(Path(name))}]
        return []
    try:
        index = json.loads(path.read_text())
        entries = index["checkpoints"]
        valid = (index.get("format") == INDEX_FORMAT and index.get("sha256") == _index_digest(entries)
                 and all("/" not in entry["name"] for entry in entries))
    except (json.JSONDecodeError, UnicodeDecodeError, KeyError, TypeError):
        valid = False
    if not valid:
        raise CheckpointError(f"checkpoint index {str(path)!r} is damaged (its checksum or format does not match); "
                              f"move it aside to rebuild it from the step folders that verify")
    for number, entry in enumerate(entries, 1):
        name, step = entry.get("name") if isinstance(entry, dict) else None, _get(entry, "step")
        if not isinstance(name, str) or not STEP_FOLDER.fullmatch(name):
            raise CheckpointError(f"checkpoint index {str(path)!r}: entry {number}'s `name` must be a step folder's "
                                  f"name (step-00000020); got {_short(name)}")
        if not _whole(step) or step != _step_of(Path(name)):
            raise CheckpointError(f"checkpoint index {str(path)!r}: entry {number}'s `step` must be the whole number "
                                  f"of its folder {name}; got {_short(step)}")
    return entries


STEP_FOLDER = re.compile(r"step-[0-9]{8,}")


def _get(record: object, key: str) -> object:
    return record.get(key) if isinstance(record, dict) else None


def _whole(value: object, least: int = 0) -> bool:
    """Whether ``value`` (read from JSON) is a whole number ≥ ``least`` (a bool is not)."""
    return isinstance(value, int) and not isinstance(value, bool) and value >= least


def latest_name(root: Path) -> str | None:
    """The name of the newest complete checkpoint under ``root`` (a ``checkpoints`` folder), or None."""
    entries = read_index(root)
    return entries[-1]["name"] if entries else None


def _step_of(folder: Path) -> int:
    try:
        return int(folder.name.removeprefix("step-"))
    except ValueError:
        return -1


def prune(root: Path, kept: set[str]) -> None:
    """Remove every checkpoint folder the index no longer lists (``kept``: the names it lists).

    Called only after the new index is in place, so a reader never finds a listed checkpoint missing.
    """
    for old in root.glob("step-*"):
        if old.is_dir() and old.name not in kept:
            shutil.rmtree(old, ignore_errors=True)


def remove_stale(root: Path) -> None:
    """Remove the temporary folders and index files an interrupted checkpoint write left (under the workdir lock:
    one writer)."""
    for stale in root.glob(".tmp-step-*"):
        shutil.rmtree(stale, ignore_errors=True)
    for stale in root.glob(f".{INDEX}.tmp-*"):
        stale.unlink(missing_ok=True)


def holds_a_run(workdir: Path) -> str | None:  # the lock file alone is not a run
    """What in ``workdir`` belongs to an earlier run (for the refusal message), or None for an unused folder."""
    found = [name for name in (f"checkpoints/{INDEX}", "checkpoints/latest", "metrics.jsonl", "final.npz")
             if (workdir / name).exists()]
    return ", ".join(found) if found else None


def clear_run(workdir: Path) -> None:
    """Remove an earlier run's checkpoints, metrics.jsonl and final.npz from ``workdir`` (``train --fresh``)."""
    shutil.rmtree(workdir / "checkpoints", ignore_errors=True)
    for name in ("metrics.jsonl", "final.npz", "best.npz"):
        (workdir / name).unlink(missing_ok=True)


def resolve(path: Path) -> Path:
    """A checkpoint directory from itself, from a ``checkpoints`` folder or a workdir (the index's newest)."""
    for candidate in (path, path / "checkpoints"):
        name = latest_name(candidate) if candidate.is_dir() else None
        if name:
            return candidate / name
    return path


def load(directory: Path) -> tuple[dict[str, Any], dict[str, np.ndarray], dict[str, np.ndarray]]:
    """Read and verify one checkpoint directory: (state, params arrays, optimizer arrays).

    In order: the HMAC tag (with a key configured), the entry of the index beside it (the SHA-256 of state.json and
    the step), state.json, every file's SHA-256, the arrays (:func:`_read_arrays`), then :func:`check_state`.
    """
    state_path = directory / "state.json"
    if not state_path.is_file():
        raise CheckpointError(f"no checkpoint at {str(directory)!r} (state.json missing)")
    state_bytes = state_path.read_bytes()
    _check_tag(directory, state_bytes)
    entry = _index_entry(directory)
    if entry is not None and entry.get("state_sha256") not in (None, hashlib.sha256(state_bytes).hexdigest()):
        raise CheckpointError(f"checkpoint {str(directory)!r}: its state.json does not match the SHA-256 the index "
                              f"records")
    try:
        state = json.loads(state_bytes.decode())
    except (json.JSONDecodeError, UnicodeDecodeError) as err:
        raise CheckpointError(f"checkpoint {str(directory)!r} has a damaged state.json: {err}") from None
    if not isinstance(state, dict) or state.get("format") != FORMAT:
        raise CheckpointError(f"checkpoint {str(directory)!r} is not a {FORMAT} checkpoint")
    files = state.get("files")
    if not isinstance(files, dict):
        raise CheckpointError(f"checkpoint {str(directory)!r}: state.json's `files` must map file names to SHA-256; "
                              f"got {_short(files)}")
    loaded = []
    for name in ("params.npz", "optimizer.npz"):
        path = directory / name
        if not path.is_file():
            raise CheckpointError(f"checkpoint {str(directory)!r} is missing {name}")
        expected = files.get(name)
        actual = sha256(path)
        if actual != expected:
            raise CheckpointError(f"checkpoint file {str(path)!r} is corrupted or truncated: SHA-256 {actual[:16]}… "
                                  f"does not match the recorded {str(expected)[:16]}…")
        loaded.append(_read_arrays(path))
    check_state(directory, state, loaded[0], loaded[1])
    named = _step_of(directory) if STEP_FOLDER.fullmatch(directory.name) else None
    for where, step in ((f"its folder's name {directory.name}", named),
                        ("the index", entry.get("step") if entry else None)):
        if step is not None and step != state["step"]:
            raise CheckpointError(f"checkpoint {str(directory)!r}: state.json's step {state['step']} disagrees with "
                                  f"{where} (step {step})")
    return state, loaded[0], loaded[1]


def _index_entry(directory: Path) -> dict[str, Any] | None:
    """The entry the index beside ``directory`` holds for it, or None (no index, or a folder it does not list)."""
    root = directory.parent
    if not (root / INDEX).exists():
        return None
    listed = [entry for entry in read_index(root) if entry["name"] == directory.name]
    return listed[-1] if listed else None


def _short(value: object, limit: int = 60) -> str:
    """repr of a value, cut to ``limit`` characters (an edited file may hold anything, at any length)."""
    text = repr(value)
    return text if len(text) <= limit else text[:limit] + "…"


def _read_arrays(path: Path) -> dict[str, np.ndarray]:
    """Every array of an .npz, real numbers only; any damage is a CheckpointError naming the file (the checksum can
    have been recomputed over a damaged file by whatever rewrote it)."""
    try:
        with zipfile.ZipFile(path) as archive:
            members = archive.namelist()
        with np.load(path, allow_pickle=False) as archive:
            arrays = {k: archive[k] for k in archive.files}
    except (ValueError, OSError, EOFError, KeyError, zipfile.BadZipFile) as err:
        reason = str(err)[:120] or type(err).__name__
        raise CheckpointError(f"checkpoint file {str(path)!r} cannot be read: {reason}") from None
    for member in members:
        if not member.endswith(".npy") or "/" in member or "\\" in member or not member.isprintable() \
                or members.count(member) > 1:
            raise CheckpointError(f"checkpoint file {str(path)!r}: member {_short(member)} is not a numpy array of "
                                  f"its own (an .npy name without a folder, once)")
    for name, array in arrays.items():
        if array.dtype.kind != "f":
            raise CheckpointError(f"checkpoint file {str(path)!r}: array {name!r} holds {array.dtype}, not real "
                                  f"floating-point numbers")
    return arrays


def check_state(directory: Path, state: dict[str, Any], params: dict[str, np.ndarray],
                opt: dict[str, np.ndarray]) -> None:
    """Refuse a checkpoint whose state.json does not hold together (an edit a recomputed checksum cannot reveal).

    The counters are whole numbers ≥ 0 that agree with each other (epoch and step_in_epoch with the step, one optimizer
    update per step); the recorded job digest is the digest of the recorded job (an edited layer count, activation or
    loss changes it); the parameters have the recorded dtype and are finite; the input statistics are there.
    """
    where = f"checkpoint {str(directory)!r}"
    for key in ("step", "epoch", "step_in_epoch", "optimizer_updates", "processes"):
        value = state.get(key)
        if not _whole(value):
            raise CheckpointError(f"{where}: state.json's `{key}` must be a whole number ≥ 0; got {_short(value)}")
    sampler = state.get("sampler")
    spe = sampler.get("steps_per_epoch") if isinstance(sampler, dict) else None
    if not _whole(spe, 1):
        raise CheckpointError(f"{where}: state.json's `sampler.steps_per_epoch` must be a whole number ≥ 1; got "
                              f"{_short(spe)}")
    if (state["epoch"], state["step_in_epoch"]) != divmod(state["step"], spe):
        raise CheckpointError(f"{where}: state.json's step {state['step']} disagrees with its epoch "
                              f"{state['epoch']} and step_in_epoch {state['step_in_epoch']} ({spe} steps per epoch)")
    if state["optimizer_updates"] != state["step"]:
        raise CheckpointError(f"{where}: state.json records {state['optimizer_updates']} optimizer updates for "
                              f"{state['step']} steps; every step makes one")
    job = state.get("job")
    if not isinstance(job, dict) or not all(isinstance(table, dict) for table in job.values()):
        raise CheckpointError(f"{where}: state.json's `job` must be the job's tables; got {_short(job)}")
    known = {section: {k: v for k, v in table.items() if f"{section}.{k}" in KEYS} for section, table in job.items()}
    try:  # keys an older version wrote and this one renamed never entered the digest: they are left out
        digest = job_from_dict(known).digest()
    except JobError as err:
        raise CheckpointError(f"{where}: state.json's `job` is not a valid job: {err}") from None
    if digest != state.get("job_digest"):
        raise CheckpointError(f"{where}: state.json's job does not match its recorded digest: the job was edited")
    dtype = state.get("dtype")
    for name, array in params.items():
        if name not in STATISTICS and array.dtype.name != dtype:
            raise CheckpointError(f"{where}: tensor {name} is {array.dtype}, the checkpoint's dtype is {_short(dtype)}")
        if not np.all(np.isfinite(array)):
            raise CheckpointError(f"{where}: tensor {name} holds a non-finite value")
    for name in ("input_mean", "input_inv_std"):
        if name not in params:
            raise CheckpointError(f"{where}: params.npz lacks {name} (the input standardisation)")
    _check_shapes(where, state, params, opt)


TENSOR = re.compile(r"[WbGB][0-9]+|E_.+")


def _check_shapes(where: str, state: dict[str, Any], params: dict[str, np.ndarray],
                  opt: dict[str, np.ndarray]) -> None:
    """The arrays against the recorded layer sizes: W_l (n_l, n_l+1), b_l, G_l, B_l (n_l+1,), the statistics one
    vector each, every optimizer array (n_params,) in the recorded dtype."""
    layers = state.get("layers")
    if not isinstance(layers, list) or len(layers) < 2 or not all(_whole(n, 1) for n in layers):
        raise CheckpointError(f"{where}: state.json's `layers` must list two or more whole numbers ≥ 1; got "
                              f"{_short(layers)}")
    for name in params:
        if name not in STATISTICS and not TENSOR.fullmatch(name):
            raise CheckpointError(f"{where}: params.npz holds an array {_short(name)} no model has")
    for l in range(len(layers) - 1):
        needed = {f"W{l}": (layers[l], layers[l + 1]), f"b{l}": (layers[l + 1],)}
        needed.update({f"{g}{l}": (layers[l + 1],) for g in "GB" if f"{g}{l}" in params})
        for name, shape in needed.items():
            got = params[name].shape if name in params else "missing"
            if got != shape:
                raise CheckpointError(f"{where}: tensor {name} has shape {got}; layers {layers} need {shape}")
    inputs = {params[name].shape for name in ("input_mean", "input_inv_std")}
    targets = [params[name].shape for name in ("target_mean", "target_std") if name in params]
    if len(inputs) != 1 or len(min(inputs)) != 1 or targets not in ([], [(layers[-1],)] * 2):
        shapes = {name: params[name].shape for name in STATISTICS if name in params}
        raise CheckpointError(f"{where}: the standardisation vectors have shapes {shapes}; the inputs' two must be "
                              f"one vector of one length, the targets' (both or neither) of {layers[-1]}")
    n_params = sum(array.size for name, array in params.items() if name not in STATISTICS)
    for name, array in opt.items():
        if array.shape != (n_params,) or array.dtype.name != state.get("dtype"):
            raise CheckpointError(f"{where}: optimizer state {_short(name)} is {array.dtype} of shape {array.shape}; "
                                  f"the parameters need {state.get('dtype')} of shape ({n_params},)")


def load_newest_verified(workdir: Path) -> tuple[dict[str, Any], dict[str, np.ndarray], dict[str, np.ndarray],
                                                 list[str]]:
    """The newest checkpoint under ``workdir/checkpoints`` whose files match their checksums: (state, params,
    optimizer, skipped), where ``skipped`` says which newer ones failed and why.

    A damaged newest checkpoint (a disk error after it was written) does not strand the run: the resume continues
    from the newest one that verifies, which replays the steps in between to the same parameters. Raises when none
    verifies.
    """
    root = workdir / "checkpoints"
    entries = read_index(root) if root.is_dir() else []
    if not entries:
        raise CheckpointError(f"nothing to resume: no checkpoint under {str(root)!r}")
    skipped: list[str] = []
    for entry in reversed(entries):
        try:
            state, params, opt = load(root / entry["name"])  # checks the index's SHA-256 of state.json too
        except CheckpointError as err:
            skipped.append(f"{entry['name']}: {err}")
            continue
        return state, params, opt, skipped
    raise CheckpointError(f"no checkpoint under {str(root)!r} verifies; the newest: {skipped[0]}")


def rebuild_index(root: Path) -> tuple[list[dict[str, Any]], list[str]]:
    """Write ``root/index.json`` anew from the step folders under ``root`` that verify (:func:`load`), when it is
    missing: (the entries written, the folders refused with why). Nothing is written when none verifies.

    The SHA-256 of each state.json is taken as found (the lost index cannot vouch for it: with a key configured each
    folder's HMAC tag still does); the best-model mark goes to the step the newest state's tracker names.
    """
    entries, refused = [], []
    for folder in sorted(root.glob("step-*"), key=_step_of):
        if not (folder.is_dir() and STEP_FOLDER.fullmatch(folder.name)):
            continue
        try:
            state, _, _ = load(folder)
        except CheckpointError as err:
            refused.append(f"{folder.name}: {err}")
            continue
        entries.append({"name": folder.name, "step": state["step"], "epoch": state["epoch"], "written": utc_now(),
                        "state_sha256": sha256(folder / "state.json"), "_best": state.get("best")})
    best = _get(entries[-1]["_best"], "step") if entries else None
    for entry in entries:
        if entry.pop("_best") is not None and entry["step"] == best:
            entry["best"] = True
    if entries:
        write_index(root, entries)
    return entries, refused


def check_compatible(job: Job, shapes: dict[str, tuple[int, ...]], optimizer_shapes: dict[str, tuple[int, ...]],
                     state: dict[str, Any], params: dict, opt: dict) -> None:
    """Refuse a checkpoint (``state``, ``params``, ``opt`` as :func:`load` returns them) that another model,
    optimizer or job trajectory wrote, naming what differs. ``job``, ``shapes`` (W0, b0, …) and
    ``optimizer_shapes`` (full size, as saved) describe the run that resumes."""
    if state.get("job_digest") != job.digest():
        diffs = job.trajectory_differences(state.get("job", {}))
        given = state.get("overrides") or []
        hint = (f"; it was written by a run with --set {' --set '.join(given)}" if given != list(job.overrides)
                else "")
        raise CheckpointError("checkpoint belongs to another job (its job digest differs"
                              + (f"; changed: {', '.join(diffs)}" if diffs else "") + f"{hint})")
    for name, shape in shapes.items():
        if name not in params or params[name].shape != shape:
            got = params[name].shape if name in params else "missing"
            raise CheckpointError(f"checkpoint tensor {name} has shape {got}; the model needs {shape}")
    for name, shape in optimizer_shapes.items():
        if name not in opt or opt[name].shape != shape:
            raise CheckpointError(f"checkpoint optimizer state {name!r} is missing or has the wrong shape")
    extra = sorted(set(opt) - set(optimizer_shapes))
    if extra:
        raise CheckpointError(f"checkpoint optimizer state holds {_short(', '.join(extra))}, which this job's "
                              f"optimizer does not keep (it keeps {', '.join(optimizer_shapes) or 'nothing'})")


def write_final(path: Path, state: TrainingState) -> None:
    """``final.npz`` (or ``best.npz``): W0, b0, …, input_mean, input_inv_std (and target_mean, target_std when the
    targets were standardised), and as JSON strings (0-d unicode
    arrays): ``model_json`` (the [model] table), ``job_json`` (the whole resolved job), ``job_digest``,
    ``feature_names_json`` (a list of input column names, or null), ``categories_json`` (with categorical inputs:
    [{column, vocabulary, width}, …]) and ``step`` (an int64 scalar); with a checkpoint key configured,
    ``manifest_hmac`` (64 hex digits: the HMAC-SHA-256 of every other member, :func:`check_model_tag`)."""
    arrays = model_arrays(state)
    arrays["model_json"] = np.array(json.dumps(state.job.as_dict()["model"]))
    arrays["job_json"] = np.array(json.dumps(state.job.as_dict()))
    arrays["job_digest"] = np.array(state.job.digest())
    arrays["feature_names_json"] = np.array(json.dumps(state.feature_names))
    if state.categories:
        arrays["categories_json"] = np.array(json.dumps(state.categories))
    arrays["step"] = np.array(state.step, dtype=np.int64)
    key = configured_key()
    if key is not None:
        arrays[MODEL_TAG] = np.array(hmac_sha256(key, _model_manifest(arrays)))
    tmp = path.with_name(f".{path.name}.tmp-{os.getpid()}")
    _write_npz(tmp, arrays)
    os.replace(tmp, path)
