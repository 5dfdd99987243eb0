"""Promises the suite had not tested: the narrow exact format's chunk limit, verify at a process count that does not
divide G, a fast-mode resume at another process count, and a diverging run's parameters.

References: Higham's bound (verify, 2002 §4.2); for the narrow format, its stated grid (30-bit int32 sums of at most
64 chunks: ``exactformats.py``); for a fast-mode resume, verify's own statement that fast mode differs from a
serial sum only in summation order, so a resumed run stays within float rounding of an uninterrupted one (the
tolerance below is common practice for float64 training runs of a few steps, not a derived bound).
"""

from __future__ import annotations

import json
from pathlib import Path

import numpy as np
import pytest
import shardmill as sm
from helpers import run_cli, run_mpi, write_job
from shardmill.errors import JobError
from shardmill.parallel.comm import Comm
from shardmill.training.trainer import Diverged, Trainer
from sklearn.datasets import load_wine


@pytest.fixture()
def wine(tmp_path: Path) -> Path:
    X, y = load_wine(return_X_y=True)
    np.save(tmp_path / "x.npy", X)
    np.save(tmp_path / "y.npy", y)
    return tmp_path


def _job(folder: Path, **run) -> sm.Job:
    return sm.job_from_dict({"model": {"layers": [13, 8, 3], "dtype": "float64"},
                             "data": {"inputs": str(folder / "x.npy"), "targets": str(folder / "y.npy")},
                             "optimizer": {"method": "sgd", "learning_rate": 0.05},
                             "run": {"global_batch": 16, "workdir": str(folder / "run"), **run}})


@pytest.mark.parametrize("chunks, allowed", [(64, True), (65, False)])
def test_the_narrow_format_takes_at_most_64_chunks(wine: Path, chunks: int, allowed: bool) -> None:
    job = _job(wine, global_batch=chunks, exact_chunk=1, reduction="exact", exact_format="narrow", max_steps=1)
    if allowed:
        assert sm.train(job, progress=False)["steps"] == 1
    else:
        with pytest.raises(JobError, match="allows at most 64 chunks per step"):
            sm.train(job, progress=False)


@pytest.mark.mpi
def test_verify_agrees_at_a_process_count_that_does_not_divide_the_batch(wine: Path) -> None:
    job = write_job(wine, {"layers": [13, 8, 3]}, {"global_batch": 10, "workdir": "run"},
                    data={"inputs": "x.npy", "targets": "y.npy"})
    done = run_mpi(3, ["-m", "shardmill", "verify", str(job), "--json"], timeout=180)  # shards of 3, 3 and 4 rows
    assert done.returncode == 0, done.stderr
    report = json.loads(done.stdout)
    assert report["processes"] == 3 and report["verdict"] == "agree" and report["max_bound_ratio"] <= 1.0


@pytest.mark.mpi
def test_a_fast_mode_resume_at_another_process_count(wine: Path) -> None:
    straight = write_job(wine, {"layers": [13, 8, 3], "dtype": "float64"},
                         {"global_batch": 16, "epochs": 2, "workdir": "straight"},
                         data={"inputs": "x.npy", "targets": "y.npy"})
    assert run_mpi(2, ["-m", "shardmill", "train", str(straight), "--no-progress"]).returncode == 0
    text = straight.read_text().replace('workdir = "straight"', 'workdir = "stopped"')
    stopped = wine / "stopped.toml"
    stopped.write_text(text.replace("[run]", "[run]\nmax_steps = 7"))
    assert run_mpi(2, ["-m", "shardmill", "train", str(stopped), "--no-progress"]).returncode == 0
    stopped.write_text(text)
    resumed = run_mpi(3, ["-m", "shardmill", "train", str(stopped), "--resume", "--no-progress"])
    assert resumed.returncode == 0, resumed.stderr
    assert "continuing from the checkpoint of step 7" in resumed.stdout + resumed.stderr
    with np.load(wine / "straight" / "final.npz") as a, np.load(wine / "stopped" / "final.npz") as b:
        for name in ("W0", "b0", "W1", "b1"):  # the same steps, summed in another order at P = 3
            np.testing.assert_allclose(b[name], a[name], rtol=1e-9, atol=1e-12)


def test_a_diverging_step_leaves_the_parameters_of_the_step_before(wine: Path) -> None:
    trainer = Trainer(_job(wine), Comm.alone())
    trainer.step(0, 0)
    before = trainer.model.params.copy()
    trainer.model.params[0] = np.inf  # a parameter gone bad makes the next loss non-finite
    expected = trainer.model.params.copy()
    with pytest.raises(Diverged) as err:
        trainer.step(0, 1)
    assert err.value.step == 2
    # the step raised at its agreement, before the update: nothing moved
    np.testing.assert_array_equal(trainer.model.params, expected)
    assert trainer.step_count == 1
    assert not np.array_equal(before, expected)


def test_the_demo_succeeds_end_to_end(tmp_path: Path) -> None:
    done = run_cli(["demo", "--rows", "600", "--epochs", "1", "--ranks", "1", "--out-dir", str(tmp_path)],
                   timeout=300)
    assert done.returncode == 0, done.stderr[-2000:]
    assert "verdict: AGREE" in done.stdout and "held-out accuracy" in done.stdout
    assert (tmp_path / "run" / "final.npz").is_file() and (tmp_path / "verify.json").is_file()


@pytest.mark.mpi
@pytest.mark.parametrize("delay", [0.5, 1.2, 2.0])
def test_a_sigterm_while_the_ranks_start_ends_cleanly(wine: Path, delay: float) -> None:
    import signal
    import subprocess
    import sys
    import time

    from shardmill.parallel.launch import rank_environment

    job = write_job(wine, {"layers": [13, 8, 3]}, {"global_batch": 16, "epochs": 500, "workdir": "run"},
                    data={"inputs": "x.npy", "targets": "y.npy"})
    process = subprocess.Popen([sys.executable, "-m", "shardmill", "train", str(job), "--ranks", "2",
                                "--no-progress"], env=rank_environment(threads=1, launched=False),
                               stdout=subprocess.PIPE, stderr=subprocess.STDOUT, text=True, start_new_session=True)
    time.sleep(delay)  # imports, data, kernels: before the training loop's own handlers, at some of these
    process.send_signal(signal.SIGTERM)
    out, _ = process.communicate(timeout=120)
    # 143 from the ranks' clean stop, or the launcher itself ended by the signal before it started any rank (a
    # shell reports both as 143)
    assert process.returncode in (128 + signal.SIGTERM, -signal.SIGTERM), out[-2000:]
    assert "BAD TERMINATION" not in out and "Traceback" not in out, out[-2000:]


@pytest.mark.mpi
def test_a_signal_after_the_job_ended_does_not_kill_the_launcher(tmp_path: Path) -> None:
    import subprocess
    import sys

    code = ("import os, signal; from shardmill.commands import cli; "
            "cli.relaunch = lambda ranks, args: 0; status = cli.main(['train', 'job.toml', '--ranks', '2']); "
            "os.kill(os.getpid(), signal.SIGTERM); print('exit', status)")  # the job itself stubbed out
    done = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True, timeout=120, cwd=tmp_path)
    assert done.returncode == 0 and "exit 0" in done.stdout, done.stderr[-2000:]
