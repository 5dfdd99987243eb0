"""The job file: schema, defaults and the one validation pass that runs before anything else.

A job is TOML with four tables, ``[model]``, ``[data]``, ``[optimizer]`` and ``[run]``. Every key is
checked here, on every rank alike, so a bad job fails identically everywhere before any collective.
Errors are :class:`JobError` with a message of the shape
"`optimizer.method` must be one of adam, adamw, momentum, nesterov, sgd; got 'adma' (did you mean 'adam'?)".
"""

from __future__ import annotations

import copy
import difflib
import hashlib
import json
import math
import tomllib
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

ACTIVATIONS = ("identity", "sigmoid", "tanh", "relu", "leaky_relu", "gelu", "softplus")
LOSSES = ("softmax_cross_entropy", "binary_cross_entropy", "squared_error")
DTYPES = ("float32", "float64")
INITS = ("he", "glorot")
METHODS = ("sgd", "momentum", "nesterov", "adam", "adamw")
SCHEDULES = ("constant", "step", "cosine")
REDUCTIONS = ("fast", "exact")


class JobError(ValueError):
    """A job (or command-line value) that cannot run; the message names the field, the value and what is allowed."""


def _hint(value: object, allowed: tuple[str, ...] | list[str]) -> str:
    close = difflib.get_close_matches(str(value), list(allowed), n=1, cutoff=0.6)
    return f" (did you mean '{close[0]}'?)" if close else ""


def _choice(path: str, value: object, allowed: tuple[str, ...]) -> str:
    if not isinstance(value, str) or value not in allowed:
        raise JobError(
            f"`{path}` must be one of {', '.join(sorted(allowed))}; got {value!r}{_hint(value, allowed)}"
        )
    return value


def _number(path: str, value: object, *, low: float | None = None, high: float | None = None,
            low_open: bool = False, integer: bool = False) -> Any:
    kind = "an integer" if integer else "a number"
    ok_type = isinstance(value, int) if integer else isinstance(value, (int, float))
    if isinstance(value, bool) or not ok_type or (not integer and not math.isfinite(value)):
        raise JobError(f"`{path}` must be {kind}; got {value!r}")
    if low is not None and (value <= low if low_open else value < low):
        raise JobError(f"`{path}` must be {'>' if low_open else '≥'} {low:g}; got {value!r}")
    if high is not None and value > high:
        raise JobError(f"`{path}` must be ≤ {high:g}; got {value!r}")
    return int(value) if integer else float(value)


def _flag(path: str, value: object) -> bool:
    if not isinstance(value, bool):
        raise JobError(f"`{path}` must be true or false; got {value!r}")
    return value


@dataclass
class ModelSpec:
    layers: list[int]
    activation: list[str]
    loss: str = "softmax_cross_entropy"
    dtype: str = "float32"
    init: str = "auto"
    output: str = "auto"


@dataclass
class DataSpec:
    inputs: str = ""
    targets: str = ""
    validation_fraction: float = 0.1
    standardize: bool = True


@dataclass
class OptimizerSpec:
    method: str = "adam"
    learning_rate: float = 1e-3
    weight_decay: float = 0.0
    momentum: float = 0.9
    beta1: float = 0.9
    beta2: float = 0.999
    eps: float = 1e-8
    schedule: str = "constant"
    warmup: int = 0
    step_every: int = 1000
    step_factor: float = 0.1
    clip_global_norm: float = 0.0


@dataclass
class RunSpec:
    epochs: int = 1
    global_batch: int = 256
    seed: int = 0
    reduction: str = "fast"
    exact_chunk: int = 32
    bucket_mb: float = 4.0
    overlap: bool = True
    save_every: int = 0
    keep_checkpoints: int = 3
    workdir: str = "run"
    threads: int = 1
    max_steps: int = 0
    check_every: int = 0
    health_every: int = 0


@dataclass
class Job:
    """A validated job. ``base`` is the folder relative paths in the job are resolved against."""

    model: ModelSpec
    data: DataSpec = field(default_factory=DataSpec)
    optimizer: OptimizerSpec = field(default_factory=OptimizerSpec)
    run: RunSpec = field(default_factory=RunSpec)
    base: str = "."

    def path(self, name: str) -> Path:
        """A path from the job resolved against the job file's folder."""
        p = Path(name)
        return p if p.is_absolute() else Path(self.base) / p

    @property
    def workdir(self) -> Path:
        return self.path(self.run.workdir)

    def as_dict(self) -> dict[str, Any]:
        return {
            "model": dict(vars(self.model)),
            "data": dict(vars(self.data)),
            "optimizer": dict(vars(self.optimizer)),
            "run": dict(vars(self.run)),
        }

    def digest(self) -> str:
        """SHA-256 of what fixes the training trajectory (model, data, optimizer, seed, batch, reduction).

        Left out: epochs, max_steps, save_every, keep_checkpoints, workdir, threads, check and health
        intervals, bucket size and overlap, so that a job may be resumed with more epochs or a different
        layout of the run.
        """
        d = self.as_dict()
        run = {k: d["run"][k] for k in ("global_batch", "seed", "reduction", "exact_chunk")}
        blob = json.dumps({"model": d["model"], "data": d["data"], "optimizer": d["optimizer"], "run": run},
                          sort_keys=True)
        return hashlib.sha256(blob.encode()).hexdigest()


_SECTIONS = {"model": ModelSpec, "data": DataSpec, "optimizer": OptimizerSpec, "run": RunSpec}


def _check_keys(section: str, table: object, allowed: list[str]) -> dict:
    if not isinstance(table, dict):
        raise JobError(f"`{section}` must be a table; got {table!r}")
    for key in table:
        if key not in allowed:
            raise JobError(f"`{section}.{key}` is not a known key; allowed: {', '.join(allowed)}"
                           f"{_hint(key, allowed)}")
    return table


def job_from_dict(raw: dict[str, Any], base: str | Path = ".") -> Job:
    """Validate a job given as nested dicts (as read from TOML) and fill in defaults."""
    raw = copy.deepcopy(raw)
    for section in raw:
        if section not in _SECTIONS:
            raise JobError(f"`{section}` is not a known table; allowed: {', '.join(_SECTIONS)}"
                           f"{_hint(section, list(_SECTIONS))}")
    if "model" not in raw:
        raise JobError("`model` table is missing; it needs at least `model.layers`")
    tables = {s: _check_keys(s, raw.get(s, {}), list(cls.__dataclass_fields__)) for s, cls in _SECTIONS.items()}

    m = tables["model"]
    layers = m.get("layers")
    if (not isinstance(layers, list) or len(layers) < 2
            or not all(isinstance(n, int) and not isinstance(n, bool) and n >= 1 for n in layers)):
        raise JobError(f"`model.layers` must be a list of at least two positive integers "
                       f"(inputs, hidden…, outputs); got {layers!r}")
    n_hidden = len(layers) - 2
    act = m.get("activation", "relu")
    acts = act if isinstance(act, list) else [act] * n_hidden
    if isinstance(act, list) and len(act) != n_hidden:
        raise JobError(f"`model.activation` must be one name or a list of {n_hidden} names (one per hidden "
                       f"layer); got a list of {len(act)}")
    acts = [_choice("model.activation", a, ACTIVATIONS) for a in acts]
    if not isinstance(act, list):
        _choice("model.activation", act, ACTIVATIONS)
    loss = _choice("model.loss", m.get("loss", "softmax_cross_entropy"), LOSSES)
    dtype = _choice("model.dtype", m.get("dtype", "float32"), DTYPES)
    init = _choice("model.init", m.get("init", "auto"), INITS + ("auto",))
    output = m.get("output", "auto")
    if loss == "squared_error":
        output = _choice("model.output", output, ACTIVATIONS + ("auto",))
    elif output not in ("auto", {"softmax_cross_entropy": "softmax", "binary_cross_entropy": "sigmoid"}[loss]):
        raise JobError(f"`model.output` is implied by `model.loss` = {loss!r}; leave it out; got {output!r}")
    model = ModelSpec(layers=list(layers), activation=acts, loss=loss, dtype=dtype, init=init, output=output)

    d = tables["data"]
    data = DataSpec(
        inputs=str(d.get("inputs", "")),
        targets=str(d.get("targets", "")),
        validation_fraction=_number("data.validation_fraction", d.get("validation_fraction", 0.1),
                                    low=0.0, high=0.9),
        standardize=_flag("data.standardize", d.get("standardize", True)),
    )
    for key in ("inputs", "targets"):
        if key in d and not isinstance(d[key], str):
            raise JobError(f"`data.{key}` must be a file path (.npy, .npz or .csv); got {d[key]!r}")

    o = tables["optimizer"]
    optimizer = OptimizerSpec(
        method=_choice("optimizer.method", o.get("method", "adam"), METHODS),
        learning_rate=_number("optimizer.learning_rate", o.get("learning_rate", 1e-3), low=0.0, low_open=True),
        weight_decay=_number("optimizer.weight_decay", o.get("weight_decay", 0.0), low=0.0),
        momentum=_number("optimizer.momentum", o.get("momentum", 0.9), low=0.0, high=0.999999),
        beta1=_number("optimizer.beta1", o.get("beta1", 0.9), low=0.0, high=0.999999),
        beta2=_number("optimizer.beta2", o.get("beta2", 0.999), low=0.0, high=0.999999999),
        eps=_number("optimizer.eps", o.get("eps", 1e-8), low=0.0, low_open=True),
        schedule=_choice("optimizer.schedule", o.get("schedule", "constant"), SCHEDULES),
        warmup=_number("optimizer.warmup", o.get("warmup", 0), low=0, integer=True),
        step_every=_number("optimizer.step_every", o.get("step_every", 1000), low=1, integer=True),
        step_factor=_number("optimizer.step_factor", o.get("step_factor", 0.1), low=0.0, high=1.0,
                            low_open=True),
        clip_global_norm=_number("optimizer.clip_global_norm", o.get("clip_global_norm", 0.0), low=0.0),
    )

    r = tables["run"]
    run = RunSpec(
        epochs=_number("run.epochs", r.get("epochs", 1), low=1, integer=True),
        global_batch=_number("run.global_batch", r.get("global_batch", 256), low=1, integer=True),
        seed=_number("run.seed", r.get("seed", 0), low=0, integer=True),
        reduction=_choice("run.reduction", r.get("reduction", "fast"), REDUCTIONS),
        exact_chunk=_number("run.exact_chunk", r.get("exact_chunk", 32), low=1, integer=True),
        bucket_mb=_number("run.bucket_mb", r.get("bucket_mb", 4.0), low=0.0, low_open=True),
        overlap=_flag("run.overlap", r.get("overlap", True)),
        save_every=_number("run.save_every", r.get("save_every", 0), low=0, integer=True),
        keep_checkpoints=_number("run.keep_checkpoints", r.get("keep_checkpoints", 3), low=1, integer=True),
        workdir=str(r.get("workdir", "run")),
        threads=_number("run.threads", r.get("threads", 1), low=1, integer=True),
        max_steps=_number("run.max_steps", r.get("max_steps", 0), low=0, integer=True),
        check_every=_number("run.check_every", r.get("check_every", 0), low=0, integer=True),
        health_every=_number("run.health_every", r.get("health_every", 0), low=0, integer=True),
    )
    if run.reduction == "exact" and run.global_batch % run.exact_chunk:
        raise JobError(f"`run.global_batch` must be a multiple of `run.exact_chunk` = {run.exact_chunk} when "
                       f"`run.reduction` = 'exact'; got {run.global_batch}")
    return Job(model=model, data=data, optimizer=optimizer, run=run, base=str(base))


def load_job(path: str | Path) -> Job:
    """Read and validate a TOML job file; relative paths in it are taken from the file's folder."""
    path = Path(path)
    if not path.is_file():
        raise JobError(f"job file {str(path)!r} does not exist")
    try:
        raw = tomllib.loads(path.read_text())
    except tomllib.TOMLDecodeError as err:
        raise JobError(f"job file {str(path)!r} is not valid TOML: {err}") from None
    return job_from_dict(raw, base=path.parent)
