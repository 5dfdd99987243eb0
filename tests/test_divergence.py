"""A run that diverges (a learning rate far too high) stops with one line naming the step and the last checkpoint,
exit 2, on every rank together, in fast and exact mode; it used to run on at a loss of 1e31 (fast) or end in a
FloatingPointError traceback (exact)."""

from __future__ import annotations

import re

import pytest
from helpers import make_classification, run_mpi, write_job

pytestmark = pytest.mark.mpi


@pytest.mark.parametrize("reduction, exact_format", [("fast", "wide"), ("exact", "wide"), ("exact", "compact")])
def test_a_diverging_run_stops_with_one_line(tmp_path, reduction, exact_format):
    make_classification(tmp_path, rows=240, features=6, classes=3, seed=2)
    job = write_job(tmp_path, {"layers": [6, 32, 3], "activation": "relu", "dtype": "float32"},
                    {"global_batch": 16, "epochs": 50, "reduction": reduction, "exact_chunk": 4,
                     "exact_format": exact_format, "save_every": 3},
                    {"method": "sgd", "learning_rate": 1e6})  # far beyond any stable step size. common practice
    proc = run_mpi(2, ["-m", "shardmill", "train", str(job), "--no-progress"], timeout=120, cwd=tmp_path)
    assert proc.returncode == 2, proc.stderr[-3000:]
    assert "Traceback" not in proc.stderr
    match = re.search(r"step (\d+): the run diverged \((.+?)\)", proc.stderr)
    assert match, proc.stderr[-3000:]
    step = int(match.group(1))
    if step > 3:  # a checkpoint was written before (save_every = 3): the message names it
        assert "the last checkpoint is step-" in proc.stderr
    assert proc.stderr.count("the run diverged") == 1  # printed once (rank 0), not once per rank
