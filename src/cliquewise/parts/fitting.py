"""Per-part functions of the fit stage.

A *part* is a contiguous range of edges ``[lo, hi)`` of the incidence (edges in the
edge store's order). Once, before the EM, each part's edges are grouped into
classes with the same candidate set (``kernels/classes.py``), which is exact for
the EM and much shorter than the edge list. Each EM step then sweeps the class
incidence of every part. A part's candidates form a narrow id range, because
candidates are numbered by the edge block that found them, so each part returns a
short dense accumulator plus the offset where it starts.
"""

from __future__ import annotations

from pathlib import Path

import numba
import numpy as np

from cliquewise.kernels.classes import edge_classes
from cliquewise.kernels.em import em_partial
from cliquewise.store import load_npy, save_npy


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


def _load_edges(enum_dir: str, lo: int, hi: int):
    d = Path(enum_dir)
    inc_ptr = load_npy(d / "inc_ptr.npy", mmap=True)[lo:hi + 1]
    a, b = int(inc_ptr[0]), int(inc_ptr[-1])
    inc_cand = load_npy(d / "inc_cand.npy", mmap=True)[a:b]
    y = load_npy(d / "weight.npy", mmap=True)[lo:hi]
    return np.ascontiguousarray(inc_ptr), np.ascontiguousarray(inc_cand), np.ascontiguousarray(y)


def classes_part(index: int, rng: tuple[int, int], enum_dir: str, out_dir: str) -> dict:
    """Group one part's edges into classes (same candidate set) and write them.

    Writes ``{out_dir}/p{index:05d}.ptr/.cand/.y.npy``; returns the part's candidate
    id range and sizes.
    """
    lo, hi = rng
    inc_ptr, inc_cand, y = _load_edges(enum_dir, lo, hi)
    cls_ptr, cls_cand, cls_y, _ = edge_classes(inc_ptr, inc_cand, y)
    out = Path(out_dir)
    out.mkdir(parents=True, exist_ok=True)
    files = []
    if len(cls_cand) and cls_cand.max() < 2**31 - 1:
        cls_cand = cls_cand.astype(np.int32)  # half the memory traffic of the sweep
    for name, arr in (("ptr", cls_ptr), ("cand", cls_cand), ("y", cls_y)):
        f = out / f"p{index:05d}.{name}.npy"
        save_npy(f, arr)
        files.append(f.name)
    return {"index": index, "files": files, "edges": hi - lo, "incidences": int(len(inc_cand)),
            "classes": int(len(cls_y)), "class_incidences": int(len(cls_cand)),
            "cand_lo": int(cls_cand.min()) if len(cls_cand) else 0,
            "cand_hi": int(cls_cand.max()) if len(cls_cand) else -1}


_CLASS_CACHE: dict = {}
_CLASS_CACHE_LIMIT = 64


def _load_classes(cls_dir: str, index: int):
    """A part's class arrays, kept in this process between EM steps.

    Keyed by path and modification time, so a rewritten part is read again. The
    arrays are what the fit sweeps every step anyway (memory linear in incidences).
    """
    d = Path(cls_dir)
    files = [d / f"p{index:05d}.{n}.npy" for n in ("ptr", "cand", "y")]
    key = (str(d), index, tuple(f.stat().st_mtime_ns for f in files))
    hit = _CLASS_CACHE.get(key)
    if hit is None:
        if len(_CLASS_CACHE) >= _CLASS_CACHE_LIMIT:
            _CLASS_CACHE.clear()
        hit = _CLASS_CACHE[key] = tuple(load_npy(f) for f in files)
    return hit


def clear_cache() -> None:
    """Forget cached class arrays (the fit stage calls this when it ends)."""
    _CLASS_CACHE.clear()


def em_part(part: dict, cls_dir: str, mu: np.ndarray, want_loglik: bool = True) -> dict:
    """The map of one EM step on one part: accumulator slice and ``sum Y log lambda``."""
    c_lo, c_hi = part["cand_lo"], part["cand_hi"]
    if c_hi < c_lo:
        return {"cand_lo": 0, "acc": np.zeros(0), "loglik": 0.0}
    ptr, cand, y = _load_classes(cls_dir, part["index"])
    acc = np.zeros(c_hi - c_lo + 1, np.float64)
    ll = em_partial(ptr, cand, y, mu, acc, c_lo, want_loglik)
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


def support_part(part: dict, cls_dir: str, mu_kept: np.ndarray, mu_full: np.ndarray) -> np.ndarray:
    ptr, cand, _ = _load_classes(cls_dir, part["index"])
    return _unsupported(np.asarray(ptr), np.asarray(cand), mu_kept, mu_full)


def restore_support(engine, part_list, cls_dir: str, mu_kept, mu_full) -> np.ndarray:
    """Candidate ids to un-prune so every edge class keeps a positive rate."""
    res = engine.map(support_part, part_list, cls_dir, engine.scatter(mu_kept), engine.scatter(mu_full))
    return np.unique(np.concatenate(res)) if res else np.empty(0, np.int64)
