"""A trained model with its input standardisation (and target scaling): ``Predictor`` and ``load_model``."""

from __future__ import annotations

import json
import zipfile
from pathlib import Path
from typing import Any

import numpy as np
from shardmill.checkpoint import CheckpointError, check_model_tag, load, resolve
from shardmill.config import default
from shardmill.errors import JobError
from shardmill.model.losses import CLASSIFIER_LOSSES
from shardmill.model.mlp import MLP
from shardmill.model.vocabulary import Category


class Predictor:
    """A trained MLP together with the input standardisation (and target scaling) it was trained with.

    Every method takes raw inputs X (n, d), as the training data held them (any real dtype), standardises them
    with ``(X − input_mean) · input_inv_std`` in float64 (as training did), casts to the model's dtype and runs
    the forward pass. A model trained on standardised targets (``data.standardize_targets``) answers in the
    targets' own units: ``o · target_std + target_mean`` in float64, cast to the model's dtype.

    Parameters
    ----------
    model: the network (its ``loss`` decides what :meth:`predict` returns).
    input_mean, input_inv_std: (d,) float64, the training rows' column means and inverse standard deviations.
    feature_names: the d input column names when the training inputs came from a table with a header, else None.
    job: the resolved training job (``Job.as_dict()``), digest: its SHA-256 digest, step: the global step the
        parameters were saved at (None where unknown).
    categories: the categorical columns (vocabulary and width each), in the model's order; the methods then take
        ``categories={column: values}`` beside X (text or integers; a value unseen in training takes the unknown
        slot).
    target_mean, target_std: (k,) float64, the training rows' target means and standard deviations when the model
        was trained on standardised targets, else None.
    """

    def __init__(self, model: MLP, input_mean: np.ndarray, input_inv_std: np.ndarray,
                 feature_names: list[str] | None = None, job: dict[str, Any] | None = None,
                 digest: str | None = None, step: int | None = None,
                 categories: list[Category] | None = None, target_mean: np.ndarray | None = None,
                 target_std: np.ndarray | None = None) -> None:
        d = model.n_numeric
        self.model = model
        self.input_mean = np.asarray(input_mean, dtype=np.float64)
        self.input_inv_std = np.asarray(input_inv_std, dtype=np.float64)
        if self.input_mean.shape != (d,) or self.input_inv_std.shape != (d,):
            raise JobError(f"input statistics must have shape ({d},) for a model with {d} inputs; got mean "
                           f"{self.input_mean.shape} and inv_std {self.input_inv_std.shape}")
        if feature_names is not None and len(feature_names) != d:
            raise JobError(f"`feature_names` must name the model's {d} inputs; got {len(feature_names)} names")
        self.feature_names = list(feature_names) if feature_names is not None else None
        self.job = job
        self.digest = digest
        self.step = step
        self.categories = list(categories or [])
        self.target_mean = None if target_mean is None else np.asarray(target_mean, dtype=np.float64)
        self.target_std = None if target_std is None else np.asarray(target_std, dtype=np.float64)
        k = model.sizes[-1]
        if (self.target_mean is None) != (self.target_std is None) or (
                self.target_mean is not None and (self.target_mean.shape != (k,) or self.target_std.shape != (k,))):
            raise JobError(f"target_mean and target_std must both be given, shape ({k},) for a model with {k} "
                           f"outputs, or both be None")
        if [c.column for c in self.categories] != [column for column, _, _ in model.embeddings]:
            raise JobError(f"`categories` must describe the model's categorical columns "
                           f"{[column for column, _, _ in model.embeddings]}")

    @property
    def n_inputs(self) -> int:
        """Input width d (numeric columns of X)."""
        return self.model.n_numeric

    @property
    def n_outputs(self) -> int:
        """Output width k."""
        return self.model.sizes[-1]

    @property
    def loss(self) -> str:
        """The training loss's name (``model/losses.py``: softmax_cross_entropy, squared_error, huber…)."""
        return self.model.loss

    @property
    def is_classifier(self) -> bool:
        """True for the cross-entropy losses (labels and probabilities), False for the regression losses."""
        return self.model.loss_entry.classifier

    def standardise(self, X: np.ndarray, name: str = "inputs") -> np.ndarray:
        """(X − input_mean) · input_inv_std, (n, d) in the model's dtype, after checking X.

        Refuses (JobError naming ``name``) anything but a 2-D array of real numbers of width d with finite values.
        """
        X = np.asarray(X)
        if X.dtype.kind not in "biuf":
            raise JobError(f"`{name}` must hold real numbers; got dtype {X.dtype}")
        self.model.check_inputs(X, name)
        X = np.asarray(X, dtype=np.float64)
        finite = np.isfinite(X).all(axis=1)
        if not finite.all():
            raise JobError(f"`{name}` row {int(np.argmin(finite))} holds a non-finite value (NaN or inf)")
        return ((X - self.input_mean) * self.input_inv_std).astype(self.model.dtype, copy=False)

    def codes(self, categories: dict[str, Any] | None, n: int) -> np.ndarray | None:
        """(n, c) int64 codes of ``categories`` ({column: n values}) by the training vocabularies; None without."""
        if not self.categories:
            if categories:
                raise JobError(f"this model has no categorical columns; got {sorted(categories)}")
            return None
        given = dict(categories or {})
        missing = [c.column for c in self.categories if c.column not in given]
        if missing:
            raise JobError(f"the model takes the categorical column(s) {missing}; give categories={{column: values}}")
        codes = np.empty((n, len(self.categories)), dtype=np.int64)
        for j, c in enumerate(self.categories):
            values = given[c.column]
            values = values.tolist() if isinstance(values, np.ndarray) else list(values)
            if len(values) != n:
                raise JobError(f"categorical column {c.column!r} holds {len(values)} values for {n} rows")
            codes[:, j] = c.encode(values)
        return codes

    def outputs(self, X: np.ndarray, categories: dict[str, Any] | None = None) -> np.ndarray:
        """The output layer after its output activation, (n, k) in the model's dtype: softmax probabilities
        (softmax_cross_entropy), sigmoid probabilities (binary_cross_entropy) or the regression outputs (after
        ``model.output``; in the targets' own units when they were standardised). What ``shardmill predict``
        writes. ``categories``: {column: values} of a model with categorical columns."""
        inputs = self.standardise(X)
        return self.unscale(self.model.predict(inputs, codes=self.codes(categories, inputs.shape[0])))

    def unscale(self, outputs: np.ndarray) -> np.ndarray:
        """Outputs (n, k) of the network in the targets' own units: ``o · target_std + target_mean`` in float64,
        cast back to the model's dtype (as the exported graph's last nodes); unchanged without target scaling."""
        if self.target_std is None:
            return outputs
        return (outputs.astype(np.float64) * self.target_std + self.target_mean).astype(outputs.dtype)

    def predict_proba(self, X: np.ndarray, categories: dict[str, Any] | None = None) -> np.ndarray:
        """Class probabilities of a classifier: (n, k) softmax rows summing to 1, or (n, k) independent
        probabilities of the positive class of each output (binary_cross_entropy). A regression model refuses."""
        if not self.is_classifier:
            raise JobError(f"predict_proba needs a classifier (`model.loss` {' or '.join(CLASSIFIER_LOSSES)}); "
                           f"this model's loss is {self.loss!r}: use predict() or outputs()")
        return self.outputs(X, categories)

    def predict(self, X: np.ndarray, categories: dict[str, Any] | None = None) -> np.ndarray:
        """Labels of a classifier, the outputs of a regression model.

        softmax_cross_entropy: the class index of the largest probability, (n,) int64;
        binary_cross_entropy: 1 where the probability exceeds 0.5, else 0, (n, k) int64;
        the regression losses: the outputs, (n, k) in the model's dtype (the targets' own units).
        """
        return self.to_labels(self.outputs(X, categories))

    def to_labels(self, outputs: np.ndarray) -> np.ndarray:
        """What :meth:`predict` returns, from outputs (n, k) that :meth:`outputs` gave."""
        labels = self.model.loss_entry.labels
        return outputs if labels is None else labels(outputs)


def _model_of(spec: dict[str, Any], categories: list[Category]) -> MLP:
    return MLP(spec["layers"], activation=spec["activation"], loss=spec["loss"], dtype=spec["dtype"],
               init=spec.get("init", "auto"), output=spec.get("output", "auto"),
               huber_delta=spec.get("huber_delta", default("model.huber_delta")),
               norm=spec.get("norm", default("model.norm")), dropout=spec.get("dropout", default("model.dropout")),
               residual=spec.get("residual", default("model.residual")),
               embeddings=[(c.column, c.rows, c.width) for c in categories])


def load_model(path: Path | str) -> Predictor:
    """The Predictor saved at ``path``: a final.npz or best.npz, a checkpoint directory, a ``checkpoints`` folder
    or a workdir (its newest checkpoint). Checkpoint files are checked against their SHA-256 checksums."""
    path = Path(path)
    if not path.exists():
        raise CheckpointError(f"no model at {str(path)!r}: give a final.npz, best.npz, a checkpoint directory or a "
                              f"workdir")
    if path.is_file() and path.suffix != ".npz":
        raise CheckpointError(f"{str(path)!r} is not a model: give a final.npz, best.npz, a checkpoint directory or a "
                              f"workdir")
    if path.is_file():
        try:
            with np.load(path, allow_pickle=False) as archive:
                if "model_json" not in archive.files:
                    raise CheckpointError(f"{str(path)!r} is not a shardmill final.npz (no model_json)")
                arrays = {k: archive[k] for k in archive.files}
            spec, job, feature_names, categories = (json.loads(str(arrays[k])) if k in arrays else None
                                                    for k in ("model_json", "job_json", "feature_names_json",
                                                              "categories_json"))
        except (ValueError, OSError, EOFError, zipfile.BadZipFile) as err:  # json's errors are ValueErrors
            raise CheckpointError(f"{str(path)!r} cannot be read: {err or type(err).__name__}") from None
        check_model_tag(path, arrays)  # with a checkpoint key configured
        digest = str(arrays["job_digest"]) if "job_digest" in arrays else None
        step = int(arrays["step"]) if "step" in arrays else None
    else:
        state, arrays, _ = load(resolve(path))
        job, digest, feature_names = state["job"], state.get("job_digest"), state.get("feature_names")
        categories = state.get("categories")
        spec, step = job["model"], int(state["step"])
    categories = [Category.from_record(r) for r in categories or []]
    model = _model_of(spec, categories)
    for name, view in model.named(model.params).items():
        if name not in arrays or arrays[name].shape != view.shape:
            raise CheckpointError(f"{str(path)!r}: tensor {name} is missing or has the wrong shape")
        view[...] = arrays[name]
    for name in ("input_mean", "input_inv_std"):
        if name not in arrays or arrays[name].shape != (model.n_numeric,):
            raise CheckpointError(f"{str(path)!r}: {name} is missing or has the wrong shape")
    scaling = [arrays.get(name) for name in ("target_mean", "target_std")]
    for array in scaling:
        if array is not None and array.shape != (model.sizes[-1],):
            raise CheckpointError(f"{str(path)!r}: the target scaling has shape {array.shape}; the model has "
                                  f"{model.sizes[-1]} outputs")
    return Predictor(model, arrays["input_mean"], arrays["input_inv_std"], feature_names=feature_names, job=job,
                     digest=digest, step=step, categories=categories, target_mean=scaling[0], target_std=scaling[1])


def metrics(predictor: Predictor, outputs: np.ndarray, targets: np.ndarray) -> dict[str, float]:
    """The loss (mean per row, as training logs it; see docs/metrics.md) and accuracy for a classifier, or RMSE for
    a regression model, of outputs (n, k) against targets, from the numpy references of the loss's entry
    (:mod:`shardmill.model.losses`). Losses are computed from the outputs in float64, so an output probability
    rounded to 0 or 1 is clipped to the smallest positive double. With standardised targets the outputs and targets
    are in their own units; RMSE stays in them, and the loss is taken of both scaled as training scaled them."""
    entry = predictor.model.loss_entry
    o = outputs.astype(np.float64)
    metric = entry.metric_reference(o, targets)
    if predictor.target_std is not None:
        t = np.asarray(targets, dtype=np.float64).reshape(o.shape)
        o, targets = ((a - predictor.target_mean) / predictor.target_std for a in (o, t))
    return {entry.metric: metric, "loss": float(entry.reference(o, targets).mean())}
