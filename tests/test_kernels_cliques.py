"""Degeneracy, maximal cliques and the level sweep against outside references.

References: networkx (core_number, find_cliques, shipped weighted graphs), igraph
(Graph.maximal_cliques), and the published counts of Moon and Moser (1965): the
complete multipartite graph with k parts of size 3 has exactly 3^k maximal cliques,
and with k parts of size 2 (the cocktail-party graph) exactly 2^k.
"""

import time

import igraph
import networkx as nx
import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from cliquewise.kernels.cliques import (
    candidates_reference,
    degeneracy_order,
    degeneracy_order_reference,
    level_max_of,
    level_min,
    level_min_reference,
    maximal_cliques,
    maximal_cliques_reference,
    sweep_candidates,
    sweep_with_ranges,
)
from cliquewise.kernels.graph import csr_from_edges

# (small, split) settings that route sub-problems through each code path:
# one-word bitsets, multi-word bitsets, and the degeneracy split of large S
PATHS = [(64, 1024), (0, 1024), (3, 4), (0, 0)]


# ---------------------------------------------------------------- helpers
def from_networkx(g, weight="weight"):
    """(n, u, v, w, lev) with nodes relabelled in sorted order, lev = rank of w."""
    names = sorted(g.nodes())
    idx = {s: i for i, s in enumerate(names)}
    e = sorted((min(idx[a], idx[b]), max(idx[a], idx[b]), d.get(weight, 1))
               for a, b, d in g.edges(data=True))
    u = np.array([a for a, _, _ in e], np.int64)
    v = np.array([b for _, b, _ in e], np.int64)
    w = np.array([x for _, _, x in e])
    lev = np.unique(w, return_inverse=True)[1].astype(np.int32) if len(w) else w
    return len(names), u, v, w, np.asarray(lev, np.int32)


def clique_sets(ptr, nodes):
    out = [frozenset(nodes[ptr[k]:ptr[k + 1]].tolist()) for k in range(len(ptr) - 1)]
    for k in range(len(ptr) - 1):
        c = nodes[ptr[k]:ptr[k + 1]]
        assert np.all(np.diff(c) > 0), "members must be sorted ascending"
    return out


def sweep_dict(n, u, v, lev, blocks=None, small=64, split=1024, local=None):
    """Run the sweep (optionally over edge blocks) -> {frozenset: (lmin, lmax)}.

    ``local``: the largest first-end degree that takes the per-vertex path (None:
    the default, 64; 0: every edge by the general path)."""
    knobs = {} if local is None else {"_local": local}
    indptr, nbr, nlev, eid = csr_from_edges(n, u, v, lev)
    cuts = [0, len(u)] if blocks is None else blocks
    out = {}
    for lo, hi in zip(cuts[:-1], cuts[1:]):
        ptr, nodes, lmax, status, work = sweep_candidates(
            indptr, nbr, nlev, eid, u, v, lev, lo, hi, _small=small, _split=split, **knobs)
        assert status == 0
        lmin = level_min(indptr, nbr, nlev, ptr, nodes)
        np.testing.assert_array_equal(level_max_of(indptr, nbr, nlev, ptr, nodes), lmax)
        for key, a, b in zip(clique_sets(ptr, nodes), lmin, lmax):
            assert key not in out, f"{sorted(key)} listed twice"
            out[key] = (int(a), int(b))
    return out


@st.composite
def weighted_graphs(draw, max_n=25, max_w=5):
    """Random graphs (n <= 25) with weights 1..5, edges in a random order."""
    n = draw(st.integers(2, max_n))
    pairs = [(a, b) for a in range(n) for b in range(a + 1, n)]
    density = draw(st.floats(0.05, 0.9))
    seed = draw(st.integers(0, 2**32 - 1))
    rng = np.random.default_rng(seed)
    keep = [pq for pq in pairs if rng.random() < density]
    rng.shuffle(keep)
    u = np.array([a for a, _ in keep], np.int64)
    v = np.array([b for _, b in keep], np.int64)
    w = rng.integers(1, max_w + 1, len(keep))
    lev = np.unique(w, return_inverse=True)[1].astype(np.int32) if len(w) else w
    return n, u, v, np.asarray(lev, np.int32), rng


# ------------------------------------------------------------- degeneracy
@settings(max_examples=40, deadline=None)
@given(weighted_graphs(max_n=40))
def test_degeneracy_matches_networkx_core_number(graph):
    # reference: networkx.core_number
    n, u, v, lev, _ = graph
    indptr, nbr, _, _ = csr_from_edges(n, u, v, lev)
    order, core = degeneracy_order(indptr, nbr)
    ref = degeneracy_order_reference(n, u, v)
    np.testing.assert_array_equal(core, ref)
    assert sorted(order.tolist()) == list(range(n))
    # smallest-last order: a vertex has at most core[x] neighbours after it
    rank = np.empty(n, np.int64)
    rank[order] = np.arange(n)
    for x in range(n):
        later = sum(rank[y] > rank[x] for y in nbr[indptr[x]:indptr[x + 1]])
        assert later <= core[x]


@pytest.mark.parametrize("make", [nx.karate_club_graph, nx.les_miserables_graph,
                                  nx.davis_southern_women_graph])
def test_degeneracy_on_shipped_graphs(make):
    # reference: networkx.core_number on graphs shipped with networkx
    g = make()
    n, u, v, _, lev = from_networkx(g)
    indptr, nbr, _, _ = csr_from_edges(n, u, v, lev)
    _, core = degeneracy_order(indptr, nbr)
    names = sorted(g.nodes())
    cn = nx.core_number(g)
    np.testing.assert_array_equal(core, [cn[s] for s in names])
    assert core.max() == max(cn.values())


# -------------------------------------------------------- maximal cliques
@settings(max_examples=100, deadline=None)
@given(weighted_graphs(max_n=30), st.sampled_from([64, 0, 2]))
def test_maximal_cliques_match_networkx(graph, small):
    # reference: networkx.find_cliques (cliques of size >= 2)
    n, u, v, lev, _ = graph
    indptr, nbr, _, _ = csr_from_edges(n, u, v, lev)
    got = clique_sets(*maximal_cliques(indptr, nbr, _small=small))
    assert len(got) == len(set(got))
    assert set(got) == maximal_cliques_reference(n, u, v)


@pytest.mark.parametrize("k", range(1, 9))
def test_moon_moser_count(k):
    # published: Moon and Moser (1965), K_{3,...,3} with k parts has 3^k maximal
    # cliques, each taking one vertex from every part
    g = nx.complete_multipartite_graph(*([3] * k))
    n, u, v, _, lev = from_networkx(g)
    indptr, nbr, _, _ = csr_from_edges(n, u, v, lev)
    for small in (64, 0):
        got = clique_sets(*maximal_cliques(indptr, nbr, _small=small))
        if k == 1:
            assert got == []  # three isolated vertices: no clique of size >= 2
            continue
        assert len(got) == 3**k == len(set(got))
        parts = [frozenset(x // 3 for x in c) for c in got]
        assert all(len(c) == k and len(p) == k for c, p in zip(got, parts))
    if 2 <= k <= 5:  # reference: networkx.find_cliques on the same graph
        assert set(got) == maximal_cliques_reference(n, u, v)


def test_maximal_cliques_match_igraph():
    # reference: igraph Graph.maximal_cliques(min=2) on a random graph
    rng = np.random.default_rng(7)
    n = 120
    pairs = np.array([(a, b) for a in range(n) for b in range(a + 1, n)])
    keep = pairs[rng.random(len(pairs)) < 0.15]
    u, v = keep[:, 0], keep[:, 1]
    indptr, nbr, _, _ = csr_from_edges(n, u, v, np.zeros(len(u), np.int32))
    got = set(clique_sets(*maximal_cliques(indptr, nbr)))
    ig = igraph.Graph(n=n, edges=keep.tolist())
    ref = {frozenset(c) for c in ig.maximal_cliques(min=2)}
    assert len(ref) > 100
    assert got == ref


# ------------------------------------------------------------ the sweep
@pytest.mark.parametrize("make", [nx.les_miserables_graph, nx.karate_club_graph])
@pytest.mark.parametrize("small, split", PATHS)
@pytest.mark.parametrize("local", [None, 0])
def test_sweep_matches_per_level_networkx_on_shipped_graphs(make, small, split, local):
    # reference: networkx.find_cliques on every threshold graph of the weights
    # shipped with networkx (les_miserables_graph, karate_club_graph)
    n, u, v, w, lev = from_networkx(make())
    ref = candidates_reference(n, u, v, lev)
    got = sweep_dict(n, u, v, lev, small=small, split=split, local=local)
    assert got == ref


def test_level_max_is_the_smallest_edge_weight():
    # reference: the networkx les_miserables_graph weights, read edge by edge
    g = nx.les_miserables_graph()
    names = sorted(g.nodes())
    n, u, v, w, lev = from_networkx(g)
    levels = np.unique(w)
    got = sweep_dict(n, u, v, lev)
    assert len(got) > 50
    for c, (lmin, lmax) in got.items():
        cs = sorted(c)
        smallest = min(g[names[a]][names[b]]["weight"]
                       for i, a in enumerate(cs) for b in cs[i + 1:])
        assert levels[lmax] == smallest
        assert lmin <= lmax


@settings(max_examples=200, deadline=None)
@given(weighted_graphs(), st.sampled_from(PATHS), st.sampled_from([None, 0, 4]))
def test_sweep_matches_per_level_networkx_on_random_graphs(graph, path, local):
    # reference: networkx.find_cliques on every threshold graph
    n, u, v, lev, rng = graph
    ref = candidates_reference(n, u, v, lev)
    got = sweep_dict(n, u, v, lev, small=path[0], split=path[1], local=local)
    assert got == ref
    # the same set from several edge blocks, concatenated, without duplicates
    if len(u) > 1:
        cuts = sorted(set(rng.integers(0, len(u) + 1, 3).tolist()) | {0, len(u)})
        got = sweep_dict(n, u, v, lev, blocks=cuts, small=path[0], split=path[1], local=local)
        assert got == ref


@settings(max_examples=80, deadline=None)
@given(weighted_graphs(max_n=20))
def test_union_over_levels_is_each_clique_once_at_its_smallest_edge(graph):
    # reference: networkx.find_cliques per level. A clique maximal at some level is
    # maximal at the level of its smallest edge, so the union of per-level maximal
    # cliques holds each vertex set once with that level as its highest level.
    n, u, v, lev, _ = graph
    g = nx.Graph()
    g.add_edges_from((a, b, {"lev": int(t)}) for a, b, t in zip(u, v, lev))
    top = int(lev.max()) if len(lev) else -1
    union = {}
    for t in range(top + 1):
        gt = nx.Graph([(a, b) for a, b, d in g.edges(data=True) if d["lev"] >= t])
        for c in nx.find_cliques(gt):
            if len(c) >= 2:
                union.setdefault(frozenset(c), []).append(t)
    got = sweep_dict(n, u, v, lev)
    assert set(got) == set(union)
    for c, ts in union.items():
        cs = sorted(c)
        smallest = min(g[a][b]["lev"] for i, a in enumerate(cs) for b in cs[i + 1:])
        assert max(ts) == smallest == got[c][1]
        assert ts == list(range(min(ts), max(ts) + 1))  # one contiguous range
        assert got[c][0] == min(ts)


def test_sweep_of_a_single_level_is_networkx_find_cliques():
    # reference: networkx.find_cliques (one level: candidates = maximal cliques)
    rng = np.random.default_rng(3)
    n = 60
    pairs = np.array([(a, b) for a in range(n) for b in range(a + 1, n)])
    keep = pairs[rng.random(len(pairs)) < 0.3]
    u, v = keep[:, 0], keep[:, 1]
    lev = np.zeros(len(u), np.int32)
    got = sweep_dict(n, u, v, lev)
    assert set(got) == maximal_cliques_reference(n, u, v)
    assert all(lo == hi == 0 for lo, hi in got.values())


def test_large_common_neighbourhood_takes_the_split_path():
    # reference: networkx.find_cliques per level. Two hubs joined at level 0 share
    # 2000 neighbours, so edge (0, 1) has |S| = 2000 > 1024 at its own level and is
    # solved through the degeneracy split with the default thresholds.
    rng = np.random.default_rng(5)
    n = 2002
    edges = {(0, 1)} | {(h, x) for h in (0, 1) for x in range(2, n)}
    for x, y in rng.integers(2, n, (3000, 2)):
        if x != y:
            edges.add((min(x, y), max(x, y)))
    edges = sorted(edges)
    perm = rng.permutation(len(edges))
    u = np.array([a for a, _ in edges], np.int64)[perm]
    v = np.array([b for _, b in edges], np.int64)[perm]
    lev = rng.integers(0, 3, len(edges)).astype(np.int32)
    lev[(u == 0) & (v == 1)] = 0
    assert sweep_dict(n, u, v, lev) == candidates_reference(n, u, v, lev)


def cocktail_party(k):
    """K_{2,...,2}: 2k vertices, all pairs except (2i, 2i+1)."""
    n = 2 * k
    pairs = [(a, b) for a in range(n) for b in range(a + 1, n)
             if not (a % 2 == 0 and b == a + 1)]
    u = np.array([a for a, _ in pairs], np.int64)
    v = np.array([b for _, b in pairs], np.int64)
    return n, u, v, np.zeros(len(pairs), np.int32)


@pytest.mark.parametrize("small, split", PATHS)
def test_cocktail_party_count(small, split):
    # published: Moon and Moser (1965), parts of size 2: 2^k maximal cliques
    n, u, v, lev = cocktail_party(8)
    indptr, nbr, nlev, eid = csr_from_edges(n, u, v, lev)
    ptr, nodes, lmax, status, _ = sweep_candidates(
        indptr, nbr, nlev, eid, u, v, lev, _small=small, _split=split)
    got = clique_sets(ptr, nodes)
    assert status == 0 and len(got) == 2**8 == len(set(got))
    assert set(got) == set(clique_sets(*maximal_cliques(indptr, nbr, _small=small)))


@pytest.mark.parametrize("small, split", [(64, 1024), (0, 1024), (64, 8)])
def test_blowup_guard_stops_on_clique_budget(small, split):
    # published: the cocktail-party graph on 60 vertices has 2^30 maximal cliques
    # (Moon and Moser 1965); the budget must stop the listing long before that
    n, u, v, lev = cocktail_party(30)
    indptr, nbr, nlev, eid = csr_from_edges(n, u, v, lev)
    sweep_candidates(indptr, nbr, nlev, eid, u, v, lev, 0, 1, max_cliques=10,
                     _small=small, _split=split)  # load the compiled kernel
    t = time.perf_counter()
    ptr, nodes, lmax, status, work = sweep_candidates(
        indptr, nbr, nlev, eid, u, v, lev, max_cliques=100_000, _small=small,
        _split=split)
    elapsed = time.perf_counter() - t
    assert status == 1
    assert elapsed < 3.0
    assert len(ptr) - 1 == 100_000 and np.all(np.diff(ptr) == 30)
    # what was listed is genuine and distinct: sorted rows with one vertex of
    # every non-adjacent pair (2i, 2i + 1)
    rows = nodes.reshape(100_000, 30)
    assert np.all(np.diff(rows, axis=1) > 0)
    np.testing.assert_array_equal(rows // 2, np.tile(np.arange(30), (100_000, 1)))
    choice = (rows - 2 * np.arange(30)) @ (1 << np.arange(30))  # which end of each pair
    assert len(np.unique(choice)) == 100_000
    assert np.all(lmax == 0)


def test_blowup_guard_stops_on_work_budget():
    # published: as above, 2^30 maximal cliques; the work budget stops it
    n, u, v, lev = cocktail_party(30)
    indptr, nbr, nlev, eid = csr_from_edges(n, u, v, lev)
    t = time.perf_counter()
    ptr, nodes, lmax, status, work = sweep_candidates(
        indptr, nbr, nlev, eid, u, v, lev, max_work=2_000_000)
    assert status == 2
    assert 2_000_000 < work < 2_100_000
    assert time.perf_counter() - t < 3.0
    assert 0 < len(ptr) - 1 < 2**30


def test_budgets_not_reached_give_status_zero():
    # reference: networkx.find_cliques on les_miserables per level
    n, u, v, w, lev = from_networkx(nx.les_miserables_graph())
    indptr, nbr, nlev, eid = csr_from_edges(n, u, v, lev)
    ref = candidates_reference(n, u, v, lev)
    ptr, nodes, _, status, work = sweep_candidates(
        indptr, nbr, nlev, eid, u, v, lev, max_cliques=len(ref), max_work=10**9)
    assert status == 0 and len(ptr) - 1 == len(ref) and work > 0
    ptr, nodes, _, status, _ = sweep_candidates(
        indptr, nbr, nlev, eid, u, v, lev, max_cliques=len(ref) - 1)
    assert status == 1 and len(ptr) - 1 == len(ref) - 1


def test_wide_neighbour_ids():
    # reference: networkx.find_cliques per level, CSR built with int64 neighbours
    n, u, v, w, lev = from_networkx(nx.karate_club_graph())
    indptr, nbr, nlev, eid = csr_from_edges(n, u, v, lev, nbr_dtype=np.int64)
    ptr, nodes, lmax, status, _ = sweep_candidates(indptr, nbr, nlev, eid, u, v, lev)
    lmin = level_min(indptr, nbr, nlev, ptr, nodes)
    got = {c: (int(a), int(b)) for c, a, b in zip(clique_sets(ptr, nodes), lmin, lmax)}
    assert status == 0 and got == candidates_reference(n, u, v, lev)
    mc = set(clique_sets(*maximal_cliques(indptr, nbr)))
    assert mc == maximal_cliques_reference(n, u, v)


def test_bad_arguments():
    n, u, v, lev = cocktail_party(3)
    csr = csr_from_edges(n, u, v, lev)
    with pytest.raises(ValueError, match="edge block"):
        sweep_candidates(*csr, u, v, lev, 0, len(u) + 1)
    with pytest.raises(ValueError, match="_small"):
        sweep_candidates(*csr, u, v, lev, _small=65)


# ------------------------------------------------------------- level_min
def sub_cliques(ptr, nodes, rng, per=2):
    """Random non-empty subsets of the given cliques (cliques too, mostly not maximal)."""
    out = []
    for k in range(len(ptr) - 1):
        c = nodes[ptr[k]:ptr[k + 1]]
        for _ in range(per):
            size = int(rng.integers(1, len(c) + 1))
            out.append(np.sort(rng.choice(c, size, replace=False)))
    p = np.zeros(len(out) + 1, np.int64)
    p[1:] = np.cumsum([len(c) for c in out])
    return p, (np.concatenate(out) if out else np.zeros(0, np.int64)).astype(np.int64)


@settings(max_examples=80, deadline=None)
@given(weighted_graphs(max_n=25))
def test_level_min_matches_reference_on_any_clique(graph):
    # reference: level_min_reference, which checks every outside vertex in plain
    # Python; on sweep candidates, on maximal cliques of G_0 (networkx.find_cliques
    # is the reference for those, see above) and on random sub-cliques of them
    n, u, v, lev, rng = graph
    csr = csr_from_edges(n, u, v, lev)
    indptr, nbr, nlev, eid = csr
    ptr, nodes, _, _, _ = sweep_candidates(*csr, u, v, lev)
    sets = [(ptr, nodes), maximal_cliques(indptr, nbr)]
    sets.append(sub_cliques(*sets[1], rng))
    for p, x in sets:
        np.testing.assert_array_equal(level_min(indptr, nbr, nlev, p, x),
                                      level_min_reference(u, v, lev, p, x))


def test_level_min_with_a_hub_member_and_read_only_arrays():
    # reference: level_min_reference. A hub (node 0, 3000 neighbours) sits in every
    # clique, so rows are long and survivors few (the binary-search path), and the
    # arrays are read-only, as the memory-mapped graph files of a run are.
    rng = np.random.default_rng(11)
    n = 3001
    edges = {(0, x) for x in range(1, n)}
    for x, y in rng.integers(1, n, (6000, 2)):
        if x != y:
            edges.add((min(x, y), max(x, y)))
    for base in range(1, 400, 8):  # planted 5-cliques with the hub: 6-cliques
        grp = [0] + list(range(base, base + 5))
        edges |= {(a, b) for i, a in enumerate(grp) for b in grp[i + 1:]}
    edges = sorted(edges)
    u = np.array([a for a, _ in edges], np.int64)
    v = np.array([b for _, b in edges], np.int64)
    lev = rng.integers(0, 4, len(edges)).astype(np.int32)
    csr = csr_from_edges(n, u, v, lev)
    for a in csr:
        a.flags.writeable = False
    ptr, nodes = maximal_cliques(csr[0], csr[1])
    p, x = sub_cliques(ptr, nodes, rng, per=1)
    for pp, xx in ((ptr, nodes), (p, x)):
        got = level_min(csr[0], csr[1], csr[2], pp, xx)
        ref = level_min_reference(u, v, lev, pp, xx)
        np.testing.assert_array_equal(got, ref)
    assert np.any(got > 0) and np.any(got == 0)


# ------------------------------------------------------------- sweep with ranges
def _pair_edges_reference(u, v, ptr, nodes):
    """Edge id of each member pair (i < j in member order), from a plain dict."""
    edge_of = {(int(a), int(b)): e for e, (a, b) in enumerate(zip(u, v))}
    out = []
    for k in range(len(ptr) - 1):
        m = [int(x) for x in nodes[ptr[k]:ptr[k + 1]]]
        out += [edge_of[(m[i], m[j])] for i in range(len(m)) for j in range(i + 1, len(m))]
    return np.array(out, np.int64)


def _check_ranges(n, u, v, lev, small=64, split=1024, cuts=None, table=None, local=None):
    csr = csr_from_edges(n, u, v, lev)
    cuts = [0, len(u)] if cuts is None else cuts
    knobs = {} if local is None else {"_local": local}
    for lo, hi in zip(cuts[:-1], cuts[1:]):
        want = sweep_candidates(*csr, u, v, lev, lo, hi, _small=small, _split=split, **knobs)
        got = sweep_with_ranges(*csr, u, v, lev, lo, hi, _small=small, _split=split, _table=table, **knobs)
        for a, b in zip(want, got[:5]):
            np.testing.assert_array_equal(a, b)
        ptr, nodes = got[0], got[1]
        # references: level_min_reference (every outside vertex checked in plain
        # Python) and a dict from node pair to edge id
        np.testing.assert_array_equal(got[5], level_min_reference(u, v, lev, ptr, nodes))
        np.testing.assert_array_equal(got[6], _pair_edges_reference(u, v, ptr, nodes))


@settings(max_examples=150, deadline=None)
@given(weighted_graphs(), st.sampled_from(PATHS), st.sampled_from([None, 0, 3]), st.sampled_from([None, 0, 4]))
def test_sweep_with_ranges_gives_level_min_and_pair_edges_of_the_references(graph, path, table, local):
    # table: the link table for every edge (None: the default size), for none (0:
    # binary searches in the members' rows), or for common neighbourhoods of <= 3;
    # local: the per-vertex path for first ends of <= 64 (None), none (0) or <= 4
    # neighbours
    n, u, v, lev, rng = graph
    cuts = sorted(set(rng.integers(0, len(u) + 1, 3).tolist()) | {0, len(u)})
    _check_ranges(n, u, v, lev, small=path[0], split=path[1], cuts=cuts, table=table, local=local)


@pytest.mark.parametrize("make", [nx.les_miserables_graph, nx.karate_club_graph])
@pytest.mark.parametrize("small, split", PATHS)
def test_sweep_with_ranges_on_shipped_graphs(make, small, split):
    # networkx's shipped weighted graphs (Les Miserables co-appearances; Zachary's karate club)
    n, u, v, w, lev = from_networkx(make())
    order = np.argsort(-lev, kind="stable")  # as the stage sweeps: high levels first
    # the per-vertex path where it applies; else with the link table, or by binary searches
    for table, local in ((None, None), (None, 0), (0, 0)):
        _check_ranges(n, u[order], v[order], lev[order], small=small, split=split, table=table, local=local)


@pytest.mark.parametrize("common", [63, 64, 65])
def test_sweep_with_ranges_at_the_link_table_size_limit(common):
    # An edge (0, 1) of the top level whose ends share 63, 64 or 65 neighbours (the
    # link table holds one machine word, 64), all joined to 0 and 1 at the top level
    # and sparsely among themselves by a networkx random graph (gnp_random_graph) at
    # random levels. The last shared neighbour is the only one that extends the
    # clique {0, 1, 2}, below the top level. References: level_min_reference (plain
    # Python) and a dict from node pair to edge id (_check_ranges).
    last = common + 1
    inner = nx.gnp_random_graph(common - 2, 0.08, seed=common)
    rng = np.random.default_rng(common)
    level = {(0, 1): 2}
    level.update({(e, x): 2 for x in range(2, last + 1) for e in (0, 1)})
    level.update({(a + 3, b + 3): int(rng.integers(0, 3)) for a, b in inner.edges()})
    level[(2, last)] = 1
    edges = sorted(level)
    u = np.array([a for a, _ in edges], np.int64)
    v = np.array([b for _, b in edges], np.int64)
    lev = np.array([level[e] for e in edges], np.int32)
    order = np.argsort(-lev, kind="stable")  # (0, 1) first
    u, v, lev = u[order], v[order], lev[order]
    csr = csr_from_edges(last + 1, u, v, lev)
    assert np.intersect1d(csr[1][csr[0][0]:csr[0][1]], csr[1][csr[0][1]:csr[0][2]]).size == common
    got = sweep_with_ranges(*csr, u, v, lev)
    k = [i for i in range(len(got[0]) - 1) if got[1][got[0][i]:got[0][i + 1]].tolist() == [0, 1, 2]]
    assert len(k) == 1 and got[5][k[0]] == 2  # maximal down to level 2; the last neighbour extends it at 1
    for table, local in ((None, None), (None, 0), (0, 0)):  # vertex 0 has 64, 65 or 66 neighbours
        _check_ranges(last + 1, u, v, lev, table=table, local=local)


@pytest.mark.parametrize("small, split", [(64, 1024), (0, 0)])
def test_sweep_with_ranges_where_its_buffers_grow(small, split):
    # A hub joined to everyone and a planted 80-clique in a networkx random graph
    # (gnp_random_graph): common neighbourhoods of hundreds of vertices, thousands
    # of cliques per call and long pair lists, so every buffer of the sweep grows
    # and the output is redone when full. References: the separate passes
    # level_min and candidate_pairs, each checked against a plain-Python twin above
    # and in test_kernels_incidence.py.
    from cliquewise.kernels.incidence import candidate_pairs

    g = nx.gnp_random_graph(300, 0.12, seed=4)
    g.add_edges_from((0, x) for x in range(1, 300))
    g.add_edges_from((a, b) for a in range(200, 280) for b in range(a + 1, 280))
    rng = np.random.default_rng(4)
    e = sorted(g.edges())
    u = np.array([a for a, _ in e], np.int64)
    v = np.array([b for _, b in e], np.int64)
    lev = rng.integers(0, 4, len(e)).astype(np.int32)
    order = np.argsort(-lev, kind="stable")
    u, v, lev = u[order], v[order], lev[order]
    csr = csr_from_edges(300, u, v, lev)
    ptr, nodes, lmax, status, _, lmin, pairs = sweep_with_ranges(*csr, u, v, lev, _small=small, _split=split)
    assert status == 0
    assert len(ptr) - 1 > 5000 and np.diff(ptr).max() >= 80 and len(pairs) > 100_000
    np.testing.assert_array_equal(lmin, level_min(csr[0], csr[1], csr[2], ptr, nodes))
    np.testing.assert_array_equal(pairs, candidate_pairs(csr[0], csr[1], csr[3], ptr, nodes, len(u), _wide=True))


def test_per_vertex_path_gives_the_general_paths_arrays():
    # First ends on both sides of the per-vertex path's limit (64 neighbours): a
    # networkx random graph (gnp_random_graph) with five hubs, edges in the edge
    # store's (u, v) order as the stage sweeps them, in blocks that cut rows. The
    # two paths must agree array for array (the work count aside), and the default
    # one with the references of _check_ranges.
    g = nx.gnp_random_graph(150, 0.25, seed=7)
    rng = np.random.default_rng(7)
    g.add_edges_from((h, int(x)) for h in range(5) for x in rng.choice(np.arange(5, 150), 70, replace=False))
    e = sorted(g.edges())
    u = np.array([a for a, _ in e], np.int64)
    v = np.array([b for _, b in e], np.int64)
    lev = rng.integers(0, 4, len(e)).astype(np.int32)
    deg = np.bincount(np.concatenate([u, v]))
    assert deg[:5].min() > 64 and (deg[5:] <= 64).all()
    csr = csr_from_edges(150, u, v, lev)
    cuts = [0, int(np.searchsorted(u, 3)) + 7, len(u) // 2, len(u)]
    for lo, hi in zip(cuts[:-1], cuts[1:]):
        general = sweep_with_ranges(*csr, u, v, lev, lo, hi, _local=0)
        per_vertex = sweep_with_ranges(*csr, u, v, lev, lo, hi)
        assert len(general[0]) > 100
        for i, (a, b) in enumerate(zip(general, per_vertex)):
            if i != 4:
                np.testing.assert_array_equal(a, b)
    _check_ranges(150, u, v, lev, cuts=cuts)


def test_per_vertex_path_refuses_an_edge_missing_from_the_csr():
    # a CSR built without edge (0, 1) but asked to sweep it: a clear error, not a
    # read of another vertex's row (no outside reference: our own input check)
    u = np.array([0, 0, 1], np.int64)
    v = np.array([1, 2, 2], np.int64)
    lev = np.zeros(3, np.int32)
    csr = csr_from_edges(3, u[1:], v[1:], lev[1:])
    with pytest.raises(ValueError, match="missing from the row"):
        sweep_with_ranges(*csr, u, v, lev)
