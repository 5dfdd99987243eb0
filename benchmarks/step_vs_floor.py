"""One process (P = 1): shardmill's training step and a plain NumPy step, each against the BLAS floor.

Prints one JSON object. For each reference model and dtype:

* ``shardmill``: :func:`shardmill.commands.bench.run_bench` as it is (SGD; Adam rows for the mid model): median step
  time and ``ratio_to_floor`` = floor / step, where the floor is the same process timing the three GEMMs
  per layer (Z = A W, dW = Aᵀ dZ, dA = dZ Wᵀ) on the same shapes, step and floor in alternating blocks.
* ``paired``: a second measurement in which four things take turns, one repetition each in round-robin
  order (so bursts of load from other processes hit all of them alike): shardmill's step; a plain NumPy
  step written the straightforward way (``@``, ``np.maximum``, softmax cross-entropy, backward, SGD; no
  ``out=``); the floor above; and the *needed* floor (the GEMMs a step really runs: the floor without the
  first layer's dA, which training never computes). Its ratios:
  ``numpy_ratio_to_floor``, ``speedup_over_numpy`` = NumPy step / shardmill step, and both steps against
  the needed floor.
* ``phases_ms``: median per-step seconds of shardmill's phases (trainer.timer: data, forward, backward,
  exchange, update), and ``kernels_ms``: the non-GEMM kernels of one step timed alone (median).

Usage: ``python benchmarks/step_vs_floor.py [--quick]`` (full run about 3 min on 2 quiet cores, --quick about 25 s).
"""

from __future__ import annotations

import argparse
import sys
import time
from collections.abc import Callable
from typing import Any

import numpy as np
from benchsupport import LoadMeter, emit, log, machine_record
from shardmill.commands.bench import gemm_floor_step, run_bench, synthetic_dataset
from shardmill.config import job_from_dict
from shardmill.parallel.comm import Comm
from shardmill.timing import PHASES, median, median_time
from shardmill.training.trainer import Trainer
from shardmill.training.warmup import warm_up_kernels
from threadpoolctl import threadpool_limits

MODELS = {
    "small": ([64, 256, 256, 8], 64),
    "mid": ([784, 1024, 1024, 10], 512),
    "large": ([512, 4096, 4096, 16], 1024),
}
# Our targets, on ratio_to_floor as run_bench reports it (SGD rows).
TARGETS = {"small": 0.85, "mid": 0.95}
PLAIN_NUMPY_EXPECTED = 0.8  # what we expected a plain NumPy step to reach, for the table only
BLOCK = 1  # repetitions per turn in the paired measurement: round robin, the fairest under bursty load


def plan(quick: bool) -> list[dict[str, Any]]:
    """The rows to measure: model, dtype, optimizer, steps, warm-up steps, and whether plain NumPy runs too."""
    rows = []
    dtypes = ("float32", "float64")
    for dtype in dtypes:
        rows.append(dict(model="small", dtype=dtype, method="sgd", steps=60 if quick else 300,
                         warmup=10 if quick else 30, numpy=True))
    for dtype in dtypes:
        rows.append(dict(model="mid", dtype=dtype, method="sgd", steps=6 if quick else 40,
                         warmup=2 if quick else 5, numpy=True))
    for dtype in ("float32",) if quick else dtypes:
        rows.append(dict(model="mid", dtype=dtype, method="adam", steps=4 if quick else 30,
                         warmup=2 if quick else 5, numpy=False))
    for dtype in ("float32",) if quick else dtypes:
        rows.append(dict(model="large", dtype=dtype, method="sgd", steps=1 if quick else 4,
                         warmup=0 if quick else 1, numpy=True))
    return rows


def bench_job(layers: list[int], batch: int, dtype: str, method: str):
    """The job run_bench builds (same learning rate and defaults), so the paired trainer matches it."""
    return job_from_dict({
        "model": {"layers": layers, "activation": "relu", "loss": "softmax_cross_entropy", "dtype": dtype},
        "optimizer": {"method": method, "learning_rate": 1e-4},
        "run": {"global_batch": batch, "threads": 1, "reduction": "fast", "overlap": True, "epochs": 1},
    })


def needed_floor_step(trainer: Trainer) -> float:
    """Seconds for the GEMMs a training step runs: the floor without layer 0's dA (never needed)."""
    return gemm_floor_step(trainer, first_layer_dA=False)


def gemm_flops(layers: list[int], n: int) -> tuple[int, int]:
    """Floating-point operations (2·m·k·n per GEMM) of the floor and of the needed floor, for n rows."""
    forward = sum(2 * n * a * b for a, b in zip(layers[:-1], layers[1:], strict=True))
    first_dA = 2 * n * layers[0] * layers[1]
    return 3 * forward, 3 * forward - first_dA


# --- the plain NumPy step: what a user would write without thinking about buffers --------------------------

def numpy_gradients(Ws: list[np.ndarray], bs: list[np.ndarray], X: np.ndarray, y: np.ndarray):
    """Mean softmax cross-entropy of a ReLU MLP and its gradients, written the straightforward way."""
    n = X.shape[0]
    activations = [X]
    h = X
    for W, b in zip(Ws[:-1], bs[:-1], strict=True):
        h = np.maximum(h @ W + b, 0)
        activations.append(h)
    logits = h @ Ws[-1] + bs[-1]
    shifted = logits - logits.max(axis=1, keepdims=True)
    exp = np.exp(shifted)
    probs = exp / exp.sum(axis=1, keepdims=True)
    loss = -np.log(probs[np.arange(n), y]).mean()
    delta = probs.copy()
    delta[np.arange(n), y] -= 1
    delta /= n
    grad_W, grad_b = [None] * len(Ws), [None] * len(Ws)
    for l in reversed(range(len(Ws))):
        grad_W[l] = activations[l].T @ delta
        grad_b[l] = delta.sum(axis=0)
        if l > 0:
            delta = (delta @ Ws[l].T) * (activations[l] > 0)
    return loss, grad_W, grad_b


def numpy_step(Ws: list[np.ndarray], bs: list[np.ndarray], X: np.ndarray, y: np.ndarray, rows: np.ndarray,
               lr: float) -> float:
    """Gather the batch, forward, loss, backward, SGD update (in place on Ws, bs); returns the loss."""
    loss, grad_W, grad_b = numpy_gradients(Ws, bs, X[rows], y[rows])
    for W, b, gW, gb in zip(Ws, bs, grad_W, grad_b, strict=True):
        W -= lr * gW
        b -= lr * gb
    return float(loss)


def numpy_matches_shardmill(trainer: Trainer) -> float:
    """Largest |difference| / max|gradient| between the NumPy gradient and MLP.loss_and_grad on one batch.

    A guard that the two steps compute the same thing (so the timing comparison is like for like).
    """
    model = trainer.model
    rows = trainer.sampler.batch(0, 0)
    X, y = np.asarray(trainer.data.X[rows]), trainer.data.targets[rows]
    _, grad = model.loss_and_grad(X, y)
    _, grad_W, grad_b = numpy_gradients([w.copy() for w in model.weights], [b.copy() for b in model.biases], X, y)
    reference = np.zeros_like(grad)
    ref_W, ref_b = model.views(reference)
    for l in range(model.n_layers):
        ref_W[l][...] = grad_W[l]
        ref_b[l][...] = grad_b[l]
    return float(np.max(np.abs(reference - grad)) / max(float(np.max(np.abs(reference))), 1e-30))


# --- measurement -------------------------------------------------------------------------------------------

def alternate(actions: dict[str, Callable[[], float | None]], steps: int, warmup: int) -> dict[str, list[float]]:
    """Time each action ``steps`` times, all of them taking turns in blocks of BLOCK; ``warmup`` untimed first.

    An action returns its own seconds (the floors) or None (then the call itself is timed).
    """
    def once(fn: Callable[[], float | None]) -> float:
        begin = time.perf_counter()
        own = fn()
        return own if own is not None else time.perf_counter() - begin

    for _ in range(warmup):
        for fn in actions.values():
            once(fn)
    times: dict[str, list[float]] = {name: [] for name in actions}
    done = 0
    while done < steps:
        todo = min(BLOCK, steps - done)
        for name, fn in actions.items():
            times[name].extend(once(fn) for _ in range(todo))
        done += todo
    return times


def paired(row: dict[str, Any], layers: list[int], batch: int) -> dict[str, Any]:
    """The alternating measurement of one row, with phases and kernels; see the module docstring."""
    dtype, method = row["dtype"], row["method"]
    job = bench_job(layers, batch, dtype, method)
    dataset = synthetic_dataset(layers, "softmax_cross_entropy", max(4 * batch, 1024), dtype)
    trainer = Trainer(job, Comm(), dataset=dataset)
    warm_up_kernels(trainer)
    spe = trainer.sampler.steps_per_epoch
    counter = {"shardmill": 0, "numpy": 0}
    phase_steps: list[np.ndarray] = []

    def shardmill_step() -> None:
        before = trainer.timer.seconds.copy()
        trainer.step(0, counter["shardmill"] % spe)
        counter["shardmill"] += 1
        phase_steps.append(trainer.timer.seconds - before)

    actions: dict[str, Callable[[], float | None]] = {"shardmill": shardmill_step}
    out: dict[str, Any] = {}
    if row["numpy"]:
        Ws = [w.copy() for w in trainer.model.weights]
        bs = [b.copy() for b in trainer.model.biases]
        X, y = dataset.X, dataset.targets
        lr = job.optimizer.learning_rate

        def plain_step() -> None:
            numpy_step(Ws, bs, X, y, trainer.sampler.batch(0, counter["numpy"] % spe), lr)
            counter["numpy"] += 1

        actions["numpy"] = plain_step
        out["numpy_gradient_max_relative_difference"] = numpy_matches_shardmill(trainer)
    actions["floor"] = lambda: gemm_floor_step(trainer)
    actions["needed_floor"] = lambda: needed_floor_step(trainer)
    times = alternate(actions, row["steps"], row["warmup"])
    ms = {name: median(t) * 1e3 for name, t in times.items()}
    out["median_ms"] = ms
    out["min_ms"] = {name: min(t) * 1e3 for name, t in times.items()}
    out["repetitions"] = row["steps"]
    out["ratio_to_floor"] = ms["floor"] / ms["shardmill"]
    out["ratio_to_needed_floor"] = ms["needed_floor"] / ms["shardmill"]
    if row["numpy"]:
        out["numpy_ratio_to_floor"] = ms["floor"] / ms["numpy"]
        out["numpy_ratio_to_needed_floor"] = ms["needed_floor"] / ms["numpy"]
        out["speedup_over_numpy"] = ms["numpy"] / ms["shardmill"]
    warm = phase_steps[row["warmup"]:] or phase_steps
    phases = {name: median([p[i] for p in warm]) * 1e3 for i, name in enumerate(PHASES)}
    out["phases_ms"] = phases
    out["non_gemm_ms"] = ms["shardmill"] - ms["needed_floor"]
    out["kernels_ms"] = kernel_times(trainer, repeats=max(5, min(50, 3 * row["steps"])))
    return out


def kernel_times(trainer: Trainer, repeats: int) -> dict[str, float]:
    """Median milliseconds of each non-GEMM piece of one step on this trainer's shapes, timed alone."""
    from shardmill.data.rows import take_rows
    from shardmill.kernels import activations as act
    from shardmill.kernels import losses
    from shardmill.training.optim import Optimizer

    ws, model, data = trainer.ws, trainer.model, trainer.data
    n = ws.rows
    rows = trainer.sampler.batch(0, 0)[:n]
    targets = trainer.take_targets(rows)
    out: dict[str, float] = {}
    try:
        out["take_rows"] = median_time(lambda: take_rows(data.X, rows, data.mean, data.inv_std, ws.inputs), repeats)
        out["targets"] = median_time(lambda: trainer.take_targets(rows), repeats)
        bias = 0.0
        for l in range(model.n_layers):
            Z = ws.Z[l][:n]
            A = ws.A[l + 1][:n] if l < model.n_layers - 1 else Z
            code = model.hidden_codes[l] if l < model.n_layers - 1 else act.IDENTITY
            bias += median_time(lambda Z=Z, A=A, code=code, l=l: act.bias_forward(Z, model.biases[l], A, code),
                                repeats)
        out["bias_activation_forward"] = bias
        Zout, O = ws.Z[-1][:n], ws.O[:n]
        dZ = ws.delta(0, n, model.sizes[-1])
        weights = trainer.batch_weights
        out["loss"] = median_time(lambda: losses.softmax_cross_entropy(Zout, targets[:n], weights, 1.0 / n, O, dZ),
                                  repeats)
        out["count_correct"] = median_time(lambda: trainer.quality_sum(n, targets), repeats)
        dbs = model.views(trainer.grads)[1]
        sums = back = 0.0
        for l in range(model.n_layers):
            d = ws.delta(0, n, model.sizes[l + 1])
            sums += median_time(lambda d=d, l=l: act.column_sums(d, dbs[l]), repeats)
            if l > 0:
                Z, A = ws.Z[l - 1][:n], ws.A[l][:n]
                g = ws.delta(1, n, model.sizes[l])
                back += median_time(lambda Z=Z, A=A, g=g, l=l: act.backward(Z, A, g, model.hidden_codes[l - 1]),
                                    repeats)
        out["bias_gradient_column_sums"] = sums
        out["activation_backward"] = back
        scratch = Optimizer(trainer.job.optimizer, model.n_params, model.dtype)
        params = model.params.copy()
        out["update"] = median_time(lambda: scratch.step(params, trainer.grads, 10**6), repeats)
        out["sampler"] = median_time(lambda: trainer.sampler.batch(0, 1), repeats)
    except Exception as err:  # noqa: BLE001 - a changed kernel signature must not sink the whole benchmark
        out["error"] = repr(err)
    return {name: value * 1e3 if isinstance(value, float) else value for name, value in out.items()}


def measure(row: dict[str, Any]) -> dict[str, Any]:
    layers, batch = MODELS[row["model"]]
    log(f"{row['model']} {layers} G={batch} {row['dtype']} {row['method']}: run_bench, {row['steps']} steps")
    result = run_bench(layers, batch, dtype=row["dtype"], threads=1, steps=row["steps"], warmup=row["warmup"],
                       method=row["method"])
    result.pop("machine", None)
    floor_flops, needed_flops = gemm_flops(layers, batch)
    record: dict[str, Any] = {
        "model": row["model"], "layers": layers, "global_batch": batch, "dtype": row["dtype"],
        "optimizer": row["method"], "shardmill": result,
        "floor_gflop_per_s": floor_flops / (result["floor_ms"] * 1e-3) / 1e9,
        "needed_over_floor_flops": needed_flops / floor_flops,
    }
    log(f"  ratio_to_floor {result['ratio_to_floor']:.4f}; paired measurement")
    with threadpool_limits(limits=1, user_api="blas"):
        record["paired"] = paired(row, layers, batch)
    target = TARGETS.get(row["model"]) if row["method"] == "sgd" else None
    if target is not None:
        record["target"] = {"ratio_to_floor_at_least": target, "met": result["ratio_to_floor"] >= target}
    return record


def main(argv: list[str] | None = None) -> int:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--quick", action="store_true", help="short smoke version (< 30 s)")
    parser.add_argument("--models", default=",".join(MODELS), help="comma-separated subset of small,mid,large")
    args = parser.parse_args(argv)
    wanted = set(args.models.split(","))
    begin = time.perf_counter()
    meter = LoadMeter()
    rows = [measure(row) for row in plan(args.quick) if row["model"] in wanted]
    summary = [
        {"model": r["model"], "dtype": r["dtype"], "optimizer": r["optimizer"],
         "ratio_to_floor": r["shardmill"]["ratio_to_floor"],
         "paired_ratio_to_floor": r["paired"]["ratio_to_floor"],
         "ratio_to_needed_floor": r["paired"]["ratio_to_needed_floor"],
         "numpy_ratio_to_floor": r["paired"].get("numpy_ratio_to_floor"),
         "speedup_over_numpy": r["paired"].get("speedup_over_numpy"),
         "target": r.get("target", {}).get("ratio_to_floor_at_least"),
         "met": r.get("target", {}).get("met")}
        for r in rows
    ]
    emit({
        "benchmark": "step_vs_floor",
        "quick": args.quick,
        "processes": 1,
        "how": ("run_bench: warm-up steps untimed, then step and GEMM floor in alternating blocks of 5, median of "
                "each. paired: shardmill step, plain NumPy step, floor and needed floor in alternating blocks "
                "of 5 after warm-up, median of each. One BLAS thread (threadpoolctl). "
                "Ratios are floor / step: 1 means no time outside the GEMMs."),
        "targets": {"ratio_to_floor_small_at_least": TARGETS["small"], "ratio_to_floor_mid_at_least": TARGETS["mid"],
                    "plain_numpy_expected_about": PLAIN_NUMPY_EXPECTED},
        "summary": summary,
        "rows": rows,
        "seconds": time.perf_counter() - begin,
        "load": meter.stop(),
        "machine": machine_record(),
    })
    return 0


if __name__ == "__main__":
    sys.exit(main())
