"""The run store: one folder per stage, each made complete by its manifest.

Layout of a run directory::

    RUN/
      run.json                 what was asked for (the resolved pipeline settings)
      ingest/                  a finished stage: outputs + manifest.json
      split/ ...
      .work/<stage>-<key>/     a stage in progress (outputs and unit checkpoints)

A stage writes everything into ``.work/<stage>-<key>/`` where ``key`` is derived from
its parameters and the identities of its upstream stages. When all outputs are
written it renames that folder to ``RUN/<stage>/`` (replacing an older one) and only
then writes ``manifest.json`` atomically. The manifest is the completion marker: a
stage folder without a valid manifest is never used.

A manifest records the parameters and their hash, upstream identities, input
fingerprints, every output file with its size and CRC-32 checksum, wall and CPU
seconds, peak RSS, and work counts. Its ``identity`` hashes the output checksums,
so a stage recomputed to the same bytes (say with other partition sizes) keeps its
downstream valid, while any change in what it wrote invalidates everything below.

Long stages checkpoint inside: a *unit* (one work item) writes its files into the
work folder and then a small JSON marker with their checksums; on resume, units
whose markers verify are reused. Unit markers are not fsynced: a marker that outlives
its files (power loss) fails the size or checksum test and the unit is redone. No pickle anywhere: Parquet, JSON and ``.npy``
(loaded with ``allow_pickle=False``).
"""

from __future__ import annotations

import hashlib
import json
import os
import shutil
import time
import zlib
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any, Iterable

import numpy as np

MANIFEST = "manifest.json"
FORMAT_VERSION = 1
STAGE_FOLDERS = ("ingest", "split", "enumerate", "fit", "results", ".work")  # what a run directory may hold


class StoreError(RuntimeError):
    """A run directory is unusable as it stands (the message says what to do)."""


def canonical_json(obj: Any) -> str:
    """Deterministic JSON text (sorted keys, no whitespace) for hashing."""
    return json.dumps(obj, sort_keys=True, separators=(",", ":"), default=_json_default)


def _json_default(obj):
    if isinstance(obj, (np.integer,)):
        return int(obj)
    if isinstance(obj, (np.floating,)):
        return float(obj)
    if isinstance(obj, np.ndarray):
        return obj.tolist()
    if isinstance(obj, Path):
        return str(obj)
    raise TypeError(f"not JSON serialisable: {type(obj).__name__}")


def digest(text: str | bytes) -> str:
    """Short hex BLAKE2b digest of text."""
    if isinstance(text, str):
        text = text.encode()
    return hashlib.blake2b(text, digest_size=16).hexdigest()


def file_checksum(path: Path, chunk: int = 1 << 20) -> str:
    """CRC-32 of a file's bytes, as ``"crc32:xxxxxxxx"``.

    The checksum guards against truncated, torn or accidentally altered files
    (the error-detecting code of zip, gzip and PNG), not against deliberate
    tampering: whoever can rewrite a file can rewrite its manifest too. It is
    chosen for speed (zlib's CRC-32 runs several times faster than BLAKE2b), as
    every unit and stage output is checksummed when written and again on resume.
    Manifests written with another algorithm simply fail to match, so those
    outputs are recomputed, never trusted.
    """
    crc = 0
    buf = bytearray(chunk)  # one buffer for all reads, not a fresh block per read
    view = memoryview(buf)
    with open(path, "rb", buffering=0) as fh:
        while True:
            n = fh.readinto(buf)
            if not n:
                break
            crc = zlib.crc32(view[:n], crc)
    return f"crc32:{crc:08x}"


def write_json_atomic(path: Path, obj: Any, durable: bool = True) -> None:
    """Write JSON to ``path`` through a temporary file and an atomic rename.

    ``durable=False`` skips the fsync (unit markers, whose files are verified anyway).
    """
    path = Path(path)
    tmp = path.with_name(f".{path.name}.tmp-{os.getpid()}")
    with open(tmp, "w", encoding="utf-8") as fh:
        json.dump(obj, fh, indent=1, sort_keys=True, default=_json_default)
        if durable:
            fh.flush()
            os.fsync(fh.fileno())
    os.replace(tmp, path)


def read_json(path: Path) -> Any:
    with open(path, encoding="utf-8") as fh:
        return json.load(fh)


def save_npy(path: Path, arr: np.ndarray) -> None:
    """Save an array as ``.npy`` (never object dtype, so never pickled)."""
    arr = np.asarray(arr)
    if arr.dtype == object:
        raise TypeError("object arrays are not stored (they would need pickle)")
    with open(path, "wb") as fh:
        np.save(fh, arr, allow_pickle=False)


class NpyStream:
    """A 1-d ``.npy`` file of known length written piece by piece (header first).

    >>> import tempfile, numpy as np
    >>> path = Path(tempfile.mkdtemp()) / "a.npy"
    >>> with NpyStream(path, np.int32, 5) as out:
    ...     out.write(np.arange(3)); out.write(np.arange(2))
    >>> np.load(path).tolist()
    [0, 1, 2, 0, 1]
    """

    def __init__(self, path: Path, dtype, length: int):
        self.path = Path(path)
        self.dtype = np.dtype(dtype)
        if self.dtype == object:
            raise TypeError("object arrays are not stored (they would need pickle)")
        self.length = int(length)
        self.n = 0
        self._fh = open(self.path, "wb")
        np.lib.format.write_array_header_1_0(
            self._fh, {"descr": np.lib.format.dtype_to_descr(self.dtype), "fortran_order": False,
                       "shape": (self.length,)})

    def write(self, part) -> None:
        a = np.ascontiguousarray(part, self.dtype)
        self._fh.write(memoryview(a).cast("B"))
        self.n += len(a)

    def append_file(self, path: Path) -> None:
        """Append the items of the 1-d ``.npy`` file at ``path``. Of the same dtype,
        its bytes are copied by the operating system (``copy_file_range``, no pass
        through this process); else, or where the file system cannot, block by block."""
        with open(path, "rb") as fh:
            shape, dtype = _npy_header(fh)
            if len(shape) != 1 or dtype.hasobject:
                raise StoreError(f"{path} is not a 1-d numeric array")
            if dtype == self.dtype and hasattr(os, "copy_file_range"):
                self._fh.flush()
                start = fh.tell()
                src, left = start, shape[0] * dtype.itemsize
                try:
                    while left:
                        k = os.copy_file_range(fh.fileno(), self._fh.fileno(), left, src)
                        if k == 0:
                            raise StoreError(f"{path} is shorter than its header says")
                        src += k
                        left -= k
                except OSError:  # not on this file system: the rest block by block
                    pass
                self._fh.seek(0, os.SEEK_END)  # the buffered writer goes on after the copied bytes
                done = (src - start) // dtype.itemsize
                self.n += done
                fh.seek(src)
                rest = shape[0] - done
            else:
                rest = shape[0]
            while rest:
                a = np.fromfile(fh, dtype=dtype, count=min(rest, 1 << 22))
                if len(a) == 0:
                    raise StoreError(f"{path} is shorter than its header says")
                self.write(a)
                rest -= len(a)

    def close(self) -> None:
        if self._fh is None:
            return
        self._fh.close()
        self._fh = None
        if self.n != self.length:
            raise ValueError(f"{self.path}: wrote {self.n} items, expected {self.length}")

    def __enter__(self):
        return self

    def __exit__(self, exc_type, *_):
        if exc_type is None:
            self.close()
        elif self._fh is not None:
            self._fh.close()
            self._fh = None


def _npy_header(fh) -> tuple[tuple, np.dtype]:
    """Shape and dtype from the header of the ``.npy`` file open at its start; leaves
    the file at the first item."""
    version = np.lib.format.read_magic(fh)
    read_header = (np.lib.format.read_array_header_1_0 if version == (1, 0)
                   else np.lib.format.read_array_header_2_0)
    shape, _, dtype = read_header(fh)
    return shape, dtype


def create_npy(path: Path, dtype, length: int) -> None:
    """An empty 1-d ``.npy`` file of ``length`` items (zeros; sparse on disk) that
    :func:`write_npy_at` fills piece by piece, possibly from several processes.

    >>> import tempfile, numpy as np
    >>> path = Path(tempfile.mkdtemp()) / "a.npy"
    >>> create_npy(path, np.int64, 5)
    >>> write_npy_at(path, 3, np.array([7, 8])); write_npy_at(path, 0, np.array([1]))
    >>> np.load(path).tolist()
    [1, 0, 0, 7, 8]
    """
    dtype = np.dtype(dtype)
    if dtype == object:
        raise TypeError("object arrays are not stored (they would need pickle)")
    with open(path, "wb") as fh:
        np.lib.format.write_array_header_1_0(
            fh, {"descr": np.lib.format.dtype_to_descr(dtype), "fortran_order": False, "shape": (int(length),)})
        fh.truncate(fh.tell() + int(length) * dtype.itemsize)


def write_npy_at(path: Path, start: int, arr) -> None:
    """Write ``arr`` into the 1-d ``.npy`` file at ``path`` from item ``start`` on
    (the file's dtype and length stay as its header says)."""
    with open(path, "r+b") as fh:
        shape, dtype = _npy_header(fh)
        a = np.ascontiguousarray(arr, dtype)
        if len(shape) != 1 or dtype.hasobject or not 0 <= int(start) <= shape[0] - len(a):
            raise StoreError(f"{path}: cannot write {len(a)} items at {start} (shape {shape}, {dtype})")
        fh.seek(fh.tell() + int(start) * dtype.itemsize)
        fh.write(memoryview(a).cast("B"))


def save_npy_parts(path: Path, parts: Iterable[np.ndarray], dtype, length: int) -> None:
    """Save the concatenation of ``parts`` as one ``.npy`` of ``length`` items
    without building it in memory: the header first, then each part's bytes.

    ``parts`` is consumed once (a generator of memory-mapped unit files keeps
    one part resident at a time). A total other than ``length`` is an error.
    """
    with NpyStream(path, dtype, length) as out:
        for part in parts:
            out.write(part)


def npy_blocks(path: Path, block: int, lo: int = 0, hi: int | None = None):
    """Yield ``(start, array)`` for consecutive blocks of at most ``block`` items of
    the 1-d ``.npy`` file at ``path``, over positions ``[lo, hi)``.

    The blocks are read with plain file reads, not mapped: a sweep over a file
    larger than memory keeps one block resident, and the pages it went through stay
    in the page cache, not in this process's resident set.
    """
    with open(path, "rb") as fh:
        shape, dtype = _npy_header(fh)
        if len(shape) != 1 or dtype.hasobject:
            raise StoreError(f"{path} is not a 1-d numeric array")
        start = fh.tell()
        n = shape[0] if hi is None else min(int(hi), shape[0])
        pos = int(lo)
        fh.seek(start + pos * dtype.itemsize)
        while pos < n:
            k = min(int(block), n - pos)
            a = np.fromfile(fh, dtype=dtype, count=k)
            if len(a) != k:
                raise StoreError(f"{path} is shorter than its header says")
            yield pos, a
            pos += k


def load_npy(path: Path, mmap: bool = False) -> np.ndarray:
    """Load an ``.npy`` file; one holding Python objects (pickle) is refused, never loaded."""
    try:
        return np.load(path, allow_pickle=False, mmap_mode="r" if mmap else None)
    except ValueError as exc:
        if "allow_pickle" in str(exc) or "Python objects" in str(exc):  # mmap_mode refuses object arrays
            raise StoreError(f"{path} holds Python objects (pickle) and is not loaded; it was not written by "
                             f"cliquewise: delete the run directory and start again") from None
        raise


def resident_bytes() -> int:
    """This process's resident set in bytes (Linux ``/proc/self/statm``; 0 elsewhere)."""
    try:
        with open("/proc/self/statm", "rb") as fh:
            return int(fh.read().split()[1]) * _PAGE
    except (OSError, IndexError, ValueError):
        return 0


_PAGE = os.sysconf("SC_PAGE_SIZE") if hasattr(os, "sysconf") else 4096


def drop_mapped_pages(arrays: Iterable) -> None:
    """Take the pages of memory-mapped ``.npy`` arrays out of this process's resident set.

    The files stay in the operating system's page cache, so the next access maps
    a page again cheaply, from memory. A kernel sweeping random rows of a file
    larger than its memory budget calls this whenever its resident set passes the
    budget (mapped pages count as resident, and a worker is judged by its resident
    set). Arrays that are not file mappings are skipped.
    """
    import mmap

    for a in arrays:
        m = None
        while a is not None and m is None:  # a view of a memmap: follow its bases
            m = getattr(a, "_mmap", None)  # numpy.memmap keeps its mmap.mmap here
            a = getattr(a, "base", None)
        if m is not None and hasattr(m, "madvise"):
            try:
                m.madvise(mmap.MADV_DONTNEED)
            except (OSError, ValueError):
                pass


def gather_mapped(arr, idx, pieces: int = 64) -> np.ndarray:
    """``arr[idx]`` for a memory-mapped ``arr``, mapping a small part of its file at a time.

    The positions are visited in ascending order, ``pieces`` slices of them, and the
    mapped pages are dropped after each slice, so what is mapped at once is about
    the span of one slice, not every page the positions fall on.

    >>> import numpy as np
    >>> gather_mapped(np.arange(10) * 10, np.array([7, 1, 7, 3]), pieces=2).tolist()
    [70, 10, 70, 30]
    """
    return gather_mapped_many((arr,), idx, pieces)[0]


def gather_mapped_many(arrays, idx, pieces: int = 64) -> list[np.ndarray]:
    """:func:`gather_mapped` of several arrays of one length at the same positions
    (one sort of the positions for all of them)."""
    idx = np.asarray(idx)
    order = np.argsort(idx, kind="stable")
    ordered = idx[order]
    outs = [np.empty(len(idx), a.dtype) for a in arrays]
    step = max(1, -(-len(idx) // max(1, pieces)))
    for a in range(0, len(idx), step):
        o, at = order[a:a + step], ordered[a:a + step]
        for arr, out in zip(arrays, outs):
            out[o] = arr[at]
        drop_mapped_pages(arrays)
    return outs


def scatter_mapped(arr, idx, values, pieces: int = 64) -> None:
    """``arr[idx] = values`` for a memory-mapped ``arr`` opened for writing, touching a
    small part of its file at a time (as :func:`gather_mapped` reads). Positions
    must be distinct.

    >>> import numpy as np
    >>> a = np.zeros(5)
    >>> scatter_mapped(a, np.array([4, 0, 2]), np.array([1.0, 2.0, 3.0]), pieces=2)
    >>> a.tolist()
    [2.0, 0.0, 3.0, 0.0, 1.0]
    """
    idx = np.asarray(idx)
    values = np.asarray(values)
    order = np.argsort(idx, kind="stable")
    step = max(1, -(-len(idx) // max(1, pieces)))
    for a in range(0, len(idx), step):
        o = order[a:a + step]
        arr[idx[o]] = values[o]
        drop_mapped_pages((arr,))


def describe_outputs(folder: Path) -> dict[str, dict]:
    """Size and checksum of every file below ``folder`` (manifest excluded)."""
    out = {}
    for p in sorted(folder.rglob("*")):
        if p.is_file() and p.name != MANIFEST and not p.name.startswith("."):
            rel = p.relative_to(folder).as_posix()
            out[rel] = {"bytes": p.stat().st_size, "checksum": file_checksum(p)}
    return out


@dataclass
class Manifest:
    stage: str
    params: dict
    upstream: dict[str, str]
    inputs: list = field(default_factory=list)
    outputs: dict = field(default_factory=dict)
    counts: dict = field(default_factory=dict)
    profile: dict = field(default_factory=dict)
    identity: str = ""
    key: str = ""
    version: int = FORMAT_VERSION

    def to_dict(self) -> dict:
        return {
            "version": self.version,
            "stage": self.stage,
            "key": self.key,
            "identity": self.identity,
            "params": self.params,
            "params_hash": digest(canonical_json(self.params)),
            "upstream": self.upstream,
            "inputs": self.inputs,
            "outputs": self.outputs,
            "counts": self.counts,
            "profile": self.profile,
        }


def output_identity(stage: str, outputs: dict | None) -> str:
    """What downstream stages depend on: the stage's output bytes, nothing else."""
    return digest(canonical_json({"stage": stage, "outputs": outputs}))


def stage_key(stage: str, params: dict, upstream: dict[str, str], inputs: list) -> str:
    """What a stage's result depends on, before it runs."""
    return digest(canonical_json({"stage": stage, "params": params, "upstream": upstream, "inputs": inputs}))


class RunStore:
    """A run directory. Stages ask it whether they are done and hand it their outputs."""

    def __init__(self, root: str | os.PathLike, create: bool = True):
        self.root = Path(root).resolve()
        if create:
            # a stage commit replaces RUN/<stage>/: never do that in a folder that is not ours
            if self.root.is_dir() and not (self.root / "run.json").exists():
                clash = [n for n in STAGE_FOLDERS if (self.root / n).exists()]
                if clash:
                    raise StoreError(
                        f"{self.root} holds {clash[0]!r} but is not a cliquewise run directory (no run.json); "
                        f"choose a new or empty --run-dir")
            try:
                self.root.mkdir(parents=True, exist_ok=True)
                (self.root / ".work").mkdir(exist_ok=True)
            except OSError as exc:
                raise StoreError(f"cannot create run directory {self.root}: {exc.strerror}; choose another "
                                 f"--run-dir or make room for it") from exc
            if not os.access(self.root, os.W_OK):
                raise StoreError(f"run directory {self.root} is not writable; make it writable (its completed "
                                 f"stages are kept) or choose another --run-dir")
        elif not self.root.is_dir():
            raise StoreError(f"no run directory at {self.root}")

    # -- paths ---------------------------------------------------------------
    def stage_dir(self, stage: str) -> Path:
        return self.root / stage

    def work_dir(self, stage: str, key: str) -> Path:
        return self.root / ".work" / f"{stage}-{key}"

    # -- reading -------------------------------------------------------------
    def manifest(self, stage: str) -> dict | None:
        """The stage's manifest if present and parseable, else ``None``."""
        path = self.stage_dir(stage) / MANIFEST
        try:
            data = read_json(path)
        except (OSError, ValueError):
            return None
        if not isinstance(data, dict) or data.get("stage") != stage:
            return None
        return data

    def verify(self, stage: str, key: str | None = None, checksums: bool = True) -> tuple[bool, str]:
        """Check a finished stage: manifest valid, key matches, every output intact.

        Returns ``(ok, reason)``; ``reason`` says what is wrong when not ok.
        """
        man = self.manifest(stage)
        if man is None:
            if self.stage_dir(stage).exists():
                return False, "stage folder has no valid manifest (half-written or edited)"
            return False, "not run yet"
        if man.get("version") != FORMAT_VERSION:
            return False, "manifest from another format version"
        if key is not None and man.get("key") != key:
            return False, "parameters or upstream changed"
        expected = output_identity(stage, man.get("outputs"))
        if man.get("identity") != expected:
            return False, "manifest was edited (identity does not match its contents)"
        if digest(canonical_json(man.get("params"))) != man.get("params_hash"):
            return False, "manifest was edited (parameters do not match their hash)"
        if key is None:  # without a key, check the chain: upstream stages are still what this one read
            for up, ident in (man.get("upstream") or {}).items():
                up_man = self.manifest(up)
                if up_man is None or up_man.get("identity") != ident or not self.verify(up, checksums=False)[0]:
                    return False, f"stage {up!r} changed or is incomplete since this stage ran (resume reruns both)"
        folder = self.stage_dir(stage)
        for rel, info in man.get("outputs", {}).items():
            p = folder / rel
            if not p.is_file():
                return False, f"output {rel} is missing"
            if p.stat().st_size != info["bytes"]:
                return False, f"output {rel} has the wrong size (truncated or altered)"
            if checksums and file_checksum(p) != info["checksum"]:
                return False, f"output {rel} fails its checksum (altered)"
        return True, "complete"

    def identity(self, stage: str) -> str:
        man = self.manifest(stage)
        if man is None:
            raise StoreError(f"stage {stage!r} has not completed in {self.root}")
        return man["identity"]

    # -- writing -------------------------------------------------------------
    def begin(self, stage: str, key: str) -> Path:
        """The work folder for a stage attempt (kept across crashes for unit reuse)."""
        work = self.work_dir(stage, key)
        work.mkdir(parents=True, exist_ok=True)
        # earlier attempts with other keys can never be reused: remove them
        for old in (self.root / ".work").glob(f"{stage}-*"):
            if old != work and old.is_dir():
                shutil.rmtree(old, ignore_errors=True)
        return work

    def commit(self, manifest: Manifest, work: Path, keep: Iterable[str] = ()) -> dict:
        """Move a finished work folder into place and write its manifest last."""
        for sub in ("units",):  # unit checkpoints are not part of the outputs
            if sub not in keep and (work / sub).exists():
                shutil.rmtree(work / sub)
        manifest.outputs = describe_outputs(work)
        manifest.identity = output_identity(manifest.stage, manifest.outputs)
        final = self.stage_dir(manifest.stage)
        if final.exists():
            trash = self.root / ".work" / f"old-{manifest.stage}-{time.time_ns()}"
            os.replace(final, trash)
            shutil.rmtree(trash, ignore_errors=True)
        os.replace(work, final)
        data = manifest.to_dict()
        fault_point(f"before-manifest:{manifest.stage}")
        write_json_atomic(final / MANIFEST, data)
        fault_point(f"stage:{manifest.stage}")
        return data

    def invalidate(self, stage: str) -> None:
        """Remove a stage's manifest so it and everything downstream reruns."""
        try:
            (self.stage_dir(stage) / MANIFEST).unlink()
        except FileNotFoundError:
            pass

    # -- unit checkpoints ----------------------------------------------------
    @staticmethod
    def unit_done(work: Path, unit: str) -> bool:
        """True when unit ``unit`` in ``work`` finished and its files verify."""
        marker = work / "units" / f"{unit}.json"
        try:
            info = read_json(marker)
        except (OSError, ValueError):
            return False
        for rel, meta in info.get("files", {}).items():
            p = work / rel
            if not p.is_file() or p.stat().st_size != meta["bytes"] or file_checksum(p) != meta["checksum"]:
                return False
        return True

    @staticmethod
    def unit_commit(work: Path, unit: str, files: Iterable[str], extra: dict | None = None) -> None:
        """Mark unit ``unit`` finished, recording its files' checksums."""
        (work / "units").mkdir(exist_ok=True)
        fault_point(f"pre-unit:{unit}")  # the unit's files are written, its marker not yet
        info = {"files": {}, "extra": extra or {}}
        for rel in files:
            p = work / rel
            info["files"][rel] = {"bytes": p.stat().st_size, "checksum": file_checksum(p)}
        write_json_atomic(work / "units" / f"{unit}.json", info, durable=False)
        fault_point(f"unit:{unit}")

    @staticmethod
    def unit_info(work: Path, unit: str) -> dict:
        return read_json(work / "units" / f"{unit}.json").get("extra", {})


# -- fault injection (tests only) ----------------------------------------------
#
# ``CLIQUEWISE_FAULT="PREFIX[@N]"`` makes the process kill itself with SIGKILL the
# N-th time (default 1st) it passes a checkpoint whose name starts with PREFIX:
#
# * ``pre-unit:<unit>``         a unit's files are written but its marker is not;
# * ``unit:<unit>``             after a unit checkpoint (marker written);
# * ``substep:<stage>:<name>``  after a timed sub-step of a stage (see stage.py);
# * ``task:<function>``         at the start of a task run by ``Engine.map`` or
#                               ``Engine.submit``, in whichever process runs it (a
#                               worker process on a LocalCluster);
# * ``before-manifest:<stage>`` after a stage folder is moved into place but before
#                               its manifest is written;
# * ``stage:<stage>``           after a stage completes.
#
# With ``CLIQUEWISE_FAULT_ONCE=PATH`` the kill happens at most once across all
# processes (the first to create PATH dies; a restarted worker does not).
# ``CLIQUEWISE_FAULT_TRACE=PATH`` appends the name of every point passed to PATH,
# so tests can choose kill points from a real run instead of hard-coding unit
# names. The crash and worker-failure tests use these to kill runs at exact
# points. Nothing happens when neither variable is set.
_fault_hits: dict[str, int] = {}


def fault_point(name: str) -> None:
    """Kill this process (SIGKILL) here if ``CLIQUEWISE_FAULT`` asks for it (tests only)."""
    trace = os.environ.get("CLIQUEWISE_FAULT_TRACE")
    if trace:
        with open(trace, "a", encoding="utf-8") as fh:
            fh.write(name + "\n")
    spec = os.environ.get("CLIQUEWISE_FAULT")
    if not spec:
        return
    prefix, _, nth = spec.partition("@")
    if not name.startswith(prefix):
        return
    _fault_hits[prefix] = _fault_hits.get(prefix, 0) + 1
    if _fault_hits[prefix] < int(nth or 1):
        return
    once = os.environ.get("CLIQUEWISE_FAULT_ONCE")
    if once:
        try:
            os.close(os.open(once, os.O_CREAT | os.O_EXCL | os.O_WRONLY))
        except FileExistsError:
            return
    import signal

    os.kill(os.getpid(), signal.SIGKILL)

