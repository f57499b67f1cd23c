"""The local Bron-Kerbosch search on bitsets, shared by the clique listings.

:mod:`cliquewise.kernels.cliques` cuts its problems into small *sub-problems*
(one per vertex for ``maximal_cliques``, one per edge for the level sweep) and
hands each to the solvers here. Nothing in this module is public API; it holds
the engine, the cliques module holds the drivers and the references.

What lives here
---------------
``solve_small``
    A sub-problem of at most 64 vertices: every set (``P``, ``X``, adjacency
    rows, branch sets) is one machine word. Almost all sub-problems of sparse
    graphs take this path.
``solve_general``
    Any size: multi-word sets over ``P`` for every vertex and over ``X`` for
    ``P`` vertices only (``X``-``X`` pairs are never needed); ``X`` vertices with
    no ``P`` neighbour are dropped, as they cannot block a clique holding a ``P``
    vertex. Memory is ``O(|P| (|P| + |X|) / 64)`` words. Its search is
    ``_bk_run``, with ``_choose_pivot`` choosing the Tomita pivot.
``solve_split``
    A common neighbourhood ``S`` too large for one sub-problem (above ``SPLIT``
    vertices): ``G_l[S]`` is built as a local CSR, ordered by degeneracy, and cut
    into one sub-problem per vertex, as ``maximal_cliques`` cuts a whole graph,
    so ``|P|`` stays below the degeneracy of ``G_l[S]``.
``put_clique`` / ``grown``
    The output protocol: cliques are appended to ``ptr``/``nodes`` with the
    counters ``cnt = [n_cliques, n_nodes, work, status]``.

The sub-problem
---------------
The universe is the sorted array ``U[ulo:uhi]`` of CSR row ids; ``lidx`` gives
each slot its local id (``0..p-1`` for the candidates ``P``, ascending node id;
``p..`` for the excluded ``X``). ``Prow[i]`` is the CSR row of candidate ``i``
and ``Pglob[i]`` its node id in the output (they differ only inside the split).
Each clique found is written as ``pre[:npre] + Pglob[R]``, sorted.

With ``levelled != 0`` only CSR entries of level ``>= l`` count, and a ``P``-``P``
pair joined by an edge of level exactly ``l`` with edge id ``< ecut`` is *early*:
the sweep lists cliques holding such a pair from that earlier edge, so when the
search branches on ``w``, every early partner of ``w`` goes to the child's ``X``
rather than its ``P``. Such cliques are never produced here, while ``X`` still
blocks non-maximal ones; no post-filter is needed.

The search is iterative (an explicit stack of frames, one per depth), with the
pivot of Tomita, Tanaka and Takahashi: branch only on ``P - N(u)`` for the ``u``
of ``P + X`` with the most neighbours in ``P``, and stop a frame at once when an
``X`` vertex sees all of ``P``.

Work count and status
---------------------
``cnt[2]`` counts 64-bit word operations of the set algebra (pivot scoring, child
sets), neighbour-list entries visited when building sub-problems, and node ids
written; about 5e7 units take a second on one core. The solvers stop with status
``TOO_MUCH_WORK`` once it passes ``max_work``, with ``TOO_MANY`` when a clique
beyond ``max_cliques`` would be written, and with ``FULL`` when the output
buffers are full: the driver then rolls its unit back, doubles the buffers with
``grown`` and redoes the unit.

Implementation note
-------------------
The per-edge code (``solve_small``, ``_bk_run``, ``put_clique`` and the row
intersections of :mod:`cliquewise.kernels.graph`) never allocates, so it is
compiled without numba's reference counting, whose atomic updates on every array
argument would otherwise cost more than the work. ``popcount`` and
``count-trailing-zeros`` are LLVM intrinsics: one instruction on current CPUs.

numba's on-disk cache checks only the source file of the function it caches: the
drivers in :mod:`cliquewise.kernels.cliques` embed the code compiled from here, so
after editing this module (or :mod:`cliquewise.kernels.graph`) clear the cache
folder (``$NUMBA_CACHE_DIR``; the tests use ``.venv/numba-cache``), or the cached
drivers keep running the old code.
"""

import numba
import numpy as np
from llvmlite import ir
from numba.core import cgutils, types
from numba.extending import intrinsic

from cliquewise.kernels.graph import bit_length, degeneracy_kernel, intersect_merge
from cliquewise.kernels.graph import intersect_sorted as _isect

__all__ = [
    "NO_LIMIT",
    "SMALL",
    "SPLIT",
    "SM_SIZE",
    "OK",
    "TOO_MANY",
    "TOO_MUCH_WORK",
    "FULL",
    "put_clique",
    "ctz",
    "grown",
    "solve_small",
    "search_small",
    "SM_EARLY",
    "solve_general",
    "solve_split",
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

SMALL = 64  # universes up to this size use one-word bitsets
SPLIT = 1024  # common neighbourhoods above this size are split by degeneracy

# status codes kept in cnt[3]; cnt = [n_cliques, n_nodes, work, status]
OK = 0
TOO_MANY = 1
TOO_MUCH_WORK = 2
FULL = 3  # internal: output buffers full, the driver grows them and redoes the unit


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


ctz = _ctz  # for the sweep's link table in cliquewise.kernels.cliques


@_leaf
def _bit(j):
    return _ONE << np.uint64(j & 63)


# --------------------------------------------------------------------------
# output buffers
# --------------------------------------------------------------------------
@_leaf
def put_clique(ptr, nodes, cnt, buf, k, max_cliques):
    """Append ``buf[:k]`` as one clique, or set status 1 (budget) or 3 (full)."""
    K = cnt[0]
    if K >= max_cliques:
        cnt[3] = TOO_MANY
        return
    NN = cnt[1]
    if K + 2 > ptr.shape[0] or NN + k > nodes.shape[0]:
        cnt[3] = FULL
        return
    for i in range(k):
        nodes[NN + i] = buf[i]
    ptr[K + 1] = NN + k
    cnt[0] = K + 1
    cnt[1] = NN + k
    cnt[2] += k


@numba.njit(nogil=True, cache=True)
def grown(arr, keep):
    """A copy of ``arr`` with twice the room, holding its first ``keep`` items."""
    out = np.empty(2 * arr.shape[0] + 64, arr.dtype)
    out[:keep] = arr[:keep]
    return out


# --------------------------------------------------------------------------
# one sub-problem (layout in the module docstring)
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
    put_clique(ptr, nodes, cnt, cbuf, k, max_cliques)


# one-word scratch ``sm``: adjacency rows, early rows, stacks of P, X, branch sets
_SM_EARLY = 64
SM_EARLY = _SM_EARLY  # for the sweep's per-vertex path in cliquewise.kernels.cliques
_SM_P = 128
_SM_X = _SM_P + 66
_SM_T = _SM_X + 66
_SM_R = _SM_T + 66
SM_SIZE = _SM_R + 67


@_leaf
def solve_small(indptr, nbr, nlev, eid, levelled, l, ecut, U, ulo, uhi, lidx,
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
    search_small(sm, pall, uall & ~pall, levelled, Pglob, pre, npre, cbuf, ptr, nodes, cnt, max_cliques,
                 max_work, work, False, sm)


@_leaf
def search_small(sm, pall, xall, levelled, Pglob, pre, npre, cbuf, ptr, nodes, cnt, max_cliques, max_work,
                 work, keep_r, rout):
    """The search of :func:`solve_small` once ``sm`` holds the adjacency rows
    (``sm[i]`` for the local ids ``i`` in the bitsets ``pall`` (``P``) and ``xall``
    (``X``); ``X``-``X`` bits may be left out) and, with ``levelled``, the early
    rows ``sm[_SM_EARLY + i]`` of ``P``. Clique members are ``Pglob[i]``. The pivot
    is the first best among the vertices of ``pall`` then those of ``xall``, each
    in ascending id, so the output does not depend on how the ids of the two
    interleave. Adds ``work`` and its own to ``cnt[2]``. With ``keep_r``, clique
    ``k`` found here also leaves its local ids (less ``pre``) as the bitset
    ``rout[k]`` (``rout`` as long as ``ptr``)."""
    sm[_SM_P] = pall
    sm[_SM_X] = xall
    sm[_SM_R] = _ZERO
    d = 0
    fresh = True  # frame d still needs its pivot
    while d >= 0:
        if fresh:
            fresh = False
            P = sm[_SM_P + d]
            X = sm[_SM_X + d]
            npc = _popc(P)
            work += np.int64(_popc(P | X)) + 1
            best = _ZERO
            brow = _ZERO
            prune = False
            first = True
            bits = (P | X) & pall  # first the vertices of the top frame's P, then of its X
            rest = (P | X) & xall
            while True:
                if bits == _ZERO:
                    if rest == _ZERO:
                        break
                    bits = rest
                    rest = _ZERO
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
                if cnt[3] != OK:
                    break
                if keep_r:
                    rout[cnt[0] - 1] = nR
        else:
            d += 1
            sm[_SM_P + d] = nP
            sm[_SM_X + d] = nX
            sm[_SM_R + d] = nR
            fresh = True
        if cnt[2] + work > max_work:
            cnt[3] = TOO_MUCH_WORK
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
                if cnt[3] != OK:
                    return
        else:
            d += 1
            ok, wk = _choose_pivot(d, Wp, Wx, adjPP, adjXP, stP, stXP, stXX, stT, stC)
            cnt[2] += wk
            if not ok:
                d -= 1
        if cnt[2] > max_work:
            cnt[3] = TOO_MUCH_WORK
            return


@numba.njit(nogil=True, cache=True)
def solve_general(indptr, nbr, nlev, eid, levelled, l, ecut, U, ulo, uhi, lidx,
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
                    pair_i = grown(pair_i, npairs)
                    pair_j = grown(pair_j, npairs)
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
# large common neighbourhoods
# --------------------------------------------------------------------------
@numba.njit(nogil=True, cache=True)
def solve_split(indptr, nbr, nlev, eid, l, e, S, ex, s, a, b, sm, inv, cbuf, posA,
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
    heid = np.empty(cap, eid.dtype)
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
            t3 = np.empty(cap, eid.dtype)
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
    order, core = degeneracy_kernel(hptr, hnbr)
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
                put_clique(ptr, nodes, cnt, pre, _I3, max_cliques)
        else:
            ix = p
            for k in range(lo, hi):
                if lidx[k - lo] < 0:
                    lidx[k - lo] = ix
                    ix += 1
            if hi - lo <= small_max:
                solve_small(hptr, hnbr, hlev, heid, _I1, l, e, hnbr, lo, hi, lidx,
                             Prow, Pglob, p, pre, _I3, sm, inv, cbuf, posA, posB,
                             ptr,
                             nodes, cnt, max_cliques, max_work)
            else:
                solve_general(hptr, hnbr, hlev, heid, _I1, l, e, hnbr, lo, hi, lidx,
                               Prow, Pglob, p, hi - lo - p, pre, _I3, ptr, nodes, cnt,
                               max_cliques, max_work)
        if cnt[3] != OK:
            return
        if cnt[2] > max_work:
            cnt[3] = TOO_MUCH_WORK
            return

