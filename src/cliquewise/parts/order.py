"""Orders over the candidates, built a block at a time from files.

A 50M-edge export has tens of millions of candidates; the driver must not hold
an array over all of them. The two orders the pipeline needs are built here from
``.npy`` files, writing ``.npy`` files, with memory bounded by a block size:

* :func:`rank_by_size`: the fit's list order (most members first, ties by id),
  the same order as :func:`cliquewise.kernels.prefixtree.candidate_rank` of the
  pairs. A counting sort: the keys are sizes, which take few values, so one pass
  counts them and a second writes each candidate's rank and the inverse (one
  sequential write cursor per size).
* :func:`descending_order`: the results' order, largest key first, ties by id,
  the same as ``np.argsort(-key, kind="stable")`` for keys ``>= 0``. An external
  distribution sort: a histogram of the keys' bit patterns (for non-negative
  floats, the order of the bits is the order of the values) cuts the key range
  into ranges of at most ``rows`` candidates, a second pass spreads the keys
  into scratch files by range, and each range is then sorted in memory (one too
  large is split again the same way). A run of equal keys larger than ``rows``
  (the pruned candidates, all 0) is written in id order without sorting.
"""

from __future__ import annotations

import shutil
from pathlib import Path

import numba
import numpy as np

from cliquewise.store import NpyStream, drop_mapped_pages, npy_blocks

BLOCK = 1 << 22  # candidates per block read
SORT_BLOCK = 1 << 20  # keys per block read by descending_order (each block's temporaries: about 60 bytes a key)
BITS = 16  # histogram bins per refinement: 2**BITS


# -- the fit's list order -------------------------------------------------------
def candidate_sizes(cand_ptr_path, block: int = BLOCK):
    """Yield ``(start, sizes)`` of consecutive candidates from ``cand_ptr.npy``."""
    last = None
    for lo, ptr in npy_blocks(cand_ptr_path, block):
        if last is None:
            if len(ptr) > 1:
                yield lo, np.diff(ptr)
        else:
            yield lo - 1, np.diff(ptr, prepend=last)
        last = ptr[-1:]


def rank_by_size(cand_ptr_path, rank_path, by_rank_path, block: int = BLOCK) -> int:
    """Write ``rank`` and its inverse ``by_rank`` for the candidates of ``cand_ptr.npy``.

    Ordered by size, largest first, ties by id; ``rank[k]`` is candidate ``k``'s
    position and ``by_rank[r]`` the candidate at position ``r`` (int32 below
    2**31 candidates, else int64). Sizes 0 and 1 tie, as their pairs (0) do.
    Memory: two blocks and a count per size. Returns the number of candidates.
    """
    counts = np.zeros(2, np.int64)
    n = 0
    for _, s in candidate_sizes(cand_ptr_path, block):
        key = np.maximum(s, 1)
        top = int(key.max(initial=0))
        if top >= len(counts):
            counts = np.concatenate([counts, np.zeros(top + 1 - len(counts), np.int64)])
        counts[:top + 1] += np.bincount(key, minlength=top + 1)
        n += len(s)
    # start of each size's positions: the largest size first
    start = np.zeros(len(counts), np.int64)
    start[:-1] = np.cumsum(counts[::-1])[::-1][1:]
    dtype = np.int32 if n < 2**31 else np.int64
    by_rank = np.lib.format.open_memmap(Path(by_rank_path), mode="w+", dtype=dtype, shape=(n,))
    try:
        with NpyStream(rank_path, dtype, n) as f_rank:
            for lo, s in candidate_sizes(cand_ptr_path, block):
                rank = np.empty(len(s), dtype)
                _place(np.maximum(s, 1), lo, start, rank, np.asarray(by_rank))
                f_rank.write(rank)
                drop_mapped_pages((by_rank,))
        by_rank.flush()
    finally:
        del by_rank
    return n


@numba.njit(nogil=True, cache=True)
def _place(key, lo, start, rank, by_rank):
    """Counting sort's second pass over one block: ``start[key]`` is the next free
    position of that key; candidate ``lo + i`` takes it."""
    for i in range(key.shape[0]):
        r = start[key[i]]
        start[key[i]] = r + 1
        rank[i] = r
        by_rank[r] = lo + i


# -- the results' order ---------------------------------------------------------
def _bits(key: np.ndarray) -> np.ndarray:
    """The sortable bit patterns of non-negative floats (``-0.0`` becomes ``0.0``)."""
    k = np.asarray(key, np.float64) + 0.0
    return k.view(np.uint64)


def descending_order(key_path, out_path, rows: int, block: int = SORT_BLOCK) -> int:
    """Write to ``out_path`` (int64 ``.npy``) the positions of the keys in
    ``key_path`` (float64 ``.npy``, finite, ``>= 0``), largest key first, ties by
    position: ``np.argsort(-key, kind="stable")``, with at most ``rows``
    positions sorted in memory at a time (about 24 bytes each, plus numpy's sort
    buffer).

    When the keys do not fit in ``rows``, a histogram pass cuts their range into
    ranges of at most ``rows`` (a bin larger than that is a range of its own), and
    a second pass appends each key's position and bits to its range's scratch
    files (next to ``out_path``, removed at the end); the ranges are then sorted
    one at a time, largest keys first, a too-large one by the same two passes over
    its own files. So the work is a few passes over the data, whatever ``rows``.
    Returns the keys read, in passes over the whole data (the first, checking
    pass included).
    """
    n = 0
    lo_bits, hi_bits = None, None
    for _, k in npy_blocks(key_path, block):
        if len(k) == 0:
            continue
        if not np.all(np.isfinite(k)) or np.any(k < 0):
            raise ValueError(f"{key_path}: keys must be finite and >= 0")
        u = _bits(k)
        lo_bits = int(u.min()) if lo_bits is None else min(lo_bits, int(u.min()))
        hi_bits = int(u.max()) if hi_bits is None else max(hi_bits, int(u.max()))
        n += len(k)
    scratch = Path(out_path).parent / (Path(out_path).name + ".ranges")
    sorter = _Sorter(max(1, int(rows)), block, scratch)
    try:
        with NpyStream(out_path, np.int64, n) as out:
            if n:
                sorter.emit(_KeyFile(key_path, block), lo_bits, hi_bits, n, out)
    finally:
        shutil.rmtree(scratch, ignore_errors=True)
    return 1.0 + sorter.read / max(n, 1)


class _KeyFile:
    """The keys to order: ``(positions, bits)`` a block at a time from the key file."""

    def __init__(self, path, block: int):
        self.path = path
        self.block = block

    def blocks(self):
        for start, k in npy_blocks(self.path, self.block):
            yield np.arange(start, start + len(k), dtype=np.int64), _bits(k)


class _Range:
    """Part of the keys, in two scratch files (positions, bits) in position order."""

    def __init__(self, folder: Path, name: str, block: int):
        self.pos = folder / f"{name}.pos"
        self.bits = folder / f"{name}.bits"
        self.block = block

    def append(self, pos, bits) -> None:
        for path, arr in ((self.pos, pos), (self.bits, bits)):
            with open(path, "ab") as fh:
                fh.write(memoryview(np.ascontiguousarray(arr)).cast("B"))

    def blocks(self):
        if not self.pos.exists():
            return
        with open(self.pos, "rb") as fp, open(self.bits, "rb") as fb:
            while True:
                p = np.fromfile(fp, np.int64, self.block)
                if len(p) == 0:
                    return
                yield p, np.fromfile(fb, np.uint64, len(p))

    def remove(self) -> None:
        self.pos.unlink(missing_ok=True)
        self.bits.unlink(missing_ok=True)


class _Sorter:
    def __init__(self, rows: int, block: int, scratch: Path):
        self.rows = rows
        self.block = block
        self.scratch = scratch
        self.read = 0
        self.names = 0

    def _select(self, source, lo: int, hi: int):
        """Yield, block by block, the positions of ``source`` whose key bits lie in ``[lo, hi]``, and the bits."""
        ulo, uhi = np.uint64(lo), np.uint64(hi)
        for pos, u in source.blocks():
            self.read += len(pos)
            keep = (u >= ulo) & (u <= uhi)
            yield pos[keep], u[keep]

    def emit(self, source, lo: int, hi: int, count: int, out: NpyStream) -> None:
        """Write the positions of ``source`` with key bits in ``[lo, hi]`` (``count``), largest first."""
        if lo == hi:  # one key: ties in position order, as they come
            for pos, _ in self._select(source, lo, hi):
                out.write(pos)
            return
        if count <= self.rows:
            pos = np.empty(count, np.int64)
            u = np.empty(count, np.uint64)
            at = 0
            for p, b in self._select(source, lo, hi):
                pos[at:at + len(p)] = p
                u[at:at + len(p)] = b
                at += len(p)
            np.invert(u, out=u)  # ascending ~u is descending u; a stable sort keeps ties in position order
            order = np.argsort(u, kind="stable")
            del u
            for i in range(0, count, self.block):
                out.write(pos[order[i:i + self.block]])
            return
        shift = max(0, (hi - lo).bit_length() - BITS)
        counts = np.zeros(((hi - lo) >> shift) + 1, np.int64)
        ulo = np.uint64(lo)
        for _, u in self._select(source, lo, hi):
            counts += np.bincount(((u - ulo) >> np.uint64(shift)).astype(np.int64), minlength=len(counts))
        ranges = []  # (lo, hi, count), largest keys first, each of at most rows keys or a single bin
        b = len(counts) - 1
        while b >= 0:
            if counts[b] == 0:
                b -= 1
                continue
            a, total = b, 0
            while a >= 0 and total + counts[a] <= self.rows:
                total += int(counts[a])
                a -= 1
            if a == b:  # one bin too large on its own: a range to refine
                a, total = b - 1, int(counts[b])
            ranges.append((lo + ((a + 1) << shift), min(hi, lo + ((b + 1) << shift) - 1), total))
            b = a
        # one pass puts every key into its range's files, in position order
        self.scratch.mkdir(parents=True, exist_ok=True)
        files = []
        for _ in ranges:
            files.append(_Range(self.scratch, f"r{self.names:06d}", self.block))
            self.names += 1
        starts = np.array([r[0] for r in ranges][::-1], np.uint64)  # ascending lower bounds
        for pos, u in self._select(source, lo, hi):
            which = len(ranges) - np.searchsorted(starts, u, side="right")  # index into ranges
            order = np.argsort(which, kind="stable")
            cuts = np.searchsorted(which[order], np.arange(len(ranges) + 1))
            for i in np.flatnonzero(np.diff(cuts)):
                o = order[cuts[i]:cuts[i + 1]]
                files[i].append(pos[o], u[o])
        for (r_lo, r_hi, total), f in zip(ranges, files):
            self.emit(f, r_lo, r_hi, total, out)
            f.remove()
