"""Full-model gradients of shardmill.MLP.loss_and_grad against outside computations.

(a) central finite differences (written here, O(h²)) and ``scipy.optimize.check_grad``; (b) the independent
reverse-mode autodiff library ``autograd`` on a model written here in ``autograd.numpy``; (c) the textbook output
deltas of squared error with a sigmoid output and of cross-entropy; (d) mean-over-rows semantics, float32 against
float64, and ``predict`` against a NumPy forward pass.

The flat layout is read from the model's public views (``weights[l]``, ``biases[l]`` are views into ``params``);
the gradient is cut at the same offsets, which checks "grad: flat, same layout as params" (DEVELOPERS.md).
"""

from __future__ import annotations

import autograd.numpy as anp
import numpy as np
import pytest
import scipy.optimize
import scipy.special
import shardmill as sm
from autograd import grad as autograd_grad
from autograd.scipy.special import logsumexp as anp_logsumexp

ACTIVATIONS = ["identity", "sigmoid", "tanh", "relu", "leaky_relu", "gelu", "softplus"]
LOSSES = ["softmax_cross_entropy", "binary_cross_entropy", "squared_error"]
KINKED = ("relu", "leaky_relu")
GELU_C = np.sqrt(2.0 / np.pi)


def offsets(model: sm.MLP) -> list[tuple[int, int]]:
    """(start of W_l, start of b_l) in params, found from the views' memory addresses."""
    def address(a: np.ndarray) -> int:
        return a.__array_interface__["data"][0]

    base, size = address(model.params), model.params.itemsize
    out = []
    for W, b in zip(model.weights, model.biases, strict=True):
        assert np.shares_memory(W, model.params) and np.shares_memory(b, model.params)
        out.append(((address(W) - base) // size, (address(b) - base) // size))
    return out


def unflatten(model: sm.MLP, flat) -> list[tuple]:
    """[(W_l, b_l)] cut out of any flat vector with the params layout (works on autograd boxes too)."""
    out = []
    for (w0, b0), W, b in zip(offsets(model), model.weights, model.biases, strict=True):
        out.append((flat[w0:w0 + W.size].reshape(W.shape), flat[b0:b0 + b.size]))
    return out


# --- an independent model in autograd.numpy --------------------------------------------------------------------
def ag_activation(name: str, z):
    if name == "identity":
        return z
    if name == "sigmoid":
        return 1.0 / (1.0 + anp.exp(-z))
    if name == "tanh":
        return anp.tanh(z)
    if name == "relu":
        return anp.where(z > 0, z, 0.0)
    if name == "leaky_relu":
        return anp.where(z > 0, z, 0.01 * z)  # Maas, Hannun & Ng 2013
    if name == "gelu":
        return 0.5 * z * (1.0 + anp.tanh(GELU_C * (z + 0.044715 * z**3)))  # Hendrycks & Gimpel 2016
    if name == "softplus":
        return anp.logaddexp(0.0, z)
    raise AssertionError(name)


def ag_loss(model: sm.MLP, hidden: list[str], loss: str, output: str, X, y):
    """The mean loss as a function of the flat parameter vector, written with autograd.numpy."""

    def f(flat):
        A = X
        layers = unflatten(model, flat)
        for l, (W, b) in enumerate(layers):
            Z = anp.dot(A, W) + b
            A = ag_activation(hidden[l], Z) if l < len(layers) - 1 else Z
        n = X.shape[0]
        if loss == "softmax_cross_entropy":  # −log softmax(z)_y
            return anp.sum(anp_logsumexp(A, axis=1) - A[np.arange(n), y]) / n
        if loss == "binary_cross_entropy":  # softplus(z) − t·z per element
            return anp.sum(anp.logaddexp(0.0, A) - y * A) / n
        O = ag_activation(output, A)
        return 0.5 * anp.sum((O - y) ** 2) / n  # ½ Σ_k (o_k − t_k)² per row

    return f


def problem(layers: list[int], hidden, loss: str, seed: int, output: str = "auto", n: int = 6):
    """A float64 model with small random (non-zero) biases and a batch of data for it."""
    model = sm.MLP(layers, activation=hidden, loss=loss, dtype="float64", seed=seed, output=output)
    rng = np.random.default_rng(seed + 100)
    for b in model.biases:
        b[...] = 0.3 * rng.standard_normal(b.shape)
    X = rng.standard_normal((n, layers[0]))
    k = layers[-1]
    if loss == "softmax_cross_entropy":
        y = rng.integers(0, k, size=n)
    elif loss == "binary_cross_entropy":
        y = rng.integers(0, 2, size=(n, k)).astype(np.float64)
    else:
        y = rng.standard_normal((n, k)) * (0.3 if output == "sigmoid" else 1.0) + (0.5 if output == "sigmoid" else 0)
    return model, X, y


def hidden_preactivations(model: sm.MLP, X: np.ndarray) -> list[np.ndarray]:
    """Pre-activations of the hidden layers by a NumPy forward pass."""
    out, A = [], X
    for l in range(model.n_layers - 1):
        Z = A @ model.weights[l] + model.biases[l]
        out.append(Z)
        A = ag_activation(model.activations[l], Z)
    return out


def away_from_kinks(layers, hidden, loss, seed, output="auto"):
    """A problem whose relu-family pre-activations are all at least 1e-3 from the kink at 0."""
    names = [hidden] * (len(layers) - 2) if isinstance(hidden, str) else hidden
    if not any(a in KINKED for a in names):
        return problem(layers, hidden, loss, seed, output)
    for s in range(seed, seed + 200):
        model, X, y = problem(layers, hidden, loss, s, output)
        if min(np.min(np.abs(Z)) for Z in hidden_preactivations(model, X)) > 1e-3:
            return model, X, y
    raise AssertionError("no seed keeps the pre-activations away from 0")


def relative_error(a: np.ndarray, b: np.ndarray) -> float:
    return float(np.linalg.norm(a - b) / max(np.linalg.norm(a), np.linalg.norm(b), 1e-300))


def central_differences(f, x: np.ndarray, h: float = 1e-5) -> np.ndarray:
    """∂f/∂x_i ≈ (f(x + h e_i) − f(x − h e_i)) / 2h, error O(h²). common practice"""
    g = np.empty_like(x)
    for i in range(x.size):
        e = np.zeros_like(x)
        e[i] = h
        g[i] = (f(x + e) - f(x - e)) / (2 * h)
    return g


def model_functions(model: sm.MLP, X, y):
    def loss(flat):
        model.params = flat
        return model.loss_and_grad(X, y)[0]

    def gradient(flat):
        model.params = flat
        return model.loss_and_grad(X, y)[1]

    return loss, gradient


NETS = [[4, 5, 3], [3, 4, 4, 2]]


@pytest.mark.parametrize("layers", NETS, ids=["one_hidden", "two_hidden"])
@pytest.mark.parametrize("loss", LOSSES)
@pytest.mark.parametrize("activation", ACTIVATIONS)
def test_gradient_matches_central_differences(activation, loss, layers):
    model, X, y = away_from_kinks(layers, activation, loss, seed=1)
    f, g = model_functions(model, X, y)
    theta = model.params.copy()
    analytic = g(theta)
    numeric = central_differences(f, theta)
    assert relative_error(analytic, numeric) < 1e-6  # central finite differences, O(h²)


@pytest.mark.parametrize("loss", LOSSES)
def test_check_grad_from_scipy(loss):
    # scipy.optimize.check_grad (forward differences, error O(h)): ‖g − g_fd‖ small against ‖g‖
    model, X, y = away_from_kinks([4, 5, 3], "tanh", loss, seed=3)
    f, g = model_functions(model, X, y)
    theta = model.params.copy()
    error = scipy.optimize.check_grad(f, g, theta, epsilon=1e-7)
    assert error < 1e-5 * np.linalg.norm(g(theta))  # scipy.optimize.check_grad


@pytest.mark.parametrize("layers", NETS, ids=["one_hidden", "two_hidden"])
@pytest.mark.parametrize("loss", LOSSES)
@pytest.mark.parametrize("activation", ACTIVATIONS)
def test_gradient_matches_autograd(activation, loss, layers):
    model, X, y = away_from_kinks(layers, activation, loss, seed=2)
    hidden = [activation] * (len(layers) - 2)
    theta = model.params.copy()
    f = ag_loss(model, hidden, loss, "identity", X, y)
    value, gradient = model.loss_and_grad(X, y)
    assert value == pytest.approx(f(theta), rel=1e-12)  # autograd.numpy forward pass
    assert relative_error(gradient, autograd_grad(f)(theta)) < 1e-10  # autograd reverse mode


@pytest.mark.parametrize("loss", LOSSES)
@pytest.mark.parametrize("hidden", [["tanh", "relu"], ["gelu", "sigmoid"], ["softplus", "leaky_relu"],
                                    ["identity", "tanh"]])
def test_per_layer_activations_match_autograd(hidden, loss):
    model, X, y = away_from_kinks([3, 4, 4, 2], hidden, loss, seed=4)
    assert model.activations == hidden
    theta = model.params.copy()
    f = ag_loss(model, hidden, loss, "identity", X, y)
    value, gradient = model.loss_and_grad(X, y)
    assert value == pytest.approx(f(theta), rel=1e-12)  # autograd.numpy forward pass
    assert relative_error(gradient, autograd_grad(f)(theta)) < 1e-10  # autograd reverse mode


@pytest.mark.parametrize("output", ["sigmoid", "tanh", "identity"])
def test_squared_error_with_output_activation_matches_autograd(output):
    model, X, y = problem([4, 5, 3], "tanh", "squared_error", seed=5, output=output)
    f = ag_loss(model, ["tanh"], "squared_error", output, X, y)
    theta = model.params.copy()
    value, gradient = model.loss_and_grad(X, y)
    assert value == pytest.approx(f(theta), rel=1e-12)  # autograd.numpy forward pass
    assert relative_error(gradient, autograd_grad(f)(theta)) < 1e-10  # autograd reverse mode
    np.testing.assert_allclose(model.predict(X), ag_activation(output, X_forward(model, X)), rtol=1e-12)


def X_forward(model: sm.MLP, X: np.ndarray) -> np.ndarray:
    """Output-layer logits by a NumPy forward pass."""
    A = X
    for l in range(model.n_layers):
        Z = A @ model.weights[l] + model.biases[l]
        A = ag_activation(model.activations[l], Z) if l < model.n_layers - 1 else Z
    return A


# --- (c) output-layer deltas -------------------------------------------------------------------------------------
def last_bias_gradient(model: sm.MLP, X: np.ndarray, y: np.ndarray) -> np.ndarray:
    _, gradient = model.loss_and_grad(X, y)
    return unflatten(model, gradient)[-1][1]


@pytest.mark.parametrize("target", [0.0, 1.0, 0.3])
def test_output_deltas_squared_error_sigmoid_and_cross_entropy(target):
    rng = np.random.default_rng(7)
    X = rng.standard_normal((1, 4))
    y = np.array([[target]])
    mse = sm.MLP([4, 5, 1], activation="tanh", loss="squared_error", output="sigmoid", dtype="float64", seed=8)
    bce = sm.MLP([4, 5, 1], activation="tanh", loss="binary_cross_entropy", dtype="float64", seed=8)
    o = mse.predict(X)[0, 0]
    assert bce.predict(X)[0, 0] == pytest.approx(o, rel=1e-15)  # same weights, same sigmoid output
    # squared error through a sigmoid: δ = (o − t)·o·(1 − o); cross-entropy from logits: δ = o − t. common practice
    assert last_bias_gradient(mse, X, y)[0] == pytest.approx((o - target) * o * (1 - o), rel=1e-12)
    assert last_bias_gradient(bce, X, y)[0] == pytest.approx(o - target, rel=1e-12)


def test_saturated_sigmoid_slows_squared_error_but_not_cross_entropy():
    # common practice: a wrong, saturated sigmoid output (logit ≈ −10, target 1) nearly stops learning under squared
    # error, δ = (o − 1)·o·(1 − o) ≈ −4.5e-5, while cross-entropy keeps δ = o − 1 ≈ −1.
    X = np.random.default_rng(9).standard_normal((1, 4))
    y = np.array([[1.0]])
    deltas = []
    for loss, extra in (("squared_error", {"output": "sigmoid"}), ("binary_cross_entropy", {})):
        model = sm.MLP([4, 5, 1], activation="tanh", loss=loss, dtype="float64", seed=8, **extra)
        model.weights[-1][...] = 0.0
        model.biases[-1][...] = -10.0  # logit = −10 exactly
        assert model.predict(X)[0, 0] == pytest.approx(scipy.special.expit(-10.0), rel=1e-14)  # scipy expit
        deltas.append(last_bias_gradient(model, X, y)[0])
    slow, fast = deltas
    assert abs(fast) > 0.99
    assert abs(slow) < 1e-3 * abs(fast)


# --- (d) semantics ---------------------------------------------------------------------------------------------
@pytest.mark.parametrize("loss", LOSSES)
def test_loss_and_grad_is_the_mean_over_rows(loss):
    model, X, y = problem([4, 5, 3], "tanh", loss, seed=10, n=7)
    whole_loss, whole_grad = model.loss_and_grad(X, y)
    per_row = [model.loss_and_grad(X[i:i + 1], y[i:i + 1]) for i in range(7)]
    # the mean of the row losses: common practice
    assert whole_loss == pytest.approx(np.mean([lv for lv, _ in per_row]), rel=1e-12)
    np.testing.assert_allclose(whole_grad, np.mean([g for _, g in per_row], axis=0), rtol=1e-10, atol=1e-14)
    doubled_loss, doubled_grad = model.loss_and_grad(np.vstack([X, X]), np.concatenate([y, y]))
    assert doubled_loss == pytest.approx(whole_loss, rel=1e-12)  # a mean, not a sum
    np.testing.assert_allclose(doubled_grad, whole_grad, rtol=1e-10, atol=1e-14)


@pytest.mark.parametrize("loss", LOSSES)
@pytest.mark.parametrize("activation", ["tanh", "relu", "gelu"])
def test_float32_close_to_float64(activation, loss):
    model64, X, y = problem([4, 5, 3], activation, loss, seed=11, n=16)
    model32 = sm.MLP([4, 5, 3], activation=activation, loss=loss, dtype="float32", seed=11)
    model32.params = model64.params.astype(np.float32)
    loss64, grad64 = model64.loss_and_grad(X, y)
    loss32, grad32 = model32.loss_and_grad(X.astype(np.float32), y.astype(np.float32) if y.dtype.kind == "f" else y)
    assert grad32.dtype == np.float32
    # float32 round-off (u ≈ 6e-8) through a few small layers: 1e-5 is a generous bound. common practice
    assert loss32 == pytest.approx(loss64, rel=1e-5)
    assert relative_error(grad32.astype(np.float64), grad64) < 1e-5


@pytest.mark.parametrize("dtype", ["float32", "float64"])
def test_predict_is_softmax_of_numpy_forward_pass(dtype):
    model, X, _ = problem([4, 5, 3], "relu", "softmax_cross_entropy", seed=12, n=9)
    model32 = sm.MLP([4, 5, 3], activation="relu", loss="softmax_cross_entropy", dtype=dtype, seed=12)
    model32.params = model.params.astype(dtype)
    P = model32.predict(X.astype(dtype), batch=4)  # several batches, the last one partial
    assert P.shape == (9, 3) and P.dtype == np.dtype(dtype)
    tol = 1e-6 if dtype == "float32" else 1e-14
    np.testing.assert_allclose(P.sum(axis=1), 1.0, rtol=tol)  # probabilities
    expected = scipy.special.softmax(X_forward(model, X), axis=1)  # NumPy forward pass, scipy.special.softmax
    np.testing.assert_allclose(P, expected, rtol=1e-5 if dtype == "float32" else 1e-12, atol=1e-7)


def test_predict_binary_is_sigmoid_of_numpy_forward_pass():
    model, X, _ = problem([4, 5, 3], "tanh", "binary_cross_entropy", seed=13, n=5)
    expected = scipy.special.expit(X_forward(model, X))  # scipy.special.expit
    np.testing.assert_allclose(model.predict(X), expected, rtol=1e-13)
