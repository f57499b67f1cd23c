"""Union-find (disjoint sets) over streamed edge chunks, for connected components.

One int64 array per node: ``parent``. Unions link the root with the larger index
under the root with the smaller index ("union by index"), and finds use path
halving. Two facts follow and are used below:

- ``parent[i] <= i`` for every node at all times, and each root is the smallest
  node id of its set;
- so :func:`uf_labels` numbers the components 0, 1, ... in the order of their
  smallest node id in a single forward pass, without further finds.

Path halving with index linking costs ``O(log n)`` amortised per operation in
the worst case (Tarjan and van Leeuwen, J. ACM 1984) and near-constant in
practice; it needs no rank or size array.

Typical use: ``parent = uf_init(n)``, then ``uf_union_edges(parent, u, v)`` for
each chunk of edges (in any order), then ``uf_labels(parent)``. Separate
workers can each build a forest for their own chunks and merge them with
:func:`uf_forest` + :func:`uf_union_edges`.

Reference twin: :func:`connected_components_reference` (scipy.sparse.csgraph).
"""

from __future__ import annotations

import numba
import numpy as np

from cliquewise import _numba_setup  # noqa: F401  (sets NUMBA_CACHE_DIR first)

__all__ = [
    "connected_components_reference",
    "uf_forest",
    "uf_init",
    "uf_labels",
    "uf_union_edges",
]


@numba.njit(nogil=True, cache=True)
def uf_init(n):
    """A forest of ``n`` singletons.

    Parameters
    ----------
    n : int
        Number of nodes.

    Returns
    -------
    parent : int64 array, length ``n``
        ``parent[i] = i``.
    """
    return np.arange(n, dtype=np.int64)


@numba.njit(nogil=True, cache=True)
def _find(parent, x):
    """Root of ``x``, halving the path on the way (mutates ``parent``)."""
    while parent[x] != x:
        gp = parent[parent[x]]
        parent[x] = gp
        x = gp
    return x


@numba.njit(nogil=True, cache=True)
def uf_union_edges(parent, u, v):
    """Merge the sets of the endpoints of one chunk of edges, in place.

    Parameters
    ----------
    parent : int64 array, length ``n``
        Forest from :func:`uf_init` (or an earlier call); updated in place.
    u, v : integer arrays of equal length
        Edge endpoints, each in ``[0, n)``. Self-loops and repeats are fine.

    Returns
    -------
    int
        Number of merges performed (the component count drops by this much).

    Raises
    ------
    ValueError
        If lengths differ or an endpoint is outside ``[0, n)``.
    """
    m = u.shape[0]
    if v.shape[0] != m:
        raise ValueError("u and v differ in length")
    n = parent.shape[0]
    merges = 0
    for i in range(m):
        a = u[i]
        b = v[i]
        if a < 0 or a >= n or b < 0 or b >= n:
            raise ValueError("edge endpoint outside [0, n)")
        ra = _find(parent, a)
        rb = _find(parent, b)
        if ra != rb:
            if ra < rb:
                parent[rb] = ra
            else:
                parent[ra] = rb
            merges += 1
    return merges


@numba.njit(nogil=True, cache=True)
def uf_labels(parent):
    """Component label per node, numbered in order of each component's smallest node.

    Does not modify ``parent``. Relies on ``parent[i] <= i`` (see module notes).

    Parameters
    ----------
    parent : int64 array, length ``n``

    Returns
    -------
    comp : int64 array, length ``n``
        ``comp[i]`` in ``0 .. n_components - 1``; component ``c`` has a smaller
        smallest node than component ``c + 1``.
    """
    n = parent.shape[0]
    comp = np.empty(n, dtype=np.int64)
    nxt = 0
    for i in range(n):
        p = parent[i]
        if p == i:
            comp[i] = nxt
            nxt += 1
        elif 0 <= p < i:
            comp[i] = comp[p]  # p's root is i's root, and p was labelled already
        else:
            raise ValueError("parent is not a forest built by uf_union_edges")
    return comp


@numba.njit(nogil=True, cache=True)
def uf_forest(parent):
    """The forest as an edge list ``(i, parent[i])`` over non-root nodes.

    At most ``n - 1`` edges with the same components as everything unioned so far;
    feed them to :func:`uf_union_edges` on another forest to merge the two.

    Parameters
    ----------
    parent : int64 array, length ``n``

    Returns
    -------
    child, par : int64 arrays of equal length
    """
    n = parent.shape[0]
    m = 0
    for i in range(n):
        if parent[i] != i:
            m += 1
    child = np.empty(m, dtype=np.int64)
    par = np.empty(m, dtype=np.int64)
    j = 0
    for i in range(n):
        if parent[i] != i:
            child[j] = i
            par[j] = parent[i]
            j += 1
    return child, par


def connected_components_reference(n, u, v):
    """Reference twin: scipy's connected components, relabelled like :func:`uf_labels`.

    Parameters
    ----------
    n : int
        Number of nodes.
    u, v : integer arrays
        Edges.

    Returns
    -------
    comp : int64 array, length ``n``
    """
    import scipy.sparse as sp
    from scipy.sparse.csgraph import connected_components

    u = np.asarray(u, dtype=np.int64)
    v = np.asarray(v, dtype=np.int64)
    A = sp.coo_matrix((np.ones(u.shape[0]), (u, v)), shape=(n, n)).tocsr()
    _, lab = connected_components(A, directed=False)
    # relabel: order components by smallest member
    first = np.full(lab.max() + 1 if n else 0, n, dtype=np.int64)
    np.minimum.at(first, lab, np.arange(n))
    rank = np.empty_like(first)
    rank[np.argsort(first, kind="stable")] = np.arange(first.shape[0])
    return rank[lab].astype(np.int64)
