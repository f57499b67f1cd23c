"""Edge-to-candidate incidence against a plain-Python twin and networkx graphs."""

import networkx as nx
import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from cliquewise.kernels.cliques import maximal_cliques, sweep_candidates
from cliquewise.kernels.graph import csr_from_edges
from cliquewise.kernels.incidence import (
    count_buckets,
    count_rows,
    count_rows_in,
    incidence,
    incidence_reference,
    scatter_rows,
    scatter_rows_in,
    starts_from_counts,
)


def from_networkx(g):
    names = sorted(g.nodes())
    idx = {s: i for i, s in enumerate(names)}
    e = sorted((min(idx[a], idx[b]), max(idx[a], idx[b]), d.get("weight", 1))
               for a, b, d in g.edges(data=True))
    u = np.array([a for a, _, _ in e], np.int64)
    v = np.array([b for _, b, _ in e], np.int64)
    w = np.array([x for _, _, x in e])
    lev = np.unique(w, return_inverse=True)[1].astype(np.int32)
    return len(names), u, v, lev


def check_incidence(n, u, v, ptr, nodes, csr):
    indptr, nbr, nlev, eid = csr
    inc_ptr, inc_cand = incidence(indptr, nbr, eid, ptr, nodes, len(u))
    # reference: the plain-Python twin (a dict from node pair to edge id)
    ref_ptr, ref_cand = incidence_reference(u, v, ptr, nodes)
    np.testing.assert_array_equal(inc_ptr, ref_ptr)
    np.testing.assert_array_equal(inc_cand, ref_cand)
    sizes = np.diff(ptr)
    assert inc_ptr[-1] == int(np.sum(sizes * (sizes - 1) // 2))
    per_cand = np.bincount(inc_cand, minlength=len(sizes))
    np.testing.assert_array_equal(per_cand, sizes * (sizes - 1) // 2)
    for e in range(len(u)):
        row = inc_cand[inc_ptr[e]:inc_ptr[e + 1]]
        assert np.all(np.diff(row) > 0)
        for k in row:
            members = set(nodes[ptr[k]:ptr[k + 1]].tolist())
            assert {int(u[e]), int(v[e])} <= members
    return inc_ptr, inc_cand


@pytest.mark.parametrize("make", [nx.les_miserables_graph, nx.karate_club_graph,
                                  nx.florentine_families_graph])
def test_incidence_on_sweep_candidates_of_shipped_graphs(make):
    # reference: graphs shipped with networkx, and networkx's own clique lists:
    # every edge of a maximal clique of G_0 (networkx.find_cliques) must list it
    n, u, v, lev = from_networkx(make())
    csr = csr_from_edges(n, u, v, lev)
    ptr, nodes, _, status, _ = sweep_candidates(*csr, u, v, lev)
    assert status == 0
    inc_ptr, inc_cand = check_incidence(n, u, v, ptr, nodes, csr)
    cands = {frozenset(nodes[ptr[k]:ptr[k + 1]].tolist()): k
             for k in range(len(ptr) - 1)}
    g = nx.Graph(list(zip(u.tolist(), v.tolist())))
    edge_id = {(int(a), int(b)): e for e, (a, b) in enumerate(zip(u, v))}
    for c in nx.find_cliques(g):
        k = cands[frozenset(c)]
        cs = sorted(c)
        for i, a in enumerate(cs):
            for b in cs[i + 1:]:
                e = edge_id[(a, b)]
                assert k in inc_cand[inc_ptr[e]:inc_ptr[e + 1]]


@settings(max_examples=60, deadline=None)
@given(st.integers(2, 25), st.floats(0.05, 0.9), st.integers(0, 2**32 - 1))
def test_incidence_matches_reference_on_random_graphs(n, density, seed):
    # reference: the plain-Python twin, on sweep candidates of random weighted graphs
    rng = np.random.default_rng(seed)
    pairs = [(a, b) for a in range(n) for b in range(a + 1, n)
             if rng.random() < density]
    rng.shuffle(pairs)
    u = np.array([a for a, _ in pairs], np.int64)
    v = np.array([b for _, b in pairs], np.int64)
    lev = rng.integers(0, 4, len(pairs)).astype(np.int32)
    csr = csr_from_edges(n, u, v, lev)
    ptr, nodes, _, _, _ = sweep_candidates(*csr, u, v, lev)
    check_incidence(n, u, v, ptr, nodes, csr)
    ptr, nodes = maximal_cliques(csr[0], csr[1])
    check_incidence(n, u, v, ptr, nodes, csr)


def test_moon_moser_incidence_counts():
    # published: K_{3,3,3,3} has 3^4 = 81 maximal cliques of size 4 (Moon and Moser
    # 1965); each edge joins two parts and lies in 3^2 = 9 of them
    g = nx.complete_multipartite_graph(3, 3, 3, 3)
    n, u, v, lev = from_networkx(g)
    csr = csr_from_edges(n, u, v, lev)
    ptr, nodes = maximal_cliques(csr[0], csr[1])
    inc_ptr, inc_cand = check_incidence(n, u, v, ptr, nodes, csr)
    assert len(ptr) - 1 == 81 and inc_cand.size == 81 * 6
    np.testing.assert_array_equal(np.diff(inc_ptr), np.full(len(u), 9))


def test_no_candidates_and_non_cliques():
    n, u, v, lev = 4, np.array([0, 1]), np.array([1, 2]), np.zeros(2, np.int32)
    indptr, nbr, nlev, eid = csr_from_edges(n, u, v, lev)
    inc_ptr, inc_cand = incidence(indptr, nbr, eid, np.zeros(1, np.int64),
                                  np.zeros(0, np.int64), 2)
    np.testing.assert_array_equal(inc_ptr, [0, 0, 0])
    assert inc_cand.size == 0
    with pytest.raises(ValueError, match="not a clique"):
        incidence(indptr, nbr, eid, np.array([0, 3]), np.array([0, 1, 2]), 2)


@pytest.mark.parametrize("wide", [False, True])
def test_incidence_with_a_hub_member_and_read_only_arrays(wide):
    # reference: the plain-Python twin. A hub (node 0, 3000 neighbours) sits in
    # every maximal clique, so its row is searched by bisection rather than walked;
    # the arrays are read-only, as the memory-mapped files of a run are, and
    # ``wide`` takes the int64 pair buffer used from 2**31 edges on.
    rng = np.random.default_rng(12)
    n = 3001
    edges = {(0, x) for x in range(1, n)}
    for x, y in rng.integers(1, n, (6000, 2)):
        if x != y:
            edges.add((min(x, y), max(x, y)))
    for base in range(1, 400, 8):
        grp = [0] + list(range(base, base + 5))
        edges |= {(a, b) for i, a in enumerate(grp) for b in grp[i + 1:]}
    edges = sorted(edges)
    perm = rng.permutation(len(edges))  # edge ids in a random order
    u = np.array([a for a, _ in edges], np.int64)[perm]
    v = np.array([b for _, b in edges], np.int64)[perm]
    lev = np.zeros(len(u), np.int32)
    csr = csr_from_edges(n, u, v, lev)
    for a in csr:
        a.flags.writeable = False
    ptr, nodes = maximal_cliques(csr[0], csr[1])
    assert np.all(nodes[ptr[:-1]] == 0)
    inc_ptr, inc_cand = incidence(csr[0], csr[1], csr[3], ptr, nodes, len(u), _wide=wide)
    ref_ptr, ref_cand = incidence_reference(u, v, ptr, nodes)
    np.testing.assert_array_equal(inc_ptr, ref_ptr)
    np.testing.assert_array_equal(inc_cand, ref_cand)


@settings(max_examples=60, deadline=None)
@given(st.lists(st.integers(1, 6), min_size=0, max_size=30), st.integers(0, 4), st.integers(1, 5),
       st.integers(0, 2**31 - 1))
def test_incidence_by_edge_ranges_equals_the_whole_counting_sort(sizes, shift, n_ranges, seed):
    """count_buckets against numpy's bincount (numpy as reference), and the rows of
    edge ranges (count_rows_in, scatter_rows_in) against the counting sort over all
    edges, on random candidate sizes and edge ids."""
    rng = np.random.default_rng(seed)
    ptr = np.concatenate([[0], np.cumsum(sizes)]).astype(np.int64)
    n_pairs = int(sum(s * (s - 1) // 2 for s in sizes))
    n_edges = 40
    pair_e = rng.integers(0, n_edges, n_pairs).astype(np.int32)
    per_bucket = np.zeros(-(-n_edges // (1 << shift)), np.int64)
    count_buckets(pair_e, np.int64(shift), per_bucket)
    np.testing.assert_array_equal(per_bucket, np.bincount(pair_e >> shift, minlength=len(per_bucket)))
    cnt = np.zeros(n_edges + 2, np.int64)
    count_rows(pair_e, cnt)
    starts_from_counts(cnt, np.int64(n_edges))
    want = np.empty(n_pairs, np.int64)
    scatter_rows(ptr, pair_e, np.int64(5), cnt, want)
    bounds = np.linspace(0, n_edges, n_ranges + 1).astype(np.int64)
    got = []
    for lo, hi in zip(bounds[:-1], bounds[1:]):
        c = np.zeros(hi - lo + 2, np.int64)
        count_rows_in(pair_e, np.int64(lo), np.int64(hi), c)
        starts_from_counts(c, np.int64(hi - lo))
        part = np.empty(int(c[hi - lo + 1]), np.int64)
        scatter_rows_in(ptr, pair_e, np.int64(5), np.int64(lo), np.int64(hi), c, part)
        got.append(part)
    np.testing.assert_array_equal(np.concatenate(got), want)
