"""Prefix-tree sweep of the fit: against plain-Python twins and the scipy EM step.

References: ``em_step_reference`` (scipy.sparse products ``A mu`` and ``A^T r``) for
the sweep; a sorted list of tuples for the tree; brute force over edges for the
support check.
"""

import math

import numpy as np
import pytest
from hypothesis import HealthCheck, given, settings, strategies as st

from cliquewise.kernels.em import em_step_reference
from cliquewise.kernels.prefixtree import (
    build_tree, build_tree_reference, candidate_rank, check_tree, first_seen_order, row_tops,
    tree_sweep, tree_sweep_reference, tree_unsupported)


@st.composite
def incidences(draw, max_edges=40, max_cand=8):
    n_edges = draw(st.integers(0, max_edges))
    n_cand = draw(st.integers(1, max_cand))
    rows = [sorted(draw(st.sets(st.integers(0, n_cand - 1), min_size=1, max_size=n_cand)))
            for _ in range(n_edges)]
    ptr = np.concatenate([[0], np.cumsum([len(r) for r in rows])]).astype(np.int64)
    cand = np.array([k for r in rows for k in r], dtype=np.int64)
    y = np.array(draw(st.lists(st.integers(0, 9), min_size=n_edges, max_size=n_edges)), dtype=np.float64)
    pairs = np.array(draw(st.lists(st.integers(1, 45), min_size=n_cand, max_size=n_cand)), dtype=np.int64)
    return ptr, cand, y, pairs


def _build(ptr, cand, y, pairs, edges=None):
    rank = candidate_rank(pairs)
    edges = np.arange(len(y)) if edges is None else edges
    return build_tree(ptr, cand, y, edges, rank, np.argsort(rank))


@settings(max_examples=300, deadline=None)
@given(incidences(), st.data())
def test_tree_matches_sorted_tuple_twin(inc, data):
    ptr, cand, y, pairs = inc
    edges = np.array(sorted(data.draw(st.sets(st.integers(0, max(0, len(y) - 1)), max_size=len(y)))), np.int64)
    edges = edges[edges < len(y)]
    got = _build(ptr, cand, y, pairs, edges)
    want = build_tree_reference(ptr, cand, y, edges, candidate_rank(pairs))
    for g, w in zip(got, want):
        np.testing.assert_array_equal(g, w)
    check_tree(got[0], got[1], got[2], got[3], len(pairs))
    # every chosen edge with y > 0 ends somewhere; the weight is conserved
    assert math.isclose(got[3].sum(), y[edges].sum())


@settings(max_examples=200, deadline=None)
@given(incidences(max_edges=60, max_cand=12))
def test_trees_of_edges_grouped_by_top_make_the_whole_tree(inc):
    # grouping edges by their first candidate splits the tree into independent
    # subtrees: the trees of the groups, concatenated in top order, are the tree
    # of all edges (reference: the plain-Python twin on all edges)
    ptr, cand, y, pairs = inc
    rank = candidate_rank(pairs)
    top = row_tops(ptr, cand, rank)
    whole = build_tree_reference(ptr, cand, y, np.arange(len(y)), rank)
    pieces = [_build(ptr, cand, y, pairs, np.flatnonzero(top == t)) for t in np.unique(top)]
    if not pieces:
        assert len(whole[0]) == 0
        return
    np.testing.assert_array_equal(np.concatenate([p[0] for p in pieces]), whole[0])
    np.testing.assert_array_equal(np.concatenate([p[1] for p in pieces]), whole[1])
    np.testing.assert_array_equal(np.concatenate([p[3] for p in pieces]), whole[3])


@settings(max_examples=300, deadline=None)
@given(incidences(), st.floats(0.1, 5.0))
def test_sweep_equals_scipy_em_step(inc, scale):
    ptr, cand, y, pairs = inc
    K = len(pairs)
    P = pairs.astype(np.float64)
    rng = np.random.default_rng(len(cand))
    mu = rng.uniform(0.1, 2.0, K) * scale
    c, d, end, ey = _build(ptr, cand, y, pairs)
    acc = np.zeros(K)
    ll = tree_sweep(c, d, end, ey, mu, acc, True)
    keep = y > 0
    if not keep.any():
        assert ll == 0.0 and not acc.any()
        return
    # scipy reference on the edges with y > 0 (the others add nothing)
    rows = [cand[ptr[e]:ptr[e + 1]] for e in range(len(y)) if keep[e]]
    rp = np.concatenate([[0], np.cumsum([len(r) for r in rows])]).astype(np.int64)
    nxt, ll_ref, grad = em_step_reference(rp, np.concatenate(rows), y[keep], mu, P)
    np.testing.assert_allclose(mu * acc / P, nxt, rtol=1e-12)
    np.testing.assert_allclose(ll - mu @ P, ll_ref, rtol=1e-12, atol=1e-12)
    acc2, ll2 = tree_sweep_reference(c, d, end, ey, mu)
    np.testing.assert_allclose(acc, acc2, rtol=1e-12)
    assert ll == pytest.approx(ll2, rel=1e-12)
    acc3 = np.zeros(K)
    assert tree_sweep(c, d, end, ey, mu, acc3, False) == 0.0
    np.testing.assert_array_equal(acc3, acc)


def test_zero_rate_end_gives_minus_infinity_and_adds_nothing():
    ptr = np.array([0, 1, 3], np.int64)
    cand = np.array([0, 0, 1], np.int64)
    y = np.array([2.0, 3.0])
    c, d, end, ey = _build(ptr, cand, y, np.array([1, 3]))
    mu = np.array([0.0, 1.0])
    acc = np.zeros(2)
    assert tree_sweep(c, d, end, ey, mu, acc, True) == -np.inf
    # edge 1 (candidates 0 and 1) has rate 1: it adds 3/1 to both; edge 0 adds nothing
    np.testing.assert_allclose(acc, [3.0, 3.0])


def test_shared_prefixes_shrink_the_tree():
    # four edges inside one big candidate 0, each also in its own small one
    ptr = np.array([0, 2, 4, 6, 8], np.int64)
    cand = np.array([0, 1, 0, 2, 0, 3, 0, 4], np.int64)
    c, d, end, ey = _build(ptr, cand, np.ones(4), np.array([10, 1, 1, 1, 1]))
    assert len(c) == 5  # one shared root + four leaves, against 8 incidences
    assert list(d) == [0, 1, 1, 1, 1] and c[0] == 0


@settings(max_examples=200, deadline=None)
@given(incidences())
def test_unsupported_matches_brute_force(inc):
    ptr, cand, y, pairs = inc
    K = len(pairs)
    rng = np.random.default_rng(K + len(cand))
    mu_full = rng.choice([0.0, 0.5, 1.0, 2.0], K)
    mu_kept = np.where(rng.random(K) < 0.5, 0.0, mu_full)
    c, d, end, ey = _build(ptr, cand, y, pairs)
    got = sorted(set(tree_unsupported(c, d, end, mu_kept, mu_full).tolist()))
    want = set()
    for e in range(len(y)):
        row = cand[ptr[e]:ptr[e + 1]]
        if y[e] == 0 or mu_kept[row].sum() > 0:
            continue
        best = max(row, key=lambda k: (mu_full[k], -k))
        if mu_full[best] > 0:
            want.add(int(best))
    assert got == sorted(want)


def test_first_seen_order_numbers_in_order_of_use():
    new = np.full(5, -1, np.int64)
    nxt = first_seen_order(np.array([3, 1, 3, 4]), new, 0)
    nxt = first_seen_order(np.array([0, 1, 2]), new, nxt)
    assert nxt == 5 and new.tolist() == [3, 1, 4, 0, 2]


def test_check_tree_rejects_bad_arrays():
    ok = (np.array([0, 1], np.int64), np.array([0, 1], np.int32), np.array([1], np.int64), np.array([1.0]))
    check_tree(*ok, 2)
    with pytest.raises(ValueError):
        check_tree(ok[0], ok[1], ok[2], ok[3], 1)  # candidate outside range
    with pytest.raises(ValueError):
        check_tree(ok[0], np.array([1, 0], np.int32), ok[2], ok[3], 2)  # not a preorder
    with pytest.raises(ValueError):
        check_tree(ok[0], ok[1], np.array([5], np.int64), ok[3], 2)


@settings(max_examples=100, deadline=None)
@given(st.lists(st.integers(0, 60), max_size=300), st.booleans())
def test_counting_sorts_equal_numpy_stable_argsort(keys, huge):
    # reference: numpy's stable argsort (the rank of each candidate in the list
    # order is the inverse of argsort(-pairs, stable))
    pairs = np.array(keys, np.int64)
    if huge and len(pairs):
        pairs[0] = 10**9  # beyond the counting sort's range: the argsort route
    rank = candidate_rank(pairs)
    want = np.empty(len(pairs), np.int64)
    want[np.argsort(-pairs, kind="stable")] = np.arange(len(pairs))
    np.testing.assert_array_equal(rank, want)


@settings(max_examples=60, deadline=None, suppress_health_check=[HealthCheck.function_scoped_fixture])
@given(incidences(max_edges=60, max_cand=12), st.integers(1, 40), st.sampled_from([None, 1]))
def test_parts_planned_in_blocks_cut_the_edges_by_top(tmp_path_factory, monkeypatch, inc, per_part, budget):
    # reference: the edges in numpy's stable argsort order of their tops, cut at the
    # first top boundary at or after each multiple of per_part incidences (the plan's
    # definition, written with numpy), and the plain-Python tree twin for each part
    from cliquewise.parts import fitting
    from cliquewise.store import save_npy

    ptr, cand, y, pairs = inc
    d = tmp_path_factory.mktemp("plan")
    for name, arr in (("inc_ptr", ptr), ("inc_cand", cand.astype(np.int32)), ("weight", y)):
        save_npy(d / f"{name}.npy", arr)
    rank = candidate_rank(pairs)
    save_npy(d / "rank.npy", rank)
    save_npy(d / "by_rank.npy", np.argsort(rank))
    monkeypatch.setattr(fitting, "PLAN_BLOCK", 3)  # many blocks
    planned = fitting.plan_tree_parts(str(d), str(d), per_part, budget)

    top = row_tops(ptr, cand, rank)
    order = np.argsort(top, kind="stable")
    if len(order) == 0:
        assert planned == []
        return
    cum = np.cumsum(np.diff(ptr)[order])
    n_parts = max(1, -(-int(cum[-1]) // per_part))
    first = np.flatnonzero(np.concatenate([[True], top[order][1:] != top[order][:-1]]))
    want_at = np.searchsorted(cum, np.linspace(0, cum[-1], n_parts + 1)[1:-1], side="left") + 1
    cuts = np.append(first, len(order))[np.searchsorted(first, want_at, side="left")]
    bounds = np.unique(np.concatenate([[0], cuts, [len(order)]]))
    want_parts = [np.sort(order[a:b]) for a, b in zip(bounds[:-1], bounds[1:])]
    assert len(planned) == len(want_parts)
    for part, want in zip(planned, want_parts):
        got = fitting.tree_part(part, str(d), budget=budget)
        tree = [np.load(f) for f in fitting._files(d, part["index"], "g")]
        ref = build_tree_reference(ptr, cand, y, want, rank)
        for g, w in zip(tree, ref):
            np.testing.assert_array_equal(g, w)
        assert got["incidences"] == int(np.diff(ptr)[want].sum()) and got["edges"] == len(want)
