"""Standardised regression targets (``data.standardize_targets``): the network trains on (t − mean) / std per
output, and every metric, prediction and the exported model answer in the targets' own units.

References: scikit-learn's bundled diabetes data set (target standard deviation ≈ 77, mean ≈ 152) and its
``root_mean_squared_error`` for the RMSE of the predictions in the targets' units; numpy's mean and (population)
standard deviation for the statistics; onnxruntime running the exported graph. That a target of large scale trains
worse raw than standardised at the same budget is common practice (the input standardisation's argument, applied
to the output).
"""

from __future__ import annotations

import json
from pathlib import Path

import numpy as np
import onnxruntime
import pytest
import shardmill as sm
from helpers import run_cli, write_job
from shardmill.checkpoint import CheckpointError
from shardmill.commands.export import export_onnx, model_card
from shardmill.data.rows import split_rows
from shardmill.model.predictor import load_model
from sklearn.datasets import load_diabetes
from sklearn.metrics import root_mean_squared_error

SEED = 3
FRACTION = 0.2


def _data(folder: Path, outputs: int = 1) -> tuple[np.ndarray, np.ndarray]:
    X, y = load_diabetes(return_X_y=True)
    if outputs == 2:  # a second output on another scale (std ≈ 4,800): the body-mass column × 10⁵
        y = np.column_stack([y, 1e5 * X[:, 2]])
    folder.mkdir(parents=True, exist_ok=True)
    np.save(folder / "x.npy", X)
    np.save(folder / "y.npy", y)
    return X, y


def _job(folder: Path, *, loss: str = "squared_error", outputs: int = 1, epochs: int = 6, scale: bool = True,
         output: str = "auto", max_steps: int = 0, reduction: str = "fast") -> Path:
    model = {"layers": [10, 16, outputs], "activation": "tanh", "loss": loss, "dtype": "float64",
             "output": output}
    data = {"inputs": "x.npy", "targets": "y.npy", "validation_fraction": FRACTION, "standardize_targets": scale}
    run = {"epochs": epochs, "global_batch": 32, "seed": SEED, "workdir": "run", "max_steps": max_steps,
           "reduction": reduction}
    return write_job(folder, model, run, optimizer={"method": "adam", "learning_rate": 0.01}, data=data)


def _last_epoch(folder: Path) -> dict:
    records = [json.loads(line) for line in (folder / "run" / "metrics.jsonl").read_text().splitlines()]
    return [r for r in records if r.get("kind") == "epoch"][-1]


@pytest.fixture(scope="module")
def trained(tmp_path_factory) -> dict:
    folder = tmp_path_factory.mktemp("scaled")
    X, y = _data(folder, outputs=2)
    result = sm.train(sm.load_job(_job(folder, outputs=2)), progress=False)
    return {"folder": folder, "X": X, "y": y, "result": result, "split": split_rows(len(y), FRACTION, SEED)}


def test_the_statistics_are_numpys_mean_and_std_of_the_training_targets(trained) -> None:
    predictor = load_model(trained["folder"] / "run" / "final.npz")
    train_targets = trained["y"][trained["split"].train]
    # numpy's mean and population standard deviation (ddof = 0) over the training rows, per output
    np.testing.assert_array_equal(predictor.target_mean, train_targets.mean(axis=0))
    np.testing.assert_allclose(predictor.target_std, train_targets.std(axis=0), rtol=1e-15)
    assert predictor.target_std[1] > 10 * predictor.target_std[0]  # the two outputs have scales far apart


def test_logged_rmse_is_scikit_learns_rmse_of_the_predictions_in_the_targets_units(trained) -> None:
    predictor = load_model(trained["folder"] / "run" / "final.npz")
    rows = trained["split"].validation
    predicted = predictor.predict(trained["X"][rows])
    logged = _last_epoch(trained["folder"])["validation"]["rmse"]
    # scikit-learn root_mean_squared_error(multioutput="uniform_average") is the mean of per-output RMSEs; ours is
    # √(Σ over every output / (n·k)), which is scikit-learn's RMSE of the flattened arrays
    expected = root_mean_squared_error(trained["y"][rows].ravel(), predicted.ravel())
    assert logged == pytest.approx(expected, rel=1e-9)
    assert logged > 10  # the targets' units (the standardised error would be below 1)


def test_predict_command_reports_rmse_in_units_and_the_loss_as_trained(trained, tmp_path) -> None:
    folder, rows = trained["folder"], trained["split"].validation
    np.save(tmp_path / "xv.npy", trained["X"][rows])
    np.save(tmp_path / "yv.npy", trained["y"][rows])
    out = run_cli(["predict", str(folder / "run" / "final.npz"), str(tmp_path / "xv.npy"), "--out",
                   str(tmp_path / "o.npy"), "--targets", str(tmp_path / "yv.npy")])
    assert out.returncode == 0, out.stderr
    reported = json.loads(out.stdout.splitlines()[-1])
    logged = _last_epoch(folder)["validation"]
    # the same rows, the same model: predict's numpy references agree with training's kernels
    assert reported["rmse"] == pytest.approx(logged["rmse"], rel=1e-9)
    assert reported["loss"] == pytest.approx(logged["loss"], rel=1e-9)
    np.testing.assert_allclose(np.load(tmp_path / "o.npy"), load_model(folder / "run" / "final.npz").predict(
        trained["X"][rows]), rtol=0, atol=0)


def test_onnx_graph_ends_in_the_targets_units(trained, tmp_path) -> None:
    predictor = load_model(trained["folder"] / "run" / "final.npz")
    export_onnx(predictor, tmp_path / "m.onnx")
    session = onnxruntime.InferenceSession(str(tmp_path / "m.onnx"), providers=["CPUExecutionProvider"])
    X = trained["X"][:50]
    (got,) = session.run(None, {"inputs": X})
    # onnxruntime: the same float64 operations in the same order as Predictor.unscale
    np.testing.assert_allclose(got, predictor.predict(X), rtol=1e-13, atol=1e-9)
    card = model_card(predictor, trained["folder"] / "run" / "final.npz")
    assert card["output"]["target_scaling"]["std"] == predictor.target_std.tolist()


def test_standardised_targets_train_better_than_raw_at_the_same_budget(tmp_path) -> None:
    rmse = {}
    for scale in (True, False):
        folder = tmp_path / str(scale)
        _data(folder)
        sm.train(sm.load_job(_job(folder, scale=scale)), progress=False)
        rmse[scale] = _last_epoch(folder)["validation"]["rmse"]
    # common practice: a target of mean ≈ 152 and std ≈ 77 is far from the N(0, 1)-scale outputs an initialised
    # network gives; raw, six epochs of Adam at 0.01 move the output bias by about 0.01 per step, so it stays far off
    assert rmse[True] < 0.5 * rmse[False]


@pytest.mark.parametrize("loss, output", [("softmax_cross_entropy", "auto"), ("poisson", "auto"),
                                          ("squared_error", "sigmoid")])
def test_labels_counts_and_bounded_outputs_are_not_scaled(tmp_path, loss, output) -> None:
    X, y = load_diabetes(return_X_y=True)
    targets = {"softmax_cross_entropy": (y > 140).astype(np.int64), "poisson": np.round(y / 30.0),
               "squared_error": (y - y.min()) / (y.max() - y.min())}[loss]
    np.save(tmp_path / "x.npy", X)
    np.save(tmp_path / "y.npy", targets)
    outputs = 2 if loss == "softmax_cross_entropy" else 1
    sm.train(sm.load_job(_job(tmp_path, loss=loss, outputs=outputs, epochs=1, output=output)), progress=False)
    predictor = load_model(tmp_path / "run" / "final.npz")
    assert predictor.target_mean is None and predictor.target_std is None
    with np.load(tmp_path / "run" / "final.npz", allow_pickle=False) as archive:
        assert "target_std" not in archive.files


def test_resume_refuses_targets_that_scale_otherwise(tmp_path) -> None:
    _, y = _data(tmp_path)
    job = _job(tmp_path, epochs=2, max_steps=5)
    sm.train(sm.load_job(job), progress=False)
    np.save(tmp_path / "y.npy", y * 2.0)  # other targets: other statistics; the job (and its digest) unchanged
    with pytest.raises(CheckpointError, match="targets scaled otherwise") as err:
        sm.train(sm.load_job(job.with_name("job.toml")), progress=False, resume=True)
    assert "standard deviation" in str(err.value)


def test_exact_mode_resume_gives_the_uninterrupted_bits(tmp_path) -> None:
    whole, halves = tmp_path / "whole", tmp_path / "halves"
    for folder in (whole, halves):
        _data(folder, outputs=2)
    sm.train(sm.load_job(_job(whole, outputs=2, epochs=2, reduction="exact")), progress=False)
    sm.train(sm.load_job(_job(halves, outputs=2, epochs=2, max_steps=7, reduction="exact")), progress=False)
    sm.train(sm.load_job(_job(halves, outputs=2, epochs=2, reduction="exact")), progress=False, resume=True)
    # the exactness model: a resume replays the same sums, so the final parameters are the same bits
    with np.load(whole / "run" / "final.npz") as a, np.load(halves / "run" / "final.npz") as b:
        for name in ("W0", "b0", "W1", "b1", "target_mean", "target_std"):
            np.testing.assert_array_equal(a[name], b[name])


@pytest.mark.mpi
def test_exact_bits_for_every_process_count_and_a_resume_at_another(tmp_path) -> None:
    from helpers import run_mpi

    def job(folder: Path, max_steps: int = 0) -> Path:
        _data(folder, outputs=2)
        path = _job(folder, outputs=2, epochs=3, reduction="exact", max_steps=max_steps)
        text = path.read_text().replace("[data]", '[data]\nsplit = "last"')  # and the time-order split
        path.write_text(text.replace("[run]", "[run]\nexact_chunk = 8"))  # 4 chunks of the batch of 32
        return path

    digests = set()
    for P in (1, 2, 3):
        folder = tmp_path / f"p{P}"
        done = run_mpi(P, ["-m", "shardmill", "train", str(job(folder)), "--no-progress"], timeout=180)
        assert done.returncode == 0, done.stderr[-2000:]
        with np.load(folder / "run" / "final.npz") as saved:
            digests.add(b"".join(saved[k].tobytes() for k in ("W0", "b0", "W1", "b1", "target_mean", "target_std")))
    assert len(digests) == 1  # the exactness model: the same bits for every P
    stopped = tmp_path / "stopped"
    assert run_mpi(2, ["-m", "shardmill", "train", str(job(stopped, max_steps=9)), "--no-progress"]).returncode == 0
    text = (stopped / "job.toml").read_text().replace("max_steps = 9", "max_steps = 0")
    (stopped / "job.toml").write_text(text)
    resumed = run_mpi(3, ["-m", "shardmill", "train", str(stopped / "job.toml"), "--resume", "--no-progress"],
                      timeout=180)
    assert resumed.returncode == 0, resumed.stderr[-2000:]
    with np.load(stopped / "run" / "final.npz") as saved:
        assert b"".join(saved[k].tobytes() for k in ("W0", "b0", "W1", "b1", "target_mean", "target_std")) in digests
