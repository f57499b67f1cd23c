"""Ingest's row kernels against their slow twins (numpy stable argsort, pandas)."""

import numpy as np
from hypothesis import given, settings, strategies as st

from cliquewise.kernels.buckets import bucket_bounds, mark_seen, order_and_bucket, order_and_bucket_reference

rows = st.integers(0, 60).flatmap(lambda n: st.tuples(
    st.lists(st.integers(0, 19), min_size=n, max_size=n),
    st.lists(st.integers(0, 19), min_size=n, max_size=n),
    st.lists(st.sampled_from([0.0, 1.0, 2.5, 1e12]), min_size=n, max_size=n)))


@settings(max_examples=150, deadline=None)
@given(rows, st.integers(1, 7), st.booleans())
def test_order_and_bucket_matches_reference(data, n_buckets, weighted):
    a, b, w = (np.array(x) for x in data)
    a, b, w = a.astype(np.int64), b.astype(np.int64), w.astype(np.float64)
    seen = np.zeros(20, np.bool_)
    got = order_and_bucket(a, b, w if weighted else np.empty(0), weighted, 20, n_buckets, seen,
                           np.empty(0, np.int32))
    ref = order_and_bucket_reference(a, b, w, weighted, 20, n_buckets)
    for g, r in zip(got[:4], ref[:4]):
        np.testing.assert_array_equal(g, r)
    assert got[4:] == ref[4:]
    expect = np.zeros(20, bool)
    expect[a] = True
    expect[b] = True
    np.testing.assert_array_equal(seen, expect)


@given(st.integers(1, 10**6), st.integers(1, 50))
def test_bucket_bounds_agree_with_the_bucket_rule(n_nodes, n_buckets):
    bounds = bucket_bounds(n_nodes, n_buckets)
    assert bounds[0] == 0 and bounds[-1] == n_nodes
    probe = np.unique(np.clip(np.concatenate([bounds - 1, bounds]), 0, n_nodes - 1)).astype(np.int64)
    b = (probe * n_buckets) // n_nodes  # the rule order_and_bucket applies
    for x, bx in zip(probe, b):
        assert bounds[bx] <= x < bounds[bx + 1]


def test_out_of_range_ids_raise_instead_of_writing():
    import pytest

    with pytest.raises(ValueError):
        mark_seen(np.zeros(3, np.bool_), np.array([0, 3], np.int64))
    with pytest.raises(ValueError):
        order_and_bucket(np.array([0, 5]), np.array([1, 2]), np.empty(0), False, 4, 1, np.empty(0, np.bool_),
                         np.empty(0, np.int32))
