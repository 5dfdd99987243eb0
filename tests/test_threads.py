"""Threads inside a rank (``run.threads``): exact mode's bits do not depend on T; fast mode agrees within a bound.

Exact mode: one ``mpi_scripts/ckpt_train.py`` run per P (1, 2) trains each configuration at T = 1, 2 and 3 (3 is
oversubscribed on a 2-core machine) through ``train`` as ``shardmill train`` does; the final parameters' SHA-256
must be one value per configuration over every P × T. The model's first layer takes 784 inputs in chunks of 32
rows: OpenBLAS 0.3.31 sums that GEMM (32×784 by 784×64) in another order with 2 threads than with 1, so the check
fails unless the threads take whole chunks (``training/lanes.py``) with BLAS at one thread.
"""

from __future__ import annotations

import json
from pathlib import Path

import numpy as np
import pytest
from helpers import epoch_metrics, make_classification, run_mpi
from shardmill.config import job_from_dict
from shardmill.parallel.comm import Comm
from shardmill.training.trainer import Trainer
from shardmill.training.verify import compare, format_report, serial_gradient, verify
from threadpoolctl import threadpool_limits

SCRIPTS = Path(__file__).parent / "mpi_scripts"
THREADS = (1, 2, 3)
CONFIGS = {  # name: (dtype, optimizer, run)
    "adam_clip_sharded_f32": ("float32", {"method": "adam", "learning_rate": 0.01, "clip_global_norm": 0.5},
                              {"update": "sharded"}),
    "momentum_clip_f64": ("float64", {"method": "momentum", "learning_rate": 0.05, "clip_global_norm": 0.5},
                          {"update": "replicated"}),
    "adam_compact_f32": ("float32", {"method": "adam", "learning_rate": 0.01}, {"exact_format": "compact"}),
}


def job_tables(data: Path, dtype: str, optimizer: dict, run: dict, threads: int, workdir: Path,
               reduction: str = "exact") -> dict:
    return {"model": {"layers": [784, 64, 10], "activation": "relu", "loss": "softmax_cross_entropy",
                      "dtype": dtype},
            "data": {"inputs": str(data / "x.npy"), "targets": str(data / "y.npy"), "validation_fraction": 0.2},
            "optimizer": optimizer,
            "run": {"epochs": 2, "global_batch": 128, "exact_chunk": 32, "seed": 3, "reduction": reduction,
                    "threads": threads, "workdir": str(workdir), **run}}


@pytest.fixture(scope="module")
def data_dir(tmp_path_factory) -> Path:
    path = tmp_path_factory.mktemp("threads")
    make_classification(path, rows=400, features=784, classes=10, seed=5, dtype=np.float32)
    return path


def train_all(data: Path, P: int) -> dict:
    runs = [{"name": f"{name}_t{T}", "job": job_tables(data, *CONFIGS[name], T, data / f"p{P}-{name}-t{T}")}
            for name in CONFIGS for T in THREADS]
    spec = data / f"spec-p{P}.json"
    spec.write_text(json.dumps({"base": str(data), "runs": runs}))
    out = data / f"out-p{P}.json"
    proc = run_mpi(P, [str(SCRIPTS / "ckpt_train.py"), str(spec), str(out)], timeout=240)
    assert proc.returncode == 0, proc.stderr[-3000:]
    return json.loads(out.read_text())["runs"]


@pytest.mark.mpi
def test_exact_mode_has_the_same_bits_for_every_thread_and_process_count(data_dir: Path) -> None:
    results = {P: train_all(data_dir, P) for P in (1, 2)}
    for name in CONFIGS:
        digests = {(P, T): results[P][f"{name}_t{T}"]["sha256_by_rank"] for P in (1, 2) for T in THREADS}
        for (P, T), by_rank in digests.items():
            assert len(set(by_rank)) == 1, (name, P, T)  # every rank holds the same parameters
            assert results[P][f"{name}_t{T}"]["steps"] == 4
        # exact mode's promise (this project's design: fixed chunks, integer sums), now over P × T
        assert len({by_rank[0] for by_rank in digests.values()}) == 1, (name, digests)
        logs = [epoch_metrics(data_dir / f"p{P}-{name}-t{T}") for P in (1, 2) for T in THREADS]
        assert len(logs[0]) == 2 and all(0 < e["train"]["loss"] < 10 for e in logs[0])
        assert all(log == logs[0] for log in logs[1:]), name  # compared with ==: exact sums, the same bits


def test_fast_mode_across_threads_is_within_the_verify_bound(data_dir: Path, tmp_path: Path) -> None:
    """One fast-mode gradient with BLAS at 1 and at 2 threads, whose GEMMs sum in other orders: both are sums of
    the same G terms, so they differ by at most 2·γ_{G−1}·Σ|x_i| per element (Higham 2002, §4.2; ``verify``'s
    bound and comparison), the forward pass's own reordering being of the same order."""
    job = job_from_dict(job_tables(data_dir, "float32", {"method": "adam"}, {}, 2, tmp_path, reduction="fast"),
                        base=str(data_dir))
    trainer = Trainer(job, Comm())
    rows = trainer.sampler.batch(0, 0)
    gradients = []
    for threads in (1, 2):
        with threadpool_limits(limits=threads, user_api="blas"):
            trainer.timer.start()
            gradients.append(trainer.gradient(rows).copy())
    assert not np.array_equal(gradients[0], gradients[1])  # the threaded GEMM did sum in another order
    _, abs_sums = serial_gradient(trainer, rows)
    report = compare(trainer.model, gradients[1], gradients[0], abs_sums, rows.size)
    assert max(row["bound_ratio"] for row in report) <= 1.0, report


def test_verify_compares_a_threaded_layout_and_names_it(data_dir: Path, tmp_path: Path) -> None:
    """`shardmill verify` with `run.threads = 2` checks the 1×2 layout's gradient (BLAS and kernels on two
    threads) against the serial float64 one within Higham's bound (2002, §4.2), and says which layout it compared."""
    tables = job_tables(data_dir, "float32", {"method": "adam"}, {}, 2, tmp_path / "run", reduction="fast")
    tables["model"]["layers"] = [784, 512, 10]  # 128·784·512 multiply-adds: large enough for threads
    report = verify(job_from_dict(tables, base=str(data_dir)), batches=1)
    assert report["threads"] == 2 and report["threads_used"] == 2
    assert report["verdict"] == "agree" and report["max_bound_ratio"] > 0  # compared, and not trivially equal
    assert format_report(report).startswith("verify: 1 process(es) × 2 thread(s), G = 128")


@pytest.mark.parametrize("exact_format", ["wide", "narrow"])
def test_lanes_give_the_one_thread_gradient_with_norm_dropout_and_skips(data_dir: Path, tmp_path: Path,
                                                                        exact_format: str) -> None:
    """In one process: three exact steps with T = 1 and with T = 3 lanes (4 chunks of 4 rows: a wave of 3, then
    a short one of 1), a model with layer norm, dropout and a residual skip, the same bits. BLAS at one thread (the
    test process's) for both."""
    runs = {}
    for threads in (1, 3):
        tables = job_tables(data_dir, "float32", {"method": "adam"}, {"exact_format": exact_format}, threads,
                            tmp_path / f"t{threads}")
        tables["model"].update({"layers": [784, 24, 24, 10], "norm": "layer", "dropout": 0.2, "residual": True})
        tables["run"].update({"global_batch": 16, "exact_chunk": 4})
        trainer = Trainer(job_from_dict(tables, base=str(data_dir)), Comm())
        assert (trainer.lanes is None) == (threads == 1)
        steps = []
        for step in range(3):
            trainer.step(0, step)
            steps.append(trainer.model.params.copy())
        runs[threads] = (np.stack(steps), trainer.take_train_sums())
        trainer.close()
    assert runs[1][0].tobytes() == runs[3][0].tobytes()  # the parameters after each step
    assert runs[1][1].tobytes() == runs[3][1].tobytes()  # the metric sums, added in chunk order
