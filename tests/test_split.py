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


# --- data.validation: the validation rows in a table of their own ------------------------------------------------

def _tables(folder: Path, validation_columns: str = "b,kind,y,z,a") -> None:
    """train.csv (a,b,kind,y) and valid.csv with ``validation_columns`` in its own order (z: one column more)."""
    rng = np.random.default_rng(6)

    def table(name: str, rows: int, kinds: tuple[str, ...], columns: list[str]) -> None:
        lines = [",".join(columns)]
        for _ in range(rows):
            a, b = rng.normal(size=2)
            row = {"a": f"{a:.6f}", "b": f"{b:.6f}", "kind": str(rng.choice(kinds)), "y": str(int(a + b > 0)), "z": "1"}
            lines.append(",".join(row[c] for c in columns))
        (folder / name).write_text("\n".join(lines) + "\n")

    table("train.csv", 160, ("p", "q"), ["a", "b", "kind", "y"])
    table("valid.csv", 40, ("p", "q", "never_seen"), validation_columns.split(","))


def _validation_job(folder: Path) -> sm.Job:
    return sm.job_from_dict({"model": {"layers": [3, 8, 2]},
                             "data": {"inputs": "train.csv", "validation": "valid.csv", "target": "y",
                                      "categorical": ["kind"]},
                             "optimizer": {"learning_rate": 0.01},
                             "run": {"global_batch": 16, "epochs": 3, "workdir": "run"}}, base=folder)


def test_a_validation_table_validates_and_every_input_row_trains(tmp_path: Path) -> None:
    import json

    from sklearn.metrics import accuracy_score

    _tables(tmp_path)
    result = sm.train(_validation_job(tmp_path), progress=False)
    trainer_split = Trainer(_validation_job(tmp_path), Comm.alone()).data.split
    np.testing.assert_array_equal(trainer_split.train, np.arange(160))
    np.testing.assert_array_equal(trainer_split.validation, np.arange(160, 200))
    # the logged validation accuracy is scikit-learn's accuracy of the model's predictions on the validation table
    rows = [dict(zip("b,kind,y,z,a".split(","), line.split(","), strict=True))
            for line in (tmp_path / "valid.csv").read_text().splitlines()[1:]]  # its columns in its own order
    X = np.array([[float(r["a"]), float(r["b"])] for r in rows])
    kinds, truth = [r["kind"] for r in rows], [int(r["y"]) for r in rows]
    predicted = result["predictor"].predict(X, categories={"kind": kinds})  # "never_seen": the unknown slot
    records = [json.loads(r) for r in (tmp_path / "run" / "metrics.jsonl").read_text().splitlines()]
    logged = [r for r in records if r.get("kind") == "epoch"][-1]["validation"]["accuracy"]
    assert logged == pytest.approx(accuracy_score(truth, predicted), abs=1e-12)


def test_a_validation_table_lacking_a_column_is_one_line(tmp_path: Path) -> None:
    _tables(tmp_path, validation_columns="a,kind,y")
    with pytest.raises(JobError) as err:
        sm.train(_validation_job(tmp_path), progress=False)
    assert "`data.validation` 'valid.csv' lacks the column(s) ['b']" in str(err.value) and "\n" not in str(err.value)


@pytest.mark.parametrize("data", [{"folds": 3}, {"split": "last"}, {"target": ""}])
def test_a_validation_table_with_another_way_of_choosing_is_refused(data: dict) -> None:
    keys = {"inputs": "t.csv", "validation": "v.csv", "target": "y", **data}
    if not keys["target"]:
        keys.update(target="", targets="y.npy")
    with pytest.raises(JobError, match="takes the validation rows from a table of their own"):
        sm.job_from_dict({"model": {"layers": [2, 2]}, "data": keys})
