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

``to_float`` reads the value back, correctly rounded to the output dtype (ties to even), in one branch-free
pass that vectorises. Carries are normalised with arithmetic shifts and the magnitude is cut into three 48-bit
fields, so that |V| = high + middle + low exactly, with three exact float64 in disjoint bit ranges (high a
multiple of 2**8, middle < 2**8 a multiple of 2**-40, low < 2**-40). Then

    head = RN(high + middle),  below = high + middle - head   (exact: Fast2Sum, Dekker 1971)
    tail = RO(below + low)                                    (round to odd at 53 bits)
    float64: RN(head + tail);  float32: RN24(RO(head + tail))

where RO is emulated with Fast2Sum and one integer step on the bit pattern. Why this is the correctly rounded
|V|: if below = 0 the tail is exact. Otherwise ulp(head) >= 2**-39 (the rounded sum was inexact and is a
multiple of 2**-40) and low < 2**-40, so -ulp(head)/2 <= below + low < ulp(head); in that range every
breakpoint of rounding head + (below + low), to nearest or to odd, is 0 or plus or minus a power of two, and
round to odd keeps the sign of a number and its order against every power of two (their significands are
even). Rounding to odd at 53 bits and then to nearest at 24 bits is one correct rounding, since 53 >= 24 + 2
(Boldo & Melquiond 2008). No value is subnormal (all are multiples of 2**-88), and every step is a fixed IEEE
round-to-nearest operation or an integer operation on the limbs, so the result is a pure function of the limb
integers and never depends on the order in which they were produced.

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
# to_float cuts the magnitude into 48-bit fields: bits [0, 48) are limb 0 and the low 8 bits of limb 1,
# [48, 96) the rest of limb 1 and the low 16 bits of limb 2, [96, ...) the rest of limb 2.
_SPLIT1, _SPLIT2 = 8, 16
_LOW8, _LOW16 = (1 << _SPLIT1) - 1, (1 << _SPLIT2) - 1
_HIGH_SCALE = 2.0 ** (2 * LIMB_BITS + _SPLIT2 - FRACTION_BITS)  # 2**8
_MIDDLE_SCALE = 2.0 ** (LIMB_BITS + _SPLIT1 - FRACTION_BITS)  # 2**-40
_LOW_SCALE = 2.0**-FRACTION_BITS
# Exact integer <-> float64 conversion through the significand (common practice): for an integer-valued
# float64 |v| < 2**51, v + 1.5 * 2**52 lies in [2**52, 2**53), where the ulp is 1, so the sum is exact and its
# bit pattern is that of the constant plus v; for an int64 0 <= k < 2**52, the float64 with the bit pattern of
# 2**52 plus k is 2**52 + k, and for an int64 |k| <= 2**51 the float64 with the bit pattern of 1.5 * 2**52 plus k
# is 1.5 * 2**52 + k, from which subtracting the constant is exact (Sterbenz). Adding the constant to a non-integer
# rounds it to nearest, ties to even, as rint.
# Plain conversions need AVX-512 (vcvtqq2pd, vcvtpd2qq) to vectorise; these are adds and integer ops on any CPU.
_ROUND_MAGIC = 1.5 * 2.0**52
_ROUND_MAGIC_BITS = np.int64(np.array([_ROUND_MAGIC]).view(np.int64)[0])
_TWO52 = 2.0**52
_TWO52_BITS = np.int64(np.array([_TWO52]).view(np.int64)[0])

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


def accumulate(x: np.ndarray, acc: np.ndarray, replace: bool = False) -> float:
    """Add ``x`` into ``acc`` in place, exactly up to the per-input rounding at 2**-88.

    x: ``(n,)`` float32 or float64, C-contiguous. acc: ``(LIMBS, n)`` int64, C-contiguous, writable.
    ``replace=True`` overwrites ``acc`` with the digits of ``x`` instead (the same limbs as zeroing it first,
    in one write-only pass: a first term needs neither the zeroing nor the read).

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
    bits_type, limit_bits, _, magnitude_mask = _BIT_PATTERNS[x.dtype]
    kernel = _assign if replace else _accumulate
    return _largest(kernel(x, x.view(bits_type), acc, limit_bits, magnitude_mask), x.dtype)


def assign_pair(x: np.ndarray, y: np.ndarray, acc: np.ndarray) -> float:
    """Overwrite ``acc`` with the digits of ``x`` plus those of ``y``, in one write-only pass.

    The same limbs as ``accumulate(x, acc, replace=True)`` then ``accumulate(y, acc)``, without reading and
    writing the accumulator a second time. x, y: ``(n,)`` of one dtype, C-contiguous; acc as in
    :func:`accumulate`. Returns max(|x|, |y|) with the same conventions (``inf``, ``nan``).
    """
    _check_vector(x, "x")
    _check_vector(y, "y")
    if y.dtype != x.dtype:
        raise TypeError(f"y must have the dtype of x ({x.dtype}); got {y.dtype}")
    _check_accumulator(acc, x.shape[0])
    _check_accumulator(acc, y.shape[0])
    if not acc.flags.writeable:
        raise ValueError("acc must be writable")
    bits_type, limit_bits, _, magnitude_mask = _BIT_PATTERNS[x.dtype]
    return _largest(_assign_pair(x, x.view(bits_type), y, y.view(bits_type), acc, limit_bits, magnitude_mask),
                    x.dtype)


def _largest(largest_bits, dtype) -> float:
    """The largest magnitude from its bit pattern: nan when a NaN was seen, inf when out of range."""
    bits_type, limit_bits, infinity_bits, _ = _BIT_PATTERNS[dtype]
    if largest_bits > infinity_bits:
        return math.nan
    if largest_bits >= limit_bits:
        return math.inf
    return float(np.array([largest_bits], dtype=bits_type).view(dtype)[0])


def to_float(acc: np.ndarray, out: np.ndarray) -> None:
    """Write the value of each accumulator element into ``out``, correctly rounded (ties to even).

    acc: ``(LIMBS, n)`` int64, C-contiguous, holding at most ``MAX_TERMS`` contributions per element; it is
    not modified. out: ``(n,)`` float32 or float64, C-contiguous, writable. Each ``out[i]`` is the value of
    the exact fixed-point number ``V_i`` rounded once to the dtype of ``out`` (error <= half an ulp of
    ``out[i]``); an exact zero gives +0.0. The result depends only on the limb integers. One branch-free,
    vectorised pass: 24 bytes read and 4 or 8 written per element.
    """
    _check_vector(out, "out")
    _check_accumulator(acc, out.shape[0])
    if not out.flags.writeable:
        raise ValueError("out must be writable")
    convert = _to_float32 if out.dtype == np.float32 else _to_float64
    convert(acc[0], acc[1], acc[2], out)


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


@njit(cache=True, inline="always")
def _digits(x):
    """The three signed limb digits of float64 |x| < MAX_ABS: (digit0, digit1, digit2) as int64.

    Each step is exact in float64 (scaling by a power of two, trunc, and subtracting the integer part keep a
    subset of the 53 mantissa bits) except the one rounding of digit0, to nearest, ties to even.
    """
    top = x * _TOP_SCALE  # |top| < 2**39, units of 2**-8
    digit2 = np.trunc(top)
    middle = (top - digit2) * _LIMB_SCALE  # |middle| < 2**40, units of 2**-48
    digit1 = np.trunc(middle)
    # |digit0| <= 2**40; the rounding is done by adding the constant.
    return round_to_int((middle - digit1) * _LIMB_SCALE), round_to_int(digit1), round_to_int(digit2)


@njit(cache=True)
def _accumulate(x, bits, acc, limit_bits, magnitude_mask):
    """Digits of x[i] added into acc[:, i]; returns the largest |x| as its bit pattern (bits: x viewed as int).

    For non-negative IEEE floats the bit patterns, read as integers, order like the values, with NaN above
    infinity. An integer max reduction and compare keep the loop vectorisable without fastmath.
    """
    largest = bits.dtype.type(0)
    for i in range(x.shape[0]):
        magnitude = bits[i] & magnitude_mask
        largest = max(largest, magnitude)
        # Inputs out of range (or NaN) add zero digits: never convert what could overflow an int64.
        digit0, digit1, digit2 = _digits(np.float64(x[i]) if magnitude < limit_bits else 0.0)
        acc[0, i] += digit0
        acc[1, i] += digit1
        acc[2, i] += digit2
    return largest


@njit(cache=True)
def _assign(x, bits, acc, limit_bits, magnitude_mask):
    """As :func:`_accumulate`, but the digits overwrite acc[:, i]."""
    largest = bits.dtype.type(0)
    for i in range(x.shape[0]):
        magnitude = bits[i] & magnitude_mask
        largest = max(largest, magnitude)
        digit0, digit1, digit2 = _digits(np.float64(x[i]) if magnitude < limit_bits else 0.0)
        acc[0, i] = digit0
        acc[1, i] = digit1
        acc[2, i] = digit2
    return largest


@njit(cache=True)
def _assign_pair(x, x_bits, y, y_bits, acc, limit_bits, magnitude_mask):
    """As :func:`_assign` for the digits of x[i] plus those of y[i]; returns the largest |x| or |y| (bits)."""
    largest = x_bits.dtype.type(0)
    for i in range(x.shape[0]):
        x_magnitude = x_bits[i] & magnitude_mask
        y_magnitude = y_bits[i] & magnitude_mask
        largest = max(largest, max(x_magnitude, y_magnitude))
        x0, x1, x2 = _digits(np.float64(x[i]) if x_magnitude < limit_bits else 0.0)
        y0, y1, y2 = _digits(np.float64(y[i]) if y_magnitude < limit_bits else 0.0)
        acc[0, i] = x0 + y0
        acc[1, i] = x1 + y1
        acc[2, i] = x2 + y2
    return largest


@njit(cache=True, inline="always")
def round_to_int(v):
    """rint(v) as an int64 for float64 |v| < 2**51, without a float-to-int conversion instruction."""
    return np.float64(v + _ROUND_MAGIC).view(np.int64) - _ROUND_MAGIC_BITS


@njit(cache=True, inline="always")
def float_of_int(k):
    """int64 |k| <= 2**51 as float64, exactly, without an int-to-float conversion instruction (round_to_int's
    inverse; the compact and narrow formats read their sums back with it)."""
    return np.int64(k + _ROUND_MAGIC_BITS).view(np.float64) - _ROUND_MAGIC


@njit(cache=True, inline="always")
def _exact_float(k):
    """int64 0 <= k < 2**52 as float64, exactly, without an int-to-float conversion instruction."""
    return np.int64(k + _TWO52_BITS).view(np.float64) - _TWO52


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
def _magnitude(limb0, limb1, limb2):
    """Sign (+1 or -1) and the magnitude of one element as three exact float64 parts.

    Returns (sign, high, middle, low): |V| = high + middle + low, all >= 0, in disjoint bit ranges
    (high is a multiple of 2**8, middle < 2**8 a multiple of 2**-40, low < 2**-40). An exact zero has
    sign +1. Integer shifts and masks only, no branches.
    """
    negative = _carry(limb0, limb1, limb2)[2] >> 63  # 0 or -1: lower limbs are worth < 1 unit of limb 2
    sign = negative | 1  # +1 or -1
    # (x ^ negative) - negative is x or -x: a negation without a 64-bit multiply (none in AVX2).
    d0, d1, d2 = _carry((limb0 ^ negative) - negative, (limb1 ^ negative) - negative, (limb2 ^ negative) - negative)
    # The magnitude d2 2**80 + d1 2**40 + d0 (units of 2**-88, 0 <= d0, d1 < 2**40, 0 <= d2 < 2**63) cut
    # into 48-bit fields, so each converts to float64 exactly (d2 alone may have more than 53 bits).
    field0 = d0 | ((d1 & _LOW8) << LIMB_BITS)
    field1 = (d1 >> _SPLIT1) | ((d2 & _LOW16) << (LIMB_BITS - _SPLIT1))
    field2 = d2 >> _SPLIT2
    # field0 and field1 are < 2**48; field2 < 2**47, because MAX_TERMS keeps |limb2| < 2**63 after the carries.
    return (sign, _exact_float(field2) * _HIGH_SCALE, _exact_float(field1) * _MIDDLE_SCALE,
            _exact_float(field0) * _LOW_SCALE)


@njit(cache=True)
def _add_round_to_odd(larger, smaller):
    """larger + smaller rounded to odd at 53 bits (Boldo & Melquiond 2008), as float64.

    Needs |larger| >= |smaller| or larger == 0, so that Fast2Sum (Dekker 1971) gives the exact error of
    the rounded sum. Round to odd: an inexact sum takes the neighbour with an odd last significand bit,
    which is the rounded sum itself or one step from it towards the exact value.
    """
    total = larger + smaller
    error = smaller - (total - larger)  # exact: total + error == larger + smaller
    bits = np.float64(total).view(np.int64)
    towards_zero = (bits ^ np.float64(error).view(np.int64)) >> 63  # -1: step towards zero, 0: away from it
    step = np.int64(error != 0.0) & ~bits & 1  # 1 when inexact and the last bit is even
    bits += (step ^ towards_zero) - towards_zero  # +step or -step, without a multiply
    return np.int64(bits).view(np.float64)


@njit(cache=True)
def _head_and_tail(high, middle, low):
    """(head, tail) with head = RN(high + middle) and tail = RO(high + middle - head + low).

    head + tail rounds (to nearest at 53 bits, or to odd at 53 bits) exactly as high + middle + low does;
    see the module docstring.
    """
    head = high + middle
    below = middle - (head - high)  # exact, Fast2Sum (Dekker 1971): high >= middle or high == 0
    return head, _add_round_to_odd(below, low)  # below != 0 is a multiple of 2**-40 > low


@njit(cache=True)
def _to_float64(limb0, limb1, limb2, out):
    for i in range(out.shape[0]):
        sign, high, middle, low = _magnitude(limb0[i], limb1[i], limb2[i])
        head, tail = _head_and_tail(high, middle, low)
        out[i] = sign * (head + tail)


@njit(cache=True)
def _to_float32(limb0, limb1, limb2, out):
    for i in range(out.shape[0]):
        sign, high, middle, low = _magnitude(limb0[i], limb1[i], limb2[i])
        head, tail = _head_and_tail(high, middle, low)
        # Round to odd at 53 bits, then to nearest at 24: one correct rounding (53 >= 24 + 2).
        out[i] = np.float32(sign * _add_round_to_odd(head, tail))
