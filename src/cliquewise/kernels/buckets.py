"""Scatter rows into contiguous node-range buckets (a stable counting sort).

Used by ingest to send every ordered pair ``(u, v)`` to the bucket that owns the
node range containing ``u``; each bucket is then aggregated on its own. Linear
time, one pass to count and one to place; the relative order of rows inside a
bucket is the input order (so later sums are deterministic).
"""

import numba
import numpy as np


@numba.njit(nogil=True, cache=True)
def bucket_of(u, n_nodes, n_buckets):
    """Bucket index of each node id when ``[0, n_nodes)`` is cut into equal ranges."""
    out = np.empty(u.shape[0], np.int64)
    for i in range(u.shape[0]):
        out[i] = (u[i] * n_buckets) // n_nodes
    return out


@numba.njit(nogil=True, cache=True)
def scatter_by_bucket(bucket, n_buckets, u, v, w):
    """Reorder ``u, v, w`` so rows are grouped by bucket; return them and offsets."""
    counts = np.zeros(n_buckets + 1, np.int64)
    for i in range(bucket.shape[0]):
        counts[bucket[i] + 1] += 1
    for b in range(n_buckets):
        counts[b + 1] += counts[b]
    pos = counts[:-1].copy()
    uo = np.empty_like(u)
    vo = np.empty_like(v)
    wo = np.empty_like(w)
    for i in range(bucket.shape[0]):
        b = bucket[i]
        p = pos[b]
        uo[p] = u[i]
        vo[p] = v[i]
        wo[p] = w[i]
        pos[b] = p + 1
    return uo, vo, wo, counts


def bucket_bounds(n_nodes: int, n_buckets: int) -> np.ndarray:
    """Node-range boundaries matching :func:`bucket_of`: bucket b owns ``[lo_b, lo_{b+1})``."""
    b = np.arange(n_buckets + 1, dtype=np.int64)
    # smallest u with (u * B) // N >= b  is  ceil(b * N / B)
    return -((-b * n_nodes) // n_buckets)


def scatter_by_bucket_reference(u, v, w, n_nodes, n_buckets):
    """Slow twin: stable argsort by bucket."""
    bucket = (np.asarray(u, np.int64) * n_buckets) // n_nodes
    order = np.argsort(bucket, kind="stable")
    counts = np.concatenate([[0], np.cumsum(np.bincount(bucket, minlength=n_buckets))])
    return u[order], v[order], w[order], counts
