"""Sample and class weights: the loss Σ w·ℓ / Σ w over the global batch (``data.weights``, ``data.class_weights``).

References: scikit-learn's log_loss and mean_squared_error with ``sample_weight`` (the weighted mean loss) and its
``compute_class_weight("balanced")`` (n / (classes · n_c)); the gradients against the reverse-mode autodiff library
``autograd``; a whole-number weight against the row repeated (common practice: weight k counts a row k times);
exact mode's parameters against themselves at P = 1, 2, 3 and across a resume at another P (the exactness model);
``verify`` against Higham's bound, as for unweighted runs.
"""

from __future__ import annotations

import hashlib
import json
from pathlib import Path

import autograd.numpy as anp
import numpy as np
import pytest
import shardmill as sm
from autograd import grad as autograd_grad
from autograd.scipy.special import logsumexp as anp_logsumexp
from helpers import run_cli, run_mpi
from shardmill.config import job_from_dict
from shardmill.errors import JobError
from sklearn.metrics import log_loss, mean_squared_error
from sklearn.utils.class_weight import compute_class_weight


def _problem(seed: int = 0, n: int = 12, loss: str = "softmax_cross_entropy"):
    rng = np.random.default_rng(seed)
    model = sm.MLP([4, 6, 3], activation="tanh", loss=loss, dtype="float64", seed=seed)
    X = rng.normal(size=(n, 4))
    y = rng.integers(0, 3, size=n) if loss == "softmax_cross_entropy" else rng.normal(size=(n, 3))
    w = rng.uniform(0.0, 3.0, size=n)
    w[1] = 0.0  # a row that does not count
    return model, X, y, w


def test_weighted_cross_entropy_is_scikit_learns_weighted_log_loss() -> None:
    model, X, y, w = _problem()
    loss, _ = model.loss_and_grad(X, y, weights=w)
    # scikit-learn log_loss(sample_weight=w): Σ w·(−log p_y) / Σ w
    assert loss == pytest.approx(log_loss(y, model.predict(X), sample_weight=w, labels=[0, 1, 2]), rel=1e-12)


def test_weighted_squared_error_is_scikit_learns_weighted_mean_squared_error() -> None:
    model, X, y, w = _problem(loss="squared_error")
    loss, _ = model.loss_and_grad(X, y, weights=w)
    # scikit-learn mean_squared_error(sample_weight=w) averages over the k outputs too; the loss is ½ Σ_k per row
    expected = 0.5 * y.shape[1] * mean_squared_error(y, model.predict(X), sample_weight=w)
    assert loss == pytest.approx(expected, rel=1e-12)


def test_weighted_gradient_matches_autograd() -> None:
    model, X, y, w = _problem(seed=3)
    theta = model.params.copy()
    _, gradient = model.loss_and_grad(X, y, weights=w)
    (w0, b0), (w1, b1) = ((model.slices[l][0], model.slices[l][0] + model.weights[l].size) for l in range(2))

    def f(flat):
        H = anp.tanh(anp.dot(X, flat[w0:b0].reshape(4, 6)) + flat[b0:b0 + 6])
        Z = anp.dot(H, flat[w1:b1].reshape(6, 3)) + flat[b1:b1 + 3]
        per_row = anp_logsumexp(Z, axis=1) - Z[np.arange(X.shape[0]), y]
        return anp.sum(w * per_row) / np.sum(w)

    expected = autograd_grad(f)(theta)
    # autograd reverse mode
    assert np.linalg.norm(gradient - expected) <= 1e-12 * np.linalg.norm(expected)


def test_a_whole_number_weight_counts_a_row_that_many_times() -> None:
    model, X, y, _ = _problem(seed=5, n=6)
    w = np.array([1.0, 3.0, 1.0, 2.0, 1.0, 1.0])
    weighted = model.loss_and_grad(X, y, weights=w)
    repeat = np.repeat(np.arange(6), w.astype(int))
    repeated = model.loss_and_grad(X[repeat], y[repeat])
    # common practice: weight k is the row repeated k times (the same mean, summed in another order)
    assert weighted[0] == pytest.approx(repeated[0], rel=1e-13)
    np.testing.assert_allclose(weighted[1], repeated[1], rtol=1e-12, atol=1e-15)


def test_unit_weights_change_no_bit() -> None:
    model, X, y, _ = _problem(seed=7)
    plain, ones = model.loss_and_grad(X, y), model.loss_and_grad(X, y, weights=np.ones(X.shape[0]))
    assert plain[0] == ones[0] and np.array_equal(plain[1], ones[1])  # multiplying by 1 is exact (IEEE 754)


# --- jobs -------------------------------------------------------------------------------------------------------

def _table(folder: Path, rows: int = 240, seed: int = 0) -> Path:
    """A CSV with four features, a `weight` column and an imbalanced `label` column (test data only)."""
    rng = np.random.default_rng(seed)
    X = rng.normal(size=(rows, 4))
    label = np.where(X[:, 0] + 0.5 * X[:, 1] > 0.9, 2, np.where(X[:, 2] > 0.4, 1, 0))
    weight = np.round(rng.uniform(0.2, 2.0, size=rows), 3)
    lines = ["a,b,c,d,weight,label"] + [",".join([*(f"{v:.6f}" for v in X[i]), f"{weight[i]}", str(label[i])])
                                        for i in range(rows)]
    folder.mkdir(parents=True, exist_ok=True)
    (folder / "data.csv").write_text("\n".join(lines) + "\n")
    return folder / "data.csv"


def _job(folder: Path, table: Path, run: dict | None = None, data: dict | None = None) -> Path:
    run = {"epochs": 3, "global_batch": 48, "reduction": "exact", "exact_chunk": 16, "seed": 2,
           "workdir": str(folder / "run"), **(run or {})}
    data = {"inputs": str(table), "target": "label", "weights": "weight", "class_weights": "balanced",
            "validation_fraction": 0.25, **(data or {})}

    def value(v) -> str:
        return json.dumps(v) if not isinstance(v, bool) else str(v).lower()

    text = ["[model]", "layers = [4, 10, 3]", 'activation = "tanh"', 'dtype = "float32"', "[data]",
            *(f"{k} = {value(v)}" for k, v in data.items()), "[optimizer]", 'method = "adam"',
            "learning_rate = 0.01", "[run]", *(f"{k} = {value(v)}" for k, v in run.items())]
    (folder / "job.toml").write_text("\n".join(text) + "\n")
    return folder / "job.toml"


def _digest(run: Path) -> str:
    with np.load(run / "final.npz", allow_pickle=False) as saved:
        return hashlib.sha256(b"".join(saved[k].tobytes() for k in ("W0", "b0", "W1", "b1"))).hexdigest()


def test_balanced_class_weights_are_scikit_learns(tmp_path: Path) -> None:
    from shardmill.data.dataset import load_dataset
    from shardmill.model.mlp import model_from_job
    from shardmill.parallel.comm import Comm

    table = _table(tmp_path)
    job = sm.load_job(_job(tmp_path, table))
    data = load_dataset(job, model_from_job(job), Comm())
    labels = data.targets[data.split.train]
    # scikit-learn compute_class_weight("balanced"): n_samples / (n_classes · bincount(y))
    expected = compute_class_weight("balanced", classes=np.unique(labels), y=labels)
    np.testing.assert_allclose(data.class_weights, expected, rtol=1e-15)
    raw = np.loadtxt(table, delimiter=",", skiprows=1)
    np.testing.assert_allclose(data.weights, raw[:, 4] * expected[raw[:, 5].astype(int)], rtol=1e-15)


@pytest.mark.mpi
def test_exact_mode_with_weights_gives_the_same_bits_for_every_process_count_and_resume(tmp_path: Path) -> None:
    table = _table(tmp_path / "data")
    digests = []
    for P in (1, 2, 3):
        folder = tmp_path / f"p{P}"
        folder.mkdir()
        done = run_mpi(P, ["-m", "shardmill", "train", str(_job(folder, table)), "--no-progress"], timeout=180)
        assert done.returncode == 0, done.stderr
        digests.append(_digest(folder / "run"))
    folder = tmp_path / "resumed"
    folder.mkdir()
    job = _job(folder, table)
    first = run_mpi(2, ["-m", "shardmill", "train", str(job), "--no-progress", "--set", "run.max_steps=5"],
                    timeout=180)
    assert first.returncode == 0, first.stderr
    again = run_mpi(3, ["-m", "shardmill", "train", str(job), "--no-progress", "--resume"], timeout=180)
    assert again.returncode == 0, again.stderr
    digests.append(_digest(folder / "run"))
    assert len(set(digests)) == 1  # the exactness model: the same bits for every P and across a resume at another P
    logged = [json.loads(line) for line in (tmp_path / "p1" / "run" / "metrics.jsonl").read_text().splitlines()]
    assert all(np.isfinite(r["validation"]["loss"]) for r in logged if r["kind"] == "epoch")


@pytest.mark.mpi
def test_verify_bounds_a_weighted_run(tmp_path: Path) -> None:
    table = _table(tmp_path / "data")
    job = _job(tmp_path, table, run={"reduction": "fast"})
    done = run_mpi(3, ["-m", "shardmill", "verify", str(job), "--json"], timeout=180)
    assert done.returncode == 0, done.stderr  # Higham's bound holds for the weighted sums (verdict "agree")
    assert json.loads(done.stdout)["verdict"] == "agree"


def test_a_resume_with_other_weights_is_refused(tmp_path: Path) -> None:
    table = _table(tmp_path / "data")
    job = _job(tmp_path, table, run={"reduction": "fast", "max_steps": 3})
    assert run_cli(["train", str(job), "--no-progress"]).returncode == 0
    raw = table.read_text().splitlines()
    fields = raw[1].split(",")
    fields[4] = "9.5"
    table.write_text("\n".join([raw[0], ",".join(fields), *raw[2:]]) + "\n")
    done = run_cli(["train", str(job), "--no-progress", "--resume", "--set", "run.max_steps=6"])
    assert done.returncode == 2 and "trained with other row weights" in done.stderr, done.stderr


@pytest.mark.parametrize(("data", "words"), [
    ({"class_weights": [1.0, 2.0]}, "`data.class_weights` must hold one weight per class, 3"),
    ({"class_weights": [1.0, -2.0, 1.0]}, "`data.class_weights` must be \"balanced\" or a list of numbers ≥ 0"),
    ({"class_weights": "heavy"}, "`data.class_weights` must be \"balanced\" or a list of numbers ≥ 0"),
    ({"weights": "label"}, "`data.weights` names the column 'label', which is also a target"),
])
def test_bad_weight_settings_are_refused_in_one_line(data: dict, words: str) -> None:
    raw = {"model": {"layers": [4, 5, 3]}, "data": {"inputs": "t.csv", "target": "label", **data}}
    with pytest.raises(JobError) as caught:
        job_from_dict(raw)
    assert words in str(caught.value)


def test_class_weights_need_class_labels() -> None:
    with pytest.raises(JobError, match=r"`data.class_weights` needs class labels"):
        job_from_dict({"model": {"layers": [4, 5, 1], "loss": "squared_error"}, "data": {"class_weights": "balanced"}})


@pytest.mark.parametrize(("edit", "words"), [
    (lambda w: w.__setitem__(7, -1.0), "`data.weights` must hold finite weights ≥ 0; got -1.0 in row 7"),
    (lambda w: w.__setitem__(3, np.nan), "`data.weights` must hold finite weights ≥ 0; got nan in row 3"),
    (lambda w: w.__setitem__(slice(None), 0.0), "`data.weights` sum to zero"),
])
def test_bad_weight_values_are_refused_in_one_line(tmp_path: Path, edit, words: str) -> None:
    rng = np.random.default_rng(1)
    np.save(tmp_path / "x.npy", rng.normal(size=(40, 4)))
    np.save(tmp_path / "y.npy", rng.integers(0, 3, size=40))
    w = np.ones(40)
    edit(w)
    np.save(tmp_path / "w.npy", w)
    job = _job(tmp_path, tmp_path / "x.npy", run={"reduction": "fast"},
               data={"inputs": "x.npy", "targets": "y.npy", "target": "", "weights": "w.npy", "class_weights": ""})
    done = run_cli(["train", str(job), "--no-progress"])
    assert done.returncode == 2 and words in done.stderr and "Traceback" not in done.stderr, done.stderr


def test_a_weight_column_needs_a_table(tmp_path: Path) -> None:
    rng = np.random.default_rng(1)
    np.save(tmp_path / "x.npy", rng.normal(size=(40, 4)))
    np.save(tmp_path / "y.npy", rng.integers(0, 3, size=40))
    job = _job(tmp_path, tmp_path / "x.npy", run={"reduction": "fast"},
               data={"inputs": "x.npy", "targets": "y.npy", "target": "", "weights": "weight", "class_weights": ""})
    done = run_cli(["train", str(job), "--no-progress"])
    assert done.returncode == 2 and "`data.weights` = 'weight' names a column" in done.stderr, done.stderr


@pytest.mark.mpi
def test_weights_with_norm_dropout_and_skips_give_the_same_bits_for_p_1_to_4(tmp_path: Path) -> None:
    # the exactness model with every row-wise concept on at once: weights scale by the global Σ w, the norm and the
    # dropout mask act row by row (a hash of seed, step, global row, layer, unit), the skips add within a row
    table = _table(tmp_path / "data")
    digests = set()
    for P in (1, 2, 3, 4):
        folder = tmp_path / f"p{P}"
        folder.mkdir()
        job = _job(folder, table, run={"epochs": 2, "global_batch": 64})  # 4 chunks of 16: one per rank at P = 4
        text = job.read_text().replace("layers = [4, 10, 3]", 'layers = [4, 10, 10, 3]\nnorm = "layer"\n'
                                       "dropout = 0.2\nresidual = true")
        job.write_text(text)
        done = run_mpi(P, ["-m", "shardmill", "train", str(job), "--no-progress"], timeout=180)
        assert done.returncode == 0, done.stderr
        with np.load(folder / "run" / "final.npz", allow_pickle=False) as saved:
            names = sorted(k for k in saved.files if k[0] in "WbGB" and k[1:].isdigit())
            assert {"G0", "B1"} <= set(names)
            digests.add(hashlib.sha256(b"".join(saved[k].tobytes() for k in names)).hexdigest())
    assert len(digests) == 1


def test_weights_that_leave_the_validation_rows_nothing_are_refused(tmp_path: Path) -> None:
    # a validation loss over rows that all weigh 0 would read 0 and be marked the best (a review finding)
    from shardmill.data.rows import split_rows

    rng = np.random.default_rng(1)
    np.save(tmp_path / "x.npy", rng.normal(size=(40, 4)))
    np.save(tmp_path / "y.npy", rng.integers(0, 3, size=40))
    w = np.ones(40)
    w[split_rows(40, 0.25, 2).validation] = 0.0  # the job's own split (validation_fraction 0.25, seed 2)
    np.save(tmp_path / "w.npy", w)
    job = _job(tmp_path, tmp_path / "x.npy", run={"reduction": "fast"},
               data={"inputs": "x.npy", "targets": "y.npy", "target": "", "weights": "w.npy", "class_weights": ""})
    done = run_cli(["train", str(job), "--no-progress"])
    assert done.returncode == 2 and "sum to zero over the validation rows" in done.stderr, done.stderr


def test_weights_whose_sum_overflows_are_refused(tmp_path: Path) -> None:
    rng = np.random.default_rng(1)
    np.save(tmp_path / "x.npy", rng.normal(size=(40, 4)))
    np.save(tmp_path / "y.npy", rng.integers(0, 3, size=40))
    w = np.ones(40)
    w[:3] = 1e308  # each finite, their sum not (IEEE 754 binary64's largest is about 1.8e308)
    np.save(tmp_path / "w.npy", w)
    job = _job(tmp_path, tmp_path / "x.npy", run={"reduction": "fast"},
               data={"inputs": "x.npy", "targets": "y.npy", "target": "", "weights": "w.npy", "class_weights": ""})
    done = run_cli(["train", str(job), "--no-progress"])
    assert done.returncode == 2 and "sum beyond the largest float64" in done.stderr and "Traceback" not in done.stderr


def test_a_misspelt_weight_column_is_named(tmp_path: Path) -> None:
    table = _table(tmp_path / "data")
    job = _job(tmp_path, table, run={"reduction": "fast"}, data={"weights": "weigth"})
    done = run_cli(["train", str(job), "--no-progress"])
    assert done.returncode == 2 and "`data.weights`" in done.stderr and "'weigth'" in done.stderr, done.stderr
    assert "did you mean 'weight'" in done.stderr


def test_predict_leaves_out_the_weight_column_of_a_headerless_table(tmp_path: Path) -> None:
    table = _table(tmp_path / "data")
    bare = tmp_path / "bare.csv"
    bare.write_text("\n".join(table.read_text().splitlines()[1:]) + "\n")  # the same rows without the header row
    job = _job(tmp_path, bare, run={"reduction": "fast", "epochs": 1},
               data={"inputs": str(bare), "header": "no", "target": "5", "weights": "4", "class_weights": ""})
    assert run_cli(["train", str(job), "--no-progress"]).returncode == 0
    done = run_cli(["predict", str(tmp_path / "run" / "final.npz"), str(bare), "--out", str(tmp_path / "p.npy")])
    assert done.returncode == 0, done.stderr
    assert np.load(tmp_path / "p.npy", allow_pickle=False).shape == (240, 3)
