"""Compression curve and concentration (cliquewise.analysis.curves) against dense references.

References: dense numpy sums over every pair of small graphs; statsmodels GLM
(Poisson family, identity link) for the refitted intensities; networkx
``gnp_random_graph`` (Erdos-Renyi) as the random graph for the concentration
statistic; networkx's ``les_miserables_graph`` and ``karate_club_graph`` as data.
"""

from __future__ import annotations

import itertools

import networkx as nx
import numpy as np
import pandas as pd
import pytest
from scipy.special import xlogy

import cliquewise
from _support import graph_frame
from cliquewise.analysis import curves
from cliquewise.analysis.rundata import FittedRun, load_run


def random_run(n=30, groups=12, extra=25, seed=0) -> FittedRun:
    """Overlapping random cliques, all their pairs as rows (some with count 0), plus
    extra pairs in no clique; incidence built by brute force."""
    rng = np.random.default_rng(seed)
    cands = [tuple(sorted(rng.choice(n, size=int(rng.integers(2, 7)), replace=False))) for _ in range(groups)]
    pairs = set()
    for c in cands:
        pairs.update(itertools.combinations(c, 2))
    target = len(pairs) + extra
    while len(pairs) < target:
        a, b = sorted(rng.choice(n, size=2, replace=False))
        pairs.add((int(a), int(b)))
    pairs = sorted(pairs)
    mu = rng.gamma(2.0, 2.0, size=groups)
    mu[rng.random(groups) < 0.25] = 0.0  # some pruned
    lam = np.array([sum(mu[k] for k, c in enumerate(cands) if a in c and b in c) for a, b in pairs])
    y = rng.poisson(lam + 0.3).astype(float)  # zeros inside cliques happen, as do counts outside
    ptr, ind = [0], []
    for a, b in pairs:
        ind += [k for k, c in enumerate(cands) if a in c and b in c]
        ptr.append(len(ind))
    u, v = np.array(pairs).T
    return FittedRun.from_arrays(n, u, v, y, ptr, ind, [len(c) for c in cands], mu), cands


def dense_errors(n, u, v, y, cands, mu):
    """Frobenius and deviance over all pairs with a dense n x n matrix (numpy reference)."""
    Y = np.zeros((n, n))
    Y[u, v] = y
    L = np.zeros((n, n))
    for c, m in zip(cands, mu):
        idx = np.array(c)
        L[np.ix_(idx, idx)] += m
    iu = np.triu_indices(n, 1)
    yy, ll = Y[iu], L[iu]
    b = max(yy.sum() - ll.sum(), 0.0) / len(yy)
    rate = ll + b
    frob = np.sqrt(((yy - rate) ** 2).sum() / (yy ** 2).sum())
    dev = 2.0 * (xlogy(yy, yy) - xlogy(yy, rate) - yy + rate).sum()
    return frob, dev


@pytest.mark.parametrize("seed", [0, 1, 2, 3])
def test_sparse_errors_equal_dense_numpy(seed):
    run, cands = random_run(seed=seed)
    A, P = run.incidence(), run.P
    for keep in (1.0, 0.6, 0.2):
        mu = run.mu.copy()
        order = run.kept
        mu[order[max(1, int(keep * len(order))):]] = 0.0
        got = curves.model_errors(A, run.y, mu, P, run.n)
        frob, dev = dense_errors(run.n, run.u, run.v, run.y, cands, mu)  # reference: dense numpy
        assert got["frobenius_rel"] == pytest.approx(frob, rel=1e-10)
        assert got["deviance"] == pytest.approx(dev, rel=1e-9)


@pytest.fixture(scope="module")
def lesmis_run(tmp_path_factory):
    d = tmp_path_factory.mktemp("lesmis")
    cliquewise.decompose(graph_frame(nx.les_miserables_graph()), run_dir=d, progress=False)
    return d


def test_curve_matches_dense_from_results_tables(lesmis_run):
    """Every row of the curve against a dense matrix built from results/*.parquet
    (reference: numpy; clique_id order is the expected-weight rank)."""
    fr = (0.05, 0.25, 0.5, 1.0)
    curve = curves.compression_curve(lesmis_run, fractions=fr, refit=False)
    cl = pd.read_parquet(lesmis_run / "results" / "cliques.parquet")
    mem = pd.read_parquet(lesmis_run / "results" / "members.parquet")
    nodes = pd.read_parquet(lesmis_run / "results" / "nodes.parquet")
    G = nx.les_miserables_graph()
    idx = dict(zip(nodes.label, nodes.node_id))
    e = np.array([(idx[a], idx[b], d["weight"]) for a, b, d in G.edges(data=True)])
    u, v = np.minimum(e[:, 0], e[:, 1]).astype(int), np.maximum(e[:, 0], e[:, 1]).astype(int)
    kept = cl[cl.intensity > 0]
    groups = mem.groupby("clique_id").node_id.agg(tuple)
    for row in curve.itertuples():
        top = kept.head(row.groups)
        frob, dev = dense_errors(len(nodes), u, v, e[:, 2].astype(float), [groups[c] for c in top.clique_id],
                                 top.intensity.to_numpy())
        assert row.frobenius_rel == pytest.approx(frob, rel=1e-9)
        assert row.deviance == pytest.approx(dev, rel=1e-9)
    assert list(curve.groups) == [int(np.ceil(f * len(kept))) for f in fr]
    assert curves.error_at(lesmis_run, fractions=(0.25, 0.5)) == pytest.approx(
        {0.25: curve.frobenius_rel[1], 0.5: curve.frobenius_rel[2]})


def test_curve_columns_and_spectral_column(lesmis_run):
    curve = curves.compression_curve(lesmis_run)
    assert list(curve.columns[:7]) == ["fraction", "groups", "frobenius_rel", "deviance", "frobenius_rel_refit",
                                       "deviance_refit", "spectral_rank"]
    assert curve.fraction.iloc[0] == pytest.approx(0.01) and curve.fraction.iloc[-1] == 1.0
    # at 100% refitting changes nothing: the fit is already the maximum
    last = curve.iloc[-1]
    assert last.frobenius_rel_refit == pytest.approx(last.frobenius_rel)
    # the spectral error is non-increasing in the rank and is 1 at rank 0
    s = curve.sort_values("spectral_rank")
    assert np.all(np.diff(s.spectral_frobenius_rel.to_numpy()) <= 1e-12)
    assert np.all(curve.spectral_frobenius_rel[curve.spectral_rank == 0] == 1.0)


def test_refit_equals_statsmodels_identity_glm():
    """Refitted intensities of a subset of groups = statsmodels GLM Poisson with identity link
    on the pairs they cover (reference: statsmodels)."""
    sm = pytest.importorskip("statsmodels.api")
    import tempfile
    import warnings

    with tempfile.TemporaryDirectory() as d:
        cliquewise.decompose(graph_frame(nx.karate_club_graph()), run_dir=d, progress=False)
        run = load_run(d)
    A = run.incidence()
    sel = run.kept[: len(run.kept) // 2]
    mu = curves.refit_subset(A, run.y, run.mu, run.P, sel, tol=1e-14, max_iter=100000)
    X = A[:, sel].toarray()
    cov = X.sum(axis=1) > 0
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")  # identity link outside the canonical domain
        glm = sm.GLM(run.y[cov], X[cov], family=sm.families.Poisson(link=sm.families.links.Identity()))
        res = glm.fit(start_params=run.mu[sel], tol=1e-13, maxiter=1000)
    assert np.all(res.params > 0)
    np.testing.assert_allclose(mu[sel], res.params, rtol=2e-4)
    assert np.all(mu[np.setdiff1d(np.arange(len(mu)), sel)] == 0)


def _blocky(n, seed):
    """Disjoint planted groups of 3..10 people, log-normal rates, Poisson counts."""
    rng = np.random.default_rng(seed)
    rows, perm, i = [], rng.permutation(n), 0
    while i < n:
        g = np.sort(perm[i:i + int(rng.integers(3, 11))])
        i += len(g)
        mu = rng.lognormal(np.log(3.0), 0.8)
        for a, b in itertools.combinations(g, 2):
            c = rng.poisson(mu)
            if c:
                rows.append((int(a), int(b), int(c)))
    return pd.DataFrame(rows, columns=["source", "target", "weight"])


def _erdos_renyi(n, edges, total, seed):
    """networkx gnp_random_graph with about as many edges, the same total weight spread uniformly."""
    G = nx.gnp_random_graph(n, edges / (n * (n - 1) / 2), seed=seed)
    e = np.array(G.edges())
    w = 1 + np.random.default_rng(seed).multinomial(total - len(e), np.full(len(e), 1.0 / len(e)))
    return pd.DataFrame({"source": e[:, 0], "target": e[:, 1], "weight": w})


def test_concentration_separates_blocky_from_erdos_renyi(tmp_path):
    # reference random graph: networkx gnp_random_graph; margins are common practice, no source
    B = _blocky(240, seed=1)
    E = _erdos_renyi(240, len(B), int(B.weight.sum()), seed=1)
    assert E.weight.sum() == B.weight.sum()
    cliquewise.decompose(B, run_dir=tmp_path / "b", progress=False)
    cliquewise.decompose(E, run_dir=tmp_path / "e", progress=False)
    cb = curves.concentration(tmp_path / "b")
    ce = curves.concentration(tmp_path / "e")
    assert cb["groups_fraction"] < ce["groups_fraction"] - 0.1
    assert cb["spectral_fraction"] < ce["spectral_fraction"] - 0.15
    for c in (cb, ce):
        assert 0 < c["groups_fraction"] <= 1 and 0 < c["spectral_fraction"] <= 1
        assert c["groups_needed"] == pytest.approx(c["groups_fraction"] * c["groups_kept"])


def test_concentration_groups_fraction_by_hand(lesmis_run):
    """The group fraction recomputed from results/cliques.parquet with pandas."""
    cl = pd.read_parquet(lesmis_run / "results" / "cliques.parquet")
    ew = cl[cl.intensity > 0].expected_weight
    share = ew.cumsum() / ew.sum()
    needed = int((share < 0.75 - 1e-12).sum()) + 1
    got = curves.concentration(lesmis_run, level=0.75)
    assert got["groups_needed"] == needed
    assert got["groups_fraction"] == pytest.approx(needed / len(ew))
