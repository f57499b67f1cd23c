"""Maximal cliques on CSR graphs, and the level sweep that lists candidates.

Graphs come from :func:`cliquewise.kernels.graph.csr_from_edges`: symmetric CSR
``indptr``/``nbr`` with sorted rows, a level per entry (``nlev``) and the input
position of the edge behind each entry (``eid``). The threshold graph ``G_l`` keeps
the edges of level ``>= l``.

What lives here
---------------
``degeneracy_order``
    Core numbers and a degeneracy (smallest-last) order by the linear-time bucket
    queue of Matula and Beck (in the array layout of Batagelj and Zaversnik).
``maximal_cliques``
    All maximal cliques (size >= 2) of a graph, levels ignored: Bron-Kerbosch with
    Tomita pivoting run per vertex over the degeneracy order (Eppstein, Loeffler and
    Strash 2010): vertex ``v`` gets its later neighbours as candidates ``P`` and its
    earlier neighbours as excluded ``X``.
``sweep_candidates``
    The candidate listing. For an edge ``e = (a, b)`` of level ``l`` the maximal
    cliques of ``G_l`` through ``e`` are ``{a, b} + R`` for every maximal clique
    ``R`` of ``G_l`` restricted to ``S = N_l(a) & N_l(b)`` (incremental maximal
    clique maintenance under edge additions, Das, Svendsen and Tirthapura, VLDB
    Journal 2019). A clique is reported only from its smallest-index edge among
    its edges of level exactly ``l``, so every vertex set that is a maximal clique
    of some ``G_l`` is listed once over all edges, with ``level_max`` = its
    smallest edge level (a clique maximal in ``G_t`` stays maximal in the smaller
    graph ``G_{level_max}``, as ``t <= level_max``).
``sweep_with_ranges``
    The sweep, also giving each clique's ``level_min`` and its pairs' edge ids,
    worked out per edge from the common neighbourhood just intersected (what the
    enumerate stage runs).
The per-vertex path (``_local_build``, ``_local_edge``, ``_local_ranges_and_pairs``)
    For a first end ``a`` of at most 64 neighbours, the links among them are merged
    once for all of ``a``'s edges, and each edge reads its common neighbourhood,
    the search's adjacency, its cliques' level ranges and pair ids from that table
    (docs/method.md, section 3.2). Same arrays as the per-edge path.
``level_min`` / ``level_max_of``
    The lowest level at which a listed clique is still maximal (by sorted-row
    intersection from its member of smallest degree), and its smallest internal
    edge level (a check on ``level_max``).
``*_reference``
    Slow twins on networkx, used by the tests.

The drivers here only cut the work into sub-problems (one vertex for
``maximal_cliques``, one edge for the sweep) and collect the output; the
bitset search that solves a sub-problem, the "move to X" rule that keeps the
sweep free of duplicates, the split of large common neighbourhoods and the
work count (the blow-up guard) are in :mod:`cliquewise.kernels.localbk`.
When the output buffers are full a driver rolls its unit (vertex or edge) back,
doubles the buffers and redoes the unit.
"""

import networkx as nx
import numba
import numpy as np

from cliquewise.kernels.graph import (
    bit_length,
    degeneracy_kernel,
    find_edge,
    position_in,
    prefetch,
    prefetch_member_rows,
)
from cliquewise.kernels.graph import intersect_merge
from cliquewise.kernels.graph import intersect_sorted as _isect
from cliquewise.kernels.localbk import (
    FULL,
    NO_LIMIT,
    OK,
    SM_EARLY,
    SM_SIZE,
    SMALL,
    SPLIT,
    TOO_MUCH_WORK,
    ctz,
    grown,
    put_clique,
    search_small,
    solve_general,
    solve_small,
    solve_split,
)

__all__ = [
    "degeneracy_order",
    "degeneracy_order_reference",
    "maximal_cliques",
    "maximal_cliques_reference",
    "sweep_candidates",
    "sweep_with_ranges",
    "candidates_reference",
    "level_min",
    "level_min_reference",
    "level_max_of",
    "NO_LIMIT",
]

# Scalars passed to other kernels are typed int64 on purpose: a bare literal makes
# numba compile an extra specialisation of the callee for that literal value.
# per-edge helpers of the sweep never allocate: compiled without reference counting
# (see cliquewise.kernels.localbk, Implementation note)
_leaf = numba.njit(nogil=True, cache=True, _nrt=False)
_I0 = np.int64(0)
_I1 = np.int64(1)
_I2 = np.int64(2)
_TABLE_M = 64  # common neighbourhoods up to this size (one word) get a link table (_edge_ranges_and_pairs)
_LOCAL_D = 64  # first ends with up to this many neighbours (one word) take the per-vertex path
_AHEAD = 16  # edges between a prefetch of a row and its use (a row pointer: twice as far)


# --------------------------------------------------------------------------
# degeneracy order
# --------------------------------------------------------------------------
def degeneracy_order(indptr, nbr):
    """Degeneracy order and core numbers (linear-time bucket queue).

    Parameters
    ----------
    indptr : ndarray of int64, shape (n + 1,)
    nbr : ndarray of int32 or int64
        Symmetric CSR without self-loops.

    Returns
    -------
    order : ndarray of int64, shape (n,)
        Vertices in removal order (repeatedly remove a vertex of minimum remaining
        degree); vertex ``x`` has at most ``core[x]`` neighbours later in it.
    core : ndarray of int64, shape (n,)
        Core number of each vertex.
    """
    return degeneracy_kernel(np.asarray(indptr, np.int64), nbr)


def degeneracy_order_reference(n, u, v):
    """Core numbers from ``networkx.core_number`` (slow twin of the ``core`` output)."""
    g = nx.Graph()
    g.add_nodes_from(range(n))
    g.add_edges_from(zip(np.asarray(u).tolist(), np.asarray(v).tolist()))
    cn = nx.core_number(g)
    return np.array([cn[x] for x in range(n)], np.int64)


# --------------------------------------------------------------------------
# all maximal cliques of one graph
# --------------------------------------------------------------------------
@numba.njit(nogil=True, cache=True)
def _maximal_cliques_kernel(indptr, nbr, small_max):
    n = indptr.shape[0] - 1
    order, core = degeneracy_kernel(indptr, nbr)
    rank = np.empty(n, np.int64)
    for i in range(n):
        rank[order[i]] = i
    maxdeg = 0
    for x in range(n):
        maxdeg = max(maxdeg, indptr[x + 1] - indptr[x])
    sm = np.empty(SM_SIZE, np.uint64)
    inv = np.empty(SMALL, np.int64)
    cbuf = np.empty(SMALL + 1, np.int64)
    posA = np.empty(SMALL, np.int64)
    posB = np.empty(SMALL, np.int64)
    lidx = np.empty(maxdeg, np.int64)
    Pglob = np.empty(maxdeg, np.int64)
    ptr = np.zeros(1024, np.int64)
    nodes = np.empty(4096, np.int64)
    cnt = np.zeros(4, np.int64)
    pre = np.empty(1, np.int64)
    no_lev = np.empty(0, np.int32)
    no_eid = np.empty(0, np.int32)
    x = 0
    while x < n:
        lo = indptr[x]
        hi = indptr[x + 1]
        s = hi - lo
        rx = rank[x]
        p = np.int64(0)
        for k in range(lo, hi):
            y = nbr[k]
            if rank[y] > rx:
                lidx[k - lo] = p
                Pglob[p] = y
                p += 1
        if p == 0:
            x += 1
            continue  # {x} alone, or not maximal
        ix = p
        for k in range(lo, hi):
            if rank[nbr[k]] < rx:
                lidx[k - lo] = ix
                ix += 1
        pre[0] = x
        K0 = cnt[0]
        N0 = cnt[1]
        W0 = cnt[2]
        if s <= small_max:
            solve_small(indptr, nbr, no_lev, no_eid, _I0, _I0, _I0, nbr, lo, hi, lidx,
                         Pglob, Pglob, p, pre, _I1, sm, inv, cbuf, posA, posB, ptr,
                         nodes,
                         cnt, NO_LIMIT, NO_LIMIT)
        else:
            solve_general(indptr, nbr, no_lev, no_eid, _I0, _I0, _I0, nbr, lo, hi,
                           lidx, Pglob, Pglob, p, s - p, pre, _I1, ptr, nodes, cnt,
                           NO_LIMIT, NO_LIMIT)
        if cnt[3] == FULL:
            cnt[0] = K0
            cnt[1] = N0
            cnt[2] = W0
            cnt[3] = OK
            ptr = grown(ptr, K0 + 1)
            nodes = grown(nodes, N0)
            continue  # redo x
        x += 1
    K = cnt[0]
    return ptr[: K + 1].copy(), nodes[: cnt[1]].copy()


def maximal_cliques(indptr, nbr, *, _small=SMALL):
    """All maximal cliques with at least two vertices (edge levels ignored).

    Parameters
    ----------
    indptr : ndarray of int64, shape (n + 1,)
    nbr : ndarray of int32 or int64
        Symmetric CSR with sorted rows (from ``csr_from_edges``).

    Returns
    -------
    ptr : ndarray of int64, shape (K + 1,)
    nodes : ndarray of int64
        Clique ``k`` is ``nodes[ptr[k]:ptr[k + 1]]``, ascending.

    Notes
    -----
    ``_small`` (for tests) is the largest neighbourhood solved with one-word
    bitsets; lowering it drives the multi-word path on small graphs.
    """
    if not 0 <= _small <= SMALL:
        raise ValueError("_small must lie in [0, 64]")
    return _maximal_cliques_kernel(np.asarray(indptr, np.int64), nbr, np.int64(_small))


def maximal_cliques_reference(n, u, v):
    """Slow twin: ``networkx.find_cliques`` (size >= 2) as a set of frozensets."""
    g = nx.Graph()
    g.add_nodes_from(range(n))
    g.add_edges_from(zip(np.asarray(u).tolist(), np.asarray(v).tolist()))
    return {frozenset(c) for c in nx.find_cliques(g) if len(c) >= 2}



# --------------------------------------------------------------------------
# the sweep's per-vertex path: the links among a vertex's neighbours, built once
# --------------------------------------------------------------------------
@_leaf
def _prefetch_neighbour_rows(indptr, nbr, nlev, eid, lo, hi):
    """Ask for the rows (``nbr`` and ``nlev``, whole; ``eid``, the first lines) of
    the vertices ``nbr[lo:hi]``: all their misses in flight at once."""
    for j in range(lo, hi):
        x = nbr[j]
        q0 = np.int64(indptr[x])
        q1 = np.int64(indptr[x + 1])
        for q in range(q0, q1, 16):
            prefetch(nbr, q)
            prefetch(nlev, q)
        prefetch(eid, q0)
        prefetch(eid, q0 + 8)


@_leaf
def _local_build(indptr, nbr, nlev, eid, ia, d, ladj, lpos, outA, outB):
    """The links among the ``d <= 64`` neighbours ``N = nbr[ia:ia + d]`` of a vertex:
    ``ladj[j]`` has bit ``k`` set when ``N[j]`` and ``N[k]`` are joined, and
    ``lpos[j * d + k]`` is then the CSR position of one entry of that edge (its
    level and edge id are those of both entries; other table entries are stale).
    One merge of the upper part of each neighbour's row with the later
    neighbours. Returns the work (entries visited)."""
    one = np.uint64(1)
    for j in range(d):
        ladj[j] = np.uint64(0)
        prefetch(indptr, nbr[ia + j])
    _prefetch_neighbour_rows(indptr, nbr, nlev, eid, ia, ia + d)
    work = np.int64(0)
    for j in range(d - 1):
        x = nbr[ia + j]
        lo = np.int64(indptr[x])
        hi = np.int64(indptr[x + 1])
        while lo < hi:  # the first entry above x, by bisection
            mid = (lo + hi) >> 1
            if nbr[mid] <= x:
                lo = mid + 1
            else:
                hi = mid
        hi = np.int64(indptr[x + 1])
        nl = intersect_merge(nbr, lo, hi, nbr, ia + j + 1, ia + d, outA, outB)
        work += hi - lo + d - j
        bj = one << np.uint64(j)
        rj = j * d
        bits = np.uint64(0)
        for t in range(nl):
            k = outB[t] - ia
            q = outA[t]
            lpos[rj + k] = q
            lpos[k * d + j] = q
            bits |= one << np.uint64(k)
            ladj[k] |= bj
        ladj[j] |= bits
    return work


@_leaf
def _local_edge(nbr, nlev, eid, ia, d, ladj, lpos, lglob, jb, a, b, l, e, pre, sm, cbuf, ptr, nodes, cnt,
                max_cliques, max_work, rout):
    """The search for edge ``e = (a, b)`` of level ``l``, ``b = nbr[ia + jb]``, from
    the links among the neighbours of ``a`` (:func:`_local_build`), with a's
    neighbour indices as local ids (``lglob[k] = nbr[ia + k]``): the same cliques,
    in the same order, as the general path's ``solve_small``. ``rout[k]`` takes
    the local ids of clique ``k``'s members other than ``a`` and ``b``."""
    one = np.uint64(1)
    zero = np.uint64(0)
    rb = jb * d
    bits = ladj[jb]  # the full common neighbourhood of a and b
    sbits = zero  # S: the part in G_l
    xbits = zero  # joined to a or b by an earlier edge of level l (cliques through it are listed from there)
    while bits != zero:
        k = np.int64(ctz(bits))
        bits &= bits - one
        pa = ia + k
        la = nlev[pa]
        if la < l:
            continue
        q = lpos[rb + k]
        lb = nlev[q]
        if lb < l:
            continue
        bk = one << np.uint64(k)
        sbits |= bk
        if (la == l and eid[pa] < e) or (lb == l and eid[q] < e):
            xbits |= bk
    pre[0] = a
    pre[1] = b
    if sbits == zero:
        put_clique(ptr, nodes, cnt, pre, _I2, max_cliques)
        return
    pbits = sbits & ~xbits
    if pbits == zero:
        return
    rest = sbits
    while rest != zero:
        k = np.int64(ctz(rest))
        rest &= rest - one
        sm[k] = zero
        sm[SM_EARLY + k] = zero
    work = np.int64(0)
    rest = sbits
    while rest != zero:  # the links within S in G_l, each pair once; early ones marked
        k = np.int64(ctz(rest))
        rest &= rest - one
        row = ladj[k] & rest
        rk = k * d
        bk = one << np.uint64(k)
        work += 1
        while row != zero:
            k2 = np.int64(ctz(row))
            row &= row - one
            q = lpos[rk + k2]
            lv = nlev[q]
            if lv < l:
                continue
            b2 = one << np.uint64(k2)
            sm[k] |= b2
            sm[k2] |= bk
            if lv == l and eid[q] < e:
                sm[SM_EARLY + k] |= b2
                sm[SM_EARLY + k2] |= bk
            work += 1
    search_small(sm, pbits, xbits, _I1, lglob, pre, _I2, cbuf, ptr, nodes, cnt, max_cliques, max_work, work,
                 True, rout)


@_leaf
def _local_ranges_and_pairs(nbr, nlev, eid, ia, d, ladj, lpos, jb, a, b, e, ptr, nodes, K0, K1, lmin, pairs,
                            w, tix, rout, ident):
    """:func:`_edge_ranges_and_pairs` on the per-vertex path: the members' links
    are read off the links among the neighbours of ``a`` (every member other than
    ``a`` and ``b``, and every vertex that could extend a clique, is one of them
    and in the common neighbourhood ``ladj[jb]``). Returns ``w`` + pairs written."""
    one = np.uint64(1)
    T = ladj[jb]
    rb = jb * d
    for k in range(K0, K1):
        lo = ptr[k]
        hi = ptr[k + 1]
        common = T
        r = rout[k]
        for i in range(lo, hi):  # each member's local id, in member order (a and b: -1)
            c = nodes[i]
            if c == a or c == b:
                tix[i - lo] = -1
                continue
            h = np.int64(ctz(r))
            r &= r - one
            tix[i - lo] = h
            common &= ladj[h]
        best = np.int64(-1)
        while common != np.uint64(0):  # the vertices adjacent to every member
            x = np.int64(ctz(common))
            common &= common - one
            val = np.int64(min(nlev[ia + x], nlev[lpos[rb + x]]))
            for i in range(hi - lo):
                if val <= best:
                    break
                h = tix[i]
                if h >= 0:
                    val = min(val, np.int64(nlev[lpos[h * d + x]]))
            best = max(best, val)
        lmin[k] = best + 1
        w = _pairs_from_links(eid, nodes, lo, hi, a, e, tix, ident, _I0, ia, lpos, rb, _I0, ladj, ident, lpos, d,
                              pairs, w)
    return w


# --------------------------------------------------------------------------
# the level sweep
# --------------------------------------------------------------------------
@numba.njit(nogil=True, cache=True)
def _sweep_kernel(indptr, nbr, nlev, eid, u, v, lev, edge_lo, edge_hi,
                  max_cliques, max_work, small_max, split_at, ranges, table_m, local_max):
    sm = np.empty(SM_SIZE, np.uint64)
    inv = np.empty(SMALL, np.int64)
    cbuf = np.empty(SMALL + 3, np.int64)
    sposA = np.empty(SMALL, np.int64)
    sposB = np.empty(SMALL, np.int64)
    ptr = np.zeros(1024, np.int64)
    nodes = np.empty(4096, np.int64)
    lvl = np.empty(1024, np.int32)
    cnt = np.zeros(4, np.int64)
    posA = np.empty(64, np.int64)
    posB = np.empty(64, np.int64)
    S = np.empty(64, nbr.dtype)  # same dtype as nbr: one specialisation of callees
    ex = np.empty(64, np.bool_)
    lidx = np.empty(64, np.int64)
    Pglob = np.empty(64, np.int64)
    pre = np.empty(2, np.int64)
    # with ranges: each clique's level_min and its pairs' edge ids (_range_and_pairs)
    xs = np.empty(128, np.int64)
    ms = np.empty(128, np.int32)
    tpos = np.empty(66, np.int64)
    # for _edge_ranges_and_pairs: the common neighbourhood's ids, each one's row in
    # the link table, the rows as bitsets, merge outputs, the table itself
    tv = np.empty(64, np.int64)
    slot = np.empty(64, np.int64)
    adj = np.empty(64, np.uint64)  # the link table's rows as bitsets over T (m <= 64)
    outA = np.empty(64, np.int64)
    outB = np.empty(64, np.int64)
    links = np.empty(table_m * table_m if ranges else 0, np.int64)
    lmin = np.empty(1024 if ranges else 0, np.int32)
    pairs = np.empty(4096 if ranges else 0, eid.dtype)
    n_pairs = np.int64(0)
    # the per-vertex path (first ends of at most local_max <= 64 neighbours): the
    # links among the neighbours of the current first end, built once for its edges
    cur_a = np.int64(-1)
    pf_ptr = np.int64(-1)  # the last first ends whose neighbours' row pointers, and rows, were asked for
    pf_row = np.int64(-1)
    ladj = np.empty(64, np.uint64)
    lpos = np.empty(64 * 64, np.int64)
    lglob = np.empty(64, np.int64)
    ident = np.arange(64)  # on the per-vertex path a table index is its own row (_pairs_from_links)
    rout = np.empty(ptr.shape[0], np.uint64)  # each clique's members as local ids (per-vertex path)
    e = edge_lo
    while e < edge_hi:
        a = u[e]
        b = v[e]
        # ask early for the row pointer, then the row, of the edges to come: the
        # edges of a block share their first end, so the rows of the second ends
        # are the ones that miss the cache
        if e + 2 * _AHEAD < edge_hi:
            prefetch(indptr, v[e + 2 * _AHEAD])
        if e + _AHEAD < edge_hi:
            q = indptr[v[e + _AHEAD]]
            prefetch(nbr, q)
            prefetch(nlev, q)
        # and for the per-vertex path, the rows of the neighbours of the first ends
        # to come (their row pointers first)
        if e + 2 * _AHEAD < edge_hi and u[e + 2 * _AHEAD] != pf_ptr:
            pf_ptr = u[e + 2 * _AHEAD]
            if indptr[pf_ptr + 1] - indptr[pf_ptr] <= local_max:
                for q in range(indptr[pf_ptr], indptr[pf_ptr + 1]):
                    prefetch(indptr, nbr[q])
        if e + _AHEAD < edge_hi and u[e + _AHEAD] != pf_row:
            pf_row = u[e + _AHEAD]
            if indptr[pf_row + 1] - indptr[pf_row] <= local_max:
                _prefetch_neighbour_rows(indptr, nbr, nlev, eid, np.int64(indptr[pf_row]),
                                         np.int64(indptr[pf_row + 1]))
        l = np.int64(lev[e])
        alo = indptr[a]
        ahi = indptr[a + 1]
        local = ahi - alo <= local_max
        d = np.int64(ahi - alo)
        m = np.int64(0)
        jb = np.int64(0)
        if local:
            if a != cur_a:
                cnt[2] += _local_build(indptr, nbr, nlev, eid, np.int64(alo), d, ladj, lpos, outA, outB)
                for k in range(d):
                    lglob[k] = nbr[alo + k]
                cur_a = a
            jb = position_in(nbr, np.int64(alo), np.int64(ahi), b) - alo
            if jb < 0:
                raise ValueError("sweep: an edge is missing from the row of its first end")
            K0 = cnt[0]
            N0 = cnt[1]
            W0 = cnt[2]
            _local_edge(nbr, nlev, eid, np.int64(alo), d, ladj, lpos, lglob, jb, a, b, l, np.int64(e), pre, sm,
                        cbuf, ptr, nodes, cnt, max_cliques, max_work, rout)
        else:  # the general path: intersect the rows of a and b
            blo = indptr[b]
            bhi = indptr[b + 1]
            need = min(ahi - alo, bhi - blo)
            if posA.shape[0] < need:
                posA = np.empty(2 * need, np.int64)
                posB = np.empty(2 * need, np.int64)
                S = np.empty(2 * need, nbr.dtype)
                ex = np.empty(2 * need, np.bool_)
                lidx = np.empty(2 * need, np.int64)
                Pglob = np.empty(2 * need, np.int64)
                if ranges:
                    xs = np.empty(4 * need, np.int64)
                    ms = np.empty(4 * need, np.int32)
                    tpos = np.empty(2 * need + 2, np.int64)
                    tv = np.empty(2 * need, np.int64)
                    slot = np.empty(2 * need, np.int64)
                    outA = np.empty(2 * need, np.int64)
                    outB = np.empty(2 * need, np.int64)
            m, wk = _isect(nbr, alo, ahi, nbr, blo, bhi, posA, posB)
            cnt[2] += wk
            # S = common neighbours in G_l; ex = joined to a or b by an earlier edge of
            # level l (cliques through it are listed from that edge)
            s = np.int64(0)
            p = np.int64(0)
            for t in range(m):
                pa = posA[t]
                pb = posB[t]
                la = nlev[pa]
                lb = nlev[pb]
                if la < l or lb < l:
                    continue
                S[s] = nbr[pa]
                x = (la == l and eid[pa] < e) or (lb == l and eid[pb] < e)
                ex[s] = x
                if not x:
                    p += 1
                s += 1
            K0 = cnt[0]
            N0 = cnt[1]
            W0 = cnt[2]
            pre[0] = a
            pre[1] = b
            if s == 0:
                put_clique(ptr, nodes, cnt, pre, _I2, max_cliques)
            elif p > 0 and s > split_at:
                solve_split(indptr, nbr, nlev, eid, l, e, S, ex, s, a, b, sm, inv, cbuf,
                             sposA, sposB, ptr, nodes, cnt, max_cliques, max_work,
                             small_max)
            elif p > 0:
                ip = 0
                ix = p
                for t in range(s):
                    if ex[t]:
                        lidx[t] = ix
                        ix += 1
                    else:
                        lidx[t] = ip
                        Pglob[ip] = S[t]
                        ip += 1
                if s <= small_max:
                    solve_small(indptr, nbr, nlev, eid, _I1, l, e, S, _I0, s, lidx, Pglob,
                                 Pglob, p, pre, _I2, sm, inv, cbuf, sposA, sposB, ptr,
                                 nodes,
                                 cnt, max_cliques, max_work)
                else:
                    solve_general(indptr, nbr, nlev, eid, _I1, l, e, S, _I0, s, lidx,
                                   Pglob, Pglob, p, s - p, pre, _I2, ptr, nodes, cnt,
                                   max_cliques, max_work)
        if cnt[3] == FULL:
            cnt[0] = K0
            cnt[1] = N0
            cnt[2] = W0
            cnt[3] = OK
            ptr = grown(ptr, K0 + 1)
            nodes = grown(nodes, N0)
            rout = grown(rout, K0)  # as long as ptr
            continue  # redo edge e with room to spare
        K1 = cnt[0]
        if K1 > K0:
            while lvl.shape[0] < K1:
                lvl = grown(lvl, K0)
            for k in range(K0, K1):
                lvl[k] = l
            if ranges and cnt[3] == OK:
                while lmin.shape[0] < K1:
                    lmin = grown(lmin, K0)
                need_pairs = n_pairs
                for k in range(K0, K1):
                    sz = ptr[k + 1] - ptr[k]
                    need_pairs += sz * (sz - 1) // 2
                while pairs.shape[0] < need_pairs:
                    pairs = grown(pairs, n_pairs)
                if local:
                    n_pairs = _local_ranges_and_pairs(nbr, nlev, eid, np.int64(alo), d, ladj, lpos, jb, a, b,
                                                      np.int64(e), ptr, nodes, K0, K1, lmin, pairs, n_pairs, tpos,
                                                      rout, ident)
                elif m <= table_m:  # the members' links from one pass over each member's row
                    for t in range(m):
                        tv[t] = nbr[posA[t]]
                        slot[t] = -1
                    n_pairs = _edge_ranges_and_pairs(indptr, nbr, nlev, eid, a, b, np.int64(e), m, posA, posB,
                                                     ptr, nodes, K0, K1, lmin, pairs, n_pairs, xs, tpos,
                                                     tv, slot, adj, outA, outB, links)
                else:
                    for k in range(K0, K1):
                        lmin[k], n_pairs = _range_and_pairs(indptr, nbr, nlev, eid, a, b, np.int64(e), m, posA,
                                                            posB, ptr, nodes, k, xs, ms, tpos, pairs, n_pairs)
        if cnt[3] != OK:
            break
        if cnt[2] > max_work:
            cnt[3] = TOO_MUCH_WORK
            break
        e += 1
    K = cnt[0]
    return (ptr[: K + 1].copy(), nodes[: cnt[1]].copy(), lvl[:K].copy(),
            np.int64(cnt[3]), np.int64(cnt[2]), lmin[:K].copy() if ranges else lmin,
            pairs[:n_pairs])


def sweep_candidates(indptr, nbr, nlev, eid, u, v, lev, edge_lo=0, edge_hi=None,
                     max_cliques=None, max_work=None, *, _small=SMALL, _split=SPLIT, _ranges=False,
                     _table=None, _local=_LOCAL_D):
    """Candidate cliques first seen at the level of each edge in a block.

    For every edge ``e`` in ``[edge_lo, edge_hi)`` (indices into ``u``/``v``/``lev``)
    list the maximal cliques of ``G_{lev[e]}`` that contain ``e``, whose smallest
    edge level is ``lev[e]``, and in which ``e`` has the smallest index among the
    edges of that level. Over all edges this lists each vertex set that is a maximal
    clique (size >= 2) of some threshold graph exactly once, so blocks can be run
    independently and concatenated.

    Parameters
    ----------
    indptr, nbr, nlev, eid : ndarray
        CSR from :func:`cliquewise.kernels.graph.csr_from_edges` on ``u, v, lev``.
    u, v : ndarray of int64, shape (E,)
    lev : ndarray of int32, shape (E,)
    edge_lo, edge_hi : int
        Edge block; default the whole edge list.
    max_cliques : int, optional
        Stop with status 1 when one more clique than this would be listed.
    max_work : int, optional
        Stop with status 2 once the work count exceeds this (module docstring).

    Returns
    -------
    ptr : ndarray of int64, shape (K + 1,)
    nodes : ndarray of int64
        Clique ``k`` is ``nodes[ptr[k]:ptr[k + 1]]``, ascending node ids.
    level_max : ndarray of int32, shape (K,)
        Smallest edge level of each clique (the ``lev`` of the edge that listed it).
    status : int
        0 complete, 1 clique budget exceeded, 2 work budget exceeded. On 1 or 2
        the output holds what was found before stopping.
    work_done : int

    Notes
    -----
    Common neighbourhoods of up to ``_small`` (<= 64) vertices use one-word
    bitsets, up to ``_split`` multi-word bitsets, larger ones are first split by a
    degeneracy order. These private knobs (and ``_table``, see
    :func:`sweep_with_ranges`) let tests drive every path on small graphs.
    """
    if not 0 <= _small <= SMALL:
        raise ValueError("_small must lie in [0, 64]")
    if _table is not None and not 0 <= _table <= _TABLE_M:
        raise ValueError(f"_table must lie in [0, {_TABLE_M}]")
    if not 0 <= _local <= _LOCAL_D:
        raise ValueError(f"_local must lie in [0, {_LOCAL_D}]")
    u = np.ascontiguousarray(u, np.int64)
    v = np.ascontiguousarray(v, np.int64)
    lev = np.ascontiguousarray(lev, np.int32)
    nlev = np.ascontiguousarray(nlev, np.int32)
    eid = np.ascontiguousarray(eid)
    if eid.dtype not in (np.int32, np.int64):
        eid = eid.astype(np.int64)
    if not (u.shape == v.shape == lev.shape
            and nlev.shape == nbr.shape == eid.shape):
        raise ValueError("u, v, lev (and nbr, nlev, eid) must have matching lengths")
    if edge_hi is None:
        edge_hi = u.shape[0]
    if not 0 <= edge_lo <= edge_hi <= u.shape[0]:
        raise ValueError("edge block out of range")
    mc = NO_LIMIT if max_cliques is None else np.int64(max_cliques)
    mw = NO_LIMIT if max_work is None else np.int64(max_work)
    ptr, nodes, lvl, status, work, lmin, pairs = _sweep_kernel(
        np.asarray(indptr, np.int64), nbr, nlev, eid, u, v, lev,
        np.int64(edge_lo), np.int64(edge_hi), mc, mw, np.int64(_small),
        np.int64(_split), bool(_ranges), np.int64(_TABLE_M if _table is None else _table),
        np.int64(min(_local, _small, _split)))
    if _ranges:
        return ptr, nodes, lvl, int(status), int(work), lmin, pairs
    return ptr, nodes, lvl, int(status), int(work)


def sweep_with_ranges(indptr, nbr, nlev, eid, u, v, lev, edge_lo=0, edge_hi=None,
                      max_cliques=None, max_work=None, *, _small=SMALL, _split=SPLIT, _table=None,
                      _local=_LOCAL_D):
    """:func:`sweep_candidates`, also returning each clique's :func:`level_min` and the
    edge ids of its member pairs as
    :func:`cliquewise.kernels.incidence.candidate_pairs` gives them (in the dtype of
    ``eid``).

    Returns ``(ptr, nodes, level_max, status, work_done, level_min, pair_edges)``;
    the last two are complete only when ``status`` is 0. They are worked out for
    each edge's cliques right after the search, from the common neighbourhood it
    has just intersected, which costs less than the separate passes: by a table of
    the members' links to that neighbourhood when it has at most ``_table``
    vertices (default and most 64; ``_edge_ranges_and_pairs``), else by binary searches
    in the members' rows (``_range_and_pairs``). ``_table`` is for tests.
    """
    return sweep_candidates(indptr, nbr, nlev, eid, u, v, lev, edge_lo, edge_hi, max_cliques, max_work,
                            _small=_small, _split=_split, _ranges=True, _table=_table, _local=_local)



# --------------------------------------------------------------------------
# level range of a candidate
# --------------------------------------------------------------------------
@numba.njit(nogil=True, cache=True)
def _narrow(indptr, nbr, nlev, c, xs, ms, src, dst, na):
    """Of the survivors ``xs[src:src + na]`` (ascending) keep those in the row of
    ``c``, lowering their running minimum level ``ms``; write them at ``dst`` and
    return how many are left. A merge, or binary searches when few survivors meet
    a long row."""
    q = np.int64(indptr[c])
    qe = np.int64(indptr[c + 1])
    nn = np.int64(0)
    if na * bit_length(qe - q) < na + qe - q:
        for t in range(na):
            x = xs[src + t]
            a = q
            b = qe
            while a < b:
                mid = (a + b) >> 1
                if nbr[mid] < x:
                    a = mid + 1
                else:
                    b = mid
            if a < qe and nbr[a] == x:
                xs[dst + nn] = x
                ms[dst + nn] = min(ms[src + t], nlev[a])
                nn += 1
                a += 1
            q = a
    else:
        t = np.int64(0)
        while t < na and q < qe:
            x = xs[src + t]
            y = nbr[q]
            if x == y:
                xs[dst + nn] = x
                ms[dst + nn] = min(ms[src + t], nlev[q])
                nn += 1
                t += 1
                q += 1
            elif x < y:
                t += 1
            else:
                q += 1
    return nn


@numba.njit(nogil=True, cache=True)
def _survivors_level(indptr, nbr, nlev, nodes, lo, hi, skip1, skip2, xs, ms, cap, na):
    """Narrow the survivors ``xs[:na]`` by the row of every member of
    ``nodes[lo:hi]`` other than ``skip1`` and ``skip2`` (whose rows made them);
    returns one more than the largest surviving minimum level (0: none survives).
    ``xs``/``ms`` hold two halves of ``cap`` entries, read one, write the other."""
    src = np.int64(0)
    dst = cap
    for i in range(lo, hi):
        if na == 0:
            break
        c = nodes[i]
        if c == skip1 or c == skip2:
            continue
        na = _narrow(indptr, nbr, nlev, c, xs, ms, src, dst, na)
        src, dst = dst, src
    m = np.int32(-1)
    for t in range(na):
        m = max(m, ms[src + t])
    return m + 1


@_leaf
def _pop_highest(xs, ms, na):
    """Take the survivor of highest bound out of ``xs[:na]``/``ms[:na]`` (the last
    one fills its place); returns ``(survivor, bound, na - 1)``."""
    j = np.int64(0)
    for t in range(1, na):
        if ms[t] > ms[j]:
            j = t
    x = xs[j]
    val = np.int64(ms[j])
    na -= 1
    xs[j] = xs[na]
    ms[j] = ms[na]
    return x, val, na


@_leaf
def _best_survivor(indptr, nbr, nlev, nodes, lo, hi, skip1, skip2, xs, ms, na):
    """One more than the largest ``min_c level(x, c)`` over the survivors ``xs[:na]``
    and the members ``c`` of ``nodes[lo:hi]`` other than ``skip1`` and ``skip2``
    (0 when no survivor is adjacent to all of them); ``ms`` starts as each
    survivor's bound from ``skip1`` and ``skip2``, and ``xs``/``ms`` are reordered.

    Branch and bound: survivors are tried from the highest bound down, and a
    survivor's member rows are searched only while it can still beat the best
    value found. The survivors of a sweep's clique are mostly adjacent to all
    members (at lower levels), so narrowing them all, as :func:`_survivors_level`
    does, merges every member's row; here the first one or two usually settle it.
    """
    best = np.int64(-1)
    while na > 0:
        x, val, na = _pop_highest(xs, ms, na)
        if val <= best:
            break  # no survivor left can beat it
        for i in range(lo, hi):
            c = nodes[i]
            if c == skip1 or c == skip2:
                continue
            q = find_edge(indptr, nbr, c, x)
            if q < 0:
                val = -1  # not adjacent to c
                break
            val = min(val, np.int64(nlev[q]))
            if val <= best:
                break
        best = max(best, val)
    return best + 1


@_leaf
def _pairs_from_links(eid, nodes, lo, hi, a, e, tix, posa, ai, av, posb, bi, bv, rowbits, rowof, linkpos, stride,
                      pairs, w):
    """The edge ids of the member pairs of clique ``nodes[lo:hi]``, listed from edge
    ``e = (a, b)``, written at ``pairs[w:]``; returns ``w`` + pairs written.

    ``tix[i]`` is member ``i``'s index in the edge's table (-1 for ``a`` and
    ``b``). For table index ``t``, the link to ``a`` is at CSR position
    ``posa[ai + t] + av``, the link to ``b`` at ``posb[bi + t] + bv``; ``r = rowof[t]``
    is its row, ``rowbits[r]`` the bitset of its links and ``linkpos[r * stride +
    u]`` the position of its link to index ``u`` (other entries are stale and
    never read). Both table paths of the sweep use it."""
    one = np.uint64(1)
    bad = False
    s = hi - lo
    for i in range(s - 1):
        ti = tix[i]
        if ti < 0:  # a or b: its pairs' positions are in posa or posb
            from_a = nodes[lo + i] == a
            for j in range(i + 1, s):
                tj = tix[j]
                if tj < 0:
                    pe = e
                elif from_a:
                    pe = eid[posa[ai + tj] + av]
                else:
                    pe = eid[posb[bi + tj] + bv]
                pairs[w] = pe
                w += 1
        else:
            r = rowof[ti]
            rr = r * stride
            row = rowbits[r]
            ea = eid[posa[ai + ti] + av]
            eb = eid[posb[bi + ti] + bv]
            for j in range(i + 1, s):
                tj = tix[j]
                if tj < 0:
                    pe = ea if nodes[lo + j] == a else eb
                else:
                    linked = ((row >> np.uint64(tj)) & one) != np.uint64(0)
                    bad |= not linked
                    pe = eid[linkpos[rr + tj] if linked else posa[ai + ti] + av]  # (a stale entry is never read)
                pairs[w] = pe
                w += 1
    if bad:
        raise ValueError("sweep: a listed clique has a member pair that is not an edge")
    return w


@_leaf
def _edge_ranges_and_pairs(indptr, nbr, nlev, eid, a, b, e, m, posA, posB, ptr, nodes, K0, K1, lmin,
                           pairs, w, xs, tix, tv, slot, adj, outA, outB, links):
    """``level_min`` and the member pairs' edge ids of cliques ``K0 .. K1 - 1``, all
    listed from edge ``e = (a, b)`` whose full common neighbourhood ``T`` is
    ``nbr[posA[:m]]`` with ``m <= 64``: the values of :func:`_range_and_pairs`, by
    table lookups.

    Every member other than ``a`` and ``b`` lies in ``T``, and so does every vertex
    that could extend a clique. So one merge of each such member's row with ``T``
    gives all it is asked about: ``adj[r]`` has bit ``t`` set when the member of
    table row ``r`` is linked to ``T[t]``, and ``links[r * m + t]`` is then the
    CSR position of that link (other entries are stale). ``tv`` holds ``T`` and
    ``slot[t]`` the table row of ``T[t]`` (the caller sets all to -1: none yet);
    a member met in several of the edge's cliques is merged once.

    The vertices that extend a clique are the bits common to its members' rows (a
    row never holds its own vertex, so the members drop out); each one's level is
    the smallest over its links to ``a``, ``b`` and the members, and ``level_min``
    is one more than the largest (0: none). Pairs with ``a`` or ``b`` read their
    positions off ``posA``/``posB``. Returns ``w`` + pairs written.

    Per clique, ``tix[i]`` is member ``i``'s place in ``T`` (-1 for ``a`` and
    ``b``), found by a branch-free binary search of the short sorted ``T``;
    ``outA`` holds the table rows of the members other than ``a`` and ``b``
    (``xs``/``outB`` take a merge's output).
    """
    one = np.uint64(1)
    everyone = np.uint64(0xFFFFFFFFFFFFFFFF) if m == 64 else (one << np.uint64(m)) - one
    nrow = np.int64(0)
    for k in range(K0, K1):
        lo = ptr[k]
        hi = ptr[k + 1]
        nr = np.int64(0)
        common = everyone
        for i in range(lo, hi):  # each member's place in T (a and b: -1), and its table row
            c = nodes[i]
            if c == a or c == b:
                tix[i - lo] = -1
                continue
            h = np.int64(0)
            n = m
            while n > 1:  # branch-free: the step count depends on m only
                half = n >> 1
                h = h + half if tv[h + half] <= c else h
                n -= half
            if m == 0 or tv[h] != c:
                raise ValueError("sweep: a listed clique has a member outside the common neighbourhood")
            tix[i - lo] = h
            r = slot[h]
            if r < 0:
                r = nrow
                slot[h] = r
                base = r * m
                nl = intersect_merge(nbr, np.int64(indptr[c]), np.int64(indptr[c + 1]), tv, _I0, m, xs, outB)
                bits = np.uint64(0)
                for t in range(nl):
                    links[base + outB[t]] = xs[t]
                    bits |= one << np.uint64(outB[t])
                adj[r] = bits
                nrow += 1
            outA[nr] = r
            common &= adj[r]
            nr += 1
        best = np.int64(-1)
        while common != np.uint64(0):  # the vertices adjacent to every member
            x = np.int64(ctz(common))
            common &= common - one
            val = np.int64(min(nlev[posA[x]], nlev[posB[x]]))
            for r in range(nr):
                if val <= best:
                    break
                val = min(val, np.int64(nlev[links[outA[r] * m + x]]))
            best = max(best, val)
        lmin[k] = best + 1
        w = _pairs_from_links(eid, nodes, lo, hi, a, e, tix, posA, _I0, _I0, posB, _I0, _I0, adj, slot, links, m,
                              pairs, w)
    return w


@_leaf
def _range_and_pairs(indptr, nbr, nlev, eid, a, b, e, m, posA, posB, ptr, nodes, k, xs, ms, tpos,
                     pairs, w):
    """``level_min`` and the member pairs' edge ids of clique ``k``, listed from edge
    ``e = (a, b)`` whose full common neighbourhood is ``nbr[posA[:m]]``.

    The same values as :func:`level_min` and
    :func:`cliquewise.kernels.incidence.pair_edges`, with less work: a vertex that
    extends the clique is a common neighbour of ``a`` and ``b``, so the survivors
    start as that neighbourhood less the members (with their levels to ``a`` and
    ``b`` already at hand) and only the other members' rows are searched, by
    :func:`_best_survivor`; the pairs
    with ``a`` or ``b`` read their edge ids off the same positions. Writes the pairs
    at ``pairs[w:]`` and returns ``(level_min, w + pairs written)``.
    """
    lo = ptr[k]
    hi = ptr[k + 1]
    na = np.int64(0)
    h = lo
    for t in range(m):  # both ascending: a merge
        x = nbr[posA[t]]
        while h < hi and nodes[h] < x:
            h += 1
        if h < hi and nodes[h] == x:
            tpos[h - lo] = t
            continue
        xs[na] = x
        ms[na] = min(nlev[posA[t]], nlev[posB[t]])
        na += 1
    lmin = _best_survivor(indptr, nbr, nlev, nodes, lo, hi, a, b, xs, ms, na)
    for i in range(lo, hi - 1):
        ci = nodes[i]
        qlo = np.int64(indptr[ci])  # the later members come in ascending order: search after the last
        qhi = np.int64(indptr[ci + 1])
        for j in range(i + 1, hi):
            cj = nodes[j]
            if ci == a or ci == b:
                if cj == a or cj == b:
                    pe = e
                else:
                    pe = eid[posA[tpos[j - lo]]] if ci == a else eid[posB[tpos[j - lo]]]
            elif cj == a or cj == b:
                pe = eid[posA[tpos[i - lo]]] if cj == a else eid[posB[tpos[i - lo]]]
            else:
                q = position_in(nbr, qlo, qhi, cj)  # in the rest of the row of ci
                if q < 0:
                    raise ValueError("sweep: a listed clique has a member pair that is not an edge")
                pe = eid[q]
                qlo = q + 1
            pairs[w] = pe
            w += 1
    return lmin, w


@numba.njit(nogil=True, cache=True)
def _level_min_kernel(indptr, nbr, nlev, ptr, nodes):
    K = ptr.shape[0] - 1
    out = np.empty(K, np.int32)
    cap = np.int64(64)
    # survivors x and their running min level; two halves, read one, write the other
    xs = np.empty(2 * cap, np.int64)
    ms = np.empty(2 * cap, np.int32)
    for k in range(K):
        prefetch_member_rows(indptr, nbr, nlev, ptr, nodes, k)
        lo = ptr[k]
        hi = ptr[k + 1]
        # the member of smallest degree
        i0 = lo
        d0 = indptr[nodes[lo] + 1] - indptr[nodes[lo]]
        for i in range(lo + 1, hi):
            d = indptr[nodes[i] + 1] - indptr[nodes[i]]
            if d < d0:
                i0 = i
                d0 = d
        if d0 == hi - lo - 1:
            out[k] = 0  # its neighbours are the other members: nothing extends C
            continue
        if d0 > cap:
            cap = 2 * d0
            xs = np.empty(2 * cap, np.int64)
            ms = np.empty(2 * cap, np.int32)
        # survivors: its row minus the members (both sorted)
        c0 = nodes[i0]
        na = np.int64(0)
        h = lo
        for q in range(indptr[c0], indptr[c0 + 1]):
            x = np.int64(nbr[q])
            while h < hi and nodes[h] < x:
                h += 1
            if h < hi and nodes[h] == x:
                continue
            xs[na] = x
            ms[na] = nlev[q]
            na += 1
        # keep those in the row of every other member, taking the min level
        out[k] = _survivors_level(indptr, nbr, nlev, nodes, lo, hi, np.int64(c0), np.int64(-1), xs, ms, cap, na)
    return out


def level_min(indptr, nbr, nlev, ptr, nodes):
    """Lowest level at which each candidate is still a maximal clique.

    A vertex ``x`` outside ``C`` adjacent to all of ``C`` extends ``C`` in ``G_t``
    for ``t <= min_c level(x, c)``. With ``m`` the largest such value over all
    ``x``, ``C`` is maximal exactly on levels ``m + 1 .. level_max``; the result is
    ``m + 1``, or 0 when no ``x`` exists.

    Parameters
    ----------
    indptr, nbr, nlev : ndarray
        CSR from :func:`cliquewise.kernels.graph.csr_from_edges`.
    ptr, nodes : ndarray of int64
        Cliques of the graph, members ascending (as listed by the sweep).

    Returns
    -------
    ndarray of int32, shape (K,)

    Notes
    -----
    Per clique: the surviving ``x`` start as the row of the member of smallest
    degree less the members; the row of each other member in turn keeps those it
    holds (a merge, or binary searches when few are left in a long row) and
    lowers their running minimum level; the clique is done when none is left.
    A member whose only neighbours are the other members ends it at once. The
    rows of the cliques a few places ahead are prefetched, as these rows lie at
    random places in memory.
    """
    return _level_min_kernel(np.asarray(indptr, np.int64), nbr,
                             np.ascontiguousarray(nlev, np.int32),
                             np.asarray(ptr, np.int64), np.asarray(nodes, np.int64))


@numba.njit(nogil=True, cache=True)
def _level_max_kernel(indptr, nbr, nlev, ptr, nodes):
    K = ptr.shape[0] - 1
    out = np.empty(K, np.int32)
    for k in range(K):
        mn = np.int32(2**31 - 1)
        for i in range(ptr[k], ptr[k + 1]):
            for j in range(i + 1, ptr[k + 1]):
                pos = find_edge(indptr, nbr, nodes[i], nodes[j])
                if pos < 0:
                    mn = -1
                    break
                if nlev[pos] < mn:
                    mn = nlev[pos]
            if mn < 0:
                break
        out[k] = mn
    return out


def level_max_of(indptr, nbr, nlev, ptr, nodes):
    """Smallest internal edge level of each candidate (-1 if it is not a clique)."""
    return _level_max_kernel(np.asarray(indptr, np.int64), nbr,
                             np.ascontiguousarray(nlev, np.int32),
                             np.asarray(ptr, np.int64), np.asarray(nodes, np.int64))


def level_min_reference(u, v, lev, ptr, nodes):
    """Slow twin of :func:`level_min`: every outside vertex checked in plain Python.

    For each clique ``C``, ``x`` extends it down to level ``min_c lev(x, c)`` when
    ``x`` is adjacent to every member; the result is one more than the largest
    such level, 0 when no ``x`` is adjacent to all of ``C``.
    """
    adj = {}
    for a, b, t in zip(np.asarray(u).tolist(), np.asarray(v).tolist(),
                       np.asarray(lev).tolist()):
        adj.setdefault(a, {})[b] = t
        adj.setdefault(b, {})[a] = t
    out = np.empty(len(ptr) - 1, np.int32)
    for k in range(len(ptr) - 1):
        members = [int(c) for c in nodes[ptr[k]:ptr[k + 1]]]
        # the vertices adjacent to every member, members excluded
        common = set.intersection(*(set(adj.get(c, ())) for c in members))
        best = -1
        for x in common - set(members):
            best = max(best, min(adj[x][c] for c in members))
        out[k] = best + 1
    return out


def candidates_reference(n, u, v, lev):
    """Slow twin of the whole candidate listing, on networkx.

    For every level ``l`` from 0 to ``max(lev)``, run ``networkx.find_cliques`` on
    the threshold graph (edges with ``lev >= l``) and record the levels at which
    each vertex set (size >= 2) is a maximal clique.

    Returns
    -------
    dict
        ``frozenset(nodes) -> (lowest level, highest level)`` at which it is maximal.
    """
    u = np.asarray(u).tolist()
    v = np.asarray(v).tolist()
    lev = np.asarray(lev).tolist()
    out = {}
    top = max(lev) if lev else -1
    for l in range(top + 1):
        g = nx.Graph()
        g.add_edges_from((a, b) for a, b, t in zip(u, v, lev) if t >= l)
        for c in nx.find_cliques(g):
            if len(c) < 2:
                continue
            key = frozenset(c)
            if key in out:
                lo, hi = out[key]
                out[key] = (min(lo, l), max(hi, l))
            else:
                out[key] = (l, l)
    return out
