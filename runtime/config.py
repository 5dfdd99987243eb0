"""The job file: one table of every key, and the one validation pass that runs before anything else.

A job is TOML with four tables, ``[model]``, ``[data]``, ``[optimizer]`` and ``[run]``. :data:`SCHEMA` lists
every key once: its type, default, what is allowed, what it means, and whether it fixes the training trajectory
(enters the job digest). The spec dataclasses, the validation, :meth:`Job.digest`, the command line's choices and
the defaults table in README.md are all read from it. Every key is checked here, on every rank alike, so a bad job
fails identically everywhere before any collective. Errors are :class:`JobError` with a message of the shape
"`optimizer.method` must be one of adam, adamw, momentum, nesterov, sgd; got 'adma' (did you mean 'adam'?)".
"""

from __future__ import annotations

import copy
import hashlib
import json
import tomllib
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

from shardmill.checks import KINDS, check, choice, hint
from shardmill.errors import JobError
from shardmill.model.activations import ACTIVATIONS as ACTIVATION_TABLE
from shardmill.model.losses import HUBER_DELTA
from shardmill.model.losses import LOSSES as LOSS_TABLE

ACTIVATIONS = tuple(ACTIVATION_TABLE)  # the names of the tables' entries (model/activations.py, model/losses.py)
LOSSES = tuple(LOSS_TABLE)
LOSS_PARAMETERS = {name for entry in LOSS_TABLE.values() for name in entry.parameters}
DTYPES = ("float32", "float64")
NORMS = ("none", "layer")
INITS = ("he", "glorot")
METHODS = ("sgd", "momentum", "nesterov", "adam", "adamw")
SCHEDULES = ("constant", "step", "cosine")
REDUCTIONS = ("fast", "exact")
BEST_METRICS = ("validation.loss", "validation.accuracy", "validation.rmse")  # metrics.jsonl's own field paths


class _Required:
    def __repr__(self) -> str:
        return "REQUIRED"


REQUIRED: Any = _Required()  # the default of a key the job must give


@dataclass(frozen=True)
class Key:
    """One key of the job file.

    ``kind`` names how the value is checked, typed and described: one entry of ``checks.KINDS`` (choice,
    names, output, integer, number, flag, layers, file, text, columns), which reads ``choices``, ``low``,
    ``high`` (``low_open`` excludes ``low``) and ``allowed`` from here.
    ``trajectory``: the key enters :meth:`Job.digest`, so a checkpoint resumes only with the same value.
    ``allowed``: the README's "allowed" cell where the kind alone does not say it.
    """

    path: str
    kind: str
    default: Any
    meaning: str
    choices: tuple[str, ...] = ()
    low: float | None = None
    high: float | None = None
    low_open: bool = False
    trajectory: bool = True
    allowed: str = ""
    digest_default: bool = True  # False for a key added later: at its default it stays out of the digest, so
    # checkpoints written before the key existed still resume

    def __post_init__(self) -> None:
        if self.kind not in KINDS:  # a key of an unknown kind would be checked nowhere
            raise AssertionError(f"{self.path}: kind {self.kind!r} is not one of {sorted(KINDS)}")

    @property
    def section(self) -> str:
        return self.path.split(".")[0]

    @property
    def name(self) -> str:
        return self.path.split(".")[1]


SCHEMA: tuple[Key, ...] = (
    Key("model.layers", "layers", REQUIRED, "widths, inputs first, outputs last"),
    Key("model.activation", "names", "relu", "hidden activation: one name, or a list with one per hidden layer",
        choices=ACTIVATIONS),
    Key("model.loss", "choice", "softmax_cross_entropy",
        "softmax_cross_entropy: integer labels (n,); binary_cross_entropy (from logits): 0/1 targets (n, k); "
        "squared_error, huber (see `model.huber_delta`), absolute_error: targets (n, k); poisson (log link): "
        "counts ≥ 0 (n, k); formulas in docs/models.md", choices=LOSSES),
    Key("model.dtype", "choice", "float32", "floating-point type of parameters and arithmetic, end to end",
        choices=DTYPES),
    Key("model.init", "choice", "auto", "initial weights: he N(0, 2/fan_in), glorot U(±√(6/(fan_in + fan_out))); "
        "auto is he when every hidden activation is relu, leaky_relu, gelu or softplus, else glorot",
        choices=INITS + ("auto",)),
    Key("model.output", "output", "auto", "output activation; softmax_cross_entropy implies softmax, "
        "binary_cross_entropy sigmoid, poisson exp; squared_error, huber and absolute_error identity unless chosen "
        "here", choices=ACTIVATIONS + ("auto",),
        allowed="auto; with " + ", ".join(name for name, entry in LOSS_TABLE.items() if entry.output_choosable)
        + " also " + ", ".join(sorted(ACTIVATIONS))),
    Key("model.huber_delta", "number", HUBER_DELTA, "δ of the huber loss, in the units the loss sees (standard "
        "deviations of the target when `data.standardize_targets` scales it, else the targets' own): residuals up "
        "to δ count quadratically, beyond it linearly (Huber 1964); only with `model.loss` = 'huber'", low=0.0,
        low_open=True, digest_default=False),
    Key("model.norm", "choice", "none", "normalisation of every hidden layer: none, or layer (Ba, Kiros & Hinton "
        "2016: each row's pre-activations scaled to mean 0 and variance 1, then a learned gain and shift, before the "
        "activation); batch statistics are not offered, as they would make a row's result depend on the shard",
        choices=NORMS, digest_default=False),
    Key("model.dropout", "rates", 0.0, "inverted dropout rate p of the hidden layers' outputs in training (one, or "
        "one per hidden layer; Srivastava et al. 2014); the decision is a pure function of (seed, step, row, layer, "
        "unit), so a run has the same bits for every process count; none in evaluation and prediction", low=0.0,
        high=1.0, digest_default=False),
    Key("model.residual", "flag", False, "identity skip connections (He et al. 2016) around each hidden layer "
        "whose input and output widths are equal (the first hidden layer, fed by the inputs, has none)",
        digest_default=False),
    Key("data.inputs", "file", "", "inputs (n, d): .npy (memory-mapped), .npz, .csv or .parquet, relative to the "
        "job file; needed to train", allowed="a .npy, .npz, .csv or .parquet path"),
    Key("data.targets", "file", "", "targets, one row per input row (see `model.loss`); needed to train unless "
        "`data.target` names columns of `data.inputs`", allowed="a .npy, .npz, .csv or .parquet path"),
    Key("data.target", "columns", "", "column name(s) of `data.inputs` that hold the targets, when one table "
        "(.csv with a header row, or .parquet) holds features and targets; then `data.targets` stays empty",
        allowed="a column name, or a list of them", digest_default=False),
    Key("data.features", "columns", [], "column names of `data.inputs` used as the model's inputs, in this order; "
        "empty: every column that is not a target", allowed="a list of column names", digest_default=False),
    Key("data.header", "choice", "auto", "does a .csv file start with a row of column names: auto (yes when a "
        "field of the first row is not a number), yes or no (columns are then named 0, 1, 2, …)",
        choices=("auto", "yes", "no"), digest_default=False),
    Key("data.validation_fraction", "number", 0.1, "share of the rows held out for validation",
        low=0.0, high=0.9),
    Key("data.validation", "file", "", "a table of its own holding the validation rows, with the columns of "
        "`data.inputs` (and `data.target`); every row of `data.inputs` then trains, and `data.validation_fraction` and "
        "`data.split` are not used; empty: validation rows come from `data.inputs`", allowed="a .csv or .parquet path",
        digest_default=False),
    Key("data.split", "choice", "random", "which rows `data.validation_fraction` holds out: random (seeded), last "
        "(the last rows in file order: a time series validates on its future) or groups (whole groups of "
        "`data.groups`, seeded)", choices=("random", "last", "groups"), digest_default=False),
    Key("data.standardize", "flag", True, "scale each input column by the mean and standard deviation of the "
        "training rows (identical on every rank)"),
    Key("data.standardize_targets", "flag", True, "train a regression model (squared_error, huber or "
        "absolute_error with an identity output) on targets scaled to mean 0 and standard deviation 1 per output "
        "over the training rows; metrics, predictions and the exported model stay in the targets' own units "
        "(docs/models.md)", digest_default=False),
    Key("data.weights", "file", "", "sample weights, one ≥ 0 per row: a column name of `data.inputs` (a table), "
        "or a .npy, .npz, .csv or .parquet file (told apart by the suffix); the loss is then Σ w·ℓ / Σ w over the "
        "global batch; empty: every row weighs 1", allowed="a column name, or a .npy, .npz, .csv or .parquet path",
        digest_default=False),
    Key("data.class_weights", "class_weights", "", "weight of each class (softmax_cross_entropy): balanced "
        "(n / (classes · n_c) over the training rows, as scikit-learn's compute_class_weight) or one number ≥ 0 per "
        "output; multiplies `data.weights`; empty: none", digest_default=False),
    Key("data.categorical", "columns", [], "column names of `data.inputs` holding categories (text or integer "
        "codes), each fed to the first layer through a learned embedding (docs/models.md); counted once in "
        "`model.layers[0]`; not a feature, target or weight column", allowed="a list of column names",
        digest_default=False),
    Key("data.embedding_widths", "widths", {}, "embedding width of categorical columns, overriding the rule "
        "min(16, ⌈(v + 1)/2⌉) for v values seen in training: a table {column = width} or one width per "
        "`data.categorical` column", allowed="a table of column = width, or a list of widths ≥ 1",
        digest_default=False),
    Key("data.folds", "integer", 0, "k of k-fold cross-validation: the rows are cut into k folds (contiguous blocks "
        "in row order, or whole groups of `data.groups`); fold `data.fold` validates, the others train, in "
        "place of `data.validation_fraction`; 0 = off", low=0, digest_default=False),
    Key("data.fold", "integer", 0, "the fold that validates when `data.folds` is on, counted from 0", low=0,
        digest_default=False),
    Key("data.groups", "file", "", "group labels kept whole in one fold or on one side of `data.split` = groups "
        "(so windows of one machine never sit on both sides): a column of `data.inputs` or a file of one number "
        "per row; empty: folds are contiguous blocks",
        allowed="a column name, or a .npy, .npz, .csv or .parquet path", digest_default=False),
    Key("optimizer.method", "choice", "adam", "update rule", choices=METHODS),
    Key("optimizer.learning_rate", "number", 1e-3, "peak learning rate", low=0.0, low_open=True),
    Key("optimizer.weight_decay", "number", 0.0, "coupled L2 for sgd, momentum, nesterov and adam; for adamw the "
        "decoupled λ of Loshchilov & Hutter (θ shrinks by λ·η_t per step, not by learning_rate·λ)", low=0.0),
    Key("optimizer.momentum", "number", 0.9, "momentum μ (momentum and nesterov)", low=0.0, high=0.999999),
    Key("optimizer.beta1", "number", 0.9, "Adam's β1 (adam and adamw)", low=0.0, high=0.999999),
    Key("optimizer.beta2", "number", 0.999, "Adam's β2 (adam and adamw)", low=0.0, high=0.999999999),
    Key("optimizer.eps", "number", 1e-8, "Adam's ε (adam and adamw)", low=0.0, low_open=True),
    Key("optimizer.schedule", "choice", "constant", "learning-rate schedule after warm-up: constant, step "
        "(× step_factor every step_every steps) or cosine (down to 0 at the last step of the run)", choices=SCHEDULES),
    Key("optimizer.warmup", "integer", 0, "steps of linear warm-up", low=0),
    Key("optimizer.step_every", "integer", 1000, "steps between decays of the step schedule", low=1),
    Key("optimizer.step_factor", "number", 0.1, "learning-rate factor per decay of the step schedule",
        low=0.0, high=1.0, low_open=True),
    Key("optimizer.clip_global_norm", "number", 0.0, "largest global gradient norm; 0 = no clipping", low=0.0),
    Key("run.epochs", "integer", 1, "passes over the training rows", low=1, trajectory=False),
    Key("run.global_batch", "integer", 256, "samples per step G, whatever the number of processes", low=1),
    Key("run.seed", "integer", 0, "seed of the initial weights, the split and the batch order", low=0),
    Key("run.reduction", "choice", "fast", "gradient sum: fast (MPI's order) or exact (bit-identical for every "
        "process count)", choices=REDUCTIONS),
    Key("run.exact_format", "choice", "wide", "exact mode's accumulator: wide (3 int64 per value, resolution "
        "2⁻⁸⁸, correctly rounded), compact (1 int64 per value on a per-block scale, 256 values a block, "
        "error within K·2^(h−51) of each block's largest value) or narrow (1 int32 per value, the bytes of fast "
        "mode, within K·2^(h−30))",
        choices=("wide", "compact", "narrow"),
        digest_default=False),
    Key("run.exact_chunk", "integer", 32, "exact mode: rows per fixed chunk; global_batch must be a multiple",
        low=1),
    Key("run.message_mib", "number", 4.0, "smallest gradient message of the overlapped allreduce (whole "
        "layers, last layer first), MiB (2²⁰ bytes)",
        low=0.0, low_open=True, trajectory=False),
    Key("run.update", "choice", "auto", "replicated: every rank updates every parameter; sharded: the "
        "gradient is reduce-scattered, each rank updates its own contiguous slice (optimizer state 1/P per rank) "
        "and the parameters are allgathered; auto: sharded on 2 or more processes when the optimizer keeps state "
        "(momentum, nesterov, adam, adamw), else replicated", choices=("auto", "replicated", "sharded"),
        trajectory=False),
    Key("run.comm_driver", "choice", "auto", "who drives the overlapped message reductions: library (MPI's "
        "non-blocking calls; best on one node, where the exchange is CPU work anyway), thread (a communication "
        "thread per rank; hides the exchange on a network), auto (thread when the ranks span more than one node)",
        choices=("auto", "thread", "library"), trajectory=False),
    Key("run.overlap", "flag", True, "start each message's allreduce while backward runs; false: one blocking "
        "allreduce after backward", trajectory=False),
    Key("run.save_every", "integer", 0, "steps between checkpoints; 0 = at the end of every epoch", low=0,
        trajectory=False),
    Key("run.save_minutes", "number", 0.0, "also a checkpoint once this many minutes have passed since the last "
        "one (rank 0's clock); 0 = off", low=0.0, trajectory=False),
    Key("run.keep_checkpoints", "integer", 3, "newest checkpoints kept; older ones are removed once the index has "
        "moved on",
        low=1, trajectory=False),
    Key("run.best_metric", "choice", "off", "validation metric that picks the best model: its checkpoint is kept "
        "beside the newest and written as best.npz; off: none", choices=("off",) + BEST_METRICS, trajectory=False),
    Key("run.patience", "integer", 0, "stop after this many epoch ends without an improvement of `run.best_metric`"
        " by more than `run.min_improvement`; 0 = never stop early", low=0, trajectory=False),
    Key("run.min_improvement", "number", 0.0, "smallest change of `run.best_metric` that counts as an "
        "improvement (in the metric's own units)", low=0.0, trajectory=False),
    Key("run.workdir", "text", "run", "folder for metrics.jsonl, checkpoints/ and final.npz, relative to the job "
        "file", trajectory=False, allowed="a folder path"),
    Key("run.threads", "integer", 1, "threads per process: BLAS's and the element-wise kernels' in fast mode, "
        "whole chunks each in exact mode (the same bits for every count)", low=1, high=1024, trajectory=False),
    Key("run.max_steps", "integer", 0, "stop after this many steps; 0 = run all epochs", low=0, trajectory=False),
    Key("run.check_every", "integer", 0, "steps between checks that every rank holds the same parameters; "
        "0 = off", low=0, trajectory=False),
    Key("run.health_every", "integer", 0, "steps between training-health diagnostics; 0 = off", low=0,
        trajectory=False),
)
KEYS: dict[str, Key] = {key.path: key for key in SCHEMA}
SECTIONS: tuple[str, ...] = ("model", "data", "optimizer", "run")


def choices(path: str) -> tuple[str, ...]:
    """The allowed names of a key with a fixed set of them, e.g. ``choices("model.dtype")``."""
    if not KEYS[path].choices:
        raise KeyError(f"{path} takes no names")
    return KEYS[path].choices


def default(path: str) -> Any:
    """The default of a job key, e.g. ``default("run.message_mib")`` (for command-line options that mirror one)."""
    return KEYS[path].default


def check_choice(path: str, value: object, name: str | None = None) -> str:
    """``value`` if it is one of ``choices(path)``, else a JobError naming ``name`` (default ``path``)."""
    return choice(name or path, value, choices(path))


@dataclass
class ModelSpec:
    """The validated ``[model]`` table; ``activation`` is one name per hidden layer, ``init`` and ``output`` may
    still be "auto" (MLP resolves them)."""

    layers: list[int]
    activation: list[str]
    loss: str = default("model.loss")
    dtype: str = default("model.dtype")
    init: str = default("model.init")
    output: str = default("model.output")
    huber_delta: float = default("model.huber_delta")
    norm: str = default("model.norm")
    dropout: float | list[float] = default("model.dropout")
    residual: bool = default("model.residual")


@dataclass
class DataSpec:
    """The validated ``[data]`` table."""

    inputs: str = default("data.inputs")
    targets: str = default("data.targets")
    target: str | list[str] = default("data.target")
    features: list[str] = field(default_factory=list)
    header: str = default("data.header")
    validation_fraction: float = default("data.validation_fraction")
    validation: str = default("data.validation")
    split: str = default("data.split")
    standardize: bool = default("data.standardize")
    standardize_targets: bool = default("data.standardize_targets")
    weights: str = default("data.weights")
    class_weights: str | list[float] = default("data.class_weights")
    categorical: list[str] = field(default_factory=list)
    embedding_widths: dict[str, int] | list[int] = field(default_factory=dict)
    folds: int = default("data.folds")
    fold: int = default("data.fold")
    groups: str = default("data.groups")


@dataclass
class OptimizerSpec:
    """The validated ``[optimizer]`` table."""

    method: str = default("optimizer.method")
    learning_rate: float = default("optimizer.learning_rate")
    weight_decay: float = default("optimizer.weight_decay")
    momentum: float = default("optimizer.momentum")
    beta1: float = default("optimizer.beta1")
    beta2: float = default("optimizer.beta2")
    eps: float = default("optimizer.eps")
    schedule: str = default("optimizer.schedule")
    warmup: int = default("optimizer.warmup")
    step_every: int = default("optimizer.step_every")
    step_factor: float = default("optimizer.step_factor")
    clip_global_norm: float = default("optimizer.clip_global_norm")


@dataclass
class RunSpec:
    """The validated ``[run]`` table."""

    epochs: int = default("run.epochs")
    global_batch: int = default("run.global_batch")
    seed: int = default("run.seed")
    reduction: str = default("run.reduction")
    exact_format: str = default("run.exact_format")
    exact_chunk: int = default("run.exact_chunk")
    message_mib: float = default("run.message_mib")
    update: str = default("run.update")
    comm_driver: str = default("run.comm_driver")
    overlap: bool = default("run.overlap")
    save_every: int = default("run.save_every")
    save_minutes: float = default("run.save_minutes")
    keep_checkpoints: int = default("run.keep_checkpoints")
    best_metric: str = default("run.best_metric")
    patience: int = default("run.patience")
    min_improvement: float = default("run.min_improvement")
    workdir: str = default("run.workdir")
    threads: int = default("run.threads")
    max_steps: int = default("run.max_steps")
    check_every: int = default("run.check_every")
    health_every: int = default("run.health_every")


SPECS: dict[str, type] = {"model": ModelSpec, "data": DataSpec, "optimizer": OptimizerSpec, "run": RunSpec}
"""The spec dataclass of each section; their fields are the schema's keys, in table order (tests/test_schema.py)."""


@dataclass
class Job:
    """A validated job. ``base`` is the folder relative paths in the job are resolved against."""

    model: ModelSpec
    data: DataSpec = field(default_factory=DataSpec)
    optimizer: OptimizerSpec = field(default_factory=OptimizerSpec)
    run: RunSpec = field(default_factory=RunSpec)
    base: str = "."
    overrides: tuple[str, ...] = ()  # the --set assignments applied on top of the job file, as given

    def path(self, name: str) -> Path:
        """A path from the job resolved against the job file's folder."""
        p = Path(name)
        return p if p.is_absolute() else Path(self.base) / p

    @property
    def workdir(self) -> Path:
        return self.path(self.run.workdir)

    def as_dict(self) -> dict[str, Any]:
        return {section: dict(vars(getattr(self, section))) for section in SECTIONS}

    def digest(self) -> str:
        """SHA-256 of what fixes the training trajectory: every key marked ``trajectory`` in :data:`SCHEMA`.

        Left out are the keys a job may change on resume (more epochs, another layout of the run): see
        :func:`resumable_keys`.
        """
        d = self.as_dict()
        kept = {s: {k: v for k, v in d[s].items() if KEYS[f"{s}.{k}"].trajectory
                    and (KEYS[f"{s}.{k}"].digest_default or v != KEYS[f"{s}.{k}"].default)} for s in SECTIONS}
        return hashlib.sha256(json.dumps(kept, sort_keys=True).encode()).hexdigest()

    def trajectory_differences(self, other: dict[str, Any]) -> list[str]:
        """Paths of the digest's keys whose value in ``other`` (a job as :meth:`as_dict` wrote it) differs.

        Keys that ``other`` lacks are not compared. The reason a checkpoint of another job is refused.
        """
        ours = self.as_dict()
        return [key.path for key in SCHEMA
                if key.trajectory and key.name in other.get(key.section, {})
                and other[key.section][key.name] != ours[key.section][key.name]]


def resumable_keys() -> tuple[str, ...]:
    """Paths of the keys left out of :meth:`Job.digest`: a checkpoint resumes with other values of these."""
    return tuple(key.path for key in SCHEMA if not key.trajectory)


def parse_override(text: str) -> tuple[str, Any]:
    """``section.key=value`` (a ``--set`` argument) as (path, value); the value is read as TOML (numbers, true/false,
    lists, quoted strings) and, when it is not TOML, taken as a bare string (``run.workdir=runs/b``)."""
    path, eq, value_text = text.partition("=")
    path = path.strip()
    if not eq or path.count(".") != 1 or not all(path.split(".")):
        raise JobError(f"`--set` takes section.key=value, e.g. optimizer.learning_rate=0.01; got {text!r}")
    section, name = path.split(".")
    if section not in SECTIONS:
        raise JobError(f"`--set {path}`: `{section}` is not a known table; allowed: {', '.join(SECTIONS)}"
                       f"{hint(section, list(SECTIONS))}")
    known = [key.name for key in SCHEMA if key.section == section]
    if name not in known:
        raise JobError(f"`--set {path}`: `{path}` is not a known key; allowed: "
                       f"{', '.join(known)}{hint(name, known)}")
    text_value = value_text.strip()
    if "\n" in text_value or "\r" in text_value:
        raise JobError(f"`--set {path}`: the value must be one line; got {text_value!r}")
    try:
        value = tomllib.loads(f"v = {text_value}")["v"]
    except tomllib.TOMLDecodeError:
        value = text_value
    if KINDS[KEYS[path].kind].text and not isinstance(value, (str, list)):
        value = text_value  # a text key takes the text as typed: data.target=16, run.workdir=2024, data.header=no
    return path, value


def apply_overrides(raw: dict[str, Any], sets: list[str] | tuple[str, ...]) -> dict[str, Any]:
    """A copy of the job ``raw`` (nested dicts, as read from TOML) with each ``--set`` assignment applied in order.
    """
    if isinstance(sets, str):
        raise JobError(f"overrides must be a list of section.key=value strings; got the single string {sets!r}")
    raw = copy.deepcopy(raw)
    for text in sets:
        path, value = parse_override(text)
        section, name = path.split(".")
        table = raw.setdefault(section, {})
        if not isinstance(table, dict):
            raise JobError(f"`{section}` must be a table; got {table!r}")
        table[name] = value
    return raw


def _check_keys(section: str, table: object) -> dict:
    if not isinstance(table, dict):
        raise JobError(f"`{section}` must be a table; got {table!r}")
    allowed = [key.name for key in SCHEMA if key.section == section]
    for name in table:
        if name not in allowed:
            raise JobError(f"`{section}.{name}` is not a known key; allowed: {', '.join(allowed)}"
                           f"{hint(name, allowed)}")
    return table


def _section(section: str, table: dict) -> dict[str, Any]:
    """The table-driven pass over one section: every key checked, absent ones take the table's default."""
    return {key.name: check(key, table.get(key.name, None if key.default is REQUIRED else key.default))
            for key in SCHEMA if key.section == section}


def model_spec(table: dict[str, Any]) -> ModelSpec:
    """Validate a ``[model]`` table (as read from TOML, or MLP's arguments) and fill in defaults."""
    m = _section("model", _check_keys("model", table))
    n_hidden = len(m["layers"]) - 2
    act = m["activation"]
    if isinstance(act, list) and len(act) != n_hidden:
        raise JobError(f"`model.activation` must be one name or a list of {n_hidden} names (one per hidden "
                       f"layer); got a list of {len(act)}")
    m["activation"] = act if isinstance(act, list) else [act] * n_hidden
    rates = m["dropout"]
    if isinstance(rates, list) and len(rates) != n_hidden:
        raise JobError(f"`model.dropout` must be one rate or a list of {n_hidden} rates (one per hidden layer); got "
                       f"a list of {len(rates)}")
    if n_hidden == 0 and (m["norm"] != "none" or rates not in (0, 0.0)):  # nothing to normalise or drop
        key = "model.norm" if m["norm"] != "none" else "model.dropout"
        raise JobError(f"`{key}` acts on hidden layers, and `model.layers` = {m['layers']} has none; leave it out or "
                       f"add a hidden layer")
    if m["residual"] and not residual_layers(m["layers"]):
        raise JobError(f"`model.residual` = true needs two consecutive hidden layers of equal width (a skip connects "
                       f"equal widths); got `model.layers` = {m['layers']}")
    loss, output = m["loss"], m["output"]
    if LOSS_TABLE[loss].output_choosable:  # else the loss implies its output activation
        choice("model.output", output, KEYS["model.output"].choices)
    elif output not in ("auto", LOSS_TABLE[loss].output):
        raise JobError(f"`model.output` is implied by `model.loss` = {loss!r}; leave it out; got {output!r}")
    for key in SCHEMA:  # a loss's parameter set for a loss that does not read it would be ignored without a word
        if key.section == "model" and key.name in LOSS_PARAMETERS and key.name not in LOSS_TABLE[loss].parameters \
                and m[key.name] != key.default:
            users = ", ".join(name for name, entry in LOSS_TABLE.items() if key.name in entry.parameters)
            raise JobError(f"`{key.path}` applies to `model.loss` = {users} only; got {key.path} = {m[key.name]!r} "
                           f"with `model.loss` = {loss!r}")
    return ModelSpec(**m)


def residual_layers(layers: list[int]) -> list[int]:
    """The hidden layers h ≥ 1 (of ``layers``' L − 1 hidden ones) that carry a skip: input width = output width."""
    return [h for h in range(1, len(layers) - 2) if layers[h] == layers[h + 1]]


def job_from_dict(raw: dict[str, Any], base: str | Path = ".", overrides: list[str] | tuple[str, ...] = ()) -> Job:
    """Validate a job given as nested dicts (as read from TOML) and fill in defaults.

    ``overrides``: ``section.key=value`` assignments (the command line's ``--set``) applied on top of ``raw``
    before validation; the job records them (:attr:`Job.overrides`).
    """
    raw = apply_overrides(raw, overrides)
    for section in raw:
        if section not in SECTIONS:
            raise JobError(f"`{section}` is not a known table; allowed: {', '.join(SECTIONS)}"
                           f"{hint(section, list(SECTIONS))}")
    if "model" not in raw:
        raise JobError("`model` table is missing; it needs at least `model.layers`")
    tables = {s: _check_keys(s, raw.get(s, {})) for s in SECTIONS}
    model = model_spec(tables["model"])
    data, optimizer, run = (SPECS[s](**_section(s, tables[s])) for s in ("data", "optimizer", "run"))
    if run.reduction == "exact" and run.global_batch % run.exact_chunk:
        raise JobError(f"`run.global_batch` must be a multiple of `run.exact_chunk` = {run.exact_chunk} when "
                       f"`run.reduction` = 'exact'; got {run.global_batch}")
    _check_data(data, model)
    _check_best(run, data, model)
    return Job(model=model, data=data, optimizer=optimizer, run=run, base=str(base), overrides=tuple(overrides))


def _check_data(data: DataSpec, model: ModelSpec) -> None:
    if data.target and data.targets:
        raise JobError(f"give `data.targets` (a file) or `data.target` (columns of `data.inputs`), not both; got "
                       f"data.targets = {data.targets!r} and data.target = {data.target!r}")
    targets = [data.target] if isinstance(data.target, str) and data.target else list(data.target or [])
    both = sorted(set(targets) & set(data.features))
    if both:
        raise JobError(f"`data.features` must not hold a target column; got {both[0]!r} in both")
    _check_categorical(data, targets)
    if data.folds == 1 or data.fold >= max(data.folds, 1):
        key = "data.folds" if data.folds == 1 else "data.fold"
        raise JobError(f"`{key}` needs `data.folds` = 0 (off) or ≥ 2, and 0 ≤ `data.fold` < `data.folds`; got "
                       f"data.folds = {data.folds}, data.fold = {data.fold}")
    if (data.split == "groups") != bool(data.groups) and not data.folds or data.folds and data.split != "random":
        raise JobError(f"`data.groups` goes with `data.split` = 'groups' or with `data.folds` ≥ 2 (whose split is "
                       f"its own); got data.split = {data.split!r}, data.groups = {data.groups!r}, data.folds = "
                       f"{data.folds}")
    if data.validation and (not data.target or data.folds or data.split != "random" or data.groups or (
            data.weights and data.weights.lower().endswith((".npy", ".npz", ".csv", ".parquet")))):
        raise JobError(f"`data.validation` = {data.validation!r} takes the validation rows from a table of their own: "
                       f"it needs `data.target` (columns of both tables), a `data.weights` column rather than a file, "
                       f"and no `data.folds`, `data.split` or `data.groups`")
    if data.groups and data.categorical:  # the vocabularies are fixed from the training rows before groups
        raise JobError("`data.groups` cannot be combined with `data.categorical` yet; use contiguous folds")
    if data.features and len(data.features) + len(data.categorical) != model.layers[0]:
        more = f" and `data.categorical` {len(data.categorical)}" if data.categorical else ""
        raise JobError(f"`data.features` names {len(data.features)} columns{more} but `model.layers` starts with "
                       f"{model.layers[0]} inputs")
    if data.weights and (data.weights in targets or data.weights in data.features):
        raise JobError(f"`data.weights` names the column {data.weights!r}, which is also a "
                       f"{'target' if data.weights in targets else 'feature'}; a weight column is neither")
    if data.class_weights != "":
        if not LOSS_TABLE[model.loss].class_labels:
            raise JobError(f"`data.class_weights` needs class labels (`model.loss` = softmax_cross_entropy); got "
                           f"`model.loss` = {model.loss!r}")
        if isinstance(data.class_weights, list) and len(data.class_weights) != model.layers[-1]:
            raise JobError(f"`data.class_weights` must hold one weight per class, {model.layers[-1]} (the outputs of "
                           f"`model.layers`); got {len(data.class_weights)}")


def _check_categorical(data: DataSpec, targets: list[str]) -> None:
    """A categorical column is no feature, target or weight column; widths name categorical columns only."""
    for name in data.categorical:
        role = ("target" if name in targets else "feature" if name in data.features
                else "weight" if name == data.weights else None)
        if role:
            raise JobError(f"`data.categorical` names the column {name!r}, which is also a {role} column; a "
                           f"categorical column is only categorical")
    widths = data.embedding_widths
    if isinstance(widths, list) and widths and len(widths) != len(data.categorical):
        raise JobError(f"`data.embedding_widths` must give one width per `data.categorical` column, "
                       f"{len(data.categorical)}; got {len(widths)}")
    if isinstance(widths, dict):
        for name in widths:
            if name not in data.categorical:
                raise JobError(f"`data.embedding_widths` names the column {name!r}, which is not in "
                               f"`data.categorical` ({', '.join(data.categorical) or 'empty'})")


def _check_best(run: RunSpec, data: DataSpec, model: ModelSpec) -> None:
    if run.best_metric == "off":
        if run.patience:
            raise JobError(f"`run.patience` = {run.patience} needs `run.best_metric` (the metric to watch); "
                           f"choose one of {', '.join(BEST_METRICS)}")
        return
    if data.validation_fraction == 0:
        raise JobError(f"`run.best_metric` = {run.best_metric!r} needs validation rows; "
                       f"`data.validation_fraction` is 0")
    offered = LOSS_TABLE[model.loss].best_metrics
    if run.best_metric not in offered:
        raise JobError(f"`run.best_metric` must be one of {', '.join(offered)} with `model.loss` = {model.loss!r}; "
                       f"got {run.best_metric!r}")


def load_job(path: str | Path, overrides: list[str] | tuple[str, ...] = ()) -> Job:
    """Read and validate a TOML job file; relative paths in it are taken from the file's folder.

    ``overrides``: ``section.key=value`` assignments applied on top of the file (see :func:`apply_overrides`).
    """
    path = Path(path)
    if not path.is_file():
        raise JobError(f"job file {str(path)!r} does not exist")
    try:
        raw = tomllib.loads(path.read_text(encoding="utf-8"))
    except tomllib.TOMLDecodeError as err:
        raise JobError(f"job file {str(path)!r} is not valid TOML: {err}") from None
    except UnicodeDecodeError as err:
        raise JobError(f"job file {str(path)!r} is not UTF-8 text (TOML files are): byte {err.start} "
                       f"is {err.object[err.start:err.start + 1]!r}") from None
    except RecursionError:
        raise JobError(f"job file {str(path)!r} nests tables or arrays too deeply to read") from None
    except OSError as err:
        raise JobError(f"job file {str(path)!r} cannot be read: {err.strerror or err}") from None
    return job_from_dict(raw, base=path.parent, overrides=overrides)
