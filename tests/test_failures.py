"""Failures under a real mpiexec end the whole job quickly, non-zero, with a message that names the problem.

A data-parallel job must never leave ranks waiting in a collective for a partner that is gone (DEVELOPERS.md,
conventions: any uncaught exception on any rank ends the whole job). Each test measures the wall time of
the launcher and requires it under 30 s; ``run_mpi`` also has a hard timeout, so a hang fails instead of
blocking the suite. User errors exit 2 with one line (DEVELOPERS.md, conventions).
"""

from __future__ import annotations

import json
import os
import re
import subprocess
import sys
import time
from pathlib import Path

import numpy as np
import pytest
from helpers import make_classification, run_cli, run_mpi, write_job
from shardmill.data.rows import split_rows

pytestmark = pytest.mark.mpi

SCRIPT = Path(__file__).parent / "mpi_scripts" / "faulty_train.py"
LIMIT_S = 30.0  # the brief: a failing job must be over within 30 s
HARD_TIMEOUT_S = 60.0
ROWS, VALIDATION, SEED = 60, 0.2, 4


def make_job(folder: Path, run: dict | None = None, data: dict | None = None) -> Path:
    make_classification(folder, rows=ROWS, features=6, classes=3, seed=1)
    return write_job(folder, model={"layers": [6, 8, 3], "activation": "tanh", "dtype": "float64"},
                     data={"inputs": "x.npy", "targets": "y.npy", "validation_fraction": VALIDATION, **(data or {})},
                     run={"epochs": 3, "global_batch": 8, "seed": SEED, "workdir": "run", **(run or {})})


@pytest.fixture(scope="module", autouse=True)
def warm_kernel_cache(tmp_path_factory) -> None:
    """One serial run first, so that the timed runs measure failure handling, not Numba compiling a cold cache."""
    job = make_job(tmp_path_factory.mktemp("warm"), run={"epochs": 1})
    proc = run_cli(["train", str(job), "--no-progress"], timeout=300)
    assert proc.returncode == 0, proc.stderr[-2000:]


def timed(n: int, args: list[str], cwd: Path):
    begin = time.perf_counter()
    proc = run_mpi(n, args, timeout=HARD_TIMEOUT_S, cwd=cwd)
    return proc, time.perf_counter() - begin


def fault(n: int, mode: str, job: Path, out: Path | None = None):
    return timed(n, [str(SCRIPT), mode, str(job)] + ([str(out)] if out else []), job.parent)


@pytest.mark.parametrize("where, standardize", [("train", True), ("validation", True), ("train", False)])
def test_non_finite_row_is_named_and_ends_the_job(tmp_path, where, standardize):
    job = make_job(tmp_path, data={"standardize": standardize})
    X = np.load(tmp_path / "x.npy")
    split = split_rows(ROWS, VALIDATION, SEED)  # only to choose which row to spoil
    row = int(getattr(split, where)[3])
    X[row, 2] = np.nan
    np.save(tmp_path / "x.npy", X)
    proc, seconds = timed(2, ["-m", "shardmill", "train", str(job), "--no-progress"], tmp_path)
    assert seconds < LIMIT_S
    assert proc.returncode == 2, proc.stderr[-2000:]  # a data error is the user's: exit 2
    assert f"row {row} " in proc.stderr and "non-finite" in proc.stderr, proc.stderr[-2000:]
    # README, failures: the message names the rank that read the row and the row
    assert re.search(rf"\[rank [01]\] `data.inputs` row {row} ", proc.stderr), proc.stderr[-2000:]
    assert "Traceback" not in proc.stderr  # one line for user errors (DEVELOPERS.md, conventions)


def test_non_finite_value_appearing_mid_run_on_one_rank_ends_the_job(tmp_path):
    job = make_job(tmp_path)
    proc, seconds = fault(2, "corrupt", job)
    assert seconds < LIMIT_S
    assert proc.returncode != 0
    row = int(proc.stdout.split("corrupt row ")[1].split()[0])
    assert f"[rank 1] `data.inputs` row {row} " in proc.stderr, proc.stderr[-2000:]


@pytest.mark.parametrize("P", [2, 3])
def test_rank_raising_mid_training_ends_the_job_and_names_the_rank(tmp_path, P):
    job = make_job(tmp_path)
    proc, seconds = fault(P, "raise", job)
    assert seconds < LIMIT_S
    assert proc.returncode != 0
    assert "[rank 1]" in proc.stderr and "planted failure" in proc.stderr, proc.stderr[-2000:]
    assert not (tmp_path / "run" / "final.npz").exists()


def test_killed_rank_ends_the_job(tmp_path):
    job = make_job(tmp_path)
    proc, seconds = fault(3, "kill", job)
    assert seconds < LIMIT_S
    assert proc.returncode != 0
    assert not (tmp_path / "run" / "final.npz").exists()


def test_file_missing_on_one_rank_names_the_rank(tmp_path):
    job = make_job(tmp_path)
    proc, seconds = fault(2, "missing", job)
    assert seconds < LIMIT_S
    assert proc.returncode == 2, proc.stderr[-2000:]
    assert "[rank 1]" in proc.stderr and "does not exist" in proc.stderr, proc.stderr[-2000:]
    assert "no-such-inputs-on-this-node.npy" in proc.stderr


def test_global_batch_smaller_than_process_count_is_a_clear_error(tmp_path):
    job = make_job(tmp_path, run={"global_batch": 2})
    proc, seconds = timed(3, ["-m", "shardmill", "train", str(job), "--no-progress"], tmp_path)
    assert seconds < LIMIT_S
    assert proc.returncode == 2, proc.stderr[-2000:]
    assert "global_batch" in proc.stderr and "Traceback" not in proc.stderr, proc.stderr[-2000:]
    assert proc.stderr.count("shardmill: error:") == 1  # printed once, by rank 0


def test_consistency_check_passes_on_a_normal_run(tmp_path):
    job = make_job(tmp_path, run={"check_every": 1})
    out = tmp_path / "finished.json"
    proc, seconds = fault(2, "none", job, out)  # the same wrapper as the faulty runs, with no fault planted
    assert proc.returncode == 0, proc.stderr[-2000:]
    assert json.loads(out.read_text()) == {"finished": True, "processes": 2}
    assert (tmp_path / "run" / "final.npz").is_file()
    assert "drifted" not in proc.stderr


def test_parameters_drifting_on_one_rank_stop_the_job_loudly(tmp_path):
    job = make_job(tmp_path, run={"check_every": 1})
    out = tmp_path / "finished.json"
    proc, seconds = fault(2, "drift", job, out)
    assert seconds < LIMIT_S
    assert proc.returncode != 0
    # nudged before step 3, so the check after step 3 is the first to see it (run.check_every = 1)
    assert "parameters drifted apart across ranks at step 3" in proc.stderr, proc.stderr[-2000:]
    assert not out.exists()



class _FakeWorld:
    """COMM_WORLD stand-in: rank 1 of 2 that records when Abort is called instead of ending the process."""

    def __init__(self) -> None:
        self.aborted_at: list[float] = []

    def Get_rank(self) -> int:  # noqa: N802 - mpi4py's names
        return 1

    def Get_size(self) -> int:  # noqa: N802
        return 2

    def Abort(self, code: int) -> None:  # noqa: N802
        self.aborted_at.append(time.perf_counter())
        raise SystemExit(code)


def test_abort_waits_for_the_launcher_to_forward_the_message(monkeypatch, capsys):
    """The failing rank's message must leave before MPI_Abort (CI once saw exit 2 with empty stderr).

    Hydra forwards stderr and the abort request on separate channels, so ``abort_world`` flushes and then
    waits ``ABORT_GRACE_S`` before aborting.
    """
    from shardmill.parallel import comm as comm_module

    world = _FakeWorld()
    monkeypatch.setattr(comm_module.MPI, "COMM_WORLD", world)

    def failing_main() -> int:
        raise RuntimeError("planted")

    begin = time.perf_counter()
    with pytest.raises(SystemExit) as exit_info:
        comm_module.run_guarded(failing_main)
    assert exit_info.value.code == 1
    assert "[rank 1] failed: RuntimeError('planted')" in capsys.readouterr().err
    assert len(world.aborted_at) == 1
    assert world.aborted_at[0] - begin >= comm_module.ABORT_GRACE_S


def test_a_reader_that_goes_away_ends_the_run_quietly(tmp_path):
    # `shardmill train … | head -1`: the next line has nowhere to go. SIGPIPE's status (128 + 13), no traceback.
    make_classification(tmp_path, rows=4000, features=6, classes=3, seed=0)
    job = write_job(tmp_path, {"layers": [6, 256, 256, 3], "activation": "relu"}, {"global_batch": 16, "epochs": 4})
    command = [sys.executable, "-m", "shardmill", "train", str(job), "--no-progress"]
    proc = subprocess.Popen(command, stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True, cwd=tmp_path,
                            env=dict(os.environ, OPENBLAS_NUM_THREADS="1", PYTHONUNBUFFERED="1"))
    first = proc.stdout.readline()  # the first epoch's line
    proc.stdout.close()  # ... and the reader is gone
    err = proc.stderr.read()
    proc.wait(timeout=120)
    assert first.startswith(("epoch", "compiling", "kernels")), first
    assert proc.returncode == 141, err[-2000:]
    assert "Traceback" not in err
