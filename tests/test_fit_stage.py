"""The fit stage end to end, through the real pipeline, read back from the results.

Outside references, each named beside its check:

* scipy.sparse for the log-likelihood gradient (KKT conditions), computed from the
  results tables and the networkx graph, not from the run's own incidence;
* statsmodels GLM, Poisson family with identity link, on the full 0/1 design;
* networkx's shipped data: ``karate_club_graph`` (Zachary 1977, with weights),
  ``les_miserables_graph`` (Knuth's co-appearance counts) and
  ``davis_southern_women_graph`` (Davis, Gardner and Gardner 1941) projected with
  ``networkx.bipartite.weighted_projected_graph``;
* the planted truth of :func:`cliquewise.simulate.simulate` (``truth/*.parquet``);
* a dask ``LocalCluster`` of worker processes against the in-process engine, and a
  run killed with SIGKILL (``CLIQUEWISE_FAULT``) against an uninterrupted one.
"""

from __future__ import annotations

import json
import os
import subprocess
import sys
import warnings
from pathlib import Path

import networkx as nx
import numpy as np
import pandas as pd
import pytest
import scipy.sparse as sp
from networkx.algorithms import bipartite

import cliquewise
from _support import graph_frame, lesmis_export, run_cli
from cliquewise.store import load_npy

KARATE = nx.karate_club_graph()  # networkx ships Zachary's weights (1..7)
LESMIS = nx.les_miserables_graph()  # networkx ships Knuth's co-appearance counts
TIGHT = dict(tol=1e-15, max_iter=50000)  # run EM to its fixed point


def decompose(G_or_df, run_dir, engine=None, **kw):
    df = graph_frame(G_or_df) if isinstance(G_or_df, nx.Graph) else G_or_df
    return cliquewise.decompose(df, run_dir, engine=engine, progress=False, **kw)


def fitted(run, G):
    """From the results tables: intensities, pairs per candidate, and the (edge x
    candidate) 0/1 matrix A of the networkx graph's edges inside each candidate."""
    nodes = run.nodes()
    idx = dict(zip(nodes.label, nodes.node_id))
    cl = run.cliques().sort_values("clique_id")
    mem = run.members()
    K = len(cl)
    assert np.array_equal(cl.clique_id, np.arange(K))
    M = sp.csr_matrix((np.ones(len(mem)), (mem.node_id, mem.clique_id)), shape=(len(nodes), K))
    a = np.array([idx[x] for x, _ in G.edges()])
    b = np.array([idx[x] for _, x in G.edges()])
    y = np.array([w for *_, w in G.edges(data="weight")], np.float64)
    A = M[a].multiply(M[b]).tocsr()  # edge e inside candidate k: both ends are members
    size = cl["size"].to_numpy()
    P = size * (size - 1) / 2.0
    # every pair inside a candidate is an edge of G (candidates are cliques of G), so
    # the rows of A are all pairs inside candidates
    np.testing.assert_array_equal(np.asarray(A.sum(axis=0)).ravel(), P)
    return cl.intensity.to_numpy(), P, A, y, cl


def gradient(mu, P, A, y):
    """d/dmu_k of sum_e y_e log(lambda_e) - sum_k mu_k P_k, with lambda = A mu (scipy.sparse)."""
    lam = A @ mu
    assert np.all(lam > 0), "an observed pair has rate 0"
    return A.T @ (y / lam) - P


def ego(n, radius=1):
    return nx.ego_graph(KARATE, n, radius=radius)


# --------------------------------------------------------------------------- KKT, totals


@pytest.mark.parametrize("name, G", [("karate", KARATE), ("lesmis", LESMIS), ("ego33", ego(33)), ("ego7", ego(7))])
def test_kkt_conditions_of_the_full_model(tmp_path, engine, name, G):
    run = decompose(G, tmp_path / name, engine, prune=0.0, **TIGHT)
    mu, P, A, y, _ = fitted(run, G)
    g = gradient(mu, P, A, y)  # scipy.sparse, from the results tables
    # KKT of max L(mu) s.t. mu >= 0: g <= 0 everywhere, g = 0 where mu > 0. EM only
    # approaches mu = 0, so "mu > 0" means clearly positive (intensities here are O(1)).
    assert g.max() <= 1e-6, g.max()
    clear = mu >= 1e-3
    assert clear.sum() >= 5
    assert np.abs(g[clear]).max() <= 1e-6
    assert np.abs(mu * g).max() <= 1e-6  # complementary slackness
    # at the maximum d/dc L(c mu) = 0 at c = 1: sum mu P = sum y (networkx weights)
    total = G.size(weight="weight")
    assert run.cliques().expected_weight.sum() == pytest.approx(total, rel=1e-8)
    assert run.summary()["fitted_total"] == pytest.approx(total, rel=1e-8)


def candidate_order(run_dir, run) -> np.ndarray:
    """clique_id of each candidate in enumerate's order (matched by member node ids)."""
    enu = Path(run_dir) / "enumerate"
    ptr, nodes = load_npy(enu / "cand_ptr.npy"), load_npy(enu / "cand_nodes.npy")
    by_set = {s: cid for cid, s in run.members().groupby("clique_id")["node_id"].agg(frozenset).items()}
    return np.array([by_set[frozenset(nodes[ptr[k]:ptr[k + 1]].tolist())] for k in range(len(ptr) - 1)])


@pytest.mark.parametrize("name, G", [("karate", KARATE), ("lesmis", LESMIS), ("ego7", ego(7))])
def test_pruned_refit_is_a_kkt_point_of_the_kept_groups(tmp_path, engine, name, G):
    prune = 0.5
    run = decompose(G, tmp_path / name, engine, prune=prune, **TIGHT)
    mu, P, A, y, cl = fitted(run, G)
    kept = mu > 0
    assert 0 < kept.sum() < len(mu), "the pruning really removed some groups"
    g = gradient(mu, P, A, y)  # scipy.sparse, from the results tables
    # the refit maximises L over the kept groups: zero gradient on each of them
    assert np.abs(g[kept]).max() <= 1e-6
    # the pruned groups had expected weight below the threshold in the full fit
    cid = candidate_order(tmp_path / name, run)
    mu_full = np.empty(len(mu))
    mu_full[cid] = load_npy(tmp_path / name / "fit" / "mu_full.npy")
    assert np.all(mu_full[~kept] * P[~kept] < prune)
    # total fitted weight equals the total observed weight (networkx weights)
    total = G.size(weight="weight")
    assert cl.expected_weight.sum() == pytest.approx(total, rel=1e-8)
    assert json.loads((tmp_path / name / "fit" / "report.json").read_text())["weight_total"] == total


# --------------------------------------------------------------------------- statsmodels


# Karate ego graphs whose Poisson(identity) GLM maximum on the full design is
# interior (every coefficient > 0; found by fitting the GLM on each karate ego
# graph), so the unconstrained GLM and our constrained EM must agree.
INTERIOR_EGOS = [7, 8, 13, 31]


@pytest.mark.parametrize("centre", INTERIOR_EGOS)
def test_intensities_match_statsmodels_glm(tmp_path, engine, centre):
    import statsmodels.api as sm

    G = ego(centre)
    run = decompose(G, tmp_path / "r", engine, prune=0.0, **TIGHT)
    mu, P, A, y, _ = fitted(run, G)
    X = A.toarray()  # rows: all pairs inside candidates; 0/1 column per candidate
    assert np.linalg.matrix_rank(X) == X.shape[1]  # identifiable
    with warnings.catch_warnings():  # DomainWarning: identity link with Poisson
        warnings.simplefilter("ignore")
        glm = sm.GLM(y, X, family=sm.families.Poisson(link=sm.families.links.Identity()))
        res = glm.fit(start_params=np.full(X.shape[1], y.sum() / P.sum()), tol=1e-13, maxiter=1000)
    assert res.params.min() > 0, "this case was chosen because the GLM maximum is interior"
    np.testing.assert_allclose(mu, res.params, rtol=1e-6, atol=1e-9)
    assert run.summary()["loglik"] == pytest.approx(res.llf, rel=1e-10)


# --------------------------------------------------------------------------- trace


@pytest.mark.parametrize("accelerate", [True, False])
def test_loglik_trace_never_decreases(tmp_path, engine, accelerate):
    run = decompose(LESMIS, tmp_path / "r", engine, accelerate=accelerate, tol=1e-12, max_iter=500)
    trace = json.loads((tmp_path / "r" / "fit" / "trace.json").read_text())
    report = json.loads((tmp_path / "r" / "fit" / "report.json").read_text())
    assert trace["kept"], "Les Miserables prunes some groups, so there is a refit phase"
    for phase in ("full", "kept"):
        t = np.asarray(trace[phase])
        assert len(t) > 2
        # rounding-level dips only (the log-likelihood carries ~1e-15 relative error)
        assert np.all(np.diff(t) >= -1e-12 * np.abs(t[1:])), phase
        assert t[-1] > t[0]
    assert trace["full"][-1] == pytest.approx(report["loglik_full_model"], rel=1e-12)
    assert trace["kept"][-1] == pytest.approx(run.summary()["loglik"], rel=1e-12)


# --------------------------------------------------------------------------- Davis


def test_davis_southern_women_projection(tmp_path, engine):
    # Davis, Gardner and Gardner (1941), shipped by networkx: 18 women, 14 events;
    # the projection weight of two women is the number of events both attended
    B = nx.davis_southern_women_graph()
    women = [n for n, d in B.nodes(data=True) if d["bipartite"] == 0]
    G = bipartite.weighted_projected_graph(B, women)
    run = decompose(G, tmp_path / "r", engine)
    nodes = run.nodes()
    idx = dict(zip(nodes.label, nodes.node_id))
    n = len(nodes)
    assert n == 18
    cl = run.cliques(kept_only=True)
    mem = run.members()
    mem = mem[mem.clique_id.isin(cl.clique_id)]
    mu = cl.set_index("clique_id").intensity
    M = sp.csr_matrix((np.ones(len(mem)), (mem.node_id, mem.clique_id)), shape=(n, int(mem.clique_id.max()) + 1))
    rates = sp.triu(M @ sp.diags(mu.reindex(range(M.shape[1]), fill_value=0.0).to_numpy()) @ M.T, k=1)
    a = np.array([idx[x] for x, _ in G.edges()])
    b = np.array([idx[x] for _, x in G.edges()])
    w = np.array([x for *_, x in G.edges(data="weight")], np.float64)
    Y = sp.coo_matrix((w, (np.minimum(a, b), np.maximum(a, b))), shape=(n, n)).tocsr()
    # relative Frobenius error over all n(n-1)/2 pairs: the sparse difference holds
    # every pair where either the rate or the weight is nonzero, the rest are 0 - 0
    err = sp.linalg.norm(rates - Y) / sp.linalg.norm(Y)
    # baseline: the best constant rate on the pairs that interacted (it already knows
    # which 139 of the 153 pairs are edges, more than the constant-rate model over all
    # pairs, whose error is larger still); it leaves about half the weight unexplained
    base = np.linalg.norm(w - w.mean()) / np.linalg.norm(w)
    everywhere = w.sum() / (n * (n - 1) / 2)
    base_all = np.sqrt(np.sum((w - everywhere) ** 2) + (n * (n - 1) / 2 - len(w)) * everywhere**2) / np.linalg.norm(w)
    print(f"Davis women projection: relative Frobenius error {err:.4f}; constant rate on edges {base:.4f}, "
          f"on all pairs {base_all:.4f}; {len(cl)} groups kept")
    assert base < base_all
    # the groups must explain the weights at least twice as well as the baseline (a
    # fit that ignored group structure, e.g. one shared rate, would sit near 1x)
    assert err <= 0.5 * base, (err, base)


# --------------------------------------------------------------------------- planted groups


def test_planted_groups_are_recovered(tmp_path, engine):
    from cliquewise.simulate import simulate

    simulate(tmp_path / "sim", nodes=2000, seed=1)  # default sizes 2..40, noise 0.1
    # levels=1: candidates are the maximal cliques of the whole graph. With every
    # distinct weight as a level, sub-cliques formed by pairs whose Poisson counts
    # happen to be high become candidates too and take weight from the planted
    # group (its fitted rate falls towards its smallest pair count), so intensities
    # are only comparable with the truth on the coarsest candidate set.
    run = cliquewise.decompose(tmp_path / "sim" / "export", tmp_path / "run", engine=engine, progress=False,
                               levels=1)
    groups = pd.read_parquet(tmp_path / "sim" / "truth" / "groups.parquet")
    truth = pd.read_parquet(tmp_path / "sim" / "truth" / "members.parquet")
    # Noise level rule. The export adds noise rows of count 1 + Poisson(0.5) (mean
    # 1.5) on random pairs, and a pair of a group of rate mu is missing from the export
    # with probability exp(-mu). A planted group is above the noise level when its
    # rate per pair mu >= 4 (each pair missing with probability < 2%, the rate above
    # 2.5 mean noise counts) and its expected weight mu * P >= 20 (13 mean noise
    # counts; Poisson relative error of its total below 1/sqrt(20) = 22%).
    strong = groups[(groups.intensity >= 4) & (groups.expected_weight >= 20)]
    assert len(strong) >= 100
    cl = run.cliques(kept_only=True)
    fit = run.members()[["clique_id", "label"]]
    fit = fit[fit.clique_id.isin(cl.clique_id)]
    t = truth[truth.group_id.isin(strong.group_id)]
    both = t.merge(fit, on="label").groupby(["group_id", "clique_id"]).size().rename("common").reset_index()
    both = both.merge(t.groupby("group_id").size().rename("s_true").reset_index(), on="group_id")
    both = both.merge(cl[["clique_id", "size", "intensity"]], on="clique_id")
    both["jaccard"] = both.common / (both.s_true + both["size"] - both.common)
    best = both.sort_values(["group_id", "jaccard"], ascending=[True, False]).drop_duplicates("group_id")
    best = strong[["group_id", "intensity"]].merge(best, on="group_id", how="left", suffixes=("_true", "_fit"))
    matched = best[best.jaccard >= 0.9]
    rate = len(matched) / len(strong)
    rel = ((matched.intensity_fit - matched.intensity_true).abs() / matched.intensity_true).median()
    print(f"planted recovery: {len(matched)}/{len(strong)} = {rate:.3f} matched, median relative error {rel:.3f}")
    assert rate >= 0.90
    assert rel <= 0.10


# --------------------------------------------------------------------------- determinism


def read_results(run_dir) -> dict:
    res = Path(run_dir) / "results"
    return {name: pd.read_parquet(res / f"{name}.parquet") for name in ("nodes", "cliques", "members")}


def assert_same_results(a, b):
    ta, tb = read_results(a), read_results(b)
    for name in ta:
        pd.testing.assert_frame_equal(ta[name], tb[name], check_exact=True)
    assert (Path(a) / "fit" / "mu.npy").read_bytes() == (Path(b) / "fit" / "mu.npy").read_bytes()
    assert (Path(a) / "fit" / "trace.json").read_text() == (Path(b) / "fit" / "trace.json").read_text()


def test_two_runs_give_identical_results(tmp_path, engine):
    df = lesmis_export(seed=4)  # shuffled rows, split and reversed counts
    decompose(df, tmp_path / "a", engine)
    decompose(df, tmp_path / "b", None)  # a fresh engine
    assert_same_results(tmp_path / "a", tmp_path / "b")


@pytest.mark.cluster
def test_worker_processes_match_the_in_process_engine(tmp_path, engine):
    from cliquewise.engine import Engine, EngineSettings

    # several enumerate units and fit parts, so the map-reduce really is spread out
    kw = dict(edges_per_unit=60, incidences_per_part=150)
    ref = decompose(LESMIS, tmp_path / "ref", engine, **kw)
    eng = Engine(EngineSettings(workers=2, threads=1, progress=False))
    try:
        assert not eng.in_process and eng.describe()["workers"] == 2
        got = decompose(LESMIS, tmp_path / "dist", eng, **kw)
    finally:
        eng.close()
    assert json.loads((tmp_path / "ref" / "fit" / "report.json").read_text())["parts"] > 1
    a, b = ref.cliques(), got.cliques()
    np.testing.assert_allclose(b.intensity, a.intensity, rtol=1e-10, atol=1e-12)
    pd.testing.assert_frame_equal(ref.members(), got.members())
    pd.testing.assert_frame_equal(a[["clique_id", "size", "level_min", "level_max"]],
                                  b[["clique_id", "size", "level_min", "level_max"]])


# --------------------------------------------------------------------------- resume


@pytest.mark.parametrize("fault", ["unit:ckpt-full@2", "unit:ckpt-kept@1"])
def test_resume_after_a_killed_fit_repeats_the_run(tmp_path, fault):
    lesmis_export(seed=2).to_parquet(tmp_path / "export.parquet")
    (tmp_path / "job.toml").write_text(
        'run_dir = "killed"\n[input]\nedges = "export.parquet"\n'
        "[fit]\ncheckpoint_every = 2\ntol = 1e-12\nmax_iter = 400\n", encoding="utf-8")
    env = dict(os.environ, CLIQUEWISE_FAULT=fault)
    proc = subprocess.run([sys.executable, "-m", "cliquewise.cli", "--quiet", "run", str(tmp_path / "job.toml")],
                          env=env, capture_output=True, text=True, timeout=120)
    assert proc.returncode == -9, proc.stderr  # killed at the checkpoint (SIGKILL)
    killed = tmp_path / "killed"
    assert (killed / "enumerate" / "manifest.json").exists()
    assert not (killed / "fit" / "manifest.json").exists()
    unit = fault.split(":")[1].split("@")[0]
    marks = list((killed / ".work").glob(f"fit-*/units/{unit}.json"))
    assert len(marks) == 1, "the checkpoint the run died after is on disk"
    rc, _, err = run_cli("resume", killed)
    assert rc == 0, err
    rc, _, err = run_cli("run", tmp_path / "job.toml", "--run-dir", tmp_path / "straight")
    assert rc == 0, err
    assert_same_results(killed, tmp_path / "straight")
    rep_a = json.loads((killed / "fit" / "report.json").read_text())
    rep_b = json.loads((tmp_path / "straight" / "fit" / "report.json").read_text())
    assert rep_a["iterations"] == rep_b["iterations"] and rep_a["loglik"] == rep_b["loglik"]
