"""A trained model as a predictor, and ``shardmill predict``: outputs or labels of a model (final.npz, best.npz, a
checkpoint directory or a workdir) on new inputs."""

from __future__ import annotations

import csv
import json
from pathlib import Path
from typing import Any

import numpy as np
from shardmill.data.categories import read_columns
from shardmill.data.files import read_array, read_inputs, weights_are_a_file
from shardmill.data.rows import squeeze_labels
from shardmill.data.tables import cut, describe, is_table, read_text
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


def output_names(predictor: Predictor, written: np.ndarray) -> list[str]:
    """The CSV header's names of ``written`` (the outputs (n, k), or the labels (n,) / (n, k)): the training job's
    target column names (``data.target``) when they name each column written, one name for a column of labels,
    else ``output_0`` … ``output_{k-1}`` (``label`` for one column of labels of an unnamed target)."""
    target = ((predictor.job or {}).get("data") or {}).get("target") or []
    target = [target] if isinstance(target, str) else [str(name) for name in target]
    width = 1 if written.ndim == 1 else written.shape[1]
    if len(target) == width:
        return target
    return ["label"] if written.ndim == 1 else [f"output_{j}" for j in range(width)]


def write_outputs(path: Path, outputs: np.ndarray, names: list[str] | None = None,
                  kept: dict[str, list[Any]] | None = None) -> None:
    """Save outputs (n, k) or labels (n,) / (n, k) int64 by the extension of ``path``: .npy (numpy's format) or
    .csv (one row per input; floats in the shortest decimal text that reads back to the same value: 9 significant
    digits for float32, 17 for float64; integers as integers).

    A .csv gets a header row when ``names`` (one per output column) are given; ``kept`` ({column: n values}, in
    order) are written first, as text, under their own names (RFC 4180 quoting where a value needs it)."""
    suffix = check_output(path)
    try:
        if suffix == ".npy":
            with open(path, "wb") as f:  # a file object: np.save would append .npy to a name without it
                np.save(f, outputs, allow_pickle=False)
            return
        if outputs.dtype.kind in "iu":
            fmt = "%d"
        else:
            fmt = f"%.{9 if outputs.dtype == np.float32 else 17}g"  # IEEE 754: enough to read back the value
        text = np.char.mod(fmt, outputs.reshape(outputs.shape[0], -1))
        kept = kept or {}
        with open(path, "w", newline="") as f:
            writer = csv.writer(f, lineterminator="\n")
            if names is not None:
                writer.writerow([*kept, *names])
            columns = [["" if v is None else str(v) for v in values] for values in kept.values()]
            for i, row in enumerate(text.tolist()):
                writer.writerow([*(column[i] for column in columns), *row])
    except OSError as err:
        raise JobError(f"`--out` {str(path)!r} cannot be written: {err.strerror or err}") from None


def kept_names(keep: list[str] | None) -> list[str]:
    """The columns of ``--keep`` (each given as COLUMN[,COLUMN…], the option repeatable), in the order given."""
    names = [name.strip() for given in keep or [] for name in given.split(",") if name.strip()]
    for i, name in enumerate(names):
        if name in names[:i]:
            raise JobError(f"`--keep` names column {cut(name)} twice")
    return names


def read_kept(predictor: Predictor, path: Path, names: list[str], out: Path) -> dict[str, list[Any]]:
    """The ``--keep`` columns of the table ``path``, {column: every row's value as the file holds it}; refused
    (JobError) for a plain array, a .npy output, or a column the table lacks."""
    if not names:
        return {}
    if out.suffix.lower() != ".csv":
        raise JobError(f"`--keep` passes columns into a .csv output; `--out` is {str(out)!r}")
    if not is_table(path):
        raise JobError(f"`--keep` picks columns by name, but `inputs` {str(path)!r} is an array without column "
                       f"names; give a .csv or .parquet table")
    header = ((predictor.job or {}).get("data") or {}).get("header", "auto")
    return dict(zip(names, read_text(describe(path, "inputs", header), names, "--keep"), strict=True))


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
    """``shardmill predict MODEL INPUTS --out FILE [--targets FILE] [--labels] [--keep COLUMN[,COLUMN…]]``: writes
    the outputs (n, k), or with ``--labels`` the labels of :meth:`Predictor.predict` (a .csv with a header row of
    :func:`output_names`, the ``--keep`` columns of the inputs first); with targets, prints the metrics as one JSON
    line.

    ``args.model``: what :func:`load_model` takes; ``args.inputs``: .npy, .npz, .csv or .parquet (a table's columns
    are picked by the model's feature names when it has them)."""
    check_output(Path(args.out))
    keep = kept_names(getattr(args, "keep", None))
    predictor = load_model(Path(args.model))
    labels = bool(getattr(args, "labels", False))
    if labels and not predictor.is_classifier:
        raise JobError(f"`--labels` needs a classifier (`model.loss` {' or '.join(CLASSIFIER_LOSSES)}); this "
                       f"model's loss is {predictor.loss!r}: leave `--labels` out to write its outputs")
    X = read_inputs_for(predictor, Path(args.inputs))
    categories = read_categories_for(predictor, Path(args.inputs))
    kept = read_kept(predictor, Path(args.inputs), keep, Path(args.out))
    targets = None
    if args.targets is not None:  # checked before anything is written
        y = squeeze_labels(np.asarray(read_array(Path(args.targets), "targets", mmap=False)))
        targets = predictor.model.check_targets(y, X.shape[0], "targets")
    outputs = predictor.outputs(X, categories)
    written, what = (predictor.to_labels(outputs), "labels") if labels else (outputs, "outputs")
    names = output_names(predictor, written)
    clash = next((name for name in names if name in kept), None)
    if clash is not None:
        raise JobError(f"`--keep` column {cut(clash)} has the name of an output column; keep another column")
    write_outputs(Path(args.out), written, names, kept)
    shape = f"{written.shape[0]}" if written.ndim == 1 else f"{written.shape[0]} × {written.shape[1]}"
    print(f"wrote {shape} {what} to {args.out}")
    if targets is not None:
        print(json.dumps(metrics(predictor, outputs, targets)))
    return 0
