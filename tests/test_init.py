"""Weight initialisation of shardmill.MLP against the published schemes.

He et al. 2015: W ~ N(0, 2/fan_in). Glorot & Bengio 2010 ("normalised initialisation", eq. 16):
W ~ U(−a, a), a = √(6/(fan_in + fan_out)), so Var W = a²/3 = 2/(fan_in + fan_out). Biases start at zero.

Statistical tolerance: for N = 10⁶ independent samples the sample variance has relative standard error
√((κ − 1)/N), κ the kurtosis: √(2/N) ≈ 0.14 % for a normal (κ = 3), √(0.8/N) ≈ 0.09 % for a uniform (κ = 1.8).
We allow 1 %, about 7 standard errors; the seeds are fixed, so the outcome is deterministic.
"""

from __future__ import annotations

import numpy as np
import pytest
import scipy.stats
import shardmill as sm

FAN = 1000
TOLERANCE = 0.01  # relative; ≈ 7 standard errors of a 10⁶-sample variance (see above)


@pytest.fixture(scope="module")
def he_model() -> sm.MLP:
    return sm.MLP([FAN, FAN, 10], activation="relu", dtype="float64", seed=3, init="he")


@pytest.fixture(scope="module")
def glorot_model() -> sm.MLP:
    return sm.MLP([FAN, FAN, 10], activation="tanh", dtype="float64", seed=3, init="glorot")


def test_he_variance_and_distribution(he_model):
    W = he_model.weights[0]
    assert W.shape == (FAN, FAN)
    expected = 2.0 / FAN  # He et al. 2015, eq. 10: ½ n_l Var w = 1
    assert np.var(W) == pytest.approx(expected, rel=TOLERANCE)
    assert abs(np.mean(W)) < 5 * np.sqrt(expected / W.size)  # zero mean, within 5 standard errors
    # scipy.stats.kstest against N(0, 2/fan_in) on a subsample (seeded, so deterministic)
    sample = W.ravel()[::97]
    assert scipy.stats.kstest(sample, "norm", args=(0.0, np.sqrt(expected))).pvalue > 1e-3
    # the small output layer follows its own fan_in
    W1 = he_model.weights[1]
    assert np.var(W1) == pytest.approx(2.0 / FAN, rel=0.05)  # 10⁴ samples: s.e. ≈ 1.4 %, allow 5 % (≈ 3.5 s.e.)


def test_glorot_variance_bounds_and_distribution(glorot_model):
    W = glorot_model.weights[0]
    expected = 2.0 / (FAN + FAN)  # Glorot & Bengio 2010, eq. 12/16
    assert np.var(W) == pytest.approx(expected, rel=TOLERANCE)
    a = np.sqrt(6.0 / (FAN + FAN))
    assert np.max(np.abs(W)) <= a
    assert np.max(np.abs(W)) > 0.999 * a  # 10⁶ uniform draws come within 0.1 % of the bound
    sample = W.ravel()[::97]
    assert scipy.stats.kstest(sample, "uniform", args=(-a, 2 * a)).pvalue > 1e-3  # scipy.stats.kstest
    W1 = glorot_model.weights[1]
    assert np.max(np.abs(W1)) <= np.sqrt(6.0 / (FAN + 10))
    assert np.var(W1) == pytest.approx(2.0 / (FAN + 10), rel=0.05)  # 10⁴ samples: s.e. ≈ 0.9 %


@pytest.mark.parametrize("init", ["he", "glorot"])
def test_biases_start_at_zero(init):
    model = sm.MLP([7, 9, 5, 3], activation="tanh", dtype="float32", seed=1, init=init)
    assert len(model.biases) == 3
    for b, width in zip(model.biases, [9, 5, 3], strict=True):
        assert b.shape == (width,)
        np.testing.assert_array_equal(b, 0.0)
    assert all(np.any(W != 0) for W in model.weights)


@pytest.mark.parametrize("dtype", ["float32", "float64"])
def test_same_seed_same_params_different_seed_different(dtype):
    a = sm.MLP([6, 8, 3], dtype=dtype, seed=5)
    b = sm.MLP([6, 8, 3], dtype=dtype, seed=5)
    c = sm.MLP([6, 8, 3], dtype=dtype, seed=6)
    assert a.params.dtype == np.dtype(dtype)
    np.testing.assert_array_equal(a.params, b.params)
    assert np.mean(a.params != c.params) > 0.5  # the weights (most of params) all change; biases stay 0


@pytest.mark.parametrize("hidden, expected", [
    ("relu", "he"), ("leaky_relu", "he"), ("gelu", "he"), ("softplus", "he"),
    ("tanh", "glorot"), ("sigmoid", "glorot"), ("identity", "glorot"),
    (["relu", "gelu"], "he"), (["relu", "tanh"], "glorot"),
])
def test_auto_picks_he_for_the_relu_family_else_glorot(hidden, expected):
    layers = [6, 8, 8, 3] if isinstance(hidden, list) else [6, 8, 3]
    auto = sm.MLP(layers, activation=hidden, seed=2, init="auto")
    explicit = sm.MLP(layers, activation=hidden, seed=2, init=expected)
    other = sm.MLP(layers, activation=hidden, seed=2, init="glorot" if expected == "he" else "he")
    assert auto.init == expected
    np.testing.assert_array_equal(auto.params, explicit.params)
    assert not np.array_equal(auto.params, other.params)
