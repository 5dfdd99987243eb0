"""Shared test helpers: tiny data sets, job files, and running shardmill under a real mpiexec."""

from __future__ import annotations

import json
import os
import shutil
import subprocess
import sys
from pathlib import Path

import numpy as np
import pytest

# One BLAS thread per process in every test (ranks on 2 cores would otherwise fight). common practice
os.environ.setdefault("OPENBLAS_NUM_THREADS", "1")
os.environ.setdefault("OMP_NUM_THREADS", "1")
os.environ.setdefault("MKL_NUM_THREADS", "1")


def mpiexec() -> str:
    """The launcher beside this interpreter (the MPICH wheel installs it there), else the one on PATH."""
    beside = Path(sys.executable).parent / "mpiexec"
    found = str(beside) if beside.exists() else shutil.which("mpiexec")
    if not found:
        pytest.skip("no mpiexec available")
    return found


def run_mpi(n: int, args: list[str], timeout: float = 120, cwd: str | Path | None = None,
            env: dict | None = None) -> subprocess.CompletedProcess:
    """Run ``python ARGS`` on n processes under mpiexec; returns the completed process (text output).

    ARGS starts with a script path or ``-m shardmill``. Raises on timeout, so a hang fails the test.
    """
    full_env = dict(os.environ, OPENBLAS_NUM_THREADS="1", PYTHONUNBUFFERED="1", **(env or {}))
    cmd = [mpiexec(), "-n", str(n), sys.executable, *args]
    return subprocess.run(cmd, capture_output=True, text=True, timeout=timeout, cwd=cwd, env=full_env)


def run_cli(args: list[str], timeout: float = 120, cwd: str | Path | None = None) -> subprocess.CompletedProcess:
    """Run ``python -m shardmill ARGS`` in one process (no launcher)."""
    env = dict(os.environ, OPENBLAS_NUM_THREADS="1", PYTHONUNBUFFERED="1")
    return subprocess.run([sys.executable, "-m", "shardmill", *args], capture_output=True, text=True,
                          timeout=timeout, cwd=cwd, env=env)


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
