"""The fit's candidate-length vectors, in memory and in files, against numpy.

Every operation of :class:`cliquewise.parts.vectors.Vectors` is checked against the
plain numpy expression (the reference), with chunks small enough that each vector
spans several, and the file-backed vectors must give the same bits as the ones in
memory (the fit with and without a memory limit must agree exactly).
:func:`cliquewise.store.gather_mapped` is checked against numpy fancy indexing.
"""

from __future__ import annotations

import gc

import numpy as np
import pytest
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

from cliquewise.parts import vectors as vec
from cliquewise.store import gather_mapped, save_npy


@pytest.fixture(autouse=True)
def small_chunks(monkeypatch):
    monkeypatch.setattr(vec, "CHUNK", 7)


def _arrays(rng, n):
    mu = rng.uniform(0, 3, n)
    mu[rng.random(n) < 0.2] = 0.0
    acc = rng.uniform(0, 5, n)
    P = rng.integers(1, 50, n).astype(np.float64)
    return mu, acc, P


def _as(vs, a):
    out = vs.empty()
    out[:] = a
    return out


@settings(max_examples=30, deadline=None, suppress_health_check=[HealthCheck.function_scoped_fixture])
@given(n=st.integers(0, 60), seed=st.integers(0, 2**16))
def test_operations_match_numpy_in_memory_and_in_files(tmp_path_factory, n, seed):
    rng = np.random.default_rng(seed)
    mu, acc, P = _arrays(rng, n)
    x1, x2 = rng.uniform(0, 3, n), rng.uniform(0, 3, n)
    results = []
    for folder in (None, tmp_path_factory.mktemp("vec")):
        vs = vec.Vectors(n, folder)
        m, a, p, y1, y2 = (_as(vs, v) for v in (mu, acc, P, x1, x2))
        nxt, pen = vs.update_penalty(m, a, p)
        # reference: numpy expressions
        np.testing.assert_allclose(nxt, np.where(mu == 0, 0.0, mu * acc / P), rtol=1e-15)
        assert pen == pytest.approx(float(np.sum(mu * P)), rel=1e-12)
        assert vs.penalty(m, p) == pen  # the same additions in the same order
        sr, sv = vs.norms(m, y1, y2)
        assert sr == pytest.approx(float(np.sum((x1 - mu) ** 2)), rel=1e-12)
        assert sv == pytest.approx(float(np.sum((x2 - 2 * x1 + mu) ** 2)), rel=1e-12)
        pt = vs.point(m, y1, y2, -1.7, 1e-8)
        want = mu + 3.4 * (x1 - mu) + 1.7**2 * (x2 - 2 * x1 + mu)
        np.testing.assert_allclose(pt, np.where(want > 0, want, 1e-8 * mu), rtol=1e-12, atol=1e-12)
        np.testing.assert_array_equal(vs.pruned(m, p, 2.0), np.where(mu * P < 2.0, 0.0, mu))
        assert vs.count_dropped(vs.pruned(m, p, 2.0), m) == int(np.sum((mu * P < 2.0) & (mu > 0)))
        np.testing.assert_array_equal(vs.divide(a, p), acc / P)
        np.testing.assert_array_equal(vs.full(2.5), np.full(n, 2.5))
        results.append([np.array(v) for v in (nxt, pt)] + [pen, sr, sv])
    for a, b in zip(*results):  # files and memory: the same bits
        np.testing.assert_array_equal(a, b)


def test_file_vectors_round_trip_and_vanish(tmp_path):
    rng = np.random.default_rng(0)
    x = rng.uniform(size=40)
    vs = vec.Vectors(40, tmp_path / "v")
    v = _as(vs, x)
    vs.save(v, tmp_path / "x.npy")
    np.testing.assert_array_equal(np.load(tmp_path / "x.npy"), x)
    np.testing.assert_array_equal(vs.load(tmp_path / "x.npy"), x)
    assert isinstance(vs.ref(v), str) and np.array_equal(vec.open_vector(vs.ref(v)), x)
    perm = rng.permutation(40)
    save_npy(tmp_path / "perm.npy", perm)
    assert vs.gather_to_file(v, tmp_path / "perm.npy", tmp_path / "g.npy") == int(np.sum(x[perm] > 0))
    np.testing.assert_array_equal(np.load(tmp_path / "g.npy"), x[perm])  # reference: numpy indexing
    assert len(list((tmp_path / "v").glob("*.npy"))) >= 1
    del v
    gc.collect()
    assert list((tmp_path / "v").glob("*.npy")) == [], "a vector's file goes with its last reference"
    with pytest.raises(ValueError, match="finite"):
        vs.check(_as(vs, np.full(40, -1.0)))


@settings(max_examples=50, deadline=None, suppress_health_check=[HealthCheck.function_scoped_fixture])
@given(data=st.lists(st.integers(-5, 5), min_size=1, max_size=50), picks=st.lists(st.integers(0, 10**6), max_size=80),
       pieces=st.integers(1, 9))
def test_gather_mapped_equals_numpy_indexing(tmp_path_factory, data, picks, pieces):
    path = tmp_path_factory.mktemp("g") / "a.npy"
    a = np.array(data, np.int64)
    save_npy(path, a)
    idx = np.array([p % len(a) for p in picks], np.int64)
    got = gather_mapped(np.load(path, mmap_mode="r"), idx, pieces)
    np.testing.assert_array_equal(got, a[idx])  # reference: numpy fancy indexing
