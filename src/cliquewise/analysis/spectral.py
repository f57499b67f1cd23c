"""The spectral baseline: a truncated eigendecomposition of the weighted adjacency.

The weighted adjacency ``A`` (``A_ij = A_ji = y_ij``, zero diagonal) is
approximated by its ``r`` eigenpairs of largest magnitude, ``A_r = V diag(w) V^T``,
found with :func:`scipy.sparse.linalg.eigsh` (ARPACK, implicitly restarted
Lanczos). By the Eckart-Young-Mirsky theorem this is the best rank-``r``
approximation in Frobenius norm, and ``||A - A_r||_F^2`` (full matrix, diagonal
included) is the sum of the discarded squared eigenvalues.

**Parameter-budget matching rule** (``rule="storage"``, the default). A kept group
is stored as one intensity and ``s`` member ids; an eigenpair as one eigenvalue
and ``n_active`` vector entries (``n_active`` = nodes with at least one edge; an
eigenvector of a nonzero eigenvalue is 0 on isolated nodes). ``m`` groups with
``S`` member slots in all get the rank with no more stored numbers::

    r = floor((m + S) / (n_active + 1))

``rule="count"`` gives one eigenpair per group (``r = m``), far more numbers
than the groups use; it is there for comparison. Both are capped by ``max_rank``
and by ``n_active - 1`` (ARPACK needs ``k < n``).

**Errors.** With ``q_t = v_t^T A v_t`` (``= w_t`` for exact eigenpairs) and
orthonormal ``V``::

    ||A - A_r||_F^2 = ||A||_F^2 - sum_t w_t (2 q_t - w_t)

computed from ``A`` and ``V`` only (cost ``O(r E)``), never from a dense matrix.
Over the unordered pairs ``i < j`` (what the group model is scored on) the
diagonal of ``A_r``, ``d_i = sum_t w_t V_it^2``, is taken out:
``sum_{i<j} (y_ij - A_r,ij)^2 = (||A - A_r||_F^2 - sum_i d_i^2) / 2``.

**Energy concentration.** :func:`energy_rank` finds how many eigenpairs hold a
share ``level`` of the energy ``||A||_F^2 = sum_t w_t^2``: exactly, from growing
``eigsh`` calls, when that rank is at most ``max_rank``; otherwise estimated by
stochastic Lanczos quadrature (Ubaru, Chen and Saad, "Fast estimation of
tr(f(A)) via stochastic Lanczos quadrature", SIAM J. Matrix Anal. Appl. 2017),
which costs ``probes * steps`` sparse products.
"""

from __future__ import annotations

import numpy as np
import scipy.sparse as sp
from scipy.sparse.linalg import ArpackNoConvergence, eigsh

__all__ = ["adjacency", "budget_rank", "top_eigenpairs", "lowrank_sq_errors", "lowrank_values",
           "energy_rank", "slq_spectrum"]

DEFAULT_MAX_RANK = 256  # largest rank of the compression-curve baseline
ENERGY_MAX_RANK = 64  # largest exact rank tried for the energy count before the estimate


def adjacency(n: int, u, v, y) -> sp.csr_matrix:
    """Symmetric sparse weighted adjacency (``n x n``) from pairs ``u < v`` with weights ``y``."""
    u = np.asarray(u, np.int64)
    v = np.asarray(v, np.int64)
    y = np.asarray(y, np.float64)
    A = sp.coo_matrix((np.concatenate([y, y]), (np.concatenate([u, v]), np.concatenate([v, u]))), shape=(n, n))
    return A.tocsr()


def active_subgraph(n: int, u, v, y) -> tuple[sp.csr_matrix, np.ndarray]:
    """Adjacency restricted to nodes with an edge, and the original id of each row."""
    active = np.unique(np.concatenate([np.asarray(u, np.int64), np.asarray(v, np.int64)]))
    uu = np.searchsorted(active, u)
    vv = np.searchsorted(active, v)
    return adjacency(len(active), uu, vv, y), active


def budget_rank(groups: int, member_slots: int, n_active: int, rule: str = "storage",
                max_rank: int = DEFAULT_MAX_RANK) -> int:
    """Eigenpairs matching ``groups`` kept groups with ``member_slots`` members in all.

    Parameters
    ----------
    groups, member_slots : int
        Kept groups and the sum of their sizes.
    n_active : int
        Nodes with at least one edge.
    rule : {"storage", "count"}
        ``storage``: no more stored numbers than the groups use; ``count``: one
        eigenpair per group (see the module docstring).
    max_rank : int
        Upper cap.

    Returns
    -------
    int
    """
    if rule == "storage":
        r = (int(groups) + int(member_slots)) // (int(n_active) + 1)
    elif rule == "count":
        r = int(groups)
    else:
        raise ValueError(f"unknown budget rule {rule!r} (storage or count)")
    return int(max(0, min(r, max_rank, int(n_active) - 1)))


def top_eigenpairs(A: sp.spmatrix, k: int, seed: int = 0, vectors: bool = True):
    """The ``k`` eigenpairs of largest magnitude of a symmetric sparse matrix.

    Returns ``(w, V)`` sorted by ``|w|`` descending (``V`` is ``None`` when
    ``vectors`` is False). ``k`` is capped at ``n - 1``. If ARPACK stops before
    all ``k`` converge, the converged ones are returned.
    """
    n = A.shape[0]
    k = int(min(k, n - 1))
    if k <= 0:
        return np.zeros(0), (np.zeros((n, 0)) if vectors else None)
    v0 = np.random.default_rng(seed).standard_normal(n)
    try:
        res = eigsh(A, k=k, which="LM", v0=v0, return_eigenvectors=vectors, maxiter=max(1000, 20 * n))
    except ArpackNoConvergence as exc:  # keep what converged
        res = (exc.eigenvalues, exc.eigenvectors) if vectors else exc.eigenvalues
    w, V = (res if vectors else (res, None))
    order = np.argsort(-np.abs(w), kind="stable")
    return w[order], (V[:, order] if vectors else None)


def lowrank_sq_errors(A: sp.spmatrix, w: np.ndarray, V: np.ndarray, ranks) -> tuple[np.ndarray, np.ndarray]:
    """Squared Frobenius errors of ``A_r`` for each ``r`` in ``ranks`` (``r <= len(w)``).

    Returns
    -------
    full : float64 array
        ``||A - A_r||_F^2`` over the whole matrix, diagonal included.
    pairs : float64 array
        ``sum_{i<j} (A_ij - A_r,ij)^2``, the unordered pairs only.
    """
    total = float(A.multiply(A).sum())
    AV = A @ V if V.shape[1] else np.zeros_like(V)
    q = np.einsum("ij,ij->j", V, AV)
    c = np.concatenate([[0.0], np.cumsum(w * (2.0 * q - w))])
    full, pairs = [], []
    for r in ranks:
        r = int(min(r, len(w)))
        f = max(total - c[r], 0.0)
        d = (V[:, :r] ** 2) @ w[:r] if r else np.zeros(A.shape[0])
        full.append(f)
        pairs.append(max((f - float(d @ d)) / 2.0, 0.0))
    return np.asarray(full), np.asarray(pairs)


def lowrank_values(w: np.ndarray, V: np.ndarray, i, j) -> np.ndarray:
    """Entries ``A_r[i, j] = sum_t w_t V_it V_jt`` for index arrays ``i``, ``j`` (cost ``O(len(i) r)``)."""
    i = np.asarray(i, np.int64)
    j = np.asarray(j, np.int64)
    out = np.zeros(len(i))
    step = 1 << 16  # bounded temporaries
    for a in range(0, len(i), step):
        out[a:a + step] = (V[i[a:a + step]] * V[j[a:a + step]]) @ w
    return out


def slq_spectrum(A: sp.spmatrix, probes: int = 24, steps: int = 40, seed: int = 0):
    """Stochastic Lanczos quadrature estimate of the eigenvalue distribution of ``A``.

    Each probe is a random unit vector with independent +-1/sqrt(n) entries; ``steps``
    Lanczos steps (full reorthogonalisation) give a tridiagonal ``T`` whose
    eigenvalues ``theta`` and squared first eigenvector entries ``tau`` are a
    Gauss quadrature for that probe's spectral measure. The estimate puts mass
    ``n tau / probes`` on each ``theta``: the masses sum to ``n`` and
    ``sum mass * theta^2`` estimates ``tr(A^2)``.

    Returns
    -------
    theta, mass : float64 arrays
    """
    n = A.shape[0]
    rng = np.random.default_rng(seed)
    m = int(min(steps, n))
    thetas, masses = [], []
    for _ in range(probes):
        q = rng.choice(np.array([-1.0, 1.0]), size=n) / np.sqrt(n)
        Q = np.zeros((m, n))
        alpha, beta = np.zeros(m), np.zeros(m)
        Q[0] = q
        k_used = m
        for k in range(m):
            z = A @ Q[k]
            alpha[k] = Q[k] @ z
            z -= Q[:k + 1].T @ (Q[:k + 1] @ z)  # full reorthogonalisation, twice
            z -= Q[:k + 1].T @ (Q[:k + 1] @ z)
            if k + 1 == m:
                break
            beta[k] = np.linalg.norm(z)
            if beta[k] < 1e-10:
                k_used = k + 1
                break
            Q[k + 1] = z / beta[k]
        T = np.diag(alpha[:k_used]) + np.diag(beta[:k_used - 1], 1) + np.diag(beta[:k_used - 1], -1)
        th, vec = np.linalg.eigh(T)
        thetas.append(th)
        masses.append(n * vec[0] ** 2 / probes)
    return np.concatenate(thetas), np.concatenate(masses)


def energy_rank(A: sp.spmatrix, level: float = 0.9, max_rank: int = ENERGY_MAX_RANK, seed: int = 0) -> dict:
    """Eigenpairs (largest magnitude first) needed to hold ``level`` of ``||A||_F^2``.

    Returns
    -------
    dict
        ``rank`` (may be fractional when estimated), ``n`` (order of ``A``),
        ``fraction`` (= rank / n), ``method`` (``"eigsh"`` or ``"slq"``).
    """
    n = A.shape[0]
    total = float(A.multiply(A).sum())
    if n == 0 or total == 0:
        return {"rank": 0, "n": n, "fraction": float("nan"), "method": "empty"}
    cap = int(min(max_rank, n - 1))
    k = int(min(32, cap))
    while k >= 1:
        w, _ = top_eigenpairs(A, k, seed=seed, vectors=False)
        cum = np.cumsum(np.sort(w ** 2)[::-1])
        if len(cum) and cum[-1] >= level * total * (1 - 1e-12):
            rank = int(np.searchsorted(cum, level * total * (1 - 1e-12)) + 1)
            return {"rank": rank, "n": n, "fraction": rank / n, "method": "eigsh"}
        if len(w) == n - 1 and len(w) == k:  # every eigenpair but one: the last one closes the gap
            return {"rank": n, "n": n, "fraction": 1.0, "method": "eigsh"}
        if k >= cap:
            break
        k = int(min(2 * k, cap))
    theta, mass = slq_spectrum(A, seed=seed)
    order = np.argsort(-np.abs(theta), kind="stable")
    e = np.cumsum(mass[order] * theta[order] ** 2)
    c = np.cumsum(mass[order])
    target = level * e[-1]
    t = int(np.searchsorted(e, target))
    # interpolate within the quadrature node that crosses the target
    prev_e = e[t - 1] if t else 0.0
    prev_c = c[t - 1] if t else 0.0
    share = (target - prev_e) / (e[t] - prev_e) if e[t] > prev_e else 1.0
    rank = prev_c + share * (c[t] - prev_c)
    return {"rank": float(rank), "n": n, "fraction": float(rank / n), "method": "slq"}
