"""Which rows validate (``data.split``): random (seeded), the last rows in file order, or whole groups.

References: scikit-learn's ``train_test_split(shuffle=False)`` (the test rows are the last ones) for "last"; for
"groups", the property scikit-learn's ``GroupShuffleSplit`` keeps (no group on both sides), checked directly.
"""

from __future__ import annotations

from pathlib import Path

import numpy as np
import pytest
import shardmill as sm
from shardmill.data.rows import split_rows
from shardmill.errors import JobError
from shardmill.parallel.comm import Comm
from shardmill.training.trainer import Trainer
from sklearn.model_selection import train_test_split


@pytest.mark.parametrize("n, fraction", [(100, 0.2), (37, 0.1), (10, 0.0)])
def test_last_holds_out_the_last_rows_as_scikit_learn_does_without_shuffling(n: int, fraction: float) -> None:
    split = split_rows(n, fraction, seed=3, how="last")
    n_val = int(fraction * n)
    if n_val:
        train, test = train_test_split(np.arange(n), test_size=n_val, shuffle=False)  # scikit-learn
        np.testing.assert_array_equal(split.validation, test)
        np.testing.assert_array_equal(split.train, train)
    else:
        assert split.validation.size == 0 and split.train.size == n


@pytest.mark.parametrize("seed", [0, 1, 2])
def test_groups_stay_whole_and_hold_at_least_the_fraction(seed: int) -> None:
    rng = np.random.default_rng(seed)
    groups = rng.integers(0, 12, size=300)  # 12 machines, windows in any order
    split = split_rows(300, 0.25, seed=seed, groups=groups, how="groups")
    assert np.array_equal(np.sort(np.concatenate([split.train, split.validation])), np.arange(300))
    assert not set(groups[split.train]) & set(groups[split.validation])  # no machine on both sides
    assert split.validation.size >= 75 and split.train.size > 0
    again = split_rows(300, 0.25, seed=seed, groups=groups, how="groups")
    np.testing.assert_array_equal(again.validation, split.validation)  # seeded: the same on every rank


def test_a_table_job_validates_on_whole_machines(tmp_path: Path) -> None:
    rng = np.random.default_rng(4)
    lines = ["a,b,machine,y"] + [f"{rng.normal():.5f},{rng.normal():.5f},{i % 7},{i % 2}" for i in range(140)]
    (tmp_path / "t.csv").write_text("\n".join(lines) + "\n")
    job = sm.job_from_dict({"model": {"layers": [2, 4, 2]},
                            "data": {"inputs": "t.csv", "target": "y", "groups": "machine", "split": "groups",
                                     "validation_fraction": 0.3},
                            "run": {"global_batch": 8, "workdir": "run"}}, base=tmp_path)
    trainer = Trainer(job, Comm.alone())
    machine = np.arange(140) % 7
    split = trainer.data.split
    assert not set(machine[split.train]) & set(machine[split.validation])
    assert trainer.model.sizes[0] == 2  # the group column is not a feature


@pytest.mark.parametrize("data, words", [
    ({"split": "groups"}, "`data.groups` goes with `data.split` = 'groups'"),
    ({"groups": "g.npy"}, "`data.groups` goes with `data.split` = 'groups'"),
    ({"folds": 3, "split": "last"}, "or with `data.folds` ≥ 2 (whose split is its own)"),
    ({"split": "first"}, "`data.split` must be one of groups, last, random; got 'first'"),
])
def test_bad_split_settings_are_one_line(data: dict, words: str) -> None:
    with pytest.raises(JobError) as err:
        sm.job_from_dict({"model": {"layers": [2, 2]}, "data": data})
    assert words in str(err.value) and "\n" not in str(err.value)


def test_one_group_cannot_be_split() -> None:
    with pytest.raises(JobError, match="needs at least two groups"):
        split_rows(10, 0.2, seed=0, groups=np.zeros(10), how="groups")
