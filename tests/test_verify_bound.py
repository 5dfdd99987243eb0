"""``verify``'s bound pinned to its value, computed independently: 2·γ_{G−1}·Σ|x_i| per element (Higham 2002,
§4.2; γ_k = k·u / (1 − k·u), Lemma 3.1, u = 2⁻²⁴ for float32), with Σ|x_i| = |A|ᵀ|dZ| for a weight and Σ|dZ| for
a bias, A and dZ formed here in numpy float64 from the textbook backward pass of a tanh layer and softmax
cross-entropy (∂ℓ/∂z = p − onehot(y), scaled by 1/G; tanh' = 1 − tanh²). A bound made looser or tighter by any factor
(its 2, γ, the bias term) moves the ratio this test reads, so the planted mutation is caught.
"""

from __future__ import annotations

import numpy as np
import pytest
import shardmill as sm
from shardmill.parallel.comm import Comm
from shardmill.training.trainer import Trainer
from shardmill.training.verify import compare, serial_gradient
from sklearn.datasets import load_iris

G = 32


@pytest.fixture(scope="module")
def batch(tmp_path_factory) -> dict:
    folder = tmp_path_factory.mktemp("bound")
    X, y = load_iris(return_X_y=True)
    np.save(folder / "x.npy", X)
    np.save(folder / "y.npy", y)
    job = sm.job_from_dict({"model": {"layers": [4, 6, 3], "activation": "tanh", "dtype": "float32"},
                            "data": {"inputs": str(folder / "x.npy"), "targets": str(folder / "y.npy")},
                            "run": {"global_batch": G, "seed": 2, "workdir": str(folder / "run")}})
    trainer = Trainer(job, Comm.alone())
    rows = trainer.sampler.batch(0, 0)
    serial, abs_sums = serial_gradient(trainer, rows)
    data = trainer.data
    inputs = (X[rows] - data.mean) * data.inv_std  # the rows as the model reads them
    return {"trainer": trainer, "rows": rows, "serial": serial, "abs_sums": abs_sums, "inputs": inputs,
            "labels": y[rows]}


def _independent_sums(batch: dict) -> dict[str, np.ndarray]:
    """Σ|x_i| of each tensor's serial sum over the G samples, in float64 from the model's parameters."""
    model = batch["trainer"].model
    W0, b0, W1, b1 = (np.asarray(a, dtype=np.float64) for a in (model.weights[0], model.biases[0],
                                                                  model.weights[1], model.biases[1]))
    A0 = batch["inputs"].astype(np.float32).astype(np.float64)
    H = np.tanh(A0 @ W0 + b0)
    Z = H @ W1 + b1
    P = np.exp(Z - Z.max(axis=1, keepdims=True))
    P /= P.sum(axis=1, keepdims=True)
    dZ1 = (P - np.eye(3)[batch["labels"]]) / G  # ∂(mean loss)/∂z per sample
    dZ0 = (dZ1 @ W1.T) * (1.0 - H * H)
    return {"W0": np.abs(A0).T @ np.abs(dZ0), "b0": np.abs(dZ0).sum(axis=0),
            "W1": np.abs(H).T @ np.abs(dZ1), "b1": np.abs(dZ1).sum(axis=0)}


def test_the_absolute_sums_are_the_independent_ones(batch: dict) -> None:
    ours = batch["trainer"].model.named(batch["abs_sums"])
    for name, expected in _independent_sums(batch).items():
        # float32 activations in ours against float64 here: agreement to float32's few ulps, relative
        np.testing.assert_allclose(ours[name], expected, rtol=2e-4, atol=1e-12, err_msg=name)


@pytest.mark.parametrize("fraction", [0.5, 3.0])
def test_a_difference_of_a_known_fraction_of_the_bound_reads_as_that_fraction(batch: dict, fraction: float) -> None:
    model = batch["trainer"].model
    u = 2.0**-24  # float32's unit roundoff
    k = G - 1
    bound = {name: 2.0 * (k * u / (1.0 - k * u)) * sums for name, sums in _independent_sums(batch).items()}
    serial = batch["serial"].astype(np.float64)
    for name in ("W0", "b0", "W1", "b1"):
        parallel = serial.copy()
        view = model.named(parallel)[name].reshape(-1)
        j = int(np.argmax(bound[name].reshape(-1)))
        view[j] += fraction * bound[name].reshape(-1)[j]  # the difference is exactly `fraction` of the bound
        rows = {row["tensor"]: row for row in compare(model, parallel, serial, batch["abs_sums"], G)}
        assert rows[name]["bound_ratio"] == pytest.approx(fraction, rel=2e-3), name
        assert all(row["bound_ratio"] == 0.0 for tensor, row in rows.items() if tensor != name)
