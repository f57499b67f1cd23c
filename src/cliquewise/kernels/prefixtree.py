"""Prefix trees of candidate lists: the fit's sweep with shared work done once.

The rate of an edge is the sum of ``mu`` over its candidates, and the EM step adds
``y_e / lambda_e`` back into each of them. Edges of one group share most of their
candidates (the large cliques that hold the whole group at low thresholds), so
the edge -> candidate lists repeat long runs. Write every edge's list in one fixed
order (candidates holding the most pairs first) and put the lists into a prefix
tree (trie): a node is one candidate appended to a prefix shared by one or more
edges, an edge ends at the node of its full list, and edges with identical lists
end at the same node (their weights summed: the edge classes of the model).

One EM sweep on the tree is exact and touches each node once each way:

* down (preorder): ``lam[node] = lam[parent] + mu[cand[node]]``; at an end node
  ``r = Y / lam`` and ``Y log lam`` is added to the log-likelihood;
* up (reverse preorder): ``tot[node] = r (if an end) + sum of its children's tot``,
  then ``acc[cand[node]] += tot[node]``.

The nodes are stored in preorder with their depth, so a parent is always the
last node seen one level up: a small stack indexed by depth replaces parent
pointers, and the only scattered memory accesses are ``mu`` and ``acc``. On
simulated exports the tree has about 0.56 nodes per incidence (measured in
``benchmarks/fit.py``), so a sweep does about half the gathers and scatters of
the flat edge -> candidate sweep.

Layout of a tree (one part of the edges):

``cand``   candidate of each node (preorder), an unsigned or signed integer array
           of ids local to the tree (the fit uses a part's own block of
           candidates, then its stragglers: see ``parts/fitting.py``);
``depth``  depth of each node (roots 0), ``uint16`` or ``int32``;
``end``    node index of each end node, increasing (int64, or int32 in the fit's parts);
``ey``     summed weight of the edges ending there (float64).

What lives here: :func:`candidate_rank` (the list order), :func:`row_tops` (each
edge's first candidate in that order: edges grouped by it split the tree into
independent subtrees, which is how the fit cuts it into parts),
:func:`add_row_lengths` (incidences per top, to cut the parts) and
:func:`gather_rows` (a part's rows copied into one block),
:func:`build_tree` (from an edge -> candidate CSR and a set of edges),
:func:`first_seen_order` (candidate numbering by first use, for locality),
:func:`tree_sweep` (one EM sweep: :func:`tree_down`, numpy, :func:`tree_up`), :func:`tree_unsupported`
(ends left with no positive rate after pruning), :func:`check_tree`, and the plain
Python twins :func:`build_tree_reference` and :func:`tree_sweep_reference`.
"""

import math

import numba
import numpy as np

from cliquewise import _numba_setup  # noqa: F401  (sets NUMBA_CACHE_DIR first)

__all__ = [
    "build_tree",
    "build_tree_keyed",
    "build_tree_reference",
    "candidate_rank",
    "row_tops",
    "check_tree",
    "first_seen_order",
    "add_row_lengths",
    "gather_rows",
    "tree_down",
    "tree_sweep",
    "tree_sweep_reference",
    "tree_up",
    "tree_unsupported",
]


def candidate_rank(pairs: np.ndarray) -> np.ndarray:
    """Position of each candidate in the list order: most pairs first, ties by id.

    Parameters
    ----------
    pairs : array, length ``K``
        Pairs ``s (s - 1) / 2`` of each candidate.

    Returns
    -------
    int64 array, length ``K``
        ``rank[k]``; ``argsort(rank)`` lists the candidates in order.
    """
    pairs = np.asarray(pairs, np.int64)
    if len(pairs) == 0:
        return np.empty(0, np.int64)
    top = int(pairs.max())
    if pairs.min() >= 0 and top <= 4 * len(pairs) + (1 << 20):  # a counting sort: linear time
        return _rank_descending(pairs, top)
    order = np.argsort(-pairs, kind="stable")
    rank = np.empty(len(pairs), np.int64)
    rank[order] = np.arange(len(pairs))
    return rank


@numba.njit(nogil=True, cache=True)
def _rank_descending(keys, top):
    """Stable rank of each key in descending order, for keys in ``[0, top]``."""
    cnt = np.zeros(top + 2, np.int64)
    for k in range(keys.shape[0]):
        cnt[top - keys[k] + 1] += 1
    for b in range(top + 1):
        cnt[b + 1] += cnt[b]
    rank = np.empty(keys.shape[0], np.int64)
    for k in range(keys.shape[0]):
        b = top - keys[k]
        rank[k] = cnt[b]
        cnt[b] += 1
    return rank


# --------------------------------------------------------------------------- build


@numba.njit(nogil=True, cache=True)
def _compare(ptr, rows, a, b):
    """Lexicographic comparison of rows ``a`` and ``b`` (a prefix sorts first)."""
    sa = ptr[a]
    sb = ptr[b]
    la = ptr[a + 1] - sa
    lb = ptr[b + 1] - sb
    m = min(la, lb)
    for t in range(m):
        x = rows[sa + t]
        y = rows[sb + t]
        if x != y:
            return -1 if x < y else 1
    return la - lb


@numba.njit(nogil=True, cache=True)
def _common(ptr, rows, a, b):
    """Length of the common prefix of rows ``a`` and ``b``."""
    sa = ptr[a]
    sb = ptr[b]
    m = min(ptr[a + 1] - sa, ptr[b + 1] - sb)
    t = 0
    while t < m and rows[sa + t] == rows[sb + t]:
        t += 1
    return t


@numba.njit(nogil=True, cache=True)
def _merge_sort_rows(ptr, rows, a, b, lo, hi):
    """Stable merge sort of the row indices ``a[lo:hi]`` in lexicographic row order
    (``b`` is scratch of the same length as ``a``; the result ends in ``a``)."""
    n = hi - lo
    width = 1
    src = a
    dst = b
    in_a = True
    while width < n:
        for s0 in range(lo, hi, 2 * width):
            mid = min(s0 + width, hi)
            end = min(s0 + 2 * width, hi)
            i, j, k = s0, mid, s0
            while i < mid and j < end:
                if _compare(ptr, rows, src[j], src[i]) < 0:
                    dst[k] = src[j]
                    j += 1
                else:
                    dst[k] = src[i]
                    i += 1
                k += 1
            while i < mid:
                dst[k] = src[i]
                i += 1
                k += 1
            while j < end:
                dst[k] = src[j]
                j += 1
                k += 1
        src, dst = dst, src
        in_a = not in_a
        width *= 2
    if not in_a:
        for i in range(lo, hi):
            a[i] = b[i]


@numba.njit(nogil=True, cache=True)
def _sort_rows(ptr, rows):
    """Row indices in lexicographic row order (stable).

    Rows are first ordered by their first two entries packed into one integer
    (one fast sort), then runs that tie on both are merge-sorted on whole rows.
    """
    n = ptr.shape[0] - 1
    key = np.empty(n, np.int64)
    packable = True
    for i in range(n):
        s = ptr[i]
        length = ptr[i + 1] - s
        if length == 0:
            key[i] = -1
            continue
        r0 = rows[s]
        r1 = rows[s + 1] + 1 if length > 1 else 0
        if r0 >= 2**31 - 1 or r1 >= 2**31 - 1:
            packable = False
            break
        key[i] = (r0 << 32) | r1
    a = np.arange(n)
    b = np.empty(n, np.int64)
    if not packable:
        _merge_sort_rows(ptr, rows, a, b, 0, n)
        return a
    a = np.argsort(key, kind="mergesort")
    i = 0
    while i < n:
        j = i + 1
        while j < n and key[a[j]] == key[a[i]]:
            j += 1
        if j - i > 1:
            _merge_sort_rows(ptr, rows, a, b, i, j)
        i = j
    return a


@numba.njit(nogil=True, cache=True)
def row_tops(inc_ptr, inc_cand, rank):
    """First candidate of each edge's list in list order (its smallest rank); -1 if empty.

    Edges with the same top share the root of their prefix tree, so grouping edges
    by top splits the tree of all edges into independent subtrees.
    """
    n = inc_ptr.shape[0] - 1
    out = np.empty(n, np.int64)
    for i in range(n):
        best = -1
        for j in range(inc_ptr[i], inc_ptr[i + 1]):
            r = rank[inc_cand[j]]
            if best < 0 or r < best:
                best = r
        out[i] = best
    return out


@numba.njit(nogil=True, cache=True)
def add_row_lengths(top, ptr, per_top):
    """``per_top[top[i]] += ptr[i + 1] - ptr[i]``: the incidences of the edges of each top."""
    for i in range(top.shape[0]):
        per_top[top[i]] += ptr[i + 1] - ptr[i]


@numba.njit(nogil=True, cache=True)
def gather_rows(inc_ptr, inc_cand, edges, start, out):
    """Copy the rows of ``edges`` (in that order) into ``out`` from position ``start``."""
    q = start
    for i in range(edges.shape[0]):
        e = edges[i]
        for j in range(inc_ptr[e], inc_ptr[e + 1]):
            out[q] = inc_cand[j]
            q += 1


@numba.njit(nogil=True, cache=True)
def build_tree(inc_ptr, inc_cand, y, edges, rank, by_rank):
    """Prefix tree of the candidate lists of a set of edges.

    Parameters
    ----------
    inc_ptr : int64 array, length ``E + 1``
        Row pointers of the whole incidence (``inc_ptr[0] == 0``).
    inc_cand : int array
        The whole incidence (global candidate ids).
    y : float64 array, length ``E``
        Edge weights. Edges with ``y == 0`` are left out (they add nothing).
    edges : int64 array
        The edges to put in the tree, ascending (their order only breaks ties
        between identical lists, for the order of summation).
    rank : int64 array, length ``K``
        List order of the candidates (:func:`candidate_rank`).
    by_rank : int64 array, length ``K``
        Its inverse: the candidate at each rank.

    Returns
    -------
    cand : int64 array
        Global candidate id of each node, preorder.
    depth : int32 array
    end : int64 array
        End nodes, increasing.
    ey : float64 array
        Weight ending at each end node (summed over edges in ``edges`` order, after
        a stable sort, so the result is deterministic).
    """
    n = edges.shape[0]
    ptr = np.empty(n + 1, np.int64)
    ptr[0] = 0
    for i in range(n):
        e = edges[i]
        ptr[i + 1] = ptr[i] + inc_ptr[e + 1] - inc_ptr[e]
    m = ptr[n]
    keyed = np.empty(m, np.int64)
    ys = np.empty(n, np.float64)
    for i in range(n):
        e = edges[i]
        ys[i] = y[e]
        src = inc_ptr[e] - ptr[i]
        for j in range(ptr[i], ptr[i + 1]):
            keyed[j] = rank[inc_cand[src + j]]
    return build_tree_keyed(ptr, keyed, ys, by_rank)


@numba.njit(nogil=True, cache=True)
def build_tree_keyed(ptr, keyed, y, by_rank):
    """:func:`build_tree` from rows already turned into ranks: row ``i`` is
    ``keyed[ptr[i]:ptr[i + 1]]`` (any order; sorted here, in place) with weight
    ``y[i]``. The fit's plan writes each part's rows this way, so building a tree
    reads the part's own rows and nothing else of the incidence."""
    n = ptr.shape[0] - 1
    m = ptr[n]
    for i in range(n):
        s = ptr[i]
        t = ptr[i + 1]
        # insertion sort: rows are short
        for j in range(s + 1, t):
            x = keyed[j]
            q = j - 1
            while q >= s and keyed[q] > x:
                keyed[q + 1] = keyed[q]
                q -= 1
            keyed[q + 1] = x
    order = _sort_rows(ptr, keyed)
    cand = np.empty(m, np.int64)
    depth = np.empty(m, np.int32)
    end = np.empty(n, np.int64)
    ey = np.empty(n, np.float64)
    n_nodes = 0
    n_end = 0
    prev = -1
    for idx in range(n):
        i = order[idx]
        w = y[i]
        if w == 0.0:
            continue
        s = ptr[i]
        length = ptr[i + 1] - s
        if length == 0:
            continue
        shared = _common(ptr, keyed, prev, i) if prev >= 0 else 0
        if shared == length and prev >= 0 and ptr[prev + 1] - ptr[prev] == length:
            ey[n_end - 1] += w  # the same list: the same end node
            continue
        for p in range(shared, length):
            cand[n_nodes] = by_rank[keyed[s + p]]
            depth[n_nodes] = p
            n_nodes += 1
        end[n_end] = n_nodes - 1
        ey[n_end] = w
        n_end += 1
        prev = i
    return cand[:n_nodes].copy(), depth[:n_nodes].copy(), end[:n_end].copy(), ey[:n_end].copy()


@numba.njit(nogil=True, cache=True)
def first_seen_order(cand, new_id, next_id):
    """Number candidates by first use: ``new_id[k]`` for each ``k`` not yet numbered.

    Called on the trees' ``cand`` arrays in part order, this numbers the
    candidates in the order the sweep meets them, so the ``mu`` and ``acc``
    entries a sweep touches lie close together.

    Parameters
    ----------
    cand : int array
        Global candidate ids of a tree's nodes.
    new_id : int64 array, length ``K``
        ``-1`` where not yet numbered; filled in place.
    next_id : int
        The next number to give.

    Returns
    -------
    int
        The next number to give after this tree.
    """
    for t in range(cand.shape[0]):
        k = cand[t]
        if new_id[k] < 0:
            new_id[k] = next_id
            next_id += 1
    return next_id


@numba.njit(nogil=True, cache=True)
def check_tree(cand, depth, end, ey, width):
    """Raise ValueError unless the arrays form a valid tree over ``width`` candidates."""
    n = cand.shape[0]
    if depth.shape[0] != n or end.shape[0] != ey.shape[0]:
        raise ValueError("tree arrays differ in length")
    for t in range(n):
        if cand[t] < 0 or cand[t] >= width:
            raise ValueError("tree node candidate outside its range")
        d = depth[t]
        if d < 0 or (t == 0 and d != 0) or (t > 0 and d > depth[t - 1] + 1):
            raise ValueError("tree depths are not a preorder")
    for q in range(end.shape[0]):
        if end[q] < 0 or end[q] >= n or (q > 0 and end[q] <= end[q - 1]):
            raise ValueError("tree end nodes out of order")
        if not ey[q] >= 0.0:
            raise ValueError("tree end weight negative or NaN")


# --------------------------------------------------------------------------- sweeps


@numba.njit(nogil=True, cache=True)
def _max_depth(depth):
    m = 0
    for t in range(depth.shape[0]):
        if depth[t] > m:
            m = depth[t]
    return m


@numba.njit(nogil=True, cache=True)
def tree_down(cand, depth, end, mu, lam_end):
    """Down pass: ``lam_end[q]`` = the rate of end node ``end[q]`` (sum of ``mu`` on its path).

    The parent's rate is read from the depth stack, except when the node is the
    child of the node just before it (the common case on long shared prefixes):
    then it is still in a register, which takes the store-to-load round trip off
    the chain of dependent additions.
    """
    n = cand.shape[0]
    n_end = end.shape[0]
    stack = np.zeros(_max_depth(depth) + 2, np.float64)
    q = 0
    nxt = end[0] if n_end > 0 else -1
    cur = 0.0
    prev_d = -1
    for t in range(n):
        d = np.int64(depth[t])
        base = cur if d == prev_d + 1 else stack[d]
        lam = base + mu[cand[t]]
        stack[d + 1] = lam
        cur = lam
        prev_d = d
        if t == nxt:
            lam_end[q] = lam
            q += 1
            nxt = end[q] if q < n_end else -1


@numba.njit(nogil=True, cache=True)
def tree_up(cand, depth, end, ratio, acc):
    """Up pass: ``acc[k] +=`` the sum of ``ratio`` over the end nodes below each node of ``k``.

    Reverse preorder. The total of the node handled last is kept in a register
    until it is known whether it belongs to this node (its first child) or to a
    node further up (this node is a leaf), for the same reason as in :func:`tree_down`.
    """
    n = cand.shape[0]
    stack = np.zeros(_max_depth(depth) + 2, np.float64)
    q = end.shape[0] - 1
    nxt = end[q] if q >= 0 else -1
    pending = 0.0  # total of the node handled last, not yet added to stack[last_d]
    last_d = -2
    for t in range(n - 1, -1, -1):
        d = np.int64(depth[t])
        if last_d == d + 1:  # the node handled last is this node's first child
            tot = stack[d + 1] + pending
            stack[d + 1] = 0.0
        else:  # a leaf: the pending total belongs to the parent of the node handled last
            if last_d >= 0:
                stack[last_d] += pending
            tot = 0.0
        if t == nxt:
            tot += ratio[q]
            q -= 1
            nxt = end[q] if q >= 0 else -1
        acc[cand[t]] += tot
        pending = tot
        last_d = d


def tree_sweep(cand, depth, end, ey, mu, acc, want_loglik=True):
    """One EM sweep over a tree: ``acc[k] += sum over its edges of y / lambda``.

    The down pass (:func:`tree_down`) gives each end node its rate; the ratios
    ``Y / lambda`` and the log-likelihood are computed by numpy on those arrays
    (vectorised logarithms; numpy releases the GIL, so parts still run side by
    side); the up pass (:func:`tree_up`) adds the ratios into ``acc``.

    Parameters
    ----------
    cand, depth, end, ey : arrays
        A tree (see the module docstring), ``cand`` relative to ``mu[0]``.
    mu : float64 array
        The intensities the tree's ``cand`` index.
    acc : float64 array, same length as ``mu``
        Accumulator, updated in place (not zeroed here).
    want_loglik : bool
        Also return ``sum Y log lambda`` over the end nodes (else 0.0).

    Returns
    -------
    float
        ``sum Y log(lambda)`` (numpy's pairwise summation: the same on every run);
        ``-inf`` if an end with ``Y > 0`` has ``lambda = 0`` (it adds nothing to
        ``acc``). The arrays are not checked here: call :func:`check_tree` once
        when a tree is loaded.
    """
    n_end = end.shape[0]
    if cand.shape[0] == 0 or n_end == 0:
        return 0.0
    lam = np.empty(n_end, np.float64)
    tree_down(cand, depth, end, mu, lam)
    if lam.min() > 0.0:
        ratio = ey / lam
        total = float(np.sum(ey * np.log(lam))) if want_loglik else 0.0
    else:
        pos = lam > 0.0
        ratio = np.zeros(n_end, np.float64)
        np.divide(ey, lam, out=ratio, where=pos)
        if np.any(~pos & (ey > 0.0)):
            total = -np.inf
        else:
            total = float(np.sum(ey[pos] * np.log(lam[pos]))) if want_loglik else 0.0
    tree_up(cand, depth, end, ratio, acc)
    return total


@numba.njit(nogil=True, cache=True)
def tree_unsupported(cand, depth, end, mu_kept, mu_full):
    """For each end left with no positive rate under ``mu_kept``, its strongest
    candidate under ``mu_full`` (ties: the smaller id). Ids are relative, as in
    ``cand``; returns them in end order (may repeat)."""
    n = cand.shape[0]
    n_end = end.shape[0]
    max_depth = _max_depth(depth)
    lam = np.zeros(max_depth + 2, np.float64)
    best = np.full(max_depth + 2, -1, np.int64)
    best_mu = np.full(max_depth + 2, -1.0, np.float64)
    out = np.empty(n_end, np.int64)
    n_out = 0
    q = 0
    for t in range(n):
        d = depth[t]
        k = cand[t]
        lam[d + 1] = lam[d] + mu_kept[k]
        m = mu_full[k]
        if m > best_mu[d] or (m == best_mu[d] and k < best[d]):
            best[d + 1] = k
            best_mu[d + 1] = m
        else:
            best[d + 1] = best[d]
            best_mu[d + 1] = best_mu[d]
        if q < n_end and end[q] == t:
            if lam[d + 1] == 0.0 and best[d + 1] >= 0 and best_mu[d + 1] > 0.0:
                out[n_out] = best[d + 1]
                n_out += 1
            q += 1
    return out[:n_out].copy()


# --------------------------------------------------------------------------- twins


def build_tree_reference(inc_ptr, inc_cand, y, edges, rank):
    """Plain-Python twin of :func:`build_tree`: sort the keyed lists, share prefixes.

    Returns the same four arrays (``cand`` as global ids).
    """
    by_rank = {int(r): k for k, r in enumerate(rank)}
    rows = []
    for e in edges:
        if y[e] == 0:
            continue
        key = tuple(sorted(int(rank[k]) for k in inc_cand[inc_ptr[e]: inc_ptr[e + 1]]))
        if key:
            rows.append((key, e))
    rows.sort()  # by list, then by edge index: the stable order of the kernel
    cand, depth, end, ey = [], [], [], []
    prev = None
    for key, e in rows:
        if key == prev:
            ey[-1] += float(y[e])
            continue
        shared = 0
        if prev is not None:
            while shared < min(len(key), len(prev)) and key[shared] == prev[shared]:
                shared += 1
        for p in range(shared, len(key)):
            cand.append(by_rank[key[p]])
            depth.append(p)
        end.append(len(cand) - 1)
        ey.append(float(y[e]))
        prev = key
    return (np.array(cand, np.int64), np.array(depth, np.int32), np.array(end, np.int64),
            np.array(ey, np.float64))


def tree_sweep_reference(cand, depth, end, ey, mu):
    """Slow twin of :func:`tree_sweep`: rebuild each end's list, then sum directly.

    Returns ``(acc, loglik)``.
    """
    acc = np.zeros(len(mu))
    total = 0.0
    path: list[int] = []
    ends = {int(t): float(w) for t, w in zip(end, ey)}
    for t in range(len(cand)):
        del path[int(depth[t]):]
        path.append(int(cand[t]))
        if t in ends:
            lam = sum(mu[k] for k in path)
            w = ends[t]
            if lam > 0:
                total += w * math.log(lam) if w > 0 else 0.0
                for k in path:
                    acc[k] += w / lam
            elif w > 0:
                total = -math.inf
    return acc, total
