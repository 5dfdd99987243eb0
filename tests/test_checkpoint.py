"""Checkpoints: resume reproduces the uninterrupted run, a killed write leaves the index usable, damaged or foreign
checkpoints are refused, and the files are plain numpy archives with honest checksums.

One ``mpi_scripts/ckpt_train.py`` run at P = 2 trains the straight and interrupted runs in-process; the resume at
P = 3 and the resumes after a kill go through the ``shardmill train --resume`` command line.
"""

from __future__ import annotations

import hashlib
import json
import math
import shutil
import zipfile
from pathlib import Path

import numpy as np
import pytest
from helpers import make_classification, run_cli, run_mpi, write_job
from shardmill import checkpoint
from shardmill.checkpoint import CheckpointError
from shardmill.config import job_from_dict, load_job
from shardmill.training.trainer import Trainer

pytestmark = pytest.mark.mpi

SCRIPTS = Path(__file__).parent / "mpi_scripts"
LAYERS = [6, 16, 8, 3]
NAMES = ["W0", "b0", "W1", "b1", "W2", "b2"]
G, CHUNK, EPOCHS, STEPS_PER_EPOCH = 48, 12, 3, 4  # 240 rows, 20 % validation: 192 training rows
STEPS = EPOCHS * STEPS_PER_EPOCH
COSINE_ADAM = {"method": "adam", "learning_rate": 0.01, "schedule": "cosine", "warmup": 2}
CONSTANT_ADAM = {"method": "adam", "learning_rate": 0.01}


def tables(data: Path, workdir: str, reduction: str = "exact", optimizer: dict | None = None, **run) -> dict:
    return {"model": {"layers": LAYERS, "activation": "relu", "loss": "softmax_cross_entropy", "dtype": "float64"},
            "data": {"inputs": str(data / "x.npy"), "targets": str(data / "y.npy"), "validation_fraction": 0.2},
            "optimizer": dict(optimizer or COSINE_ADAM),
            "run": {"epochs": EPOCHS, "global_batch": G, "seed": 2, "reduction": reduction, "exact_chunk": CHUNK,
                    "workdir": str(data / workdir), **run}}


def job_file(folder: Path, raw: dict) -> Path:
    folder.mkdir(parents=True, exist_ok=True)
    return write_job(folder, raw["model"], raw["run"], raw["optimizer"], raw["data"])


def final_arrays(workdir: Path) -> dict[str, np.ndarray]:
    with np.load(workdir / "final.npz", allow_pickle=False) as archive:
        return {name: archive[name] for name in NAMES}


def digest(arrays: dict[str, np.ndarray]) -> str:
    h = hashlib.sha256()
    for name in NAMES:
        h.update(np.ascontiguousarray(arrays[name]).tobytes())
    return h.hexdigest()


@pytest.fixture(scope="module")
def data_dir(tmp_path_factory) -> Path:
    path = tmp_path_factory.mktemp("checkpoint")
    make_classification(path, rows=240, features=6, classes=3, seed=21)
    return path


@pytest.fixture(scope="module")
def runs(data_dir: Path) -> dict[str, dict]:
    """The P = 2 trainings: straight runs, half runs (run.max_steps) and their resumes, one process."""
    d = data_dir
    half = {"max_steps": STEPS // 2}
    sequence = [
        ("exact_straight", tables(d, "exact-straight", save_every=4), False),
        ("exact_half", tables(d, "exact-resumed", **half), False),
        ("exact_resume", tables(d, "exact-resumed"), True),
        ("exact_half_for_p3", tables(d, "exact-p2-then-p3", **half), False),
        ("sharded_half_for_p3", tables(d, "sharded-p2-then-p3", update="sharded", **half), False),
        ("sharded_half_for_p1", tables(d, "sharded-p2-then-p1", update="sharded", **half), False),
        ("fast_straight", tables(d, "fast-straight", "fast"), False),
        ("fast_half", tables(d, "fast-resumed", "fast", **half), False),
        ("fast_resume", tables(d, "fast-resumed", "fast"), True),
        ("constant_3_epochs", tables(d, "raised", optimizer=CONSTANT_ADAM), False),
        ("constant_raised_to_5", tables(d, "raised", optimizer=CONSTANT_ADAM, epochs=5), True),
        ("constant_straight_5", tables(d, "straight-5", optimizer=CONSTANT_ADAM, epochs=5), False),
    ]
    spec = d / "spec.json"
    spec.write_text(json.dumps({"base": str(d), "runs": [{"name": n, "job": j, "resume": r}
                                                         for n, j, r in sequence]}))
    out = d / "out.json"
    proc = run_mpi(2, [str(SCRIPTS / "ckpt_train.py"), str(spec), str(out)], timeout=240)
    assert proc.returncode == 0, proc.stderr[-3000:]
    result = json.loads(out.read_text())["runs"]
    for name, run in result.items():
        assert len(set(run["sha256_by_rank"])) == 1, name  # both ranks hold the same parameters
    return result


# ---------------------------------------------------------------- resume reproduces the uninterrupted run


def test_exact_resume_is_bit_identical(runs: dict, data_dir: Path) -> None:
    assert runs["exact_half"]["steps"] == STEPS // 2 and runs["exact_resume"]["steps"] == STEPS
    assert runs["exact_resume"]["sha256_by_rank"] == runs["exact_straight"]["sha256_by_rank"]
    assert digest(final_arrays(data_dir / "exact-resumed")) == digest(final_arrays(data_dir / "exact-straight"))
    # The half run really stopped halfway: its parameters differ from the final ones.
    assert runs["exact_half"]["sha256_by_rank"] != runs["exact_straight"]["sha256_by_rank"]
    # run.max_steps stops the run without shortening the schedule: the learning rate of update 6 (t = 5) is
    # the cosine of the full 12 steps after 2 warm-up steps (Loshchilov & Hutter 2017, without restarts).
    records = [json.loads(line) for line in (data_dir / "exact-resumed" / "metrics.jsonl").read_text().splitlines()]
    at_half = [r for r in records if r.get("step") == STEPS // 2 and "learning_rate" in r]
    expected = 0.01 * 0.5 * (1 + math.cos(math.pi * (5 - 2) / (STEPS - 2)))
    assert at_half and all(math.isclose(r["learning_rate"], expected, rel_tol=1e-12) for r in at_half)


def test_fast_resume_within_1e12(runs: dict, data_dir: Path) -> None:
    straight, resumed = final_arrays(data_dir / "fast-straight"), final_arrays(data_dir / "fast-resumed")
    for name in NAMES:
        np.testing.assert_allclose(resumed[name], straight[name], rtol=0, atol=1e-12, err_msg=name)


def test_exact_resume_on_more_processes_is_bit_identical(runs: dict, data_dir: Path) -> None:
    job = job_file(data_dir / "p3-job", tables(data_dir, "exact-p2-then-p3"))
    proc = run_mpi(3, ["-m", "shardmill", "train", str(job), "--resume", "--no-progress"], timeout=120)
    assert proc.returncode == 0, proc.stderr[-3000:]
    assert f"done: {STEPS} steps on 3 process(es)" in proc.stdout
    assert digest(final_arrays(data_dir / "exact-p2-then-p3")) == digest(final_arrays(data_dir / "exact-straight"))
    state = json.loads((checkpoint.resolve(data_dir / "exact-p2-then-p3") / "state.json").read_text())
    assert state["step"] == STEPS and state["processes"] == 3


def test_sharded_state_resumes_at_any_P_and_either_update_bit_identically(runs: dict, data_dir: Path) -> None:
    # Saved by a sharded update at P = 2 (rank 0 owns 256 of the 275 parameters, rank 1 the other 19): the
    # optimizer state is gathered to full size, one layout whatever P and the update were.
    _, params, opt = checkpoint.load(checkpoint.resolve(data_dir / "sharded-p2-then-p3"))
    n_params = sum(params[name].size for name in NAMES)
    assert set(opt) == {"m", "v"} and all(a.shape == (n_params,) for a in opt.values())
    for folder, processes, update in (("sharded-p2-then-p3", 3, "sharded"), ("sharded-p2-then-p1", 1, "replicated")):
        job = job_file(data_dir / f"{folder}-job", tables(data_dir, folder, update=update))
        args = ["-m", "shardmill", "train", str(job), "--resume", "--no-progress"]
        proc = run_mpi(processes, args, timeout=120) if processes > 1 else run_cli(args[2:], timeout=120)
        assert proc.returncode == 0, proc.stderr[-3000:]
        # Exact mode: the same bits as the uninterrupted replicated run at P = 2 (README, fast and exact reduction).
        assert digest(final_arrays(data_dir / folder)) == digest(final_arrays(data_dir / "exact-straight")), folder


def test_raised_epochs_continue_to_the_new_end(runs: dict, data_dir: Path) -> None:
    assert runs["constant_3_epochs"]["steps"] == STEPS
    assert runs["constant_raised_to_5"]["steps"] == 5 * STEPS_PER_EPOCH
    # With a constant learning rate the longer job's first 12 steps are the shorter job's, so continuing
    # must land on the straight 5-epoch run exactly (exact mode).
    assert runs["constant_raised_to_5"]["sha256_by_rank"] == runs["constant_straight_5"]["sha256_by_rank"]
    state = json.loads((checkpoint.resolve(data_dir / "raised") / "state.json").read_text())
    assert (state["step"], state["epoch"]) == (20, 5)
    epochs = [json.loads(line)["epoch"] for line in (data_dir / "raised" / "metrics.jsonl").read_text().splitlines()
              if '"epoch"' in line and '"train"' in line]
    assert epochs == [1, 2, 3, 4, 5]


# ---------------------------------------------------------------- a write killed halfway


def test_kill_during_second_checkpoint_leaves_latest_loadable(runs: dict, data_dir: Path) -> None:
    raw = tables(data_dir, "killed", save_every=4)
    job = job_file(data_dir / "killed-job", raw)
    proc = run_mpi(2, [str(SCRIPTS / "ckpt_kill.py"), str(job)], timeout=120)
    assert proc.returncode not in (0, 3), "the process was not killed during the checkpoint write"
    root = data_dir / "killed" / "checkpoints"
    assert checkpoint.latest_name(root) == "step-00000004"  # the index still names the first checkpoint
    state, params, opt = checkpoint.load(checkpoint.resolve(data_dir / "killed"))
    assert state["step"] == 4 and set(NAMES) <= set(params) and set(opt) == {"m", "v"}
    assert not (root / "step-00000008").exists()
    partial = list(root.glob(".tmp-step-00000008-*/params.npz"))
    assert len(partial) == 1 and partial[0].stat().st_size > 0  # the kill came mid-write, not before it
    with pytest.raises(zipfile.BadZipFile):  # half a zip archive: its central directory (at the end) is gone
        np.load(partial[0], allow_pickle=False)
    # Resuming after the crash (on one process: exact mode does not care) reproduces the straight run.
    proc = run_cli(["train", str(job), "--resume", "--no-progress"], timeout=120)
    assert proc.returncode == 0, proc.stderr[-3000:]
    assert digest(final_arrays(data_dir / "killed")) == digest(final_arrays(data_dir / "exact-straight"))


# ---------------------------------------------------------------- refusals


@pytest.fixture
def damaged(runs: dict, data_dir: Path, tmp_path: Path):
    """A copy of the straight exact run's workdir and a job file pointing at it: returns (workdir, raw job)."""
    workdir = tmp_path / "copy"
    shutil.copytree(data_dir / "exact-straight", workdir)
    return workdir, tables(data_dir, str(workdir))


def _refused_by_api(raw: dict, pattern: str) -> None:
    trainer = Trainer(job_from_dict(raw))
    with pytest.raises(CheckpointError, match=pattern):
        trainer.resume()


def _refused_by_cli(folder: Path, raw: dict, fragment: str, processes: int = 1) -> None:
    job = job_file(folder, raw)
    if processes == 1:
        proc = run_cli(["train", str(job), "--resume", "--no-progress"], timeout=120)
    else:
        proc = run_mpi(processes, ["-m", "shardmill", "train", str(job), "--resume", "--no-progress"], timeout=120)
    assert proc.returncode == 2, proc.stderr[-3000:]  # user errors exit 2 (DEVELOPERS.md, conventions)
    assert fragment in proc.stderr
    assert proc.stderr.count("shardmill: error:") == 1 and "Traceback" not in proc.stderr


def _every_checkpoint(workdir: Path) -> list[Path]:
    root = workdir / "checkpoints"
    return [root / entry["name"] for entry in checkpoint.read_index(root)]


def test_flipped_byte_is_refused(damaged, tmp_path: Path) -> None:
    workdir, raw = damaged
    assert len(_every_checkpoint(workdir)) > 1
    for folder in _every_checkpoint(workdir):  # every checkpoint damaged: nothing to fall back on
        path = folder / "params.npz"
        data = bytearray(path.read_bytes())
        data[len(data) // 2] ^= 0x01
        path.write_bytes(bytes(data))
    with pytest.raises(CheckpointError, match=r"params\.npz' is corrupted or truncated: SHA-256"):
        checkpoint.load(checkpoint.resolve(workdir))
    _refused_by_api(raw, r"no checkpoint under .* verifies; the newest: step-\d+: .*params\.npz' is corrupted")
    _refused_by_cli(tmp_path / "job-p2", raw, "params.npz' is corrupted or truncated", processes=2)


def test_truncated_optimizer_state_is_refused(damaged, tmp_path: Path) -> None:
    workdir, raw = damaged
    for folder in _every_checkpoint(workdir):
        path = folder / "optimizer.npz"
        data = path.read_bytes()
        path.write_bytes(data[: len(data) // 2])
    _refused_by_api(raw, r"optimizer\.npz' is corrupted or truncated")
    _refused_by_cli(tmp_path / "job", raw, "optimizer.npz' is corrupted or truncated")


def test_a_damaged_newest_checkpoint_resumes_from_the_one_before(damaged, data_dir: Path, tmp_path: Path) -> None:
    workdir, raw = damaged
    newest, before = _every_checkpoint(workdir)[-1], _every_checkpoint(workdir)[-2]
    path = newest / "params.npz"
    data = bytearray(path.read_bytes())
    data[len(data) // 2] ^= 0x01
    path.write_bytes(bytes(data))
    (workdir / "final.npz").unlink()
    proc = run_cli(["train", str(job_file(tmp_path / "job", raw)), "--resume", "--no-progress"], timeout=120)
    assert proc.returncode == 0, proc.stderr[-3000:]
    assert f"skipping a damaged checkpoint, {newest.name}: checkpoint file" in proc.stderr
    starts = [json.loads(line) for line in (workdir / "metrics.jsonl").read_text().splitlines()
              if json.loads(line)["kind"] == "start"]
    assert starts[-1]["resumed_from_step"] == int(before.name.removeprefix("step-"))
    # exact mode: the replayed steps give the straight run's parameters bit for bit
    assert digest(final_arrays(workdir)) == digest(final_arrays(data_dir / "exact-straight"))


@pytest.mark.parametrize("change, field", [
    ({"model": {"layers": [6, 16, 3]}}, "model.layers"),
    ({"optimizer": {"method": "momentum", "learning_rate": 0.01}}, "optimizer.method"),
    ({"optimizer": {**COSINE_ADAM, "learning_rate": 0.02}}, "optimizer.learning_rate"),
])
def test_checkpoint_of_another_job_is_refused(damaged, tmp_path: Path, change: dict, field: str) -> None:
    workdir, raw = damaged
    for section, values in change.items():
        raw[section] = {**raw[section], **values} if section == "model" else values
    ours = job_from_dict(raw)
    state = json.loads((checkpoint.resolve(workdir) / "state.json").read_text())
    assert ours.digest() != state["job_digest"]
    _refused_by_api(raw, rf"belongs to another job \(its job digest differs; changed: {field}")
    _refused_by_cli(tmp_path / "job", raw, f"changed: {field}")


def test_nothing_to_resume_is_refused(data_dir: Path, tmp_path: Path) -> None:
    raw = tables(data_dir, str(tmp_path / "empty"))
    _refused_by_api(raw, "nothing to resume")


# ---------------------------------------------------------------- the files themselves


def test_checkpoint_files_are_plain_numpy_with_true_checksums(runs: dict, data_dir: Path) -> None:
    job = load_job(job_file(data_dir / "format-job", tables(data_dir, "exact-straight", save_every=4)))
    root = data_dir / "exact-straight" / "checkpoints"
    assert checkpoint.latest_name(root) == f"step-{STEPS:08d}"
    n_params = sum(a * b + b for a, b in zip(LAYERS[:-1], LAYERS[1:], strict=True))
    for step in (4, 8, 12):
        folder = root / f"step-{step:08d}"
        state = json.loads((folder / "state.json").read_text())
        assert (state["step"], state["epoch"]) == (step, step // STEPS_PER_EPOCH)
        assert state["job_digest"] == job.digest()
        for name in ("params.npz", "optimizer.npz"):
            # hashlib: SHA-256 of the file's bytes, computed here independently of the runtime.
            assert state["files"][name] == hashlib.sha256((folder / name).read_bytes()).hexdigest()
        with np.load(folder / "params.npz", allow_pickle=False) as params:
            for l, (fan_in, fan_out) in enumerate(zip(LAYERS[:-1], LAYERS[1:], strict=True)):
                assert params[f"W{l}"].shape == (fan_in, fan_out) and params[f"W{l}"].dtype == np.float64
                assert params[f"b{l}"].shape == (fan_out,)
            assert params["input_mean"].shape == params["input_inv_std"].shape == (LAYERS[0],)
            if step == STEPS:
                final = final_arrays(data_dir / "exact-straight")
                for name in NAMES:
                    assert np.array_equal(params[name], final[name]), name
        with np.load(folder / "optimizer.npz", allow_pickle=False) as opt:
            assert set(opt.files) == {"m", "v"}
            assert opt["m"].shape == opt["v"].shape == (n_params,)
            assert np.all(opt["v"] >= 0)  # Kingma & Ba 2015, Algorithm 1: v is an average of squares
    # The input standardisation stored is the training rows' mean (computed here with numpy).
    X = np.load(data_dir / "x.npy")
    train_rows = Trainer(job).data.split.train
    with np.load(root / f"step-{STEPS:08d}" / "params.npz", allow_pickle=False) as params:
        np.testing.assert_allclose(params["input_mean"], X[train_rows].mean(axis=0), rtol=1e-12, atol=1e-12)
        np.testing.assert_allclose(params["input_inv_std"], 1 / X[train_rows].std(axis=0), rtol=1e-9)
