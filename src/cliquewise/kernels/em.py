"""EM for the Poisson clique-factor model, with a SQUAREM accelerator.

Model: every edge ``e`` (a pair inside at least one candidate) has a count
``y_e ~ Poisson(lambda_e)`` with ``lambda_e = sum of mu_k`` over the candidates
``k`` that contain both ends of ``e``. Candidate ``k`` has ``P_k = s_k (s_k-1)/2``
pairs. The log-likelihood, up to the constant ``-sum lgamma(y_e + 1)``, is::

    L(mu) = sum_e y_e log(lambda_e) - sum_k mu_k P_k

and the EM step is ``mu_k <- mu_k / P_k * sum_{e in k} y_e / lambda_e``.

Inputs are the edge->candidate incidence in CSR form: ``inc_ptr`` (int64,
``E + 1``), ``inc_cand`` (int64 candidate ids), ``y`` (float64, ``E``), ``P``
(float64, ``K``). Pairs with ``y = 0`` contribute nothing to ``L`` or to the step
apart from their share of ``P``, so they may be left out of the incidence.

What lives here

- numba kernels: :func:`em_partial` (one fused sweep over a partition of the
  edges, the "map" of a distributed EM step), :func:`em_update`,
  :func:`loglik_partial`, :func:`penalty`, :func:`loglik`, :func:`loglik_constant`,
  and SQUAREM's vector arithmetic without temporaries (:func:`squarem_norms`,
  :func:`squarem_point`).
- :func:`fit_em`, a pure-numpy driver (plain EM or SQUAREM) around any callable
  ``step(mu) -> (mu_next, loglik_at_mu)``, so the caller may implement the step as
  a map-reduce; :func:`fit_local` wires it to the kernels for in-memory problems;
  :func:`initial_mu` gives the default start.
- reference twins in scipy: :func:`incidence_matrix_reference`,
  :func:`em_step_reference`, :func:`loglik_reference`.

Determinism: every reduction is a sequential loop in a fixed order, so the same
inputs (and the same partitioning) give bitwise the same outputs. Partial
results of different partitions are equal to a single sweep up to floating-point
reassociation only.
"""

from __future__ import annotations

import math
from typing import Callable, NamedTuple

import numba
import numpy as np

from cliquewise import _numba_setup  # noqa: F401  (sets NUMBA_CACHE_DIR first)

__all__ = [
    "EMResult",
    "em_partial",
    "em_update",
    "em_update_penalty",
    "em_step_reference",
    "fit_em",
    "fit_local",
    "incidence_matrix_reference",
    "initial_mu",
    "loglik",
    "loglik_constant",
    "loglik_partial",
    "loglik_reference",
    "penalty",
]


# --------------------------------------------------------------------------
# numba kernels
# --------------------------------------------------------------------------


@numba.njit(nogil=True, cache=True)
def em_partial(inc_ptr, inc_cand, y, mu, acc, cand_lo=0, want_loglik=True):
    """One fused EM sweep over a partition of the edges.

    For each edge ``e`` of the partition: gather ``lambda_e = sum mu_k``, add
    ``y_e / lambda_e`` into ``acc[k - cand_lo]`` for each candidate ``k`` of ``e``,
    and add ``y_e log(lambda_e)`` to the returned total.

    Parameters
    ----------
    inc_ptr : int64 array, length ``E_part + 1``
        Row pointers of the partition. ``inc_ptr[0]`` need not be 0: edge ``i``
        owns ``inc_cand[inc_ptr[i] - inc_ptr[0] : inc_ptr[i + 1] - inc_ptr[0]]``,
        so a slice ``inc_ptr[a:b+1]`` of the global pointer array goes with the
        slice ``inc_cand[inc_ptr[a]:inc_ptr[b]]``.
    inc_cand : int64 array
        Global candidate ids of the partition's incidences.
    y : float64 array, length ``E_part``
        Edge weights (``>= 0``; ``0`` entries are skipped).
    mu : float64 array, length ``K``
        Current intensities, indexed by global candidate id.
    acc : float64 array
        Accumulator, updated in place (not zeroed here). It covers candidates
        ``[cand_lo, cand_lo + len(acc))``; every candidate of the partition must
        lie in that range.
    cand_lo : int
        Global id of the candidate stored in ``acc[0]``.
    want_loglik : bool
        When False the logarithms are skipped and 0.0 is returned (the middle
        SQUAREM step never uses its log-likelihood; the log is most of the cost).

    Returns
    -------
    float
        ``sum_e y_e log(lambda_e)`` over the partition. An edge with ``y_e > 0``
        whose ``lambda_e`` is 0 (all its candidates have ``mu = 0``, or it has no
        candidate) makes the total ``-inf``; it adds nothing to ``acc``, which
        keeps ``acc`` finite (those candidates have ``mu = 0`` and stay there).

    Raises
    ------
    ValueError
        On mismatched lengths or a candidate id outside ``mu`` or ``acc`` (checked
        in one sequential pass before the sweep, so the sweep itself is unchecked).
    """
    n_edges = y.shape[0]
    if inc_ptr.shape[0] != n_edges + 1:
        raise ValueError("inc_ptr must have len(y) + 1 entries")
    base = inc_ptr[0]
    n_inc = inc_ptr[n_edges] - base
    if n_inc > inc_cand.shape[0]:
        raise ValueError("inc_cand is shorter than inc_ptr says")
    n_mu = mu.shape[0]
    n_acc = acc.shape[0]
    for j in range(n_inc):
        k = inc_cand[j]
        if k < 0 or k >= n_mu:
            raise ValueError("candidate id outside mu")
        if k - cand_lo < 0 or k - cand_lo >= n_acc:
            raise ValueError("candidate id outside the acc range")
    total = 0.0
    for i in range(n_edges):
        start = inc_ptr[i] - base
        stop = inc_ptr[i + 1] - base
        ye = y[i]
        if ye == 0.0:
            continue
        lam = 0.0
        for j in range(start, stop):
            lam += mu[inc_cand[j]]
        if lam > 0.0:
            if want_loglik:
                total += ye * math.log(lam)
            ratio = ye / lam
            for j in range(start, stop):
                acc[inc_cand[j] - cand_lo] += ratio
        else:
            total = -np.inf
    return total


@numba.njit(nogil=True, cache=True)
def loglik_partial(inc_ptr, inc_cand, y, mu):
    """``sum_e y_e log(lambda_e)`` over a partition, without touching an accumulator.

    Same conventions as :func:`em_partial` (``-inf`` when some ``y_e > 0`` has
    ``lambda_e = 0``). Use it for a final or held-out evaluation.

    Parameters
    ----------
    inc_ptr, inc_cand, y, mu : arrays
        As in :func:`em_partial`.

    Returns
    -------
    float
    """
    n_edges = y.shape[0]
    if inc_ptr.shape[0] != n_edges + 1:
        raise ValueError("inc_ptr must have len(y) + 1 entries")
    base = inc_ptr[0]
    if inc_ptr[n_edges] - base > inc_cand.shape[0]:
        raise ValueError("inc_cand is shorter than inc_ptr says")
    n_mu = mu.shape[0]
    total = 0.0
    for i in range(n_edges):
        lam = 0.0
        for j in range(inc_ptr[i] - base, inc_ptr[i + 1] - base):
            k = inc_cand[j]
            if k < 0 or k >= n_mu:
                raise ValueError("candidate id outside mu")
            lam += mu[k]
        ye = y[i]
        if ye == 0.0:
            continue
        if lam > 0.0:
            total += ye * math.log(lam)
        else:
            total = -np.inf
    return total


@numba.njit(nogil=True, cache=True)
def penalty(mu, P):
    """``sum_k mu_k P_k``, summed sequentially (deterministic).

    Parameters
    ----------
    mu, P : float64 arrays, length ``K``

    Returns
    -------
    float
    """
    if mu.shape[0] != P.shape[0]:
        raise ValueError("mu and P differ in length")
    total = 0.0
    for k in range(mu.shape[0]):
        total += mu[k] * P[k]
    return total


@numba.njit(nogil=True, cache=True)
def em_update(mu, acc, P):
    """EM step from an accumulated sweep: ``mu * acc / P`` (a new array).

    Parameters
    ----------
    mu : float64 array, length ``K``
    acc : float64 array, length ``K``
        Sum over all partitions of :func:`em_partial` accumulators, i.e.
        ``acc_k = sum_{e in k} y_e / lambda_e``. Note ``acc_k - P_k`` is the
        gradient of the log-likelihood.
    P : float64 array, length ``K``
        Pairs per candidate (``> 0``).

    Returns
    -------
    float64 array
        The next ``mu``. A candidate with ``mu_k = 0`` stays at 0.
    """
    n = mu.shape[0]
    if acc.shape[0] != n or P.shape[0] != n:
        raise ValueError("mu, acc and P differ in length")
    out = np.empty(n, dtype=np.float64)
    for k in range(n):
        m = mu[k]
        out[k] = 0.0 if m == 0.0 else m * acc[k] / P[k]
    return out


@numba.njit(nogil=True, cache=True)
def em_update_penalty(mu, acc, P):
    """:func:`em_update` and :func:`penalty` of ``mu`` in one pass over the arrays.

    Returns
    -------
    tuple of (float64 array, float)
        The next ``mu`` and ``sum_k mu_k P_k`` (summed in the same order as
        :func:`penalty`, so the two agree bit for bit).
    """
    out = np.empty(mu.shape[0], dtype=np.float64)
    return out, em_update_penalty_into(mu, acc, P, out)


@numba.njit(nogil=True, cache=True)
def em_update_penalty_into(mu, acc, P, out):
    """:func:`em_update_penalty` writing the next ``mu`` into ``out``; returns the penalty."""
    n = mu.shape[0]
    if acc.shape[0] != n or P.shape[0] != n or out.shape[0] != n:
        raise ValueError("mu, acc, P and out differ in length")
    total = 0.0
    for k in range(n):
        m = mu[k]
        total += m * P[k]
        out[k] = 0.0 if m == 0.0 else m * acc[k] / P[k]
    return total


@numba.njit(nogil=True, cache=True)
def loglik(inc_ptr, inc_cand, y, mu, P):
    """Log-likelihood up to a constant: ``sum y log(lambda) - sum mu P``.

    Add :func:`loglik_constant` for the full Poisson log-likelihood.

    Parameters
    ----------
    inc_ptr, inc_cand, y : arrays
        The whole incidence (see :func:`em_partial`).
    mu, P : float64 arrays, length ``K``

    Returns
    -------
    float
    """
    return loglik_partial(inc_ptr, inc_cand, y, mu) - penalty(mu, P)


@numba.njit(nogil=True, cache=True)
def loglik_constant(y):
    """The constant ``-sum_e lgamma(y_e + 1)`` of the Poisson log-likelihood.

    Parameters
    ----------
    y : float64 array

    Returns
    -------
    float
    """
    total = 0.0
    for i in range(y.shape[0]):
        total -= math.lgamma(y[i] + 1.0)
    return total


@numba.njit(nogil=True, cache=True)
def squarem_norms(x, x1, x2):
    """``(||r||^2, ||v||^2)`` with ``r = x1 - x`` and ``v = x2 - 2 x1 + x``, in one
    sequential pass and without temporaries (the same sums as on the arrays)."""
    sr = 0.0
    sv = 0.0
    for k in range(x.shape[0]):
        r = x1[k] - x[k]
        v = x2[k] - 2.0 * x1[k] + x[k]
        sr += r * r
        sv += v * v
    return sr, sv


@numba.njit(nogil=True, cache=True)
def squarem_point(x, x1, x2, alpha, min_ratio):
    """The extrapolated point ``x - 2 alpha r + alpha^2 v``, projected: a coordinate
    that is not positive (or NaN) becomes ``min_ratio * x`` (see :func:`fit_em`)."""
    out = np.empty(x.shape[0], np.float64)
    squarem_point_into(x, x1, x2, alpha, min_ratio, out)
    return out


@numba.njit(nogil=True, cache=True)
def squarem_point_into(x, x1, x2, alpha, min_ratio, out):
    """:func:`squarem_point` written into ``out``."""
    a2 = 2.0 * alpha
    aa = alpha * alpha
    for k in range(x.shape[0]):
        r = x1[k] - x[k]
        v = x2[k] - 2.0 * x1[k] + x[k]
        p = x[k] - a2 * r + aa * v
        out[k] = p if p > 0.0 else min_ratio * x[k]


# --------------------------------------------------------------------------
# drivers
# --------------------------------------------------------------------------


class EMResult(NamedTuple):
    """Outcome of :func:`fit_em`.

    Attributes
    ----------
    mu : float64 array
        Final intensities (always an EM image, so ``sum mu P == sum y``).
    trace : float64 array
        Log-likelihood at each accepted iterate, starting with ``mu0`` and ending
        with the returned ``mu``; non-decreasing.
    iterations : int
        Accepted updates of ``mu`` (one EM step each, or one SQUAREM cycle of up
        to three EM steps; the run ends on a plain EM step). ``len(trace) ==
        iterations + 1``.
    converged : bool
        Whether the relative change of the log-likelihood fell below ``tol``.
    n_evals : int
        Calls of ``step`` (EM evaluations).
    """

    mu: np.ndarray
    trace: np.ndarray
    iterations: int
    converged: bool
    n_evals: int

    @property
    def loglik(self) -> float:
        """Log-likelihood of :attr:`mu` (the last entry of :attr:`trace`)."""
        return float(self.trace[-1])


def _small_change(old: float, new: float, tol: float) -> bool:
    """Relative change test ``|new - old| <= tol |new|`` (False if not finite)."""
    if not (math.isfinite(old) and math.isfinite(new)):
        return False
    return abs(new - old) <= tol * abs(new)


class _ArrayOps:
    """:func:`fit_em`'s vector operations on numpy arrays."""

    @staticmethod
    def check(x) -> None:
        if np.any(x < 0) or not np.all(np.isfinite(x)):
            raise ValueError("mu0 must be finite and >= 0")

    norms = staticmethod(squarem_norms)
    point = staticmethod(squarem_point)


def fit_em(
    step: Callable[[np.ndarray], tuple[np.ndarray, float]],
    loglik_fn: Callable[[np.ndarray], float],
    mu0: np.ndarray,
    tol: float = 1e-10,
    max_iter: int = 1000,
    accelerate: bool = True,
    callback: Callable[[int, np.ndarray, float], bool | None] | None = None,
    min_ratio: float = 1e-8,
    trace0=None,
    start_iter: int = 0,
    ops=None,
) -> EMResult:
    """Run EM, optionally accelerated by SQUAREM, around a step callable.

    SQUAREM (Varadhan and Roland, Scand. J. Statist. 2008), scheme S3: from
    ``x0`` take two EM steps ``x1 = F(x0)``, ``x2 = F(x1)``; with ``r = x1 - x0``,
    ``v = x2 - 2 x1 + x0`` and ``alpha = -||r|| / ||v||`` clamped to ``<= -1``,
    extrapolate ``x' = x0 - 2 alpha r + alpha^2 v``, project onto ``mu >= 0`` and
    take one stabilising EM step ``F(x')``. Safeguard: if ``L(x') < L(x0)`` (or is
    not a number) the cycle falls back to the plain EM point ``x2``. Either way the
    next iterate is an EM image of a point at least as good as ``x0``, so the
    trace is monotone. ``alpha = -1`` gives ``x' = x2`` exactly.

    Projection detail: a coordinate the extrapolation sends to or below 0 is set
    to ``min_ratio * x0_k`` rather than to 0. EM is multiplicative, so an exact 0
    could never come back if the extrapolation overshot a candidate that belongs
    in the fit; the small positive floor keeps it revivable and costs nothing
    for candidates whose optimum is 0 (EM keeps shrinking them). ``min_ratio=0``
    is the plain projection onto ``mu >= 0``.

    Parameters
    ----------
    step : callable
        ``step(mu) -> (F(mu), L(mu))``: one EM step and the log-likelihood at its
        *input*. May be a distributed map-reduce. If it has a method
        ``without_loglik(mu) -> (F(mu), anything)``, SQUAREM uses it for the middle
        step of each cycle, whose log-likelihood is never looked at.
    loglik_fn : callable
        ``loglik_fn(mu) -> L(mu)``; called once, for the returned ``mu``.
    mu0 : float64 array
        Start, ``>= 0`` (see :func:`initial_mu`).
    tol : float
        Stop when ``|L_t - L_{t-1}| <= tol |L_t|`` between accepted iterates.
    max_iter : int
        Maximum number of outer iterations.
    accelerate : bool
        Use SQUAREM (three EM evaluations per outer iteration at most).
    callback : callable, optional
        ``callback(iteration, mu, L)`` once per outer iteration, before the
        update, with the current iterate ``x_t`` (``t = iteration``) and its
        log-likelihood (e.g. to checkpoint). The values ``L`` it sees, in order,
        are the trace entries. A truthy return value stops the run after one
        more plain EM step (``converged`` is then False).
    min_ratio : float
        Floor of the projection, relative to ``x0`` (see above).
    trace0 : sequence of float, optional
        Resume: the trace entries before ``mu0``, i.e. ``L(x_0) .. L(x_{t-1})``
        when ``mu0`` is the iterate ``x_t`` handed to ``callback`` at iteration
        ``t``. With ``start_iter = t`` the resumed run then repeats the
        uninterrupted one exactly (apart from ``n_evals``).
    start_iter : int
        Resume: iterations already done; ``max_iter`` counts them too.
    ops : object, optional
        The vector operations SQUAREM needs, for vectors that are not plain
        arrays in memory: ``check(x)`` (raise unless finite and ``>= 0``),
        ``norms(x, x1, x2)`` (:func:`squarem_norms`) and
        ``point(x, x1, x2, alpha, min_ratio)`` (:func:`squarem_point`). Default:
        those kernels on numpy arrays.

    Returns
    -------
    EMResult
    """
    ops = _ArrayOps if ops is None else ops
    x = mu0 if ops is not _ArrayOps else np.asarray(mu0, dtype=np.float64)  # never written in place
    ops.check(x)
    trace: list[float] = [float(t) for t in trace0] if trace0 is not None else []
    n_evals = 0
    converged = False
    iterations = int(start_iter)
    while iterations < max_iter:
        x1, l0 = step(x)
        n_evals += 1
        l0 = float(l0)
        trace.append(l0)
        if len(trace) > 1 and _small_change(trace[-2], l0, tol):
            converged = True
            x = x1
            iterations += 1
            break
        if callback is not None and callback(iterations, x, l0):
            x = x1
            iterations += 1
            break
        iterations += 1
        if not accelerate:
            x = x1
            continue
        x2, _ = (step.without_loglik(x1) if hasattr(step, "without_loglik") else step(x1))
        n_evals += 1
        sr, sv = ops.norms(x, x1, x2)
        alpha = -math.sqrt(sr / sv) if sv > 0.0 else -1.0
        if not alpha < -1.0:  # clamp to <= -1; also catches nan
            x = x2  # alpha = -1: the extrapolated point is x2 itself
            continue
        xp = ops.point(x, x1, x2, alpha, min_ratio)  # projected; nan counts as not positive
        x = x1 = None  # not needed any more: one vector less held while F(x') runs
        x3, lp = step(xp)
        n_evals += 1
        x = x3 if float(lp) >= l0 else x2  # safeguard (False for nan)
    # x is now an EM image (or mu0 when max_iter == 0) whose value is not yet known
    trace.append(float(loglik_fn(x)))
    return EMResult(x, np.asarray(trace, dtype=np.float64), iterations, converged, n_evals)


def initial_mu(inc_ptr, inc_cand, y, P):
    """Default start: each edge's weight shared equally among its candidates.

    ``mu0_k = (1 / P_k) * sum_{e in k} y_e / c_e`` with ``c_e`` the number of
    candidates on edge ``e``: the average, over the candidate's pairs, of the
    equal shares. It is also one EM step from any constant start, so
    ``sum mu0 P = sum y``; a candidate gets 0 only if all its edges have ``y = 0``.

    Parameters
    ----------
    inc_ptr, inc_cand, y : arrays
        The whole incidence (see :func:`em_partial`).
    P : float64 array, length ``K``

    Returns
    -------
    float64 array
    """
    ones = np.ones(P.shape[0], dtype=np.float64)
    acc = np.zeros(P.shape[0], dtype=np.float64)
    em_partial(inc_ptr, inc_cand, y, ones, acc, 0)
    return em_update(ones, acc, P)


def fit_local(
    inc_ptr,
    inc_cand,
    y,
    P,
    mu0=None,
    tol: float = 1e-10,
    max_iter: int = 1000,
    accelerate: bool = True,
    callback=None,
) -> EMResult:
    """Fit ``mu`` on an in-memory incidence with :func:`fit_em`.

    Parameters
    ----------
    inc_ptr, inc_cand, y : arrays
        Edge->candidate CSR incidence and edge weights (see :func:`em_partial`).
    P : float64 array, length ``K``
        Pairs per candidate.
    mu0 : float64 array, optional
        Start; default :func:`initial_mu`.
    tol, max_iter, accelerate, callback
        As in :func:`fit_em`.

    Returns
    -------
    EMResult
    """
    inc_ptr = np.ascontiguousarray(inc_ptr, dtype=np.int64)
    inc_cand = np.ascontiguousarray(inc_cand, dtype=np.int64)
    y = np.ascontiguousarray(y, dtype=np.float64)
    P = np.ascontiguousarray(P, dtype=np.float64)
    if mu0 is None:
        mu0 = initial_mu(inc_ptr, inc_cand, y, P)
    n_cand = P.shape[0]

    def step(mu):
        acc = np.zeros(n_cand, dtype=np.float64)
        part = em_partial(inc_ptr, inc_cand, y, mu, acc, 0)
        return em_update(mu, acc, P), part - penalty(mu, P)

    def loglik_fn(mu):
        return loglik(inc_ptr, inc_cand, y, mu, P)

    return fit_em(step, loglik_fn, mu0, tol=tol, max_iter=max_iter,
                  accelerate=accelerate, callback=callback)


# --------------------------------------------------------------------------
# reference twins (scipy, obviously correct, slow-ish)
# --------------------------------------------------------------------------


def incidence_matrix_reference(inc_ptr, inc_cand, n_cand):
    """The 0/1 edge-by-candidate matrix ``A`` (scipy CSR, ``E x K``).

    Parameters
    ----------
    inc_ptr, inc_cand : int64 arrays
        Incidence with ``inc_ptr[0] == 0``.
    n_cand : int
        ``K``.

    Returns
    -------
    scipy.sparse.csr_matrix
    """
    import scipy.sparse as sp

    inc_ptr = np.asarray(inc_ptr, dtype=np.int64)
    data = np.ones(inc_ptr[-1], dtype=np.float64)
    return sp.csr_matrix((data, np.asarray(inc_cand[: inc_ptr[-1]]), inc_ptr),
                         shape=(inc_ptr.shape[0] - 1, n_cand))


def em_step_reference(inc_ptr, inc_cand, y, mu, P):
    """One EM step in scipy: ``lam = A mu; g = A^T (y / lam); mu g / P``.

    Parameters
    ----------
    inc_ptr, inc_cand, y, mu, P : arrays
        As in :func:`fit_local` (``inc_ptr[0] == 0``, all ``lambda > 0``).

    Returns
    -------
    mu_next : float64 array
    loglik_at_mu : float
        ``sum y log(lam) - sum mu P``.
    grad : float64 array
        ``A^T (y / lam) - P``, the gradient at ``mu``.
    """
    A = incidence_matrix_reference(inc_ptr, inc_cand, len(P))
    lam = A @ mu
    g = A.T @ (y / lam)
    return mu * g / P, float(np.sum(y * np.log(lam)) - np.sum(mu * P)), g - P


def loglik_reference(inc_ptr, inc_cand, y, mu, P):
    """Log-likelihood up to a constant, in scipy (see :func:`loglik`)."""
    A = incidence_matrix_reference(inc_ptr, inc_cand, len(P))
    lam = A @ mu
    pos = y > 0
    with np.errstate(divide="ignore"):
        return float(np.sum(y[pos] * np.log(lam[pos])) - np.sum(mu * P))
