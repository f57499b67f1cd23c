"""Blow-ups: a component with exponentially many maximal cliques stops within its
budget, and memory stays bounded while it does.

The graph is the cocktail-party graph on 60 vertices (all pairs but a perfect
matching), which has 2^30 maximal cliques (Moon and Moser 1965, "On cliques in
graphs"). ``test_enumerate_stage.py`` checks the message and the time; here the
peak resident memory of the ``cliquewise run`` process is sampled with psutil at
two clique budgets: the difference must be what the larger budget's cliques take,
so memory is bounded by the budget, whatever the number of maximal cliques.
"""

from __future__ import annotations

import itertools
import os
import subprocess
import sys
import time

import pandas as pd
import psutil
import pytest

from cliquewise.store import RunStore


def _frame(pairs) -> pd.DataFrame:
    return pd.DataFrame([(f"p{a:02d}", f"p{b:02d}", 1) for a, b in pairs], columns=["source", "target", "weight"])


def _peak_rss(args) -> tuple[int, int, str]:
    """Run ``cliquewise ARGS``; return (exit code, peak RSS in bytes, stderr)."""
    env = dict(os.environ)
    env.pop("CLIQUEWISE_FAULT", None)
    proc = subprocess.Popen([sys.executable, "-m", "cliquewise.cli", "--quiet", *map(str, args)],
                            stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True, env=env)
    ps = psutil.Process(proc.pid)
    peak = 0
    while proc.poll() is None:
        try:
            peak = max(peak, ps.memory_info().rss)
        except psutil.Error:
            break
        time.sleep(0.01)
    _, err = proc.communicate(timeout=120)
    return proc.returncode, peak, err


def test_exponential_cliques_stop_within_budget_with_bounded_memory(tmp_path):
    k = 30
    cocktail = [(a, b) for a, b in itertools.combinations(range(2 * k), 2) if a // 2 != b // 2]
    _frame(cocktail).to_parquet(tmp_path / "blowup.parquet")
    peaks = {}
    for budget in (1_000, 200_000):
        rc, peaks[budget], err = _peak_rss(["run", "--edges", tmp_path / "blowup.parquet", "--run-dir",
                                            tmp_path / f"b{budget}", "--max-cliques", budget])
        assert rc == 2 and f"clique count budget ({budget} cliques)" in err, err
        assert not RunStore(tmp_path / f"b{budget}", create=False).verify("enumerate")[0]
    # memory follows the budget, not the 2^30 cliques (about 240 GB as int64 ids): the
    # extra 199000 cliques of 30 members take 199000 * 30 * 8 bytes = 46 MB as ids; the
    # output buffers double as they grow and the unit is redone once they are full, so
    # allow 5 times that
    extra = peaks[200_000] - peaks[1_000]
    assert extra < 5 * 199_000 * 30 * 8, (extra / 2**20, peaks)
