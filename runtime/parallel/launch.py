"""Starting shardmill under the bundled (or site) ``mpiexec`` for ``--ranks P``."""

from __future__ import annotations

import os
import shutil
import subprocess
import sys
from pathlib import Path

from shardmill.config import JobError

LAUNCHED = "SHARDMILL_LAUNCHED"


def find_mpiexec() -> str:
    """The ``mpiexec`` beside this Python (the MPICH wheel puts it there), else the first on PATH.

    Set SHARDMILL_MPIEXEC to use a site launcher (e.g. ``srun`` wrappers are better called directly).
    """
    chosen = os.environ.get("SHARDMILL_MPIEXEC")
    if chosen:
        return chosen
    beside = Path(sys.executable).parent / "mpiexec"
    if beside.exists():
        return str(beside)
    found = shutil.which("mpiexec")
    if not found:
        raise JobError("`--ranks` needs mpiexec: install the `mpich` wheel or set SHARDMILL_MPIEXEC")
    return found


def mpiexec_command(ranks: int, args: list[str]) -> list[str]:
    """Command line that runs ``python -m shardmill ARGS`` on ``ranks`` processes."""
    return [find_mpiexec(), "-n", str(ranks), sys.executable, "-m", "shardmill", *args]


def relaunch(ranks: int, args: list[str], timeout: float | None = None) -> int:
    """Run ``shardmill ARGS`` on ``ranks`` processes and return the job's exit status."""
    if ranks < 1:
        raise JobError(f"`--ranks` must be ≥ 1; got {ranks}")
    env = dict(os.environ, **{LAUNCHED: "1"})
    try:
        return subprocess.run(mpiexec_command(ranks, args), env=env, timeout=timeout).returncode
    except subprocess.TimeoutExpired:
        print(f"shardmill: error: the {ranks}-process job ran past {timeout} s and was stopped", file=sys.stderr)
        return 124


def strip_ranks(argv: list[str]) -> list[str]:
    """argv without ``--ranks P`` / ``--ranks=P``."""
    out, skip = [], False
    for i, a in enumerate(argv):
        if skip:
            skip = False
            continue
        if a == "--ranks" and i + 1 < len(argv):
            skip = True
            continue
        if a.startswith("--ranks="):
            continue
        out.append(a)
    return out
