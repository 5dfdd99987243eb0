"""The best model and early stopping (``run.best_metric``, ``run.patience``, ``run.min_improvement``).

At each epoch end the trainer hands the tracker the epoch's validation metric. The value counts as an improvement
when it beats the best so far by more than ``min_improvement`` (lower is better for a loss or an RMSE, higher for
an accuracy); the first value always counts. After ``patience`` epoch ends in a row without one, the run stops
(``patience`` 0: never). The tracker's state is a small dict that goes into every checkpoint, so a resumed run
keeps counting where it left off.
"""

from __future__ import annotations

import math
from typing import Any

HIGHER_IS_BETTER = {"loss": False, "rmse": False, "accuracy": True}


class BestTracker:
    """The best value of one validation metric so far, where it was reached, and the epochs since.

    ``metric``: a path in an epoch record of metrics.jsonl ("validation.loss", "validation.accuracy",
    "validation.rmse"); ``patience``: epoch ends without improvement before stopping (0: never stop);
    ``min_improvement``: the smallest change that counts, in the metric's units.
    """

    def __init__(self, metric: str, patience: int = 0, min_improvement: float = 0.0,
                 state: dict[str, Any] | None = None) -> None:
        self.metric = metric
        self.patience = patience
        self.min_improvement = min_improvement
        self.higher = HIGHER_IS_BETTER[metric.split(".")[1]]
        self.value: float | None = None
        self.epoch = 0
        self.step = 0
        self.stale_epochs = 0
        self.stopped = False  # the run ended here by early stopping (set by the trainer, kept by checkpoints)
        if state and state.get("metric") == metric:  # a resume: keep counting (another metric starts over)
            self.value = state.get("value")
            self.epoch = int(state.get("epoch", 0))
            self.step = int(state.get("step", 0))
            self.stale_epochs = int(state.get("stale_epochs", 0))
            self.stopped = bool(state.get("stopped", False))

    def value_of(self, record: dict[str, Any]) -> float:
        """The watched metric in an epoch record (``record["validation"]["loss"]`` for "validation.loss")."""
        section, name = self.metric.split(".")
        return float(record[section][name])

    def better(self, value: float) -> bool:
        """Whether ``value`` improves on the best so far by more than ``min_improvement``."""
        if self.value is None:
            return math.isfinite(value)
        gain = value - self.value if self.higher else self.value - value
        return gain > self.min_improvement

    def update(self, value: float, epoch: int, step: int) -> bool:
        """Take the metric of the epoch that ended at ``step``; True when it is the new best."""
        improved = self.better(value)
        if improved:
            self.value, self.epoch, self.step, self.stale_epochs = value, epoch, step, 0
        else:
            self.stale_epochs += 1
        return improved

    @property
    def should_stop(self) -> bool:
        return self.patience > 0 and self.stale_epochs >= self.patience

    def state(self) -> dict[str, Any]:
        """What a checkpoint and the epoch record keep: metric, best value, its epoch and step, stale epochs, and
        whether the run stopped early."""
        return {"metric": self.metric, "value": self.value, "epoch": self.epoch, "step": self.step,
                "stale_epochs": self.stale_epochs, "stopped": self.stopped}
