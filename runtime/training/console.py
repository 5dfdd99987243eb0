"""What a training run prints on rank 0: the compiling notice, epoch lines, a progress bar or a heartbeat."""

from __future__ import annotations

import os
import time
from pathlib import Path
from typing import Any

HEARTBEAT_S = 30.0
"""Seconds between progress lines when no progress bar is shown (a batch log, a pipe) and ``echo`` is on."""


def epoch_line(record: dict[str, Any]) -> str:
    """One console line for an epoch record of metrics.jsonl: its own field paths (``train.loss``,
    ``validation.accuracy``…), :func:`figure`'s digits, and a ``*`` after the watched metric when it is the best so
    far."""
    best = record.get("best") or {}
    parts = [f"epoch={record['epoch']}", f"step={record['step']}"]
    for section in ("train", "validation"):
        for key in ("loss", "accuracy", "rmse"):
            if key in (record.get(section) or {}):
                mark = "*" if best.get("improved") and best.get("metric") == f"{section}.{key}" else ""
                parts.append(f"{section}.{key}={figure(record[section][key])}{mark}")
    parts.append(f"samples_per_s={record['samples_per_s']:.0f}")
    return " ".join(parts)


def figure(value: float) -> str:
    """A metric for a person: four decimals from 0.1 up (0.2309, 1364.6261), four significant digits below
    (0.0001234 → 1.234e-04), so a small regression loss never reads 0.0000."""
    if value == 0 or not abs(value) < 0.1:  # NaN and inf take the first branch too
        return f"{value:.4f}"
    return f"{value:.4g}" if abs(value) >= 1e-4 else f"{value:.3e}"


def kernels_cached() -> bool:
    """True when Numba's cache already holds compiled shardmill kernels (its index files, *.nbi)."""
    from shardmill.machine import numba_cache_dir

    folder = Path(numba_cache_dir())
    return folder.is_dir() and any(folder.rglob("*.nbi"))


def compiling_notice(dtype: str) -> None:
    """Say, before a first run compiles its kernels, why the start takes a while."""
    print(f"compiling kernels for {dtype} (first run only; `shardmill compile JOB` does it ahead)…", flush=True)


def kernels_ready(seconds: float) -> None:
    print(f"kernels ready in {seconds:.1f} s (compiled once, then loaded from Numba's cache)", flush=True)


def say(line: str, bar: Any) -> None:
    """Print a line now (through the progress bar when one is drawn, so the bar is not torn)."""
    if bar is not None:
        bar.write(line)
    else:
        print(line, flush=True)


def progress_bar(total: int, done: int, show: bool):
    """A tqdm bar of ``total`` steps with ``done`` already, or None when not ``show``. Drawn when stderr is a
    terminal, or when ``--ranks P`` started this rank from one (``launch.TERMINAL``: the ranks' stderr is a pipe)."""
    if not show:
        return None
    from shardmill.parallel.launch import TERMINAL
    from tqdm import tqdm

    watched = os.environ.get(TERMINAL) == "1"
    return tqdm(total=total, initial=done, unit="step", dynamic_ncols=not watched, ncols=100 if watched else None,
                disable=False if watched else None)


class Heartbeat:
    """A progress line every HEARTBEAT_S seconds: step, samples/s since the last line, and the time left."""

    def __init__(self, total: int, done: int, global_batch: int) -> None:
        self.total, self.global_batch = total, global_batch
        self.begin = self.last = time.perf_counter()
        self.first = self.last_step = done

    def tick(self, step: int) -> None:
        now = time.perf_counter()
        if now - self.last < HEARTBEAT_S or step >= self.total:
            return
        rate = (step - self.last_step) * self.global_batch / (now - self.last)
        left = (self.total - step) * (now - self.begin) / max(step - self.first, 1)
        print(f"step {step:>6}/{self.total}  {rate:,.0f} samples/s  about {left:,.0f} s left", flush=True)
        self.last, self.last_step = now, step


class Console:
    """Rank 0's running output of one run segment: a progress bar (``progress``) and, with ``echo``, epoch lines
    and notes, plus a heartbeat when no bar is drawn. Quiet on the other ranks."""

    def __init__(self, total: int, done: int, global_batch: int, lead: bool, progress: bool, echo: bool) -> None:
        self.echo = lead and echo
        self.bar = progress_bar(total, done, lead and progress)
        self.beat = Heartbeat(total, done, global_batch) if self.echo and self.bar is None else None

    def step_done(self, step: int) -> None:
        if self.bar is not None:
            self.bar.update(1)
        if self.beat is not None:
            self.beat.tick(step)

    def epoch(self, record: dict[str, Any]) -> None:
        """An epoch record's loss and speed on the bar, and its line (``echo``)."""
        if self.bar is not None:
            self.bar.set_postfix(loss=f"{record['train']['loss']:.4g}", samples_s=f"{record['samples_per_s']:.0f}")
        if self.echo:
            say(epoch_line(record), self.bar)

    def note(self, line: str) -> None:
        """A line of its own (``echo``), through the bar when one is drawn."""
        if self.echo:
            say(line, self.bar)

    def close(self) -> None:
        if self.bar is not None:
            self.bar.close()
