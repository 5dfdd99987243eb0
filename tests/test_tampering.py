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
