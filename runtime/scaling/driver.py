"""`shardmill scale`: check the arguments, run the worker at each process count, then build and write the study.

    cmd_scale                 check the arguments, then for each P (or each ranks × threads layout: layouts.py)
      run_point               mpiexec -n P python -m shardmill.scaling.worker … (the one launcher), log to
                              out/logs/pP.log, stop it past --timeout, read out/runs/pP.json
    study.build_study         rows per P, communication model, projection
    study.write_study         scaling.json, scaling.csv; report.render draws the PNGs and report.md
"""

from __future__ import annotations

import argparse
import contextlib
import json
import signal
import subprocess
import sys
import threading
from collections.abc import Iterator
from pathlib import Path
from typing import Any

from shardmill.config import Job, load_job
from shardmill.errors import JobError
from shardmill.machine import OtherLoad
from shardmill.parallel.launch import run_ranks
from shardmill.scaling import costmodel
from shardmill.scaling.layoutmodel import DEFAULT_NODES, check_fittable
from shardmill.scaling.layouts import compare_layouts, parse_layouts
from shardmill.scaling.layouts import text_table as layouts_table
from shardmill.scaling.study import build_study, write_study


class RunFailed(Exception):
    """A worker run that did not finish: carries the exit status the command should return."""

    def __init__(self, message: str, code: int) -> None:
        super().__init__(message)
        self.code = code


def parse_counts(text: str, option: str, what: str = "process counts") -> list[int]:
    """Comma-separated counts (`what`: process counts, node counts) such as "1,2,4" as a sorted list of distinct
    ints ≥ 1."""
    try:
        counts = [int(part) for part in str(text).split(",") if part.strip()]
    except ValueError:
        counts = []
    if not counts or min(counts) < 1:
        raise JobError(f"`{option}` must be comma-separated {what} ≥ 1 like 1,2,4; got {text!r}")
    return sorted(set(counts))


def parse_network_option(spec: str | None) -> tuple[float, float] | None:
    """`--network` as (alpha seconds, beta seconds per byte), or None when not given; JobError if unreadable."""
    if spec is None:
        return None
    try:
        return costmodel.parse_network(spec)
    except ValueError as err:
        raise JobError(f"`--network`: {err}") from None


def global_batch_at(job: Job, p: int, mode: str) -> int:
    """The global batch of the run on p processes: G (strong) or G·p (weak, G per rank)."""
    return job.run.global_batch if mode == "strong" else job.run.global_batch * p


def cmd_scale(args: argparse.Namespace, job: Job | None = None) -> int:
    """`shardmill scale JOB --sizes 1,2,4 --mode strong|weak --out-dir DIR`: run, measure, model, report."""
    from shardmill.parallel.comm import Comm

    layouts = parse_layouts(args.layouts) if getattr(args, "layouts", None) else None
    ranks = parse_counts(args.sizes, "--sizes")
    if 1 not in ranks and layouts is None:
        raise JobError(f"`--sizes` must include 1, the serial baseline of speedup and efficiency; got {args.sizes!r}")
    project_to = parse_counts(args.project, "--project")
    network = parse_network_option(args.network)
    nodes = project_nodes(getattr(args, "project_nodes", None), layouts)
    if Comm().size > 1:
        raise JobError("`shardmill scale` starts its own mpiexec runs; start it as one process, without mpiexec")
    sets = list(getattr(args, "sets", []))
    job = job if job is not None else load_job(args.job, overrides=sets)
    if args.mode == "strong" and job.run.global_batch < max(ranks):
        raise JobError(f"`run.global_batch` = {job.run.global_batch} is smaller than the largest process count "
                       f"{max(ranks)}; strong scaling needs at least one sample per rank")
    timeout = float(getattr(args, "timeout", 900.0))
    if not timeout > 0:
        raise JobError(f"`--timeout` must be > 0 seconds; got {timeout:g}")
    out = Path(args.out_dir)
    (out / "runs").mkdir(parents=True, exist_ok=True)
    (out / "logs").mkdir(parents=True, exist_ok=True)

    if layouts is not None:
        return scale_layouts(args, job, layouts, out, timeout, sets, nodes, network)
    raws: dict[int, dict[str, Any]] = {}
    bar = _progress(len(ranks), show=not getattr(args, "no_progress", False))
    try:
        for p in ranks:
            raws[p] = run_point(Path(args.job), p, global_batch_at(job, p, args.mode), args.steps, args.threads,
                                args.pin, out, timeout, bar, sets)
            bar.update(1)
    except RunFailed as failure:
        bar.close()
        print(f"shardmill: error: {failure}", file=sys.stderr, flush=True)
        return failure.code
    bar.close()

    study = build_study(job, Path(args.job), args.mode, args.steps, args.threads, args.pin, raws, project_to,
                        args.network, network)
    from shardmill.scaling import report

    study["verdict"] = report.gain_verdict(study)  # in words, when the model gains little from more processes
    figures_and_report = report.render(study, out)  # first: it may add a note that the JSON should carry
    written = write_study(study, out) + figures_and_report
    print(report.text_table(study))
    for note in study["notes"]:
        print(f"note: {note}", file=sys.stderr)
    print("wrote " + ", ".join(str(path) for path in written))
    return 0


def project_nodes(text: str | None, layouts: list[tuple[int, int]] | None) -> list[int] | None:
    """`--project-nodes` as node counts (default `layoutmodel.DEFAULT_NODES` with `--layouts`, None without).

    JobError before any run when given without `--layouts`, or when the layouts hold fewer than two of one process
    (the threaded compute term is fitted to those); without the option such layouts only skip the projection.
    """
    if text is None:
        return list(DEFAULT_NODES) if layouts is not None else None
    if layouts is None:
        raise JobError(f"`--project-nodes` projects the layouts of `--layouts`, which was not given; got "
                       f"--project-nodes {text!r}")
    counts = parse_counts(text, "--project-nodes", "node counts")
    check_fittable(layouts)
    return counts


def scale_layouts(args: argparse.Namespace, job: Job, layouts: list[tuple[int, int]], out: Path, timeout: float,
                  sets: list[str], nodes: list[int] | None = None,
                  network: tuple[float, float] | None = None) -> int:
    """`scale --layouts`: each ranks × threads layout timed at the job's global batch (with its GEMM floor); the
    table, the best, and each layout projected to `nodes` node counts."""
    if job.run.global_batch < max(P for P, _ in layouts):
        raise JobError(f"`run.global_batch` = {job.run.global_batch} is smaller than the largest process count "
                       f"{max(P for P, _ in layouts)} of `--layouts`")
    bar = _progress(len(layouts), show=not getattr(args, "no_progress", False))

    def one(P: int, T: int, tag: str) -> dict[str, Any]:
        raw = run_point(Path(args.job), P, job.run.global_batch, args.steps, T, args.pin, out, timeout, bar, sets,
                        tag=tag, gemm_floor=True)
        bar.update(1)
        return raw

    try:
        result = compare_layouts(job, layouts, args.steps, out, one, nodes, network, args.network)
    except RunFailed as failure:
        bar.close()
        print(f"shardmill: error: {failure}", file=sys.stderr, flush=True)
        return failure.code
    bar.close()
    print(layouts_table(result))
    print(f"wrote {out / 'layouts.json'}")
    return 0


def _progress(total: int, show: bool):
    from tqdm import tqdm

    return tqdm(total=total, desc="scale", unit="run", file=sys.stderr, dynamic_ncols=True,
                disable=None if show else True)


def worker_args(job: Path, global_batch: int, steps: int, threads: int, pin: bool, result: Path,
                sets: list[str] | tuple[str, ...] = (), gemm_floor: bool = False) -> list[str]:
    """Python arguments of one run: `-m shardmill.scaling.worker` with these settings (paths made absolute), the
    job's --set assignments and, with `gemm_floor`, the GEMM floor timed too (`scale --layouts`)."""
    args = ["-P", "-m", "shardmill.scaling.worker", "--job", str(job.resolve()), "--global-batch", str(global_batch),
            "--steps", str(steps), "--threads", str(threads), "--result", str(result.resolve())]
    for text in sets:
        args += ["--set", text]
    return args + (["--pin"] if pin else []) + (["--gemm-floor"] if gemm_floor else [])


def run_point(job: Path, p: int, global_batch: int, steps: int, threads: int, pin: bool, out: Path,
              timeout: float, bar: Any = None, sets: list[str] | tuple[str, ...] = (),
              tag: str | None = None, gemm_floor: bool = False) -> dict[str, Any]:
    """Run the worker on p processes and return what its rank 0 wrote (see `worker.run_worker`).

    Output of all ranks goes to out/logs/TAG.log (TAG: pP unless given), the record to out/runs/TAG.json. A run
    past `timeout` seconds is stopped (its whole process group) and raises RunFailed with status 124; a user error
    in the worker (bad job, too few rows) raises RunFailed with status 2 and the worker's message; any other
    failure shows the end of the log, status 1.
    """
    tag = tag or f"p{p}"
    result = out / "runs" / f"{tag}.json"
    log_path = out / "logs" / f"{tag}.log"
    result.unlink(missing_ok=True)

    def show(elapsed: float) -> None:
        if bar is not None:
            bar.set_postfix_str(f"P={p} G={global_batch} {elapsed:.0f} s", refresh=True)

    load = OtherLoad()
    with open(log_path, "w") as log, _sigterm_as_interrupt():
        try:
            done = run_ranks(p, worker_args(job, global_batch, steps, threads, pin, result, sets, gemm_floor),
                             threads=threads, timeout=timeout, stdout=log, stderr=subprocess.STDOUT,
                             while_running=show)
        except subprocess.TimeoutExpired:
            raise RunFailed(f"the {p}-process run ran past {timeout:g} s and was stopped; see {log_path}",
                            124) from None
    if done.returncode != 0 or not result.is_file():
        text = log_path.read_text(errors="replace")
        errors = [line for line in text.splitlines() if line.startswith("shardmill: error:")]
        if done.returncode == 2 and errors:
            message = errors[0].removeprefix("shardmill: error:").strip()
            raise RunFailed(f"the {p}-process run stopped: {message}", 2)
        tail = "\n".join(text.splitlines()[-20:])
        raise RunFailed(f"the {p}-process run failed with exit status {done.returncode}; end of {log_path}:\n"
                        f"{tail}", 1)
    record = json.loads(result.read_text())
    record["other_load"] = load.fraction()  # other processes' share of the cores meanwhile (None: unknown)
    return record


@contextlib.contextmanager
def _sigterm_as_interrupt() -> Iterator[None]:
    """SIGTERM (a batch system ending us) raises KeyboardInterrupt here, so the launcher's clean-up ends the run
    (it has its own session and would outlive us otherwise). Signal handlers can only be set in the main thread.
    """
    if threading.current_thread() is not threading.main_thread():
        yield
        return
    previous = signal.signal(signal.SIGTERM, _interrupt)
    try:
        yield
    finally:
        signal.signal(signal.SIGTERM, previous)


def _interrupt(signum: int, frame: Any) -> None:
    raise KeyboardInterrupt(f"signal {signum}")
