"""Scaling studies: the job timed at several process counts, with a per-phase breakdown and a cost model.

The story, top to bottom:

    cmd_scale                 check the arguments, then for each P start
      mpiexec -n P python -m shardmill.scaling.scale …       (the worker, `run_worker`, at the bottom of this file)
        pin (optional) → Trainer(job) → warm-up → N timed steps → per-rank record → gather to rank 0
        → allreduce timings over MESSAGE_SIZES and the reduction cost γ → rank 0 writes runs/pP.json
    measured_point            one row per P: step time, throughput, speedup, efficiency, imbalance, phases
    communication_model       fit α, β at the largest P; project step time and efficiency to larger P
    write_study               scaling.json, scaling.csv, then report.py draws the PNGs and report.md

Definitions (Grama, Gupta, Karypis & Kumar, *Introduction to Parallel Computing*, 2nd ed., 2003, ch. 5):
T_P is the wall-clock seconds per step on P processes. Strong scaling keeps the global batch G fixed:
speedup S = T_1/T_P, efficiency E = T_1/(P·T_P). Weak scaling keeps G per rank fixed (global batch G·P):
E = T_1/T_P, the per-rank throughput at P over the throughput at 1, and the scaled speedup S = P·T_1/T_P
(Gustafson, "Reevaluating Amdahl's law", CACM 31(5), 1988). In both modes E = S/P.
"""

from __future__ import annotations

import argparse
import csv
import datetime
import json
import os
import signal
import subprocess
import sys
import time
from pathlib import Path
from typing import Any

import numpy as np
from shardmill.config import Job, JobError, load_job
from shardmill.scaling import costmodel
from shardmill.timing import PHASES

MESSAGE_SIZES: tuple[int, ...] = tuple(4096 * 4**k for k in range(8))
"""Allreduce message sizes timed at every P > 1, bytes: 4 KiB, 16 KiB, …, 64 MiB (eight sizes)."""

COMM_BUDGET_S = 30.0
"""Seconds of allreduce timing allowed per run; larger sizes are skipped (and reported) once it would be exceeded."""

WARMUP_STEPS = 2
"""Untimed training steps after the kernel warm-up (first-touch of buffers, MPI connection set-up)."""

COMPUTE_PHASES = ("data", "forward", "backward", "update")
"""Phases that make up the compute of a step in the projection (everything but the exchange)."""

CSV_COLUMNS: tuple[str, ...] = (
    "p", "global_batch", "step_s", "samples_per_s", "samples_per_s_per_rank", "speedup", "efficiency",
    "load_imbalance",
    *(f"{phase}_{kind}_s" for phase in PHASES for kind in ("max", "mean")),
    "peak_rss_max_bytes", "pinned", "placement",
)
"""Columns of scaling.csv, one row per process count. Seconds are per step."""


class RunFailed(Exception):
    """A worker run that did not finish: carries the exit status the command should return."""

    def __init__(self, message: str, code: int) -> None:
        super().__init__(message)
        self.code = code


# --------------------------------------------------------------------------------------------------------
# Command-line values
# --------------------------------------------------------------------------------------------------------


def parse_counts(text: str, option: str) -> list[int]:
    """Comma-separated process counts such as "1,2,4" as a sorted list of distinct ints ≥ 1."""
    try:
        counts = [int(part) for part in str(text).split(",") if part.strip()]
    except ValueError:
        counts = []
    if not counts or min(counts) < 1:
        raise JobError(f"`{option}` must be comma-separated process counts ≥ 1 like 1,2,4; got {text!r}")
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


# --------------------------------------------------------------------------------------------------------
# Driver
# --------------------------------------------------------------------------------------------------------


def cmd_scale(args: argparse.Namespace) -> int:
    """`shardmill scale JOB --ranks 1,2,4 --mode strong|weak --out DIR`: run, measure, model, report."""
    from mpi4py import MPI

    ranks = parse_counts(args.ranks, "--ranks")
    if 1 not in ranks:
        raise JobError(f"`--ranks` must include 1, the serial baseline of speedup and efficiency; got {args.ranks!r}")
    project_to = parse_counts(args.project, "--project")
    network = parse_network_option(args.network)
    if MPI.COMM_WORLD.Get_size() > 1:
        raise JobError("`shardmill scale` starts its own mpiexec runs; start it as one process, without mpiexec")
    job = load_job(args.job)
    if args.mode == "strong" and job.run.global_batch < max(ranks):
        raise JobError(f"`run.global_batch` = {job.run.global_batch} is smaller than the largest process count "
                       f"{max(ranks)}; strong scaling needs at least one sample per rank")
    timeout = float(getattr(args, "timeout", 900.0))
    if not timeout > 0:
        raise JobError(f"`--timeout` must be > 0 seconds; got {timeout:g}")
    out = Path(args.out)
    (out / "runs").mkdir(parents=True, exist_ok=True)
    (out / "logs").mkdir(parents=True, exist_ok=True)

    raws: dict[int, dict[str, Any]] = {}
    bar = _progress(len(ranks), show=not getattr(args, "no_progress", False))
    try:
        for p in ranks:
            raws[p] = run_point(Path(args.job), p, global_batch_at(job, p, args.mode), args.steps, args.threads,
                                args.pin, out, timeout, bar)
            bar.update(1)
    except RunFailed as failure:
        bar.close()
        print(f"shardmill: error: {failure}", file=sys.stderr, flush=True)
        return failure.code
    bar.close()

    study = build_study(job, Path(args.job), args.mode, args.steps, args.threads, args.pin, raws, project_to,
                        args.network, network)
    from shardmill.scaling import report

    figures_and_report = report.render(study, out)  # first: it may add a note that the JSON should carry
    written = write_study(study, out) + figures_and_report
    print(report.text_table(study))
    for note in study["notes"]:
        print(f"note: {note}", file=sys.stderr)
    print("wrote " + ", ".join(str(path) for path in written))
    return 0


def _progress(total: int, show: bool):
    from tqdm import tqdm

    return tqdm(total=total, desc="scale", unit="run", file=sys.stderr, dynamic_ncols=True,
                disable=None if show else True)


def worker_command(job: Path, p: int, global_batch: int, steps: int, threads: int, pin: bool,
                   result: Path) -> list[str]:
    """The mpiexec command line of one run: p processes of `python -m shardmill.scaling.scale` with these settings."""
    from shardmill.parallel.launch import find_mpiexec

    command = [find_mpiexec(), "-n", str(p), sys.executable, "-m", "shardmill.scaling.scale",
               "--job", str(job.resolve()), "--global-batch", str(global_batch), "--steps", str(steps),
               "--threads", str(threads), "--result", str(result.resolve())]
    return command + (["--pin"] if pin else [])


def run_point(job: Path, p: int, global_batch: int, steps: int, threads: int, pin: bool, out: Path,
              timeout: float, bar: Any = None) -> dict[str, Any]:
    """Run the worker on p processes and return what its rank 0 wrote (see `run_worker`).

    Output of all ranks goes to out/logs/pP.log. A run past `timeout` seconds is stopped (its whole process
    group) and raises RunFailed with status 124; a user error in the worker (bad job, too few rows) raises
    RunFailed with status 2 and the worker's message; any other failure shows the end of the log, status 1.
    """
    from shardmill.parallel.launch import LAUNCHED

    result = out / "runs" / f"p{p}.json"
    log_path = out / "logs" / f"p{p}.log"
    result.unlink(missing_ok=True)
    env = dict(os.environ, OPENBLAS_NUM_THREADS=str(threads), OMP_NUM_THREADS=str(threads),
               MKL_NUM_THREADS=str(threads), PYTHONUNBUFFERED="1", **{LAUNCHED: "1"})
    command = worker_command(job, p, global_batch, steps, threads, pin, result)
    begin = time.perf_counter()
    with open(log_path, "w") as log:
        process = subprocess.Popen(command, stdout=log, stderr=subprocess.STDOUT, env=env, start_new_session=True)
        previous = signal.signal(signal.SIGTERM, _interrupt) if _main_thread() else None
        try:
            while process.poll() is None:
                elapsed = time.perf_counter() - begin
                if elapsed > timeout:
                    raise RunFailed(f"the {p}-process run ran past {timeout:g} s and was stopped; see {log_path}",
                                    124)
                if bar is not None:
                    bar.set_postfix_str(f"P={p} G={global_batch} {elapsed:.0f} s", refresh=True)
                time.sleep(0.2)
        finally:  # a timeout, Ctrl-C or SIGTERM must not leave the run behind (it has its own session)
            if process.poll() is None:
                _stop(process)
            if previous is not None:
                signal.signal(signal.SIGTERM, previous)
    if process.returncode != 0 or not result.is_file():
        text = log_path.read_text(errors="replace")
        errors = [line for line in text.splitlines() if line.startswith("shardmill: error:")]
        if process.returncode == 2 and errors:
            message = errors[0].removeprefix("shardmill: error:").strip()
            raise RunFailed(f"the {p}-process run stopped: {message}", 2)
        tail = "\n".join(text.splitlines()[-20:])
        raise RunFailed(f"the {p}-process run failed with exit status {process.returncode}; end of {log_path}:\n"
                        f"{tail}", 1)
    return json.loads(result.read_text())


def usable_cores() -> int:
    """CPUs this process may run on (its affinity mask where the platform has one, else all)."""
    if hasattr(os, "sched_getaffinity"):
        return len(os.sched_getaffinity(0))
    return os.cpu_count() or 1


def _main_thread() -> bool:
    import threading

    return threading.current_thread() is threading.main_thread()


def _interrupt(signum: int, frame: Any) -> None:
    raise KeyboardInterrupt(f"signal {signum}")


def _stop(process: subprocess.Popen) -> None:
    """End the launcher and its ranks: SIGTERM to the run's own process group, SIGKILL if it lingers."""
    for sig in (signal.SIGTERM, signal.SIGKILL):
        try:
            os.killpg(process.pid, sig)
        except ProcessLookupError:
            return
        try:
            process.wait(timeout=5)
            return
        except subprocess.TimeoutExpired:
            continue


# --------------------------------------------------------------------------------------------------------
# From worker records to one row per P
# --------------------------------------------------------------------------------------------------------


def measured_point(raw: dict[str, Any]) -> dict[str, Any]:
    """One measured row (without speedup and efficiency, which need P = 1) from a worker's result.

    step_s: the slowest rank's wall-clock seconds over the timed steps, divided by the steps. Phases are
    seconds per step: max and mean over ranks. load_imbalance: max / mean over ranks of forward + backward
    seconds (1 = balanced). peak_rss_max_bytes: the largest peak resident set of any rank.
    """
    records = raw["ranks"]
    steps = raw["steps"]
    p = raw["p"]
    step_s = max(r["wall_s"] for r in records) / steps
    phases = np.array([[r["phase_s"][phase] for phase in PHASES] for r in records]) / steps  # (P, phases) s/step
    compute = phases[:, PHASES.index("forward")] + phases[:, PHASES.index("backward")]
    placement = " ".join(f"{r['rank']}:cpu{r['cpu']}" if r["cpu"] is not None else f"{r['rank']}:cpu?"
                         for r in records)
    return {
        "p": p,
        "global_batch": raw["global_batch"],
        "steps": steps,
        "step_s": step_s,
        "samples_per_s": raw["global_batch"] / step_s,
        "samples_per_s_per_rank": raw["global_batch"] / (p * step_s),
        "load_imbalance": float(compute.max() / compute.mean()) if compute.mean() > 0 else 1.0,
        "phase_max_s": dict(zip(PHASES, map(float, phases.max(axis=0)), strict=True)),
        "phase_mean_s": dict(zip(PHASES, map(float, phases.mean(axis=0)), strict=True)),
        "peak_rss_max_bytes": max(r["peak_rss_bytes"] for r in records),
        "rss_max_bytes": max(r["rss_bytes"] for r in records),
        "pinned": all(r["pinned"] for r in records),
        "placement": placement,
        "mpi_thread_level": raw.get("mpi_thread_level"),
        "allreduce_skipped_bytes": raw.get("allreduce_skipped_bytes", []),
    }


def add_speedup(points: list[dict[str, Any]], mode: str) -> None:
    """Fill speedup and efficiency in place from the P = 1 row (see the module docstring for the formulas)."""
    serial_s = next(point["step_s"] for point in points if point["p"] == 1)
    for point in points:
        p, step_s = point["p"], point["step_s"]
        if mode == "strong":
            point["speedup"] = serial_s / step_s
            point["efficiency"] = serial_s / (p * step_s)
        else:
            point["speedup"] = p * serial_s / step_s
            point["efficiency"] = serial_s / step_s


# --------------------------------------------------------------------------------------------------------
# Communication model: fit α, β at the largest measured P, project to larger P
# --------------------------------------------------------------------------------------------------------


EXTRA_ASSUMPTIONS: list[str] = [
    "Compute per step is the measured P = 1 step's data + forward + backward + update time; in strong "
    "scaling data, forward and backward divide by P while the update, which every rank repeats over all "
    "parameters, does not; the exchange "
    "is modelled as fully exposed (overlap 0), an upper bound when buckets overlap with backward.",
    "Alpha and beta come from in-place SUM allreduce medians at the largest measured P on this machine, "
    "with the reduction cost gamma measured separately and held fixed.",
]
"""What this study adds to costmodel.ASSUMPTIONS, one sentence each."""


def fit_record(fit: costmodel.Fit) -> dict[str, Any]:
    """A costmodel.Fit as plain JSON values (bandwidth None when β = 0)."""
    bandwidth = fit.bandwidth_bytes_per_s
    return {
        "algorithm": fit.algorithm,
        "p": fit.p,
        "alpha_s": fit.alpha,
        "beta_s_per_byte": fit.beta,
        "gamma_s_per_byte": fit.gamma,
        "bandwidth_bytes_per_s": None if bandwidth == float("inf") else bandwidth,
        "r_squared": fit.r_squared,
        "max_relative_error": fit.max_relative_error,
        "rms_relative_error": fit.rms_relative_error,
        "points": [{"n_bytes": n, "measured_s": t, "model_s": m, "relative_error": e}
                   for n, t, m, e in zip(fit.sizes_bytes, fit.times_s, fit.predicted_s, fit.relative_errors,
                                         strict=True)],
    }


def _cheapest_rms_error(fit: costmodel.Fit) -> float:
    """RMS relative error of best_allreduce with the fitted α, β, γ against the fitted times."""
    errors = [(costmodel.best_allreduce(fit.p, n, fit.alpha, fit.beta, fit.gamma)[1] - t) / t
              for n, t in zip(fit.sizes_bytes, fit.times_s, strict=True)]
    return float(np.sqrt(np.mean(np.square(errors))))


def communication_model(points: list[dict[str, Any]], raws: dict[int, dict[str, Any]], mode: str,
                        project_to: list[int], network_spec: str | None,
                        network: tuple[float, float] | None) -> dict[str, Any]:
    """Fit α and β to the allreduce medians at the largest measured P and project to `project_to`.

    The fit is tried with each algorithm's coefficients (costmodel.ALGORITHMS). The projection prices every
    allreduce with the cheapest algorithm (costmodel.best_allreduce), so the fit kept is the one whose
    cheapest-algorithm times at the fitted P come closest to the measurements (smallest RMS relative error);
    at P = 2, where the algorithms differ only in how α and γ are counted, this keeps the projection
    consistent with what was measured. Compute per step = data + forward + backward + update of the measured P = 1
    step (seconds); the gradient is one allreduce of params·itemsize bytes with no overlap (every second of
    it exposed). Rows at measured P also carry the measured step and the relative prediction error
    (projected − measured) / measured. Returns {"available": False, "reason": …} without a P > 1.
    """
    serial = next(point for point in points if point["p"] == 1)
    compute_s = sum(serial["phase_mean_s"][phase] for phase in COMPUTE_PHASES)
    replicated_s = serial["phase_mean_s"]["update"]  # every rank updates all parameters
    grad_bytes = raws[1]["grad_bytes"]
    comm_ps = [p for p in sorted(raws) if p > 1 and raws[p]["allreduce"]]
    base = {"compute_s": compute_s, "replicated_s": replicated_s, "grad_bytes": grad_bytes,
            "overlap": 0.0, "mode": mode,
            "assumptions": list(costmodel.ASSUMPTIONS) + EXTRA_ASSUMPTIONS}
    if not comm_ps:
        return dict(base, available=False,
                    reason="no process count above 1 was measured, so there is no allreduce to fit alpha and "
                           "beta to; add one to --ranks, e.g. --ranks 1,2")
    largest = max(comm_ps)
    timings = raws[largest]["allreduce"]
    sizes = [m["n_bytes"] for m in timings]
    times = [m["median_s"] for m in timings]
    gamma = raws[largest]["gamma_s_per_byte"]
    candidates = [costmodel.fit_alpha_beta(largest, sizes, times, algorithm=name, gamma=gamma)
                  for name in costmodel.ALGORITHMS]
    cheapest_errors = [_cheapest_rms_error(f) for f in candidates]
    choice = min(range(len(candidates)), key=lambda i: cheapest_errors[i])
    fit = candidates[choice]
    ps = sorted(set(project_to) | set(raws))
    measured = {point["p"]: point for point in points}
    networks = [{"name": f"measured (fit at P={largest})", "spec": None, "alpha_s": fit.alpha,
                 "beta_s_per_byte": fit.beta}]
    if network is not None:
        networks.append({"name": f"given ({network_spec})", "spec": network_spec, "alpha_s": network[0],
                         "beta_s_per_byte": network[1]})
    for entry in networks:
        rows = costmodel.project(compute_s, grad_bytes, ps, entry["alpha_s"], entry["beta_s_per_byte"], gamma,
                                 mode=mode, overlap=0.0, replicated_s=replicated_s)
        if entry["spec"] is None:  # the measured network: compare where we measured
            for row in rows:
                point = measured.get(row["p"])
                if point is not None:
                    row["measured_step_s"] = point["step_s"]
                    row["measured_efficiency"] = point["efficiency"]
                    row["measured_exchange_s"] = point["phase_max_s"]["exchange"]
                    row["step_error"] = (row["step_s"] - point["step_s"]) / point["step_s"]
        entry["rows"] = rows
    errors = [row["step_error"] for row in networks[0]["rows"] if "step_error" in row]
    records = [dict(fit_record(f), cheapest_rms_relative_error=e)
               for f, e in zip(candidates, cheapest_errors, strict=True)]
    return dict(base, available=True, fit=records[choice], candidates=records,
                gamma_s_per_byte=gamma, gamma_bytes=raws[largest]["gamma_bytes"], networks=networks,
                max_abs_step_error=max(abs(e) for e in errors))


# --------------------------------------------------------------------------------------------------------
# The study: one dict, written as JSON and CSV
# --------------------------------------------------------------------------------------------------------


def build_study(job: Job, job_path: Path, mode: str, steps: int, threads: int, pin: bool,
                raws: dict[int, dict[str, Any]], project_to: list[int], network_spec: str | None,
                network: tuple[float, float] | None) -> dict[str, Any]:
    """Everything a report needs, as plain JSON values: settings, machine, job, rows, per-rank records, model."""
    from shardmill.bench import machine

    points = [measured_point(raws[p]) for p in sorted(raws)]
    add_speedup(points, mode)
    model = communication_model(points, raws, mode, project_to, network_spec, network)
    first = raws[min(raws)]
    notes = [] if model["available"] else [model["reason"]]
    cores = usable_cores()
    crowded = [point["p"] for point in points if point["p"] * threads > cores]
    if crowded:
        notes.append(f"P = {', '.join(map(str, crowded))} run(s) more threads than the {cores} usable cores: ranks "
                     f"share cores, so those times measure the scheduler as much as the code (MPI started in "
                     f"thread-multiple mode there so that waiting ranks yield)")
    for point in points:
        if point["allreduce_skipped_bytes"]:
            notes.append(f"P = {point['p']}: allreduce sizes from {point['allreduce_skipped_bytes'][0]} bytes up "
                         f"were skipped to keep the timing within {COMM_BUDGET_S:g} s")
    return {
        "format": "shardmill-scale-1",
        "created": datetime.datetime.now(datetime.UTC).isoformat(timespec="seconds"),
        "mode": mode,
        "steps": steps,
        "warmup_steps": WARMUP_STEPS,
        "threads": threads,
        "pin": pin,
        "machine": dict(machine(), physical_cores=_physical_cores(), mpi_library=first["mpi_library"],
                        mpi4py=first["mpi4py"]),
        "job": {
            "path": str(job_path),
            "layers": list(job.model.layers),
            "activation": list(job.model.activation),
            "loss": job.model.loss,
            "dtype": job.model.dtype,
            "global_batch": job.run.global_batch,
            "global_batch_meaning": "fixed for every P" if mode == "strong" else "per rank (global = G·P)",
            "reduction": job.run.reduction,
            "bucket_mb": job.run.bucket_mb,
            "optimizer": job.optimizer.method,
            "params": first["params"],
            "grad_bytes": first["grad_bytes"],
        },
        "points": points,
        "ranks": {str(p): raws[p]["ranks"] for p in sorted(raws)},
        "allreduce": {str(p): raws[p]["allreduce"] for p in sorted(raws) if raws[p]["allreduce"]},
        "model": model,
        "notes": notes,
    }


def _physical_cores() -> int | None:
    import psutil

    return psutil.cpu_count(logical=False)


def csv_row(point: dict[str, Any]) -> dict[str, Any]:
    """A measured row flattened to the CSV columns (phases as <phase>_max_s, <phase>_mean_s)."""
    row = {key: point[key] for key in CSV_COLUMNS if key in point}
    for phase in PHASES:
        row[f"{phase}_max_s"] = point["phase_max_s"][phase]
        row[f"{phase}_mean_s"] = point["phase_mean_s"][phase]
    return row


def write_study(study: dict[str, Any], out: Path) -> list[Path]:
    """Write out/scaling.json (the whole study) and out/scaling.csv (one row per P); returns the paths.

    Floats go to the CSV with repr precision, so every CSV number reads back equal to its JSON value.
    """
    json_path, csv_path = out / "scaling.json", out / "scaling.csv"
    json_path.write_text(json.dumps(study, indent=1, allow_nan=False) + "\n")
    with open(csv_path, "w", newline="") as handle:
        writer = csv.DictWriter(handle, fieldnames=list(CSV_COLUMNS))
        writer.writeheader()
        for point in study["points"]:
            writer.writerow(csv_row(point))
    return [json_path, csv_path]


# --------------------------------------------------------------------------------------------------------
# Worker: one run on P processes (started by `run_point` under mpiexec)
# --------------------------------------------------------------------------------------------------------


def pin_rank(rank: int, threads: int) -> list[int] | None:
    """Pin this process and all its threads to `threads` cores starting at rank·threads, modulo the allowed cores.

    With one thread per rank this is rank r → core r mod cores. Returns the cores, or None where the
    platform cannot set affinity (psutil has no cpu_affinity there).
    """
    import psutil

    process = psutil.Process()
    if not hasattr(process, "cpu_affinity"):
        return None
    allowed = sorted(process.cpu_affinity())
    cores = sorted({allowed[(rank * threads + k) % len(allowed)] for k in range(threads)})
    process.cpu_affinity(cores)
    # Threads started before now (MPI, BLAS pools) keep their old mask; new ones inherit the process's.
    if hasattr(os, "sched_setaffinity"):
        for thread in process.threads():
            try:
                os.sched_setaffinity(thread.id, cores)
            except OSError:
                pass
    return cores


def placement(pinned: list[int] | None) -> dict[str, Any]:
    """Where this rank runs: cpu (last CPU it ran on, or None), affinity (allowed CPUs), pinned (bool)."""
    import psutil

    process = psutil.Process()
    cpu = process.cpu_num() if hasattr(process, "cpu_num") else None
    affinity = sorted(process.cpu_affinity()) if hasattr(process, "cpu_affinity") else None
    return {"cpu": cpu, "affinity": affinity, "pinned": pinned is not None, "pinned_cores": pinned}


def memory() -> dict[str, int]:
    """rss_bytes (now, psutil) and peak_rss_bytes (resource.getrusage maxrss: KiB on Linux, bytes on macOS)."""
    import psutil

    rss = int(psutil.Process().memory_info().rss)
    try:
        import resource

        peak = resource.getrusage(resource.RUSAGE_SELF).ru_maxrss
        peak = int(peak if sys.platform == "darwin" else peak * 1024)
    except ImportError:  # no resource module (Windows): the current RSS is the best we have
        peak = rss
    return {"rss_bytes": rss, "peak_rss_bytes": max(peak, rss)}


def time_allreduce(comm: Any, sizes: tuple[int, ...], repeats: int, budget_s: float,
                   dtype: Any) -> tuple[list[dict[str, Any]], list[int]]:
    """costmodel.measure_allreduce size by size, smallest first, within a budget of `budget_s` seconds.

    Before each size the time it would take is estimated from the previous one, scaled linearly with the
    bytes (the bandwidth term dominates beyond the latency regime); a size that would exceed the budget is
    skipped, as are all larger ones. Only the returned times (the slowest rank's, identical on every rank)
    enter the decision, so every rank skips the same sizes. Returns (timings, skipped sizes in bytes).
    """
    timings: list[dict[str, Any]] = []
    spent = 0.0
    for i, size in enumerate(sizes):
        if timings:
            last = timings[-1]
            estimate = last["median_s"] * size / last["n_bytes"] * (repeats + 1)
            if spent + estimate > budget_s:
                return timings, list(sizes[i:])
        (timing,) = costmodel.measure_allreduce(comm, [size], repeats=repeats, warmup=1, dtype=dtype)
        spent += sum(timing["times_s"]) * (repeats + 1) / repeats  # the warm-up call costs about one more
        timings.append(timing)
    return timings, []


def run_worker(job_path: Path, global_batch: int, steps: int, threads: int, pin: bool, result: Path,
               comm_repeats: int = 5) -> int:
    """Time `steps` training steps of the job on every rank of MPI.COMM_WORLD; rank 0 writes `result` (JSON).

    Pinning happens before the trainer is built. After the kernel warm-up and WARMUP_STEPS untimed steps
    the phase timer is reset and the timed steps run between a barrier and the last step's end. Then every
    rank's record is gathered once to rank 0 (lowercase gather: a small control message after timing),
    the allreduce is timed over MESSAGE_SIZES (P > 1) and rank 0 measures γ at the bucket size.
    """
    from mpi4py import MPI
    from shardmill.data import block_range
    from shardmill.parallel.comm import Comm
    from shardmill.trainer import Trainer, warm_up_kernels
    from threadpoolctl import threadpool_limits

    comm = Comm()
    pinned = pin_rank(comm.rank, threads) if pin else None
    job = load_job(job_path)
    job.run.global_batch = global_batch
    job.run.threads = threads
    with threadpool_limits(limits=threads, user_api="blas"):
        trainer = Trainer(job, comm)
        compile_s = warm_up_kernels(trainer)
        per_epoch = trainer.sampler.steps_per_epoch
        for step in range(WARMUP_STEPS):
            trainer.step(*divmod(step, per_epoch))
        trainer.timer.reset()
        comm.barrier()
        begin = time.perf_counter()
        for step in range(WARMUP_STEPS, WARMUP_STEPS + steps):
            trainer.step(*divmod(step, per_epoch))  # wraps around the epoch when steps exceed it
        wall_s = time.perf_counter() - begin
    lo, hi = block_range(global_batch, comm.rank, comm.size)
    record = {
        "rank": comm.rank,
        "rows": hi - lo,
        "wall_s": wall_s,
        "phase_s": trainer.timer.as_dict(),
        "compile_s": compile_s,
        **memory(),
        **placement(pinned),
    }
    records = comm.gather_object(record)
    dtype = trainer.model.dtype
    timings, skipped = time_allreduce(comm.comm, MESSAGE_SIZES, comm_repeats, COMM_BUDGET_S, dtype) \
        if comm.size > 1 else ([], [])
    if comm.rank == 0:
        gamma_bytes = int(job.run.bucket_mb * 1e6)
        gamma = costmodel.measure_reduction_gamma(gamma_bytes, repeats=comm_repeats, warmup=1, dtype=dtype)
        import mpi4py

        payload = {
            "p": comm.size,
            "global_batch": global_batch,
            "steps": steps,
            "warmup_steps": WARMUP_STEPS,
            "threads": threads,
            "params": trainer.model.n_params,
            "grad_bytes": trainer.model.n_params * dtype.itemsize,
            "ranks": records,
            "allreduce": timings,
            "allreduce_skipped_bytes": skipped,
            "mpi_thread_level": thread_level_name(MPI.Query_thread()),
            "gamma_s_per_byte": gamma,
            "gamma_bytes": gamma_bytes,
            "mpi_library": " ".join(MPI.Get_library_version().strip().splitlines()[0].split()),
            "mpi4py": mpi4py.__version__,
        }
        partial = result.with_suffix(".tmp")
        partial.write_text(json.dumps(payload, allow_nan=False))
        partial.replace(result)
    comm.barrier()
    return 0


def thread_level_name(level: int) -> str:
    """MPI's thread support level as a word: single, funneled, serialized or multiple."""
    from mpi4py import MPI

    names = {MPI.THREAD_SINGLE: "single", MPI.THREAD_FUNNELED: "funneled", MPI.THREAD_SERIALIZED: "serialized",
             MPI.THREAD_MULTIPLE: "multiple"}
    return names.get(level, str(level))


def worker_main(argv: list[str] | None = None) -> int:
    """Entry point of `python -m shardmill.scaling.scale` (started by the driver, one process per rank)."""
    parser = argparse.ArgumentParser(prog="python -m shardmill.scaling.scale",
                                     description="one run of a scaling study (started by `shardmill scale`)")
    parser.add_argument("--job", type=Path, required=True)
    parser.add_argument("--global-batch", type=int, required=True)
    parser.add_argument("--steps", type=int, required=True)
    parser.add_argument("--threads", type=int, default=1)
    parser.add_argument("--pin", action="store_true")
    parser.add_argument("--result", type=Path, required=True)
    parser.add_argument("--comm-repeats", type=int, default=5)
    args = parser.parse_args(argv)
    from shardmill.parallel.comm import run_guarded

    return run_guarded(lambda: run_worker(args.job, args.global_batch, args.steps, args.threads, args.pin,
                                          args.result, args.comm_repeats), user_errors=(JobError,))


if __name__ == "__main__":
    raise SystemExit(worker_main())
