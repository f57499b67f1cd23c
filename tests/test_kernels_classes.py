"""Edge classes: grouping against a dictionary twin, and exactness for the EM.

Reference for the EM equality: the scipy twin ``em_step_reference`` on the full
edge incidence (scipy.sparse products).
"""

import numpy as np
from hypothesis import given, settings, strategies as st

from cliquewise.kernels.classes import edge_classes, edge_classes_reference
from cliquewise.kernels.em import em_partial, em_step_reference


@st.composite
def incidences(draw):
    n_edges = draw(st.integers(0, 40))
    n_cand = draw(st.integers(1, 6))
    rows = [sorted(draw(st.sets(st.integers(0, n_cand - 1), min_size=1, max_size=n_cand)))
            for _ in range(n_edges)]
    ptr = np.concatenate([[0], np.cumsum([len(r) for r in rows])]).astype(np.int64)
    cand = np.array([k for r in rows for k in r], dtype=np.int64)
    y = np.array(draw(st.lists(st.integers(1, 9), min_size=n_edges, max_size=n_edges)), dtype=np.float64)
    return ptr, cand, y, n_cand


@settings(max_examples=200, deadline=None)
@given(incidences(), st.integers(0, 5))
def test_classes_match_dictionary_twin(inc, offset):
    ptr, cand, y, _ = inc
    ptr = ptr + offset  # a slice of a longer pointer array
    cand = np.concatenate([np.zeros(0, np.int64), cand])
    got = edge_classes(ptr, cand, y)
    ref = edge_classes_reference(ptr, cand, y)
    for g, r in zip(got, ref):
        np.testing.assert_array_equal(g, r)


@settings(max_examples=100, deadline=None)
@given(incidences())
def test_em_on_classes_equals_em_on_edges(inc):
    ptr, cand, y, K = inc
    if len(y) == 0:
        return
    P = np.full(K, 3.0)
    mu = np.linspace(0.5, 2.0, K)
    cp, cc, cy, _ = edge_classes(ptr, cand, y)
    acc = np.zeros(K)
    ll = em_partial(cp, cc, cy, mu, acc, 0, True)
    ref_mu, ref_ll, _ = em_step_reference(ptr, cand, y, mu, P)
    np.testing.assert_allclose(mu * acc / P, ref_mu, rtol=1e-12)
    np.testing.assert_allclose(ll - float(mu @ P), ref_ll, rtol=1e-12, atol=1e-12)


def test_sets_are_compared_exactly_not_by_hash():
    # grouping rests on _same_row, which compares lists, so equal hashes cannot merge sets
    import cliquewise.kernels.classes as C

    ptr = np.array([0, 1, 2, 3, 5], np.int64)
    cand = np.array([0, 1, 0, 0, 1], np.int64)
    y = np.array([1.0, 2.0, 3.0, 4.0])
    cp, cc, cy, ec = C.edge_classes(ptr, cand, y)
    assert ec.tolist() == [0, 1, 0, 2] and cy.tolist() == [4.0, 2.0, 4.0]
    assert C._same_row(ptr, cand, 0, 0, 2) and not C._same_row(ptr, cand, 0, 0, 1)
