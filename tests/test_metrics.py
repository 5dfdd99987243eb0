"""Logged training metrics against an independent computation: the regression RMSE of a training step.

Data: scikit-learn's bundled diabetes set (442 rows, 10 features, one target). The expected RMSE is computed here
with numpy alone from the initial weights: the network written out as tanh(X W0 + b0) W1 + b1 on the step's rows.
"""

from __future__ import annotations

import math

import numpy as np
import pytest
from shardmill.config import job_from_dict
from shardmill.trainer import Trainer
from sklearn.datasets import load_diabetes


@pytest.mark.parametrize("reduction", ["fast", "exact"])
def test_training_rmse_of_a_regression_step_is_the_rmse_of_its_batch(tmp_path, reduction):
    X, y = load_diabetes(return_X_y=True)  # scikit-learn's bundled copy of Efron et al. 2004's data
    np.save(tmp_path / "x.npy", X)
    np.save(tmp_path / "y.npy", (y - y.mean()) / y.std())
    job = job_from_dict({"model": {"layers": [10, 8, 1], "activation": "tanh", "loss": "squared_error",
                                   "dtype": "float64"},
                         "data": {"inputs": str(tmp_path / "x.npy"), "targets": str(tmp_path / "y.npy"),
                                  "validation_fraction": 0.0},
                         "optimizer": {"method": "sgd", "learning_rate": 0.01},
                         "run": {"global_batch": 64, "reduction": reduction, "exact_chunk": 16}})
    trainer = Trainer(job)
    W0, b0, W1, b1 = (trainer.model.named(trainer.model.params)[k].copy() for k in ("W0", "b0", "W1", "b1"))
    rows = trainer.sampler.batch(0, 0)
    trainer.timer.start()
    trainer.step(0, 0)
    logged = trainer.summarise(trainer.take_train_sums())["rmse"]
    inputs = (X[rows] - trainer.data.mean) * trainer.data.inv_std  # the run's own standardisation of its rows
    predicted = np.tanh(inputs @ W0 + b0) @ W1 + b1
    expected = math.sqrt(np.mean((predicted[:, 0] - trainer.data.targets[rows, 0]) ** 2))  # RMSE, common practice
    assert logged > 0.0
    assert logged == pytest.approx(expected, rel=1e-12)
