"""Optimizers and learning-rate schedules over the flat parameter layout."""

from __future__ import annotations

import math

import numpy as np
from shardmill.config import OptimizerSpec
from shardmill.kernels import threaded

STATE_NAMES = {"sgd": (), "momentum": ("velocity",), "nesterov": ("velocity",), "adam": ("m", "v"),
               "adamw": ("m", "v")}


def learning_rate(spec: OptimizerSpec, step: int, total_steps: int) -> float:
    """Learning rate for update number ``step`` (0-based) of ``total_steps``.

    Linear warm-up over ``warmup`` steps from lr/warmup to lr, then constant, step (×step_factor every
    ``step_every`` steps) or cosine decay to 0 at ``total_steps`` (Loshchilov & Hutter 2017, without restarts).
    """
    lr = spec.learning_rate
    if step < spec.warmup:
        return lr * (step + 1) / spec.warmup
    t = step - spec.warmup
    if spec.schedule == "step":
        return lr * spec.step_factor ** (t // spec.step_every)
    if spec.schedule == "cosine":
        span = max(1, total_steps - spec.warmup)
        return lr * 0.5 * (1.0 + math.cos(math.pi * min(1.0, t / span)))
    return lr


class Optimizer:
    """One optimizer over flat arrays: ``state`` holds arrays with the params layout (velocity, m, v)."""

    def __init__(self, spec: OptimizerSpec, n_params: int, dtype: np.dtype) -> None:
        self.spec = spec
        self.state = {name: np.zeros(n_params, dtype=dtype) for name in STATE_NAMES[spec.method]}
        self.updates = 0  # updates applied so far (Adam's t before this update)

    @property
    def clips(self) -> bool:
        """True when the global-norm clip is on (``clip_global_norm`` > 0)."""
        return self.spec.clip_global_norm > 0.0

    def clip(self, grads: np.ndarray, sum_squares: float | None = None) -> None:
        """Scale grads so the global L2 norm is at most ``clip_global_norm`` (0 = off, and no pass at all).

        ``sum_squares``: Σ g² over the whole gradient, every rank's part included (the exchange strategy's
        ``sum_squares``) when ``grads`` is only the part this rank updates; by default Σ g² of ``grads``.
        """
        if not self.clips:
            return
        limit = self.spec.clip_global_norm
        norm = math.sqrt(threaded.sum_squares(grads) if sum_squares is None else sum_squares)
        if norm > limit:
            threaded.scale(grads, limit / norm)

    def step(self, params: np.ndarray, grads: np.ndarray, total_steps: int) -> float:
        """Apply one update in place to ``params`` (and the state) from ``grads``; returns the learning rate used."""
        s = self.spec
        lr = learning_rate(s, self.updates, total_steps)
        self.updates += 1
        if s.method == "sgd":
            threaded.sgd(params, grads, lr, s.weight_decay)
        elif s.method == "momentum":
            threaded.momentum(params, grads, self.state["velocity"], lr, s.momentum, s.weight_decay)
        elif s.method == "nesterov":
            threaded.nesterov(params, grads, self.state["velocity"], lr, s.momentum, s.weight_decay)
        else:
            decoupled = s.method == "adamw"
            # AdamW (Loshchilov & Hutter 2019, Alg. 2): decay λ·η_t with η_t the schedule multiplier.
            decay = s.weight_decay * lr / s.learning_rate if decoupled else 0.0
            l2 = 0.0 if decoupled else s.weight_decay
            # The kernel rounds ε to the arrays' dtype: an ε below float32's smallest normal would become 0 there
            # and a zero gradient would give 0/0. Any normal ε keeps its bits.
            eps = max(s.eps, float(np.finfo(params.dtype).tiny))
            threaded.adam(params, grads, self.state["m"], self.state["v"], lr, s.beta1, s.beta2, eps,
                         float(self.updates), l2, decay)
        return lr
