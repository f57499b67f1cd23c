"""The results stage: the tables users and tests read (see ``docs/outputs.md``).

Reads   ``ingest/labels.parquet``, ``ingest/report.json``, ``split/nodes.parquet``,
        ``enumerate/*.npy``, ``fit/mu.npy``, ``fit/report.json``.
Writes  ``results/nodes.parquet``    node_id, label, component, degree, strength
        ``results/cliques.parquet``  clique_id, size, intensity, expected_weight, share,
                                     level_min, level_max
        ``results/members.parquet``  clique_id, node_id, label
        ``results/summary.json``     counts, log-likelihood, iterations, convergence, timings

``clique_id`` orders candidates by expected weight, strongest first (ties by
candidate order), so ``clique_id < N`` are the N strongest groups.
"""

from __future__ import annotations

import shutil

import numpy as np
import pyarrow as pa
import pyarrow.parquet as pq

from cliquewise.stage import StageContext
from cliquewise.parts.order import descending_order
from cliquewise.store import (NpyStream, drop_mapped_pages, gather_mapped, gather_mapped_many, load_npy, read_json,
                             write_json_atomic)

NAME = "results"
UPSTREAM = ["ingest", "split", "enumerate", "fit"]
CAUTION = ("The model describes patterns of interaction, not intent or wrongdoing. A group here is a set of "
           "people who interact more than the rest of the network explains; findings about people need "
           "human review under local law and policy before any decision is based on them.")


def params_from(settings) -> dict:
    return {}


MEMBER_ROWS_PER_GROUP = 1 << 21


CLIQUE_ROWS_PER_GROUP = 1 << 20


def _write_cliques(path, order, ptr, mu, expected, total, levels, lmin, lmax) -> None:
    """Write ``cliques.parquet`` (strongest first) one row group at a time, so the
    column copies in clique order never exist for the whole table at once. Every
    array is memory-mapped and read a slice of its file at a time
    (:func:`~cliquewise.store.gather_mapped_many`)."""
    schema = pa.schema([("clique_id", pa.int64()), ("size", pa.int64()), ("intensity", pa.float64()),
                        ("expected_weight", pa.float64()), ("share", pa.float64()),
                        ("level_min", pa.float64()), ("level_max", pa.float64())])
    n = len(order)
    with pq.ParquetWriter(path, schema, compression="zstd") as writer:
        for i in range(0, max(n, 1), CLIQUE_ROWS_PER_GROUP):
            o = np.array(order[i:i + CLIQUE_ROWS_PER_GROUP])  # a copy: the mapped pages go next
            drop_mapped_pages((order,))
            start, end, m, e, lo, hi = gather_mapped_many((ptr[:-1], ptr[1:], mu, expected, lmin, lmax), o)
            writer.write_table(pa.table({
                "clique_id": np.arange(i, i + len(o), dtype=np.int64),
                "size": (end - start).astype(np.int64),
                "intensity": m,
                "expected_weight": e,
                "share": e / total if total > 0 else np.zeros(len(o)),
                "level_min": np.asarray(levels[lo], np.float64) if len(levels) else np.zeros(len(o)),
                "level_max": np.asarray(levels[hi], np.float64) if len(levels) else np.zeros(len(o)),
            }, schema=schema))


def _write_members(path, ptr, members, order, labels: pa.Array) -> int:
    """Write ``members.parquet`` sorted by (clique_id, node_id), one row group at a time.

    Candidate ``order[i]`` becomes clique ``i``; its members are stored ascending,
    so the table is the member slices concatenated in clique order. ``order``,
    ``ptr`` and ``members`` are memory-mapped and read a slice of their files at a
    time, so memory stays proportional to one row group, not to the number of
    candidates or member rows.
    """
    schema = pa.schema([("clique_id", pa.int64()), ("node_id", pa.int64()), ("label", labels.type)])
    rows = 0
    with pq.ParquetWriter(path, schema, compression="zstd") as writer:
        i = 0
        while i < len(order):
            o = np.array(order[i:i + MEMBER_ROWS_PER_GROUP])  # a copy: the mapped pages go next
            drop_mapped_pages((order,))
            starts, ends = gather_mapped_many((ptr[:-1], ptr[1:]), o)
            sz = (ends - starts).astype(np.int64)  # at least one row each
            k = int(np.searchsorted(np.cumsum(sz), MEMBER_ROWS_PER_GROUP, side="right"))
            k = max(k, 1)
            sz, starts = sz[:k], starts[:k]
            j = i + k
            first = np.cumsum(sz) - sz  # where each clique's rows start in this chunk
            idx = np.arange(int(sz.sum()), dtype=np.int64) + np.repeat(starts - first, sz)
            node = gather_mapped(members, idx).astype(np.int64)
            cid = np.repeat(np.arange(i, j, dtype=np.int64), sz)
            writer.write_table(pa.table({"clique_id": cid, "node_id": node, "label": labels.take(pa.array(node))},
                                        schema=schema))
            rows += len(node)
            i = j
        if rows == 0:
            writer.write_table(pa.table({"clique_id": np.zeros(0, np.int64), "node_id": np.zeros(0, np.int64),
                                         "label": labels.take(pa.array(np.zeros(0, np.int64)))}, schema=schema))
    return rows


def _write_expected(cand_ptr_path, mu_path, out_path) -> float:
    """Write each candidate's expected weight ``mu * s (s - 1) / 2`` to ``out_path``,
    a block of candidates at a time; returns their total (block sums added in order)."""
    ptr = load_npy(cand_ptr_path, mmap=True)
    mu = load_npy(mu_path, mmap=True)
    n = len(ptr) - 1
    total = 0.0
    with NpyStream(out_path, np.float64, n) as f:
        for lo in range(0, n, BLOCK):
            hi = min(n, lo + BLOCK)
            s = np.diff(np.asarray(ptr[lo:hi + 1]))
            e = np.asarray(mu[lo:hi]) * (s * (s - 1) / 2.0)
            total += float(e.sum())
            f.write(e)
            drop_mapped_pages((ptr, mu))
    return total


BLOCK = 1 << 22
SORT_SHARE = 256  # under a memory limit, sort at most (task memory / SORT_SHARE) candidates at once


def sort_rows(ctx: StageContext, n_cand: int) -> int:
    """Candidates sorted in memory at once: all of them without a memory limit; under
    one, a 256th of a task's memory in candidates (about 24 bytes each, plus the
    sort's buffer: well under a tenth of a task's memory)."""
    budget = ctx.engine.task_memory()
    return max(1 << 16, budget // SORT_SHARE) if budget else max(1, n_cand)


def run(ctx: StageContext) -> dict:
    ing, spl = ctx.input_dir("ingest"), ctx.input_dir("split")
    enu, fit = ctx.input_dir("enumerate"), ctx.input_dir("fit")
    out = ctx.work
    labels = pq.read_table(ing / "labels.parquet").column("label").combine_chunks()
    with ctx.substep("nodes"):
        nodes = pq.read_table(spl / "nodes.parquet")
        table = pa.table({
            "node_id": nodes.column("node_id"),
            "label": labels,
            "component": nodes.column("component"),
            "degree": nodes.column("degree"),
            "strength": nodes.column("strength"),
        })
        pq.write_table(table, out / "nodes.parquet", compression="zstd")
    scratch = out / "scratch"  # the order and the expected weights: removed before the stage ends
    scratch.mkdir(exist_ok=True)
    ptr = load_npy(enu / "cand_ptr.npy", mmap=True)
    with ctx.substep("cliques") as step:
        levels = load_npy(enu / "levels.npy")
        lmin = load_npy(enu / "level_min.npy", mmap=True)
        lmax = load_npy(enu / "level_max.npy", mmap=True)
        mu = load_npy(fit / "mu.npy", mmap=True)
        n_cand = len(mu)
        total = _write_expected(enu / "cand_ptr.npy", fit / "mu.npy", scratch / "expected.npy")
        # strongest first, ties by candidate id, sorting at most `rows` at a time
        passes = descending_order(scratch / "expected.npy", scratch / "order.npy", sort_rows(ctx, n_cand))
        step.count(candidates=n_cand, passes=passes)
        order = load_npy(scratch / "order.npy", mmap=True)
        _write_cliques(out / "cliques.parquet", order, ptr, mu, load_npy(scratch / "expected.npy", mmap=True),
                       total, levels, lmin, lmax)
        del lmin, lmax, mu
    members = load_npy(enu / "cand_nodes.npy", mmap=True)
    with ctx.substep("members") as step:
        rows = _write_members(out / "members.parquet", ptr, members, order, labels)
        step.count(rows=rows)
    n_members = len(members)
    del order, members, ptr
    shutil.rmtree(scratch)
    ing_report = read_json(ing / "report.json")
    fit_report = read_json(fit / "report.json")
    timings = {}
    for st in ("ingest", "split", "enumerate", "fit"):
        man = ctx.store.manifest(st)
        timings[st] = {k: man["profile"][k] for k in ("wall_seconds", "cpu_seconds", "peak_rss_bytes")}
    summary = {
        "nodes": int(len(labels)),
        "edges": int(ing_report["pairs"]),
        "rows_read": ing_report["rows_read"],
        "rows_dropped": ing_report["rows_dropped"],
        "weight_total": ing_report["weight_total"],
        "levels": int(len(levels)),
        "candidates": int(n_cand),
        "groups_kept": fit_report["groups_kept"],
        "redundancy": fit_report["redundancy"],
        "loglik": fit_report["loglik"],
        "iterations": fit_report["iterations"],
        "converged": fit_report["converged"],
        "fitted_total": fit_report["fitted_total"],
        "timings": timings,
        "caution": CAUTION,
    }
    write_json_atomic(out / "summary.json", summary)
    return {"cliques": int(n_cand), "groups_kept": summary["groups_kept"], "member_rows": int(n_members)}
