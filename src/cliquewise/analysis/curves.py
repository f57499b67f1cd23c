"""Compression curve and structure concentration of a fitted run.

**Compression curve.** Keep the ``m`` strongest kept groups (ranked by expected
weight ``mu * P``, as ``clique_id`` is), for ``m`` a fraction of the kept groups
from 1% to 100%, and score the truncated model against the counts over *all*
``N = n (n - 1) / 2`` unordered pairs, zero counts included.

The truncated model gives pair ``{i, j}`` the rate ``lambda_ij + b``:
``lambda_ij`` is the summed intensity of the kept groups holding both, and ``b``
is a uniform background that spreads the weight the dropped groups carried,
``b = max(W - S1, 0) / N`` with ``W = sum y`` and ``S1 = sum_k mu_k P_k`` over
the kept groups. At 100% ``b = 0`` (the fit accounts for all the weight). The
background keeps the deviance finite where a pair loses all its groups.

Sums over all pairs without listing them (``E`` edges, ``A`` the edge-candidate
incidence; every pair inside a candidate is an edge, since candidates are
cliques of the observed graph, so ``A`` lists every pair of every candidate)::

    sum_pairs lambda   = S1 = sum_k mu_k P_k
    sum_pairs lambda^2 = S2 = sum_k mu_k (A^T lambda)_k
    sum_pairs (y - lambda - b)^2 = sum_e (y_e - lambda_e - b)^2
        + [S2 - sum_e lambda_e^2] + 2 b [S1 - sum_e lambda_e] + b^2 (N - E)

(the brackets are the pairs with count 0 inside a candidate, 0 here by the
remark above) and the Poisson deviance is::

    D = 2 [ sum_e y_e log(y_e / (lambda_e + b)) - W + S1 + b N ].

Cost: a few sparse products over the incidence per fraction. ``frobenius_rel``
is ``sqrt(sum_pairs (y - rate)^2 / sum_pairs y^2)``.

*Refit*: the kept groups' intensities are re-estimated by EM on the pairs they
cover (warm start from the full fit); ``b`` then takes the weight of the pairs
they do not cover. Columns ``*_refit``.

*Spectral*: ``spectral_frobenius_rel`` is the same pairs-only relative error of
the rank-``r`` eigen-approximation, ``r`` matched to the ``m`` groups by the rule
in :mod:`cliquewise.analysis.spectral` (``spectral_rank`` column).

**Concentration.** :func:`concentration` reports the fraction of kept groups
(strongest first) needed for a share ``level`` of the fitted weight, and the
fraction of eigenpairs (largest magnitude first, out of the nodes with an edge)
needed for the same share of the spectral energy ``||A||_F^2``.
"""

from __future__ import annotations

import math

import numpy as np
import pandas as pd

from cliquewise.analysis import spectral
from cliquewise.analysis.rundata import FittedRun, load_run, pair_count
from cliquewise.kernels.em import fit_local

__all__ = ["DEFAULT_FRACTIONS", "compression_curve", "concentration", "error_at", "model_errors", "refit_subset"]

DEFAULT_FRACTIONS = (0.01, 0.02, 0.05, 0.1, 0.15, 0.2, 0.25, 0.3, 0.4, 0.5, 0.6, 0.7, 0.8, 0.9, 1.0)


def _as_run(run) -> FittedRun:
    return run if isinstance(run, FittedRun) else load_run(run)


def model_errors(A, y: np.ndarray, mu: np.ndarray, P: np.ndarray, n: int) -> dict:
    """Relative Frobenius error and Poisson deviance over all pairs of the model ``mu``.

    Parameters
    ----------
    A : scipy sparse, ``E x K``
        Edge-candidate incidence (every pair of every candidate is a row).
    y : float64 array, length ``E``
        Edge counts (pairs not listed have count 0).
    mu : float64 array, length ``K``
        Intensities (0 for groups left out).
    P : float64 array, length ``K``
        Pairs per candidate.
    n : int
        Number of nodes.

    Returns
    -------
    dict
        ``frobenius_rel``, ``deviance``, ``background`` (``b``), ``sq_error``.
    """
    N = pair_count(n)
    E = len(y)
    lam = A @ mu
    S1 = float(mu @ P)
    S2 = float(mu @ (A.T @ lam))
    W = float(y.sum())
    Y2 = float(y @ y)
    b = max(W - S1, 0.0) / N if N > 0 else 0.0
    r = y - lam - b
    sq = float(r @ r) + (S2 - float(lam @ lam)) + 2.0 * b * (S1 - float(lam.sum())) + b * b * (N - E)
    rate = lam + b
    pos = y > 0
    with np.errstate(divide="ignore"):
        logs = np.where(pos, y * (np.log(np.where(pos, y, 1.0)) - np.log(rate)), 0.0)
    dev = 2.0 * (float(logs.sum()) - W + S1 + b * N)
    return {"frobenius_rel": math.sqrt(max(sq, 0.0) / Y2) if Y2 > 0 else float("nan"),
            "deviance": max(dev, 0.0), "background": b, "sq_error": max(sq, 0.0)}


def _group_counts(n_kept: int, fractions) -> list[int]:
    return [int(min(n_kept, max(1, math.ceil(f * n_kept - 1e-9)))) if n_kept else 0 for f in fractions]


def refit_subset(A, y, mu, P, sel, tol: float = 1e-8, max_iter: int = 2000) -> np.ndarray:
    """Maximum-likelihood intensities of the groups ``sel`` alone, on the pairs they cover.

    EM (SQUAREM-accelerated, :func:`cliquewise.kernels.em.fit_local`) from the
    current ``mu[sel]``; every other group gets 0.

    Parameters
    ----------
    A : scipy sparse, ``E x K``
        Edge-candidate incidence.
    y : float64 array, length ``E``
    mu : float64 array, length ``K``
        Start (only ``mu[sel]`` is used; it must be positive there).
    P : float64 array, length ``K``
    sel : int array
        Candidate ids to keep.
    tol, max_iter
        As in :func:`cliquewise.kernels.em.fit_em`.

    Returns
    -------
    float64 array, length ``K``
    """
    sub = A[:, sel].tocsr()
    covered = np.diff(sub.indptr) > 0
    sub = sub[covered]
    res = fit_local(sub.indptr.astype(np.int64), sub.indices.astype(np.int64), y[covered], P[sel],
                    mu0=mu[sel].copy(), tol=tol, max_iter=max_iter)
    out = np.zeros_like(mu)
    out[sel] = res.mu
    return out


def compression_curve(run_dir, fractions=None, refit: bool = True, rule: str = "storage",
                      max_rank: int = spectral.DEFAULT_MAX_RANK, seed: int = 0) -> pd.DataFrame:
    """Errors against the fraction of kept groups, with the spectral baseline beside them.

    Parameters
    ----------
    run_dir : str, Path or FittedRun
        A finished run.
    fractions : sequence of float, optional
        Fractions of the kept groups in (0, 1]; default :data:`DEFAULT_FRACTIONS`.
    refit : bool
        Also refit the kept groups at each fraction (columns ``*_refit``; NaN otherwise).
    rule : {"storage", "count"}
        Parameter-budget matching rule for the spectral rank.
    max_rank : int
        Largest spectral rank tried.
    seed : int
        Start vector of ARPACK.

    Returns
    -------
    pandas.DataFrame
        ``fraction``, ``groups``, ``frobenius_rel``, ``deviance``,
        ``frobenius_rel_refit``, ``deviance_refit``, ``spectral_rank``,
        ``spectral_frobenius_rel``.
    """
    run = _as_run(run_dir)
    fractions = [float(f) for f in (DEFAULT_FRACTIONS if fractions is None else fractions)]
    if any(not (0 < f <= 1) for f in fractions):
        raise ValueError("fractions must lie in (0, 1]")
    A = run.incidence()
    P = run.P
    kept = run.kept
    counts = _group_counts(len(kept), fractions)
    slots = np.concatenate([[0], np.cumsum(run.sizes[kept])])
    Aadj, active = spectral.active_subgraph(run.n, run.u, run.v, run.y)
    ranks = [spectral.budget_rank(m, int(slots[m]), len(active), rule, max_rank) for m in counts]
    w, V = spectral.top_eigenpairs(Aadj, max(ranks) if ranks else 0, seed=seed)
    _, sq_pairs = spectral.lowrank_sq_errors(Aadj, w, V, ranks)
    Y2 = float(run.y @ run.y)
    fit = run.settings.get("fit", {})
    tol, max_iter = float(fit.get("tol", 1e-8)), int(fit.get("max_iter", 2000))
    rows = []
    for f, m, r, sqp in zip(fractions, counts, ranks, sq_pairs):
        mu = np.zeros_like(run.mu)
        mu[kept[:m]] = run.mu[kept[:m]]
        plain = model_errors(A, run.y, mu, P, run.n)
        row = {"fraction": f, "groups": m, "frobenius_rel": plain["frobenius_rel"], "deviance": plain["deviance"]}
        if refit and m == len(kept):
            row.update(frobenius_rel_refit=plain["frobenius_rel"], deviance_refit=plain["deviance"])
        elif refit and m:
            again = model_errors(A, run.y, refit_subset(A, run.y, mu, P, kept[:m], tol, max_iter), P, run.n)
            row.update(frobenius_rel_refit=again["frobenius_rel"], deviance_refit=again["deviance"])
        else:
            row.update(frobenius_rel_refit=float("nan"), deviance_refit=float("nan"))
        row["spectral_rank"] = int(min(r, len(w)))
        row["spectral_frobenius_rel"] = math.sqrt(sqp / Y2) if Y2 > 0 else float("nan")
        rows.append(row)
    cols = ["fraction", "groups", "frobenius_rel", "deviance", "frobenius_rel_refit", "deviance_refit",
            "spectral_rank", "spectral_frobenius_rel"]
    return pd.DataFrame(rows, columns=cols)


def error_at(run_dir, fractions=(0.1, 0.25), refit: bool = False) -> dict:
    """Relative Frobenius error (all pairs) with the given fractions of the strongest groups.

    Parameters
    ----------
    run_dir : str, Path or FittedRun
    fractions : sequence of float
    refit : bool
        Score refitted groups instead of the full fit's intensities (slower).

    Returns
    -------
    dict
        ``{fraction: frobenius_rel}``.
    """
    run = _as_run(run_dir)
    A = run.incidence()
    P = run.P
    kept = run.kept
    fit = run.settings.get("fit", {})
    out = {}
    for f, m in zip(fractions, _group_counts(len(kept), fractions)):
        mu = np.zeros_like(run.mu)
        mu[kept[:m]] = run.mu[kept[:m]]
        if refit and 0 < m < len(kept):
            mu = refit_subset(A, run.y, mu, P, kept[:m], float(fit.get("tol", 1e-8)), int(fit.get("max_iter", 2000)))
        out[float(f)] = model_errors(A, run.y, mu, P, run.n)["frobenius_rel"]
    return out


def concentration(run_dir, level: float = 0.9, max_rank: int = spectral.ENERGY_MAX_RANK, seed: int = 0) -> dict:
    """How few groups, and how few eigenpairs, hold a share ``level`` of the structure.

    Parameters
    ----------
    run_dir : str, Path or FittedRun
    level : float
        Share in (0, 1].
    max_rank : int
        Largest exact eigen-decomposition tried; beyond it the spectral rank is
        estimated by stochastic Lanczos quadrature.
    seed : int

    Returns
    -------
    dict
        ``groups_fraction`` (kept groups needed over kept groups), ``groups_needed``,
        ``groups_kept``, ``spectral_fraction`` (eigenpairs needed over nodes with an
        edge), ``eigenpairs_needed``, ``n_active``, ``spectral_method``, ``level``.
    """
    if not (0 < level <= 1):
        raise ValueError("level must lie in (0, 1]")
    run = _as_run(run_dir)
    kept = run.kept
    ew = run.mu[kept] * run.P[kept]
    cum = np.cumsum(ew)
    if len(cum) and cum[-1] > 0:
        needed = int(np.searchsorted(cum, level * cum[-1] * (1 - 1e-12)) + 1)
        gfrac = needed / len(kept)
    else:
        needed, gfrac = 0, float("nan")
    Aadj, active = spectral.active_subgraph(run.n, run.u, run.v, run.y)
    sp_res = spectral.energy_rank(Aadj, level, max_rank=max_rank, seed=seed)
    return {"level": level, "groups_fraction": gfrac, "groups_needed": needed, "groups_kept": int(len(kept)),
            "spectral_fraction": sp_res["fraction"], "eigenpairs_needed": sp_res["rank"],
            "n_active": int(len(active)), "spectral_method": sp_res["method"]}
