"""Invented interaction exports drawn from the Poisson clique-factor model.

The scenario is "Harbourview", an invented coastal town. Its residents belong to
overlapping households, work crews, sports clubs and choirs; over one season every
two residents who share a group exchange messages at that group's rate. An export
row says "resident A exchanged messages with resident B n times".

Model (see docs/method.md): counts on unordered pairs are

    y_ij ~ Poisson(sum_k mu_k B_ik B_jk)

and we draw them group by group: every pair inside group k gets an independent
Poisson(mu_k) count, and a pair shared by several groups is written once per
group. Sums of independent Poisson variables are Poisson with the summed rate, so
an ingest that sums duplicate rows sees exactly the model. On top of that comes a
sprinkle of background noise (random pairs, count ``1 + Poisson(0.5)``).

What gets drawn (module constants below hold the numbers):

* **Group sizes**: truncated power law ``P(s) ~ s**-SIZE_EXPONENT`` on the
  integers of ``size_range``; with the default ``(2, 20)`` the mean size is about
  4.4. Larger groups are allowed but make candidate listing expensive: a group of
  size 40 with a rate near 3 looks, at a threshold near its rate, like a dense
  random graph on 40 nodes, which has thousands of maximal cliques (measured on
  20,000 residents: 3.6 candidates and 237 incidences per edge with ``(2, 40)``,
  1.1 and 11 with ``(2, 20)``). See docs/method.md.
* **Group count**: ``groups`` or, by default, ``ceil(MEAN_MEMBERSHIPS * nodes /
  mean size)`` so a resident belongs to about 2.5 groups on average (about
  ``0.57 * nodes`` groups for the default size range). Membership counts are
  roughly Poisson, so a few residents belong to no group.
* **Members**: distinct residents. Each group has a random centre on a ring of
  node ids; each member is, with probability ``locality``, drawn from a window of
  ``+-half_window`` ids around the centre, else from the whole town. That gives one
  giant component with local structure and long-range ties.
* **Intensities**: ``"lognormal"`` with median ``LOGNORMAL_MEDIAN`` and log-sd
  ``LOGNORMAL_SIGMA``; ``"pareto"`` a Pareto tail of index ``PARETO_ALPHA``
  truncated to ``[PARETO_LOW, PARETO_HIGH]`` (hundreds of distinct count levels).
  ``levels=L`` snaps intensities onto ``L`` geometrically spaced values.
* **Labels**: node ids are scrambled by a random permutation before they become
  labels, so label order says nothing about the groups. ``labels="str"`` writes
  ``"hv-0001234"`` (at least 7 digits), ``labels="int"`` the permuted integer.

Output layout under ``out_dir``::

    export/part-00000.parquet ...   source, target, weight   (or source, target, time)
    truth/groups.parquet            group_id, size, intensity, expected_weight, kind,
                                    observed_weight, observed_pairs
    truth/members.parquet           group_id, label
    truth/summary.json              seed, parameters, counts (written last)

Streaming and determinism: groups are generated in blocks of ``GROUPS_PER_BLOCK``
groups, block ``b`` from its own PCG64 stream ``SeedSequence(seed,
spawn_key=(1, b))``; event times come from streams keyed by block and event chunk.
The rows are one stream that is cut into files of exactly ``rows_per_partition``
rows (the last one shorter). So the concatenated export is the same whatever
``rows_per_partition`` or ``partitions`` is, and memory holds at most one file's
rows plus one block. ``partitions=P`` first runs the generator once without writing
to count the rows, then cuts them into ``P`` near-equal files (about 1.25 times the
time of a plain run: generating is cheap next to writing).
"""

from __future__ import annotations

import json
import math
import os
import time
from collections import deque
from dataclasses import dataclass
from pathlib import Path
from typing import Callable, Iterator

import numpy as np
import pyarrow as pa
import pyarrow.parquet as pq

__all__ = ["simulate", "nodes_for_edges"]

SIZE_EXPONENT = 2.0
MEAN_MEMBERSHIPS = 2.5
DEFAULT_LOCALITY = 0.8
LOGNORMAL_MEDIAN = 3.0
LOGNORMAL_SIGMA = 0.8
PARETO_ALPHA = 1.0
PARETO_LOW = 1.0
PARETO_HIGH = 1.0e4
NOISE_EXTRA_MEAN = 0.5  # noise counts are 1 + Poisson(NOISE_EXTRA_MEAN)
GROUPS_PER_BLOCK = 4096
EVENT_CHUNK = 1 << 20
SEASON_START = np.datetime64("2024-06-01T00:00:00", "s")
SEASON_END = np.datetime64("2024-09-01T00:00:00", "s")
LABEL_PREFIX = "hv-"
LABEL_MIN_DIGITS = 7
KINDS = (  # (largest size, name): flavour only, derived from the size
    (5, "household"),
    (12, "work crew"),
    (25, "sports club"),
    (math.inf, "choir"),
)

_STREAM_LABELS, _STREAM_BLOCK, _STREAM_EVENTS = 0, 1, 2


# --------------------------------------------------------------------------- model


@dataclass(frozen=True)
class _Model:
    """Everything that decides the drawn network (not how it is written)."""

    nodes: int
    n_groups: int
    size_lo: int
    size_hi: int
    intensity: str
    levels: int | None
    noise: float
    locality: float
    half_window: int
    seed: int

    @property
    def n_blocks(self) -> int:
        return -(-self.n_groups // GROUPS_PER_BLOCK)


def _size_pmf(lo: int, hi: int) -> tuple[np.ndarray, np.ndarray]:
    """Support and probabilities of the truncated power law on ``lo..hi``."""
    s = np.arange(lo, hi + 1, dtype=np.int64)
    w = s.astype(np.float64) ** -SIZE_EXPONENT
    return s, w / w.sum()


def _mean_size(lo: int, hi: int) -> float:
    s, p = _size_pmf(lo, hi)
    return float((s * p).sum())


def _intensity_range(kind: str) -> tuple[float, float, float]:
    """(low, high, median) used for the ``levels`` grid."""
    if kind == "lognormal":
        spread = math.exp(3.0 * LOGNORMAL_SIGMA)
        return LOGNORMAL_MEDIAN / spread, LOGNORMAL_MEDIAN * spread, LOGNORMAL_MEDIAN
    a, lo, hi = PARETO_ALPHA, PARETO_LOW, PARETO_HIGH
    median = lo * (1.0 - 0.5 * (1.0 - (lo / hi) ** a)) ** (-1.0 / a)
    return lo, hi, median


def _make_model(nodes, seed, groups, size_range, intensity, levels, noise, locality) -> _Model:
    nodes = int(nodes)
    if nodes < 2:
        raise ValueError(f"nodes must be at least 2, got {nodes}")
    lo, hi = (int(x) for x in size_range)
    if not 2 <= lo <= hi:
        raise ValueError(f"size_range must satisfy 2 <= low <= high, got {size_range}")
    if hi > nodes:
        raise ValueError(f"largest group size {hi} exceeds nodes={nodes}")
    if intensity not in ("lognormal", "pareto"):
        raise ValueError(f"intensity must be 'lognormal' or 'pareto', got {intensity!r}")
    if levels is not None and int(levels) < 1:
        raise ValueError(f"levels must be a positive integer, got {levels}")
    if not (noise >= 0 and math.isfinite(noise)):
        raise ValueError(f"noise must be a finite number >= 0, got {noise}")
    if not 0.0 <= locality <= 1.0:
        raise ValueError(f"locality must lie in [0, 1], got {locality}")
    if groups is None:
        groups = math.ceil(MEAN_MEMBERSHIPS * nodes / _mean_size(lo, hi))
    groups = int(groups)
    if groups < 1:
        raise ValueError(f"groups must be at least 1, got {groups}")
    return _Model(
        nodes=nodes, n_groups=groups, size_lo=lo, size_hi=hi, intensity=intensity,
        levels=None if levels is None else int(levels), noise=float(noise),
        locality=float(locality), half_window=max(200, 5 * hi), seed=int(seed),
    )


def _rng(seed: int, *key: int) -> np.random.Generator:
    return np.random.Generator(np.random.PCG64(np.random.SeedSequence(seed, spawn_key=key)))


def _draw_intensities(rng: np.random.Generator, m: _Model, count: int) -> np.ndarray:
    if m.intensity == "lognormal":
        mu = LOGNORMAL_MEDIAN * np.exp(LOGNORMAL_SIGMA * rng.standard_normal(count))
    else:  # inverse CDF of the Pareto law truncated to [low, high]
        a, lo, hi = PARETO_ALPHA, PARETO_LOW, PARETO_HIGH
        u = rng.random(count)
        mu = lo * (1.0 - u * (1.0 - (lo / hi) ** a)) ** (-1.0 / a)
    if m.levels is not None:
        lo, hi, median = _intensity_range(m.intensity)
        if m.levels == 1:
            mu = np.full(count, median)
        else:
            grid = np.geomspace(lo, hi, m.levels)
            pos = (np.log(mu) - math.log(lo)) / (math.log(hi) - math.log(lo)) * (m.levels - 1)
            mu = grid[np.clip(np.rint(pos), 0, m.levels - 1).astype(np.int64)]
    return mu


def _draw_members(rng: np.random.Generator, m: _Model, sizes: np.ndarray) -> np.ndarray:
    """Distinct members per group, concatenated and sorted within each group.

    Slots that repeat a member of the same group are redrawn (same law) until
    none repeats; each round is vectorised over the whole block.
    """
    n = m.nodes
    gid = np.repeat(np.arange(sizes.size), sizes)
    centre = rng.integers(0, n, size=sizes.size)
    local_ok = 2 * m.half_window + 1 < n and m.locality > 0
    members = np.empty(gid.size, dtype=np.int64)
    todo = np.arange(gid.size)
    while todo.size:
        draw = rng.integers(0, n, size=todo.size)
        if local_ok:
            is_local = rng.random(todo.size) < m.locality
            offset = rng.integers(-m.half_window, m.half_window + 1, size=todo.size)
            draw = np.where(is_local, (centre[gid[todo]] + offset) % n, draw)
        members[todo] = draw
        order = np.lexsort((members, gid))
        sm, sg = members[order], gid[order]
        dup = np.zeros(gid.size, dtype=bool)
        dup[1:] = (sm[1:] == sm[:-1]) & (sg[1:] == sg[:-1])
        members = sm  # sorted by (group, node): groups stay contiguous
        todo = np.flatnonzero(dup)
    return members


def _pair_positions(k: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Map ``k = 0, 1, 2, ...`` to position pairs ``(a, b)``, ``a < b``.

    The order is (0,1), (0,2), (1,2), (0,3), ... so the first ``s(s-1)/2``
    values cover exactly the pairs of a group of size ``s``.
    """
    b = np.floor((1.0 + np.sqrt(1.0 + 8.0 * k)) / 2.0).astype(np.int64)
    b -= b * (b - 1) // 2 > k  # guard against float rounding
    b += (b + 1) * b // 2 <= k
    return k - b * (b - 1) // 2, b


@dataclass
class _Block:
    """One block of groups and the export rows it produces (node ids, not labels)."""

    first_group: int
    sizes: np.ndarray
    mu: np.ndarray
    members: np.ndarray
    src: np.ndarray
    dst: np.ndarray
    cnt: np.ndarray
    observed_weight: np.ndarray
    observed_pairs: np.ndarray
    group_rows: int
    pairs: int
    noise_rows: int
    noise_weight: int


def _draw_block(m: _Model, b: int) -> _Block:
    rng = _rng(m.seed, _STREAM_BLOCK, b)
    first = b * GROUPS_PER_BLOCK
    g = min(GROUPS_PER_BLOCK, m.n_groups - first)
    support, p = _size_pmf(m.size_lo, m.size_hi)
    cdf = np.cumsum(p)
    sizes = support[np.minimum(np.searchsorted(cdf, rng.random(g), side="right"), support.size - 1)]
    mu = _draw_intensities(rng, m, g)
    members = _draw_members(rng, m, sizes)

    npairs = sizes * (sizes - 1) // 2
    pg = np.repeat(np.arange(g), npairs)
    pair_start = np.cumsum(npairs) - npairs
    a, bb = _pair_positions(np.arange(pg.size, dtype=np.int64) - pair_start[pg])
    base = (np.cumsum(sizes) - sizes)[pg]
    cnt = rng.poisson(mu[pg]).astype(np.int64)
    keep = np.flatnonzero(cnt > 0)
    u, v, cnt, pg = members[base[keep] + a[keep]], members[base[keep] + bb[keep]], cnt[keep], pg[keep]
    flip = rng.random(keep.size) < 0.5
    src, dst = np.where(flip, v, u), np.where(flip, u, v)
    obs_w = np.bincount(pg, weights=cnt, minlength=g).astype(np.int64)
    obs_p = np.bincount(pg, minlength=g).astype(np.int64)

    n_noise = int(rng.poisson(m.noise * npairs.sum())) if m.noise > 0 else 0
    noise_weight = 0
    if n_noise:
        nu = rng.integers(0, m.nodes, size=n_noise)
        nv = rng.integers(0, m.nodes - 1, size=n_noise)
        nv += nv >= nu  # a uniform pair of distinct residents, random direction
        nc = 1 + rng.poisson(NOISE_EXTRA_MEAN, size=n_noise).astype(np.int64)
        noise_weight = int(nc.sum())
        src, dst, cnt = np.concatenate([src, nu]), np.concatenate([dst, nv]), np.concatenate([cnt, nc])
    return _Block(first, sizes, mu, members, src, dst, cnt, obs_w, obs_p,
                  int(keep.size), int(npairs.sum()), n_noise, noise_weight)


def _blocks(m: _Model) -> Iterator[_Block]:
    for b in range(m.n_blocks):
        yield _draw_block(m, b)


def _block_events(m: _Model, b: int, blk: _Block) -> Iterator[tuple[np.ndarray, np.ndarray, np.ndarray]]:
    """Expand a block's rows into one event per message, in fixed-size chunks.

    Each message of a row gets its own direction (fair coin) and a time drawn
    uniformly over the season; chunk ``c`` uses stream ``(2, b, c)``.
    """
    cum = np.cumsum(blk.cnt)
    total = int(cum[-1]) if cum.size else 0
    start = cum - blk.cnt
    span = int((SEASON_END - SEASON_START) / np.timedelta64(1, "s"))
    for c, lo in enumerate(range(0, total, EVENT_CHUNK)):
        hi = min(total, lo + EVENT_CHUNK)
        r0 = int(np.searchsorted(cum, lo, side="right"))
        r1 = int(np.searchsorted(cum, hi - 1, side="right")) + 1
        take = np.minimum(cum[r0:r1], hi) - np.maximum(start[r0:r1], lo)
        rows = np.repeat(np.arange(r0, r1), take)
        rng = _rng(m.seed, _STREAM_EVENTS, b, c)
        flip = rng.random(rows.size) < 0.5
        s, t = blk.src[rows], blk.dst[rows]
        when = SEASON_START + rng.integers(0, span, size=rows.size).astype("timedelta64[s]")
        yield np.where(flip, t, s), np.where(flip, s, t), when


# --------------------------------------------------------------------------- writing


def _label_width(nodes: int) -> int:
    return max(LABEL_MIN_DIGITS, len(str(nodes - 1)))


def _str_labels(numbers: np.ndarray, width: int) -> pa.Array:
    """``"hv-"`` + zero-padded ``numbers``, built as one byte buffer (no Python strings)."""
    n = numbers.size
    length = len(LABEL_PREFIX) + width
    buf = np.empty((n, length), dtype=np.uint8)
    buf[:, : len(LABEL_PREFIX)] = np.frombuffer(LABEL_PREFIX.encode(), dtype=np.uint8)
    x = numbers.astype(np.int64, copy=True)
    for j in range(length - 1, len(LABEL_PREFIX) - 1, -1):
        buf[:, j] = 48 + x % 10
        x //= 10
    offsets = np.arange(n + 1, dtype=np.int32) * np.int32(length)  # callers keep n * length < 2**31
    return pa.StringArray.from_buffers(n, pa.py_buffer(offsets), pa.py_buffer(buf.ravel()))


class _Labeller:
    """Node id -> label as written (scrambled number, as string or int64)."""

    def __init__(self, m: _Model, kind: str):
        self.kind = kind
        self.width = _label_width(m.nodes)
        self.perm = _rng(m.seed, _STREAM_LABELS).permutation(m.nodes).astype(np.int64)

    def __call__(self, ids: np.ndarray) -> pa.Array:
        numbers = self.perm[ids]
        if self.kind == "int":
            return pa.array(numbers, type=pa.int64())
        out, step = [], 1 << 22  # 4M labels per chunk: far below int32 string offsets
        for i in range(0, numbers.size, step):
            out.append(_str_labels(numbers[i : i + step], self.width))
        return pa.chunked_array(out, type=pa.string()) if len(out) != 1 else out[0]


class _PartWriter:
    """Cuts a stream of row pieces into files of exactly ``rows_per_file`` rows."""

    def __init__(self, folder: Path, rows_per_file: int, label: _Labeller, third: str):
        self.folder, self.rows_per_file, self.label, self.third = folder, rows_per_file, label, third
        self.pieces: deque[tuple[np.ndarray, ...]] = deque()
        self.buffered = 0
        self.files: list[dict] = []
        self.rows = 0

    def add(self, src: np.ndarray, dst: np.ndarray, col: np.ndarray) -> None:
        if src.size == 0:
            return
        self.pieces.append((src, dst, col))
        self.buffered += src.size
        while self.buffered >= self.rows_per_file:
            self._write(self.rows_per_file)

    def close(self) -> None:
        if self.buffered:
            self._write(self.buffered)

    def _write(self, count: int) -> None:
        taken, need = [], count
        while need:  # take whole pieces, or the head of the first one (views, no copy)
            piece = self.pieces[0]
            if piece[0].size <= need:
                taken.append(self.pieces.popleft())
                need -= piece[0].size
            else:
                taken.append(tuple(c[:need] for c in piece))
                self.pieces[0] = tuple(c[need:] for c in piece)
                need = 0
        self.buffered -= count
        src, dst, col = (np.concatenate([p[i] for p in taken]) for i in range(3))
        third = pa.array(col, type=pa.int64() if self.third == "weight" else pa.timestamp("s"))
        table = pa.table({"source": self.label(src), "target": self.label(dst), self.third: third})
        name = f"part-{len(self.files):05d}.parquet"
        pq.write_table(table, self.folder / name)
        self.files.append({"file": name, "rows": int(count)})
        self.rows += count


def _kind_names(sizes: np.ndarray) -> np.ndarray:
    bounds = np.array([k[0] for k in KINDS[:-1]])
    return np.array([k[1] for k in KINDS])[np.searchsorted(bounds, sizes, side="left")]


def _count_rows(m: _Model, events: bool) -> int:
    total = 0
    for blk in _blocks(m):
        total += int(blk.cnt.sum()) if events else blk.cnt.size
    return total


# --------------------------------------------------------------------------- public API


def simulate(
    out_dir: str | os.PathLike,
    nodes: int = 10_000,
    seed: int = 0,
    *,
    groups: int | None = None,
    size_range: tuple[int, int] = (2, 20),
    intensity: str = "lognormal",
    levels: int | None = None,
    noise: float = 0.1,
    partitions: int | None = None,
    rows_per_partition: int = 2_000_000,
    labels: str = "str",
    events: bool = False,
    progress: Callable[[int], object] | None = None,
    locality: float = DEFAULT_LOCALITY,
) -> dict:
    """Write an invented Harbourview export and its planted truth.

    Parameters
    ----------
    out_dir : path
        Folder to write ``export/`` and ``truth/`` into (created if needed). Old
        ``export/part-*.parquet`` files and our truth files there are removed first.
    nodes : int
        Number of residents.
    seed : int
        Seed of every random stream (numpy PCG64 via ``SeedSequence``).
    groups : int, optional
        Number of groups; default ``ceil(2.5 * nodes / mean group size)``.
    size_range : (int, int)
        Smallest and largest group size (inclusive), ``2 <= low <= high <= nodes``.
    intensity : {"lognormal", "pareto"}
        Law of the group rates ``mu_k`` (see the module docstring).
    levels : int, optional
        Snap rates onto this many geometrically spaced values. Counts are Poisson
        around those values, so the export has more distinct counts than ``levels``.
    noise : float
        Expected noise rows per planted group pair; noise rows join two uniform
        random residents with count ``1 + Poisson(0.5)``.
    partitions : int, optional
        Number of files (exact unless there are fewer rows than that); takes
        precedence over ``rows_per_partition`` and
        costs one extra generation pass to count the rows.
    rows_per_partition : int
        Rows per file (the last file may be shorter).
    labels : {"str", "int"}
        ``"hv-0001234"`` strings or int64 labels.
    events : bool
        Write one row per message with a ``time`` column (uniform over the season
        2024-06-01 to 2024-08-31, not sorted) instead of a ``weight`` column.
        Summing events per unordered pair gives exactly the weighted export of
        the same seed summed per unordered pair.
    progress : callable, optional
        Called as ``progress(n)`` with the cumulative number of rows generated
        (written, or buffered for the next file); the last call equals the rows written.
    locality : float
        Probability that a member is drawn near its group's centre.

    Returns
    -------
    dict
        The content of ``truth/summary.json``.
    """
    t0 = time.perf_counter()
    if labels not in ("str", "int"):
        raise ValueError(f"labels must be 'str' or 'int', got {labels!r}")
    m = _make_model(nodes, seed, groups, size_range, intensity, levels, noise, locality)
    rows_per_partition = int(rows_per_partition)
    if rows_per_partition < 1:
        raise ValueError("rows_per_partition must be at least 1")
    if partitions is not None:
        partitions = int(partitions)
        if partitions < 1:
            raise ValueError("partitions must be at least 1")
        total = _count_rows(m, events)
        rows_per_file = max(1, -(-total // partitions))
    else:
        rows_per_file = rows_per_partition

    out = Path(out_dir)
    export, truth = out / "export", out / "truth"
    export.mkdir(parents=True, exist_ok=True)
    truth.mkdir(parents=True, exist_ok=True)
    for old in list(export.glob("part-*.parquet")) + [truth / f for f in
                                                      ("groups.parquet", "members.parquet", "summary.json")]:
        old.unlink(missing_ok=True)

    label = _Labeller(m, labels)
    writer = _PartWriter(export, rows_per_file, label, "time" if events else "weight")
    group_schema = pa.schema([("group_id", pa.int64()), ("size", pa.int64()), ("intensity", pa.float64()),
                              ("expected_weight", pa.float64()), ("kind", pa.string()),
                              ("observed_weight", pa.int64()), ("observed_pairs", pa.int64())])
    member_schema = pa.schema([("group_id", pa.int64()),
                               ("label", pa.int64() if labels == "int" else pa.string())])
    in_group = np.zeros(m.nodes, dtype=bool)
    tally = dict(pairs=0, group_rows=0, noise_rows=0, noise_weight=0, weight=0, rows=0)
    weight_values = np.zeros(0, dtype=np.int64)
    with pq.ParquetWriter(truth / "groups.parquet", group_schema) as gw, \
            pq.ParquetWriter(truth / "members.parquet", member_schema) as mw:
        for b, blk in enumerate(_blocks(m)):
            gid = blk.first_group + np.arange(blk.sizes.size, dtype=np.int64)
            gw.write_table(pa.table({
                "group_id": gid, "size": blk.sizes, "intensity": blk.mu,
                "expected_weight": blk.mu * (blk.sizes * (blk.sizes - 1) // 2),
                "kind": _kind_names(blk.sizes), "observed_weight": blk.observed_weight,
                "observed_pairs": blk.observed_pairs}, schema=group_schema))
            mw.write_table(pa.table({"group_id": np.repeat(gid, blk.sizes),
                                     "label": label(blk.members)}, schema=member_schema))
            in_group[blk.members] = True
            for key in ("pairs", "group_rows", "noise_rows", "noise_weight"):
                tally[key] += getattr(blk, key)
            tally["weight"] += int(blk.cnt.sum())
            weight_values = np.union1d(weight_values, np.unique(blk.cnt))
            if events:
                for s, t, when in _block_events(m, b, blk):
                    writer.add(s, t, when)
                    tally["rows"] += s.size
            else:
                writer.add(blk.src, blk.dst, blk.cnt)
                tally["rows"] += blk.cnt.size
            if progress is not None:
                progress(tally["rows"])
        writer.close()

    all_pairs = m.nodes * (m.nodes - 1) / 2
    summary = {
        "scenario": "Harbourview: residents in overlapping households, work crews, sports clubs, choirs",
        "seed": m.seed,
        "parameters": {
            "nodes": m.nodes, "groups": m.n_groups, "size_range": [m.size_lo, m.size_hi],
            "intensity": m.intensity, "levels": m.levels, "noise": m.noise, "locality": m.locality,
            "partitions": partitions, "rows_per_partition": rows_per_partition, "labels": labels,
            "events": bool(events),
        },
        "model": {
            "half_window": m.half_window,
            "size_exponent": SIZE_EXPONENT, "mean_memberships_target": MEAN_MEMBERSHIPS,
            "lognormal_median": LOGNORMAL_MEDIAN, "lognormal_sigma": LOGNORMAL_SIGMA,
            "pareto_alpha": PARETO_ALPHA, "pareto_range": [PARETO_LOW, PARETO_HIGH],
            "groups_per_block": GROUPS_PER_BLOCK, "event_chunk": EVENT_CHUNK,
            "season": [str(SEASON_START), str(SEASON_END)],
        },
        "rows_written": int(writer.rows),
        "files": writer.files,
        "rows_per_file": rows_per_file,
        "group_pairs": tally["pairs"],
        "group_rows": tally["group_rows"],
        "total_weight": tally["weight"],
        "distinct_weights": int(weight_values.size),  # of the weighted rows, noise included
        "nodes_in_groups": int(in_group.sum()),
        "noise": {
            "note": "background rows between uniform random pairs, count 1 + Poisson(0.5); "
                    "not a group of the model",
            "rows": tally["noise_rows"], "weight": tally["noise_weight"],
            "expected_rows": m.noise * tally["pairs"],
            "count_mean": 1.0 + NOISE_EXTRA_MEAN,
            "rate_per_pair": m.noise * tally["pairs"] * (1.0 + NOISE_EXTRA_MEAN) / all_pairs,
        },
        "seconds": round(time.perf_counter() - t0, 3),
    }
    tmp = truth / "summary.json.tmp"
    tmp.write_text(json.dumps(summary, indent=2))
    os.replace(tmp, truth / "summary.json")
    return summary


def _distinct_pairs(m: _Model) -> int:
    """Distinct unordered pairs with a positive summed count, drawn in memory."""
    keys = []
    for blk in _blocks(m):
        lo, hi = np.minimum(blk.src, blk.dst), np.maximum(blk.src, blk.dst)
        keys.append(np.unique(lo * m.nodes + hi))
    return int(np.unique(np.concatenate(keys)).size) if keys else 0


def nodes_for_edges(target_edges: int, *, pilot_nodes: int = 50_000, **kw) -> int:
    """Node count whose export has about ``target_edges`` distinct pairs.

    Calibration: with the group count proportional to ``nodes`` (the default) and
    a fixed locality window, the local density does not depend on ``nodes``, so
    the number of distinct pairs ``D(n)`` (duplicates and reciprocal rows merged)
    grows linearly. We draw one pilot network in memory (nothing is written)
    with ``pilot_nodes`` residents and the same model options, and scale:
    ``n = target * pilot / D(pilot)``. Measured with the defaults (8 seeds each):
    ``D(n) / n`` is 13.3 +- 0.1 at 100k nodes, 13.4 +- 0.4 at 20k, and drifts
    down to about 12 +- 2 below 1k nodes, where the heavy-tailed group sizes make
    one draw differ a lot from the next. So expect a few per cent error for large
    targets and up to about 30 % for tiny ones.

    Parameters
    ----------
    target_edges : int
        Wanted number of distinct unordered pairs.
    pilot_nodes : int
        Size of the pilot network (about 0.3 s at the default).
    **kw
        ``seed``, ``size_range``, ``intensity``, ``levels``, ``noise``,
        ``locality`` as for :func:`simulate`. ``groups`` is refused (a fixed
        group count does not scale); writing options are ignored.

    Returns
    -------
    int
        A node count, at least the largest group size.
    """
    if target_edges < 1:
        raise ValueError("target_edges must be at least 1")
    if kw.get("groups") is not None:
        raise ValueError("nodes_for_edges scales the group count with nodes; do not pass groups")
    for ignored in ("groups", "partitions", "rows_per_partition", "labels", "events", "progress"):
        kw.pop(ignored, None)
    opts = dict(seed=0, size_range=(2, 20), intensity="lognormal", levels=None, noise=0.1,
                locality=DEFAULT_LOCALITY)
    unknown = set(kw) - set(opts)
    if unknown:
        raise TypeError(f"unexpected options: {sorted(unknown)}")
    opts.update(kw)
    floor_nodes = int(opts["size_range"][1])
    pilot = max(int(pilot_nodes), floor_nodes)
    m = _make_model(pilot, opts["seed"], None, opts["size_range"], opts["intensity"],
                    opts["levels"], opts["noise"], opts["locality"])
    per_node = max(_distinct_pairs(m), 1) / pilot
    return max(floor_nodes, int(round(target_edges / per_node)))
