"""Edge-to-candidate incidence: which candidate cliques cover each edge.

The fit touches, for every edge, the candidates that contain both of its ends.
:func:`incidence` builds that relation as a CSR over edges: row ``e`` lists the
ids of the candidates holding edge ``e``, ascending. A candidate of size ``s``
contributes ``s (s - 1) / 2`` entries, one per pair of its members, and every such
pair must be an edge.

One pass over the candidates (:func:`pair_edges`) looks every pair up once and
writes its edge id into a pair buffer, in candidate order; a counting sort by edge
(:func:`count_rows`, :func:`starts_from_counts`, :func:`scatter_rows`) then
scatters the candidate ids into their rows (``*_in``: the rows of one range of
edges, for an incidence built a range at a time, ranges side by side; the ranges
are cut from :func:`count_buckets`). The enumerate stage runs the lookups
inside its work units, right after the search that found the candidates (their
rows are still in cache), and the counting sort once over all units. The scatter
visits the pairs in candidate order, so each row comes out ascending without a
sort. Lookups walk the sorted CSR row of a member from its previous hit (members
are sorted too), by steps or by binary search when the row is long, and the rows
of the candidates a few places ahead are prefetched. Memory is the output, one
counter per edge, and the pair buffer (4 bytes per incidence; 8 when there are
``2**31`` edges or more).
``incidence_reference`` is the plain-Python twin used in tests.
"""

import numba
import numpy as np

from cliquewise.kernels.graph import bit_length, prefetch_member_rows

__all__ = ["candidate_pairs", "count_buckets", "count_rows", "count_rows_in", "incidence", "incidence_reference", "pair_edges",
           "scatter_rows", "scatter_rows_in", "starts_from_counts"]


@numba.njit(nogil=True, cache=True)
def pair_edges(indptr, nbr, eid, ptr, nodes, pair_e):
    """Edge id of every member pair of every candidate, in candidate order.

    Candidate ``k``'s pairs ``(i, j)``, ``i < j`` in member order, fill
    ``pair_e[t:t + s(s-1)/2]`` row by row. Returns the first candidate with a pair
    that is not an edge (then ``pair_e`` is incomplete), else -1.
    """
    K = ptr.shape[0] - 1
    t = np.int64(0)
    for k in range(K):
        prefetch_member_rows(indptr, nbr, eid, ptr, nodes, k)
        lo = ptr[k]
        hi = ptr[k + 1]
        for i in range(lo, hi - 1):
            a = nodes[i]
            q = np.int64(indptr[a])
            qe = np.int64(indptr[a + 1])
            search = (hi - 1 - i) * bit_length(qe - q) < qe - q
            for j in range(i + 1, hi):
                b = nodes[j]
                if search:
                    r = qe
                    while q < r:
                        mid = (q + r) >> 1
                        if nbr[mid] < b:
                            q = mid + 1
                        else:
                            r = mid
                else:
                    while q < qe and nbr[q] < b:
                        q += 1
                if q == qe or nbr[q] != b:
                    return k
                pair_e[t] = eid[q]
                t += 1
                q += 1
    return -1


@numba.njit(nogil=True, cache=True)
def count_rows(pair_e, cnt):
    """Add each edge's number of pairs into ``cnt[e + 2]`` (see :func:`rows_from_pairs`)."""
    for t in range(pair_e.shape[0]):
        cnt[pair_e[t] + 2] += 1


@numba.njit(nogil=True, cache=True)
def starts_from_counts(cnt, n_edges):
    """Prefix sum: afterwards ``cnt[e + 1]`` is the start of row ``e``."""
    for e in range(n_edges):
        cnt[e + 2] += cnt[e + 1]


@numba.njit(nogil=True, cache=True)
def scatter_rows(ptr, pair_e, k0, cnt, inc_cand):
    """Write candidate ids ``k0 + k`` into the rows of their pairs' edges.

    ``ptr`` and ``pair_e`` are one block of candidates (numbered from ``k0``) as
    :func:`pair_edges` gives them; blocks must be scattered in candidate order
    so that every row comes out ascending. ``cnt[e + 1]`` advances from the start
    of row ``e`` to its end.
    """
    t = 0
    for k in range(ptr.shape[0] - 1):
        s = ptr[k + 1] - ptr[k]
        for _ in range(s * (s - 1) // 2):
            e1 = pair_e[t] + 1
            inc_cand[cnt[e1]] = k0 + k
            cnt[e1] += 1
            t += 1


@numba.njit(nogil=True, cache=True)
def count_buckets(pair_e, shift, per_bucket):
    """Pairs per bucket of edges: ``per_bucket[e >> shift] += 1`` (to cut the rows into ranges)."""
    for t in range(pair_e.shape[0]):
        per_bucket[pair_e[t] >> shift] += 1


@numba.njit(nogil=True, cache=True)
def count_rows_in(pair_e, lo, hi, cnt):
    """:func:`count_rows` for the edges ``[lo, hi)`` only: ``cnt[e - lo + 2] += 1``."""
    for t in range(pair_e.shape[0]):
        e = pair_e[t]
        if lo <= e < hi:
            cnt[e - lo + 2] += 1


@numba.njit(nogil=True, cache=True)
def scatter_rows_in(ptr, pair_e, k0, lo, hi, cnt, inc_cand):
    """:func:`scatter_rows` for the edges ``[lo, hi)`` only (rows numbered from ``lo``)."""
    t = 0
    for k in range(ptr.shape[0] - 1):
        s = ptr[k + 1] - ptr[k]
        for _ in range(s * (s - 1) // 2):
            e = pair_e[t]
            if lo <= e < hi:
                e1 = e - lo + 1
                inc_cand[cnt[e1]] = k0 + k
                cnt[e1] += 1
            t += 1


def incidence(indptr, nbr, eid, ptr, nodes, n_edges, *, _wide=False):
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

    Notes
    -----
    ``_wide`` (for tests) forces the int64 pair buffer used from ``2**31`` edges.
    """
    ptr = np.asarray(ptr, np.int64)
    pair_e = candidate_pairs(indptr, nbr, eid, ptr, nodes, n_edges, _wide=_wide)
    cnt = np.zeros(int(n_edges) + 2, np.int64)
    count_rows(pair_e, cnt)
    starts_from_counts(cnt, np.int64(n_edges))
    inc_cand = np.empty(len(pair_e), np.int64)
    scatter_rows(ptr, pair_e, np.int64(0), cnt, inc_cand)
    return cnt[: int(n_edges) + 1], inc_cand


def candidate_pairs(indptr, nbr, eid, ptr, nodes, n_edges, *, _wide=False):
    """Edge ids of all member pairs, candidate by candidate (:func:`pair_edges`).

    int32 unless there are ``2**31`` edges or more (or ``_wide``, for tests).

    Raises
    ------
    ValueError
        If a candidate has a pair of members that is not an edge.
    """
    ptr = np.asarray(ptr, np.int64)
    sizes = np.diff(ptr)
    n_pairs = int(np.sum(sizes * (sizes - 1) // 2))
    wide = _wide or n_edges >= 2**31
    pair_e = np.empty(n_pairs, np.int64 if wide else np.int32)
    bad = pair_edges(np.asarray(indptr, np.int64), nbr, np.asarray(eid, np.int64), ptr,
                     np.asarray(nodes, np.int64), pair_e)
    if bad >= 0:
        raise ValueError(f"candidate {bad} is not a clique of the graph, or not sorted")
    return pair_e


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
