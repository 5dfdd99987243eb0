"""Losses fused with their output gradient.

Each kernel reads the output layer's pre-activations (logits) ``Z`` of n rows, writes the model's outputs
``O`` and ``dZ = ∂(weighted loss sum)/∂Z · scale``, and returns the *unscaled* weighted loss sum Σ_i w_i·ℓ_i over the
n rows (float64). ``W`` (n,) float64 holds the rows' weights (ones when the job has none: multiplying by 1 is exact,
so an unweighted run has the bits it had before weights existed). ``scale`` is 1/Σw over the global batch (1/G
unweighted), so that summing dZ over all ranks' shards gives the gradient of the full-batch weighted mean loss.
"""

from __future__ import annotations

import math

from numba import njit

from .activations import sigmoid

SOFTMAX_CROSS_ENTROPY, BINARY_CROSS_ENTROPY, SQUARED_ERROR, HUBER, ABSOLUTE_ERROR, POISSON = range(6)
CODES = {
    "softmax_cross_entropy": SOFTMAX_CROSS_ENTROPY,
    "binary_cross_entropy": BINARY_CROSS_ENTROPY,
    "squared_error": SQUARED_ERROR,
    "huber": HUBER,
    "absolute_error": ABSOLUTE_ERROR,
    "poisson": POISSON,
}


@njit(cache=True, nogil=True)
def softmax_cross_entropy(Z, labels, W, scale, O, dZ):
    """Per row: loss = logsumexp(z) − z_y; O = softmax(z); dZ = (O − onehot(y))·scale·w.

    Z: (n, k) logits; labels: (n,) int64 in [0, k); O, dZ: (n, k). Log-sum-exp is shifted by the row
    maximum, so no exponential overflows.
    """
    n, k = Z.shape
    total = 0.0
    for i in range(n):
        zmax = Z[i, 0]
        for j in range(1, k):
            if Z[i, j] > zmax:
                zmax = Z[i, j]
        s = 0.0
        for j in range(k):
            e = math.exp(Z[i, j] - zmax)
            O[i, j] = e
            s += e
        y = labels[i]
        total += W[i] * (math.log(s) + zmax - Z[i, y])
        inv = 1.0 / s
        row_scale = scale * W[i]
        for j in range(k):
            p = O[i, j] * inv
            O[i, j] = p
            dZ[i, j] = p * row_scale
        dZ[i, y] -= row_scale
    return total


@njit(cache=True, nogil=True)
def binary_cross_entropy(Z, T, W, scale, O, dZ):
    """Per element, from logits: loss = softplus(z) − t·z; O = σ(z); dZ = (σ(z) − t)·scale·w.

    Z, T, O, dZ: (n, k); T holds 0/1 (any value in [0, 1] is accepted). softplus is evaluated as
    max(z, 0) + log1p(e^{−|z|}), exact for large |z|.
    """
    n, k = Z.shape
    total = 0.0
    for i in range(n):
        row_scale = scale * W[i]
        for j in range(k):
            z = Z[i, j]
            t = T[i, j]
            total += W[i] * (max(z, 0.0) + math.log1p(math.exp(-abs(z))) - t * z)
            o = sigmoid(z)
            O[i, j] = o
            dZ[i, j] = (o - t) * row_scale
    return total


@njit(cache=True, nogil=True)
def squared_error(O, T, W, scale, dO):
    """Per row: loss = ½ Σ_k (o_k − t_k)²; dO = (O − T)·scale·w.

    O, T, dO: (n, k). O are the model's outputs after its output activation (identity unless the model
    asks otherwise); the caller chains dO through that activation's backward rule, which for a sigmoid
    output gives the textbook delta (o − t)·o·(1 − o).
    """
    n, k = O.shape
    total = 0.0
    for i in range(n):
        row_scale = scale * W[i]
        for j in range(k):
            d = O[i, j] - T[i, j]
            total += W[i] * (0.5 * d * d)
            dO[i, j] = d * row_scale
    return total


@njit(cache=True, nogil=True)
def huber(O, T, W, delta, scale, dO):
    """Per row: loss = Σ_k h(o_k − t_k) with h(r) = ½r² for |r| ≤ δ and δ·(|r| − ½δ) beyond (Huber 1964);
    dO = clip(O − T, −δ, δ)·scale·w.

    O, T, dO: (n, k); delta: δ > 0 in the targets' units (float64). Quadratic near zero, linear in the tails, so an
    outlier's pull on the gradient is at most δ. O are the outputs after the output activation; the caller chains
    dO through its backward rule, as for ``squared_error``.
    """
    n, k = O.shape
    total = 0.0
    for i in range(n):
        row_scale = scale * W[i]
        for j in range(k):
            r = O[i, j] - T[i, j]
            if abs(r) <= delta:
                total += W[i] * (0.5 * r * r)
                dO[i, j] = r * row_scale
            else:
                total += W[i] * (delta * (abs(r) - 0.5 * delta))
                dO[i, j] = math.copysign(delta, r) * row_scale
    return total


@njit(cache=True, nogil=True)
def absolute_error(O, T, W, scale, dO):
    """Per row: loss = Σ_k |o_k − t_k|; dO = sign(O − T)·scale·w, 0 where O = T (the subgradient numpy's sign takes).

    O, T, dO: (n, k); O after the output activation, chained by the caller as for ``squared_error``.
    """
    n, k = O.shape
    total = 0.0
    for i in range(n):
        row_scale = scale * W[i]
        for j in range(k):
            r = O[i, j] - T[i, j]
            total += W[i] * abs(r)
            dO[i, j] = (1.0 if r > 0.0 else (-1.0 if r < 0.0 else 0.0)) * row_scale
    return total


@njit(cache=True, nogil=True)
def poisson(Z, T, W, scale, O, dZ):
    """Poisson regression with the log link (McCullagh & Nelder 1989, §6.2): per row loss = Σ_k (e^z − t·z), the
    negative log-likelihood of the counts t without its constant log(t!); O = e^z; dZ = (e^z − t)·scale·w.

    Z: (n, k) logits (log of the expected count); T: (n, k) counts ≥ 0; O, dZ: (n, k). An e^z past the dtype's
    range is inf, so the loss is inf and the run stops as diverged.
    """
    n, k = Z.shape
    total = 0.0
    for i in range(n):
        row_scale = scale * W[i]
        for j in range(k):
            z = Z[i, j]
            o = math.exp(z)
            total += W[i] * (o - T[i, j] * z)
            O[i, j] = o
            dZ[i, j] = (o - T[i, j]) * row_scale
    return total


@njit(cache=True, nogil=True)
def exp_rows(Z, O):
    """O = e^Z elementwise (the log link's inverse: the outputs of a Poisson model). Z, O: (n, k)."""
    n, k = Z.shape
    for i in range(n):
        for j in range(k):
            O[i, j] = math.exp(Z[i, j])


@njit(cache=True, nogil=True)
def softmax_rows(Z, O):
    """O = softmax(Z) per row, shifted by the row maximum. Z, O: (n, k); O may be Z."""
    n, k = Z.shape
    for i in range(n):
        zmax = Z[i, 0]
        for j in range(1, k):
            if Z[i, j] > zmax:
                zmax = Z[i, j]
        s = 0.0
        for j in range(k):
            e = math.exp(Z[i, j] - zmax)
            O[i, j] = e
            s += e
        inv = 1.0 / s
        for j in range(k):
            O[i, j] *= inv


@njit(cache=True, nogil=True)
def count_correct(O, labels):
    """Number of rows whose arg-max output equals the integer label. O: (n, k); labels: (n,)."""
    n, k = O.shape
    correct = 0
    for i in range(n):
        best = 0
        for j in range(1, k):
            if O[i, j] > O[i, best]:
                best = j
        if best == labels[i]:
            correct += 1
    return correct


@njit(cache=True, nogil=True)
def count_correct_binary(O, T):
    """Number of elements with (O > ½) == (T > ½). O, T: (n, k)."""
    n, k = O.shape
    correct = 0
    for i in range(n):
        for j in range(k):
            if (O[i, j] > 0.5) == (T[i, j] > 0.5):
                correct += 1
    return correct


@njit(cache=True, nogil=True)
def squared_error_sum(O, T):
    """Σ (o − t)² over all elements, float64 (for RMSE). O, T: (n, k)."""
    n, k = O.shape
    total = 0.0
    for i in range(n):
        for j in range(k):
            d = O[i, j] - T[i, j]
            total += d * d
    return total


@njit(cache=True, nogil=True)
def squared_error_sum_scaled(O, T, S):
    """Σ ((o − t)·s_j)² over all elements, float64: the squared error in the targets' own units of outputs and
    targets standardised per output j by the standard deviations S (k,) float64 (``data.standardize_targets``;
    the means cancel). O, T: (n, k)."""
    n, k = O.shape
    total = 0.0
    for i in range(n):
        for j in range(k):
            d = (O[i, j] - T[i, j]) * S[j]
            total += d * d
    return total
