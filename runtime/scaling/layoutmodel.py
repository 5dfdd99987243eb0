"""The threaded compute term of the cost model, and one node's ranks × threads layouts projected to many nodes.

Threaded compute (Amdahl, "Validity of the single processor approach to achieving large scale computing
capabilities", AFIPS 1967): a rank's compute per step at T threads is a part that divides over the threads and
a part that does not,

    compute(T) = serial_s + parallel_s / T          speedup S(T) = compute(1) / compute(T) = 1 / (f + (1 − f)/T)

with f = serial_s / (serial_s + parallel_s). Each part of the step has its own term, fitted to the layouts
measured at P = 1 (1×1, 1×2, …) of `scale --layouts`:

    gemm     the step's GEMMs timed alone at the run's BLAS threads (`measure.gemm_floor_step`; fast mode only)
    other    data, forward and backward less the GEMMs: our kernels and the rows taken (in exact mode, where the
             threads are lanes taking whole chunks and BLAS stays at one thread, the GEMMs too)
    update   the optimizer update

Two thread counts fit exactly; more are fitted by least squares on the residuals relative to the step's compute,
with serial_s, parallel_s ≥ 0 (`fitting._relative_least_squares`).

Projection (strong scaling, `project_layouts`): a layout P×T on N nodes is R = N·P ranks, each taking G/R of the
global batch G at T threads. Its compute is compute(T) priced as `costmodel.project_step` prices the serial step
(everything divides by R but a replicated update), its exchange the step's collectives on R ranks with the α–β–γ
model. Per layout and node count: step_s, samples/s = G / step_s and the efficiency per core against the fitted
1×1, samples/s / (N·P·T · G / compute(1)). No MPI here.
"""

from __future__ import annotations

import dataclasses
from collections.abc import Callable, Mapping, Sequence
from typing import Any

import numpy as np
from shardmill.config import Job
from shardmill.errors import JobError
from shardmill.parallel.exchange import blas_threads, resolve_update
from shardmill.scaling import costmodel
from shardmill.scaling.fitting import _relative_least_squares
from shardmill.scaling.study import network_fit

PARTS: tuple[str, ...] = ("gemm", "other", "update")
"""The parts of a rank's compute, each with its own threaded term (see the module docstring)."""

DEFAULT_NODES: tuple[int, ...] = (1, 2, 4, 16, 64)
"""Node counts `scale --layouts` projects to when `--project-nodes` is not given."""

ASSUMPTIONS: tuple[str, ...] = (
    "A rank's compute at T threads is serial_s + parallel_s/T per part of the step (Amdahl 1967), the GEMMs, the "
    "rest of forward, backward and data, and the update each fitted on its own to the layouts measured with one "
    "process; thread counts beyond the measured ones are extrapolated with the fitted serial part.",
    "Threads a rank cannot use are not counted: in fast mode a rank runs BLAS and the kernels at one thread when "
    "its largest GEMM falls under the size threshold (parallel.exchange.blas_threads), so T counts only above it; "
    "the cores of the layout are still held.",
    "Strong scaling: each of the N*P ranks takes G/(N*P) rows at the per-row rates measured on the whole batch, "
    "so compute divides by the ranks but a replicated update, which every rank repeats (costmodel.project_step).",
    "Intra-node and inter-node messages cost the same alpha and beta, those fitted to the one-node allreduce "
    "timings at the largest measured P, or the --network given; the T threads of a rank do not slow its messages.",
    "The exchange is fully exposed (overlap 0), an upper bound when messages overlap with backward.",
)
"""What the layout projection adds to costmodel.ASSUMPTIONS, one sentence each."""


def amdahl_speedup(serial_fraction: float, threads: float) -> float:
    """Amdahl's speedup on `threads` threads of work whose `serial_fraction` ∈ [0, 1] does not divide:
    S = 1 / (f + (1 − f)/T) (Amdahl 1967). Dimensionless; S(1) = 1, S → 1/f as T grows."""
    f = costmodel.check_non_negative(serial_fraction, "serial_fraction")
    if f > 1.0:
        raise ValueError(f"`serial_fraction` must be a fraction in [0, 1]; got {serial_fraction!r}")
    if not threads >= 1:
        raise ValueError(f"`threads` must be >= 1; got {threads!r}")
    return 1.0 / (f + (1.0 - f) / threads)


@dataclasses.dataclass(frozen=True)
class ThreadedCompute:
    """A rank's compute per step as one Amdahl term per part, fitted to one node's single-process layouts.

    parts: part name → (serial_s, parallel_s), seconds per step of the global batch on one process.
    threads: the thread counts fitted to, one per measured point; measured_s: each point's compute (the sum of
    its parts), seconds; relative_errors: (model − measured) / measured of that sum per point.
    """

    parts: dict[str, tuple[float, float]]
    threads: tuple[int, ...]
    measured_s: tuple[float, ...]
    relative_errors: tuple[float, ...]

    def part_s(self, name: str, threads: float) -> float:
        """Seconds per step of one part at `threads` threads: serial_s + parallel_s / threads."""
        serial_s, parallel_s = self.parts[name]
        return serial_s + parallel_s / threads

    def seconds(self, threads: float) -> float:
        """compute(T), seconds per step: the sum of the parts at `threads` threads."""
        return sum(self.part_s(name, threads) for name in self.parts)

    @property
    def serial_fraction(self) -> float:
        """f = Σ serial_s / compute(1): the share of one thread's compute that more threads do not divide."""
        return sum(serial for serial, _ in self.parts.values()) / self.seconds(1)

    def record(self) -> dict[str, Any]:
        """As plain JSON values."""
        return {"parts": {name: {"serial_s": s, "parallel_s": q} for name, (s, q) in self.parts.items()},
                "serial_fraction": self.serial_fraction, "compute_1_s": self.seconds(1),
                "points": [{"threads": t, "measured_s": m, "model_s": self.seconds(t), "relative_error": e}
                           for t, m, e in zip(self.threads, self.measured_s, self.relative_errors, strict=True)]}


def fit_threaded_compute(threads: Sequence[int], parts: Mapping[str, Sequence[float]]) -> ThreadedCompute:
    """Fit serial_s and parallel_s of each part to its seconds per step measured at each thread count.

    threads: (n,) thread counts ≥ 1, at least two distinct; parts: name → (n,) seconds ≥ 0, whose sum (the
    compute) is > 0 at every point. Least squares on part(T) = serial_s + parallel_s/T, each residual divided by
    that point's compute, with both terms ≥ 0; exact when the timings follow the model (two points always do,
    unless a term would be negative). Raises ValueError naming the field and the value.
    """
    counts = list(threads)
    if not counts or any(isinstance(t, bool) or not isinstance(t, (int, np.integer)) or t < 1 for t in counts):
        raise ValueError(f"`threads` must be whole numbers of threads >= 1; got {counts!r}")
    if len(set(counts)) < 2:
        raise ValueError(f"`threads` must hold at least two distinct thread counts measured with one process, "
                         f"such as 1x1 and 1x2; got {sorted(set(counts))!r}")
    return _fit(counts, parts, threaded=True)


def _fit(counts: list[int], parts: Mapping[str, Sequence[float]], threaded: bool) -> ThreadedCompute:
    """The least squares of `fit_threaded_compute`; `threaded=False` fits each part as a constant (parallel_s = 0)."""
    if not parts:
        raise ValueError("`parts` must name at least one part of the compute; got none")
    table = {}
    for name, values in parts.items():
        seconds = np.asarray(list(values), dtype=np.float64)
        if seconds.shape != (len(counts),) or not (np.all(np.isfinite(seconds)) and np.all(seconds >= 0.0)):
            raise ValueError(f"`parts[{name!r}]` must be {len(counts)} finite seconds >= 0, one per thread count; "
                             f"got {list(values)!r}")
        table[name] = seconds
    total = sum(table.values())
    if not np.all(total > 0.0):
        raise ValueError(f"the compute (the sum of the parts) must be > 0 seconds at every point; got {total.tolist()}")
    inverse = 1.0 / np.asarray(counts, dtype=np.float64)
    design = np.column_stack([np.ones(len(counts)), inverse if threaded else np.zeros(len(counts))])
    fitted = {name: (float(x[0]), float(x[1])) for name, seconds in table.items()
              for x in [_relative_least_squares(design, seconds, total)]}
    model = design @ np.sum([fitted[name] for name in table], axis=0)
    return ThreadedCompute(parts=fitted, threads=tuple(int(t) for t in counts),
                           measured_s=tuple(float(t) for t in total),
                           relative_errors=tuple(float(e) for e in (model - total) / total))


def check_fittable(layouts: Sequence[tuple[int, int]]) -> None:
    """JobError before any run when `--layouts` has fewer than two single-process layouts of distinct threads."""
    single = sorted({T for P, T in layouts if P == 1})
    if len(single) < 2:
        given = ",".join(f"{P}x{T}" for P, T in layouts)
        raise JobError(f"`--project-nodes` fits the threaded compute from layouts of one process: `--layouts` must "
                       f"hold two or more 1xT with distinct T, such as 1x1,1x2; got {given!r}")


def compute_parts(raw: dict[str, Any]) -> dict[str, float]:
    """Seconds per step of each part (`PARTS`) of a one-process worker record (`scaling/worker.py`).

    From the phases: update = the update phase; the rest = data + forward + backward; gemm = the GEMM floor
    (gemm_floor_s), at most the rest, in fast mode; other = the rest less gemm. Exact mode has no gemm part.
    """
    (rank,) = raw["ranks"]
    phase = {name: seconds / raw["steps"] for name, seconds in rank["phase_s"].items()}
    rest = phase["data"] + phase["forward"] + phase["backward"]
    if raw["reduction"] != "fast":
        return {"other": rest, "update": phase["update"]}
    gemm = min(rank["gemm_floor_s"], rest)
    return {"gemm": gemm, "other": rest - gemm, "update": phase["update"]}


def effective_threads(job: Job, threads: int, ranks: int) -> int:
    """The threads a rank of a P×T layout works with on `ranks` ranks: T, or 1 where fast mode's BLAS and kernels
    stay at one thread for this size (`parallel.exchange.blas_threads`); exact mode's lanes use T, at most the
    rank's ⌈chunks / ranks⌉ chunks of `run.exact_chunk` rows."""
    if job.run.reduction != "fast":  # lanes over whole chunks: no more than a rank's chunks
        chunks = -(-job.run.global_batch // job.run.exact_chunk)
        return max(1, min(threads, -(-chunks // ranks)))
    return blas_threads(dataclasses.replace(job, run=dataclasses.replace(job.run, threads=threads)), ranks)


def fit_layouts(job: Job, raws: Mapping[tuple[int, int], dict[str, Any]]) -> ThreadedCompute:
    """The threaded compute fitted to the single-process layouts among `raws` ((P, T) → worker record).

    Each point counts at the threads it could use (`effective_threads`); when they all come to one count (a model
    too small for threads), the parts are fitted as constants (parallel_s = 0), which every projection then uses
    at that same count. ValueError as `fit_threaded_compute` without two single-process layouts.
    """
    single = sorted((T, raw) for (P, T), raw in raws.items() if P == 1)
    if len(single) < 2:
        given = ",".join(f"{P}x{T}" for P, T in raws)
        raise ValueError(f"two or more measured layouts of one process with distinct T are needed, such as "
                         f"1x1,1x2; got {given!r}")
    counts = [effective_threads(job, T, 1) for T, _ in single]
    parts = [compute_parts(raw) for _, raw in single]
    names = list(parts[0]) if parts else []
    table = {name: [part[name] for part in parts] for name in names}
    if len(single) >= 2 and len(set(counts)) == 1:  # every point ran at one thread: the parts are constants
        return _fit(counts, table, threaded=False)
    return fit_threaded_compute(counts, table)


def project_layouts(compute: ThreadedCompute, layouts: Sequence[tuple[int, int]], nodes: Sequence[int],
                    global_batch: int, collectives: Sequence[costmodel.Collective], alpha: float, beta: float,
                    gamma: float, update: str, threads_used: Callable[[int, int], int] | None = None
                    ) -> list[dict[str, Any]]:
    """One row per layout (P, T) and node count N: the strong-scaling step of R = N·P ranks at T threads.

    compute: the fitted term (seconds per step of the global batch on one process); global_batch: G rows;
    collectives, alpha (s), beta (s/byte), gamma (s/byte): the step's exchange and the network, as for
    `costmodel.project_step`; update: "replicated" or "sharded", the update on R > 1 ranks;
    threads_used(T, R): the threads a rank can use (default T). Row keys: layout, processes, threads, nodes,
    ranks, cores (N·P·T), threads_used, extrapolated (threads_used above every fitted count), compute_s,
    update_s, comm_s, algorithm, step_s (seconds per step), samples_per_s (G / step_s) and
    efficiency_per_core (samples/s over N·P·T times the fitted 1×1's G / compute(1)).
    """
    counts = [costmodel._check_processes(n, "nodes") for n in nodes]
    if not counts:
        raise ValueError("`nodes` must name at least one node count; got none")
    serial_rate = global_batch / compute.seconds(1)
    rows = []
    for P, T in layouts:
        for N in counts:
            R = N * P
            used = threads_used(T, R) if threads_used is not None else T
            (row,) = costmodel.project_step(compute.seconds(used), collectives, [R], alpha, beta, gamma,
                                            update=update if R > 1 else "replicated",
                                            update_s=compute.part_s("update", used) if "update" in compute.parts
                                            else 0.0)
            samples_per_s = global_batch / row["step_s"]
            rows.append({"layout": f"{P}x{T}", "processes": P, "threads": T, "nodes": N, "ranks": R,
                         "cores": R * T, "threads_used": used, "extrapolated": used > max(compute.threads),
                         "compute_s": row["compute_s"], "update_s": row["update_s"], "update": row["update"],
                         "comm_s": row["comm_s"], "algorithm": row["algorithm"], "step_s": row["step_s"],
                         "samples_per_s": samples_per_s,
                         "efficiency_per_core": samples_per_s / (R * T * serial_rate),
                         "runnable": R <= global_batch})  # a rank needs one row of the global batch at least
    return rows


def best_per_node_count(rows: Sequence[dict[str, Any]]) -> dict[str, str]:
    """Node count (as text, a JSON key) → the layout with the most samples/s there (the first of equals), among
    the rows that can run (`runnable`: no more ranks than rows in the global batch)."""
    best: dict[str, dict[str, Any]] = {}
    for row in rows:
        key = str(row["nodes"])
        if not row.get("runnable", True):
            continue
        if key not in best or row["samples_per_s"] > best[key]["samples_per_s"]:
            best[key] = row
    return {key: row["layout"] for key, row in best.items()}


def layout_projection(job: Job, raws: Mapping[tuple[int, int], dict[str, Any]], nodes: Sequence[int],
                      network: tuple[float, float] | None, network_spec: str | None) -> dict[str, Any]:
    """The "projection" entry of layouts.json: the fit, the network, the rows and the best layout per node count.

    raws: (P, T) → the worker's record of each layout (timed with the GEMM floor); network: (alpha s, beta s/byte)
    from `--network`, else α and β are fitted to the allreduce timings of the largest P measured
    (`study.network_fit`). {"available": False, "reason": …} when the single-process layouts cannot be fitted, or
    when no network is known and a projection needs one.
    """
    try:
        compute = fit_layouts(job, raws)
    except ValueError as err:
        return {"available": False, "reason": f"the threaded compute term cannot be fitted: {err}"}
    first = next(iter(raws.values()))
    measured = [raw for (P, _), raw in sorted(raws.items()) if P > 1 and raw["allreduce"]]
    gamma = first["gamma_s_per_byte"]
    if network is not None:
        alpha, beta = network
        net = {"name": f"given ({network_spec})", "alpha_s": alpha, "beta_s_per_byte": beta}
    elif measured:
        raw = max(measured, key=lambda raw: raw["p"])
        candidates, _, choice = network_fit(raw)
        alpha, beta, gamma = candidates[choice].alpha, candidates[choice].beta, raw["gamma_s_per_byte"]
        net = {"name": f"measured (fit at P={raw['p']})", "alpha_s": alpha, "beta_s_per_byte": beta}
    elif max(nodes) * max(P for P, _ in raws) > 1:
        return {"available": False, "reason": "no layout with two or more processes was measured, so there is no "
                                              "allreduce to fit a network to; add one such as 2x1, or give --network"}
    else:
        alpha = beta = 0.0
        net = {"name": "none (one rank sends nothing)", "alpha_s": 0.0, "beta_s_per_byte": 0.0}
    update = resolve_update(job, 2).update
    collectives = costmodel.step_collectives(update, first["reduction"], first["params"], first["itemsize"],
                                             first["exact_format"])
    rows = project_layouts(compute, list(raws), nodes, job.run.global_batch, collectives, alpha, beta, gamma, update,
                           threads_used=lambda T, R: effective_threads(job, T, R))
    return {"available": True, "mode": "strong", "global_batch": job.run.global_batch, "nodes": list(nodes),
            "fit": compute.record(), "network": dict(net, gamma_s_per_byte=gamma), "update": update,
            "collectives": [{"kind": c.kind, "n_bytes": c.n_bytes, "calls": c.calls} for c in collectives],
            "rows": rows, "best": best_per_node_count(rows),
            "assumptions": [text for text in costmodel.ASSUMPTIONS if not text.startswith("One rank per core")]
            + list(ASSUMPTIONS)}  # the threaded term's own replace the process study's one rank per core
