"""Per-unit functions of the enumerate stage.

* :func:`choose_levels` turns the ``levels`` setting and the weights into sorted
  thresholds, and :func:`level_index` gives each edge the index of the highest
  threshold at or below its weight.
* :func:`build_graph` reads the edge store and writes the symmetric CSR (with per
  entry level and edge index) as ``.npy`` files that every unit memory-maps.
* :func:`enumerate_unit` lists the candidates first seen at the edges of one edge
  block (the high-to-low sweep, see ``kernels/cliques.py``), under the blow-up
  budget (clique count, work, seconds), and their ``level_min``.
  Each unit also looks up the edge ids of its candidates' member pairs while
  their rows are in cache.
* :func:`collect_units` concatenates the units' candidates and turns their pairs
  into the edge -> candidate CSR the fit reads (a counting sort by edge).
"""

from __future__ import annotations

import time
from pathlib import Path

import numpy as np
import pyarrow.parquet as pq

from cliquewise.kernels.cliques import level_min, sweep_candidates
from cliquewise.kernels.graph import csr_from_edges
from cliquewise.kernels.incidence import candidate_pairs, count_rows, scatter_rows, starts_from_counts
from cliquewise.store import load_npy, save_npy, save_npy_parts

GRAPH_FILES = ("indptr", "nbr", "nlev", "eid", "u", "v", "lev", "weight")
STATUS_TEXT = {1: "clique count", 2: "work", 3: "time"}


def choose_levels(weights: np.ndarray, spec) -> np.ndarray:
    """Sorted thresholds. The smallest weight is always a threshold, so every edge is covered.

    ``"all"``: every distinct weight. An integer ``n``: ``n`` quantiles of the edge
    weights (fewer when weights repeat). A list: those thresholds plus the minimum.
    """
    w = np.asarray(weights, np.float64)
    if w.size == 0:
        return np.empty(0, np.float64)
    wmin = float(w.min())
    if spec == "all":
        return np.unique(w)
    if isinstance(spec, int):
        q = np.quantile(w, np.linspace(0.0, 1.0, spec, endpoint=False), method="lower")
        return np.unique(np.concatenate([[wmin], q]))
    levels = np.asarray(sorted(float(x) for x in spec), np.float64)
    levels = levels[(levels > wmin) & (levels <= w.max())]
    return np.unique(np.concatenate([[wmin], levels]))


def level_index(weights: np.ndarray, levels: np.ndarray) -> np.ndarray:
    """Index of the highest threshold <= each weight (int32)."""
    return (np.searchsorted(levels, weights, side="right") - 1).astype(np.int32)


def build_graph(edge_files: list, n_nodes: int, levels_spec, out: Path) -> dict:
    """Read the edge store, choose levels, build the CSR; write ``.npy`` files into ``out``."""
    t_cpu = time.thread_time()
    us, vs, ws = [], [], []
    for f in edge_files:
        t = pq.read_table(f, columns=["u", "v", "weight"])
        us.append(t.column("u").to_numpy())
        vs.append(t.column("v").to_numpy())
        ws.append(t.column("weight").to_numpy())
    u = np.concatenate(us) if us else np.empty(0, np.int64)
    v = np.concatenate(vs) if vs else np.empty(0, np.int64)
    w = np.concatenate(ws) if ws else np.empty(0, np.float64)
    del us, vs, ws
    levels = choose_levels(w, levels_spec)
    lev = level_index(w, levels)
    indptr, nbr, nlev, eid = csr_from_edges(n_nodes, u, v, lev)
    out.mkdir(parents=True, exist_ok=True)
    for name, arr in zip(GRAPH_FILES, (indptr, nbr, nlev, eid, u, v, lev, w)):
        save_npy(out / f"{name}.npy", arr)
    save_npy(out / "levels.npy", levels)
    return {"edges": int(len(u)), "levels": int(len(levels)), "cpu": time.thread_time() - t_cpu}


def load_graph(folder: Path) -> dict:
    return {name: load_npy(folder / f"{name}.npy", mmap=True) for name in GRAPH_FILES}


def enumerate_unit(graph_dir: str, lo: int, hi: int, max_cliques: int, max_seconds: float,
                   out: Path, tag: str, block: int = 2048) -> dict:
    """Candidates first seen at edges ``[lo, hi)``; writes ``{tag}.ptr/.nodes/.lmax/.lmin.npy``."""
    t0 = time.perf_counter()
    t_cpu = time.thread_time()
    g = load_graph(Path(graph_dir))
    ptrs, nodes_l, lmax_l = [], [], []
    total, work, offset = 0, 0, 0
    status, where = 0, lo
    max_work = np.int64(max(1, max_cliques) * 64)
    deadline = t0 + max_seconds
    at_node, at_level = -1, -1
    for s, e in _blocks(Path(graph_dir), lo, hi, block):
        (ptr, nodes, lmax, st, wd), allow = _sweep_within(g, s, e, max_cliques - total, max_work - work, deadline)
        work += int(wd)
        if st != 0:
            status = int(st)
            where, at_node, at_level = _stop_point(g, s, e, max_cliques - total, allow, st, ptr, nodes, lmax)
            break
        k = len(ptr) - 1
        if k:
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
    ptr = np.concatenate([np.zeros(1, np.int64)] + ptrs) if ptrs else np.zeros(1, np.int64)
    nodes = np.concatenate(nodes_l) if nodes_l else np.empty(0, np.int64)
    lmax = np.concatenate(lmax_l).astype(np.int32) if lmax_l else np.empty(0, np.int32)
    lmin = level_min(g["indptr"], g["nbr"], g["nlev"], ptr, nodes).astype(np.int32)
    pairs = candidate_pairs(g["indptr"], g["nbr"], g["eid"], ptr, nodes, len(g["u"]))
    out.mkdir(parents=True, exist_ok=True)
    files = []
    for name, arr in (("ptr", ptr), ("nodes", nodes), ("lmax", lmax), ("lmin", lmin), ("pairs", pairs)):
        rel = f"{tag}.{name}.npy"
        save_npy(out / rel, arr)
        files.append(rel)
    result["files"] = files
    result["incidences"] = int(len(pairs))
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
    u = np.asarray(g["u"])
    lev = np.asarray(g["lev"])
    is_clique = (comp_nodes >= max(2, min_size)) & (comp_edges == comp_nodes * (comp_nodes - 1) // 2)
    if not is_clique.any() or len(u) == 0:
        return {"direct": 0, "skipped_edges": 0}
    ce = comp[u]
    n_comp = len(comp_nodes)
    lmin = np.full(n_comp, np.iinfo(np.int32).max, np.int64)
    lmax = np.full(n_comp, -1, np.int64)
    np.minimum.at(lmin, ce, lev)
    np.maximum.at(lmax, ce, lev)
    direct = np.flatnonzero(is_clique & (lmin == lmax))
    if len(direct) == 0:
        return {"direct": 0, "skipped_edges": 0}
    chosen = np.zeros(n_comp, bool)
    chosen[direct] = True
    skip = chosen[ce]
    save_npy(graph_dir / "skip.npy", skip)
    order = np.argsort(comp, kind="stable")
    members = order[chosen[comp[order]]]  # nodes of chosen components, grouped by component, ascending ids
    sizes = comp_nodes[direct]
    ptr = np.concatenate([[0], np.cumsum(sizes)]).astype(np.int64)
    members = members.astype(np.int64)
    pairs = candidate_pairs(g["indptr"], g["nbr"], g["eid"], ptr, members, len(u))
    out.mkdir(parents=True, exist_ok=True)
    for name, arr in (("ptr", ptr), ("nodes", members), ("lmax", lmax[direct].astype(np.int32)),
                      ("lmin", np.zeros(len(direct), np.int32)), ("pairs", pairs)):
        save_npy(out / f"direct.{name}.npy", arr)
    return {"direct": int(len(direct)), "skipped_edges": int(skip.sum())}


# First work allowance of a block: about 0.1 s at the kernel's ~5e7 work units per
# second (see kernels/cliques.py). Most blocks finish within it.
FIRST_WORK = 1 << 22


def _sweep(g: dict, s: int, e: int, cliques_left: int, work_left: int):
    return sweep_candidates(g["indptr"], g["nbr"], g["nlev"], g["eid"], g["u"], g["v"], g["lev"],
                            s, e, np.int64(cliques_left), np.int64(work_left))


def _sweep_within(g: dict, s: int, e: int, cliques_left: int, work_left: int, deadline: float):
    """:func:`sweep_candidates` on edges ``[s, e)`` under the budgets and a deadline.

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
            return (res[0], res[1], res[2], 3, res[4]), allow
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


UNIT_ARRAYS = ("ptr", "nodes", "lmax", "lmin", "pairs")


def collect_units(folder: Path, tags: list[str], out: Path, n_edges: int, part: str = "all") -> dict:
    """Concatenate unit outputs in unit order into the candidate table files, and
    build the edge -> candidate CSR from the units' pairs.

    Writes ``cand_ptr``, ``cand_nodes``, ``level_max``, ``level_min`` (``part="tables"``)
    and ``inc_ptr``, ``inc_cand`` (``part="incidence"``; int32 while there are fewer
    than ``2**31`` candidates); ``part="all"`` does both. The two halves read
    different unit files and write different outputs, so they can run side by side.
    """
    t_cpu = time.thread_time()
    info: dict = {}
    out.mkdir(parents=True, exist_ok=True)

    def each(name):  # one unit file at a time, memory-mapped: never all units at once
        for tag in tags:
            yield load_npy(folder / f"{tag}.{name}.npy", mmap=True)

    ptr = _joined_ptr([load_npy(folder / f"{tag}.ptr.npy") for tag in tags])
    n_cand = len(ptr) - 1
    if part in ("all", "tables"):
        save_npy(out / "cand_ptr.npy", ptr)
        for name, dtype, file in (("nodes", np.int64, "cand_nodes"), ("lmax", np.int32, "level_max"),
                                  ("lmin", np.int32, "level_min")):
            save_npy_parts(out / f"{file}.npy", each(name), dtype, int(ptr[-1]) if name == "nodes" else n_cand)
        sizes = np.diff(ptr)
        info.update(candidates=int(n_cand), member_rows=int(ptr[-1]),
                    largest_candidate=int(sizes.max()) if len(sizes) else 0)
    if part in ("all", "incidence"):
        cnt = np.zeros(n_edges + 2, np.int64)
        for pairs in each("pairs"):
            count_rows(pairs, cnt)
        starts_from_counts(cnt, np.int64(n_edges))
        n_inc = int(cnt[n_edges + 1]) if n_edges else 0
        inc_cand = np.empty(n_inc, np.int32 if n_cand < 2**31 else np.int64)
        k0 = 0
        for tag, pairs in zip(tags, each("pairs")):
            uptr = load_npy(folder / f"{tag}.ptr.npy")
            scatter_rows(uptr, pairs, np.int64(k0), cnt, inc_cand)
            k0 += len(uptr) - 1
        inc_ptr = cnt[: n_edges + 1]
        save_npy(out / "inc_ptr.npy", inc_ptr)
        save_npy(out / "inc_cand.npy", inc_cand)
        info.update(incidences=n_inc, uncovered_edges=int((np.diff(inc_ptr) == 0).sum()))
    info["cpu"] = time.thread_time() - t_cpu
    return info


def _joined_ptr(ptrs: list[np.ndarray]) -> np.ndarray:
    """The units' candidate pointers as one pointer array."""
    out, offset = [np.zeros(1, np.int64)], 0
    for ptr in ptrs:
        out.append(np.asarray(ptr[1:], np.int64) + offset)
        offset += int(ptr[-1])
    return np.concatenate(out)


def plan_units(n_edges: int, edges_per_unit: int) -> list[tuple[int, int]]:
    """Edge blocks ``[lo, hi)`` covering all edges."""
    step = max(1, int(edges_per_unit))
    return [(lo, min(n_edges, lo + step)) for lo in range(0, n_edges, step)]
