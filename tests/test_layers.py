"""The hidden layer's optional parts: layer normalisation, dropout and residual skips, against outside references.

Gradients of ``MLP.loss_and_grad`` against the independent reverse-mode autodiff library ``autograd`` on a model
written here in ``autograd.numpy`` (float64); the kernels against NumPy written here; the dropout decision against a
pure-Python rewrite of the hash docs/models.md spells out (SplitMix64, Steele et al. 2014; MurmurHash3's
fmix32 finaliser, Appleby 2011); the decision's independence of how rows are cut; exact mode's bits for P = 1…4 and
across a SIGTERM-and-resume at another P; the bad-input lines.
"""

from __future__ import annotations

import hashlib
import signal
from pathlib import Path

import autograd.numpy as anp
import numpy as np
import pytest
import shardmill as sm
from autograd import grad as autograd_grad
from autograd.scipy.special import logsumexp as anp_logsumexp
from helpers import make_classification, run_cli, run_mpi, stop_a_run, write_job
from shardmill.errors import JobError
from shardmill.kernels import layers as K

EPS = 1e-5  # layer normalisation's ε, as docs/models.md states it
MASK64 = (1 << 64) - 1
MASK32 = (1 << 32) - 1


# --- the dropout decision, transcribed from its published parts in plain Python integers ------------------------
def splitmix64(x: int) -> int:
    """SplitMix64's output function (Steele, Lea & Flood 2014, Fig. 1; the constants of Vigna's splitmix64.c)."""
    z = (x + 0x9E3779B97F4A7C15) & MASK64
    z = ((z ^ (z >> 30)) * 0xBF58476D1CE4E5B9) & MASK64
    z = ((z ^ (z >> 27)) * 0x94D049BB133111EB) & MASK64
    return z ^ (z >> 31)


def fmix32(h: int) -> int:
    """MurmurHash3's 32-bit finaliser (Appleby 2011)."""
    h ^= h >> 16
    h = (h * 0x85EBCA6B) & MASK32
    h ^= h >> 13
    h = (h * 0xC2B2AE35) & MASK32
    return h ^ (h >> 16)


def keep_reference(seed: int, step: int, row: int, layer: int, width: int, rate: float) -> np.ndarray:
    """The keep decisions of one row, as docs/models.md defines them."""
    key = splitmix64(splitmix64(splitmix64(seed) ^ step) ^ layer)
    k = splitmix64(key ^ row)
    low, high = k & MASK32, k >> 32
    threshold = min(int(rate * 2**32), MASK32)
    return np.array([fmix32(((low + j * 0x9E3779B9) & MASK32) ^ high) >= threshold for j in range(width)])


# --- an independent model in autograd.numpy ---------------------------------------------------------------------
def ag_activation(name: str, z):
    return {"tanh": anp.tanh, "sigmoid": lambda v: 1.0 / (1.0 + anp.exp(-v)), "identity": lambda v: v,
            "softplus": lambda v: anp.logaddexp(0.0, v)}[name](z)


def cut(model: sm.MLP, flat):
    """{name: tensor} cut out of any flat vector at the offsets of the model's named views (autograd boxes too)."""
    base = model.params.__array_interface__["data"][0]
    out = {}
    for name, view in model.named(model.params).items():
        start = (view.__array_interface__["data"][0] - base) // model.params.itemsize
        out[name] = flat[start:start + view.size].reshape(view.shape)
    return out


def ag_loss(model: sm.MLP, X, y, keep=None):
    """Mean softmax cross-entropy as a function of the flat parameters, written with autograd.numpy:
    Z = A W + b; N = g (Z − μ)/√(σ² + ε) + β (Ba, Kiros & Hinton 2016, eq. 4); H = f(N);
    D = H·keep/(1 − p) (Srivastava et al. 2014, inverted); A' = D + A where the widths agree (He et al. 2016)."""
    L = model.n_layers

    def f(flat):
        t = cut(model, flat)
        A = X
        for l in range(L):
            Z = anp.dot(A, t[f"W{l}"]) + t[f"b{l}"]
            if l == L - 1:
                A = Z
                break
            if model.norm == "layer":
                mu = anp.mean(Z, axis=1, keepdims=True)
                var = anp.mean((Z - mu) ** 2, axis=1, keepdims=True)
                Z = t[f"G{l}"] * (Z - mu) / anp.sqrt(var + EPS) + t[f"B{l}"]
            H = ag_activation(model.activations[l], Z)
            if keep is not None and model.dropout[l] > 0:
                H = H * keep[l] / (1.0 - model.dropout[l])
            A = H + A if model.skips[l] else H
        n = X.shape[0]
        return anp.sum(anp_logsumexp(A, axis=1) - A[np.arange(n), y]) / n

    return f


def problem(layers, seed=0, n=7, **keys):
    model = sm.MLP(layers, activation=keys.pop("activation", "tanh"), dtype="float64", seed=seed, **keys)
    rng = np.random.default_rng(seed + 50)
    model.params = model.params + 0.2 * rng.standard_normal(model.n_params)  # gains and shifts off 1 and 0
    X = rng.standard_normal((n, layers[0]))
    y = rng.integers(0, layers[-1], size=n)
    return model, X, y


def relative_error(a: np.ndarray, b: np.ndarray) -> float:
    return float(np.linalg.norm(a - b) / max(np.linalg.norm(a), np.linalg.norm(b), 1e-300))


CASES = {
    "norm": dict(norm="layer"),
    "residual": dict(residual=True),
    "dropout": dict(dropout=0.3),
    "all": dict(norm="layer", residual=True, dropout=[0.2, 0.5, 0.1], activation=["tanh", "softplus", "sigmoid"]),
}


@pytest.mark.parametrize("case", list(CASES))
def test_gradient_matches_autograd(case):
    keys = dict(CASES[case])
    layers = [5, 6, 6, 6, 3]
    if "dropout" in keys and not isinstance(keys["dropout"], list):
        keys["dropout"] = [keys["dropout"]] * 3
    model, X, y = problem(layers, seed=3, **keys)
    step = 11 if "dropout" in keys else None
    keep = None
    if step is not None:
        keep = [np.array([keep_reference(3, step, i, h, layers[h + 1], model.dropout[h]) for i in range(X.shape[0])])
                for h in range(3)]
    loss, grads = model.loss_and_grad(X, y, step=step)
    f = ag_loss(model, X, y, keep)
    expected = autograd_grad(f)(model.params.copy())
    assert abs(loss - f(model.params.copy())) < 1e-12  # autograd (Maclaurin, Duvenaud & Adams), float64
    assert relative_error(grads, expected) < 1e-10  # autograd, float64 reverse mode


def test_no_dropout_without_a_step_and_evaluation_keeps_every_unit():
    model, X, y = problem([4, 5, 5, 3], seed=1, dropout=0.5, residual=True)
    plain = sm.MLP([4, 5, 5, 3], activation="tanh", dtype="float64", residual=True)
    plain.params = model.params
    assert model.loss_and_grad(X, y)[0] == plain.loss_and_grad(X, y)[0]  # inverted dropout: none at inference
    assert np.array_equal(model.predict(X), plain.predict(X))  # Srivastava et al. 2014, §10 (scaled at training)


@pytest.mark.parametrize("activation", ["identity", "tanh", "relu"])
def test_norm_kernels_against_numpy(activation):
    from shardmill.kernels.activations import CODES

    f = {"identity": lambda v: v, "tanh": np.tanh, "relu": lambda v: np.maximum(v, 0)}[activation]
    df = {"identity": lambda v: 1.0, "tanh": lambda v: 1 - np.tanh(v) ** 2, "relu": lambda v: (v > 0) * 1.0}[activation]
    rng = np.random.default_rng(0)
    for dtype, tol in ((np.float32, 1e-5), (np.float64, 1e-13)):
        n, m = 9, 37
        Z = rng.normal(3.0, 2.0, size=(n, m)).astype(dtype)
        b, g, s = (rng.normal(size=m).astype(dtype) for _ in range(3))
        z = Z.astype(np.float64) + b
        H, stats = np.empty_like(Z), np.empty((n, 2))
        K.norm_forward(Z, b, g, s, H, stats, np.zeros((2, m)), CODES[activation])
        sd = np.sqrt(z.var(1, keepdims=True) + EPS)
        xhat = (z - z.mean(1, keepdims=True)) / sd
        N = g * xhat + s  # Ba, Kiros & Hinton 2016, eq. 4
        assert np.max(np.abs(H - f(N))) < tol * 10
        dH = rng.normal(size=(n, m)).astype(dtype)
        dZ, dg, ds = dH.copy(), np.empty(m, dtype), np.empty(m, dtype)
        K.norm_backward(Z, stats, g, s, H, dZ, dg, ds, np.zeros((2, m), dtype), CODES[activation])  # in place
        dN = dH * df(N)
        dx = dN * g
        ref = (dx - dx.mean(1, keepdims=True) - xhat * (dx * xhat).mean(1, keepdims=True)) / sd  # derived by hand
        assert np.max(np.abs(dZ - ref)) < tol * 10
        assert np.max(np.abs(dg - (dN * xhat).sum(0))) < tol * 100
        assert np.max(np.abs(ds - dN.sum(0))) < tol * 100


def test_dropout_kernel_is_the_documented_hash_and_keeps_one_minus_p():
    rng = np.random.default_rng(2)
    n, m, rate = 40, 33, 0.3
    H = rng.normal(size=(n, m)).astype(np.float32)
    skip = rng.normal(size=(n, m)).astype(np.float32)
    A, keep = np.empty_like(H), np.empty((n, m), np.uint8)
    rows = rng.integers(0, 10**9, size=n).astype(np.int64)
    key = np.uint64(K.dropout_key(np.uint64(5), np.uint64(123), np.uint64(2)))
    threshold = np.uint32(int(rate * 2**32))
    K.dropout_forward(H, skip, A, keep, rows, key, threshold, np.float32(1 / (1 - rate)), True)
    expected = np.array([keep_reference(5, 123, int(r), 2, m, rate) for r in rows])
    assert np.array_equal(keep.astype(bool), expected)  # SplitMix64 + fmix32 as transcribed above
    assert np.array_equal(A, np.where(expected, H * np.float32(1 / (1 - rate)), np.float32(0)) + skip)
    big = np.empty((2000, 256), np.uint8)
    K.dropout_forward(np.ones((2000, 256)), np.ones((2000, 256)), np.empty((2000, 256)), big,
                      np.arange(2000, dtype=np.int64), key, threshold, 1.0, False)
    assert abs(big.mean() - 0.7) < 0.005  # binomial: 512 000 draws, 4.9 standard deviations  # common practice


def test_the_mask_of_a_row_does_not_depend_on_its_part():
    # a row's decision is a function of (seed, step, row, layer, unit) only: cut the batch anyhow, same mask
    rng = np.random.default_rng(4)
    model = sm.MLP([3, 16, 16, 2], activation="tanh", dropout=0.4, seed=9)
    X = rng.normal(size=(30, 3)).astype(np.float32)
    rows = rng.permutation(1000)[:30].astype(np.int64)
    whole = model.workspace(30)
    whole.inputs[:30] = X
    whole.forward(30, step=4, rows=rows)
    for trial in range(5):
        cuts = np.sort(rng.choice(np.arange(1, 30), size=trial + 1, replace=False))
        for lo, hi in zip([0, *cuts], [*cuts, 30], strict=True):
            ws = model.workspace(hi - lo)
            order = rng.permutation(hi - lo)  # the rows of a part in any order
            ws.inputs[:hi - lo] = X[lo:hi][order]
            ws.forward(hi - lo, step=4, rows=rows[lo:hi][order])
            for h in range(2):
                assert np.array_equal(ws.keep[h][:hi - lo], whole.keep[h][lo:hi][order])  # DESIGN.md: counters
                assert np.array_equal(ws.A[h + 1][:hi - lo], whole.A[h + 1][lo:hi][order])


def test_new_parameters_are_views_into_params_with_checkpoint_names():
    model = sm.MLP([4, 8, 8, 3], norm="layer", residual=True)
    named = model.named(model.params)
    assert list(named) == ["W0", "b0", "G0", "B0", "W1", "b1", "G1", "B1", "W2", "b2"]
    assert sum(v.size for v in named.values()) == model.n_params
    for name in ("G0", "B0", "G1", "B1"):
        assert np.shares_memory(named[name], model.params)
    assert np.all(named["G1"] == 1) and np.all(named["B1"] == 0)  # Ba, Kiros & Hinton 2016: g = 1, b = 0 at start
    start, stop = model.slices[1]
    assert named["G1"].__array_interface__["data"][0] >= model.params[start:].__array_interface__["data"][0]
    assert model.skips == [False, True]


@pytest.mark.parametrize("keys, message", [
    (dict(dropout=1.0), "`model.dropout` must be a rate in [0, 1) or a list of them; got 1.0"),
    (dict(dropout=-0.1), "`model.dropout` must be a rate in [0, 1) or a list of them; got -0.1"),
    (dict(dropout=[0.1]), "`model.dropout` must be one rate or a list of 2 rates (one per hidden layer); got a list "
                          "of 1"),
    (dict(residual=True, layers=[4, 8, 6, 3]), "`model.residual` = true needs two consecutive hidden layers of equal "
                                               "width"),
    (dict(norm="batch"), "`model.norm` must be one of layer, none; got 'batch'"),
])
def test_bad_input_is_one_line(keys, message):
    layers = keys.pop("layers", [4, 8, 8, 3])
    with pytest.raises(JobError) as err:
        sm.MLP(layers, **keys)
    assert message in str(err.value) and "\n" not in str(err.value)


def test_bad_input_from_the_command_line_is_one_line(tmp_path):
    make_classification(tmp_path, rows=40, features=4, classes=3)
    job = write_job(tmp_path, {"layers": [4, 8, 3], "residual": True}, {"workdir": "run"})
    proc = run_cli(["train", str(job), "--no-progress"], timeout=120)
    assert proc.returncode == 2 and "Traceback" not in proc.stderr
    assert proc.stderr.strip().count("\n") == 0 and "`model.residual` = true needs" in proc.stderr


# --- exact mode through the command line -------------------------------------------------------------------------
MODEL = {"layers": [6, 16, 16, 16, 3], "activation": "tanh", "dtype": "float32", "norm": "layer",
         "residual": True, "dropout": [0.1, 0.3, 0.2]}


def final_digest(workdir: Path) -> str:
    digest = hashlib.sha256()
    with np.load(workdir / "final.npz", allow_pickle=False) as archive:
        for name in sorted(n for n in archive.files if n[0] in "WbGB" and n[1:].isdigit()):
            digest.update(name.encode() + archive[name].tobytes())
    return digest.hexdigest()


def exact_job(folder: Path, data: Path, epochs: int = 3) -> Path:
    folder.mkdir(parents=True, exist_ok=True)
    return write_job(folder, MODEL, {"epochs": epochs, "global_batch": 24, "exact_chunk": 4, "reduction": "exact",
                                     "seed": 5, "workdir": str(folder / "run")},
                     {"method": "adam", "learning_rate": 0.01},
                     {"inputs": str(data / "x.npy"), "targets": str(data / "y.npy"), "validation_fraction": 0.2})


@pytest.mark.mpi
def test_exact_mode_gives_the_same_bits_for_every_process_count(tmp_path):
    make_classification(tmp_path, rows=150, features=6, classes=3, seed=2)
    digests = set()
    for P in (1, 2, 3, 4):
        job = exact_job(tmp_path / f"p{P}", tmp_path)
        done = run_mpi(P, ["-m", "shardmill", "train", str(job), "--no-progress"], timeout=240)
        assert done.returncode == 0, done.stderr[-3000:]
        digests.add(final_digest(tmp_path / f"p{P}" / "run"))
    assert len(digests) == 1  # the exactness model (README): per-row layers, counter-based dropout, exact sums


@pytest.mark.mpi
def test_a_sigterm_and_a_resume_at_another_process_count_give_the_same_bits(tmp_path):
    make_classification(tmp_path, rows=150, features=6, classes=3, seed=2)
    straight = exact_job(tmp_path / "straight", tmp_path, epochs=40)
    assert run_cli(["train", str(straight), "--ranks", "3", "--no-progress"], timeout=300).returncode == 0
    job = exact_job(tmp_path / "stopped", tmp_path, epochs=40)
    status, err = stop_a_run(job, 2, tmp_path / "stopped" / "run" / "metrics.jsonl")
    assert status == 128 + signal.SIGTERM, err[-3000:]
    assert not (tmp_path / "stopped" / "run" / "final.npz").exists()
    resumed = run_cli(["train", str(job), "--ranks", "4", "--resume", "--no-progress"], timeout=300)
    assert resumed.returncode == 0, resumed.stderr[-3000:]
    # exact mode with counter-based dropout: the resumed run at P = 4 ends on the P = 3 run's bits (README)
    assert final_digest(tmp_path / "stopped" / "run") == final_digest(tmp_path / "straight" / "run")


# --- through everything: train, load_model, predict, export (onnxruntime), model card, verify --------------------
@pytest.mark.parametrize("dtype", ["float32", "float64"])
def test_trained_model_loads_predicts_and_exports_like_onnxruntime(tmp_path, dtype):
    import argparse
    import json

    import onnxruntime
    from shardmill.commands.export import cmd_export

    make_classification(tmp_path, rows=160, features=6, classes=3, seed=1)
    model = {**MODEL, "dtype": dtype}
    job = write_job(tmp_path, model, {"epochs": 3, "global_batch": 16, "seed": 2, "workdir": "run"},
                    {"method": "adam", "learning_rate": 0.02})
    assert run_cli(["train", str(job), "--no-progress"], timeout=240).returncode == 0
    predictor = sm.load_model(tmp_path / "run" / "final.npz")
    m = predictor.model
    assert (m.norm, m.residual, m.dropout) == ("layer", True, [0.1, 0.3, 0.2])
    assert not np.all(m.gains[0] == 1)  # the gain trained: its gradient reached the update
    X = np.load(tmp_path / "x.npy")
    out = tmp_path / "model.onnx"
    assert cmd_export(argparse.Namespace(model=tmp_path / "run" / "final.npz", out=out, card=None, opset=17)) == 0
    session = onnxruntime.InferenceSession(str(out), providers=["CPUExecutionProvider"])
    got = session.run(["outputs"], {"inputs": X.astype(dtype)})[0]
    expected = predictor.outputs(X)
    # reference: onnxruntime, a general-purpose ONNX runtime; tolerances as tests/test_export.py states them
    np.testing.assert_allclose(got, expected, rtol={"float32": 1e-5, "float64": 1e-12}[dtype],
                               atol={"float32": 1e-6, "float64": 1e-13}[dtype])
    card = json.loads(out.with_suffix(".card.json").read_text())
    hidden = card["layers"][:3]
    assert [layer["residual"] for layer in hidden] == [False, True, True]
    assert [layer["dropout"] for layer in hidden] == [0.1, 0.3, 0.2]
    assert all(layer["norm"] == "layer" and layer["gain"] == f"G{h}" for h, layer in enumerate(hidden))


def test_a_checkpoint_without_the_new_keys_still_loads(tmp_path):
    # a final.npz of a model from before the keys existed: its model_json lacks norm, dropout and residual
    make_classification(tmp_path, rows=80, features=4, classes=3, seed=1)
    job = write_job(tmp_path, {"layers": [4, 8, 3]}, {"epochs": 1, "global_batch": 16, "workdir": "run"})
    assert run_cli(["train", str(job), "--no-progress"], timeout=240).returncode == 0
    import json

    with np.load(tmp_path / "run" / "final.npz", allow_pickle=False) as archive:
        arrays = {k: archive[k] for k in archive.files}
    spec = json.loads(str(arrays["model_json"]))
    for key in ("norm", "dropout", "residual"):
        spec.pop(key, None)
    arrays["model_json"] = np.array(json.dumps(spec))
    np.savez(tmp_path / "old.npz", **arrays)
    predictor = sm.load_model(tmp_path / "old.npz")
    assert predictor.model.norm == "none" and not predictor.model.residual


@pytest.mark.mpi
@pytest.mark.parametrize("P, dtype, reduction", [(2, "float32", "fast"), (3, "float64", "exact")])
def test_verify_agrees_with_norm_dropout_and_skips(tmp_path, P, dtype, reduction):
    import json

    make_classification(tmp_path, rows=200, features=6, classes=3, seed=5)
    job = write_job(tmp_path, {**MODEL, "dtype": dtype},
                    {"global_batch": 48, "exact_chunk": 12, "reduction": reduction, "seed": 1, "workdir": "run"})
    report = tmp_path / "report.json"
    proc = run_mpi(P, ["-m", "shardmill", "verify", str(job), "--out", str(report)], timeout=180)
    assert proc.returncode == 0, proc.stderr[-3000:]
    result = json.loads(report.read_text())
    tensors = {t["tensor"] for b in result["batches"] for t in b["tensors"]}
    assert {"G0", "B0", "G2", "B2"} <= tensors
    # Higham 2002, §4.2: every tensor within 2·γ_{G−1}·Σ|x_i|
    assert result["verdict"] == "agree" and result["max_bound_ratio"] <= 1.0


def test_bench_takes_the_new_model_keys(tmp_path):
    import json

    proc = run_cli(["bench", "--layers", "12,16,16,3", "--global-batch", "32", "--steps", "2", "--untimed", "1",
                    "--norm", "layer", "--dropout", "0.2", "--residual", "--json"], timeout=240, cwd=tmp_path)
    assert proc.returncode == 0, proc.stderr[-3000:]
    result = json.loads(proc.stdout.strip().splitlines()[-1])
    assert (result["norm"], result["dropout"], result["residual"]) == ("layer", 0.2, True)
    assert result["params"] == 12 * 16 + 16 + 2 * 16 + 16 * 16 + 16 + 2 * 16 + 16 * 3 + 3  # W, b, G, B per hidden


@pytest.mark.parametrize("norm,dropout,residual", [("layer", [0.2, 0.1], True), ("none", 0.0, False)])
def test_the_step_allocates_no_arrays(norm, dropout, residual):
    # DEVELOPERS.md: workspaces are allocated at build time; a step's forward and backward allocate no array (the
    # plain hidden layer's fused backward and bias gradient too: its block sums live in the workspace)
    import tracemalloc

    model = sm.MLP([64, 1024, 1024, 10], norm=norm, dropout=dropout, residual=residual)
    n = 64
    rng = np.random.default_rng(0)
    ws = model.workspace(n)
    ws.inputs[:] = rng.normal(size=(n, 64))
    targets, rows, grads = rng.integers(0, 10, n), np.arange(n, dtype=np.int64), np.zeros_like(model.params)
    weights = np.ones(n)
    for _ in range(2):  # compiled and warm
        ws.forward_loss(n, targets, weights, 1 / n, step=1, rows=rows)
        for _ in ws.backward(n, grads):
            pass
    tracemalloc.start()
    ws.forward_loss(n, targets, weights, 1 / n, step=2, rows=rows)
    for _ in ws.backward(n, grads):
        pass
    peak = tracemalloc.get_traced_memory()[1]
    tracemalloc.stop()
    assert peak < 8192  # views and scalars only: less than two rows of one (n, 1024) float32 buffer


def test_health_reads_the_normalised_preactivations(tmp_path):
    import json

    make_classification(tmp_path, rows=120, features=6, classes=3, seed=1)
    job = write_job(tmp_path, {**MODEL, "activation": "relu"},
                    {"epochs": 1, "global_batch": 24, "workdir": "run", "health_every": 2})
    assert run_cli(["train", str(job), "--no-progress"], timeout=240).returncode == 0
    records = [json.loads(line) for line in (tmp_path / "run" / "metrics.jsonl").read_text().splitlines()]
    health = [r for r in records if r.get("kind") == "health"]
    assert health and len(health[0]["layers"]) == 4
    assert all(0.0 <= layer["dead_fraction"] <= 1.0 for layer in health[0]["layers"][:3])


@pytest.mark.parametrize("name", ["G1", "B1"])
def test_verify_catches_a_perturbed_norm_parameter(tmp_path, name):
    # the bound is per element and tight: a gradient element of the norm moved by 1e-4 of its size is caught in that
    # tensor alone (Higham 2002, §4.2: the bound of the honest sum is ~γ_G·Σ|x_i|, far below this)
    from shardmill.config import job_from_dict
    from shardmill.parallel.comm import Comm
    from shardmill.training.verify import verify

    make_classification(tmp_path, rows=120, features=6, classes=3, seed=5)
    job = job_from_dict({"model": {**MODEL, "dtype": "float64"},
                         "data": {"inputs": str(tmp_path / "x.npy"), "targets": str(tmp_path / "y.npy")},
                         "run": {"global_batch": 32, "workdir": str(tmp_path / "run")}})
    model = sm.MLP(MODEL["layers"], norm="layer", residual=True, dropout=MODEL["dropout"])
    base = model.params.__array_interface__["data"][0]
    index = (model.named(model.params)[name].__array_interface__["data"][0] - base) // model.params.itemsize + 3

    def tamper(gradient, comm):
        gradient[index] += 1e-4 * abs(gradient[index]) + 1e-12

    honest = verify(job, Comm.alone(), batches=1)
    assert honest["verdict"] == "agree"
    report = verify(job, Comm.alone(), batches=1, tamper=tamper)
    bad = {t["tensor"] for b in report["batches"] for t in b["tensors"] if t["bound_ratio"] > 1}
    assert report["verdict"] == "disagree" and bad == {name}


@pytest.mark.parametrize("key", ["norm", "dropout"])
def test_norm_and_dropout_need_a_hidden_layer(key: str) -> None:
    # a review finding: they were accepted, and did nothing, on a model without hidden layers
    value = "layer" if key == "norm" else 0.5
    with pytest.raises(JobError, match=rf"`model.{key}` acts on hidden layers, and `model.layers` = \[4, 3\] has none"):
        sm.MLP([4, 3], **{key: value})
