"""Tests for cliquewise.kernels.unionfind.

Outside references: scipy.sparse.csgraph.connected_components (through
connected_components_reference), networkx.connected_components, and networkx's
shipped les_miserables_graph and davis_southern_women_graph.
"""

from __future__ import annotations

import networkx as nx
import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from cliquewise.kernels import unionfind as uf


def run_chunks(n, u, v, cuts):
    parent = uf.uf_init(n)
    merges = 0
    bounds = [0, *cuts, len(u)]
    for a, b in zip(bounds[:-1], bounds[1:]):
        merges += uf.uf_union_edges(parent, u[a:b], v[a:b])
    return parent, merges


graphs = st.integers(1, 60).flatmap(
    lambda n: st.tuples(
        st.just(n),
        st.lists(st.tuples(st.integers(0, n - 1), st.integers(0, n - 1)), max_size=3 * n),
    )
)


@settings(max_examples=150, deadline=None)
@given(g=graphs, data=st.data())
def test_matches_scipy_on_random_chunked_streams(g, data):
    n, edges = g
    u = np.array([e[0] for e in edges], dtype=np.int64)
    v = np.array([e[1] for e in edges], dtype=np.int64)
    cuts = sorted(data.draw(st.lists(st.integers(0, len(edges)), max_size=5)))
    parent, merges = run_chunks(n, u, v, cuts)
    comp = uf.uf_labels(parent)
    # reference: scipy.sparse.csgraph.connected_components, relabelled by smallest node
    ref = uf.connected_components_reference(n, u, v)
    np.testing.assert_array_equal(comp, ref)
    assert merges == n - (comp.max() + 1)
    assert np.all(parent <= np.arange(n))  # documented invariant


@settings(max_examples=60, deadline=None)
@given(g=graphs, data=st.data())
def test_forests_of_separate_chunks_merge(g, data):
    n, edges = g
    u = np.array([e[0] for e in edges], dtype=np.int64)
    v = np.array([e[1] for e in edges], dtype=np.int64)
    cut = data.draw(st.integers(0, len(edges)))
    left, _ = run_chunks(n, u[:cut], v[:cut], [])
    right, _ = run_chunks(n, u[cut:], v[cut:], [])
    child, par = uf.uf_forest(right)
    assert len(child) <= max(n - 1, 0)
    uf.uf_union_edges(left, child, par)
    np.testing.assert_array_equal(uf.uf_labels(left), uf.connected_components_reference(n, u, v))


def test_labels_follow_smallest_node_on_shipped_graphs():
    for G in (nx.les_miserables_graph(), nx.davis_southern_women_graph(), nx.karate_club_graph()):
        G = nx.convert_node_labels_to_integers(G, ordering="sorted")
        G.add_nodes_from(range(G.number_of_nodes(), G.number_of_nodes() + 5))  # isolated
        n = G.number_of_nodes()
        e = np.array(list(G.edges()), dtype=np.int64).reshape(-1, 2)
        rng = np.random.default_rng(0)
        e = e[rng.permutation(len(e))]
        parent, _ = run_chunks(n, e[:, 0], e[:, 1], [len(e) // 3, len(e) // 2])
        comp = uf.uf_labels(parent)
        # reference: networkx.connected_components, ordered by smallest member
        ref = sorted(sorted(c) for c in nx.connected_components(G))
        ref = sorted(ref, key=min)
        assert comp.max() + 1 == len(ref)
        for label, members in enumerate(ref):
            assert set(np.flatnonzero(comp == label)) == set(members)


def test_long_chain_in_adversarial_order():
    # edges (i, i+1) fed from the far end: the worst case for union by index
    n = 200_000
    u = np.arange(n - 2, -1, -1, dtype=np.int64)
    parent = uf.uf_init(n)
    assert uf.uf_union_edges(parent, u, u + 1) == n - 1
    comp = uf.uf_labels(parent)
    assert comp.max() == 0
    # reference: scipy.sparse.csgraph.connected_components
    np.testing.assert_array_equal(comp, uf.connected_components_reference(n, u, u + 1))


def test_bad_input_raises():
    parent = uf.uf_init(3)
    with pytest.raises(ValueError):
        uf.uf_union_edges(parent, np.array([0]), np.array([3]))
    with pytest.raises(ValueError):
        uf.uf_union_edges(parent, np.array([0, 1]), np.array([1]))
    with pytest.raises(ValueError):
        uf.uf_labels(np.array([1, 0], dtype=np.int64))  # not built by index linking


def test_empty():
    parent = uf.uf_init(0)
    assert uf.uf_labels(parent).shape == (0,)
    assert uf.uf_union_edges(uf.uf_init(2), np.zeros(0, np.int64), np.zeros(0, np.int64)) == 0
