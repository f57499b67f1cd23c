"""Spectral baseline (cliquewise.analysis.spectral) against numpy.linalg.eigh on small graphs.

References: numpy.linalg.eigh / eigvalsh (dense, exact eigendecomposition);
the Eckart-Young-Mirsky theorem (the error of the best rank-r approximation is the
sum of the discarded squared eigenvalues); networkx's les_miserables_graph and
karate_club_graph as data, networkx gnp_random_graph as a random graph.
"""

from __future__ import annotations

import networkx as nx
import numpy as np
import pytest

from cliquewise.analysis import spectral


def _graph(name):
    if name == "lesmis":
        G = nx.convert_node_labels_to_integers(nx.les_miserables_graph())
    elif name == "karate":
        G = nx.karate_club_graph()
    else:
        G = nx.gnp_random_graph(60, 0.12, seed=5)
        rng = np.random.default_rng(5)
        for a, b in G.edges():
            G[a][b]["weight"] = int(rng.integers(1, 9))
    e = np.array([(min(a, b), max(a, b), d.get("weight", 1)) for a, b, d in G.edges(data=True)], dtype=float)
    return G.number_of_nodes(), e[:, 0].astype(int), e[:, 1].astype(int), e[:, 2]


@pytest.mark.parametrize("name", ["lesmis", "karate", "gnp"])
def test_error_equals_discarded_eigenvalues(name):
    n, u, v, y = _graph(name)
    A = spectral.adjacency(n, u, v, y)
    D = A.toarray()
    w_all, V_all = np.linalg.eigh(D)  # reference: numpy
    order = np.argsort(-np.abs(w_all))
    w_all, V_all = w_all[order], V_all[:, order]
    k = 12
    w, V = spectral.top_eigenpairs(A, k)
    np.testing.assert_allclose(np.abs(w), np.abs(w_all[:k]), rtol=1e-8)
    ranks = [0, 1, 3, 7, 12]
    full, pairs = spectral.lowrank_sq_errors(A, w, V, ranks)
    iu = np.triu_indices(n, 1)
    for r, f, p in zip(ranks, full, pairs):
        # Eckart-Young-Mirsky: sum of the discarded squared eigenvalues
        assert f == pytest.approx(float((w_all[r:] ** 2).sum()), rel=1e-8)
        approx = (V[:, :r] * w[:r]) @ V[:, :r].T
        assert p == pytest.approx(float(((D - approx)[iu] ** 2).sum()), rel=1e-8)  # dense numpy, pairs only
    # entries of the approximation on chosen pairs
    approx = (V * w) @ V.T
    np.testing.assert_allclose(spectral.lowrank_values(w, V, u, v), approx[u, v], rtol=1e-10, atol=1e-12)


def test_budget_rank_rules():
    assert spectral.budget_rank(10, 40, 99, "storage") == 0  # 50 numbers < one eigenpair (100)
    assert spectral.budget_rank(60, 140, 99, "storage") == 2  # 200 numbers = two eigenpairs
    assert spectral.budget_rank(60, 140, 99, "count") == 60
    assert spectral.budget_rank(600, 140, 99, "count") == 98  # ARPACK needs k < n
    assert spectral.budget_rank(600, 140, 99, "count", max_rank=5) == 5
    with pytest.raises(ValueError):
        spectral.budget_rank(1, 1, 10, "bits")


@pytest.mark.parametrize("name", ["lesmis", "karate", "gnp"])
def test_energy_rank_exact_matches_eigvalsh(name):
    n, u, v, y = _graph(name)
    A = spectral.adjacency(n, u, v, y)
    e = np.sort(np.linalg.eigvalsh(A.toarray()) ** 2)[::-1]  # reference: numpy
    for level in (0.5, 0.9):
        want = int(np.searchsorted(np.cumsum(e), level * e.sum() * (1 - 1e-12)) + 1)
        got = spectral.energy_rank(A, level, max_rank=n - 1)
        assert got["method"] == "eigsh"
        assert got["rank"] == want


def test_energy_rank_estimate_close_to_eigvalsh():
    """Stochastic Lanczos quadrature estimate within 0.03 of the exact fraction
    (tolerance from trials on planted and random graphs, no source)."""
    rng = np.random.default_rng(3)
    n, rows = 500, []
    perm = rng.permutation(n)
    i = 0
    while i < n:
        g = np.sort(perm[i:i + int(rng.integers(3, 13))])
        i += len(g)
        mu = rng.lognormal(1.0, 0.8)
        for a in range(len(g)):
            for b in range(a + 1, len(g)):
                c = rng.poisson(mu)
                if c:
                    rows.append((g[a], g[b], c))
    G = nx.gnp_random_graph(n, 0.02, seed=3)
    for a, b in G.edges():
        rows.append((min(a, b), max(a, b), 1))
    r = np.array(rows)
    A = spectral.adjacency(n, r[:, 0], r[:, 1], r[:, 2].astype(float)).tocsr()
    A.sum_duplicates()
    e = np.sort(np.linalg.eigvalsh(A.toarray()) ** 2)[::-1]
    exact = (np.searchsorted(np.cumsum(e), 0.9 * e.sum()) + 1) / n
    est = spectral.energy_rank(A, 0.9, max_rank=8)
    assert est["method"] == "slq"
    assert abs(est["fraction"] - exact) < 0.03
    theta, mass = spectral.slq_spectrum(A)
    assert mass.sum() == pytest.approx(n)
    assert float(mass @ theta ** 2) == pytest.approx(float(e.sum()), rel=0.1)  # tr(A^2)
