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
``level_min`` / ``level_max_of``
    The lowest level at which a listed clique is still maximal, and its smallest
    internal edge level (a check on ``level_max``).
``*_reference``
    Slow twins on networkx, used by the tests.

The local search
----------------
A sub-problem (one vertex for ``maximal_cliques``, one edge for the sweep) is a
universe of vertices: the candidates ``P`` (local ids ``0..p-1``, ascending node
id) and the excluded ``X`` (local ids after them). Adjacency is held as bitsets.

* Universes of at most 64 vertices (almost all of them on sparse graphs) use one
  machine word per set.
* Larger ones use multi-word sets over ``P`` for every vertex and over ``X`` for
  ``P`` vertices only (``X``-``X`` pairs are never needed); ``X`` vertices with no
  ``P`` neighbour are dropped, as they cannot block a clique holding a ``P`` vertex.
  Memory is ``O(|P| (|P| + |X|) / 64)`` words.
* In the sweep, common neighbourhoods above 1024 vertices are first split by a
  degeneracy order of ``G_l[S]``, as ``maximal_cliques`` splits a whole graph, so
  ``|P|`` stays below the degeneracy of ``G_l[S]``.

The search is iterative (explicit stack). Uniqueness in the sweep uses "move to
X": a common neighbour ``x`` with ``(a, x)`` or ``(b, x)`` of level ``l`` and a
smaller edge index than ``e`` starts in ``X``; and when branching on ``w``, every
``y`` with ``(w, y)`` of level ``l`` and a smaller index goes to the child's ``X``
rather than its ``P``. Cliques holding such a pair are then never produced from
``e``, while ``X`` still blocks non-maximal ones; no post-filter is needed.

Work count (the blow-up guard)
------------------------------
``work`` counts 64-bit word operations of the set algebra (pivot scoring, child
sets), neighbour-list entries visited when building sub-problems, and node ids
written. It follows run time within a small factor: about 5e7 units take a
second on one core (measured on sparse planted-clique graphs and on the dense
cocktail-party graph alike).

Implementation note
-------------------
The per-edge code (``_solve_small``, ``_bk_run``, ``_put`` and the row
intersections of :mod:`cliquewise.kernels.graph`) never allocates, so it can be compiled without numba's reference counting, whose atomic
updates on every array argument would otherwise cost more than the work. When
the output buffers are full it reports status 3; the driver then rolls the unit
(edge or vertex) back, doubles the buffers and redoes it.
"""

import networkx as nx
import numba
import numpy as np
from llvmlite import ir
from numba.core import cgutils, types
from numba.extending import intrinsic

from cliquewise.kernels.graph import bit_length, find_edge, intersect_merge
from cliquewise.kernels.graph import intersect_sorted as _isect

__all__ = [
    "degeneracy_order",
    "degeneracy_order_reference",
    "maximal_cliques",
    "maximal_cliques_reference",
    "sweep_candidates",
    "candidates_reference",
    "level_min",
    "level_max_of",
    "NO_LIMIT",
]

NO_LIMIT = np.int64(2**62)

_ONE = np.uint64(1)
_ZERO = np.uint64(0)
_ALL = np.uint64(0xFFFFFFFFFFFFFFFF)

# Scalars passed to other kernels are typed int64 on purpose (np.int64 constants,
# counters started at np.int64(0)): a bare literal makes numba compile an extra
# specialisation of the callee for that literal value.
_I0 = np.int64(0)
_I1 = np.int64(1)
_I2 = np.int64(2)
_I3 = np.int64(3)

_SMALL = 64  # universes up to this size use one-word bitsets
_SPLIT = 1024  # common neighbourhoods above this size are split by degeneracy

# status codes kept in cnt[3]; cnt = [n_cliques, n_nodes, work, status]
_OK = 0
_TOO_MANY = 1
_TOO_MUCH_WORK = 2
_FULL = 3  # internal: output buffers full, the driver grows them and redoes the unit


# Per-edge kernels never allocate, and are compiled without numba's reference
# counting (``_nrt=False``): otherwise every call pays atomic reference-count
# updates on its array arguments, which costs more than the work itself here.
_leaf = numba.njit(nogil=True, cache=True, _nrt=False)


# --------------------------------------------------------------------------
# bit helpers (LLVM intrinsics: one instruction on current CPUs)
# --------------------------------------------------------------------------
@intrinsic
def _popc(typingctx, x):
    sig = types.uint64(types.uint64)

    def codegen(context, builder, signature, args):
        fnty = ir.FunctionType(ir.IntType(64), [ir.IntType(64)])
        fn = cgutils.get_or_insert_function(builder.module, fnty, "llvm.ctpop.i64")
        return builder.call(fn, args)

    return sig, codegen


@intrinsic
def _ctz(typingctx, x):
    sig = types.uint64(types.uint64)

    def codegen(context, builder, signature, args):
        fnty = ir.FunctionType(ir.IntType(64), [ir.IntType(64), ir.IntType(1)])
        fn = cgutils.get_or_insert_function(builder.module, fnty, "llvm.cttz.i64")
        return builder.call(fn, [args[0], ir.Constant(ir.IntType(1), 0)])

    return sig, codegen


@_leaf
def _bit(j):
    return _ONE << np.uint64(j & 63)


# --------------------------------------------------------------------------
# output buffers
# --------------------------------------------------------------------------
@_leaf
def _put(ptr, nodes, cnt, buf, k, max_cliques):
    """Append ``buf[:k]`` as one clique, or set status 1 (budget) or 3 (full)."""
    K = cnt[0]
    if K >= max_cliques:
        cnt[3] = _TOO_MANY
        return
    NN = cnt[1]
    if K + 2 > ptr.shape[0] or NN + k > nodes.shape[0]:
        cnt[3] = _FULL
        return
    for i in range(k):
        nodes[NN + i] = buf[i]
    ptr[K + 1] = NN + k
    cnt[0] = K + 1
    cnt[1] = NN + k
    cnt[2] += k


@numba.njit(nogil=True, cache=True)
def _grown(arr, keep):
    """A copy of ``arr`` with twice the room, holding its first ``keep`` items."""
    out = np.empty(2 * arr.shape[0] + 64, arr.dtype)
    out[:keep] = arr[:keep]
    return out


# --------------------------------------------------------------------------
# degeneracy order
# --------------------------------------------------------------------------
@numba.njit(nogil=True, cache=True)
def _degeneracy_kernel(indptr, nbr):
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
    return _degeneracy_kernel(np.asarray(indptr, np.int64), nbr)


def degeneracy_order_reference(n, u, v):
    """Core numbers from ``networkx.core_number`` (slow twin of the ``core`` output)."""
    g = nx.Graph()
    g.add_nodes_from(range(n))
    g.add_edges_from(zip(np.asarray(u).tolist(), np.asarray(v).tolist()))
    cn = nx.core_number(g)
    return np.array([cn[x] for x in range(n)], np.int64)


# --------------------------------------------------------------------------
# one sub-problem
#
# The universe is the sorted array ``U[ulo:uhi]`` of CSR row ids; ``lidx`` gives
# each slot its local id (``0..p-1`` for P, ascending; ``p..`` for X). ``Prow[i]``
# is the CSR row of candidate ``i`` and ``Pglob[i]`` its node id in the output
# (they differ only inside the large-neighbourhood split). With ``levelled != 0``
# only entries of level ``>= l`` count, and P-P pairs of level ``l`` with edge id
# ``< ecut`` are "early" (never both in one listed clique). Cliques are written as
# ``pre[:npre] + Pglob[R]``, sorted.
# --------------------------------------------------------------------------
@_leaf
def _emit(ptr, nodes, cnt, pre, npre, Pglob, rbits, rlo, nwords, cbuf, max_cliques):
    """Append ``pre + Pglob[R]``, R being the bitset ``rbits[rlo:rlo + nwords]``."""
    k = np.int64(0)
    h = 0
    for wi in range(nwords):
        bits = rbits[rlo + wi]
        while bits != _ZERO:
            t = np.int64(_ctz(bits))
            bits &= bits - _ONE
            g = Pglob[wi * 64 + t]
            while h < npre and pre[h] < g:
                cbuf[k] = pre[h]
                k += 1
                h += 1
            cbuf[k] = g
            k += 1
    while h < npre:
        cbuf[k] = pre[h]
        k += 1
        h += 1
    _put(ptr, nodes, cnt, cbuf, k, max_cliques)


# one-word scratch ``sm``: adjacency rows, early rows, stacks of P, X, branch sets
_SM_EARLY = 64
_SM_P = 128
_SM_X = _SM_P + 66
_SM_T = _SM_X + 66
_SM_R = _SM_T + 66
_SM_SIZE = _SM_R + 67


@_leaf
def _solve_small(indptr, nbr, nlev, eid, levelled, l, ecut, U, ulo, uhi, lidx,
                 Prow, Pglob, p, pre, npre, sm, inv, cbuf, posA, posB,
                 ptr, nodes, cnt, max_cliques, max_work):
    """Sub-problem with at most 64 universe vertices and ``p >= 1``: one word per set.

    Row ``i`` of P links ``i`` to every later local id ``j > i`` it is adjacent
    to, by binary searches of those few ids in the CSR row, or by one merge of
    the row with the universe when the row is short.
    """
    s = uhi - ulo
    work = np.int64(0)
    for i in range(s):
        sm[i] = _ZERO
        inv[lidx[i]] = i
    for i in range(p):
        sm[_SM_EARLY + i] = _ZERO
    for i in range(p):
        x = Prow[i]
        lo = np.int64(indptr[x])
        hi = np.int64(indptr[x + 1])
        bi = _ONE << np.uint64(i)
        nj = s - 1 - i
        g = nj * bit_length(hi - lo)
        use_search = g < hi - lo + s
        if use_search:
            m = nj
            work += g
        else:
            m = intersect_merge(nbr, lo, hi, U, ulo, uhi, posA, posB)
            work += hi - lo + s
        for t in range(m):
            if use_search:
                j = i + 1 + t
                y = U[ulo + inv[j]]
                ia = lo
                ib = hi
                while ia < ib:
                    mid = (ia + ib) >> 1
                    if nbr[mid] < y:
                        ia = mid + 1
                    else:
                        ib = mid
                if ia == hi or nbr[ia] != y:
                    continue
                pa = ia
            else:
                j = lidx[posB[t] - ulo]
                if j <= i:
                    continue
                pa = posA[t]
            if levelled != 0 and nlev[pa] < l:
                continue
            bj = _ONE << np.uint64(j)
            sm[i] |= bj
            sm[j] |= bi
            if j < p and levelled != 0 and nlev[pa] == l and eid[pa] < ecut:
                sm[_SM_EARLY + i] |= bj
                sm[_SM_EARLY + j] |= bi
    pall = _ALL if p == 64 else (_ONE << np.uint64(p)) - _ONE
    uall = _ALL if s == 64 else (_ONE << np.uint64(s)) - _ONE
    sm[_SM_P] = pall
    sm[_SM_X] = uall & ~pall
    sm[_SM_R] = _ZERO
    d = 0
    fresh = True  # frame d still needs its pivot
    while d >= 0:
        if fresh:
            fresh = False
            P = sm[_SM_P + d]
            X = sm[_SM_X + d]
            npc = _popc(P)
            bits = P | X
            work += np.int64(_popc(bits)) + 1
            best = _ZERO
            brow = _ZERO
            prune = False
            first = True
            while bits != _ZERO:
                t = _ctz(bits)
                bits &= bits - _ONE
                row = sm[np.int64(t)]
                c = _popc(P & row)
                if c == npc and ((X >> t) & _ONE) != _ZERO:
                    prune = True  # an X vertex sees all of P: nothing maximal here
                    break
                if first or c > best:
                    best = c
                    brow = row
                    first = False
            if prune:
                d -= 1
                continue
            sm[_SM_T + d] = P & ~brow
        T = sm[_SM_T + d]
        if T == _ZERO:
            d -= 1
            continue
        t = _ctz(T)
        sm[_SM_T + d] = T & (T - _ONE)
        b = _ONE << t
        w = np.int64(t)
        P = sm[_SM_P + d]
        X = sm[_SM_X + d]
        row = sm[w]
        nP = P & row
        nX = X & row
        if levelled != 0:
            e = sm[_SM_EARLY + w]
            nX |= nP & e
            nP &= ~e
        sm[_SM_P + d] = P & ~b
        sm[_SM_X + d] = X | b
        nR = sm[_SM_R + d] | b
        work += 2
        if nP == _ZERO:
            if nX == _ZERO:
                sm[_SM_R + 66] = nR
                _emit(ptr, nodes, cnt, pre, npre, Pglob, sm, np.int64(_SM_R + 66), _I1,
                      cbuf, max_cliques)
                if cnt[3] != _OK:
                    break
        else:
            d += 1
            sm[_SM_P + d] = nP
            sm[_SM_X + d] = nX
            sm[_SM_R + d] = nR
            fresh = True
        if cnt[2] + work > max_work:
            cnt[3] = _TOO_MUCH_WORK
            break
    cnt[2] += work


@_leaf
def _choose_pivot(d, Wp, Wx, adjPP, adjXP, stP, stXP, stXX, stT, stC):
    """Tomita pivot for frame ``d``: ``u`` in ``P + X`` maximising ``|P & N(u)|``.

    Writes the branch set ``P - N(u)`` to ``stT``. Returns ``(has_branches, work)``;
    no branches when an ``X`` vertex is adjacent to all of ``P``.
    """
    base = d * Wp
    npc = 0
    for k in range(Wp):
        npc += np.int64(_popc(stP[base + k]))
    best = -1
    best_row = 0
    best_in_xx = False  # the pivot's row lives in adjXP (else in adjPP)
    nvis = 0
    # P and the X vertices that came from P share the P index space
    for wi in range(Wp):
        inP = stP[base + wi]
        bits = inP | stXP[base + wi]
        while bits != _ZERO:
            t = np.int64(_ctz(bits))
            bits &= bits - _ONE
            row = (wi * 64 + t) * Wp
            c = 0
            for k in range(Wp):
                c += np.int64(_popc(stP[base + k] & adjPP[row + k]))
            nvis += 1
            if c == npc and ((inP >> np.uint64(t)) & _ONE) == _ZERO:
                return False, nvis * Wp
            if c > best:
                best = c
                best_row = row
    xb = d * Wx
    for wi in range(Wx):
        bits = stXX[xb + wi]
        while bits != _ZERO:
            t = np.int64(_ctz(bits))
            bits &= bits - _ONE
            row = (wi * 64 + t) * Wp
            c = 0
            for k in range(Wp):
                c += np.int64(_popc(stP[base + k] & adjXP[row + k]))
            nvis += 1
            if c == npc:
                return False, nvis * Wp
            if c > best:
                best = c
                best_row = row
                best_in_xx = True
    if best_in_xx:
        for k in range(Wp):
            stT[base + k] = stP[base + k] & ~adjXP[best_row + k]
    else:
        for k in range(Wp):
            stT[base + k] = stP[base + k] & ~adjPP[best_row + k]
    stC[d] = 0
    return True, nvis * Wp + Wp


@_leaf
def _bk_run(p, q, Wp, Wx, adjPP, adjPX, adjXP, earlyP, levelled, Pglob, pre, npre,
            stP, stXP, stXX, stT, stC, stR, cbuf, ptr, nodes, cnt,
            max_cliques, max_work):
    """Iterative Bron-Kerbosch with pivoting on a multi-word sub-problem.

    Sets over P take ``Wp`` words, sets over the compacted X take ``Wx``; frame
    ``d`` of a stack starts at ``d * Wp`` (or ``d * Wx``). ``stR`` holds the
    current clique as a P bitset per frame.
    """
    for k in range(Wp):
        stP[k] = _ALL
        stXP[k] = _ZERO
        stR[k] = _ZERO
    if p & 63:
        stP[Wp - 1] = (_ONE << np.uint64(p & 63)) - _ONE
    for k in range(Wx):
        stXX[k] = _ALL
    if q & 63:
        stXX[Wx - 1] = (_ONE << np.uint64(q & 63)) - _ONE
    ok, wk = _choose_pivot(_I0, Wp, Wx, adjPP, adjXP, stP, stXP, stXX, stT, stC)
    cnt[2] += wk
    if not ok:
        return
    d = np.int64(0)
    while d >= 0:
        base = d * Wp
        c = stC[d]
        while c < Wp and stT[base + c] == _ZERO:
            c += 1
        if c == Wp:
            d -= 1
            continue
        stC[d] = c
        word = stT[base + c]
        t = _ctz(word)
        stT[base + c] = word & (word - _ONE)
        w = c * 64 + np.int64(t)
        b = _ONE << t
        # child sets (frame d + 1)
        nb = base + Wp
        rw = w * Wp
        anyP = _ZERO
        anyX = _ZERO
        for k in range(Wp):
            pk = stP[base + k] & adjPP[rw + k]
            xk = stXP[base + k] & adjPP[rw + k]
            if levelled != 0:
                ek = earlyP[rw + k]
                xk |= pk & ek
                pk &= ~ek
            stP[nb + k] = pk
            stXP[nb + k] = xk
            stR[nb + k] = stR[base + k]
            anyP |= pk
            anyX |= xk
        stR[nb + c] |= b
        xb = d * Wx
        rx = w * Wx
        for k in range(Wx):
            xk = stXX[xb + k] & adjPX[rx + k]
            stXX[xb + Wx + k] = xk
            anyX |= xk
        # w leaves P for X in the current frame
        stP[base + c] &= ~b
        stXP[base + c] |= b
        cnt[2] += 3 * Wp + Wx
        if anyP == _ZERO:
            if anyX == _ZERO:
                _emit(ptr, nodes, cnt, pre, npre, Pglob, stR, nb, Wp, cbuf, max_cliques)
                if cnt[3] != _OK:
                    return
        else:
            d += 1
            ok, wk = _choose_pivot(d, Wp, Wx, adjPP, adjXP, stP, stXP, stXX, stT, stC)
            cnt[2] += wk
            if not ok:
                d -= 1
        if cnt[2] > max_work:
            cnt[3] = _TOO_MUCH_WORK
            return


@numba.njit(nogil=True, cache=True)
def _solve_general(indptr, nbr, nlev, eid, levelled, l, ecut, U, ulo, uhi, lidx,
                   Prow, Pglob, p, q, pre, npre, ptr, nodes, cnt, max_cliques,
                   max_work):
    """Sub-problem of any size (``p >= 1``): multi-word bitsets, X compacted."""
    s = uhi - ulo
    Wp = (p + 63) >> 6
    adjPP = np.zeros(p * Wp, np.uint64)
    earlyP = np.zeros(p * Wp if levelled != 0 else 0, np.uint64)
    posA = np.empty(s, np.int64)
    posB = np.empty(s, np.int64)
    xnew = np.zeros(q, np.int64)
    pair_i = np.empty(64, np.int64)
    pair_j = np.empty(64, np.int64)
    # scan the rows of P against the universe: P-P bits now, P-X pairs listed
    npairs = np.int64(0)
    for i in range(p):
        x = Prow[i]
        m, wk = _isect(nbr, np.int64(indptr[x]), np.int64(indptr[x + 1]), U, ulo, uhi,
                       posA, posB)
        cnt[2] += wk
        row = i * Wp
        for t in range(m):
            pa = posA[t]
            if levelled != 0 and nlev[pa] < l:
                continue
            j = lidx[posB[t] - ulo]
            if j < p:
                adjPP[row + (j >> 6)] |= _bit(j)
                if levelled != 0 and nlev[pa] == l and eid[pa] < ecut:
                    earlyP[row + (j >> 6)] |= _bit(j)
            else:
                if npairs == pair_i.shape[0]:
                    pair_i = _grown(pair_i, npairs)
                    pair_j = _grown(pair_j, npairs)
                pair_i[npairs] = i
                pair_j[npairs] = j - p
                xnew[j - p] = 1
                npairs += 1
    # keep only X vertices with a P neighbour; xnew becomes their compacted index
    q2 = np.int64(0)
    for j in range(q):
        if xnew[j] != 0:
            xnew[j] = q2
            q2 += 1
    Wx = (q2 + 63) >> 6
    adjPX = np.zeros(p * Wx, np.uint64)
    adjXP = np.zeros(q2 * Wp, np.uint64)
    for h in range(npairs):
        i = pair_i[h]
        j = xnew[pair_j[h]]
        adjPX[i * Wx + (j >> 6)] |= _bit(j)
        adjXP[j * Wp + (i >> 6)] |= _bit(i)
    cap = p + 1  # a clique inside P has at most p vertices: frames 0..p
    stP = np.empty(cap * Wp, np.uint64)
    stXP = np.empty(cap * Wp, np.uint64)
    stT = np.empty(cap * Wp, np.uint64)
    stR = np.empty(cap * Wp, np.uint64)
    stXX = np.empty(cap * Wx, np.uint64)
    stC = np.empty(cap, np.int64)
    cbuf = np.empty(p + npre, np.int64)
    _bk_run(p, q2, Wp, Wx, adjPP, adjPX, adjXP, earlyP, levelled, Pglob, pre, npre,
            stP, stXP, stXX, stT, stC, stR, cbuf, ptr, nodes, cnt, max_cliques,
            max_work)


# --------------------------------------------------------------------------
# all maximal cliques of one graph
# --------------------------------------------------------------------------
@numba.njit(nogil=True, cache=True)
def _maximal_cliques_kernel(indptr, nbr, small_max):
    n = indptr.shape[0] - 1
    order, core = _degeneracy_kernel(indptr, nbr)
    rank = np.empty(n, np.int64)
    for i in range(n):
        rank[order[i]] = i
    maxdeg = 0
    for x in range(n):
        maxdeg = max(maxdeg, indptr[x + 1] - indptr[x])
    sm = np.empty(_SM_SIZE, np.uint64)
    inv = np.empty(_SMALL, np.int64)
    cbuf = np.empty(_SMALL + 1, np.int64)
    posA = np.empty(_SMALL, np.int64)
    posB = np.empty(_SMALL, np.int64)
    lidx = np.empty(maxdeg, np.int64)
    Pglob = np.empty(maxdeg, np.int64)
    ptr = np.zeros(1024, np.int64)
    nodes = np.empty(4096, np.int64)
    cnt = np.zeros(4, np.int64)
    pre = np.empty(1, np.int64)
    no_lev = np.empty(0, np.int32)
    no_eid = np.empty(0, np.int64)
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
            _solve_small(indptr, nbr, no_lev, no_eid, _I0, _I0, _I0, nbr, lo, hi, lidx,
                         Pglob, Pglob, p, pre, _I1, sm, inv, cbuf, posA, posB, ptr,
                         nodes,
                         cnt, NO_LIMIT, NO_LIMIT)
        else:
            _solve_general(indptr, nbr, no_lev, no_eid, _I0, _I0, _I0, nbr, lo, hi,
                           lidx, Pglob, Pglob, p, s - p, pre, _I1, ptr, nodes, cnt,
                           NO_LIMIT, NO_LIMIT)
        if cnt[3] == _FULL:
            cnt[0] = K0
            cnt[1] = N0
            cnt[2] = W0
            cnt[3] = _OK
            ptr = _grown(ptr, K0 + 1)
            nodes = _grown(nodes, N0)
            continue  # redo x
        x += 1
    K = cnt[0]
    return ptr[: K + 1].copy(), nodes[: cnt[1]].copy()


def maximal_cliques(indptr, nbr, *, _small=_SMALL):
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
    if not 0 <= _small <= _SMALL:
        raise ValueError("_small must lie in [0, 64]")
    return _maximal_cliques_kernel(np.asarray(indptr, np.int64), nbr, np.int64(_small))


def maximal_cliques_reference(n, u, v):
    """Slow twin: ``networkx.find_cliques`` (size >= 2) as a set of frozensets."""
    g = nx.Graph()
    g.add_nodes_from(range(n))
    g.add_edges_from(zip(np.asarray(u).tolist(), np.asarray(v).tolist()))
    return {frozenset(c) for c in nx.find_cliques(g) if len(c) >= 2}


# --------------------------------------------------------------------------
# the level sweep
# --------------------------------------------------------------------------
@numba.njit(nogil=True, cache=True)
def _solve_split(indptr, nbr, nlev, eid, l, e, S, ex, s, a, b, sm, inv, cbuf, posA,
                 posB, ptr, nodes, cnt, max_cliques, max_work, small_max):
    """Edge sub-problem with a large common neighbourhood ``S[:s]``.

    Builds ``H = G_l[S]`` as a local CSR (levels and edge ids kept), orders it by
    degeneracy and solves one sub-problem per non-excluded ``w`` of ``S``: the
    candidates are the later, non-excluded, non-early neighbours of ``w`` in ``H``,
    the rest of its neighbours are excluded, and the prefix is ``{a, b, w}``. Each
    wanted clique is found from its first vertex in that order.
    """
    hptr = np.zeros(s + 1, np.int64)
    cap = 4 * s
    hnbr = np.empty(cap, nbr.dtype)
    hlev = np.empty(cap, np.int32)
    heid = np.empty(cap, np.int64)
    pa_buf = np.empty(s, np.int64)
    pb_buf = np.empty(s, np.int64)
    nh = 0
    for i in range(s):
        x = S[i]
        m, wk = _isect(nbr, np.int64(indptr[x]), np.int64(indptr[x + 1]), S, _I0, s,
                       pa_buf, pb_buf)
        cnt[2] += wk
        if nh + m > cap:
            cap = max(nh + m, 2 * cap)
            t1 = np.empty(cap, nbr.dtype)
            t1[:nh] = hnbr[:nh]
            hnbr = t1
            t2 = np.empty(cap, np.int32)
            t2[:nh] = hlev[:nh]
            hlev = t2
            t3 = np.empty(cap, np.int64)
            t3[:nh] = heid[:nh]
            heid = t3
        for t in range(m):
            pa = pa_buf[t]
            if nlev[pa] < l:
                continue
            hnbr[nh] = pb_buf[t]
            hlev[nh] = nlev[pa]
            heid[nh] = eid[pa]
            nh += 1
        hptr[i + 1] = nh
    order, core = _degeneracy_kernel(hptr, hnbr)
    rank = np.empty(s, np.int64)
    for i in range(s):
        rank[order[i]] = i
    maxdeg = 0
    for i in range(s):
        maxdeg = max(maxdeg, hptr[i + 1] - hptr[i])
    lidx = np.empty(maxdeg, np.int64)
    Prow = np.empty(maxdeg, np.int64)
    Pglob = np.empty(maxdeg, np.int64)
    pre = np.empty(3, np.int64)
    for w in range(s):
        if ex[w]:
            continue
        lo = hptr[w]
        hi = hptr[w + 1]
        g = S[w]
        # prefix {a, b, g} sorted (a < b)
        if g < a:
            pre[0] = g
            pre[1] = a
            pre[2] = b
        elif g < b:
            pre[0] = a
            pre[1] = g
            pre[2] = b
        else:
            pre[0] = a
            pre[1] = b
            pre[2] = g
        p = np.int64(0)
        for k in range(lo, hi):
            y = hnbr[k]
            if rank[y] > rank[w] and not ex[y] and not (hlev[k] == l and heid[k] < e):
                lidx[k - lo] = p
                Prow[p] = y
                Pglob[p] = S[y]
                p += 1
            else:
                lidx[k - lo] = -1
        if p == 0:
            if hi == lo:  # w has no neighbour in H: {a, b, w} is maximal
                _put(ptr, nodes, cnt, pre, _I3, max_cliques)
        else:
            ix = p
            for k in range(lo, hi):
                if lidx[k - lo] < 0:
                    lidx[k - lo] = ix
                    ix += 1
            if hi - lo <= small_max:
                _solve_small(hptr, hnbr, hlev, heid, _I1, l, e, hnbr, lo, hi, lidx,
                             Prow, Pglob, p, pre, _I3, sm, inv, cbuf, posA, posB,
                             ptr,
                             nodes, cnt, max_cliques, max_work)
            else:
                _solve_general(hptr, hnbr, hlev, heid, _I1, l, e, hnbr, lo, hi, lidx,
                               Prow, Pglob, p, hi - lo - p, pre, _I3, ptr, nodes, cnt,
                               max_cliques, max_work)
        if cnt[3] != _OK:
            return
        if cnt[2] > max_work:
            cnt[3] = _TOO_MUCH_WORK
            return


@numba.njit(nogil=True, cache=True)
def _sweep_kernel(indptr, nbr, nlev, eid, u, v, lev, edge_lo, edge_hi,
                  max_cliques, max_work, small_max, split_at):
    sm = np.empty(_SM_SIZE, np.uint64)
    inv = np.empty(_SMALL, np.int64)
    cbuf = np.empty(_SMALL + 3, np.int64)
    sposA = np.empty(_SMALL, np.int64)
    sposB = np.empty(_SMALL, np.int64)
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
    e = edge_lo
    while e < edge_hi:
        a = u[e]
        b = v[e]
        l = np.int64(lev[e])
        alo = indptr[a]
        ahi = indptr[a + 1]
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
            _put(ptr, nodes, cnt, pre, _I2, max_cliques)
        elif p > 0 and s > split_at:
            _solve_split(indptr, nbr, nlev, eid, l, e, S, ex, s, a, b, sm, inv, cbuf,
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
                _solve_small(indptr, nbr, nlev, eid, _I1, l, e, S, _I0, s, lidx, Pglob,
                             Pglob, p, pre, _I2, sm, inv, cbuf, sposA, sposB, ptr,
                             nodes,
                             cnt, max_cliques, max_work)
            else:
                _solve_general(indptr, nbr, nlev, eid, _I1, l, e, S, _I0, s, lidx,
                               Pglob, Pglob, p, s - p, pre, _I2, ptr, nodes, cnt,
                               max_cliques, max_work)
        if cnt[3] == _FULL:
            cnt[0] = K0
            cnt[1] = N0
            cnt[2] = W0
            cnt[3] = _OK
            ptr = _grown(ptr, K0 + 1)
            nodes = _grown(nodes, N0)
            continue  # redo edge e with room to spare
        K1 = cnt[0]
        if K1 > K0:
            while lvl.shape[0] < K1:
                lvl = _grown(lvl, K0)
            for k in range(K0, K1):
                lvl[k] = l
        if cnt[3] != _OK:
            break
        if cnt[2] > max_work:
            cnt[3] = _TOO_MUCH_WORK
            break
        e += 1
    K = cnt[0]
    return (ptr[: K + 1].copy(), nodes[: cnt[1]].copy(), lvl[:K].copy(),
            np.int64(cnt[3]), np.int64(cnt[2]))


def sweep_candidates(indptr, nbr, nlev, eid, u, v, lev, edge_lo=0, edge_hi=None,
                     max_cliques=None, max_work=None, *, _small=_SMALL, _split=_SPLIT):
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
    degeneracy order. The two private knobs let tests drive every path on small
    graphs.
    """
    if not 0 <= _small <= _SMALL:
        raise ValueError("_small must lie in [0, 64]")
    u = np.ascontiguousarray(u, np.int64)
    v = np.ascontiguousarray(v, np.int64)
    lev = np.ascontiguousarray(lev, np.int32)
    nlev = np.ascontiguousarray(nlev, np.int32)
    eid = np.ascontiguousarray(eid, np.int64)
    if not (u.shape == v.shape == lev.shape
            and nlev.shape == nbr.shape == eid.shape):
        raise ValueError("u, v, lev (and nbr, nlev, eid) must have matching lengths")
    if edge_hi is None:
        edge_hi = u.shape[0]
    if not 0 <= edge_lo <= edge_hi <= u.shape[0]:
        raise ValueError("edge block out of range")
    mc = NO_LIMIT if max_cliques is None else np.int64(max_cliques)
    mw = NO_LIMIT if max_work is None else np.int64(max_work)
    ptr, nodes, lvl, status, work = _sweep_kernel(
        np.asarray(indptr, np.int64), nbr, nlev, eid, u, v, lev,
        np.int64(edge_lo), np.int64(edge_hi), mc, mw, np.int64(_small),
        np.int64(_split))
    return ptr, nodes, lvl, int(status), int(work)


# --------------------------------------------------------------------------
# level range of a candidate
# --------------------------------------------------------------------------
@numba.njit(nogil=True, cache=True)
def _level_min_kernel(indptr, nbr, nlev, ptr, nodes):
    K = ptr.shape[0] - 1
    out = np.empty(K, np.int32)
    for k in range(K):
        lo = ptr[k]
        hi = ptr[k + 1]
        # scan the smallest neighbourhood among the members
        c0 = nodes[lo]
        for i in range(lo + 1, hi):
            c = nodes[i]
            if indptr[c + 1] - indptr[c] < indptr[c0 + 1] - indptr[c0]:
                c0 = c
        m = -1
        for q in range(indptr[c0], indptr[c0 + 1]):
            lx = nlev[q]
            if lx <= m:
                continue
            x = nbr[q]
            # skip members (binary search in the sorted clique)
            a = lo
            b = hi
            while a < b:
                mid = (a + b) >> 1
                if nodes[mid] < x:
                    a = mid + 1
                else:
                    b = mid
            if a < hi and nodes[a] == x:
                continue
            mn = lx
            for i in range(lo, hi):
                c = nodes[i]
                if c == c0:
                    continue
                pos = find_edge(indptr, nbr, c, x)
                if pos < 0:
                    mn = -1
                    break
                if nlev[pos] < mn:
                    mn = nlev[pos]
                    if mn <= m:
                        break
            if mn > m:
                m = mn
        out[k] = m + 1
    return out


def level_min(indptr, nbr, nlev, ptr, nodes):
    """Lowest level at which each candidate is still a maximal clique.

    A vertex ``x`` outside ``C`` adjacent to all of ``C`` extends ``C`` in ``G_t``
    for ``t <= min_c level(x, c)``. With ``m`` the largest such value over all
    ``x``, ``C`` is maximal exactly on levels ``m + 1 .. level_max``; the result is
    ``m + 1``, or 0 when no ``x`` exists.

    Returns
    -------
    ndarray of int32, shape (K,)
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
