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

import numpy as np
import pyarrow as pa
import pyarrow.parquet as pq

from cliquewise.stage import StageContext
from cliquewise.store import drop_mapped_pages, gather_mapped, load_npy, read_json, write_json_atomic

NAME = "results"
UPSTREAM = ["ingest", "split", "enumerate", "fit"]
CAUTION = ("The model describes patterns of interaction, not intent or wrongdoing. A group here is a set of "
           "people who interact more than the rest of the network explains; findings about people need "
           "human review under local law and policy before any decision is based on them.")


def params_from(settings) -> dict:
    return {}


MEMBER_ROWS_PER_GROUP = 1 << 21


CLIQUE_ROWS_PER_GROUP = 1 << 20


def _write_cliques(path, order, sizes, mu, expected, total, levels, lmin, lmax) -> None:
    """Write ``cliques.parquet`` (strongest first) one row group at a time, so the
    column copies in clique order never exist for the whole table at once. ``mu``,
    ``lmin`` and ``lmax`` are memory-mapped and read a slice of their files at a time
    (:func:`~cliquewise.store.gather_mapped`)."""
    schema = pa.schema([("clique_id", pa.int64()), ("size", pa.int64()), ("intensity", pa.float64()),
                        ("expected_weight", pa.float64()), ("share", pa.float64()),
                        ("level_min", pa.float64()), ("level_max", pa.float64())])
    n = len(order)
    with pq.ParquetWriter(path, schema, compression="zstd") as writer:
        for i in range(0, max(n, 1), CLIQUE_ROWS_PER_GROUP):
            o = order[i:i + CLIQUE_ROWS_PER_GROUP]
            e = expected[o]
            writer.write_table(pa.table({
                "clique_id": np.arange(i, i + len(o), dtype=np.int64),
                "size": sizes[o].astype(np.int64),
                "intensity": gather_mapped(mu, o),
                "expected_weight": e,
                "share": e / total if total > 0 else np.zeros(len(o)),
                "level_min": np.asarray(levels[gather_mapped(lmin, o)], np.float64) if len(levels)
                else np.zeros(len(o)),
                "level_max": np.asarray(levels[gather_mapped(lmax, o)], np.float64) if len(levels)
                else np.zeros(len(o)),
            }, schema=schema))


def _write_members(path, ptr, members, order: np.ndarray, sizes: np.ndarray, labels: pa.Array) -> int:
    """Write ``members.parquet`` sorted by (clique_id, node_id), one row group at a time.

    Candidate ``order[i]`` becomes clique ``i``; its members are stored ascending,
    so the table is the member slices concatenated in clique order. ``ptr`` and
    ``members`` are memory-mapped and read a slice of their files at a time, so
    memory stays proportional to one row group, not to the number of member rows.
    """
    schema = pa.schema([("clique_id", pa.int64()), ("node_id", pa.int64()), ("label", labels.type)])
    rows = 0
    with pq.ParquetWriter(path, schema, compression="zstd") as writer:
        i = 0
        while i < len(order):
            sz = sizes[order[i:i + MEMBER_ROWS_PER_GROUP]].astype(np.int64)  # at least one row each
            k = int(np.searchsorted(np.cumsum(sz), MEMBER_ROWS_PER_GROUP, side="right"))
            sz = sz[:max(k, 1)]
            j = i + len(sz)
            starts = gather_mapped(ptr, order[i:j])
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


def _sizes_and_expected(cand_ptr_path, mu_path) -> tuple[np.ndarray, np.ndarray]:
    """Members per candidate (int32) and expected weight ``mu * s (s - 1) / 2``, a
    block of candidates at a time."""
    ptr = load_npy(cand_ptr_path, mmap=True)
    mu = load_npy(mu_path, mmap=True)
    n = len(ptr) - 1
    sizes = np.empty(n, np.int32)
    expected = np.empty(n, np.float64)
    for lo in range(0, n, BLOCK):
        hi = min(n, lo + BLOCK)
        s = np.diff(np.asarray(ptr[lo:hi + 1]))
        sizes[lo:hi] = s
        expected[lo:hi] = np.asarray(mu[lo:hi]) * (s * (s - 1) / 2.0)
        drop_mapped_pages((ptr, mu))
    return sizes, expected


BLOCK = 1 << 22


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
    with ctx.substep("cliques"):
        levels = load_npy(enu / "levels.npy")
        lmin = load_npy(enu / "level_min.npy", mmap=True)
        lmax = load_npy(enu / "level_max.npy", mmap=True)
        mu = load_npy(fit / "mu.npy", mmap=True)
        sizes, expected = _sizes_and_expected(enu / "cand_ptr.npy", fit / "mu.npy")
        total = float(expected.sum())
        np.negative(expected, out=expected)  # sign flips are exact: no copy of the array to sort
        order = np.argsort(expected, kind="stable")  # strongest first, ties by candidate id
        np.negative(expected, out=expected)
        _write_cliques(out / "cliques.parquet", order, sizes, mu, expected, total, levels, lmin, lmax)
        n_cand = len(mu)
        del expected, lmin, lmax, mu
    members = load_npy(enu / "cand_nodes.npy", mmap=True)
    with ctx.substep("members") as step:
        rows = _write_members(out / "members.parquet", load_npy(enu / "cand_ptr.npy", mmap=True), members, order,
                              sizes, labels)
        step.count(rows=rows)
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
    return {"cliques": int(n_cand), "groups_kept": summary["groups_kept"], "member_rows": int(len(members))}
