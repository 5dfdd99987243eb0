"""Tests of the allreduce cost model against the formulas of Thakur, Rabenseifner & Gropp 2005.

Shorthand in the comments: TRG 2005 = Thakur, Rabenseifner & Gropp, "Optimization of Collective
Communication Operations in MPICH", IJHPCA 19(1), 2005. The worked numbers use
n = 1 MiB = 1 048 576 bytes, α = 2 µs, β = 1/(10 GB/s) = 1e-10 s/byte, so n·β = 1.048576e-4 s.
"""

from __future__ import annotations

import json
import math
import textwrap
from pathlib import Path

import numpy as np
import pytest
from helpers import run_mpi
from hypothesis import given, settings
from hypothesis import strategies as st
from shardmill.scaling.costmodel import (
    ALGORITHMS,
    ASSUMPTIONS,
    NO_COMMUNICATION,
    Fit,
    allreduce_time,
    best_allreduce,
    fit_alpha_beta,
    fit_linear,
    parse_network,
    project,
)
from shardmill.scaling.measure import measure_reduction_gamma

MIB = 1 << 20
ALPHA = 2e-6
BETA = 1e-10
N_BETA = MIB * BETA  # 1.048576e-4 s


# ------------------------------------------------------------------------------------------------------
# Formulas, worked by hand
# ------------------------------------------------------------------------------------------------------


def test_power_of_two_formulas_by_hand() -> None:
    # p = 8, lg p = 3, (p−1)/p = 7/8.
    # ring:  2·7·α + 2·(7/8)·nβ = 2.8e-5 + 1.835008e-4 = 2.115008e-4 s
    assert allreduce_time("ring", 8, MIB, ALPHA, BETA) == pytest.approx(2.115008e-4, rel=1e-12)  # TRG 2005
    # recursive doubling:  3α + 3nβ = 6e-6 + 3.145728e-4 = 3.205728e-4 s
    assert allreduce_time("recursive_doubling", 8, MIB, ALPHA, BETA) == pytest.approx(
        3.205728e-4, rel=1e-12
    )  # TRG 2005, allreduce by recursive doubling: lg p·α + n·lg p·β + n·lg p·γ
    # Rabenseifner:  2·3·α + 2·(7/8)·nβ = 1.2e-5 + 1.835008e-4 = 1.955008e-4 s
    assert allreduce_time("rabenseifner", 8, MIB, ALPHA, BETA) == pytest.approx(
        1.955008e-4, rel=1e-12
    )  # TRG 2005, reduce-scatter + allgather: 2 lg p·α + 2((p−1)/p)·nβ + ((p−1)/p)·nγ


def test_gamma_terms_by_hand() -> None:
    gamma = 5e-11  # n·γ = 5.24288e-5 s
    # ring and Rabenseifner add (7/8)·nγ = 4.58752e-5 s; recursive doubling adds 3·nγ = 1.572864e-4 s.
    assert allreduce_time("ring", 8, MIB, ALPHA, BETA, gamma) == pytest.approx(
        2.115008e-4 + 4.58752e-5, rel=1e-12
    )  # TRG 2005
    assert allreduce_time("recursive_doubling", 8, MIB, ALPHA, BETA, gamma) == pytest.approx(
        3.205728e-4 + 1.572864e-4, rel=1e-12
    )  # TRG 2005
    assert allreduce_time("rabenseifner", 8, MIB, ALPHA, BETA, gamma) == pytest.approx(
        1.955008e-4 + 4.58752e-5, rel=1e-12
    )  # TRG 2005


def test_two_processes_by_hand() -> None:
    # p = 2: recursive doubling is one exchange, α + nβ = 1.068576e-4 s; ring and Rabenseifner both take
    # two half-size steps, 2α + nβ = 1.088576e-4 s.
    assert allreduce_time("recursive_doubling", 2, MIB, ALPHA, BETA) == pytest.approx(
        1.068576e-4, rel=1e-12
    )  # TRG 2005
    assert allreduce_time("ring", 2, MIB, ALPHA, BETA) == pytest.approx(1.088576e-4, rel=1e-12)  # TRG 2005
    assert allreduce_time("rabenseifner", 2, MIB, ALPHA, BETA) == pytest.approx(1.088576e-4, rel=1e-12)  # TRG 2005


def test_non_power_of_two_by_hand() -> None:
    # p = 6, p' = 4, lg p' = 2; extra step for the r = 2 surplus ranks: fold (α + nβ + nγ), return (α + nβ).
    # ring needs no correction: 10α + 2(5/6)·nβ = 2e-5 + 1.7476266…e-4 s
    assert allreduce_time("ring", 6, MIB, ALPHA, BETA) == pytest.approx(
        2e-5 + (5 / 3) * N_BETA, rel=1e-12
    )  # TRG 2005, ring reduce-scatter + ring allgather, any p
    # recursive doubling: (2 + 2)α + (2 + 2)·nβ = 8e-6 + 4.194304e-4 = 4.274304e-4 s
    assert allreduce_time("recursive_doubling", 6, MIB, ALPHA, BETA) == pytest.approx(
        4.274304e-4, rel=1e-12
    )  # TRG 2005, reduction to the nearest lower power of two
    # Rabenseifner: (2·2 + 2)α + (2 + 2·3/4)·nβ = 1.2e-5 + 3.670016e-4 = 3.790016e-4 s
    assert allreduce_time("rabenseifner", 6, MIB, ALPHA, BETA) == pytest.approx(
        3.790016e-4, rel=1e-12
    )  # TRG 2005, reduction to the nearest lower power of two


def test_rabenseifner_gamma_matches_paper_reduce_scatter_for_non_power_of_two() -> None:
    # TRG 2005 give recursive-halving reduce-scatter for p not a power of two as
    # (⌊lg p⌋ + 2)α + 2nβ + n(1 + (p'−1)/p')γ; the allgather adds no reduction, so the allreduce's γ term
    # must be the same: p = 12, p' = 8 gives n·(1 + 7/8)·γ.
    gamma = 1e-10
    time_with = allreduce_time("rabenseifner", 12, MIB, 0.0, 0.0, gamma)
    assert time_with == pytest.approx(MIB * (1 + 7 / 8) * gamma, rel=1e-12)  # TRG 2005 (from memory)


@pytest.mark.parametrize("algorithm", ALGORITHMS)
def test_one_process_costs_nothing(algorithm: str) -> None:
    assert allreduce_time(algorithm, 1, MIB, ALPHA, BETA, 1e-10) == 0.0  # common practice: no messages
    assert best_allreduce(1, MIB, ALPHA, BETA) == (NO_COMMUNICATION, 0.0)


@settings(max_examples=200, deadline=None)
@given(
    p=st.integers(min_value=2, max_value=1024),
    n_bytes=st.floats(min_value=0.0, max_value=1e10),
    alpha=st.floats(min_value=0.0, max_value=1e-3),
    beta=st.floats(min_value=0.0, max_value=1e-8),
    gamma=st.floats(min_value=0.0, max_value=1e-8),
)
def test_best_is_the_minimum_and_ring_is_bandwidth_optimal(
    p: int, n_bytes: float, alpha: float, beta: float, gamma: float
) -> None:
    name, best = best_allreduce(p, n_bytes, alpha, beta, gamma)
    costs = {a: allreduce_time(a, p, n_bytes, alpha, beta, gamma) for a in ALGORITHMS}
    assert best == min(costs.values()) and costs[name] == best  # definition of the choice
    # Patarasuk & Yuan 2009: any allreduce moves at least 2((p−1)/p)·n bytes through each rank; the ring
    # attains it.
    ring_bandwidth_part = allreduce_time("ring", p, n_bytes, 0.0, beta)
    assert ring_bandwidth_part == pytest.approx(2 * (p - 1) / p * n_bytes * beta, rel=1e-12, abs=1e-300)
    if p & (p - 1) == 0:  # TRG 2005: same β and γ terms, 2 lg p ≤ 2(p−1) latency terms
        assert costs["rabenseifner"] <= costs["ring"] * (1 + 1e-12)


def test_best_switches_from_latency_to_bandwidth_algorithm() -> None:
    # p = 8: recursive doubling 3α + 3nβ against Rabenseifner 6α + 1.75nβ cross at
    # n = 3α / (1.25β) = 48 000 bytes. TRG 2005: recursive doubling for short messages, Rabenseifner for long.
    assert best_allreduce(8, 1024, ALPHA, BETA)[0] == "recursive_doubling"
    assert best_allreduce(8, 47_000, ALPHA, BETA)[0] == "recursive_doubling"
    assert best_allreduce(8, 49_000, ALPHA, BETA)[0] == "rabenseifner"
    assert best_allreduce(8, 64 * MIB, ALPHA, BETA)[0] == "rabenseifner"
    # p = 6: the non-power-of-two extra step doubles Rabenseifner's β term (3.5nβ) so the ring (5/3·nβ)
    # takes over for long messages; short ones still go to recursive doubling (4α).
    assert best_allreduce(6, 256, ALPHA, BETA)[0] == "recursive_doubling"  # TRG 2005
    assert best_allreduce(6, 64 * MIB, ALPHA, BETA)[0] == "ring"  # TRG 2005 with the paper's extra step


def test_bad_algorithm_and_arguments() -> None:
    with pytest.raises(ValueError, match=r"must be one of ring, recursive_doubling, rabenseifner; got 'rign'"):
        allreduce_time("rign", 4, MIB, ALPHA, BETA)
    with pytest.raises(ValueError, match="did you mean 'ring'"):
        allreduce_time("rign", 4, MIB, ALPHA, BETA)
    with pytest.raises(ValueError, match="`p`"):
        allreduce_time("ring", 0, MIB, ALPHA, BETA)
    with pytest.raises(ValueError, match="`beta`"):
        allreduce_time("ring", 4, MIB, ALPHA, -1.0)


# ------------------------------------------------------------------------------------------------------
# Fitting
# ------------------------------------------------------------------------------------------------------


def _synthetic(algorithm: str, p: int, alpha: float, beta: float, gamma: float, seed: int):
    sizes = np.repeat(np.geomspace(4, 64 * MIB, 24), 3)
    exact = np.array([allreduce_time(algorithm, p, n, alpha, beta, gamma) for n in sizes])
    noisy = exact * np.random.default_rng(seed).normal(1.0, 0.02, size=exact.shape)
    return sizes, exact, noisy


@pytest.mark.parametrize(("algorithm", "p"), [("ring", 8), ("rabenseifner", 6), ("recursive_doubling", 16)])
def test_fit_recovers_alpha_and_beta_from_noisy_timings(algorithm: str, p: int) -> None:
    alpha, beta, gamma = 5e-6, 1e-10, 2.5e-11
    sizes, _, noisy = _synthetic(algorithm, p, alpha, beta, gamma, seed=20240501)
    fit = fit_alpha_beta(p, sizes, noisy, algorithm=algorithm, gamma=gamma)
    assert isinstance(fit, Fit) and fit.algorithm == algorithm and fit.p == p
    assert fit.alpha == pytest.approx(alpha, rel=0.05)  # common practice: 2 % noise, ~70 points
    assert fit.beta == pytest.approx(beta, rel=0.05)  # common practice
    assert fit.r_squared > 0.99
    assert len(fit.relative_errors) == sizes.size
    assert fit.max_relative_error < 0.1  # 2 % noise: 5 standard deviations


def test_fit_is_exact_without_noise() -> None:
    sizes, exact, _ = _synthetic("ring", 4, 3e-6, 4e-11, 0.0, seed=0)
    fit = fit_alpha_beta(4, sizes, exact)
    assert fit.alpha == pytest.approx(3e-6, rel=1e-9)  # the model is its own source
    assert fit.beta == pytest.approx(4e-11, rel=1e-9)
    assert fit.r_squared == pytest.approx(1.0, abs=1e-12)
    assert fit.bandwidth_bytes_per_s == pytest.approx(25e9, rel=1e-9)


def test_fit_keeps_alpha_non_negative() -> None:
    # Ring on p = 8 (c_β = 1.75) with a negative intercept: an unconstrained fit would give α < 0.
    sizes = np.geomspace(1e5, 1e8, 12)
    times = 1.75e-10 * sizes - 1e-6
    assert fit_linear(sizes, times).intercept < 0.0  # the unconstrained line does go negative
    fit = fit_alpha_beta(8, sizes, times)
    assert fit.alpha == 0.0 and fit.beta > 0.0  # non-negative least squares, Lawson & Hanson 1974


def test_fit_refuses_one_process_and_degenerate_data() -> None:
    with pytest.raises(ValueError, match="p = 1"):
        fit_alpha_beta(1, [1e3, 1e6], [1e-6, 1e-4])
    with pytest.raises(ValueError, match="two distinct message sizes"):
        fit_alpha_beta(4, [1e3, 1e3], [1e-6, 1.1e-6])
    with pytest.raises(ValueError, match="equal length"):
        fit_alpha_beta(4, [1e3, 1e6], [1e-6])


def test_fit_linear_recovers_line() -> None:
    sizes = np.geomspace(8, 1e8, 30)
    noise = np.random.default_rng(7).normal(1.0, 0.02, size=sizes.shape)
    times = (4e-6 + 2e-10 * sizes) * noise
    line = fit_linear(sizes, times)
    assert line.intercept == pytest.approx(4e-6, rel=0.05)  # common practice
    assert line.slope == pytest.approx(2e-10, rel=0.05)  # common practice


# ------------------------------------------------------------------------------------------------------
# Network specs
# ------------------------------------------------------------------------------------------------------


@pytest.mark.parametrize(
    ("spec", "alpha", "beta"),
    [
        ("100Gb/s,2us", 2e-6, 8.0 / 100e9),  # from memory: 100 Gb/s = 12.5 GB/s
        ("10GB/s,500ns", 500e-9, 1e-10),
        ("800Mb/s, 1ms", 1e-3, 8.0 / 800e6),
        ("1.5e2MB/s,0.5s", 0.5, 1.0 / 150e6),
        ("2µs,25Gb/s", 2e-6, 8.0 / 25e9),
        (" 12.5 GB/s , 0us ", 0.0, 1.0 / 12.5e9),
    ],
)
def test_parse_network_good(spec: str, alpha: float, beta: float) -> None:
    parsed_alpha, parsed_beta = parse_network(spec)
    assert parsed_alpha == pytest.approx(alpha, rel=1e-12, abs=0.0)  # common practice: SI prefixes
    assert parsed_beta == pytest.approx(beta, rel=1e-12)  # common practice: 8 bits per byte


@pytest.mark.parametrize(
    ("spec", "named"),
    [
        ("100Gbps,2us", "100Gbps"),
        ("100gb/s,2us", "100gb/s"),
        ("fast", "fast"),
        ("100Gb/s", "100Gb/s"),
        ("100Gb/s,2us,3us", "100Gb/s,2us,3us"),
        ("2us,3us", "2us,3us"),
        ("-1Gb/s,2us", "-1Gb/s"),
        ("0Gb/s,2us", "0Gb/s,2us"),
        ("100Gb/s,2 minutes", "2 minutes"),
    ],
)
def test_parse_network_bad_names_the_value(spec: str, named: str) -> None:
    with pytest.raises(ValueError) as raised:
        parse_network(spec)
    message = str(raised.value)
    assert repr(named) in message
    assert "Gb/s, Mb/s, GB/s or MB/s" in message and "ns, us, ms or s" in message


# ------------------------------------------------------------------------------------------------------
# Projection
# ------------------------------------------------------------------------------------------------------

POWERS = [1, 2, 4, 8, 16, 32, 64, 128, 256, 512, 1024]


def test_project_strong_scaling_consistency() -> None:
    rows = project(0.5, 4 * MIB, POWERS + [6, 1000], ALPHA, BETA, gamma=2e-11, overlap=0.3)
    serial = rows[0]
    assert serial["p"] == 1 and serial["efficiency"] == 1.0 and serial["speedup"] == 1.0  # definition
    assert serial["allreduce_s"] == 0.0 and serial["algorithm"] == NO_COMMUNICATION
    for row in rows:
        p = row["p"]
        name, comm = best_allreduce(p, 4 * MIB, ALPHA, BETA, 2e-11)
        assert (row["algorithm"], row["allreduce_s"]) == (name, comm)
        assert row["compute_s"] == pytest.approx(0.5 / p, rel=1e-12)
        assert row["exposed_comm_s"] == pytest.approx(0.7 * comm, rel=1e-12)
        assert row["step_s"] == pytest.approx(row["compute_s"] + row["exposed_comm_s"], rel=1e-12)
        # Amdahl-style strong-scaling efficiency, common practice: T1 / (p·Tp)
        assert row["efficiency"] == pytest.approx(0.5 / (p * row["step_s"]), rel=1e-12)
        assert row["speedup"] == pytest.approx(0.5 / row["step_s"], rel=1e-12)
    efficiencies = [row["efficiency"] for row in rows[: len(POWERS)]]
    assert all(later < earlier for earlier, later in zip(efficiencies[:-1], efficiencies[1:], strict=True))


def test_project_one_row_by_hand() -> None:
    # p = 8, serial compute 0.08 s → 0.01 s per rank; 1 MiB by Rabenseifner = 1.955008e-4 s (above);
    # half hidden → exposed 9.77504e-5 s; step 1.00977504e-2 s; efficiency 0.08 / (8·step).
    (row,) = project(0.08, MIB, [8], ALPHA, BETA, overlap=0.5)
    assert row["algorithm"] == "rabenseifner"
    assert row["step_s"] == pytest.approx(1.00977504e-2, rel=1e-12)  # TRG 2005 cost, worked above
    assert row["efficiency"] == pytest.approx(0.08 / (8 * 1.00977504e-2), rel=1e-12)  # common practice


def test_project_weak_scaling_consistency() -> None:
    rows = project(0.02, 16 * MIB, POWERS, 5e-6, 8e-11, mode="weak")
    assert rows[0]["efficiency"] == 1.0  # definition
    for row in rows:
        assert row["compute_s"] == 0.02
        # Gustafson-style weak-scaling efficiency, common practice: T1 / Tp
        assert row["efficiency"] == pytest.approx(0.02 / row["step_s"], rel=1e-12)
        assert row["speedup"] == pytest.approx(row["p"] * row["efficiency"], rel=1e-12)


def test_project_full_overlap_and_bad_arguments() -> None:
    rows = project(1.0, 100 * MIB, [1, 64, 1024], ALPHA, BETA, overlap=1.0)
    assert [row["efficiency"] for row in rows] == pytest.approx([1.0, 1.0, 1.0], rel=1e-12)  # nothing exposed
    with pytest.raises(ValueError, match="`overlap`"):
        project(1.0, MIB, [2], ALPHA, BETA, overlap=1.5)
    with pytest.raises(ValueError, match="strong, weak; got 'strnog'"):
        project(1.0, MIB, [2], ALPHA, BETA, mode="strnog")
    with pytest.raises(ValueError, match="`ps`"):
        project(1.0, MIB, [4, 0], ALPHA, BETA)


def test_assumptions_are_sentences() -> None:
    assert len(ASSUMPTIONS) >= 5
    assert all(isinstance(line, str) and line.endswith(".") for line in ASSUMPTIONS)


# ------------------------------------------------------------------------------------------------------
# Measurement
# ------------------------------------------------------------------------------------------------------


def test_measure_reduction_gamma_is_plausible() -> None:
    gamma = measure_reduction_gamma(4 * MIB, repeats=5)
    # common practice: a CPU adds float32 arrays at somewhere between 100 MB/s and 10 TB/s.
    assert 1e-13 < gamma < 1e-8


@pytest.mark.mpi
def test_measure_allreduce_on_two_ranks(tmp_path: Path) -> None:
    script = tmp_path / "measure.py"
    script.write_text(
        textwrap.dedent(
            f"""
            import json
            from mpi4py import MPI
            from shardmill.scaling.measure import measure_allreduce

            world = MPI.COMM_WORLD
            results = measure_allreduce(world, [256, 64 * 1024, 4 * 1024 * 1024], repeats=5, warmup=1)
            with open({str(tmp_path)!r} + f"/rank{{world.Get_rank()}}.json", "w") as out:
                json.dump(results, out)
            """
        )
    )
    completed = run_mpi(2, [str(script)], timeout=60)
    assert completed.returncode == 0, completed.stdout + completed.stderr
    per_rank = [json.loads((tmp_path / f"rank{rank}.json").read_text()) for rank in (0, 1)]
    results = per_rank[0]
    assert [row["n_bytes"] for row in results] == [256, 64 * 1024, 4 * 1024 * 1024]
    for row in results:
        assert row["p"] == 2 and row["count"] == row["n_bytes"] // 4 and len(row["times_s"]) == 5
        assert 0.0 < row["min_s"] <= row["median_s"] and math.isfinite(row["median_s"])
    # The slowest rank's time is agreed by a MAX allreduce, so both ranks report the same numbers.
    assert per_rank[0] == per_rank[1]
    # Lenient on a noisy 2-core machine: 4 MiB must take longer than 256 bytes.
    assert results[-1]["median_s"] > results[0]["median_s"]  # TRG 2005: time grows with n·β


def test_replicated_update_is_not_divided_by_p() -> None:
    # Amdahl 1967: with a serial fraction s of T1 the strong-scaling time is T1·(s + (1 − s)/p).
    from shardmill.scaling.costmodel import project

    rows = project(1.0, 0.0, [1, 4], alpha=0.0, beta=0.0, replicated_s=0.2)
    assert rows[0]["step_s"] == pytest.approx(1.0)
    assert rows[1]["step_s"] == pytest.approx(0.2 + 0.8 / 4)
    assert rows[1]["efficiency"] == pytest.approx(1.0 / (4 * 0.4))
