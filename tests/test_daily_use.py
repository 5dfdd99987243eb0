"""A practitioner's day: the Python API on arrays in memory, epoch lines on request, readable figures.

References: scikit-learn's bundled iris and diabetes data sets; training from arrays against the same job trained from
.npy files (the same rows must give the same bits: common practice for an alternative front door).
"""

from __future__ import annotations

import hashlib
import json
import textwrap
import tomllib
from pathlib import Path

import numpy as np
import pytest
import shardmill as sm
from helpers import run_cli, run_mpi
from shardmill.errors import JobError
from shardmill.training.console import epoch_line, figure
from sklearn.datasets import load_diabetes, load_iris


def _job(workdir: Path, **data) -> sm.Job:
    return sm.job_from_dict({"model": {"layers": [4, 8, 3], "activation": "tanh"},
                             "data": {"validation_fraction": 0.2, **data},
                             "run": {"epochs": 2, "global_batch": 16, "seed": 5, "workdir": str(workdir)}})


def _params(workdir: Path) -> str:
    with np.load(workdir / "final.npz", allow_pickle=False) as saved:
        return hashlib.sha256(b"".join(saved[k].tobytes() for k in ("W0", "b0", "W1", "b1"))).hexdigest()


def test_arrays_in_memory_train_the_bits_the_same_files_train(tmp_path: Path) -> None:
    X, y = load_iris(return_X_y=True)
    np.save(tmp_path / "x.npy", X)
    np.save(tmp_path / "y.npy", y)
    sm.train(_job(tmp_path / "files", inputs=str(tmp_path / "x.npy"), targets=str(tmp_path / "y.npy")),
             progress=False)
    result = sm.train(_job(tmp_path / "arrays"), inputs=X, targets=y, progress=False)
    assert _params(tmp_path / "arrays") == _params(tmp_path / "files")
    assert result["predictor"].predict(X[:5]).shape == (5,)


def test_array_weights_and_regression_targets(tmp_path: Path) -> None:
    X, y = load_diabetes(return_X_y=True)
    w = np.ones(len(y))
    w[::2] = 2.0
    job = sm.job_from_dict({"model": {"layers": [10, 8, 1], "loss": "squared_error"},
                            "run": {"epochs": 1, "global_batch": 32, "workdir": str(tmp_path / "run")}})
    result = sm.train(job, inputs=X, targets=y, weights=w, progress=False)
    assert result["predictor"].target_std is not None  # the regression targets were standardised, as from files


@pytest.mark.parametrize("data, arrays, words", [
    ({"inputs": "x.npy"}, True, "must not name data files or columns too; it has `data.inputs` = 'x.npy'"),
    ({"categorical": ["city"]}, True, "`data.categorical` needs a table"),
    ({}, "inputs only", "give both `inputs` and `targets` as arrays, or neither"),
    ({}, "weights only", "`weights` as an array needs `inputs` and `targets` as arrays"),
])
def test_array_misuse_is_one_line(tmp_path: Path, data: dict, arrays, words: str) -> None:
    X, y = load_iris(return_X_y=True)
    given = {True: {"inputs": X, "targets": y}, "inputs only": {"inputs": X},
             "weights only": {"weights": np.ones(len(y))}}[arrays]
    with pytest.raises(JobError) as err:
        sm.train(_job(tmp_path / "run", **data), progress=False, **given)
    assert words in str(err.value) and "\n" not in str(err.value)


@pytest.mark.mpi
def test_arrays_that_differ_between_ranks_are_refused_on_every_rank(tmp_path: Path) -> None:
    script = tmp_path / "differ.py"
    script.write_text(textwrap.dedent(f"""
        import sys
        import numpy as np, shardmill as sm
        from shardmill.parallel.comm import Comm
        X = np.random.default_rng(Comm().rank).normal(size=(40, 4))   # another draw on each rank
        y = np.zeros(40, dtype=np.int64)
        job = sm.job_from_dict({{"model": {{"layers": [4, 3]}}, "run": {{"workdir": {str(tmp_path / 'run')!r}}}}})
        try:
            sm.train(job, inputs=X, targets=y, progress=False)
        except sm.JobError as err:
            sys.stdout.write(f"refused: {{err}}\\n")  # one write: the two ranks' lines must not interleave
    """))
    done = run_mpi(2, [str(script)], timeout=120)
    assert done.returncode == 0, done.stderr
    assert done.stdout.count("refused: the `inputs` array differs between ranks") == 2  # every rank, alike


def test_echo_prints_epoch_lines_into_a_pipe(tmp_path: Path, capsys) -> None:
    X, y = load_iris(return_X_y=True)
    sm.train(_job(tmp_path / "run"), inputs=X, targets=y, progress=False, echo=True)
    lines = [line for line in capsys.readouterr().out.splitlines() if line.startswith("epoch=")]
    assert len(lines) == 2 and "validation.accuracy=" in lines[0]


def test_a_small_loss_never_prints_as_zero() -> None:
    record = {"epoch": 3, "step": 30, "train": {"loss": 1.234e-05, "rmse": 0.00497},
              "validation": {"loss": 0.2309, "rmse": 1364.6261}, "samples_per_s": 1000.0}
    line = epoch_line(record)
    assert "train.loss=1.234e-05" in line and "train.rmse=0.00497" in line
    assert "validation.loss=0.2309" in line and "validation.rmse=1364.6261" in line  # four decimals from 0.1 up
    assert figure(0.0) == "0.0000" and figure(float("nan")) == "nan"


# --- shardmill expand: the job and a first look at its data -----------------------------------------------------

def _table_job(folder: Path, csv_text: str, **data) -> Path:
    (folder / "t.csv").write_text(csv_text)
    keys = {"inputs": "t.csv", "target": "y", **data}
    lines = ["[model]", "layers = [2, 4, 2]", "[data]", *(f"{k} = {json.dumps(v)}" for k, v in keys.items())]
    (folder / "job.toml").write_text("\n".join(lines) + "\n")
    return folder / "job.toml"


@pytest.mark.parametrize("csv_text, data, words", [
    ("a,b,y\n1,2,0\n3,x7,1\n", {}, "line 3, column 'b': 'x7' is not a number; list the column in "
                                   "`data.categorical`"),
    ("a,b,y\n1,2,0\n", {"features": ["a", "c"]}, "`data.features` column 'c' is not in"),
    ("a,b,y\n1,2,0\n", {"categorical": ["kind"]}, "`data.categorical` column 'kind' is not in"),
    ("a,b,y\n1,2,0\n", {"target": "z"}, "`data.target` column 'z' is not in"),
])
def test_expand_refuses_data_training_would_refuse(tmp_path: Path, csv_text: str, data: dict, words: str) -> None:
    done = run_cli(["expand", str(_table_job(tmp_path, csv_text, **data))])
    assert done.returncode == 2 and words in done.stderr and done.stderr.count("\n") == 1, done.stderr


def test_expand_says_what_it_looked_at_in_comments_that_read_back(tmp_path: Path) -> None:
    done = run_cli(["expand", str(_table_job(tmp_path, "a,kind,y\n1,p,0\n2,q,1\n", categorical=["kind"],
                                               features=["a"]))])
    assert done.returncode == 0, done.stderr
    assert done.stdout.startswith("# data: ") and "the first 2 rows of 2 numeric columns hold numbers" in done.stdout
    assert tomllib.loads(done.stdout)["data"]["categorical"] == ["kind"]  # still TOML (Python's tomllib)
    old = run_cli(["resolve", str(tmp_path / "job.toml")])
    assert old.returncode == 2  # the earlier name is gone (a name of our own)


# --- shardmill scale: a model too small to gain is told so in words --------------------------------------------

def _point(p: int, step_ms: float, serial_ms: float) -> dict:
    speedup = serial_ms / step_ms
    return {"p": p, "step_s": step_ms / 1e3, "speedup": speedup, "efficiency": speedup / p,
            "phase_max_s": {"forward": 0.2 * step_ms / 1e3, "backward": 0.3 * step_ms / 1e3}}


@pytest.mark.parametrize("step_ms_at_2, words", [(0.8, "gains little"), (0.99, "gains nothing"), (0.55, None)])
def test_scale_says_in_words_when_more_processes_do_not_pay(step_ms_at_2: float, words: str | None) -> None:
    from shardmill.scaling.report import gain_verdict

    study = {"mode": "strong", "points": [_point(1, 1.0, 1.0), _point(2, step_ms_at_2, 1.0)]}
    verdict = gain_verdict(study)
    if words is None:  # efficiency 1/(2·0.55) = 0.91: scales (strong-scaling efficiency T1 / (P·TP), common practice)
        assert verdict is None
    else:
        assert verdict.startswith(f"verdict: this model {words} from more processes") and "P = 2" in verdict
    assert gain_verdict({**study, "mode": "weak"}) is None


# --- a progress bar under --ranks P on a terminal ----------------------------------------------------------------

def test_rank_zero_draws_a_bar_when_launched_from_a_terminal(monkeypatch) -> None:
    from shardmill.parallel.launch import TERMINAL
    from shardmill.training.console import progress_bar

    monkeypatch.delenv(TERMINAL, raising=False)
    assert progress_bar(10, 0, True).disable  # stderr is a pipe under pytest: tqdm draws nothing
    monkeypatch.setenv(TERMINAL, "1")
    bar = progress_bar(10, 0, True)
    assert not bar.disable
    bar.close()


@pytest.mark.mpi
def test_ranks_two_on_a_terminal_shows_the_bar(tmp_path: Path) -> None:
    import shutil
    import subprocess
    import sys

    if shutil.which("script") is None:
        pytest.skip("util-linux `script` (a pseudo-terminal) is not installed")
    X, y = load_iris(return_X_y=True)
    np.save(tmp_path / "x.npy", X)
    np.save(tmp_path / "y.npy", y)
    (tmp_path / "job.toml").write_text('[model]\nlayers = [4, 8, 3]\n[data]\ninputs = "x.npy"\ntargets = "y.npy"\n'
                                       '[run]\nepochs = 2\nglobal_batch = 16\nworkdir = "run"\n')
    command = f"{sys.executable} -m shardmill train job.toml --ranks 2"
    done = subprocess.run(["script", "-qec", command, str(tmp_path / "typescript")], cwd=tmp_path,
                          capture_output=True, text=True, timeout=180, stdin=subprocess.DEVNULL)
    assert done.returncode == 0, done.stdout[-2000:]
    assert "step/s" in done.stdout and "/16 [" in done.stdout  # the bar: rate, and 2 epochs of 8 steps (135 rows / 16)
