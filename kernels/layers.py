"""The hidden layer's optional parts: layer normalisation, dropout and the residual add, forward beside backward.

One hidden layer h computes, in this order (docs/models.md gives the formulas and sources)::

    Z = A_h W_h + b_h                                  (BLAS, then the bias)
    N = g ⊙ (Z − μ) / σ + β          with norm         (Ba, Kiros & Hinton 2016, pre-activation)
    H = f(N)                                           (kernels/activations.py)
    D = H ⊙ keep / (1 − p)           with dropout      (Srivastava et al. 2014, inverted)
    A_{h+1} = D + A_h                with residual     (He et al. 2016, identity skip)

Every kernel works row by row: a row's result never depends on the other rows of the batch, so it is the same
whichever rank or part holds the row. Row sums run by pairwise folding (the forward statistics in float64, the
backward sums in the array's dtype), whose order is fixed by the width alone (a sequential sum is one long
dependency chain the compiler will not vectorise without fastmath, and a fastmath reduction would depend on the
vector width).
The dropout decision is a pure function of (seed, step, global row, layer, unit): no generator state.
Nothing here allocates; every output is a buffer the caller owns.
"""

from __future__ import annotations

from numba import njit, uint32, uint64
from shardmill.kernels import activations as act

NORM_EPS = 1e-5
"""ε under the square root of layer normalisation's variance (common practice; Ba et al. 2016 leave it out)."""

WEYL32 = 0x9E3779B9  # ⌊2³²/φ⌋: the unit index's Weyl step (Steele, Lea & Flood 2014, SplitMix)
LOW32 = uint64(0xFFFFFFFF)


# --- layer normalisation ---------------------------------------------------------------------------------------

@njit(cache=True, inline="always")
def _fold(t, w):
    """Σ t[:w] by pairwise folding in place: the top half is added onto the bottom half while more than eight
    values are left, then those are added in order (in float64).

    Each fold is an elementwise loop (no reduction for the compiler to refuse to vectorise), the order is fixed by
    w alone, and pairwise summation's error grows with log₂ w (Higham 2002, §4.2). t: scratch row, clobbered.
    """
    while w > 8:
        half = w // 2
        offset = w - half  # ≥ half: the two halves never overlap
        low, high = t[:half], t[offset:offset + half]  # two views: one array under one name fails the overlap check
        for j in range(half):
            low[j] += high[j]
        w = offset
    total = 0.0
    for j in range(w):
        total += t[j]
    return total


@njit(cache=True, inline="always")
def _fold2(t, u, w):
    """(Σ t[:w], Σ u[:w]), each exactly as :func:`_fold` forms it, in one set of loops."""
    while w > 8:
        half = w // 2
        offset = w - half
        t_low, t_high, u_low, u_high = t[:half], t[offset:offset + half], u[:half], u[offset:offset + half]
        for j in range(half):
            t_low[j] += t_high[j]
            u_low[j] += u_high[j]
        w = offset
    t_total = u_total = 0.0
    for j in range(w):
        t_total += t[j]
        u_total += u[j]
    return t_total, u_total


@njit(cache=True, inline="always")
def _norm_forward_rows(Z, b, gain, shift, H, stats, scratch, code):
    n, m = Z.shape
    t, u = scratch[0], scratch[1]
    half = m // 2
    offset = m - half
    for i in range(n):
        z, out = Z[i], H[i]
        k = float(z[0] + b[0])  # the shift of the shifted-data sums: the row's first value
        # z += b, with the first fold of Σ (z − k) and Σ (z − k)² on the way (what _fold2's first level adds)
        z_low, z_high, b_low, b_high, t_low, u_low = z[:half], z[offset:], b[:half], b[offset:], t[:half], u[:half]
        for j in range(half):
            v, w = z_low[j] + b_low[j], z_high[j] + b_high[j]
            z_low[j], z_high[j] = v, w
            dv, dw = v - k, w - k
            t_low[j] = dv + dw
            u_low[j] = dv * dv + dw * dw
        if offset > half:  # the middle element of an odd width stays in place
            v = z[half] + b[half]
            z[half] = v
            t[half] = v - k
            u[half] = (v - k) * (v - k)
        t_sum, u_sum = _fold2(t, u, offset)
        mean = t_sum / m
        mu = k + mean
        var = max(u_sum / m - mean * mean, 0.0)
        r = 1.0 / (var + NORM_EPS) ** 0.5
        stats[i, 0], stats[i, 1] = mu, r
        mu_t, r_t = Z.dtype.type(mu), Z.dtype.type(r)
        for j in range(m):
            out[j] = act.forward(code, gain[j] * ((z[j] - mu_t) * r_t) + shift[j])


@njit(cache=True, nogil=True)
def _norm_forward_relu(Z, b, gain, shift, H, stats, scratch):
    _norm_forward_rows(Z, b, gain, shift, H, stats, scratch, act.RELU)


@njit(cache=True, nogil=True)
def _norm_forward_identity(Z, b, gain, shift, H, stats, scratch):
    _norm_forward_rows(Z, b, gain, shift, H, stats, scratch, act.IDENTITY)


@njit(cache=True, nogil=True)
def _norm_forward_any(Z, b, gain, shift, H, stats, scratch, code):
    _norm_forward_rows(Z, b, gain, shift, H, stats, scratch, code)


def norm_forward(Z, b, gain, shift, H, stats, scratch, code):
    """Z += b, then H = f(N), N = gain ⊙ (Z − μ)·r + shift per row, r = 1/√(σ² + ε) (Ba, Kiros & Hinton 2016,
    eq. 4), f the activation ``code`` (kernels/activations.py): normalisation and activation in one pass.

    Z: (n, m) pre-activations, the bias added in place; b, gain, shift: (m,); H: (n, m) output; stats: (n, 2)
    float64, (μ, r) of each row for the backward pass; scratch: (2, ≥ m) float64. μ and σ² are formed in float64
    in one pass from pairwise sums of (z − k) and (z − k)², k the row's first value: σ² = mean((z − k)²) −
    mean(z − k)², the shifted-data algorithm (Chan, Golub & LeVeque 1983), whose cancellation is small when k is a
    value of the row; then N = (z − μ)·r·g + β in the array's dtype. N is not kept: the backward pass forms it
    again, with the same bits.
    """
    if code == act.RELU:  # constant codes for the cheap activations, which the compiler then vectorises
        _norm_forward_relu(Z, b, gain, shift, H, stats, scratch)
    elif code == act.IDENTITY:
        _norm_forward_identity(Z, b, gain, shift, H, stats, scratch)
    else:
        _norm_forward_any(Z, b, gain, shift, H, stats, scratch, code)


@njit(cache=True, inline="always")
def _delta(code, z, a, d, zero):
    """f'(z)·d (the caller stores it in its dtype); relu as a select, so float32 rows are not widened."""
    if code == act.RELU:
        return d if z > 0 else zero
    return act.derivative(code, z, a) * d


@njit(cache=True, inline="always")
def _norm_backward_rows(Z, stats, gain, shift, H, D, dgain, dshift, scratch, code):
    n, m = Z.shape
    t, u = scratch[0], scratch[1]
    zero = Z.dtype.type(0)
    half = m // 2
    offset = m - half
    for j in range(m):
        dgain[j] = 0.0
        dshift[j] = 0.0
    # units j and offset + j side by side, so the first fold of the two row sums happens on the way
    g_low, g_high, s_low, s_high = gain[:half], gain[offset:], shift[:half], shift[offset:]
    dg_low, dg_high, ds_low, ds_high = dgain[:half], dgain[offset:], dshift[:half], dshift[offset:]
    t_low, u_low = t[:half], u[:half]
    for i in range(n):
        z, h, d = Z[i], H[i], D[i]
        z_low, z_high, h_low, h_high, d_low, d_high = z[:half], z[offset:], h[:half], h[offset:], d[:half], d[offset:]
        mu_t, r_t = Z.dtype.type(stats[i, 0]), Z.dtype.type(stats[i, 1])
        for j in range(half):
            x1, x2 = (z_low[j] - mu_t) * r_t, (z_high[j] - mu_t) * r_t
            # dN from N as the forward pass formed it (the same bits)
            n1 = Z.dtype.type(_delta(code, g_low[j] * x1 + s_low[j], h_low[j], d_low[j], zero))
            n2 = Z.dtype.type(_delta(code, g_high[j] * x2 + s_high[j], h_high[j], d_high[j], zero))
            dg_low[j] += n1 * x1
            dg_high[j] += n2 * x2
            ds_low[j] += n1
            ds_high[j] += n2
            a1, a2 = g_low[j] * n1, g_high[j] * n2  # dx̂
            t_low[j] = a1 + a2
            u_low[j] = a1 * x1 + a2 * x2
        if offset > half:  # the middle unit of an odd width
            x = (z[half] - mu_t) * r_t
            dn = Z.dtype.type(_delta(code, gain[half] * x + shift[half], h[half], d[half], zero))
            dgain[half] += dn * x
            dshift[half] += dn
            t[half] = gain[half] * dn
            u[half] = gain[half] * dn * x
        t_sum, u_sum = _fold2(t, u, offset)
        a_t, c_t = Z.dtype.type(t_sum / m), Z.dtype.type(u_sum / m)  # mean(dx̂), mean(dx̂ ⊙ x̂)
        for j in range(m):  # x̂ and dN again from the row in cache, then D is overwritten in place
            xhat = (z[j] - mu_t) * r_t
            dn = Z.dtype.type(_delta(code, gain[j] * xhat + shift[j], h[j], d[j], zero))
            d[j] = r_t * ((gain[j] * dn - a_t) - xhat * c_t)


@njit(cache=True, nogil=True)
def _norm_backward_relu(Z, stats, gain, shift, H, D, dgain, dshift, scratch):
    _norm_backward_rows(Z, stats, gain, shift, H, D, dgain, dshift, scratch, act.RELU)


@njit(cache=True, nogil=True)
def _norm_backward_identity(Z, stats, gain, shift, H, D, dgain, dshift, scratch):
    _norm_backward_rows(Z, stats, gain, shift, H, D, dgain, dshift, scratch, act.IDENTITY)


@njit(cache=True, nogil=True)
def _norm_backward_any(Z, stats, gain, shift, H, D, dgain, dshift, scratch, code):
    _norm_backward_rows(Z, stats, gain, shift, H, D, dgain, dshift, scratch, code)


def norm_backward(Z, stats, gain, shift, H, D, dgain, dshift, scratch, code):
    """Backward of :func:`norm_forward`, in place: D = ∂loss/∂H on entry, ∂loss/∂Z on exit; and the gradients of
    the gain and shift.

    dN = f'(N) ⊙ ∂loss/∂H in the array's dtype; with x̂ = (z − μ)·r and dx̂ = g ⊙ dN (per row, m units):
    ∂loss/∂Z = r·(dx̂ − mean(dx̂) − x̂·mean(dx̂ ⊙ x̂)); dgain = Σ_rows dN ⊙ x̂; dshift = Σ_rows dN (both
    overwritten). Z: (n, m) the pre-activations after the bias; stats: (n, 2) float64 from the forward pass; gain,
    shift: (m,); H: (n, m) the forward pass's output; D: (n, m), one buffer in and out (see
    ``activations.backward`` for why never two names for it); dgain, dshift: (m,); scratch: (2, ≥ m) in the array's
    dtype: the two row sums are pairwise sums in the dtype (float32 rows at twice the vector width of float64, the
    error growing with log₂ m all the same); code: the activation (identity: ∂loss/∂H is dN). x̂ and N are formed in
    the array's dtype exactly as the forward pass formed them, so a row's products have the same bits whichever part
    holds it.
    """
    if code == act.RELU:  # three kernels, not three branches of one: a job compiles only the one it uses
        _norm_backward_relu(Z, stats, gain, shift, H, D, dgain, dshift, scratch)
    elif code == act.IDENTITY:
        _norm_backward_identity(Z, stats, gain, shift, H, D, dgain, dshift, scratch)
    else:
        _norm_backward_any(Z, stats, gain, shift, H, D, dgain, dshift, scratch, code)


# --- dropout: a counter-based keep decision --------------------------------------------------------------------

@njit(cache=True, inline="always")
def splitmix64(x):
    """SplitMix64's output function of a 64-bit counter (Steele, Lea & Flood 2014): a bijection of uint64."""
    z = uint64(x + uint64(0x9E3779B97F4A7C15))
    z = uint64((z ^ (z >> uint64(30))) * uint64(0xBF58476D1CE4E5B9))
    z = uint64((z ^ (z >> uint64(27))) * uint64(0x94D049BB133111EB))
    return z ^ (z >> uint64(31))


@njit(cache=True, nogil=True)
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
    word plus j Weyl steps (mod 2³²), xor its high word. Held in uint64 lanes whose values stay below 2³², so each
    multiply is 32 × 32 → 64 bits (one vpmuludq on AVX2) and the loop vectorises. low, high: uint64 < 2³²."""
    h = ((low + uint64(uint32(j)) * uint64(WEYL32)) & LOW32) ^ high
    h = h ^ (h >> uint64(16))
    h = (h * uint64(0x85EBCA6B)) & LOW32
    h = h ^ (h >> uint64(13))
    h = (h * uint64(0xC2B2AE35)) & LOW32
    return h ^ (h >> uint64(16))


@njit(cache=True, nogil=True)
def dropout_forward(H, skip, A, keep, rows, key, threshold, scale, has_skip):
    """A = H ⊙ keep·scale (+ skip) with keep = [hash(key, row, unit) ≥ threshold]: inverted dropout
    (Srivastava et al. 2014), the kept units scaled by 1/(1 − p) so the expected output is H.

    H, skip, A: (n, m) (skip read only when ``has_skip``; A may be H); keep: (n, m) uint8, the decision, written for
    the backward pass; rows: (n,) int64 global row indices; key: :func:`dropout_key`; threshold: uint32
    ⌊p·2³²⌋, so P(keep) = 1 − threshold/2³²; scale: 1/(1 − p) in the array's dtype. The hash and the stores share
    one loop, so its arithmetic hides behind the memory traffic.
    """
    n, m = H.shape
    zero = H.dtype.type(0)
    bound = uint64(threshold)
    for i in range(n):
        k = row_key(key, rows[i])
        low, high = k & LOW32, k >> uint64(32)
        h_row, a_row, keep_row = H[i], A[i], keep[i]
        if has_skip:
            s_row = skip[i]
            for j in range(m):
                kept = unit_hash(low, high, j) >= bound
                keep_row[j] = kept
                a_row[j] = (h_row[j] * scale if kept else zero) + s_row[j]
        else:
            for j in range(m):
                kept = unit_hash(low, high, j) >= bound
                keep_row[j] = kept
                a_row[j] = h_row[j] * scale if kept else zero


@njit(cache=True, nogil=True)
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

@njit(cache=True, nogil=True)
def residual_forward(H, skip, A):
    """A = H + skip, the identity shortcut (He et al. 2016). H, skip, A: (n, m); A may be H."""
    n, m = H.shape
    for i in range(n):
        h_row, s_row, a_row = H[i], skip[i], A[i]
        for j in range(m):
            a_row[j] = h_row[j] + s_row[j]


@njit(cache=True, nogil=True)
def residual_backward(D, saved):
    """dA_h += ∂loss/∂A_{h+1}: the shortcut passes the gradient through unchanged. D, saved: (n, m) two buffers;
    D is ∂loss/∂A_h from the layer's GEMM, in place."""
    n, m = D.shape
    for i in range(n):
        d_row, s_row = D[i], saved[i]
        for j in range(m):
            d_row[j] = d_row[j] + s_row[j]


@njit(cache=True, nogil=True)
def copy_rows(src, dst):
    """dst = src, row by row (the skip's share of the gradient when there is no dropout). (n, m) each."""
    n, m = src.shape
    for i in range(n):
        s_row, d_row = src[i], dst[i]
        for j in range(m):
            d_row[j] = s_row[j]


# --- embeddings (the inputs' categorical columns) ----------------------------------------------------------------

@njit(cache=True, nogil=True)
def embedding_forward(numeric, codes, table, offsets, widths, out):
    """out[i] = [numeric[i], E_0[codes[i, 0]], E_1[codes[i, 1]], …]: the first layer's input row.

    numeric: (≥ n, d) the standardised numeric columns, model dtype; codes: (≥ n, c) int64, each in [0, rows of
    E_j); table: the flat parameters (model dtype), E_j of shape (rows_j, widths[j]) starting at offsets[j]
    (row-major); out: (≥ n, d + Σ widths). n = out rows to fill is numeric's first dimension passed by the caller
    as a view.
    """
    n, d = numeric.shape
    for i in range(n):
        for k in range(d):
            out[i, k] = numeric[i, k]
        column = d
        for j in range(codes.shape[1]):
            w = widths[j]
            base = offsets[j] + codes[i, j] * w
            for k in range(w):
                out[i, column + k] = table[base + k]
            column += w


@njit(cache=True, nogil=True)
def embedding_backward(dA, codes, d, offsets, widths, grad):
    """∂loss/∂E_j[r] = Σ over the rows i with codes[i, j] = r of dA[i, columns of E_j]: a scatter-add into ``grad``
    (the flat gradient, E_j at offsets[j]), which the caller zeroed. Rows are added in order i = 0, 1, …, so the
    sum's rounding is fixed by the part's rows alone (the same bits for every P when parts are fixed chunks).

    dA: (n, d + Σ widths) the first layer's input gradient; codes: (≥ n, c) int64; d: numeric columns.
    """
    n = dA.shape[0]
    column = d
    for j in range(codes.shape[1]):
        w = widths[j]
        for i in range(n):
            base = offsets[j] + codes[i, j] * w
            for k in range(w):
                grad[base + k] += dA[i, column + k]
        column += w
