"""Security: nothing in a run directory is unpickled or executed, pipeline files are
read with tomllib only, nothing is written outside the run directory, and network
services bind to 127.0.0.1 unless asked otherwise.

Two kinds of evidence: a scan of the source (Python's ``ast``) for the calls that
could unpickle or execute data, and runs watched through Python audit hooks
(PEP 578: ``pickle.find_class`` is raised whenever an unpickler resolves a global,
``open``, ``os.rename``, ``os.remove``, ``os.mkdir``, ``shutil.rmtree`` for file
changes), plus a planted pickle that must be refused.
"""

from __future__ import annotations

import ast
import json
import os
import shutil
import sys
import threading
import traceback
from pathlib import Path

import numpy as np
import pandas as pd
import psutil
import pytest

from _support import lesmis_export, run_cli

import cliquewise
from cliquewise.store import MANIFEST, RunStore, StoreError, canonical_json, digest, file_checksum, output_identity

SRC = Path(cliquewise.__file__).resolve().parent
DATA_SUFFIXES = {".parquet", ".json", ".npy"}


# ------------------------------------------------------------------ the source


def _sources():
    return sorted(SRC.rglob("*.py"))


def _calls(tree):
    for node in ast.walk(tree):
        if isinstance(node, ast.Call):
            yield node


def _name(func) -> str:
    if isinstance(func, ast.Name):
        return func.id
    if isinstance(func, ast.Attribute):
        return f"{_name(func.value)}.{func.attr}"
    return ""


def test_the_code_never_unpickles_executes_or_parses_other_formats():
    bad_modules = {"pickle", "cPickle", "_pickle", "dill", "cloudpickle", "marshal", "shelve", "joblib",
                   "toml", "tomli", "yaml", "subprocess"}
    problems = []
    loads = 0
    for path in _sources():
        tree = ast.parse(path.read_text(encoding="utf-8"), filename=str(path))
        rel = path.relative_to(SRC)
        for node in ast.walk(tree):
            if isinstance(node, ast.Import):
                problems += [f"{rel}: import {a.name}" for a in node.names if a.name.split(".")[0] in bad_modules]
            elif isinstance(node, ast.ImportFrom) and (node.module or "").split(".")[0] in bad_modules:
                problems.append(f"{rel}: from {node.module} import ...")
            elif isinstance(node, ast.keyword) and node.arg == "allow_pickle":
                if not (isinstance(node.value, ast.Constant) and node.value.value is False):
                    problems.append(f"{rel}:{node.value.lineno}: allow_pickle is not the constant False")
        for call in _calls(tree):
            name = _name(call.func)
            if name in ("eval", "exec", "compile", "__import__", "os.system", "os.popen") or \
                    name.endswith(("read_pickle", "to_pickle", ".loads_pickle")):
                problems.append(f"{rel}:{call.lineno}: {name}()")
            if name in ("np.load", "numpy.load"):
                loads += 1
                kw = {k.arg: k.value for k in call.keywords}
                if not (isinstance(kw.get("allow_pickle"), ast.Constant) and kw["allow_pickle"].value is False):
                    problems.append(f"{rel}:{call.lineno}: np.load without allow_pickle=False")
            if name.endswith("import_module"):
                # stage modules only, from the fixed list of stage names
                arg = ast.unparse(call.args[0]) if call.args else ""
                if not arg.startswith("f'cliquewise.stages.") and not arg.startswith('f"cliquewise.stages.'):
                    problems.append(f"{rel}:{call.lineno}: import_module({arg})")
    assert not problems, "\n".join(problems)
    assert loads >= 1  # the scan does see the loader in store.py


def test_pipeline_files_are_read_with_tomllib_only(tmp_path):
    for rel in ("config.py", "batch.py"):
        if (SRC / rel).exists():
            tree = ast.parse((SRC / rel).read_text(encoding="utf-8"))
            parsers = {_name(c.func) for c in _calls(tree) if _name(c.func).endswith((".load", ".loads"))}
            assert {p for p in parsers if "toml" in p} <= {"tomllib.load", "tomllib.loads"}, parsers
    # text that other formats or eval would run is just invalid TOML here
    sentinel = tmp_path / "ran"
    for text in (f"run_dir = __import__('os').system('touch {sentinel}')\n",
                 f"!!python/object/apply:os.system ['touch {sentinel}']\n",
                 f"[input]\nedges = !!python/object/apply:os.system ['touch {sentinel}']\n"):
        (tmp_path / "p.toml").write_text(text)
        rc, _, err = run_cli("run", tmp_path / "p.toml", "--run-dir", tmp_path / "run")
        assert rc == 2 and "not valid TOML" in err
    assert not sentinel.exists()


# ----------------------------------------------------------- a finished run

@pytest.fixture(scope="module")
def finished(tmp_path_factory):
    root = tmp_path_factory.mktemp("secure")
    lesmis_export(seed=5).to_parquet(root / "export.parquet")
    rc, _, err = run_cli("run", "--edges", root / "export.parquet", "--run-dir", root / "run")
    assert rc == 0, err
    return root / "run"


def test_a_run_directory_holds_only_data(finished):
    files = [p for p in finished.rglob("*") if p.is_file()]
    assert files
    for p in files:
        assert p.suffix in DATA_SUFFIXES, p
        assert not p.stat().st_mode & 0o111, f"{p} is executable"
        head = p.read_bytes()[:8]
        assert not head.startswith(b"\x80"), f"{p} looks like a pickle"
        if p.suffix == ".npy":
            with open(p, "rb") as fh:
                version = np.lib.format.read_magic(fh)
                read = np.lib.format.read_array_header_1_0 if version == (1, 0) else \
                    np.lib.format.read_array_header_2_0
                shape, fortran, dtype = read(fh)
            assert not dtype.hasobject, p
        elif p.suffix == ".parquet":
            assert head.startswith(b"PAR1"), p
        else:
            json.loads(p.read_text(encoding="utf-8"))


class _Audit:
    """Collects audit events (PEP 578) while active; hooks cannot be removed, so one
    hook is installed once and switched on and off."""

    _installed = None

    def __init__(self):
        self.active = False
        self.events: list[tuple[str, tuple, bool]] = []
        self.lock = threading.Lock()
        sys.addaudithook(self._hook)

    @classmethod
    def get(cls) -> "_Audit":
        if cls._installed is None:
            cls._installed = cls()
        return cls._installed

    def _hook(self, event, args):
        if not self.active or event not in ("pickle.find_class", "open", "os.rename", "os.remove", "os.mkdir",
                                            "os.rmdir", "shutil.rmtree", "os.symlink", "os.truncate"):
            return
        # numba reads its own compiled-kernel cache with pickle; that is not the run directory
        in_numba = event == "pickle.find_class" and any(
            "/numba/" in f.filename for f in traceback.extract_stack(limit=60))
        if event in ("os.remove", "os.rmdir", "os.mkdir") and len(args) > 1 and isinstance(args[-1], int) \
                and args[-1] >= 0:  # fd-relative (shutil.rmtree): resolve while the fd is open
            args = (_fd_path(args[-1], args[0]), *args[1:])
        with self.lock:
            self.events.append((event, args, in_numba))

    def __enter__(self):
        self.events.clear()
        self.active = True
        return self

    def __exit__(self, *exc):
        self.active = False


def _fd_path(fd: int, name) -> str:
    try:
        return os.path.join(os.readlink(f"/proc/self/fd/{fd}"), os.fsdecode(name))
    except OSError:
        return os.fsdecode(name)


def _writes(events):
    """Paths that were created, changed or removed."""
    out = []
    for event, args, _ in events:
        if event == "open":
            path, mode = args[0], args[1]
            if isinstance(path, (str, bytes, os.PathLike)) and isinstance(mode, str) and any(c in mode for c in "wax+"):
                out.append(os.fsdecode(path))
            elif isinstance(path, (str, bytes, os.PathLike)) and isinstance(args[2], int) and \
                    args[2] & (os.O_WRONLY | os.O_RDWR | os.O_CREAT | os.O_TRUNC | os.O_APPEND):
                out.append(os.fsdecode(path))
        elif event == "os.rename":
            out += [os.fsdecode(args[0]), os.fsdecode(args[1])]
        elif event in ("os.remove", "os.mkdir", "os.rmdir", "shutil.rmtree", "os.truncate"):
            if isinstance(args[0], (str, bytes, os.PathLike)):
                out.append(os.fsdecode(args[0]))
        elif event == "os.symlink":
            out.append(os.fsdecode(args[1]))
    return out


def _inside(path: str, root: Path) -> bool:
    return Path(os.path.abspath(path)).is_relative_to(root)


def test_resuming_and_reading_a_run_never_unpickles(finished, tmp_path):
    run = tmp_path / "run"
    shutil.copytree(finished, run)
    for stage in ("fit", "results"):
        (run / stage / MANIFEST).unlink()
    with _Audit.get() as audit:
        rc, _, err = run_cli("resume", run)
        r = cliquewise.open_run(run)
        r.cliques(), r.members(), r.nodes(), r.summary(), r.groups_of(r.nodes().label.iloc[0])
    assert rc == 0, err
    unpickled = [a for e, a, in_numba in audit.events if e == "pickle.find_class" and not in_numba]
    assert not unpickled, unpickled
    opened = {os.fsdecode(a[0]) for e, a, _ in audit.events if e == "open" and isinstance(a[0], (str, bytes))}
    in_run = [p for p in opened if _inside(p, run) and Path(p).is_file()]
    assert in_run, "the audit saw the run directory being read"
    assert all(Path(p).suffix in DATA_SUFFIXES for p in in_run), in_run
    assert not [m for m in list(sys.modules.values())
                if getattr(m, "__file__", None) and _inside(m.__file__, run)]


def _forge(run: Path, stage: str) -> None:
    """Rewrite a stage's manifest to match its (tampered) files, as an attacker could."""
    path = run / stage / MANIFEST
    man = json.loads(path.read_text())
    for rel in man["outputs"]:
        p = run / stage / rel
        man["outputs"][rel] = {"bytes": p.stat().st_size, "checksum": file_checksum(p)}
    man["identity"] = output_identity(stage, man["outputs"])
    man["params_hash"] = digest(canonical_json(man["params"]))
    path.write_text(json.dumps(man))


class _Boom:
    """Unpickling this creates a file: proof that a pickle was loaded."""

    def __init__(self, target):
        self.target = str(target)

    def __reduce__(self):
        return (Path.touch, (Path(self.target),))


def test_a_planted_pickle_is_refused_not_loaded(finished, tmp_path):
    run = tmp_path / "run"
    shutil.copytree(finished, run)
    sentinel = tmp_path / "code-ran"
    np.save(run / "fit" / "mu.npy", np.array([_Boom(sentinel)], dtype=object), allow_pickle=True)
    _forge(run, "fit")
    assert RunStore(run).verify("fit")[0], "the forged stage passes its checks"
    (run / "results" / MANIFEST).unlink()
    rc, _, err = run_cli("resume", run)
    assert rc == 2 and "mu.npy" in err and "pickle" in err, err
    assert not sentinel.exists()
    with pytest.raises(StoreError):
        from cliquewise.store import load_npy

        load_npy(run / "fit" / "mu.npy")
    assert not sentinel.exists()


# ---------------------------------------------------- writes stay in the run directory


def test_nothing_is_written_outside_the_run_directory(tmp_path):
    sandbox = tmp_path / "sandbox"
    (sandbox / "jobs").mkdir(parents=True)
    lesmis_export(seed=6).to_parquet(sandbox / "export.parquet")
    # settings that look like paths are names only: columns, never files to write
    df = pd.read_parquet(sandbox / "export.parquet").rename(columns={"source": "../../src", "target": "/etc/x"})
    df.to_parquet(sandbox / "export.parquet")
    (sandbox / "jobs" / "job.toml").write_text(
        'run_dir = "runs/one"\n[input]\nedges = "../export.parquet"\nsource = "../../src"\ntarget = "/etc/x"\n')
    before = {p: p.stat().st_mtime_ns for p in sandbox.rglob("*")}
    run = (sandbox / "jobs" / "runs" / "one").resolve()
    cache = Path(os.environ.get("NUMBA_CACHE_DIR", "/nonexistent")).resolve()
    with _Audit.get() as audit:
        rc, _, err = run_cli("run", sandbox / "jobs" / "job.toml")
    assert rc == 0, err
    assert (run / "results" / MANIFEST).exists()
    outside = [p for p in _writes(audit.events)
               if not _inside(p, run) and not _inside(p, cache) and "__pycache__" not in p
               and not run.is_relative_to(os.path.abspath(p))  # making the run directory's parents is fine
               and not p.startswith("/proc/self/")]  # kernel interfaces (resetting the peak-memory counter)
    assert all(os.path.isabs(p) for p in _writes(audit.events)), "every change was traced to a full path"
    assert not outside, outside
    assert sum(_inside(p, run) for p in _writes(audit.events)) > 20, "the audit saw the run being written"
    changed = [p for p in sandbox.rglob("*") if not p.is_relative_to(run) and p not in before
               and p != run.parent and p != run]
    assert not changed, changed
    # every file there before is untouched (folders above the run directory gain it)
    assert all(p.stat().st_mtime_ns == t for p, t in before.items() if p.is_file())
    assert all(p.exists() for p in before)


def test_a_folder_that_is_not_a_run_directory_is_not_overwritten(tmp_path):
    # a stage commit replaces RUN/results/: refuse folders that hold one but are not runs
    (tmp_path / "project" / "results").mkdir(parents=True)
    (tmp_path / "project" / "results" / "thesis.txt").write_text("precious")
    lesmis_export(seed=6).to_parquet(tmp_path / "export.parquet")
    rc, _, err = run_cli("run", "--edges", tmp_path / "export.parquet", "--run-dir", tmp_path / "project")
    assert rc == 2 and "not a cliquewise run directory" in err
    assert (tmp_path / "project" / "results" / "thesis.txt").read_text() == "precious"


def test_a_tampered_run_json_cannot_redirect_the_run(finished, tmp_path):
    # resume works in the folder it is given, whatever run.json says
    run = tmp_path / "run"
    shutil.copytree(finished, run)
    elsewhere = tmp_path / "elsewhere"
    data = json.loads((run / "run.json").read_text())
    data["settings"]["run_dir"] = str(elsewhere)
    (run / "run.json").write_text(json.dumps(data))
    (run / "results" / MANIFEST).unlink()
    rc, _, err = run_cli("resume", run)
    assert rc == 0, err
    assert not elsewhere.exists() and (run / "results" / MANIFEST).exists()


# --------------------------------------------------------------- network services


def _listening(proc: psutil.Process) -> list[str]:
    out = []
    for p in [proc, *proc.children(recursive=True)]:
        try:
            out += [(c.laddr.ip, c.laddr.port) for c in p.net_connections(kind="inet")
                    if c.status == psutil.CONN_LISTEN]
        except psutil.Error:
            pass
    return out


@pytest.mark.cluster
@pytest.mark.parametrize("kw", [dict(workers=1, threads=1), dict(workers=1, threads=1, dashboard="0"),
                                dict(dashboard=":0")], ids=["workers", "workers+dashboard", "in-process dashboard"])
def test_services_listen_on_localhost_only(kw):
    from cliquewise.engine import Engine, EngineSettings

    me = psutil.Process()
    before = set(_listening(me))
    with Engine(EngineSettings(progress=False, **kw)) as eng:
        assert eng.client is not None
        during = _listening(me)
    new = set(during) - before
    assert new, "the cluster listens somewhere"
    # every socket this process (scheduler, in-process worker) and its worker processes
    # opened is on the loopback interface
    assert all(ip == "127.0.0.1" for ip, _ in new), new
