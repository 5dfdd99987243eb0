"""Cluster runs: one MPI world per job step (checked against the launcher's own count), a batch script that is
submitted and resubmitted unedited (``train --continue``), and a package that a folder named ``shardmill`` in the
current directory cannot shadow.

References: the launchers' documented variables (MPICH's Hydra and Slurm's PMI-2 plugin set PMI_SIZE; Open MPI sets
OMPI_COMM_WORLD_SIZE; srun sets SLURM_STEP_NUM_TASKS for every step; from memory, checked here against the bundled
mpiexec and, by hand, Slurm 22.05 — see README "Running on a cluster"); Python's ``-P`` option (Python 3.11
documentation: do not prepend a potentially unsafe path to sys.path).
"""

from __future__ import annotations

import os
import subprocess
import sys
from pathlib import Path

import numpy as np
import pytest
from helpers import make_classification, mpiexec, run_cli, write_job
from shardmill.errors import JobError
from shardmill.parallel.comm import announced_size, check_world
from shardmill.parallel.launch import rank_environment, run_command

ROOT = Path(__file__).resolve().parents[1]


def test_the_launchers_count_is_read_mpi_first() -> None:
    assert announced_size({}) is None
    assert announced_size({"SLURM_STEP_NUM_TASKS": "4"}) == (4, "SLURM_STEP_NUM_TASKS")
    # under mpiexec inside an allocation the ranks inherit the step count of mpiexec's proxies: PMI's count wins
    assert announced_size({"SLURM_STEP_NUM_TASKS": "1", "PMI_SIZE": "8"}) == (8, "PMI_SIZE")
    assert announced_size({"OMPI_COMM_WORLD_SIZE": "3"}) == (3, "OMPI_COMM_WORLD_SIZE")
    assert announced_size({"PMI_SIZE": "", "SLURM_STEP_NUM_TASKS": "x"}) is None  # unusable values are ignored


def test_a_world_of_another_size_is_refused_naming_both_numbers() -> None:
    check_world(4, {"PMI_SIZE": "4"})
    check_world(1, {})
    with pytest.raises(JobError, match=r"Slurm's srun started 2 processes \(SLURM_STEP_NUM_TASKS=2\), but this one's "
                                       r"MPI world holds 1.*srun --mpi=pmi2"):
        check_world(1, {"SLURM_STEP_NUM_TASKS": "2"})


def _job(folder: Path, run: dict | None = None) -> Path:
    make_classification(folder, rows=120)
    return write_job(folder, {"layers": [6, 8, 3], "activation": "tanh", "dtype": "float64"},
                     {"epochs": 2, "global_batch": 24, "seed": 1, **(run or {})})


def test_a_single_process_told_it_is_one_of_two_stops_in_one_line(tmp_path: Path) -> None:
    job = _job(tmp_path)
    env = {**rank_environment(threads=1, launched=False), "SLURM_STEP_NUM_TASKS": "2"}
    done = run_command([sys.executable, "-m", "shardmill", "train", str(job), "--no-progress"], env, timeout=120,
                       stdout=subprocess.PIPE, stderr=subprocess.PIPE)
    assert done.returncode == 2 and "Traceback" not in done.stderr
    assert done.stderr.count("\n") == 1 and "started 2 processes" in done.stderr and "holds 1" in done.stderr
    assert not (tmp_path / "run" / "final.npz").exists()


@pytest.mark.mpi
def test_split_worlds_under_the_bundled_mpiexec_all_stop(tmp_path: Path) -> None:
    job = _job(tmp_path)
    # Two processes started by mpiexec without its PMI connection: each initialises MPI alone, a world of one, as
    # `srun --mpi=none` does; the launcher's task count still says 2.
    hide = [word for name in ("PMI_FD", "PMI_PORT", "PMI_RANK", "PMI_SIZE") for word in ("-u", name)]
    command = [*mpiexec(), "-n", "2", "env", *hide, "SLURM_STEP_NUM_TASKS=2", sys.executable, "-m", "shardmill",
               "train", str(job), "--no-progress"]
    done = run_command(command, rank_environment(threads=1), timeout=120, stdout=subprocess.PIPE,
                       stderr=subprocess.PIPE)
    assert done.returncode != 0
    assert done.stderr.count("started 2 processes (SLURM_STEP_NUM_TASKS=2)") == 2  # every process, one line each
    assert not (tmp_path / "run" / "final.npz").exists()


def test_continue_starts_a_run_then_continues_it(tmp_path: Path) -> None:
    job = _job(tmp_path)
    (tmp_path / "run").mkdir()
    (tmp_path / "run" / "metrics.jsonl").write_text('{"kind": "start"}\n')  # an attempt that died before a checkpoint
    first = run_cli(["train", str(job), "--no-progress", "--continue", "--set", "run.max_steps=4"], cwd=tmp_path)
    assert first.returncode == 0, first.stderr
    again = run_cli(["train", str(job), "--no-progress", "--continue"], cwd=tmp_path)
    assert again.returncode == 0, again.stderr
    assert "continuing from the checkpoint of step 4" in again.stdout
    assert "done: 8 steps" in again.stdout


def test_the_batch_template_is_submitted_and_resubmitted_unedited(tmp_path: Path) -> None:
    job = _job(tmp_path, {"epochs": 4})
    fake = tmp_path / "bin"
    fake.mkdir()
    # srun stands in for itself on one node: it drops its own options and runs the command as one task
    (fake / "srun").write_text('#!/bin/bash\nwhile [[ "$1" == --* ]]; do shift; done\nexec "$@"\n')
    (fake / "srun").chmod(0o755)
    env = {**rank_environment(threads=1, launched=False),
           "PATH": f"{fake}{os.pathsep}{Path(sys.executable).parent}{os.pathsep}{os.environ['PATH']}",
           "NUMBA_CACHE_DIR": os.environ.get("NUMBA_CACHE_DIR", str(tmp_path / "numba"))}
    script = ["bash", str(ROOT / "scripts" / "slurm-train.sh"), str(job), "--set", "run.max_steps=7"]
    first = run_command(script, env, timeout=300, cwd=tmp_path, stdout=subprocess.PIPE, stderr=subprocess.PIPE)
    assert first.returncode == 0, first.stderr
    assert "done: 7 steps" in first.stdout
    script[-1] = "run.max_steps=0"  # the same line with another --set: the run goes on to its last epoch
    again = run_command(script, env, timeout=300, cwd=tmp_path, stdout=subprocess.PIPE, stderr=subprocess.PIPE)
    assert again.returncode == 0, again.stderr
    assert "continuing from the checkpoint of step 7" in again.stdout and "done: 16 steps" in again.stdout


def test_a_folder_named_shardmill_in_the_current_directory_shadows_nothing(tmp_path: Path) -> None:
    clone = tmp_path / "shardmill"  # what a clone of the repository looks like from its parent: no __init__.py
    (clone / "runtime").mkdir(parents=True)
    (clone / "README.md").write_text("a clone\n")
    command = Path(sys.executable).parent / "shardmill"
    env = rank_environment(threads=1, launched=False)
    version = run_command([str(command), "--version"], env, timeout=60, cwd=tmp_path, stdout=subprocess.PIPE,
                          stderr=subprocess.PIPE)
    assert version.returncode == 0 and version.stdout.startswith("shardmill "), version.stderr
    api = run_command([sys.executable, "-P", "-c", "import shardmill; print(shardmill.MLP.__name__)"], env,
                      timeout=60, cwd=tmp_path, stdout=subprocess.PIPE, stderr=subprocess.PIPE)
    assert api.stdout.strip() == "MLP", api.stderr  # python -P keeps the current folder off sys.path
    demo = run_command([str(command), "demo", "--rows", "400", "--epochs", "1", "--ranks", "2", "--out-dir", "d"],
                       env, timeout=300, cwd=tmp_path, stdout=subprocess.PIPE, stderr=subprocess.PIPE)
    assert demo.returncode == 0, demo.stderr
    assert np.load(tmp_path / "d" / "windows.npy", allow_pickle=False).shape[0] == 400


def test_continue_never_clears_a_finished_runs_results(tmp_path: Path) -> None:
    # a review finding: with checkpoints/ removed, --continue once replaced final.npz and best.npz without a word
    job = _job(tmp_path)
    assert run_cli(["train", str(job), "--no-progress"], cwd=tmp_path).returncode == 0
    final = (tmp_path / "run" / "final.npz").read_bytes()
    import shutil

    shutil.rmtree(tmp_path / "run" / "checkpoints")
    done = run_cli(["train", str(job), "--no-progress", "--continue", "--set", "run.seed=5"], cwd=tmp_path)
    assert done.returncode == 2 and "holds an earlier run" in done.stderr, done.stderr
    assert (tmp_path / "run" / "final.npz").read_bytes() == final


def test_the_template_takes_a_trailing_set_without_a_bash_error(tmp_path: Path) -> None:
    job = _job(tmp_path)
    fake = tmp_path / "bin"
    fake.mkdir()
    (fake / "srun").write_text('#!/bin/bash\nwhile [[ "$1" == --* ]]; do shift; done\nexec "$@"\n')
    (fake / "srun").chmod(0o755)
    env = {**rank_environment(threads=1, launched=False),
           "PATH": f"{fake}{os.pathsep}{Path(sys.executable).parent}{os.pathsep}{os.environ['PATH']}"}
    done = run_command(["bash", str(ROOT / "scripts" / "slurm-train.sh"), str(job), "--set"], env, timeout=300,
                       cwd=tmp_path, stdout=subprocess.PIPE, stderr=subprocess.PIPE)
    assert "unbound variable" not in done.stderr
    assert done.returncode == 2 and "--set: expected one argument" in done.stderr, done.stderr  # argparse's refusal
