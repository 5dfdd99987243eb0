"""Compact exact sums (shardmill.kernels.compactsum) against exact rational arithmetic.

Outside references: ``fractions.Fraction`` (exact rationals; ``round(Fraction)`` rounds half to even and
``float(Fraction)`` is correctly rounded), ``math.frexp``/``math.log2`` for the exponents and ``math.fsum``
(Shewchuk 1997, correctly rounded in CPython). The shift formula S_b = min(51 - ceil(log2 K) - E_b, 1022) is the
documented design; every expected value below is computed from it with Python integers and rationals, never with
the kernels.
"""

import itertools
import math
from fractions import Fraction

import numpy as np
import pytest
from helpers import is_nearest_float32
from hypothesis import given, settings
from hypothesis import strategies as st
from shardmill.kernels import compactsum


def blocks(bounds: np.ndarray) -> list[tuple[int, int]]:
    """[(lo, hi)] of every block."""
    return [(int(lo), int(hi)) for lo, hi in itertools.pairwise(bounds)]


def expected_shifts(chunks: np.ndarray, bounds: np.ndarray) -> list[int]:
    """S_b from the design, with the exponents from math.frexp and the headroom from math.log2."""
    headroom = math.ceil(math.log2(chunks.shape[0]))
    shifts = []
    for lo, hi in blocks(bounds):
        largest = float(np.max(np.abs(chunks[:, lo:hi]), initial=0.0))
        shifts.append(min(51 - headroom - math.frexp(largest)[1], 1022))
    return shifts


def fixed_point(v: float, shift: int) -> int:
    """rint(v * 2**shift) in exact rational arithmetic (Python round(): half to even)."""
    return round(Fraction(v) * Fraction(2) ** shift)


def float32_ulp(x: np.float32) -> Fraction:
    """The gap from |x| to the next float32 away from zero (numpy.spacing, IEEE 754 nextUp)."""
    return Fraction(float(np.spacing(np.abs(x))))


def mixed_chunks(rng: np.random.Generator, k: int, dtype) -> tuple[np.ndarray, np.ndarray]:
    """(k, n) chunks of dtype and block bounds: every block its own magnitude, with zeros, signs and ties.

    Blocks: wide-range normals; all zeros (and negative zeros); an empty one; values that use every significand
    bit; tiny values (float32 subnormals; float64 near 1e-300, where the shift is clamped, and subnormals lost
    below its grid); large values (1e30 in float32, 1e200 in float64); exact halves of the grid, which are ties.
    """
    tiny, large = (1e-41, 1e30) if dtype == np.float32 else (1e-300, 1e200)
    sizes = [37, 11, 0, 29, 23, 17, 13, 19]
    bounds = np.concatenate([[0], np.cumsum(sizes)]).astype(np.int64)
    chunks = np.zeros((k, sum(sizes)))
    (wide, zeros, _, full, small, big, ties, normal) = [slice(lo, hi) for lo, hi in blocks(bounds)]
    chunks[:, wide] = rng.standard_normal((k, sizes[0])) * 10.0 ** rng.uniform(-6, 3, (k, sizes[0]))
    chunks[:, zeros] = np.resize([0.0, -0.0], (k, sizes[1]))
    chunks[:, full] = rng.uniform(0.5, 1.0, (k, sizes[3])) * 2.0 ** rng.integers(-30, 4, (k, sizes[3]))
    chunks[:, small] = tiny * rng.uniform(0.0, 4.0, (k, sizes[4])) * 1e-10 ** rng.integers(0, 2, (k, sizes[4]))
    chunks[:, big] = large * rng.uniform(0.01, 1.0, (k, sizes[5]))
    chunks[:, normal] = rng.standard_normal((k, sizes[7]))
    chunks[rng.random(chunks.shape) < 0.1] = 0.0
    # Ties: the block maximum 0.75 gives E = 0, so the grid is 2**(h - 51); odd multiples of 2**(h - 52) are
    # exact halves of it (and fit float32's 24 bits).
    headroom = math.ceil(math.log2(k))
    chunks[:, ties] = (2.0 * rng.integers(-(2**20), 2**20, (k, sizes[6])) + 1.0) * 2.0 ** (headroom - 52)
    chunks[0, ties.start] = 0.75
    sign = rng.choice([-1.0, 1.0], chunks.shape)
    return (sign * chunks).astype(dtype), bounds


def compact_sum(chunks: np.ndarray, bounds: np.ndarray, total_chunks: int | None = None) -> tuple[np.ndarray, ...]:
    """One rank's view: block maxima over its chunks, then shifts for total_chunks, then the int64 sum."""
    largest = np.zeros(len(bounds) - 1)
    for chunk in chunks:
        compactsum.block_max_abs(chunk, bounds, largest)
    shifts = compactsum.shifts(largest, total_chunks or chunks.shape[0])
    acc = np.empty(chunks.shape[1], dtype=np.int64)
    for k, chunk in enumerate(chunks):
        compactsum.accumulate(chunk, bounds, shifts, acc, replace=k == 0)
    return largest, shifts, acc


def read(acc: np.ndarray, bounds: np.ndarray, shifts: np.ndarray, dtype, offset: int = 0) -> np.ndarray:
    out = np.empty(acc.shape[0], dtype=dtype)
    compactsum.to_float(acc, bounds, shifts, out, offset=offset)
    return out


@pytest.mark.parametrize("dtype", [np.float32, np.float64])
@pytest.mark.parametrize("k", [1, 2, 3, 8, 13, 64])
def test_sum_equals_exact_sum_on_the_grid_and_within_the_bound(dtype, k: int) -> None:
    chunks, bounds = mixed_chunks(np.random.default_rng(100 * k + (dtype == np.float32)), k, dtype)
    largest, shifts, acc = compact_sum(chunks, bounds)
    result64 = read(acc, bounds, shifts, np.float64)
    result32 = read(acc, bounds, shifts, np.float32)
    headroom = math.ceil(math.log2(k))
    for b, (lo, hi) in enumerate(blocks(bounds)):
        block_max = float(np.max(np.abs(chunks[:, lo:hi]), initial=0.0))
        assert largest[b] == block_max  # numpy max of |x|: exact and order-free
        shift = expected_shifts(chunks, bounds)[b]
        ties = sum(Fraction(float(v)) * Fraction(2) ** shift % 1 == Fraction(1, 2) for v in chunks[:, lo:hi].flat)
        if b == 6:
            assert ties > 0  # the ties block really holds exact halves of the grid
        assert shifts[b] == shift  # the design's formula with math.frexp / math.log2
        unclamped = shift < 1022
        for i in range(lo, hi):
            column = [float(v) for v in chunks[:, i]]
            # Python integers and round-half-even Fractions: the exact sum of the rounded terms
            assert acc[i] == sum(fixed_point(v, shift) for v in column), i
            on_grid = Fraction(int(acc[i])) / Fraction(2) ** shift
            # fractions.Fraction.__float__ is correctly rounded; k * 2**-S has at most 52 bits, so it is exact
            assert result64[i] == float(on_grid), i
            assert Fraction(float(result64[i])) == on_grid, i
            assert is_nearest_float32(result32[i], on_grid), i  # IEEE 754-2019 §4.3.1
            exact = sum((Fraction(v) for v in column), Fraction(0))
            grid_error = k * Fraction(2) ** (-shift - 1)  # each of the k terms rounds by at most half a unit
            assert abs(on_grid - exact) <= grid_error, i
            if np.isfinite(result32[i]):  # float64 blocks near 1e200 overflow float32 (is_nearest_float32 above)
                float32_error = abs(Fraction(float(result32[i])) - exact)
                assert float32_error <= grid_error + float32_ulp(result32[i]) / 2, i
            if unclamped and block_max > 0:
                # the stated relative bound: |r - s| / M <= K 2**(h - 51) (plus the final rounding for float32)
                assert abs(on_grid - exact) / Fraction(block_max) <= k * Fraction(2) ** (headroom - 51), i
            # math.fsum (Shewchuk 1997), within half an ulp of the exact sum, seen through the same bound
            fsum = math.fsum(column)
            assert abs(Fraction(float(result64[i])) - Fraction(fsum)) <= grid_error + Fraction(math.ulp(fsum)) / 2


def test_ties_round_to_even_and_zero_blocks_give_zeros() -> None:
    # One block with max 2.5: E = 2, K = 1, S = 49; scaled by 2**-49 the inputs below land on exact halves.
    bounds = np.array([0, 6, 10], dtype=np.int64)
    halves = np.array([0.5, 1.5, 2.5, -0.5, -2.5, 3.5], dtype=np.float64) * 2.0**-49
    chunk = np.concatenate([halves, np.zeros(3), [-0.0]])
    chunk[0] = 2.5  # the block maximum; 2.5 * 2**49 is an integer
    largest, shifts, acc = compact_sum(chunk[None, :], bounds)
    assert list(shifts) == [51 - 2, 51]  # frexp(2.5) = (0.625, 2); frexp(0) = (0, 0), K = 1: h = 0
    # Python round(): half to even (0.5 -> 0, 1.5 -> 2, 2.5 -> 2, -0.5 -> 0, -2.5 -> -2, 3.5 -> 4)
    assert list(acc[:6]) == [round(Fraction(5, 2) * 2**49), 2, 2, 0, -2, 4]
    assert list(acc[6:]) == [0, 0, 0, 0]
    out = read(acc, bounds, shifts, np.float32)
    assert np.all(out[6:] == 0.0) and not np.signbit(out[6:]).any()  # an exact integer 0 reads back as +0


@pytest.mark.parametrize("dtype", [np.float32, np.float64])
def test_result_is_the_same_for_every_split_among_ranks(dtype) -> None:
    k = 7
    chunks, bounds = mixed_chunks(np.random.default_rng(5), k, dtype)
    _, reference_shifts, reference_acc = compact_sum(chunks, bounds)
    reference = read(reference_acc, bounds, reference_shifts, dtype)
    splits = 0
    for ranks in range(1, 6):
        for cuts in itertools.combinations(range(1, k), ranks - 1):
            rank_edges = (0, *cuts, k)
            runs = [chunks[a:b] for a, b in itertools.pairwise(rank_edges)]
            # each rank's maxima over its own chunks, then a MAX "allreduce" (np.maximum is order-free)
            local = [compact_sum(run, bounds, k)[0] for run in runs]
            shifts = compactsum.shifts(np.maximum.reduce(local), k)
            assert np.array_equal(shifts, reference_shifts), rank_edges
            sums = []
            for run in runs:
                acc = np.empty(chunks.shape[1], dtype=np.int64)
                for j, chunk in enumerate(run):
                    compactsum.accumulate(chunk, bounds, shifts, acc, replace=j == 0)
                sums.append(acc)
            # an integer SUM reduction in two different orders (int64 addition is associative)
            for ordered in (sums, sums[::-1]):
                total = np.zeros_like(reference_acc)
                for acc in ordered:
                    total += acc
                assert np.array_equal(total, reference_acc), rank_edges
                result = read(total, bounds, shifts, dtype)
                assert np.array_equal(result.view(np.uint8), reference.view(np.uint8)), rank_edges
            splits += 1
    assert splits == sum(math.comb(k - 1, p - 1) for p in range(1, 6))  # every contiguous split was tried


def test_replace_equals_zeroing_then_adding() -> None:
    chunks, bounds = mixed_chunks(np.random.default_rng(9), 3, np.float32)
    _, shifts, _ = compact_sum(chunks, bounds)
    replaced = np.full(chunks.shape[1], 12345, dtype=np.int64)  # stale contents that replace must not read
    zeroed = np.zeros(chunks.shape[1], dtype=np.int64)
    assert compactsum.accumulate(chunks[0], bounds, shifts, replaced, replace=True) == compactsum.accumulate(
        chunks[0], bounds, shifts, zeroed)
    assert np.array_equal(replaced, zeroed)
    # and an explicit sum of the independently rounded terms (Python round-half-even on Fractions)
    shift = expected_shifts(chunks, bounds)
    for b, (lo, hi) in enumerate(blocks(bounds)):
        assert [int(v) for v in replaced[lo:hi]] == [fixed_point(float(v), shift[b]) for v in chunks[0, lo:hi]]


@pytest.mark.parametrize("dtype", [np.float32, np.float64])
def test_slices_read_back_and_accumulate_like_the_whole(dtype) -> None:
    rng = np.random.default_rng(11)
    chunks, bounds = mixed_chunks(rng, 4, dtype)
    n = chunks.shape[1]
    largest, shifts, acc = compact_sum(chunks, bounds)
    whole = read(acc, bounds, shifts, dtype)
    edges = sorted({0, n, *map(int, bounds), *map(int, bounds + 1), *map(int, rng.integers(0, n, 12))})
    edges = [e for e in edges if e <= n]
    for lo, hi in itertools.combinations_with_replacement(edges, 2):
        part = read(np.ascontiguousarray(acc[lo:hi]), bounds, shifts, dtype, offset=lo)
        assert np.array_equal(part.view(np.uint8), whole[lo:hi].view(np.uint8)), (lo, hi)
        piece = np.empty(hi - lo, dtype=np.int64)
        for j, chunk in enumerate(chunks):
            compactsum.accumulate(np.ascontiguousarray(chunk[lo:hi]), bounds, shifts, piece, replace=j == 0,
                                  offset=lo)
        assert np.array_equal(piece, acc[lo:hi]), (lo, hi)
        part_max = np.zeros(len(bounds) - 1)
        compactsum.block_max_abs(np.ascontiguousarray(chunks[0, lo:hi]), bounds, part_max, offset=lo)
        for b, (a, z) in enumerate(blocks(bounds)):
            inside = np.abs(chunks[0, max(a, lo):min(z, hi)])
            assert part_max[b] == float(np.max(inside, initial=0.0)), (lo, hi, b)  # numpy max over the overlap


def test_non_finite_inputs_are_reported() -> None:
    bounds = np.array([0, 3, 6], dtype=np.int64)
    largest = np.zeros(2)
    x = np.array([1.0, np.inf, 2.0, 0.5, -3.0, 1.0], dtype=np.float32)
    assert compactsum.block_max_abs(x, bounds, largest) == np.inf
    assert list(largest) == [np.inf, 3.0]
    x[4] = np.nan
    assert math.isnan(compactsum.block_max_abs(x, bounds, largest))
    assert largest[0] == np.inf and math.isnan(largest[1])
    assert compactsum.block_max_abs(np.ones(6), bounds, largest) == 1.0
    assert largest[0] == np.inf and math.isnan(largest[1])  # a NaN, once recorded, stays
    with pytest.raises(ValueError, match=r"max_abs\[0\] must be finite and >= 0; got inf"):
        compactsum.shifts(largest, 2)


def test_a_chunk_outside_the_maxima_is_reported_by_accumulate() -> None:
    bounds = np.array([0, 4], dtype=np.int64)
    k = 8
    shifts = compactsum.shifts(np.array([1.0]), k)  # made for |x| <= 1
    acc = np.zeros(4, dtype=np.int64)
    limit = 2.0 ** (51 - math.ceil(math.log2(k)))
    assert compactsum.accumulate(np.array([0.25, -1.0, 0.0, 0.5]), bounds, shifts, acc) < limit
    assert compactsum.accumulate(np.array([0.25, -2.0, 0.0, 0.5]), bounds, shifts, acc) >= limit
    assert math.isnan(compactsum.accumulate(np.array([np.nan, 0.0, 0.0, 0.0]), bounds, shifts, acc))


def test_float32_read_back_overflows_to_infinity() -> None:
    bounds = np.array([0, 2], dtype=np.int64)
    chunks = np.full((2, 2), 3.0e38, dtype=np.float32)
    chunks[:, 1] *= -1
    _, shifts, acc = compact_sum(chunks, bounds)
    # 6e38 > float32 max + half an ulp: roundTiesToEven gives a signed infinity (IEEE 754-2019 §7.4)
    assert list(read(acc, bounds, shifts, np.float32)) == [np.inf, -np.inf]
    assert list(read(acc, bounds, shifts, np.float64)) == [2 * float(np.float32(3.0e38)),
                                                            -2 * float(np.float32(3.0e38))]


@settings(max_examples=400, deadline=None)
@given(st.integers(-(2**51), 2**51), st.integers(-993, 1022))
def test_read_back_is_correctly_rounded_for_any_sum(k: int, shift: int) -> None:
    bounds = np.array([0, 1], dtype=np.int64)
    shifts = np.array([shift], dtype=np.int64)
    acc = np.array([k], dtype=np.int64)
    exact = Fraction(k) / Fraction(2) ** shift
    result64 = read(acc, bounds, shifts, np.float64)[0]
    if abs(exact) >= 2**1024:  # at most 52 significant bits: representable below 2**1024, else RN gives inf
        assert np.isinf(result64) and (result64 > 0) == (k > 0)
    else:
        assert result64 == float(exact)  # fractions.Fraction.__float__: correctly rounded
    assert is_nearest_float32(read(acc, bounds, shifts, np.float32)[0], exact)  # IEEE 754-2019 §4.3.1


@settings(max_examples=400, deadline=None)
@given(st.data(), st.integers(1, compactsum.MAX_CHUNKS), st.sampled_from([np.float32, np.float64]))
def test_any_value_converts_to_its_rounded_scaled_integer(data, chunks: int, dtype) -> None:
    width = 32 if dtype == np.float32 else 64
    value = data.draw(st.floats(allow_nan=False, allow_infinity=False, width=width))
    x = np.array([value, -value, 0.0], dtype=dtype)
    bounds = np.array([0, 3], dtype=np.int64)
    shifts = compactsum.shifts(np.array([float(np.max(np.abs(x)))]), chunks)
    # frexp (C99) and the design's formula
    shift = min(51 - math.ceil(math.log2(chunks)) - math.frexp(abs(float(x[0])))[1], 1022)
    assert shifts[0] == shift
    acc = np.empty(3, dtype=np.int64)
    largest = compactsum.accumulate(x, bounds, shifts, acc, replace=True)
    expected = fixed_point(float(x[0]), shift)  # Python round-half-even on the exact rational
    assert list(acc) == [expected, -expected, 0]
    assert abs(expected) <= 2 ** (51 - math.ceil(math.log2(chunks)))  # the headroom leaves room for K terms
    assert largest == abs(float(Fraction(float(x[0])) * Fraction(2) ** shift))


@pytest.mark.parametrize(
    ("call", "message"),
    [
        (lambda s, a, x: compactsum.shifts(np.zeros(2), 0), r"chunks must be an integer in \[1, 1048576\]; got 0"),
        (lambda s, a, x: compactsum.shifts(np.zeros(2), 2**20 + 1), r"chunks must be .*; got 1048577"),
        (lambda s, a, x: compactsum.shifts(np.zeros(2, np.float32), 4), r"max_abs must be a 1-D float64"),
        (lambda s, a, x: compactsum.accumulate(x, np.array([1, 4, 6]), s, a), r"bounds\[0\] must be 0"),
        (lambda s, a, x: compactsum.accumulate(x, np.array([0, 4, 2, 6]), np.zeros(3, np.int64), a),
         r"bounds must be non-decreasing; got bounds\[2\] = 2 < 4"),
        (lambda s, a, x: compactsum.accumulate(x, np.array([0, 4, 5]), s, a),
         r"offset \+ length = 6 must be <= bounds\[-1\] = 5"),
        (lambda s, a, x: compactsum.to_float(a[2:], np.array([0, 4, 6]), s, np.zeros(4), offset=3),
         r"offset \+ length = 7 must be <= bounds\[-1\] = 6"),
        (lambda s, a, x: compactsum.accumulate(x, np.array([0, 4, 6]), s[:1], a), r"shift must .* shape \(2,\)"),
        (lambda s, a, x: compactsum.accumulate(x, np.array([0, 4, 6]), s, a[:5]), r"acc must be an int64 .* \(6,\)"),
        (lambda s, a, x: compactsum.accumulate(x, np.array([0, 4, 6]), s, a, offset=-1), r"offset must be an int"),
        (lambda s, a, x: compactsum.to_float(a, np.array([0, 4, 6]), s, np.zeros(6, np.int32)), r"out must be a 1-D"),
        (lambda s, a, x: compactsum.block_max_abs(x, np.array([0, 4, 6]), np.zeros(3)), r"out must .* shape \(2,\)"),
        (lambda s, a, x: compactsum.block_max_abs(x[::2], np.array([0, 2, 3]), np.zeros(2)), r"x must be C-contig"),
        (lambda s, a, x: compactsum.block_max_abs(x, np.array([0]), np.zeros(0)), r"bounds must be a 1-D int64"),
        (lambda s, a, x: compactsum.to_float(a, np.array([0, 4, 6]), np.array([0, 1023]), np.zeros(6)),
         r"shift\[1\] must be in \[-993, 1022\] \(as made by shifts\(\)\); got 1023"),
    ],
)
def test_bad_arguments_name_the_argument(call, message: str) -> None:
    shifts = np.zeros(2, dtype=np.int64)
    acc = np.zeros(6, dtype=np.int64)
    x = np.zeros(6, dtype=np.float32)
    with pytest.raises((TypeError, ValueError), match=message):
        call(shifts, acc, x)


@pytest.mark.parametrize("dtype", [np.float32, np.float64])
@pytest.mark.parametrize("k", [1, 2, 5, 16])
def test_int32_sums_are_exact_on_a_30_bit_grid_and_the_same_for_every_split(dtype, k: int) -> None:
    # The narrow format: int32 accumulators, shifts S_b = min(30 - ceil(log2 K) - E_b, 1022) (the documented
    # design with NARROW_TERM_BITS = 30), so that K terms sum within |k| <= 2**30 < 2**31.
    chunks, bounds = mixed_chunks(np.random.default_rng(7 * k), k, dtype)
    largest = np.zeros(bounds.shape[0] - 1)
    for chunk in chunks:
        compactsum.block_max_abs(chunk, bounds, largest)
    shifts = compactsum.shifts(largest, k, compactsum.term_bits(np.int32))
    headroom = math.ceil(math.log2(k))
    for b, (lo, hi) in enumerate(blocks(bounds)):
        top = float(np.max(np.abs(chunks[:, lo:hi]), initial=0.0))
        assert shifts[b] == min(30 - headroom - math.frexp(top)[1], 1022)  # math.frexp, math.log2
    reference = None
    for cut in range(0, k + 1):  # two "ranks": chunks [0, cut) and [cut, k); an empty share is allowed
        total = np.zeros(chunks.shape[1], dtype=np.int32)
        for run in (chunks[:cut], chunks[cut:]):
            acc = np.zeros(chunks.shape[1], dtype=np.int32)
            for j, chunk in enumerate(run):
                top_scaled = compactsum.accumulate(chunk, bounds, shifts, acc, replace=j == 0)
                assert top_scaled < 2.0 ** (30 - headroom)
            total += acc
        if reference is None:
            reference = total.copy()
        assert np.array_equal(total, reference), cut  # integer sums: associative
    for b, (lo, hi) in enumerate(blocks(bounds)):
        for i in range(lo, min(hi, lo + 8)):
            column = [float(v) for v in chunks[:, i]]
            assert reference[i] == sum(fixed_point(v, int(shifts[b])) for v in column), i  # Fraction, half to even
    out = read(reference, bounds, shifts, np.float64)
    for b, (lo, hi) in enumerate(blocks(bounds)):
        for i in range(lo, hi):
            assert Fraction(float(out[i])) == Fraction(int(reference[i])) / Fraction(2) ** int(shifts[b])  # exact
