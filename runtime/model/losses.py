"""The loss table: one entry per loss, everything the package knows about it in one place.

An entry names its Numba kernels (``kernels/losses.py``: the fused loss and output gradient, the metric count), the
output activation it implies, what targets it takes (the check, how a table's labels are read, synthetic ones for
benchmarks), its second metric (accuracy or RMSE: the per-batch sum, the summary, the numpy reference), its label
rule (what ``predict`` returns), a numpy reference of the loss and its formula for the docs and the model card.

Adding a loss: its kernels in ``kernels/losses.py`` (a new code), then one entry here. The model, trainer,
predictor, export, config, bench and the docs read the entry.
"""

from __future__ import annotations

import dataclasses
import math
from collections.abc import Callable
from dataclasses import dataclass
from pathlib import Path
from typing import Any

import numpy as np
from shardmill.docblocks import replace_block
from shardmill.errors import JobError
from shardmill.kernels import activations as activation_kernels
from shardmill.kernels import losses as kernels
from shardmill.model import activations


@dataclass(frozen=True)
class Loss:
    """One loss: its kernels, targets, metrics, labels, reference and formula.

    code: the kernel code in ``kernels/losses.py``. output: the output activation it implies (an
    :data:`~shardmill.model.activations.OUTPUTS` name). from_logits: the loss kernel reads the logits and applies
    that output activation itself, so the job may not choose another; otherwise the forward pass applies
    ``model.output`` (the job's choice, ``output`` by default) and the kernel reads the outputs.
    kernel(Z, O, targets, weights, scale, dZ, output_code) → the weighted loss SUM Σ w_i·ℓ_i over the n rows
    (float64), leaving the outputs in O and ∂(that sum)/∂Z · scale in dZ; Z, O, dZ: (n, k) in the model's dtype;
    weights: (n,) float64, ones for an unweighted job. outputs(Z, O, zero_bias): the
    output activation of the logits Z into O, where the kernel does it (nothing otherwise: the forward did).
    class_labels: targets are integer class labels (n,) in [0, k); else real targets (n, k), within
    target_range when given. targets_text: the targets in words (docs).
    metric: the second metric's name in metrics.jsonl ("accuracy" or "rmse"), metric_text: it in words (docs).
    quality_sum(O, targets) → its sum
    over a batch (a Numba kernel); metric_of(sum, rows, k) → the metric from the sums over all batches.
    metric_reference(o, targets) → the same metric in numpy, from float64 outputs o (n, k).
    labels(outputs) → what ``Predictor.predict`` returns (None: the outputs themselves); label_rule: that in words.
    reference(o, targets) → the loss of each row (n,) in numpy float64, from the outputs o after the output
    activation (probabilities rounded to 0 or 1 are clipped to the smallest positive double). formula: the loss
    as the kernel computes it (docs, model card). synthetic_targets(rng, rows, k, dtype): random targets of the
    right kind (benchmarks). parameters: the ``[model]`` keys the loss reads (huber: huber_delta).
    scaled_targets: real targets of any sign and scale, which ``data.standardize_targets`` may scale to mean 0 and
    standard deviation 1 (with an identity output; see :func:`shardmill.data.dataset.target_statistics`). bind(entry,
    values) → the entry with them fixed (see :meth:`bound`).
    """

    name: str
    code: int
    output: str
    from_logits: bool
    kernel: Callable[..., float]
    outputs: Callable[[np.ndarray, np.ndarray, np.ndarray], None]
    class_labels: bool
    target_range: tuple[float, float] | None
    targets_text: str
    metric: str
    metric_text: str
    quality_sum: Callable[[np.ndarray, np.ndarray], float]
    metric_of: Callable[[float, float, int], float]
    metric_reference: Callable[[np.ndarray, np.ndarray], float]
    labels: Callable[[np.ndarray], np.ndarray] | None
    label_rule: str
    reference: Callable[[np.ndarray, np.ndarray], np.ndarray]
    formula: str
    synthetic_targets: Callable[[np.random.Generator, int, int, Any], np.ndarray]
    parameters: tuple[str, ...] = ()
    scaled_targets: bool = False
    bind: Callable[[Loss, dict[str, float]], Loss] | None = None

    def bound(self, **values: float) -> Loss:
        """This entry with its parameters fixed (model keys such as ``huber_delta``; the others are ignored): the
        kernel and the reference then need nothing more than every other loss's."""
        return self if self.bind is None else self.bind(self, values)

    @property
    def output_choosable(self) -> bool:
        """Whether the job may choose ``model.output`` (any hidden activation) for this loss."""
        return not self.from_logits

    @property
    def classifier(self) -> bool:
        """Whether the model predicts labels and probabilities (``predict_proba``), not values."""
        return self.labels is not None

    @property
    def best_metrics(self) -> tuple[str, ...]:
        """The ``run.best_metric`` values that make sense for this loss (metrics.jsonl's field paths)."""
        return ("validation.loss", f"validation.{self.metric}")

    def summary(self, sums: np.ndarray, k: int) -> dict[str, float]:
        """{"loss": the weighted mean loss Σ w·ℓ / Σ w, metric: accuracy or RMSE over the rows} from (weighted loss
        sum, quality sum, rows[, Σ w]) over the batches, k outputs (what metrics.jsonl logs; docs/metrics.md).
        Without Σ w (or unweighted, Σ w = rows) the loss is the plain mean per row."""
        n = max(sums[2], 1.0)
        weight = sums[3] if len(sums) > 3 else sums[2]
        return {"loss": float(sums[0] / (weight if weight > 0 else 1.0)),
                self.metric: float(self.metric_of(sums[1], n, k))}

    def check_targets(self, y: np.ndarray, n: int, k: int, dtype: np.dtype, name: str = "y") -> np.ndarray:
        """Validate targets for n rows and k outputs; return them as the kernels take them: int64 labels (n,), or
        (n, k) in ``dtype``. A (n,) array stands for (n, 1) when k = 1. Raises JobError naming ``name``."""
        if self.class_labels:
            return _class_labels(y, n, k, name, self.name)
        y2 = y.reshape(-1, 1) if (y.ndim == 1 and k == 1) else y
        if y2.shape != (n, k):
            raise JobError(f"`{name}` must have shape ({n}, {k}) for {self.name}; got {y.shape}")
        values = np.asarray(y2, dtype=dtype)
        if not np.all(np.isfinite(values)):
            row = int(np.flatnonzero(~np.isfinite(values).all(axis=1))[0])
            raise JobError(f"`{name}` row {row} holds a non-finite value (NaN or inf)")
        if self.target_range is not None:
            low, high = self.target_range
            if values.min() < low or values.max() > high:
                row, col = (int(i) for i in np.argwhere((values < low) | (values > high))[0])
                raise JobError(f"`{name}` must hold values in [{low:g}, {high:g}] for {self.name}; got "
                               f"{values[row, col]:g} in row {row}")
        return values

    def table_labels(self, y: np.ndarray) -> np.ndarray:
        """Targets read from a table arrive as float64: whole-number class labels become int64 (as
        :meth:`check_targets` takes them); anything else is left for :meth:`check_targets` to refuse with its row."""
        if self.class_labels and y.ndim == 1 and y.dtype.kind == "f":
            if np.isfinite(y).all() and np.array_equal(y, np.round(y)):
                return y.astype(np.int64)
        return y


def _class_labels(y: np.ndarray, n: int, k: int, name: str, loss: str) -> np.ndarray:
    if y.shape != (n,):
        raise JobError(f"`{name}` must be integer labels of shape ({n},) for {loss}; got shape {y.shape}")
    if y.dtype.kind == "f":
        wrong = ~np.isfinite(y) | (y != np.round(y))
        if np.any(wrong):
            row = int(np.flatnonzero(wrong)[0])
            raise JobError(f"`{name}` must hold whole-number class labels; got {float(y[row])!r} in row {row}")
        outside = (y < 0) | (y >= k)  # checked before the cast: 1e300 has no int64
        if np.any(outside):
            row = int(np.flatnonzero(outside)[0])
            raise JobError(f"`{name}` labels must lie in [0, {k - 1}] for {k} outputs; got {float(y[row]):g} in row "
                           f"{row}")
    elif y.dtype.kind not in "iu":
        raise JobError(f"`{name}` must hold integer class labels; got dtype {y.dtype}")
    labels = np.asarray(y, dtype=np.int64)
    if labels.size and (labels.min() < 0 or labels.max() >= k):
        row = int(np.flatnonzero((labels < 0) | (labels >= k))[0])
        raise JobError(f"`{name}` labels must lie in [0, {k - 1}] for {k} outputs; got {int(labels[row])} in row {row}")
    return labels


# The kernels, one call shape for every loss (see Loss.kernel and Loss.outputs).

def _softmax_cross_entropy(Z, O, targets, weights, scale, dZ, output_code):
    return kernels.softmax_cross_entropy(Z, targets, weights, scale, O, dZ)


def _binary_cross_entropy(Z, O, targets, weights, scale, dZ, output_code):
    return kernels.binary_cross_entropy(Z, targets, weights, scale, O, dZ)


def _squared_error(Z, O, targets, weights, scale, dZ, output_code):
    total = kernels.squared_error(O, targets, weights, scale, dZ)  # O: the forward applied the output activation
    activation_kernels.backward(Z, O, dZ, output_code)  # chain dO through it: dZ = f'(Z) ⊙ dO
    return total


def _huber(Z, O, targets, weights, scale, dZ, output_code, delta):
    total = kernels.huber(O, targets, weights, delta, scale, dZ)
    activation_kernels.backward(Z, O, dZ, output_code)  # chain dO through the output activation, as squared_error
    return total


def _absolute_error(Z, O, targets, weights, scale, dZ, output_code):
    total = kernels.absolute_error(O, targets, weights, scale, dZ)
    activation_kernels.backward(Z, O, dZ, output_code)
    return total


def _poisson(Z, O, targets, weights, scale, dZ, output_code):
    return kernels.poisson(Z, targets, weights, scale, O, dZ)


def _exp_outputs(Z, O, zero_bias):
    kernels.exp_rows(Z, O)


def _softmax_outputs(Z, O, zero_bias):
    kernels.softmax_rows(Z, O)


def _sigmoid_outputs(Z, O, zero_bias):
    activation_kernels.bias_forward(Z, zero_bias, O, activation_kernels.SIGMOID)


def _outputs_already_there(Z, O, zero_bias):
    return None


# The second metric: from the summed counts (training, evaluation) and in numpy (predict).

def _fraction_of_rows(total, rows, k):
    return total / rows


def _fraction_of_outputs(total, rows, k):
    return total / (rows * k)


def _root_mean_square(total, rows, k):
    return math.sqrt(total / (rows * k))


def _values(targets: np.ndarray, o: np.ndarray) -> np.ndarray:
    return targets.astype(np.float64).reshape(o.shape)


def _class_accuracy(o, targets):
    return float(np.mean(o.argmax(axis=1) == targets))


def _output_accuracy(o, targets):
    return float(np.mean((o > 0.5) == (_values(targets, o) > 0.5)))


def _rmse(o, targets):
    return float(np.sqrt(np.mean((o - _values(targets, o)) ** 2)))


# The numpy references of the losses, per row, from the outputs after the output activation.

def _cross_entropy_of_class(o, targets):
    p = np.clip(o[np.arange(targets.size), targets], 1e-300, None)
    return -np.log(p)


def _cross_entropy_of_outputs(o, targets):
    t = _values(targets, o)
    p = np.clip(o, 1e-300, 1.0 - 2.0**-53)
    return -(t * np.log(p) + (1.0 - t) * np.log1p(-p)).sum(axis=1)  # summed over the k outputs, as trained


def _half_squared_error(o, targets):
    return 0.5 * ((o - _values(targets, o)) ** 2).sum(axis=1)


def _huber_of_rows(o, targets, delta):
    r = np.abs(o - _values(targets, o))
    return np.where(r <= delta, 0.5 * r * r, delta * (r - 0.5 * delta)).sum(axis=1)


def _absolute_error_of_rows(o, targets):
    return np.abs(o - _values(targets, o)).sum(axis=1)


def _poisson_of_rows(o, targets):
    return (o - _values(targets, o) * np.log(np.clip(o, 1e-300, None))).sum(axis=1)


def _bind_huber(entry: Loss, values: dict[str, float]) -> Loss:
    delta = float(values.get("huber_delta", HUBER_DELTA))
    return dataclasses.replace(
        entry, bind=None,
        kernel=lambda Z, O, targets, weights, scale, dZ, output_code: _huber(Z, O, targets, weights, scale, dZ,
                                                                            output_code, delta),
        reference=lambda o, targets: _huber_of_rows(o, targets, delta))


HUBER_DELTA = 1.0
"""``model.huber_delta``'s default: residuals beyond one unit the loss sees (one standard deviation of a
standardised target) count linearly."""


def _normal(rng, rows, k, dtype):
    return rng.standard_normal((rows, k)).astype(dtype)


_REAL_TARGETS: dict[str, Any] = dict(
    class_labels=False, target_range=None, targets_text="real targets (n, k)",
    metric="rmse", metric_text="√(Σ (o − t)² / (n·k)) over every output",
    quality_sum=kernels.squared_error_sum, metric_of=_root_mean_square, metric_reference=_rmse,
    labels=None, label_rule="none: the outputs are the prediction",
    synthetic_targets=_normal, scaled_targets=True)
"""What the regression losses of real targets (squared_error, huber, absolute_error) share: their targets, the RMSE
metric, no labels, and ``data.standardize_targets``."""

_TABLE = (
    Loss("softmax_cross_entropy", kernels.SOFTMAX_CROSS_ENTROPY, "softmax", True,
         _softmax_cross_entropy, _softmax_outputs, class_labels=True, target_range=None,
         targets_text="integer class labels (n,) in [0, k)",
         metric="accuracy", metric_text="the share of rows whose label is the class",
         quality_sum=kernels.count_correct, metric_of=_fraction_of_rows,
         metric_reference=_class_accuracy,
         labels=lambda outputs: outputs.argmax(axis=1).astype(np.int64),
         label_rule="the index of the largest output, (n,) int64",
         reference=_cross_entropy_of_class,
         formula="per row: logsumexp(z) − z_y, z the logits, y the class index",
         synthetic_targets=lambda rng, rows, k, dtype: rng.integers(0, k, size=rows).astype(np.int64)),
    Loss("binary_cross_entropy", kernels.BINARY_CROSS_ENTROPY, "sigmoid", True,
         _binary_cross_entropy, _sigmoid_outputs, class_labels=False, target_range=(0.0, 1.0),
         targets_text="0/1 targets (n, k) (any value in [0, 1])",
         metric="accuracy", metric_text="the share of outputs whose label is the target's (t > 0.5)",
         quality_sum=kernels.count_correct_binary, metric_of=_fraction_of_outputs,
         metric_reference=_output_accuracy,
         labels=lambda outputs: (outputs > 0.5).astype(np.int64),
         label_rule="1 where an output exceeds 0.5, else 0, (n, k) int64",
         reference=_cross_entropy_of_outputs,
         formula="per output: max(z, 0) + log1p(exp(−|z|)) − t·z, z the logit, t the 0/1 target",
         synthetic_targets=lambda rng, rows, k, dtype: rng.integers(0, 2, size=(rows, k)).astype(dtype)),
    Loss("squared_error", kernels.SQUARED_ERROR, "identity", False, _squared_error, _outputs_already_there,
         reference=_half_squared_error,
         formula="per row: ½ Σ_j (o_j − t_j)², o the outputs after the output activation", **_REAL_TARGETS),
    Loss("huber", kernels.HUBER, "identity", False,
         lambda *args: _huber(*args, HUBER_DELTA), _outputs_already_there,
         reference=lambda o, targets: _huber_of_rows(o, targets, HUBER_DELTA),
         formula="per row: Σ_j h(o_j − t_j), h(r) = ½r² for |r| ≤ δ, δ·(|r| − ½δ) beyond, δ = `model.huber_delta` "
                 "(Huber 1964)",
         parameters=("huber_delta",), bind=_bind_huber, **_REAL_TARGETS),
    Loss("absolute_error", kernels.ABSOLUTE_ERROR, "identity", False, _absolute_error, _outputs_already_there,
         reference=_absolute_error_of_rows,
         formula="per row: Σ_j |o_j − t_j|; its gradient is sign(o − t), 0 where o = t", **_REAL_TARGETS),
    Loss("poisson", kernels.POISSON, "exp", True,
         _poisson, _exp_outputs, class_labels=False, target_range=(0.0, math.inf),
         targets_text="counts (n, k), any value ≥ 0",
         metric="rmse", metric_text="√(Σ (o − t)² / (n·k)) over every output, o the expected counts",
         quality_sum=kernels.squared_error_sum, metric_of=_root_mean_square,
         metric_reference=_rmse,
         labels=None,
         label_rule="none: the outputs (expected counts e^z) are the prediction",
         reference=_poisson_of_rows,
         formula="per row: Σ_j (e^{z_j} − t_j·z_j), z the logits (log link; the constant log(t!) left out; "
                 "McCullagh & Nelder 1989)",
         synthetic_targets=lambda rng, rows, k, dtype: rng.poisson(2.0, size=(rows, k)).astype(dtype)),
)
LOSSES: dict[str, Loss] = {entry.name: entry for entry in _TABLE}
"""The losses by name, in the order of the kernels' codes."""

CLASSIFIER_LOSSES = tuple(name for name, entry in LOSSES.items() if entry.classifier)
"""The losses whose models predict labels and probabilities."""

DOCS_BEGIN = "<!-- losses: generated by shardmill.model.losses.markdown(), do not edit by hand -->"
DOCS_END = "<!-- end of losses -->"


def markdown() -> str:
    """The loss table of docs/models.md (targets, formula, output activation, labels, second metric)."""
    rows = ["| Loss | Targets | Formula (the code's) | Output activation | `predict(X)` | Metric |",
            "|---|---|---|---|---|---|"]
    for name, entry in LOSSES.items():
        output = f"{entry.output} (or `model.output`)" if entry.output_choosable else entry.output
        cells = (name, entry.targets_text, entry.formula, output, entry.label_rule,
                 f"{entry.metric}: {entry.metric_text}")
        rows.append("| " + " | ".join(cell.replace("|", "\\|") for cell in cells) + " |")
    return "\n".join(rows) + "\n"


def write_docs(path: str | Path = "docs/models.md") -> None:
    """Replace the generated blocks of ``path`` (the activation and loss tables) by the tables' current text."""
    for begin, end, block in ((activations.DOCS_BEGIN, activations.DOCS_END, activations.markdown()),
                              (DOCS_BEGIN, DOCS_END, markdown())):
        replace_block(path, begin, end, block)
