"""The best model and early stopping (run.best_metric, run.patience, run.min_improvement), and `shardmill saves`.

References: the validation loss of the kept best model is recomputed with an independent NumPy forward pass and
scikit-learn's log_loss; the patience rule is the common practice of stopping after `patience` epochs in a row
without an improvement larger than a threshold; checkpoint checksums are recomputed with hashlib (standard library).
"""

from __future__ import annotations

import hashlib
import json
from pathlib import Path

import numpy as np
import pytest
import scipy.special
from helpers import run_cli, write_job
from shardmill.config import job_from_dict
from shardmill.errors import JobError
from shardmill.training.best import BestTracker
from shardmill.training.loop import train
from shardmill.training.trainer import Trainer
from sklearn.datasets import load_wine
from sklearn.metrics import log_loss


@pytest.mark.parametrize(("metric", "values", "patience", "delta", "best_at", "stop_at"), [
    # common practice: stop after `patience` epoch ends in a row without an improvement larger than `delta`
    ("validation.loss", [1.0, 0.8, 0.79, 0.85, 0.9], 2, 0.05, 2, 4),  # 0.79 is not 0.05 better than 0.8
    ("validation.loss", [1.0, 0.8, 0.79, 0.85, 0.9], 2, 0.0, 3, 5),
    ("validation.accuracy", [0.5, 0.7, 0.7, 0.71, 0.6, 0.6], 3, 0.0, 4, None),  # higher is better; a tie is no gain
    ("validation.rmse", [3.0, float("nan"), 2.0, 2.5], 0, 0.0, 3, None),  # patience 0: never stops
])
def test_the_tracker_keeps_the_best_and_counts_epochs_without_one(metric, values, patience, delta, best_at, stop_at):
    tracker = BestTracker(metric, patience, delta)
    stopped = None
    for epoch, value in enumerate(values, start=1):
        tracker.update(value, epoch, step=10 * epoch)
        if tracker.should_stop and stopped is None:
            stopped = epoch
    assert tracker.epoch == best_at and tracker.step == 10 * best_at and tracker.value == values[best_at - 1]
    assert stopped == stop_at
    again = BestTracker(metric, patience, delta, state=tracker.state())  # as a resume reads it from a checkpoint
    assert again.state() == tracker.state()


def test_a_best_metric_the_job_cannot_measure_is_refused():
    base = {"model": {"layers": [4, 3]}}
    with pytest.raises(JobError, match="`run.best_metric` must be one of validation.loss, validation.accuracy"):
        job_from_dict({**base, "run": {"best_metric": "validation.rmse"}})
    with pytest.raises(JobError, match="needs validation rows"):
        job_from_dict({**base, "data": {"validation_fraction": 0.0}, "run": {"best_metric": "validation.loss"}})
    with pytest.raises(JobError, match="`run.patience` = 3 needs `run.best_metric`"):
        job_from_dict({**base, "run": {"patience": 3}})


def _wine_job(folder: Path, **run) -> dict:
    X, y = load_wine(return_X_y=True)  # scikit-learn's bundled copy of the UCI wine data
    np.save(folder / "x.npy", X)
    np.save(folder / "y.npy", y.astype(np.int64))
    return {"model": {"layers": [13, 16, 3], "activation": "tanh", "dtype": "float64"},
            "data": {"inputs": str(folder / "x.npy"), "targets": str(folder / "y.npy"), "validation_fraction": 0.3},
            "optimizer": {"method": "adam", "learning_rate": 0.05},
            "run": {"epochs": 40, "global_batch": 16, "seed": 3, "workdir": str(folder / "run"),
                    "best_metric": "validation.loss", "patience": 3, "keep_checkpoints": 1, **run}}


def _forward(npz: Path, X: np.ndarray) -> np.ndarray:
    """softmax(tanh(X̃ W0 + b0) W1 + b1), X̃ standardised with the stored statistics (independent of shardmill)."""
    with np.load(npz, allow_pickle=False) as a:
        hidden = np.tanh((X - a["input_mean"]) * a["input_inv_std"] @ a["W0"] + a["b0"])
        return scipy.special.softmax(hidden @ a["W1"] + a["b1"], axis=1)  # scipy.special.softmax


@pytest.fixture(scope="module")
def stopped(tmp_path_factory):
    folder = tmp_path_factory.mktemp("best")
    raw = _wine_job(folder)
    result = train(job_from_dict(raw), progress=False)
    return folder, raw, result


def test_early_stopping_keeps_the_best_model_and_says_so(stopped):
    folder, raw, result = stopped
    records = [json.loads(line) for line in (folder / "run" / "metrics.jsonl").read_text().splitlines()]
    epochs = [r for r in records if r["kind"] == "epoch"]
    losses = [r["validation"]["loss"] for r in epochs]
    best_epoch = int(np.argmin(losses)) + 1  # every later epoch was worse (min_improvement 0)
    assert result["stopped_early"] and len(epochs) == best_epoch + 3 < 40  # patience 3
    assert records[-1] == {"kind": "early_stop", "epoch": best_epoch + 3, "step": epochs[-1]["step"],
                           "metric": "validation.loss", "best_value": min(losses), "best_epoch": best_epoch,
                           "best_step": epochs[best_epoch - 1]["step"], "patience": 3}
    assert [r["best"]["improved"] for r in epochs][best_epoch:] == [False, False, False]
    # best.npz holds the model of the best epoch: its validation loss, recomputed independently (scikit-learn's
    # log_loss on a NumPy forward pass), is the minimum the run logged
    X, y = load_wine(return_X_y=True)
    rows = Trainer(job_from_dict(raw)).data.split.validation
    recomputed = log_loss(y[rows], _forward(folder / "run" / "best.npz", X[rows]), labels=[0, 1, 2])
    assert recomputed == pytest.approx(min(losses), rel=1e-9)
    final = log_loss(y[rows], _forward(folder / "run" / "final.npz", X[rows]), labels=[0, 1, 2])
    assert final == pytest.approx(losses[-1], rel=1e-9) and final > recomputed
    # the index marks the best checkpoint and keeps it beside the newest (keep_checkpoints = 1)
    index = json.loads((folder / "run" / "checkpoints" / "index.json").read_text())["checkpoints"]
    assert [(e["step"], bool(e.get("best"))) for e in index] == [(epochs[best_epoch - 1]["step"], True),
                                                                  (epochs[-1]["step"], False)]
    best_params = np.load(folder / "run" / "checkpoints" / index[0]["name"] / "params.npz")
    with np.load(folder / "run" / "best.npz") as best:
        assert all(np.array_equal(best_params[k], best[k]) for k in ("W0", "b0", "W1", "b1"))


def test_a_run_stopped_and_resumed_ends_where_the_uninterrupted_one_did(stopped, tmp_path):
    _, _, whole = stopped
    raw = _wine_job(tmp_path)
    first_leg = job_from_dict({**raw, "run": {**raw["run"], "max_steps": 3 * 8}})  # 124 rows / 16: 7 steps
    train(first_leg, progress=False)
    resumed = train(job_from_dict(raw), progress=False, resume=True)
    assert resumed["best"] == whole["best"] and resumed["stopped_early"]
    assert resumed["steps"] == whole["steps"]
    with np.load(tmp_path / "run" / "best.npz") as a, np.load(Path(whole["workdir"]) / "best.npz") as b:
        assert all(np.array_equal(a[k], b[k]) for k in ("W0", "b0", "W1", "b1"))  # bit for bit
    again = train(job_from_dict(raw), progress=False, resume=True)  # nothing left to do: it had stopped
    assert again["steps"] == whole["steps"] and again["history"] == []


def test_saves_lists_and_verifies_every_checkpoint(stopped, tmp_path):
    folder, _, _ = stopped
    done = run_cli(["saves", str(folder / "run"), "--json"])
    assert done.returncode == 0, done.stderr
    rows = json.loads(done.stdout)
    index = json.loads((folder / "run" / "checkpoints" / "index.json").read_text())["checkpoints"]
    assert [r["name"] for r in rows] == [e["name"] for e in index] + ["final.npz", "best.npz"]
    epochs = {r["step"]: r for r in map(json.loads, (folder / "run" / "metrics.jsonl").read_text().splitlines())
              if r["kind"] == "epoch"}
    for row in rows:
        assert row["verified"] is True
        assert row["validation_loss"] == epochs[row["step"]]["validation"]["loss"]
        path = folder / "run" / ("checkpoints/" + row["name"] if row["name"].startswith("step-") else row["name"])
        size = path.stat().st_size if path.is_file() else sum(p.stat().st_size for p in path.rglob("*"))
        assert row["bytes"] == size  # os.stat
    assert rows[0]["best"] and rows[1]["newest"]
    text = run_cli(["saves", str(folder / "run")]).stdout
    assert f"{index[0]['name']} (best)" in text and "verified" in text
    # a damaged checkpoint is named, and the command exits 3
    copy = tmp_path / "run"
    import shutil

    shutil.copytree(folder / "run", copy)
    params = copy / "checkpoints" / index[-1]["name"] / "params.npz"
    data = bytearray(params.read_bytes())
    data[len(data) // 2] ^= 0xFF
    params.write_bytes(bytes(data))
    assert hashlib.sha256(bytes(data)).hexdigest() != json.loads(
        (copy / "checkpoints" / index[-1]["name"] / "state.json").read_text())["files"]["params.npz"]  # hashlib
    damaged = run_cli(["saves", str(copy)])
    assert damaged.returncode == 3 and "FAILED: checkpoint file" in damaged.stdout
    missing = run_cli(["saves", str(tmp_path / "nothing")])
    assert missing.returncode == 2 and "holds no checkpoints" in missing.stderr


def test_train_prints_where_the_best_model_is(tmp_path):
    X, y = load_wine(return_X_y=True)  # scikit-learn's bundled copy of the UCI wine data
    np.save(tmp_path / "x.npy", X)
    np.save(tmp_path / "y.npy", y.astype(np.int64))
    job = write_job(tmp_path, {"layers": [13, 8, 3]}, {"global_batch": 32, "epochs": 2,
                                                       "best_metric": "validation.accuracy"})
    done = run_cli(["train", str(job), "--no-progress"])
    assert done.returncode == 0, done.stderr
    assert "the best (validation.accuracy = " in done.stdout and "best.npz" in done.stdout
    assert (tmp_path / "run" / "best.npz").is_file()


def test_a_resume_with_a_smaller_patience_stops_at_once_and_says_so(tmp_path):
    raw = _wine_job(tmp_path, patience=0)  # watch the metric, never stop
    train(job_from_dict({**raw, "run": {**raw["run"], "epochs": 12}}), progress=False)
    stale = json.loads((tmp_path / "run" / "metrics.jsonl").read_text().splitlines()[-1])["best"]["stale_epochs"]
    assert stale >= 2  # this run's validation loss stopped improving before epoch 10 (seen when written)
    again = train(job_from_dict({**raw, "run": {**raw["run"], "epochs": 12, "patience": 2}}), progress=False,
                  resume=True)
    assert again["stopped_early"] and again["history"][-1]["kind"] == "early_stop"
    assert again["history"][-1]["patience"] == 2 and again["steps"] == 12 * 7  # no step run; 125 rows / 16
    # a job that ends before the checkpoint's step is refused, naming the key to raise
    with pytest.raises(JobError, match=r"the checkpoint is at step 84, past this job's last step 35 "
                                       r"\(run.epochs = 5 of 7 steps\)"):
        train(job_from_dict({**raw, "run": {**raw["run"], "epochs": 5}}), progress=False, resume=True)


def test_a_refused_job_leaves_no_workdir_behind(tmp_path):
    raw = _wine_job(tmp_path)
    with pytest.raises(JobError, match="nothing to resume"):
        train(job_from_dict(raw), progress=False, resume=True)
    assert not (tmp_path / "run").exists()
    bad = {**raw, "data": {**raw["data"], "inputs": str(tmp_path / "missing.npy")}}
    with pytest.raises(JobError, match="does not exist"):
        train(job_from_dict(bad), progress=False)
    assert not (tmp_path / "run").exists()
