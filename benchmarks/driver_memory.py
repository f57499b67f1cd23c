"""The driver's memory in the two steps that order the candidates, against holding
whole candidate-length arrays, measured in the same run.

Needs an enumerate stage's output (``--enum-dir``; default: the 50M-edge run that
``benchmarks/scale.py`` leaves in ``out/limited-50000000/run-limited/enumerate``).
The resident memory of this process (the driver) is sampled every 0.02 s.

1. The fit's preparation, ``parts.fitting.prepare_trees``, on a LocalCluster of
   ``--workers`` processes limited to ``--memory-limit`` each, as ``cliquewise run
   --memory-limit`` runs it. Baseline: the list order and its inverse built in
   memory (``candidate_rank`` on all the candidates' pairs), which is what the
   driver did before.
2. The results' strongest-first order and tables: ``stages.results`` writing
   ``cliques.parquet`` and ``members.parquet`` under the same limit, on a seeded
   synthetic ``mu`` (85% zeros, as pruning leaves; a real fit of 50M edges takes an
   hour here). Baseline: ``np.argsort(-expected, kind="stable")`` over all
   candidates, with the sizes and expected weights in memory.

Prints each step's driver peak above the resident memory it started from, and
the ratio to the baseline.

    python benchmarks/driver_memory.py [--enum-dir DIR] [--memory-limit 2GB] [--workers 2]
"""

from __future__ import annotations

import argparse
import ctypes
import json
import shutil
import sys
import tempfile
import threading
import time
from pathlib import Path

import numpy as np

HERE = Path(__file__).resolve().parent
OUT = HERE / "out"


class Peak:
    """Highest resident memory of this process while the block runs, above where it started."""

    def __enter__(self):
        from cliquewise.store import resident_bytes

        try:
            ctypes.CDLL("libc.so.6").malloc_trim(0)
        except OSError:
            pass
        self._rss = resident_bytes
        self.base = resident_bytes()
        self.peak = self.base
        self._stop = False
        self._t = threading.Thread(target=self._watch, daemon=True)
        self._t.start()
        self.t0 = time.perf_counter()
        return self

    def _watch(self):
        while not self._stop:
            self.peak = max(self.peak, self._rss())
            time.sleep(0.02)

    def __exit__(self, *exc):
        self.seconds = time.perf_counter() - self.t0
        self._stop = True
        self._t.join()
        self.peak = max(self.peak, self._rss())
        self.above = self.peak - self.base


def fit_prep(enum_dir: Path, memory_limit: str, workers: int) -> dict:
    from cliquewise.engine import Engine, EngineSettings
    from cliquewise.kernels.prefixtree import candidate_rank
    from cliquewise.parts import fitting
    from cliquewise.store import load_npy

    n_inc = int(load_npy(enum_dir / "inc_ptr.npy", mmap=True)[-1])
    eng = Engine(EngineSettings(workers=workers, memory_limit=memory_limit, progress=False))
    with tempfile.TemporaryDirectory(dir=OUT) as tmp:
        try:
            with Peak() as ours:
                parts = fitting.prepare_trees(eng, str(enum_dir), tmp, fitting.part_size(n_inc, 4_000_000),
                                              eng.task_memory())
        finally:
            eng.close()
    with Peak() as base:  # the list order and its inverse, in memory
        sizes = np.diff(load_npy(enum_dir / "cand_ptr.npy")).astype(np.int64)
        rank = candidate_rank(sizes * (sizes - 1) // 2)
        by_rank = np.empty_like(rank)
        by_rank[rank] = np.arange(len(rank))
        del sizes, rank, by_rank
    return {"parts": len(parts), "seconds": ours.seconds, "driver_above_start": ours.above,
            "baseline_above_start": base.above, "baseline_seconds": base.seconds}


def results_order(enum_dir: Path, memory_limit: str) -> dict:
    import pyarrow as pa
    from dask.utils import parse_bytes

    from cliquewise.parts.order import descending_order
    from cliquewise.stages import results as R
    from cliquewise.store import load_npy, save_npy

    K = len(load_npy(enum_dir / "cand_ptr.npy", mmap=True)) - 1
    with tempfile.TemporaryDirectory(dir=OUT) as tmp:
        d = Path(tmp)
        rng = np.random.default_rng(7)
        mu = rng.gamma(0.5, 1.0, K)
        mu[rng.random(K) < 0.85] = 0.0
        save_npy(d / "mu.npy", mu)
        del mu
        n_nodes = int(load_npy(enum_dir / "cand_nodes.npy", mmap=True).max()) + 1
        labels = pa.array(np.arange(n_nodes))
        rows = max(1 << 16, parse_bytes(memory_limit) // R.SORT_SHARE)  # as the stage's sort_rows
        with Peak() as ours:
            total = R._write_expected(enum_dir / "cand_ptr.npy", d / "mu.npy", d / "expected.npy")
            passes = descending_order(d / "expected.npy", d / "order.npy", rows)
            ptr = load_npy(enum_dir / "cand_ptr.npy", mmap=True)
            order = load_npy(d / "order.npy", mmap=True)
            R._write_cliques(d / "cliques.parquet", order, ptr, load_npy(d / "mu.npy", mmap=True),
                             load_npy(d / "expected.npy", mmap=True), total, load_npy(enum_dir / "levels.npy"),
                             load_npy(enum_dir / "level_min.npy", mmap=True),
                             load_npy(enum_dir / "level_max.npy", mmap=True))
            member_rows = R._write_members(d / "members.parquet", ptr, load_npy(enum_dir / "cand_nodes.npy",
                                                                                  mmap=True), order, labels)
            del ptr, order
        with Peak() as base:  # sizes, expected weights and their order, in memory
            sizes = np.diff(load_npy(enum_dir / "cand_ptr.npy")).astype(np.int32)
            expected = load_npy(d / "mu.npy") * (sizes * (sizes - 1) / 2.0)
            want = np.argsort(-expected, kind="stable")
            del sizes, expected
        same = bool(np.array_equal(load_npy(d / "order.npy"), want))
        del want
    return {"candidates": K, "member_rows": member_rows, "rows_sorted_at_once": rows, "passes": passes,
            "seconds": ours.seconds, "driver_above_start": ours.above, "baseline_above_start": base.above,
            "order_equals_numpy": same}


def main() -> int:
    ap = argparse.ArgumentParser(description=__doc__.split("\n\n")[0])
    ap.add_argument("--enum-dir", default=str(OUT / "limited-50000000" / "run-limited" / "enumerate"))
    ap.add_argument("--memory-limit", default="2GB")
    ap.add_argument("--workers", type=int, default=2)
    args = ap.parse_args()
    enum_dir = Path(args.enum_dir)
    if not (enum_dir / "manifest.json").exists():
        print(f"{enum_dir}: no enumerate output, skipped; run benchmarks/scale.py (or cliquewise run) first")
        return 0
    OUT.mkdir(exist_ok=True)
    mb = 2**20
    prep = fit_prep(enum_dir, args.memory_limit, args.workers)
    print(f"fit preparation ({prep['parts']} parts, {prep['seconds']:.0f} s): driver peak "
          f"{prep['driver_above_start'] / mb:.0f} MB above its start; baseline (list order in memory) "
          f"{prep['baseline_above_start'] / mb:.0f} MB; ratio {prep['baseline_above_start'] / prep['driver_above_start']:.2f}x",
          flush=True)
    res = results_order(enum_dir, args.memory_limit)
    print(f"results order and tables ({res['candidates']:,} candidates, {res['member_rows']:,} member rows, "
          f"{res['passes']:.1f} passes, {res['seconds']:.0f} s): driver peak {res['driver_above_start'] / mb:.0f} MB "
          f"above its start; baseline (argsort in memory, no tables) {res['baseline_above_start'] / mb:.0f} MB; "
          f"ratio {res['baseline_above_start'] / res['driver_above_start']:.2f}x; same order as numpy: "
          f"{res['order_equals_numpy']}")
    (OUT / "driver-memory.json").write_text(json.dumps({"fit_prep": prep, "results": res}, indent=1))
    shutil.rmtree(OUT / "tmp", ignore_errors=True)
    return 0


if __name__ == "__main__":
    sys.exit(main())
