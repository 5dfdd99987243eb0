"""`shardmill scale` end to end: JSON, CSV, PNG and report.md of strong and weak studies on a tiny job.

Sources named beside the checks:
- Grama, Gupta, Karypis & Kumar, *Introduction to Parallel Computing*, 2nd ed., 2003, ch. 5 (speedup
  S = T_1/T_P, efficiency E = S/P) — "Grama 2003".
- Gustafson, "Reevaluating Amdahl's law", CACM 31(5), 1988 (scaled speedup for a problem grown with P).
- Thakur, Rabenseifner & Gropp, "Optimization of Collective Communication Operations in MPICH", IJHPCA
  19(1), 2005 (allreduce costs) — "TRG 2005".
- PNG specification (ISO/IEC 15948:2004, W3C), §5.2: every PNG file starts with 137 80 78 71 13 10 26 10.
- Kingma & Ba, "Adam", ICLR 2015, Algorithm 1: two moment estimates per parameter.
"""

from __future__ import annotations

import csv
import json
import os
import re
import statistics
from pathlib import Path

import pytest
from helpers import make_classification, run_cli, write_job

pytestmark = pytest.mark.mpi

PNG_SIGNATURE = bytes([137, 80, 78, 71, 13, 10, 26, 10])  # PNG specification §5.2
G = 32
STEPS = 5
NETWORK = "100Gb/s,2us"  # α = 2e-6 s, β = 8 / 100e9 s per byte
PHASES = ("data", "forward", "backward", "exchange", "update")


def tiny_job(folder: Path, global_batch: int = G) -> Path:
    make_classification(folder, rows=240, features=6, classes=3, seed=0)  # 192 training rows after the split
    return write_job(folder, {"layers": [6, 16, 3], "activation": "tanh", "dtype": "float64"},
                     {"global_batch": global_batch, "epochs": 1, "seed": 0})


def run_study(folder: Path, mode: str, extra: list[str]) -> tuple[dict, Path]:
    job = tiny_job(folder)
    out = folder / "out"
    done = run_cli(["scale", str(job), "--sizes", "1,2", "--mode", mode, "--steps", str(STEPS), "--out-dir", str(out),
                    *extra], timeout=150)
    assert done.returncode == 0, done.stderr + done.stdout
    return json.loads((out / "scaling.json").read_text()), out


@pytest.fixture(scope="module")
def strong(tmp_path_factory) -> tuple[dict, Path]:
    return run_study(tmp_path_factory.mktemp("strong"), "strong", ["--pin", "--network", NETWORK])


@pytest.fixture(scope="module")
def weak(tmp_path_factory) -> tuple[dict, Path]:
    return run_study(tmp_path_factory.mktemp("weak"), "weak", [])


def per_rank(study: dict, p: int) -> list[dict]:
    return study["ranks"][str(p)]


def check_common(study: dict, out: Path, expected_batch: dict[int, int]) -> None:
    """Rows against the per-rank records the workers wrote; CSV against JSON; PNG signatures."""
    points = {point["p"]: point for point in study["points"]}
    assert sorted(points) == [1, 2]
    for p, point in points.items():
        ranks = per_rank(study, p)
        assert [r["rank"] for r in ranks] == list(range(p))
        assert point["global_batch"] == expected_batch[p]
        # contiguous block shards: sizes differ by at most one and add up to the batch. common practice
        rows = [r["rows"] for r in ranks]
        assert sum(rows) == expected_batch[p] and max(rows) - min(rows) <= 1
        step_s = max(r["wall_s"] for r in ranks) / STEPS
        assert point["step_s"] == pytest.approx(step_s, rel=1e-12)
        assert point["samples_per_s"] == pytest.approx(expected_batch[p] / step_s, rel=1e-12)
        # seconds per step of each phase: max and mean over ranks. common practice
        for phase in PHASES:
            values = [r["phase_s"][phase] / STEPS for r in ranks]
            assert point["phase_max_s"][phase] == pytest.approx(max(values), rel=1e-12)
            assert point["phase_mean_s"][phase] == pytest.approx(statistics.fmean(values), rel=1e-12)
        # load imbalance: max / mean of the per-rank compute (forward + backward). common practice
        compute = [(r["phase_s"]["forward"] + r["phase_s"]["backward"]) for r in ranks]
        assert point["load_imbalance"] == pytest.approx(max(compute) / statistics.fmean(compute), rel=1e-12)
        assert point["peak_rss_max_bytes"] == max(r["peak_rss_bytes"] for r in ranks)
        assert point["peak_rss_max_bytes"] > 10 << 20  # a Python process with numpy and MPI. from memory
    assert points[1]["speedup"] == 1.0 and points[1]["efficiency"] == 1.0  # Grama 2003: S(1) = T1/T1

    with open(out / "scaling.csv", newline="") as handle:
        table = list(csv.DictReader(handle))
    assert [int(row["p"]) for row in table] == [1, 2]
    for row in table:
        point = points[int(row["p"])]
        for key in ("step_s", "samples_per_s", "samples_per_s_per_rank", "speedup", "efficiency", "load_imbalance"):
            assert float(row[key]) == point[key], key
        for phase in PHASES:
            assert float(row[f"{phase}_max_s"]) == point["phase_max_s"][phase]
            assert float(row[f"{phase}_mean_s"]) == point["phase_mean_s"][phase]
        assert int(row["global_batch"]) == point["global_batch"]
        assert int(row["peak_rss_max_bytes"]) == point["peak_rss_max_bytes"]
        assert row["placement"] == point["placement"]

    for name in ("scaling.png", "breakdown.png", "allreduce.png"):
        assert (out / name).read_bytes()[:8] == PNG_SIGNATURE, name  # PNG specification §5.2


def test_strong_scaling_outputs_agree(strong) -> None:
    study, out = strong
    check_common(study, out, {1: G, 2: G})
    points = {point["p"]: point for point in study["points"]}
    t1, t2 = points[1]["step_s"], points[2]["step_s"]
    assert points[2]["speedup"] == pytest.approx(t1 / t2, rel=1e-12)  # Grama 2003: S = T1/TP
    assert points[2]["efficiency"] == pytest.approx(t1 / (2 * t2), rel=1e-12)  # Grama 2003: E = T1/(P·TP)


@pytest.mark.skipif(not hasattr(os, "sched_getaffinity"), reason="CPU affinity is Linux-only here")
def test_pinning_puts_rank_r_on_core_r(strong) -> None:
    study, _ = strong
    allowed = sorted(os.sched_getaffinity(0))  # what the test process may use; the workers inherit it
    for rank in per_rank(study, 2):
        core = allowed[rank["rank"] % len(allowed)]  # rank r → core r mod cores
        assert rank["pinned"] and rank["affinity"] == [core]
        assert rank["cpu"] == core  # the CPU it last ran on lies inside its one-core mask


def test_weak_scaling_outputs_agree(weak) -> None:
    study, out = weak
    check_common(study, out, {1: G, 2: 2 * G})  # weak: G per rank, G·P in all
    points = {point["p"]: point for point in study["points"]}
    t1, t2 = points[1]["step_s"], points[2]["step_s"]
    per_rank_ratio = (2 * G / (2 * t2)) / (G / t1)  # per-rank throughput at P = 2 over P = 1. common practice
    assert points[2]["efficiency"] == pytest.approx(per_rank_ratio, rel=1e-12)
    assert points[2]["efficiency"] == pytest.approx(t1 / t2, rel=1e-12)
    assert points[2]["speedup"] == pytest.approx(2 * t1 / t2, rel=1e-12)  # Gustafson 1988: scaled speedup
    assert study["model"]["mode"] == "weak"
    rows = {row["p"]: row for row in study["model"]["networks"][0]["rows"]}
    assert rows[64]["compute_s"] == pytest.approx(study["model"]["compute_s"], rel=1e-12)  # weak: constant


# Coefficients (c_α, c_β, c_γ) of T = c_α·α + c_β·n·β + c_γ·n·γ written out from TRG 2005 for p = 2 and p = 8.
HAND = {
    2: {"ring": (2.0, 1.0, 0.5), "recursive_doubling": (1.0, 1.0, 1.0), "rabenseifner": (2.0, 1.0, 0.5)},
    8: {"ring": (14.0, 1.75, 0.875), "recursive_doubling": (3.0, 3.0, 3.0), "rabenseifner": (6.0, 1.75, 0.875)},
}


def hand_allreduce(p: int, n: float, alpha: float, beta: float, gamma: float, algorithm: str | None = None) -> float:
    costs = {name: a * alpha + b * n * beta + c * n * gamma for name, (a, b, c) in HAND[p].items()}
    return costs[algorithm] if algorithm else min(costs.values())


def test_fit_and_projection_with_prediction_error(strong) -> None:
    study, out = strong
    model = study["model"]
    assert model["available"]
    fit = model["fit"]
    assert fit["p"] == 2  # the largest measured P
    timings = study["allreduce"]["2"]
    sizes = [m["n_bytes"] for m in timings]
    assert len(sizes) >= 6 and min(sizes) <= 4096 and max(sizes) >= 64 << 20
    for m in timings:
        assert m["median_s"] == statistics.median(m["times_s"])
    alpha, beta, gamma = fit["alpha_s"], fit["beta_s_per_byte"], fit["gamma_s_per_byte"]
    assert [pt["measured_s"] for pt in fit["points"]] == [m["median_s"] for m in timings]
    for pt in fit["points"]:
        expected = hand_allreduce(2, pt["n_bytes"], alpha, beta, gamma, fit["algorithm"])  # TRG 2005
        assert pt["model_s"] == pytest.approx(expected, rel=1e-9)
        assert pt["relative_error"] == pytest.approx((expected - pt["measured_s"]) / pt["measured_s"], rel=1e-9)
    # The fit kept is the one whose cheapest-algorithm times (TRG 2005, by hand) best match the medians.
    def cheapest_rms(c: dict) -> float:
        errors = [(hand_allreduce(2, m["n_bytes"], c["alpha_s"], c["beta_s_per_byte"], gamma) - m["median_s"])
                  / m["median_s"] for m in timings]
        return statistics.fmean(e * e for e in errors) ** 0.5

    for c in model["candidates"]:
        assert c["cheapest_rms_relative_error"] == pytest.approx(cheapest_rms(c), rel=1e-9)
    assert cheapest_rms(fit) == pytest.approx(min(cheapest_rms(c) for c in model["candidates"]), rel=1e-12)

    # Compute per step from the P = 1 record: data + forward + backward + update, seconds per step.
    serial = per_rank(study, 1)[0]["phase_s"]
    compute_s = sum(serial[phase] for phase in ("data", "forward", "backward", "update")) / STEPS
    assert model["compute_s"] == pytest.approx(compute_s, rel=1e-12)
    update_s = serial["update"] / STEPS  # repeated in full by every rank: not divided by P (Amdahl 1967)

    def local(p: int) -> float:
        return (compute_s - update_s) / p + update_s
    n = study["job"]["grad_bytes"]
    assert n == (6 * 16 + 16 + 16 * 3 + 3) * 8  # float64 parameters of a 6-16-3 MLP. common practice
    measured_rows = {row["p"]: row for row in model["networks"][0]["rows"]}
    points = {point["p"]: point for point in study["points"]}
    for p in (1, 2):
        row = measured_rows[p]
        comm = 0.0 if p == 1 else hand_allreduce(p, n, alpha, beta, gamma)  # cheapest of the three, TRG 2005
        assert row["step_s"] == pytest.approx(local(p) + comm, rel=1e-9)
        error = (row["step_s"] - points[p]["step_s"]) / points[p]["step_s"]
        assert row["step_error"] == pytest.approx(error, rel=1e-9)
    assert model["max_abs_step_error"] == pytest.approx(max(abs(measured_rows[p]["step_error"]) for p in (1, 2)))
    assert sorted(measured_rows) == [1, 2, 8, 16, 64, 256, 1024]

    # The given network: 100 Gb/s = 12.5e9 bytes/s, 2 µs.
    given = {row["p"]: row for row in model["networks"][1]["rows"]}
    step8 = local(8) + hand_allreduce(8, n, 2e-6, 8 / 100e9, gamma)  # TRG 2005
    assert given[8]["step_s"] == pytest.approx(step8, rel=1e-9)
    assert given[8]["efficiency"] == pytest.approx(compute_s / (8 * step8), rel=1e-9)  # Grama 2003

    report = (out / "report.md").read_text()
    assert f"largest on measured P: {100 * model['max_abs_step_error']:.1f}%" in report
    assert f"{100 * measured_rows[2]['step_error']:+.1f}%" in report
    assert f"R² = {fit['r_squared']:.4f}" in report


def test_report_names_mpi_library_every_p_and_assumptions(strong, weak) -> None:
    from mpi4py import MPI
    from shardmill.scaling.costmodel import ASSUMPTIONS

    library = " ".join(MPI.Get_library_version().splitlines()[0].split())
    for (_, out), batches in ((strong, {1: G, 2: G}), (weak, {1: G, 2: 2 * G})):
        report = (out / "report.md").read_text()
        assert library in report
        for p, batch in batches.items():
            assert re.search(rf"^\| {p} \| {batch} \| ", report, flags=re.MULTILINE), p  # measured row
        for p in (8, 16, 64, 256, 1024):
            assert re.search(rf"^\| {p} \| ", report, flags=re.MULTILINE), p  # projected row
        for sentence in ASSUMPTIONS:
            assert sentence in report
        for name in ("scaling.png", "breakdown.png", "allreduce.png"):
            assert f"]({name})" in report


@pytest.mark.parametrize(("option", "value", "words"), [
    ("--network", "100Gbit/s,2us", ["`--network`", "Gb/s"]),
    ("--network", "100Gb/s", ["`--network`", "latency"]),
    ("--network", "100Gb/s,2 parsecs", ["`--network`", "parsecs"]),
    ("--sizes", "2,4", ["`--sizes` must include 1"]),
    ("--sizes", "1,two", ["`--sizes` must be comma-separated"]),
])
def test_bad_options_exit_2_with_a_clear_message(tmp_path, option, value, words) -> None:
    job = tiny_job(tmp_path)
    out = tmp_path / "out"
    done = run_cli(["scale", str(job), option, value, "--out-dir", str(out)], timeout=60)
    assert done.returncode == 2
    assert done.stderr.startswith("shardmill: error: ")
    for word in words:
        assert word in done.stderr
    assert "Traceback" not in done.stderr
    assert not out.exists()  # refused before any run


def test_worker_user_error_is_reported_with_exit_2(tmp_path) -> None:
    job = tiny_job(tmp_path, global_batch=500)  # more than the 192 training rows
    done = run_cli(["scale", str(job), "--sizes", "1", "--out-dir", str(tmp_path / "out")], timeout=60)
    assert done.returncode == 2
    assert "the 1-process run stopped" in done.stderr and "192 training rows" in done.stderr


def test_run_past_timeout_is_stopped(tmp_path) -> None:
    job = tiny_job(tmp_path)
    done = run_cli(["scale", str(job), "--sizes", "1", "--timeout", "0.2", "--out-dir", str(tmp_path / "out")],
                   timeout=60)
    assert done.returncode == 124
    assert "ran past 0.2 s" in done.stderr


def test_speedup_and_efficiency_by_hand() -> None:
    from shardmill.scaling.study import add_speedup

    def rows() -> list[dict]:
        return [{"p": 1, "step_s": 1.0}, {"p": 2, "step_s": 0.625}, {"p": 4, "step_s": 1.25}]

    strong_rows = rows()
    add_speedup(strong_rows, "strong")
    # Grama 2003: S = T1/TP = 1.6 and E = 0.8 at P = 2; S = 0.8 and E = 0.2 at P = 4.
    assert [r["speedup"] for r in strong_rows] == pytest.approx([1.0, 1.6, 0.8])
    assert [r["efficiency"] for r in strong_rows] == pytest.approx([1.0, 0.8, 0.2])
    weak_rows = rows()
    add_speedup(weak_rows, "weak")
    # Gustafson 1988: scaled speedup P·T1/TP = 3.2 and 3.2; efficiency T1/TP = 1.6 and 0.8.
    assert [r["speedup"] for r in weak_rows] == pytest.approx([1.0, 3.2, 3.2])
    assert [r["efficiency"] for r in weak_rows] == pytest.approx([1.0, 1.6, 0.8])


def test_allreduce_timing_skips_sizes_past_its_budget() -> None:
    from mpi4py import MPI
    from shardmill.scaling.measure import time_allreduce

    sizes = (4096, 16384, 65536)
    timings, skipped = time_allreduce(MPI.COMM_SELF, sizes, repeats=2, budget_s=0.0, dtype="float32")
    assert [t["n_bytes"] for t in timings] == [4096] and skipped == [16384, 65536]  # the first size always runs
    timings, skipped = time_allreduce(MPI.COMM_SELF, sizes, repeats=2, budget_s=60.0, dtype="float32")
    assert [t["n_bytes"] for t in timings] == list(sizes) and skipped == []
    for t in timings:
        assert t["median_s"] == statistics.median(t["times_s"]) and len(t["times_s"]) == 2


# ------------------------------------------------------------------------------------------------------
# The sharded update in the study: hidden fraction, optimizer memory per rank, projection error
# ------------------------------------------------------------------------------------------------------

OLD_CSV_COLUMNS = ["p", "global_batch", "step_s", "samples_per_s", "samples_per_s_per_rank", "speedup", "efficiency",
                   "load_imbalance", *(f"{ph}_{kind}_s" for ph in PHASES for kind in ("max", "mean")),
                   "peak_rss_max_bytes", "pinned", "placement"]  # the columns before the sharded update
NEW_CSV_COLUMNS = ["update", "exchange_alone_s", "publish_alone_s", "hidden_fraction", "optimizer_state_max_bytes",
                   "optimizer_state_ratio", "model_step_s", "projection_error"]


def synthetic_raw(p: int, step_s: float, phases: list[dict], exchange_alone_s: float, state: list[int]) -> dict:
    """What a worker would write at P = p: per-rank phase seconds per step (×STEPS), a straight-line allreduce."""
    ranks = [{"rank": r, "rows": G // p, "wall_s": step_s * STEPS, "phase_s": {k: v * STEPS for k, v in ph.items()},
              "compile_s": 0.0, "owned_params": 100, "optimizer_state_bytes": state[r], "rss_bytes": 50 << 20,
              "peak_rss_bytes": 60 << 20, "cpu": r, "affinity": [r], "pinned": False, "pinned_cores": None}
             for r, ph in enumerate(phases)]
    sizes = [4096 * 4**k for k in range(6)]
    return {"p": p, "global_batch": G, "steps": STEPS, "warmup_steps": 2, "threads": 1, "params": 1000,
            "grad_bytes": 8000, "itemsize": 8, "update": "replicated", "reduction": "fast", "exact_format": "wide",
            "exchange_alone": {"exchange_s": exchange_alone_s, "publish_s": 0.0},
            "ranks": ranks, "allreduce": [{"n_bytes": n, "median_s": 4e-6 + 1e-10 * n, "times_s": []} for n in sizes]
            if p > 1 else [], "allreduce_skipped_bytes": [], "mpi_thread_level": "multiple",
            "gamma_s_per_byte": 0.0, "gamma_bytes": 4000000, "mpi_library": "test MPI", "mpi4py": "0"}


@pytest.mark.parametrize(("error", "warned"), [(0.10, False), (-0.10, False), (0.30, True), (-0.20, True)])
def test_synthetic_study_hidden_fraction_memory_and_warning(tmp_path, error, warned) -> None:
    from shardmill.config import load_job
    from shardmill.scaling import report
    from shardmill.scaling.study import CSV_COLUMNS, build_study, write_study

    serial = {"data": 1e-3, "forward": 4e-3, "backward": 4e-3, "exchange": 0.0, "update": 1e-3}  # 10 ms of compute
    # P = 2, rank 0 waits 0.3 ms and rank 1 0.5 ms in the exchange phase; the exchange alone takes 1 ms:
    # hidden = 1 − 0.4 / 1.0 = 0.6 (the definition: 1 − exposed / alone, the exposed being the mean over ranks).
    halves = [dict(serial, data=5e-4, forward=2e-3, backward=2e-3, exchange=x, update=1e-3) for x in (3e-4, 5e-4)]
    # Projected step at P = 2 (replicated update, strong): (10 ms − 1 ms)/2 + 1 ms + the allreduce of 8000 bytes,
    # which the straight-line timings price at 4 µs + 8000·1e-10 s whatever algorithm the fit picks (TRG 2005 at
    # p = 2: one message each way). The measured step is set so that (projected − measured) / measured = error.
    projected = 9e-3 / 2 + 1e-3 + 4e-6 + 8000 * 1e-10
    raws = {1: synthetic_raw(1, 10e-3, [serial], 1e-6, [16000]),
            2: synthetic_raw(2, projected / (1 + error), halves, 1e-3, [8192, 7808])}
    job = load_job(tiny_job(tmp_path))
    study = build_study(job, tmp_path / "job.toml", "strong", STEPS, 1, False, raws, [8], None, None)
    points = {point["p"]: point for point in study["points"]}
    assert points[1]["hidden_fraction"] is None  # P = 1 sends nothing, so nothing can be hidden
    assert points[2]["hidden_fraction"] == pytest.approx(0.6, rel=1e-9)
    assert points[2]["optimizer_state_max_bytes"] == 8192
    assert points[2]["optimizer_state_ratio"] == pytest.approx(8192 / 16000, rel=1e-12)
    assert points[2]["model_step_s"] == pytest.approx(projected, rel=1e-9)
    assert points[2]["projection_error"] == pytest.approx(abs(error), rel=1e-6)
    assert study["model"]["max_abs_step_error"] == pytest.approx(abs(error), rel=1e-6)

    table = report.text_table(study)
    markdown = report.markdown(study, set())
    lines = [line for line in table.splitlines() if line.startswith("warning:")]
    if warned:
        assert len(lines) == 1 and "P = 2" in lines[0] and f"{100 * abs(error):.1f}%" in lines[0]
        assert lines[0] in markdown and study["model"]["warning"] == lines[0]
    else:
        assert not lines and "warning" not in markdown and study["model"]["warning"] is None
    assert re.search(r"^\s*2\s.*\s60%\s.*0\.51×", table, flags=re.MULTILINE)  # hidden, state ratio at P = 2

    write_study(study, tmp_path)
    with open(tmp_path / "scaling.csv", newline="") as handle:
        header = next(csv.reader(handle))
    assert header == list(CSV_COLUMNS) == OLD_CSV_COLUMNS + NEW_CSV_COLUMNS  # new columns at the end only


@pytest.fixture(scope="module")
def sharded(tmp_path_factory) -> tuple[dict, Path, str]:
    folder = tmp_path_factory.mktemp("sharded")
    make_classification(folder, rows=240, features=6, classes=3, seed=0)
    job = write_job(folder, {"layers": [6, 64, 64, 3], "activation": "tanh", "dtype": "float64"},
                    {"global_batch": G, "epochs": 1, "seed": 0},
                    optimizer={"method": "adam", "learning_rate": 0.01})
    out = folder / "out"
    # the sharded update comes from --set, which the driver must hand to every worker it starts
    done = run_cli(["scale", str(job), "--sizes", "1,2", "--steps", "3", "--out-dir", str(out), "--no-progress",
                    "--set", "run.update=sharded"], timeout=150)
    assert done.returncode == 0, done.stderr + done.stdout
    return json.loads((out / "scaling.json").read_text()), out, done.stdout


def test_sharded_study_records_memory_hidden_fraction_and_projection(sharded) -> None:
    study, out, printed = sharded
    n = (6 * 64 + 64) + (64 * 64 + 64) + (64 * 3 + 3)  # parameters of a 6-64-64-3 MLP. common practice
    assert study["job"]["update"] == "sharded" and study["job"]["params"] == n
    points = {point["p"]: point for point in study["points"]}
    for p in (1, 2):
        ranks = per_rank(study, p)
        assert points[p]["update"] == "sharded"
        # The owned slices partition the parameters. common practice
        assert sum(r["owned_params"] for r in ranks) == n
        for r in ranks:
            assert r["optimizer_state_bytes"] == 2 * r["owned_params"] * 8  # Kingma & Ba 2015: m and v, float64
        assert points[p]["optimizer_state_max_bytes"] == max(r["optimizer_state_bytes"] for r in ranks)
    owned = [r["owned_params"] for r in per_rank(study, 2)]
    assert max(owned) < n  # each rank keeps state for its slice alone
    assert points[2]["optimizer_state_ratio"] == pytest.approx(max(owned) / n, rel=1e-12)
    exposed = statistics.fmean(r["phase_s"]["exchange"] / 3 for r in per_rank(study, 2))
    assert points[2]["exchange_alone_s"] > 0.0
    alone = points[2]["exchange_alone_s"] + points[2]["publish_alone_s"]  # the publish is exchange time too
    assert points[2]["hidden_fraction"] == pytest.approx(1 - exposed / alone, rel=1e-9)

    # The projection prices a reduce-scatter of the gradient and an allgather of the parameters, and divides the
    # whole compute, the update included, by P. At p = 2 both collectives take one step: α + nβ/2 + nγ/2 and
    # α + nβ/2, together 2α + nβ + nγ/2, the ring allreduce (TRG 2005).
    model = study["model"]
    assert [c["kind"] for c in model["collectives"]] == ["reduce_scatter", "allgather"]
    fit = model["fit"]
    rows = {row["p"]: row for row in model["networks"][0]["rows"]}
    comm = hand_allreduce(2, n * 8, fit["alpha_s"], fit["beta_s_per_byte"], fit["gamma_s_per_byte"], "ring")
    assert rows[2]["step_s"] == pytest.approx(model["compute_s"] / 2 + comm, rel=1e-9)
    for p in (1, 2):
        error = abs(rows[p]["step_s"] - points[p]["step_s"]) / points[p]["step_s"]
        assert points[p]["projection_error"] == pytest.approx(error, rel=1e-9)
    warned = model["max_abs_step_error"] > 0.15
    assert ("\nwarning: the projection is off by" in printed) == warned
    report = (out / "report.md").read_text()
    assert "sharded update" in report and ("**warning:" in report) == warned

    with open(out / "scaling.csv", newline="") as handle:
        table = list(csv.DictReader(handle))
    assert list(table[0]) == OLD_CSV_COLUMNS + NEW_CSV_COLUMNS
    for row in table:
        point = points[int(row["p"])]
        assert row["update"] == "sharded"
        assert int(row["optimizer_state_max_bytes"]) == point["optimizer_state_max_bytes"]
        assert float(row["exchange_alone_s"]) == point["exchange_alone_s"]
        assert float(row["projection_error"]) == point["projection_error"]
    assert table[0]["hidden_fraction"] == ""  # not defined at P = 1
    assert float(table[1]["hidden_fraction"]) == points[2]["hidden_fraction"]
