"""Bad input gives one clear message naming the field, the value given and what is allowed.

Each case is checked twice: through the API (``job_from_dict`` / ``load_job`` / ``shardmill.train`` raise
``JobError``) and through the command line (``shardmill train job.toml`` exits 2, prints the message on stderr and
no traceback). The message shape follows STYLE.md ("`optimizer.method` must be one of adam, …; got 'adma' (did you
mean 'adam'?)"), modelled on scikit-learn's parameter checks; the suggestion is the closest name by
``difflib.get_close_matches`` (Python standard library), so a far-off name gets none. common practice
"""

from __future__ import annotations

import copy
from collections.abc import Callable
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np
import pytest
import shardmill as sm
from helpers import make_classification, run_cli, write_job
from shardmill.config import job_from_dict
from shardmill.data.rows import split_rows
from shardmill.errors import JobError

ROWS, FEATURES, CLASSES = 240, 6, 3
SEED = 1
BASE = {
    "model": {"layers": [FEATURES, 8, CLASSES], "activation": "tanh", "loss": "softmax_cross_entropy",
              "dtype": "float64"},
    "data": {"inputs": "x.npy", "targets": "y.npy", "validation_fraction": 0.2},
    "optimizer": {"method": "sgd", "learning_rate": 0.05},
    "run": {"epochs": 1, "global_batch": 16, "seed": SEED, "workdir": "run"},
}
TRAIN_ROWS = ROWS - int(0.2 * ROWS)
_split = split_rows(ROWS, 0.2, SEED)
TRAIN_ROW, VALIDATION_ROW = int(_split.train[37]), int(_split.validation[5])


@dataclass
class Case:
    """A bad job: edits to BASE (``None`` deletes a key), optional data damage, and the words the message needs."""

    name: str
    edits: dict[str, object]
    expect: list[str]
    stage: str = "config"  # "config": job_from_dict refuses it; "data": shardmill.train refuses it
    damage: Callable[[Path], None] | None = None
    extra_toml: str = ""
    absent: list[str] = field(default_factory=list)
    cli: bool = False  # also run through the command line (each run is a fresh interpreter: keep a few per kind)


def _with_x(make: Callable[[np.ndarray], np.ndarray]) -> Callable[[Path], None]:
    def damage(folder: Path) -> None:
        np.save(folder / "x.npy", make(np.load(folder / "x.npy")))
    return damage


def _with_y(make: Callable[[np.ndarray], np.ndarray]) -> Callable[[Path], None]:
    def damage(folder: Path) -> None:
        np.save(folder / "y.npy", make(np.load(folder / "y.npy")))
    return damage


def _set(a: np.ndarray, index, value) -> np.ndarray:
    a = a.copy() if float(value).is_integer() else a.astype(np.float64)
    a[index] = value
    return a


CASES = [
    # unknown names, with a did-you-mean where one is close
    Case("activation_typo", {"model.activation": "rleu"},
         ["`model.activation`", "'rleu'", "gelu, identity, leaky_relu, relu, sigmoid, softplus, tanh",
          "did you mean 'relu'"], cli=True),
    Case("activation_list_length", {"model.activation": ["relu", "tanh"]},
         ["`model.activation`", "1", "a list of 2"]),
    Case("loss_typo", {"model.loss": "softmax_crossentropy"},
         ["`model.loss`", "'softmax_crossentropy'",
          "absolute_error, binary_cross_entropy, huber, poisson, softmax_cross_entropy, squared_error",
          "did you mean 'softmax_cross_entropy'"]),
    Case("method_typo", {"optimizer.method": "adma"},
         ["`optimizer.method`", "'adma'", "adam, adamw, momentum, nesterov, sgd", "did you mean 'adam'"], cli=True),
    Case("schedule_typo", {"optimizer.schedule": "cosin"},
         ["`optimizer.schedule`", "'cosin'", "constant, cosine, step", "did you mean 'cosine'"]),
    Case("dtype_typo", {"model.dtype": "float23"},
         ["`model.dtype`", "'float23'", "float32, float64", "did you mean 'float32'"]),
    Case("init_typo", {"model.init": "glorrot"},
         ["`model.init`", "'glorrot'", "auto, glorot, he", "did you mean 'glorot'"]),
    Case("init_far_off", {"model.init": "xavier"}, ["`model.init`", "'xavier'", "auto, glorot, he"],
         absent=["did you mean"], cli=True),
    Case("reduction_typo", {"run.reduction": "exakt"},
         ["`run.reduction`", "'exakt'", "exact, fast", "did you mean 'exact'"]),
    # numbers out of range
    Case("learning_rate_zero", {"optimizer.learning_rate": 0.0}, ["`optimizer.learning_rate`", "> 0", "got 0"],
         cli=True),
    Case("learning_rate_negative", {"optimizer.learning_rate": -0.1},
         ["`optimizer.learning_rate`", "> 0", "got -0.1"]),
    Case("batch_zero", {"run.global_batch": 0}, ["`run.global_batch`", "≥ 1", "got 0"], cli=True),
    Case("batch_negative", {"run.global_batch": -3}, ["`run.global_batch`", "≥ 1", "got -3"]),
    Case("epochs_not_integer", {"run.epochs": 2.5}, ["`run.epochs`", "an integer", "got 2.5"]),
    Case("layers_too_short", {"model.layers": [FEATURES]}, ["`model.layers`", "at least two positive", "[6]"]),
    Case("layers_zero_width", {"model.layers": [FEATURES, 0, CLASSES]},
         ["`model.layers`", "positive integers", "[6, 0, 3]"]),
    # unknown keys and tables
    Case("key_typo_epoch", {"run.epoch": 3, "run.epochs": None},
         ["`run.epoch`", "not a known key", "epochs, global_batch", "did you mean 'epochs'"], cli=True),
    Case("key_typo_learning_rate", {"optimizer.learning_rat": 0.1},
         ["`optimizer.learning_rat`", "not a known key", "learning_rate", "did you mean 'learning_rate'"]),
    Case("unknown_table", {}, ["`optimiser`", "not a known table", "model, data, optimizer, run",
                               "did you mean 'optimizer'"], extra_toml='[optimiser]\nmethod = "adam"\n', cli=True),
    # data: shapes, values, files, batch size
    Case("inputs_wrong_width", {}, [f"`model.layers[0]` = {FEATURES} does not match", "`data.inputs`",
                                    f"gives {FEATURES - 1} numeric input column(s)"], stage="data",
         damage=_with_x(lambda x: x[:, :-1]), cli=True),
    Case("inputs_one_dimensional", {}, ["`data.inputs`", f"(n, {FEATURES})", f"({ROWS * FEATURES},)"],
         stage="data", damage=_with_x(lambda x: x.ravel())),
    Case("targets_row_count", {}, ["`data.targets`", f"{ROWS - 1} rows", f"`data.inputs` has {ROWS}"],
         stage="data", damage=_with_y(lambda y: y[:-1])),
    Case("nan_in_training_row", {}, ["`data.inputs`", f"row {TRAIN_ROW}", "non-finite"], stage="data",
         damage=_with_x(lambda x: _set(x, (TRAIN_ROW, 2), np.nan)), cli=True),
    Case("inf_in_validation_row", {}, ["`data.inputs`", f"row {VALIDATION_ROW}", "non-finite"], stage="data",
         damage=_with_x(lambda x: _set(x, (VALIDATION_ROW, 0), np.inf))),
    Case("label_too_large", {}, ["`data.targets`", f"[0, {CLASSES - 1}]", f"{CLASSES} outputs", "got 7"],
         stage="data", damage=_with_y(lambda y: _set(y, 11, 7)), cli=True),
    Case("label_negative", {}, ["`data.targets`", f"[0, {CLASSES - 1}]", "got -1"], stage="data",
         damage=_with_y(lambda y: _set(y, 3, -1))),
    Case("label_not_whole", {}, ["`data.targets`", "whole-number", "got 0.5 in row 3"], stage="data",
         damage=_with_y(lambda y: _set(y, 3, 0.5))),
    Case("missing_inputs_file", {"data.inputs": "nowhere.npy"}, ["`data.inputs`", "nowhere.npy", "does not exist"],
         stage="data", cli=True),
    Case("missing_targets_file", {"data.targets": "labels.npy"}, ["`data.targets`", "labels.npy", "does not exist"],
         stage="data"),
    Case("batch_larger_than_training_rows", {"run.global_batch": TRAIN_ROWS + 1},
         ["`run.global_batch`", f"≤ the {TRAIN_ROWS} training rows", f"got {TRAIN_ROWS + 1}"], stage="data", cli=True),
    Case("bce_target_outside_unit_interval", {"model.loss": "binary_cross_entropy", "model.layers": [FEATURES, 8, 1]},
         ["`data.targets`", "[0, 1]", "binary_cross_entropy", "got 2 in row"], stage="data",
         damage=_with_y(lambda y: (y > 0).astype(np.float64) * 2.0)),
    Case("nan_in_regression_target", {"model.loss": "squared_error", "model.layers": [FEATURES, 8, 1]},
         ["`data.targets`", "row 4", "non-finite"], stage="data",
         damage=_with_y(lambda y: _set(y.astype(np.float64), 4, np.nan)), cli=True),
]
IDS = [c.name for c in CASES]
CLI_CASES = [c for c in CASES if c.cli]


def raw_job(case: Case) -> dict:
    raw = copy.deepcopy(BASE)
    for path, value in case.edits.items():
        table, key = path.split(".")
        if value is None:
            raw[table].pop(key)
        else:
            raw[table][key] = value
    return raw


def prepare(case: Case, folder: Path) -> Path:
    make_classification(folder, rows=ROWS, features=FEATURES, classes=CLASSES, seed=3)
    if case.damage is not None:
        case.damage(folder)
    raw = raw_job(case)
    job = write_job(folder, model=raw["model"], run=raw["run"], optimizer=raw["optimizer"], data=raw["data"])
    if case.extra_toml:
        job.write_text(job.read_text() + "\n" + case.extra_toml)
    return job


def check_message(case: Case, message: str) -> None:
    for words in case.expect:
        assert words in message, f"{words!r} missing from {message!r}"
    for words in case.absent:
        assert words not in message, f"{words!r} should not be in {message!r}"


def test_the_base_job_is_valid(tmp_path):
    # the cases below differ from this job only by their edit, so each message is caused by that edit
    job = sm.load_job(prepare(Case("good", {}, []), tmp_path))
    result = sm.train(job, progress=False)
    assert result["steps"] == TRAIN_ROWS // 16


@pytest.mark.parametrize("case", CASES, ids=IDS)
def test_api_raises_job_error(case, tmp_path):
    path = prepare(case, tmp_path)
    if case.stage == "config":
        raw = raw_job(case)
        if case.extra_toml:
            raw["optimiser"] = {"method": "adam"}
        with pytest.raises(JobError) as direct:
            job_from_dict(raw, base=tmp_path)
        check_message(case, str(direct.value))
        with pytest.raises(JobError) as loaded:
            sm.load_job(path)
        assert str(loaded.value) == str(direct.value)
    else:
        job = sm.load_job(path)
        with pytest.raises(JobError) as err:
            sm.train(job, progress=False)
        check_message(case, str(err.value))
        assert not (tmp_path / "run" / "final.npz").exists()


@pytest.mark.parametrize("case", CLI_CASES, ids=[c.name for c in CLI_CASES])
def test_cli_exits_2_with_the_message(case, tmp_path):
    path = prepare(case, tmp_path)
    proc = run_cli(["train", str(path), "--no-progress"], timeout=60, cwd=tmp_path)
    assert proc.returncode == 2, proc.stderr
    assert "Traceback" not in proc.stderr
    assert proc.stderr.startswith("shardmill: error: ")
    assert len(proc.stderr.strip().splitlines()) == 1  # one line, nothing else
    check_message(case, proc.stderr)


@pytest.mark.parametrize("args, expect", [
    (["train", "missing.toml"], ["missing.toml", "does not exist"]),
    (["train", "broken.toml"], ["broken.toml", "not valid TOML"]),
])
def test_cli_job_file_errors(args, expect, tmp_path):
    (tmp_path / "broken.toml").write_text("[model\nlayers = [1, 2]\n")
    proc = run_cli(args, timeout=60, cwd=tmp_path)
    assert proc.returncode == 2 and "Traceback" not in proc.stderr
    for words in expect:
        assert words in proc.stderr
