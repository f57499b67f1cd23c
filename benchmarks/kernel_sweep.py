"""Micro benchmark of the candidate sweep kernel.

Builds a sparse random graph with planted cliques (about 500k edges, about 40
weight levels), warms the kernel up on a tiny graph, then times one
``sweep_candidates`` call over all edges and prints candidates per second.

    .venv/bin/python benchmarks/kernel_sweep.py [--seed 0] [--nodes 200000]
"""

import argparse
import time

import numpy as np

from cliquewise.kernels.cliques import level_min, sweep_candidates
from cliquewise.kernels.graph import csr_from_edges
from cliquewise.kernels.incidence import incidence


def planted_graph(n_nodes, n_groups, n_background, n_levels, rng):
    """Edge list ``u < v`` with integer weights: planted groups plus background noise.

    Group ``k`` has 3..10 random members and a rate ``mu_k``; each pair inside it
    gets ``Poisson(mu_k)`` counts. Background pairs get ``1 + Geometric`` counts.
    Weights are summed over repeated pairs and clipped to ``n_levels``.
    """
    sizes = rng.integers(3, 11, n_groups)
    mu = rng.uniform(1.0, n_levels, n_groups)
    us, vs, ws = [], [], []
    for s in np.unique(sizes):
        idx = np.flatnonzero(sizes == s)
        members = np.stack([rng.choice(n_nodes, s, replace=False) for _ in idx])
        iu, ju = np.triu_indices(s, 1)
        a = members[:, iu].ravel()
        b = members[:, ju].ravel()
        w = rng.poisson(np.repeat(mu[idx], iu.size))
        us.append(a)
        vs.append(b)
        ws.append(w)
    a = rng.integers(0, n_nodes, n_background)
    b = rng.integers(0, n_nodes, n_background)
    us.append(a)
    vs.append(b)
    ws.append(rng.geometric(0.6, n_background))
    a = np.concatenate(us)
    b = np.concatenate(vs)
    w = np.concatenate(ws)
    keep = (a != b) & (w > 0)
    a, b, w = a[keep], b[keep], w[keep]
    lo = np.minimum(a, b).astype(np.int64)
    hi = np.maximum(a, b).astype(np.int64)
    key = lo * n_nodes + hi
    uk, inv = np.unique(key, return_inverse=True)
    wsum = np.bincount(inv, weights=w).astype(np.int64)
    wsum = np.minimum(wsum, n_levels)
    u = uk // n_nodes
    v = uk % n_nodes
    lev = np.unique(wsum, return_inverse=True)[1].astype(np.int32)
    return n_nodes, u, v, lev


def main():
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--seed", type=int, default=0)
    ap.add_argument("--nodes", type=int, default=200_000)
    ap.add_argument("--groups", type=int, default=20_000)
    ap.add_argument("--background", type=int, default=100_000)
    ap.add_argument("--levels", type=int, default=40)
    ap.add_argument("--repeat", type=int, default=3)
    args = ap.parse_args()
    rng = np.random.default_rng(args.seed)

    # warm-up (compile or load the cached kernels)
    n0, u0, v0, l0 = planted_graph(50, 10, 30, 5, rng)
    c0 = csr_from_edges(n0, u0, v0, l0)
    p0, x0, _, _, _ = sweep_candidates(*c0, u0, v0, l0)
    level_min(c0[0], c0[1], c0[2], p0, x0)
    incidence(c0[0], c0[1], c0[3], p0, x0, u0.size)

    n, u, v, lev = planted_graph(args.nodes, args.groups, args.background, args.levels,
                                 rng)
    t = time.perf_counter()
    indptr, nbr, nlev, eid = csr_from_edges(n, u, v, lev)
    t_csr = time.perf_counter() - t
    print(f"graph: {n} nodes, {u.size} edges, {lev.max() + 1} levels, "
          f"max degree {np.diff(indptr).max()}; csr {t_csr:.3f} s")

    best = np.inf
    for _ in range(args.repeat):
        t = time.perf_counter()
        ptr, nodes, lmax, status, work = sweep_candidates(indptr, nbr, nlev, eid, u, v,
                                                          lev)
        best = min(best, time.perf_counter() - t)
    k = ptr.size - 1
    print(f"sweep: {k} candidates (status {status}, work {work}) in {best:.3f} s "
          f"-> {k / best:,.0f} candidates/s, {u.size / best:,.0f} edges/s")
    sizes = np.diff(ptr)
    print(f"candidate sizes: mean {sizes.mean():.2f}, max {sizes.max()}")

    t = time.perf_counter()
    lmin = level_min(indptr, nbr, nlev, ptr, nodes)
    t_lmin = time.perf_counter() - t
    t = time.perf_counter()
    inc_ptr, inc_cand = incidence(indptr, nbr, eid, ptr, nodes, u.size)
    t_inc = time.perf_counter() - t
    print(f"level_min: {t_lmin:.3f} s; incidence: {inc_cand.size} entries in "
          f"{t_inc:.3f} s; mean level span {np.mean(lmax - lmin + 1):.2f}")


if __name__ == "__main__":
    main()
