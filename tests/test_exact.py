"""Exact reduction: final parameters are bit-for-bit identical for P = 1, 2, 3, 4 and on every rerun.

One ``mpi_scripts/ckpt_train.py`` run per P trains four configurations in-process (relu/Adam and
tanh/momentum, each in float32 and float64) for three epochs of G = 48 in chunks of 12; at P = 3 there are
4 chunks over 3 ranks, so the shares are uneven. The claim follows from the design (fixed chunks, integer
fixed-point sums are associative); the checks compare SHA-256 digests of the raw parameter bytes.
"""

from __future__ import annotations

import hashlib
import json
from pathlib import Path

import numpy as np
import pytest
from helpers import epoch_metrics, make_classification, run_cli, run_mpi, write_job
from shardmill.config import job_from_dict
from shardmill.errors import JobError
from shardmill.model.mlp import model_from_job

pytestmark = pytest.mark.mpi

SCRIPTS = Path(__file__).parent / "mpi_scripts"
G, CHUNK, EPOCHS = 48, 12, 3  # 240 rows, 20 % validation: 192 training rows, 4 steps per epoch
MODELS = {
    "relu_adam": ({"layers": [6, 16, 8, 3], "activation": "relu"},
                  {"method": "adam", "learning_rate": 0.01, "schedule": "cosine", "warmup": 2}),
    "tanh_momentum": ({"layers": [6, 12, 3], "activation": "tanh"},
                      {"method": "momentum", "learning_rate": 0.05, "momentum": 0.9}),
}
CONFIGS = [f"{m}_{d}" for m in MODELS for d in ("float32", "float64")]


def tables(data: Path, config: str, reduction: str, workdir: Path) -> dict:
    model_name, dtype = config.rsplit("_", 1)
    model, optimizer = MODELS[model_name]
    return {"model": {**model, "loss": "softmax_cross_entropy", "dtype": dtype},
            "data": {"inputs": str(data / "x.npy"), "targets": str(data / "y.npy"), "validation_fraction": 0.2},
            "optimizer": optimizer,
            "run": {"epochs": EPOCHS, "global_batch": G, "seed": 4, "reduction": reduction, "exact_chunk": CHUNK,
                    "workdir": str(workdir)}}


def final_digest(workdir: Path, n_layers: int) -> str:
    """SHA-256 over W0, b0, W1, b1, … of final.npz, read with numpy alone."""
    digest = hashlib.sha256()
    with np.load(workdir / "final.npz", allow_pickle=False) as archive:
        for l in range(n_layers):
            digest.update(archive[f"W{l}"].tobytes())
            digest.update(archive[f"b{l}"].tobytes())
    return digest.hexdigest()


@pytest.fixture(scope="module")
def data_dir(tmp_path_factory) -> Path:
    path = tmp_path_factory.mktemp("exact")
    make_classification(path, rows=240, features=6, classes=3, seed=8)
    return path


def _run(data: Path, P: int, tag: str, with_fast: bool = False) -> dict:
    runs = [{"name": c, "job": tables(data, c, "exact", data / f"{tag}-{c}")} for c in CONFIGS]
    if with_fast:
        runs += [{"name": f"fast_{c}", "job": tables(data, c, "fast", data / f"{tag}-fast-{c}")} for c in CONFIGS]
    spec = data / f"spec-{tag}.json"
    spec.write_text(json.dumps({"base": str(data), "runs": runs}))
    out = data / f"out-{tag}.json"
    proc = run_mpi(P, [str(SCRIPTS / "ckpt_train.py"), str(spec), str(out)], timeout=180)
    assert proc.returncode == 0, proc.stderr[-3000:]
    result = json.loads(out.read_text())
    assert result["processes"] == P
    return result["runs"]


@pytest.fixture(scope="module")
def runs(data_dir: Path) -> dict[str, dict]:
    """{"p1": …, "p2": …, "p3": …, "p4": …, "p3-again": …}: per configuration, steps and per-rank digests."""
    out = {f"p{P}": _run(data_dir, P, f"p{P}", with_fast=P == 1) for P in (1, 2, 3, 4)}
    out["p3-again"] = _run(data_dir, 3, "p3-again")
    return out


@pytest.mark.parametrize("config", CONFIGS)
def test_final_parameters_identical_for_every_process_count(runs: dict, data_dir: Path, config: str) -> None:
    digests = set()
    for tag in ("p1", "p2", "p3", "p4"):
        run = runs[tag][config]
        assert run["steps"] == EPOCHS * 4
        assert len(set(run["sha256_by_rank"])) == 1  # every rank holds the same bits
        digests.add(run["sha256_by_rank"][0])
    assert len(digests) == 1, f"{config}: {len(digests)} different results over P = 1..4"
    # final.npz written by rank 0 holds the same bits for every P as well.
    n_layers = len(MODELS[config.rsplit("_", 1)[0]][0]["layers"]) - 1
    assert len({final_digest(data_dir / f"{tag}-{config}", n_layers) for tag in ("p1", "p2", "p3", "p4")}) == 1



@pytest.mark.parametrize("config", CONFIGS)
def test_logged_losses_and_accuracies_identical_for_every_process_count(runs: dict, data_dir: Path,
                                                                         config: str) -> None:
    """Exact mode sums loss values exactly too (README, fast and exact reduction): the log does not depend on P.

    The floats are compared with ==, not a tolerance: a fast float sum over P-dependent groups of rows differs
    in the last bits from one P to another.
    """
    logs = [epoch_metrics(data_dir / f"{tag}-{config}") for tag in ("p1", "p2", "p3", "p4")]
    assert len(logs[0]) == EPOCHS and all(0 < e["train"]["loss"] < 5 for e in logs[0])
    for P, log in zip((2, 3, 4), logs[1:], strict=True):
        assert log == logs[0], f"{config}: P = {P} logged {log} against P = 1 {logs[0]}"

@pytest.mark.parametrize("config", CONFIGS)
def test_rerun_gives_the_same_digest(runs: dict, config: str) -> None:
    assert runs["p3-again"][config]["sha256_by_rank"] == runs["p3"][config]["sha256_by_rank"]


@pytest.mark.parametrize("config", CONFIGS)
def test_exact_training_matches_fast_training_up_to_rounding(runs: dict, data_dir: Path, config: str) -> None:
    """Exact summation changes only the rounding of each gradient, not the training (common practice)."""
    n_layers = len(MODELS[config.rsplit("_", 1)[0]][0]["layers"]) - 1
    dtype = config.rsplit("_", 1)[1]
    with np.load(data_dir / f"p1-{config}" / "final.npz", allow_pickle=False) as exact, \
            np.load(data_dir / f"p1-fast-{config}" / "final.npz", allow_pickle=False) as fast:
        for name in [f"{k}{l}" for l in range(n_layers) for k in ("W", "b")]:
            assert exact[name].dtype == np.dtype(dtype)
            tol = 1e-5 if dtype == "float32" else 1e-12
            np.testing.assert_allclose(exact[name], fast[name], rtol=0, atol=tol, err_msg=name)
    # …and the training did move the parameters (so equality above is not trivially true).
    with np.load(data_dir / f"p1-{config}" / "final.npz", allow_pickle=False) as exact:
        start = job_from_dict(tables(data_dir, config, "exact", data_dir / "unused"))
        initial = model_from_job(start)
        assert np.abs(exact["W0"] - initial.weights[0]).max() > 1e-3


def test_batch_not_a_multiple_of_the_chunk_is_refused(data_dir: Path) -> None:
    raw = tables(data_dir, "relu_adam_float32", "exact", data_dir / "bad-chunk")
    raw["run"]["global_batch"] = 50
    with pytest.raises(JobError, match=r"`run.global_batch` must be a multiple of `run.exact_chunk` = 12"):
        job_from_dict(raw)
    folder = data_dir / "bad-chunk-job"
    folder.mkdir()
    job = write_job(folder, raw["model"], raw["run"], raw["optimizer"], raw["data"])
    proc = run_cli(["train", str(job), "--no-progress"], timeout=60)
    assert proc.returncode == 2  # user errors exit 2 without a traceback (DEVELOPERS.md, conventions)
    assert "must be a multiple of `run.exact_chunk` = 12" in proc.stderr and "got 50" in proc.stderr
    assert "Traceback" not in proc.stderr


def test_more_processes_than_chunks_is_refused(data_dir: Path) -> None:
    raw = tables(data_dir, "tanh_momentum_float64", "exact", data_dir / "few-chunks")
    raw["run"]["global_batch"] = 24  # 2 chunks of 12 for 4 processes
    folder = data_dir / "few-chunks-job"
    folder.mkdir()
    job = write_job(folder, raw["model"], raw["run"], raw["optimizer"], raw["data"])
    proc = run_mpi(4, ["-m", "shardmill", "train", str(job), "--no-progress"], timeout=120)
    assert proc.returncode == 2, proc.stderr[-3000:]
    assert "needs at least one chunk per process" in proc.stderr and "2 chunks < 4 processes" in proc.stderr
    assert proc.stderr.count("needs at least one chunk") == 1  # printed once, by rank 0
    assert "Traceback" not in proc.stderr
    assert not (data_dir / "few-chunks" / "final.npz").exists()
