"""Unclear messages a fuzz run and a practitioner met: each ends in one readable line, with no numpy warning ahead.

References: numpy's two-pass ``std`` for the input statistics of a column whose mean dwarfs its spread (the
shifted-data algorithm, Chan, Golub & LeVeque 1983, against the cancelling mean(x²) − mean(x)²).
"""

from __future__ import annotations

from pathlib import Path

import numpy as np
import pytest
from helpers import run_cli, write_job
from shardmill.data.rows import column_statistics
from shardmill.errors import JobError
from shardmill.parallel.comm import Comm


@pytest.fixture()
def job(tmp_path: Path) -> Path:
    rng = np.random.default_rng(0)
    np.save(tmp_path / "x.npy", rng.normal(size=(50, 3)))
    np.save(tmp_path / "y.npy", rng.integers(0, 2, 50))
    return write_job(tmp_path, {"layers": [3, 4, 2]}, {"epochs": 1, "global_batch": 8, "workdir": "run"})


def _one_line(done, words: str) -> None:
    assert done.returncode == 2, done.stderr
    assert done.stderr.count("\n") == 1 and words in done.stderr, done.stderr
    assert "Warning" not in done.stderr and "Traceback" not in done.stderr


def test_an_overlong_value_is_cut_in_the_message(job: Path) -> None:
    done = run_cli(["train", str(job), "--set", "model.activation=" + "x" * 100_000])
    _one_line(done, "… (100,002 characters)")  # the value and its two quotes
    assert len(done.stderr) < 600


def test_inputs_whose_squares_overflow_are_refused_in_words(job: Path) -> None:
    X = np.load(job.parent / "x.npy")
    X[0, 1], X[1, 1] = 1e308, -1e308
    np.save(job.parent / "x.npy", X)
    _one_line(run_cli(["train", str(job)]), "`data.inputs` column 1 (counting from 0) holds values too large")


def test_a_huge_label_is_reported_as_itself(job: Path) -> None:
    y = np.load(job.parent / "y.npy").astype(np.float64)
    y[3] = 1e300
    np.save(job.parent / "y.npy", y)
    _one_line(run_cli(["train", str(job)]), "labels must lie in [0, 1] for 2 outputs; got 1e+300 in row 3")


def test_a_diverging_run_prints_no_numpy_warning_before_its_line(job: Path) -> None:
    _one_line(run_cli(["train", str(job), "--set", "optimizer.learning_rate=1e308"]), "the run diverged")


def test_export_opset_that_is_not_a_number_is_one_line(job: Path) -> None:
    assert run_cli(["train", str(job)]).returncode == 0
    done = run_cli(["export", str(job.parent / "run"), "--out", str(job.parent / "m.onnx"), "--opset", "abc"])
    _one_line(done, "`--opset` must be an integer from 13 to")


def test_statistics_of_a_column_with_a_large_mean_keep_their_digits() -> None:
    t = 1.7e9 + np.random.default_rng(1).normal(0.0, 100.0, size=(5000, 1))  # timestamps, seconds
    mean, inv_std, _ = column_statistics(t, np.arange(5000), Comm.alone())
    # numpy's two-pass std; mean(x²) − mean(x)² in float64 gives 103.7 here (3.6 % off)
    assert 1.0 / inv_std[0] == pytest.approx(t.std(), rel=1e-9)
    assert mean[0] == pytest.approx(t.mean(), rel=1e-15)


def test_job_error_cuts_long_words_only() -> None:
    path = "/a/" + "b" * 150  # a long path stays whole
    assert path in str(JobError(f"file {path!r} does not exist"))
    assert "… (1,000 characters)" in str(JobError("got " + "x" * 1000))


def test_a_number_beyond_floats_range_is_refused_in_words() -> None:
    import shardmill as sm

    with pytest.raises(JobError, match="`optimizer.eps` must be a number; got 1000000"):
        sm.job_from_dict({"model": {"layers": [2, 2]}, "optimizer": {"eps": 10**400}})  # was an OverflowError


def test_inputs_cut_short_under_a_running_job_end_it_in_words(tmp_path: Path) -> None:
    import shardmill as sm
    from shardmill.errors import LocalJobError
    from shardmill.training.trainer import Trainer

    rng = np.random.default_rng(0)
    np.save(tmp_path / "x.npy", rng.normal(size=(400, 3)))
    np.save(tmp_path / "y.npy", rng.integers(0, 2, 400))
    job = sm.job_from_dict({"model": {"layers": [3, 4, 2]}, "data": {"inputs": str(tmp_path / "x.npy"),
                                                                     "targets": str(tmp_path / "y.npy")},
                            "run": {"global_batch": 8, "workdir": str(tmp_path / "run")}})
    trainer = Trainer(job, Comm.alone())
    trainer.step(0, 0)
    size = (tmp_path / "x.npy").stat().st_size
    with open(tmp_path / "x.npy", "r+b") as f:
        f.truncate(size // 2)  # reading the lost half through the mapping would be SIGBUS ("Bus error")
    with pytest.raises(LocalJobError, match=r"was cut to [\d,]+ bytes while the job reads it"):
        trainer.step(0, 1)


def test_a_refused_start_leaves_no_converted_table_behind(tmp_path: Path) -> None:
    lines = ["a,b,y"] + [f"{i * 0.1:.1f},{i % 3},{i % 2}" for i in range(30)]
    lines[5] = "0.5,2,7"  # a label beyond the model's two classes
    (tmp_path / "t.csv").write_text("\n".join(lines) + "\n")
    job = write_job(tmp_path, {"layers": [2, 4, 2]}, {"global_batch": 8, "workdir": "run"},
                    data={"inputs": "t.csv", "target": "y"})
    _one_line(run_cli(["train", str(job)]), "labels must lie in [0, 1] for 2 outputs; got 7 in row 4")
    assert not (tmp_path / "run" / "tables").exists()  # the corrected table converts again, nothing stale stays
