"""Proof of agreement: the P-rank reduced gradient against the serial gradient of the same samples.

For each of K global batches every rank computes its shard and the gradients are reduced as in training.
Rank 0 then recomputes the whole batch alone: it runs forward and backward shard by shard with the same
array shapes the ranks used (so every per-sample activation and delta has the same bits), and forms each
full-batch gradient as one serial sum over all G samples (one GEMM over G rows for dW, one column sum for
db). The two results then differ only by the order of summation over samples, which Higham's bound for
recursive summation covers (Accuracy and Stability of Numerical Algorithms, 2nd ed., 2002, §4.2):

    |ŝ − s| ≤ γ_{n−1} Σ|x_i|,   γ_k = k·u / (1 − k·u),   u = 2⁻²⁴ (float32) or 2⁻⁵³ (float64).

Both the parallel and the serial sum obey it with n = G, so their difference is at most 2·γ_{G−1}·Σ|x_i|
per element, with Σ|x_i| = (|A|ᵀ|dZ|) for weights and Σ|dZ| for biases; a layer-normalised hidden layer's gain and
shift are sums over samples too (Σ dN ⊙ x̂ and Σ dN), with Σ|x_i| = Σ|dN|·|x̂| and Σ|dN|; an embedding row's
gradient is the sum of the first layer's input gradient dA₀ over the samples holding its code, with
Σ|x_i| = Σ|dA₀| over those samples (at most G of them, so γ_{G−1} still bounds it). Dropout's decisions are
the same in both (counters: the same global step and rows). The report gives, per tensor, the
largest ratio |parallel − serial| / bound: ≤ 1 is agreement; > 1 is a bug.
"""

from __future__ import annotations

import json
import sys
from collections.abc import Callable
from pathlib import Path
from typing import Any

import numpy as np
from shardmill.config import Job, load_job
from shardmill.errors import JobError
from shardmill.kernels import activations as act
from shardmill.kernels import layers
from shardmill.parallel.comm import Comm
from shardmill.parallel.exchange import blas_threads
from shardmill.training.trainer import Trainer
from shardmill.training.warmup import warm_up_kernels
from threadpoolctl import threadpool_limits

Tamper = Callable[[np.ndarray, Comm], None]


def gamma(k: int, dtype: np.dtype) -> float:
    """γ_k = k·u / (1 − k·u) with u the unit roundoff of ``dtype`` (Higham 2002, Lemma 3.1)."""
    u = float(np.finfo(dtype).eps) / 2.0
    return k * u / (1.0 - k * u)


def parallel_gradient(trainer: Trainer, rows: np.ndarray, tamper: Tamper | None = None) -> np.ndarray:
    """The reduced gradient of one global batch exactly as a training step computes it (a new array)."""
    trainer.timer.start()
    owned = trainer.gradient(rows)
    gradient = trainer.exchange.full(owned.copy())  # a sharded update holds only its slice
    if tamper is not None:
        tamper(gradient, trainer.comm)
    return gradient


def serial_gradient(trainer: Trainer, rows: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Rank 0 alone: the full-batch gradient as one serial sum over G samples, and Σ|x_i| per element.

    Returns (gradient in the model's dtype, absolute sums in float64), both flat in the params layout.
    """
    model = trainer.model
    G, L = rows.size, model.n_layers
    A_full = [np.zeros((G, model.sizes[l]), dtype=model.dtype) for l in range(L)]
    dZ_full = [np.zeros((G, model.sizes[l + 1]), dtype=model.dtype) for l in range(L)]
    normed = [h for h in range(L - 1) if model.has_norm(h)]  # per hidden layer: Z, (μ, 1/σ) and dN of every sample
    Z_full = {h: np.zeros_like(dZ_full[h]) for h in normed}
    stats_full = {h: np.zeros((G, 2)) for h in normed}
    dN_full = {h: np.zeros_like(dZ_full[h]) for h in normed}
    scratch = np.zeros_like(trainer.grads)
    scale = trainer.batch_scale(rows)  # 1/G, or 1/Σw of the batch's weights
    ws = trainer.model.workspace(trainer.ws.rows)
    ws.norm_input = {h: np.zeros_like(ws.Z[h]) for h in normed}  # ∂loss/∂H before the norm kernel overwrites it
    embedded = bool(model.embeddings)
    if embedded:  # dA₀ of every sample, as the part's backward formed it
        ws.input_gradient = np.zeros_like(ws.inputs)
        dA0_full = np.zeros((G, model.sizes[0]), dtype=model.dtype)
    # The parts the ranks computed (fast: one shard per rank; exact: the fixed chunks, whose shapes do not depend
    # on P), recomputed here with the same shapes.
    for lo, hi in trainer.exchange.part_bounds(G):
        part = rows[lo:hi]
        n = part.size
        trainer.take_inputs(part, ws)
        ws.forward_loss(n, trainer.take_targets(part), trainer.take_weights(part), scale, step=trainer.step_count,
                        rows=part)
        for h in normed:
            Z_full[h][lo:hi], stats_full[h][lo:hi] = ws.Z[h][:n], ws.stats[h][:n]
        for l, dZ in ws.backward(n, scratch):
            A_full[l][lo:hi] = ws.A[l][:n]
            dZ_full[l][lo:hi] = dZ
        if embedded:
            dA0_full[lo:hi] = ws.input_gradient[:n]
        for h in normed:  # dN = f'(N) ⊙ ∂loss/∂H in the dtype, as the norm kernel forms it
            dN = ws.norm_input[h][:n].copy()
            act.backward(ws.preactivations(h, n), ws.H[h][:n], dN, model.hidden_codes[h])
            dN_full[h][lo:hi] = dN
    ws.norm_input = None
    ws.input_gradient = None
    grad = np.zeros_like(trainer.grads)
    bound = np.zeros(grad.size, dtype=np.float64)
    dWs, dbs = model.views(grad)
    aWs, abs_ = model.views(bound)
    for l in range(L):
        np.matmul(A_full[l].T, dZ_full[l], out=dWs[l])
        act.column_sums(dZ_full[l], dbs[l])
        a64, d64 = np.abs(A_full[l].astype(np.float64)), np.abs(dZ_full[l].astype(np.float64))
        np.matmul(a64.T, d64, out=aWs[l])
        abs_[l][...] = d64.sum(axis=0)
    gains, shifts = model.norm_views(grad)
    abs_gains, abs_shifts = model.norm_views(bound)
    for h in normed:  # the norm's serial sums over G samples, by the training kernel itself over all G rows
        # dN_full is already ∂loss/∂N: the identity code leaves it as it is (H is not read)
        layers.norm_backward(Z_full[h], stats_full[h], model.gains[h], model.shifts[h], Z_full[h],
                             dN_full[h].copy(), gains[h], shifts[h], np.zeros((2, model.sizes[h + 1]), model.dtype),
                             act.IDENTITY)
        xhat = (Z_full[h].astype(np.float64) - stats_full[h][:, :1]) * stats_full[h][:, 1:]
        d64 = np.abs(dN_full[h].astype(np.float64))
        abs_gains[h][...] = (d64 * np.abs(xhat)).sum(axis=0)
        abs_shifts[h][...] = d64.sum(axis=0)
    if embedded:  # the tables' rows: one serial scatter-add over all G samples, by the training kernel
        codes = np.ascontiguousarray(trainer.data.codes[rows])
        layers.embedding_backward(dA0_full, codes, model.n_numeric, model.embedding_offsets, model.embedding_widths,
                                  grad)
        layers.embedding_backward(np.abs(dA0_full.astype(np.float64)), codes, model.n_numeric,
                                  model.embedding_offsets, model.embedding_widths, bound)
    return grad, bound


def compare(model, parallel: np.ndarray, serial: np.ndarray, abs_sums: np.ndarray, G: int,
            conversion: np.ndarray | float = 0.0) -> list[dict[str, Any]]:
    """Per tensor: max |Δ|, max |Δ|/|serial|, and max |Δ| / (2·γ_{G−1}·Σ|x| + conversion).

    ``conversion``: what the exchange's own rounding may add per element (the compact exact format's grid).
    """
    g = 2.0 * gamma(G - 1, model.dtype)
    rows = []
    diff = np.abs(parallel.astype(np.float64) - serial.astype(np.float64))
    extra = np.broadcast_to(np.asarray(conversion, dtype=np.float64), diff.shape)
    named_diff, named_ser, named_abs = model.named(diff), model.named(serial), model.named(abs_sums)
    named_extra = model.named(np.ascontiguousarray(extra))
    tiny = float(np.finfo(model.dtype).tiny)
    for name in model.names():
        d, s, a = named_diff[name].ravel(), named_ser[name].ravel(), named_abs[name].ravel()
        bound = g * a + named_extra[name].ravel()
        with np.errstate(divide="ignore", invalid="ignore"):
            ratio = np.where(bound > 0, d / np.where(bound > 0, bound, 1.0), np.where(d > 0, np.inf, 0.0))
            rel = d / np.maximum(np.abs(s).astype(np.float64), tiny)
        rows.append({"tensor": name, "max_abs_diff": float(d.max(initial=0.0)),
                     "max_rel_diff": float(rel.max(initial=0.0)), "bound_ratio": float(ratio.max(initial=0.0))})
    return rows


def verify(job: Job, comm: Comm | None = None, batches: int = 3, trajectory: int = 0,
           tamper: Tamper | None = None) -> dict[str, Any] | None:
    """Compare parallel and serial gradients on the first ``batches`` global batches of epoch 0.

    Returns the report on rank 0 (None elsewhere). ``tamper`` (for tests) alters the reduced gradient
    before comparison, to show the check can fail. ``trajectory`` > 0 also trains that many steps
    in parallel and serially (rank 0 alone, ``Comm.alone()``) and reports the parameter divergence per step.
    """
    comm = comm or Comm()
    with threadpool_limits(limits=blas_threads(job, comm.size), user_api="blas"):
        trainer = Trainer(job, comm)
        warm_up_kernels(trainer)
        batches = min(batches, trainer.sampler.steps_per_epoch)
        used = len(trainer.lanes.lanes) if trainer.lanes is not None else blas_threads(job, comm.size)  # exact: lanes
        report: dict[str, Any] = {"processes": comm.size, "threads": job.run.threads,
                                  "threads_used": used, "global_batch": job.run.global_batch,
                                  "reduction": job.run.reduction, "dtype": trainer.model.dtype.name,
                                  "bound": "2·γ_{G−1}·Σ|x_i| (Higham 2002, §4.2)", "batches": []}
        if job.run.reduction == "exact" and job.run.exact_format != "wide":
            report["bound"] += (f" + K·2^(−S_b−1) ({job.run.exact_format} exact format: K chunks on block b's "
                                f"grid)")
        for k in range(batches):
            rows = trainer.sampler.batch(0, k)
            parallel = parallel_gradient(trainer, rows, tamper)
            if comm.rank == 0:
                serial, abs_sums = serial_gradient(trainer, rows)
                tensors = compare(trainer.model, parallel, serial, abs_sums, rows.size,
                                  trainer.exchange.conversion_bound())
                report["batches"].append({"batch": k, "tensors": tensors})
        if trajectory > 0:
            report["trajectory"] = _trajectory(job, comm, trajectory)
    if comm.rank != 0:
        return None
    worst = max(t["bound_ratio"] for b in report["batches"] for t in b["tensors"])
    report["max_bound_ratio"] = worst
    report["verdict"] = "agree" if worst <= 1.0 else "disagree"
    return report


def _trajectory(job: Job, comm: Comm, steps: int) -> list[dict[str, float]] | None:
    parallel = Trainer(job, comm)
    serial = Trainer(job, Comm.alone()) if comm.rank == 0 else None
    out = []
    spe = parallel.sampler.steps_per_epoch
    for step in range(steps):
        epoch, in_epoch = divmod(step, spe)
        parallel.step(epoch, in_epoch)
        if serial is not None:
            serial.step(epoch, in_epoch)
            p, s = parallel.model.params.astype(np.float64), serial.model.params.astype(np.float64)
            d = np.abs(p - s)
            out.append({"step": step + 1, "max_abs_diff": float(d.max()),
                        "max_rel_diff": float((d / np.maximum(np.abs(s), 1e-300)).max()),
                        "rms_param": float(np.sqrt(np.mean(s * s)))})
    return out if comm.rank == 0 else None


def format_report(report: dict[str, Any]) -> str:
    """A readable table: one line per tensor of each batch, then the verdict."""
    width = max([6, *(len(t["tensor"]) for b in report["batches"] for t in b["tensors"])])  # E_<column> names
    threads = report.get("threads_used", 1)  # the layout compared with the serial gradient: P × T
    lines = [f"verify: {report['processes']} process(es) × {threads} thread(s), G = {report['global_batch']}, "
             f"{report['reduction']} reduction, {report['dtype']}; bound {report['bound']}",
             f"{'batch':>5}  {'tensor':<{width}} {'max |Δ|':>11} {'max rel Δ':>11} {'Δ / bound':>10}"]
    for b in report["batches"]:
        for t in b["tensors"]:
            lines.append(f"{b['batch']:>5}  {t['tensor']:<{width}} {t['max_abs_diff']:>11.3e} "
                         f"{t['max_rel_diff']:>11.3e} "
                         f"{t['bound_ratio']:>10.3g}")
    for t in report.get("trajectory") or []:
        lines.append(f"trajectory step {t['step']:>4}: max |Δθ| {t['max_abs_diff']:.3e} "
                     f"(max rel {t['max_rel_diff']:.3e})")
    lines.append(f"verdict: {report['verdict'].upper()} (largest Δ / bound = {report['max_bound_ratio']:.3g}; "
                 f"≤ 1 means the parallel gradient equals the serial one up to summation order)")
    return "\n".join(lines)


DISAGREE_EXIT = 3
"""Exit status of ``shardmill verify`` when the gradients disagree (1 stays a crash, 2 a user error)."""


def cmd_verify(args, job: Job | None = None) -> int:
    """``shardmill verify JOB``: exit 0 on agreement, :data:`DISAGREE_EXIT` on disagreement.

    Prints the report as text, or as JSON with ``--json``; ``--out FILE`` also writes the JSON report.
    """
    job = job if job is not None else load_job(args.job, overrides=getattr(args, "sets", ()))
    out = getattr(args, "out", None)
    if out is not None and not Path(out).parent.is_dir():
        raise JobError(f"`--out` folder {str(Path(out).parent)!r} does not exist")
    report = verify(job, Comm(), batches=args.batches, trajectory=args.trajectory)
    if report is None:
        return 0
    print(json.dumps(report, indent=1) if getattr(args, "json", False) else format_report(report))
    if out is not None:
        Path(out).write_text(json.dumps(report, indent=1))
    sys.stdout.flush()
    return 0 if report["verdict"] == "agree" else DISAGREE_EXIT
