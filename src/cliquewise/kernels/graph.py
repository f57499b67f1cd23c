"""Symmetric CSR adjacency with a weight level and an edge id on every entry.

Edges arrive as parallel arrays ``u < v`` (int64, unique pairs, node ids
``0..n-1``) with a level index ``lev`` (int32, ``>= 0``). The threshold graph of
level ``l`` holds the edges with ``lev >= l``.

:func:`csr_from_edges` turns them into a symmetric CSR: row ``x`` lists the
neighbours of ``x`` in ascending order, and for each entry the level of the edge
(``nlev``) and its position in the input arrays (``eid``). Building it is linear:
one counting-sort pass scatters both directions of every edge into rows, a second
pass re-scatters the rows column by column. Because the graph is symmetric, that
second pass (a CSR transpose) yields the same rows with their neighbours already
sorted, so no per-row sort is needed.

:func:`find_edge` is the binary search used by the other kernels to look up one
pair, and :func:`intersect_sorted` the intersection of two sorted id lists (a
linear merge, or a galloping search when one list is much shorter) that the
clique kernels run on neighbour rows. :func:`degeneracy_kernel` is the
linear-time smallest-last order behind ``cliques.degeneracy_order`` and the
clique searches. :func:`prefetch_member_rows` asks the CPU early for the CSR rows
of the members of a vertex set a few sets ahead, for the kernels that walk a long
list of small sets (``level_min``, ``incidence``), whose rows lie at random places
in memory. :func:`levels_from_table` gives each edge its level from a table over
the span of integer weights. ``*_reference`` are the scipy / numpy twins used in
tests.
"""

import numba
import numpy as np
from llvmlite import ir
from numba.core import cgutils, types
from numba.extending import intrinsic

__all__ = [
    "csr_from_edges",
    "eid_dtype",
    "csr_from_edges_reference",
    "csr_rows_scatter",
    "csr_rows_sort",
    "find_edge",
    "position_in",
    "find_edge_reference",
    "intersect_sorted",
    "intersect_merge",
    "intersect_reference",
    "bit_length",
    "degeneracy_kernel",
    "prefetch",
    "prefetch_member_rows",
    "PREFETCH_AHEAD",
]

# Kernels that allocate nothing are compiled without numba's reference counting:
# otherwise each call pays atomic reference-count updates on its array arguments,
# which costs more than a short search or merge.
_leaf = numba.njit(nogil=True, cache=True, _nrt=False)


@numba.njit(nogil=True, cache=True)
def _csr_fill(n, u, v, lev, indptr, nbr, nlev, eid):
    """Fill preallocated CSR arrays; rows sorted by a counting-sort transpose."""
    m = u.shape[0]
    # degrees -> row starts
    for x in range(n + 1):
        indptr[x] = 0
    for i in range(m):
        indptr[u[i] + 1] += 1
        indptr[v[i] + 1] += 1
    for x in range(n):
        indptr[x + 1] += indptr[x]
    # pass 1: scatter both directions, rows unsorted (row of the input order)
    tmp_nbr = np.empty(2 * m, np.int64)
    tmp_k = np.empty(2 * m, np.int64)
    fill = indptr[:n].copy()
    for i in range(m):
        a = u[i]
        b = v[i]
        p = fill[a]
        tmp_nbr[p] = b
        tmp_k[p] = i
        fill[a] = p + 1
        p = fill[b]
        tmp_nbr[p] = a
        tmp_k[p] = i
        fill[b] = p + 1
    # pass 2: transpose. Visiting rows x = 0..n-1 in order and appending x to the
    # row of each neighbour writes every output row in ascending order; the
    # transpose of a symmetric matrix is itself, so the rows are the same sets.
    for x in range(n):
        fill[x] = indptr[x]
    for x in range(n):
        for p in range(indptr[x], indptr[x + 1]):
            y = tmp_nbr[p]
            i = tmp_k[p]
            q = fill[y]
            nbr[q] = x
            eid[q] = i
            nlev[q] = lev[i]
            fill[y] = q + 1


def csr_from_edges(n, u, v, lev, nbr_dtype=None):
    """Symmetric CSR of an undirected edge list, rows sorted ascending.

    Parameters
    ----------
    n : int
        Number of nodes; ids are ``0..n-1``.
    u, v : array_like of int64, shape (E,)
        Edge ends with ``u < v``, unique pairs.
    lev : array_like of int32, shape (E,)
        Level index of each edge (``>= 0``).
    nbr_dtype : numpy dtype, optional
        dtype of the neighbour array. Default int32 when ``n < 2**31``, else int64.
        The edge ids (``eid``) are int32 when ``E < 2**31`` (:func:`eid_dtype`), else int64.

    Returns
    -------
    indptr : ndarray of int64, shape (n + 1,)
    nbr : ndarray of int32 or int64, shape (2E,)
        Neighbours; row ``x`` is ``nbr[indptr[x]:indptr[x + 1]]``, ascending.
    nlev : ndarray of int32, shape (2E,)
        Level of the edge behind each entry.
    eid : ndarray of int32 or int64, shape (2E,)
        Position of that edge in ``u``/``v``/``lev``.

    Examples
    --------
    >>> import numpy as np
    >>> ip, nb, nl, ei = csr_from_edges(3, np.array([0, 1]), np.array([2, 2]),
    ...                                 np.array([0, 1], np.int32))
    >>> ip.tolist(), nb.tolist(), nl.tolist(), ei.tolist()
    ([0, 1, 2, 4], [2, 2, 0, 1], [0, 1, 0, 1], [0, 1, 0, 1])
    """
    n = int(n)
    u = np.ascontiguousarray(u, dtype=np.int64)
    v = np.ascontiguousarray(v, dtype=np.int64)
    lev = np.ascontiguousarray(lev, dtype=np.int32)
    if not (u.shape == v.shape == lev.shape) or u.ndim != 1:
        raise ValueError("u, v and lev must be 1-d arrays of the same length")
    if u.size:
        if u.min() < 0 or v.max() >= n:
            raise ValueError("node ids must lie in [0, n)")
        if np.any(u >= v):
            raise ValueError("edges must satisfy u < v")
        if lev.min() < 0:
            raise ValueError("levels must be >= 0")
    if nbr_dtype is None:
        nbr_dtype = np.int32 if n < 2**31 else np.int64
    m2 = 2 * u.shape[0]
    indptr = np.empty(n + 1, np.int64)
    nbr = np.empty(m2, nbr_dtype)
    nlev = np.empty(m2, np.int32)
    eid = np.empty(m2, eid_dtype(u.shape[0]))
    _csr_fill(n, u, v, lev, indptr, nbr, nlev, eid)
    return indptr, nbr, nlev, eid


def eid_dtype(n_edges):
    """The dtype of edge ids: int32 below ``2**31`` edges (half the memory the
    clique sweep reads), else int64."""
    return np.dtype(np.int32 if n_edges < 2**31 else np.int64)


@numba.njit(nogil=True, cache=True)
def levels_from_table(w, low, table):
    """``table[w - low]`` for integer-valued weights ``w`` (int32): each edge's level
    from a table over the weights' span (see ``parts.candidates.level_lookup``)."""
    out = np.empty(w.shape[0], np.int32)
    for i in range(w.shape[0]):
        out[i] = table[np.int64(w[i] - low)]
    return out


@numba.njit(nogil=True, cache=True)
def csr_rows_scatter(u, v, lev, e0, a, b, cursor, nbr, nlev, eid):
    """Scatter the entries of rows ``[a, b)`` from one block of edges.

    For the edges ``u[i] < v[i]`` (positions ``e0 + i`` in the whole edge list) the
    entry ``u -> v`` goes to row ``u`` and ``v -> u`` to row ``v`` when that row lies
    in ``[a, b)``; ``cursor[x - a]`` is the next free slot of row ``x`` in the
    output arrays (advanced here). Rows come out unsorted: see :func:`csr_rows_sort`.
    This and the sort build a CSR a range of rows at a time, with memory for those
    rows only (:func:`csr_from_edges` builds it whole).
    """
    for i in range(u.shape[0]):
        x = u[i]
        y = v[i]
        if a <= x < b:
            p = cursor[x - a]
            nbr[p] = y
            nlev[p] = lev[i]
            eid[p] = e0 + i
            cursor[x - a] = p + 1
        if a <= y < b:
            p = cursor[y - a]
            nbr[p] = x
            nlev[p] = lev[i]
            eid[p] = e0 + i
            cursor[y - a] = p + 1


@numba.njit(nogil=True, cache=True)
def csr_rows_sort(indptr, nbr, nlev, eid):
    """Sort each row ``indptr[x]:indptr[x + 1]`` by neighbour, carrying ``nlev`` and
    ``eid`` along (neighbours are distinct within a row). Short rows by insertion,
    long rows by an argsort."""
    for x in range(indptr.shape[0] - 1):
        lo = indptr[x]
        hi = indptr[x + 1]
        if hi - lo <= 32:
            for i in range(lo + 1, hi):
                key = nbr[i]
                kl = nlev[i]
                ke = eid[i]
                j = i - 1
                while j >= lo and nbr[j] > key:
                    nbr[j + 1] = nbr[j]
                    nlev[j + 1] = nlev[j]
                    eid[j + 1] = eid[j]
                    j -= 1
                nbr[j + 1] = key
                nlev[j + 1] = kl
                eid[j + 1] = ke
        else:
            order = np.argsort(nbr[lo:hi])
            nb = nbr[lo:hi][order]
            nl = nlev[lo:hi][order]
            ne = eid[lo:hi][order]
            nbr[lo:hi] = nb
            nlev[lo:hi] = nl
            eid[lo:hi] = ne


# --------------------------------------------------------------------------
# degeneracy order
# --------------------------------------------------------------------------
@numba.njit(nogil=True, cache=True)
def degeneracy_kernel(indptr, nbr):
    """Smallest-last order and core numbers (see ``cliques.degeneracy_order``).

    Matula and Beck's bucket queue in the array layout of Batagelj and Zaversnik:
    linear in the size of the CSR.
    """
    n = indptr.shape[0] - 1
    deg = np.empty(n, np.int64)
    md = 0
    for x in range(n):
        deg[x] = indptr[x + 1] - indptr[x]
        md = max(md, deg[x])
    bins = np.zeros(md + 1, np.int64)
    for x in range(n):
        bins[deg[x]] += 1
    start = 0
    for d in range(md + 1):
        c = bins[d]
        bins[d] = start
        start += c
    pos = np.empty(n, np.int64)
    vert = np.empty(n, np.int64)
    for x in range(n):
        pos[x] = bins[deg[x]]
        vert[pos[x]] = x
        bins[deg[x]] += 1
    for d in range(md, 0, -1):
        bins[d] = bins[d - 1]
    bins[0] = 0
    # vert is sorted by current degree and bins[d] is the first slot of degree d;
    # taking vertices in slot order and moving each higher-degree neighbour one
    # bin down keeps that true (Batagelj and Zaversnik's layout).
    for i in range(n):
        x = vert[i]
        dx = deg[x]
        for k in range(indptr[x], indptr[x + 1]):
            w = nbr[k]
            dw = deg[w]
            if dw > dx:
                pw = pos[w]
                ps = bins[dw]
                y = vert[ps]
                if y != w:
                    pos[w] = ps
                    vert[pw] = y
                    pos[y] = pw
                    vert[ps] = w
                bins[dw] += 1
                deg[w] = dw - 1
    return vert, deg


# --------------------------------------------------------------------------
# sorted-list intersection (rows of the CSR, or a row against a sorted id list)
# --------------------------------------------------------------------------
@_leaf
def bit_length(x):
    """Number of bits of ``x`` (1 for ``x <= 1``): a cheap ``log2`` for cost guesses."""
    r = 1
    while x > 1:
        x >>= 1
        r += 1
    return r


@_leaf
def _gallop(S, slo, shi, L, llo, lhi, outS, outL):
    """Common values of short ``S[slo:shi]`` and long ``L[llo:lhi]`` (both sorted).

    Exponential then binary search from the last match: ``O(|S| log(|L|/|S|))``.
    """
    cnt = 0
    lo = llo
    for i in range(slo, shi):
        if lo >= lhi:
            break
        x = S[i]
        if L[lo] < x:
            prev = lo
            step = 1
            cur = lo + 1
            while cur < lhi and L[cur] < x:
                prev = cur
                step <<= 1
                cur = prev + step
            a = prev + 1
            b = min(cur, lhi)
            while a < b:
                mid = (a + b) >> 1
                if L[mid] < x:
                    a = mid + 1
                else:
                    b = mid
            lo = a
        if lo < lhi and L[lo] == x:
            outS[cnt] = i
            outL[cnt] = lo
            cnt += 1
            lo += 1
    return cnt


@_leaf
def intersect_merge(A, alo, ahi, B, blo, bhi, outA, outB):
    """Common values of sorted ``A[alo:ahi]`` and ``B[blo:bhi]`` by a linear merge."""
    cnt = np.int64(0)
    i = alo
    j = blo
    if ahi - alo == 0 or bhi - blo == 0:
        return cnt
    # branch-free steps: write the pair every time, keep it only on a match
    n_out = min(ahi - alo, bhi - blo)
    while i < ahi and j < bhi:
        x = A[i]
        y = B[j]
        outA[cnt] = i
        outB[cnt] = j
        cnt += np.int64(x == y)
        i += np.int64(x <= y)
        j += np.int64(y <= x)
        if cnt == n_out:
            break
    return cnt


@_leaf
def intersect_sorted(A, alo, ahi, B, blo, bhi, outA, outB):
    """Positions of the common values of ``A[alo:ahi]`` and ``B[blo:bhi]``.

    Both slices must be strictly increasing. Merges lists of similar length,
    gallops the shorter into the longer otherwise.
    Writes the positions of the ``count`` matches to ``outA``/``outB`` (both need
    room for ``min`` of the two lengths) and returns ``(count, work)``, ``work``
    being the estimated number of steps taken.
    """
    na = ahi - alo
    nb = bhi - blo
    if na <= nb:
        g = na * bit_length(nb)
        if g < na + nb:
            return _gallop(A, alo, ahi, B, blo, bhi, outA, outB), g
    else:
        g = nb * bit_length(na)
        if g < na + nb:
            return _gallop(B, blo, bhi, A, alo, ahi, outB, outA), g
    return intersect_merge(A, alo, ahi, B, blo, bhi, outA, outB), na + nb


@_leaf
def find_edge(indptr, nbr, a, b):
    """CSR position of neighbour ``b`` in row ``a`` (binary search), or -1.

    The position indexes ``nbr``, ``nlev`` and ``eid``.
    """
    return position_in(nbr, np.int64(indptr[a]), np.int64(indptr[a + 1]), b)


@_leaf
def position_in(arr, lo, hi, x):
    """Position of ``x`` in the ascending ``arr[lo:hi]`` (binary search), or -1."""
    end = hi
    while lo < hi:
        mid = (lo + hi) >> 1
        if arr[mid] < x:
            lo = mid + 1
        else:
            hi = mid
    if lo < end and arr[lo] == x:
        return lo
    return -1


# --------------------------------------------------------------------------
# software prefetch
# --------------------------------------------------------------------------
@intrinsic
def prefetch(typingctx, arr, i):
    """Hint the CPU to load the cache line of ``arr[i]`` (``llvm.prefetch``).

    A hint only: it never faults, even when ``i`` lies outside ``arr``, and it
    changes no value.
    """
    if not isinstance(arr, types.Array) or not isinstance(i, types.Integer):
        return None
    sig = types.void(arr, i)

    def codegen(context, builder, signature, args):
        aryty = signature.args[0]
        ary = context.make_array(aryty)(context, builder, args[0])
        ptr = cgutils.get_item_pointer(context, builder, aryty, ary, [args[1]])
        i8p = builder.bitcast(ptr, ir.IntType(8).as_pointer())
        i32 = ir.IntType(32)
        fnty = ir.FunctionType(ir.VoidType(), [i8p.type, i32, i32, i32])
        fn = builder.module.declare_intrinsic("llvm.prefetch", [i8p.type], fnty)
        # read access, keep in all cache levels, data cache
        builder.call(fn, [i8p, ir.Constant(i32, 0), ir.Constant(i32, 3),
                          ir.Constant(i32, 1)])
        return context.get_dummy_value()

    return sig, codegen


PREFETCH_AHEAD = 16  # sets; the row pointers are asked for twice as far ahead


@_leaf
def prefetch_member_rows(indptr, nbr, aux, ptr, nodes, k):
    """Prefetch for set ``k`` of the list ``ptr``/``nodes`` (a loop at set ``k``).

    Asks for ``indptr`` of the members of set ``k + 2 * PREFETCH_AHEAD`` and for the
    first line of ``nbr`` and ``aux`` (``nlev`` or ``eid``) in the rows of the
    members of set ``k + PREFETCH_AHEAD``, whose row pointers the first request
    has brought in by then. Nothing happens past the end of the list.
    """
    K = ptr.shape[0] - 1
    kk = k + 2 * PREFETCH_AHEAD
    if kk < K:
        for i in range(ptr[kk], ptr[kk + 1]):
            prefetch(indptr, nodes[i])
    kk = k + PREFETCH_AHEAD
    if kk < K:
        for i in range(ptr[kk], ptr[kk + 1]):
            q = indptr[nodes[i]]
            prefetch(nbr, q)
            prefetch(aux, q)


def csr_from_edges_reference(n, u, v, lev):
    """Slow twin of :func:`csr_from_edges` built with scipy.sparse.

    Stores ``eid + 1`` and ``lev + 1`` as matrix values (so zeros survive), lets
    scipy build and sort the CSR, then shifts the values back.
    """
    import scipy.sparse as sp

    u = np.asarray(u, np.int64)
    v = np.asarray(v, np.int64)
    lev = np.asarray(lev, np.int64)
    rows = np.concatenate([u, v])
    cols = np.concatenate([v, u])
    k = np.concatenate([np.arange(u.size), np.arange(u.size)])
    a_eid = sp.csr_matrix((k + 1, (rows, cols)), shape=(n, n))
    a_lev = sp.csr_matrix((np.concatenate([lev, lev]) + 1, (rows, cols)), shape=(n, n))
    a_eid.sort_indices()
    a_lev.sort_indices()
    return (
        a_eid.indptr.astype(np.int64),
        a_eid.indices.astype(np.int64),
        (a_lev.data - 1).astype(np.int32),
        (a_eid.data - 1).astype(np.int64),
    )


def intersect_reference(A, B):
    """Slow twin of :func:`intersect_sorted`: positions of ``np.intersect1d``."""
    common, ia, ib = np.intersect1d(np.asarray(A), np.asarray(B), return_indices=True)
    return ia.astype(np.int64), ib.astype(np.int64)


def find_edge_reference(indptr, nbr, a, b):
    """Slow twin of :func:`find_edge`: a linear scan of row ``a``."""
    for p in range(int(indptr[a]), int(indptr[a + 1])):
        if nbr[p] == b:
            return p
    return -1
