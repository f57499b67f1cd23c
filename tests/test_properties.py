"""Property tests (hypothesis) that the kernel test files do not already cover.

* **EM sweep against a dense numpy reference built from the model itself**: for
  random memberships ``B`` and intensities ``mu``, ``lambda = B diag(mu) B^T`` over
  all pairs, then the update ``mu_k <- mu_k / P_k * sum_{pairs in k, y > 0} y / lambda``
  and the log-likelihood ``sum y log lambda - sum mu_k P_k`` (design notes, section 2;
  the estimator of "graphlet decomposition of a weighted network", AISTATS 2012).
  The kernels get the same problem as an edge -> candidate incidence cut into random
  partitions, in a random edge order. (``test_kernels_em.py`` compares against a
  scipy.sparse twin; this reference never forms an incidence.)
* **Degeneracy against igraph**: ``Graph.coreness`` as a second outside reference
  next to networkx ``core_number`` (``test_kernels_cliques.py``).
* **The ingest and split stages against pandas and scipy**, end to end on random
  exports: several files (Parquet or CSV), awkward or integer labels, duplicate and
  reversed rows, self-loops, zero and invalid weights, every merge rule, many read
  tasks and buckets. Reference: pandas ``groupby`` on the oriented label pairs, and
  ``scipy.sparse.csgraph.connected_components`` with pandas degree and strength.
  (``test_kernels_aggregate.py`` checks the aggregation kernel alone.)

Union-find against scipy, maximal cliques against networkx and igraph, and the
level sweep are property-tested in the ``test_kernels_*`` files already.
"""

from __future__ import annotations

import itertools
import json
import tempfile
from pathlib import Path
from unittest import mock

import igraph
import numpy as np
import pandas as pd
import pyarrow.parquet as pq
import pytest
import scipy.sparse as sp
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st
from scipy.sparse.csgraph import connected_components

from cliquewise.kernels.cliques import degeneracy_order
from cliquewise.kernels.em import em_partial, em_update, loglik, penalty
from cliquewise.kernels.graph import csr_from_edges

# ----------------------------------------------------------------------------- EM


@st.composite
def em_problems(draw):
    """Memberships B (n x K, each group >= 2 members), mu > 0 and counts on covered pairs."""
    n = draw(st.integers(2, 9))
    K = draw(st.integers(1, 6))
    groups = [sorted(draw(st.sets(st.integers(0, n - 1), min_size=2, max_size=n))) for _ in range(K)]
    B = np.zeros((n, K))
    for k, g in enumerate(groups):
        B[g, k] = 1.0
    mu = np.array(draw(st.lists(st.floats(0.05, 20.0), min_size=K, max_size=K)))
    covered = (B @ B.T) > 0
    Y = np.zeros((n, n))
    for i, j in itertools.combinations(range(n), 2):
        if covered[i, j]:
            Y[i, j] = Y[j, i] = draw(st.sampled_from([0.0, 1.0, 2.0, 3.0, 7.5, 1e6]))
    return B, mu, Y, draw(st.randoms(use_true_random=False))


def dense_em_reference(B, mu, Y):
    """The update and log-likelihood written with dense numpy arrays, from the model."""
    lam = B @ np.diag(mu) @ B.T
    n = len(B)
    iu = np.triu_indices(n, 1)
    y, l = Y[iu], lam[iu]
    pos = y > 0
    sizes = B.sum(axis=0)
    P = sizes * (sizes - 1) / 2
    ratio = np.zeros_like(y)
    ratio[pos] = y[pos] / l[pos]
    R = np.zeros((n, n))
    R[iu] = ratio
    # sum over pairs (i < j) inside group k of y / lambda: B_k^T R B_k with R upper-triangular
    acc = np.einsum("ik,ij,jk->k", B, R, B)
    return mu * acc / P, float(np.sum(y[pos] * np.log(l[pos])) - np.sum(mu * P)), P


def incidence_from(B, Y, rnd):
    """Edges (pairs with y > 0) in a random order, each with the groups holding both ends."""
    n, K = B.shape
    edges = [(i, j) for i, j in itertools.combinations(range(n), 2) if Y[i, j] > 0]
    rnd.shuffle(edges)
    rows = [[k for k in range(K) if B[i, k] and B[j, k]] for i, j in edges]
    ptr = np.concatenate([[0], np.cumsum([len(r) for r in rows])]).astype(np.int64)
    cand = np.array([k for r in rows for k in r], np.int64)
    y = np.array([Y[i, j] for i, j in edges], np.float64)
    return ptr, cand, y


@settings(max_examples=120, deadline=None)
@given(em_problems())
def test_em_sweep_matches_dense_numpy_model(prob):
    B, mu, Y, rnd = prob
    ref_mu, ref_ll, P = dense_em_reference(B, mu, Y)
    ptr, cand, y = incidence_from(B, Y, rnd)
    # random partitions of the edge range, each swept separately into one accumulator
    cuts = sorted({0, len(y), *(rnd.randint(0, len(y)) for _ in range(rnd.randint(0, 3)))})
    acc = np.zeros(len(mu))
    total = 0.0
    for a, b in zip(cuts[:-1], cuts[1:]):
        total += em_partial(ptr[a:b + 1], cand[ptr[a]:ptr[b]], y[a:b], mu, acc, 0, True)
    got = em_update(mu, acc, P)
    np.testing.assert_allclose(got, ref_mu, rtol=1e-12, atol=1e-12)
    assert total - penalty(mu, P) == pytest.approx(ref_ll, rel=1e-12, abs=1e-9)
    assert loglik(ptr, cand, y, mu, P) == pytest.approx(ref_ll, rel=1e-12, abs=1e-9)


@settings(max_examples=60, deadline=None)
@given(em_problems())
def test_em_fixed_point_preserves_total_weight(prob):
    # one EM step keeps sum_k mu_k P_k equal to sum y whenever every positive pair has
    # lambda > 0 (a property of the Poisson EM: sum_k mu_k acc_k = sum_e y_e)
    B, mu, Y, rnd = prob
    ptr, cand, y = incidence_from(B, Y, rnd)
    sizes = B.sum(axis=0)
    P = sizes * (sizes - 1) / 2
    acc = np.zeros(len(mu))
    em_partial(ptr, cand, y, mu, acc, 0, False)
    nxt = em_update(mu, acc, P)
    assert np.sum(nxt * P) == pytest.approx(np.sum(y), rel=1e-12, abs=1e-12)


# ------------------------------------------------------------------ degeneracy


@settings(max_examples=60, deadline=None)
@given(st.integers(1, 45), st.floats(0.0, 0.8), st.integers(0, 2**32 - 1))
def test_core_numbers_match_igraph_coreness(n, density, seed):
    rng = np.random.default_rng(seed)
    pairs = np.array([(a, b) for a in range(n) for b in range(a + 1, n)], np.int64).reshape(-1, 2)
    keep = pairs[rng.random(len(pairs)) < density]
    rng.shuffle(keep)
    u, v = keep[:, 0].copy(), keep[:, 1].copy()
    indptr, nbr, _, _ = csr_from_edges(n, u, v, np.zeros(len(u), np.int32))
    order, core = degeneracy_order(indptr, nbr)
    g = igraph.Graph(n=n, edges=keep.tolist())
    np.testing.assert_array_equal(core, g.coreness())  # reference: igraph
    rank = np.empty(n, np.int64)
    rank[order] = np.arange(n)
    later = np.zeros(n, np.int64)
    np.add.at(later, np.where(rank[u] < rank[v], u, v), 1)
    assert later.max(initial=0) == max(g.coreness(), default=0)  # the order attains the degeneracy


# --------------------------------------------------------- ingest and split stages

LABEL_POOLS = {
    "text": ["ann", "Bo, Jr.", 'say "hi"', "line\nbreak", "Zoë", "日本", " pad ", "x"],
    "int": [0, 7, 42, 10**12, -3, 5, 99, 1],
}
WEIGHTS = [0.0, 1.0, 2.0, 2.5, 0.125, 1e12, float("nan")]


@st.composite
def exports(draw):
    kind = draw(st.sampled_from(sorted(LABEL_POOLS)))
    pool = LABEL_POOLS[kind][: draw(st.integers(2, len(LABEL_POOLS[kind])))]
    n_rows = draw(st.integers(1, 40))
    rows = [(draw(st.sampled_from(pool)), draw(st.sampled_from(pool)), draw(st.sampled_from(WEIGHTS)))
            for _ in range(n_rows)]
    n_files = draw(st.integers(1, 3))
    fmt = draw(st.sampled_from(["parquet", "csv"]))
    cuts = sorted(draw(st.lists(st.integers(0, n_rows), min_size=n_files - 1, max_size=n_files - 1)))
    return {"rows": rows, "cuts": [0, *cuts, n_rows], "fmt": fmt,
            "merge": draw(st.sampled_from(["sum", "max", "min"])),
            "rows_per_task": draw(st.sampled_from([1, 3, 1000])),
            "rows_per_bucket": draw(st.sampled_from([1, 2, 5, 1000]))}


def pandas_reference(rows, merge):
    df = pd.DataFrame(rows, columns=["s", "t", "w"])
    nodes = set(df.s) | set(df.t)
    bad = df.w.isna()
    loops = ~bad & (df.s == df.t)
    zero = ~bad & ~loops & (df.w == 0)
    keep = df[~(bad | loops | zero)]
    a = np.where(keep.s < keep.t, keep.s, keep.t) if len(keep) else []
    b = np.where(keep.s < keep.t, keep.t, keep.s) if len(keep) else []
    pairs = pd.DataFrame({"a": a, "b": b, "w": keep.w.to_numpy()}).groupby(["a", "b"]).w.agg(merge)
    counts = {"invalid_weight": int(bad.sum()), "self_loop": int(loops.sum()), "zero_weight": int(zero.sum())}
    return pairs, nodes, counts


@settings(max_examples=30, deadline=None, suppress_health_check=[HealthCheck.too_slow])
@given(exports())
def test_ingest_and_split_match_pandas_and_scipy(ex):
    from cliquewise import pipeline
    from cliquewise.config import Settings
    from cliquewise.stage import InputError

    rows = ex["rows"]
    ref, nodes, counts = pandas_reference(rows, ex["merge"])
    with tempfile.TemporaryDirectory() as tmp, mock.patch.object(pipeline, "STAGES", ["ingest", "split"]):
        tmp = Path(tmp)
        for i, (lo, hi) in enumerate(zip(ex["cuts"][:-1], ex["cuts"][1:])):
            part = pd.DataFrame(rows[lo:hi], columns=["source", "target", "weight"])
            if ex["fmt"] == "parquet":
                part.to_parquet(tmp / f"p{i}.parquet", index=False)
            else:
                part.to_csv(tmp / f"p{i}.csv", index=False)
        s = Settings()
        s.input.edges = str(tmp / f"p*.{ex['fmt']}")
        s.input.merge, s.input.on_invalid = ex["merge"], "drop"
        s.input.rows_per_task, s.input.rows_per_bucket = ex["rows_per_task"], ex["rows_per_bucket"]
        s.run_dir = str(tmp / "run")
        if len(ref) == 0:
            with pytest.raises(InputError, match="no usable interaction"):
                pipeline.run_pipeline(s, progress=False)
            return
        pipeline.run_pipeline(s, progress=False)
        run = tmp / "run"
        labels = pq.read_table(run / "ingest" / "labels.parquet").to_pandas()
        edges = pd.concat([pd.read_parquet(f) for f in sorted((run / "ingest" / "edges").glob("*.parquet"))])
        split = pq.read_table(run / "split" / "nodes.parquet").to_pandas()
        report = json.loads((run / "ingest" / "report.json").read_text())

    # CSV integer labels come back as integers; text labels as text
    lab = labels.set_index("node_id").label
    assert sorted(lab.tolist(), key=repr) == sorted(nodes, key=repr)
    assert (edges.u < edges.v).all() and not edges.duplicated(["u", "v"]).any()
    got = pd.Series(edges.weight.to_numpy(),
                    index=pd.MultiIndex.from_arrays([lab.loc[edges.u].to_numpy(), lab.loc[edges.v].to_numpy()]))
    got = got.groupby(level=[0, 1]).sum()  # one row per pair already; this only sorts
    ref.index.names = got.index.names
    pd.testing.assert_series_equal(got.sort_index(), ref.sort_index(), check_names=False, rtol=1e-15)
    assert report["rows_read"] == len(rows)
    for k, v in counts.items():
        assert report["rows_dropped"][k] == v, (k, report)
    assert report["pairs"] == len(ref)

    # split: components from scipy, degree and strength from pandas
    n = len(lab)
    A = sp.coo_matrix((np.ones(len(edges)), (edges.u, edges.v)), shape=(n, n))
    _, comp = connected_components(A, directed=False)
    canon = pd.Series(np.arange(n)).groupby(comp).transform("min").to_numpy()
    got_canon = pd.Series(np.arange(n)).groupby(split.component.to_numpy()).transform("min").to_numpy()
    np.testing.assert_array_equal(got_canon, canon)
    deg = pd.concat([edges.u, edges.v]).value_counts().reindex(range(n), fill_value=0)
    strength = pd.concat([edges[["u", "weight"]].rename(columns={"u": "x"}),
                          edges[["v", "weight"]].rename(columns={"v": "x"})]).groupby("x").weight.sum()
    np.testing.assert_array_equal(split.degree.to_numpy(), deg.to_numpy())
    np.testing.assert_allclose(split.strength.to_numpy(), strength.reindex(range(n), fill_value=0).to_numpy(),
                               rtol=1e-15)
