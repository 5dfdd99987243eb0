"""The job schema as one table (shardmill.config.SCHEMA): what is derived from it stays what it was.

The job digest is checked against the formula every existing checkpoint was written with (SHA-256 of the sorted
JSON of the model, data and optimizer tables and four run keys), computed here with hashlib and json; the README's
table of keys against the text the schema generates; MLP's argument checks against the job file's.
"""

from __future__ import annotations

import copy
import hashlib
import json
from pathlib import Path

import pytest
import shardmill as sm
from helpers import run_cli
from shardmill import config, jobtext
from shardmill.commands.cli import build_parser
from shardmill.config import job_from_dict
from shardmill.docblocks import block_between
from shardmill.errors import JobError

README = Path(__file__).resolve().parents[1] / "README.md"
# The run keys that fix the trajectory, as the digest has always taken them (the rest of [run] may change on resume).
DIGEST_RUN_KEYS = ("global_batch", "seed", "reduction", "exact_chunk")
# [data] keys added in 0.2 (tables), 0.3 (weights, categories, target scaling) and later (k-fold folds): they enter
# the digest only away from their defaults, as the checkpoints on disk were written without them.
ADDED_DATA_KEYS = {"target": "", "features": [], "header": "auto", "weights": "", "class_weights": "",
                   "categorical": [], "embedding_widths": {}, "standardize_targets": True, "folds": 0, "fold": 0,
                   "groups": "", "split": "random", "validation": ""}
# [model] keys added in 0.3 (the robust losses' parameters; norm, dropout and residual): likewise, at their defaults
# they stay out of the digest.
ADDED_MODEL_KEYS = {"huber_delta": 1.0, "norm": "none", "dropout": 0.0, "residual": False}
FULL = {
    "model": {"layers": [784, 1024, 1024, 10], "activation": "relu", "loss": "softmax_cross_entropy",
              "dtype": "float32", "init": "auto"},
    "data": {"inputs": "x.npy", "targets": "y.npy", "validation_fraction": 0.1, "standardize": True},
    "optimizer": {"method": "adam", "learning_rate": 1e-3, "schedule": "cosine", "warmup": 100},
    "run": {"epochs": 5, "global_batch": 512, "seed": 1, "save_every": 500},
}
JOBS = [
    {"model": {"layers": [6, 8, 3]}},
    FULL,
    {"model": {"layers": [4, 5, 6, 2], "loss": "binary_cross_entropy", "activation": ["tanh", "gelu"],
               "dtype": "float64", "init": "he"},
     "optimizer": {"method": "nesterov", "learning_rate": 1, "momentum": 0.5},
     "run": {"reduction": "exact", "global_batch": 64, "exact_chunk": 16, "seed": 7, "overlap": False}},
    {"model": {"layers": [3, 9, 1], "loss": "squared_error", "output": "sigmoid"}, "data": {"standardize": False}},
]


def digest_as_written(job: sm.Job) -> str:
    """The digest formula of the checkpoints on disk, spelled out independently of the schema."""
    d = job.as_dict()
    data = {k: v for k, v in d["data"].items() if k not in ADDED_DATA_KEYS or v != ADDED_DATA_KEYS[k]}
    model = {k: v for k, v in d["model"].items() if k not in ADDED_MODEL_KEYS or v != ADDED_MODEL_KEYS[k]}
    kept = {"model": model, "data": data, "optimizer": d["optimizer"],
            "run": {k: d["run"][k] for k in DIGEST_RUN_KEYS}}
    return hashlib.sha256(json.dumps(kept, sort_keys=True).encode()).hexdigest()  # hashlib, json (stdlib)


@pytest.mark.parametrize("raw", JOBS)
def test_digest_is_the_formula_existing_checkpoints_carry(raw):
    job = job_from_dict(raw)
    assert job.digest() == digest_as_written(job)


def test_resumable_keys_are_the_run_keys_outside_the_digest():
    # run.exact_format fixes the trajectory too, but enters the digest only away from its default (added later).
    expected = [f"run.{k}" for k in job_from_dict(FULL).as_dict()["run"]
                if k not in (*DIGEST_RUN_KEYS, "exact_format")]
    assert sorted(config.resumable_keys()) == sorted(expected)
    assert "run.epochs" in expected and "run.seed" not in expected  # resume with more epochs, never another seed


def test_trajectory_differences_name_what_changed_in_the_digest():
    ours = job_from_dict(FULL)
    theirs = copy.deepcopy(FULL)
    theirs["model"]["layers"] = [784, 1024, 512, 10]
    theirs["optimizer"]["learning_rate"] = 0.01
    theirs["run"]["epochs"] = 9  # resumable: not a difference
    theirs["run"]["threads"] = 2
    written = job_from_dict(theirs).as_dict()
    del written["data"]["inputs"]  # a key the other job lacks is not compared
    written["data"]["targets"] = "other.npy"
    assert ours.trajectory_differences(written) == ["model.layers", "data.targets", "optimizer.learning_rate"]
    assert ours.digest() != job_from_dict(theirs).digest()
    assert ours.trajectory_differences(ours.as_dict()) == []


def test_each_default_is_valid_and_is_what_a_missing_key_gives():
    bare = job_from_dict({"model": {"layers": [6, 8, 3]}})
    for key in config.SCHEMA:
        if key.default is config.REQUIRED:
            continue
        raw = {"model": {"layers": [6, 8, 3]}}
        raw.setdefault(key.section, {})[key.name] = key.default
        explicit = job_from_dict(raw)
        assert explicit.as_dict() == bare.as_dict(), key.path


def test_readme_table_is_the_generated_one():
    text = README.read_text()
    assert text.count(jobtext.README_BEGIN) == 1 and text.count(jobtext.README_END) == 1
    block = block_between(text, jobtext.README_BEGIN, jobtext.README_END)
    assert block == jobtext.defaults_markdown(), (
        "README.md's table of job keys is stale; run: python -c \"from shardmill.jobtext import "
        "write_defaults_markdown; write_defaults_markdown('README.md')\"")
    for key in config.SCHEMA:  # one row per key
        assert block.count(f"| `{key.path}`") == 1, key.path


@pytest.mark.parametrize("model", [
    {"layers": [6]},
    {"layers": [6, 0, 3]},
    {"layers": [6, 8, 3], "activation": "rleu"},
    {"layers": [6, 8, 3], "activation": ["relu", "tanh"]},
    {"layers": [6, 3], "activation": "bogus"},
    {"layers": [6, 8, 3], "loss": "softmax_crossentropy"},
    {"layers": [6, 8, 3], "dtype": "float16"},
    {"layers": [6, 8, 3], "init": "xavier"},
    {"layers": [6, 8, 3], "loss": "squared_error", "output": "rleu"},
    {"layers": [6, 8, 3], "loss": "softmax_cross_entropy", "output": "sigmoid"},
])
def test_mlp_refuses_what_the_job_file_refuses_in_the_same_words(model):
    with pytest.raises(JobError) as from_job:
        job_from_dict({"model": model})
    arguments = dict(model)
    layers = arguments.pop("layers")
    with pytest.raises(JobError) as from_mlp:
        sm.MLP(layers, **arguments)
    assert str(from_mlp.value) == str(from_job.value)
    assert "`model." in str(from_mlp.value)


def test_mlp_resolves_auto_as_documented():
    relu = sm.MLP([6, 8, 3], activation="relu")  # he for the relu family, glorot otherwise; softmax for this loss
    tanh = sm.MLP([6, 8, 8, 1], activation=("tanh", "relu"), loss="squared_error")
    assert (relu.init, relu.output, relu.activations) == ("he", "softmax", ["relu"])
    assert (tanh.init, tanh.output, tanh.activations) == ("glorot", "identity", ["tanh", "relu"])


@pytest.mark.parametrize("option, bad, allowed", [
    ("--dtype", "float16", ["'float32'", "'float64'"]),
    ("--reduction", "exakt", ["'fast'", "'exact'"]),
])
def test_bench_options_offer_the_schema_choices(option, bad, allowed, capsys):
    with pytest.raises(SystemExit) as exit_:
        build_parser().parse_args(["bench", option, bad])
    assert exit_.value.code == 2  # argparse exits 2 on a bad choice (Python standard library)
    message = capsys.readouterr().err
    for words in allowed:
        assert words in message


def test_bench_checks_activation_like_the_job_file(tmp_path):
    proc = run_cli(["bench", "--activation", "rleu", "--steps", "1"], timeout=120, cwd=tmp_path)
    assert proc.returncode == 2 and "Traceback" not in proc.stderr
    assert ("`--activation` must be one of gelu, identity, leaky_relu, relu, sigmoid, softplus, tanh; got 'rleu' "
            "(did you mean 'relu'?)") in proc.stderr


def test_choices_refuse_a_key_without_names():
    assert config.choices("model.dtype") == ("float32", "float64")
    with pytest.raises(KeyError):
        config.choices("run.epochs")


def test_a_key_added_later_enters_the_digest_only_away_from_its_default():
    # run.exact_format came after checkpoints existed: at its default the digest is the formula they carry.
    raw = {"model": {"layers": [4, 3]}, "run": {"reduction": "exact", "exact_chunk": 8}}
    wide = job_from_dict({**raw, "run": {**raw["run"], "exact_format": "wide"}})
    assert wide.digest() == digest_as_written(wide) == job_from_dict(raw).digest()
    compact = job_from_dict({**raw, "run": {**raw["run"], "exact_format": "compact"}})
    assert compact.digest() != wide.digest()  # another trajectory, another digest. common practice
    assert compact.trajectory_differences(wide.as_dict()) == ["run.exact_format"]


def test_spec_dataclasses_hold_the_schema_keys_in_table_order():
    # convention: the spec dataclasses are written out (grep and type checkers find their fields) and must say
    # exactly what the schema table says: the same keys, in table order, with the table's defaults
    import dataclasses

    for section, spec in config.SPECS.items():
        fields = dataclasses.fields(spec)
        keys = [key for key in config.SCHEMA if key.section == section]
        assert [f.name for f in fields] == [key.name for key in keys]
        for f, key in zip(fields, keys, strict=True):
            if f.default is not dataclasses.MISSING:
                assert f.default == key.default
            elif f.default_factory is not dataclasses.MISSING:
                assert f.default_factory() == key.default
            else:  # no default: a required key, or the activation list whose length follows model.layers
                assert key.default is config.REQUIRED or key.kind == "names"


def test_every_key_kind_is_interpreted_in_one_table():
    # convention: one entry per kind in checks.KINDS; a key of an unknown kind is refused when the schema is built
    from shardmill.checks import KINDS

    assert {key.kind for key in config.SCHEMA} <= set(KINDS)
    with pytest.raises(AssertionError, match="kind 'colour'"):
        config.Key("model.colour", "colour", "red", "a key of no known kind")
