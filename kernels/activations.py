"""Hidden-layer activations: each one a forward rule and its backward rule, side by side.

Codes (small ints) select the activation inside two loop kernels, so the whole set compiles to two
specialisations per dtype instead of two per activation. ``Z`` holds pre-activations, ``A`` outputs.
Scalar maths runs in the array's precision or higher (Numba promotes where a float64 literal meets it)
and is stored back in the array's dtype.
"""

from __future__ import annotations

import math

from numba import njit

IDENTITY, SIGMOID, TANH, RELU, LEAKY_RELU, GELU, SOFTPLUS = range(7)
CODES = {
    "identity": IDENTITY,
    "sigmoid": SIGMOID,
    "tanh": TANH,
    "relu": RELU,
    "leaky_relu": LEAKY_RELU,
    "gelu": GELU,
    "softplus": SOFTPLUS,
}
LEAKY_SLOPE = 0.01
GELU_C = math.sqrt(2.0 / math.pi)  # tanh approximation of Hendrycks & Gimpel 2016
GELU_K = 0.044715


@njit(cache=True, inline="always")
def sigmoid(z):
    """σ(z) = 1 / (1 + e^{-z}), evaluated without overflow for either sign of z."""
    if z >= 0.0:
        return 1.0 / (1.0 + math.exp(-z))
    e = math.exp(z)
    return e / (1.0 + e)


@njit(cache=True, inline="always")
def softplus(z):
    """log(1 + e^z) = max(z, 0) + log1p(e^{-|z|}), stable for large |z|."""
    return max(z, 0.0) + math.log1p(math.exp(-abs(z)))


@njit(cache=True, inline="always")
def forward(code, z):
    """a = f(z) for the activation ``code``."""
    if code == SIGMOID:
        return sigmoid(z)
    if code == TANH:
        return math.tanh(z)
    if code == RELU:
        return max(z, 0.0)
    if code == LEAKY_RELU:
        return max(z, 0.0) + LEAKY_SLOPE * min(z, 0.0)
    if code == GELU:
        return 0.5 * z * (1.0 + math.tanh(GELU_C * (z + GELU_K * z * z * z)))
    if code == SOFTPLUS:
        return softplus(z)
    return z


@njit(cache=True, inline="always")
def derivative(code, z, a):
    """f'(z), using the stored output a = f(z) where that is cheaper."""
    if code == SIGMOID:
        return a * (1.0 - a)  # σ' = σ(1 − σ)
    if code == TANH:
        return 1.0 - a * a  # tanh' = 1 − tanh²
    # Branch-free masks: a data-dependent branch per element costs far more than the multiply.
    if code == RELU:
        return (z > 0.0) * 1.0
    if code == LEAKY_RELU:
        return LEAKY_SLOPE + (1.0 - LEAKY_SLOPE) * (z > 0.0)
    if code == GELU:
        t = math.tanh(GELU_C * (z + GELU_K * z * z * z))
        return 0.5 * (1.0 + t) + 0.5 * z * (1.0 - t * t) * GELU_C * (1.0 + 3.0 * GELU_K * z * z)
    if code == SOFTPLUS:
        return sigmoid(z)  # d/dz log(1 + e^z) = σ(z)
    return 1.0


@njit(cache=True, inline="always")
def _forward_rows(Z, b, A, code):
    n, m = Z.shape
    for i in range(n):
        z_row, a_row = Z[i], A[i]
        for j in range(m):
            z = z_row[j] + b[j]
            z_row[j] = z
            a_row[j] = forward(code, z)


@njit(cache=True, inline="always")
def _backward_rows(Z, A, D, code):
    """D = f'(Z) ⊙ D in place. One array read and written: were dA and dZ two names for one buffer, the
    compiler's overlap check would fail at run time and take the scalar loop (measured 5× slower)."""
    n, m = Z.shape
    for i in range(n):
        z_row, a_row, d_row = Z[i], A[i], D[i]
        if code == RELU:
            # A select in the array's own dtype: the float64 mask of `derivative` would widen float32 rows.
            zero = d_row.dtype.type(0)
            for j in range(m):
                d_row[j] = d_row[j] if z_row[j] > 0 else zero
        else:
            for j in range(m):
                d_row[j] = derivative(code, z_row[j], a_row[j]) * d_row[j]


@njit(cache=True, nogil=True)
def bias_forward(Z, b, A, code):
    """Z += b (row broadcast), then A = f(Z).

    Z: (n, m) pre-activations, updated in place; b: (m,); A: (n, m) output, may be Z itself.
    The cheap activations get loops with a constant code, which the compiler vectorises.
    """
    if code == RELU:
        _forward_rows(Z, b, A, RELU)
    elif code == IDENTITY:
        _forward_rows(Z, b, A, IDENTITY)
    elif code == LEAKY_RELU:
        _forward_rows(Z, b, A, LEAKY_RELU)
    else:
        _forward_rows(Z, b, A, code)


@njit(cache=True, nogil=True)
def backward(Z, A, D, code):
    """dZ = f'(Z) ⊙ dA in place, the delta of a layer from the gradient of its output.

    Z, A: (n, m) pre-activations and outputs of the forward pass; D: (n, m) holds dA = ∂loss/∂A on entry and
    dZ = ∂loss/∂Z on exit. One delta argument: see :func:`_backward_rows` for why it is never two.
    """
    if code == RELU:
        _backward_rows(Z, A, D, RELU)
    elif code == IDENTITY:
        _backward_rows(Z, A, D, IDENTITY)
    elif code == LEAKY_RELU:
        _backward_rows(Z, A, D, LEAKY_RELU)
    elif code == TANH:
        _backward_rows(Z, A, D, TANH)
    elif code == SIGMOID:
        _backward_rows(Z, A, D, SIGMOID)
    else:
        _backward_rows(Z, A, D, code)


@njit(cache=True, nogil=True)
def column_sums(dZ, db):
    """db_j = Σ_i dZ[i, j]: the bias gradient. dZ: (n, m); db: (m,) overwritten."""
    n, m = dZ.shape
    for j in range(m):
        db[j] = 0.0
    for i in range(n):
        for j in range(m):
            db[j] += dZ[i, j]


@njit(cache=True, nogil=True)
def backward_block(Z, A, D, code, rows, k, partial):
    """Block k of :func:`backward_sums`: rows k·rows … of D ← f'(Z) ⊙ D, then their column sums into ``partial[k]``
    (while the block is still in cache)."""
    lo = k * rows
    hi = min(Z.shape[0], lo + rows)
    backward(Z[lo:hi], A[lo:hi], D[lo:hi], code)
    column_sums(D[lo:hi], partial[k])


@njit(cache=True, nogil=True)
def add_blocks(partial, db):
    """db_j = Σ_k partial[k, j], k in order: the block sums joined. partial: (blocks, m); db: (m,) overwritten."""
    db[:] = partial[0]
    for k in range(1, partial.shape[0]):
        for j in range(db.size):
            db[j] += partial[k, j]


@njit(cache=True, nogil=True)
def backward_sums(Z, A, D, code, rows, partial, db):
    """D ← f'(Z) ⊙ D (:func:`backward`) and db = its column sums, in one pass over blocks of ``rows`` rows:
    each block's sums into ``partial`` ((⌈n/rows⌉, m), scratch), then joined in block order (:func:`add_blocks`).
    The blocks depend on the shape alone, so the threaded form (``threaded.backward_sums``) has these bits."""
    for k in range(partial.shape[0]):
        backward_block(Z, A, D, code, rows, k, partial)
    add_blocks(partial, db)


def code_of(name: str) -> int:
    """Activation code for a name from :data:`CODES`."""
    return CODES[name]


@njit(cache=True, nogil=True)
def unit_activity(Z, threshold, saturated, alive):
    """Health counts of one layer's pre-activations Z (n, m).

    saturated[0] += number of elements with |z| > threshold (sigmoid/tanh saturation);
    alive[j] = 1 where some row has z > 0 (a ReLU unit that is zero on every row is dead). alive: (m,) int64.
    """
    n, m = Z.shape
    count = 0
    for i in range(n):
        for j in range(m):
            z = Z[i, j]
            if abs(z) > threshold:
                count += 1
            if z > 0.0:
                alive[j] = 1
    saturated[0] += count
