"""Exact fixed-point accumulation (shardmill.kernels.exactsum) against exact rational arithmetic.

Outside references: Python's ``math.fsum`` (Shewchuk 1997, correctly rounded in CPython) and
``fractions.Fraction`` (exact rationals; ``float(Fraction)`` is correctly rounded integer true division).
Inputs are quantised to the accumulator's resolution 2**-88 by rounding to nearest, ties to even, which is
the documented per-input rounding.
"""

import math
from fractions import Fraction

import numpy as np
import pytest
from helpers import is_nearest_float32
from hypothesis import given, settings
from hypothesis import strategies as st
from shardmill.kernels import exactsum

RESOLUTION = Fraction(1, 2**exactsum.FRACTION_BITS)


def quantize(x: float) -> float:
    """x rounded to a multiple of 2**-88, ties to even (exact as a float64 for |x| < 2**31)."""
    return math.ldexp(round(Fraction(x) / RESOLUTION), -exactsum.FRACTION_BITS)


def accumulate_rows(rows: np.ndarray) -> np.ndarray:
    """Accumulate each row of rows (m, n) into one fresh accumulator, in row order."""
    acc = exactsum.new_accumulator(rows.shape[1])
    for row in rows:
        assert math.isfinite(exactsum.accumulate(np.ascontiguousarray(row), acc))
    return acc


def read(acc: np.ndarray, dtype=np.float64) -> np.ndarray:
    out = np.empty(acc.shape[1], dtype=dtype)
    exactsum.to_float(acc, out)
    return out


def limb_value(acc: np.ndarray, i: int) -> Fraction:
    """Exact value of element i: sum_k acc[k, i] 2**(40 k - 88)."""
    units = sum(int(acc[k, i]) << (exactsum.LIMB_BITS * k) for k in range(exactsum.LIMBS))
    return units * RESOLUTION


def adversarial_columns(rng: np.random.Generator, m: int) -> np.ndarray:
    """(m, 8) float64: each column is one hard summation problem of m terms."""
    columns = np.zeros((m, 8))
    # wide dynamic range, mixed signs: 1e-20 ... 1e9
    columns[:, 0] = rng.choice([-1.0, 1.0], m) * 10.0 ** rng.uniform(-20, 9, m)
    # the [1e9, 1e-12, -1e9] pattern: cancellation leaves only the tiny terms
    columns[:, 1] = np.resize([1e9, 1e-12, -1e9], m)
    # x, -x pairs in shuffled order plus tiny values
    half = 10.0 ** rng.uniform(-3, 9, m // 2) * rng.choice([-1.0, 1.0], m // 2)
    pairs = np.concatenate([half, -half, np.zeros(m % 2)])
    pairs[rng.integers(0, m, 5)] += 10.0 ** rng.uniform(-25, -15, 5)
    columns[:, 2] = rng.permutation(pairs)
    # exact ties at the resolution (2**-89 on top of coarser bits), which round to even
    columns[:, 3] = rng.choice([-1.0, 1.0], m) * (2.0**-36 * rng.integers(1, 2**16, m) + 2.0**-89)
    # subnormals and values far below the resolution (they round to 0 or to +-2**-88)
    columns[:, 4] = rng.choice([-1.0, 1.0], m) * 2.0 ** rng.uniform(-1074, -60, m)
    # large magnitudes just inside the limit, alternating signs
    columns[:, 5] = np.resize([1.0, -1.0], m) * np.nextafter(2.0**31, 0) * rng.uniform(0.5, 1.0, m)
    # float64 values that use all 53 bits at every scale
    columns[:, 6] = rng.standard_normal(m) * 10.0 ** rng.integers(-12, 8, m)
    # all zeros and negative zeros
    columns[:, 7] = np.resize([0.0, -0.0], m)
    return columns


@pytest.mark.parametrize("m", [3, 257, 4000])
def test_float64_result_equals_fsum_of_quantized_inputs(m: int) -> None:
    rows = adversarial_columns(np.random.default_rng(m), m)
    result = read(accumulate_rows(rows))
    for j in range(rows.shape[1]):
        expected = math.fsum(quantize(v) for v in rows[:, j])
        # Python math.fsum (Shewchuk 1997): correctly rounded sum of the quantised inputs
        assert result[j] == expected, j


@pytest.mark.parametrize("m", [3, 257, 4000])
def test_error_bound_against_unquantized_sum(m: int) -> None:
    rows = adversarial_columns(np.random.default_rng(m + 1), m)
    result = read(accumulate_rows(rows))
    for j in range(rows.shape[1]):
        exact = sum((Fraction(v) for v in rows[:, j]), Fraction(0))
        # Each input moves by at most half a unit of 2**-88 and to_float rounds once (half an ulp), so
        # |result - sum| <= ulp(result)/2 + m 2**-89 (derived; Fraction gives the exact sum).
        bound = Fraction(math.ulp(result[j])) / 2 + m * RESOLUTION / 2
        assert abs(Fraction(float(result[j])) - exact) <= bound, j
        # The same bound seen from math.fsum (Shewchuk 1997), itself within half an ulp of the exact sum.
        fsum = math.fsum(rows[:, j])
        assert abs(Fraction(float(result[j])) - Fraction(fsum)) <= bound + Fraction(math.ulp(fsum)) / 2, j


def test_float32_inputs_and_outputs() -> None:
    rng = np.random.default_rng(7)
    m, n = 500, 64
    rows = (rng.standard_normal((m, n)) * 10.0 ** rng.uniform(-30, 8, (m, n))).astype(np.float32)
    rows[:, 0] = np.resize(np.float32([3e8, 1e-7, -3e8]), m)  # cancellation in float32
    acc = accumulate_rows(rows)
    result64 = read(acc, np.float64)
    result32 = read(acc, np.float32)
    for j in range(n):
        quantized = [quantize(float(v)) for v in rows[:, j]]
        # Python math.fsum (Shewchuk 1997); float32 -> float64 is exact, so these are the true inputs
        assert result64[j] == math.fsum(quantized), j
        exact = sum((Fraction(v) for v in quantized), Fraction(0))
        # IEEE 754-2019 §4.3.1 roundTiesToEven, checked against the exact rational sum
        assert is_nearest_float32(result32[j], exact), j


@settings(max_examples=300, deadline=None)
@given(
    st.lists(st.integers(-exactsum.MAX_TERMS << 40, exactsum.MAX_TERMS << 40), min_size=3, max_size=3),
    st.sampled_from([0, 1, 20, 39, 40, 41, 62, 63]),
)
def test_to_float_is_correctly_rounded_for_any_limbs(limbs: list[int], scale_down: int) -> None:
    # Any limb integers reachable with at most MAX_TERMS contributions, including negative totals with
    # positive low limbs and magnitudes from 2**-88 to about 2**54.
    acc = (np.array(limbs, dtype=np.int64) >> scale_down).reshape(exactsum.LIMBS, 1)
    before = acc.copy()
    exact = limb_value(acc, 0)
    # Python fractions.Fraction.__float__: correctly rounded int true division
    assert read(acc, np.float64)[0] == float(exact)
    # IEEE 754-2019 §4.3.1 roundTiesToEven
    assert is_nearest_float32(read(acc, np.float32)[0], exact)
    assert np.array_equal(acc, before)  # to_float does not modify the accumulator (common practice)


def limbs_of(units: int) -> np.ndarray:
    """(LIMBS, 1) int64 holding the integer units (of 2**-88): 40-bit digits, the top limb takes the rest."""
    sign, units = (-1 if units < 0 else 1), abs(units)
    digits = [(units >> (exactsum.LIMB_BITS * k)) & ((1 << exactsum.LIMB_BITS) - 1) for k in range(2)]
    digits.append(units >> (2 * exactsum.LIMB_BITS))
    return sign * np.array(digits, dtype=np.int64).reshape(exactsum.LIMBS, 1)


@pytest.mark.parametrize("length", [54, 60, 70, 100, 125, 142])
@pytest.mark.parametrize("mantissa_bits, dtype", [(53, np.float64), (24, np.float32)])
@pytest.mark.parametrize("sign", [1, -1])
def test_to_float_ties_and_the_lowest_unit(length: int, mantissa_bits: int, dtype, sign: int) -> None:
    # 2**L + 2**(L - p) lies exactly halfway between two floats; one more unit of 2**-88, however far
    # below, must round away from the even neighbour.
    tie = (1 << length) + (1 << (length - mantissa_bits))
    for units in (tie, tie + 1, tie - 1, tie + (1 << (length - mantissa_bits))):
        exact = sign * units * RESOLUTION
        result = read(limbs_of(sign * units), dtype)[0]
        if dtype is np.float64:
            assert result == float(exact)  # Python fractions.Fraction.__float__: correctly rounded
        else:
            assert is_nearest_float32(result, exact)  # IEEE 754-2019 §4.3.1 roundTiesToEven


def run_pattern_units(rng: np.random.Generator, count: int) -> list[int]:
    """count magnitudes (integer units of 2**-88, 1 to 2**142) made of random runs of equal bits.

    Long runs of zeros or ones put ties, near-ties and carries into a power of two at every bit position and
    on every side of the 40-bit limb and 48-bit field boundaries.
    """
    units = []
    for _ in range(count):
        length = int(rng.integers(1, 143))
        mean_run = float(rng.choice([3.0, 12.0, 50.0]))  # short runs, and runs longer than a significand
        value, bit, filled = 0, 1, 0
        while filled < length:
            run = min(int(rng.geometric(1 / mean_run)), length - filled)
            value = (value << run) | (((1 << run) - 1) * bit)
            filled += run
            bit ^= 1
        units.append(value | (1 << (length - 1)))
    return units


def near_breakpoint_units(rng: np.random.Generator, count: int, precision: int) -> list[int]:
    """count magnitudes (units of 2**-88, below 2**142) next to a rounding breakpoint at `precision` bits.

    A random significand (sometimes a power of two or all ones, whose rounding carries into the next
    binade), then below the rounding position exactly half, zero or one whole unit, moved by up to two
    single units at random depths (often 53 bits below the top or below the half bit, where a 53-bit
    intermediate result would cut), or random bits.
    """
    units = []
    for _ in range(count):
        length = int(rng.integers(precision + 3, 143))
        rest_bits = length - precision
        significand = int(rng.choice([1 << (precision - 1), (1 << precision) - 1, int(rng.integers(0, 2**62))]))
        significand = (significand % (1 << (precision - 1))) | (1 << (precision - 1))
        rest = [1 << (rest_bits - 1), 0, 1 << rest_bits][int(rng.integers(0, 3))]
        for _ in range(2):
            below_top = int(rng.choice([int(rng.integers(0, length)), 53, 54, 55, precision + 54, precision + 55]))
            depth = min(max(length - 1 - below_top + int(rng.integers(-1, 2)), 0), rest_bits - 1)
            rest += int(rng.choice([-1, 0, 1])) << depth
        if rng.random() < 0.1:
            rest = int(rng.integers(0, 2**62))
        units.append((significand << rest_bits) + rest % (1 << rest_bits))
    return units


def test_to_float_is_correctly_rounded_near_breakpoints_and_in_any_limb_form() -> None:
    rng = np.random.default_rng(11)
    units = run_pattern_units(rng, 1500) + near_breakpoint_units(rng, 1500, 24) + near_breakpoint_units(rng, 1500, 53)
    units = [u * s for u, s in zip(units, rng.choice([-1, 1], len(units)).tolist(), strict=True)] + [0]
    canonical = np.hstack([limbs_of(u) for u in units])
    # The same values with the carries moved around, as uncarried sums leave them: limb k gains
    # shift * 2**40 and limb k + 1 loses shift. Digits stay far inside the MAX_TERMS headroom.
    shifted = canonical.copy()
    for k in range(exactsum.LIMBS - 1):
        shift = rng.integers(-(2**21), 2**21, len(units))
        shifted[k] += shift << exactsum.LIMB_BITS
        shifted[k + 1] -= shift
    for acc in (canonical, shifted):
        assert [limb_value(acc, i) for i in range(len(units))] == [u * RESOLUTION for u in units]
    result64, result32 = read(canonical, np.float64), read(canonical, np.float32)
    for i, u in enumerate(units):
        # Python fractions.Fraction.__float__: correctly rounded int true division
        assert result64[i] == float(u * RESOLUTION), u
        # IEEE 754-2019 §4.3.1 roundTiesToEven, against the exact rational value
        assert is_nearest_float32(result32[i], u * RESOLUTION), u
    assert not np.signbit(result64[-1]) and not np.signbit(result32[-1])  # IEEE 754: an exact zero sum is +0
    # A pure function of the value: other limbs for the same value give the same bits (derived from the
    # two checks above, asserted directly because bit-reproducibility rests on it).
    assert read(shifted, np.float64).tobytes() == result64.tobytes()
    assert read(shifted, np.float32).tobytes() == result32.tobytes()


finite_inputs = st.one_of(
    st.floats(-1e9, 1e9, allow_nan=False),
    st.builds(lambda m, e: math.ldexp(m, e), st.integers(-(2**53), 2**53), st.integers(-140, -23)),
    st.sampled_from([0.0, -0.0, 1e9, -1e9, 1e-12, 2.0**-89, -(2.0**-89), 5e-324]),
)


@settings(max_examples=150, deadline=None)
@given(
    st.integers(1, 40).flatmap(
        lambda m: st.lists(st.lists(finite_inputs, min_size=4, max_size=4), min_size=m, max_size=m)
    ),
    st.randoms(use_true_random=False),
    st.integers(1, 6),
    st.sampled_from([np.float32, np.float64]),
)
def test_order_and_grouping_do_not_change_a_bit(rows_list, random, groups: int, dtype) -> None:
    rows = np.array(rows_list, dtype=dtype)
    reference_acc = accumulate_rows(rows)
    # Another order, split among `groups` accumulators (as ranks would), then combined as int64 sums the
    # way an MPI integer SUM allreduce combines buffers.
    order = list(range(len(rows)))
    random.shuffle(order)
    partial = [exactsum.new_accumulator(rows.shape[1]) for _ in range(groups)]
    for i in order:
        assert math.isfinite(exactsum.accumulate(np.ascontiguousarray(rows[i]), partial[random.randrange(groups)]))
    combined = np.zeros_like(reference_acc)
    for acc in random.sample(partial, groups):
        combined += acc
    for out_dtype in (np.float32, np.float64):
        a, b = read(reference_acc, out_dtype), read(combined, out_dtype)
        assert a.tobytes() == b.tobytes()  # bit-identical: integer addition is associative (common practice)
    expected = [math.fsum(quantize(float(v)) for v in rows[:, j]) for j in range(rows.shape[1])]
    # Python math.fsum (Shewchuk 1997)
    assert read(combined).tolist() == expected



@pytest.mark.parametrize("dtype", [np.float32, np.float64])
def test_replace_equals_zeroing_then_adding(dtype) -> None:
    """accumulate(..., replace=True) overwrites: the same limbs as a fresh accumulator, whatever was there."""
    rng = np.random.default_rng(11)
    columns = adversarial_columns(rng, 64).astype(dtype).reshape(-1)
    x = np.concatenate([columns, np.array([3e9, np.inf, -1.5], dtype=dtype)])  # out of range: zero digits
    fresh = exactsum.new_accumulator(x.size)
    expected_return = exactsum.accumulate(x, fresh)
    stale = rng.integers(-2**40, 2**40, size=fresh.shape)
    returned = exactsum.accumulate(x, stale, replace=True)
    assert np.array_equal(stale, fresh) and returned == expected_return == math.inf
    # the first term replaced, the rest added: the same sum as all added to zero (Python math.fsum)
    rows = rng.standard_normal((5, 16)).astype(dtype)
    acc = rng.integers(-2**40, 2**40, size=(exactsum.LIMBS, 16))
    for k, row in enumerate(rows):
        exactsum.accumulate(row, acc, replace=k == 0)
    assert read(acc).tolist() == [math.fsum(quantize(float(v)) for v in rows[:, j]) for j in range(16)]


@pytest.mark.parametrize("dtype", [np.float32, np.float64])
def test_assign_pair_equals_two_single_passes(dtype) -> None:
    """assign_pair(x, y) gives the limbs of replace-then-add, and the largest |x|, |y| (numpy abs/max)."""
    rng = np.random.default_rng(12)
    x = adversarial_columns(rng, 32).astype(dtype).reshape(-1)
    y = rng.permutation(adversarial_columns(rng, 32).astype(dtype).reshape(-1))
    expected = exactsum.new_accumulator(x.size)
    exactsum.accumulate(x, expected, replace=True)
    exactsum.accumulate(y, expected)
    acc = rng.integers(-2**40, 2**40, size=expected.shape)
    assert exactsum.assign_pair(x, y, acc) == float(max(np.abs(x).max(), np.abs(y).max()))
    assert np.array_equal(acc, expected)
    # Python math.fsum (Shewchuk 1997) of the two quantised terms
    pairs = zip(x.tolist(), y.tolist(), strict=True)
    assert read(acc).tolist() == [math.fsum([quantize(a), quantize(b)]) for a, b in pairs]
    y[7] = np.nan
    assert math.isnan(exactsum.assign_pair(x, y, acc))
    with pytest.raises(TypeError, match="dtype of x"):
        exactsum.assign_pair(x, y.astype(np.float32 if dtype == np.float64 else np.float64), acc)

@pytest.mark.parametrize("dtype", [np.float32, np.float64])
def test_headroom_for_max_terms(dtype) -> None:
    # MAX_TERMS copies of the largest inputs, added as integers (what MAX_TERMS accumulations, or an
    # allreduce over that many, produce), must not overflow and must read back exactly.
    largest = float(np.nextafter(dtype(exactsum.MAX_ABS), dtype(0)))
    x = np.array([largest, -largest, largest / 3, -(2.0**-60) - 2.0**-89, 1e-30], dtype=dtype)
    acc = exactsum.new_accumulator(x.shape[0])
    exactsum.accumulate(x, acc)
    assert np.abs(acc).max() <= 2**40  # documented digit bound (derived)
    acc *= exactsum.MAX_TERMS
    result = read(acc)
    for i, v in enumerate(x):
        # Python fractions.Fraction.__float__: correctly rounded
        assert result[i] == float(exactsum.MAX_TERMS * Fraction(quantize(float(v)))), i


@pytest.mark.parametrize("dtype", [np.float32, np.float64])
@pytest.mark.parametrize(
    "bad, expect_nan",
    [(2.0**31, False), (-(2.0**31), False), (3e9, False), (np.inf, False), (-np.inf, False), (np.nan, True)],
)
def test_out_of_range_inputs_give_non_finite_return(dtype, bad: float, expect_nan: bool) -> None:
    x = np.array([1.0, bad, -2.5, 4.0], dtype=dtype)
    result = exactsum.accumulate(x, exactsum.new_accumulator(4))
    assert not math.isfinite(result)  # overflow guard (common practice)
    assert math.isnan(result) == expect_nan
    x[0] = np.nan  # NaN wins over an out-of-range value
    assert math.isnan(exactsum.accumulate(x, exactsum.new_accumulator(4)))


@pytest.mark.parametrize("dtype", [np.float32, np.float64])
def test_returns_largest_magnitude(dtype) -> None:
    x = (np.random.default_rng(3).standard_normal(1001) * 1e3).astype(dtype)
    x[500] = -np.nextafter(dtype(exactsum.MAX_ABS), dtype(0))
    # numpy abs/max (common practice)
    assert exactsum.accumulate(x, exactsum.new_accumulator(x.shape[0])) == float(np.abs(x).max())
    assert exactsum.accumulate(x[:0], exactsum.new_accumulator(0)) == 0.0


def test_exact_cancellation_gives_positive_zero() -> None:
    x = np.array([1e9, -0.0, 1e-20, 2.0**-88])
    acc = exactsum.new_accumulator(4)
    exactsum.accumulate(x, acc)
    exactsum.accumulate(-x, acc)
    result = read(acc)
    assert result.tobytes() == np.zeros(4).tobytes()  # IEEE 754: exact zero sum is +0 (round to nearest)


def test_rejects_mismatched_arrays() -> None:
    acc = exactsum.new_accumulator(4)
    with pytest.raises(TypeError, match="acc must be an int64"):
        exactsum.accumulate(np.zeros(5), acc)
    with pytest.raises(TypeError, match="x must be a 1-D float32 or float64"):
        exactsum.accumulate(np.zeros(4, dtype=np.int64), acc)
    with pytest.raises(ValueError, match="C-contiguous"):
        exactsum.accumulate(np.zeros(8)[::2], acc)
    with pytest.raises(TypeError, match="acc must be an int64"):
        exactsum.to_float(acc.astype(np.int32), np.zeros(4))
