"""`shardmill scale --layouts`: ranks × threads layouts of one job timed side by side, the best one named."""

from __future__ import annotations

import json
import re

import pytest
from helpers import make_classification, run_cli, write_job
from shardmill.errors import JobError
from shardmill.scaling.layouts import compare_layouts, layout_row, parse_layouts


def test_layouts_are_parsed_or_refused_in_one_line() -> None:
    assert parse_layouts("1x2, 2x1,1×1,1x2") == [(1, 2), (2, 1), (1, 1)]
    for bad in ("1x", "0x2", "2", "1x2,x"):
        with pytest.raises(JobError, match="`--layouts` must be comma-separated PxT pairs"):
            parse_layouts(bad)


def record(P: int, wall: float) -> dict:
    return {"global_batch": 64, "steps": 10, "ranks": [{"wall_s": wall - 0.01 * r, "rss_bytes": (100 + r) * 2**20}
                                                       for r in range(P)]}


def test_rows_efficiency_and_recommendation_by_hand(tmp_path) -> None:
    from shardmill.config import job_from_dict

    job = job_from_dict({"model": {"layers": [4, 8, 2]}, "run": {"global_batch": 64}})
    walls = {(1, 1): 1.0, (1, 2): 0.55, (2, 1): 0.6}
    result = compare_layouts(job, list(walls), 10, tmp_path, lambda P, T, tag: record(P, walls[(P, T)]))
    rows = {row["layout"]: row for row in result["layouts"]}
    assert rows["1x1"]["samples_per_s"] == pytest.approx(640.0)  # G · steps / slowest wall: 64 · 10 / 1.0
    assert rows["1x2"]["efficiency_per_core"] == pytest.approx((640 / 0.55) / (2 * 640))  # speedup / cores
    assert rows["2x1"]["resident_mib_per_node"] == pytest.approx(201.0) and rows["2x1"]["resident_mib_per_rank"] == 101
    assert result["best"] == "1x2" and "--ntasks-per-node=1 --cpus-per-task=2" in result["recommendation"]
    assert json.loads((tmp_path / "layouts.json").read_text())["best"] == "1x2"
    assert layout_row(1, 1, record(1, 2.0))["step_ms"] == pytest.approx(200.0)


@pytest.mark.mpi
def test_scale_layouts_runs_each_layout_and_names_the_best(tmp_path) -> None:
    make_classification(tmp_path, rows=240, features=6, classes=3, seed=0)
    job = write_job(tmp_path, {"layers": [6, 16, 3], "activation": "tanh"}, {"global_batch": 32, "epochs": 1})
    out = tmp_path / "out"
    done = run_cli(["scale", str(job), "--layouts", "1x1,1x2,2x1", "--project-nodes", "1,4,32", "--steps", "3",
                    "--out-dir", str(out), "--no-progress"], timeout=150)
    assert done.returncode == 0, done.stderr + done.stdout
    result = json.loads((out / "layouts.json").read_text())
    assert [row["layout"] for row in result["layouts"]] == ["1x1", "1x2", "2x1"]
    assert all(row["samples_per_s"] > 0 and row["resident_mib_per_rank"] > 10 for row in result["layouts"])
    assert all(row["other_load"] is None or 0.0 <= row["other_load"] <= 1.0 for row in result["layouts"])
    assert result["best"] in {"1x1", "1x2", "2x1"} and f"best layout {result['best']}" in done.stdout
    assert {(out / "runs" / f"{tag}.json").is_file() for tag in ("p1t1", "p1t2", "p2t1")} == {True}
    assert all(json.loads((out / "runs" / f"{tag}.json").read_text())["ranks"][0]["gemm_floor_s"] > 0
               for tag in ("p1t1", "p1t2"))
    # the projection: every layout at every node count, R = N·P ranks, priced on the network fitted at P = 2
    projection = result["projection"]
    assert projection["available"] and projection["nodes"] == [1, 4, 32]
    assert projection["network"]["name"] == "measured (fit at P=2)"
    assert set(projection["fit"]["parts"]) == {"gemm", "other", "update"}
    assert not any(text.startswith("One rank per core") for text in projection["assumptions"])
    assert any("intra-node and inter-node messages cost the same" in text.lower()
               for text in projection["assumptions"])
    rows = {(row["layout"], row["nodes"]): row for row in projection["rows"]}
    assert set(rows) == {(layout, n) for layout in ("1x1", "1x2", "2x1") for n in (1, 4, 32)}
    for (layout, n), row in rows.items():
        assert row["layout"] == layout and row["ranks"] == n * row["processes"]
        assert row["cores"] == row["ranks"] * row["threads"]
        assert row["step_s"] == pytest.approx(row["compute_s"] + row["comm_s"], rel=1e-12)
        assert row["samples_per_s"] == pytest.approx(32 / row["step_s"], rel=1e-12)  # G / step
        assert (row["comm_s"] == 0.0) == (row["ranks"] == 1)  # one rank sends nothing (TRG 2005)
        assert ("measured_step_s" in row) == (n == 1)
    assert rows[("1x1", 1)]["efficiency_per_core"] == pytest.approx(1.0)
    assert set(projection["best"]) == {"1", "4", "32"}
    best = projection["best"]["32"]
    assert f"projected to 32 nodes the best is {best}" in result["recommendation"]
    assert "projected to more nodes (strong scaling, G = 32" in done.stdout
    assert f"best per node count: 1: {projection['best']['1']}, 4: {projection['best']['4']}, 32: {best}" \
        in done.stdout
    table = [line.split() for line in done.stdout.splitlines()]
    assert ["32", "2x1", "64"] in [line[:3] for line in table]  # nodes, layout, ranks


def test_project_nodes_is_refused_before_any_run(tmp_path) -> None:
    make_classification(tmp_path, rows=64, features=4, classes=2, seed=0)
    job = write_job(tmp_path, {"layers": [4, 8, 2]}, {"global_batch": 16, "epochs": 1})
    for extra, words in ((["--layouts", "1x2,2x1"], "`--layouts` must hold two or more 1xT with distinct T"),
                         ([], "`--project-nodes` projects the layouts of `--layouts`, which was not given")):
        done = run_cli(["scale", str(job), *extra, "--project-nodes", "1,8", "--out-dir", str(tmp_path / "out"),
                        "--no-progress"], timeout=60)
        assert done.returncode == 2 and words in done.stderr, done.stderr
        assert not (tmp_path / "out").exists()


# ---- The threaded compute term and the projection of layouts to many nodes (scaling/layoutmodel.py) ----
# Amdahl 1967 = G. M. Amdahl, "Validity of the single processor approach to achieving large scale computing
# capabilities", AFIPS Spring Joint Computer Conference, 1967.

from shardmill.config import job_from_dict  # noqa: E402
from shardmill.scaling.costmodel import Collective, project_step  # noqa: E402
from shardmill.scaling.layoutmodel import (  # noqa: E402
    ThreadedCompute,
    amdahl_speedup,
    best_per_node_count,
    check_fittable,
    effective_threads,
    fit_layouts,
    fit_threaded_compute,
    project_layouts,
)


@pytest.mark.parametrize("f", [0.0, 0.05, 0.3, 1.0])
@pytest.mark.parametrize("T", [1, 2, 3, 8, 64])
def test_amdahl_speedup_is_the_published_formula(f, T) -> None:
    # Amdahl 1967 (the law as usually written): S(N) = 1 / ((1 − P) + P/N), P the parallel fraction
    assert amdahl_speedup(f, T) == pytest.approx(1.0 / ((1.0 - (1.0 - f)) + (1.0 - f) / T), rel=1e-15)
    # Amdahl 1967: the limit of many processors is 1 / serial fraction; S(1) = 1
    assert amdahl_speedup(f, 1) == pytest.approx(1.0)
    if f > 0:
        assert amdahl_speedup(f, 1e12) == pytest.approx(1.0 / f, rel=1e-9)


def test_the_fitted_term_speeds_up_as_amdahl_says() -> None:
    compute = ThreadedCompute(parts={"gemm": (0.01, 0.09), "other": (0.02, 0.03), "update": (0.005, 0.0)},
                              threads=(1, 2), measured_s=(0.155, 0.095), relative_errors=(0.0, 0.0))
    f = compute.serial_fraction
    assert f == pytest.approx(0.035 / 0.155)
    for T in (2, 4, 16):
        # Amdahl 1967: compute(1) / compute(T) = 1 / (f + (1 − f)/T)
        assert compute.seconds(1) / compute.seconds(T) == pytest.approx(amdahl_speedup(f, T), rel=1e-12)


def exact_timings(parts: dict[str, tuple[float, float]], threads: list[int]) -> dict[str, list[float]]:
    return {name: [s + q / T for T in threads] for name, (s, q) in parts.items()}


@pytest.mark.parametrize("threads", [[1, 2], [1, 2, 4], [2, 3, 6, 8], [1, 1, 2]])
def test_the_fit_recovers_known_serial_and_parallel_parts(threads) -> None:
    truth = {"gemm": (0.004, 0.12), "other": (0.013, 0.021), "update": (0.003, 0.0)}
    fit = fit_threaded_compute(threads, exact_timings(truth, threads))
    for name, (s, q) in truth.items():
        # exact timings of s + q/T (Amdahl 1967) give back s and q
        assert fit.parts[name] == pytest.approx((s, q), rel=1e-9, abs=1e-12)
    assert max(abs(e) for e in fit.relative_errors) < 1e-9


def test_the_fit_keeps_both_terms_non_negative() -> None:
    # slower on two threads: the best non-negative term is a constant (no part divides), common practice
    fit = fit_threaded_compute([1, 2], {"other": [0.10, 0.12]})
    serial, parallel = fit.parts["other"]
    assert parallel == 0.0 and 0.10 <= serial <= 0.12
    # least squares in relative residuals, d/ds Σ ((s − tᵢ)/tᵢ)² = 0: s = Σ 1/tᵢ / Σ 1/tᵢ² (common practice)
    assert serial == pytest.approx((1 / 0.10 + 1 / 0.12) / (1 / 0.10**2 + 1 / 0.12**2), rel=1e-9)


@pytest.mark.parametrize("threads, parts, words", [
    ([1, 1], {"other": [0.1, 0.1]}, "`threads` must hold at least two distinct thread counts"),
    ([0, 2], {"other": [0.1, 0.1]}, "`threads` must be whole numbers of threads >= 1"),
    ([1, 2], {"other": [0.1]}, "`parts['other']` must be 2 finite seconds >= 0"),
    ([1, 2], {"other": [0.1, -0.1]}, "`parts['other']` must be 2 finite seconds >= 0"),
    ([1, 2], {"other": [0.0, 0.0]}, "must be > 0 seconds at every point"),
    ([1, 2], {}, "`parts` must name at least one part"),
])
def test_the_fit_refuses_bad_input_in_one_line(threads, parts, words) -> None:
    with pytest.raises(ValueError, match=re.escape(words)):
        fit_threaded_compute(threads, parts)


def test_projecting_needs_two_single_process_layouts() -> None:
    check_fittable([(1, 1), (1, 2), (2, 1)])
    with pytest.raises(JobError, match=r"`--layouts` must hold two or more 1xT with distinct T.*got '1x2,2x1'"):
        check_fittable([(1, 2), (2, 1)])


COMPUTE = ThreadedCompute(parts={"gemm": (0.002, 0.06), "other": (0.01, 0.02), "update": (0.004, 0.0)},
                          threads=(1, 2), measured_s=(0.096, 0.056), relative_errors=(0.0, 0.0))
ALPHA, BETA, GAMMA = 2e-6, 1e-10, 2e-11


@pytest.mark.parametrize("update", ["replicated", "sharded"])
def test_one_node_of_one_process_is_its_own_compute(update) -> None:
    collectives = (Collective("allreduce", 4e6),)
    rows = project_layouts(COMPUTE, [(1, 1), (1, 2), (1, 4)], [1], 256, collectives, ALPHA, BETA, GAMMA, update)
    for row in rows:
        # R = 1 sends nothing (TRG 2005: p = 1 costs 0); the step is compute(T) = serial + parallel/T (Amdahl 1967)
        T = row["threads"]
        expected = sum(s + q / T for s, q in COMPUTE.parts.values())
        assert row["comm_s"] == 0.0 and row["step_s"] == pytest.approx(expected, rel=1e-12)
        assert row["samples_per_s"] == pytest.approx(256 / expected)
    assert [row["extrapolated"] for row in rows] == [False, False, True]
    # the fitted 1×1 is the baseline of the efficiency per core: exactly 1 there (definition, common practice)
    assert rows[0]["efficiency_per_core"] == pytest.approx(1.0)


@pytest.mark.parametrize("update", ["replicated", "sharded"])
def test_one_thread_per_rank_is_project_step(update) -> None:
    collectives = (Collective("reduce_scatter", 4e6), Collective("allgather", 4e6)) if update == "sharded" \
        else (Collective("allreduce", 4e6),)
    rows = project_layouts(COMPUTE, [(1, 1), (2, 1), (4, 1)], [1, 3, 16], 512, collectives, ALPHA, BETA, GAMMA,
                           update)
    for row in rows:
        R = row["ranks"]
        (expected,) = project_step(COMPUTE.seconds(1), collectives, [R], ALPHA, BETA, GAMMA, update=update,
                                   update_s=COMPUTE.part_s("update", 1))
        assert R == row["nodes"] * row["processes"]
        assert row["step_s"] == pytest.approx(expected["step_s"], rel=1e-12)
        assert row["comm_s"] == pytest.approx(expected["comm_s"], rel=1e-12)
        # strong scaling: efficiency = T1 / (p·Tp) (Grama et al. 2003, ch. 5) with one thread per core
        assert row["efficiency_per_core"] == pytest.approx(expected["efficiency"], rel=1e-12)


def test_threads_a_rank_cannot_use_are_not_counted() -> None:
    rows = project_layouts(COMPUTE, [(1, 2)], [1, 64], 256, (Collective("allreduce", 4e6),), ALPHA, BETA, GAMMA,
                           "replicated", threads_used=lambda T, R: T if R < 8 else 1)
    assert [row["threads_used"] for row in rows] == [2, 1]
    assert rows[1]["compute_s"] == pytest.approx(COMPUTE.seconds(1) / 64 + 0.004 * (1 - 1 / 64))
    assert rows[1]["cores"] == 128  # the cores are held even when idle
    assert best_per_node_count(rows + [dict(rows[1], layout="2x1", samples_per_s=1e12)]) == {"1": "1x2", "64": "2x1"}


def worker_record(T: int, seconds: dict[str, float], steps: int = 4, gemm: float = 0.0) -> dict:
    phases = {"data": seconds["data"], "forward": seconds["forward"], "backward": seconds["backward"],
              "exchange": 0.0, "update": seconds["update"]}
    return {"p": 1, "threads": T, "steps": steps, "reduction": "fast",
            "ranks": [{"phase_s": {k: v * steps for k, v in phases.items()}, "gemm_floor_s": gemm}]}


def test_the_layouts_fit_splits_the_gemms_from_the_rest() -> None:
    job = job_from_dict({"model": {"layers": [512, 512, 10]}, "run": {"global_batch": 1024}})
    truth = {"gemm": (0.002, 0.04), "other": (0.006, 0.012), "update": (0.001, 0.002)}
    raws = {}
    for T in (1, 2):
        gemm, other, update = (s + q / T for s, q in truth.values())
        raws[(1, T)] = worker_record(T, {"data": 0.3 * other, "forward": 0.5 * (gemm + 0.7 * other),
                                         "backward": 0.5 * (gemm + 0.7 * other), "update": update}, gemm=gemm)
    fit = fit_layouts(job, raws)
    for name, (s, q) in truth.items():
        assert fit.parts[name] == pytest.approx((s, q), rel=1e-9, abs=1e-12)  # Amdahl 1967, as above


def test_a_model_too_small_for_threads_is_fitted_as_constants() -> None:
    job = job_from_dict({"model": {"layers": [4, 8, 2]}, "run": {"global_batch": 64}})
    seconds = {"data": 1e-5, "forward": 2e-5, "backward": 3e-5, "update": 1e-5}
    fit = fit_layouts(job, {(1, 1): worker_record(1, seconds), (1, 2): worker_record(2, seconds)})
    assert fit.threads == (1, 1) and all(q == 0.0 for _, q in fit.parts.values())
    assert fit.seconds(1) == pytest.approx(7e-5)


def test_the_table_warns_when_the_fit_misses_a_measured_layout() -> None:
    from shardmill.scaling.layouts import FIT_ERROR_LIMIT, projection_lines

    row = {"nodes": 1, "layout": "1x1", "ranks": 1, "step_s": 0.01, "samples_per_s": 100.0,
           "efficiency_per_core": 1.0, "extrapolated": False}
    for error, warned in ((0.5 * FIT_ERROR_LIMIT, False), (2 * FIT_ERROR_LIMIT, True)):
        projection = {"available": True, "global_batch": 1, "network": {"name": "given"}, "rows": [row],
                      "best": {"1": "1x1"}, "fit": {"serial_fraction": 0.2, "points": [{"relative_error": -error}]}}
        lines = projection_lines(projection)
        assert lines[2].split() == ["1", "1x1", "1", "10.00", "100", "1.000"]
        assert any(line.startswith("warning: the threaded compute term misses") for line in lines) == warned
    assert projection_lines({"available": False, "reason": "why"}) == ["no projection to many nodes: why"]


def test_project_nodes_are_read_as_node_counts() -> None:
    from shardmill.scaling.driver import project_nodes

    assert project_nodes(None, [(1, 2), (2, 1)]) == [1, 2, 4, 16, 64] and project_nodes(None, None) is None
    assert project_nodes("64,1,4", [(1, 1), (1, 2)]) == [1, 4, 64]
    with pytest.raises(JobError, match=r"`--project-nodes` must be comma-separated node counts ≥ 1 like 1,2,4; got"):
        project_nodes("0,2", [(1, 1), (1, 2)])


def test_rows_with_more_ranks_than_rows_are_marked_and_never_best() -> None:
    """A rank needs at least one row of the global batch (data parallelism splits the batch's rows, common
    practice): at 64 nodes of 2×1 (128 ranks) a batch of 100 rows cannot run, so it is marked and not chosen."""
    from shardmill.scaling.layouts import projection_lines

    rows = project_layouts(COMPUTE, [(1, 1), (2, 1)], [1, 64], 100, (Collective("allreduce", 4e6),), ALPHA, BETA,
                           GAMMA, "replicated")
    runnable = {(row["layout"], row["nodes"]): row["runnable"] for row in rows}
    assert runnable == {("1x1", 1): True, ("1x1", 64): True, ("2x1", 1): True, ("2x1", 64): False}
    best = best_per_node_count(rows)
    assert best["64"] == "1x1"
    fit = {"serial_fraction": 0.2, "points": [{"relative_error": 0.0}]}
    lines = projection_lines({"available": True, "global_batch": 100, "network": {"name": "given"}, "rows": rows,
                              "best": best, "fit": fit})
    marked = [line for line in lines if line.split()[:2] == ["64", "2x1"]]
    assert len(marked) == 1 and marked[0].endswith("!")


def test_exact_mode_lanes_are_capped_by_the_chunks_of_a_rank() -> None:
    """Exact mode's threads take whole chunks (run.exact_chunk rows each): 256 rows in chunks of 32 are 8 chunks,
    so 4 ranks hold 2 each and a fourth lane would have nothing to take."""
    job = job_from_dict({"model": {"layers": [8, 16, 2]},
                         "run": {"global_batch": 256, "reduction": "exact", "exact_chunk": 32}})
    assert [effective_threads(job, 4, R) for R in (1, 2, 4, 8, 16)] == [4, 4, 2, 1, 1]


def test_the_fit_without_two_single_process_layouts_says_so() -> None:
    job = job_from_dict({"model": {"layers": [4, 8, 2]}, "run": {"global_batch": 64}})
    seconds = {"data": 1e-5, "forward": 2e-5, "backward": 3e-5, "update": 1e-5}
    with pytest.raises(ValueError, match=r"two or more measured layouts of one process.*got '1x2'"):
        fit_layouts(job, {(1, 2): worker_record(2, seconds)})


def test_the_table_warns_when_other_processes_took_the_cores(tmp_path) -> None:
    from shardmill.config import job_from_dict
    from shardmill.scaling.layouts import OTHER_LOAD_LIMIT, text_table

    job = job_from_dict({"model": {"layers": [4, 8, 2]}, "run": {"global_batch": 64}})
    loads = {(1, 1): 0.01, (1, 2): 2 * OTHER_LOAD_LIMIT, (2, 1): None}
    result = compare_layouts(job, list(loads), 10, tmp_path,
                             lambda P, T, tag: dict(record(P, 1.0), other_load=loads[(P, T)]))
    warnings = [line for line in text_table(result).splitlines() if line.startswith("warning: other processes")]
    assert len(warnings) == 1 and "while 1x2 ran" in warnings[0] and "20%" in warnings[0]
    quiet = compare_layouts(job, list(loads), 10, tmp_path, lambda P, T, tag: dict(record(P, 1.0), other_load=0.0))
    assert not any(line.startswith("warning: other") for line in text_table(quiet).splitlines())


def test_other_load_is_the_busy_time_that_was_not_ours() -> None:
    """(machine busy − ours) / (wall · cores) (the accounting of /proc/stat and getrusage, proc(5) and
    getrusage(2)), clipped to [0, 1]."""
    from shardmill.machine import other_fraction

    assert other_fraction(busy_s=3.0, ours_s=2.0, wall_s=1.0, cores=2) == pytest.approx(0.5)
    assert other_fraction(busy_s=1.9, ours_s=2.0, wall_s=1.0, cores=2) == 0.0  # tick rounding below ours
    assert other_fraction(busy_s=9.0, ours_s=0.0, wall_s=1.0, cores=2) == 1.0
    assert other_fraction(busy_s=1.0, ours_s=0.0, wall_s=0.0, cores=2) == 0.0


def test_a_busy_process_we_did_not_start_counts_and_our_own_work_does_not() -> None:
    """A busy child not yet waited for is not ours by getrusage(2)'s rule (only waited-for descendants count), so
    it stands in for another user's process: about one core's share. Our own busy loop adds nothing."""
    import os
    import subprocess
    import sys
    import time

    from shardmill.machine import OtherLoad

    if OtherLoad.sample() is None:
        pytest.skip("no /proc/stat on this system")
    cores = os.cpu_count() or 1
    spin = "import time\nend = time.time() + 1.5\nwhile time.time() < end: pass"
    child = subprocess.Popen([sys.executable, "-c", spin])
    try:
        time.sleep(0.3)  # the child is running
        load = OtherLoad()
        time.sleep(0.8)
        seen = load.fraction()
    finally:
        child.wait()
    assert seen is not None and 0.4 / cores <= seen <= 1.0
    load = OtherLoad()
    end = time.perf_counter() + 0.5
    while time.perf_counter() < end:  # our own work
        pass
    assert load.fraction() < 0.5 / cores + 0.15  # ours (1 / cores of the time) is subtracted; room for other load
