"""The study of one `shardmill scale` run: rows per P from the worker records, the communication model, the files.

    measured_point            one row per P: step time, throughput, speedup, efficiency, imbalance, phases,
                              hidden fraction of the exchange, optimizer state per rank
    communication_model       fit α, β at the largest P; price the step's collectives (allreduce, or
                              reduce-scatter + allgather) and project step time and efficiency to larger P
    projection_check          the projection's error on the measured P, and a warning above 15 %
    build_study               one dict with everything a report needs (plain JSON values)
    write_study               scaling.json, scaling.csv (report.py draws the PNGs and report.md)

Definitions (Grama, Gupta, Karypis & Kumar, *Introduction to Parallel Computing*, 2nd ed., 2003, ch. 5):
T_P is the wall-clock seconds per step on P processes. Strong scaling keeps the global batch G fixed:
speedup S = T_1/T_P, efficiency E = T_1/(P·T_P). Weak scaling keeps G per rank fixed (global batch G·P):
E = T_1/T_P, the per-rank throughput at P over the throughput at 1, and the scaled speedup S = P·T_1/T_P
(Gustafson, "Reevaluating Amdahl's law", CACM 31(5), 1988). In both modes E = S/P.

Hidden fraction of the exchange = 1 − (exposed exchange seconds per step: the step's "exchange" phase, mean over
ranks) / (the same exchange run alone, without compute: `worker.exchange_alone`).
"""

from __future__ import annotations

import csv
import datetime
import json
import os
from pathlib import Path
from typing import Any

import numpy as np
from shardmill.config import Job
from shardmill.scaling import costmodel, fitting
from shardmill.scaling.measure import COMM_BUDGET_S
from shardmill.scaling.worker import WARMUP_STEPS
from shardmill.timing import PHASES

COMPUTE_PHASES = ("data", "forward", "backward", "update")
"""Phases that make up the compute of a step in the projection (everything but the exchange)."""

PROJECTION_ERROR_LIMIT = 0.15
"""Largest |projected − measured| / measured step time on a measured P before the study warns."""

CSV_COLUMNS: tuple[str, ...] = (
    "p", "global_batch", "step_s", "samples_per_s", "samples_per_s_per_rank", "speedup", "efficiency",
    "load_imbalance",
    *(f"{phase}_{kind}_s" for phase in PHASES for kind in ("max", "mean")),
    "peak_rss_max_bytes", "pinned", "placement",
    "update", "exchange_alone_s", "publish_alone_s", "hidden_fraction", "optimizer_state_max_bytes",
    "optimizer_state_ratio", "model_step_s", "projection_error",
)
"""Columns of scaling.csv, one row per process count. Seconds are per step; an empty cell is "not defined".

Columns after `placement` were added with the sharded update (old readers keep working):
update (`run.update`: replicated or sharded); exchange_alone_s (the step's gradient exchange timed alone,
slowest rank, median); publish_alone_s (the parameter allgather of a sharded update timed alone; ~0 otherwise);
hidden_fraction (1 − exchange_mean_s / (exchange_alone_s + publish_alone_s); empty at P = 1);
optimizer_state_max_bytes (the
largest optimizer state of any rank, bytes); optimizer_state_ratio (that over P = 1's; empty without state);
model_step_s (the projection at this P on the measured network, seconds; empty without a model) and
projection_error (|model_step_s − step_s| / step_s).
"""


def measured_point(raw: dict[str, Any]) -> dict[str, Any]:
    """One measured row (without speedup and efficiency, which need P = 1) from a worker's result.

    step_s: the slowest rank's wall-clock seconds over the timed steps, divided by the steps. Phases are
    seconds per step: max and mean over ranks. load_imbalance: max / mean over ranks of forward + backward
    seconds (1 = balanced). peak_rss_max_bytes: the largest peak resident set of any rank. exchange_alone_s,
    publish_alone_s: the worker's medians of the exchange and the publish run alone (slowest rank, seconds).
    hidden_fraction: `hidden_fraction` of the mean exchange phase. optimizer_state_max_bytes: the largest
    optimizer state of any rank (its ratio to P = 1 comes from `add_memory_ratio`).
    """
    records = raw["ranks"]
    steps = raw["steps"]
    p = raw["p"]
    step_s = max(r["wall_s"] for r in records) / steps
    phases = np.array([[r["phase_s"][phase] for phase in PHASES] for r in records]) / steps  # (P, phases) s/step
    compute = phases[:, PHASES.index("forward")] + phases[:, PHASES.index("backward")]
    alone = raw["exchange_alone"]
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
        "update": raw["update"],
        "reduction": raw["reduction"],
        "exchange_alone_s": alone["exchange_s"],
        "publish_alone_s": alone["publish_s"],
        "hidden_fraction": hidden_fraction(float(phases[:, PHASES.index("exchange")].mean()),
                                           alone["exchange_s"] + alone["publish_s"],
                                           p),
        "optimizer_state_max_bytes": max(r["optimizer_state_bytes"] for r in records),
        "owned_params_max": max(r["owned_params"] for r in records),
    }


def hidden_fraction(exposed_s: float, alone_s: float, p: int) -> float | None:
    """1 − exposed_s / alone_s: the share of the exchange that compute hid (1: all of it, 0: none).

    exposed_s: seconds per step the step waited in its exchange phase; alone_s: seconds of the same exchange
    with no compute around it. None at p = 1 (nothing is sent, so nothing can be hidden) and when alone_s is
    not positive. Not clipped: a negative value says the step waited longer than the exchange alone takes
    (a slower rank's backward, or compute slowing the exchange down).
    """
    if p == 1 or not alone_s > 0.0:
        return None
    return 1.0 - exposed_s / alone_s


def add_memory_ratio(points: list[dict[str, Any]]) -> None:
    """Fill optimizer_state_ratio in place: each row's largest optimizer state over P = 1's (None without state).

    A sharded update keeps state for 1/P of the parameters per rank, so the ratio falls towards 1/P.
    """
    serial = next(point["optimizer_state_max_bytes"] for point in points if point["p"] == 1)
    for point in points:
        point["optimizer_state_ratio"] = point["optimizer_state_max_bytes"] / serial if serial else None


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


EXTRA_ASSUMPTIONS: list[str] = [
    "Compute per step is the measured P = 1 step's data + forward + backward + update time; in strong "
    "scaling data, forward and backward divide by P, and so does the update when it is sharded, while a "
    "replicated update, which every rank repeats over all parameters, does not; the exchange "
    "is modelled as fully exposed (overlap 0), an upper bound when messages overlap with backward.",
    "Alpha and beta come from in-place SUM allreduce medians at the largest measured P on this machine, "
    "with the reduction cost gamma measured separately and held fixed.",
]
"""What this study adds to costmodel.ASSUMPTIONS, one sentence each."""


def fit_record(fit: fitting.Fit) -> dict[str, Any]:
    """A fitting.Fit as plain JSON values (bandwidth None when β = 0)."""
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


def _cheapest_rms_error(fit: fitting.Fit) -> float:
    """RMS relative error of best_allreduce with the fitted α, β, γ against the fitted times."""
    errors = [(costmodel.best_allreduce(fit.p, n, fit.alpha, fit.beta, fit.gamma)[1] - t) / t
              for n, t in zip(fit.sizes_bytes, fit.times_s, strict=True)]
    return float(np.sqrt(np.mean(np.square(errors))))


def network_fit(raw: dict[str, Any]) -> tuple[list[fitting.Fit], list[float], int]:
    """α and β fitted to one run's allreduce medians with each algorithm's coefficients, and the one to keep.

    raw: a worker record with P > 1 and its "allreduce" timings. Returns the fits (one per costmodel.ALGORITHMS),
    each one's RMS relative error when every size is priced with the cheapest algorithm, and the index of the
    smallest (see `communication_model`).
    """
    sizes = [m["n_bytes"] for m in raw["allreduce"]]
    times = [m["median_s"] for m in raw["allreduce"]]
    candidates = [fitting.fit_alpha_beta(raw["p"], sizes, times, algorithm=name, gamma=raw["gamma_s_per_byte"])
                  for name in costmodel.ALGORITHMS]
    cheapest_errors = [_cheapest_rms_error(f) for f in candidates]
    return candidates, cheapest_errors, min(range(len(candidates)), key=lambda i: cheapest_errors[i])


def communication_model(points: list[dict[str, Any]], raws: dict[int, dict[str, Any]], mode: str,
                        project_to: list[int], network_spec: str | None,
                        network: tuple[float, float] | None) -> dict[str, Any]:
    """Fit α and β to the allreduce medians at the largest measured P and project to `project_to`.

    The fit is tried with each algorithm's coefficients (costmodel.ALGORITHMS). The projection prices every
    allreduce with the cheapest algorithm (costmodel.best_allreduce), so the fit kept is the one whose
    cheapest-algorithm times at the fitted P come closest to the measurements (smallest RMS relative error);
    at P = 2, where the algorithms differ only in how α and γ are counted, this keeps the projection
    consistent with what was measured. Compute per step = data + forward + backward + update of the measured P = 1
    step (seconds), the update divided by P when it is sharded (`costmodel.project_step`); the exchange is
    the job's collectives (`costmodel.step_collectives`: one allreduce of params·itemsize bytes for a fast
    replicated step, a reduce-scatter and an allgather otherwise) with no overlap (every second of it exposed).
    Rows at measured P also carry the measured step and the relative prediction error
    (projected − measured) / measured. Returns {"available": False, "reason": …} without a P > 1.
    """
    serial = next(point for point in points if point["p"] == 1)
    compute_s = sum(serial["phase_mean_s"][phase] for phase in COMPUTE_PHASES)
    first = raws[1]
    # The update of the runs on several ranks (run.update = "auto" is replicated on one rank, sharded on more
    # for an optimizer with state); its time at P = 1 is what the model divides, or not.
    update = raws[max(raws)]["update"]
    update_s = serial["phase_mean_s"]["update"]
    replicated_s = update_s if update == "replicated" else 0.0  # the update every rank repeats in full
    grad_bytes = first["grad_bytes"]
    collectives = costmodel.step_collectives(update, first["reduction"], first["params"], first["itemsize"],
                                             first["exact_format"])
    comm_ps = [p for p in sorted(raws) if p > 1 and raws[p]["allreduce"]]
    base = {"compute_s": compute_s, "replicated_s": replicated_s, "update_s": update_s, "update": update,
            "reduction": first["reduction"], "grad_bytes": grad_bytes,
            "collectives": [{"kind": c.kind, "n_bytes": c.n_bytes, "calls": c.calls} for c in collectives],
            "overlap": 0.0, "mode": mode, "error_limit": PROJECTION_ERROR_LIMIT, "warning": None,
            "assumptions": list(costmodel.ASSUMPTIONS) + EXTRA_ASSUMPTIONS}
    if not comm_ps:
        return dict(base, available=False,
                    reason="no process count above 1 was measured, so there is no allreduce to fit alpha and "
                           "beta to; add one to --ranks, e.g. --ranks 1,2")
    largest = max(comm_ps)
    gamma = raws[largest]["gamma_s_per_byte"]
    candidates, cheapest_errors, choice = network_fit(raws[largest])
    fit = candidates[choice]
    ps = sorted(set(project_to) | set(raws))
    measured = {point["p"]: point for point in points}
    networks = [{"name": f"measured (fit at P={largest})", "spec": None, "alpha_s": fit.alpha,
                 "beta_s_per_byte": fit.beta}]
    if network is not None:
        networks.append({"name": f"given ({network_spec})", "spec": network_spec, "alpha_s": network[0],
                         "beta_s_per_byte": network[1]})
    for entry in networks:
        rows = costmodel.project_step(compute_s, collectives, ps, entry["alpha_s"], entry["beta_s_per_byte"], gamma,
                                      mode=mode, overlap=0.0, update=update, update_s=update_s)
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
    model = dict(base, available=True, fit=records[choice], candidates=records,
                 gamma_s_per_byte=gamma, gamma_bytes=raws[largest]["gamma_bytes"], networks=networks,
                 max_abs_step_error=max(abs(e) for e in errors))
    model["warning"] = projection_warning(model)
    return model


def projection_warning(model: dict[str, Any]) -> str | None:
    """A one-line warning when the projection misses a measured step time by more than the model's error_limit.

    Reads the measured network's rows (their step_error) and max_abs_step_error; None when every measured P is
    within the limit or there is no model.
    """
    if not model.get("available") or model["max_abs_step_error"] <= model["error_limit"]:
        return None
    worst = max((row for row in model["networks"][0]["rows"] if "step_error" in row),
                key=lambda row: abs(row["step_error"]))
    return (f"warning: the projection is off by {100 * abs(worst['step_error']):.1f}% of the measured step time at "
            f"P = {worst['p']} (limit {100 * model['error_limit']:.0f}%); treat the projected rows as rough")


def projection_check(points: list[dict[str, Any]], model: dict[str, Any]) -> None:
    """Fill model_step_s and projection_error = |projected − measured| / measured in place on each measured row.

    Both are None without a model (no P > 1 measured).
    """
    rows = {row["p"]: row for row in model["networks"][0]["rows"]} if model.get("available") else {}
    for point in points:
        row = rows.get(point["p"])
        point["model_step_s"] = row["step_s"] if row else None
        point["projection_error"] = abs(row["step_error"]) if row else None


def build_study(job: Job, job_path: Path, mode: str, steps: int, threads: int, pin: bool,
                raws: dict[int, dict[str, Any]], project_to: list[int], network_spec: str | None,
                network: tuple[float, float] | None) -> dict[str, Any]:
    """Everything a report needs, as plain JSON values: settings, machine, job, rows, per-rank records, model."""
    from shardmill.machine import machine

    points = [measured_point(raws[p]) for p in sorted(raws)]
    add_speedup(points, mode)
    add_memory_ratio(points)
    model = communication_model(points, raws, mode, project_to, network_spec, network)
    projection_check(points, model)
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
            "exact_format": first["exact_format"],
            "update": job.run.update,
            "message_mib": job.run.message_mib,
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


def usable_cores() -> int:
    """CPUs this process may run on (its affinity mask where the platform has one, else all)."""
    if hasattr(os, "sched_getaffinity"):
        return len(os.sched_getaffinity(0))
    return os.cpu_count() or 1
