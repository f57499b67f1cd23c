"""Held-out check (cliquewise.analysis.heldout): data thinning, baselines, planted data.

References: Neufeld, Dharamshi, Gao and Witten, "Data thinning for
convolution-closed distributions", JMLR 2024 (binomial thinning of a Poisson count
gives independent Poisson parts with rates f*lambda and (1-f)*lambda);
scipy.stats (Poisson pmf and log-pmf, chi-square test); statsmodels GLM (Poisson
family, log link) for the independence model; planted data from cliquewise.simulate
with the true rates kept beside it.
"""

from __future__ import annotations

import warnings

import numpy as np
import pandas as pd
import pytest
from scipy import stats

import cliquewise
from cliquewise.analysis import heldout
from cliquewise.analysis.rundata import load_run
from cliquewise.simulate import simulate


def test_thin_parts_add_up_exactly_and_repeat():
    y = np.random.default_rng(0).poisson(5.0, size=10_000)
    train, test = heldout.thin(y, 0.3, seed=4)
    np.testing.assert_array_equal(train + test, y)
    assert train.min() >= 0 and test.min() >= 0
    again = heldout.thin(y.astype(float), 0.3, seed=4)
    np.testing.assert_array_equal(again[1], test)
    with pytest.raises(ValueError):
        heldout.thin([1.5, 2.0], 0.5)
    with pytest.raises(ValueError):
        heldout.thin([1, 2], 1.0)


def test_thinned_parts_are_independent_poisson():
    """Neufeld et al. 2024: test ~ Poisson(f lambda), train ~ Poisson((1-f) lambda), independent.
    Checked with scipy.stats: chi-square goodness of fit and a Pearson correlation test."""
    lam, f = 4.0, 0.3
    y = np.random.default_rng(1).poisson(lam, size=200_000)
    train, test = heldout.thin(y, f, seed=2)
    for part, rate in ((test, f * lam), (train, (1 - f) * lam)):
        k = np.arange(0, 12)
        obs = np.array([(part == j).sum() for j in k[:-1]] + [(part >= k[-1]).sum()])
        exp = np.append(stats.poisson.pmf(k[:-1], rate), stats.poisson.sf(k[-2], rate)) * len(part)
        assert stats.chisquare(obs, exp).pvalue > 1e-3
    r, p = stats.pearsonr(train, test)
    assert abs(r) < 0.01 and p > 1e-3


def test_poisson_loglik_equals_scipy():
    rng = np.random.default_rng(2)
    rate = rng.gamma(2.0, 1.5, size=500)
    y = rng.poisson(rate)
    assert heldout.poisson_loglik(y, rate) == pytest.approx(stats.poisson.logpmf(y, rate).sum(), rel=1e-12)
    assert heldout.poisson_loglik([1, 0], [0.0, 1.0]) == -np.inf


def test_independence_fit_equals_statsmodels_glm():
    """theta_i theta_j over all pairs = Poisson GLM with log link and one indicator per node
    (log lambda_ij = a_i + a_j), statsmodels as reference."""
    sm = pytest.importorskip("statsmodels.api")
    n = 12
    rng = np.random.default_rng(3)
    iu = np.triu_indices(n, 1)
    act = rng.gamma(2.0, 1.0, size=n)
    y = rng.poisson(act[iu[0]] * act[iu[1]])
    keep = y > 0
    theta = heldout.independence_fit(n, iu[0][keep], iu[1][keep], y[keep].astype(float))
    X = np.zeros((len(y), n))
    X[np.arange(len(y)), iu[0]] = 1
    X[np.arange(len(y)), iu[1]] = 1
    res = sm.GLM(y, X, family=sm.families.Poisson()).fit(tol=1e-13)
    np.testing.assert_allclose(theta[iu[0]] * theta[iu[1]], np.exp(X @ res.params), rtol=1e-6)


@pytest.fixture(scope="module")
def planted(tmp_path_factory):
    d = tmp_path_factory.mktemp("planted")
    simulate(d / "data", nodes=300, seed=11, noise=0.0)
    cliquewise.decompose(d / "data" / "export", run_dir=d / "run", progress=False)
    return d


def _true_rates(d, run, labels_of):
    """Planted pair rates from truth/*.parquet on the run's edges (dense: 300 nodes)."""
    groups = pd.read_parquet(d / "data" / "truth" / "groups.parquet")
    members = pd.read_parquet(d / "data" / "truth" / "members.parquet")
    node = pd.Series(np.arange(len(labels_of)), index=labels_of)
    L = np.zeros((run.n, run.n))
    mu = groups.set_index("group_id").intensity
    for gid, lab in members.groupby("group_id").label:
        idx = node[lab.to_numpy()].to_numpy()
        L[np.ix_(idx, idx)] += mu[gid]
    return L[run.u, run.v]


def test_heldout_beats_baselines_on_planted_data(planted):
    res = heldout.heldout_check(planted / "run", fraction=0.5, seed=0)
    assert res["loglik_model"] > res["loglik_independence"]
    assert res["loglik_model"] > res["loglik_spectral"]
    assert res["gain_over_independence"] > 0 and res["gain_over_spectral"] > 0
    assert res["test_weight_evaluated"] + res["test_weight_unseen"] == res["test_weight"]
    assert res["train_weight"] + res["test_weight"] == load_run(planted / "run").y.sum()
    # the true model on the same pairs beats both baselines too, and the fit comes close to it
    run = load_run(planted / "run")
    labels = pd.read_parquet(planted / "run" / "results" / "nodes.parquet").label.to_numpy()
    lam = _true_rates(planted, run, labels)
    train, test = heldout.thin(run.y, 0.5, seed=0)  # the same split (same seed)
    sup = train > 0
    ll_true = heldout.poisson_loglik(test[sup], 0.5 * lam[sup])
    assert ll_true > res["loglik_independence"] and ll_true > res["loglik_spectral"]
    gain_true = (ll_true - res["loglik_independence"]) / res["test_weight_evaluated"]
    assert res["gain_over_independence"] > 0.8 * gain_true  # 80%: common practice, no source
    assert res["pairs_evaluated"] == int(sup.sum())


def test_heldout_refuses_fractional_counts(tmp_path):
    df = pd.DataFrame({"source": ["a", "a", "b"], "target": ["b", "c", "c"], "weight": [1.5, 2.0, 2.0]})
    cliquewise.decompose(df, run_dir=tmp_path / "r", progress=False)
    with pytest.raises(ValueError, match="whole-number"):
        heldout.heldout_check(tmp_path / "r")
