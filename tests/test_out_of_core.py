"""Runs in pieces under a memory budget: the same outputs whatever the budget.

With a worker memory limit, the enumerate stage builds the CSR a range of rows at
a time, sweeps units with the graph's mapped pages trimmed, and builds the
incidence a range of edges at a time; the fit keeps its vectors in files (tested
in ``test_vectors.py``). Each piece is checked here with budgets small enough to
force many ranges, against:

* scipy.sparse for the CSR (``csr_from_edges_reference`` lets scipy sort it);
* numpy's ``np.quantile(..., method="lower")`` for quantile levels;
* itertools.combinations of each candidate's members for the incidence;
* the same stage without a budget (every array identical), and the union over
  thresholds of networkx ``find_cliques`` on networkx's ``les_miserables_graph``
  (Knuth's co-appearance counts) for the candidates found under a tiny budget;
* a whole run of about 1.8M simulated edges on two worker processes limited to
  1 GB each, against the embedded engine without a limit (identical tables).
"""

from __future__ import annotations

import itertools
import json
from pathlib import Path

import networkx as nx
import numpy as np
import pandas as pd
import pyarrow as pa
import pyarrow.parquet as pq
import pytest
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

import cliquewise
from _support import graph_frame
from cliquewise.engine import Engine
from cliquewise.kernels.graph import csr_from_edges_reference
from cliquewise.parts import candidates as parts
from cliquewise.store import load_npy

ENUM_OUTPUTS = ("cand_ptr", "cand_nodes", "level_min", "level_max", "inc_ptr", "inc_cand", "weight", "levels")


def write_edge_files(folder: Path, u, v, w, n_files: int) -> list[Path]:
    folder.mkdir(parents=True, exist_ok=True)
    files = []
    for i, idx in enumerate(np.array_split(np.arange(len(u)), n_files)):
        f = folder / f"part-{i:05d}.parquet"
        pq.write_table(pa.table({"u": u[idx], "v": v[idx], "weight": w[idx]}), f)
        files.append(f)
    return files


@st.composite
def weighted_graphs(draw):
    n = draw(st.integers(2, 40))
    pairs = draw(st.lists(st.tuples(st.integers(0, n - 1), st.integers(0, n - 1)).filter(lambda p: p[0] != p[1]),
                          min_size=1, max_size=150))
    uv = np.unique(np.sort(np.array(pairs, np.int64), axis=1), axis=0)
    order = draw(st.permutations(range(len(uv))))  # the edge store is in no particular order
    uv = uv[list(order)]
    w = np.array(draw(st.lists(st.integers(1, 6), min_size=len(uv), max_size=len(uv))), np.float64)
    return n, uv[:, 0].copy(), uv[:, 1].copy(), w


@settings(max_examples=40, deadline=None, suppress_health_check=[HealthCheck.function_scoped_fixture])
@given(g=weighted_graphs(), budget=st.sampled_from([None, 16, 100, 1000]), n_files=st.integers(1, 3),
       pieces=st.integers(1, 4))
def test_csr_built_in_row_ranges_equals_scipy(tmp_path_factory, monkeypatch, g, budget, n_files, pieces):
    n, u, v, w = g
    monkeypatch.setattr(parts, "READ_BLOCK", 7)  # several blocks per file
    root = tmp_path_factory.mktemp("csr")
    files = write_edge_files(root / "edges", u, v, w, n_files)
    # as the stage does it: row ranges cut for `pieces` threads, filled in any order
    info = parts.prepare_graph(files, n, "all", root / "graph", budget, pieces)
    for rows in reversed(info["ranges"]):
        parts.csr_range(root / "graph", *rows)
    if pieces > 1:  # an equal share is less than all entries, so the rows are cut
        assert info["row_ranges"] > 1
    got = parts.load_graph(root / "graph")
    levels = np.unique(w)
    lev = np.searchsorted(levels, w, side="right") - 1
    # reference: scipy.sparse builds and sorts the same CSR
    indptr, nbr, nlev, eid = csr_from_edges_reference(n, u, v, lev)
    for name, want in (("indptr", indptr), ("nbr", nbr), ("nlev", nlev), ("eid", eid), ("u", u), ("v", v),
                       ("lev", lev), ("weight", w)):
        np.testing.assert_array_equal(np.asarray(got[name]), want, err_msg=name)
    np.testing.assert_array_equal(load_npy(root / "graph" / "levels.npy"), levels)
    if budget == 16:
        assert info["row_ranges"] > 1


@settings(max_examples=60, deadline=None)
@given(w=st.lists(st.integers(1, 30), min_size=1, max_size=300), spec=st.integers(1, 25))
def test_quantile_levels_from_counts_equal_numpy(w, spec):
    w = np.array(w, np.float64)
    # reference: numpy's own "lower" quantiles of the raw weights
    q = np.quantile(w, np.linspace(0.0, 1.0, spec, endpoint=False), method="lower")
    want = np.unique(np.concatenate([[w.min()], q]))
    np.testing.assert_array_equal(parts.choose_levels(w, spec), want)
    values, counts = np.unique(w, return_counts=True)
    np.testing.assert_array_equal(parts.levels_from_counts(values, counts, spec), want)


def _enumerate_arrays(run_dir: Path) -> dict:
    return {name: load_npy(run_dir / "enumerate" / f"{name}.npy") for name in ENUM_OUTPUTS}


def _run(frame, run_dir, engine, **kw):
    return cliquewise.decompose(frame, run_dir, engine=engine, progress=False, **kw)


@pytest.mark.parametrize("budget", [3_000, 60_000])
def test_enumerate_under_a_budget_equals_the_unbounded_stage(tmp_path, engine, monkeypatch, budget):
    G = nx.les_miserables_graph()  # shipped with networkx: Knuth's co-appearance counts
    frame = graph_frame(G)
    _run(frame, tmp_path / "free", engine, edges_per_unit=40)
    free = _enumerate_arrays(tmp_path / "free")
    # the same engine, told its tasks may hold only `budget` bytes: the CSR, the trimmed
    # units and the incidence all go in pieces
    monkeypatch.setattr(Engine, "task_memory", lambda self: budget)
    monkeypatch.setattr(parts, "INC_BUCKET", 8)
    run = _run(frame, tmp_path / "tight", engine, edges_per_unit=40)
    tight = _enumerate_arrays(tmp_path / "tight")
    for name in ENUM_OUTPUTS:
        np.testing.assert_array_equal(tight[name], free[name], err_msg=name)
    counts = json.loads((tmp_path / "tight" / "enumerate" / "manifest.json").read_text())["counts"]
    if budget == 3_000:
        assert counts["graph_row_ranges"] > 1 and counts["incidence_ranges"] > 1

    # reference: the union over thresholds of networkx find_cliques
    want = set()
    for t in sorted({w for _, _, w in G.edges(data="weight")}):
        H = nx.Graph([(a, b) for a, b, w in G.edges(data="weight") if w >= t])
        want |= {frozenset(c) for c in nx.find_cliques(H) if len(c) >= 2}
    mem = run.members()
    assert set(mem.groupby("clique_id")["label"].agg(frozenset)) == want


@pytest.mark.parametrize("budget", [None, 40, 400])
def test_incidence_in_edge_ranges_is_every_pair_of_every_candidate(tmp_path, monkeypatch, budget):
    rng = np.random.default_rng(3)
    G = nx.gnm_random_graph(60, 400, seed=4)  # networkx generator: a graph with many triangles
    u, v = np.array(sorted((min(a, b), max(a, b)) for a, b in G.edges()), np.int64).T
    w = rng.integers(1, 4, len(u)).astype(np.float64)
    files = write_edge_files(tmp_path / "edges", u, v, w, 2)
    gdir = tmp_path / "graph"
    parts.build_graph(files, 60, "all", gdir)
    monkeypatch.setattr(parts, "INC_BUCKET", 16)
    units = parts.plan_units(len(u), 97)
    tags = [f"e{lo:012d}" for lo, _ in units]
    for (lo, hi), tag in zip(units, tags):
        res = parts.enumerate_unit(str(gdir), lo, hi, 10**9, 1e9, tmp_path / "cl", tag, trim=1)  # trim every block
        assert res["status"] == 0
    # no budget: cut into 3 ranges of about equal incidences, as the stage does for its threads
    info = parts.collect_units(tmp_path / "cl", tags, tmp_path / "out", len(u), "all", budget, pieces=3)
    assert info["incidence_ranges"] >= 3
    if budget == 40:
        assert info["incidence_ranges"] > 5
    inc_ptr, inc_cand = load_npy(tmp_path / "out" / "inc_ptr.npy"), load_npy(tmp_path / "out" / "inc_cand.npy")
    cand_ptr, cand_nodes = load_npy(tmp_path / "out" / "cand_ptr.npy"), load_npy(tmp_path / "out" / "cand_nodes.npy")
    # reference: itertools.combinations of every candidate, looked up in the edge list;
    # rows list their candidates ascending
    eid = {(a, b): i for i, (a, b) in enumerate(zip(u.tolist(), v.tolist()))}
    rows = [[] for _ in range(len(u))]
    for k in range(len(cand_ptr) - 1):
        for a, b in itertools.combinations(sorted(cand_nodes[cand_ptr[k]:cand_ptr[k + 1]].tolist()), 2):
            rows[eid[(a, b)]].append(k)
    np.testing.assert_array_equal(inc_ptr, np.concatenate([[0], np.cumsum([len(r) for r in rows])]))
    np.testing.assert_array_equal(inc_cand, np.concatenate([np.array(r, np.int64) for r in rows]))
    assert info["uncovered_edges"] == 0 and info["incidences"] == len(inc_cand)
    sizes = np.diff(cand_ptr)
    assert info["largest_candidate"] == sizes.max() and info["member_rows"] == len(cand_nodes)
    # every edge of the gnm graph lies in a maximal clique of its level's graph
    assert len(set(map(frozenset, (cand_nodes[a:b].tolist() for a, b in zip(cand_ptr[:-1], cand_ptr[1:]))))) \
        == len(cand_ptr) - 1


def test_trimming_the_mapped_graph_changes_nothing(tmp_path):
    G = nx.les_miserables_graph()
    frame = graph_frame(G)
    labels = pd.Index(sorted(set(frame.source) | set(frame.target)))
    u = labels.get_indexer(frame.source)
    v = labels.get_indexer(frame.target)
    u, v = np.minimum(u, v).astype(np.int64), np.maximum(u, v).astype(np.int64)
    files = write_edge_files(tmp_path / "edges", u, v, frame.weight.to_numpy(np.float64), 1)
    parts.build_graph(files, len(labels), "all", tmp_path / "g")
    a = parts.enumerate_unit(str(tmp_path / "g"), 0, len(u), 10**9, 1e9, tmp_path / "a", "a")
    b = parts.enumerate_unit(str(tmp_path / "g"), 0, len(u), 10**9, 1e9, tmp_path / "b", "b", trim=1)
    assert a["candidates"] == b["candidates"] > 0
    for name in parts.UNIT_ARRAYS:
        np.testing.assert_array_equal(load_npy(tmp_path / "a" / f"a.{name}.npy"),
                                      load_npy(tmp_path / "b" / f"b.{name}.npy"), err_msg=name)


@pytest.mark.cluster
def test_memory_limited_run_equals_the_unconstrained_run(tmp_path):
    # a simulated export of about 1.8M edges, run by two worker processes limited to
    # 1 GB each (dask's own limit: a worker that passes it is restarted, and the
    # run would stop), and by the embedded engine without a limit: the same bytes
    import subprocess
    import sys

    from cliquewise.simulate import simulate

    simulate(tmp_path / "sim", nodes=230_000, seed=9, labels="int")
    export = tmp_path / "sim" / "export"
    runs = {"free": [], "limited": ["--workers", "2", "--threads", "1", "--memory-limit", "1GB"]}
    for name, extra in runs.items():
        proc = subprocess.run([sys.executable, "-m", "cliquewise.cli", "--quiet", "run", "--edges", str(export),
                               "--run-dir", str(tmp_path / name), *extra], capture_output=True, text=True,
                              timeout=900)
        assert proc.returncode == 0, proc.stderr
    edges = json.loads((tmp_path / "free" / "ingest" / "manifest.json").read_text())["counts"]["pairs"]
    assert edges > 1_500_000
    for table in ("nodes", "cliques", "members"):
        pd.testing.assert_frame_equal(pd.read_parquet(tmp_path / "limited" / "results" / f"{table}.parquet"),
                                      pd.read_parquet(tmp_path / "free" / "results" / f"{table}.parquet"),
                                      check_exact=True)
    for name in ("mu", "mu_full"):
        np.testing.assert_array_equal(load_npy(tmp_path / "limited" / "fit" / f"{name}.npy"),
                                      load_npy(tmp_path / "free" / "fit" / f"{name}.npy"))


@settings(max_examples=60, deadline=None)
@given(w=st.lists(st.one_of(st.integers(-5, 40).map(float), st.floats(-3, 50, allow_nan=False)), min_size=1,
                  max_size=200),
       spec=st.one_of(st.just("all"), st.integers(1, 12)))
def test_level_lookup_equals_numpy_searchsorted(w, spec):
    # reference: numpy.searchsorted (the highest threshold at or below each weight),
    # for integer weights (the table) and for any weights (binary search)
    w = np.array(w, np.float64)
    levels = parts.choose_levels(w, spec)
    want = np.searchsorted(levels, w, side="right") - 1
    got = parts.level_lookup(np.unique(w), levels)(w)
    assert got.dtype == np.int32
    np.testing.assert_array_equal(got, want)
    ints = np.floor(w)
    levels = parts.choose_levels(ints, spec)
    np.testing.assert_array_equal(parts.level_lookup(np.unique(ints), levels)(ints),
                                  np.searchsorted(levels, ints, side="right") - 1)


def test_level_lookup_of_a_wide_integer_span_searches():
    # integers further apart than the table's span: binary search, same answer
    # (reference: numpy.searchsorted)
    w = np.array([1.0, 5.0, float(parts.TABLE_SPAN) * 3, 7.0])
    levels = parts.choose_levels(w, "all")
    np.testing.assert_array_equal(parts.level_lookup(np.unique(w), levels)(w),
                                  np.searchsorted(levels, w, side="right") - 1)


@settings(max_examples=60, deadline=None)
@given(firsts=st.lists(st.integers(0, 30), min_size=1, max_size=200), extra=st.integers(0, 40),
       per_unit=st.integers(1, 400))
def test_units_of_equal_work_cover_the_edges_and_balance(firsts, extra, per_unit):
    # plain arithmetic as the reference: the units tile [0, E), cut only between
    # vertices, number ceil(E / per_unit) or fewer, and no unit's estimated work
    # passes an equal share by more than one vertex's work (common practice for
    # cutting a prefix sum, no source)
    firsts = np.array(firsts, np.int64)
    degree = firsts + extra
    n_edges = int(firsts.sum())
    units = parts.plan_units(n_edges, per_unit, firsts, degree)
    if n_edges == 0:
        assert units == []
        return
    assert units[0][0] == 0 and units[-1][1] == n_edges
    assert all(a < b for a, b in units) and all(b == c for (_, b), (c, _) in zip(units, units[1:]))
    assert len(units) <= -(-n_edges // per_unit)
    ends = set(np.cumsum(firsts).tolist())
    assert all(b in ends for _, b in units)
    cost = firsts + parts.BUILD_COST * np.where(firsts > 0, degree.astype(float) ** 2, 0.0)
    vertex_of_edge = np.repeat(np.arange(len(firsts)), firsts)
    share = cost.sum() / -(-n_edges // per_unit)
    for a, b in units:
        vs = np.unique(vertex_of_edge[a:b])
        assert cost[vs].sum() <= share + cost.max() + 1e-9
    # without the counts: equal numbers of edges
    plain = parts.plan_units(n_edges, per_unit)
    assert plain[0][0] == 0 and plain[-1][1] == n_edges and len(plain) <= -(-n_edges // per_unit)
    assert max(b - a for a, b in plain) <= per_unit
