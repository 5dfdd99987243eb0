"""``shardmill variants``: plans checked before anything trains, variants packed onto groups of ranks, each variant
the same bits as the same job trained alone (exact mode), failures recorded, and a stopped study relaunched."""

from __future__ import annotations

import hashlib
import json
import os
import signal
import subprocess
import sys
import time
from pathlib import Path

import numpy as np
import pytest
from shardmill.errors import JobError
from shardmill.parallel.launch import rank_environment
from shardmill.study.plan import read_plan
from shardmill.study.run import choose_group_ranks

from tests.helpers import make_classification, mpiexec, run_cli, write_job

GRID = '[grid]\n"optimizer.learning_rate" = [0.05, 0.1]\n"model.layers" = [[6, 8, 3], [6, 12, 3]]\n'


def study_job(path: Path, epochs: int = 3, rows: int = 120) -> Path:
    make_classification(path, rows=rows)
    return write_job(path, {"layers": [6, 8, 3]}, {"epochs": epochs, "global_batch": 32, "reduction": "exact",
                                                    "exact_chunk": 16, "seed": 0})


def plan_file(path: Path, text: str) -> Path:
    (path / "plan.toml").write_text(text)
    return path / "plan.toml"


def sha256_of_arrays(npz: Path) -> dict[str, str]:
    with np.load(npz, allow_pickle=False) as arrays:
        # the parameters (float arrays); the job's text differs by its run.workdir
        return {name: hashlib.sha256(np.ascontiguousarray(arrays[name]).tobytes()).hexdigest() for name in arrays
                if arrays[name].dtype.kind == "f"}


def test_a_plan_is_every_combination_of_grid_seeds_and_folds(tmp_path):
    plan, _ = read_plan(plan_file(tmp_path, '[study]\nseeds = [3, 4]\nfolds = 3\n' + GRID))
    assert len(plan.variants) == 2 * 2 * 2 * 3  # the size of a Cartesian product (common practice)
    assert len({v.name for v in plan.variants}) == len(plan.variants)
    first = plan.variants[0]
    assert first.sets == ("optimizer.learning_rate=0.05", "model.layers=[6, 8, 3]", "run.seed=3", "data.folds=3",
                          "data.fold=0")
    assert first.setting == first.sets[:3]
    assert plan.varied == ["optimizer.learning_rate", "model.layers", "run.seed", "data.folds", "data.fold"]
    again, _ = read_plan(plan.path)
    assert [v.name for v in again.variants] == [v.name for v in plan.variants]  # a relaunch finds its folders


@pytest.mark.parametrize(("text", "message"), [
    ('[grid]\n"optimizer.learning_rat" = [0.1]\n', r"`grid.\"optimizer.learning_rat\"`: .*not a known key.*"
                                                    r"did you mean 'learning_rate'"),
    ('[grid]\n"optimizer.learning_rate" = []\n', r"`grid.\"optimizer.learning_rate\"` must be a non-empty list"),
    ("[grid]\n", r"`grid` must map"),
    ('[study]\nmetrc = "x"\n', r"`study.metrc` is not a known key.*did you mean 'metric'"),
    ('[study]\nfolds = 1\n', r"`study.folds` must be 0 \(off\) or an integer ≥ 2"),
    ('[[variant]]\nset = ["run.epochs"]\n', r"`variant` 1: `--set` takes section.key=value"),
    ('[sweep]\n', r"`sweep` is not a part of a plan"),
])
def test_bad_plans_are_refused_with_the_entry_named(tmp_path, text, message):
    with pytest.raises(JobError, match=message):
        read_plan(plan_file(tmp_path, text))


def test_group_ranks_given_or_chosen():
    assert choose_group_ranks(4, 8, 2) == 2
    assert choose_group_ranks(4, 8, 0) == 1  # more variants than ranks: one rank each
    assert choose_group_ranks(4, 2, 0) == 2  # two variants: two groups of two
    assert choose_group_ranks(6, 1, 0) == 6
    with pytest.raises(JobError, match="needs at least 8 ranks"):
        choose_group_ranks(4, 8, 8)


@pytest.mark.parametrize(("text", "message"), [
    ('[grid]\n"optimizer.learning_rate" = [0.1, -1.0]\n',
     r"^shardmill: error: plan .*: variant 0001-\w+ \(optimizer.learning_rate=-1.0\): `optimizer.learning_rate` "
     r"must be > 0; got -1.0$"),
    ("[study]\nfolds = 200\n", r"^shardmill: error: `data.folds` = 200 asks for more folds than the 120 rows$"),
])
def test_a_bad_variant_stops_the_study_before_anything_trains(tmp_path, text, message):
    job = study_job(tmp_path)
    result = run_cli(["variants", str(job), str(plan_file(tmp_path, text))], timeout=60)
    assert result.returncode == 2
    assert len(result.stderr.strip().splitlines()) == 1
    assert __import__("re").match(message, result.stderr.strip())
    assert not (tmp_path / "study" / "variants").exists()


def test_folds_and_a_failing_variant_on_one_rank(tmp_path):
    job = study_job(tmp_path, epochs=2)
    plan = plan_file(tmp_path, '[study]\nfolds = 3\n[grid]\n"run.global_batch" = [16, 400]\n')
    result = run_cli(["variants", str(job), str(plan)], timeout=120)
    assert result.returncode == 0, result.stderr
    table = json.loads((tmp_path / "study" / "variants.json").read_text())
    rows = table["variants"]
    assert len(rows) == 6 and [r["status"] for r in rows].count("failed") == 3
    failed = next(r for r in rows if r["status"] == "failed")
    assert "run.global_batch" in failed["reason"] and failed["run.global_batch"] == "400"
    good = [r["best"] for r in rows if r["status"] == "done"]
    setting = next(s for s in table["settings"] if s["setting"] == ["run.global_batch=16"])
    assert setting["runs"] == 3
    assert setting["mean"] == pytest.approx(float(np.mean(good)))  # numpy's mean and sample std as the reference
    assert setting["spread"] == pytest.approx(float(np.std(good, ddof=1)))
    assert "best setting: validation.loss" in result.stdout and "--set run.global_batch=16" in result.stdout
    assert (tmp_path / "study" / "variants.csv").read_text().splitlines()[0].startswith("place,variant,")


def train_alone(job: Path, sets: list[str], workdir: Path) -> dict[str, str]:
    args = ["train", str(job), "--no-progress", *[a for s in sets for a in ("--set", s)], "--set",
            f"run.workdir={workdir}"]
    result = run_cli(args, timeout=120)
    assert result.returncode == 0, result.stderr
    return sha256_of_arrays(workdir / "final.npz")


@pytest.mark.mpi
def test_eight_variants_on_four_ranks_match_each_variant_trained_alone(tmp_path):
    mpiexec()
    job = study_job(tmp_path)
    plan = plan_file(tmp_path, "[study]\nseeds = [0, 1]\n" + GRID)
    command = [sys.executable, "-m", "shardmill", "variants", str(job), str(plan), "--ranks", "4",
               "--group-ranks", "2"]
    result = subprocess.run(command, capture_output=True, text=True, timeout=180,
                            env=rank_environment(threads=1, launched=False))
    assert result.returncode == 0, result.stderr
    assert "4 rank(s) as 2 group(s) × 2 rank(s)" in result.stdout
    rows = json.loads((tmp_path / "study" / "variants.json").read_text())["variants"]
    assert len(rows) == 8 and all(r["status"] == "done" for r in rows)
    for row in rows:
        alone = train_alone(job, row["sets"], tmp_path / "alone" / row["variant"])
        # exact mode: the same bits at every process count (README, "exact"); SHA-256 per array (FIPS 180-4)
        assert sha256_of_arrays(tmp_path / "study" / "variants" / row["variant"] / "final.npz") == alone
    picture = tmp_path / "study" / "variants.png"
    assert picture.read_bytes()[:8] == b"\x89PNG\r\n\x1a\n" and "picture in" in result.stdout  # PNG signature


def starts_of(metrics: Path) -> list[int]:
    return [r["resumed_from_step"] for r in map(json.loads, metrics.read_text().splitlines()) if r["kind"] == "start"]


@pytest.mark.mpi
def test_a_stopped_study_relaunched_on_other_ranks_ends_as_an_uninterrupted_one(tmp_path):
    mpiexec()
    job = study_job(tmp_path, epochs=40, rows=240)
    plan = plan_file(tmp_path, '[grid]\n"optimizer.learning_rate" = [0.01, 0.02, 0.03, 0.04, 0.05, 0.06]\n')
    env = rank_environment(threads=1, launched=False)
    command = [sys.executable, "-m", "shardmill", "variants", str(job), str(plan)]
    process = subprocess.Popen([*command, "--ranks", "4", "--group-ranks", "2"], stdout=subprocess.PIPE,
                               stderr=subprocess.PIPE, text=True, env=env, start_new_session=True)
    try:
        deadline = time.monotonic() + 120
        records = list((tmp_path / "study" / "variants").glob("*/variant.json"))
        while len(records) < 1 and time.monotonic() < deadline:
            time.sleep(0.05)
            records = list((tmp_path / "study" / "variants").glob("*/variant.json"))
        time.sleep(0.3)  # the next variants are under way
        os.kill(process.pid, signal.SIGTERM)
        _, err = process.communicate(timeout=60)
    finally:
        if process.poll() is None:
            os.killpg(process.pid, signal.SIGKILL)
    assert process.returncode == 143, err
    assert "run the same command again" in err
    first = {p.parent.name: json.loads(p.read_text())["status"]
             for p in (tmp_path / "study" / "variants").glob("*/variant.json")}
    finished = [name for name, status in first.items() if status == "done"]
    assert finished and len(finished) < 6
    again = subprocess.run([*command, "--ranks", "2", "--group-ranks", "1"], capture_output=True, text=True,
                           env=env, timeout=180)
    assert again.returncode == 0, again.stderr
    rows = json.loads((tmp_path / "study" / "variants.json").read_text())["variants"]
    assert len(rows) == 6 and all(r["status"] == "done" for r in rows)
    resumed = 0
    for row in rows:
        folder = tmp_path / "study" / "variants" / row["variant"]
        starts = starts_of(folder / "metrics.jsonl")
        if row["variant"] in finished:
            assert starts == [0]  # trained once, not again
        resumed += len(starts) > 1 and starts[-1] > 0
        alone = train_alone(job, row["sets"], tmp_path / "alone" / row["variant"])
        assert sha256_of_arrays(folder / "final.npz") == alone  # exact mode: same bits after a resume at another P
    assert resumed >= 1  # at least one variant went on from its checkpoint


@pytest.mark.mpi
def test_a_study_killed_outright_is_finished_by_a_relaunch(tmp_path):
    """kill -9 of the launcher and every rank (a node lost, a preemption without warning): no record is written
    for the variants in progress; the relaunch skips the finished ones and continues the others from their last
    checkpoint, to the bits of each variant trained alone."""
    mpiexec()
    job = study_job(tmp_path, epochs=40, rows=240)
    job.write_text(job.read_text().replace("[run]", "[run]\nsave_every = 10"))
    plan = plan_file(tmp_path, '[grid]\n"optimizer.learning_rate" = [0.01, 0.02, 0.03, 0.04]\n')
    env = rank_environment(threads=1, launched=False)
    command = [sys.executable, "-m", "shardmill", "variants", str(job), str(plan)]
    process = subprocess.Popen([*command, "--ranks", "2", "--group-ranks", "1"], stdout=subprocess.DEVNULL,
                               stderr=subprocess.DEVNULL, env=env, start_new_session=True)
    try:
        deadline = time.monotonic() + 120
        while time.monotonic() < deadline and not list((tmp_path / "study" / "variants").glob("*/variant.json")):
            time.sleep(0.05)
        time.sleep(0.5)
    finally:
        os.killpg(process.pid, signal.SIGKILL)  # the launcher and every rank at once: no handler runs
        process.wait(timeout=30)
    finished = [p.parent.name for p in (tmp_path / "study" / "variants").glob("*/variant.json")]
    assert finished
    lock = tmp_path / "study" / ".lock"
    again = subprocess.run([*command, "--ranks", "2", "--group-ranks", "1"], capture_output=True, text=True,
                           env=env, timeout=240)
    assert again.returncode == 0, again.stderr[-2000:] + (" (lock left)" if lock.exists() else "")
    rows = json.loads((tmp_path / "study" / "variants.json").read_text())["variants"]
    assert len(rows) == 4 and all(r["status"] == "done" for r in rows)
    for row in rows:
        folder = tmp_path / "study" / "variants" / row["variant"]
        if row["variant"] in finished:
            assert starts_of(folder / "metrics.jsonl") == [0]  # trained once
        alone = train_alone(job, row["sets"], tmp_path / "alone" / row["variant"])
        assert sha256_of_arrays(folder / "final.npz") == alone  # exact mode: the same bits after the kill


def test_g_from_a_scale_study_is_the_largest_p_that_still_scales(tmp_path):
    from shardmill.study.run import scaled_group_ranks

    points = [{"p": 1, "efficiency": 1.0, "step_s": 2e-3}, {"p": 2, "efficiency": 0.85, "step_s": 1.18e-3},
              {"p": 4, "efficiency": 0.6, "step_s": 0.83e-3}]
    (tmp_path / "scaling.json").write_text(json.dumps({"mode": "strong", "points": points}))
    g, why = scaled_group_ranks(tmp_path, world=8)
    # strong-scaling efficiency T1 / (P·TP) ≥ 0.8 holds up to P = 2 (common practice for "still scales")
    assert g == 2 and "efficiency 0.85 at P = 2" in why and "1.18 ms" in why
    assert scaled_group_ranks(tmp_path, world=1)[0] == 1  # no more than the world holds
    (tmp_path / "scaling.json").write_text(json.dumps({"mode": "weak", "points": points}))
    with pytest.raises(JobError, match="is a weak scaling study; give a strong one"):
        scaled_group_ranks(tmp_path / "scaling.json", world=8)
    (tmp_path / "scaling.json").write_text("{not json")
    with pytest.raises(JobError, match="is not a `shardmill scale` study"):
        scaled_group_ranks(tmp_path, world=8)
