"""Per-part functions of the fit stage.

Once, before the EM, the edges' candidate lists are put into a prefix tree
(``kernels/prefixtree.py``): edges with the same list become one end node, and
lists that start alike share their nodes, so an EM sweep does about half the work
of the flat incidence. The tree of all edges splits into independent subtrees,
one per *top* (an edge's first candidate in list order), so a *part* is a set of
whole subtrees: :func:`plan_tree_parts` gives each edge its top and cuts the tops
into ranges of about equal incidence counts, then writes each part's rows (as
ranks) into the part's own scratch files, streaming the incidence once; each
part's tree is built from those files alone (:func:`tree_part`). The parts'
trees, in part order, are exactly the tree of all edges.

The candidates are then numbered in the order the trees use them (first use,
parts in order), which keeps the ``mu`` and ``acc`` entries one part touches
close together; the stage works in that numbering and maps back at the end. Each
EM step sweeps every part's tree and returns a dense accumulator over the part's
id range plus the offset where it starts.
"""

from __future__ import annotations

import threading
from pathlib import Path

import numpy as np

from cliquewise.kernels.prefixtree import (add_row_lengths, build_tree_keyed, check_tree,
                                            first_seen_order, gather_rows, row_tops, tree_sweep, tree_unsupported)
from cliquewise.parts.order import rank_by_size
from cliquewise.parts.vectors import open_vector, release
from cliquewise.store import NpyStream, drop_mapped_pages, load_npy, npy_blocks, resident_bytes, save_npy

TREE_ARRAYS = ("cand", "depth", "end", "ey")  # plus p*.strag.npy once localized


MIN_PARTS = 16  # enough to balance threads: the parts whose edges have small tops cost more per node


def part_size(total_incidences: int, incidences_per_part: int) -> int:
    """Incidences per part: at most ``incidences_per_part``, and small enough for
    :data:`MIN_PARTS` parts once there is enough work (at least 250k incidences a
    part). It depends on the data only (never on the engine), so results do not either."""
    return min(int(incidences_per_part), max(250_000, -(-int(total_incidences) // MIN_PARTS)))


PLAN_BLOCK = 1 << 20  # edges per block when the plan reads the incidence


def plan_tree_parts(enum_dir: str, out_dir: str, per_part: int, budget: int | None = None) -> list[dict]:
    """Give every edge its top and cut the tops into parts of whole subtrees.

    Writes ``{out_dir}/top.npy`` (each edge's top: the rank of the first candidate
    of its list) and returns one record per part with its range of tops
    ``[top_lo, top_hi)``. In the order of the edges by top (stable), the cuts fall
    at the first top boundary at or after each multiple of ``per_part``
    incidences, so the parts depend on the data only. The incidence is read a
    block of edges at a time; with ``budget`` (bytes) its mapped pages are dropped
    between blocks. Memory: the tops' incidence counts (8 bytes per candidate).
    A second pass writes each part's rows into the part's own files
    (:func:`_write_part_rows`).
    """
    d = Path(enum_dir)
    out = Path(out_dir)
    out.mkdir(parents=True, exist_ok=True)
    rank = load_npy(out / "rank.npy", mmap=True)
    inc_ptr, inc_cand, y = incidence_maps(enum_dir)
    n_edges, n_cand = len(inc_ptr) - 1, len(rank)
    per_top = np.zeros(n_cand, np.int64)  # incidences of the edges with each top
    with NpyStream(out / "top.npy", np.int32 if n_cand < 2**31 else np.int64, n_edges) as f_top:
        for lo in range(0, n_edges, PLAN_BLOCK):
            ptr = np.asarray(inc_ptr[lo:min(n_edges, lo + PLAN_BLOCK) + 1])
            top = row_tops(ptr - ptr[0], inc_cand[ptr[0]:ptr[-1]], rank)
            if len(top) and top.min() < 0:
                raise ValueError(f"{d / 'inc_ptr.npy'}: an edge lies in no candidate")
            add_row_lengths(top, ptr, per_top)
            f_top.write(top)
            if budget and resident_bytes() > budget:
                drop_mapped_pages((inc_ptr, inc_cand, rank))
    if n_edges == 0:
        return []
    cum = np.cumsum(per_top, out=per_top)  # incidences up to and including each top
    total = int(cum[-1])
    n_parts = max(1, -(-total // max(1, per_part)))
    # the edge where the running count first reaches a multiple lies in the first top
    # whose cumulative count reaches it; the cut is the end of that top
    last = np.searchsorted(cum, np.linspace(0, total, n_parts + 1)[1:-1], side="left")
    bounds = np.unique(np.concatenate([[0], last + 1, [n_cand]]))
    inc_at = np.concatenate([[0], cum])[bounds]
    del per_top, cum
    planned = [{"index": i, "top_lo": int(a), "top_hi": int(b)}
               for i, (a, b) in enumerate((a, b) for a, b, c0, c1 in zip(bounds[:-1], bounds[1:], inc_at[:-1],
                                                                           inc_at[1:]) if c1 > c0)]
    _write_part_rows(out, planned, (inc_ptr, inc_cand, y), rank, budget)
    return planned


def _bucket(out: Path, index: int, name: str) -> Path:
    return out / f"b{index:05d}.{name}.bin"


def _write_part_rows(out: Path, planned: list[dict], maps, rank, budget: int | None) -> None:
    """Second pass of the plan: every part's rows, turned into ranks, with their
    weights, appended to the part's own scratch files (``b{index}.len/.rows/.y.bin``)
    in edge order, a block of edges at a time. A part's tree is then built from its
    files alone."""
    inc_ptr, inc_cand, y = maps
    tops_lo = np.array([p["top_lo"] for p in planned], np.int64)
    key_dtype = np.int32 if len(rank) < 2**31 else np.int64
    for p in planned:
        for name in ("len", "rows", "y"):
            _bucket(out, p["index"], name).unlink(missing_ok=True)
    for lo, top in npy_blocks(out / "top.npy", PLAN_BLOCK):
        hi = lo + len(top)
        ptr = np.asarray(inc_ptr[lo:hi + 1])
        base = int(ptr[0])
        local = ptr - base
        pid = np.searchsorted(tops_lo, top, side="right") - 1
        order = np.argsort(pid, kind="stable")  # edge order within each part
        rows = np.empty(int(local[-1]), inc_cand.dtype)
        gather_rows(local, inc_cand[base:int(ptr[-1])], order, np.int64(0), rows)
        keyed = np.asarray(rank)[rows].astype(key_dtype)
        del rows
        lens = np.diff(local)[order].astype(np.int32)
        ys = np.asarray(y[lo:hi])[order]
        counts = np.bincount(pid, minlength=len(planned))
        e_off = np.concatenate([[0], np.cumsum(counts)])
        r_off = np.concatenate([[0], np.cumsum(lens, dtype=np.int64)])[e_off]
        for i in np.flatnonzero(counts):
            a, b = int(e_off[i]), int(e_off[i + 1])
            for name, arr in (("len", lens[a:b]), ("rows", keyed[int(r_off[i]):int(r_off[i + 1])]), ("y", ys[a:b])):
                with open(_bucket(out, planned[i]["index"], name), "ab") as fh:
                    fh.write(memoryview(np.ascontiguousarray(arr)).cast("B"))
        if budget and resident_bytes() > budget:
            drop_mapped_pages((inc_ptr, inc_cand, y, rank))


def _files(out: Path, index: int, stem: str = "p") -> list[Path]:
    return [out / f"{stem}{index:05d}.{name}.npy" for name in TREE_ARRAYS]


def incidence_maps(enum_dir: str) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """``inc_ptr``, ``inc_cand`` and ``weight`` of an enumerate folder, memory-mapped."""
    d = Path(enum_dir)
    return (load_npy(d / "inc_ptr.npy", mmap=True), load_npy(d / "inc_cand.npy", mmap=True),
            load_npy(d / "weight.npy", mmap=True))


def tree_part(part: dict, out_dir: str, budget: int | None = None) -> dict:
    """Build one part's prefix tree (global candidate ids) from its rows and write it.

    Reads the part's scratch files from the plan (then removes them) and writes
    ``{out_dir}/g{index:05d}.cand/.depth/.end/.ey.npy``. With ``budget`` the mapped
    pages of the rank table are dropped afterwards.
    """
    out = Path(out_dir)
    by_rank = load_npy(out / "by_rank.npy", mmap=True)
    files = {name: _bucket(out, part["index"], name) for name in ("len", "rows", "y")}
    lens = np.fromfile(files["len"], np.int32) if files["len"].exists() else np.empty(0, np.int32)
    ptr = np.zeros(len(lens) + 1, np.int64)
    np.cumsum(lens, out=ptr[1:])
    key_dtype = np.int32 if len(by_rank) < 2**31 else np.int64
    keyed = (np.fromfile(files["rows"], key_dtype) if files["rows"].exists() else np.empty(0, key_dtype))
    ys = np.fromfile(files["y"], np.float64) if files["y"].exists() else np.empty(0, np.float64)
    if len(keyed) != ptr[-1] or len(ys) != len(lens):
        raise ValueError(f"{files['rows']}: the part's scratch files do not match")
    tree = build_tree_keyed(ptr, keyed.astype(np.int64), ys, by_rank)
    if budget:
        drop_mapped_pages((by_rank,))
    for f, arr in zip(_files(out, part["index"], "g"), tree):
        save_npy(f, arr)
    for f in files.values():
        f.unlink(missing_ok=True)
    return {**part, "edges": int(len(lens)), "incidences": int(ptr[-1]), "nodes": int(len(tree[0])),
            "ends": int(len(tree[2]))}


def number_candidates(part_list: list[dict], out_dir: str, n_cand: int, budget: int | None = None) -> list[int]:
    """The candidates' new ids, by first use in the trees (parts in order).

    Writes ``{out_dir}/new_id.npy`` (int64) and returns ``first``: the candidates
    first used by part ``i`` are numbered ``first[i] .. first[i + 1] - 1``.
    Candidates no tree uses (none in practice: every candidate's pairs are edges)
    come last, in id order. The ids are written into the mapped file; with
    ``budget`` (bytes) its pages are dropped whenever the resident set passes it,
    checked every :data:`NUMBER_BLOCK_LIMITED` ids (each may touch a new page), so
    the driver holds about the budget, not the whole numbering.
    """
    out = Path(out_dir)
    new_id = np.lib.format.open_memmap(out / "new_id.npy", mode="w+", dtype=np.int64, shape=(n_cand,))
    for lo in range(0, n_cand, NUMBER_BLOCK):
        new_id[lo:lo + NUMBER_BLOCK] = -1
        drop_mapped_pages((new_id,))
    ids = np.asarray(new_id)
    nxt = 0
    first = []
    for part in part_list:
        first.append(nxt)
        g = load_npy(_files(out, part["index"], "g")[0], mmap=True)
        step = NUMBER_BLOCK_LIMITED if budget else NUMBER_BLOCK  # a block's writes land all over the file
        for lo in range(0, len(g), step):
            nxt = first_seen_order(np.asarray(g[lo:lo + step]), ids, nxt)
            if budget and resident_bytes() > budget:
                drop_mapped_pages((new_id, g))
        drop_mapped_pages((g,))
    first.append(nxt)
    for lo in range(0, n_cand, NUMBER_BLOCK):
        block = ids[lo:lo + NUMBER_BLOCK]
        rest = np.flatnonzero(block < 0)
        block[rest] = nxt + np.arange(len(rest))
        nxt += len(rest)
        drop_mapped_pages((new_id,))
    new_id.flush()
    del ids, new_id
    return first


NUMBER_BLOCK = 1 << 20
NUMBER_BLOCK_LIMITED = 1 << 14  # at most 64 MB of pages first touched between two checks


def localize_part(part: dict, out_dir: str, new_id, own_lo: int, own_end: int) -> dict:
    """Renumber one tree's candidates to local ids and write the part's files.

    The candidates a part uses first have the new ids ``[own_lo, own_end)``, one
    block; they become local ids ``0 .. w - 1``. The few it shares with earlier
    parts (*stragglers*, ids below ``own_lo``) follow as ``w, w + 1, ...``, and
    their new ids are stored in ``p{index:05d}.strag.npy``. A sweep then needs
    ``mu`` and an accumulator only over ``w`` plus the stragglers.

    Writes ``{out_dir}/p{index:05d}.*.npy`` (``cand`` as uint32 when the local ids
    allow, ``depth`` as uint16 when the tree is shallow enough, ``end`` as int32
    below 2**31 nodes) and removes the
    ``g*`` files. Returns the part record with ``cand_lo``/``cand_hi`` (the own
    block) and ``width`` (local ids in all).
    """
    out = Path(out_dir)
    src = _files(out, part["index"], "g")
    cand, depth, end, ey = (load_npy(f) for f in src)
    cand = np.asarray(new_id)[cand]
    w = own_end - own_lo
    old = cand < own_lo
    strag = np.unique(cand[old])
    local = cand - own_lo
    local[old] = w + np.searchsorted(strag, cand[old])
    width = w + len(strag)
    if width < 2**32 - 1:
        local = local.astype(np.uint32)  # half the memory traffic of the sweep
    if len(depth) and depth.max() < 2**16 - 1:
        depth = depth.astype(np.uint16)
    if len(cand) < 2**31 - 1:
        end = end.astype(np.int32)  # node positions within the part
    for f, arr in zip(_files(out, part["index"]), (local, depth, end, ey)):
        save_npy(f, arr)
    save_npy(out / f"p{part['index']:05d}.strag.npy", strag.astype(np.int64))
    for f in src:
        f.unlink()
    files = [f.name for f in _files(out, part["index"])] + [f"p{part['index']:05d}.strag.npy"]
    return {**part, "files": files, "cand_lo": int(own_lo), "cand_hi": int(own_end) - 1, "width": int(width),
            "stragglers": int(len(strag))}


def prepare_trees(engine, enum_dir: str, tree_dir: str, per_part: int, budget: int | None = None) -> list[dict]:
    """All of the fit's preparation: parts, their trees, the first-use numbering.

    Returns the part list and writes ``new_id.npy``; the part files are in
    ``tree_dir``. The candidates' list order (``rank.npy``, ``by_rank.npy``) and the
    edges' tops (``top.npy``) are built a block at a time in files there
    (:func:`cliquewise.parts.order.rank_by_size`) and removed once the trees are
    built, so no step on the driver holds an array over all candidates.
    ``budget`` (bytes a task may hold) makes the steps drop the pages they have
    mapped as they go.
    """
    tree_dir = Path(tree_dir)
    tree_dir.mkdir(parents=True, exist_ok=True)
    n_cand = rank_by_size(Path(enum_dir) / "cand_ptr.npy", tree_dir / "rank.npy", tree_dir / "by_rank.npy")
    trim = budget * 2 // 5 if budget else None  # resident bytes at which mapped pages are dropped
    planned = engine.submit(plan_tree_parts, str(enum_dir), str(tree_dir), per_part, trim).result()
    built = engine.map(tree_part, planned, str(tree_dir), trim, desc="fit: prefix trees")
    first = number_candidates(built, str(tree_dir), n_cand, trim)
    part_list = engine.map(_localize_item, [(b, first[i], first[i + 1]) for i, b in enumerate(built)],
                           str(tree_dir), desc="fit: numbering")
    for name in ("top", "rank", "by_rank"):
        (tree_dir / f"{name}.npy").unlink(missing_ok=True)
    return part_list


def _localize_item(item, out_dir):
    part, own_lo, own_end = item
    return localize_part(part, out_dir, load_npy(Path(out_dir) / "new_id.npy", mmap=True), own_lo, own_end)


_TREE_CACHE: dict = {}
_TREE_LOCK = threading.Lock()
_TREE_CACHE_LIMIT = 64


def _load_tree(tree_dir: str, part: dict, cache_bytes: int | None = None):
    """A part's tree arrays and stragglers, checked when read and kept in this process
    between EM steps.

    Keyed by path and modification time, so a rewritten part is read again. The
    arrays are what the fit sweeps every step anyway (memory linear in incidences).
    With ``cache_bytes`` (a memory limit), parts that would take the cache past it
    are read again at every step instead of kept.
    """
    files = _files(Path(tree_dir), part["index"]) + [Path(tree_dir) / f"p{part['index']:05d}.strag.npy"]
    key = (str(tree_dir), part["index"], tuple(f.stat().st_mtime_ns for f in files))
    with _TREE_LOCK:
        hit = _TREE_CACHE.get(key)
    if hit is None:
        hit = tuple(load_npy(f) for f in files)
        check_tree(*hit[:4], part["width"])
        strag = hit[4]
        if len(strag) != part["width"] - (part["cand_hi"] - part["cand_lo"] + 1) or (
                len(strag) and (strag.min() < 0 or strag.max() >= part["cand_lo"])):
            raise ValueError(f"{files[4]}: stragglers do not match the part")
        with _TREE_LOCK:  # the engine's threads load parts side by side
            if len(_TREE_CACHE) >= _TREE_CACHE_LIMIT:
                _TREE_CACHE.clear()
            held = sum(a.nbytes for v in _TREE_CACHE.values() for a in v)
            if cache_bytes is None or held + sum(a.nbytes for a in hit) <= cache_bytes:
                _TREE_CACHE[key] = hit
    return hit


def _local(part: dict, strag: np.ndarray, x: np.ndarray) -> np.ndarray:
    """``x`` (stage numbering) restricted to a part's local ids: its own block, then stragglers."""
    lo, hi = part["cand_lo"], part["cand_hi"]
    out = np.empty(part["width"], np.float64)
    out[:hi - lo + 1] = x[lo:hi + 1]
    out[hi - lo + 1:] = x[strag]
    return out


def clear_cache() -> None:
    """Forget cached trees (the fit stage calls this when it ends)."""
    with _TREE_LOCK:
        _TREE_CACHE.clear()


def em_part(part: dict, tree_dir: str, mu, want_loglik: bool = True, out=None,
            cache_bytes: int | None = None) -> dict:
    """The map of one EM step on one part: accumulators (own block and stragglers)
    and ``sum Y log lambda``.

    ``mu`` is the array or the path of its file (:func:`vectors.open_vector`). With
    ``out`` (a stage-wide accumulator: an array shared by threads of this process,
    or the path of a file) the own block is written straight into
    ``out[cand_lo:cand_hi + 1]``, which no other part writes, and the result carries
    ``acc=None``; stragglers always come back.
    """
    if part["width"] == 0:
        return {"cand_lo": 0, "acc": np.zeros(0), "strag": np.zeros(0, np.int64), "strag_acc": np.zeros(0),
                "loglik": 0.0}
    cand, depth, end, ey, strag = _load_tree(tree_dir, part, cache_bytes)
    acc = np.zeros(part["width"], np.float64)
    mu = open_vector(mu)
    local = _local(part, strag, mu)
    release(mu)
    ll = tree_sweep(cand, depth, end, ey, local, acc, want_loglik)
    lo = part["cand_lo"]
    w = part["cand_hi"] - lo + 1
    own = acc[:w]
    if out is not None:
        target = open_vector(out, writable=True)
        target[lo:lo + w] = own
        if target is not out:  # a file: on disk before the driver reads it
            target.flush()
            release(target)
        own = None
    return {"cand_lo": lo, "acc": own, "strag": strag, "strag_acc": acc[w:], "loglik": float(ll)}


def heaviest_first(part_list: list[dict]) -> list[int]:
    """Positions of the parts, most expensive sweep first (longest-processing-time
    scheduling: the engine starts tasks in the order given, so a heavy part left
    for last would keep one thread busy while the others idle). Cost estimate: tree
    nodes plus twice the local width (a wide part misses the cache more often)."""
    cost = [p.get("nodes", 0) + 2 * p.get("width", 0) for p in part_list]
    return sorted(range(len(part_list)), key=lambda i: (-cost[i], i))


def add_partial(acc: np.ndarray, res: dict) -> None:
    """Add one :func:`em_part` result into the stage-wide accumulator (its own
    block only when it was not written there already)."""
    lo = res["cand_lo"]
    if res["acc"] is not None:
        acc[lo:lo + len(res["acc"])] += res["acc"]
    acc[res["strag"]] += res["strag_acc"]  # stragglers are distinct within a part


def support_part(part: dict, tree_dir: str, mu_kept, mu_full, cache_bytes: int | None = None) -> np.ndarray:
    """Candidates (stage numbering) to keep so that each of this part's ends keeps a positive rate."""
    if part["width"] == 0:
        return np.empty(0, np.int64)
    cand, depth, end, _, strag = _load_tree(tree_dir, part, cache_bytes)
    mu_kept, mu_full = open_vector(mu_kept), open_vector(mu_full)
    kept, full = _local(part, strag, mu_kept), _local(part, strag, mu_full)
    release(mu_kept, mu_full)
    rel = tree_unsupported(cand, depth, end, kept, full)
    rel = rel.astype(np.int64)
    w = part["cand_hi"] - part["cand_lo"] + 1
    out = rel + part["cand_lo"]
    late = rel >= w
    out[late] = strag[rel[late] - w]
    return out


def restore_support(engine, part_list, tree_dir: str, mu_kept, mu_full, cache_bytes: int | None = None) -> np.ndarray:
    """Candidate ids to un-prune so every edge keeps a positive rate (the vectors
    as arrays, or paths of their files)."""
    if not isinstance(mu_kept, str):
        mu_kept, mu_full = engine.scatter(mu_kept), engine.scatter(mu_full)
    res = engine.map(support_part, part_list, tree_dir, mu_kept, mu_full, cache_bytes)
    return np.unique(np.concatenate(res)) if res else np.empty(0, np.int64)
