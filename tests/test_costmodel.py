"""Tests of the collective cost model against the formulas of Thakur, Rabenseifner & Gropp 2005.

Shorthand in the comments: TRG 2005 = Thakur, Rabenseifner & Gropp, "Optimization of Collective
Communication Operations in MPICH", IJHPCA 19(1), 2005 (allreduce, reduce-scatter and allgather sections).
The worked numbers use n = 1 MiB = 1 048 576 bytes, α = 2 µs, β = 1/(10 GB/s) = 1e-10 s/byte, so
n·β = 1.048576e-4 s.
"""

from __future__ import annotations

import json
import math
import subprocess
import sys
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
    COMPACT_SCALE_BLOCK,
    NO_COMMUNICATION,
    Collective,
    allgather_time,
    allreduce_time,
    best_allreduce,
    best_collective,
    parse_network,
    project,
    project_step,
    reduce_scatter_time,
    step_collectives,
)
from shardmill.scaling.fitting import Fit, fit_alpha_beta
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


# Process counts, message sizes and α, β, γ of any network worth projecting to (the property tests' inputs)
NETWORKS = dict(
    p=st.integers(min_value=2, max_value=1024),
    n_bytes=st.floats(min_value=0.0, max_value=1e10),
    alpha=st.floats(min_value=0.0, max_value=1e-3),
    beta=st.floats(min_value=0.0, max_value=1e-8),
    gamma=st.floats(min_value=0.0, max_value=1e-8),
)


@settings(max_examples=200, deadline=None)
@given(**NETWORKS)
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
    assert np.polyfit(sizes, times, 1)[1] < 0.0  # the unconstrained line does go negative
    fit = fit_alpha_beta(8, sizes, times)
    assert fit.alpha == 0.0 and fit.beta > 0.0  # non-negative least squares, Lawson & Hanson 1974


def test_fit_refuses_one_process_and_degenerate_data() -> None:
    with pytest.raises(ValueError, match="p = 1"):
        fit_alpha_beta(1, [1e3, 1e6], [1e-6, 1e-4])
    with pytest.raises(ValueError, match="two distinct message sizes"):
        fit_alpha_beta(4, [1e3, 1e3], [1e-6, 1.1e-6])
    with pytest.raises(ValueError, match="equal length"):
        fit_alpha_beta(4, [1e3, 1e6], [1e-6])


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


# ------------------------------------------------------------------------------------------------------
# Reduce-scatter and allgather, worked by hand; the sharded step
# ------------------------------------------------------------------------------------------------------

GAMMA = 5e-11  # n·γ = 5.24288e-5 s


def test_reduce_scatter_by_hand() -> None:
    # p = 8: ring (p−1)α + (7/8)nβ + (7/8)nγ = 1.4e-5 + 9.17504e-5 + 4.58752e-5 = 1.516256e-4 s
    assert reduce_scatter_time("ring", 8, MIB, ALPHA, BETA, GAMMA) == pytest.approx(
        1.516256e-4, rel=1e-12
    )  # TRG 2005, reduce-scatter: pairwise exchange / ring, (p−1)α + ((p−1)/p)nβ + ((p−1)/p)nγ
    # recursive halving: lg p·α + (7/8)nβ + (7/8)nγ = 6e-6 + 9.17504e-5 + 4.58752e-5 = 1.436256e-4 s
    assert reduce_scatter_time("recursive_halving", 8, MIB, ALPHA, BETA, GAMMA) == pytest.approx(
        1.436256e-4, rel=1e-12
    )  # TRG 2005, reduce-scatter by recursive halving, p a power of two
    # p = 6, p' = 4: (⌊lg 6⌋ + 2)α + 2nβ + (1 + 3/4)nγ = 8e-6 + 2.097152e-4 + 9.17504e-5 = 3.094656e-4 s
    assert reduce_scatter_time("recursive_halving", 6, MIB, ALPHA, BETA, GAMMA) == pytest.approx(
        3.094656e-4, rel=1e-12
    )  # TRG 2005, recursive halving for p not a power of two (from memory, as the allreduce test above)
    # ring at p = 6: 5α + (5/6)nβ + (5/6)nγ = 1e-5 + 8.738133…e-5 + 4.369066…e-5
    assert reduce_scatter_time("ring", 6, MIB, ALPHA, BETA, GAMMA) == pytest.approx(
        1e-5 + 5 / 6 * N_BETA + 5 / 6 * MIB * GAMMA, rel=1e-12
    )  # TRG 2005


def test_allgather_by_hand() -> None:
    # p = 8: ring 7α + (7/8)nβ = 1.057504e-4 s; Bruck ⌈lg 8⌉α + (7/8)nβ = 9.77504e-5 s; nothing is reduced.
    assert allgather_time("ring", 8, MIB, ALPHA, BETA) == pytest.approx(1.057504e-4, rel=1e-12)  # TRG 2005
    assert allgather_time("bruck", 8, MIB, ALPHA, BETA) == pytest.approx(9.77504e-5, rel=1e-12)  # TRG 2005
    # p = 6: Bruck works for any p, ⌈lg 6⌉ = 3 steps: 6e-6 + (5/6)nβ.
    assert allgather_time("bruck", 6, MIB, ALPHA, BETA) == pytest.approx(6e-6 + 5 / 6 * N_BETA, rel=1e-12)  # TRG 2005
    assert best_collective("allgather", 8, MIB, ALPHA, BETA, GAMMA) == ("bruck", pytest.approx(9.77504e-5))


def test_best_reduce_scatter_switches_with_size_at_odd_p() -> None:
    # TRG 2005: recursive halving for short messages, pairwise exchange (priced as the ring) for long ones; at
    # p = 6 the ring's 5α lose to recursive halving's 4α on 256 bytes, its (5/6)nβ beat 2nβ on 1 MiB.
    assert best_collective("reduce_scatter", 6, 256, ALPHA, BETA)[0] == "recursive_halving"
    assert best_collective("reduce_scatter", 6, MIB, ALPHA, BETA)[0] == "ring"
    assert best_collective("reduce_scatter", 1, MIB, ALPHA, BETA) == (NO_COMMUNICATION, 0.0)  # nothing is sent


@settings(max_examples=200, deadline=None)
@given(**NETWORKS)
def test_reduce_scatter_then_allgather_is_an_allreduce(
    p: int, n_bytes: float, alpha: float, beta: float, gamma: float
) -> None:
    # TRG 2005: the ring allreduce is a ring reduce-scatter followed by a ring allgather (any p).
    ring = reduce_scatter_time("ring", p, n_bytes, alpha, beta, gamma) + allgather_time("ring", p, n_bytes, alpha, beta)
    assert ring == pytest.approx(allreduce_time("ring", p, n_bytes, alpha, beta, gamma), rel=1e-12, abs=1e-300)
    if p & (p - 1) == 0:
        # TRG 2005: Rabenseifner's allreduce is recursive halving then recursive doubling (Bruck's cost at 2^k).
        halves = (reduce_scatter_time("recursive_halving", p, n_bytes, alpha, beta, gamma)
                  + allgather_time("bruck", p, n_bytes, alpha, beta))
        assert halves == pytest.approx(allreduce_time("rabenseifner", p, n_bytes, alpha, beta, gamma), rel=1e-12,
                                       abs=1e-300)
    # common practice: each rank must receive the other ranks' (p−1)/p of the vector, so no algorithm's β term
    # is below ((p−1)/p)·nβ.
    for kind, names in (("reduce_scatter", ("ring", "recursive_halving")), ("allgather", ("ring", "bruck"))):
        for name in names:
            bandwidth = (reduce_scatter_time(name, p, n_bytes, 0.0, beta) if kind == "reduce_scatter"
                         else allgather_time(name, p, n_bytes, 0.0, beta))
            assert bandwidth >= (p - 1) / p * n_bytes * beta * (1 - 1e-12)


def test_step_collectives_bytes() -> None:
    n = 1000
    # Plain data parallelism sends one allreduce of the gradient. common practice
    assert step_collectives("replicated", "fast", n, 4) == (Collective("allreduce", 4000.0),)
    # Sharded: reduce-scatter the gradient, allgather the parameters, the same bytes each. common practice
    assert step_collectives("sharded", "fast", n, 4) == (Collective("reduce_scatter", 4000.0),
                                                         Collective("allgather", 4000.0))
    # Exact, wide: three int64 limbs per value (kernels/exactsum.py), one reduce-scatter call per limb row — 24 bytes
    # per parameter — then the float gradient (replicated) or parameters (sharded) are allgathered.
    for update in ("replicated", "sharded"):
        scatter, gather = step_collectives(update, "exact", n, 8)
        assert (scatter.kind, scatter.n_bytes * scatter.calls, scatter.calls) == ("reduce_scatter", 24 * n, 3)
        assert gather == Collective("allgather", 8000.0)
    # Exact, compact: one int64 per value, after a MAX allreduce of one float64 per block of 256 values.
    scales, scatter, gather = step_collectives("sharded", "exact", n, 4, exact_format="compact")
    assert scales == Collective("allreduce", 4 * 8.0)  # ⌈1000 / 256⌉ = 4 blocks
    assert scatter == Collective("reduce_scatter", 8000.0) and gather == Collective("allgather", 4000.0)
    with pytest.raises(ValueError, match=r"`update` must be one of replicated, sharded; got 'shraded'"):
        step_collectives("shraded", "fast", n, 4)


def test_compact_scale_block_is_the_exchange_block() -> None:
    from shardmill.parallel.ownership import BLOCK

    assert COMPACT_SCALE_BLOCK == BLOCK  # the model must count the scales the exchange agrees on


def test_sharded_update_divides_by_p() -> None:
    # Amdahl 1967: the replicated update is a serial fraction, T = 0.2 + 0.8/p; sharded, nothing is serial.
    replicated = project_step(1.0, (), [1, 4], 0.0, 0.0, update="replicated", update_s=0.2)
    sharded = project_step(1.0, (), [1, 4], 0.0, 0.0, update="sharded", update_s=0.2)
    assert replicated[1]["step_s"] == pytest.approx(0.2 + 0.8 / 4, rel=1e-12)
    assert sharded[1]["step_s"] == pytest.approx(1.0 / 4, rel=1e-12)
    assert sharded[1]["update_s"] == pytest.approx(0.2 / 4, rel=1e-12) and replicated[1]["update_s"] == 0.2
    assert sharded[1]["efficiency"] == pytest.approx(1.0, rel=1e-12)  # Grama 2003: T1/(p·Tp)
    # Weak scaling: per-rank forward and backward stay, the sharded update still shrinks: 0.8 + 0.2/4.
    weak = project_step(1.0, (), [4], 0.0, 0.0, mode="weak", update="sharded", update_s=0.2)
    assert weak[0]["compute_s"] == pytest.approx(0.85, rel=1e-12)
    assert weak[0]["efficiency"] == pytest.approx(1.0 / 0.85, rel=1e-12)  # Gustafson 1988: T1/Tp
    with pytest.raises(ValueError, match="`update_s`"):
        project_step(1.0, (), [2], 0.0, 0.0, update="sharded", update_s=2.0)


def test_sharded_and_exact_steps_by_hand() -> None:
    # p = 8, a 1 MiB float32 gradient (2^18 parameters), α = 2 µs, β = 1e-10 s/B, γ = 0.
    n_params = MIB // 4
    # Sharded fast: recursive halving 9.77504e-5 + Bruck 9.77504e-5 = 1.955008e-4 s, Rabenseifner's allreduce.
    (row,) = project_step(0.08, step_collectives("sharded", "fast", n_params, 4), [8], ALPHA, BETA,
                          update="sharded", update_s=0.008)
    assert row["comm_s"] == pytest.approx(1.955008e-4, rel=1e-12)  # TRG 2005, worked above
    assert row["algorithm"] == "recursive_halving+bruck"
    assert row["step_s"] == pytest.approx(0.01 + 1.955008e-4, rel=1e-12)  # 0.08/8, the update included
    # Exact wide: 3 reduce-scatters of 2 MiB (3α + (7/8)·2nβ = 1.895008e-4 s each) + Bruck allgather of 1 MiB.
    (row,) = project_step(0.08, step_collectives("replicated", "exact", n_params, 4), [8], ALPHA, BETA,
                          update="replicated", update_s=0.008)
    assert row["comm_s"] == pytest.approx(3 * 1.895008e-4 + 9.77504e-5, rel=1e-12)  # TRG 2005
    assert row["step_s"] == pytest.approx(0.072 / 8 + 0.008 + 6.662528e-4, rel=1e-12)  # update repeated
    # Exact compact: MAX allreduce of 1024 float64 (8 KiB, recursive doubling 3α + 3·8192β = 8.4576e-6 s),
    # one 2 MiB reduce-scatter, the 1 MiB allgather.
    (row,) = project_step(0.08, step_collectives("sharded", "exact", n_params, 4, "compact"), [8], ALPHA, BETA,
                          update="sharded", update_s=0.008)
    assert row["comm_s"] == pytest.approx(8.4576e-6 + 1.895008e-4 + 9.77504e-5, rel=1e-12)  # TRG 2005
    assert [entry["algorithm"] for entry in row["comm"]] == ["recursive_doubling", "recursive_halving", "bruck"]


def test_project_keeps_its_replicated_rows() -> None:
    # project is project_step with one allreduce: the same numbers, and allreduce_s = comm_s.
    old = project(0.5, 4 * MIB, [1, 2, 6, 64], ALPHA, BETA, 2e-11, overlap=0.25, replicated_s=0.1)
    new = project_step(0.5, (Collective("allreduce", 4 * MIB),), [1, 2, 6, 64], ALPHA, BETA, 2e-11, overlap=0.25,
                       update_s=0.1)
    for a, b in zip(old, new, strict=True):
        assert a["step_s"] == b["step_s"] and a["allreduce_s"] == b["comm_s"] and a["algorithm"] == b["algorithm"]
        assert a["allreduce_s"] == best_allreduce(a["p"], 4 * MIB, ALPHA, BETA, 2e-11)[1]  # TRG 2005


@settings(max_examples=40, deadline=None)
@given(seed=st.integers(min_value=0, max_value=2**32 - 1), columns=st.integers(min_value=1, max_value=3))
def test_non_negative_fit_matches_scipy_nnls(seed, columns):
    from scipy.optimize import nnls  # Lawson & Hanson's active-set NNLS, as SciPy ships it
    from shardmill.scaling.fitting import _non_negative_least_squares

    rng = np.random.default_rng(seed)
    A = rng.standard_normal((8, columns))
    b = rng.standard_normal(8)
    ours = _non_negative_least_squares(A, b)
    reference, _ = nnls(A, b)
    assert np.all(ours >= 0.0)
    assert np.linalg.norm(A @ ours - b) == pytest.approx(np.linalg.norm(A @ reference - b), rel=1e-9, abs=1e-12)


def test_the_fit_needs_no_scipy():
    # `shardmill scale` after the quickstart install (no test extra): the cost model must not import SciPy.
    # A None entry in sys.modules makes every `import scipy…` fail (Python's import system), as without SciPy.
    code = ("import sys\nfor name in ('scipy', 'scipy.optimize'):\n    sys.modules[name] = None\n"
            "from shardmill.scaling import fitting\n"
            "fit = fitting.fit_alpha_beta(2, [1e3, 1e5, 1e7], [1e-5, 2e-5, 1e-3])\n"
            "assert fit.alpha >= 0 and fit.beta >= 0\n")
    done = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True, timeout=60)
    assert done.returncode == 0, done.stderr
