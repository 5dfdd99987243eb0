"""``shardmill predict``: outputs of a trained model (a checkpoint directory or final.npz) on new inputs."""

from __future__ import annotations

import json
from pathlib import Path

import numpy as np
from shardmill.checkpoint import CheckpointError, load, resolve
from shardmill.config import JobError
from shardmill.data import read_array, squeeze_labels
from shardmill.model import MLP


def load_model(path: Path) -> tuple[MLP, np.ndarray, np.ndarray]:
    """(model, input_mean, input_inv_std) from ``final.npz``, a checkpoint directory or a workdir."""
    if path.is_file() and path.suffix == ".npz":
        with np.load(path, allow_pickle=False) as archive:
            if "model_json" not in archive.files:
                raise CheckpointError(f"{str(path)!r} is not a shardmill final.npz (no model_json)")
            spec = json.loads(str(archive["model_json"]))
            arrays = {k: archive[k] for k in archive.files}
    else:
        state, arrays, _ = load(resolve(path))
        spec = state["job"]["model"]
    model = MLP(spec["layers"], activation=spec["activation"], loss=spec["loss"], dtype=spec["dtype"],
                init=spec.get("init", "auto"), output=spec.get("output", "auto"))
    for name, view in model.named(model.params).items():
        if name not in arrays or arrays[name].shape != view.shape:
            raise CheckpointError(f"{str(path)!r}: tensor {name} is missing or has the wrong shape")
        view[...] = arrays[name]
    return model, arrays["input_mean"], arrays["input_inv_std"]


def metrics(model: MLP, outputs: np.ndarray, targets: np.ndarray) -> dict[str, float]:
    """Loss-appropriate metrics of outputs against targets: accuracy for classification, RMSE for regression."""
    if model.loss == "softmax_cross_entropy":
        p = np.clip(outputs[np.arange(targets.size), targets].astype(np.float64), 1e-300, None)
        return {"accuracy": float(np.mean(outputs.argmax(axis=1) == targets)), "loss": float(-np.log(p).mean())}
    if model.loss == "binary_cross_entropy":
        return {"accuracy": float(np.mean((outputs > 0.5) == (targets > 0.5)))}
    return {"rmse": float(np.sqrt(np.mean((outputs - targets) ** 2)))}


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
    """Save outputs (n, k) by the extension of ``path``: .npy (numpy's format) or .csv (one row per input, the
    shortest decimal text that reads back to the same value: 9 significant digits for float32, 17 for float64)."""
    suffix = check_output(path)
    try:
        if suffix == ".npy":
            with open(path, "wb") as f:  # a file object: np.save would append .npy to a name without it
                np.save(f, outputs, allow_pickle=False)
        else:
            digits = 9 if outputs.dtype == np.float32 else 17  # IEEE 754: enough to read back the same value
            np.savetxt(path, outputs, delimiter=",", fmt=f"%.{digits}g")
    except OSError as err:
        raise JobError(f"`--out` {str(path)!r} cannot be written: {err.strerror or err}") from None


def cmd_predict(args) -> int:
    check_output(Path(args.out))
    model, mean, inv_std = load_model(Path(args.checkpoint))
    X = np.asarray(read_array(Path(args.inputs), "inputs"), dtype=np.float64)
    model.check_inputs(X, "inputs")
    finite = np.isfinite(X).all(axis=1)
    if not finite.all():
        raise JobError(f"`inputs` row {int(np.argmin(finite))} holds a non-finite value (NaN or inf)")
    outputs = model.predict((X - mean) * inv_std)
    write_outputs(Path(args.out), outputs)
    print(f"wrote {outputs.shape[0]} × {outputs.shape[1]} outputs to {args.out}")
    if args.targets is not None:
        y = squeeze_labels(np.asarray(read_array(Path(args.targets), "targets", mmap=False)))
        targets = model.check_targets(y, X.shape[0], "targets")
        print(json.dumps(metrics(model, outputs, targets)))
    return 0
