"""shardmill: data-parallel MLP training on CPUs over MPI.

Public contract::

    import shardmill as sm
    m = sm.MLP([64, 128, 10], activation="tanh", loss="softmax_cross_entropy", dtype="float64", seed=0)
    loss, grad = m.loss_and_grad(X, y)
    job = sm.load_job("job.toml"); result = sm.train(job)
    result = sm.train(sm.job_from_dict({"model": {"layers": [64, 128, 10]}}), inputs=X, targets=y, echo=True)
    predictor = result["predictor"]            # the trained model with its input standardisation
    labels = predictor.predict(X_raw)          # raw rows (n, d), as the training data held them
    predictor = sm.load_model("run/final.npz") # or best.npz, a checkpoint directory, a workdir

``sm.train(job)`` returns a dict whose ``"predictor"`` entry is a :class:`Predictor`: the final model together with
the training rows' column means and inverse standard deviations (also under ``"input_mean"`` and
``"input_inv_std"``, (d,) float64), so ``predict``, ``predict_proba`` and ``outputs`` take raw, unstandardised rows.
"""

from __future__ import annotations

import os as _os
import sys as _sys

if _os.environ.get("SHARDMILL_LAUNCHED") and _sys.argv[1:2] == ["train"]:  # a rank of `shardmill train --ranks P`
    # before the imports below (a second or more): a stop signal from here on is noted, not fatal
    from shardmill.training.signals import note_early_signals as _note_early_signals

    _note_early_signals()

from shardmill.parallel.launch import THREAD_WAITS as _THREAD_WAITS  # noqa: E402 (imports no numpy)

# idle BLAS and OpenMP threads sleep soon, set before numpy loads OpenBLAS (a value already set wins)
_os.environ.update({_name: _os.environ.get(_name, _value) for _name, _value in _THREAD_WAITS.items()})

from importlib.metadata import PackageNotFoundError, version  # noqa: E402
from typing import Any

from shardmill.config import Job, job_from_dict, load_job
from shardmill.errors import JobError
from shardmill.model.mlp import MLP
from shardmill.model.predictor import Predictor, load_model

try:
    __version__ = version("shardmill")  # pyproject.toml is the one place the version is written
except PackageNotFoundError:  # the sources imported without being installed
    __version__ = "0+unknown"
__all__ = ["MLP", "Job", "JobError", "Predictor", "job_from_dict", "load_job", "load_model", "train", "__version__"]


def train(job: Job, resume: bool | str = False, progress: bool = True, fresh: bool = False, echo: bool = False,
          inputs: Any = None, targets: Any = None, weights: Any = None) -> dict[str, Any]:
    """Train a job on every rank of MPI.COMM_WORLD (one process without a launcher); see training.loop.train.

    A workdir that holds an earlier run is refused unless ``resume`` (continue it) or ``fresh`` (clear it first);
    ``resume="auto"`` continues when the workdir holds a checkpoint and starts anew otherwise.
    ``echo``: print each epoch's line as the command line does (also into a pipe or a notebook; ``progress`` only
    draws a bar on a terminal). ``inputs`` (n, d), ``targets`` ((n,) labels or (n, k) values) and ``weights``
    ((n,) ≥ 0): the data as arrays in memory, instead of the job's `data.inputs`/`data.targets` files (which the job
    must then leave empty); every rank passes the same arrays.
    The result's ``"predictor"`` is a :class:`Predictor` of the final model (raw inputs in, see above).
    """
    from shardmill.data.dataset import Arrays
    from shardmill.training.loop import train as _train

    if (inputs is None) != (targets is None):
        raise JobError("give both `inputs` and `targets` as arrays, or neither (the job's data files)")
    arrays = None if inputs is None else Arrays(inputs, targets, weights)
    if arrays is None and weights is not None:
        raise JobError("`weights` as an array needs `inputs` and `targets` as arrays; with data files, name the "
                       "weights in `data.weights`")
    return _train(job, resume=resume, progress=progress, fresh=fresh, echo=echo, arrays=arrays)
