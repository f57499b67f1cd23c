"""Per-chunk functions of the ingest stage (pure: arguments in, files or arrays out).

An export is cut into *read tasks*: a Parquet file's row groups, or one CSV file
read as a stream of blocks. Each task is handled three times:

1. :func:`scan_labels` reads the label (and time) columns and returns the task's
   distinct labels; :func:`union_labels` merges those pairwise into the sorted
   label table, which defines the contiguous node ids (rank in sorted order).
2. :func:`map_and_bucket` reads the whole task, checks weights, applies the time
   window, maps labels to ids, drops self-loops and zero weights, orders each pair
   ``u < v`` and groups the rows by node-range bucket, either kept in memory or
   written to scratch ``.npy`` files (the stage chooses; see ``stages/ingest.py``).
3. :func:`aggregate_bucket` takes one bucket's slices from every task
   (:func:`memory_pieces` or :func:`scratch_pieces`), merges duplicate pairs and
   writes one edge-store partition.

Every row read is accounted for in the counts returned by step 2.
"""

from __future__ import annotations

import glob
import os
import time
from dataclasses import dataclass
from pathlib import Path

import numpy as np
import pyarrow as pa
import pyarrow.compute as pc
import pyarrow.csv as pacsv
import pyarrow.parquet as pq

from cliquewise.kernels.aggregate import aggregate_pairs
from cliquewise.kernels.buckets import mark_seen, order_and_bucket
from cliquewise.store import load_npy, save_npy

PARQUET_SUFFIXES = (".parquet", ".pq", ".parq")
CSV_SUFFIXES = (".csv", ".tsv", ".txt", ".csv.gz", ".tsv.gz", ".csv.bz2")
MERGE_CODES = {"sum": 0, "max": 1, "min": 2}


class ExportError(ValueError):
    """A problem with the user's export; the message is one line naming file and column."""


@dataclass(frozen=True)
class Columns:
    source: str = "source"
    target: str = "target"
    weight: str | None = "weight"
    time: str | None = None


@dataclass(frozen=True)
class ReadTask:
    """One unit of reading: a file, and for Parquet a range of its row groups."""

    path: str
    kind: str  # "parquet" or "csv"
    row_groups: tuple[int, ...] = ()
    rows: int = -1  # known for Parquet, -1 for CSV
    index: int = 0

    @property
    def name(self) -> str:
        return f"t{self.index:05d}"


# -- finding the files ----------------------------------------------------------

def resolve_files(spec: str | list[str]) -> list[str]:
    """Files named by a path, folder or glob (or a list of them), sorted, hidden files skipped."""
    specs = [spec] if isinstance(spec, (str, os.PathLike)) else list(spec)
    files: list[str] = []
    for s in specs:
        s = os.fspath(s)
        if any(ch in s for ch in "*?["):
            matched = sorted(glob.glob(s, recursive=True))
            if not matched:
                raise ExportError(f"{s}: the pattern matches no file")
            files.extend(m for m in matched if os.path.isfile(m))
        elif os.path.isdir(s):
            found = sorted(
                str(p) for p in Path(s).rglob("*")
                if p.is_file() and not any(part.startswith((".", "_")) for part in p.relative_to(s).parts)
            )
            if not found:
                raise ExportError(f"{s}: the folder holds no data file")
            files.extend(found)
        elif os.path.isfile(s):
            files.append(s)
        else:
            raise ExportError(f"{s}: no such file or folder")
    keep = [f for f in files if _kind(f) is not None]
    if not keep:
        raise ExportError(f"{specs[0]}: no Parquet or CSV file found (looked for {', '.join(PARQUET_SUFFIXES + CSV_SUFFIXES)})")
    return keep


def _kind(path: str) -> str | None:
    low = path.lower()
    if low.endswith(PARQUET_SUFFIXES):
        return "parquet"
    if low.endswith(CSV_SUFFIXES):
        return "csv"
    return None


def plan_tasks(files: list[str], rows_per_task: int) -> list[ReadTask]:
    """Cut the files into read tasks of about ``rows_per_task`` rows."""
    tasks: list[ReadTask] = []
    for f in files:
        kind = _kind(f)
        if kind == "csv":
            tasks.append(ReadTask(f, "csv", (), -1, len(tasks)))
            continue
        try:
            meta = pq.ParquetFile(f).metadata
        except Exception as exc:  # noqa: BLE001 - pyarrow raises several types
            raise ExportError(f"{f}: not a readable Parquet file ({_short(exc)})") from exc
        group, rows = [], 0
        for g in range(meta.num_row_groups):
            group.append(g)
            rows += meta.row_group(g).num_rows
            if rows >= rows_per_task:
                tasks.append(ReadTask(f, "parquet", tuple(group), rows, len(tasks)))
                group, rows = [], 0
        if group or meta.num_row_groups == 0:
            tasks.append(ReadTask(f, "parquet", tuple(group), rows, len(tasks)))
    return tasks


def fingerprint(files: list[str]) -> list[dict]:
    """What identifies the input for resume: path, size and modification time."""
    out = []
    for f in files:
        st = os.stat(f)
        out.append({"path": os.path.abspath(f), "bytes": st.st_size, "mtime_ns": st.st_mtime_ns})
    return out


def _short(exc: Exception) -> str:
    return str(exc).strip().splitlines()[0][:200] if str(exc).strip() else type(exc).__name__


# -- reading --------------------------------------------------------------------

def iter_batches(task: ReadTask, columns: list[str], csv_block: int = 1 << 24):
    """Yield ``pyarrow.RecordBatch`` es of the requested columns (a missing one is an error)."""
    if task.kind == "parquet":
        try:
            pf = pq.ParquetFile(task.path)
        except Exception as exc:  # noqa: BLE001
            raise ExportError(f"{task.path}: not a readable Parquet file ({_short(exc)})") from exc
        names = pf.schema_arrow.names
        _check_columns(task.path, names, columns)
        if not task.row_groups:
            return
        try:
            yield from pf.iter_batches(batch_size=1 << 20, row_groups=list(task.row_groups), columns=columns)
        except Exception as exc:  # noqa: BLE001
            raise ExportError(f"{task.path}: corrupt or truncated Parquet data ({_short(exc)})") from exc
        return
    delim = "\t" if ".tsv" in task.path.lower() else ","
    try:
        head = pacsv.open_csv(task.path, read_options=pacsv.ReadOptions(block_size=1 << 16),
                              parse_options=pacsv.ParseOptions(delimiter=delim, newlines_in_values=True))
        names = head.schema.names
        head.close() if hasattr(head, "close") else None
    except pa.ArrowInvalid as exc:
        if "Empty CSV" in str(exc):
            return
        raise ExportError(f"{task.path}: not a readable CSV file ({_short(exc)})") from exc
    _check_columns(task.path, names, columns)
    # labels and weights are read as text and converted by us, so that every
    # block of a file is typed the same way and bad values are reported, not guessed
    types = {c: pa.string() for c in columns}
    reader = pacsv.open_csv(
        task.path,
        read_options=pacsv.ReadOptions(block_size=csv_block),
        parse_options=pacsv.ParseOptions(delimiter=delim, newlines_in_values=True),
        convert_options=pacsv.ConvertOptions(include_columns=columns, column_types=types,
                                             strings_can_be_null=False, quoted_strings_can_be_null=False),
    )
    try:
        for batch in reader:
            yield batch
    except pa.ArrowInvalid as exc:
        raise ExportError(f"{task.path}: malformed CSV ({_short(exc)})") from exc


def _check_columns(path: str, found: list[str], wanted: list[str]) -> None:
    missing = [c for c in wanted if c not in found]
    if missing:
        raise ExportError(
            f"{path}: missing column{'s' if len(missing) > 1 else ''} {', '.join(repr(m) for m in missing)}; "
            f"found {', '.join(repr(f) for f in found)} (rename with --source/--target/--weight/--time)")


# -- labels ---------------------------------------------------------------------

def _label_array(arr: pa.ChunkedArray | pa.Array) -> tuple[pa.Array, str]:
    """Normalise a label column to int64 or string; report which."""
    if isinstance(arr, pa.ChunkedArray):
        arr = arr.combine_chunks()
    t = arr.type
    if pa.types.is_integer(t):
        return arr.cast(pa.int64()), "int"
    if pa.types.is_dictionary(t):
        return _label_array(arr.dictionary_decode())
    if pa.types.is_string(t) or pa.types.is_large_string(t):
        arr = arr.cast(pa.string())
        try:  # text that is all integers (CSV) is integer labels, when it round-trips exactly
            as_int = pc.cast(arr, pa.int64())
            if pc.all(pc.equal(pc.cast(as_int, pa.string()), arr)).as_py() in (True, None):
                return as_int, "int"
        except (pa.ArrowInvalid, pa.ArrowNotImplementedError):
            pass
        return arr, "str"
    if pa.types.is_floating(t):
        as_int = pc.cast(arr, pa.int64(), safe=False)
        if pc.all(pc.equal(pc.cast(as_int, t), arr)).as_py() in (True, None):
            return as_int, "int"
        return pc.cast(arr, pa.string()), "str"
    return pc.cast(arr, pa.string()), "str"


def scan_labels(task: ReadTask, cols: Columns, window: tuple | None) -> dict:
    """Distinct labels of one task (after the time window), with their kind."""
    wanted = [cols.source, cols.target] + ([cols.time] if cols.time else [])
    uniq: list[pa.Array] = []
    kinds = set()
    nulls = 0
    for batch in iter_batches(task, wanted):
        if cols.time and window is not None:
            batch = batch.filter(time_mask(batch.column(cols.time), window, task.path, cols.time))
        for c in (cols.source, cols.target):
            col = batch.column(c)
            nulls += col.null_count
            arr, kind = _label_array(col.drop_null())
            kinds.add(kind)
            uniq.append(pc.unique(arr))
    kind = "str" if "str" in kinds else "int"
    if not uniq:
        return {"labels": pa.array([], pa.int64()), "kind": "int", "nulls": nulls}
    arrs = [a if kind == "int" or a.type == pa.string() else pc.cast(a, pa.string()) for a in uniq]
    labels = pc.unique(pa.chunked_array(arrs).combine_chunks())
    return {"labels": labels, "kind": kind, "nulls": nulls}


def union_labels(a: dict, b: dict) -> dict:
    """Merge two label sets; integers meeting strings become strings."""
    kind = "str" if "str" in (a["kind"], b["kind"]) else "int"
    la, lb = a["labels"], b["labels"]
    if kind == "str":
        la = la if la.type == pa.string() else pc.cast(la, pa.string())
        lb = lb if lb.type == pa.string() else pc.cast(lb, pa.string())
    merged = pc.unique(pa.chunked_array([la, lb]).combine_chunks())
    mixed = a.get("mixed", False) or b.get("mixed", False) or (a["kind"] != b["kind"] and len(la) and len(lb))
    return {"labels": merged, "kind": kind, "nulls": a["nulls"] + b["nulls"], "mixed": bool(mixed)}


def sort_labels(labels: pa.Array) -> pa.Array:
    """The label table: distinct labels in ascending order (node id = position)."""
    return labels.take(pc.sort_indices(labels))


# -- time window ------------------------------------------------------------------

def time_mask(col, window, path, name) -> pa.Array:
    """Rows with ``since <= time < until`` (either end may be open)."""
    since, until = window
    t = col
    if pa.types.is_string(t.type) or pa.types.is_large_string(t.type):
        try:
            t = pc.cast(t, pa.timestamp("us"))
        except pa.ArrowInvalid:
            try:
                t = pc.cast(col, pa.float64())
            except pa.ArrowInvalid as exc:
                raise ExportError(f"{path}: column {name!r} holds values that are neither times nor numbers") from exc
    if pa.types.is_timestamp(t.type) and t.type.tz is not None:
        t = pc.cast(t, pa.timestamp("us", tz="UTC")).cast(pa.timestamp("us"))
    if pa.types.is_date(t.type):
        t = pc.cast(t, pa.timestamp("us"))
    mask = pc.is_valid(t)
    for bound, op in ((since, pc.greater_equal), (until, pc.less)):
        if bound is None:
            continue
        if pa.types.is_timestamp(t.type):
            if isinstance(bound, (int, float)):
                raise ExportError(f"{path}: column {name!r} holds times but the window bound {bound!r} is a number")
            scalar = pa.scalar(np.datetime64(bound, "us"), pa.timestamp("us"))
            mask = pc.and_(mask, op(pc.cast(t, pa.timestamp("us")), scalar))
        else:
            if not isinstance(bound, (int, float)):
                raise ExportError(f"{path}: column {name!r} holds numbers but the window bound {bound!r} is a time")
            mask = pc.and_(mask, op(pc.cast(t, pa.float64()), pa.scalar(float(bound))))
    return pc.fill_null(mask, False)


# -- weights --------------------------------------------------------------------

def weights_to_float(col, path: str, name: str, examples: list, limit: int = 5):
    """Weights as float64, plus per-row flags: not a number at all, and missing.

    Missing values (null, empty text) come back as NaN with ``missing`` set, and
    are reported with NaN weights.
    """
    if isinstance(col, pa.ChunkedArray):
        col = col.combine_chunks()
    missing = np.array(pc.is_null(col).to_numpy(zero_copy_only=False), dtype=bool)
    if pa.types.is_integer(col.type) or pa.types.is_floating(col.type) or pa.types.is_boolean(col.type) \
            or pa.types.is_decimal(col.type):
        if pa.types.is_integer(col.type) and col.type.bit_width == 64:  # float64 holds integers up to 2**53
            n_big = pc.sum(pc.cast(pc.greater(col, 2**53), pa.int64())).as_py()
            if n_big:
                raise ExportError(f"{path}: column {name!r} has {n_big} integer weight{'s' * (n_big > 1)} above "
                                  f"2**53, which float64 would round; scale them down")
        w = pc.cast(col, pa.float64()).to_numpy(zero_copy_only=False)
        return w, np.zeros(len(w), bool), missing
    if pa.types.is_string(col.type) or pa.types.is_large_string(col.type):
        text = pc.utf8_trim_whitespace(col)
        missing = missing | np.asarray(pc.fill_null(pc.equal(text, ""), False).to_numpy(zero_copy_only=False))
        text = pc.if_else(pc.equal(text, ""), pa.scalar(None, pa.string()), text)
        try:
            w = pc.cast(text, pa.float64()).to_numpy(zero_copy_only=False)
            return w, np.zeros(len(w), bool), missing
        except pa.ArrowInvalid:
            import pandas as pd  # only on the error path: find which rows are not numbers

            s = pd.Series(text.to_pylist(), dtype=object)
            num = pd.to_numeric(s, errors="coerce")
            bad = np.array((num.isna() & s.notna()).to_numpy(), dtype=bool)
            bad &= ~s.astype(str).str.lower().isin(["nan", "inf", "-inf", "+inf", "infinity", "-infinity"]).to_numpy()
            for i in np.flatnonzero(bad)[: max(0, limit - len(examples))]:
                examples.append(f"{name}={s.iloc[i]!r}")
            w = num.to_numpy(dtype=np.float64, na_value=np.nan)
            return w, bad, missing
    raise ExportError(f"{path}: column {name!r} has type {col.type}, not numbers")


def dense_range(tasks: list[ReadTask], cols: Columns, rows: int) -> tuple[int, int] | None:
    """``(lowest, count)`` of integer labels, from Parquet statistics, when dense enough.

    When every file is Parquet with integer label columns and min/max statistics,
    and the label range is at most ``max(8 * rows, 2**24)`` (and below 2**27), ids
    can be assigned without a separate pass over the labels: rows are mapped to
    ``label - lowest``, aggregated in that space, and renumbered by rank at the end.
    """
    lo, hi = None, None
    for t in tasks:
        if t.kind != "parquet":
            return None
        pf = pq.ParquetFile(t.path)
        schema = pf.schema_arrow
        for c in (cols.source, cols.target):
            if c not in schema.names or not pa.types.is_integer(schema.field(c).type):
                return None
        meta = pf.metadata
        idx = [schema.get_field_index(c) for c in (cols.source, cols.target)]
        for g in t.row_groups:
            rg = meta.row_group(g)
            for i in idx:
                st = rg.column(i).statistics
                if rg.num_rows == 0:
                    continue
                if st is None or not st.has_min_max:
                    return None
                lo = st.min if lo is None else min(lo, st.min)
                hi = st.max if hi is None else max(hi, st.max)
    if lo is None:
        return None
    size = int(hi) - int(lo) + 1
    if size > max(8 * rows, 2**24) or size >= 2**27:
        return None
    return int(lo), size


def map_and_bucket(task: ReadTask, cols: Columns, window, mapper: dict, n_buckets: int, on_invalid: str,
                   scratch: Path | None) -> dict:
    """Map one task's rows to ordered id pairs, grouped by bucket, written to ``scratch``.

    With ``scratch=None`` nothing is written: the result carries the arrays
    (``u``, ``v``, ``off``, and ``w``, ``seen`` when they apply) under ``"arrays"``.

    ``mapper`` is ``{"kind": "table", "labels": ..., "label_kind": "int"|"str"}`` (ids are
    positions in the sorted label table) or ``{"kind": "range", "base": b, "size": n}``
    (ids are ``label - b``; the labels seen are recorded as a bitmap).
    """
    t_cpu = time.thread_time()
    dense = mapper["kind"] == "range"
    space = mapper["size"] if dense else len(mapper["labels"])
    seen = np.zeros(space, np.bool_) if dense else None
    wanted = [cols.source, cols.target] + ([cols.weight] if cols.weight else []) + ([cols.time] if cols.time else [])
    counts = dict(rows_read=0, outside_window=0, null_label=0, invalid_weight=0, nan_weight=0,
                  inf_weight=0, negative_weight=0, non_numeric_weight=0, self_loop=0, zero_weight=0,
                  rows_kept=0)
    examples: list[str] = []
    chunks = []
    id_like = np.empty(0, np.int32 if space < 2**31 - 1 else np.int64)
    weighted = bool(cols.weight)
    for batch in iter_batches(task, wanted):
        counts["rows_read"] += batch.num_rows
        if cols.time and window is not None:
            m = time_mask(batch.column(cols.time), window, task.path, cols.time)
            before = batch.num_rows
            batch = batch.filter(m)
            counts["outside_window"] += before - batch.num_rows
        src, dst = batch.column(cols.source), batch.column(cols.target)
        ok = pc.and_(pc.is_valid(src), pc.is_valid(dst))
        n_null = src.null_count + dst.null_count
        if n_null:
            if dense:  # every label in the window is a node, as in the label table
                for col in (src, dst):
                    mark_seen(seen, _dense_ids(col.drop_null(), mapper["base"]))
            n_null = batch.num_rows - pc.sum(pc.cast(ok, pa.int64())).as_py()
            counts["null_label"] += n_null
            batch = batch.filter(ok)
            src, dst = batch.column(cols.source), batch.column(cols.target)
        if batch.num_rows == 0:
            continue
        if weighted:
            w, non_numeric, missing = weights_to_float(batch.column(cols.weight), task.path, cols.weight, examples)
            nan = np.isnan(w) & ~non_numeric
            inf = np.isinf(w)
            neg = w < 0
            bad = non_numeric | nan | inf | neg
            nbad = int(bad.sum())
            if nbad:
                counts["non_numeric_weight"] += int(non_numeric.sum())
                counts["nan_weight"] += int(nan.sum())
                counts["inf_weight"] += int(inf.sum())
                counts["negative_weight"] += int((neg & ~inf).sum())
                counts["invalid_weight"] += nbad
                if len(examples) < 5:
                    s_py, d_py = src.to_pylist(), dst.to_pylist()
                    for i in np.flatnonzero(bad)[: 5 - len(examples)]:
                        examples.append(f"{s_py[i]!r} -> {d_py[i]!r} weight {_fmt_w(w[i], non_numeric[i], missing[i])}")
                if dense:  # labels of dropped rows are still nodes
                    drop = pa.array(bad)
                    for col in (src, dst):
                        mark_seen(seen, _dense_ids(col.filter(drop), mapper["base"]))
                keep = ~bad
                w = w[keep]
                src, dst = src.filter(pa.array(keep)), dst.filter(pa.array(keep))
        else:
            w = _NO_WEIGHTS
        if dense:
            a = _dense_ids(src, mapper["base"])
            b = _dense_ids(dst, mapper["base"])
        else:
            a = _to_ids(src, mapper["labels"], mapper["label_kind"])
            b = _to_ids(dst, mapper["labels"], mapper["label_kind"])
        u, v, ww, off, n_self, n_zero = order_and_bucket(a, b, w, weighted, max(space, 1), n_buckets,
                                                         seen if dense else _NO_SEEN, id_like)
        counts["self_loop"] += int(n_self)
        counts["zero_weight"] += int(n_zero)
        counts["rows_kept"] += len(u)
        chunks.append((u, v, ww, off))
    if counts["invalid_weight"] and on_invalid == "error":
        return {"counts": counts, "examples": examples, "failed": True, "task": task.name, "path": task.path,
                "cpu": time.thread_time() - t_cpu}
    u, v, w, offsets = _merge_chunks(chunks, n_buckets, id_like, weighted)
    del chunks
    arrays = {"u": u, "v": v, "off": offsets}
    if weighted:
        arrays["w"] = w
    if dense:
        arrays["seen"] = np.packbits(seen)
    out = {"counts": counts, "examples": examples, "failed": False, "task": task.name, "path": task.path}
    if scratch is None:  # the caller keeps the rows in memory
        out["arrays"] = arrays
    else:
        scratch.mkdir(parents=True, exist_ok=True)
        out["files"] = []
        for name, arr in arrays.items():
            rel = f"{task.name}.{name}.npy"
            save_npy(scratch / rel, arr)
            out["files"].append(rel)
    out["cpu"] = time.thread_time() - t_cpu
    return out


_NO_WEIGHTS = np.empty(0, np.float64)
_NO_SEEN = np.empty(0, np.bool_)


def _merge_chunks(chunks, n_buckets, id_like, weighted):
    """Concatenate per-batch bucketed rows into one task's rows, still grouped by bucket."""
    if not chunks:
        return id_like[:0].copy(), id_like[:0].copy(), _NO_WEIGHTS.copy(), np.zeros(n_buckets + 1, np.int64)
    if len(chunks) == 1:
        return chunks[0]

    def gather(k):
        return np.concatenate([c[k][c[3][b]:c[3][b + 1]] for b in range(n_buckets) for c in chunks])

    per_bucket = sum(np.diff(c[3]) for c in chunks)
    offsets = np.concatenate([[0], np.cumsum(per_bucket)]).astype(np.int64)
    return gather(0), gather(1), (gather(2) if weighted else _NO_WEIGHTS.copy()), offsets


def _dense_ids(col, base: int) -> np.ndarray:
    if isinstance(col, pa.ChunkedArray):
        col = col.combine_chunks()
    x = col.cast(pa.int64()).to_numpy(zero_copy_only=False)
    return x - base if base else x


def combine_seen(bitmaps, size: int, base: int) -> tuple[np.ndarray, np.ndarray]:
    """OR the per-task label bitmaps: the sorted labels, and the rank of each slot (-1 if unused)."""
    acc = np.zeros((size + 7) // 8, np.uint8)
    for bits in bitmaps:
        acc |= bits
    seen = np.unpackbits(acc, count=size).astype(bool)
    slots = np.flatnonzero(seen)
    rank = np.full(size, -1, np.int64 if len(slots) >= 2**31 - 1 else np.int32)
    rank[slots] = np.arange(len(slots), dtype=rank.dtype)
    return slots + base, rank


def scratch_bitmaps(scratch: Path, task_names: list[str]):
    """The tasks' label bitmaps, one at a time, from their scratch files."""
    for name in task_names:
        yield load_npy(scratch / f"{name}.seen.npy")


def _fmt_w(x, non_numeric, missing) -> str:
    return "not a number" if non_numeric else ("missing" if missing else repr(float(x)))


def _to_ids(col, labels: pa.Array, kind: str) -> np.ndarray:
    arr, k = _label_array(col)
    if kind == "str" and arr.type != pa.string():
        arr = pc.cast(arr, pa.string())
    ids = pc.index_in(arr, value_set=labels)
    return ids.to_numpy(zero_copy_only=False).astype(np.int64, copy=False)


# -- aggregation ----------------------------------------------------------------

def scratch_pieces(scratch: Path, task_names: list[str], b: int, weighted: bool) -> list[tuple]:
    """Bucket ``b``'s rows from every task's scratch files: ``(u, v, w)`` slices (memory-mapped)."""
    pieces = []
    for name in task_names:
        off = load_npy(scratch / f"{name}.off.npy")
        s, e = int(off[b]), int(off[b + 1])
        if e > s:
            pieces.append((load_npy(scratch / f"{name}.u.npy", mmap=True)[s:e],
                           load_npy(scratch / f"{name}.v.npy", mmap=True)[s:e],
                           load_npy(scratch / f"{name}.w.npy", mmap=True)[s:e] if weighted else None))
    return pieces


def memory_pieces(arrays: list[dict], b: int) -> list[tuple]:
    """Bucket ``b``'s rows from tasks whose mapped arrays were kept in memory."""
    pieces = []
    for a in arrays:
        s, e = int(a["off"][b]), int(a["off"][b + 1])
        if e > s:
            pieces.append((a["u"][s:e], a["v"][s:e], a["w"][s:e] if "w" in a else None))
    return pieces


def aggregate_bucket(b: int, lo: int, hi: int, pieces: list[tuple], merge: str, out: Path,
                     weighted: bool = True, rank: np.ndarray | None = None) -> dict:
    """Merge bucket ``b``'s rows from every task and write one edge-store partition.

    ``pieces`` are the tasks' ``(u, v, w)`` slices for this bucket (see
    :func:`scratch_pieces` and :func:`memory_pieces`). With ``rank`` (the
    dense-label route) ids are renumbered through it after merging; ranks are
    increasing, so the (u, v) order and ``u < v`` are kept.
    """
    t_cpu = time.thread_time()
    u = np.concatenate([p[0] for p in pieces]) if pieces else np.empty(0, np.int64)
    v = np.concatenate([p[1] for p in pieces]) if pieces else np.empty(0, np.int64)
    # an empty weight array means every row counts 1
    w = np.concatenate([p[2] for p in pieces]) if weighted and pieces else np.empty(0, np.float64)
    rows_in = len(u)
    del pieces
    u, v, w = aggregate_pairs(u, v, w, lo, hi, MERGE_CODES[merge])
    if rank is not None:
        u = np.asarray(rank[u], np.int64)
        v = np.asarray(rank[v], np.int64)
    table = pa.table({"u": pa.array(u, pa.int64()), "v": pa.array(v, pa.int64()), "weight": pa.array(w, pa.float64())})
    out.parent.mkdir(parents=True, exist_ok=True)
    # the edge store is internal and read by every later stage: lz4 without
    # dictionary pages trades larger files for cheaper writing and reading
    pq.write_table(table, out, compression="lz4", use_dictionary=False, row_group_size=1 << 20)
    integral = bool(np.all(w == np.floor(w))) if len(w) else True
    return {"bucket": b, "rows_in": rows_in, "pairs": len(u), "weight_total": float(w.sum()),
            "integral": integral, "w_min": float(w.min()) if len(w) else None,
            "w_max": float(w.max()) if len(w) else None, "cpu": time.thread_time() - t_cpu}
