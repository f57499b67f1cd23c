"""Per-part functions of the fit stage.

A *part* is a contiguous range of edges ``[lo, hi)`` of the incidence (edges in the
edge store's order). Its candidates form a narrow id range, because candidates are
numbered by the edge block that found them, so each part returns a short dense
accumulator plus the offset where it starts.
"""

from __future__ import annotations

from pathlib import Path

import numba
import numpy as np

from cliquewise.kernels.em import em_partial
from cliquewise.store import load_npy


def plan_parts(inc_ptr: np.ndarray, per_part: int) -> list[tuple[int, int]]:
    """Edge ranges holding about ``per_part`` incidences each."""
    n_edges = len(inc_ptr) - 1
    if n_edges <= 0:
        return []
    total = int(inc_ptr[-1])
    n_parts = max(1, -(-total // max(1, per_part)))
    cuts = np.searchsorted(inc_ptr, np.linspace(0, total, n_parts + 1)[1:-1], side="left")
    bounds = np.unique(np.concatenate([[0], cuts, [n_edges]]))
    return [(int(a), int(b)) for a, b in zip(bounds[:-1], bounds[1:])]


def _load(enum_dir: str, lo: int, hi: int):
    d = Path(enum_dir)
    inc_ptr = load_npy(d / "inc_ptr.npy", mmap=True)[lo:hi + 1]
    a, b = int(inc_ptr[0]), int(inc_ptr[-1])
    inc_cand = load_npy(d / "inc_cand.npy", mmap=True)[a:b]
    y = load_npy(d / "weight.npy", mmap=True)[lo:hi]
    return np.ascontiguousarray(inc_ptr), np.ascontiguousarray(inc_cand), np.ascontiguousarray(y)


def em_part(rng: tuple[int, int], enum_dir: str, mu: np.ndarray) -> dict:
    """The map of one EM step on one part: accumulator slice and ``sum y log lambda``."""
    lo, hi = rng
    inc_ptr, inc_cand, y = _load(enum_dir, lo, hi)
    if len(inc_cand) == 0:
        return {"cand_lo": 0, "acc": np.zeros(0), "loglik": 0.0}
    c_lo, c_hi = int(inc_cand.min()), int(inc_cand.max())
    acc = np.zeros(c_hi - c_lo + 1, np.float64)
    ll = em_partial(inc_ptr, inc_cand, y, mu, acc, c_lo)
    return {"cand_lo": c_lo, "acc": acc, "loglik": float(ll)}


@numba.njit(nogil=True, cache=True)
def _unsupported(inc_ptr, inc_cand, mu_kept, mu_full):
    """For each edge left with no positive rate, its strongest candidate before pruning."""
    out = []
    base = inc_ptr[0]
    for i in range(inc_ptr.shape[0] - 1):
        lam = 0.0
        best, best_mu = -1, -1.0
        for j in range(inc_ptr[i] - base, inc_ptr[i + 1] - base):
            k = inc_cand[j]
            lam += mu_kept[k]
            if mu_full[k] > best_mu:
                best, best_mu = k, mu_full[k]
        if lam == 0.0 and best >= 0 and best_mu > 0.0:
            out.append(best)
    res = np.empty(len(out), np.int64)
    for i in range(len(out)):
        res[i] = out[i]
    return res


def support_part(rng, enum_dir: str, mu_kept: np.ndarray, mu_full: np.ndarray) -> np.ndarray:
    lo, hi = rng
    inc_ptr, inc_cand, _ = _load(enum_dir, lo, hi)
    return _unsupported(inc_ptr, inc_cand, mu_kept, mu_full)


def restore_support(engine, ranges, enum_dir: str, mu_kept, mu_full) -> np.ndarray:
    """Candidate ids to un-prune so every edge keeps a positive rate."""
    res = engine.map(support_part, ranges, enum_dir, engine.scatter(mu_kept), engine.scatter(mu_full))
    return np.unique(np.concatenate(res)) if res else np.empty(0, np.int64)
