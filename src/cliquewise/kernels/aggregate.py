"""Edge-list clean-up kernels for the ingest stage: orient, merge duplicates, flag weights.

- :func:`order_pairs` drops self-loops and orients every pair as ``u < v``, so a
  pair and its reverse become the same key.
- :func:`aggregate_pairs` merges repeated ``(u, v)`` keys of one bucket (all
  ``u`` in a node range ``[lo, hi)``) by sum, max or min: a stable counting
  sort on ``u`` (dense over the bucket's range, in two cache-friendly passes),
  with unit weights when none are given (an event log: counts, no weight column),
  then a stable sort of ``v`` inside each row, then one merging scan. The output is sorted by
  ``(u, v)``. Sums add the duplicates of a key in their input order, so the
  result is deterministic; integer-valued weights are exact while the running
  sum stays below ``2**53`` (about 9e15).
- :func:`weight_flags` counts nan, infinite, negative and zero weights.

Reference twins: :func:`order_pairs_reference` (numpy masks) and
:func:`aggregate_pairs_reference` (a Python dict); the tests also check
against pandas ``groupby``.
"""

from __future__ import annotations

import numba
import numpy as np

from cliquewise import _numba_setup  # noqa: F401  (sets NUMBA_CACHE_DIR first)

__all__ = [
    "HOW_MAX",
    "HOW_MIN",
    "HOW_SUM",
    "aggregate_pairs",
    "aggregate_pairs_reference",
    "order_pairs",
    "order_pairs_reference",
    "weight_flags",
]

HOW_SUM = 0
HOW_MAX = 1
HOW_MIN = 2

#: rows up to this length are sorted by insertion sort, longer ones by merge sort
_SMALL_ROW = 16
#: target number of coarse buckets in the first counting-sort pass
_COARSE = 256


@numba.njit(nogil=True, cache=True)
def order_pairs(a, b, w):
    """Drop self-loops and orient each pair so that ``u < v``.

    Parameters
    ----------
    a, b : int64 arrays
        Endpoints, any order.
    w : float64 array
        Weights, same length.

    Returns
    -------
    u, v : int64 arrays
        ``min(a, b)``, ``max(a, b)`` for the rows with ``a != b``, in input order.
    w : float64 array
        Their weights.
    n_self : int
        Number of self-loops dropped.
    """
    n = a.shape[0]
    if b.shape[0] != n or w.shape[0] != n:
        raise ValueError("a, b and w differ in length")
    m = 0
    for i in range(n):
        if a[i] != b[i]:
            m += 1
    u = np.empty(m, dtype=np.int64)
    v = np.empty(m, dtype=np.int64)
    wo = np.empty(m, dtype=np.float64)
    j = 0
    for i in range(n):
        x = a[i]
        y = b[i]
        if x == y:
            continue
        if x < y:
            u[j] = x
            v[j] = y
        else:
            u[j] = y
            v[j] = x
        wo[j] = w[i]
        j += 1
    return u, v, wo, n - m


@numba.njit(nogil=True, cache=True)
def _insertion_sort(sv, sw, start, stop):
    """Stable insertion sort of ``sv[start:stop]``, carrying ``sw``."""
    for i in range(start + 1, stop):
        key = sv[i]
        val = sw[i]
        j = i - 1
        while j >= start and sv[j] > key:
            sv[j + 1] = sv[j]
            sw[j + 1] = sw[j]
            j -= 1
        sv[j + 1] = key
        sw[j + 1] = val


@numba.njit(nogil=True, cache=True)
def _merge_sort(sv, sw, n, tv, tw):
    """Stable bottom-up merge sort of ``sv[:n]`` carrying ``sw``; ``tv``/``tw`` scratch."""
    for s in range(0, n, _SMALL_ROW):
        _insertion_sort(sv, sw, s, min(s + _SMALL_ROW, n))
    width = _SMALL_ROW
    src_v, src_w, dst_v, dst_w = sv, sw, tv, tw
    swapped = False
    while width < n:
        for left in range(0, n, 2 * width):
            mid = min(left + width, n)
            right = min(left + 2 * width, n)
            i = left
            j = mid
            k = left
            while i < mid and j < right:
                if src_v[j] < src_v[i]:  # ties keep the left run first: stable
                    dst_v[k] = src_v[j]
                    dst_w[k] = src_w[j]
                    j += 1
                else:
                    dst_v[k] = src_v[i]
                    dst_w[k] = src_w[i]
                    i += 1
                k += 1
            while i < mid:
                dst_v[k] = src_v[i]
                dst_w[k] = src_w[i]
                i += 1
                k += 1
            while j < right:
                dst_v[k] = src_v[j]
                dst_w[k] = src_w[j]
                j += 1
                k += 1
        src_v, src_w, dst_v, dst_w = dst_v, dst_w, src_v, src_w
        swapped = not swapped
        width *= 2
    if swapped:  # the result sits in the scratch arrays
        sv[:n] = tv[:n]
        sw[:n] = tw[:n]


@numba.njit(nogil=True, cache=True)
def _combine(acc, x, how):
    """Fold weight ``x`` into ``acc`` by sum (0), max (1) or min (2)."""
    if how == 0:
        return acc + x
    if how == 1:
        return x if x > acc else acc
    return x if x < acc else acc


@numba.njit(nogil=True, cache=True)
def _hash_dedupe(sv, sw, start, stop, how, table, dv, dw):
    """Merge equal keys of ``sv[start:stop]`` with an open-addressing table.

    Distinct keys land in ``dv``/``dw`` in order of first appearance, and each
    key's weights are folded in input order. Returns the number of distinct keys.
    """
    length = stop - start
    bits = 1
    while (1 << bits) < 2 * length:
        bits += 1
    mask = (1 << bits) - 1
    table[: mask + 1] = -1
    down = np.uint64(64 - bits)
    golden = np.uint64(0x9E3779B97F4A7C15)  # Fibonacci hashing
    nd = 0
    for i in range(start, stop):
        key = sv[i]
        h = np.int64((np.uint64(key) * golden) >> down)
        while True:
            d = table[h]
            if d < 0:
                table[h] = nd
                dv[nd] = key
                dw[nd] = sw[i]
                nd += 1
                break
            if dv[d] == key:
                dw[d] = _combine(dw[d], sw[i], how)
                break
            h = (h + 1) & mask
    return nd


@numba.njit(nogil=True, cache=True)
def _coarse_pass(u, v, w, lo, span, shift):
    """Stable counting sort of the rows into ranges of ``2**shift`` nodes of ``u``.

    Returns the range pointers and the rows' offsets ``u - lo`` (in ``u``'s
    dtype), ``v`` (in its dtype) and weights (empty when ``w`` is: unit weights).
    """
    n = u.shape[0]
    n_coarse = ((span - 1) >> shift) + 1 if span > 0 else 0
    cptr = np.zeros(n_coarse + 1, dtype=np.int64)
    for i in range(n):
        r = u[i] - lo
        if r < 0 or r >= span:
            raise ValueError("u outside [n_nodes_lo, n_nodes_hi)")
        cptr[(r >> shift) + 1] += 1
    for c in range(n_coarse):
        cptr[c + 1] += cptr[c]
    fill = cptr[:-1].copy()
    unit = w.shape[0] == 0
    cu = np.empty(n, dtype=u.dtype)
    cv = np.empty(n, dtype=v.dtype)
    cw = np.empty(0 if unit else n, dtype=np.float64)
    for i in range(n):
        r = u[i] - lo
        c = r >> shift
        p = fill[c]
        cu[p] = r
        cv[p] = v[i]
        if not unit:
            cw[p] = w[i]
        fill[c] = p + 1
    return cptr, cu, cv, cw


@numba.njit(nogil=True, cache=True)
def aggregate_pairs(u, v, w, n_nodes_lo, n_nodes_hi, how=0):
    """Merge duplicate ``(u, v)`` rows of a bucket whose ``u`` lie in ``[lo, hi)``.

    A stable counting sort on ``u`` in two cache-friendly passes (first into
    coarse ranges of rows, then, range by range, into rows), then per row: a
    stable insertion sort and a merging scan for short rows, or for long rows a
    hash merge of equal ``v`` followed by a merge sort of the distinct ones.

    Parameters
    ----------
    u, v : integer arrays
        Keys (normally oriented by :func:`order_pairs`; any ``v`` is accepted).
        Scratch copies keep their dtypes, so int32 keys halve the memory.
    w : float64 array
        Weights (validate with :func:`weight_flags` first: nan is not treated
        specially), or an empty array: every row weighs 1 (an event log), and
        no weight column is read or copied.
    n_nodes_lo, n_nodes_hi : int
        The bucket's node range; every ``u`` must lie in it. Memory and time are
        linear in ``len(u) + (hi - lo)``.
    how : int
        0 (:data:`HOW_SUM`): sum, adding the duplicates of a key in input
        order; 1 (:data:`HOW_MAX`): max; 2 (:data:`HOW_MIN`): min.

    Returns
    -------
    u : int64 array
    v : array of ``v``'s dtype
        Distinct keys, sorted by ``(u, v)``.
    w : float64 array
        Merged weights.

    Raises
    ------
    ValueError
        On mismatched lengths, a ``u`` outside the range, or an unknown ``how``.
    """
    n = u.shape[0]
    if v.shape[0] != n or (w.shape[0] != n and w.shape[0] != 0):
        raise ValueError("u, v and w differ in length")
    if how < 0 or how > 2:
        raise ValueError("how must be 0 (sum), 1 (max) or 2 (min)")
    lo = n_nodes_lo
    span = n_nodes_hi - n_nodes_lo
    if span < 0:
        raise ValueError("n_nodes_hi < n_nodes_lo")
    shift = 0
    while (span >> shift) > _COARSE:
        shift += 1
    cptr, cu, cv, cw = _coarse_pass(u, v, w, lo, span, shift)
    unit = n > 0 and w.shape[0] == 0
    n_coarse = cptr.shape[0] - 1
    biggest = 0
    for c in range(n_coarse):
        biggest = max(biggest, cptr[c + 1] - cptr[c])
    width = 1 << shift
    rptr = np.zeros(width + 1, dtype=np.int64)
    rfill = np.empty(width, dtype=np.int64)
    sv = np.empty(biggest, dtype=np.int64)
    sw = np.empty(biggest, dtype=np.float64)
    dv = np.empty(biggest, dtype=np.int64)
    dw = np.empty(biggest, dtype=np.float64)
    tv = np.empty(biggest, dtype=np.int64)
    tw = np.empty(biggest, dtype=np.float64)
    table = np.empty(0, dtype=np.int64)
    # Output v (and weights) are compacted into cv (cw): they never overtake the
    # range being read, which has been copied to sv/sw first. Output u and, with
    # unit weights, output w get arrays of their own; np.empty does not touch
    # memory, so only the m entries written cost pages.
    ou = np.empty(n, dtype=np.int64)
    ow = np.empty(n, dtype=np.float64) if unit else cw
    m = 0
    for c in range(n_coarse):
        start = cptr[c]
        stop = cptr[c + 1]
        if start == stop:
            continue
        row0 = c << shift
        rptr[:] = 0
        for i in range(start, stop):
            rptr[cu[i] - row0 + 1] += 1
        for r in range(width):
            rptr[r + 1] += rptr[r]
        rfill[:] = rptr[:-1]
        for i in range(start, stop):
            r = cu[i] - row0
            p = rfill[r]
            sv[p] = cv[i]
            sw[p] = 1.0 if unit else cw[i]
            rfill[r] = p + 1
        for r in range(width):
            a = rptr[r]
            b = rptr[r + 1]
            node = row0 + r + lo
            if b - a > _SMALL_ROW:
                if table.shape[0] < 4 * (b - a):
                    table = np.empty(4 * (b - a), dtype=np.int64)
                nd = _hash_dedupe(sv, sw, a, b, how, table, dv, dw)
                _merge_sort(dv, dw, nd, tv, tw)
                for k in range(nd):
                    ou[m] = node
                    cv[m] = dv[k]
                    ow[m] = dw[k]
                    m += 1
                continue
            if b - a > 1:
                _insertion_sort(sv, sw, a, b)
            i = a
            while i < b:
                key = sv[i]
                acc = sw[i]
                i += 1
                while i < b and sv[i] == key:
                    acc = _combine(acc, sw[i], how)
                    i += 1
                ou[m] = node
                cv[m] = key
                ow[m] = acc
                m += 1
    return ou[:m], cv[:m], ow[:m]


@numba.njit(nogil=True, cache=True)
def weight_flags(w):
    """Count problem weights in one pass.

    Parameters
    ----------
    w : float64 array

    Returns
    -------
    n_nan, n_inf, n_negative, n_zero : int
        Disjoint counts: nan; +inf or -inf; finite and < 0; == 0 (also -0.0).
    """
    n_nan = 0
    n_inf = 0
    n_neg = 0
    n_zero = 0
    for i in range(w.shape[0]):
        x = w[i]
        if x != x:
            n_nan += 1
        elif x == np.inf or x == -np.inf:
            n_inf += 1
        elif x < 0.0:
            n_neg += 1
        elif x == 0.0:
            n_zero += 1
    return n_nan, n_inf, n_neg, n_zero


# --------------------------------------------------------------------------
# reference twins
# --------------------------------------------------------------------------


def order_pairs_reference(a, b, w):
    """Reference twin of :func:`order_pairs` with numpy masks."""
    a = np.asarray(a, dtype=np.int64)
    b = np.asarray(b, dtype=np.int64)
    w = np.asarray(w, dtype=np.float64)
    keep = a != b
    return (np.minimum(a, b)[keep], np.maximum(a, b)[keep], w[keep],
            int(np.count_nonzero(~keep)))


def aggregate_pairs_reference(u, v, w, how=0):
    """Reference twin of :func:`aggregate_pairs`: a Python dict in input order."""
    if len(w) == 0:  # unit weights
        w = np.ones(len(u))
    merged: dict[tuple[int, int], float] = {}
    for a, b, x in zip(np.asarray(u).tolist(), np.asarray(v).tolist(),
                       np.asarray(w, dtype=np.float64).tolist()):
        key = (a, b)
        if key not in merged:
            merged[key] = x
        elif how == HOW_SUM:
            merged[key] = merged[key] + x
        elif how == HOW_MAX:
            merged[key] = max(merged[key], x)
        else:
            merged[key] = min(merged[key], x)
    keys = sorted(merged)
    ou = np.array([k[0] for k in keys], dtype=np.int64)
    ov = np.array([k[1] for k in keys], dtype=np.int64)
    ow = np.array([merged[k] for k in keys], dtype=np.float64)
    return ou, ov, ow
