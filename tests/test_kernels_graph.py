"""CSR construction and edge lookup against scipy.sparse and plain Python."""

import networkx as nx
import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from cliquewise.kernels.graph import (
    csr_from_edges,
    csr_from_edges_reference,
    degeneracy_kernel,
    find_edge,
    find_edge_reference,
    intersect_merge,
    intersect_reference,
    intersect_sorted,
    prefetch_member_rows,
)


@st.composite
def edge_lists(draw, max_n=30):
    """Random simple graphs as (n, u, v, lev) with u < v, in a random edge order."""
    n = draw(st.integers(1, max_n))
    pairs = [(a, b) for a in range(n) for b in range(a + 1, n)]
    chosen = draw(st.lists(st.sampled_from(pairs), unique=True, max_size=len(pairs))
                  if pairs else st.just([]))
    lev = draw(st.lists(st.integers(0, 6), min_size=len(chosen), max_size=len(chosen)))
    u = np.array([a for a, _ in chosen], np.int64)
    v = np.array([b for _, b in chosen], np.int64)
    return n, u, v, np.array(lev, np.int32)


def _assert_same_csr(got, ref):
    for g, r in zip(got, ref):
        np.testing.assert_array_equal(np.asarray(g, np.int64), np.asarray(r, np.int64))


@settings(max_examples=60, deadline=None)
@given(edge_lists())
def test_csr_matches_scipy(graph):
    # reference: scipy.sparse builds the same symmetric matrix with sorted indices
    n, u, v, lev = graph
    got = csr_from_edges(n, u, v, lev)
    _assert_same_csr(got, csr_from_edges_reference(n, u, v, lev))
    assert got[1].dtype == np.int32 and got[2].dtype == np.int32
    assert got[0].dtype == np.int64 and got[3].dtype == np.int32  # edge ids: int32 below 2**31 edges


def test_csr_on_les_miserables_matches_scipy_and_networkx():
    # reference: networkx's shipped les_miserables_graph (degrees, weights) and scipy
    g = nx.les_miserables_graph()
    names = sorted(g.nodes())
    idx = {s: i for i, s in enumerate(names)}
    e = sorted((min(idx[a], idx[b]), max(idx[a], idx[b]), d["weight"])
               for a, b, d in g.edges(data=True))
    u = np.array([a for a, _, _ in e])
    v = np.array([b for _, b, _ in e])
    w = np.array([x for _, _, x in e])
    lev = np.unique(w, return_inverse=True)[1].astype(np.int32)
    indptr, nbr, nlev, eid = csr_from_edges(len(names), u, v, lev)
    _assert_same_csr((indptr, nbr, nlev, eid),
                     csr_from_edges_reference(len(names), u, v, lev))
    np.testing.assert_array_equal(np.diff(indptr), [g.degree(s) for s in names])
    # every entry carries the weight level of its own edge
    for x in range(len(names)):
        for p in range(indptr[x], indptr[x + 1]):
            y = names[nbr[p]]
            assert w[eid[p]] == g[names[x]][y]["weight"]
            assert nlev[p] == lev[eid[p]]


@settings(max_examples=40, deadline=None)
@given(edge_lists(max_n=15))
def test_int64_neighbours_match(graph):
    # reference: scipy.sparse (same arrays, wider neighbour dtype)
    n, u, v, lev = graph
    got = csr_from_edges(n, u, v, lev, nbr_dtype=np.int64)
    assert got[1].dtype == np.int64
    _assert_same_csr(got, csr_from_edges_reference(n, u, v, lev))


@settings(max_examples=40, deadline=None)
@given(edge_lists(max_n=15))
def test_find_edge_matches_scan_and_edge_set(graph):
    # reference: a linear scan of the row, and membership in the Python edge set
    n, u, v, lev = graph
    indptr, nbr, nlev, eid = csr_from_edges(n, u, v, lev)
    edges = {(int(a), int(b)): k for k, (a, b) in enumerate(zip(u, v))}
    for a in range(n):
        for b in range(n):
            pos = find_edge(indptr, nbr, a, b)
            assert pos == find_edge_reference(indptr, nbr, a, b)
            key = (min(a, b), max(a, b))
            if key in edges and a != b:
                assert pos >= 0 and nbr[pos] == b and eid[pos] == edges[key]
            else:
                assert pos == -1


def test_empty_and_isolated_nodes():
    # reference: scipy.sparse on the same (edge-less) input
    u = np.zeros(0, np.int64)
    got = csr_from_edges(4, u, u, np.zeros(0, np.int32))
    np.testing.assert_array_equal(got[0], np.zeros(5))
    _assert_same_csr(got, csr_from_edges_reference(4, u, u, np.zeros(0, np.int32)))


@pytest.mark.parametrize(
    "u, v, lev, message",
    [
        ([1], [0], [0], "u < v"),
        ([0], [5], [0], r"\[0, n\)"),
        ([0], [1], [-1], ">= 0"),
        ([0, 1], [1], [0], "same length"),
    ],
)
def test_invalid_input_is_rejected(u, v, lev, message):
    with pytest.raises(ValueError, match=message):
        csr_from_edges(3, np.array(u), np.array(v), np.array(lev))


sorted_ids = st.lists(st.integers(0, 400), unique=True, max_size=120).map(sorted)


@settings(max_examples=150, deadline=None)
@given(sorted_ids, sorted_ids, st.integers(0, 3), st.integers(0, 3),
       st.sampled_from([np.int32, np.int64]))
def test_intersections_match_numpy(a, b, pad_a, pad_b, dtype):
    # reference: numpy.intersect1d (positions of the common values); the slices
    # sit inside larger arrays to check the offsets, and the sizes range from
    # equal (merge) to lopsided (galloping search)
    A = np.array([-5] * pad_a + a + [10**6] * pad_a, dtype)
    B = np.array([-7] * pad_b + b + [10**6 + 1] * pad_b, np.int64)
    alo, ahi, blo, bhi = pad_a, pad_a + len(a), pad_b, pad_b + len(b)
    ia, ib = intersect_reference(a, b)
    room = max(1, min(len(a), len(b)))
    outA = np.full(room, -1, np.int64)
    outB = np.full(room, -1, np.int64)
    m, work = intersect_sorted(A, alo, ahi, B, blo, bhi, outA, outB)
    np.testing.assert_array_equal(outA[:m] - alo, ia)
    np.testing.assert_array_equal(outB[:m] - blo, ib)
    assert work >= 0
    m2 = intersect_merge(A, alo, ahi, B, blo, bhi, outA, outB)
    assert m2 == len(ia)
    np.testing.assert_array_equal(outA[:m2] - alo, ia)
    np.testing.assert_array_equal(outB[:m2] - blo, ib)


@settings(max_examples=40, deadline=None)
@given(edge_lists(max_n=30))
def test_degeneracy_kernel_matches_networkx_core_number(graph):
    # reference: networkx.core_number; and the smallest-last property checked
    # directly (a vertex has at most core[x] neighbours after it in the order)
    n, u, v, lev = graph
    indptr, nbr, _, _ = csr_from_edges(n, u, v, lev)
    order, core = degeneracy_kernel(indptr, nbr)
    g = nx.Graph()
    g.add_nodes_from(range(n))
    g.add_edges_from(zip(u.tolist(), v.tolist()))
    cn = nx.core_number(g)
    np.testing.assert_array_equal(core, [cn[x] for x in range(n)])
    rank = np.empty(n, np.int64)
    rank[order] = np.arange(n)
    for x in range(n):
        assert sum(rank[y] > rank[x] for y in nbr[indptr[x]:indptr[x + 1]]) <= core[x]


def test_prefetch_member_rows_changes_nothing():
    # reference: numpy copies of the inputs, compared after the call. The hint runs
    # on every set of a list (past the end of the list and of the arrays too, for
    # an empty last row) and on read-only arrays, as memory-mapped files give.
    n, u, v, lev = 6, np.array([0, 0, 1, 2]), np.array([1, 2, 2, 4]), np.zeros(4, np.int32)
    arrays = list(csr_from_edges(n, u, v, lev))
    ptr = np.array([0, 2, 3, 5, 6], np.int64)
    nodes = np.array([0, 1, 2, 4, 5, 3], np.int64)  # nodes 3 and 5 have empty rows
    before = [a.copy() for a in arrays + [ptr, nodes]]
    for a in arrays + [ptr, nodes]:
        a.flags.writeable = False
    indptr, nbr, nlev, eid = arrays
    for k in range(len(ptr) - 1):
        prefetch_member_rows(indptr, nbr, nlev, ptr, nodes, k)
        prefetch_member_rows(indptr, nbr, eid, ptr, nodes, k)
    for a, b in zip(arrays + [ptr, nodes], before):
        np.testing.assert_array_equal(a, b)
