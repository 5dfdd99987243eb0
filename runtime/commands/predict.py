"""A trained model as a predictor, and ``shardmill predict``: outputs or labels of a model (final.npz, best.npz, a
checkpoint directory or a workdir) on new inputs."""

from __future__ import annotations

import json
from pathlib import Path

import numpy as np
from shardmill.data.categories import read_columns
from shardmill.data.files import read_array, read_inputs, weights_are_a_file
from shardmill.data.rows import squeeze_labels
from shardmill.data.tables import describe, is_table
from shardmill.errors import JobError
from shardmill.model.losses import CLASSIFIER_LOSSES
from shardmill.model.predictor import Predictor, load_model, metrics

OUTPUT_SUFFIXES = (".npy", ".csv")


def check_output(path: Path) -> str:
    """Refuse an output path before any work: its extension (returned, lower case) and its folder."""
    suffix = path.suffix.lower()
    if suffix not in OUTPUT_SUFFIXES:
        raise JobError(f"`--out` must end in {' or '.join(OUTPUT_SUFFIXES)}; got {str(path)!r}")
    if not path.parent.is_dir():
        raise JobError(f"`--out` folder {str(path.parent)!r} does not exist")
    return suffix


def write_outputs(path: Path, outputs: np.ndarray) -> None:
    """Save outputs (n, k) or labels (n,) / (n, k) int64 by the extension of ``path``: .npy (numpy's format) or
    .csv (one row per input; floats in the shortest decimal text that reads back to the same value: 9 significant
    digits for float32, 17 for float64; integers as integers)."""
    suffix = check_output(path)
    try:
        if suffix == ".npy":
            with open(path, "wb") as f:  # a file object: np.save would append .npy to a name without it
                np.save(f, outputs, allow_pickle=False)
        else:
            if outputs.dtype.kind in "iu":
                fmt = "%d"
            else:
                fmt = f"%.{9 if outputs.dtype == np.float32 else 17}g"  # IEEE 754: enough to read back the value
            np.savetxt(path, outputs, delimiter=",", fmt=fmt)
    except OSError as err:
        raise JobError(f"`--out` {str(path)!r} cannot be written: {err.strerror or err}") from None


def read_inputs_for(predictor: Predictor, path: Path) -> np.ndarray:
    """The rows of ``path`` the model takes, (n, d) float64: a table's columns picked by the model's feature names
    (or, without names, every column but the training job's target columns); a plain array taken whole. A CSV's
    header row is read as the training job said (``data.header``)."""
    data = (predictor.job or {}).get("data", {})
    target = data.get("target") or []
    weights = data.get("weights") or ""
    weight_column = [] if not weights or weights_are_a_file(weights) else [weights]
    drop = ([target] if isinstance(target, str) else list(target)) + weight_column + [
        c.column for c in predictor.categories]
    return read_inputs(path, "inputs", features=predictor.feature_names, header=data.get("header", "auto"),
                       drop=drop)


def read_categories_for(predictor: Predictor, path: Path) -> dict[str, list[str]] | None:
    """The model's categorical columns of the table ``path`` by name, {column: values as text}; None without."""
    if not predictor.categories:
        return None
    if not is_table(path):
        raise JobError(f"the model takes the categorical column(s) {[c.column for c in predictor.categories]}; "
                       f"`inputs` {str(path)!r} must be a .csv or .parquet table that names them")
    header = (predictor.job or {}).get("data", {}).get("header", "auto")
    names = [c.column for c in predictor.categories]
    return dict(zip(names, read_columns(describe(path, "inputs", header), names, "inputs"), strict=True))


def cmd_predict(args) -> int:
    """``shardmill predict MODEL INPUTS --out FILE [--targets FILE] [--labels]``: writes the outputs (n, k), or with
    ``--labels`` the labels of :meth:`Predictor.predict`; with targets, prints the metrics as one JSON line.

    ``args.model``: what :func:`load_model` takes; ``args.inputs``: .npy, .npz, .csv or .parquet (a table's columns
    are picked by the model's feature names when it has them)."""
    check_output(Path(args.out))
    predictor = load_model(Path(args.model))
    labels = bool(getattr(args, "labels", False))
    if labels and not predictor.is_classifier:
        raise JobError(f"`--labels` needs a classifier (`model.loss` {' or '.join(CLASSIFIER_LOSSES)}); this "
                       f"model's loss is {predictor.loss!r}: leave `--labels` out to write its outputs")
    X = read_inputs_for(predictor, Path(args.inputs))
    categories = read_categories_for(predictor, Path(args.inputs))
    targets = None
    if args.targets is not None:  # checked before anything is written
        y = squeeze_labels(np.asarray(read_array(Path(args.targets), "targets", mmap=False)))
        targets = predictor.model.check_targets(y, X.shape[0], "targets")
    outputs = predictor.outputs(X, categories)
    written, what = (predictor.to_labels(outputs), "labels") if labels else (outputs, "outputs")
    write_outputs(Path(args.out), written)
    shape = f"{written.shape[0]}" if written.ndim == 1 else f"{written.shape[0]} × {written.shape[1]}"
    print(f"wrote {shape} {what} to {args.out}")
    if targets is not None:
        print(json.dumps(metrics(predictor, outputs, targets)))
    return 0
