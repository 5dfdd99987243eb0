"""Categorical inputs (``data.categorical``): vocabularies, embeddings, and the runtime around them.

References: the gradient of the embedding tables against the reverse-mode autodiff library ``autograd`` (an
embedding lookup is a row selection, which autograd differentiates as a scatter-add); exact mode's parameters
against themselves at P = 1, 2, 3, 4 and across a SIGTERM and a resume at another P (the exactness model);
``verify`` against Higham's bound; the exported graph against onnxruntime.
"""

from __future__ import annotations

import hashlib
import json
import signal
from pathlib import Path

import autograd.numpy as anp
import numpy as np
import pytest
import shardmill as sm
from autograd import grad as autograd_grad
from autograd.scipy.special import logsumexp as anp_logsumexp
from helpers import run_cli, run_mpi, stop_a_run
from shardmill.config import job_from_dict
from shardmill.data.categories import categories_from_rows
from shardmill.errors import JobError
from shardmill.model.vocabulary import MAX_VOCABULARY, Category, canonical, check_limits, default_width

CITIES = ["paris", "oslo", "lima", "rome", "kiev", "quito"]


def _table(folder: Path, rows: int = 240, seed: int = 0) -> Path:
    """A CSV with two numeric columns, a text category (city), an integer-coded one (kind), weights and a label."""
    rng = np.random.default_rng(seed)
    folder.mkdir(parents=True, exist_ok=True)
    x1, x2 = rng.normal(size=rows), rng.normal(size=rows)
    city, kind = rng.integers(0, len(CITIES), rows), rng.integers(0, 3, rows) * 7
    weight = rng.uniform(0.5, 2.0, rows)
    label = (x1 + (city % 3) - (kind == 7) > 0.5).astype(int) + (x2 > 1)
    lines = ["x1,city,x2,kind,w,label"] + [
        f"{float(x1[i])!r},{CITIES[city[i]]},{float(x2[i])!r},{kind[i]},{float(weight[i])!r},{label[i]}"
        for i in range(rows)]
    (folder / "t.csv").write_text("\n".join(lines) + "\n")
    return folder / "t.csv"


def _toml(value) -> str:
    if isinstance(value, dict):  # an inline table
        return "{ " + ", ".join(f"{k} = {_toml(v)}" for k, v in value.items()) + " }"
    return json.dumps(value)


def _job(folder: Path, table: Path, run: dict | None = None, data: dict | None = None,
         model: str = "layers = [4, 10, 3]") -> Path:
    settings = {"epochs": 3, "global_batch": 64, "exact_chunk": 16, "reduction": "exact", "seed": 3,
                "workdir": str(folder / "run"), **(run or {})}
    data_keys = {"inputs": str(table), "target": "label", "categorical": ["city", "kind"], "weights": "w",
                 "validation_fraction": 0.2, **(data or {})}
    lines = ["[model]", model, 'activation = "tanh"', "[data]"]
    lines += [f"{k} = {_toml(v)}" for k, v in data_keys.items()]
    lines += ["[optimizer]", 'method = "adam"', "learning_rate = 0.01", "clip_global_norm = 1.0", "[run]"]
    lines += [f"{k} = {json.dumps(v)}" for k, v in settings.items()]
    folder.mkdir(parents=True, exist_ok=True)
    job = folder / "job.toml"
    job.write_text("\n".join(lines) + "\n")
    return job


def _digest(workdir: Path) -> str:
    with np.load(workdir / "final.npz", allow_pickle=False) as saved:
        names = sorted(k for k in saved.files if k[0] in "WbGB" and k[1:].isdigit() or k.startswith("E_"))
        assert {"E_city", "E_kind"} <= set(names)
        return hashlib.sha256(b"".join(saved[k].tobytes() for k in names)).hexdigest()


# --- vocabularies ------------------------------------------------------------------------------------------------

def test_vocabulary_is_sorted_from_the_training_rows_with_an_unknown_slot() -> None:
    job = job_from_dict({"model": {"layers": [2, 3, 2]},
                         "data": {"categorical": ["c", "k"], "validation_fraction": 0.5, "inputs": "t.csv",
                                  "target": "y"}})
    texts = ["b", "a", "c", "a", "d", "b", "a", "e"]
    ints = [canonical(v) for v in ["10", " 2", "007", 2, 10, True, "2", "10"]]
    categories, codes = categories_from_rows(job, [texts, ints])
    train = sorted(set(range(8)) - set(np.random.default_rng([job.run.seed, 7919]).permutation(8)[:4].tolist()))
    # the vocabulary: the distinct training values, sorted (by code point, or numerically for integer codes)
    assert categories[0].vocabulary == sorted({texts[i] for i in train})
    assert categories[1].vocabulary == [str(v) for v in sorted({int(ints[i]) for i in train})]
    for j, column in enumerate((texts, ints)):
        for i, value in enumerate(column):
            known = value in categories[j].vocabulary
            # code 0 is the unknown slot; a known value's code is its position + 1
            assert codes[i, j] == (categories[j].vocabulary.index(value) + 1 if known else 0)
    assert canonical("007") == canonical(7) == "7" and canonical(" x ") == "x"
    assert categories[0].width == default_width(len(categories[0].vocabulary))


def test_width_rule_and_overrides() -> None:
    assert [default_width(v) for v in (1, 2, 3, 31, 32, 1000)] == [1, 2, 2, 16, 16, 16]  # min(16, ⌈(v+1)/2⌉)
    job = job_from_dict({"model": {"layers": [2, 3, 2]},
                         "data": {"categorical": ["c", "k"], "embedding_widths": {"k": 5}, "inputs": "t.csv",
                                  "target": "y", "validation_fraction": 0.0}})
    categories, _ = categories_from_rows(job, [["a", "b"], ["1", "2"]])
    assert [c.width for c in categories] == [default_width(2), 5]


def test_a_vocabulary_above_the_limit_is_refused_naming_the_column_and_its_count() -> None:
    big = Category("user", [str(i) for i in range(MAX_VOCABULARY + 1)], 16)
    with pytest.raises(JobError, match=r"`data.categorical` column 'user' holds 100,001 distinct values"):
        check_limits([big])


# --- the gradient against autograd -------------------------------------------------------------------------------

def test_embedding_gradient_matches_autograd() -> None:
    rng = np.random.default_rng(5)
    n, numeric = 17, 3
    model = sm.MLP([numeric + 2, 6, 3], activation="tanh", dtype="float64", seed=4, norm="layer",
                   embeddings=[("city", 5, 3), ("kind", 4, 2)])
    X = rng.normal(size=(n, numeric))
    codes = np.stack([rng.integers(0, 5, n), rng.integers(0, 4, n)], axis=1)
    codes[0] = 0  # the unknown slot trains like any other row
    y = rng.integers(0, 3, n)
    w = rng.uniform(0.1, 2.0, n)
    _, gradient = model.loss_and_grad(X, y, weights=w, codes=codes)

    def loss(flat):
        p = model.named(flat)
        A = anp.concatenate([X, p["E_city"][codes[:, 0]], p["E_kind"][codes[:, 1]]], axis=1)
        Z = anp.dot(A, p["W0"]) + p["b0"]
        mu = anp.mean(Z, axis=1, keepdims=True)
        var = anp.mean((Z - mu) ** 2, axis=1, keepdims=True)
        H = anp.tanh(p["G0"] * (Z - mu) / anp.sqrt(var + 1e-5) + p["B0"])
        logits = anp.dot(H, p["W1"]) + p["b1"]
        per_row = anp_logsumexp(logits, axis=1) - logits[np.arange(n), y]
        return anp.sum(w * per_row) / anp.sum(w)

    expected = autograd_grad(loss)(model.params.copy())
    np.testing.assert_allclose(gradient, expected, rtol=1e-9, atol=1e-12)  # autograd (reverse mode), float64
    start, stop = model.embedding_range()
    assert np.abs(gradient[start:stop]).max() > 0


# --- through the CLI: exact bits, resume, predict, verify, bad input ----------------------------------------------

EVERYTHING = 'layers = [4, 10, 10, 3]\nnorm = "layer"\ndropout = [0.2, 0.1]\nresidual = true'
"""A model with every new concept on at once: layer norm, dropout, a residual skip (10 → 10), beside the
embeddings and row weights every job of this file has."""


@pytest.mark.mpi
def test_exact_mode_with_everything_on_gives_the_same_bits_for_p_1_to_4(tmp_path: Path) -> None:
    table = _table(tmp_path / "data")
    digests = set()
    for P in (1, 2, 3, 4):
        folder = tmp_path / f"p{P}"
        folder.mkdir()
        done = run_mpi(P, ["-m", "shardmill", "train", str(_job(folder, table, model=EVERYTHING)), "--no-progress"],
                       timeout=180)
        assert done.returncode == 0, done.stderr
        digests.add(_digest(folder / "run"))
    assert len(digests) == 1  # the exactness model: the same bits for every P


@pytest.mark.mpi
def test_a_sigterm_and_a_resume_at_another_process_count_give_the_same_bits(tmp_path: Path) -> None:
    table = _table(tmp_path / "data", rows=200)
    run = {"epochs": 40, "global_batch": 32, "exact_chunk": 8}
    straight = _job(tmp_path / "straight", table, run=run, model=EVERYTHING)
    assert run_cli(["train", str(straight), "--ranks", "3", "--no-progress"], timeout=300).returncode == 0
    job = _job(tmp_path / "stopped", table, run=run, model=EVERYTHING)
    status, err = stop_a_run(job, 2, tmp_path / "stopped" / "run" / "metrics.jsonl")
    assert status == 128 + signal.SIGTERM, err[-3000:]
    assert not (tmp_path / "stopped" / "run" / "final.npz").exists()
    resumed = run_cli(["train", str(job), "--ranks", "4", "--resume", "--no-progress"], timeout=300)
    assert resumed.returncode == 0, resumed.stderr[-3000:]
    assert _digest(tmp_path / "stopped" / "run") == _digest(tmp_path / "straight" / "run")  # the exactness model


@pytest.fixture(scope="module")
def trained(tmp_path_factory) -> Path:
    """A workdir's folder whose run trained with two categorical columns (fast mode, float32)."""
    tmp_path = tmp_path_factory.mktemp("trained")
    job = _job(tmp_path, _table(tmp_path / "data"), run={"reduction": "fast", "epochs": 2})
    done = run_cli(["train", str(job), "--no-progress"], timeout=180)
    assert done.returncode == 0, done.stderr
    return tmp_path


def test_predict_by_column_name_with_an_unseen_value(trained: Path, tmp_path: Path) -> None:
    predictor = sm.load_model(trained / "run" / "final.npz")
    assert [c.column for c in predictor.categories] == ["city", "kind"]
    assert predictor.categories[0].vocabulary == sorted(CITIES)
    # new rows, columns in another order, one city and one kind never seen in training, no label column
    rows = ["kind,x2,city,x1", "7,0.5,oslo,0.1", "99,-1.0,atlantis,2.0", "0,0.0,lima,-0.3"]
    (tmp_path / "new.csv").write_text("\n".join(rows) + "\n")
    out = tmp_path / "p.npy"
    done = run_cli(["predict", str(trained / "run" / "final.npz"), str(tmp_path / "new.csv"), "--out", str(out)])
    assert done.returncode == 0, done.stderr
    written = np.load(out, allow_pickle=False)
    direct = predictor.outputs(np.array([[0.1, 0.5], [2.0, -1.0], [-0.3, 0.0]]),
                               categories={"city": ["oslo", "atlantis", "lima"], "kind": [7, 99, 0]})
    np.testing.assert_array_equal(written, direct)
    # the unseen values take the unknown slot (code 0): the same outputs as giving code 0 directly
    codes = np.array([[sorted(CITIES).index("oslo") + 1, 2], [0, 0], [sorted(CITIES).index("lima") + 1, 1]])
    inputs = predictor.standardise(np.array([[0.1, 0.5], [2.0, -1.0], [-0.3, 0.0]]))
    np.testing.assert_array_equal(direct, predictor.model.predict(inputs, codes=codes))


def test_export_with_code_inputs_matches_onnxruntime_and_the_card_holds_the_vocabularies(trained: Path,
                                                                                       tmp_path: Path) -> None:
    import onnxruntime

    out = tmp_path / "m.onnx"
    done = run_cli(["export", str(trained / "run"), "--out", str(out)])
    assert done.returncode == 0, done.stderr
    card = json.loads((tmp_path / "m.card.json").read_text())
    categorical = card["inputs"]["categorical"]
    assert [c["column"] for c in categorical] == ["city", "kind"]
    assert categorical[0]["vocabulary"] == sorted(CITIES) and categorical[1]["vocabulary"] == ["0", "7", "14"]
    predictor = sm.load_model(trained / "run")
    rng = np.random.default_rng(9)
    X = rng.normal(size=(50, 2))
    codes = np.stack([rng.integers(0, 7, 50), rng.integers(0, 4, 50)], axis=1)
    codes[:3] = [[99, -1], [0, 0], [-5, 4]]  # out of range: the graph takes them as the unknown slot
    session = onnxruntime.InferenceSession(str(out), providers=["CPUExecutionProvider"])
    got = session.run(["outputs"], {"inputs": X.astype(np.float32), "codes": codes})[0]
    inside = (codes >= 0) & (codes < np.array([len(CITIES) + 1, 4]))
    expected = predictor.model.predict(predictor.standardise(X), codes=np.where(inside, codes, 0))
    # onnxruntime runs the same operations; float32 sums may be ordered differently (common practice: a few ulps)
    np.testing.assert_allclose(got, expected, rtol=1e-5, atol=1e-6)


@pytest.mark.mpi
def test_verify_bounds_a_run_with_embeddings(tmp_path: Path) -> None:
    table = _table(tmp_path / "data")
    job = _job(tmp_path, table, run={"reduction": "fast"})
    done = run_mpi(3, ["-m", "shardmill", "verify", str(job), "--json"], timeout=180)
    assert done.returncode == 0, done.stderr
    report = json.loads(done.stdout)
    assert report["verdict"] == "agree"  # Higham 2002 §4.2: every tensor within 2·γ_{G−1}·Σ|x_i|
    tensors = {row["tensor"] for batch in report["batches"] for row in batch["tensors"]}
    assert {"E_city", "E_kind"} <= tensors


@pytest.mark.parametrize(("data", "words"), [
    ({"categorical": ["town"]}, "`data.categorical` column 'town' is not in"),
    ({"categorical": ["city", "label"]}, "`data.categorical` names the column 'label', which is also a target"),
    ({"categorical": ["city", "x1"], "features": ["x1", "x2"]},
     "`data.categorical` names the column 'x1', which is also a feature"),
    ({"embedding_widths": {"town": 3}}, "`data.embedding_widths` names the column 'town', which is not in"),
    ({"embedding_widths": [3]}, "`data.embedding_widths` must give one width per `data.categorical` column, 2"),
])
def test_bad_categorical_settings_are_refused_in_one_line(tmp_path: Path, data: dict, words: str) -> None:
    table = _table(tmp_path / "data", rows=60)
    job = _job(tmp_path, table, run={"reduction": "fast"}, data=data)
    done = run_cli(["train", str(job), "--no-progress"])
    assert done.returncode == 2 and words in done.stderr, done.stderr
    assert "Traceback" not in done.stderr and len(done.stderr.strip().splitlines()) == 1, done.stderr


@pytest.mark.mpi
def test_a_parquet_table_with_string_and_integer_categories_trains_and_predicts(tmp_path: Path) -> None:
    pa = pytest.importorskip("pyarrow")
    pq = pytest.importorskip("pyarrow.parquet")
    rng = np.random.default_rng(2)
    n = 120
    city = [CITIES[i] for i in rng.integers(0, 4, n)]
    kind = (rng.integers(0, 3, n) * 7).astype(np.int64)
    x = rng.normal(size=n)
    label = ((x > 0) ^ (kind == 7)).astype(np.int64)
    table = pa.table({"x1": x, "city": city, "kind": kind, "x2": rng.normal(size=n), "w": np.ones(n),
                      "label": label})
    pq.write_table(table, tmp_path / "t.parquet", row_group_size=40)
    job = _job(tmp_path, tmp_path / "t.parquet", run={"reduction": "exact", "epochs": 2, "global_batch": 32,
                                                       "exact_chunk": 8})
    done = run_mpi(2, ["-m", "shardmill", "train", str(job), "--no-progress"], timeout=180)
    assert done.returncode == 0, done.stderr
    predictor = sm.load_model(tmp_path / "run")
    assert predictor.categories[0].vocabulary == sorted(set(city))  # every city occurs in the training rows
    assert predictor.categories[1].vocabulary == ["0", "7", "14"]  # integer codes, sorted as integers
    pq.write_table(table.slice(0, 5), tmp_path / "new.parquet")
    out = tmp_path / "p.npy"
    done = run_cli(["predict", str(tmp_path / "run"), str(tmp_path / "new.parquet"), "--out", str(out)])
    assert done.returncode == 0, done.stderr
    direct = predictor.outputs(np.stack([x[:5], table.column("x2").to_numpy()[:5]], axis=1),
                               categories={"city": city[:5], "kind": kind[:5]})
    np.testing.assert_array_equal(np.load(out, allow_pickle=False), direct)


def test_a_resume_whose_data_gives_other_vocabularies_is_refused(tmp_path: Path) -> None:
    table = _table(tmp_path / "data", rows=120)
    job = _job(tmp_path, table, run={"reduction": "fast", "epochs": 3})
    first = run_cli(["train", str(job), "--no-progress", "--set", "run.max_steps=2"])
    assert first.returncode == 0, first.stderr
    table.write_text(table.read_text().replace(",paris,", ",paname,"))
    done = run_cli(["train", str(job), "--no-progress", "--resume"])
    assert done.returncode == 2 and "other categorical vocabularies" in done.stderr, done.stderr
