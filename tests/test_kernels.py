"""Every Numba kernel against a plain NumPy / SciPy / scikit-learn computation written here, float32 and float64.

Outside references: the activation formulas (logistic, tanh, rectifier, leaky rectifier with slope 0.01 after
Maas, Hannun & Ng 2013, GELU in its tanh approximation from Hendrycks & Gimpel 2016, softplus), their calculus
derivatives, ``scipy.special.expit`` / ``logsumexp`` / ``softmax`` / ``ndtr``, ``numpy.logaddexp`` and
``sklearn.metrics.log_loss``. Shapes come from hypothesis; values from a seeded numpy Generator.
"""

from __future__ import annotations

import math

import numpy as np
import pytest
import scipy.special
from hypothesis import given, settings
from hypothesis import strategies as st
from shardmill.kernels import activations as act
from shardmill.kernels import data as data_kernels
from shardmill.kernels import losses
from shardmill.kernels import optim as optim_kernels
from sklearn.metrics import log_loss

DTYPES = [np.float32, np.float64]
RTOL = {np.float32: 2e-6, np.float64: 1e-13}  # float32 kernels round once per stored value
ATOL = {np.float32: 1e-6, np.float64: 1e-14}
SETTINGS = settings(max_examples=25, deadline=None)
sizes = st.integers(min_value=1, max_value=17)
seeds = st.integers(min_value=0, max_value=2**32 - 1)

GELU_C = math.sqrt(2.0 / math.pi)


# --- plain NumPy versions of each activation and its derivative (float64) ----------------------------------------
def np_forward(name: str, z: np.ndarray) -> np.ndarray:
    if name == "identity":
        return z
    if name == "sigmoid":
        return scipy.special.expit(z)  # logistic function, scipy.special.expit
    if name == "tanh":
        return np.tanh(z)
    if name == "relu":
        return np.maximum(z, 0.0)
    if name == "leaky_relu":
        return np.where(z > 0, z, 0.01 * z)  # Maas, Hannun & Ng 2013, slope 0.01
    if name == "gelu":
        return 0.5 * z * (1.0 + np.tanh(GELU_C * (z + 0.044715 * z**3)))  # Hendrycks & Gimpel 2016, tanh approx.
    if name == "softplus":
        return np.logaddexp(0.0, z)  # log(1 + e^z), numpy.logaddexp
    raise AssertionError(name)


def np_derivative(name: str, z: np.ndarray) -> np.ndarray:
    if name == "identity":
        return np.ones_like(z)
    if name == "sigmoid":
        s = scipy.special.expit(z)
        return s * (1.0 - s)
    if name == "tanh":
        return 1.0 / np.cosh(z) ** 2  # sech²
    if name == "relu":
        return (z > 0).astype(np.float64)
    if name == "leaky_relu":
        return np.where(z > 0, 1.0, 0.01)
    if name == "gelu":
        u = GELU_C * (z + 0.044715 * z**3)
        du = GELU_C * (1.0 + 3 * 0.044715 * z**2)
        return 0.5 * (1.0 + np.tanh(u)) + 0.5 * z * du / np.cosh(u) ** 2  # product and chain rule
    if name == "softplus":
        return scipy.special.expit(z)
    raise AssertionError(name)


def random(rng: np.random.Generator, shape, dtype, scale: float = 2.0) -> np.ndarray:
    return (scale * rng.standard_normal(shape)).astype(dtype)


@pytest.mark.parametrize("dtype", DTYPES)
@pytest.mark.parametrize("name", list(act.CODES))
@SETTINGS
@given(n=sizes, m=sizes, seed=seeds, alias=st.booleans())
def test_bias_forward(name, dtype, n, m, seed, alias):
    rng = np.random.default_rng(seed)
    Z, b = random(rng, (n, m), dtype), random(rng, m, dtype)
    z_expected = Z + b  # same-dtype addition, as the kernel does it
    a_expected = np_forward(name, z_expected.astype(np.float64))
    A = Z if alias else np.full((n, m), np.nan, dtype=dtype)
    act.bias_forward(Z, b, A, act.code_of(name))
    if not alias:  # Z holds the biased pre-activations (when A is Z, the outputs overwrite them)
        np.testing.assert_array_equal(Z, z_expected)
    np.testing.assert_allclose(A, a_expected, rtol=RTOL[dtype], atol=ATOL[dtype])
    assert A.dtype == dtype


@pytest.mark.parametrize("dtype", DTYPES)
@pytest.mark.parametrize("name", list(act.CODES))
@SETTINGS
@given(n=sizes, m=sizes, seed=seeds)
def test_backward(name, dtype, n, m, seed):
    rng = np.random.default_rng(seed)
    Z, dA = random(rng, (n, m), dtype), random(rng, (n, m), dtype)
    A = np_forward(name, Z.astype(np.float64)).astype(dtype)  # the forward pass's stored outputs
    expected = np_derivative(name, Z.astype(np.float64)) * dA.astype(np.float64)  # dZ = f'(Z)·dA, chain rule
    Z_before, A_before = Z.copy(), A.copy()
    D = dA.copy()  # dA on entry, dZ on exit
    act.backward(Z, A, D, act.code_of(name))
    # σ' and tanh' come from the stored float32 A (one extra rounding, amplified in 1 − a²): looser for float32
    rtol = 5e-5 if dtype == np.float32 else 1e-12
    np.testing.assert_allclose(D, expected, rtol=rtol, atol=10 * ATOL[dtype])
    np.testing.assert_array_equal(Z, Z_before)  # only the delta is written
    np.testing.assert_array_equal(A, A_before)


@pytest.mark.parametrize("name", list(act.CODES))
def test_derivative_matches_central_differences(name):
    # The NumPy derivatives above are themselves checked against central differences. common practice
    z = np.linspace(-4.0, 4.0, 81) + 0.0123  # no point sits on the kink at 0
    h = 1e-6
    numeric = (np_forward(name, z + h) - np_forward(name, z - h)) / (2 * h)
    np.testing.assert_allclose(np_derivative(name, z), numeric, rtol=1e-7, atol=1e-8)


def test_gelu_tanh_form_is_close_to_exact_gelu():
    # Hendrycks & Gimpel 2016: GELU(z) = z·Φ(z); the tanh form approximates it to about 1e-3 (from memory)
    z = np.linspace(-6.0, 6.0, 241)
    A = np.zeros_like(z).reshape(1, -1)
    Z = z.copy().reshape(1, -1)
    act.bias_forward(Z, np.zeros(z.size), A, act.GELU)
    assert np.max(np.abs(A[0] - z * scipy.special.ndtr(z))) < 1e-3  # scipy.special.ndtr: Φ, the normal CDF


@pytest.mark.parametrize("dtype", DTYPES)
def test_activations_stay_finite_for_large_inputs(dtype):
    # common practice: σ, softplus and GELU must not overflow at |z| = 1000
    z = np.array([[-1000.0, -80.0, 0.0, 80.0, 1000.0]], dtype=dtype)
    for name, code in act.CODES.items():
        Z, A = z.copy(), np.empty_like(z)
        act.bias_forward(Z, np.zeros(5, dtype=dtype), A, code)
        assert np.all(np.isfinite(A)), name
        np.testing.assert_allclose(A, np_forward(name, z.astype(np.float64)), rtol=1e-6, atol=1e-30, err_msg=name)


@pytest.mark.parametrize("dtype", DTYPES)
@SETTINGS
@given(n=sizes, m=sizes, seed=seeds)
def test_column_sums(dtype, n, m, seed):
    rng = np.random.default_rng(seed)
    dZ = random(rng, (n, m), dtype)
    db = np.full(m, np.nan, dtype=dtype)
    act.column_sums(dZ, db)
    # numpy's float64 sum over the rows
    np.testing.assert_allclose(db, dZ.astype(np.float64).sum(axis=0), rtol=1e-5 if dtype == np.float32 else 1e-12,
                               atol=1e-5 if dtype == np.float32 else 1e-13)


# --- losses -------------------------------------------------------------------------------------------------------
@pytest.mark.parametrize("dtype", DTYPES)
@SETTINGS
@given(n=sizes, k=st.integers(min_value=2, max_value=17), seed=seeds,
       scale=st.floats(min_value=1e-3, max_value=1.0))
def test_softmax_cross_entropy(dtype, n, k, seed, scale):
    rng = np.random.default_rng(seed)
    Z = random(rng, (n, k), dtype, scale=3.0)
    labels = rng.integers(0, k, size=n).astype(np.int64)
    O, dZ = np.empty_like(Z), np.empty_like(Z)
    total = losses.softmax_cross_entropy(Z, labels, np.ones(n), scale, O, dZ)
    z64 = Z.astype(np.float64)
    expected_loss = np.sum(scipy.special.logsumexp(z64, axis=1) - z64[np.arange(n), labels])  # scipy logsumexp
    p = scipy.special.softmax(z64, axis=1)  # scipy.special.softmax
    onehot = np.eye(k)[labels]
    tol = 1e-5 if dtype == np.float32 else 1e-12
    assert total == pytest.approx(expected_loss, rel=tol, abs=tol)  # scipy.special.logsumexp (above)
    np.testing.assert_allclose(O, p, rtol=tol, atol=tol)  # scipy.special.softmax (above)
    np.testing.assert_allclose(dZ, (p - onehot) * scale, rtol=tol, atol=tol * scale)  # ∂/∂z of −log softmax_y


@pytest.mark.parametrize("dtype", DTYPES)
@SETTINGS
@given(n=sizes, k=sizes, seed=seeds, scale=st.floats(min_value=1e-3, max_value=1.0))
def test_binary_cross_entropy(dtype, n, k, seed, scale):
    rng = np.random.default_rng(seed)
    Z = random(rng, (n, k), dtype, scale=3.0)
    T = rng.integers(0, 2, size=(n, k)).astype(dtype)
    O, dZ = np.empty_like(Z), np.empty_like(Z)
    total = losses.binary_cross_entropy(Z, T, np.ones(n), scale, O, dZ)
    z64, t64 = Z.astype(np.float64), T.astype(np.float64)
    s = scipy.special.expit(z64)
    direct = -np.sum(t64 * np.log(s) + (1 - t64) * np.log(1 - s))  # −[t log σ + (1−t) log(1−σ)], direct formula
    tol = 1e-5 if dtype == np.float32 else 1e-10
    assert total == pytest.approx(direct, rel=tol, abs=tol)  # the direct formula (above)
    np.testing.assert_allclose(O, s, rtol=tol, atol=tol)  # scipy.special.expit
    np.testing.assert_allclose(dZ, (s - t64) * scale, rtol=tol, atol=tol * scale)  # ∂/∂z = σ(z) − t


@pytest.mark.parametrize("dtype", DTYPES)
def test_binary_cross_entropy_matches_sklearn_log_loss(dtype):
    rng = np.random.default_rng(5)
    Z = random(rng, (50, 1), dtype)
    T = rng.integers(0, 2, size=(50, 1)).astype(dtype)
    O, dZ = np.empty_like(Z), np.empty_like(Z)
    total = losses.binary_cross_entropy(Z, T, np.ones(Z.shape[0]), 1.0, O, dZ)
    expected = log_loss(T[:, 0], scipy.special.expit(Z[:, 0].astype(np.float64)), normalize=False,
                        labels=[0, 1])  # sklearn.metrics.log_loss
    assert total == pytest.approx(expected, rel=1e-5 if dtype == np.float32 else 1e-10)  # sklearn log_loss


@pytest.mark.parametrize("dtype", DTYPES)
@SETTINGS
@given(n=sizes, k=sizes, seed=seeds, scale=st.floats(min_value=1e-3, max_value=1.0))
def test_squared_error(dtype, n, k, seed, scale):
    rng = np.random.default_rng(seed)
    O, T = random(rng, (n, k), dtype), random(rng, (n, k), dtype)
    dO = np.empty_like(O)
    total = losses.squared_error(O, T, np.ones(n), scale, dO)
    diff = O.astype(np.float64) - T.astype(np.float64)
    tol = 1e-5 if dtype == np.float32 else 1e-12
    assert total == pytest.approx(0.5 * np.sum(diff**2), rel=tol)  # ½ Σ (o − t)²
    np.testing.assert_allclose(dO, diff * scale, rtol=tol, atol=tol * scale)
    assert losses.squared_error_sum(O, T) == pytest.approx(np.sum(diff**2), rel=tol)  # Σ (o − t)²


@pytest.mark.parametrize("dtype", DTYPES)
def test_losses_stay_finite_at_extreme_logits(dtype):
    # common practice: logits of ±1000 give a finite loss and gradient (log-sum-exp shift, stable softplus)
    Z = np.array([[1000.0, -1000.0], [-1000.0, 1000.0], [1000.0, 1000.0]], dtype=dtype)
    labels = np.array([1, 1, 0], dtype=np.int64)
    O, dZ = np.empty_like(Z), np.empty_like(Z)
    total = losses.softmax_cross_entropy(Z, labels, np.ones(Z.shape[0]), 1.0, O, dZ)
    # scipy.special.logsumexp per row, minus the labelled logit: 2000, 0, log 2
    expected = np.sum(scipy.special.logsumexp(Z.astype(np.float64), axis=1) - Z[np.arange(3), labels])
    assert math.isfinite(total) and total == pytest.approx(expected, rel=1e-6)
    assert np.all(np.isfinite(O)) and np.all(np.isfinite(dZ))
    np.testing.assert_allclose(dZ, scipy.special.softmax(Z.astype(np.float64), axis=1) - np.eye(2)[labels],
                               atol=1e-6)

    T = np.array([[0.0, 1.0], [1.0, 0.0], [1.0, 1.0]], dtype=dtype)
    total = losses.binary_cross_entropy(Z, T, np.ones(Z.shape[0]), 1.0, O, dZ)
    expected = np.sum(np.logaddexp(0.0, Z.astype(np.float64)) - T * Z)  # softplus(z) − t·z, numpy.logaddexp
    assert math.isfinite(total) and total == pytest.approx(expected, rel=1e-6)
    assert np.all(np.isfinite(dZ))
    np.testing.assert_allclose(dZ, scipy.special.expit(Z.astype(np.float64)) - T, atol=1e-6)


@pytest.mark.parametrize("dtype", DTYPES)
@SETTINGS
@given(n=sizes, k=sizes, seed=seeds, alias=st.booleans())
def test_softmax_rows(dtype, n, k, seed, alias):
    rng = np.random.default_rng(seed)
    Z = random(rng, (n, k), dtype, scale=5.0)
    expected = scipy.special.softmax(Z.astype(np.float64), axis=1)  # scipy.special.softmax
    O = Z if alias else np.empty_like(Z)
    losses.softmax_rows(Z, O)
    np.testing.assert_allclose(O, expected, rtol=1e-5 if dtype == np.float32 else 1e-12, atol=1e-7)


@pytest.mark.parametrize("dtype", DTYPES)
@SETTINGS
@given(n=sizes, k=sizes, seed=seeds)
def test_count_correct(dtype, n, k, seed):
    rng = np.random.default_rng(seed)
    O = rng.random((n, k)).astype(dtype)
    labels = rng.integers(0, k, size=n).astype(np.int64)
    assert losses.count_correct(O, labels) == int(np.sum(np.argmax(O, axis=1) == labels))  # numpy.argmax
    T = rng.integers(0, 2, size=(n, k)).astype(dtype)
    assert losses.count_correct_binary(O, T) == int(np.sum((O > 0.5) == (T > 0.5)))


# --- data ---------------------------------------------------------------------------------------------------------
@pytest.mark.parametrize("source", DTYPES)
@pytest.mark.parametrize("dtype", DTYPES)
@SETTINGS
@given(N=sizes, d=sizes, n=sizes, seed=seeds)
def test_gather_rows(source, dtype, N, d, n, seed):
    rng = np.random.default_rng(seed)
    X = random(rng, (N, d), source)
    rows = rng.integers(0, N, size=n).astype(np.int64)
    mean = rng.standard_normal(d)
    inv_std = rng.random(d) + 0.5
    out = np.full((n + 2, d), 7.0, dtype=dtype)  # the buffer may be taller than the shard
    assert data_kernels.take_rows(X, rows, mean, inv_std, out) == -1
    expected = (X[rows].astype(np.float64) - mean) * inv_std  # numpy fancy indexing
    np.testing.assert_allclose(out[:n], expected, rtol=RTOL[dtype] * 4, atol=ATOL[dtype] * 4)
    np.testing.assert_array_equal(out[n:], 7.0)  # rows past the shard untouched


@pytest.mark.parametrize("bad_value", [np.nan, np.inf, -np.inf])
@SETTINGS
@given(N=st.integers(min_value=2, max_value=17), d=sizes, seed=seeds)
def test_gather_rows_reports_first_nonfinite_row(bad_value, N, d, seed):
    rng = np.random.default_rng(seed)
    X = rng.standard_normal((N, d))
    bad_row = int(rng.integers(0, N))
    X[bad_row, int(rng.integers(0, d))] = bad_value
    rows = rng.permutation(N).astype(np.int64)
    out = np.empty((N, d))
    got = data_kernels.take_rows(X, rows, np.zeros(d), np.ones(d), out)
    expected = int(np.flatnonzero(~np.isfinite(X[rows]).all(axis=1))[0])  # position in `rows`, not in X
    assert got == expected
    assert rows[got] == bad_row


# --- optimizer helpers --------------------------------------------------------------------------------------------
@pytest.mark.parametrize("dtype", DTYPES)
@SETTINGS
@given(n=st.integers(min_value=1, max_value=300), seed=seeds, factor=st.floats(min_value=-3.0, max_value=3.0))
def test_sum_squares_and_scale(dtype, n, seed, factor):
    rng = np.random.default_rng(seed)
    x = random(rng, n, dtype)
    assert optim_kernels.sum_squares(x) == pytest.approx(np.sum(x.astype(np.float64) ** 2), rel=1e-12)
    expected = (x.astype(np.float64) * factor).astype(dtype)  # one rounding of the float64 product
    optim_kernels.scale(x, factor)
    np.testing.assert_array_equal(x, expected)


@pytest.mark.parametrize("dtype", DTYPES)
@SETTINGS
@given(n=sizes, seed=seeds, lr=st.floats(min_value=1e-4, max_value=1.0), mu=st.floats(min_value=0.0, max_value=0.99),
       l2=st.sampled_from([0.0, 1e-2]))
def test_sgd_momentum_nesterov_single_step(dtype, n, seed, lr, mu, l2):
    rng = np.random.default_rng(seed)
    theta, g, v = random(rng, n, dtype), random(rng, n, dtype), random(rng, n, dtype)
    t64, g64, v64 = (a.astype(np.float64) for a in (theta, g, v))
    geff = g64 + l2 * t64  # coupled L2: g + λθ
    tol = dict(rtol=1e-6, atol=1e-6) if dtype == np.float32 else dict(rtol=1e-14, atol=1e-14)

    p = theta.copy()
    optim_kernels.sgd(p, g, lr, l2)
    np.testing.assert_allclose(p, t64 - lr * geff, **tol)  # θ ← θ − η(g + λθ)

    p, vel = theta.copy(), v.copy()
    optim_kernels.momentum(p, g, vel, lr, mu, l2)
    v_new = mu * v64 - lr * geff  # Sutskever et al. 2013, eq. 1
    np.testing.assert_allclose(vel, v_new, **tol)
    np.testing.assert_allclose(p, t64 + v_new, **tol)  # eq. 2

    p, vel = theta.copy(), v.copy()
    optim_kernels.nesterov(p, g, vel, lr, mu, l2)
    # look-ahead form (Bengio, Boulanger-Lewandowski & Pascanu 2013): Θ' = Θ − μv + (1 + μ)v'
    np.testing.assert_allclose(vel, v_new, **tol)
    np.testing.assert_allclose(p, t64 - mu * v64 + (1 + mu) * v_new, **tol)


@pytest.mark.parametrize("dtype", DTYPES)
@SETTINGS
@given(n=sizes, seed=seeds, t=st.integers(min_value=1, max_value=50), decay=st.sampled_from([0.0, 1e-3]),
       l2=st.sampled_from([0.0, 1e-2]))
def test_adam_single_step(dtype, n, seed, t, decay, l2):
    rng = np.random.default_rng(seed)
    theta, g = random(rng, n, dtype), random(rng, n, dtype)
    m, v = random(rng, n, dtype), np.abs(random(rng, n, dtype))
    lr, b1, b2, eps = 1e-2, 0.9, 0.999, 1e-8
    t64, m64, v64 = theta.astype(np.float64), m.astype(np.float64), v.astype(np.float64)
    geff = g.astype(np.float64) + l2 * t64
    m_new = b1 * m64 + (1 - b1) * geff  # Kingma & Ba 2015, Algorithm 1
    v_new = b2 * v64 + (1 - b2) * geff**2
    m_hat, v_hat = m_new / (1 - b1**t), v_new / (1 - b2**t)
    expected = t64 - lr * m_hat / (np.sqrt(v_hat) + eps) - decay * t64  # Loshchilov & Hutter 2019, Alg. 2, line 12
    optim_kernels.adam(theta, g, m, v, lr, b1, b2, eps, float(t), l2, decay)
    tol = dict(rtol=1e-6, atol=1e-6) if dtype == np.float32 else dict(rtol=1e-13, atol=1e-14)
    np.testing.assert_allclose(m, m_new, **tol)
    np.testing.assert_allclose(v, v_new, **tol)
    np.testing.assert_allclose(theta, expected, **tol)
