"""Logged training metrics against an independent computation: the regression RMSE of a training step.

Data: scikit-learn's bundled diabetes set (442 rows, 10 features, one target). The expected RMSE is computed here
with numpy alone from the initial weights: the network written out as tanh(X W0 + b0) W1 + b1 on the step's rows.
"""

from __future__ import annotations

import json
import math

import numpy as np
import pytest
from shardmill.config import job_from_dict
from shardmill.training.trainer import Trainer
from sklearn.datasets import load_diabetes


@pytest.mark.parametrize("reduction", ["fast", "exact"])
def test_training_rmse_of_a_regression_step_is_the_rmse_of_its_batch(tmp_path, reduction):
    X, y = load_diabetes(return_X_y=True)  # scikit-learn's bundled copy of Efron et al. 2004's data
    np.save(tmp_path / "x.npy", X)
    np.save(tmp_path / "y.npy", (y - y.mean()) / y.std())
    job = job_from_dict({"model": {"layers": [10, 8, 1], "activation": "tanh", "loss": "squared_error",
                                   "dtype": "float64"},
                         "data": {"inputs": str(tmp_path / "x.npy"), "targets": str(tmp_path / "y.npy"),
                                  "validation_fraction": 0.0},
                         "optimizer": {"method": "sgd", "learning_rate": 0.01},
                         "run": {"global_batch": 64, "reduction": reduction, "exact_chunk": 16}})
    trainer = Trainer(job)
    W0, b0, W1, b1 = (trainer.model.named(trainer.model.params)[k].copy() for k in ("W0", "b0", "W1", "b1"))
    rows = trainer.sampler.batch(0, 0)
    trainer.timer.start()
    trainer.step(0, 0)
    logged = trainer.summarise(trainer.take_train_sums())["rmse"]
    inputs = (X[rows] - trainer.data.mean) * trainer.data.inv_std  # the run's own standardisation of its rows
    predicted = np.tanh(inputs @ W0 + b0) @ W1 + b1
    expected = math.sqrt(np.mean((predicted[:, 0] - trainer.data.targets[rows, 0]) ** 2))  # RMSE, common practice
    assert logged > 0.0
    assert logged == pytest.approx(expected, rel=1e-12)


def _job(tmp_path, epochs: int = 3):
    X, y = load_diabetes(return_X_y=True)
    np.save(tmp_path / "x.npy", X)
    np.save(tmp_path / "y.npy", (y - y.mean()) / y.std())
    return job_from_dict({"model": {"layers": [10, 8, 1], "activation": "tanh", "loss": "squared_error",
                                    "dtype": "float64"},
                          "data": {"inputs": str(tmp_path / "x.npy"), "targets": str(tmp_path / "y.npy")},
                          "optimizer": {"method": "sgd", "learning_rate": 0.01},
                          "run": {"global_batch": 128, "epochs": epochs, "workdir": str(tmp_path / "run")}})


def test_each_epoch_line_is_printed_as_its_epoch_ends(tmp_path, capsys, monkeypatch):
    from shardmill.training import loop as trainer_module

    job = _job(tmp_path)
    real_step = trainer_module.Trainer.step

    def step(self, epoch, in_epoch):  # the run dies in its second epoch, as a preempted job would
        if epoch == 1:
            raise RuntimeError("stopped in epoch 2")
        real_step(self, epoch, in_epoch)

    monkeypatch.setattr(trainer_module.Trainer, "step", step)
    with pytest.raises(RuntimeError, match="epoch 2"):
        trainer_module.train(job, progress=False, echo=True)
    lines = capsys.readouterr().out.splitlines()
    assert len(lines) == 1 and lines[0].startswith("epoch=1 step=3 ")  # already out before the failure
    start, record = (json.loads(line) for line in (tmp_path / "run" / "metrics.jsonl").read_text().splitlines())
    assert start["kind"] == "start" and start["resumed_from_step"] == 0 and start["job_digest"] == job.digest()
    # the console mirrors metrics.jsonl's own field paths
    assert f"train.rmse={record['train']['rmse']:.4f}" in lines[0]
    assert f"validation.loss={record['validation']['loss']:.4f}" in lines[0]


def test_without_a_bar_a_heartbeat_says_where_the_run_is(tmp_path, capsys, monkeypatch):
    from shardmill.training import console, loop

    monkeypatch.setattr(console, "HEARTBEAT_S", 0.0)  # every step
    loop.train(_job(tmp_path, epochs=1), progress=False, echo=True)
    beats = [line for line in capsys.readouterr().out.splitlines() if line.startswith("step")]
    assert beats and all("samples/s" in line and "s left" in line for line in beats)
    assert beats[0].split()[1] == "1/3"  # 442 − ⌊0.1·442⌋ = 398 training rows in batches of 128: 3 steps


def test_a_used_workdir_is_refused_unless_resumed_or_started_fresh(tmp_path):
    from helpers import run_cli, write_job

    X, y = load_diabetes(return_X_y=True)
    np.save(tmp_path / "x.npy", X)
    np.save(tmp_path / "y.npy", (y - y.mean()) / y.std())
    job = write_job(tmp_path, {"layers": [10, 4, 1], "loss": "squared_error"}, {"global_batch": 64, "epochs": 2},
                    {"method": "sgd", "learning_rate": 0.01}, {"inputs": "x.npy", "targets": "y.npy"})
    assert run_cli(["train", str(job), "--no-progress"]).returncode == 0
    again = run_cli(["train", str(job), "--no-progress"])
    assert again.returncode == 2 and "Traceback" not in again.stderr  # a user error: one line, exit 2
    assert "holds an earlier run" in again.stderr and "--resume" in again.stderr and "--fresh" in again.stderr
    metrics = tmp_path / "run" / "metrics.jsonl"
    assert len(metrics.read_text().splitlines()) == 3  # start + 2 epochs: nothing appended by the refused run
    assert run_cli(["train", str(job), "--no-progress", "--fresh"]).returncode == 0
    kinds = [(r["kind"], r.get("epoch")) for r in map(json.loads, metrics.read_text().splitlines())]
    assert kinds == [("start", None), ("epoch", 1), ("epoch", 2)]  # the earlier run's records are gone


def test_pruning_removes_exactly_the_folders_the_index_no_longer_lists(tmp_path):
    from shardmill.checkpoint import prune

    for step in (7, 99_999_999, 100_000_000):  # as names, 'step-100000000' sorts before 'step-99999999'
        (tmp_path / f"step-{step:08d}").mkdir()
    prune(tmp_path, {"step-00000007", "step-100000000"})  # e.g. the best one and the newest
    assert sorted(p.name for p in tmp_path.iterdir()) == ["step-00000007", "step-100000000"]


def test_the_index_keeps_the_newest_by_step_number_not_by_name(tmp_path):
    import json as _json

    from shardmill import checkpoint
    from shardmill.training.trainer import Trainer

    trainer = Trainer(_job(tmp_path, epochs=1))
    root = tmp_path / "ckpt"
    for step in (99_999_999, 100_000_000):  # as names, 'step-100000000' sorts before 'step-99999999'
        checkpoint.save(trainer.training_state(step), root, keep=1)
    assert sorted(p.name for p in root.glob("step-*")) == ["step-100000000"]
    index = _json.loads((root / "index.json").read_text())
    assert [entry["step"] for entry in index["checkpoints"]] == [100_000_000]


def test_a_full_disk_during_a_checkpoint_is_one_line_naming_the_last_good_one(tmp_path, monkeypatch):
    import errno

    from shardmill import checkpoint
    from shardmill.errors import LocalJobError
    from shardmill.training.loop import train

    job = _job(tmp_path, epochs=2)
    job.run.save_every = 1
    real = checkpoint._write_npz
    calls = {"n": 0}

    def filling_up(path, arrays):
        calls["n"] += 1
        if calls["n"] > 4:  # two checkpoints fit, the third does not
            raise OSError(errno.ENOSPC, "No space left on device")
        real(path, arrays)

    monkeypatch.setattr(checkpoint, "_write_npz", filling_up)
    with pytest.raises(LocalJobError) as caught:
        train(job, progress=False)
    message = str(caught.value)  # run_guarded prints it as one line and ends every rank (exit 2)
    assert "cannot be written" in message and "No space left on device" in message
    assert "the last complete checkpoint is step-00000002" in message
    assert (tmp_path / "run" / "checkpoints" / "step-00000002" / "state.json").is_file()  # still intact


def test_compile_fills_the_cache_without_the_data(tmp_path):
    from helpers import run_cli, write_job

    # The data files do not exist: `compile` runs the job's kernels on made-up rows of the same shapes.
    job = write_job(tmp_path, {"layers": [10, 8, 1], "activation": "gelu", "loss": "squared_error"},
                    {"global_batch": 32}, {"method": "adamw", "learning_rate": 0.01},
                    {"inputs": "missing-x.npy", "targets": "missing-y.npy"})
    proc = run_cli(["compile", str(job)], timeout=300)
    assert proc.returncode == 0, proc.stderr[-2000:]
    assert "float32, gelu, squared_error, adamw, fast mode ready in" in proc.stdout
    assert not (tmp_path / "run").exists()  # nothing trained, nothing written


def test_checkpoints_by_default_at_each_epoch_end_and_by_the_clock(tmp_path):
    from shardmill.training.loop import train

    job = _job(tmp_path, epochs=3)  # 3 steps per epoch
    job.run.keep_checkpoints = 100
    train(job, progress=False)
    root = tmp_path / "run" / "checkpoints"
    assert sorted(p.name for p in root.glob("step-*")) == ["step-00000003", "step-00000006", "step-00000009"]

    (tmp_path / "timed").mkdir()
    timed = _job(tmp_path / "timed", epochs=1)
    timed.run.keep_checkpoints, timed.run.save_every, timed.run.save_minutes = 100, 1000, 1e-9  # due every step
    train(timed, progress=False)
    names = sorted(p.name for p in (tmp_path / "timed" / "run" / "checkpoints").glob("step-*"))
    assert names == ["step-00000001", "step-00000002", "step-00000003"]


def test_an_interrupted_checkpoint_write_is_cleaned_up_when_the_next_job_starts(tmp_path):
    from shardmill.parallel.comm import Comm
    from shardmill.training.workdir import WorkdirLock as _WorkdirLock

    stale = tmp_path / "run" / "checkpoints" / ".tmp-step-00000009-12345"
    stale.mkdir(parents=True)
    (stale / "params.npz").write_bytes(b"half a file")
    with _WorkdirLock(tmp_path / "run", Comm()):  # the first thing train does, before any step or save
        assert not stale.exists()


def test_the_checkpoint_index_lists_the_kept_checkpoints_and_refuses_damage(tmp_path):
    import hashlib

    from shardmill import checkpoint
    from shardmill.training.loop import train

    job = _job(tmp_path, epochs=4)  # a checkpoint at each of the 4 epoch ends; 3 kept
    train(job, progress=False)
    root = tmp_path / "run" / "checkpoints"
    index = json.loads((root / "index.json").read_text())
    assert [e["name"] for e in index["checkpoints"]] == ["step-00000006", "step-00000009", "step-00000012"]
    for entry in index["checkpoints"]:  # hashlib's SHA-256 of each state.json, as the index records it
        assert entry["state_sha256"] == hashlib.sha256((root / entry["name"] / "state.json").read_bytes()).hexdigest()
    assert sorted(p.name for p in root.glob("step-*")) == [e["name"] for e in index["checkpoints"]]
    # An index edited by hand (its list no longer matches its checksum) is refused, in one line.
    index["checkpoints"] = index["checkpoints"][:1]
    (root / "index.json").write_text(json.dumps(index))
    with pytest.raises(checkpoint.CheckpointError, match="index .* is damaged"):
        checkpoint.latest_name(root)
    # A folder from before the index, with a one-line `latest` pointer, still resumes.
    (root / "index.json").unlink()
    (root / "latest").write_text("step-00000012\n")
    assert checkpoint.resolve(tmp_path / "run") == root / "step-00000012"
    job.run.epochs = 5
    train(job, resume=True, progress=False)
    assert checkpoint.latest_name(root) == "step-00000015" and not (root / "latest").exists()


def test_a_first_run_says_it_is_compiling_before_it_does(tmp_path, capsys, monkeypatch):
    from shardmill import machine
    from shardmill.training import console, loop

    cache = tmp_path / "cache"
    cache.mkdir()
    monkeypatch.setattr(machine, "numba_cache_dir", lambda: str(cache))
    assert not console.kernels_cached()  # an empty cache: nothing compiled yet
    loop.train(_job(tmp_path, epochs=1), progress=False, echo=True)
    assert capsys.readouterr().out.splitlines()[0].startswith("compiling kernels for float64 (first run only")
    (cache / "kernels").mkdir()
    (cache / "kernels" / "optim.adam-50.py311.nbi").write_bytes(b"")  # Numba's index file of a cached kernel
    assert console.kernels_cached()
    (tmp_path / "again").mkdir()
    loop.train(_job(tmp_path / "again", epochs=1), progress=False, echo=True)
    assert not any(line.startswith("compiling") for line in capsys.readouterr().out.splitlines())
