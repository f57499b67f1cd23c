"""Settings of a run: defaults, pipeline files (TOML) and command-line overrides.

A pipeline file has one table per part of the job; every key is optional::

    run_dir = "runs/demo"            # relative to the pipeline file's folder

    [input]
    edges = "data/export/*.parquet"  # file, folder or glob; Parquet or CSV
    source = "source"                # column names
    target = "target"
    weight = "weight"                # "" = every row counts 1
    time = ""                        # with since/until: count events in a window
    merge = "sum"                    # duplicates and reciprocal pairs: sum | max | min
    on_invalid = "error"             # bad weights: error | drop

    [candidates]
    levels = "all"                   # "all", a count of quantile levels, or a list
    max_cliques = 20000000           # blow-up guard per work unit
    max_seconds = 600

    [fit]
    tol = 1e-8
    max_iter = 2000
    accelerate = true
    prune = 0.5                      # expected weight below which a group is dropped

    [engine]
    scheduler = ""                   # tcp://HOST:PORT of an existing dask cluster
    workers = 0                      # 0 = in-process threads
    threads = 0
    memory_limit = ""

Files are read with :mod:`tomllib` only; unknown keys are errors, so a typo never
silently falls back to a default.
"""

from __future__ import annotations

import dataclasses
import tomllib
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any


class ConfigError(ValueError):
    pass


@dataclass
class InputSettings:
    edges: Any = None
    source: str = "source"
    target: str = "target"
    weight: str = "weight"
    time: str = ""
    since: Any = None
    until: Any = None
    merge: str = "sum"
    on_invalid: str = "error"
    rows_per_task: int = 4_000_000
    rows_per_bucket: int = 2_000_000
    rows_in_memory: int = 32_000_000


@dataclass
class CandidateSettings:
    levels: Any = "all"
    max_cliques: int = 20_000_000
    max_seconds: float = 600.0
    edges_per_unit: int = 250_000


@dataclass
class FitSettings:
    tol: float = 1e-8
    max_iter: int = 2000
    accelerate: bool = True
    prune: float = 0.5
    checkpoint_every: int = 25
    incidences_per_part: int = 4_000_000


@dataclass
class EngineConfig:
    scheduler: str = ""
    workers: int = 0
    threads: int = 0
    memory_limit: str = ""
    dashboard: str = ""


@dataclass
class Settings:
    run_dir: str = ""
    input: InputSettings = field(default_factory=InputSettings)
    candidates: CandidateSettings = field(default_factory=CandidateSettings)
    fit: FitSettings = field(default_factory=FitSettings)
    engine: EngineConfig = field(default_factory=EngineConfig)

    def to_dict(self) -> dict:
        return dataclasses.asdict(self)

    @classmethod
    def from_dict(cls, data: dict, base: Path | None = None) -> "Settings":
        s = cls()
        _apply(s, data, "")
        s.validate()
        if base is not None:
            s.resolve_paths(base)
        return s

    def resolve_paths(self, base: Path) -> None:
        """Relative paths in a pipeline file are relative to the file's folder."""
        if self.run_dir and not Path(self.run_dir).is_absolute():
            self.run_dir = str((base / self.run_dir).resolve())
        e = self.input.edges
        if isinstance(e, str) and e and not Path(e).is_absolute():
            self.input.edges = str(base / e)
        elif isinstance(e, list):
            self.input.edges = [x if Path(x).is_absolute() else str(base / x) for x in e]

    def validate(self) -> None:
        i = self.input
        if i.merge not in ("sum", "max", "min"):
            raise ConfigError(f"input.merge must be sum, max or min, not {i.merge!r}")
        if i.on_invalid not in ("error", "drop"):
            raise ConfigError(f"input.on_invalid must be error or drop, not {i.on_invalid!r}")
        for name in ("rows_per_task", "rows_per_bucket"):
            if int(getattr(i, name)) < 1:
                raise ConfigError(f"input.{name} must be a positive number")
        if int(i.rows_in_memory) < 0:
            raise ConfigError("input.rows_in_memory must be 0 (always use scratch files) or more")
        lv = self.candidates.levels
        if not (lv == "all" or (isinstance(lv, int) and not isinstance(lv, bool) and lv >= 1)
                or (isinstance(lv, list) and lv and all(isinstance(x, (int, float)) for x in lv))):
            raise ConfigError(f"candidates.levels must be \"all\", a positive count or a list of thresholds, not {lv!r}")
        if self.fit.tol <= 0 or self.fit.max_iter < 1:
            raise ConfigError("fit.tol must be > 0 and fit.max_iter >= 1")
        if self.fit.prune < 0:
            raise ConfigError("fit.prune must be >= 0")
        if self.candidates.max_cliques < 1 or self.candidates.max_seconds <= 0:
            raise ConfigError("candidates.max_cliques and candidates.max_seconds must be positive")


def _apply(obj, data: dict, prefix: str) -> None:
    names = {f.name: f for f in dataclasses.fields(obj)}
    for key, value in data.items():
        if key not in names:
            known = ", ".join(sorted(names))
            raise ConfigError(f"unknown setting '{prefix}{key}' (known here: {known})")
        current = getattr(obj, key)
        if dataclasses.is_dataclass(current):
            if not isinstance(value, dict):
                raise ConfigError(f"{prefix}{key} must be a table")
            _apply(current, value, f"{prefix}{key}.")
        else:
            setattr(obj, key, _coerce(current, value, f"{prefix}{key}"))


def _coerce(current, value, name):
    if isinstance(current, bool):
        if not isinstance(value, bool):
            raise ConfigError(f"{name} must be true or false")
        return value
    if isinstance(current, int) and not isinstance(current, bool):
        if isinstance(value, bool) or not isinstance(value, (int, float)) or int(value) != value:
            raise ConfigError(f"{name} must be a whole number, not {value!r}")
        return int(value)
    if isinstance(current, float):
        if isinstance(value, bool) or not isinstance(value, (int, float)):
            raise ConfigError(f"{name} must be a number, not {value!r}")
        return float(value)
    return value


def load_pipeline(path: str | Path) -> Settings:
    """Read a pipeline file (TOML) into settings."""
    path = Path(path)
    try:
        with open(path, "rb") as fh:
            data = tomllib.load(fh)
    except FileNotFoundError:
        raise ConfigError(f"{path}: no such pipeline file") from None
    except tomllib.TOMLDecodeError as exc:
        raise ConfigError(f"{path}: not valid TOML ({exc})") from None
    return Settings.from_dict(data, base=path.resolve().parent)


def parse_levels(text: str):
    """``--levels`` value: ``all``, a count (``40``) or a list (``1,2,5,10``)."""
    text = str(text).strip()
    if text == "all":
        return "all"
    if "," in text:
        try:
            return [float(x) for x in text.split(",") if x.strip()]
        except ValueError:
            raise ConfigError(f"--levels: not a list of numbers: {text!r}") from None
    try:
        n = int(text)
    except ValueError:
        raise ConfigError(f"--levels takes all, a count or a comma-separated list, not {text!r}") from None
    if n < 1:
        raise ConfigError("--levels count must be >= 1")
    return n
