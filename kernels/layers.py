"""The hidden layer's optional parts: layer normalisation, dropout and the residual add, forward beside backward.

One hidden layer h computes, in this order (docs/models.md gives the formulas and sources)::

    Z = A_h W_h + b_h                                  (BLAS, then the bias)
    N = g ⊙ (Z − μ) / σ + β          with norm         (Ba, Kiros & Hinton 2016, pre-activation)
    H = f(N)                                           (kernels/activations.py)
    D = H ⊙ keep / (1 − p)           with dropout      (Srivastava et al. 2014, inverted)
    A_{h+1} = D + A_h                with residual     (He et al. 2016, identity skip)

Every kernel works row by row: a row's result never depends on the other rows of the batch, so it is the same
whichever rank or part holds the row. Row sums run in float64 by pairwise folding, whose order is fixed by the
width alone (a sequential sum is one long dependency chain the compiler will not vectorise without fastmath, and a
fastmath reduction would depend on the vector width).
The dropout decision is a pure function of (seed, step, global row, layer, unit): no generator state.
Nothing here allocates; every output is a buffer the caller owns.
"""

from __future__ import annotations

from numba import njit, uint32, uint64

NORM_EPS = 1e-5
"""ε under the square root of layer normalisation's variance (common practice; Ba et al. 2016 leave it out)."""

WEYL32 = 0x9E3779B9  # ⌊2³²/φ⌋: the unit index's Weyl step (Steele, Lea & Flood 2014, SplitMix)


# --- layer normalisation ---------------------------------------------------------------------------------------

@njit(cache=True, inline="always")
def _fold(t, w):
    """Σ t[:w] by pairwise folding in place: the top half is added onto the bottom half until one value is left.

    Each fold is an elementwise loop (no reduction for the compiler to refuse to vectorise), the order is fixed by
    w alone, and pairwise summation's error grows with log₂ w (Higham 2002, §4.2). t: float64 scratch, clobbered.
    """
    while w > 1:
        half = w // 2
        offset = w - half  # ≥ half: the two halves never overlap
        low, high = t[:half], t[offset:offset + half]  # two views: one array under one name fails the overlap check
        for j in range(half):
            low[j] += high[j]
        w = offset
    return t[0]


@njit(cache=True)
def norm_forward(Z, b, gain, shift, N, stats, scratch):
    """Z += b, then N = gain ⊙ (Z − μ)·r + shift per row, r = 1/√(σ² + ε) (Ba, Kiros & Hinton 2016, eq. 4).

    Z: (n, m) pre-activations, the bias added in place; b, gain, shift: (m,); N: (n, m) output; stats: (n, 2)
    float64, (μ, r) of each row for the backward pass; scratch: (2, ≥ m) float64. μ and σ² = mean((z − μ)²) are
    formed in float64 (two passes, pairwise sums), then (z − μ)·r·g + β in the array's dtype.
    """
    n, m = Z.shape
    t = scratch[0]
    for i in range(n):
        z, out = Z[i], N[i]
        for j in range(m):
            v = z[j] + b[j]
            z[j] = v
            t[j] = v
        mu = _fold(t, m) / m
        for j in range(m):
            d = z[j] - mu
            t[j] = d * d
        var = _fold(t, m) / m
        r = 1.0 / (var + NORM_EPS) ** 0.5
        stats[i, 0], stats[i, 1] = mu, r
        mu_t, r_t = Z.dtype.type(mu), Z.dtype.type(r)
        for j in range(m):
            out[j] = gain[j] * ((z[j] - mu_t) * r_t) + shift[j]


@njit(cache=True)
def norm_backward(Z, stats, gain, dN, dZ, dgain, dshift, scratch):
    """Backward of :func:`norm_forward`: dZ from dN = ∂loss/∂N, and the parameter gradients.

    With x̂ = (z − μ)·r and dx̂ = g ⊙ dN (per row, m units):
    dZ = r·(dx̂ − mean(dx̂) − x̂·mean(dx̂ ⊙ x̂)); dgain = Σ_rows dN ⊙ x̂; dshift = Σ_rows dN (overwritten).
    Z: (n, m) the pre-activations after the bias; stats: (n, 2) float64 from the forward pass; dN, dZ: (n, m),
    two buffers; dgain, dshift: (m,); scratch: (2, ≥ m) float64. x̂ is formed in the array's dtype exactly as the
    forward pass formed it, so a row's products have the same bits whichever part holds it.
    """
    n, m = Z.shape
    t, u = scratch[0], scratch[1]
    for j in range(m):
        dgain[j] = 0.0
        dshift[j] = 0.0
    for i in range(n):
        z, d, out = Z[i], dN[i], dZ[i]
        mu_t, r_t = Z.dtype.type(stats[i, 0]), Z.dtype.type(stats[i, 1])
        for j in range(m):  # out holds x̂ until the last loop overwrites it
            xhat = (z[j] - mu_t) * r_t
            out[j] = xhat
            dgain[j] += d[j] * xhat
            dshift[j] += d[j]
            dx = float(gain[j]) * d[j]
            t[j] = dx
            u[j] = dx * xhat
        a_t, c_t = Z.dtype.type(_fold(t, m) / m), Z.dtype.type(_fold(u, m) / m)  # mean(dx̂), mean(dx̂ ⊙ x̂)
        for j in range(m):
            out[j] = r_t * ((gain[j] * d[j] - a_t) - out[j] * c_t)


# --- dropout: a counter-based keep decision --------------------------------------------------------------------

@njit(cache=True, inline="always")
def splitmix64(x):
    """SplitMix64's output function of a 64-bit counter (Steele, Lea & Flood 2014): a bijection of uint64."""
    z = uint64(x + uint64(0x9E3779B97F4A7C15))
    z = uint64((z ^ (z >> uint64(30))) * uint64(0xBF58476D1CE4E5B9))
    z = uint64((z ^ (z >> uint64(27))) * uint64(0x94D049BB133111EB))
    return z ^ (z >> uint64(31))


@njit(cache=True)
def dropout_key(seed, step, layer):
    """The 64-bit key of one (seed, step, layer): nested SplitMix64 of the three counters."""
    return splitmix64(splitmix64(splitmix64(uint64(seed)) ^ uint64(step)) ^ uint64(layer))


@njit(cache=True, inline="always")
def row_key(key, row):
    """The 64-bit key of one global row under a (seed, step, layer) key."""
    return splitmix64(key ^ uint64(row))


@njit(cache=True, inline="always")
def unit_hash(low, high, j):
    """32 uniform bits for unit j of a row: MurmurHash3's fmix32 finaliser (Appleby 2011) of the row key's low
    word plus j Weyl steps, xor its high word. 32-bit multiplies only, so the loop vectorises on AVX2."""
    h = uint32(uint32(low + uint32(j) * uint32(WEYL32)) ^ high)
    h = uint32(h ^ (h >> uint32(16)))
    h = uint32(h * uint32(0x85EBCA6B))
    h = uint32(h ^ (h >> uint32(13)))
    h = uint32(h * uint32(0xC2B2AE35))
    return uint32(h ^ (h >> uint32(16)))


@njit(cache=True)
def dropout_forward(H, skip, A, keep, rows, key, threshold, scale, has_skip):
    """A = H ⊙ keep·scale (+ skip) with keep = [hash(key, row, unit) ≥ threshold]: inverted dropout
    (Srivastava et al. 2014), the kept units scaled by 1/(1 − p) so the expected output is H.

    H, skip, A: (n, m) (skip read only when ``has_skip``; A may be H); keep: (n, m) uint8, the decision, written for
    the backward pass; rows: (n,) int64 global row indices; key: :func:`dropout_key`; threshold: uint32
    ⌊p·2³²⌋, so P(keep) = 1 − threshold/2³²; scale: 1/(1 − p) in the array's dtype.
    """
    n, m = H.shape
    zero = H.dtype.type(0)
    for i in range(n):
        k = row_key(key, rows[i])
        low, high = uint32(k & uint64(0xFFFFFFFF)), uint32(k >> uint64(32))
        h_row, a_row, keep_row = H[i], A[i], keep[i]
        for j in range(m):
            keep_row[j] = unit_hash(low, high, j) >= threshold
        if has_skip:
            s_row = skip[i]
            for j in range(m):
                a_row[j] = (h_row[j] * scale if keep_row[j] else zero) + s_row[j]
        else:
            for j in range(m):
                a_row[j] = h_row[j] * scale if keep_row[j] else zero


@njit(cache=True)
def dropout_backward(D, saved, keep, scale, has_skip):
    """Backward of :func:`dropout_forward`: D = ∂loss/∂A on entry, ∂loss/∂H = D ⊙ keep·scale on exit; with a
    skip, ``saved`` first receives ∂loss/∂A, the skip's share (the caller adds it to ∂loss/∂A_h).

    D, saved: (n, m) two buffers; keep: (n, m) uint8 from the forward pass; scale: 1/(1 − p) in D's dtype.
    """
    n, m = D.shape
    zero = D.dtype.type(0)
    for i in range(n):
        d_row, keep_row = D[i], keep[i]
        if has_skip:
            s_row = saved[i]
            for j in range(m):
                s_row[j] = d_row[j]
        for j in range(m):
            d_row[j] = d_row[j] * scale if keep_row[j] else zero


# --- the residual add ------------------------------------------------------------------------------------------

@njit(cache=True)
def residual_forward(H, skip, A):
    """A = H + skip, the identity shortcut (He et al. 2016). H, skip, A: (n, m); A may be H."""
    n, m = H.shape
    for i in range(n):
        h_row, s_row, a_row = H[i], skip[i], A[i]
        for j in range(m):
            a_row[j] = h_row[j] + s_row[j]


@njit(cache=True)
def residual_backward(D, saved):
    """dA_h += ∂loss/∂A_{h+1}: the shortcut passes the gradient through unchanged. D, saved: (n, m) two buffers;
    D is ∂loss/∂A_h from the layer's GEMM, in place."""
    n, m = D.shape
    for i in range(n):
        d_row, s_row = D[i], saved[i]
        for j in range(m):
            d_row[j] = d_row[j] + s_row[j]


@njit(cache=True)
def copy_rows(src, dst):
    """dst = src, row by row (the skip's share of the gradient when there is no dropout). (n, m) each."""
    n, m = src.shape
    for i in range(n):
        s_row, d_row = src[i], dst[i]
        for j in range(m):
            d_row[j] = s_row[j]
