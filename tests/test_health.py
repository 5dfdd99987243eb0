"""Training-health diagnostics: a deliberately saturated sigmoid network is flagged, a healthy one is not."""

from __future__ import annotations

import numpy as np
from shardmill.commands.bench import synthetic_dataset
from shardmill.config import job_from_dict
from shardmill.training.health import SATURATION_Z, HealthWatch, warnings
from shardmill.training.trainer import Trainer


def _watched_step(trainer: Trainer, watch: HealthWatch, step_in_epoch: int) -> None:
    """One step with the diagnostics the run loop takes around it (training/loop.py)."""
    watch.before_step(trainer)
    trainer.step(0, step_in_epoch)
    watch.after_step(trainer)


def _trainer(activation: str, scale: float) -> Trainer:
    layers = [20, 64, 64, 4]
    job = job_from_dict({"model": {"layers": layers, "activation": activation, "dtype": "float64"},
                         "optimizer": {"method": "sgd", "learning_rate": 0.01},
                         "run": {"global_batch": 64, "health_every": 1, "seed": 3}})
    trainer = Trainer(job, dataset=synthetic_dataset(layers, "softmax_cross_entropy", 256, "float64", seed=1))
    for w in trainer.model.weights:
        w *= scale
    trainer.health = HealthWatch(job.run.health_every)  # the test keeps the watch beside the trainer it watches
    _watched_step(trainer, trainer.health, 0)
    return trainer


def test_saturated_sigmoid_network_is_flagged() -> None:
    trainer = _trainer("sigmoid", scale=40.0)
    record = trainer.health.records[-1]
    hidden = record["layers"][:2]
    # Independent count: |z| > 4 on the stored pre-activations of the batch (σ'(4) ≈ 0.018, common practice).
    Z = trainer.ws.Z[0][:64]
    assert np.isclose(hidden[0]["saturated_fraction"], np.mean(np.abs(Z) > SATURATION_Z))
    assert hidden[0]["saturated_fraction"] > 0.8
    texts = warnings(record)
    assert any("layer 0 (sigmoid)" in t and "saturated" in t for t in texts)


def test_healthy_network_stays_quiet() -> None:
    trainer = _trainer("sigmoid", scale=1.0)
    record = trainer.health.records[-1]
    assert record["layers"][0]["saturated_fraction"] < 0.05
    assert warnings(record) == []


def test_dead_relu_units_and_update_ratio() -> None:
    trainer = _trainer("relu", scale=1.0)
    trainer.model.biases[0][:32] = -1e6  # half of layer 0's units can never fire
    _watched_step(trainer, trainer.health, 1)
    record = trainer.health.records[-1]
    assert record["layers"][0]["dead_fraction"] >= 0.5
    # update ratio = ‖Δθ‖/‖θ‖; for plain SGD Δθ = −lr·g (Robbins & Monro form), so ratio = lr·‖g‖/‖θ‖.
    layer = record["layers"][2]
    assert np.isclose(layer["update_ratio"], 0.01 * layer["grad_norm"] / layer["param_norm"], rtol=1e-6)


def test_vanishing_gradient_warns() -> None:
    record = {"step": 5, "layers": [{"layer": 0, "grad_norm": 1e-12, "param_norm": 3.0, "update_ratio": 0.0}]}
    assert any("vanishing" in t for t in warnings(record))
