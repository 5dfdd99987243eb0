"""The fuzz run in CI: 1,000 generated cases of every group (``fuzzcases.py``) end in a run or a one-line
refusal; none in a traceback, a signal (the process would die) or a silent accept. The figures are printed (run
pytest with -s to see them); ``SHARDMILL_FUZZ_CASES`` and ``SHARDMILL_FUZZ_SEED`` choose another run.
"""

from __future__ import annotations

import json
import os
from pathlib import Path

import fuzzcases


def test_generated_cases_end_in_a_run_or_one_line(tmp_path: Path) -> None:
    count = int(os.environ.get("SHARDMILL_FUZZ_CASES", "1000"))
    figures = fuzzcases.run(count, seed=int(os.environ.get("SHARDMILL_FUZZ_SEED", "1")), folder=tmp_path)
    print(json.dumps(figures, indent=1))
    assert len(figures["groups"]) == len(fuzzcases.GROUPS)  # every door was tried
    assert figures["classes"]["refused"] > count // 3  # most cases are wrong on purpose
    assert figures["failures"] == [], json.dumps(figures["failures"][:10], indent=1)
