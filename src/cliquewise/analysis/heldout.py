"""Held-out check by Poisson data thinning.

**Thinning** (Neufeld, Dharamshi, Gao and Witten, "Data thinning for
convolution-closed distributions", JMLR 2024): if ``y ~ Poisson(lambda)`` and
``t | y ~ Binomial(y, f)``, then ``t ~ Poisson(f lambda)`` and ``y - t ~
Poisson((1 - f) lambda)``, and the two are independent. So one export gives a
training export and a test export that are independent draws from the same model
with rates scaled by ``1 - f`` and ``f``; no pair is left out.

**The check.** :func:`heldout_check` thins every count (``f = fraction`` of each
count goes to the test part), runs the whole pipeline on the training part
(same candidate and fit settings as the run), and scores three predictions of
the test counts, each the training fit scaled by ``f / (1 - f)``:

* ``model``: the fitted group rates;
* ``independence``: the degree-corrected independence model
  ``lambda_ij = theta_i theta_j``, fitted by maximum likelihood over all pairs of
  the training counts (fixed point ``theta_i = s_i / (T - theta_i)``, ``s_i`` the
  training strength, ``T = sum theta``);
* ``spectral``: the rank-``r`` eigen-approximation of the training adjacency,
  ``r`` matched to the training fit's kept groups (rule in
  :mod:`cliquewise.analysis.spectral`); where it is not positive the
  independence rate stands in (generous to the baseline).

**Which pairs.** The score is the Poisson log-likelihood (full, with
``-log y!``) of the test counts summed over the *pairs with a positive training
count*. The group model can only give a rate to pairs it saw (its groups are
cliques of the training graph); test weight that falls on pairs with a zero
training count is reported as ``test_weight_unseen`` and scored by no model.
Train and test are independent, so choosing the pairs from the training part
does not bias the comparison.

**Gain.** ``gain_over_independence = (loglik_model - loglik_independence) /
test_weight_evaluated``: nats per held-out interaction on the evaluated pairs
(likewise ``gain_over_spectral``). Positive means the groups predict new
interactions better than the baseline.
"""

from __future__ import annotations

import math
import tempfile
from pathlib import Path

import numpy as np
import pandas as pd
import pyarrow.parquet as pq
from scipy.special import gammaln

from cliquewise.analysis import spectral
from cliquewise.analysis.rundata import FittedRun, load_run

__all__ = ["thin", "independence_fit", "heldout_check", "poisson_loglik"]


def thin(counts, fraction: float, seed: int = 0) -> tuple[np.ndarray, np.ndarray]:
    """Split counts into independent training and test parts by binomial thinning.

    Parameters
    ----------
    counts : array of non-negative whole numbers
    fraction : float
        Expected share of each count that goes to the test part, in (0, 1).
    seed : int
        Seed of numpy's default generator (PCG64).

    Returns
    -------
    train, test : int64 arrays
        ``train + test == counts`` exactly; ``test ~ Binomial(counts, fraction)``.

    Raises
    ------
    ValueError
        When a count is negative or not a whole number, or ``fraction`` is outside (0, 1).
    """
    if not (0.0 < fraction < 1.0):
        raise ValueError("fraction must lie strictly between 0 and 1")
    y = np.asarray(counts)
    if np.any(y < 0) or not np.all(np.isfinite(y)) or np.any(y != np.round(y)):
        raise ValueError("thinning needs non-negative whole-number counts")
    y = y.astype(np.int64)
    test = np.random.default_rng(seed).binomial(y, fraction).astype(np.int64)
    return y - test, test


def poisson_loglik(y, rate) -> float:
    """``sum y log(rate) - rate - log(y!)`` (``-inf`` if a positive count has rate 0)."""
    y = np.asarray(y, np.float64)
    rate = np.asarray(rate, np.float64)
    with np.errstate(divide="ignore", invalid="ignore"):
        t = np.where(y > 0, y * np.log(rate), 0.0)
    return float(t.sum() - rate.sum() - gammaln(y + 1.0).sum())


def independence_fit(n: int, u, v, y, tol: float = 1e-12, max_iter: int = 10_000) -> np.ndarray:
    """Maximum-likelihood ``theta`` of ``y_ij ~ Poisson(theta_i theta_j)`` over all pairs ``i < j``.

    The score equations are ``s_i = theta_i (T - theta_i)`` with ``s_i`` the
    strength and ``T = sum theta``; they are solved by the fixed point
    ``theta_i <- s_i / (T - theta_i)`` from the Chung-Lu start ``s_i / sqrt(2 W)``.
    If it does not settle (a node holding most of the weight), the Chung-Lu
    values are returned.

    Returns
    -------
    float64 array, length ``n``
    """
    s = np.bincount(np.asarray(u, np.int64), weights=y, minlength=n) + \
        np.bincount(np.asarray(v, np.int64), weights=y, minlength=n)
    W = s.sum() / 2.0
    start = s / math.sqrt(2.0 * W) if W > 0 else s
    th = start.copy()
    for _ in range(max_iter):
        T = th.sum()
        denom = T - th
        if np.any(denom[s > 0] <= 0):
            return start
        new = np.where(s > 0, s / np.where(denom > 0, denom, 1.0), 0.0)
        if np.max(np.abs(new - th)) <= tol * max(1.0, np.max(new)):
            return new
        th = 0.5 * (th + new)  # damped: the plain map can oscillate
    return start


def _key(u, v, n):
    return np.asarray(u, np.int64) * np.int64(n) + np.asarray(v, np.int64)


def _fit_train(run: FittedRun, train: np.ndarray, work: Path):
    """Run the pipeline on the training counts; return the training fit and its node ids."""
    from cliquewise.api import decompose

    keep = train > 0
    df = pd.DataFrame({"source": run.u[keep], "target": run.v[keep], "weight": train[keep]})
    s = run.settings
    cand, fit = s.get("candidates", {}), s.get("fit", {})
    opts = {k: cand[k] for k in ("levels", "max_cliques", "max_seconds") if k in cand}
    opts.update({k: fit[k] for k in ("tol", "max_iter", "prune", "accelerate") if k in fit})
    decompose(df, run_dir=work, progress=False, **opts)
    trun = load_run(work)
    ids = pq.read_table(work / "ingest" / "labels.parquet").column("label").to_numpy().astype(np.int64)
    return trun, ids


def heldout_check(run_dir, fraction: float = 0.5, seed: int = 0, rule: str = "storage",
                  max_rank: int = spectral.DEFAULT_MAX_RANK, work_dir=None) -> dict:
    """Fit on a thinned training part, score the held-out part against two baselines.

    Parameters
    ----------
    run_dir : str, Path or FittedRun
        A finished run with whole-number counts.
    fraction : float
        Share of each count held out for testing.
    seed : int
        Seed of the thinning (and of ARPACK's start vector).
    rule : {"storage", "count"}
        Budget rule of the spectral baseline.
    max_rank : int
        Cap on the spectral rank.
    work_dir : path, optional
        Where to keep the training run (a temporary folder, removed afterwards, by default).

    Returns
    -------
    dict
        ``loglik_model``, ``loglik_independence``, ``loglik_spectral`` (held-out
        Poisson log-likelihoods on the evaluated pairs), ``gain_over_independence``
        and ``gain_over_spectral`` (nats per held-out interaction), ``pairs_evaluated``,
        ``test_weight``, ``test_weight_evaluated``, ``test_weight_unseen``,
        ``train_weight``, ``groups_kept_train``, ``spectral_rank``,
        ``spectral_fallback_pairs``, ``fraction``, ``seed``, ``gain_unit``.
    """
    run = run_dir if isinstance(run_dir, FittedRun) else load_run(run_dir)
    if not run.integral:
        raise ValueError("the held-out check needs whole-number counts (binomial thinning)")
    train, test = thin(run.y, fraction, seed)
    if not np.any(train > 0):
        raise ValueError("no training counts left after thinning; use a smaller fraction")
    if work_dir is None:
        with tempfile.TemporaryDirectory(prefix="cliquewise-heldout-") as tmp:
            trun, ids = _fit_train(run, train, Path(tmp) / "train")
    else:
        trun, ids = _fit_train(run, train, Path(work_dir))
    scale = fraction / (1.0 - fraction)

    # the evaluated pairs: every pair with a positive training count
    sup = train > 0
    su, sv, yt = run.u[sup], run.v[sup], test[sup].astype(np.float64)
    keys = _key(su, sv, run.n)  # sorted? not assumed
    order = np.argsort(keys, kind="stable")
    # group model: training rates on the training run's edges, moved to original ids
    lam_t = trun.incidence() @ trun.mu
    tk = _key(ids[trun.u], ids[trun.v], run.n)
    pos = order[np.searchsorted(keys, tk, sorter=order)]
    if not np.array_equal(keys[pos], tk):
        raise RuntimeError("internal error: training edges do not match the export's pairs")
    lam_model = np.zeros(len(keys))
    lam_model[pos] = lam_t
    # independence model over all pairs of the training counts
    theta = independence_fit(run.n, run.u[sup], run.v[sup], train[sup].astype(np.float64))
    lam_ind = theta[su] * theta[sv]
    # spectral baseline with the training fit's budget
    Aadj, active = spectral.active_subgraph(run.n, su, sv, train[sup].astype(np.float64))
    kept = trun.kept
    r = spectral.budget_rank(len(kept), int(trun.sizes[kept].sum()), len(active), rule, max_rank)
    w, V = spectral.top_eigenpairs(Aadj, r, seed=seed)
    low = spectral.lowrank_values(w, V, np.searchsorted(active, su), np.searchsorted(active, sv))
    fallback = ~(low > 0)
    lam_spec = np.where(fallback, lam_ind, low)

    ll = {name: poisson_loglik(yt, scale * lam) for name, lam in
          (("model", lam_model), ("independence", lam_ind), ("spectral", lam_spec))}
    tw_eval = float(yt.sum())
    tw = float(test.sum())
    gain = (lambda a, b: (a - b) / tw_eval if tw_eval > 0 else float("nan"))
    return {
        "fraction": float(fraction), "seed": int(seed),
        "pairs_evaluated": int(sup.sum()),
        "train_weight": float(train.sum()), "test_weight": tw,
        "test_weight_evaluated": tw_eval, "test_weight_unseen": tw - tw_eval,
        "groups_kept_train": int(len(kept)), "candidates_train": int(len(trun.mu)),
        "spectral_rank": int(len(w)), "spectral_fallback_pairs": int(fallback.sum()),
        "loglik_model": ll["model"], "loglik_independence": ll["independence"], "loglik_spectral": ll["spectral"],
        "gain_over_independence": gain(ll["model"], ll["independence"]),
        "gain_over_spectral": gain(ll["model"], ll["spectral"]),
        "gain_unit": "nats per held-out interaction on the evaluated pairs",
    }
