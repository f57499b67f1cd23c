"""Per-unit functions of the enumerate stage.

* :func:`choose_levels` turns the ``levels`` setting and the weights into sorted
  thresholds, and :func:`level_index` gives each edge the index of the highest
  threshold at or below its weight.
* :func:`build_graph` reads the edge store and writes the symmetric CSR (with per
  entry level and edge index) as ``.npy`` files that every unit memory-maps
  (:func:`graph_columns` for the edge ends and for the weights, :func:`prepare_graph`,
  then :func:`csr_range` per range of rows).
* :func:`enumerate_unit` lists the candidates first seen at the edges of one edge
  block (the high-to-low sweep, see ``kernels/cliques.py``), under the blow-up
  budget (clique count, work, seconds), and their ``level_min``.
  Each unit also looks up the edge ids of its candidates' member pairs while
  their rows are in cache.
* :func:`collect_tables` concatenates the units' candidates, and
  :func:`plan_incidence` and :func:`incidence_range` turn their pairs into the
  edge -> candidate CSR the fit reads (a counting sort by edge, a range of edges
  per task); :func:`collect_units` runs both in one call.
"""

from __future__ import annotations

import time
from pathlib import Path

import numpy as np
import pyarrow.parquet as pq

from cliquewise.kernels.cliques import sweep_with_ranges
from cliquewise.kernels.graph import eid_dtype, levels_from_table
from cliquewise.kernels.incidence import (
    candidate_pairs,
    count_buckets,
    count_rows,
    count_rows_in,
    scatter_rows_in,
    starts_from_counts,
)
from cliquewise.store import (
    NpyStream,
    create_npy,
    drop_mapped_pages,
    load_npy,
    npy_blocks,
    resident_bytes,
    save_npy,
    save_npy_parts,
    write_npy_at,
)

GRAPH_FILES = ("indptr", "nbr", "nlev", "eid", "u", "v", "lev", "weight")
STATUS_TEXT = {1: "clique count", 2: "work", 3: "time"}


def choose_levels(weights: np.ndarray, spec) -> np.ndarray:
    """Sorted thresholds. The smallest weight is always a threshold, so every edge is covered.

    ``"all"``: every distinct weight. An integer ``n``: ``n`` quantiles of the edge
    weights (numpy's ``"lower"`` quantiles; fewer when weights repeat). A list:
    those thresholds plus the minimum.
    """
    values, counts = np.unique(np.asarray(weights, np.float64), return_counts=True)
    return levels_from_counts(values, counts, spec)


def levels_from_counts(values: np.ndarray, counts: np.ndarray, spec) -> np.ndarray:
    """:func:`choose_levels` from the distinct weights (ascending) and how often each occurs.

    Exports count interactions, so the distinct weights are few next to the edges:
    the levels of an edge store of any size are chosen from this summary.
    """
    values = np.asarray(values, np.float64)
    if values.size == 0:
        return np.empty(0, np.float64)
    wmin, wmax = float(values[0]), float(values[-1])
    if spec == "all":
        return values.copy()
    if isinstance(spec, int):
        n = int(np.sum(counts))
        q = np.linspace(0.0, 1.0, spec, endpoint=False)
        rank = np.floor((n - 1) * q).astype(np.int64)  # numpy's "lower" quantile: the floor((n-1) q)-th smallest
        pos = np.searchsorted(np.cumsum(counts), rank, side="right")
        return np.unique(np.concatenate([[wmin], values[pos]]))
    levels = np.asarray(sorted(float(x) for x in spec), np.float64)
    levels = levels[(levels > wmin) & (levels <= wmax)]
    return np.unique(np.concatenate([[wmin], levels]))


def level_index(weights: np.ndarray, levels: np.ndarray) -> np.ndarray:
    """Index of the highest threshold <= each weight (int32)."""
    return (np.searchsorted(levels, weights, side="right") - 1).astype(np.int32)


TABLE_SPAN = 1 << 20  # integer weights spanning at most this many values get their levels from a table


def level_lookup(values: np.ndarray, levels: np.ndarray):
    """:func:`level_index` for weights among ``values`` (the distinct weights,
    ascending): when they are integers within :data:`TABLE_SPAN` of each other (the
    usual interaction counts), by a table with one entry per integer of their span,
    looked up in one pass; else by binary search."""
    values = np.asarray(values, np.float64)
    if len(values) and values[-1] - values[0] < TABLE_SPAN and np.all(values == np.floor(values)):
        low = float(values[0])
        table = level_index(np.arange(low, values[-1] + 1), levels)
        return lambda w: levels_from_table(np.asarray(w, np.float64), low, table)
    return lambda w: level_index(w, levels)


READ_BLOCK = 1 << 22  # edges per block when a step streams the edge arrays


def build_graph(edge_files: list, n_nodes: int, levels_spec, out: Path, budget: int | None = None) -> dict:
    """Read the edge store, choose levels, build the CSR; write ``.npy`` files into ``out``.

    :func:`prepare_graph`, then :func:`csr_range` on each of its row ranges, one
    after the other (the stage runs the ranges side by side). The result is the
    same whatever the budget: the CSR of
    :func:`~cliquewise.kernels.graph.csr_from_edges`.
    """
    t_cpu = time.thread_time()
    info = prepare_graph(edge_files, n_nodes, levels_spec, out, budget)
    for a, b in info.pop("ranges"):
        csr_range(out, a, b)
    info["cpu"] = time.thread_time() - t_cpu  # the preparation's and the ranges' together
    return info


def prepare_graph(edge_files: list, n_nodes: int, levels_spec, out: Path, budget: int | None = None,
                  pieces: int = 1, columns: bool = True) -> dict:
    """Everything of the CSR but its rows: the edge columns streamed into
    ``u``/``v``/``weight.npy`` file by file, the levels chosen from the distinct
    weights, each edge's level (``lev.npy``), the row pointers (``indptr.npy``), and
    empty ``nbr``/``nlev``/``eid.npy`` for :func:`csr_range` to fill.

    The columns are :func:`graph_columns` ``"ends"`` and ``"weights"``; with
    ``columns=False`` they are taken as written already (the stage runs the two
    side by side first). Returns the counts and ``ranges``: consecutive row
    ranges, each holding at most ``budget`` bytes of rows (``None``: no limit),
    and at least ``pieces`` of them when the rows allow (about equal entries each).
    """
    t_cpu = time.thread_time()
    if columns:
        for part in ("ends", "weights"):
            graph_columns(edge_files, n_nodes, levels_spec, out, part)
    n_edges = len(load_npy(out / "u.npy", mmap=True))
    indptr = load_npy(out / "indptr.npy", mmap=True)
    nbr_dtype = np.dtype(np.int32 if n_nodes < 2**31 else np.int64)
    ranges = _row_ranges(indptr, budget, nbr_dtype, pieces, eid_dtype(n_edges))
    for name, dtype in (("nbr", nbr_dtype), ("nlev", np.int32), ("eid", eid_dtype(n_edges))):
        create_npy(out / f"{name}.npy", dtype, 2 * n_edges)
    return {"edges": int(n_edges), "levels": len(load_npy(out / "levels.npy", mmap=True)),
            "row_ranges": len(ranges), "ranges": ranges, "cpu": time.thread_time() - t_cpu}


def graph_columns(edge_files: list, n_nodes: int, levels_spec, out: Path, part: str) -> dict:
    """One of the two independent halves of :func:`prepare_graph`'s streaming.

    ``"ends"``: ``u``/``v.npy``, the row pointers ``indptr.npy`` (from the
    degrees) and ``firsts.npy``, the number of edges each vertex is the first
    end of. ``"weights"``: ``weight.npy``, the levels (``levels.npy``, from the
    distinct weights) and each edge's level ``lev.npy``. Both stream the edge
    files one at a time.
    """
    t_cpu = time.thread_time()
    out.mkdir(parents=True, exist_ok=True)
    n_edges = sum(pq.read_metadata(f).num_rows for f in edge_files)
    cols = (("u", np.int64), ("v", np.int64)) if part == "ends" else (("weight", np.float64),)
    for col, dtype in cols:
        save_npy_parts(out / f"{col}.npy", (pq.read_table(f, columns=[col]).column(0).to_numpy() for f in edge_files),
                       dtype, n_edges)
    if part == "ends":
        degree = np.zeros(n_nodes, np.int64)
        for col in ("u", "v"):
            for _, x in npy_blocks(out / f"{col}.npy", READ_BLOCK):
                degree += np.bincount(x, minlength=n_nodes)
            if col == "u":  # the number of edges each vertex is the first end of (for plan_units)
                save_npy(out / "firsts.npy", degree)
        indptr = np.zeros(n_nodes + 1, np.int64)
        np.cumsum(degree, out=indptr[1:])
        save_npy(out / "indptr.npy", indptr)
        return {"cpu": time.thread_time() - t_cpu}
    values, counts = np.empty(0, np.float64), np.empty(0, np.int64)
    for _, w in npy_blocks(out / "weight.npy", READ_BLOCK):
        bv, bc = np.unique(w, return_counts=True)
        values, inv = np.unique(np.concatenate([values, bv]), return_inverse=True)
        counts = np.bincount(inv, weights=np.concatenate([counts, bc]), minlength=len(values)).astype(np.int64)
    levels = levels_from_counts(values, counts, levels_spec)
    index = level_lookup(values, levels)
    save_npy_parts(out / "lev.npy", (index(w) for _, w in npy_blocks(out / "weight.npy", READ_BLOCK)),
                   np.int32, n_edges)
    save_npy(out / "levels.npy", levels)
    return {"cpu": time.thread_time() - t_cpu}


def _row_ranges(indptr: np.ndarray, budget: int | None, nbr_dtype, pieces: int = 1,
                eid_type=np.dtype(np.int64)) -> list[tuple[int, int]]:
    """Consecutive row ranges whose entries fit in ``budget`` bytes (a row never
    splits), and no more than an equal share of ``pieces``. Without a budget,
    ``pieces`` ranges cut at the rows nearest to equal shares."""
    n = len(indptr) - 1
    if n == 0:
        return []
    total = int(indptr[-1])
    if budget is None and total > 0:
        k = max(1, int(pieces))
        cuts = np.searchsorted(indptr, total * np.arange(1, k) / k)
        bounds = np.unique(np.concatenate([[0], np.clip(cuts, 1, n), [n]])).tolist()
        return [(int(a), int(b)) for a, b in zip(bounds[:-1], bounds[1:])]
    per_entry = nbr_dtype.itemsize + 4 + eid_type.itemsize  # nbr, nlev, eid
    share = -(-int(indptr[-1]) // max(1, int(pieces)))
    cap = max(1, share if budget is None else min(share, int(budget) // per_entry))
    ranges, a = [], 0
    while a < n:
        b = int(np.searchsorted(indptr, indptr[a] + cap, side="right")) - 1
        b = min(n, max(b, a + 1))
        ranges.append((a, b))
        a = b
    return ranges


def csr_range(out: Path, a: int, b: int) -> dict:
    """Rows ``[a, b)`` of the CSR, filled from one streaming pass over
    ``u``/``v``/``lev.npy`` and written into ``nbr``/``nlev``/``eid.npy`` (made by
    :func:`prepare_graph`) at their place."""
    from cliquewise.kernels.graph import csr_rows_scatter, csr_rows_sort

    t_cpu = time.thread_time()
    indptr = load_npy(out / "indptr.npy", mmap=True)
    base = int(indptr[a])
    m = int(indptr[b]) - base
    nbr = np.empty(m, load_npy(out / "nbr.npy", mmap=True).dtype)
    nlev = np.empty(m, np.int32)
    eid = np.empty(m, load_npy(out / "eid.npy", mmap=True).dtype)
    ptr = np.asarray(indptr[a:b + 1]) - base
    cursor = ptr[:-1].copy()
    blocks = zip(npy_blocks(out / "u.npy", READ_BLOCK), npy_blocks(out / "v.npy", READ_BLOCK),
                 npy_blocks(out / "lev.npy", READ_BLOCK))
    for (e0, u), (_, v), (_, lev) in blocks:
        csr_rows_scatter(u, v, lev, np.int64(e0), np.int64(a), np.int64(b), cursor, nbr, nlev, eid)
    csr_rows_sort(ptr, nbr, nlev, eid)
    for name, arr in (("nbr", nbr), ("nlev", nlev), ("eid", eid)):
        write_npy_at(out / f"{name}.npy", base, arr)
    return {"cpu": time.thread_time() - t_cpu}


def load_graph(folder: Path) -> dict:
    return {name: load_npy(folder / f"{name}.npy", mmap=True) for name in GRAPH_FILES}


TRIM_BLOCK = 64  # edges per block when the graph's pages are trimmed: what one block maps stays well inside a budget


def enumerate_unit(graph_dir: str, lo: int, hi: int, max_cliques: int, max_seconds: float,
                   out: Path, tag: str, block: int = 2048, trim: int | None = None) -> dict:
    """Candidates first seen at edges ``[lo, hi)``; writes ``{tag}.ptr/.nodes/.lmax/.lmin/.pairs.npy``.

    The CSR is memory-mapped. With ``trim`` (bytes), its pages are dropped from this
    process's resident set whenever that passes ``trim`` between blocks, so a graph
    larger than a worker's memory is swept within it (see
    :func:`~cliquewise.store.drop_mapped_pages`). Blocks are then
    :data:`TRIM_BLOCK` edges: the rows a block reads lie all over the files, and
    each first touch can map a large piece of a file (the operating system maps
    whole cached folios), so a block of 2048 edges can map most of the graph.
    """
    if trim:
        block = min(block, TRIM_BLOCK)
    t0 = time.perf_counter()
    t_cpu = time.thread_time()
    g = load_graph(Path(graph_dir))
    ptrs, nodes_l, lmax_l, lmin_l, pairs_l = [], [], [], [], []
    total, work, offset = 0, 0, 0
    status, where = 0, lo
    max_work = np.int64(max(1, max_cliques) * 64)
    deadline = t0 + max_seconds
    at_node, at_level = -1, -1
    n_edges = len(g["u"])
    pair_dtype = eid_dtype(n_edges)  # as the sweep writes them (the edge ids' dtype)
    for s, e in _blocks(Path(graph_dir), lo, hi, block):
        if trim and resident_bytes() > trim:
            drop_mapped_pages(g.values())
        (ptr, nodes, lmax, st, wd, lmin, pairs), allow = _sweep_within(g, s, e, max_cliques - total,
                                                                       max_work - work, deadline)
        work += int(wd)
        if st != 0:
            status = int(st)
            where, at_node, at_level = _stop_point(g, s, e, max_cliques - total, allow, st, ptr, nodes, lmax)
            break
        k = len(ptr) - 1
        if k:  # with the level where each is still maximal, and its pairs' edge ids (worked out in the sweep)
            lmin_l.append(lmin)
            pairs_l.append(pairs.astype(pair_dtype, copy=False))
            ptrs.append(ptr[1:] + offset)
            nodes_l.append(nodes)
            lmax_l.append(lmax)
            offset += int(ptr[-1])
            total += k
        if time.perf_counter() > deadline and e < hi:
            status, where = 3, e - 1
            at_node, at_level = int(g["u"][where]), int(g["lev"][where])
            break
    result = {"lo": lo, "hi": hi, "status": status, "at_edge": where, "at_node": at_node, "at_level": at_level,
              "work": work, "candidates": total, "seconds": time.perf_counter() - t0}
    if status:
        result["cpu"] = time.thread_time() - t_cpu
        return result
    out.mkdir(parents=True, exist_ok=True)
    files = []
    arrays = (("ptr", np.int64, [np.zeros(1, np.int64)] + ptrs), ("nodes", np.int64, nodes_l),
              ("lmax", np.int32, lmax_l), ("lmin", np.int32, lmin_l), ("pairs", pair_dtype, pairs_l))
    for name, dtype, pieces in arrays:
        rel = f"{tag}.{name}.npy"
        save_npy_parts(out / rel, pieces, dtype, sum(len(x) for x in pieces))
        files.append(rel)
        if name == "pairs":
            result["incidences"] = int(sum(len(x) for x in pieces))
        pieces.clear()
    result["files"] = files
    result["cpu"] = time.thread_time() - t_cpu
    return result


def _blocks(graph_dir: Path, lo: int, hi: int, block: int):
    """Edge blocks of ``[lo, hi)`` that skip edges of directly emitted components."""
    skip_file = graph_dir / "skip.npy"
    if not skip_file.exists():
        runs = [(lo, hi)]
    else:
        keep = ~load_npy(skip_file, mmap=True)[lo:hi]
        edges = np.flatnonzero(np.diff(np.concatenate([[False], keep, [False]]).astype(np.int8)))
        runs = [(lo + int(a), lo + int(b)) for a, b in zip(edges[::2], edges[1::2])]
    for a, b in runs:
        for s in range(a, b, block):
            yield s, min(b, s + block)


def direct_components(graph_dir: Path, comp: np.ndarray, comp_nodes: np.ndarray, comp_edges: np.ndarray,
                      min_size: int, out: Path) -> dict:
    """Emit components that are cliques with a single weight level, without a search.

    Such a component is one candidate (maximal at every level up to its own, since
    nothing outside it is adjacent), so its edges are marked in ``skip.npy`` and the
    sweep passes over them; listing it edge by edge would cost about ``k**4`` for a
    clique of ``k`` nodes. Only components of at least ``min_size`` nodes are
    treated this way (smaller ones cost the sweep next to nothing).
    """
    g = load_graph(graph_dir)
    n_edges = len(g["u"])
    is_clique = (comp_nodes >= max(2, min_size)) & (comp_edges == comp_nodes * (comp_nodes - 1) // 2)
    if not is_clique.any() or n_edges == 0:
        return {"direct": 0, "skipped_edges": 0}
    n_comp = len(comp_nodes)
    lmin = np.full(n_comp, np.iinfo(np.int32).max, np.int64)
    lmax = np.full(n_comp, -1, np.int64)
    edge_blocks = zip(npy_blocks(graph_dir / "u.npy", READ_BLOCK), npy_blocks(graph_dir / "lev.npy", READ_BLOCK))
    for (_, u), (_, lev) in edge_blocks:  # levels of the clique components' edges, a block at a time
        ce = comp[u]
        inside = is_clique[ce]
        np.minimum.at(lmin, ce[inside], lev[inside])
        np.maximum.at(lmax, ce[inside], lev[inside])
    direct = np.flatnonzero(is_clique & (lmin == lmax))
    if len(direct) == 0:
        return {"direct": 0, "skipped_edges": 0}
    chosen = np.zeros(n_comp, bool)
    chosen[direct] = True
    skipped = [0]

    def skip_blocks():
        for _, u in npy_blocks(graph_dir / "u.npy", READ_BLOCK):
            sk = chosen[comp[u]]
            skipped[0] += int(sk.sum())
            yield sk

    save_npy_parts(graph_dir / "skip.npy", skip_blocks(), bool, n_edges)
    order = np.argsort(comp, kind="stable")
    members = order[chosen[comp[order]]]  # nodes of chosen components, grouped by component, ascending ids
    sizes = comp_nodes[direct]
    ptr = np.concatenate([[0], np.cumsum(sizes)]).astype(np.int64)
    members = members.astype(np.int64)
    pairs = candidate_pairs(g["indptr"], g["nbr"], g["eid"], ptr, members, n_edges)
    out.mkdir(parents=True, exist_ok=True)
    for name, arr in (("ptr", ptr), ("nodes", members), ("lmax", lmax[direct].astype(np.int32)),
                      ("lmin", np.zeros(len(direct), np.int32)), ("pairs", pairs)):
        save_npy(out / f"direct.{name}.npy", arr)
    return {"direct": int(len(direct)), "skipped_edges": skipped[0]}


# First work allowance of a block: about 0.1 s at the kernel's ~5e7 work units per
# second (see kernels/cliques.py). Most blocks finish within it.
FIRST_WORK = 1 << 22


def _sweep(g: dict, s: int, e: int, cliques_left: int, work_left: int):
    return sweep_with_ranges(g["indptr"], g["nbr"], g["nlev"], g["eid"], g["u"], g["v"], g["lev"],
                             s, e, np.int64(cliques_left), np.int64(work_left))


def _sweep_within(g: dict, s: int, e: int, cliques_left: int, work_left: int, deadline: float):
    """:func:`sweep_with_ranges` on edges ``[s, e)`` under the budgets and a deadline.

    The kernel has no clock, so the time budget acts through its work budget: the
    block is tried with a small allowance (:data:`FIRST_WORK`) and, when that runs
    out, again with the work the time left affords at the rate just measured. A
    try that completes gives exactly what one call with the whole work budget
    gives (the kernel is deterministic), so the candidates never depend on timing.
    The status is 3 (time) when the time left affords no more work than a try that
    ran short. Returns the sweep's output and the work allowance of the last try.
    """
    allow = min(int(work_left), FIRST_WORK)
    while True:
        t = time.perf_counter()
        res = _sweep(g, s, e, cliques_left, allow)
        if res[3] != 2 or allow >= work_left:
            return res, allow
        now = time.perf_counter()
        afford = int(res[4] / max(now - t, 1e-9) * (deadline - now))
        if afford <= allow:
            return (*res[:3], 3, *res[4:]), allow
        allow = min(int(work_left), max(2 * allow, afford))


def _stop_point(g: dict, s: int, e: int, cliques_left: int, work_left: int, status: int,
                ptr, nodes, lmax) -> tuple[int, int, int]:
    """Edge, node and level index where a sweep of ``[s, e)`` stopped.

    On a clique or work budget (status 1, 2) the block is swept again edge by edge
    with the same budgets until the edge that exhausts them (the counts add up over
    edges, so this is the edge where the block sweep stopped; it costs about as much
    as the sweep that failed). On time (status 3), the edge is not known; the clique
    listed last (or the block's first edge) stands for it.
    """
    if status in (1, 2):
        k = w = 0
        for f in range(s, e):
            res = _sweep(g, f, f + 1, cliques_left - k, work_left - w)
            if res[3] != 0:
                break
            k += len(res[0]) - 1
            w += int(res[4])
        return f, int(g["u"][f]), int(g["lev"][f])
    if len(ptr) > 1:
        return s, int(nodes[ptr[-2]]), int(lmax[-1])
    return s, int(g["u"][s]), int(g["lev"][s])


INC_BUCKET = 1 << 16  # edges per bucket when the incidence is cut into ranges (a power of two)


UNIT_ARRAYS = ("ptr", "nodes", "lmax", "lmin", "pairs")


def _unit_arrays(folder: Path, tags: list[str], name: str):
    """One unit file at a time, memory-mapped: never all units at once."""
    for tag in tags:
        yield load_npy(folder / f"{tag}.{name}.npy", mmap=True)


def collect_units(folder: Path, tags: list[str], out: Path, n_edges: int, part: str = "all",
                  budget: int | None = None, pieces: int = 1) -> dict:
    """Concatenate unit outputs in unit order into the candidate table files, and
    build the edge -> candidate CSR from the units' pairs.

    Writes ``cand_ptr``, ``cand_nodes``, ``level_max``, ``level_min`` (``part="tables"``,
    :func:`collect_tables`) and ``inc_ptr``, ``inc_cand`` (``part="incidence"``:
    :func:`plan_incidence`, then :func:`incidence_range` on each of its edge ranges,
    one after the other here; the stage runs the ranges and the tables side by
    side); ``part="all"`` does both.
    """
    t_cpu = time.thread_time()
    info: dict = {}
    if part in ("all", "tables"):
        info.update(collect_tables(folder, tags, out))
    if part in ("all", "incidence"):
        plan = plan_incidence(folder, tags, out, n_edges, budget, pieces)
        uncovered = sum(incidence_range(folder, tags, out, *r)["uncovered_edges"] for r in plan["ranges"])
        info.update(incidences=plan["incidences"], uncovered_edges=uncovered, incidence_ranges=len(plan["ranges"]))
    info["cpu"] = time.thread_time() - t_cpu
    return info


def collect_tables(folder: Path, tags: list[str], out: Path) -> dict:
    """``cand_ptr``, ``cand_nodes``, ``level_max``, ``level_min`` from the units, in unit
    order, each written as it grows (all but the pointers copied file to file)."""
    t_cpu = time.thread_time()
    out.mkdir(parents=True, exist_ok=True)
    n_cand = sum(len(load_npy(folder / f"{tag}.ptr.npy", mmap=True)) - 1 for tag in tags)
    largest, rows = 0, 0

    def joined_ptr():  # the units' candidate pointers as one pointer array
        nonlocal largest, rows
        yield np.zeros(1, np.int64)
        for ptr in _unit_arrays(folder, tags, "ptr"):
            ptr = np.asarray(ptr, np.int64)
            if len(ptr) > 1:
                largest = max(largest, int(np.diff(ptr).max()))
            yield ptr[1:] + rows
            rows += int(ptr[-1])

    save_npy_parts(out / "cand_ptr.npy", joined_ptr(), np.int64, n_cand + 1)
    for name, dtype, file in (("nodes", np.int64, "cand_nodes"), ("lmax", np.int32, "level_max"),
                              ("lmin", np.int32, "level_min")):
        with NpyStream(out / f"{file}.npy", dtype, rows if name == "nodes" else n_cand) as table:
            for tag in tags:  # file to file, by the operating system
                table.append_file(folder / f"{tag}.{name}.npy")
    return {"candidates": n_cand, "member_rows": rows, "largest_candidate": largest,
            "cpu": time.thread_time() - t_cpu}


def plan_incidence(folder: Path, tags: list[str], out: Path, n_edges: int, budget: int | None,
                   pieces: int = 1) -> dict:
    """Cut the incidence into edge ranges and create its two files, for
    :func:`incidence_range` to fill range by range (side by side, in any order).

    One pass over the units' pairs counts them per bucket of :data:`INC_BUCKET`
    edges; without a budget it counts them per edge instead, and writes the row
    pointers ``inc_ptr`` here (so the ranges need not count again). Ranges are
    whole buckets: each holds at most ``budget`` bytes (``None``: no limit; a
    bucket larger than that is a range of its own), and there are at least
    ``pieces`` of them when the buckets allow, with about equal incidences.
    Returns ``{"ranges": [(lo, hi, start, counted)], "incidences": n}``, ``start``
    being where the range's rows begin in ``inc_cand``.
    """
    out.mkdir(parents=True, exist_ok=True)
    n_buckets = max(1, -(-n_edges // INC_BUCKET))
    shift = INC_BUCKET.bit_length() - 1
    if INC_BUCKET != 1 << shift:
        raise ValueError("INC_BUCKET must be a power of two")
    per_bucket = np.zeros(n_buckets, np.int64)
    rows = None
    if budget is None:  # no memory limit: count every edge's row here, and write the row pointers
        rows = np.zeros(n_edges + 2, np.int64)
        for pairs in _unit_arrays(folder, tags, "pairs"):
            count_rows(pairs, rows)
        starts_from_counts(rows, np.int64(n_edges))  # rows[e + 1]: where row e starts
        edge_starts = rows[np.minimum(np.arange(n_buckets + 1) * INC_BUCKET, n_edges) + 1]
        per_bucket = np.diff(edge_starts)
    else:
        for pairs in _unit_arrays(folder, tags, "pairs"):
            count_buckets(pairs, np.int64(shift), per_bucket)
    total = int(per_bucket.sum())
    n_cand = sum(len(load_npy(folder / f"{tag}.ptr.npy", mmap=True)) - 1 for tag in tags)
    if rows is not None:
        save_npy(out / "inc_ptr.npy", rows[1:])
    else:
        create_npy(out / "inc_ptr.npy", np.int64, n_edges + 1)
    create_npy(out / "inc_cand.npy", np.int32 if n_cand < 2**31 else np.int64, total)
    if n_edges == 0:
        return {"ranges": [], "incidences": total}
    # bytes of a range: 8 per incidence (the id, and room for the unit file being read), 8 per edge (row counter)
    cost = per_bucket * 8 + np.minimum(INC_BUCKET, n_edges - np.arange(n_buckets) * INC_BUCKET) * 8
    csum = np.concatenate([[0], np.cumsum(cost)])
    starts = np.concatenate([[0], np.cumsum(per_bucket)])
    if budget is None:  # `pieces` ranges cut at the nearest buckets to equal shares
        k = max(1, int(pieces))
        cuts = np.clip(np.searchsorted(csum, csum[-1] * np.arange(1, k) / k), 1, max(1, n_buckets - 1))
        bounds = np.unique(np.concatenate([[0], cuts, [n_buckets]]).astype(np.int64)).tolist()
    else:  # greedy: each range as large as the budget allows, and no more than an equal share
        cap = max(1, min(int(budget), -(-int(csum[-1]) // max(1, int(pieces)))))
        bounds, b = [0], 0
        while b < n_buckets:
            c = int(np.searchsorted(csum, csum[b] + cap, side="right")) - 1
            b = min(n_buckets, max(c, b + 1))
            bounds.append(b)
    counted = rows is not None
    ranges = [(b * INC_BUCKET, min(n_edges, c * INC_BUCKET), int(starts[b]), counted)
              for b, c in zip(bounds[:-1], bounds[1:])]
    return {"ranges": ranges, "incidences": total}


def incidence_range(folder: Path, tags: list[str], out: Path, lo: int, hi: int, start: int,
                    counted: bool = False) -> dict:
    """Rows ``[lo, hi)`` of the edge -> candidate CSR (a counting sort of the units'
    pairs that fall in the range), written into the files :func:`plan_incidence`
    made: ``inc_cand`` from ``start``, ``inc_ptr`` at ``lo + 1 .. hi``. When the
    plan has ``counted`` the rows (and written ``inc_ptr``), their starts are read
    from it instead of counted again."""
    t_cpu = time.thread_time()
    cnt = np.zeros(hi - lo + 2, np.int64)
    if counted:
        cnt[1:] = load_npy(out / "inc_ptr.npy", mmap=True)[lo:hi + 1] - start
    else:
        for pairs in _unit_arrays(folder, tags, "pairs"):
            count_rows_in(pairs, np.int64(lo), np.int64(hi), cnt)
        starts_from_counts(cnt, np.int64(hi - lo))
    inc_cand = np.empty(int(cnt[hi - lo + 1]), load_npy(out / "inc_cand.npy", mmap=True).dtype)
    k0 = 0
    for uptr, pairs in zip(_unit_arrays(folder, tags, "ptr"), _unit_arrays(folder, tags, "pairs")):
        scatter_rows_in(np.asarray(uptr), pairs, np.int64(k0), np.int64(lo), np.int64(hi), cnt, inc_cand)
        k0 += len(uptr) - 1
    uncovered = int(np.count_nonzero(np.diff(cnt[: hi - lo + 1]) == 0))
    write_npy_at(out / "inc_cand.npy", start, inc_cand)
    if not counted:
        write_npy_at(out / "inc_ptr.npy", lo + 1, cnt[1: hi - lo + 1] + start)  # end of each row = start of the next
    return {"uncovered_edges": uncovered, "cpu": time.thread_time() - t_cpu}


def plan_units(n_edges: int, edges_per_unit: int, firsts: np.ndarray | None = None,
               degree: np.ndarray | None = None) -> list[tuple[int, int]]:
    """Edge blocks ``[lo, hi)`` covering all edges, ``ceil(n_edges / edges_per_unit)`` of them.

    Without ``firsts`` the blocks hold equal numbers of edges. With ``firsts`` (the
    number of edges each vertex is the first end of, the edges sorted by first end)
    and ``degree``, they hold about equal estimated work instead, cut between
    vertices: the sweep's per-vertex path links a first end's neighbours once,
    which costs about its squared degree whatever the number of its edges, so
    blocks of vertices with few edges each cost more per edge
    (:data:`BUILD_COST`, measured here).
    """
    n_units = max(1, -(-int(n_edges) // max(1, int(edges_per_unit))))
    if firsts is None or n_units == 1:
        step = -(-int(n_edges) // n_units) if n_edges else 1
        return [(lo, min(n_edges, lo + step)) for lo in range(0, n_edges, step)]
    firsts = np.asarray(firsts, np.int64)
    degree = np.asarray(degree, np.int64)
    cost = firsts + BUILD_COST * np.where(firsts > 0, degree.astype(np.float64) ** 2, 0.0)
    csum = np.cumsum(cost)
    ends = np.cumsum(firsts)  # the edges before the next vertex
    cuts = np.searchsorted(csum, csum[-1] * np.arange(1, n_units) / n_units)
    bounds = np.unique(np.concatenate([[0], ends[cuts], [n_edges]]))
    return [(int(a), int(b)) for a, b in zip(bounds[:-1], bounds[1:])]


def plan_graph_units(graph_dir: Path, n_edges: int, edges_per_unit: int) -> list[tuple[int, int]]:
    """:func:`plan_units` from the graph files (``firsts.npy``, ``indptr.npy``)."""
    degree = np.diff(load_npy(graph_dir / "indptr.npy", mmap=True))
    return plan_units(n_edges, edges_per_unit, load_npy(graph_dir / "firsts.npy", mmap=True), degree)


BUILD_COST = 0.01  # a first end's neighbour links cost about this many edges per squared degree (fitted to the unit times of the planted benchmark export)
