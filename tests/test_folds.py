"""k-fold cross-validation splits (``data.folds``, ``data.fold``, ``data.groups``): contiguous blocks and
whole groups, checked against scikit-learn's KFold and GroupKFold, and the split a training run then uses."""

from __future__ import annotations

import numpy as np
import pytest
from shardmill.config import job_from_dict
from shardmill.data.dataset import load_dataset
from shardmill.data.rows import fold_of_rows, split_rows
from shardmill.errors import JobError
from shardmill.model.mlp import model_from_job
from shardmill.parallel.comm import Comm

from tests.helpers import make_classification

sklearn_split = pytest.importorskip("sklearn.model_selection")


@pytest.mark.parametrize(("rows", "folds"), [(10, 3), (240, 5), (7, 7), (101, 4)])
def test_contiguous_folds_are_scikit_learns_kfold(rows, folds):
    ours = [split_rows(rows, 0.1, 0, folds, k) for k in range(folds)]
    theirs = list(sklearn_split.KFold(n_splits=folds).split(np.zeros((rows, 1))))
    for split, (train, test) in zip(ours, theirs, strict=True):
        # scikit-learn KFold(shuffle=False): contiguous folds, the first n mod k one longer
        np.testing.assert_array_equal(split.validation, test)
        np.testing.assert_array_equal(split.train, train)


@pytest.mark.parametrize("groups", [None, "groups"])
def test_every_row_validates_in_exactly_one_fold(groups):
    rng = np.random.default_rng(3)
    labels = rng.integers(0, 17, size=203) if groups else None
    folds = 5
    seen = np.zeros(203, dtype=np.int64)
    for k in range(folds):
        split = split_rows(203, 0.1, 0, folds, k, labels)
        seen[split.validation] += 1
        # the training rows are the complement of the validation rows: k-fold's definition (common practice)
        np.testing.assert_array_equal(np.sort(np.concatenate([split.train, split.validation])), np.arange(203))
        if labels is not None:  # no group on both sides
            assert not set(labels[split.train].tolist()) & set(labels[split.validation].tolist())
    assert (seen == 1).all()


def test_group_folds_are_scikit_learns_group_kfold():
    # group sizes all different, so the order "largest group first" has no ties to break
    sizes = [31, 2, 17, 9, 23, 5, 12, 3, 40, 7, 1, 14]
    labels = np.repeat(np.arange(len(sizes)) * 10 + 100, sizes)
    labels = labels[np.random.default_rng(1).permutation(labels.size)]
    theirs = list(sklearn_split.GroupKFold(n_splits=4).split(np.zeros((labels.size, 1)), groups=labels))
    for k, (_, test) in enumerate(theirs):
        # scikit-learn GroupKFold: largest group first, into the fold with the fewest rows
        np.testing.assert_array_equal(split_rows(labels.size, 0.1, 0, 4, k, labels).validation, test)


def test_more_folds_than_rows_or_groups_is_refused():
    with pytest.raises(JobError, match=r"`data.folds` = 6 asks for more folds than the 5 rows"):
        fold_of_rows(5, 6)
    with pytest.raises(JobError, match=r"more folds than the 2 groups"):
        fold_of_rows(6, 3, np.array([1, 1, 2, 2, 2, 1]))
    with pytest.raises(JobError, match=r"`data.groups` row 2 holds no group"):
        fold_of_rows(4, 2, np.array([1.0, 2.0, np.nan, 1.0]))


@pytest.mark.parametrize(("data", "key"), [({"folds": 1}, "data.folds"), ({"folds": 3, "fold": 3}, "data.fold"),
                                           ({"fold": 2}, "data.fold")])
def test_fold_keys_are_checked(data, key):
    with pytest.raises(JobError, match=rf"^`{key}` needs `data.folds` = 0 \(off\) or ≥ 2"):
        job_from_dict({"model": {"layers": [3, 2]}, "data": data})


def test_groups_without_folds_or_a_group_split_are_refused():
    with pytest.raises(JobError, match=r"^`data.groups` goes with `data.split` = 'groups' or with `data.folds` ≥ 2"):
        job_from_dict({"model": {"layers": [3, 2]}, "data": {"groups": "g.npy"}})


def test_a_run_validates_on_its_fold_and_leaves_other_runs_alone(tmp_path):
    make_classification(tmp_path, rows=60)
    np.save(tmp_path / "g.npy", np.arange(60) // 6)  # ten groups of six consecutive rows
    base = {"model": {"layers": [6, 4, 3]}, "data": {"inputs": "x.npy", "targets": "y.npy"}}
    plain = job_from_dict(base, base=tmp_path)
    data = load_dataset(plain, model_from_job(plain), Comm.alone())
    np.testing.assert_array_equal(data.split.validation, split_rows(60, 0.1, 0).validation)
    job = job_from_dict(base, base=tmp_path, overrides=["data.folds=4", "data.fold=1", "data.groups=g.npy"])
    data = load_dataset(job, model_from_job(job), Comm.alone())
    np.testing.assert_array_equal(data.split.validation, np.flatnonzero(fold_of_rows(60, 4, np.arange(60) // 6) == 1))
    assert not set((data.split.train // 6).tolist()) & set((data.split.validation // 6).tolist())
    assert plain.digest() != job.digest()  # another split is another trajectory
