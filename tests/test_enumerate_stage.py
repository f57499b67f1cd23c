"""The split and enumerate stages end to end, through the real pipeline.

Every check compares the run store or the results tables with something the
project did not write:

* networkx ``find_cliques`` on each threshold graph (edges of weight >= t) for the
  candidate set and its level range, on the graphs networkx ships
  (``les_miserables_graph``: Knuth's co-appearance counts; ``karate_club_graph``:
  Zachary's 1977 weights) and on hypothesis-generated random weighted graphs;
* ``scipy.sparse.csgraph.connected_components`` for components, networkx
  ``degree`` / ``degree(weight=...)`` for degree and strength;
* ``itertools.combinations`` and ``scipy.sparse`` for the edge -> candidate
  incidence;
* the published count of Moon and Moser (1965) -- the cocktail-party graph on 2k
  vertices has 2^k maximal cliques -- and networkx ``core_number`` for the blow-up
  guard.
"""

from __future__ import annotations

import itertools
import json
import tempfile
import time
from pathlib import Path

import networkx as nx
import numpy as np
import pandas as pd
import pyarrow.parquet as pq
import pytest
import scipy.sparse as sp
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st
from scipy.sparse.csgraph import connected_components

import cliquewise
from _support import graph_frame, run_cli
from cliquewise.store import RunStore, load_npy

# --------------------------------------------------------------------------- helpers


def decompose(df, run_dir, engine, **kw):
    return cliquewise.decompose(df, run_dir, engine=engine, progress=False, **kw)


def run_candidates(run) -> dict:
    """{frozenset(labels): (level_min, level_max)} from results/members + cliques."""
    mem = run.members()
    sets = mem.groupby("clique_id")["label"].agg(frozenset)
    cl = run.cliques().set_index("clique_id")
    assert len(sets) == len(cl), "every candidate has members"
    out = {s: (float(cl.at[cid, "level_min"]), float(cl.at[cid, "level_max"])) for cid, s in sets.items()}
    assert len(out) == len(sets), "a vertex set is listed once"
    return out


def networkx_candidates(G, thresholds) -> dict:
    """Union over t of networkx.find_cliques (size >= 2) on G_t = edges with weight >= t,
    with the lowest and highest t at which each vertex set is a maximal clique."""
    out: dict = {}
    for t in sorted(float(x) for x in thresholds):
        H = nx.Graph()
        H.add_edges_from((a, b) for a, b, w in G.edges(data="weight") if w >= t)
        for c in nx.find_cliques(H):
            if len(c) >= 2:
                key = frozenset(c)
                lo, hi = out.get(key, (t, t))
                out[key] = (min(lo, t), max(hi, t))
    return out


def edge_store(run_dir) -> pd.DataFrame:
    """The edge store in its own order (part files in name order), as the stages read it."""
    files = sorted((Path(run_dir) / "ingest" / "edges").glob("part-*.parquet"))
    return pd.concat([pd.read_parquet(f) for f in files], ignore_index=True)


def weights_of(G) -> np.ndarray:
    return np.array([w for _, _, w in G.edges(data="weight")], np.float64)


LESMIS = nx.les_miserables_graph()  # networkx ships Knuth's co-appearance counts
KARATE = nx.karate_club_graph()  # networkx ships Zachary's weights (1..7)


# --------------------------------------------------------------------------- candidate set


@pytest.mark.parametrize("name, G", [("lesmis", LESMIS), ("karate", KARATE)])
def test_candidates_are_the_per_level_union_of_networkx_cliques(tmp_path, engine, name, G):
    run = decompose(graph_frame(G), tmp_path / name, engine)
    got = run_candidates(run)
    # reference: networkx.find_cliques on every threshold graph, thresholds = every
    # distinct weight (the default levels="all")
    want = networkx_candidates(G, np.unique(weights_of(G)))
    assert set(got) == set(want)
    assert got == want  # level_min / level_max: lowest / highest threshold where maximal
    levels = load_npy(tmp_path / name / "enumerate" / "levels.npy")
    np.testing.assert_array_equal(levels, np.unique(weights_of(G)))


@st.composite
def weighted_graphs(draw):
    """A small random graph with integer weights on a few levels (ties included)."""
    n = draw(st.integers(3, 11))
    pairs = list(itertools.combinations(range(n), 2))
    keep = draw(st.lists(st.booleans(), min_size=len(pairs), max_size=len(pairs)))
    top = draw(st.integers(1, 5))
    G = nx.Graph()
    for (a, b), k in zip(pairs, keep):
        if k:
            G.add_edge(a, b, weight=draw(st.integers(1, top)))
    if G.number_of_edges() == 0:
        G.add_edge(0, 1, weight=1)
    return G


@settings(max_examples=12, deadline=None, suppress_health_check=[HealthCheck.too_slow])
@given(G=weighted_graphs())
def test_candidates_match_networkx_on_random_graphs(engine, G):
    with tempfile.TemporaryDirectory() as d:
        run = decompose(graph_frame(G), Path(d) / "run", engine)
        got = run_candidates(run)
    # reference: networkx.find_cliques on each threshold graph
    assert got == networkx_candidates(G, np.unique(weights_of(G)))


# --------------------------------------------------------------------------- --levels


def test_explicit_level_list(tmp_path, engine):
    spec = [0.5, 2, 3.5, 6, 10, 1000]  # 0.5 below and 1000 above every weight
    run = decompose(graph_frame(LESMIS), tmp_path / "r", engine, levels=spec)
    chosen = load_npy(tmp_path / "r" / "enumerate" / "levels.npy")
    w = weights_of(LESMIS)
    # the listed thresholds inside (min weight, max weight], plus the minimum weight
    # (so every edge lies in some threshold graph); weights from networkx's dataset
    want_levels = sorted({w.min(), *[t for t in spec if w.min() < t <= w.max()]})
    np.testing.assert_array_equal(chosen, want_levels)
    # reference: networkx.find_cliques on the threshold graphs of those levels only
    assert run_candidates(run) == networkx_candidates(LESMIS, chosen)


@pytest.mark.parametrize("count", [2, 4, 7])
def test_level_count(tmp_path, engine, count):
    run = decompose(graph_frame(LESMIS), tmp_path / "r", engine, levels=count)
    chosen = load_npy(tmp_path / "r" / "enumerate" / "levels.npy")
    w = weights_of(LESMIS)
    assert 1 <= len(chosen) <= count
    assert chosen[0] == w.min() and np.all(np.diff(chosen) > 0)
    assert set(chosen.tolist()) <= set(w.tolist())  # thresholds are observed weights
    # with 7 levels Les Miserables (17 distinct weights) really gets coarsened
    assert len(chosen) < len(np.unique(w))
    # reference: networkx.find_cliques on the threshold graphs the stage chose
    assert run_candidates(run) == networkx_candidates(LESMIS, chosen)


@pytest.mark.parametrize("name, G", [("lesmis", LESMIS), ("karate", KARATE)])
def test_one_level_gives_the_maximal_cliques_of_the_whole_graph(tmp_path, engine, name, G):
    run = decompose(graph_frame(G), tmp_path / name, engine, levels=1)
    got = run_candidates(run)
    # reference: networkx.find_cliques on the whole graph, weights ignored
    want = {frozenset(c) for c in nx.find_cliques(G) if len(c) >= 2}
    assert set(got) == want
    wmin = float(weights_of(G).min())
    assert set(got.values()) == {(wmin, wmin)}


# --------------------------------------------------------------------------- split


def several_components() -> nx.Graph:
    """Les Miserables + karate (relabelled) + a triangle + a lone pair."""
    G = nx.Graph(LESMIS)
    G.add_weighted_edges_from((f"k{a}", f"k{b}", w) for a, b, w in KARATE.edges(data="weight"))
    G.add_weighted_edges_from([("t1", "t2", 2), ("t2", "t3", 5), ("t1", "t3", 1), ("zz1", "zz2", 7)])
    return G


def test_components_degree_and_strength(tmp_path, engine):
    G = several_components()
    run = decompose(graph_frame(G).sample(frac=1.0, random_state=1), tmp_path / "r", engine)
    root = tmp_path / "r"
    nodes = pq.read_table(root / "split" / "nodes.parquet").to_pandas()
    labels = pq.read_table(root / "ingest" / "labels.parquet").to_pandas()
    n = len(labels)
    assert n == G.number_of_nodes()
    np.testing.assert_array_equal(nodes.node_id, np.arange(n))
    edges = edge_store(root)
    # reference: scipy.sparse.csgraph.connected_components on the edge store
    A = sp.coo_matrix((np.ones(len(edges)), (edges.u, edges.v)), shape=(n, n))
    n_comp, ref = connected_components(A, directed=False)
    comp = nodes.component.to_numpy()
    assert comp.max() + 1 == n_comp == 4
    # same partition: the smallest node id of each node's component agrees
    smallest = lambda lab: pd.Series(np.arange(n)).groupby(lab).transform("min").to_numpy()  # noqa: E731
    np.testing.assert_array_equal(smallest(comp), smallest(ref))
    # documented numbering: components in the order of their smallest node id
    firsts = np.sort(np.unique(smallest(ref)))
    np.testing.assert_array_equal(comp, np.searchsorted(firsts, smallest(ref)))

    # reference: networkx degree and degree(weight="weight"), per label, in the split
    # stage's table and in the results table that copies it
    split = nodes.assign(label=labels.set_index("node_id").loc[nodes.node_id, "label"].to_numpy()).set_index("label")
    res = run.nodes().set_index("label")
    for lab in G.nodes():
        for table in (split, res):
            assert table.at[lab, "degree"] == G.degree(lab)
            assert table.at[lab, "strength"] == G.degree(lab, weight="weight")
    # per-component counts against networkx.connected_components
    cp = pq.read_table(root / "split" / "components.parquet").to_pandas().set_index("component")
    lab_comp = dict(zip(res.index, res.component))
    for members in nx.connected_components(G):
        H = G.subgraph(members)
        c = lab_comp[next(iter(members))]
        assert cp.at[c, "nodes"] == H.number_of_nodes()
        assert cp.at[c, "edges"] == H.number_of_edges()
        assert cp.at[c, "weight"] == H.size(weight="weight")


# --------------------------------------------------------------------------- incidence


@pytest.mark.parametrize("levels", ["all", 3])
def test_incidence_is_every_pair_of_every_candidate(tmp_path, engine, levels):
    G = several_components()
    decompose(graph_frame(G), tmp_path / "r", engine, levels=levels)
    enu = tmp_path / "r" / "enumerate"
    inc_ptr, inc_cand = load_npy(enu / "inc_ptr.npy"), load_npy(enu / "inc_cand.npy")
    cand_ptr, cand_nodes = load_npy(enu / "cand_ptr.npy"), load_npy(enu / "cand_nodes.npy")
    edges = edge_store(tmp_path / "r")
    E, K = len(edges), len(cand_ptr) - 1
    assert len(inc_ptr) == E + 1 and inc_ptr[0] == 0 and inc_ptr[-1] == len(inc_cand)
    np.testing.assert_array_equal(load_npy(enu / "weight.npy"), edges.weight.to_numpy(np.float64))

    # reference 1: itertools.combinations of each candidate's members, looked up in the
    # edge store, gives the (edge, candidate) pairs; the incidence must be exactly those
    eid = {(a, b): i for i, (a, b) in enumerate(zip(edges.u.tolist(), edges.v.tolist()))}
    want = set()
    for k in range(K):
        for a, b in itertools.combinations(sorted(cand_nodes[cand_ptr[k]:cand_ptr[k + 1]].tolist()), 2):
            want.add((eid[(a, b)], k))  # KeyError = a candidate that is not a clique
    rows = np.repeat(np.arange(E), np.diff(inc_ptr))
    got = list(zip(rows.tolist(), inc_cand.tolist()))
    assert len(got) == len(set(got)), "an edge lists a candidate twice"
    assert set(got) == want

    # reference 2 (scipy.sparse): s(s-1)/2 entries per candidate of size s, and both
    # ends of every entry's edge are members of its candidate
    inc = sp.csr_matrix((np.ones(len(inc_cand)), inc_cand, inc_ptr), shape=(E, K))
    size = np.diff(cand_ptr)
    np.testing.assert_array_equal(np.asarray(inc.sum(axis=0)).ravel(), size * (size - 1) // 2)
    n = int(max(edges.v.max(), cand_nodes.max())) + 1
    member = sp.coo_matrix((np.ones(len(cand_nodes)), (cand_nodes, np.repeat(np.arange(K), size))),
                           shape=(n, K)).tocsr()  # node x candidate, 0/1
    ends = sp.coo_matrix((np.ones(2 * E), (np.tile(np.arange(E), 2), np.concatenate([edges.u, edges.v]))),
                         shape=(E, n)).tocsr()
    inside = (ends @ member).multiply(inc)  # for each incidence: how many ends are members
    np.testing.assert_array_equal(inside.data, 2.0)
    assert inside.nnz == inc.nnz
    assert np.all(np.diff(inc_ptr) > 0), "every edge lies in some candidate"


# --------------------------------------------------------------------------- blow-up guard


def cocktail_party_frame(k: int, prefix="p") -> pd.DataFrame:
    """The complement of a perfect matching on 2k vertices (all pairs but (2i, 2i+1))."""
    rows = [(f"{prefix}{a:02d}", f"{prefix}{b:02d}", 1) for a, b in itertools.combinations(range(2 * k), 2)
            if a // 2 != b // 2]
    return pd.DataFrame(rows, columns=["source", "target", "weight"])


def nx_graph(df) -> nx.Graph:
    return nx.from_pandas_edgelist(df, "source", "target", "weight")


def assert_stopped(run_dir, rc, err, seconds, comp_frame, budget_word):
    assert rc == 2, err
    errors = [line for line in err.splitlines() if line.startswith("cliquewise: error:")]
    assert len(errors) == 1, err
    line = errors[0]
    assert budget_word in line
    G = nx_graph(comp_frame)
    # networkx core_number: the cocktail party on 60 vertices is 58-regular, degeneracy 58
    degen = max(nx.core_number(G).values())
    nodes = pq.read_table(run_dir / "split" / "nodes.parquet").to_pandas()
    labels = pq.read_table(run_dir / "ingest" / "labels.parquet").to_pandas()
    comp = int(nodes.component[labels.label == comp_frame.source.iloc[0]].iloc[0])
    assert (f"component {comp} ({G.number_of_nodes()} nodes, {G.number_of_edges()} edges, "
            f"degeneracy {degen})") in line
    for way_out in ("--max-cliques", "--max-seconds", "--levels"):
        assert way_out in line
    store = RunStore(run_dir, create=False)
    assert store.verify("split")[0]
    assert not store.verify("enumerate")[0]
    assert not (run_dir / "enumerate" / "manifest.json").exists()
    assert not (run_dir / "results").exists()
    assert seconds < 15, f"the guard took {seconds:.1f} s"


@pytest.mark.parametrize("with_karate", [False, True])
def test_blow_up_guard_on_clique_count(tmp_path, with_karate):
    # published: the cocktail-party graph on 60 vertices has 2^30 maximal cliques
    # (Moon and Moser 1965), far beyond the budget of 100000
    cp = cocktail_party_frame(30)
    df = cp
    if with_karate:  # karate's labels sort first, so its edges open the edge block
        k = graph_frame(KARATE)
        k["source"], k["target"] = "a" + k.source.astype(str), "a" + k.target.astype(str)
        df = pd.concat([k, cp], ignore_index=True)
    df.to_parquet(tmp_path / "export.parquet")
    t = time.perf_counter()
    rc, _, err = run_cli("run", "--edges", tmp_path / "export.parquet", "--run-dir", tmp_path / "run",
                         "--max-cliques", 100000)
    assert_stopped(tmp_path / "run", rc, err, time.perf_counter() - t, cp, "clique count budget (100000 cliques)")


@pytest.mark.parametrize("with_karate", [False, True])
def test_blow_up_guard_on_seconds(tmp_path, with_karate):
    # the default clique budget (2e7) would take tens of seconds to reach here
    cp = cocktail_party_frame(30)
    df = cp
    if with_karate:
        k = graph_frame(KARATE)
        k["source"], k["target"] = "a" + k.source.astype(str), "a" + k.target.astype(str)
        df = pd.concat([k, cp], ignore_index=True)
    df.to_parquet(tmp_path / "export.parquet")
    t = time.perf_counter()
    rc, _, err = run_cli("run", "--edges", tmp_path / "export.parquet", "--run-dir", tmp_path / "run",
                         "--max-seconds", 0.5)
    seconds = time.perf_counter() - t
    assert_stopped(tmp_path / "run", rc, err, seconds, cp, "time budget (0.5 s)")
    assert seconds < 6


def test_clique_component_is_emitted_directly(tmp_path):
    # a 150-node complete component at one weight level: one candidate, no search
    # (listing it edge by edge costs about k**4); reference: networkx.find_cliques
    import itertools
    import time

    import cliquewise

    rows = [(f"c{i}", f"c{j}", 2) for i, j in itertools.combinations(range(150), 2)]
    K = nx.karate_club_graph()  # weights shipped with networkx
    rows += [(f"k{a}", f"k{b}", d["weight"]) for a, b, d in K.edges(data=True)]
    df = pd.DataFrame(rows, columns=["source", "target", "weight"])
    t0 = time.perf_counter()
    run = cliquewise.decompose(df, tmp_path / "run", progress=False)
    assert time.perf_counter() - t0 < 60
    man = json.loads((tmp_path / "run" / "enumerate" / "manifest.json").read_text())
    assert man["counts"]["direct_components"] == 1
    mem = run.members()
    got = {frozenset(g.label) for _, g in mem.groupby("clique_id")}
    G = nx.Graph()
    G.add_weighted_edges_from(rows)
    ref = set()
    for t in sorted({w for _, _, w in rows}):
        H = nx.Graph([(a, b) for a, b, w in G.edges(data="weight") if w >= t])
        ref |= {frozenset(c) for c in nx.find_cliques(H) if len(c) >= 2}
    assert got == ref
    big = run.cliques().iloc[0]
    assert big["size"] == 150 and big["level_max"] == 2 and big["level_min"] == 1
