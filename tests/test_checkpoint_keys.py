"""The optional checkpoint key (an HMAC-SHA-256 tag over each checkpoint's manifest and each model file) and the
index rebuilt from the step folders that verify.

References: RFC 4231 (HMAC-SHA-256 test vectors), RFC 2104 (HMAC) through Python's hmac module as the independent
computation of a tag, and the checkpoint's own layout (state.json records every file's SHA-256).
"""

from __future__ import annotations

import hashlib
import hmac
import json
from pathlib import Path

import numpy as np
import pytest
from helpers import make_classification, run_cli, write_job
from shardmill import checkpoint
from shardmill.checkpoint import CheckpointError, TrainingState
from shardmill.checkpointkey import KEY_ENV, KEY_FILE_ENV, configured_key, hmac_sha256
from shardmill.config import job_from_dict
from shardmill.errors import JobError

KEY = "00112233445566778899aabbccddeeff00112233445566778899aabbccddeeff"
OTHER_KEY = "ff" * 32

# RFC 4231, section 4: (key, data, HMAC-SHA-256) of test cases 1, 2, 3 and 6 (a key longer than the block size)
RFC4231 = [
    (bytes.fromhex("0b" * 20), b"Hi There",
     "b0344c61d8db38535ca8afceaf0bf12b881dc200c9833da726e9376c2e32cff7"),
    (b"Jefe", b"what do ya want for nothing?",
     "5bdcc146bf60754e6a042426089575c75a003f089d2739839dec58b964ec3843"),
    (bytes.fromhex("aa" * 20), bytes.fromhex("dd" * 50),
     "773ea91e36800e46854db8ebd09181a72959098b3ef8c122d9635514ced565fe"),
    (bytes.fromhex("aa" * 131), b"Test Using Larger Than Block-Size Key - Hash Key First",
     "60e431591ee0b67f0d8a26aacbf5b77f8e0bc6213728c5140546040f0ee37f54"),
]


@pytest.mark.parametrize("key, data, expected", RFC4231)
def test_the_tag_is_hmac_sha256(key: bytes, data: bytes, expected: str) -> None:
    assert hmac_sha256(key, data) == expected  # RFC 4231, section 4 (test cases 1, 2, 3, 6)


def _state(step: int, workdir: Path) -> TrainingState:
    """A small checkpoint state, 3 → 4 → 2, Adam's two arrays (no training needed to test the files)."""
    job = job_from_dict({"model": {"layers": [3, 4, 2], "dtype": "float64"},
                         "data": {"inputs": "x.npy", "targets": "y.npy"}, "run": {"workdir": str(workdir)},
                         "optimizer": {"method": "adam"}})
    rng = np.random.default_rng(step)
    params = {"W0": rng.normal(size=(3, 4)), "b0": rng.normal(size=4), "W1": rng.normal(size=(4, 2)),
              "b1": rng.normal(size=2)}
    return TrainingState(params=params, input_mean=np.zeros(3), input_inv_std=np.ones(3),
                         optimizer={"m": np.zeros(26), "v": np.zeros(26)}, optimizer_updates=step, step=step,
                         steps_per_epoch=4, processes=1, job=job, layers=[3, 4, 2], dtype="float64")


@pytest.fixture
def keyed(tmp_path: Path, monkeypatch) -> Path:
    """A checkpoints folder with steps 4 and 8 written under KEY (kept configured), and final.npz beside it."""
    monkeypatch.setenv(KEY_ENV, KEY)
    root = tmp_path / "checkpoints"
    for step in (4, 8):
        checkpoint.save(_state(step, tmp_path), root, keep=3)
    checkpoint.write_final(tmp_path / "final.npz", _state(8, tmp_path))
    return root


def test_a_keyed_checkpoint_carries_the_hmac_of_its_state(keyed: Path) -> None:
    folder = keyed / "step-00000008"
    tag = json.loads((folder / checkpoint.TAG_FILE).read_text())["tag"]
    message = b"shardmill-checkpoint-manifest-1\0" + (folder / "state.json").read_bytes()
    assert tag == hmac.new(bytes.fromhex(KEY), message, hashlib.sha256).hexdigest()  # RFC 2104 via Python's hmac
    state, params, _ = checkpoint.load(folder)
    assert state["step"] == 8 and params["W0"].shape == (3, 4)


def test_a_manifest_rewritten_without_the_key_is_refused(keyed: Path) -> None:
    """Params of step 4 put into step 8, every SHA-256 recomputed (state.json's and the index's): only the key
    can tell."""
    folder = keyed / "step-00000008"
    (folder / "params.npz").write_bytes((keyed / "step-00000004" / "params.npz").read_bytes())
    state = json.loads((folder / "state.json").read_text())
    state["files"]["params.npz"] = checkpoint.sha256(folder / "params.npz")
    (folder / "state.json").write_text(json.dumps(state, indent=1))
    entries = checkpoint.read_index(keyed)
    entries[-1]["state_sha256"] = checkpoint.sha256(folder / "state.json")
    checkpoint.write_index(keyed, entries)
    with pytest.raises(CheckpointError, match="does not match its HMAC tag"):
        checkpoint.load(folder)
    tag = json.loads((folder / checkpoint.TAG_FILE).read_text())
    tag["tag"] = hmac_sha256(bytes.fromhex(OTHER_KEY), b"shardmill-checkpoint-manifest-1\0"
                             + (folder / "state.json").read_bytes())  # signed with another key
    (folder / checkpoint.TAG_FILE).write_text(json.dumps(tag))
    with pytest.raises(CheckpointError, match="does not match its HMAC tag"):
        checkpoint.load(folder)


def test_a_checkpoint_without_a_tag_is_refused_while_a_key_is_configured(keyed: Path, monkeypatch) -> None:
    (keyed / "step-00000008" / checkpoint.TAG_FILE).unlink()
    with pytest.raises(CheckpointError, match=r"carries no HMAC tag \(manifest.hmac\)") as caught:
        checkpoint.load(keyed / "step-00000008")
    assert "\n" not in str(caught.value)
    monkeypatch.delenv(KEY_ENV)  # without a key the checksums alone are checked
    assert checkpoint.load(keyed / "step-00000008")[0]["step"] == 8


def test_a_model_file_is_tagged_and_checked(keyed: Path, monkeypatch) -> None:
    from shardmill.model.predictor import load_model

    final = keyed.parent / "final.npz"
    assert load_model(final).step == 8
    with np.load(final, allow_pickle=False) as archive:
        arrays = {k: archive[k] for k in archive.files}
    arrays["W1"] = arrays["W1"] * 2  # a rewritten model file: the tag no longer matches
    np.savez(final, **arrays)
    with pytest.raises(CheckpointError, match="do not match its HMAC tag"):
        load_model(final)
    del arrays[checkpoint.MODEL_TAG]
    np.savez(final, **arrays)
    with pytest.raises(CheckpointError, match="carries no HMAC tag"):
        load_model(final)
    monkeypatch.delenv(KEY_ENV)
    assert load_model(final).step == 8


@pytest.mark.parametrize("env, words", [
    ({KEY_ENV: "not hex"}, "hexadecimal digits"),
    ({KEY_ENV: "abcd"}, "2 bytes; at least 16"),
    ({KEY_ENV: KEY, KEY_FILE_ENV: "k"}, "not both"),
    ({KEY_FILE_ENV: "/nonexistent/key"}, "cannot be read"),
])
def test_a_key_that_cannot_be_used_is_refused_without_showing_it(env: dict, words: str, monkeypatch) -> None:
    for name, value in env.items():
        monkeypatch.setenv(name, value)
    with pytest.raises(JobError, match=words) as caught:
        configured_key()
    assert "\n" not in str(caught.value) and KEY not in str(caught.value)


def test_a_key_file_is_read(tmp_path: Path, monkeypatch) -> None:
    (tmp_path / "key").write_text(KEY + "\n")
    monkeypatch.setenv(KEY_FILE_ENV, str(tmp_path / "key"))
    assert configured_key() == bytes.fromhex(KEY)


def test_the_index_is_rebuilt_from_the_folders_that_verify(tmp_path: Path) -> None:
    root = tmp_path / "checkpoints"
    for step in (4, 8, 12):
        checkpoint.save(_state(step, tmp_path), root, keep=3)
    (root / checkpoint.INDEX).unlink()
    (root / "step-00000012" / "optimizer.npz").write_bytes(b"damaged")
    entries, refused = checkpoint.rebuild_index(root)
    assert [e["name"] for e in entries] == ["step-00000004", "step-00000008"]
    assert len(refused) == 1 and refused[0].startswith("step-00000012")
    assert checkpoint.latest_name(root) == "step-00000008"


@pytest.fixture(scope="module")
def trained(tmp_path_factory) -> Path:
    """A workdir trained 2 epochs of 4 steps (checkpoints at steps 4 and 8)."""
    folder = tmp_path_factory.mktemp("rebuild")
    make_classification(folder, rows=120)
    write_job(folder, {"layers": [6, 8, 3], "activation": "tanh", "dtype": "float64"},
              {"epochs": 2, "global_batch": 20, "seed": 1})
    done = run_cli(["train", "job.toml", "--no-progress"], cwd=folder)
    assert done.returncode == 0, done.stderr
    return folder


def test_a_resume_without_index_rebuilds_it_and_leaves_no_temporary_index(trained: Path) -> None:
    root = trained / "run" / "checkpoints"
    (root / checkpoint.INDEX).unlink()
    (root / f".{checkpoint.INDEX}.tmp-999999").write_text("{}")  # left by a write killed before its rename
    done = run_cli(["train", "job.toml", "--no-progress", "--resume", "--set", "run.epochs=3"], cwd=trained)
    assert done.returncode == 0, done.stderr
    notes = [line for line in done.stderr.splitlines() if "rebuilt it from the 2 step folder(s) that verify" in line]
    assert len(notes) == 1, done.stderr
    assert checkpoint.latest_name(root) == "step-00000012"
    assert not list(root.glob(".*.tmp-*"))


def test_a_bad_key_stops_training_before_it_starts(trained: Path, monkeypatch) -> None:
    monkeypatch.setenv(KEY_ENV, "12")
    done = run_cli(["train", "job.toml", "--no-progress", "--resume", "--set", "run.epochs=9"], cwd=trained)
    assert done.returncode == 2 and "Traceback" not in done.stderr, done.stderr
    assert f"{KEY_ENV} holds a key of 1 bytes" in done.stderr


def test_a_keyed_run_resumes_and_an_unkeyed_one_is_refused_under_a_key(trained: Path, tmp_path: Path,
                                                                       monkeypatch) -> None:
    monkeypatch.setenv(KEY_ENV, KEY)
    done = run_cli(["train", "job.toml", "--no-progress", "--resume", "--set", "run.epochs=9"], cwd=trained)
    assert done.returncode == 2 and "Traceback" not in done.stderr, done.stderr
    assert "carries no HMAC tag (manifest.hmac)" in done.stderr and len(done.stderr.strip().splitlines()) == 1
    for name in ("x.npy", "y.npy", "job.toml"):
        (tmp_path / name).write_bytes((trained / name).read_bytes())
    done = run_cli(["train", "job.toml", "--no-progress", "--set", "run.epochs=1"], cwd=tmp_path)
    assert done.returncode == 0, done.stderr
    done = run_cli(["train", "job.toml", "--no-progress", "--resume", "--set", "run.epochs=2"], cwd=tmp_path)
    assert done.returncode == 0, done.stderr
    assert (tmp_path / "run" / "checkpoints" / "step-00000008" / checkpoint.TAG_FILE).is_file()
    done = run_cli(["saves", "run"], cwd=tmp_path)
    assert done.returncode == 0 and "FAILED" not in done.stdout, done.stdout
    monkeypatch.setenv(KEY_ENV, OTHER_KEY)
    done = run_cli(["saves", "run"], cwd=tmp_path)
    assert done.returncode == 3 and done.stdout.count("match its HMAC tag") == 3, done.stdout
