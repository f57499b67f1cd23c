"""What every stage shares: deciding whether to run, timing, and committing.

A stage is a function ``body(ctx) -> counts`` plus a name, its parameters, the
stages it reads from and (for ingest) fingerprints of its input files.
:func:`run_stage` works out the stage key, skips the stage when the run store holds
a verified result for that key, and otherwise runs ``body`` inside a resource
monitor, then commits the work folder with a manifest.

Stages never import each other: they meet through the run store, reading the
files that upstream manifests list.
"""

from __future__ import annotations

import ctypes
import logging
import time
from dataclasses import dataclass, field
from pathlib import Path
from typing import Callable

from cliquewise.engine import Engine, ResourceMonitor
from cliquewise.store import Manifest, RunStore, StoreError, fault_point, stage_key

log = logging.getLogger("cliquewise")


class InputError(ValueError):
    """The user's input is unusable; the message says what and where (one line)."""


@dataclass
class StageContext:
    """Handed to a stage body: where to write, where to read, how to run."""

    name: str
    store: RunStore
    engine: Engine
    work: Path
    params: dict
    upstream: dict[str, Path]
    substeps: dict = field(default_factory=dict)
    worker_cpu: float = 0.0

    def input_dir(self, stage: str) -> Path:
        return self.upstream[stage]

    def substep(self, name: str):
        """Context manager timing a named sub-step into the stage profile."""
        return _Substep(self, name)


def release_free_memory() -> None:
    """Hand the allocators' free memory back to the system (glibc ``malloc_trim``,
    and pyarrow's memory pool).

    Arrays below glibc's mmap threshold (up to 32 MB) live in malloc's heaps, which
    keep freed space; without this, a stage starts with the previous stage's
    high-water mark still resident. A no-op where glibc is not the C library.
    """
    global _TRIM
    if _TRIM is None:
        try:
            _TRIM = ctypes.CDLL("libc.so.6").malloc_trim
        except (OSError, AttributeError):
            _TRIM = False
    if _TRIM:
        _TRIM(0)
    try:  # pyarrow's own allocator (mimalloc or jemalloc) keeps freed blocks too
        import pyarrow as pa

        pa.default_memory_pool().release_unused()
    except (ImportError, AttributeError):
        pass


_TRIM = None


def _reset_peak_rss() -> bool:
    """Reset this process's peak resident set (Linux: ``/proc/self/clear_refs``)."""
    try:
        with open("/proc/self/clear_refs", "w") as fh:
            fh.write("5")
        return True
    except OSError:
        return False


def _peak_rss() -> int | None:
    """This process's peak resident set since the last reset (``VmHWM``), in bytes."""
    try:
        with open("/proc/self/status") as fh:
            for line in fh:
                if line.startswith("VmHWM:"):
                    return int(line.split()[1]) * 1024
    except OSError:
        pass
    return None


class _Substep:
    """Times one sub-step; also its peak memory (this process, threads included)
    and the work counts the stage reports with :meth:`count`."""

    def __init__(self, ctx: StageContext, name: str):
        self.ctx, self.name = ctx, name
        self.counts: dict = {}

    def count(self, **counts) -> None:
        """Record work counts of this sub-step (rows, edges, iterations, ...)."""
        self.counts.update({k: (int(v) if isinstance(v, (bool, int)) or hasattr(v, "__index__") else v)
                            for k, v in counts.items()})

    def __enter__(self):
        release_free_memory()
        self.peak_ok = _reset_peak_rss()
        self.t0 = time.perf_counter()
        self.c0 = time.process_time()
        return self

    def __exit__(self, *exc):
        rec = self.ctx.substeps.setdefault(self.name, {"wall_seconds": 0.0, "cpu_seconds": 0.0,
                                                       "order": len(self.ctx.substeps)})
        rec["wall_seconds"] = round(rec["wall_seconds"] + time.perf_counter() - self.t0, 4)
        rec["cpu_seconds"] = round(rec["cpu_seconds"] + time.process_time() - self.c0, 4)
        peak = _peak_rss() if self.peak_ok else None
        if peak is not None:
            rec["peak_rss_bytes"] = max(rec.get("peak_rss_bytes", 0), peak)
        if self.counts:
            rec.setdefault("counts", {}).update(self.counts)
        if exc[0] is None:
            fault_point(f"substep:{self.ctx.name}:{self.name}")


@dataclass
class StageResult:
    name: str
    skipped: bool
    manifest: dict
    reason: str = ""


def run_stage(store: RunStore, engine: Engine, name: str, params: dict, upstream: list[str],
              body: Callable[[StageContext], dict], inputs: list | None = None,
              force: bool = False, verify_checksums: bool = True) -> StageResult:
    """Run stage ``name`` unless a verified result for the same key is in the store."""
    up_ids = {}
    for up in upstream:
        ok, why = store.verify(up, checksums=False)
        if not ok:
            raise StoreError(f"stage {name!r} needs {up!r}, which is not complete ({why})")
        up_ids[up] = store.identity(up)
    inputs = inputs or []
    key = stage_key(name, params, up_ids, inputs)
    ok, why = store.verify(name, key=key, checksums=verify_checksums)
    if ok and not force:
        log.info("%s: up to date, skipped", name)
        return StageResult(name, True, store.manifest(name), "up to date")
    if why not in ("not run yet",):
        log.info("%s: rerunning (%s)", name, why)
    work = store.begin(name, key)
    # an older result of this stage is stale from here on: never leave it marked complete
    # (with its downstream) if this attempt fails
    store.invalidate(name)
    ctx = StageContext(name=name, store=store, engine=engine, work=work, params=params,
                       upstream={u: store.stage_dir(u) for u in upstream})
    release_free_memory()  # the stage's peak should not include what earlier stages freed
    with ResourceMonitor(engine) as mon:
        counts = body(ctx) or {}
    profile = mon.as_dict(worker_cpu=0.0 if engine.in_process else ctx.worker_cpu)
    profile["substeps"] = ctx.substeps
    man = Manifest(stage=name, params=params, upstream=up_ids, inputs=inputs, counts=counts,
                   profile=profile, key=key)
    data = store.commit(man, work)
    return StageResult(name, False, data, why)
