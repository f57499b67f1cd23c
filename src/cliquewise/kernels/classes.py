"""Edge classes: edges that lie in exactly the same candidates share one rate.

In the Poisson clique-factor model the rate of an edge is the sum of ``mu`` over
the candidates that contain it, so two edges with the same candidate set always
have the same ``lambda``. The EM step and the log-likelihood only ever use

    sum over such edges of y_e / lambda   and   sum over such edges of y_e log lambda

which equal ``Y_c / lambda_c`` and ``Y_c log lambda_c`` with ``Y_c`` the summed
weight of class ``c``. Replacing the edge incidence by the class incidence is
therefore exact, and it is much shorter: all the private edges of a candidate
collapse into one class. The fit runs on classes; ``y`` per edge is still needed
once, for the constant ``-sum lgamma(y + 1)``.

:func:`edge_classes` groups the edges of one incidence part by hashing each edge's
(sorted) candidate list, sorting by hash and comparing lists inside equal-hash
runs, so a hash collision can never merge two different sets. Classes are numbered
by their first edge, so the result is deterministic and keeps the locality of the
edge order. :func:`edge_classes_reference` is the obvious dictionary version.
"""

import numba
import numpy as np


@numba.njit(nogil=True, cache=True)
def _hash_rows(inc_ptr, inc_cand):
    n = inc_ptr.shape[0] - 1
    base = inc_ptr[0]
    out = np.empty(n, np.uint64)
    for i in range(n):
        h = np.uint64(1469598103934665603)
        for j in range(inc_ptr[i] - base, inc_ptr[i + 1] - base):
            h ^= np.uint64(inc_cand[j]) + np.uint64(0x9E3779B97F4A7C15)
            h *= np.uint64(1099511628211)
            h ^= h >> np.uint64(29)
        out[i] = h
    return out


@numba.njit(nogil=True, cache=True)
def _same_row(inc_ptr, inc_cand, base, a, b):
    la = inc_ptr[a + 1] - inc_ptr[a]
    if la != inc_ptr[b + 1] - inc_ptr[b]:
        return False
    sa = inc_ptr[a] - base
    sb = inc_ptr[b] - base
    for t in range(la):
        if inc_cand[sa + t] != inc_cand[sb + t]:
            return False
    return True


@numba.njit(nogil=True, cache=True)
def edge_classes(inc_ptr, inc_cand, y):
    """Group edges by candidate set.

    Parameters
    ----------
    inc_ptr, inc_cand : int64 arrays
        Edge -> candidate CSR of one part (``inc_ptr[0]`` need not be 0); each
        edge's candidates sorted ascending.
    y : float64 array
        Edge weights.

    Returns
    -------
    cls_ptr, cls_cand : int64 arrays
        Class -> candidate CSR (the shared candidate list).
    cls_y : float64 array
        Summed weight of each class (summed in edge order).
    edge_class : int64 array
        Class of each edge.
    """
    n = inc_ptr.shape[0] - 1
    base = inc_ptr[0]
    h = _hash_rows(inc_ptr, inc_cand)
    order = np.argsort(h, kind="mergesort")
    edge_class = np.full(n, -1, np.int64)
    # representatives: for each edge, the first edge (in edge order) with the same set
    rep = np.empty(n, np.int64)
    i = 0
    while i < n:
        j = i
        while j < n and h[order[j]] == h[order[i]]:
            j += 1
        # within an equal-hash run (edge order ascending, mergesort is stable)
        for a in range(i, j):
            ea = order[a]
            rep[ea] = ea
            for b in range(i, a):
                eb = order[b]
                if rep[eb] == eb and _same_row(inc_ptr, inc_cand, base, ea, eb):
                    rep[ea] = eb
                    break
        i = j
    n_cls = 0
    for e in range(n):
        if rep[e] == e:
            edge_class[e] = n_cls
            n_cls += 1
        else:
            edge_class[e] = edge_class[rep[e]]
    cls_ptr = np.zeros(n_cls + 1, np.int64)
    cls_y = np.zeros(n_cls, np.float64)
    for e in range(n):
        c = edge_class[e]
        if rep[e] == e:
            cls_ptr[c + 1] = inc_ptr[e + 1] - inc_ptr[e]
        cls_y[c] += y[e]
    for c in range(n_cls):
        cls_ptr[c + 1] += cls_ptr[c]
    cls_cand = np.empty(cls_ptr[n_cls], np.int64)
    for e in range(n):
        if rep[e] == e:
            c = edge_class[e]
            s = inc_ptr[e] - base
            for t in range(cls_ptr[c + 1] - cls_ptr[c]):
                cls_cand[cls_ptr[c] + t] = inc_cand[s + t]
    return cls_ptr, cls_cand, cls_y, edge_class


def edge_classes_reference(inc_ptr, inc_cand, y):
    """Slow twin: a dictionary from candidate tuple to class, classes by first edge."""
    base = int(inc_ptr[0])
    index: dict[tuple, int] = {}
    lists, ys, edge_class = [], [], []
    for e in range(len(inc_ptr) - 1):
        key = tuple(int(k) for k in inc_cand[inc_ptr[e] - base: inc_ptr[e + 1] - base])
        if key not in index:
            index[key] = len(lists)
            lists.append(key)
            ys.append(0.0)
        c = index[key]
        ys[c] += float(y[e])
        edge_class.append(c)
    ptr = np.concatenate([[0], np.cumsum([len(k) for k in lists])]).astype(np.int64)
    cand = np.array([k for key in lists for k in key], dtype=np.int64)
    return ptr, cand, np.array(ys, dtype=np.float64), np.array(edge_class, dtype=np.int64)
