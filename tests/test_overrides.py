"""Changing a job from the command line (``--set``), printing it resolved, the 0.2 names refused, the version and
``info --json``.

References: values after ``--set`` are read with Python's own TOML reader (tomllib, standard library) and the printed
job is read back with it; the version is compared with importlib.metadata (standard library); info's figures with the
libraries' own ``__version__`` and psutil.
"""

from __future__ import annotations

import json
import tomllib

import numpy as np
import pytest
from helpers import make_classification, run_cli, write_job
from shardmill.config import apply_overrides, job_from_dict, load_job, parse_override
from shardmill.errors import JobError
from shardmill.jobtext import job_toml
from sklearn.datasets import load_wine

BASE = {"model": {"layers": [13, 8, 3]}, "optimizer": {"learning_rate": 0.001}}


@pytest.mark.parametrize(("text", "path", "value"), [
    ("optimizer.learning_rate=0.01", "optimizer.learning_rate", 0.01),
    ("run.epochs=7", "run.epochs", 7),
    ("data.standardize=false", "data.standardize", False),
    ("model.layers=[13, 32, 3]", "model.layers", [13, 32, 3]),
    ('model.activation="tanh"', "model.activation", "tanh"),
    ("model.activation=tanh", "model.activation", "tanh"),  # not TOML: taken as text
    ("run.workdir=runs/b", "run.workdir", "runs/b"),
    ("run.workdir=2024", "run.workdir", "2024"),  # a text key keeps the text TOML would read as a number
    ("data.target=16", "data.target", "16"),  # the 17th column of a CSV without a header row
    ("data.inputs=2024-01-01.csv", "data.inputs", "2024-01-01.csv"),
    ("data.header=no", "data.header", "no"),
    (" run.seed = 3 ", "run.seed", 3),
])
def test_a_set_value_is_read_as_toml_reads_it(text, path, value):
    got_path, got = parse_override(text)
    assert got_path == path and got == value and type(got) is type(value)
    if not isinstance(value, str):  # tomllib (standard library) reads the same value from a TOML line
        assert tomllib.loads(f"v = {text.partition('=')[2].strip()}")["v"] == value


def test_overrides_apply_in_order_and_are_validated_by_the_schema():
    job = job_from_dict(BASE, overrides=["optimizer.learning_rate=0.1", "optimizer.learning_rate=0.2"])
    assert job.optimizer.learning_rate == 0.2 and job.overrides == ("optimizer.learning_rate=0.1",
                                                                    "optimizer.learning_rate=0.2")
    assert BASE["optimizer"]["learning_rate"] == 0.001  # the caller's dict is not changed
    with pytest.raises(JobError, match=r"`optimizer.method` must be one of .*got 'adma' \(did you mean 'adam'\?\)"):
        job_from_dict(BASE, overrides=["optimizer.method=adma"])
    with pytest.raises(JobError, match=r"`run.epochs` must be ≥ 1; got 0"):
        job_from_dict(BASE, overrides=["run.epochs=0"])


@pytest.mark.parametrize(("text", "words"), [
    ("learning_rate", "takes section.key=value"),
    ("optimizer.learning_rate", "takes section.key=value"),
    ("a.b.c=1", "takes section.key=value"),
    ("optimiser.learning_rate=1", "`optimiser` is not a known table; allowed: model, data, optimizer, run (did you "
                                  "mean 'optimizer'?)"),
    ("optimizer.learning_rat=1", "`optimizer.learning_rat` is not a known key; allowed: method, learning_rate"),
])
def test_a_malformed_set_names_itself_and_what_is_allowed(text, words):
    with pytest.raises(JobError) as error:
        apply_overrides(BASE, [text])
    assert words in str(error.value)


def test_the_resolved_job_reads_back_to_the_same_job():
    job = job_from_dict(BASE, overrides=["data.features=['a', 'b', 'c', 'd', 'e', 'f', 'g', 'h', 'i', 'j', 'k', "
                                         "'l', 'm']", "run.best_metric=validation.loss", "run.patience=3"])
    text = job_toml(job)
    again = job_from_dict(tomllib.loads(text))  # tomllib (standard library) reads what we print
    assert again.as_dict() == job.as_dict() and again.digest() == job.digest()
    assert f"digest {job.digest()[:16]}" in text and "# with --set data.features=" in text
    for section in ("model", "data", "optimizer", "run"):
        assert set(tomllib.loads(text)[section]) == set(job.as_dict()[section])  # every key, defaults filled


def test_a_key_renamed_in_0_2_is_refused_now_naming_the_keys_allowed():
    # the 0.2 compatibility names were promised for one release only; 0.3 refuses them like any unknown key
    with pytest.raises(JobError, match=r"`run.bucket_mb` is not a known key; allowed: .*message_mib"):
        job_from_dict({**BASE, "run": {"bucket_mb": 4.0}})
    with pytest.raises(JobError, match=r"`--set run.bucket_mb`: `run.bucket_mb` is not a known key"):
        job_from_dict(BASE, overrides=["run.bucket_mb=1"])


@pytest.fixture(scope="module")
def wine_job(tmp_path_factory):
    folder = tmp_path_factory.mktemp("wine")
    X, y = load_wine(return_X_y=True)  # scikit-learn's bundled copy of the UCI wine data
    np.save(folder / "x.npy", X)
    np.save(folder / "y.npy", y.astype(np.int64))
    return write_job(folder, {"layers": [13, 8, 3], "dtype": "float64"}, {"global_batch": 32, "epochs": 2},
                     {"method": "sgd", "learning_rate": 0.05})


def test_expand_prints_the_job_with_its_overrides_and_json(wine_job):
    done = run_cli(["expand", str(wine_job), "--set", "run.epochs=9", "--set", "optimizer.method=adam"])
    assert done.returncode == 0, done.stderr
    printed = tomllib.loads(done.stdout)
    assert printed["run"]["epochs"] == 9 and printed["optimizer"]["method"] == "adam"
    assert printed["optimizer"]["beta2"] == 0.999  # a default filled in
    job = load_job(wine_job, overrides=["run.epochs=9", "optimizer.method=adam"])
    as_json = json.loads(run_cli(["expand", str(wine_job), "--set", "run.epochs=9", "--set",
                                  "optimizer.method=adam", "--json"]).stdout)
    assert as_json["job"] == job.as_dict() and as_json["job_digest"] == job.digest()
    assert as_json["overrides"] == ["run.epochs=9", "optimizer.method=adam"]
    bad = run_cli(["expand", str(wine_job), "--set", "run.epochs=zero"])
    assert bad.returncode == 2 and bad.stderr == "shardmill: error: `run.epochs` must be an integer; got 'zero'\n"


def test_a_run_records_its_overrides_and_a_resume_names_them(wine_job, tmp_path):
    sets = ["--set", f"run.workdir={tmp_path / 'run'}", "--set", "optimizer.learning_rate=0.02"]
    done = run_cli(["train", str(wine_job), "--no-progress", *sets])
    assert done.returncode == 0, done.stderr
    start = json.loads((tmp_path / "run" / "metrics.jsonl").read_text().splitlines()[0])
    assert start["kind"] == "start" and start["overrides"] == [s for s in sets if s != "--set"]
    assert start["job"]["optimizer"]["learning_rate"] == 0.02
    index = json.loads((tmp_path / "run" / "checkpoints" / "index.json").read_text())
    state = json.loads((tmp_path / "run" / "checkpoints" / index["checkpoints"][-1]["name"] / "state.json")
                       .read_text())
    assert state["overrides"] == start["overrides"]
    # a resume without the learning-rate override is another trajectory: refused, naming the --set it lacks
    again = run_cli(["train", str(wine_job), "--no-progress", "--resume", sets[0], sets[1]])
    assert again.returncode == 2
    assert "changed: optimizer.learning_rate" in again.stderr
    assert "it was written by a run with --set" in again.stderr and "optimizer.learning_rate=0.02" in again.stderr
    resumed = run_cli(["train", str(wine_job), "--no-progress", "--resume", *sets, "--set", "run.epochs=3"])
    assert resumed.returncode == 0, resumed.stderr
    assert "the checkpoint was written by a run with" in resumed.stderr  # run.epochs=3 is new: a note, not a refusal
    starts = [json.loads(line) for line in (tmp_path / "run" / "metrics.jsonl").read_text().splitlines()
              if json.loads(line)["kind"] == "start"]
    assert [s["resumed_from_step"] for s in starts] == [0, 2 * ((178 - 35) // 32)]  # 35 = ⌊0.2·178⌋ held out


def test_version_and_info_json():
    from importlib.metadata import version

    import mpi4py
    import numba
    import psutil

    done = run_cli(["--version"])
    assert done.returncode == 0 and done.stdout.strip() == f"shardmill {version('shardmill')}"  # importlib.metadata
    info = json.loads(run_cli(["info", "--json"]).stdout)
    assert info["shardmill"] == version("shardmill")
    assert (info["numpy"], info["numba"], info["mpi4py"]) == (np.__version__, numba.__version__, mpi4py.__version__)
    assert info["cores_logical"] == psutil.cpu_count() and info["world_size"] == 1
    assert info["blas"] and all(pool["threads"] >= 1 for pool in info["blas"])


def test_a_flag_renamed_in_0_2_is_refused_now(tmp_path):
    # the 0.2 compatibility flags went with the release after it: argparse refuses them (exit 2) and names them
    make_classification(tmp_path)
    done = run_cli(["bench", "--layers", "6,8,3", "--batch", "32", "--steps", "2", "--json"], cwd=tmp_path)
    assert done.returncode == 2 and "unrecognized arguments: --batch 32" in done.stderr
