"""Exact, order-independent sums of floating-point vectors in int64 fixed point.

An accumulator is an int64 array of shape ``(LIMBS, n)``. Element ``i`` holds the exact value

    V_i = sum_k acc[k, i] * 2**(LIMB_BITS * k - FRACTION_BITS)

so limb 0 counts units of 2**-88, limb 1 units of 2**-48 and limb 2 units of 2**-8. An input ``x`` with
``|x| < MAX_ABS`` is split exactly into three signed digits, one per limb; only the lowest digit is rounded
(to nearest, ties to even, at 2**-88), and that rounding depends on ``x`` alone. Digits are added without
carrying, so the limbs are plain integer sums: adding accumulators element-wise as int64 (as an MPI integer
SUM allreduce does) gives the same limbs as adding every input into one accumulator, in any order and
grouping. Each digit has magnitude at most 2**40, which leaves room for ``MAX_TERMS`` contributions per
element before an int64 limb could overflow.

``to_float`` reads the value back, correctly rounded to the output dtype (ties to even): carries are
normalised with arithmetic shifts per element, the rounding is done on integers, and the only float
operations are exact (int < 2**53 to float64, scaling by a power of two). The result is a pure function of
the limb integers and never depends on the order in which they were produced.

Precision: inputs are rounded to multiples of 2**-88 (about 3.2e-27), so after m additions the exact sum
is off by at most m * 2**-89; reading back adds at most half an ulp of the output dtype. Inputs with
|x| < 2**-89 contribute nothing.
"""

import math

import numpy as np
from numba import njit

LIMBS = 3
LIMB_BITS = 40
FRACTION_BITS = 88
MAX_ABS = 2.0**31
# Every digit has |digit| <= 2**40, and (2**23 - 1) * 2**40 < 2**63 - 1; carrying in to_float stays in range
# too: (2**23 - 1) * (2**40 + 1) < 2**63.
MAX_TERMS = 2**23 - 1

_LIMB_SCALE = 2.0**LIMB_BITS  # float64 2**40: moves one limb down
_TOP_SCALE = 2.0 ** (FRACTION_BITS - (LIMBS - 1) * LIMB_BITS)  # 2**8: top limb counts units of 2**-8
_MASK = (1 << LIMB_BITS) - 1
_WINDOW_BITS = 62  # leading bits kept before the final rounding (fits an int64, at least 53 + 2)

# Per input dtype: the same-width integer type, and as scalars of that type the bit patterns of MAX_ABS, of +inf
# and of the magnitude (all bits but the sign).
_BIT_PATTERNS = {
    np.dtype(dt): (
        it,
        np.array([MAX_ABS], dt).view(it)[0],
        np.array([np.inf], dt).view(it)[0],
        it(np.iinfo(it).max),
    )
    for dt, it in ((np.float32, np.int32), (np.float64, np.int64))
}


def new_accumulator(n: int) -> np.ndarray:
    """Return a zeroed accumulator for vectors of length ``n``: int64, shape ``(LIMBS, n)``."""
    return np.zeros((LIMBS, n), dtype=np.int64)


def zero(acc: np.ndarray) -> None:
    """Reset an accumulator (int64, ``(LIMBS, n)``) to the value 0 in place."""
    acc.fill(0)


def accumulate(x: np.ndarray, acc: np.ndarray) -> float:
    """Add ``x`` into ``acc`` in place, exactly up to the per-input rounding at 2**-88.

    x: ``(n,)`` float32 or float64, C-contiguous. acc: ``(LIMBS, n)`` int64, C-contiguous, writable.

    Returns max |x| as a float64: finite and ``< MAX_ABS`` when every input was in range; ``inf`` when some
    |x| >= MAX_ABS (including infinities) and no input is NaN; ``nan`` when some input is NaN. After a
    non-finite return the accumulator must be discarded or zeroed: out-of-range inputs are skipped (never
    converted to integers), so it holds the sum of the in-range inputs only.
    One pass over ``x`` and ``acc``, no temporaries.
    """
    _check_vector(x, "x")
    _check_accumulator(acc, x.shape[0])
    if not acc.flags.writeable:
        raise ValueError("acc must be writable")
    bits_type, limit_bits, infinity_bits, magnitude_mask = _BIT_PATTERNS[x.dtype]
    largest_bits = _accumulate(x, x.view(bits_type), acc, limit_bits, magnitude_mask)
    if largest_bits > infinity_bits:
        return math.nan
    if largest_bits >= limit_bits:
        return math.inf
    return float(np.array([largest_bits], dtype=bits_type).view(x.dtype)[0])


def to_float(acc: np.ndarray, out: np.ndarray) -> None:
    """Write the value of each accumulator element into ``out``, correctly rounded (ties to even).

    acc: ``(LIMBS, n)`` int64, C-contiguous, holding at most ``MAX_TERMS`` contributions per element; it is
    not modified. out: ``(n,)`` float32 or float64, C-contiguous, writable. Each ``out[i]`` is the value of
    the exact fixed-point number ``V_i`` rounded once to the dtype of ``out`` (error <= half an ulp of
    ``out[i]``); an exact zero gives +0.0. The result depends only on the limb integers.
    """
    _check_vector(out, "out")
    _check_accumulator(acc, out.shape[0])
    if not out.flags.writeable:
        raise ValueError("out must be writable")
    _to_float(acc, out, np.finfo(out.dtype).nmant + 1)


def _check_vector(x, name):
    if not isinstance(x, np.ndarray) or x.ndim != 1 or x.dtype not in (np.float32, np.float64):
        raise TypeError(f"{name} must be a 1-D float32 or float64 numpy array; got {_describe(x)}")
    if not x.flags.c_contiguous:
        raise ValueError(f"{name} must be C-contiguous")


def _check_accumulator(acc, n):
    if not isinstance(acc, np.ndarray) or acc.dtype != np.int64 or acc.shape != (LIMBS, n):
        raise TypeError(f"acc must be an int64 numpy array of shape ({LIMBS}, {n}); got {_describe(acc)}")
    if not acc.flags.c_contiguous:
        raise ValueError("acc must be C-contiguous")


def _describe(a):
    if isinstance(a, np.ndarray):
        return f"{a.dtype} array of shape {a.shape}"
    return type(a).__name__


@njit(cache=True)
def _accumulate(x, bits, acc, limit_bits, magnitude_mask):
    """Digits of x[i] into acc[:, i]; returns the largest |x| as its bit pattern (bits: x viewed as int).

    For non-negative IEEE floats the bit patterns, read as integers, order like the values, with NaN above
    infinity. An integer max reduction and compare keep the loop vectorisable without fastmath.
    """
    largest = bits.dtype.type(0)
    for i in range(x.shape[0]):
        magnitude = bits[i] & magnitude_mask
        largest = max(largest, magnitude)
        # Inputs out of range (or NaN) add zero digits: never convert what could overflow an int64.
        value = np.float64(x[i]) if magnitude < limit_bits else 0.0
        # Each step is exact in float64: scaling by a power of two, trunc, and subtracting the integer
        # part (the remainder keeps a subset of the 53 mantissa bits).
        top = value * _TOP_SCALE  # |top| < 2**39, units of 2**-8
        digit2 = np.trunc(top)
        middle = (top - digit2) * _LIMB_SCALE  # |middle| < 2**40, units of 2**-48
        digit1 = np.trunc(middle)
        digit0 = np.rint((middle - digit1) * _LIMB_SCALE)  # the one rounding, |digit0| <= 2**40
        acc[0, i] += np.int64(digit0)
        acc[1, i] += np.int64(digit1)
        acc[2, i] += np.int64(digit2)
    return largest


@njit(cache=True)
def _carry(limb0, limb1, limb2):
    """Arithmetic-shift carries: returns (limb0', limb1', limb2') with 0 <= limb0', limb1' < 2**40."""
    carry = limb0 >> LIMB_BITS
    limb0 -= carry << LIMB_BITS
    limb1 += carry
    carry = limb1 >> LIMB_BITS
    limb1 -= carry << LIMB_BITS
    limb2 += carry
    return limb0, limb1, limb2


@njit(cache=True)
def _round_value(limb0, limb1, limb2, mantissa_bits):
    """Value of one element, rounded to mantissa_bits (24 or 53) bits, ties to even, as float64."""
    sign = (_carry(limb0, limb1, limb2)[2] >> 63) | 1  # -1 or +1: lower limbs are worth < 1 unit of limb 2
    d0, d1, d2 = _carry(sign * limb0, sign * limb1, sign * limb2)
    d3 = d2 >> LIMB_BITS  # the magnitude is sum_k d_k 2**(40 k), 0 <= d_k < 2**40
    d2 &= _MASK
    # The leading digit and the two below it; the rest only matters as a sticky bit.
    if d3 != 0:
        lead, below, third, rest, base = d3, d2, d1, d0, 3 * LIMB_BITS
    elif d2 != 0:
        lead, below, third, rest, base = d2, d1, d0, 0, 2 * LIMB_BITS
    elif d1 != 0:
        lead, below, third, rest, base = d1, d0, 0, 0, LIMB_BITS
    elif d0 != 0:
        lead, below, third, rest, base = d0, 0, 0, 0, 0
    else:
        return 0.0
    lead_bits = math.frexp(np.float64(lead))[1]  # bit length; exact since lead < 2**53
    length = base + lead_bits  # bit length of the magnitude
    # window = floor(magnitude * 2**(62 - length)): the leading 62 bits. The three digits occupy disjoint
    # bit ranges, so the floors of the parts add up to the floor of the whole.
    window = (
        (lead << (_WINDOW_BITS - lead_bits))
        | ((below << (_WINDOW_BITS - LIMB_BITS)) >> lead_bits)
        | (third >> (lead_bits + 2 * LIMB_BITS - _WINDOW_BITS))
    )
    lost = (
        ((below << (_WINDOW_BITS - LIMB_BITS)) & ((1 << lead_bits) - 1))
        | (third & ((1 << min(lead_bits + 2 * LIMB_BITS - _WINDOW_BITS, LIMB_BITS)) - 1))
        | rest
    )
    # A sticky bit below the rounding position keeps ties and round-ups exact (62 >= 53 + 2).
    window |= np.int64(lost != 0)
    drop = _WINDOW_BITS - mantissa_bits
    kept = window >> drop
    rest_bits = window & ((1 << drop) - 1)
    half = 1 << (drop - 1)
    kept += np.int64(rest_bits > half) | (np.int64(rest_bits == half) & kept & 1)  # ties to even
    # kept <= 2**mantissa_bits is exact in float64; the scaled value is a normal number (>= 2**-88).
    return sign * math.ldexp(np.float64(kept), length - mantissa_bits - FRACTION_BITS)


@njit(cache=True)
def _to_float(acc, out, mantissa_bits):
    for i in range(out.shape[0]):
        out[i] = _round_value(acc[0, i], acc[1, i], acc[2, i], mantissa_bits)
