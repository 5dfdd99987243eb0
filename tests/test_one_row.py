"""A batch of one row is legitimate SGD: a global batch of 1, a shard of one row, an exact chunk of one row.

The kernel warm-up once copied two rows into a one-row workspace: the row kernel, which does not check bounds,
wrote past the buffer and corrupted the heap (glibc aborted the run, or a rank died). Reference: the exactness
model (the same bits for every process count) and the runs' own exit status.
"""

from __future__ import annotations

import hashlib

import numpy as np
import pytest
from helpers import run_cli, run_mpi, write_job
from shardmill.data.rows import take_rows


@pytest.fixture()
def data(tmp_path):
    rng = np.random.default_rng(0)
    np.save(tmp_path / "x.npy", rng.normal(size=(50, 4)))
    np.save(tmp_path / "y.npy", rng.integers(0, 3, size=50))
    return tmp_path


def _job(folder, run: dict):
    return write_job(folder, {"layers": [4, 5, 3], "activation": "tanh", "dtype": "float64"},
                     {"epochs": 1, "seed": 1, **run}, optimizer={"method": "sgd", "learning_rate": 0.05},
                     data={"inputs": "x.npy", "targets": "y.npy", "validation_fraction": 0.2})


def _digest(folder) -> str:
    with np.load(folder / "run" / "final.npz", allow_pickle=False) as saved:
        return hashlib.sha256(b"".join(saved[k].tobytes() for k in ("W0", "b0", "W1", "b1"))).hexdigest()


def test_a_global_batch_of_one_row_trains(data) -> None:
    done = run_cli(["train", str(_job(data, {"global_batch": 1})), "--no-progress"], cwd=data)
    assert done.returncode == 0, done.stderr  # was: "munmap_chunk(): invalid pointer", exit −6


@pytest.mark.mpi
def test_a_shard_of_one_row_trains(data) -> None:
    done = run_mpi(2, ["-m", "shardmill", "train", str(_job(data, {"global_batch": 3})), "--no-progress"], cwd=data)
    assert done.returncode == 0, done.stderr


@pytest.mark.mpi
def test_exact_chunks_of_one_row_give_the_same_bits_for_every_process_count(data) -> None:
    digests = set()
    for P in (1, 3):
        folder = data / f"p{P}"
        folder.mkdir()
        for name in ("x.npy", "y.npy"):
            (folder / name).write_bytes((data / name).read_bytes())
        job = _job(folder, {"global_batch": 4, "reduction": "exact", "exact_chunk": 1})
        done = run_mpi(P, ["-m", "shardmill", "train", str(job), "--no-progress"], cwd=folder)
        assert done.returncode == 0, done.stderr
        digests.add(_digest(folder))
    assert len(digests) == 1  # the exactness model: fixed chunks, exact sums, whatever P is


def test_the_row_copy_refuses_to_write_past_its_buffer() -> None:
    X = np.ones((5, 3))
    with pytest.raises(ValueError, match="do not fit a buffer of shape"):
        take_rows(X, np.arange(2), np.zeros(3), np.ones(3), np.zeros((1, 3)))
