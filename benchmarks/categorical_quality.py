"""Categorical columns on an open data set: shardmill's embeddings against a one-hot MLP of scikit-learn.

The data: the "diamonds" table that the plotting package plotnine ships (``plotnine/data/diamonds.csv``: 53,940
diamonds, price in US dollars from six numeric columns — carat, depth, table, x, y, z — and three categorical ones —
cut, color, clarity). 20 % of the rows (a seeded permutation) are held out as the test set; every model trains on
the other 80 % with the same hidden widths, batch and epochs, and is scored by scikit-learn's
``root_mean_squared_error`` on the test rows, in dollars:

* ``onehot``: scikit-learn's ``MLPRegressor`` (Adam, ReLU) on the standardised numeric columns and the three
  categorical columns one-hot encoded (``OneHotEncoder``);
* ``embeddings``: shardmill with ``data.categorical = ["cut", "color", "clarity"]`` (an embedding per column);
* ``numeric``: shardmill on the six numeric columns only — what it could do before categorical inputs.

Prints one JSON object: the three RMSEs, ``embeddings_over_onehot`` (the issue's target: ≤ 1.05), the seconds of
each fit and the machine. shardmill trains in this process (P = 1), its own validation taking 10 % of the training
rows. Usage: ``python benchmarks/categorical_quality.py [--epochs N] [--workdir DIR]``. BLAS is pinned to one thread.
"""

from __future__ import annotations

import argparse
import importlib.util
import shutil
import tempfile
import time
import warnings
from pathlib import Path
from typing import Any

import numpy as np
import pyarrow as pa
import pyarrow.csv as pa_csv
import pyarrow.parquet as pq
from benchsupport import emit, log, machine_record
from threadpoolctl import threadpool_limits

NUMERIC = ["carat", "depth", "table", "x", "y", "z"]
CATEGORICAL = ["cut", "color", "clarity"]
TARGET = "price"
HIDDEN = [64, 64]
BATCH = 256
TARGET_RATIO = 1.05


def diamonds_path() -> Path:
    """plotnine's bundled diamonds.csv, found without importing plotnine (only its files are needed)."""
    spec = importlib.util.find_spec("plotnine")
    if spec is None or not spec.submodule_search_locations:
        raise SystemExit("the diamonds data set ships with plotnine: pip install plotnine (it is in the test extra)")
    return Path(list(spec.submodule_search_locations)[0]) / "data" / "diamonds.csv"


def split(rows: int, seed: int = 0) -> tuple[np.ndarray, np.ndarray]:
    """(train, test) row indices: a seeded permutation's first fifth is the test set."""
    perm = np.random.default_rng(seed).permutation(rows)
    return np.sort(perm[rows // 5:]), np.sort(perm[:rows // 5])


def onehot_mlp(table: pa.Table, train: np.ndarray, test: np.ndarray, epochs: int) -> tuple[np.ndarray, float]:
    """scikit-learn's MLPRegressor on standardised numeric columns and one-hot categories: test predictions."""
    from sklearn.exceptions import ConvergenceWarning
    from sklearn.neural_network import MLPRegressor
    from sklearn.preprocessing import OneHotEncoder, StandardScaler

    numeric = np.column_stack([table[c].to_numpy().astype(np.float64) for c in NUMERIC])
    categories = np.column_stack([np.asarray(table[c].to_pylist()) for c in CATEGORICAL])
    scaler = StandardScaler().fit(numeric[train])
    encoder = OneHotEncoder(handle_unknown="ignore", sparse_output=False).fit(categories[train])

    def features(rows: np.ndarray) -> np.ndarray:
        return np.hstack([scaler.transform(numeric[rows]), encoder.transform(categories[rows])])

    begin = time.perf_counter()
    model = MLPRegressor(hidden_layer_sizes=tuple(HIDDEN), batch_size=BATCH, max_iter=epochs, random_state=0)
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", ConvergenceWarning)  # max_iter is the budget, not a convergence test
        model.fit(features(train), table[TARGET].to_numpy()[train].astype(np.float64))
    return model.predict(features(test)), time.perf_counter() - begin


def shardmill_mlp(folder: Path, test_table: pa.Table, categorical: list[str], epochs: int) -> tuple[np.ndarray, float]:
    """shardmill on train.parquet in ``folder`` (with or without the categorical columns): test predictions."""
    import shardmill as sm
    from shardmill.config import job_from_dict

    name = "embeddings" if categorical else "numeric"
    shutil.rmtree(folder / name, ignore_errors=True)
    job = job_from_dict({
        "model": {"layers": [len(NUMERIC) + len(categorical), *HIDDEN, 1], "activation": "relu",
                  "loss": "squared_error", "dtype": "float32"},
        "data": {"inputs": "train.parquet", "target": TARGET, "features": NUMERIC, "categorical": categorical,
                 "validation_fraction": 0.1},
        "optimizer": {"method": "adam", "learning_rate": 1e-3},
        "run": {"epochs": epochs, "global_batch": BATCH, "seed": 0, "workdir": name}}, base=folder)
    begin = time.perf_counter()
    predictor = sm.train(job, progress=False)["predictor"]
    seconds = time.perf_counter() - begin
    X = np.column_stack([test_table[c].to_numpy().astype(np.float64) for c in NUMERIC])
    given = {c: test_table[c].to_pylist() for c in categorical} or None
    return predictor.predict(X, categories=given).ravel(), seconds


def study(epochs: int, folder: Path) -> dict[str, Any]:
    from sklearn.metrics import root_mean_squared_error

    table = pa_csv.read_csv(diamonds_path())
    train, test = split(table.num_rows)
    pq.write_table(table.take(pa.array(train)), folder / "train.parquet")
    test_table = table.take(pa.array(test))
    truth = test_table[TARGET].to_numpy().astype(np.float64)
    result: dict[str, Any] = {"data": "plotnine diamonds.csv", "rows": {"train": int(train.size),
                                                                       "test": int(test.size)},
                              "hidden": HIDDEN, "global_batch": BATCH, "epochs": epochs}
    predicted, seconds = onehot_mlp(table, train, test, epochs)
    result["onehot"] = {"rmse": root_mean_squared_error(truth, predicted), "seconds": seconds}
    log(f"one-hot MLP (scikit-learn): RMSE {result['onehot']['rmse']:.1f} in {seconds:.1f} s")
    for name, categorical in (("embeddings", CATEGORICAL), ("numeric", [])):
        predicted, seconds = shardmill_mlp(folder, test_table, categorical, epochs)
        result[name] = {"rmse": root_mean_squared_error(truth, predicted), "seconds": seconds}
        log(f"shardmill {name}: RMSE {result[name]['rmse']:.1f} in {seconds:.1f} s")
    ratio = result["embeddings"]["rmse"] / result["onehot"]["rmse"]
    result["embeddings_over_onehot"] = ratio
    result["numeric_over_onehot"] = result["numeric"]["rmse"] / result["onehot"]["rmse"]
    result["target"] = f"embeddings_over_onehot <= {TARGET_RATIO}"
    result["met"] = ratio <= TARGET_RATIO
    return result


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--epochs", type=int, default=200, help="epochs of every model (scikit-learn's max_iter)")
    parser.add_argument("--workdir", type=Path, default=None, help="where the runs go (default: a temporary folder)")
    args = parser.parse_args()
    with threadpool_limits(limits=1):
        if args.workdir is not None:
            args.workdir.mkdir(parents=True, exist_ok=True)
            result = study(args.epochs, args.workdir)
        else:
            with tempfile.TemporaryDirectory() as folder:
                result = study(args.epochs, Path(folder))
    emit({"benchmark": "categorical_quality", "machine": machine_record(), **result})


if __name__ == "__main__":
    main()
