"""The exchange strategies on one process: what the step's single interface computes in each mode.

ExactSum: the gradient it leaves must be the correctly rounded sum of the chunk gradients, element by element,
whether a rank's first two chunks go into the limbs in one pass or not (1, 2 and 3 chunks). The reference is
``math.fsum`` (Python's exactly rounded floating-point sum, Shewchuk's algorithm), independent of our limbs.
MessageSum: messages are contiguous runs of whole layers in backward order that tile the gradient buffer.
Both strategies give the same gradient up to summation order as ``MLP.loss_and_grad`` on the whole batch.
"""

from __future__ import annotations

import math

import numpy as np
import pytest
from helpers import make_classification
from shardmill.config import job_from_dict
from shardmill.data.rows import take_rows
from shardmill.model.mlp import MLP
from shardmill.parallel.comm import Comm
from shardmill.parallel.ownership import Replicated
from shardmill.parallel.summation import ExactSum, MessageSum
from shardmill.training.trainer import Trainer


def trainer(folder, reduction: str, global_batch: int, chunk: int = 8, dtype: str = "float64") -> Trainer:
    make_classification(folder, rows=120, features=5, classes=3, seed=3)
    job = job_from_dict({"model": {"layers": [5, 7, 3], "activation": "tanh", "dtype": dtype},
                         "data": {"inputs": str(folder / "x.npy"), "targets": str(folder / "y.npy")},
                         "run": {"global_batch": global_batch, "reduction": reduction, "exact_chunk": chunk}})
    return Trainer(job, Comm())


@pytest.mark.parametrize("dtype", ["float32", "float64"])
@pytest.mark.parametrize("chunks", [1, 2, 3])
def test_exact_gradient_is_the_correctly_rounded_sum_of_the_chunks(tmp_path, chunks, dtype):
    t = trainer(tmp_path, "exact", global_batch=8 * chunks, dtype=dtype)
    assert isinstance(t.exchange.summation, ExactSum)
    rows = t.sampler.batch(0, 0)
    parts = []
    for part, _ in t.exchange.parts(rows):  # each chunk's gradient alone, as the step computes it
        out = np.zeros_like(t.grads)
        t.part_gradient(part, out)
        parts.append(out.astype(np.float64))
    t.timer.start()
    t.gradient(rows)
    expected = np.array([math.fsum(column) for column in np.stack(parts).T])  # Shewchuk / Python's math.fsum
    np.testing.assert_array_equal(t.grads, expected.astype(t.grads.dtype))


def test_messages_tile_the_gradient_in_backward_order_with_whole_layers():
    model = MLP([30, 40, 50, 20, 4], seed=0)
    grads = np.zeros_like(model.params)
    comm = Comm()
    exchange = MessageSum(comm, model, grads, Replicated(comm, grads.size), message_mib=0.004)  # 4000 bytes: several
    starts = [start for start, _ in exchange.messages]
    stops = [stop for _, stop in exchange.messages]
    assert starts[0] == 0 and stops[-1] == grads.size and starts[1:] == stops[:-1]  # contiguous, tiling
    layer_ends = {model.slices[l][1] for l in range(model.n_layers)}
    assert set(stops) <= layer_ends  # a message ends where a layer ends: whole layers only
    for start, stop in exchange.messages[:-1]:
        assert (stop - start) * grads.itemsize >= 4000  # only the last (first layer's) message may be smaller


@pytest.mark.parametrize("reduction", ["fast", "exact"])
def test_strategy_gradient_matches_the_whole_batch_gradient(tmp_path, reduction):
    t = trainer(tmp_path, reduction, global_batch=24)
    rows = t.sampler.batch(0, 0)
    t.timer.start()
    t.gradient(rows)
    X = np.zeros((rows.size, 5))
    take_rows(t.data.X, rows, t.data.mean, t.data.inv_std, X)
    _, whole = t.model.loss_and_grad(X, t.data.targets[rows])  # one serial pass over all rows
    np.testing.assert_allclose(t.grads, whole, rtol=1e-12, atol=1e-15)  # float64: summation order only


@pytest.mark.parametrize("processes", [1, 2, 3, 4, 16])
def test_owned_slices_tile_the_parameters_in_whole_blocks(processes):
    from shardmill.parallel.ownership import BLOCK, owner_bounds

    n = 784 * 1024 + 1024 + 1024 * 1024 + 1024 + 1024 * 10 + 10  # the mid model, 1 863 690 parameters
    bounds = owner_bounds(n, processes)
    assert bounds[0][0] == 0 and bounds[-1][1] == n
    assert all(a[1] == b[0] for a, b in zip(bounds, bounds[1:], strict=False))  # contiguous, in rank order
    assert all(lo % BLOCK == 0 for lo, _ in bounds)  # exact mode's clip blocks never straddle two ranks
    # Optimizer state per rank under a sharded update: 1/P of it, give or take one block (issue target at P = 4:
    # at most 0.3 of the state at P = 1).
    largest = max(hi - lo for lo, hi in bounds)
    assert largest <= n / processes + BLOCK
    if processes == 4:
        assert largest / n <= 0.3
