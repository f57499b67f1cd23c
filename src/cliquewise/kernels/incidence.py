"""Edge-to-candidate incidence: which candidate cliques cover each edge.

The fit touches, for every edge, the candidates that contain both of its ends.
:func:`incidence` builds that relation as a CSR over edges: row ``e`` lists the
ids of the candidates holding edge ``e``, ascending. A candidate of size ``s``
contributes ``s (s - 1) / 2`` entries, one per pair of its members, and every such
pair must be an edge.

Two passes over the candidates (count, then fill) with the same pair lookups, so
memory is the output plus one counter per edge. Each lookup is a search in a sorted
CSR row that starts from the previous hit (members are sorted), so the cost is the
number of incidences times a small logarithmic factor.
``incidence_reference`` is the plain-Python twin used in tests.
"""

import numba
import numpy as np

__all__ = ["incidence", "incidence_reference"]


@numba.njit(nogil=True, cache=True, _nrt=False)  # no allocation: skip refcounting
def _row_search(nbr, lo, hi, x):
    """First position in ``nbr[lo:hi]`` holding a value ``>= x`` (binary search)."""
    while lo < hi:
        mid = (lo + hi) >> 1
        if nbr[mid] < x:
            lo = mid + 1
        else:
            hi = mid
    return lo


@numba.njit(nogil=True, cache=True)
def _incidence_kernel(indptr, nbr, eid, ptr, nodes, n_edges):
    K = ptr.shape[0] - 1
    inc_ptr = np.zeros(n_edges + 1, np.int64)
    # pass 1: count candidates per edge
    for k in range(K):
        lo = ptr[k]
        hi = ptr[k + 1]
        for i in range(lo, hi):
            a = nodes[i]
            rlo = indptr[a]
            rhi = indptr[a + 1]
            for j in range(i + 1, hi):
                b = nodes[j]
                rlo = _row_search(nbr, rlo, rhi, b)
                if rlo == rhi or nbr[rlo] != b:
                    return inc_ptr, np.empty(0, np.int64), k
                inc_ptr[eid[rlo] + 1] += 1
    for e in range(n_edges):
        inc_ptr[e + 1] += inc_ptr[e]
    # pass 2: fill; candidates visited in id order, so each row comes out ascending
    inc_cand = np.empty(inc_ptr[n_edges], np.int64)
    fill = inc_ptr[:n_edges].copy()
    for k in range(K):
        lo = ptr[k]
        hi = ptr[k + 1]
        for i in range(lo, hi):
            a = nodes[i]
            rlo = indptr[a]
            rhi = indptr[a + 1]
            for j in range(i + 1, hi):
                rlo = _row_search(nbr, rlo, rhi, nodes[j])
                e = eid[rlo]
                inc_cand[fill[e]] = k
                fill[e] += 1
    return inc_ptr, inc_cand, -1


def incidence(indptr, nbr, eid, ptr, nodes, n_edges):
    """Edge-to-candidate CSR.

    Parameters
    ----------
    indptr, nbr, eid : ndarray
        CSR from :func:`cliquewise.kernels.graph.csr_from_edges`.
    ptr : ndarray of int64, shape (K + 1,)
    nodes : ndarray of int64
        Candidates; candidate ``k`` is ``nodes[ptr[k]:ptr[k + 1]]``, ascending.
    n_edges : int
        Number of edges (length of the ``u``/``v`` arrays).

    Returns
    -------
    inc_ptr : ndarray of int64, shape (n_edges + 1,)
    inc_cand : ndarray of int64, shape (sum_k s_k (s_k - 1) / 2,)
        Candidates holding edge ``e`` are ``inc_cand[inc_ptr[e]:inc_ptr[e + 1]]``,
        ascending.

    Raises
    ------
    ValueError
        If a candidate has a pair of members that is not an edge.
    """
    inc_ptr, inc_cand, bad = _incidence_kernel(
        np.asarray(indptr, np.int64), nbr, np.asarray(eid, np.int64),
        np.asarray(ptr, np.int64), np.asarray(nodes, np.int64), np.int64(n_edges))
    if bad >= 0:
        raise ValueError(f"candidate {bad} is not a clique of the graph, or not sorted")
    return inc_ptr, inc_cand


def incidence_reference(u, v, ptr, nodes):
    """Slow twin of :func:`incidence`: a dict from node pair to edge id."""
    edge_of = {(int(a), int(b)): e for e, (a, b) in enumerate(zip(u, v))}
    rows = [[] for _ in range(len(edge_of))]
    for k in range(len(ptr) - 1):
        members = sorted(int(x) for x in nodes[ptr[k]:ptr[k + 1]])
        for i, a in enumerate(members):
            for b in members[i + 1:]:
                rows[edge_of[(a, b)]].append(k)
    inc_ptr = np.zeros(len(rows) + 1, np.int64)
    inc_ptr[1:] = np.cumsum([len(r) for r in rows])
    inc_cand = np.array([k for r in rows for k in r], np.int64)
    return inc_ptr, inc_cand
