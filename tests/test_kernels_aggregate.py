"""Tests for cliquewise.kernels.aggregate.

Outside reference: pandas ``groupby([u, v]).agg(sum | max | min)`` on the oriented
pairs; also the in-module dict twin and numpy's isnan / isinf.
"""

from __future__ import annotations

import numpy as np
import pandas as pd
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from cliquewise.kernels import aggregate as ag

HOW_NAMES = {ag.HOW_SUM: "sum", ag.HOW_MAX: "max", ag.HOW_MIN: "min"}

# weights: exact dyadic fractions and integers up to 1e12 (sums stay exact in
# float64 below 2**53, so pandas and the kernel must agree bit for bit), plus
# arbitrary fractions (compared to rounding error)
exact_weights = st.one_of(
    st.integers(1, 10**12).map(float),
    st.integers(1, 64).map(lambda k: k / 8.0),
    st.integers(10**11, 10**12).map(lambda k: k + 0.5),
)
any_weights = st.floats(1e-3, 1e12, allow_nan=False)


def edge_rows(weights, n_max=40):
    """Rows (a, b, w) with many duplicates, reversed pairs and self-loops."""
    return st.integers(1, n_max).flatmap(
        lambda n: st.lists(
            st.tuples(st.integers(0, n - 1), st.integers(0, n - 1), weights),
            min_size=0, max_size=300,
        ).flatmap(lambda rows: st.tuples(st.just(n), st.just(rows),
                                         st.lists(st.integers(0, max(len(rows) - 1, 0)),
                                                  max_size=200)))
    )


def as_arrays(rows, dup_idx):
    rows = rows + [rows[i] for i in dup_idx if rows]  # extra exact duplicates
    if rows and dup_idx:  # and some reversed copies
        rows = rows + [(b, a, w) for a, b, w in rows[: len(dup_idx)]]
    a = np.array([r[0] for r in rows], dtype=np.int64)
    b = np.array([r[1] for r in rows], dtype=np.int64)
    w = np.array([r[2] for r in rows], dtype=np.float64)
    return a, b, w


def pandas_groupby(u, v, w, how):
    df = pd.DataFrame({"u": u, "v": v, "w": w})
    g = df.groupby(["u", "v"], sort=True)["w"].agg(HOW_NAMES[how]).reset_index()
    return g["u"].to_numpy(), g["v"].to_numpy(), g["w"].to_numpy()


@settings(max_examples=80, deadline=None)
@given(data=edge_rows(exact_weights), how=st.sampled_from([0, 1, 2]))
def test_matches_pandas_groupby_exactly(data, how):
    n, rows, dup_idx = data
    a, b, w = as_arrays(rows, dup_idx)
    u, v, wo, n_self = ag.order_pairs(a, b, w)
    assert n_self == int(np.sum(a == b))
    assert np.all(u < v)
    ru, rv, rw, rself = ag.order_pairs_reference(a, b, w)
    np.testing.assert_array_equal(u, ru)
    np.testing.assert_array_equal(v, rv)
    np.testing.assert_array_equal(wo, rw)
    assert n_self == rself
    # a bucket covering all nodes, and one starting above zero
    lo = int(u.min()) if u.size else 0
    for lo_, hi_ in ((0, n), (lo, n + 3)):
        ou, ov, ow = ag.aggregate_pairs(u, v, wo, lo_, hi_, how)
        pu, pv, pw = pandas_groupby(u, v, wo, how)  # reference: pandas groupby
        np.testing.assert_array_equal(ou, pu)
        np.testing.assert_array_equal(ov, pv)
        np.testing.assert_array_equal(ow, pw)  # exact: these sums are representable
        tu, tv, tw = ag.aggregate_pairs_reference(u, v, wo, how)
        np.testing.assert_array_equal(ow, tw)
        np.testing.assert_array_equal(ou, tu)
        np.testing.assert_array_equal(ov, tv)


@settings(max_examples=60, deadline=None)
@given(data=edge_rows(any_weights, n_max=6), how=st.sampled_from([0, 1, 2]))
def test_matches_pandas_with_fractional_weights(data, how):
    # few nodes -> long rows, which take the hash-merge path
    n, rows, dup_idx = data
    a, b, w = as_arrays(rows, dup_idx)
    u, v, wo, _ = ag.order_pairs(a, b, w)
    ou, ov, ow = ag.aggregate_pairs(u, v, wo, 0, n, how)
    pu, pv, pw = pandas_groupby(u, v, wo, how)  # reference: pandas groupby
    np.testing.assert_array_equal(ou, pu)
    np.testing.assert_array_equal(ov, pv)
    np.testing.assert_allclose(ow, pw, rtol=1e-13)  # pandas sums with compensation
    # the twin adds in input order, exactly as documented: bitwise equal
    np.testing.assert_array_equal(ow, ag.aggregate_pairs_reference(u, v, wo, how)[2])


def test_long_rows_and_many_coarse_ranges():
    # hub rows far longer than the insertion-sort limit, and a node range large
    # enough for several coarse ranges (first counting-sort pass)
    rng = np.random.default_rng(7)
    n = 50_000
    m = 200_000
    a = np.concatenate([rng.integers(0, 5, m // 2), rng.integers(0, n, m // 2)])
    b = rng.integers(0, n, m)
    w = rng.integers(1, 1000, m).astype(float) / 4
    u, v, wo, _ = ag.order_pairs(a, b, w)
    for how in (0, 1, 2):
        ou, ov, ow = ag.aggregate_pairs(u, v, wo, 0, n, how)
        pu, pv, pw = pandas_groupby(u, v, wo, how)  # reference: pandas groupby
        np.testing.assert_array_equal(ou, pu)
        np.testing.assert_array_equal(ov, pv)
        np.testing.assert_array_equal(ow, pw)


def test_sum_order_is_input_order():
    # 1e16 + 1 - 1e16 in input order gives 0 in float64; any other order differs
    u = np.array([0, 0, 0], dtype=np.int64)
    v = np.array([1, 1, 1], dtype=np.int64)
    w = np.array([1e16, 1.0, -1e16])
    assert ag.aggregate_pairs(u, v, w, 0, 1, 0)[2].tolist() == [(1e16 + 1.0) - 1e16]
    w2 = np.array([1.0, 1e16, -1e16])
    assert ag.aggregate_pairs(u, v, w2, 0, 1, 0)[2].tolist() == [(1.0 + 1e16) - 1e16]


def test_bad_input_raises():
    u = np.array([0, 5], dtype=np.int64)
    v = np.array([1, 6], dtype=np.int64)
    w = np.ones(2)
    with pytest.raises(ValueError):
        ag.aggregate_pairs(u, v, w, 0, 5, 0)  # u = 5 outside [0, 5)
    with pytest.raises(ValueError):
        ag.aggregate_pairs(u, v, w, 0, 6, 3)  # unknown how
    with pytest.raises(ValueError):
        ag.order_pairs(u, v, np.ones(3))


def test_empty_inputs():
    z = np.zeros(0, dtype=np.int64)
    u, v, w, n_self = ag.order_pairs(z, z, np.zeros(0))
    assert u.size == 0 and n_self == 0
    ou, ov, ow = ag.aggregate_pairs(z, z, np.zeros(0), 0, 0, 0)
    assert ou.size == ov.size == ow.size == 0


@settings(max_examples=50, deadline=None)
@given(w=st.lists(st.sampled_from([np.nan, np.inf, -np.inf, -1.5, -0.0, 0.0, 2.0, 1e12]),
                  max_size=50))
def test_weight_flags_match_numpy(w):
    w = np.array(w, dtype=np.float64)
    fin = np.isfinite(w)
    # reference: numpy's isnan / isinf / comparisons
    expected = (int(np.isnan(w).sum()), int(np.isinf(w).sum()),
                int((fin & (w < 0)).sum()), int((w == 0).sum()))
    assert ag.weight_flags(w) == expected


@settings(max_examples=40, deadline=None)
@given(data=edge_rows(any_weights, n_max=8), how=st.sampled_from([0, 1, 2]))
def test_unit_weights_equal_explicit_ones(data, how):
    # an empty weight array means every row weighs 1: the result equals the one
    # with an explicit column of ones, and pandas groupby size/max/min on it
    n, rows, dup_idx = data
    a, b, w = as_arrays(rows, dup_idx)
    u, v, _, _ = ag.order_pairs(a, b, w)
    ones = np.ones(len(u))
    eu, ev, ew = ag.aggregate_pairs(u.astype(np.int32), v.astype(np.int32), np.zeros(0), 0, n, how)
    pu, pv, pw = pandas_groupby(u, v, ones, how)  # reference: pandas groupby
    np.testing.assert_array_equal(eu, pu)
    np.testing.assert_array_equal(ev, pv)
    np.testing.assert_array_equal(ew, pw)
    np.testing.assert_array_equal(ew, ag.aggregate_pairs_reference(u, v, np.zeros(0), how)[2])
