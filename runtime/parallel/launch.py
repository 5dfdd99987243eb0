"""The one place that finds and starts ``mpiexec``: for ``--ranks P``, the scaling study, the benchmarks and the tests.

Three steps, one function each: :func:`find_mpiexec` (which launcher, with its own arguments),
:func:`rank_environment` (what every started process sees: BLAS threads, unbuffered output, the
:data:`LAUNCHED` marker) and :func:`mpiexec_command` (the command line); :func:`run_command` runs a command
with a time limit and ends the whole run, ranks included, when the limit passes.
"""

from __future__ import annotations

import os
import shlex
import shutil
import signal
import subprocess
import sys
import threading
import time
from collections.abc import Callable, Mapping, Sequence
from pathlib import Path
from typing import IO, Any

from shardmill.errors import JobError

LAUNCHED = "SHARDMILL_LAUNCHED"
"""Set in the environment of processes shardmill started under mpiexec, so they do not start mpiexec again."""

MPIEXEC_VARIABLE = "SHARDMILL_MPIEXEC"
"""A site launcher with its own arguments, e.g. ``mpiexec -bind-to core`` (split like a shell would)."""

BLAS_THREAD_VARIABLES = ("OPENBLAS_NUM_THREADS", "OMP_NUM_THREADS", "MKL_NUM_THREADS")
"""The variables OpenBLAS, OpenMP builds and MKL read for their thread count when they load."""

THREAD_WAITS = {"OPENBLAS_THREAD_TIMEOUT": "4", "GOMP_SPINCOUNT": "10000"}
"""How long idle threads spin before they sleep, read when the libraries load (a value already set wins; the package
sets them on import, before numpy loads, and every process started here gets them). With T > 1
BLAS's threads and the kernels' OpenMP threads take turns on the same cores: OpenBLAS's default spin (2^28 cycles
after each GEMM) and GNU OpenMP's kept each pool spinning through the other's work. Measured on the 2-core VM,
784-1024-1024-10, G = 512, Adam, T = 2: step 74.0 ms with both defaults, 21.0 ms with these (20.9 with kernels on
one thread and these; benchmarks/README.md)."""

POLL_S = 0.2
"""Seconds between looks at a running command (time limit, progress callback)."""


def find_mpiexec() -> list[str]:
    """The launcher as command words: SHARDMILL_MPIEXEC (with any arguments it carries), else the ``mpiexec``
    beside this Python (the MPICH wheel puts it there), else the first on PATH. JobError when there is none.
    """
    chosen = os.environ.get(MPIEXEC_VARIABLE, "").strip()
    if chosen:
        return shlex.split(chosen)
    beside = Path(sys.executable).parent / "mpiexec"
    if beside.exists():
        return [str(beside)]
    found = shutil.which("mpiexec")
    if not found:
        raise JobError(f"starting ranks needs mpiexec: install the `mpich` wheel or set {MPIEXEC_VARIABLE}")
    return [found]


TERMINAL = "SHARDMILL_ON_TERMINAL"
"""Set (to 1) in the ranks ``--ranks P`` starts when its own stderr is a terminal: the ranks' is a pipe, so rank 0
would otherwise draw no progress bar."""


def rank_environment(threads: int | None = 1, launched: bool = True,
                     base: Mapping[str, str] | None = None) -> dict[str, str]:
    """Environment of a started process: ``base`` (default: this one's) plus what every process we start needs.

    ``threads``: BLAS threads per process, set in every BLAS thread variable (None leaves them as they are,
    so a job's ``run.threads`` decides); idle threads sleep soon (:data:`THREAD_WAITS`). Output is unbuffered,
    so a rank's last line is not lost when the job aborts. ``launched`` sets the :data:`LAUNCHED` marker (a process
    under mpiexec must not start it again).
    """
    env = dict(os.environ if base is None else base)
    if threads is not None:
        env.update(dict.fromkeys(BLAS_THREAD_VARIABLES, str(threads)))
    for name, value in THREAD_WAITS.items():
        env.setdefault(name, value)
    env["PYTHONUNBUFFERED"] = "1"
    if launched:
        env[LAUNCHED] = "1"
    return env


def mpiexec_command(ranks: int, python_args: Sequence[str], launcher_args: Sequence[str] = ()) -> list[str]:
    """``mpiexec -n RANKS [LAUNCHER_ARGS] python PYTHON_ARGS``, with this interpreter and the launcher found above.

    ``python_args`` starts with a script path or ``-m module``; ``launcher_args`` are mpiexec's own
    options, e.g. ``("-bind-to", "core")`` for MPICH's Hydra.
    """
    if ranks < 1:
        raise JobError(f"`--ranks` must be ≥ 1; got {ranks}")
    return [*find_mpiexec(), "-n", str(ranks), *launcher_args, sys.executable, *python_args]


def run_command(command: Sequence[str], env: Mapping[str, str], timeout: float | None = None,
                stdout: int | IO[Any] | None = None, stderr: int | IO[Any] | None = None,
                cwd: str | Path | None = None, own_group: bool = True,
                while_running: Callable[[float], None] | None = None,
                forward_signals: bool = False) -> subprocess.CompletedProcess:
    """Run ``command`` to its end and return it completed (text output where ``stdout``/``stderr`` is PIPE).

    ``stdout``/``stderr`` as for subprocess (None: ours, PIPE: captured, a file, STDOUT). ``while_running`` is
    called with the seconds elapsed every POLL_S seconds. With ``own_group`` the command runs in its own
    session, so that on a time limit, Ctrl-C or any exception here the launcher *and every rank* are ended
    (SIGTERM to the group, SIGKILL if it lingers); without, only the process itself is killed (the ``--ranks``
    path keeps the terminal's group, so Ctrl-C reaches mpiexec as typed). Past ``timeout`` seconds the run is
    stopped and ``subprocess.TimeoutExpired`` raised. ``forward_signals``: a SIGTERM or SIGINT sent to this
    process while the command runs is passed on to it (a batch system signals the `--ranks` wrapper; mpiexec
    passes it to the ranks, which checkpoint and stop) instead of ending this process alone.
    """
    process = subprocess.Popen(list(command), stdout=stdout, stderr=stderr, text=True, env=dict(env), cwd=cwd,
                               start_new_session=own_group)
    previous = {}
    if forward_signals and threading.current_thread() is threading.main_thread():
        for signum in (signal.SIGTERM, signal.SIGINT):
            previous[signum] = signal.signal(signum, lambda received, frame: process.send_signal(received))
    begin = time.perf_counter()
    try:
        while True:
            try:
                out, err = process.communicate(timeout=POLL_S)  # retrying loses no output (subprocess docs)
                break
            except subprocess.TimeoutExpired:
                elapsed = time.perf_counter() - begin
                if timeout is not None and elapsed > timeout:
                    raise subprocess.TimeoutExpired(process.args, timeout) from None
                if while_running is not None:
                    while_running(elapsed)
    finally:
        for signum, handler in previous.items():
            signal.signal(signum, handler)
        if process.poll() is None:
            _stop(process, own_group)
    return subprocess.CompletedProcess(process.args, process.returncode, out, err)


def _stop(process: subprocess.Popen, own_group: bool) -> None:
    """End the launcher and (with its own group) its ranks: SIGTERM, then SIGKILL if it lingers."""
    for sig in (signal.SIGTERM, signal.SIGKILL):
        try:
            if own_group:
                os.killpg(process.pid, sig)
            else:
                process.send_signal(sig)
        except ProcessLookupError:
            return
        try:
            process.communicate(timeout=5)
            return
        except subprocess.TimeoutExpired:
            continue


def run_ranks(ranks: int, python_args: Sequence[str], threads: int | None = 1, launcher_args: Sequence[str] = (),
              timeout: float | None = None, **options: Any) -> subprocess.CompletedProcess:
    """``python PYTHON_ARGS`` on ``ranks`` processes under mpiexec, environment from :func:`rank_environment`.

    ``options`` go to :func:`run_command` (stdout, stderr, cwd, own_group, while_running); ``env`` there
    adds to the environment. Raises ``subprocess.TimeoutExpired`` past ``timeout`` seconds.
    """
    env = rank_environment(threads) | dict(options.pop("env", None) or {})
    return run_command(mpiexec_command(ranks, python_args, launcher_args), env, timeout=timeout, **options)


def run_for_status(ranks: int, python_args: Sequence[str], timeout: float | None = None, **options: Any) -> int:
    """:func:`run_ranks` with output passed through; returns the exit status, 124 (and says so) past ``timeout``."""
    try:
        return run_ranks(ranks, python_args, timeout=timeout, **options).returncode
    except subprocess.TimeoutExpired:
        print(f"shardmill: error: the {ranks}-process job ran past {timeout:g} s and was stopped", file=sys.stderr)
        return 124


def relaunch(ranks: int, args: list[str], timeout: float | None = None) -> int:
    """Run ``shardmill ARGS`` on ``ranks`` processes and return the job's exit status (``--ranks P``).

    BLAS threads are left to the job (``run.threads``), and the run stays in the terminal's process group.
    """
    # -P: the current folder stays off sys.path, so a folder named shardmill there (a clone) cannot shadow the package
    # The ranks' output reaches the terminal through mpiexec's pipes; TERMINAL tells rank 0 a person watches it.
    env = {TERMINAL: "1"} if sys.stderr.isatty() else {}
    return run_for_status(ranks, ["-P", "-m", "shardmill", *args], timeout=timeout, threads=None, own_group=False,
                          forward_signals=True, env=env)


def ignore_late_signals() -> None:
    """The job is over and this process is about to exit with its status: a SIGTERM or SIGINT now must not turn
    that status into "killed by a signal" (a batch system's late signal, a Ctrl-C at the prompt's return)."""
    if threading.current_thread() is threading.main_thread():
        for signum in (signal.SIGTERM, signal.SIGINT):
            signal.signal(signum, signal.SIG_IGN)


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
