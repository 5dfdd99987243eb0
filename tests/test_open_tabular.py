"""Categorical inputs on an open tabular data set: shardmill's embeddings reach a one-hot MLP's error.

The data set is "diamonds" as the plotting package plotnine ships it (``plotnine/data/diamonds.csv``, 53,940 rows:
price from six numeric and three categorical columns). The reference is scikit-learn's ``MLPRegressor`` with the
categories one-hot encoded, the same hidden widths, batch and epochs, on the same 80/20 split, scored by scikit-learn's
``root_mean_squared_error``. ``benchmarks/categorical_quality.py`` runs the study and prints the report (the
numeric-only model beside the two); this test runs it and reads its JSON.
"""

from __future__ import annotations

import json
import subprocess
import sys
from pathlib import Path

BENCHMARKS = Path(__file__).resolve().parents[1] / "benchmarks"


def test_embeddings_reach_a_one_hot_mlp_and_beat_numeric_only(tmp_path: Path) -> None:
    out = subprocess.run([sys.executable, "categorical_quality.py", "--epochs", "200", "--workdir", str(tmp_path)],
                         cwd=BENCHMARKS, capture_output=True, text=True, timeout=600)
    assert out.returncode == 0, out.stderr[-3000:]
    report = json.loads(out.stdout)
    print(json.dumps({k: report[k] for k in ("onehot", "embeddings", "numeric", "embeddings_over_onehot")}))
    assert report["rows"] == {"train": 43152, "test": 10788}
    # the target: within 5 % of the one-hot MLP of a general-purpose library (scikit-learn) on the split
    assert report["embeddings_over_onehot"] <= 1.05
    # and the categories carry real signal: without them the error is well over twice as large (measured 2.4×)
    assert report["numeric"]["rmse"] > 1.8 * report["embeddings"]["rmse"]
