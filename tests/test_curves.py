"""Curves from metrics.jsonl: the figures are real PNGs and draw exactly what the file's records say.

Data: scikit-learn's bundled iris (classification) and diabetes (regression) sets, trained for a few epochs by
`shardmill.training.loop.train`, so every figure comes from a real metrics.jsonl. What was drawn (curves.json) is
compared with the file as Python's own json module reads it, line by line.
"""

from __future__ import annotations

import argparse
import json
import shutil
from pathlib import Path

import matplotlib.image
import numpy as np
import pytest
from shardmill.commands.curves import cmd_curves, draw_curves, read_metrics
from shardmill.config import job_from_dict
from shardmill.errors import JobError
from sklearn.datasets import load_diabetes, load_iris

PNG_SIGNATURE = b"\x89PNG\r\n\x1a\n"  # PNG specification (ISO/IEC 15948:2004), §5.2 PNG signature


def _iris_job(folder: Path, **run):
    X, y = load_iris(return_X_y=True)  # scikit-learn's bundled copy of Fisher's 1936 iris data
    np.save(folder / "x.npy", X)
    np.save(folder / "y.npy", y.astype(np.int64))
    return job_from_dict({"model": {"layers": [4, 8, 3], "activation": "tanh", "dtype": "float64"},
                          "data": {"inputs": str(folder / "x.npy"), "targets": str(folder / "y.npy"),
                                   "validation_fraction": 0.2},
                          "optimizer": {"method": "adam", "learning_rate": 0.05},
                          "run": {"global_batch": 32, "epochs": 4, "health_every": 2,  # 120 rows: 3 steps an epoch
                                  "best_metric": "validation.loss", "workdir": str(folder / "run"), **run}})


def _diabetes_job(folder: Path, **run):
    X, y = load_diabetes(return_X_y=True)  # scikit-learn's bundled copy of Efron et al. 2004's data
    np.save(folder / "x.npy", X)
    np.save(folder / "y.npy", (y - y.mean()) / y.std())
    return job_from_dict({"model": {"layers": [10, 8, 1], "activation": "relu", "loss": "squared_error",
                                    "dtype": "float64"},
                          "data": {"inputs": str(folder / "x.npy"), "targets": str(folder / "y.npy"),
                                   "validation_fraction": 0.2},
                          "optimizer": {"method": "sgd", "learning_rate": 0.01},
                          "run": {"global_batch": 64, "epochs": 4, "health_every": 3, "workdir": str(folder / "run"),
                                  **run}})


def _records(path: Path) -> list[dict]:
    return [json.loads(line) for line in path.read_text().splitlines()]


def _last_per_epoch(records: list[dict]) -> dict[int, dict]:
    """epoch → its last epoch record in file order (a resumed run's record of an epoch replaces the earlier)."""
    return {r["epoch"]: r for r in records if r["kind"] == "epoch"}


@pytest.fixture(scope="module")
def iris_run(tmp_path_factory) -> Path:
    from shardmill.training.loop import train

    folder = tmp_path_factory.mktemp("iris")
    train(_iris_job(folder), progress=False)
    return folder / "run"


def test_each_figure_is_a_png_drawing_the_records_of_metrics_jsonl(iris_run, tmp_path, capsys):
    workdir = tmp_path / "run"
    shutil.copytree(iris_run, workdir)
    assert cmd_curves(argparse.Namespace(source=workdir, out_dir=None)) == 0
    out = workdir / "curves"  # the default folder: beside metrics.jsonl
    names = ["loss.png", "accuracy.png", "throughput.png", "phases.png", "learning_rate.png", "health.png"]
    printed = capsys.readouterr().out.splitlines()
    assert printed == [f"wrote {out / name}" for name in [*names, "curves.json"]]  # one line per file
    drawn = json.loads((out / "curves.json").read_text())["figures"]
    assert sorted(drawn) == sorted(names)
    for name in names:
        assert (out / name).read_bytes()[:8] == PNG_SIGNATURE
        image = matplotlib.image.imread(out / name)  # decoded by matplotlib's PNG reader (Pillow)
        panels = len(drawn[name]["panels"])
        # 6.4 in wide at 100 dpi; 3.2 in high for one panel, 2.4 in per panel for several. common practice
        assert image.shape == (320 if panels == 1 else 240 * panels, 640, 4)
        assert image[..., :3].std() > 0.05  # not a blank canvas

    records = _records(workdir / "metrics.jsonl")
    epochs = _last_per_epoch(records)
    numbers = sorted(epochs)
    assert numbers == [1, 2, 3, 4]
    loss = drawn["loss.png"]["panels"]["loss"]["series"]
    assert loss["train"] == {"x": numbers, "y": [epochs[e]["train"]["loss"] for e in numbers]}
    assert loss["validation"] == {"x": numbers, "y": [epochs[e]["validation"]["loss"] for e in numbers]}
    accuracy = drawn["accuracy.png"]["panels"]["accuracy"]["series"]
    assert accuracy["train"]["y"] == [epochs[e]["train"]["accuracy"] for e in numbers]
    assert accuracy["validation"]["y"] == [epochs[e]["validation"]["accuracy"] for e in numbers]
    assert drawn["throughput.png"]["panels"]["samples_per_s"]["series"] == {
        "P = 1": {"x": numbers, "y": [epochs[e]["samples_per_s"] for e in numbers]}}
    phases = drawn["phases.png"]["panels"]["phase_seconds_max"]["series"]
    assert set(phases) == {*epochs[1]["phase_seconds_max"], "epoch wall clock"}
    for phase in epochs[1]["phase_seconds_max"]:
        assert phases[phase]["y"] == [epochs[e]["phase_seconds_max"][phase] for e in numbers]
    assert phases["epoch wall clock"]["y"] == [epochs[e]["seconds"] for e in numbers]
    assert drawn["learning_rate.png"]["panels"]["learning_rate"]["series"]["learning rate"]["y"] == \
        [epochs[e]["learning_rate"] for e in numbers]

    health = [r for r in records if r["kind"] == "health"]
    assert [r["step"] for r in health] == [2, 4, 6, 8, 10, 12]  # health_every = 2 over 12 steps. common practice
    panels = drawn["health.png"]["panels"]
    assert set(panels) == {"grad_norm", "update_ratio", "saturated_fraction"}  # tanh: saturation, no dead units
    for key in panels:
        for layer in {layer["layer"] for r in health for layer in r["layers"] if key in layer}:
            assert panels[key]["series"][f"layer {layer}"] == {
                "x": [r["step"] for r in health],
                "y": [next(x[key] for x in r["layers"] if x["layer"] == layer) for r in health]}

    # The best epoch: the lowest validation loss, the first of equals (np.argmin); nothing later beat it by
    # more than run.min_improvement = 0. common practice
    validation = [epochs[e]["validation"]["loss"] for e in numbers]
    best = int(np.argmin(validation))
    assert epochs[4]["best"]["epoch"] == numbers[best]
    assert drawn["loss.png"]["panels"]["loss"]["markers"] == [
        {"kind": "best", "metric": "validation.loss", "x": numbers[best], "y": validation[best]}]
    assert drawn["accuracy.png"]["panels"]["accuracy"]["markers"] == []  # the marker sits on the watched metric


def test_a_regression_draws_rmse_and_marks_the_early_stop(iris_run, tmp_path):
    from shardmill.training.loop import train

    out = tmp_path / "curves"
    draw_curves(iris_run, out)  # a classification drawing first: its accuracy.png must not survive the next
    # patience 1 with an improvement no value can make: epoch 1 is the best, epoch 2 is stale and ends the run
    train(_diabetes_job(tmp_path, best_metric="validation.rmse", patience=1, min_improvement=1e9), progress=False)
    records = _records(tmp_path / "run" / "metrics.jsonl")
    stops = [r for r in records if r["kind"] == "early_stop"]
    assert len(stops) == 1 and stops[0]["epoch"] == 2 and stops[0]["best_epoch"] == 1
    written = draw_curves(tmp_path / "run" / "metrics.jsonl", out)
    assert sorted(p.name for p in written) == ["curves.json", "health.png", "learning_rate.png", "loss.png",
                                               "phases.png", "rmse.png", "throughput.png"]
    assert not (out / "accuracy.png").exists()
    drawn = json.loads((out / "curves.json").read_text())["figures"]
    epochs = _last_per_epoch(records)
    assert sorted(epochs) == [1, 2]
    rmse = drawn["rmse.png"]["panels"]["rmse"]
    assert rmse["series"]["validation"] == {"x": [1, 2], "y": [epochs[e]["validation"]["rmse"] for e in (1, 2)]}
    stop = {"kind": "early_stop", "x": 2, "metric": "validation.rmse", "patience": 1}
    assert rmse["markers"] == [{"kind": "best", "metric": "validation.rmse", "x": 1,
                                "y": epochs[1]["validation"]["rmse"]}, stop]
    assert drawn["loss.png"]["panels"]["loss"]["markers"] == [stop]
    assert set(drawn["health.png"]["panels"]) == {"grad_norm", "update_ratio", "dead_fraction"}  # relu


def test_a_resumed_run_draws_each_epoch_once_from_its_latest_record(tmp_path, monkeypatch):
    from shardmill.training import loop as trainer_module

    # 442 − ⌊0.2·442⌋ = 354 training rows, G = 64: 5 steps an epoch
    job = _diabetes_job(tmp_path, save_every=4, health_every=1)
    real_step = trainer_module.Trainer.step

    def step(self, epoch, in_epoch):  # the run dies in step 8, after the records of epoch 1; checkpoint: step 4
        if self.step_count == 7:
            raise RuntimeError("stopped in step 8")
        real_step(self, epoch, in_epoch)

    monkeypatch.setattr(trainer_module.Trainer, "step", step)
    with pytest.raises(RuntimeError, match="step 8"):
        trainer_module.train(job, progress=False)
    monkeypatch.undo()
    trainer_module.train(job, resume=True, progress=False)  # from step 4: epoch 1 (steps 1-5) again
    records = _records(tmp_path / "run" / "metrics.jsonl")
    first = [r for r in records if r["kind"] == "epoch" and r["epoch"] == 1]
    assert len(first) == 2 and first[0]["train"]["loss"] != first[1]["train"]["loss"]  # 5 steps, then 1
    epochs = _last_per_epoch(records)
    metrics = read_metrics(tmp_path / "run")
    assert [r["epoch"] for r in metrics["epochs"]] == sorted(epochs) == [1, 2, 3, 4]
    assert any("resumed from step 4" in note for note in metrics["notes"])
    out = tmp_path / "curves"
    draw_curves(tmp_path / "run", out)
    drawn = json.loads((out / "curves.json").read_text())["figures"]
    assert drawn["loss.png"]["panels"]["loss"]["series"]["train"] == {
        "x": [1, 2, 3, 4], "y": [epochs[e]["train"]["loss"] for e in (1, 2, 3, 4)]}
    steps = drawn["health.png"]["panels"]["grad_norm"]["series"]["layer 0"]["x"]
    assert steps == list(range(1, 21))  # steps 5-7 of the first try were retrained: each drawn once
    latest = {r["step"]: r for r in records if r["kind"] == "health"}
    assert drawn["health.png"]["panels"]["grad_norm"]["series"]["layer 0"]["y"] == \
        [latest[s]["layers"][0]["grad_norm"] for s in steps]
    # Without its run-start records (a file from before they were written) the later record still wins.
    bare = tmp_path / "bare.jsonl"
    bare.write_text("".join(json.dumps(r) + "\n" for r in records if r["kind"] != "start"))
    metrics = read_metrics(bare)
    assert metrics["epochs"] == [epochs[e] for e in (1, 2, 3, 4)] and metrics["notes"] == []
    assert metrics["health"] == [latest[s] for s in steps]


def test_a_torn_last_line_is_skipped_with_a_note(iris_run, tmp_path):
    text = (iris_run / "metrics.jsonl").read_text()
    whole = read_metrics(iris_run)
    torn = tmp_path / "torn.jsonl"
    last = text.splitlines()[-1]
    torn.write_text(text + last[: len(last) // 2])  # a run ended in the middle of writing a record
    metrics = read_metrics(torn)
    assert metrics["epochs"] == whole["epochs"] and metrics["health"] == whole["health"]
    line = len(text.splitlines()) + 1
    assert metrics["notes"] == [f"line {line} (the last) is incomplete and was skipped: the run ended while "
                                f"writing it"]
    # A resume appends its first record to the torn line: that record is read, the torn part skipped.
    start = next(line for line in text.splitlines() if json.loads(line)["kind"] == "start")
    resumed = json.loads(start) | {"resumed_from_step": 6}
    torn.write_text(text + last[: len(last) // 2] + json.dumps(resumed) + "\n")
    metrics = read_metrics(torn)
    assert metrics["starts"][-1] == resumed
    assert [r["epoch"] for r in metrics["epochs"]] == [1, 2]  # epochs 3 and 4 ended past step 6: retired
    assert any(f"line {line}: an incomplete record" in note for note in metrics["notes"])


def test_a_missing_source_or_one_without_epochs_is_one_clear_error(iris_run, tmp_path):
    with pytest.raises(JobError, match="`RUN` .*nowhere.* does not exist"):
        read_metrics(tmp_path / "nowhere")
    with pytest.raises(JobError, match="holds no metrics.jsonl"):
        draw_curves(tmp_path, tmp_path / "curves")
    only = tmp_path / "metrics.jsonl"
    lines = (iris_run / "metrics.jsonl").read_text().splitlines()
    only.write_text("\n".join(line for line in lines if json.loads(line)["kind"] != "epoch") + "\n")
    with pytest.raises(JobError, match="holds no epoch records"):
        read_metrics(only)
    only.write_text("")
    with pytest.raises(JobError, match=r"holds no epoch records \(0 line"):
        read_metrics(tmp_path)
    assert not (tmp_path / "curves").exists()  # refused before anything is written


def test_the_curves_command_refuses_a_missing_source_in_one_line(tmp_path):
    from helpers import run_cli

    proc = run_cli(["curves", str(tmp_path / "nowhere")])
    assert proc.returncode == 2 and "Traceback" not in proc.stderr  # a user error: one line, exit 2
    assert "does not exist" in proc.stderr and len(proc.stderr.strip().splitlines()) == 1


def test_lines_beyond_any_axis_or_parser_are_skipped_with_a_note_each(iris_run, tmp_path):
    from helpers import run_cli

    text = (iris_run / "metrics.jsonl").read_text()
    whole = read_metrics(iris_run)
    epoch = next(json.loads(line) for line in text.splitlines() if json.loads(line)["kind"] == "epoch")
    hostile = [
        json.dumps(epoch | {"epoch": 10**400}),  # Python's json reads any integer exactly; float() of it overflows
        "[" * 100_000 + "]" * 100_000,  # nested deeper than Python's recursion limit (1000 by default)
        json.dumps({"kind": "health", "step": -(10**30), "layers": [{"layer": 0, "grad_norm": 1.0}]}),
        json.dumps(epoch | {"epoch": 9, "samples_per_s": 10**400}),  # a value beyond float64: drawn as a gap
    ]
    source = tmp_path / "metrics.jsonl"
    source.write_text(text + "\n".join(hostile) + "\n")
    first = len(text.splitlines()) + 1
    metrics = read_metrics(source)
    assert metrics["notes"] == [f"line {first} (epoch record) was skipped: its epoch 100000000000… (401 digits) is "
                                f"beyond ±2**53",
                                f"line {first + 1} is not a JSON object and was skipped",
                                f"line {first + 2} (health record) was skipped: its step -100000000000… (31 digits) "
                                f"is beyond ±2**53"]
    assert metrics["epochs"] == [*whole["epochs"], epoch | {"epoch": 9, "samples_per_s": 10**400}]
    assert metrics["health"] == whole["health"]
    proc = run_cli(["curves", str(source), "--out-dir", str(tmp_path / "curves")])
    assert proc.returncode == 0 and "Traceback" not in proc.stderr, proc.stderr[-2000:]
    assert len(proc.stderr.strip().splitlines()) == 3 and all(len(line) < 200 for line in proc.stderr.splitlines())
    drawn = json.loads((tmp_path / "curves" / "curves.json").read_text())["figures"]
    (throughput,) = drawn["throughput.png"]["panels"]["samples_per_s"]["series"].values()  # one process count
    assert throughput["x"][-1] == 9 and throughput["y"][-1] is None


@pytest.mark.parametrize("losses, log", [
    ([10.0, 1.0, 0.05], True),  # a span of 200: more than two decades
    ([10.0, 1.0, 0.2], False),  # a span of 50
    ([10.0, 1.0, 0.0], False),  # a zero has no place on a log axis
])
def test_losses_and_rmse_use_a_log_axis_when_they_span_more_than_two_decades(tmp_path, losses, log):
    records = [{"kind": "epoch", "epoch": e, "step": 3 * e, "train": {"loss": v, "rmse": 2 * v},
                "validation": {"loss": 1.5 * v, "rmse": 3 * v}} for e, v in enumerate(losses, start=1)]
    (tmp_path / "metrics.jsonl").write_text("".join(json.dumps(r) + "\n" for r in records))
    draw_curves(tmp_path, tmp_path / "curves")
    drawn = json.loads((tmp_path / "curves" / "curves.json").read_text())["figures"]
    # the rule, computed here from the records: every value > 0 and max/min > 100 (common practice)
    for key in ("loss", "rmse"):
        values = np.array([r[part][key] for r in records for part in ("train", "validation")])
        assert bool(values.min() > 0 and values.max() / values.min() > 100) is log
        assert drawn[f"{key}.png"]["panels"][key]["log"] is log
