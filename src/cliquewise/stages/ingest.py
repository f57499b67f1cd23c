"""The ingest stage: an export of interaction rows becomes the edge store.

Reads   the user's Parquet or CSV files (lazily, one read task at a time on dask).
Writes  ``ingest/edges/part-*.parquet``  columns ``u < v`` (int64 node ids), ``weight``;
        partition b holds the pairs whose ``u`` lies in node range b, sorted by (u, v);
        ``ingest/labels.parquet``        ``node_id``, ``label`` (ids are label ranks);
        ``ingest/report.json``           rows read = rows kept + dropped, by reason.

Memory: a worker holds one read task (or one bucket) at a time; the driver holds
only the label table and per-task counts, never rows. The one exception is bounded:
on the embedded thread pool and with an export of at most ``rows_in_memory`` rows
(32M by default, about 8 to 16 bytes a row), the mapped rows stay in memory between
map and aggregate instead of going through scratch files.
"""

from __future__ import annotations

import json
import math
import os
import shutil

import numpy as np
import pyarrow as pa
import pyarrow.parquet as pq

from cliquewise.parts import ingest as parts
from cliquewise.stage import InputError, StageContext
from cliquewise.store import RunStore, load_npy, save_npy, write_json_atomic

NAME = "ingest"
UPSTREAM: list[str] = []


def params_from(settings) -> dict:
    """The parameters that define this stage's result (hashed into its key)."""
    i = settings.input
    return {
        "columns": {"source": i.source, "target": i.target, "weight": i.weight or None, "time": i.time or None},
        "since": i.since, "until": i.until, "merge": i.merge, "on_invalid": i.on_invalid,
        "rows_per_task": i.rows_per_task, "rows_per_bucket": i.rows_per_bucket,
        "rows_in_memory": i.rows_in_memory,
    }


def inputs_from(settings) -> list[dict]:
    try:
        files = parts.resolve_files(settings.input.edges)
    except parts.ExportError as exc:
        raise InputError(str(exc)) from None
    return parts.fingerprint(files)


def _window(p):
    if p["since"] is None and p["until"] is None:
        return None
    conv = []
    for x in (p["since"], p["until"]):
        if isinstance(x, str):
            try:
                x = float(x) if x.replace(".", "", 1).lstrip("-").isdigit() else x
            except ValueError:
                pass
        conv.append(x)
    return tuple(conv)


def run(ctx: StageContext, inputs: list[dict]) -> dict:
    p = ctx.params
    cols = parts.Columns(**p["columns"])
    if cols.time is None and (p["since"] is not None or p["until"] is not None):
        raise InputError("--since/--until need a time column (--time NAME)")
    window = _window(p)
    files = [i["path"] for i in inputs]
    eng = ctx.engine
    work = ctx.work

    with ctx.substep("plan"):
        try:
            tasks = parts.plan_tasks(files, p["rows_per_task"])
        except parts.ExportError as exc:
            raise InputError(str(exc)) from None
        check_parquet_schemas(tasks, cols)

    total_rows = sum(t.rows for t in tasks if t.rows >= 0) + sum(
        max(1, os.path.getsize(t.path) // 16) for t in tasks if t.rows < 0)
    dense = parts.dense_range(tasks, cols, total_rows)

    # 1. labels (the general route; integer labels with Parquet statistics skip it) ----
    labels_path = work / "labels.parquet"
    info = {"kind": "int", "mixed": False, "null_labels": 0, "route": "range" if dense else "table"}
    if dense:
        mapper = {"kind": "range", "base": dense[0], "size": dense[1]}
        space = dense[1]
    else:
        with ctx.substep("labels"):
            if RunStore.unit_done(work, "labels"):
                labels = pq.read_table(labels_path).column("label").combine_chunks()
                info = RunStore.unit_info(work, "labels")
            else:
                scans = _guard(lambda: eng.map(parts.scan_labels, tasks, cols, window, desc="ingest: labels"))
                merged = _tree_reduce(eng, scans)
                labels = parts.sort_labels(merged["labels"])
                _write_labels(labels_path, labels)
                info = {"kind": merged["kind"], "mixed": merged.get("mixed", False),
                        "null_labels": merged["nulls"], "route": "table"}
                RunStore.unit_commit(work, "labels", ["labels.parquet"], info)
        mapper = {"kind": "table", "labels": labels, "label_kind": info["kind"]}
        space = len(labels)
    n_buckets = max(1, min(4096, math.ceil(total_rows / max(1, p["rows_per_bucket"]))))
    n_buckets = min(n_buckets, max(1, space))

    # 2. map and bucket --------------------------------------------------------------
    # On the embedded thread pool and below ``rows_in_memory`` rows, the mapped rows stay in
    # memory until aggregation (no scratch files, no map checkpoints: a resumed run
    # maps again unless every bucket is done). Otherwise each read task writes its
    # rows to scratch files, checkpointed as a unit, and workers read them back.
    weighted = bool(cols.weight)
    in_memory = eng.client is None and total_rows <= p["rows_in_memory"]
    bounds = parts_bounds(space, n_buckets)
    jobs = [b for b in range(n_buckets) if not RunStore.unit_done(work, f"agg-{b:05d}")]
    kept = None
    if in_memory and not jobs and RunStore.unit_done(work, "map-counts"):
        saved = RunStore.unit_info(work, "map-counts")
        results, done_info = [], {"all": saved}
    else:
        with ctx.substep("map") as step:
            if in_memory:
                todo, done_info = tasks, {}
            else:
                todo = [t for t in tasks if not RunStore.unit_done(work, f"map-{t.name}")]
                done_info = {t.name: RunStore.unit_info(work, f"map-{t.name}") for t in tasks if t not in todo}
            results = _guard(lambda: eng.map(_map_unit, todo, cols, window, mapper, n_buckets,
                                             p["on_invalid"], None if in_memory else str(work), desc="ingest: map"))
            step.count(rows=sum(r["counts"]["rows_read"] for r in results), tasks=len(todo))
        if in_memory:
            kept = [r.pop("arrays") for r in results if "arrays" in r]
    failed = [r for r in results if r["failed"]]
    counts = _sum_counts([r["counts"] for r in results] + [d["counts"] for d in done_info.values()])
    examples = [e for r in results for e in r["examples"]] + [e for d in done_info.values() for e in d["examples"]]
    if failed:
        ex = [e for r in failed for e in r["examples"]][:3]
        words = {"nan_weight": "NaN or missing", "inf_weight": "infinite", "negative_weight": "negative",
                 "non_numeric_weight": "non-numeric"}
        reasons = ", ".join(f"{counts[k]} {w}" for k, w in words.items() if counts[k])
        raise InputError(
            f"{failed[0]['path']}: column {cols.weight!r} has {counts['invalid_weight']} invalid weight"
            f"{'s' if counts['invalid_weight'] != 1 else ''} ({reasons}) in {len(failed)} file part"
            f"{'s' if len(failed) > 1 else ''}, e.g. {'; '.join(ex)}; fix them or pass --on-invalid drop")
    ctx.worker_cpu += sum(r.get("cpu", 0.0) for r in results)
    rank = rank_file = None
    if dense:
        with ctx.substep("labels"):
            if kept is not None:  # rows were mapped again: so are the labels
                labels_np, rank = parts.combine_seen((k.pop("seen") for k in kept), dense[1], dense[0])
                _write_labels(labels_path, pa.array(labels_np, pa.int64()))
                RunStore.unit_commit(work, "labels", ["labels.parquet"], info)
            elif not in_memory:
                rank_file = work / "scratch" / "rank.npy"
                if not RunStore.unit_done(work, "labels"):
                    labels_np, rank = parts.combine_seen(parts.scratch_bitmaps(work / "scratch", [t.name for t in tasks]),
                                                         dense[1], dense[0])
                    save_npy(rank_file, rank)
                    del rank
                    _write_labels(labels_path, pa.array(labels_np, pa.int64()))
                    RunStore.unit_commit(work, "labels", ["labels.parquet", "scratch/rank.npy"], info)
                rank = None
    if in_memory and kept is not None:
        RunStore.unit_commit(work, "map-counts", [], {"counts": counts, "examples": examples[:5]})
    n_nodes = pq.read_metadata(labels_path).num_rows

    # 3. aggregate buckets -----------------------------------------------------------
    with ctx.substep("aggregate") as step:
        if in_memory:
            agg = _guard(lambda: eng.map(_agg_memory_unit, jobs, bounds, str(work), kept, p["merge"], weighted, rank,
                                         desc="ingest: aggregate"))
        else:
            agg = _guard(lambda: eng.map(_agg_unit, jobs, bounds, str(work), [t.name for t in tasks], p["merge"],
                                         weighted, str(rank_file) if rank_file else None, desc="ingest: aggregate"))
        step.count(rows=sum(a["rows_in"] for a in agg), pairs=sum(a["pairs"] for a in agg), buckets=len(jobs))
        agg_info = {a["bucket"]: a for a in agg}
        for b in range(n_buckets):
            if b not in agg_info:
                agg_info[b] = RunStore.unit_info(work, f"agg-{b:05d}")
    del kept
    ctx.worker_cpu += sum(a.get("cpu", 0.0) for a in agg)
    shutil.rmtree(work / "scratch", ignore_errors=True)

    pairs = sum(a["pairs"] for a in agg_info.values())
    rows_into_merge = sum(a["rows_in"] for a in agg_info.values())
    dropped = {k: counts[k] for k in ("outside_window", "null_label", "invalid_weight", "self_loop", "zero_weight")}
    report = {
        "files": len(files),
        "rows_read": counts["rows_read"],
        "rows_kept": counts["rows_kept"],
        "rows_dropped": dropped,
        "rows_dropped_total": sum(dropped.values()),
        "invalid_weight_detail": {k: counts[k] for k in ("nan_weight", "inf_weight", "negative_weight", "non_numeric_weight")},
        "rows_merged": rows_into_merge - pairs,
        "pairs": pairs,
        "nodes": n_nodes,
        "label_kind": info["kind"],
        "label_route": info["route"],
        "labels_mixed_int_and_text": info["mixed"],
        "weight_total": float(sum(a["weight_total"] for a in agg_info.values())),
        "weights_integral": all(a["integral"] for a in agg_info.values()),
        "weight_min": min((a["w_min"] for a in agg_info.values() if a["w_min"] is not None), default=None),
        "weight_max": max((a["w_max"] for a in agg_info.values() if a["w_max"] is not None), default=None),
        "merge": p["merge"],
        "buckets": n_buckets,
        "examples_dropped": examples[:5],
    }
    if report["rows_read"] != report["rows_kept"] + report["rows_dropped_total"]:
        raise RuntimeError(f"internal accounting error: {report}")
    if rows_into_merge != counts["rows_kept"]:
        raise RuntimeError("internal accounting error: rows lost between map and aggregate")
    if pairs == 0:
        where = files[0] if len(files) == 1 else f"{files[0]} and {len(files) - 1} more file{'s' * (len(files) > 2)}"
        why = {"outside_window": f"with {cols.time!r} outside the window",
               "null_label": f"with a missing {cols.source!r} or {cols.target!r}",
               "invalid_weight": f"with an invalid {cols.weight!r}",
               "self_loop": f"self-loops ({cols.source!r} = {cols.target!r})",
               "zero_weight": f"with {cols.weight!r} = 0"}
        raise InputError(
            f"{where}: no usable interaction left after reading {report['rows_read']} rows (dropped: "
            f"{', '.join(f'{v} {why[k]}' for k, v in dropped.items() if v) or 'none; the input is empty'})")
    overflow = [b for b, a in agg_info.items() if a["w_max"] is not None and not math.isfinite(a["w_max"])]
    if overflow:
        n = _count_infinite(work, overflow)
        raise InputError(
            f"{files[0]}: column {cols.weight!r}: merging duplicate rows overflows float64 for {n} pair"
            f"{'s' * (n != 1)} (sums above 1.8e308); scale the weights down or use --merge max")
    write_json_atomic(work / "report.json", report)
    return {"rows_read": report["rows_read"], "rows_kept": report["rows_kept"], "pairs": pairs,
            "nodes": n_nodes, "rows_dropped": report["rows_dropped_total"], "buckets": n_buckets,
            "read_tasks": len(tasks)}


LABEL_TYPES = (pa.types.is_integer, pa.types.is_string, pa.types.is_large_string, pa.types.is_floating,
               pa.types.is_null)
WEIGHT_TYPES = (pa.types.is_integer, pa.types.is_floating, pa.types.is_decimal, pa.types.is_boolean,
                pa.types.is_string, pa.types.is_large_string, pa.types.is_null)


def check_parquet_schemas(tasks, cols) -> None:
    """Every Parquet file has the columns asked for, in types we can read.

    Reads footers only. The first problem stops the run with one line naming the
    file, the column, its type and the number of rows in that file.
    """
    seen = set()
    for t in tasks:
        if t.kind != "parquet" or t.path in seen:
            continue
        seen.add(t.path)
        try:
            pf = pq.ParquetFile(t.path)
        except Exception:  # noqa: BLE001 - plan_tasks reported unreadable files already
            continue
        schema, rows = pf.schema_arrow, pf.metadata.num_rows
        checks = [(cols.source, LABEL_TYPES, "labels (text or integers)"),
                  (cols.target, LABEL_TYPES, "labels (text or integers)")]
        if cols.weight:
            checks.append((cols.weight, WEIGHT_TYPES, "weights (numbers)"))
        missing = [c for c, _, _ in checks if c not in schema.names]
        if cols.time and cols.time not in schema.names:
            missing.append(cols.time)
        if missing:
            raise InputError(
                f"{t.path}: missing column{'s' * (len(missing) > 1)} {', '.join(repr(m) for m in missing)} "
                f"({_rows(rows)}); found {', '.join(repr(f) for f in schema.names)} "
                f"(rename with --source/--target/--weight/--time)")
        for col, allowed, what in checks:
            typ = schema.field(col).type
            base = typ.value_type if pa.types.is_dictionary(typ) else typ
            if not any(ok(base) for ok in allowed):
                raise InputError(f"{t.path}: column {col!r} has type {typ}, which cannot be read as {what} "
                                 f"({_rows(rows)})")


def _rows(n: int) -> str:
    return f"{n} row{'s' * (n != 1)}"


def _count_infinite(work, buckets) -> int:
    n = 0
    for b in buckets:
        w = pq.read_table(work / f"edges/part-{b:05d}.parquet", columns=["weight"]).column(0).to_numpy()
        n += int(np.isinf(w).sum())
    return n


def _write_labels(path, labels: pa.Array) -> None:
    table = pa.table({"node_id": pa.array(np.arange(len(labels), dtype=np.int64)), "label": labels})
    pq.write_table(table, path, compression="zstd")


def parts_bounds(n_nodes: int, n_buckets: int) -> list[int]:
    from cliquewise.kernels.buckets import bucket_bounds

    return [int(x) for x in bucket_bounds(max(n_nodes, 1), n_buckets)]


def _map_unit(task, cols, window, mapper, n_buckets, on_invalid, work):
    """Map one read task; with ``work=None`` its rows come back in memory, else as a checkpointed unit."""
    from pathlib import Path

    if work is None:
        return parts.map_and_bucket(task, cols, window, mapper, n_buckets, on_invalid, None)
    work = Path(work)
    res = parts.map_and_bucket(task, cols, window, mapper, n_buckets, on_invalid, work / "scratch")
    if not res["failed"]:
        RunStore.unit_commit(work, f"map-{task.name}", [f"scratch/{f}" for f in res["files"]],
                             {"counts": res["counts"], "examples": res["examples"]})
    return res


def _agg_unit(b, bounds, work, task_names, merge, weighted, rank_file):
    """Aggregate bucket ``b`` from the scratch files (runs on any worker)."""
    from pathlib import Path

    work = Path(work)
    rank = load_npy(Path(rank_file), mmap=True) if rank_file else None
    pieces = parts.scratch_pieces(work / "scratch", task_names, b, weighted)
    return _agg_commit(work, b, bounds, pieces, merge, weighted, rank)


def _agg_memory_unit(b, bounds, work, kept, merge, weighted, rank):
    """Aggregate bucket ``b`` from rows kept in this process's memory."""
    from pathlib import Path

    return _agg_commit(Path(work), b, bounds, parts.memory_pieces(kept, b), merge, weighted, rank)


def _agg_commit(work, b, bounds, pieces, merge, weighted, rank):
    rel = f"edges/part-{b:05d}.parquet"
    res = parts.aggregate_bucket(b, bounds[b], bounds[b + 1], pieces, merge, work / rel, weighted=weighted, rank=rank)
    RunStore.unit_commit(work, f"agg-{b:05d}", [rel], res)
    return res


def _tree_reduce(eng, scans: list[dict]) -> dict:
    """Merge per-task label sets pairwise (on the cluster when there are many)."""
    if not scans:
        return {"labels": pa.array([], pa.int64()), "kind": "int", "nulls": 0}
    level = scans
    while len(level) > 1:
        pairs = [(level[i], level[i + 1]) for i in range(0, len(level) - 1, 2)]
        merged = eng.map(_union_pair, pairs)
        if len(level) % 2:
            merged.append(level[-1])
        level = merged
    out = dict(level[0])
    out.setdefault("mixed", False)
    return out


def _union_pair(pair):
    return parts.union_labels(*pair)


def _sum_counts(dicts: list[dict]) -> dict:
    out: dict[str, int] = {}
    for d in dicts:
        for k, v in d.items():
            out[k] = out.get(k, 0) + int(v)
    for k in ("rows_read", "rows_kept", "outside_window", "null_label", "invalid_weight", "self_loop", "zero_weight",
              "nan_weight", "inf_weight", "negative_weight", "non_numeric_weight"):
        out.setdefault(k, 0)
    return out


def _guard(fn):
    try:
        return fn()
    except parts.ExportError as exc:
        raise InputError(str(exc)) from None


def read_report(stage_dir) -> dict:
    with open(stage_dir / "report.json", encoding="utf-8") as fh:
        return json.load(fh)
