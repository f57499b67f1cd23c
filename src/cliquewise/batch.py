"""Many networks in one go (``cliquewise batch``): one resumable run per network.

The input is either one export whose rows carry a network column (``network`` by
default: one network per school, town, month...), or a folder with one dataset per
subfolder. Each network becomes an ordinary run directory under the batch
directory, so ``cliquewise status`` and ``cliquewise resume`` work on it alone, and
the networks run side by side as tasks on the dask engine (:class:`Engine`). After
its run, each network's covariate row (:mod:`cliquewise.analysis.covariates`) is
kept beside it, and the batch gathers the rows into ``covariates.parquet``.

Layout of a batch directory::

    BATCH/
      batch.json            the request: run settings shared by all networks, batch options
      networks.parquet      network (as in the input), slug, run_dir, edges
      inputs/               (network column only) each network's rows, one folder each:
        00000/part-*.parquet ...   split.json (written last) marks the split complete
      runs/<slug>/          one run directory per network, plus covariates.json (its row)
      covariates.parquet    one row per finished network
      status.json           per network: done or failed (with the error), time, what ran

Resume: running the batch again (or ``cliquewise batch --batch-dir BATCH`` alone)
skips the split when its inputs are unchanged, skips every stage of every network
that verifies, and reuses a network's covariate row when it was computed from the
same results with the same options. Delete one network's run folder and only that
network is recomputed.

A batch file is a pipeline file (see :mod:`cliquewise.config`) with one more table::

    [batch]
    dir = "runs/schools"          # the batch directory (relative to the file)
    network = "network"           # the network column of [input] edges
    folders = ""                  # or: one dataset per subfolder of this folder
    inside = ""                   # path of the data inside each subfolder, e.g. "export"
    parallel = 0                  # networks at a time (0 = one per core)
    threads_per_network = 0       # engine threads inside each network (0 = cores / parallel)
    heldout_fraction = 0.5        # share of each count held out for heldout_gain
    seed = 0                      # seed of the held-out split
"""

from __future__ import annotations

import dataclasses
import os
import re
import shutil
import time
import threading
import tomllib
from dataclasses import dataclass
from pathlib import Path

import numpy as np
import pyarrow as pa
import pyarrow.compute as pc
import pyarrow.parquet as pq

from cliquewise.config import ConfigError, EngineConfig, Settings
from cliquewise.engine import Engine, EngineSettings
from cliquewise.stage import InputError
from cliquewise.store import (RunStore, StoreError, canonical_json, digest, fault_point, read_json,
                              write_json_atomic)

ROW_FILE = "covariates.json"
# Set when a batch in this process is interrupted: networks still queued on the
# in-process thread pool then return at once instead of starting (a network
# already running finishes its current work; its checkpoints make that safe).
_CANCEL = threading.Event()


@dataclass
class BatchSettings:
    """Options of a batch (the ``[batch]`` table of a batch file)."""

    dir: str = ""
    network: str = "network"
    folders: str = ""
    inside: str = ""
    parallel: int = 0
    threads_per_network: int = 0
    heldout_fraction: float = 0.5
    seed: int = 0

    def to_dict(self) -> dict:
        return dataclasses.asdict(self)

    @classmethod
    def from_dict(cls, data: dict) -> "BatchSettings":
        b = cls()
        names = {f.name: f.type for f in dataclasses.fields(cls)}
        for key, val in data.items():
            if key not in names:
                raise ConfigError(f"unknown setting 'batch.{key}' (known here: {', '.join(sorted(names))})")
            cur = getattr(b, key)
            if isinstance(cur, int) and (isinstance(val, bool) or not isinstance(val, int)):
                raise ConfigError(f"batch.{key} must be a whole number, not {val!r}")
            if isinstance(cur, float) and (isinstance(val, bool) or not isinstance(val, (int, float))):
                raise ConfigError(f"batch.{key} must be a number, not {val!r}")
            if isinstance(cur, str) and not isinstance(val, str):
                raise ConfigError(f"batch.{key} must be text, not {val!r}")
            setattr(b, key, float(val) if isinstance(cur, float) else val)
        return b

    def validate(self, settings: Settings) -> None:
        if not self.dir:
            raise ConfigError("no batch directory given: pass --batch-dir DIR or set [batch] dir")
        if self.folders and settings.input.edges:
            raise ConfigError("give either an export with a network column (--edges) or --folders, not both")
        if not self.folders and not settings.input.edges:
            raise ConfigError("no networks given: pass --edges PATH with a network column, or --folders DIR")
        if not self.folders and not self.network:
            raise ConfigError("--network names the column that tells the networks apart; it cannot be empty")
        if self.parallel < 0 or self.threads_per_network < 0:
            raise ConfigError("batch.parallel and batch.threads_per_network must be >= 0")
        if not 0.0 < self.heldout_fraction < 1.0:
            raise ConfigError("batch.heldout_fraction must lie strictly between 0 and 1")


def load_batch_file(path) -> tuple[Settings, BatchSettings]:
    """Read a batch file: a pipeline file plus a ``[batch]`` table (paths relative to the file)."""
    path = Path(path)
    try:
        with open(path, "rb") as fh:
            data = tomllib.load(fh)
    except FileNotFoundError:
        raise ConfigError(f"{path}: no such batch file") from None
    except tomllib.TOMLDecodeError as exc:
        raise ConfigError(f"{path}: not valid TOML ({exc})") from None
    if "run_dir" in data:
        raise ConfigError(f"{path}: a batch file sets [batch] dir, not run_dir (every network gets its own run)")
    raw = data.pop("batch", {})
    if not isinstance(raw, dict):
        raise ConfigError(f"{path}: batch must be a table")
    base = path.resolve().parent
    settings = Settings.from_dict(data, base=base)
    batch = BatchSettings.from_dict(raw)
    for key in ("dir", "folders"):
        val = getattr(batch, key)
        if val and not Path(val).is_absolute():
            setattr(batch, key, str((base / val).resolve()))
    return settings, batch


def load_request(batch_dir) -> tuple[Settings, BatchSettings]:
    """The settings a batch directory was started with (``batch.json``)."""
    path = Path(batch_dir) / "batch.json"
    try:
        data = read_json(path)
    except FileNotFoundError:
        raise StoreError(f"{batch_dir}: not a batch directory (no batch.json); start one with 'cliquewise batch'") from None
    except ValueError:
        raise StoreError(f"{path} is corrupt; start the batch again") from None
    return Settings.from_dict(data["settings"]), BatchSettings.from_dict(data["batch"])


# -- planning: which networks, where their data and runs live ------------------------

def slugs_for(names: list[str]) -> list[str]:
    """Folder names for networks: safe characters, at most 60 long, unique ignoring case."""
    out, seen = [], set()
    for name in names:
        base = re.sub(r"[^A-Za-z0-9._-]+", "_", str(name)).strip("._")[:60] or "network"
        slug, k = base, 2
        while slug.lower() in seen:
            slug, k = f"{base}-{k}", k + 1
        seen.add(slug.lower())
        out.append(slug)
    return out


def plan_networks(settings: Settings, batch: BatchSettings, engine: Engine) -> pa.Table:
    """The networks of a batch: ``network``, ``slug``, ``edges`` (where its data is), ``run_dir``.

    With a network column this splits the export into ``inputs/`` first (skipped
    when ``inputs/split.json`` says the same export was already split).
    """
    root = Path(batch.dir)
    if batch.folders:
        folder = Path(batch.folders)
        if not folder.is_dir():
            raise InputError(f"{folder}: no such folder (--folders names a folder of datasets, one per subfolder)")
        subs = sorted(p for p in folder.iterdir() if p.is_dir() and not p.name.startswith((".", "_")))
        if not subs:
            raise InputError(f"{folder}: no subfolders; --folders wants one dataset per subfolder")
        names = [p.name for p in subs]
        edges = [str((p / batch.inside) if batch.inside else p) for p in subs]
        network = pa.array(names, pa.string())
    else:
        network = split_by_network(settings, batch, engine, root / "inputs")
        edges = [str(root / "inputs" / f"{j:05d}") for j in range(len(network))]
        names = [str(v) for v in network.to_pylist()]
    slugs = slugs_for(names)
    table = pa.table({"network": network, "slug": pa.array(slugs, pa.string()),
                      "run_dir": pa.array([f"runs/{s}" for s in slugs], pa.string()),
                      "edges": pa.array(edges, pa.string())})
    tmp = root / ".networks.parquet.tmp"
    pq.write_table(table, tmp)
    os.replace(tmp, root / "networks.parquet")
    return table


def split_by_network(settings: Settings, batch: BatchSettings, engine: Engine, out: Path) -> pa.Array:
    """Split an export with a network column into one folder of Parquet parts per network.

    Network ``j`` (in sorted order of the network values) gets ``out/<j:05d>/``,
    with one file per read task that holds its rows, and only the columns the run
    reads. Labels and weights are copied as read (CSV as text), so each network's
    run sees the same values it would see reading the export itself. Returns the
    sorted network values.
    """
    from cliquewise.parts import ingest as parts

    i = settings.input
    cols = [c for c in (i.source, i.target, i.weight or None, i.time or None) if c]
    try:
        files = parts.resolve_files(i.edges)
        tasks = parts.plan_tasks(files, i.rows_per_task)
    except parts.ExportError as exc:
        raise InputError(str(exc)) from None
    params = {"columns": cols, "network": batch.network, "inputs": parts.fingerprint(files),
              "rows_per_task": i.rows_per_task}
    marker = out / "split.json"
    try:
        done = read_json(marker)
        if done.get("params") == params:
            return pq.read_table(out / "networks.parquet").column("network").combine_chunks()
    except (OSError, ValueError, KeyError):
        pass
    shutil.rmtree(out, ignore_errors=True)
    out.mkdir(parents=True)
    found = engine.map(_task_networks, tasks, batch.network, desc="finding networks")
    nulls = sum(f["nulls"] for f in found)
    if nulls:
        raise InputError(f"{nulls} rows have no value in the network column {batch.network!r}; "
                         f"fill or drop them first")
    arrays = [f["values"] for f in found if len(f["values"])]
    if not arrays:
        raise InputError(f"{i.edges}: the export has no rows")
    if len({a.type for a in arrays}) > 1:  # integers in one file, text in another: compare as text
        arrays = [pc.cast(a, pa.string()) for a in arrays]
    values = pc.unique(pa.chunked_array(arrays).combine_chunks())
    values = values.take(pc.sort_indices(values))
    rows = engine.map(_split_task, tasks, values, cols, batch.network, str(out), desc="splitting networks")
    counts = np.sum(rows, axis=0) if rows else np.zeros(len(values), np.int64)
    pq.write_table(pa.table({"network": values, "rows": pa.array(counts.astype(np.int64))}),
                   out / "networks.parquet")
    write_json_atomic(marker, {"params": params, "networks": len(values), "rows": int(counts.sum())})
    return values


def _network_column(batch_obj, name: str) -> pa.Array:
    col = batch_obj.column(name)
    if isinstance(col, pa.ChunkedArray):
        col = col.combine_chunks()
    if pa.types.is_dictionary(col.type):
        col = col.dictionary_decode()
    if pa.types.is_large_string(col.type):
        col = col.cast(pa.string())
    return col


def _task_networks(task, network: str) -> dict:
    """Distinct network values of one read task, and how many rows have none."""
    from cliquewise.parts import ingest as parts

    uniq, nulls = [], 0
    try:
        for b in parts.iter_batches(task, [network]):
            col = _network_column(b, network)
            nulls += col.null_count
            uniq.append(pc.unique(col.drop_null()))
    except parts.ExportError as exc:
        raise InputError(str(exc)) from None
    if not uniq:
        return {"values": pa.array([], pa.string()), "nulls": nulls}
    return {"values": pc.unique(pa.chunked_array(uniq).combine_chunks()), "nulls": nulls}


def _split_task(task, values: pa.Array, cols: list[str], network: str, out: str) -> np.ndarray:
    """Write one read task's rows into the folders of their networks; rows per network."""
    from cliquewise.parts import ingest as parts

    try:
        batches = list(parts.iter_batches(task, cols + [network]))
    except parts.ExportError as exc:
        raise InputError(str(exc)) from None
    counts = np.zeros(len(values), np.int64)
    if not batches:
        return counts
    table = pa.Table.from_batches(batches)
    net = _network_column(table, network)
    if net.type != values.type:
        net = pc.cast(net, values.type)
    idx = pc.index_in(net, value_set=values).to_numpy(zero_copy_only=False).astype(np.int64)
    order = np.argsort(idx, kind="stable")
    idx = idx[order]
    table = table.select(cols).take(pa.array(order))
    counts = np.bincount(idx, minlength=len(values)).astype(np.int64)
    bounds = np.concatenate([[0], np.cumsum(counts)])
    for j in np.flatnonzero(counts):
        folder = Path(out) / f"{j:05d}"
        folder.mkdir(exist_ok=True)
        tmp = folder / f".part-{task.index:05d}.parquet.tmp"
        pq.write_table(table.slice(bounds[j], counts[j]), tmp)
        os.replace(tmp, folder / f"part-{task.index:05d}.parquet")
    return counts


# -- running: one task per network -------------------------------------------------

def run_network(item: dict, opts: dict) -> dict:
    """Run (or resume) one network and compute its covariate row; never raises.

    Parameters
    ----------
    item : dict
        ``slug``, ``edges`` and ``run_dir`` of the network.
    opts : dict
        ``settings`` (shared run settings, as a dict), ``threads`` (engine threads for
        this network), ``heldout_fraction`` and ``seed``.

    Returns
    -------
    dict
        ``slug``, ``state`` (``"done"`` or ``"failed"``), ``error``, ``seconds``,
        ``stages_run`` (stages that were not up to date), ``row_reused`` and ``row``.
    """
    from cliquewise.analysis.covariates import covariate_params, network_covariates
    from cliquewise.pipeline import run_pipeline

    t0 = time.perf_counter()
    out = {"slug": item["slug"], "state": "failed", "error": "", "stages_run": [], "row_reused": False, "row": None}
    if _CANCEL.is_set():
        out["error"] = "interrupted before it started"
        return out
    try:
        s = Settings.from_dict(opts["settings"])
        s.run_dir = item["run_dir"]
        s.input.edges = item["edges"]
        s.engine = EngineConfig()  # `cliquewise resume` on this run uses the default engine
        with Engine(EngineSettings(threads=opts["threads"], progress=False)) as eng:
            res = run_pipeline(s, engine=eng, progress=False)
        out["stages_run"] = [name for name, r in res.items() if not r.skipped]
        store = RunStore(s.run_dir, create=False)
        cparams = covariate_params(opts["heldout_fraction"], opts["seed"])
        key = digest(canonical_json({"results": store.identity("results"), "params": cparams}))
        row_path = Path(s.run_dir) / ROW_FILE
        try:
            cached = read_json(row_path)
            if cached.get("key") == key:
                out["row"], out["row_reused"] = cached["row"], True
        except (OSError, ValueError):
            pass
        if out["row"] is None:
            out["row"] = network_covariates(s.run_dir, heldout_fraction=opts["heldout_fraction"], seed=opts["seed"])
            write_json_atomic(row_path, {"key": key, "params": cparams, "row": out["row"]})
        out["state"] = "done"
        fault_point(f"batch-network:{item['slug']}")  # crash tests only
    except Exception as exc:  # noqa: BLE001 - one network's failure must not stop the others
        msg = str(exc).strip().splitlines()[0] if str(exc).strip() else ""
        known = isinstance(exc, (InputError, ConfigError, StoreError))
        out["error"] = msg if known else f"{type(exc).__name__}: {msg}"
    out["seconds"] = round(time.perf_counter() - t0, 3)
    return out


def run_batch(settings: Settings, batch: BatchSettings, engine: Engine | None = None,
              progress: bool = True) -> dict:
    """Run every network of a batch (resuming what is done) and write ``covariates.parquet``.

    Parameters
    ----------
    settings : Settings
        Run settings shared by every network; ``input.edges`` is the export with a
        network column (unless ``batch.folders`` is set). ``settings.engine`` is the
        engine the networks are spread over.
    batch : BatchSettings
    engine : Engine, optional
        Run on this engine instead of starting one from ``settings.engine``.
    progress : bool
        Show a progress bar over networks.

    Returns
    -------
    dict
        ``covariates`` (path), ``networks`` (one status dict per network, in network
        order, with ``network`` and ``run_dir`` added), ``failed`` (how many).
    """
    from cliquewise.analysis.covariates import COLUMNS
    from cliquewise.pipeline import engine_settings

    batch.validate(settings)
    root = Path(batch.dir).resolve()
    batch.dir = str(root)
    try:
        root.mkdir(parents=True, exist_ok=True)
    except OSError as exc:
        raise StoreError(f"cannot create batch directory {root}: {exc.strerror}") from exc
    write_json_atomic(root / "batch.json", {"settings": settings.to_dict(), "batch": batch.to_dict()})
    cores = os.cpu_count() or 1
    own = engine is None
    if own:
        es = engine_settings(settings, progress)
        if not es.scheduler and not es.workers:
            es.threads = batch.parallel or cores  # in-process: this many networks side by side
        engine = Engine(es)
    try:
        table = plan_networks(settings, batch, engine)
        parallel = batch.parallel or engine.nthreads()
        threads = batch.threads_per_network or max(1, cores // max(1, min(parallel, table.num_rows)))
        shared = settings.to_dict()
        shared["engine"] = dataclasses.asdict(EngineConfig())
        opts = {"settings": shared, "threads": threads, "heldout_fraction": batch.heldout_fraction,
                "seed": batch.seed}
        items = [{"slug": s, "edges": e, "run_dir": str(root / r)} for s, e, r in
                 zip(*(table.column(c).to_pylist() for c in ("slug", "edges", "run_dir")))]
        _CANCEL.clear()
        try:
            results = engine.map(run_network, items, opts, desc="networks")
        except BaseException:  # Ctrl-C or a lost cluster: queued networks must not start
            _CANCEL.set()
            raise
    finally:
        if own:
            engine.close()

    done = [k for k, r in enumerate(results) if r["state"] == "done"]
    cov = {"network": table.column("network").take(pa.array(done, pa.int64())),
           "run_dir": table.column("run_dir").take(pa.array(done, pa.int64()))}
    for c in COLUMNS:
        cov[c] = pa.array([results[k]["row"][c] for k in done])
    cov_table = pa.table(cov) if done else _empty_covariates(table.column("network").type, COLUMNS)
    tmp = root / ".covariates.parquet.tmp"
    pq.write_table(cov_table, tmp)
    os.replace(tmp, root / "covariates.parquet")
    statuses = []
    for k, r in enumerate(results):
        st = {key: r[key] for key in ("slug", "state", "error", "seconds", "stages_run", "row_reused")}
        st["network"] = str(table.column("network")[k].as_py())
        st["run_dir"] = table.column("run_dir")[k].as_py()
        statuses.append(st)
    write_json_atomic(root / "status.json", {"networks": statuses})
    return {"covariates": root / "covariates.parquet", "networks": statuses,
            "failed": sum(r["state"] != "done" for r in results)}


def _empty_covariates(net_type, columns) -> pa.Table:
    fields = [pa.field("network", net_type), pa.field("run_dir", pa.string())]
    for c in columns:
        t = pa.bool_() if c == "converged" else pa.int64() if c in (
            "nodes", "edges", "candidates", "groups_kept", "largest_group") else pa.float64()
        fields.append(pa.field(c, t))
    return pa.schema(fields).empty_table()
