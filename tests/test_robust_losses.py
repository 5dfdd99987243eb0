"""The losses beyond squared error: huber, absolute_error and poisson (log link).

References: the loss values against scipy.special.huber (Huber 1964's function), scikit-learn's mean_absolute_error
and mean_poisson_deviance (McCullagh & Nelder 1989: D = 2 Σ (t·log(t/o) − t + o)); the gradients against the
reverse-mode autodiff library ``autograd`` on a model written here in ``autograd.numpy``, and against central
differences; the exported graphs against onnxruntime; exact mode's final parameters against themselves at
P = 1, 2, 3 (the exactness model: the same bits for every process count).
"""

from __future__ import annotations

import hashlib
from pathlib import Path

import autograd.numpy as anp
import numpy as np
import onnxruntime
import pytest
import scipy.special
import shardmill as sm
from autograd import grad as autograd_grad
from helpers import run_mpi, write_job
from shardmill.commands.export import export_onnx
from shardmill.config import job_from_dict
from shardmill.errors import JobError
from shardmill.kernels import losses as loss_kernels
from shardmill.model.losses import LOSSES
from shardmill.model.predictor import Predictor
from sklearn.metrics import mean_absolute_error, mean_poisson_deviance

ROBUST = ("huber", "absolute_error", "poisson")


def _outputs_and_targets(loss: str, n: int = 50, k: int = 3, seed: int = 0):
    """Model outputs o (n, k) float64 (positive for poisson) and targets of the loss's kind, with residuals on both
    sides of huber's δ = 1."""
    rng = np.random.default_rng(seed)
    if loss == "poisson":
        return np.exp(rng.normal(0.5, 0.8, size=(n, k))), rng.poisson(2.0, size=(n, k)).astype(np.float64)
    return rng.normal(size=(n, k)), 2.5 * rng.normal(size=(n, k))


def test_huber_reference_is_scipys_huber() -> None:
    o, t = _outputs_and_targets("huber")
    for delta in (0.3, 1.0, 4.0):
        got = LOSSES["huber"].bound(huber_delta=delta).reference(o, t)
        # scipy.special.huber(δ, r): r²/2 for |r| ≤ δ, δ(|r| − δ/2) beyond (Huber 1964)
        np.testing.assert_allclose(got, scipy.special.huber(delta, o - t).sum(axis=1), rtol=1e-14)


def test_absolute_error_reference_is_scikit_learns_mean_absolute_error() -> None:
    o, t = _outputs_and_targets("absolute_error")
    got = LOSSES["absolute_error"].reference(o, t).mean()
    # scikit-learn mean_absolute_error averages over rows and outputs; the loss sums the k outputs of a row
    assert got == pytest.approx(mean_absolute_error(t, o) * o.shape[1], rel=1e-13)


def test_poisson_reference_is_half_scikit_learns_deviance_up_to_its_constant() -> None:
    o, t = _outputs_and_targets("poisson")
    got = LOSSES["poisson"].reference(o, t).mean()
    # McCullagh & Nelder 1989: the deviance D = 2 Σ (t·log(t/o) − t + o), scikit-learn's mean_poisson_deviance per
    # element; the negative log-likelihood o − t·log o differs from D/2 by t − t·log t, which holds no parameter
    constant = (t - scipy.special.xlogy(t, t)).mean()
    expected = (mean_poisson_deviance(t.ravel(), o.ravel()) / 2 + constant) * o.shape[1]
    assert got == pytest.approx(expected, rel=1e-12)


@pytest.mark.parametrize("loss", ROBUST)
def test_kernel_agrees_with_its_entry(loss: str) -> None:
    entry = LOSSES[loss].bound(huber_delta=0.7)
    assert loss_kernels.CODES[loss] == entry.code  # the kernels' own dispatch table
    rng = np.random.default_rng(5)
    Z = rng.normal(0.0, 1.5, size=(40, 3))
    t = entry.synthetic_targets(rng, 40, 3, np.float64) * (1.0 if loss == "poisson" else 2.0)
    O, dZ = np.empty_like(Z), np.empty_like(Z)
    if not entry.from_logits:
        O[...] = Z  # the identity output: the forward pass leaves Z in O
    total = entry.kernel(Z, O, t, np.ones(Z.shape[0]), 1.0, dZ, 0)
    # float64 rounding: the same formula summed in another order
    assert total == pytest.approx(entry.reference(O, t).sum(), rel=1e-13)


# --- gradients against an independent model in autograd.numpy --------------------------------------------------

def _ag_loss(model: sm.MLP, loss: str, output: str, delta: float, X, y):
    """The mean loss as a function of the flat parameters, in autograd.numpy (hidden layers tanh)."""
    shapes = [(W.size, W.shape, b.size) for W, b in zip(model.weights, model.biases, strict=True)]
    starts = [(model.slices[l][0], model.slices[l][0] + W) for l, (W, _, _) in enumerate(shapes)]

    def f(flat):
        A = X
        for l, ((size, shape, nb), (w0, b0)) in enumerate(zip(shapes, starts, strict=True)):
            Z = anp.dot(A, flat[w0:w0 + size].reshape(shape)) + flat[b0:b0 + nb]
            A = anp.tanh(Z) if l < len(shapes) - 1 else Z
        n = X.shape[0]
        if loss == "poisson":  # e^z − t·z per element (log link)
            return anp.sum(anp.exp(A) - y * A) / n
        O = anp.tanh(A) if output == "tanh" else A
        r = O - y
        if loss == "absolute_error":
            return anp.sum(anp.abs(r)) / n
        small = anp.abs(r) <= delta
        return anp.sum(anp.where(small, 0.5 * r * r, delta * (anp.abs(r) - 0.5 * delta))) / n  # Huber 1964

    return f


def _problem(loss: str, output: str, delta: float, seed: int = 1, n: int = 9):
    layers = [4, 5, 4, 3]
    model = sm.MLP(layers, activation="tanh", loss=loss, dtype="float64", seed=seed, output=output,
                   **({"huber_delta": delta} if loss == "huber" else {}))
    rng = np.random.default_rng(seed + 50)
    for b in model.biases:
        b[...] = 0.3 * rng.standard_normal(b.shape)
    X = rng.standard_normal((n, layers[0]))
    if loss == "poisson":
        y = rng.poisson(1.5, size=(n, layers[-1])).astype(np.float64)
    else:
        y = 1.5 * rng.standard_normal((n, layers[-1]))
    return model, X, y


CASES = [("huber", "identity", 0.5), ("huber", "tanh", 0.3), ("huber", "identity", 100.0),
         ("absolute_error", "identity", 1.0), ("absolute_error", "tanh", 1.0), ("poisson", "auto", 1.0)]


@pytest.mark.parametrize(("loss", "output", "delta"), CASES)
def test_gradient_matches_autograd(loss: str, output: str, delta: float) -> None:
    model, X, y = _problem(loss, output, delta)
    theta = model.params.copy()
    value, gradient = model.loss_and_grad(X, y)
    f = _ag_loss(model, loss, output, delta, X, y)
    assert value == pytest.approx(f(theta), rel=1e-12)  # autograd.numpy forward pass
    expected = autograd_grad(f)(theta)
    # autograd reverse mode (relative error of the whole vector)
    assert np.linalg.norm(gradient - expected) <= 1e-10 * np.linalg.norm(expected)


@pytest.mark.parametrize(("loss", "output", "delta"), CASES[:1] + CASES[3:4] + CASES[5:])
def test_gradient_matches_central_differences(loss: str, output: str, delta: float) -> None:
    model, X, y = _problem(loss, output, delta, seed=3)
    theta = model.params.copy()
    gradient = model.loss_and_grad(X, y)[1]
    h = 1e-6  # common practice: central differences, error O(h²) away from the kinks (|r| = δ, r = 0)
    numeric = np.empty_like(theta)
    for i in range(theta.size):
        e = np.zeros_like(theta)
        e[i] = h
        model.params = theta + e
        up = model.loss_and_grad(X, y)[0]
        model.params = theta - e
        numeric[i] = (up - model.loss_and_grad(X, y)[0]) / (2 * h)
    model.params = theta
    assert np.linalg.norm(gradient - numeric) <= 1e-6 * np.linalg.norm(numeric)


def test_huber_with_a_large_delta_is_squared_error() -> None:
    # Huber 1964: for |r| ≤ δ the loss is ½r², the squared error's; with δ beyond every residual they coincide
    model, X, y = _problem("huber", "identity", 1e6)
    plain = sm.MLP([4, 5, 4, 3], activation="tanh", loss="squared_error", dtype="float64", seed=1)
    plain.params = model.params
    a, b = model.loss_and_grad(X, y), plain.loss_and_grad(X, y)
    assert a[0] == b[0] and np.array_equal(a[1], b[1])


# --- what the job and the model refuse ----------------------------------------------------------------------------

def test_bad_settings_get_one_line_naming_the_key() -> None:
    base = {"model": {"layers": [3, 4, 2], "loss": "huber"}}
    with pytest.raises(JobError, match=r"`model.huber_delta` must be > 0; got 0"):
        job_from_dict({"model": {**base["model"], "huber_delta": 0}})
    with pytest.raises(JobError, match=r"`model.huber_delta` applies to `model.loss` = huber only; got "
                                       r"model.huber_delta = 2.0 with `model.loss` = 'squared_error'"):
        job_from_dict({"model": {"layers": [3, 4, 2], "loss": "squared_error", "huber_delta": 2.0}})
    with pytest.raises(JobError, match=r"`model.output` is implied by `model.loss` = 'poisson'"):
        job_from_dict({"model": {"layers": [3, 4, 2], "loss": "poisson", "output": "identity"}})
    model = sm.MLP([3, 4, 2], loss="poisson", dtype="float64")
    with pytest.raises(JobError, match=r"`y` must hold values in \[0, inf\] for poisson; got -1 in row 1"):
        model.loss_and_grad(np.zeros((2, 3)), np.array([[0.0, 1.0], [-1.0, 2.0]]))
    assert job_from_dict(base).model.huber_delta == 1.0


# --- export and exact mode ----------------------------------------------------------------------------------------

@pytest.mark.parametrize(("loss", "output"), [("poisson", "auto"), ("huber", "tanh"), ("absolute_error", "auto")])
@pytest.mark.parametrize("dtype", ["float32", "float64"])
def test_exported_graph_gives_the_predictors_outputs(tmp_path: Path, loss: str, output: str, dtype: str) -> None:
    model = sm.MLP([5, 8, 3], activation="relu", loss=loss, dtype=dtype, seed=2, output=output)
    rng = np.random.default_rng(4)
    predictor = Predictor(model, rng.normal(size=5), 1.0 / rng.uniform(0.5, 2.0, size=5))
    X = rng.normal(1.0, 2.0, size=(30, 5)).astype(dtype)
    export_onnx(predictor, tmp_path / "m.onnx")
    session = onnxruntime.InferenceSession(str(tmp_path / "m.onnx"), providers=["CPUExecutionProvider"])
    got = session.run(None, {session.get_inputs()[0].name: X})[0]
    rtol = 1e-5 if dtype == "float32" else 1e-12
    # reference: onnxruntime, a general-purpose ONNX runtime
    np.testing.assert_allclose(got, predictor.outputs(X), rtol=rtol, atol=rtol)
    if loss == "poisson":
        assert np.all(got > 0)  # expected counts e^z: positive


def _final_digest(folder: Path) -> str:
    with np.load(folder / "final.npz", allow_pickle=False) as saved:
        return hashlib.sha256(b"".join(saved[f"{kind}{l}"].tobytes() for l in range(2) for kind in "Wb")).hexdigest()


@pytest.mark.mpi
@pytest.mark.parametrize("loss", ROBUST)
def test_exact_mode_gives_the_same_bits_for_every_process_count(tmp_path: Path, loss: str) -> None:
    rng = np.random.default_rng(7)
    X = rng.normal(size=(200, 5))
    signal = X[:, :2] @ np.array([[0.8, -0.5], [0.3, 0.9]])
    heavy_tails = signal + rng.standard_t(2, (200, 2))  # Student's t with 2 degrees of freedom: outliers
    y = rng.poisson(np.exp(0.5 * signal)).astype(np.float64) if loss == "poisson" else heavy_tails
    np.save(tmp_path / "x.npy", X)
    np.save(tmp_path / "y.npy", y)
    digests = set()
    for P in (1, 2, 3):
        folder = tmp_path / f"p{P}"
        folder.mkdir()
        model = {"layers": [5, 12, 2], "activation": "tanh", "loss": loss, "dtype": "float32",
                 **({"huber_delta": 0.5} if loss == "huber" else {})}
        job = write_job(folder, model, {"epochs": 2, "global_batch": 48, "exact_chunk": 16, "reduction": "exact",
                                        "seed": 3, "workdir": str(folder / "run")},
                        optimizer={"method": "adam", "learning_rate": 0.01},
                        data={"inputs": str(tmp_path / "x.npy"), "targets": str(tmp_path / "y.npy"),
                              "validation_fraction": 0.2})
        done = run_mpi(P, ["-m", "shardmill", "train", str(job), "--no-progress"], timeout=180)
        assert done.returncode == 0, done.stderr
        digests.add(_final_digest(folder / "run"))
    assert len(digests) == 1  # the exactness model: fixed chunks summed exactly, whatever P is


@pytest.mark.mpi
@pytest.mark.parametrize("loss", ROBUST)
def test_verify_bounds_the_robust_losses(tmp_path: Path, loss: str) -> None:
    # Higham 2002 §4.2: the parallel gradient differs from the serial one within 2·γ·Σ|x| (verdict "agree")
    import json

    rng = np.random.default_rng(9)
    X = rng.normal(size=(120, 5))
    y = rng.poisson(1.5, size=(120, 2)).astype(np.float64) if loss == "poisson" else 3 * rng.normal(size=(120, 2))
    np.save(tmp_path / "x.npy", X)
    np.save(tmp_path / "y.npy", y)
    job = write_job(tmp_path, {"layers": [5, 12, 2], "activation": "tanh", "loss": loss, "dtype": "float32"},
                    {"global_batch": 48, "seed": 3}, data={"inputs": "x.npy", "targets": "y.npy"})
    done = run_mpi(3, ["-m", "shardmill", "verify", str(job), "--json"], timeout=180)
    assert done.returncode == 0, done.stderr
    assert json.loads(done.stdout)["verdict"] == "agree"
