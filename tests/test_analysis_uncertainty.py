"""Standard errors of group intensities (cliquewise.analysis.uncertainty) against statsmodels.

Reference: statsmodels GLM with the Poisson family and the identity link, fitted on
the pairs of the kept groups: its ``bse`` (from the expected information at the
estimate) and the inverse of its observed Hessian (``hessian(observed=True)``);
its Pearson chi-square over residual degrees of freedom for the dispersion.
Data: networkx's karate_club_graph (Zachary 1977, with weights).
"""

from __future__ import annotations

import warnings

import networkx as nx
import numpy as np
import pytest

import cliquewise
from _support import graph_frame
from cliquewise.analysis import uncertainty
from cliquewise.analysis.rundata import FittedRun, load_run

sm = pytest.importorskip("statsmodels.api")


@pytest.fixture(scope="module")
def karate(tmp_path_factory):
    d = tmp_path_factory.mktemp("karate")
    cliquewise.decompose(graph_frame(nx.karate_club_graph()), run_dir=d, progress=False, tol=1e-14, max_iter=100000)
    run = load_run(d)
    kept = run.kept
    X = run.incidence()[:, kept].toarray()
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")  # identity link outside the canonical domain
        glm = sm.GLM(run.y, X, family=sm.families.Poisson(link=sm.families.links.Identity()))
        res = glm.fit(start_params=run.mu[kept], tol=1e-13, maxiter=1000)
    return d, run, glm, res


def test_fit_is_the_glm_maximum(karate):
    _, run, _, res = karate
    np.testing.assert_allclose(res.params, run.mu[run.kept], rtol=1e-4)


def test_all_groups_match_statsmodels(karate):
    d, run, glm, res = karate
    K = len(run.kept)
    obs = uncertainty.standard_errors(d, top=K)
    exp = uncertainty.standard_errors(d, top=K, information="expected")
    assert obs.block.iloc[0] == K and obs.identifiable.all()
    np.testing.assert_allclose(exp.se, res.bse, rtol=1e-5)  # statsmodels bse: expected information
    H = glm.hessian(res.params, observed=True)
    np.testing.assert_allclose(obs.se, np.sqrt(np.diag(np.linalg.inv(-H))), rtol=1e-5)
    assert list(obs.clique_id) == list(range(K))
    z = 1.959963984540054  # 97.5% normal quantile (value from memory, checked by scipy.stats.norm in the code)
    np.testing.assert_allclose(obs.ci_high, obs.intensity + z * obs.se)
    np.testing.assert_allclose(obs.ci_low, np.maximum(obs.intensity - z * obs.se, 0))


def test_block_errors_lie_between_conditional_and_full(karate):
    """Inverting a larger block of an SPD information can only raise a variance:
    1/I_kk <= [I_SS^-1]_kk <= [I^-1]_kk (Schur complements); statsmodels gives the full one."""
    d, run, glm, res = karate
    top = uncertainty.standard_errors(d, top=4)
    H = -glm.hessian(res.params, observed=True)
    full = np.sqrt(np.diag(np.linalg.inv(H)))[:4]
    cond = 1.0 / np.sqrt(np.diag(H))[:4]
    assert np.all(top.se.to_numpy() <= full * (1 + 1e-8))
    assert np.all(top.se.to_numpy() >= cond * (1 - 1e-8))
    assert top.block.iloc[0] <= len(run.kept)


def test_dispersion_matches_statsmodels(karate):
    d, _, _, res = karate
    assert uncertainty.pearson_dispersion(d) == pytest.approx(res.pearson_chi2 / res.df_resid, rel=1e-4)


def test_collinear_groups_are_not_identifiable():
    """A triangle and its three pairs, all kept: the triangle's column is the sum of the
    pairs' columns, so the information is singular."""
    u, v, y = [0, 0, 1], [1, 2, 2], [5.0, 6.0, 7.0]
    ptr = [0, 2, 4, 6]
    ind = [0, 1, 0, 2, 0, 3]  # candidate 0 = triangle, 1..3 = the pairs
    run = FittedRun.from_arrays(3, u, v, y, ptr, ind, [3, 2, 2, 2], [3.0, 2.0, 3.0, 4.0])
    se = uncertainty.standard_errors(run, top=4)
    assert not se.identifiable.any()
    assert np.isinf(se.se).all()
