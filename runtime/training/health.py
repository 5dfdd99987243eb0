"""Training-health diagnostics, cheap enough to run every N steps, reduced across ranks.

Per layer: the gradient norm ‖g_l‖, the update-to-weight ratio ‖Δθ_l‖ / ‖θ_l‖, the fraction of saturated
sigmoid/tanh units (|z| > 4, where σ' < 0.018 and tanh' < 0.0014) and the fraction of dead ReLU-family units
(zero on every row of the global batch); which activation gets which is its entry's ``watch_saturation`` and
``watch_dead`` (``model/activations.py``). Warnings name the layer and the symptom.
"""

from __future__ import annotations

import math
from typing import Any

import numpy as np
from shardmill.kernels import activations as act
from shardmill.kernels import optim as kernels
from shardmill.model.activations import ACTIVATIONS
from shardmill.model.mlp import MLP, Workspace
from shardmill.parallel.comm import Comm

SATURATION_Z = 4.0
SATURATED_WARN = 0.5  # fraction of saturated units that earns a warning (common practice: a rule of thumb)
DEAD_WARN = 0.5
VANISHING_RATIO = 1e-7  # ‖g_l‖ / ‖θ_l‖ below this: the layer has stopped learning


def diagnose(model: MLP, ws: Workspace, n: int, grad_squares: np.ndarray, before: np.ndarray, comm: Comm,
             step: int) -> dict[str, Any]:
    """Health of every layer after an update. ``grad_squares``: Σ g² of the reduced gradient per layer, (L,)
    float64, the same on every rank; ``before``: params before the update (flat copy).

    Saturation and dead units come from the pre-activations of this rank's last batch in ``ws`` (n rows),
    summed (counts) or OR-ed (unit activity, via MAX) over ranks. Parameters are identical on every rank after
    the update, so their norms need no reduction.
    """
    layers = []
    counts = np.zeros(2 * (model.n_layers - 1))  # saturated elements, rows, per hidden layer
    alive = [np.zeros(model.sizes[l + 1], dtype=np.int64) for l in range(model.n_layers - 1)]
    for l in range(model.n_layers - 1):
        saturated = np.zeros(1, dtype=np.int64)
        act.unit_activity(ws.preactivations(l, n), SATURATION_Z, saturated, alive[l])  # the activation's input
        counts[2 * l], counts[2 * l + 1] = saturated[0], n
    comm.allreduce_sum(counts)
    for a in alive:
        comm.allreduce_max(a)
    for l in range(model.n_layers):
        start, stop = model.slices[l]
        g = math.sqrt(grad_squares[l])
        w = math.sqrt(kernels.sum_squares(before[start:stop]))
        delta = model.params[start:stop].astype(np.float64) - before[start:stop]
        record: dict[str, Any] = {"layer": l, "grad_norm": g, "param_norm": w,
                                  "update_ratio": float(np.sqrt(delta @ delta)) / w if w > 0 else math.inf}
        if l < model.n_layers - 1:
            name = model.activations[l]
            record["activation"] = name
            if ACTIVATIONS[name].watch_saturation:
                record["saturated_fraction"] = counts[2 * l] / max(counts[2 * l + 1] * model.sizes[l + 1], 1)
            if ACTIVATIONS[name].watch_dead:
                record["dead_fraction"] = float(np.mean(alive[l] == 0))
        layers.append(record)
    return {"kind": "health", "step": step, "layers": layers}


def warnings(record: dict[str, Any]) -> list[str]:
    """Human-readable warnings for one health record (empty when every layer looks healthy)."""
    out = []
    for layer in record["layers"]:
        l, step = layer["layer"], record["step"]
        w = layer["param_norm"]
        if w > 0 and layer["grad_norm"] / w < VANISHING_RATIO:
            out.append(f"step {step}: layer {l}: gradient vanishing (‖g‖/‖W‖ = {layer['grad_norm'] / w:.2e})")
        if layer.get("saturated_fraction", 0.0) > SATURATED_WARN:
            out.append(f"step {step}: layer {l} ({layer['activation']}): {layer['saturated_fraction']:.0%} of "
                       f"units saturated (|z| > {SATURATION_Z:g}); gradients through them nearly vanish")
        if layer.get("dead_fraction", 0.0) > DEAD_WARN:
            out.append(f"step {step}: layer {l} ({layer['activation']}): {layer['dead_fraction']:.0%} of units "
                       f"dead (zero on every row of the batch)")
    return out


class HealthWatch:
    """Diagnostics every ``every`` steps (``run.health_every``; 0: never), taken by the run loop around a step.

    The loop calls :meth:`before_step` and :meth:`after_step` around ``Trainer.step``; ``records`` holds the records
    not yet written (the loop writes them to metrics.jsonl). What :func:`diagnose` needs from before the update is
    the parameters (a copy taken before the step: the gradient does not touch them) and Σ g² per layer of the
    clipped gradient, read after the step from the exchange, which still holds it (the optimizer only reads the
    gradient). Every rank calls both at the same point: the sums over ranks inside are collectives.
    """

    def __init__(self, every: int) -> None:
        self.every = every
        self.records: list[dict[str, Any]] = []
        self._before: np.ndarray | None = None

    def before_step(self, trainer: Any) -> None:
        """Before global step ``trainer.step_count + 1``: keep the parameters if that step is watched."""
        if self.every and (trainer.step_count + 1) % self.every == 0:
            self._before = trainer.model.params.copy()

    def after_step(self, trainer: Any) -> None:
        """After the step (``trainer.step_count`` counts it): the record of a watched step joins ``records``."""
        if self._before is None:
            return
        grad_squares = trainer.exchange.layer_sum_squares(trainer.model.slices)
        self.records.append(diagnose(trainer.model, trainer.last_workspace, trainer.last_part_rows, grad_squares,
                                     self._before, trainer.comm, trainer.step_count))
        self._before = None
