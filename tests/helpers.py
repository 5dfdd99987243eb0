"""Test helpers: tiny data sets, job files, and running shardmill (one process, or under a real mpiexec).

Processes start through ``shardmill.parallel.launch``, the launcher shardmill itself uses (SHARDMILL_MPIEXEC,
else the bundled mpiexec, else PATH), with one BLAS thread each and unbuffered output. Every run has a time
limit; past it the whole run (launcher and ranks) is ended and ``subprocess.TimeoutExpired`` raised, so a
hang fails the test instead of reading as an exit status.
"""

from __future__ import annotations

import json
import subprocess
import sys
from fractions import Fraction
from pathlib import Path

import numpy as np
import pytest
from shardmill.errors import JobError
from shardmill.parallel.launch import find_mpiexec, rank_environment, run_command, run_ranks


def mpiexec() -> list[str]:
    """The launcher's command words (see ``shardmill.parallel.launch.find_mpiexec``); skips the test without one."""
    try:
        return find_mpiexec()
    except JobError:
        pytest.skip("no mpiexec available")


def run_mpi(n: int, args: list[str], timeout: float = 120, cwd: str | Path | None = None,
            env: dict | None = None) -> subprocess.CompletedProcess:
    """Run ``python ARGS`` on n processes under mpiexec; returns the completed process (text output).

    ARGS starts with a script path or ``-m shardmill``; ``env`` adds to the environment. Raises on timeout.
    """
    mpiexec()
    return run_ranks(n, args, threads=1, timeout=timeout, cwd=cwd, env=env, stdout=subprocess.PIPE,
                     stderr=subprocess.PIPE)


def run_cli(args: list[str], timeout: float = 120, cwd: str | Path | None = None) -> subprocess.CompletedProcess:
    """Run ``python -m shardmill ARGS`` in one process (no launcher); raises on timeout."""
    return run_command([sys.executable, "-m", "shardmill", *args], rank_environment(threads=1, launched=False),
                       timeout=timeout, cwd=cwd, stdout=subprocess.PIPE, stderr=subprocess.PIPE)


def make_classification(path: Path, rows: int = 240, features: int = 6, classes: int = 3, seed: int = 0,
                        dtype=np.float64) -> tuple[Path, Path]:
    """Random Gaussian-blob inputs and labels saved as x.npy / y.npy (test data only)."""
    rng = np.random.default_rng(seed)
    centres = rng.normal(0, 2, size=(classes, features))
    y = rng.integers(0, classes, size=rows)
    X = (centres[y] + rng.normal(size=(rows, features))).astype(dtype)
    path.mkdir(parents=True, exist_ok=True)
    np.save(path / "x.npy", X)
    np.save(path / "y.npy", y.astype(np.int64))
    return path / "x.npy", path / "y.npy"


def write_job(path: Path, model: dict, run: dict, optimizer: dict | None = None, data: dict | None = None) -> Path:
    """Write a TOML job file from dicts (strings, numbers, booleans and lists only)."""

    def value(v) -> str:
        if isinstance(v, bool):
            return "true" if v else "false"
        if isinstance(v, str):
            return json.dumps(v)
        if isinstance(v, list):
            return "[" + ", ".join(value(x) for x in v) + "]"
        return repr(v)

    tables = {"model": model, "data": data or {"inputs": "x.npy", "targets": "y.npy", "validation_fraction": 0.2},
              "optimizer": optimizer or {"method": "sgd", "learning_rate": 0.05}, "run": run}
    lines = []
    for name, table in tables.items():
        lines.append(f"[{name}]")
        lines += [f"{k} = {value(v)}" for k, v in table.items()]
        lines.append("")
    job = path / "job.toml"
    job.write_text("\n".join(lines))
    return job


FLOAT32_OVERFLOW = Fraction(2**128 - 2**103)  # float32 max + half an ulp: from here RN gives inf (IEEE 754 §4.3.1)


def is_nearest_float32(result: np.float32, exact: Fraction) -> bool:
    """IEEE 754-2019 §4.3.1 roundTiesToEven: no float32 is closer to exact; on a tie the significand is even."""
    if abs(exact) >= FLOAT32_OVERFLOW:
        return bool(np.isinf(result)) and (result > 0) == (exact > 0)
    error = abs(Fraction(float(result)) - exact)
    for direction in (-np.inf, np.inf):
        neighbour = np.nextafter(result, np.float32(direction))
        if np.isinf(neighbour):
            continue
        neighbour_error = abs(Fraction(float(neighbour)) - exact)
        if neighbour_error < error:
            return False
        if neighbour_error == error and np.array([result]).view(np.uint32)[0] & 1:
            return False
    return True


def stop_a_run(job: Path, ranks: int, metrics: Path, records: int = 3, signum: int | None = None,
               timeout: float = 120) -> tuple[int, str]:
    """Train ``job`` on ``ranks`` processes (``--ranks``), send the launcher SIGTERM (or ``signum``) once ``metrics``
    holds ``records`` lines, and return (exit status, stderr). The whole process group is killed if it lingers."""
    import os
    import signal
    import time

    command = [sys.executable, "-m", "shardmill", "train", str(job), "--ranks", str(ranks), "--no-progress"]
    process = subprocess.Popen(command, stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True,
                               env=rank_environment(threads=1, launched=False), start_new_session=True)
    try:
        deadline = time.monotonic() + timeout
        while not (metrics.exists() and metrics.read_text().count("\n") >= records) and time.monotonic() < deadline:
            time.sleep(0.05)
        os.kill(process.pid, signal.SIGTERM if signum is None else signum)
        _, err = process.communicate(timeout=60)
    finally:
        if process.poll() is None:
            os.killpg(process.pid, signal.SIGKILL)
    return process.returncode, err


def epoch_metrics(workdir: Path) -> list[dict]:
    """The logged training and validation metrics of each epoch (timings dropped: they differ run to run)."""
    records = [json.loads(line) for line in (workdir / "metrics.jsonl").read_text().splitlines()]
    return [{"epoch": r["epoch"], "train": r["train"], "validation": r["validation"]}
            for r in records if r["kind"] == "epoch"]
