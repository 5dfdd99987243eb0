"""``shardmill predict``: outputs of a trained model equal an independent NumPy forward pass, from final.npz,
a checkpoint directory or the workdir, and the printed metrics equal scikit-learn's."""

from __future__ import annotations

import json
from pathlib import Path

import numpy as np
import pytest
import scipy.special
from helpers import make_classification, run_cli
from shardmill.config import job_from_dict
from shardmill.training.loop import train
from shardmill.training.trainer import Trainer
from sklearn.metrics import accuracy_score, log_loss

LAYERS = [6, 16, 8, 3]
STEPS = 8  # 2 epochs of G = 48 over 192 training rows


@pytest.fixture(scope="module")
def trained(tmp_path_factory) -> dict:
    """A model trained in this process (one rank), its workdir, the data and the training rows."""
    path = tmp_path_factory.mktemp("predict")
    x, y = make_classification(path, rows=240, features=6, classes=3, seed=13)
    job = job_from_dict({"model": {"layers": LAYERS, "activation": "relu", "dtype": "float64"},
                         "data": {"inputs": str(x), "targets": str(y), "validation_fraction": 0.2},
                         "optimizer": {"method": "adam", "learning_rate": 0.01},
                         "run": {"epochs": 2, "global_batch": 48, "seed": 6, "save_every": 4,
                                 "workdir": str(path / "run")}})
    result = train(job, progress=False)
    assert result["steps"] == STEPS
    return {"path": path, "x": x, "y": y, "model": result["model"], "workdir": path / "run",
            "train_rows": Trainer(job).data.split.train}


def numpy_forward(arrays: Path, X: np.ndarray, train_rows: np.ndarray) -> np.ndarray:
    """softmax(relu(relu(X̃ W0 + b0) W1 + b1) W2 + b2) with X̃ standardised by the training rows' mean and std."""
    mean, std = X[train_rows].mean(axis=0), X[train_rows].std(axis=0)  # numpy: population std (ddof 0)
    A = (X - mean) / std
    with np.load(arrays, allow_pickle=False) as archive:
        layers = [(archive[f"W{l}"], archive[f"b{l}"]) for l in range(len(LAYERS) - 1)]
    for l, (W, b) in enumerate(layers):
        Z = A @ W + b
        A = np.maximum(Z, 0.0) if l < len(layers) - 1 else Z
    return scipy.special.softmax(A, axis=1)  # scipy.special.softmax


def _predict(trained: dict, source: Path, name: str, targets: bool = True):
    out = trained["path"] / f"{name}.npy"
    args = ["predict", str(source), str(trained["x"]), "--out", str(out)]
    if targets:
        args += ["--targets", str(trained["y"])]
    proc = run_cli(args, timeout=120)
    assert proc.returncode == 0, proc.stderr[-3000:]
    return proc, np.load(out, allow_pickle=False)


def test_predict_from_final_matches_independent_forward_pass(trained: dict) -> None:
    proc, outputs = _predict(trained, trained["workdir"] / "final.npz", "from-final")
    X, y = np.load(trained["x"]), np.load(trained["y"])
    assert outputs.shape == (240, 3) and outputs.dtype == np.float64
    assert f"wrote 240 × 3 outputs to {trained['path'] / 'from-final.npy'}" in proc.stdout
    expected = numpy_forward(trained["workdir"] / "final.npz", X, trained["train_rows"])
    np.testing.assert_allclose(outputs, expected, rtol=1e-10, atol=1e-13)
    # The model returned by training, on inputs standardised with its own statistics, gives the same outputs.
    with np.load(trained["workdir"] / "final.npz", allow_pickle=False) as archive:
        standardised = (X - archive["input_mean"]) * archive["input_inv_std"]
    np.testing.assert_allclose(outputs, trained["model"].predict(standardised), rtol=1e-12, atol=1e-15)
    np.testing.assert_allclose(outputs.sum(axis=1), 1.0, rtol=0, atol=1e-12)  # softmax rows sum to 1
    assert outputs.min() >= 0.0 and outputs.max() <= 1.0
    # Metrics line: scikit-learn's accuracy_score and log_loss of the same outputs.
    metrics = json.loads(proc.stdout.strip().splitlines()[-1])
    assert metrics["accuracy"] == pytest.approx(accuracy_score(y, outputs.argmax(axis=1)), abs=1e-12)
    assert metrics["loss"] == pytest.approx(log_loss(y, outputs, labels=[0, 1, 2]), rel=1e-9)
    assert metrics["accuracy"] > 0.5  # separable blobs after 8 Adam steps: the model learned something


def test_predict_from_checkpoint_and_workdir_equals_final(trained: dict) -> None:
    _, from_final = _predict(trained, trained["workdir"] / "final.npz", "final-again", targets=False)
    _, from_checkpoint = _predict(trained, trained["workdir"] / "checkpoints" / f"step-{STEPS:08d}", "from-ckpt")
    proc, from_workdir = _predict(trained, trained["workdir"], "from-workdir", targets=False)
    assert np.array_equal(from_checkpoint, from_final) and np.array_equal(from_workdir, from_final)
    assert not any(line.startswith("{") for line in proc.stdout.splitlines())  # no targets, no metrics
    # An earlier checkpoint is a different model: its outputs differ, and match its own forward pass.
    _, early = _predict(trained, trained["workdir"] / "checkpoints" / "step-00000004", "from-early", targets=False)
    assert np.abs(early - from_final).max() > 1e-6
    params = trained["workdir"] / "checkpoints" / "step-00000004" / "params.npz"
    expected = numpy_forward(params, np.load(trained["x"]), trained["train_rows"])
    np.testing.assert_allclose(early, expected, rtol=1e-10, atol=1e-13)


def test_predict_refuses_inputs_of_the_wrong_width(trained: dict) -> None:
    narrow = trained["path"] / "narrow.npy"
    np.save(narrow, np.load(trained["x"])[:, :5])
    proc = run_cli(["predict", str(trained["workdir"] / "final.npz"), str(narrow), "--out",
                    str(trained["path"] / "never.npy")], timeout=120)
    assert proc.returncode == 2
    assert "`inputs` must have shape (n, 6); got (240, 5)" in proc.stderr and "Traceback" not in proc.stderr
    assert not (trained["path"] / "never.npy").exists()


def test_predict_writes_csv_by_extension_and_refuses_other_outputs(trained: dict) -> None:
    final = str(trained["workdir"] / "final.npz")
    npy, csv = trained["path"] / "by-ext.npy", trained["path"] / "by-ext.csv"
    for out in (npy, csv):
        proc = run_cli(["predict", final, str(trained["x"]), "--out", str(out)], timeout=120)
        assert proc.returncode == 0, proc.stderr
        assert f"to {out}" in proc.stdout and out.exists()
    assert not (trained["path"] / "by-ext.csv.npy").exists()  # the name said, the file written
    # numpy's text reader gives back the very same float64 values (17 significant digits round-trip, IEEE 754)
    np.testing.assert_array_equal(np.loadtxt(csv, delimiter=",", skiprows=1), np.load(npy, allow_pickle=False))
    # a header row: the targets came from a file without names, so the outputs are numbered
    assert csv.read_text().splitlines()[0] == "output_0,output_1,output_2"
    for out, fragment in ((trained["path"] / "preds.txt", "`--out` must end in .npy or .csv"),
                          (trained["path"] / "missing" / "p.npy", "`--out` folder")):
        proc = run_cli(["predict", final, str(trained["x"]), "--out", str(out)], timeout=120)
        assert proc.returncode == 2 and fragment in proc.stderr and "Traceback" not in proc.stderr
        assert not out.exists()


# --- a header row, and columns of the inputs kept ------------------------------------------------------------------

@pytest.fixture(scope="module")
def table_model(tmp_path_factory) -> dict:
    """A classifier trained from a CSV table whose rows carry an id and a free-text name beside the features."""
    path = tmp_path_factory.mktemp("predict-table")
    x, y = make_classification(path, rows=120, features=4, classes=3, seed=5)
    X, labels = np.load(x), np.load(y)
    lines = ["id,name,f0,f1,f2,f3,class"]
    lines += [f'r{i:03d},"pump {i}, east",' + ",".join(f"{v:.17g}" for v in X[i]) + f",{labels[i]}"
              for i in range(X.shape[0])]
    (path / "rows.csv").write_text("\n".join(lines) + "\n")
    job = job_from_dict({"model": {"layers": [4, 8, 3], "activation": "tanh", "dtype": "float64"},
                         "data": {"inputs": str(path / "rows.csv"), "target": "class",
                                  "features": ["f0", "f1", "f2", "f3"], "validation_fraction": 0.2},
                         "optimizer": {"method": "adam", "learning_rate": 0.01},
                         "run": {"epochs": 1, "global_batch": 32, "seed": 2, "workdir": str(path / "run")}})
    train(job, progress=False)
    return {"path": path, "X": X, "table": path / "rows.csv", "final": path / "run" / "final.npz"}


def _read_csv(path: Path) -> list[list[str]]:
    import csv

    with open(path, newline="") as f:
        return list(csv.reader(f))  # Python's csv module (RFC 4180 quoting)


def test_predict_csv_has_a_header_and_keeps_named_columns_first(table_model: dict) -> None:
    from shardmill import load_model

    predictor = load_model(table_model["final"])
    out = table_model["path"] / "labels.csv"
    proc = run_cli(["predict", str(table_model["final"]), str(table_model["table"]), "--out", str(out), "--labels",
                    "--keep", "name,id"])
    assert proc.returncode == 0, proc.stderr[-3000:]
    rows = _read_csv(out)
    assert rows[0] == ["name", "id", "class"]  # the kept columns in the order given, then the target's name
    assert [r[1] for r in rows[1:]] == [f"r{i:03d}" for i in range(120)]
    assert [r[0] for r in rows[1:]] == [f"pump {i}, east" for i in range(120)]  # text with a comma, quoted
    assert [int(r[2]) for r in rows[1:]] == predictor.predict(table_model["X"]).tolist()
    out = table_model["path"] / "outputs.csv"
    proc = run_cli(["predict", str(table_model["final"]), str(table_model["table"]), "--out", str(out)])
    assert proc.returncode == 0, proc.stderr[-3000:]
    rows = _read_csv(out)
    assert rows[0] == ["output_0", "output_1", "output_2"]  # three probabilities of one target column: numbered
    values = np.array([[float(v) for v in r] for r in rows[1:]])  # float() of 17 digits: the same float64
    np.testing.assert_array_equal(values, predictor.outputs(table_model["X"]))


def test_output_names_are_the_target_columns_when_they_name_each_output(table_model: dict) -> None:
    from shardmill import load_model
    from shardmill.commands.predict import output_names

    predictor = load_model(table_model["final"])
    outputs = np.zeros((2, 3))
    assert output_names(predictor, outputs) == ["output_0", "output_1", "output_2"]
    assert output_names(predictor, np.zeros(2, dtype=np.int64)) == ["class"]
    predictor.job = {"data": {"target": ["a", "b", "c"]}}
    assert output_names(predictor, outputs) == ["a", "b", "c"]
    predictor.job = {"data": {"target": []}}
    assert output_names(predictor, np.zeros(2, dtype=np.int64)) == ["label"]


@pytest.mark.parametrize("keep, out, fragment", [
    ("id,nme", "p.csv", "`--keep` column 'nme' is not in `inputs` file"),
    ("id,id", "p.csv", "`--keep` names column 'id' twice"),
    ("id", "p.npy", "`--keep` passes columns into a .csv output"),
    ("class", "p.csv", "`--keep` column 'class' has the name of an output column"),
])
def test_predict_refuses_a_bad_keep_in_one_line(table_model: dict, keep: str, out: str, fragment: str) -> None:
    target = table_model["path"] / "refused" / out
    target.parent.mkdir(exist_ok=True)
    proc = run_cli(["predict", str(table_model["final"]), str(table_model["table"]), "--out", str(target),
                    "--labels", "--keep", keep])
    assert proc.returncode == 2 and "Traceback" not in proc.stderr, proc.stderr[-3000:]
    assert fragment in proc.stderr and len(proc.stderr.strip().splitlines()) == 1
    assert not target.exists()
