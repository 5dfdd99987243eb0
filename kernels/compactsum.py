"""Compact exact sums: one int64 per value on a power-of-two scale shared by a block and fixed before the sum.

A flat vector of length n is cut into contiguous blocks: block b is ``[bounds[b], bounds[b + 1])``, with
``bounds[0] = 0`` and ``bounds[-1] = n`` (B blocks, B + 1 bounds). Every chunk of a sum shares, per block, one
shift S_b, chosen before any value is converted from the largest magnitude M_b over all K chunks (a max is
order-free, so its MPI MAX allreduce gives the same M_b for every process count). With the binary exponent E_b of
M_b (``frexp``: M_b < 2**E_b) and the headroom h = ceil(log2 K),

    S_b = min(TERM_BITS - h - E_b, MAX_SHIFT),        TERM_BITS = 51, MAX_SHIFT = 1022

Each value becomes the integer q = rint(x * 2**S_b) (to nearest, ties to even), so |q| <= 2**(51 - h) and a sum of
K <= 2**h of them stays within |k| <= 2**51. Integer addition is exact and associative, so the sum has the same
bits however the K chunks are grouped by ranks and reduced. Reading back, k converts to float64 exactly
(|k| <= 2**51) and k * 2**-S_b is exact too (S_b <= 1022 keeps it out of the subnormal range), so the only
roundings are the K conversions and one final rounding to the output dtype. An all-zero block has M_b = 0,
frexp gives E_b = 0, and every value converts to 0.

Accuracy. Each conversion moves a value by at most 2**(-S_b - 1), so the read-back result r of a block element
whose exact sum is s satisfies

    |r - s| <= K * 2**(-S_b - 1) + ulp(r) / 2          (the last term only for float32 output)

and, relative to the block's largest input magnitude M_b >= 2**(E_b - 1) when S_b is not clamped,

    |r - s| / M_b <= K * 2**(h - 51) + ulp(r) / (2 M_b)   (<= 2**(2h - 51) + ...; 2**-39 at K = 64).

The clamp at MAX_SHIFT only acts on float64 blocks with M_b < 2**(-971 - h); there the absolute bound
K * 2**-1023 holds instead. For float32 gradients the fixed-point error is far below half an ulp of M_b (2**-24
relative); for float64 it is not: the result is the fixed-point sum itself, exact to the grid 2**-S_b but not the
correctly rounded sum (kernels.exactsum is). Elements much smaller than their block's maximum get the block's
absolute resolution, not their own.

Conversions in both directions use the 1.5 * 2**52 significand trick (as kernels.exactsum does), so every hot loop
is adds, multiplies by a power of two and integer ops, which vectorise on AVX2 as well as AVX-512.
"""

import numpy as np
from numba import njit

# rint and its inverse through the significand (exact for |v| <= 2**51, see exactsum), and its argument checks
from shardmill.kernels.exactsum import _check_vector as _check_float_vector
from shardmill.kernels.exactsum import _describe, float_of_int, round_to_int

TERM_BITS = 51  # |x * 2**S| < 2**TERM_BITS: the range in which the 1.5 * 2**52 trick converts exactly
NARROW_TERM_BITS = 30  # the same for an int32 accumulator: sums of K <= 2**h terms stay within |k| <= 2**30
MAX_SHIFT = 1022  # 2**-1022 is the smallest normal float64: read-back k * 2**-S stays exact for k != 0
MAX_CHUNKS = 2**20
MIN_SHIFT = TERM_BITS - 20 - 1024  # -993 for M < 2**1024 and K <= MAX_CHUNKS: 2**S and 2**-S are normal float64

# Per input dtype: the same-width integer type and, as a scalar of it, the magnitude mask (all bits but the sign).
_MAGNITUDE = {
    np.dtype(dt): (it, it(np.iinfo(it).max)) for dt, it in ((np.float32, np.int32), (np.float64, np.int64))
}
_FLOAT64_MAGNITUDE = np.int64(np.iinfo(np.int64).max)


def headroom_bits(chunks: int) -> int:
    """h = ceil(log2(chunks)): the bits kept free in each term so that ``chunks`` terms cannot overflow."""
    return (chunks - 1).bit_length()


def block_max_abs(x: np.ndarray, bounds: np.ndarray, out: np.ndarray, offset: int = 0) -> float:
    """Raise each block's running maximum to the largest |x| in it: out[b] = max(out[b], max |x in block b|).

    x: ``(m,)`` float32 or float64, C-contiguous; x[j] is flat element ``offset + j``. bounds: ``(B + 1,)``
    int64 block bounds. out: ``(B,)`` float64, writable; start it at zeros. Blocks that do not meet
    ``[offset, offset + m)`` are left alone.

    Returns the largest |x| as a float64: ``inf`` when some |x| is infinite and none is NaN, ``nan`` when some
    input is NaN (out[b] then becomes nan for its block, and stays so). Call it on every chunk of this rank,
    then MAX-allreduce ``out`` (after checking the return value: MPI's MAX is not defined for NaN).
    """
    _check_vector(x, "x")
    _check_span(bounds, offset, x.shape[0])
    _check_per_block(out, "out", np.float64, bounds)
    bits_type, magnitude_mask = _MAGNITUDE[x.dtype]
    largest_bits = np.zeros(out.shape, dtype=bits_type)
    _block_max_abs_bits(x.view(bits_type), bounds, largest_bits, int(offset), magnitude_mask)
    largest = largest_bits.view(x.dtype).astype(np.float64)  # exact, and NaN stays NaN
    np.maximum(out, largest, out=out)  # numpy's maximum propagates NaN: once in out[b], it stays
    return float(largest.max())  # NaN if any block saw one


def term_bits(acc_dtype: np.dtype) -> int:
    """The bits a sum may use in an accumulator of ``acc_dtype``: TERM_BITS (int64) or NARROW_TERM_BITS (int32)."""
    return NARROW_TERM_BITS if np.dtype(acc_dtype) == np.int32 else TERM_BITS


def shifts(max_abs: np.ndarray, chunks: int, bits: int = TERM_BITS) -> np.ndarray:
    """Per-block shifts S_b = min(TERM_BITS - ceil(log2 chunks) - E_b, MAX_SHIFT), with M_b < 2**E_b (frexp).

    max_abs: ``(B,)`` float64, each block's largest |value| over all ``chunks`` chunks (finite, >= 0).
    chunks: K, the number of chunks whose conversions are summed, 1 <= K <= MAX_CHUNKS.
    Returns ``(B,)`` int64: value x of block b converts to rint(x * 2**S_b).
    """
    if not isinstance(chunks, (int, np.integer)) or isinstance(chunks, bool) or not 1 <= chunks <= MAX_CHUNKS:
        raise ValueError(f"chunks must be an integer in [1, {MAX_CHUNKS}]; got {chunks!r}")
    if not isinstance(max_abs, np.ndarray) or max_abs.ndim != 1 or max_abs.dtype != np.float64:
        raise TypeError(f"max_abs must be a 1-D float64 numpy array; got {_describe(max_abs)}")
    bad = ~(np.isfinite(max_abs) & (max_abs >= 0.0))
    if bad.any():
        b = int(np.argmax(bad))
        raise ValueError(f"max_abs[{b}] must be finite and >= 0; got {float(max_abs[b])!r}")
    exponents = np.frexp(max_abs)[1].astype(np.int64)  # frexp(0) gives 0: an all-zero block converts to zeros
    if bits not in (TERM_BITS, NARROW_TERM_BITS):
        raise ValueError(f"bits must be {TERM_BITS} (int64 sums) or {NARROW_TERM_BITS} (int32 sums); got {bits!r}")
    return np.minimum(bits - headroom_bits(int(chunks)) - exponents, MAX_SHIFT)


def accumulate(
    x: np.ndarray, bounds: np.ndarray, shift: np.ndarray, acc: np.ndarray, replace: bool = False, offset: int = 0
) -> float:
    """Add the fixed-point values of ``x`` into ``acc`` in place: acc[j] += rint(x[j] * 2**shift[b]).

    x: ``(m,)`` float32 or float64, C-contiguous; x[j] and acc[j] are flat element ``offset + j``, in block b.
    bounds: ``(B + 1,)`` int64; shift: ``(B,)`` int64 from :func:`shifts`. acc: ``(m,)`` int64 (or int32, with
    shifts made for NARROW_TERM_BITS), C-contiguous, writable. ``replace=True`` overwrites ``acc`` instead (the
    same as zeroing it first, in one write-only pass).

    Returns the largest |x[j]| * 2**shift[b] as a float64 (``nan`` if some input is NaN). It is
    < 2**(TERM_BITS - headroom_bits(K)) whenever x was among the K chunks the shifts were made from; a larger
    value (or a non-finite one) means ``acc`` holds garbage and must be discarded.
    """
    _check_vector(x, "x")
    _check_span(bounds, offset, x.shape[0])
    _check_shift(shift, bounds)
    _check_accumulator(acc, x.shape[0])
    if not acc.flags.writeable:
        raise ValueError("acc must be writable")
    kernel = _assign if replace else _accumulate
    largest_bits = kernel(x, bounds, _powers_of_two(shift), acc, int(offset))
    return float(np.array([largest_bits], np.int64).view(np.float64)[0])


def to_float(acc: np.ndarray, bounds: np.ndarray, shift: np.ndarray, out: np.ndarray, offset: int = 0) -> None:
    """Read a fixed-point sum back: out[j] = acc[j] * 2**-shift[b], rounded once to out's dtype (ties to even).

    acc: ``(m,)`` int64 (int32), C-contiguous, every |acc[j]| <= 2**TERM_BITS (2**NARROW_TERM_BITS): a sum of at
    most K terms made with the shifts for K chunks. acc[j] and out[j] are flat element ``offset + j``: a rank
    reads back its own slice ``[lo, hi)`` of the reduced sum with ``acc[lo:hi]`` and ``offset=lo``. bounds:
    ``(B + 1,)`` int64; shift: ``(B,)`` int64. out: ``(m,)`` float32 or float64, C-contiguous, writable.
    """
    _check_vector(out, "out")
    _check_span(bounds, offset, out.shape[0])
    _check_shift(shift, bounds)
    _check_accumulator(acc, out.shape[0])
    _to_float(acc, bounds, _powers_of_two(-shift), out, int(offset))


def _powers_of_two(exponents):
    """2.0**exponents as float64, exact (|exponents| <= 1022, checked by _check_shift)."""
    return np.ldexp(1.0, exponents)


def _check_vector(x, name):
    _check_float_vector(x, name)
    if name == "out" and not x.flags.writeable:
        raise ValueError("out must be writable")


def _check_span(bounds, offset, m):
    """bounds tile [0, n); the elements [offset, offset + m) lie inside it."""
    if not isinstance(bounds, np.ndarray) or bounds.ndim != 1 or bounds.dtype != np.int64 or bounds.size < 2:
        raise TypeError(f"bounds must be a 1-D int64 numpy array of at least 2 entries; got {_describe(bounds)}")
    if bounds[0] != 0:
        raise ValueError(f"bounds[0] must be 0 (blocks tile the vector from its start); got {bounds[0]}")
    steps = np.diff(bounds)
    if (steps < 0).any():
        b = int(np.argmax(steps < 0)) + 1
        raise ValueError(f"bounds must be non-decreasing; got bounds[{b}] = {bounds[b]} < {bounds[b - 1]}")
    if not isinstance(offset, (int, np.integer)) or isinstance(offset, bool) or offset < 0:
        raise ValueError(f"offset must be an integer >= 0 (the flat index of element 0); got {offset!r}")
    if offset + m > bounds[-1]:
        raise ValueError(f"offset + length = {offset + m} must be <= bounds[-1] = {bounds[-1]} (the vector's "
                         f"length)")


def _check_per_block(a, name, dtype, bounds):
    blocks = bounds.shape[0] - 1
    if not isinstance(a, np.ndarray) or a.dtype != dtype or a.shape != (blocks,):
        raise TypeError(f"{name} must be a numpy array of dtype {np.dtype(dtype)} and shape ({blocks},) "
                        f"(one per block); got {_describe(a)}")
    if name == "out" and not a.flags.writeable:
        raise ValueError("out must be writable")


def _check_shift(shift, bounds):
    _check_per_block(shift, "shift", np.int64, bounds)
    outside = (shift < MIN_SHIFT) | (shift > MAX_SHIFT)
    if outside.any():
        b = int(np.argmax(outside))
        raise ValueError(f"shift[{b}] must be in [{MIN_SHIFT}, {MAX_SHIFT}] (as made by shifts()); got {shift[b]}")


def _check_accumulator(acc, m):
    if not isinstance(acc, np.ndarray) or acc.dtype not in (np.int64, np.int32) or acc.shape != (m,):
        raise TypeError(f"acc must be an int64 or int32 numpy array of shape ({m},); got {_describe(acc)}")
    if not acc.flags.c_contiguous:
        raise ValueError("acc must be C-contiguous")


@njit(cache=True, inline="always")
def _block_range(bounds, b, offset, m):
    """Local indices [lo, hi) of block b within the elements [offset, offset + m), as 0 <= lo <= hi <= m.

    Each kernel runs its element loop on the slices [lo, hi): a loop from 0 lets LLVM drop numba's negative-index
    wraparound, which otherwise keeps a read-modify-write loop scalar.
    """
    hi = min(max(bounds[b + 1] - offset, 0), m)
    return min(max(bounds[b] - offset, 0), hi), hi


@njit(cache=True)
def _block_max_abs_bits(bits, bounds, largest, offset, magnitude_mask):
    """largest[b] = max(largest[b], bit pattern of max |x| in block b) (bits: x viewed as the same-width int).

    Non-negative IEEE floats order like their bit patterns read as integers, NaN above infinity: an integer max
    reduction keeps the loop vectorisable without fastmath and lets NaN win.
    """
    for b in range(largest.shape[0]):
        lo, hi = _block_range(bounds, b, offset, bits.shape[0])
        largest[b] = max(largest[b], _max_magnitude(bits[lo:hi], magnitude_mask))


@njit(cache=True, inline="always")
def _max_magnitude(bits, magnitude_mask):
    running = bits.dtype.type(0)
    for i in range(bits.shape[0]):
        running = max(running, bits[i] & magnitude_mask)
    return running


@njit(cache=True)
def _accumulate(x, bounds, scale, acc, offset):
    """acc[j] += rint(x[j] * scale[b]) per block; returns the bit pattern of the largest |x[j] * scale[b]|."""
    largest = np.int64(0)
    for b in range(scale.shape[0]):
        lo, hi = _block_range(bounds, b, offset, x.shape[0])
        largest = max(largest, _add_scaled(x[lo:hi], scale[b], acc[lo:hi]))
    return largest


@njit(cache=True)
def _assign(x, bounds, scale, acc, offset):
    """As :func:`_accumulate`, but acc[j] = rint(x[j] * scale[b])."""
    largest = np.int64(0)
    for b in range(scale.shape[0]):
        lo, hi = _block_range(bounds, b, offset, x.shape[0])
        largest = max(largest, _assign_scaled(x[lo:hi], scale[b], acc[lo:hi]))
    return largest


@njit(cache=True, inline="always")
def _add_scaled(x, up, acc):
    largest = np.int64(0)
    for i in range(x.shape[0]):
        scaled = np.float64(x[i]) * up  # exact: a power of two (an underflow only where rint gives 0 anyway)
        largest = max(largest, np.float64(scaled).view(np.int64) & _FLOAT64_MAGNITUDE)
        acc[i] += round_to_int(scaled)
    return largest


@njit(cache=True, inline="always")
def _assign_scaled(x, up, acc):
    largest = np.int64(0)
    for i in range(x.shape[0]):
        scaled = np.float64(x[i]) * up
        largest = max(largest, np.float64(scaled).view(np.int64) & _FLOAT64_MAGNITUDE)
        acc[i] = round_to_int(scaled)
    return largest


@njit(cache=True)
def _to_float(acc, bounds, scale, out, offset):
    """out[j] = acc[j] * scale[b] rounded once to out's dtype: the product is exact in float64 (or overflows)."""
    for b in range(scale.shape[0]):
        lo, hi = _block_range(bounds, b, offset, out.shape[0])
        _scale_down(acc[lo:hi], scale[b], out[lo:hi])


@njit(cache=True, inline="always")
def _scale_down(acc, down, out):
    for i in range(out.shape[0]):
        out[i] = float_of_int(acc[i]) * down
