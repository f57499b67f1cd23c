"""Orders over the candidates built a block at a time (``parts/order.py``), and the
mapped scatter and gather, against numpy.

References: ``numpy.argsort(-key, kind="stable")`` for the results' order (largest
first, ties by id) and ``kernels.prefixtree.candidate_rank`` (itself checked
against ``numpy.argsort`` in ``test_kernels_prefixtree.py``) for the fit's list
order; numpy fancy indexing for the mapped scatter and gather. The blocks and the
rows sorted at once are made tiny so that every refinement path runs.
"""

from __future__ import annotations

import networkx as nx
import numpy as np
import pandas as pd
import pytest
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

from _support import graph_frame
from cliquewise.kernels.prefixtree import candidate_rank
from cliquewise.parts import order as order_mod
from cliquewise.parts.order import descending_order, rank_by_size
from cliquewise.store import gather_mapped_many, load_npy, save_npy, scatter_mapped


SETTINGS = settings(max_examples=60, deadline=None, suppress_health_check=[HealthCheck.function_scoped_fixture])

# keys with many ties (a few values, zeros and -0.0) and keys spread over many
# binary orders of magnitude, so ranges are refined down to single values
_values = st.one_of(st.sampled_from([0.0, -0.0, 1.0, 2.5, 1e-300, 7e12]),
                    st.floats(min_value=0.0, max_value=1e300, allow_nan=False, allow_infinity=False))


@SETTINGS
@given(keys=st.lists(_values, max_size=80), rows=st.integers(1, 90), block=st.integers(1, 17))
def test_descending_order_equals_numpy_stable_argsort(tmp_path_factory, keys, rows, block):
    d = tmp_path_factory.mktemp("ord")
    key = np.array(keys, np.float64)
    save_npy(d / "key.npy", key)
    passes = descending_order(d / "key.npy", d / "order.npy", rows, block=block)
    got = load_npy(d / "order.npy")
    want = np.argsort(-key, kind="stable")  # numpy as reference: -0.0 and 0.0 compare equal
    np.testing.assert_array_equal(got, want)
    assert got.dtype == np.int64
    assert passes >= 1
    assert not (d / "order.npy.ranges").exists()  # scratch files removed


def test_descending_order_sorts_a_little_at_a_time(tmp_path, monkeypatch):
    # 20,000 keys, at most 500 sorted at once: every in-memory sort of keys is at most 500 long
    rng = np.random.default_rng(3)
    key = rng.pareto(1.5, 20_000)
    key[rng.random(20_000) < 0.6] = 0.0  # a run of ties far larger than the sort size
    save_npy(tmp_path / "key.npy", key)
    sorted_lengths = []
    real_argsort = np.argsort

    def watched(a, *args, **kw):
        if a.dtype == np.uint64:  # the sorts of keys (the others order a block by range)
            sorted_lengths.append(len(a))
        return real_argsort(a, *args, **kw)

    monkeypatch.setattr(order_mod.np, "argsort", watched)
    passes = descending_order(tmp_path / "key.npy", tmp_path / "order.npy", rows=500, block=1000)
    monkeypatch.undo()
    np.testing.assert_array_equal(load_npy(tmp_path / "order.npy"), np.argsort(-key, kind="stable"))
    assert sorted_lengths and max(sorted_lengths) <= 500
    assert passes <= 10  # a few passes over the data (levels of refinement), not one per range (over 16 here)


@pytest.mark.parametrize("bad", [np.nan, -1.0, np.inf])
def test_descending_order_refuses_keys_it_cannot_order(tmp_path, bad):
    save_npy(tmp_path / "key.npy", np.array([1.0, bad, 0.0]))
    with pytest.raises(ValueError, match="finite and >= 0"):
        descending_order(tmp_path / "key.npy", tmp_path / "order.npy", rows=10)


@SETTINGS
@given(sizes=st.lists(st.integers(0, 40), max_size=60), block=st.integers(1, 9))
def test_rank_by_size_equals_candidate_rank(tmp_path_factory, sizes, block):
    d = tmp_path_factory.mktemp("rank")
    s = np.array(sizes, np.int64)
    save_npy(d / "cand_ptr.npy", np.concatenate([[0], np.cumsum(s)]).astype(np.int64))
    n = rank_by_size(d / "cand_ptr.npy", d / "rank.npy", d / "by_rank.npy", block=block)
    want = candidate_rank(s * (s - 1) // 2)  # the in-memory counting sort, on the pairs
    assert n == len(s)
    np.testing.assert_array_equal(load_npy(d / "rank.npy"), want)
    inverse = np.empty(len(s), np.int64)
    inverse[want] = np.arange(len(s))
    np.testing.assert_array_equal(load_npy(d / "by_rank.npy"), inverse)


@SETTINGS
@given(n=st.integers(1, 200), data=st.data())
def test_mapped_scatter_and_gather_equal_numpy_indexing(tmp_path_factory, n, data):
    d = tmp_path_factory.mktemp("map")
    idx = np.array(data.draw(st.permutations(range(n))), np.int64)[:data.draw(st.integers(0, n))]
    values = np.arange(len(idx), dtype=np.float64) * 1.5
    out = np.lib.format.open_memmap(d / "a.npy", mode="w+", dtype=np.float64, shape=(n,))
    out[:] = -1.0
    pieces = data.draw(st.integers(1, 9))
    scatter_mapped(out, idx, values, pieces=pieces)
    want = np.full(n, -1.0)
    want[idx] = values  # numpy fancy assignment as reference
    np.testing.assert_array_equal(np.asarray(out), want)
    a, b = gather_mapped_many((out, out[::-1]), idx, pieces=pieces)
    np.testing.assert_array_equal(a, want[idx])
    np.testing.assert_array_equal(b, want[::-1][idx])


def test_results_sorted_a_few_rows_at_a_time_equal_the_results_sorted_at_once(tmp_path, monkeypatch):
    # the results stage orders the candidates with at most 3 rows sorted at once and
    # writes the same tables as when it sorts them all at once (reference for the
    # order itself: pandas sort in test_results_members.py)
    import cliquewise
    from cliquewise.stages import results

    edges = graph_frame(nx.les_miserables_graph())  # networkx's shipped weighted graph
    cliquewise.decompose(edges, run_dir=tmp_path / "once", progress=False)
    calls = []

    def small(key_path, out_path, rows):
        calls.append(order_mod.descending_order(key_path, out_path, rows, block=5))
        return calls[-1]

    monkeypatch.setattr(results, "descending_order", small)
    monkeypatch.setattr(results, "sort_rows", lambda ctx, n: 3)
    cliquewise.decompose(edges, run_dir=tmp_path / "small", progress=False)
    assert calls and calls[0] > 2  # ranges spread into scratch files and sorted one by one
    for table in ("cliques", "members", "nodes"):
        pd.testing.assert_frame_equal(pd.read_parquet(tmp_path / "small" / "results" / f"{table}.parquet"),
                                      pd.read_parquet(tmp_path / "once" / "results" / f"{table}.parquet"),
                                      check_exact=True)
