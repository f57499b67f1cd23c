"""Standard errors and Wald intervals for the intensities of the strongest groups.

**Method.** With the kept groups fixed, the log-likelihood of the intensities is
that of a Poisson regression with the identity link, ``lambda = A mu`` (``A`` the
edge-group incidence). Its observed information is

    I(mu) = A^T diag(y / lambda^2) A

(the expected information, ``A^T diag(1 / lambda) A``, on request). The standard
error of ``mu_k`` is ``sqrt([I_SS^{-1}]_kk)`` where ``S`` holds the ``top``
strongest kept groups and every kept group that shares a pair with one of them;
the other groups are held at their estimates. A group's estimate is correlated
only with the groups it overlaps, so this block carries the first-order effect
of the overlaps; when ``S`` holds every kept group it is the usual inverse of the
full information. The block is factorised sparsely (``scipy.sparse.linalg.splu``),
so the cost follows the block's pairs, not its square.

Intervals are Wald intervals ``mu +- z se`` with the lower end clipped at 0.

**Assumptions, and where they fail.**

* The counts are independent Poisson given the rates. Overdispersed counts make
  the errors too small; :func:`pearson_dispersion` gives the Pearson statistic
  over degrees of freedom as a check (near 1 under the model).
* The candidate groups are treated as known. They were chosen from the same
  data, which the errors do not account for, so they are optimistic.
* Wald intervals need the estimate away from 0 and many interactions per group;
  a group with few pairs or a small expected weight gets a poor interval.
* Groups whose pair sets are linearly dependent (say a triangle and its three
  pairs, all kept) are not separately identifiable: the information is singular
  and their standard errors come out as ``inf`` (``identifiable`` False).
"""

from __future__ import annotations

import warnings

import numpy as np
import pandas as pd
import scipy.sparse as sp
from scipy.sparse.linalg import MatrixRankWarning, splu
from scipy.stats import norm

from cliquewise.analysis.rundata import FittedRun, load_run

__all__ = ["information_matrix", "standard_errors", "pearson_dispersion"]


def information_matrix(A, y: np.ndarray, mu: np.ndarray, kind: str = "observed") -> sp.csc_matrix:
    """Fisher information ``A^T diag(d) A`` of the identity-link Poisson model.

    Parameters
    ----------
    A : scipy sparse, ``E x K``
        Incidence over the groups of interest (columns).
    y : float64 array, length ``E``
    mu : float64 array, length ``K``
    kind : {"observed", "expected"}
        ``d = y / lambda^2`` (observed) or ``d = 1 / lambda`` (expected), with
        ``lambda`` the full rate of each pair (pass it through ``mu`` of all groups).

    Returns
    -------
    scipy.sparse.csc_matrix, ``K x K``
    """
    lam = A @ mu
    return _info(A, y, lam, kind)


def _info(A, y, lam, kind):
    with np.errstate(divide="ignore", invalid="ignore"):
        if kind == "observed":
            d = np.where(lam > 0, y / lam ** 2, 0.0)
        elif kind == "expected":
            d = np.where(lam > 0, 1.0 / lam, 0.0)
        else:
            raise ValueError(f"unknown information kind {kind!r} (observed or expected)")
    return (A.T @ sp.diags(d) @ A).tocsc()


def pearson_dispersion(run_dir) -> float:
    """Pearson ``sum (y - lambda)^2 / lambda`` over the pairs with a rate, over ``pairs - groups``."""
    run = run_dir if isinstance(run_dir, FittedRun) else load_run(run_dir)
    lam = run.incidence() @ run.mu
    ok = lam > 0
    df = int(ok.sum()) - int((run.mu > 0).sum())
    if df <= 0:
        return float("nan")
    return float((((run.y - lam) ** 2)[ok] / lam[ok]).sum() / df)


def standard_errors(run_dir, top: int = 20, information: str = "observed", level: float = 0.95) -> pd.DataFrame:
    """Standard errors and Wald intervals of the ``top`` strongest kept groups.

    Parameters
    ----------
    run_dir : str, Path or FittedRun
    top : int
        How many groups (strongest expected weight first).
    information : {"observed", "expected"}
    level : float
        Coverage of the intervals.

    Returns
    -------
    pandas.DataFrame
        ``clique_id`` (as in ``results/cliques.parquet``), ``size``, ``intensity``,
        ``expected_weight``, ``se``, ``rel_se`` (``se / intensity``), ``ci_low``,
        ``ci_high``, ``identifiable``, ``block`` (groups in the inverted block).
    """
    run = run_dir if isinstance(run_dir, FittedRun) else load_run(run_dir)
    kept = run.kept
    T = int(min(top, len(kept)))
    cols = ["clique_id", "size", "intensity", "expected_weight", "se", "rel_se", "ci_low", "ci_high",
            "identifiable", "block"]
    if T == 0:
        return pd.DataFrame(columns=cols)
    A = run.incidence()
    lam = A @ run.mu
    Acsc = A.tocsc()
    # block: the top groups, then every kept group sharing a pair with one of them
    rows = np.unique(Acsc[:, kept[:T]].indices)
    near = np.unique(A[rows].indices)
    near = near[run.mu[near] > 0]
    others = np.setdiff1d(near, kept[:T], assume_unique=True)
    block = np.concatenate([kept[:T], others])
    info = _info(Acsc[:, block].tocsr(), run.y, lam, information)
    se = np.full(T, np.inf)
    with warnings.catch_warnings():
        warnings.simplefilter("error", MatrixRankWarning)
        try:
            lu = splu(info, permc_spec="COLAMD")
            inv_cols = lu.solve(np.eye(len(block), T))
            d = inv_cols[np.arange(T), np.arange(T)]
            ok = np.isfinite(d) & (d > 0)
            se[ok] = np.sqrt(d[ok])
        except (RuntimeError, MatrixRankWarning):
            pass  # exactly singular: leave inf
    mu = run.mu[kept[:T]]
    size = run.sizes[kept[:T]]
    z = float(norm.ppf(0.5 + level / 2.0))
    ident = np.isfinite(se)
    return pd.DataFrame({
        "clique_id": np.arange(T, dtype=np.int64),
        "size": size.astype(np.int64),
        "intensity": mu,
        "expected_weight": mu * size * (size - 1) / 2.0,
        "se": se,
        "rel_se": se / mu,
        "ci_low": np.maximum(mu - z * se, 0.0),
        "ci_high": mu + z * se,
        "identifiable": ident,
        "block": len(block),
    }, columns=cols)
