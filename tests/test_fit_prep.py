"""The fit's preparation under a memory limit and its tree cache on threads.

References: the unbounded preparation (itself checked against plain-Python twins
in ``test_kernels_prefixtree.py``) and each part's own files as written.
"""

from __future__ import annotations

import networkx as nx
import numpy as np

from _support import graph_frame
from cliquewise.store import load_npy


def test_first_use_numbering_in_small_blocks_under_a_budget_equals_the_unbounded_one(tmp_path, monkeypatch):
    # prepare_trees with a 1-byte budget (pages dropped after every block of 3 ids)
    # and without one give the same parts and the same numbering (the numbering's
    # first-use rule is checked in test_kernels_prefixtree.py)
    import cliquewise
    from cliquewise.engine import Engine, EngineSettings
    from cliquewise.parts import fitting

    cliquewise.decompose(graph_frame(nx.les_miserables_graph()), run_dir=tmp_path / "run", progress=False)
    enum_dir = tmp_path / "run" / "enumerate"
    eng = Engine(EngineSettings(progress=False))
    try:
        free = fitting.prepare_trees(eng, str(enum_dir), str(tmp_path / "free"), 50)
        monkeypatch.setattr(fitting, "NUMBER_BLOCK_LIMITED", 3)
        tight = fitting.prepare_trees(eng, str(enum_dir), str(tmp_path / "tight"), 50, budget=1)
    finally:
        eng.close()
    assert free == tight and len(free) > 1
    a, b = load_npy(tmp_path / "free" / "new_id.npy"), load_npy(tmp_path / "tight" / "new_id.npy")
    np.testing.assert_array_equal(a, b)
    assert sorted(a.tolist()) == list(range(len(a)))  # a numbering: every id once


def test_tree_cache_shared_by_threads(tmp_path, monkeypatch):
    # the embedded engine sweeps parts on several threads of one process, and each
    # loads its tree through one cache: loads, evictions and the size count run
    # side by side (a run of 141 parts once stopped with "dictionary changed size
    # during iteration"); every load must still return the part's own arrays
    import threading

    import cliquewise
    from cliquewise.engine import Engine, EngineSettings
    from cliquewise.parts import fitting

    cliquewise.decompose(graph_frame(nx.les_miserables_graph()), run_dir=tmp_path / "run", progress=False)
    eng = Engine(EngineSettings(progress=False))
    try:
        part_list = fitting.prepare_trees(eng, str(tmp_path / "run" / "enumerate"), str(tmp_path / "t"), 1)
    finally:
        eng.close()
    assert len(part_list) >= 4
    want = {p["index"]: load_npy(tmp_path / "t" / f"p{p['index']:05d}.cand.npy") for p in part_list}
    monkeypatch.setattr(fitting, "_TREE_CACHE_LIMIT", len(part_list) - 1)  # evictions now and then
    # reading a file's header parses it with the ast module, which CPython 3.11
    # does not guard against threads switching as often as below; reads are one
    # at a time here so that only the cache's own bookkeeping runs side by side
    reading = threading.Lock()
    real_load = fitting.load_npy

    def load_one_at_a_time(*args, **kw):
        with reading:
            return real_load(*args, **kw)

    monkeypatch.setattr(fitting, "load_npy", load_one_at_a_time)
    errors = []

    def hammer(seed):
        rng = np.random.default_rng(seed)
        try:
            for i in rng.integers(0, len(part_list), 1500):
                p = part_list[int(i)]
                got = fitting._load_tree(str(tmp_path / "t"), p, None if i % 2 else 10**6)
                assert np.array_equal(got[0], want[p["index"]])
        except Exception as exc:  # noqa: BLE001 - reported below
            errors.append(exc)

    import sys

    switch = sys.getswitchinterval()
    sys.setswitchinterval(1e-6)  # threads take turns often, as under load
    try:
        threads = [threading.Thread(target=hammer, args=(s,)) for s in range(4)]
        for t in threads:
            t.start()
        for t in threads:
            t.join()
    finally:
        sys.setswitchinterval(switch)
    fitting.clear_cache()
    assert not errors, errors[0]
