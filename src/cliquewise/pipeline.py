"""The job as a chain of stages over one run store.

    ingest -> split -> enumerate -> fit -> results

:func:`run_pipeline` runs each stage whose verified result is missing or stale; a
stage whose parameters changed reruns, and so does everything below it (their
keys include the upstream identities). ``run.json`` in the run directory keeps the
settings so ``resume`` needs nothing but the directory.
"""

from __future__ import annotations

import errno
import importlib
import logging
from contextlib import contextmanager
from pathlib import Path

from cliquewise.config import ConfigError, Settings
from cliquewise.engine import Engine, EngineSettings
from cliquewise.stage import run_stage
from cliquewise.store import RunStore, StoreError, read_json, write_json_atomic

log = logging.getLogger("cliquewise")

STAGES = ["ingest", "split", "enumerate", "fit", "results"]


def stage_module(name: str):
    return importlib.import_module(f"cliquewise.stages.{name}")


def available_stages() -> list[str]:
    return list(STAGES)


def engine_settings(settings: Settings, progress: bool = True) -> EngineSettings:
    e = settings.engine
    return EngineSettings(scheduler=e.scheduler or None, workers=e.workers or None, threads=e.threads or None,
                          memory_limit=e.memory_limit or None, dashboard=e.dashboard or None, progress=progress)


def save_settings(store: RunStore, settings: Settings) -> None:
    write_json_atomic(store.root / "run.json", {"settings": settings.to_dict()})


def load_settings(run_dir: str | Path) -> Settings:
    path = Path(run_dir) / "run.json"
    try:
        data = read_json(path)
    except FileNotFoundError:
        raise StoreError(f"{run_dir}: not a run directory (no run.json); start one with 'cliquewise run'") from None
    except ValueError:
        raise StoreError(f"{path} is corrupt; start the run again with 'cliquewise run'") from None
    if not isinstance(data, dict) or not isinstance(data.get("settings"), dict):
        raise StoreError(f"{path} is corrupt; start the run again with 'cliquewise run'")
    try:
        settings = Settings.from_dict(data["settings"])
    except ConfigError as exc:
        raise StoreError(f"{path} holds invalid settings ({exc}); fix it or start again with 'cliquewise run'") from None
    # the folder may have been moved or copied since: it is the run directory now
    settings.run_dir = str(Path(run_dir).resolve())
    return settings


def run_pipeline(settings: Settings, engine: Engine | None = None, until: str | None = None,
                 progress: bool = True, on_stage=None) -> dict:
    """Run (or resume) every stage up to ``until``; returns each stage's manifest."""
    if not settings.run_dir:
        raise StoreError("no run directory given (--run-dir)")
    store = RunStore(settings.run_dir)
    with _disk_errors(store, "saving the settings"):
        save_settings(store, settings)
    own = engine is None
    engine = engine or Engine(engine_settings(settings, progress))
    results = {}
    try:
        for name in available_stages():
            mod = stage_module(name)
            params = mod.params_from(settings)
            inputs = mod.inputs_from(settings) if hasattr(mod, "inputs_from") else []
            if hasattr(mod, "inputs_from"):
                body = (lambda m, inp: (lambda ctx: m.run(ctx, inp)))(mod, inputs)
            else:
                body = mod.run
            with _disk_errors(store, f"stage {name!r}"):
                res = run_stage(store, engine, name, params, mod.UPSTREAM, body, inputs=inputs)
            results[name] = res
            if on_stage:
                on_stage(res)
            if until == name:
                break
    finally:
        if own:
            engine.close()
    return results


_DISK_ERRNOS = {errno.ENOSPC: "no space left on the device", errno.EDQUOT: "disk quota exceeded",
                errno.EROFS: "the file system is read-only", errno.EFBIG: "a file grew too large for the file system"}
_DISK_TEXTS = {"No space left on device": errno.ENOSPC, "Disk quota exceeded": errno.EDQUOT,
               "Read-only file system": errno.EROFS}


@contextmanager
def _disk_errors(store: RunStore, what: str):
    """Turn a full, over-quota or read-only disk under the run directory into one clear line."""
    try:
        yield
    except OSError as exc:
        code = exc.errno if exc.errno in _DISK_ERRNOS else next(
            (c for text, c in _DISK_TEXTS.items() if text in str(exc)), None)
        if code is None:
            raise
        where = f" writing {exc.filename}" if getattr(exc, "filename", None) else ""
        raise StoreError(
            f"{what} failed{where}: {_DISK_ERRNOS[code]}; completed stages in {store.root} are kept: make room "
            f"(or make it writable) and run 'cliquewise resume {store.root}'") from exc


def stage_status(run_dir: str | Path) -> list[dict]:
    """Each stage's state, timings, peak memory and key counts, for ``status``."""
    store = RunStore(run_dir, create=False)
    rows = []
    for name in STAGES:
        ok, why = store.verify(name, checksums=False)
        man = store.manifest(name) if ok else None
        partial = any((store.root / ".work").glob(f"{name}-*"))
        state = "complete" if ok else ("in progress or interrupted" if partial else why)
        rows.append({
            "stage": name,
            "state": state,
            "wall_seconds": man["profile"]["wall_seconds"] if man else None,
            "peak_rss_bytes": man["profile"]["peak_rss_bytes"] if man else None,
            "counts": man["counts"] if man else {},
        })
    return rows
