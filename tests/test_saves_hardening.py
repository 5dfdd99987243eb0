"""``shardmill saves`` on damaged workdirs (one line, never a traceback, never a silent omission), small regression
losses printed with significant digits, and the column of the metric the run watched (``run.best_metric``).

References: the run's own metrics.jsonl (what the table must show), Python's format mini-language (``g``: significant
digits) and the checkpoint index's own checksum (recomputed here as a tool rewriting it would).
"""

from __future__ import annotations

import json
import shutil
from pathlib import Path

import numpy as np
import pytest
from helpers import run_cli, write_job
from shardmill import checkpoint


@pytest.fixture(scope="module")
def regression(tmp_path_factory) -> Path:
    """A regression run on targets of about 1e-5, watching validation.rmse (in the targets' units: about 1e-5)."""
    folder = tmp_path_factory.mktemp("saves")
    rng = np.random.default_rng(3)
    x = rng.normal(size=(120, 3))
    np.save(folder / "x.npy", x)
    np.save(folder / "y.npy", (1e-5 * np.tanh(x[:, :1])).astype(np.float64))
    write_job(folder, {"layers": [3, 8, 1], "activation": "tanh", "loss": "squared_error", "dtype": "float64"},
              {"epochs": 2, "global_batch": 24, "seed": 1, "best_metric": "validation.rmse"},
              optimizer={"method": "sgd", "learning_rate": 0.01})
    done = run_cli(["train", "job.toml", "--no-progress"], cwd=folder)
    assert done.returncode == 0, done.stderr
    return folder


def _copy(regression: Path, tmp_path: Path) -> Path:
    shutil.copytree(regression / "run", tmp_path / "run")
    return tmp_path / "run"


def test_small_losses_and_the_watched_metric_are_shown(regression: Path) -> None:
    epochs = [json.loads(line) for line in (regression / "run" / "metrics.jsonl").read_text().splitlines()]
    last = [r for r in epochs if r.get("kind") == "epoch"][-1]
    assert last["validation"]["rmse"] < 5e-5  # the case a fixed 4 decimals prints as 0.0000
    done = run_cli(["saves", str(regression / "run")])
    assert done.returncode == 0, done.stderr
    head, *rows = done.stdout.splitlines()
    assert "validation.rmse" in head.split()
    newest = next(row for row in rows if "newest" in row)
    for value in (last["train"]["loss"], last["validation"]["loss"], last["validation"]["rmse"]):
        assert f"{value:.5g}" in newest.split()  # five significant digits (Python's format spec, type "g")
    assert "0.0000" not in done.stdout
    rows = json.loads(run_cli(["saves", str(regression / "run"), "--json"]).stdout)
    assert isinstance(rows, list) and rows[-1]["name"] in ("final.npz", "best.npz")
    assert any(row.get("validation_rmse") == last["validation"]["rmse"] for row in rows)


@pytest.mark.parametrize("step", ["abc", None])
def test_an_index_with_a_step_that_is_no_number_is_one_line(regression: Path, tmp_path: Path, step) -> None:
    run = _copy(regression, tmp_path)
    entries = checkpoint.read_index(run / "checkpoints")
    entries[-1]["step"] = step
    checkpoint.write_index(run / "checkpoints", entries)  # its checksum recomputed, as a tool would
    done = run_cli(["saves", str(run)])
    assert done.returncode == 2 and "Traceback" not in done.stderr, done.stderr
    line = done.stderr.strip()
    assert "\n" not in line and "`step` must be the whole number" in line and repr(step) in line


def test_an_index_or_a_model_file_that_is_a_folder_is_reported(regression: Path, tmp_path: Path) -> None:
    run = _copy(regression, tmp_path)
    (run / "final.npz").unlink()
    (run / "final.npz").mkdir()
    done = run_cli(["saves", str(run)])
    assert done.returncode == 3, done.stderr  # saves' documented exit for a file that fails its check
    assert "Traceback" not in done.stderr
    assert any(row.startswith("final.npz") and "FAILED: is not a file" in row for row in done.stdout.splitlines())
    (run / "checkpoints" / checkpoint.INDEX).unlink()
    (run / "checkpoints" / checkpoint.INDEX).mkdir()
    done = run_cli(["saves", str(run)])
    assert done.returncode == 2 and "Traceback" not in done.stderr, done.stderr
    assert "index.json' is not a file" in done.stderr and len(done.stderr.strip().splitlines()) == 1


def test_saves_help_says_json_is_an_array() -> None:
    done = run_cli(["saves", "--help"])
    assert done.returncode == 0 and "JSON array" in " ".join(done.stdout.split())
