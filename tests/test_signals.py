"""A batch system's SIGTERM (or Ctrl-C's SIGINT) during training: the run stops after a step with a checkpoint,
exits 128 + the signal number as a shell reports it, and its resume ends on the same bits as a run left alone.

The job trains in exact mode on 2 ranks through `--ranks 2` (the wrapper passes the signal to mpiexec, which passes
it to the ranks); exit statuses follow POSIX shells' 128 + N convention (common practice).
"""

from __future__ import annotations

import hashlib
import os
import signal
import subprocess
import sys
import time
from pathlib import Path

import numpy as np
import pytest
from helpers import make_classification, run_cli, write_job
from shardmill.parallel.launch import rank_environment

pytestmark = pytest.mark.mpi


def final_digest(workdir: Path) -> str:
    digest = hashlib.sha256()
    with np.load(workdir / "final.npz", allow_pickle=False) as archive:
        for name in ("W0", "b0", "W1", "b1", "W2", "b2"):
            digest.update(archive[name].tobytes())
    return digest.hexdigest()


def job_file(folder: Path, data: Path, workdir: str) -> Path:
    folder.mkdir(parents=True, exist_ok=True)
    return write_job(folder, {"layers": [6, 64, 64, 3], "activation": "relu", "dtype": "float64"},
                     {"global_batch": 16, "epochs": 60, "reduction": "exact", "exact_chunk": 4, "seed": 3,
                      "workdir": str(data / workdir)},
                     {"method": "adam", "learning_rate": 0.001},
                     {"inputs": str(data / "x.npy"), "targets": str(data / "y.npy"), "validation_fraction": 0.2})


@pytest.mark.parametrize("signum", [signal.SIGTERM, signal.SIGINT])
def test_a_signal_checkpoints_and_the_resume_matches_an_uninterrupted_run(tmp_path, signum):
    make_classification(tmp_path, rows=240, features=6, classes=3, seed=4)
    straight = job_file(tmp_path / "straight", tmp_path, "straight-run")
    assert run_cli(["train", str(straight), "--ranks", "2", "--no-progress"], timeout=300).returncode == 0
    job = job_file(tmp_path / "stopped", tmp_path, "stopped-run")
    command = [sys.executable, "-m", "shardmill", "train", str(job), "--ranks", "2", "--no-progress"]
    process = subprocess.Popen(command, stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True,
                               env=rank_environment(threads=1, launched=False), start_new_session=True)
    try:
        metrics = tmp_path / "stopped-run" / "metrics.jsonl"
        deadline = time.monotonic() + 120
        while not (metrics.exists() and metrics.read_text().count("\n") >= 2) and time.monotonic() < deadline:
            time.sleep(0.05)  # two epochs in: the kernels are compiled and steps are running
        os.kill(process.pid, signum)  # the wrapper alone, as a batch system's step would be signalled
        out, err = process.communicate(timeout=60)
    finally:
        if process.poll() is None:
            os.killpg(process.pid, signal.SIGKILL)
    assert process.returncode == 128 + signum, err[-3000:]
    assert f"stopped by {signal.Signals(signum).name} after step" in err and "--resume" in err
    # the command that continues it names this job file and the --ranks it ran with, not a placeholder
    assert f"`shardmill train {job} --resume --ranks 2`" in err, err[-1000:]
    assert "Traceback" not in err
    assert (tmp_path / "stopped-run" / "checkpoints" / "index.json").is_file()
    assert not (tmp_path / "stopped-run" / "final.npz").exists()  # it stopped before the end
    resumed = run_cli(["train", str(job), "--ranks", "2", "--resume", "--no-progress"], timeout=300)
    assert resumed.returncode == 0, resumed.stderr[-3000:]
    # Exact mode: the resumed run ends on the uninterrupted run's bits (README, fast and exact reduction).
    assert final_digest(tmp_path / "stopped-run") == final_digest(tmp_path / "straight-run")


def test_a_second_job_on_a_workdir_in_use_is_refused_and_a_killed_job_leaves_it_free(tmp_path):
    make_classification(tmp_path, rows=240, features=6, classes=3, seed=4)
    job = job_file(tmp_path / "job", tmp_path, "busy-run")
    text = job.read_text().replace("epochs = 60", "epochs = 400\nsave_every = 5")
    job.write_text(text)
    command = [sys.executable, "-m", "shardmill", "train", str(job), "--no-progress"]
    first = subprocess.Popen(command, stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True,
                             env=rank_environment(threads=1, launched=False), start_new_session=True)
    try:
        latest = tmp_path / "busy-run" / "checkpoints" / "index.json"
        deadline = time.monotonic() + 120
        while not latest.exists() and time.monotonic() < deadline:
            time.sleep(0.05)
        second = run_cli(["train", str(job), "--resume", "--no-progress"], timeout=120)
        assert second.returncode == 2 and "Traceback" not in second.stderr
        assert "is in use by another shardmill job" in second.stderr and f"process {first.pid}" in second.stderr
        os.killpg(first.pid, signal.SIGKILL)  # no chance to clean up: the kernel drops its lock
        first.communicate(timeout=60)
    finally:
        if first.poll() is None:
            os.killpg(first.pid, signal.SIGKILL)
    job.write_text(job.read_text().replace("epochs = 400", "epochs = 1"))  # a short run to finish with
    after = run_cli(["train", str(job), "--fresh", "--no-progress"], timeout=120)
    assert after.returncode == 0, after.stderr[-2000:]  # the killed job's lock went with it
