"""What the benchmark scripts share: the machine record, the load meter, JSON out, children that print JSON.

The scripts under ``benchmarks/`` import this from the installed package (no path tricks). Timing itself is
``shardmill.timing`` (repeat, median, slowest rank); starting ranks is ``shardmill.parallel.launch``, which
also pins BLAS to one thread in every child it starts.
"""

from __future__ import annotations

import datetime
import json
import os
import subprocess
import sys
import time
from collections.abc import Callable, Sequence
from pathlib import Path
from typing import Any

from shardmill.machine import machine
from shardmill.parallel.launch import BLAS_THREAD_VARIABLES, mpiexec_command, rank_environment, run_command

MID_MODEL = [784, 1024, 1024, 10]
"""The reference mid model of the benchmarks (layer widths, input first)."""

NOTED_ENVIRONMENT = ("OPENBLAS_CORETYPE", "OPENBLAS_L2_SIZE", *BLAS_THREAD_VARIABLES, "NUMBA_CACHE_DIR")
"""Environment variables the machine record notes when they are set."""


def machine_record() -> dict[str, Any]:
    """machine() plus the date (UTC, ISO 8601) and the BLAS-related environment as set."""
    record = machine()
    record["date"] = datetime.datetime.now(datetime.UTC).isoformat(timespec="seconds")
    record["environment"] = {name: os.environ[name] for name in NOTED_ENVIRONMENT if name in os.environ}
    return record


class LoadMeter:
    """CPU time used on this machine by processes other than this one and its children, during a run.

    Reads /proc/stat (Linux) at start and stop: ``background_cpu_fraction`` = (busy CPU time of the whole
    machine − CPU time of this process and its waited-for children) / (wall time · cores). 0 means the cores
    were ours alone; on a shared 2-core machine anything above ~0.1 makes absolute times unreliable (ratios
    measured in alternation suffer less). None where /proc/stat is missing.
    """

    def __init__(self) -> None:
        self._start = self._sample()

    @staticmethod
    def _sample() -> tuple[float, float, float] | None:
        """(monotonic s, machine busy CPU s, our CPU s), from the package's own meter (``shardmill.machine``)."""
        from shardmill.machine import OtherLoad

        sample = OtherLoad.sample()
        return None if sample is None else (sample[2], sample[0], sample[1])

    def stop(self, sum_over_ranks: Callable[[float], float] | None = None) -> dict[str, Any]:
        """{"background_cpu_fraction": …, "wall_s": …} since construction.

        Under MPI the other ranks are not our children: pass ``sum_over_ranks`` (a SUM allreduce of one
        float, called on every rank) so that their CPU time counts as ours too.
        """
        end = self._sample()
        own = 0.0 if self._start is None or end is None else end[2] - self._start[2]
        if sum_over_ranks is not None:
            own = sum_over_ranks(own)
        if self._start is None or end is None:
            return {"background_cpu_fraction": None}
        wall = end[0] - self._start[0]
        others = (end[1] - self._start[1]) - own
        return {"background_cpu_fraction": max(0.0, others) / (wall * (os.cpu_count() or 1)), "wall_s": wall}


def busy_fraction(seconds: float = 3.0) -> float | None:
    """Fraction of all cores busy over the next ``seconds`` (from /proc/stat; None where it is missing)."""
    from time import sleep

    def sample() -> tuple[int, int] | None:
        try:
            with open("/proc/stat") as stat:
                fields = [int(x) for x in stat.readline().split()[1:]]
        except OSError:
            return None
        idle = fields[3] + fields[4]
        return sum(fields[:8]) - idle, idle

    first = sample()
    sleep(seconds)
    second = sample()
    if first is None or second is None:
        return None
    busy, idle = second[0] - first[0], second[1] - first[1]
    return busy / max(busy + idle, 1)


def wait_until_quiet(limit_s: float, threshold: float = 0.15) -> dict[str, Any]:
    """Wait (at most ``limit_s`` seconds) until other processes keep less than ``threshold`` of the cores busy.

    Returns what happened: {"waited_s", "busy_fraction", "quiet"}. Used by run_all --wait-quiet on shared
    machines; the measurement runs anyway when the limit passes, and the JSON says it was not quiet.
    """
    from time import perf_counter

    begin = perf_counter()
    while True:
        busy = busy_fraction()
        quiet = busy is None or busy < threshold
        if quiet or perf_counter() - begin >= limit_s:
            return {"waited_s": perf_counter() - begin, "busy_fraction": busy, "quiet": quiet}
        log(f"machine busy ({busy:.0%} of the cores); waiting for a quiet moment")


def emit(result: dict[str, Any]) -> None:
    """Print one JSON object on stdout (the only thing a benchmark script writes there)."""
    print(json.dumps(result, indent=1, allow_nan=True), flush=True)


def emit_measured(result: dict[str, Any], begin: float, meter: LoadMeter) -> None:
    """:func:`emit` ``result`` with what every script ends with: its seconds since ``begin`` (perf_counter), the
    background load ``meter`` saw, and the machine record."""
    emit({**result, "seconds": time.perf_counter() - begin, "load": meter.stop(), "machine": machine_record()})


def last_json(text: str) -> dict[str, Any]:
    """The JSON object a child printed on stdout (the last line, or the whole text when it is indented)."""
    text = text.strip()
    try:
        return json.loads(text)
    except json.JSONDecodeError:
        return json.loads(text.splitlines()[-1])


def run_child(python_args: Sequence[str], timeout: float, ranks: int | None = None,
              launcher_args: Sequence[str] = (), cwd: str | Path | None = None) -> dict[str, Any]:
    """Run ``python PYTHON_ARGS`` (under mpiexec on ``ranks`` processes when given) with BLAS pinned to one thread;
    return the JSON object it printed, or an ``error`` record on failure (never raises).

    stderr of the child is passed through to ours, so progress and warnings stay visible.
    """
    if ranks is None:
        command = [sys.executable, *python_args]
    else:
        command = mpiexec_command(ranks, python_args, launcher_args)
    env = rank_environment(threads=1, launched=ranks is not None)
    try:
        done = run_command(command, env, timeout=timeout, stdout=subprocess.PIPE, cwd=cwd)
    except subprocess.TimeoutExpired:
        return {"error": f"timed out after {timeout:.0f} s", "command": command}
    if done.returncode != 0:
        return {"error": f"exit status {done.returncode}", "command": command, "stdout_tail": done.stdout[-2000:]}
    try:
        return last_json(done.stdout)
    except (json.JSONDecodeError, IndexError):
        return {"error": "no JSON on stdout", "command": command, "stdout_tail": done.stdout[-2000:]}


def log(message: str) -> None:
    """Progress line on stderr (stdout carries only the JSON)."""
    print(f"[bench] {message}", file=sys.stderr, flush=True)
