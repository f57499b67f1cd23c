"""Candidate-length vectors of the fit: in memory, or in files a chunk at a time.

The fit keeps a few vectors over the candidates: ``mu``, the SQUAREM points, the
accumulator and ``P`` (pairs per candidate). A :class:`Vectors` makes them and runs
the arithmetic the fit needs on them, :data:`CHUNK` entries at a time:

* without a folder they are numpy arrays (the embedded engine);
* with a folder (a memory limit is set) each is an ``.npy`` file there, memory-
  mapped, and the mapped pages are dropped after each chunk, so the driver holds a
  few chunks whatever the number of candidates. A vector's file is deleted when
  the last reference to it goes. Workers open the same files by path
  (:func:`open_vector`).

Both ways run the same chunked loops, so every sum is added in the same order and
the fit gives the same bits with and without a limit.
"""

from __future__ import annotations

import itertools
import os
import weakref
from pathlib import Path

import numpy as np

from cliquewise.kernels.em import em_update_penalty_into, penalty, squarem_norms, squarem_point_into
from cliquewise.store import NpyStream, drop_mapped_pages, gather_mapped, load_npy

CHUNK = 1 << 22  # entries per chunk (32 MB of float64)


def open_vector(ref, writable: bool = False) -> np.ndarray:
    """A vector passed to a task: the array itself, or the path of its file (mapped)."""
    if isinstance(ref, (str, os.PathLike)):
        return np.load(ref, mmap_mode="r+" if writable else "r", allow_pickle=False)
    return ref


def release(*arrays) -> None:
    """Drop the mapped pages of file vectors (nothing for arrays in memory)."""
    drop_mapped_pages(arrays)


class Vectors:
    """Vectors of length ``n`` and their chunked arithmetic (see the module docstring)."""

    def __init__(self, n: int, folder: Path | None = None):
        self.n = int(n)
        self.folder = Path(folder) if folder is not None else None
        if self.folder is not None:
            self.folder.mkdir(parents=True, exist_ok=True)
        self._names = itertools.count()

    @property
    def in_files(self) -> bool:
        return self.folder is not None

    # -- making vectors --------------------------------------------------------
    def empty(self) -> np.ndarray:
        if self.folder is None:
            return np.empty(self.n, np.float64)
        path = self.folder / f"v{next(self._names):06d}.npy"
        arr = np.lib.format.open_memmap(path, mode="w+", dtype=np.float64, shape=(self.n,))
        weakref.finalize(arr, _unlink, str(path))
        return arr

    def full(self, value: float) -> np.ndarray:
        out = self.empty()
        for s in self.chunks():
            out[s] = value
            release(out)
        return out

    def ref(self, x: np.ndarray):
        """What to hand a task for ``x``: its path when it is a file, else ``x``."""
        name = getattr(x, "filename", None)
        return str(name) if self.folder is not None and name else x

    def chunks(self):
        for lo in range(0, self.n, CHUNK):
            yield slice(lo, min(self.n, lo + CHUNK))

    def load(self, path: Path) -> np.ndarray:
        """A vector holding the 1-d ``.npy`` file at ``path``."""
        src = load_npy(path, mmap=True)
        if len(src) != self.n:
            raise ValueError(f"{path}: {len(src)} entries, expected {self.n}")
        out = self.empty()
        for s in self.chunks():
            out[s] = src[s]
            release(out, src)
        return out

    def save(self, x: np.ndarray, path: Path) -> None:
        with NpyStream(path, np.float64, self.n) as f:
            for s in self.chunks():
                f.write(x[s])
                release(x)

    # -- arithmetic ------------------------------------------------------------
    def check(self, x) -> None:
        for s in self.chunks():
            c = x[s]
            bad = np.any(c < 0) or not np.all(np.isfinite(c))
            release(x)
            if bad:
                raise ValueError("mu0 must be finite and >= 0")

    def norms(self, x, x1, x2) -> tuple[float, float]:
        sr = sv = 0.0
        for s in self.chunks():
            a, b = squarem_norms(x[s], x1[s], x2[s])
            sr += a
            sv += b
            release(x, x1, x2)
        return sr, sv

    def point(self, x, x1, x2, alpha: float, min_ratio: float) -> np.ndarray:
        out = self.empty()
        for s in self.chunks():
            squarem_point_into(x[s], x1[s], x2[s], alpha, min_ratio, out[s])
            release(x, x1, x2, out)
        return out

    def update_penalty(self, mu, acc, P) -> tuple[np.ndarray, float]:
        """The EM image ``mu * acc / P`` (0 where ``mu`` is 0) and ``sum mu P``."""
        out = self.empty()
        total = 0.0
        for s in self.chunks():
            total += em_update_penalty_into(mu[s], acc[s], P[s], out[s])
            release(mu, acc, P, out)
        return out, total

    def penalty(self, mu, P) -> float:
        """``sum mu P``, added as :meth:`update_penalty` adds it (the same bits)."""
        total = 0.0
        for s in self.chunks():
            total += penalty(mu[s], P[s])
            release(mu, P)
        return total

    def divide(self, a, b) -> np.ndarray:
        out = self.empty()
        for s in self.chunks():
            np.divide(a[s], b[s], out=out[s])
            release(a, b, out)
        return out

    def pruned(self, mu, P, threshold: float) -> np.ndarray:
        """``mu`` with the entries whose ``mu * P`` is below ``threshold`` set to 0."""
        out = self.empty()
        for s in self.chunks():
            m = mu[s]
            out[s] = np.where(m * P[s] < threshold, 0.0, m)
            release(mu, P, out)
        return out

    def count_dropped(self, kept, full) -> int:
        """Entries that are 0 in ``kept`` and positive in ``full``."""
        total = 0
        for s in self.chunks():
            total += int(np.count_nonzero((kept[s] == 0) & (full[s] > 0)))
            release(kept, full)
        return total

    def gather_to_file(self, x, index_path: Path, path: Path) -> int:
        """Write ``x[index]`` (``index`` the int array in ``index_path``) to ``path``;
        returns how many written entries are positive."""
        index = load_npy(index_path, mmap=True)
        positive = 0
        with NpyStream(path, np.float64, len(index)) as f:
            for s in self.chunks():
                idx = np.asarray(index[s])
                got = gather_mapped(x, idx) if self.in_files else np.asarray(x)[idx]
                positive += int(np.count_nonzero(got > 0))
                f.write(got)
                release(x, index)
        return positive


def _unlink(path: str) -> None:
    try:
        os.unlink(path)
    except OSError:
        pass
