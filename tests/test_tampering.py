"""Checkpoints damaged with their checksums recomputed (what a tool, a script or a person rewriting a file does) are
refused in one line naming what is wrong, never read as another model and never a traceback.

References: the checkpoint's own invariants (one optimizer update per step; epoch and step within it from the step
and the steps per epoch; the job digest of the recorded job), zipfile's CRC-32 check (Python standard library) and
numpy's refusal of object arrays without pickle.
"""

from __future__ import annotations

import hashlib
import json
import zipfile
from pathlib import Path

import numpy as np
import pytest
from helpers import make_classification, run_cli, write_job
from shardmill import checkpoint
from shardmill.checkpoint import CheckpointError


@pytest.fixture(scope="module")
def saved(tmp_path_factory) -> Path:
    """A workdir with a checkpoint of step 8 (2 epochs of 4 steps: 96 training rows, 20 a step)."""
    folder = tmp_path_factory.mktemp("tamper")
    make_classification(folder, rows=120)
    job = write_job(folder, {"layers": [6, 8, 3], "activation": "tanh", "dtype": "float64"},
                    {"epochs": 2, "global_batch": 20, "seed": 1}, optimizer={"method": "adam", "learning_rate": 0.01})
    done = run_cli(["train", str(job), "--no-progress"], cwd=folder)
    assert done.returncode == 0, done.stderr
    return folder


def _copy(saved: Path, tmp_path: Path) -> Path:
    """A copy of the newest checkpoint directory, to damage."""
    source = checkpoint.resolve(saved / "run")
    target = tmp_path / source.name
    target.mkdir()
    for path in source.iterdir():
        (target / path.name).write_bytes(path.read_bytes())
    return target


def _edit_state(directory: Path, edit) -> None:
    state = json.loads((directory / "state.json").read_text())
    edit(state)
    (directory / "state.json").write_text(json.dumps(state))


def _rewrite_npz(directory: Path, name: str, edit) -> None:
    """Rewrite an .npz through ``edit(arrays)`` (which may replace the file's bytes itself), then recompute the
    checksum state.json records, as a tool that rewrites files would."""
    path = directory / name
    with np.load(path, allow_pickle=False) as archive:
        arrays = {k: archive[k] for k in archive.files}
    if edit(arrays) is not False:
        np.savez(path, **arrays)
    digest = hashlib.sha256(path.read_bytes()).hexdigest()
    _edit_state(directory, lambda state: state["files"].__setitem__(name, digest))


def _flip_a_byte(path: Path) -> bool:
    data = bytearray(path.read_bytes())
    with zipfile.ZipFile(path) as archive:
        info = archive.infolist()[0]
    data[info.header_offset + 30 + len(info.filename) + info.extra.__len__() + 200] ^= 0xFF  # inside W's values
    path.write_bytes(bytes(data))
    return False


def _add_member(path: Path, name: str, data: bytes) -> bool:
    with zipfile.ZipFile(path, "a") as archive:
        archive.writestr(name, data)
    return False


def _truncate(path: Path) -> bool:
    path.write_bytes(path.read_bytes()[: path.stat().st_size // 2])
    return False


def _move_step(state: dict) -> None:
    """Step 8 made step 4 in every counter that agrees with it (epoch, step in epoch, optimizer updates)."""
    state.update(step=4, epoch=1, step_in_epoch=0, optimizer_updates=4)


CASES = {
    "flipped byte": (lambda d: _rewrite_npz(d, "params.npz", lambda a: _flip_a_byte(d / "params.npz")),
                     "cannot be read"),
    "not a zip": (lambda d: _rewrite_npz(d, "params.npz", lambda a: (d / "params.npz").write_text("hello") and False),
                  "cannot be read"),
    "object array": (lambda d: _rewrite_npz(d, "optimizer.npz",
                                            lambda a: (np.savez(d / "optimizer.npz",
                                                                m=np.array([1, "x"], dtype=object)), False)[1]),
                     "cannot be read"),
    "complex weight": (lambda d: _rewrite_npz(d, "params.npz", lambda a: a.__setitem__("W0", a["W0"] + 0j)),
                       "not real floating-point"),
    "no input mean": (lambda d: _rewrite_npz(d, "params.npz", lambda a: a.pop("input_mean")), "lacks input_mean"),
    "step text": (lambda d: _edit_state(d, lambda s: s.__setitem__("step", "abc")), "`step` must be a whole number"),
    "step null": (lambda d: _edit_state(d, lambda s: s.__setitem__("step", None)), "`step` must be a whole number"),
    "step negative": (lambda d: _edit_state(d, lambda s: s.__setitem__("step", -5)), "`step` must be a whole number"),
    "step moved": (lambda d: _edit_state(d, lambda s: s.__setitem__("step", 9)), "disagrees with its epoch"),
    "files a list": (lambda d: _edit_state(d, lambda s: s.__setitem__("files", [])), "`files` must map"),
    "updates negative": (lambda d: _edit_state(d, lambda s: s.__setitem__("optimizer_updates", -1)),
                         "`optimizer_updates` must be a whole number"),
    "updates moved": (lambda d: _edit_state(d, lambda s: s.__setitem__("optimizer_updates", 15)),
                      "15 optimizer updates for 8 steps"),
    "activation edited": (lambda d: _edit_state(d, lambda s: s["job"]["model"].__setitem__("activation", ["relu"])),
                          "does not match its recorded digest"),
    "layers edited": (lambda d: _edit_state(d, lambda s: s["job"]["model"].__setitem__("layers", [6, 8, 4])),
                      "does not match its recorded digest"),
    "loss edited": (lambda d: _edit_state(d, lambda s: s["job"]["model"].__setitem__("loss", "huber")),
                    "does not match its recorded digest"),
    "step moved with its counters": (lambda d: _edit_state(d, _move_step), "disagrees with its folder's name"),
    "updates plus five": (lambda d: _edit_state(d, lambda s: s.__setitem__("optimizer_updates", 13)),
                          "13 optimizer updates for 8 steps"),
    "text member": (lambda d: _rewrite_npz(d, "params.npz", lambda a: _add_member(d / "params.npz", "notes.txt",
                                                                                    b"hello")),
                    "is not a numpy array of its own"),
    "truncated zip": (lambda d: _rewrite_npz(d, "params.npz", lambda a: _truncate(d / "params.npz")),
                      "cannot be read"),
    "array no model has": (lambda d: _rewrite_npz(d, "params.npz", lambda a: a.__setitem__("X9", np.zeros(2))),
                           "'X9' no model has"),
    "bias reshaped": (lambda d: _rewrite_npz(d, "params.npz", lambda a: a.__setitem__("b0", np.zeros(7))),
                      "tensor b0 has shape (7,)"),
    "optimizer in float32": (lambda d: _rewrite_npz(d, "optimizer.npz",
                                                    lambda a: a.__setitem__("m", a["m"].astype(np.float32))),
                             "optimizer state 'm' is float32"),
    "layers text": (lambda d: _edit_state(d, lambda s: s.__setitem__("layers", "abc")), "`layers` must list"),
}


@pytest.mark.parametrize("case", list(CASES))
def test_a_damaged_checkpoint_is_refused_in_one_line(saved: Path, tmp_path: Path, case: str) -> None:
    directory = _copy(saved, tmp_path)
    damage, words = CASES[case]
    damage(directory)
    with pytest.raises(CheckpointError) as caught:
        checkpoint.load(directory)
    assert words in str(caught.value) and "\n" not in str(caught.value)
    done = run_cli(["predict", str(directory), str(saved / "x.npy"), "--out", str(tmp_path / "p.npy")])
    assert done.returncode == 2 and "Traceback" not in done.stderr and words in done.stderr, done.stderr


def test_the_untouched_checkpoint_loads(saved: Path, tmp_path: Path) -> None:
    state, params, opt = checkpoint.load(_copy(saved, tmp_path))
    assert state["step"] == 8 and "W0" in params and opt


def test_a_resume_skips_a_state_that_the_index_does_not_know(saved: Path, tmp_path: Path) -> None:
    work = tmp_path / "work"
    (work / "run").mkdir(parents=True)
    for name in ("x.npy", "y.npy", "job.toml"):
        (work / name).write_bytes((saved / name).read_bytes())
    root = saved / "run" / "checkpoints"
    (work / "run" / "checkpoints").mkdir()
    for entry in checkpoint.read_index(root):
        target = work / "run" / "checkpoints" / entry["name"]
        target.mkdir()
        for path in (root / entry["name"]).iterdir():
            (target / path.name).write_bytes(path.read_bytes())
    checkpoint.write_index(work / "run" / "checkpoints", checkpoint.read_index(root))
    newest = checkpoint.resolve(work / "run")
    # an edit that keeps state.json consistent and recomputes nothing but the index cannot vouch for it
    _edit_state(newest, lambda s: s.__setitem__("processes", 7))
    done = run_cli(["train", str(work / "job.toml"), "--no-progress", "--resume", "--set", "run.epochs=3"],
                   cwd=work)
    assert done.returncode == 0, done.stderr
    assert "skipping a damaged checkpoint" in done.stderr and "SHA-256 the index records" in done.stderr


def _copy_root(saved: Path, tmp_path: Path) -> Path:
    """A copy of the whole checkpoints folder (index and step folders), to damage."""
    root = saved / "run" / "checkpoints"
    target = tmp_path / "checkpoints"
    for path in root.rglob("*"):
        if path.is_file():
            (target / path.relative_to(root)).parent.mkdir(parents=True, exist_ok=True)
            (target / path.relative_to(root)).write_bytes(path.read_bytes())
    return target


def test_params_copied_from_another_step_are_refused_by_the_index(saved: Path, tmp_path: Path) -> None:
    root = _copy_root(saved, tmp_path)
    names = [entry["name"] for entry in checkpoint.read_index(root)]
    assert len(names) >= 2
    older, newest = root / names[-2], root / names[-1]
    # a valid archive of another step, its checksum recomputed in state.json: only the index's SHA-256 tells
    _rewrite_npz(newest, "params.npz", lambda a: (newest / "params.npz").write_bytes(
        (older / "params.npz").read_bytes()) and False)
    with pytest.raises(CheckpointError, match="does not match the SHA-256 the index records"):
        checkpoint.load(newest)
    done = run_cli(["predict", str(newest), str(saved / "x.npy"), "--out", str(tmp_path / "p.npy")])
    assert done.returncode == 2 and "SHA-256 the index records" in done.stderr, done.stderr


@pytest.mark.parametrize("step, words", [("abc", "entry 2's `step` must be the whole number"),
                                         (None, "entry 2's `step` must be the whole number"),
                                         (4, "entry 2's `step` must be the whole number of its folder")])
def test_an_index_entry_with_a_wrong_step_is_refused(saved: Path, tmp_path: Path, step, words: str) -> None:
    root = _copy_root(saved, tmp_path)
    entries = checkpoint.read_index(root)
    entries[1]["step"] = step
    checkpoint.write_index(root, entries)  # the index's own checksum recomputed
    with pytest.raises(CheckpointError, match=words) as caught:
        checkpoint.read_index(root)
    assert "\n" not in str(caught.value)


def test_an_index_that_is_a_folder_is_refused(saved: Path, tmp_path: Path) -> None:
    root = _copy_root(saved, tmp_path)
    (root / checkpoint.INDEX).unlink()
    (root / checkpoint.INDEX).mkdir()
    with pytest.raises(CheckpointError, match="is not a file"):
        checkpoint.read_index(root)
