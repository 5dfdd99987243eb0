"""`shardmill scale --layouts`: ranks × threads layouts of one job timed side by side, the best one named."""

from __future__ import annotations

import json

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
    done = run_cli(["scale", str(job), "--layouts", "1x1,1x2,2x1", "--steps", "3", "--out-dir", str(out),
                    "--no-progress"], timeout=150)
    assert done.returncode == 0, done.stderr + done.stdout
    result = json.loads((out / "layouts.json").read_text())
    assert [row["layout"] for row in result["layouts"]] == ["1x1", "1x2", "2x1"]
    assert all(row["samples_per_s"] > 0 and row["resident_mib_per_rank"] > 10 for row in result["layouts"])
    assert result["best"] in {"1x1", "1x2", "2x1"} and f"best layout {result['best']}" in done.stdout
    assert {(out / "runs" / f"{tag}.json").is_file() for tag in ("p1t1", "p1t2", "p2t1")} == {True}
