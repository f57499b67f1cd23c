"""Group rows into contiguous node-range buckets (a stable counting sort).

Used by ingest to send every ordered pair ``(u, v)`` to the bucket that owns the
node range containing ``u``; each bucket is then aggregated on its own. Linear
time, one pass to count and one to place; the relative order of rows inside a
bucket is the input order (so later sums are deterministic).
"""

import numba
import numpy as np


@numba.njit(nogil=True, cache=True)
def mark_seen(seen, ids):
    """``seen[ids] = True``; an id outside ``seen`` is an error, never a stray write."""
    n = seen.shape[0]
    for i in range(ids.shape[0]):
        x = ids[i]
        if x < 0 or x >= n:
            raise ValueError("label outside the range promised by the file statistics")
        seen[x] = True


def bucket_bounds(n_nodes: int, n_buckets: int) -> np.ndarray:
    """Node-range boundaries of the rule ``bucket = (u * B) // N`` used by
    :func:`order_and_bucket`: bucket b owns ``[lo_b, lo_{b+1})``."""
    b = np.arange(n_buckets + 1, dtype=np.int64)
    # smallest u with (u * B) // N >= b  is  ceil(b * N / B)
    return -((-b * n_nodes) // n_buckets)


@numba.njit(nogil=True, cache=True)
def _bucket_of(x, n_buckets, space, scale, bounds):
    """``(x * n_buckets) // space`` without an integer division: a float estimate
    corrected against the exact bucket boundaries (at most one step off)."""
    k = np.int64(x * scale)
    if k >= n_buckets:
        k = n_buckets - 1
    while k > 0 and x < bounds[k]:
        k -= 1
    while k + 1 < n_buckets and x >= bounds[k + 1]:
        k += 1
    return k


@numba.njit(nogil=True, cache=True)
def order_and_bucket(a, b, w, weighted, space, n_buckets, seen, id_like):
    """Ingest's fused row kernel: drop, orient and group one task's rows by bucket.

    Drops self-loops (``a == b``) and, when ``weighted``, zero weights; orients each
    pair as ``u = min, v = max``; places rows grouped by the bucket of ``u`` (equal
    ranges of ``[0, space)``, the rule of :func:`bucket_bounds`), keeping input
    order inside a bucket. When ``seen`` is not empty, marks ``seen[a]`` and
    ``seen[b]`` for every row given (the dense-label route records which labels
    occur). Output ids have the dtype of ``id_like`` (an empty array: int32 when
    ``space < 2**31``, which halves the scratch files).

    The first pass keeps each row's bucket in a byte (or 0xFFFF... for a dropped
    row) so the second pass neither divides nor re-tests.

    Returns ``u, v, w_out, offsets, n_self, n_zero`` (``w_out`` empty when not weighted).
    """
    n = a.shape[0]
    if b.shape[0] != n or (weighted and w.shape[0] != n):
        raise ValueError("a, b and w differ in length")
    if n_buckets < 1 or n_buckets > 65535:
        raise ValueError("n_buckets must lie in [1, 65535]")
    mark = seen.shape[0] > 0
    counts = np.zeros(n_buckets + 1, np.int64)
    bounds = np.empty(n_buckets + 1, np.int64)
    for k in range(n_buckets + 1):  # smallest u of bucket k: ceil(k * space / n_buckets)
        bounds[k] = -((-k * space) // n_buckets)
    scale = n_buckets / max(space, 1)
    tag = np.empty(n, np.uint16)
    drop = np.uint16(65535)
    n_self = 0
    n_zero = 0
    for i in range(n):
        x = a[i]
        y = b[i]
        if x < 0 or y < 0 or x >= space or y >= space:
            raise ValueError("node id outside [0, space)")
        if mark:
            seen[x] = True
            seen[y] = True
        if x == y:
            n_self += 1
            tag[i] = drop
            continue
        if weighted and w[i] == 0.0:
            n_zero += 1
            tag[i] = drop
            continue
        lo = x if x < y else y
        k = _bucket_of(lo, n_buckets, space, scale, bounds) if n_buckets > 1 else 0
        tag[i] = k
        counts[k + 1] += 1
    for k in range(n_buckets):
        counts[k + 1] += counts[k]
    m = counts[n_buckets]
    u = np.empty(m, id_like.dtype)
    v = np.empty(m, id_like.dtype)
    wo = np.empty(m if weighted else 0, np.float64)
    pos = counts[:-1].copy()
    for i in range(n):
        k = tag[i]
        if k == drop:
            continue
        x = a[i]
        y = b[i]
        if x > y:
            x, y = y, x
        p = pos[k]
        u[p] = x
        v[p] = y
        if weighted:
            wo[p] = w[i]
        pos[k] = p + 1
    return u, v, wo, counts, n_self, n_zero


def order_and_bucket_reference(a, b, w, weighted, space, n_buckets):
    """Slow twin of :func:`order_and_bucket` (without the ``seen`` marks)."""
    a = np.asarray(a, np.int64)
    b = np.asarray(b, np.int64)
    self_loop = a == b
    zero = (np.asarray(w) == 0) & ~self_loop if weighted else np.zeros(len(a), bool)
    keep = ~self_loop & ~zero
    u, v = np.minimum(a, b)[keep], np.maximum(a, b)[keep]
    ww = np.asarray(w)[keep] if weighted else np.empty(0)
    bucket = (u * n_buckets) // space
    order = np.argsort(bucket, kind="stable")
    offsets = np.concatenate([[0], np.cumsum(np.bincount(bucket, minlength=n_buckets))])
    return u[order], v[order], (ww[order] if weighted else ww), offsets, int(self_loop.sum()), int(zero.sum())
