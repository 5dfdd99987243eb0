"""The sampler and sharding: the same global batches for every process count P (no MPI needed).

Properties (DEVELOPERS.md, the step): batch s of an epoch is the same G rows whatever P is; rank r takes a
contiguous slice of it; slices differ in size by at most one; an epoch visits every training row at most
once. Sizes are compared with ``numpy.array_split``, an independent block distribution.
"""

from __future__ import annotations

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st
from shardmill.data.rows import Sampler, block_range, shard, split_rows
from shardmill.errors import JobError


@st.composite
def setups(draw):
    n_data = draw(st.integers(1, 300))
    # training rows: any sorted subset of the data set's row indices (as the split produces)
    keep = draw(st.lists(st.booleans(), min_size=n_data, max_size=n_data))
    rows = np.flatnonzero(np.asarray(keep, dtype=bool)).astype(np.int64)
    if rows.size == 0:
        rows = np.array([n_data - 1], dtype=np.int64)
    G = draw(st.integers(1, rows.size))
    seed = draw(st.integers(0, 2**32 - 1))
    epoch = draw(st.integers(0, 50))
    return rows, G, seed, epoch


@settings(max_examples=150, deadline=None)
@given(setups(), st.integers(1, 9))
def test_shards_concatenate_to_the_global_batch_for_every_P(setup, P):
    rows, G, seed, epoch = setup
    sampler = Sampler(rows, G, seed)
    for step in range(sampler.steps_per_epoch):
        batch = sampler.batch(epoch, step)
        assert batch.shape == (G,) and batch.dtype == np.int64
        shards = [shard(batch, r, P) for r in range(P)]
        # concatenation in rank order is the batch itself: the shards are contiguous, in order
        assert np.array_equal(np.concatenate(shards), batch)
        sizes = [s.size for s in shards]
        assert max(sizes) - min(sizes) <= 1
        # the same multiset of sizes as numpy.array_split's block distribution (ceil sizes G mod P times)
        assert sorted(sizes) == sorted(len(part) for part in np.array_split(np.arange(G), P))
        offset = 0
        for r in range(P):
            assert block_range(G, r, P) == (offset, offset + sizes[r])
            offset += sizes[r]


@settings(max_examples=150, deadline=None)
@given(setups())
def test_an_epoch_is_a_permutation_of_the_training_rows_without_repeats(setup):
    rows, G, seed, epoch = setup
    sampler = Sampler(rows, G, seed)
    spe = sampler.steps_per_epoch
    assert spe == rows.size // G  # the last partial batch is dropped (DEVELOPERS.md, the step)
    seen = np.concatenate([sampler.batch(epoch, s) for s in range(spe)])
    assert seen.size == spe * G
    assert np.unique(seen).size == seen.size  # no row twice in one epoch
    assert np.isin(seen, rows).all()  # only training rows
    if spe * G == rows.size:  # nothing dropped: exactly a permutation. common practice
        assert np.array_equal(np.sort(seen), rows)


@settings(max_examples=60, deadline=None)
@given(setups(), st.integers(0, 50))
def test_batches_depend_only_on_seed_epoch_and_step(setup, other_epoch):
    rows, G, seed, epoch = setup
    first, second = Sampler(rows, G, seed), Sampler(rows, G, seed)
    # a second sampler visiting another epoch first still gives the same batches (no hidden state)
    second.batch(other_epoch, 0)
    for step in range(first.steps_per_epoch):
        assert np.array_equal(first.batch(epoch, step), second.batch(epoch, step))


def test_global_batch_larger_than_the_training_set_is_refused():
    with pytest.raises(JobError, match="global_batch"):
        Sampler(np.arange(5, dtype=np.int64), 6, 0)


@settings(max_examples=100, deadline=None)
@given(st.integers(1, 500), st.floats(0.0, 0.9), st.integers(0, 2**32 - 1))
def test_split_partitions_the_rows(n, fraction, seed):
    split = split_rows(n, fraction, seed)
    assert split.validation.size == int(fraction * n)
    both = np.concatenate([split.train, split.validation])
    assert np.array_equal(np.sort(both), np.arange(n))  # disjoint and complete
    assert np.all(np.diff(split.train) > 0) and np.all(np.diff(split.validation) > 0)  # ascending
