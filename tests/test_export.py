"""``shardmill export`` and the Predictor: models trained on scikit-learn's bundled data sets (iris, wine,
breast_cancer, diabetes), exported to ONNX and run by onnxruntime on raw rows, give ``shardmill predict``'s outputs;
the model card describes the model; Predictor follows scikit-learn's conventions; load_model reads every source."""

from __future__ import annotations

import argparse
import json
import shutil
from pathlib import Path

import numpy as np
import onnx
import onnxruntime
import pytest
import scipy.special
from helpers import run_cli
from shardmill.checkpoint import CheckpointError, best_name, load, resolve
from shardmill.commands import export
from shardmill.commands.export import cmd_export, export_onnx, model_card
from shardmill.commands.predict import cmd_predict
from shardmill.config import job_from_dict
from shardmill.errors import JobError
from shardmill.model.activations import FORMULAS as ACTIVATION_FORMULAS
from shardmill.model.mlp import MLP
from shardmill.model.predictor import Predictor, load_model
from shardmill.training.loop import train
from shardmill.training.trainer import Trainer
from sklearn.datasets import load_breast_cancer, load_diabetes, load_iris, load_wine
from sklearn.metrics import accuracy_score, log_loss, mean_squared_error

DATASETS = {"iris": load_iris, "wine": load_wine, "breast_cancer": load_breast_cancer, "diabetes": load_diabetes}
# name: (data set, loss, hidden activations, output activation); together the hidden layers cover all seven
CASES = {
    "iris": ("iris", "softmax_cross_entropy", ["relu", "gelu"], "auto"),
    "wine": ("wine", "softmax_cross_entropy", ["leaky_relu", "softplus"], "auto"),
    "breast_cancer": ("breast_cancer", "binary_cross_entropy", ["tanh", "sigmoid"], "auto"),
    "diabetes": ("diabetes", "squared_error", ["identity", "tanh"], "gelu"),
}
DTYPES = ("float32", "float64")
EPOCHS, BATCH = 3, 32
# Agreement of two correct evaluations of the same formulas in a different order (BLAS vs onnxruntime's GEMM,
# libm vs onnxruntime's exp/tanh): a few units of the last place per operation, a handful of layers.
RTOL = {"float32": 1e-5, "float64": 1e-12}
# atol: an output near zero (a regression output crossing zero, a tiny probability, an activation at its root) is
# the sum of terms of order one, so its rounding error is relative to those terms, not to the small result;
# atol = rtol × 0.1 is that error for outputs and terms of order one (standardised targets, probabilities).
ATOL = {"float32": 1e-6, "float64": 1e-13}


def _data(root: Path, name: str, dtype: str) -> tuple[Path, Path, np.ndarray, np.ndarray]:
    """The bundled data set as x.npy (model's dtype) / y.npy: class labels, 0/1 (n, 1), or standardised targets."""
    X, y = DATASETS[name](return_X_y=True)
    if name == "breast_cancer":
        y = y.reshape(-1, 1).astype(np.float64)
    elif name == "diabetes":
        y = ((y - y.mean()) / y.std()).reshape(-1, 1)  # targets of order one for a few Adam steps
    else:
        y = y.astype(np.int64)
    folder = root / f"{name}-{dtype}"
    folder.mkdir(exist_ok=True)
    X = X.astype(dtype)
    np.save(folder / "x.npy", X)
    np.save(folder / "y.npy", y)
    return folder / "x.npy", folder / "y.npy", X, y


@pytest.fixture(scope="module")
def models(tmp_path_factory):
    """A function (case, dtype) → a trained model's record, each trained once in this process (one rank)."""
    root = tmp_path_factory.mktemp("export")
    cache: dict[tuple[str, str], dict] = {}

    def get(case: str, dtype: str) -> dict:
        if (case, dtype) not in cache:
            dataset, loss, activations, output = CASES[case]
            x, y, X, Y = _data(root, dataset, dtype)
            classes = int(Y.max()) + 1 if loss == "softmax_cross_entropy" else Y.shape[1]
            workdir = root / f"run-{case}-{dtype}"
            job = job_from_dict({
                "model": {"layers": [X.shape[1], 8, 6, classes], "activation": activations, "loss": loss,
                          "output": output, "dtype": dtype},
                "data": {"inputs": str(x), "targets": str(y), "validation_fraction": 0.2},
                "optimizer": {"method": "adam", "learning_rate": 0.02},
                "run": {"epochs": EPOCHS, "global_batch": BATCH, "seed": 3, "workdir": str(workdir),
                        "best_metric": "validation.loss", "keep_checkpoints": EPOCHS}})
            result = train(job, progress=False)
            cache[case, dtype] = {"job": job, "result": result, "workdir": workdir, "x": x, "y": y, "X": X, "Y": Y,
                                  "root": root, "name": f"{case}-{dtype}"}
        return cache[case, dtype]

    return get


def _export(model: dict, source: Path | None = None, opset: int = 17, tag: str = "") -> tuple[Path, Path]:
    out = model["root"] / f"{model['name']}{tag}.onnx"
    args = argparse.Namespace(model=source or model["workdir"] / "final.npz", out=out, card=None, opset=opset)
    assert cmd_export(args) == 0
    return out, out.with_suffix(".card.json")


def _shardmill_predict(model: dict, tag: str, targets: bool = False, labels: bool = False) -> np.ndarray:
    """What `shardmill predict` writes for the training inputs (its command function, in this process)."""
    out = model["root"] / f"{model['name']}-{tag}.npy"
    args = argparse.Namespace(model=model["workdir"] / "final.npz", inputs=model["x"], out=out,
                              targets=model["y"] if targets else None, labels=labels)
    assert cmd_predict(args) == 0
    return np.load(out, allow_pickle=False)


def _onnxruntime(path: Path, X: np.ndarray) -> np.ndarray:
    session = onnxruntime.InferenceSession(str(path), providers=["CPUExecutionProvider"])
    return session.run(["outputs"], {"inputs": X})[0]


@pytest.mark.parametrize("dtype", DTYPES)
@pytest.mark.parametrize("case", list(CASES))
def test_onnx_graph_gives_shardmill_predicts_outputs(models, case: str, dtype: str, capsys) -> None:
    model = models(case, dtype)
    path, card = _export(model)
    printed = capsys.readouterr().out
    assert f"wrote {path} (ONNX opset 17, {dtype}" in printed and f"wrote {card} (model card)" in printed
    loaded = onnx.load(path)
    onnx.checker.check_model(loaded, full_check=True)  # the onnx package's own checker and shape inference
    elem = onnx.helper.np_dtype_to_tensor_dtype(np.dtype(dtype))
    (graph_in,), (graph_out,) = loaded.graph.input, loaded.graph.output
    d, k = model["X"].shape[1], model["result"]["model"].sizes[-1]
    assert (graph_in.name, graph_in.type.tensor_type.elem_type) == ("inputs", elem)
    assert [x.dim_param or x.dim_value for x in graph_in.type.tensor_type.shape.dim] == ["N", d]
    assert (graph_out.name, graph_out.type.tensor_type.elem_type) == ("outputs", elem)
    assert [x.dim_param or x.dim_value for x in graph_out.type.tensor_type.shape.dim] == ["N", k]
    assert {op.domain: op.version for op in loaded.opset_import} == {"": 17}
    expected = _shardmill_predict(model, "outputs")
    got = _onnxruntime(path, model["X"])  # raw rows, as the data set holds them
    assert got.dtype == expected.dtype == np.dtype(dtype) and got.shape == expected.shape
    # reference: onnxruntime, a general-purpose ONNX runtime
    np.testing.assert_allclose(got, expected, rtol=RTOL[dtype], atol=ATOL[dtype])
    assert np.ptp(expected) > 1e-3  # a trained model whose outputs vary across rows, not a constant


def _probe(activation: str, dtype: str, hidden: bool) -> Predictor:
    """A 1 → 1 → 1 network of unit weights and zero biases: its output is f(z) of the input z, for the activation
    in the hidden layer (identity output) or as the output activation (identity hidden)."""
    model = MLP([1, 1, 1], activation=activation if hidden else "identity", loss="squared_error", dtype=dtype,
                output="identity" if hidden else activation)
    model.params = np.ones(model.n_params)
    for b in model.biases:
        b[...] = 0.0
    return Predictor(model, np.zeros(1), np.ones(1))


PUBLISHED = {  # f(z) from outside the project, evaluated in float64
    "identity": lambda z: z,
    "relu": lambda z: np.maximum(z, 0.0),
    "leaky_relu": lambda z: np.where(z > 0, z, 0.01 * z),  # Maas et al. 2013, slope 0.01
    "gelu": lambda z: 0.5 * z * (1 + np.tanh(np.sqrt(2 / np.pi) * (z + 0.044715 * z**3))),  # Hendrycks & Gimpel 2016
    "softplus": lambda z: np.logaddexp(0.0, z),  # numpy: log(e^0 + e^z)
    "sigmoid": scipy.special.expit,  # scipy.special.expit
    "tanh": np.tanh,
}


@pytest.mark.parametrize("hidden", [True, False], ids=["hidden", "output"])
@pytest.mark.parametrize("dtype", DTYPES)
@pytest.mark.parametrize("activation", list(PUBLISHED))
def test_each_activation_graph_computes_its_formula_over_a_wide_range(tmp_path: Path, activation: str, dtype: str,
                                                                      hidden: bool) -> None:
    z = np.concatenate([np.linspace(-40, 40, 801), [-700.0, -100.0, -1e-8, 0.0, 1e-8, 100.0, 700.0]])
    Z = z.astype(dtype).reshape(-1, 1)
    predictor = _probe(activation, dtype, hidden)
    export_onnx(predictor, tmp_path / "probe.onnx")
    got = _onnxruntime(tmp_path / "probe.onnx", Z)
    # sigmoid's and softplus's split forms keep their relative accuracy down to e^{−700} (their point): no atol
    # but the smallest normal number; the others' values near a root cancel (GELU's 1 + tanh) and need ATOL.
    atol = np.finfo(dtype).tiny if activation in ("sigmoid", "softplus") else ATOL[dtype]
    # reference: onnxruntime, a general-purpose ONNX runtime
    np.testing.assert_allclose(got, predictor.outputs(Z), rtol=RTOL[dtype], atol=atol)
    expected = PUBLISHED[activation](Z.astype(np.float64))
    # the published formula (source beside each entry of PUBLISHED), in float64
    np.testing.assert_allclose(got, expected, rtol=RTOL[dtype], atol=atol)


def test_softmax_graph_at_both_forms_of_the_reductions(models) -> None:
    """Before opset 18 ReduceMax takes its axes as an attribute, from 18 as an input: both run the same."""
    model = models("wine", "float64")
    expected = _shardmill_predict(model, "opsets")
    for opset in (13, 18, 21):
        path, _ = _export(model, opset=opset, tag=f"-opset{opset}")
        assert {op.domain: op.version for op in onnx.load(path).opset_import} == {"": opset}
        # reference: onnxruntime, a general-purpose ONNX runtime
        np.testing.assert_allclose(_onnxruntime(path, model["X"]), expected, rtol=1e-12, atol=1e-13)


def test_large_parameters_go_to_an_external_data_file(models, monkeypatch) -> None:
    model = models("iris", "float32")
    monkeypatch.setattr(export, "EXTERNAL_DATA_BYTES", 0)
    path = model["root"] / "external.onnx"
    files = export_onnx(load_model(model["workdir"] / "final.npz"), path)
    assert files == [path, path.with_name("external.onnx.data")] and files[1].stat().st_size > 0
    onnx.checker.check_model(str(path), full_check=True)  # the onnx package's checker reads the data file
    # reference: onnxruntime, a general-purpose ONNX runtime
    np.testing.assert_allclose(_onnxruntime(path, model["X"]), _shardmill_predict(model, "external"),
                               rtol=RTOL["float32"], atol=ATOL["float32"])


@pytest.mark.parametrize("case", list(CASES))
def test_model_card_describes_the_model(models, case: str) -> None:
    model = models(case, "float64")
    _, path = _export(model, tag="-card")
    card = json.loads(path.read_text())
    job, mlp = model["job"], model["result"]["model"]
    assert (card["format"], card["format_version"], card["dtype"]) == ("shardmill-model-card", 1, "float64")
    assert card["onnx"] == {"file": path.name.replace(".card.json", ".onnx"), "opset": 17, "input": "inputs",
                            "output": "outputs"}
    activations = [*mlp.activations, {"softmax_cross_entropy": "softmax", "binary_cross_entropy": "sigmoid",
                                      "squared_error": CASES[case][3]}[mlp.loss]]
    assert [layer["activation"] for layer in card["layers"]] == activations
    assert [(layer["fan_in"], layer["fan_out"]) for layer in card["layers"]] == list(zip(mlp.sizes, mlp.sizes[1:],
                                                                                           strict=False))
    for layer in card["layers"]:
        assert layer["formula"] == ACTIVATION_FORMULAS[layer["activation"]] and layer["formula"].startswith("f(z")
    assert card["output"]["loss"] == mlp.loss and card["output"]["formula"] == ACTIVATION_FORMULAS[activations[-1]]
    assert card["output"]["loss_formula"]
    # Statistics: the very arrays of final.npz, and numpy's mean and population std of the training rows.
    with np.load(model["workdir"] / "final.npz", allow_pickle=False) as archive:
        assert card["inputs"]["mean"] == archive["input_mean"].tolist()
        assert card["inputs"]["inv_std"] == archive["input_inv_std"].tolist()
        final_step = int(archive["step"])
    rows = model["X"][Trainer(job).data.split.train]
    np.testing.assert_allclose(card["inputs"]["mean"], rows.mean(axis=0), rtol=1e-12, atol=1e-12)  # numpy
    np.testing.assert_allclose(card["inputs"]["std"], rows.std(axis=0), rtol=1e-9)  # numpy: ddof 0
    assert card["inputs"]["count"] == model["X"].shape[1] and card["inputs"]["feature_names"] is None
    # Training: the job as resolved, and the digest the checkpoint recorded.
    state, _, _ = load(resolve(model["workdir"]))
    assert card["training"]["digest"] == state["job_digest"] == job.digest()
    assert card["training"]["job"] == json.loads(json.dumps(job.as_dict()))
    assert card["training"]["step"] == final_step == state["step"] == model["result"]["steps"]
    # Metrics: the last epoch record of metrics.jsonl, read here line by line.
    records = [json.loads(line) for line in (model["workdir"] / "metrics.jsonl").read_text().splitlines()]
    epochs = [r for r in records if r.get("kind") == "epoch"]
    assert len(epochs) == EPOCHS and card["metrics"] == epochs[-1]
    # An earlier checkpoint's card has that epoch's record; a final.npz outside its workdir has none.
    first = model["workdir"] / "checkpoints" / f"step-{epochs[0]['step']:08d}"
    assert model_card(load_model(first), first)["metrics"] == epochs[0]
    alone = model["root"] / f"alone-{case}"
    alone.mkdir()
    shutil.copy(model["workdir"] / "final.npz", alone / "final.npz")
    assert model_card(load_model(alone / "final.npz"), alone / "final.npz")["metrics"] is None


@pytest.mark.parametrize("dtype", DTYPES)
@pytest.mark.parametrize("case", ["iris", "wine", "breast_cancer"])
def test_classifier_follows_scikit_learn_conventions(models, case: str, dtype: str, capsys) -> None:
    model = models(case, dtype)
    predictor = load_model(model["workdir"] / "final.npz")
    assert predictor.is_classifier and predictor.n_inputs == model["X"].shape[1]
    proba, labels = predictor.predict_proba(model["X"]), predictor.predict(model["X"])
    assert labels.dtype == np.int64 and np.array_equal(proba, _shardmill_predict(model, "proba"))
    assert proba.min() >= 0.0 and proba.max() <= 1.0  # probabilities
    _shardmill_predict(model, "metrics", targets=True)
    printed = json.loads(capsys.readouterr().out.strip().splitlines()[-1])
    y = model["Y"]
    if predictor.loss == "softmax_cross_entropy":
        assert labels.shape == (len(y),)
        assert np.array_equal(labels, np.argmax(proba, axis=1))  # scikit-learn: predict = argmax of predict_proba
        np.testing.assert_allclose(proba.sum(axis=1), 1.0, rtol=0, atol=RTOL[dtype])  # softmax rows sum to 1
    else:
        assert labels.shape == y.shape and set(np.unique(labels)) <= {0, 1}
        assert np.array_equal(labels, (proba > 0.5).astype(np.int64))  # scikit-learn: threshold 0.5
        # one output: the mean binary cross-entropy per row is scikit-learn's log_loss
        assert printed["loss"] == pytest.approx(log_loss(y.ravel(), proba.astype(np.float64).ravel()),
                                                rel=1e-9 if dtype == "float64" else 1e-6)
    accuracy = accuracy_score(y.ravel(), labels.ravel())  # sklearn.metrics.accuracy_score
    assert printed["accuracy"] == pytest.approx(accuracy, abs=1e-12)
    assert accuracy > 0.5  # the model learned something in its few steps
    # The trainer's own Predictor (sm.train's result) gives the same as the one loaded from final.npz.
    assert np.array_equal(model["result"]["predictor"].predict_proba(model["X"]), proba)
    # `shardmill predict --labels` writes predict()'s labels, as .npy and .csv.
    assert np.array_equal(_shardmill_predict(model, "labels", labels=True), labels)
    out = model["root"] / f"{model['name']}-labels.csv"
    cmd_predict(argparse.Namespace(model=model["workdir"], inputs=model["x"], out=out, targets=None, labels=True))
    assert np.array_equal(np.loadtxt(out, delimiter=",", dtype=np.int64, skiprows=1).reshape(labels.shape),
                          labels)  # numpy; the first line is the header row


def test_regression_predicts_outputs_and_refuses_probabilities(models, capsys) -> None:
    model = models("diabetes", "float64")
    predictor = load_model(model["workdir"])
    assert not predictor.is_classifier and predictor.loss == "squared_error"
    outputs = predictor.predict(model["X"])
    assert np.array_equal(outputs, predictor.outputs(model["X"])) and outputs.shape == model["Y"].shape
    with pytest.raises(JobError, match="predict_proba needs a classifier .*this model's loss is 'squared_error'"):
        predictor.predict_proba(model["X"])
    with pytest.raises(JobError, match="`--labels` needs a classifier"):
        _shardmill_predict(model, "no-labels", labels=True)
    _shardmill_predict(model, "rmse", targets=True)
    printed = json.loads(capsys.readouterr().out.strip().splitlines()[-1])
    rmse = np.sqrt(mean_squared_error(model["Y"], outputs))  # sklearn.metrics.mean_squared_error
    assert printed["rmse"] == pytest.approx(rmse, rel=1e-12) and rmse < 1.0  # below the targets' std
    # the loss as training logs it, ½ Σ_k (o − t)² per row: half the mean squared error for one output
    assert printed["loss"] == pytest.approx(0.5 * mean_squared_error(model["Y"], outputs), rel=1e-12)
    # --targets is read and checked before anything is written
    out = model["root"] / "never.npy"
    with pytest.raises(JobError, match="does not exist"):
        cmd_predict(argparse.Namespace(model=model["workdir"], inputs=model["x"], out=out,
                                       targets=model["root"] / "missing.npy", labels=False))
    assert not out.exists()


def test_load_model_reads_every_source_kind(models) -> None:
    model = models("iris", "float64")
    workdir, X = model["workdir"], model["X"]
    root = workdir / "checkpoints"
    newest = resolve(workdir)
    sources = {"final.npz": workdir / "final.npz", "workdir": workdir, "checkpoints": root, "checkpoint": newest}
    predictors = {kind: load_model(path) for kind, path in sources.items()}
    reference = predictors["final.npz"].outputs(X)
    for kind, predictor in predictors.items():
        assert np.array_equal(predictor.outputs(X), reference), kind
        assert (predictor.step, predictor.digest, predictor.loss) == (model["result"]["steps"], model["job"].digest(),
                                                                     "softmax_cross_entropy"), kind
        assert predictor.job == json.loads(json.dumps(model["job"].as_dict())), kind
    # best.npz: the model of the checkpoint the index marks as best.
    best = load_model(workdir / "best.npz")
    assert np.array_equal(best.outputs(X), load_model(root / best_name(root)).outputs(X))
    assert best.step == load(root / best_name(root))[0]["step"]
    with pytest.raises(CheckpointError, match="no model at"):
        load_model(workdir / "missing.npz")
    other = model["root"] / "other.npz"
    np.savez(other, W0=np.zeros((4, 8)))
    with pytest.raises(CheckpointError, match="is not a shardmill final.npz"):
        load_model(other)
    damaged = model["root"] / "damaged.npz"
    damaged.write_bytes((workdir / "final.npz").read_bytes()[:200])
    with pytest.raises(CheckpointError, match="cannot be read"):
        load_model(damaged)
    with pytest.raises(CheckpointError, match="is not a model"):
        load_model(model["x"])


def test_predictor_refuses_bad_inputs(models) -> None:
    predictor = load_model(models("iris", "float32")["workdir"] / "final.npz")
    X = load_iris().data
    with pytest.raises(JobError, match=r"`inputs` must have shape \(n, 4\); got \(150, 3\)"):
        predictor.predict(X[:, :3])
    with pytest.raises(JobError, match=r"`inputs` must have shape \(n, 4\); got \(4,\)"):
        predictor.outputs(X[0])
    bad = X.copy()
    bad[7, 2] = np.nan
    with pytest.raises(JobError, match="`inputs` row 7 holds a non-finite value"):
        predictor.predict_proba(bad)
    with pytest.raises(JobError, match="`inputs` must hold real numbers; got dtype <U"):
        predictor.predict(X.astype(str))
    # integer rows are numbers: they give the outputs of the same rows as floats
    assert np.array_equal(predictor.outputs(np.round(X).astype(np.int64)), predictor.outputs(np.round(X)))


def test_predict_picks_a_tables_columns_by_the_models_feature_names(tmp_path: Path) -> None:
    iris = load_iris()
    names = [name.replace(" (cm)", "") for name in iris.feature_names]
    table = tmp_path / "iris.csv"
    header = ",".join([*names, "species"])
    np.savetxt(table, np.column_stack([iris.data, iris.target]), delimiter=",", header=header, comments="")
    job = job_from_dict({"model": {"layers": [4, 8, 3], "activation": "tanh", "dtype": "float64"},
                         "data": {"inputs": str(table), "target": "species", "validation_fraction": 0.2},
                         "optimizer": {"learning_rate": 0.02},
                         "run": {"epochs": 2, "global_batch": 30, "seed": 1, "workdir": str(tmp_path / "run")}})
    train(job, progress=False)
    predictor = load_model(tmp_path / "run" / "final.npz")
    assert predictor.feature_names == names
    card = model_card(predictor, tmp_path / "run" / "final.npz")
    assert card["inputs"]["feature_names"] == names
    # New rows: the columns in another order and no target column; predict picks them by name.
    shuffled = tmp_path / "new.csv"
    order = [2, 0, 3, 1]
    np.savetxt(shuffled, iris.data[:, order], delimiter=",", header=",".join(names[j] for j in order), comments="")
    out = tmp_path / "new.npy"
    cmd_predict(argparse.Namespace(model=tmp_path / "run", inputs=shuffled, out=out, targets=None, labels=False))
    assert np.array_equal(np.load(out, allow_pickle=False), predictor.outputs(iris.data))


def test_export_refuses_bad_arguments_before_writing(models, capsys) -> None:
    model = models("iris", "float64")
    final, root = model["workdir"] / "final.npz", model["root"]
    cases = [
        ({"out": root / "model.txt"}, "`--out` must end in .onnx; got"),
        ({"out": root / "missing" / "m.onnx"}, "`--out` folder"),
        ({"card": root / "card.txt"}, "`--card` must end in .json; got"),
        ({"card": root / "missing" / "c.json"}, "`--card` folder"),
        ({"opset": 12}, "`--opset` must be an integer from 13 to"),
        ({"opset": export.MAX_OPSET + 1}, f"`--opset` must be an integer from 13 to {export.MAX_OPSET}; got"),
        ({"model": root / "nothing-here"}, "`MODEL` "),
    ]
    for change, message in cases:
        args = {"model": final, "out": root / "refused.onnx", "card": None, "opset": 17, **change}
        with pytest.raises(JobError, match=message.replace("(", r"\(")):
            cmd_export(argparse.Namespace(**args))
        assert not (root / "refused.onnx").exists() and not (root / "refused.card.json").exists()
    card = root / "named-card.json"
    cmd_export(argparse.Namespace(model=final, out=root / "named.onnx", card=card, opset=17))
    assert json.loads(card.read_text())["onnx"]["file"] == "named.onnx"


def test_export_command_line(models) -> None:
    model = models("breast_cancer", "float32")
    out = model["root"] / "cli.onnx"
    proc = run_cli(["export", str(model["workdir"]), "--out", str(out), "--opset", "18"], timeout=120)
    assert proc.returncode == 0, proc.stderr[-3000:]
    assert f"wrote {out} (ONNX opset 18, float32, 30 inputs → 1 outputs)" in proc.stdout
    assert json.loads(out.with_suffix(".card.json").read_text())["training"]["step"] == model["result"]["steps"]
    # reference: onnxruntime, a general-purpose ONNX runtime
    np.testing.assert_allclose(_onnxruntime(out, model["X"]), _shardmill_predict(model, "cli"),
                               rtol=RTOL["float32"], atol=ATOL["float32"])
    proc = run_cli(["export", str(model["workdir"]), "--out", str(model["root"] / "cli.pt")], timeout=120)
    assert proc.returncode == 2 and "`--out` must end in .onnx" in proc.stderr and "Traceback" not in proc.stderr
    labels = model["root"] / "cli-labels.npy"
    proc = run_cli(["predict", str(model["workdir"]), str(model["x"]), "--out", str(labels), "--labels"], timeout=120)
    assert proc.returncode == 0, proc.stderr[-3000:]
    assert f"wrote {len(model['X'])} × 1 labels to {labels}" in proc.stdout
    assert np.array_equal(np.load(labels, allow_pickle=False), load_model(model["workdir"]).predict(model["X"]))
