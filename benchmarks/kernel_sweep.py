"""Micro benchmark of the candidate kernels: sweep, level_min, incidence.

Builds a sparse random graph with planted cliques (about 500k edges, about 40
weight levels by default), warms the kernels up on a tiny graph, then times
``sweep_candidates`` over all edges, ``level_min`` and ``incidence`` on its
candidates: best of ``--repeat`` runs, wall clock and thread CPU time (CPU time is
the steadier figure on a shared machine).

    .venv/bin/python benchmarks/kernel_sweep.py [--seed 0] [--nodes 200000]
    .venv/bin/python benchmarks/kernel_sweep.py --nodes 2000000 --groups 200000 \\
        --background 1000000            # about 5M edges

``--compile`` instead measures numba's on-disk cache: it runs a fresh process
twice against an empty cache folder, first cold (every kernel compiled and
written to the cache), then warm (loaded from it), and reports for each process
the import time and the first call of each kernel on a tiny graph, and whether
any kernel of ``cliquewise.kernels`` had to be compiled in the warm process.
"""

import argparse
import json
import os
import subprocess
import sys
import tempfile
import time

import numpy as np


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


def best_of(repeat, fn):
    """``(result, best wall seconds, best thread CPU seconds)`` over ``repeat`` runs."""
    wall = cpu = np.inf
    out = None
    for _ in range(repeat):
        t, c = time.perf_counter(), time.thread_time()
        out = fn()
        wall = min(wall, time.perf_counter() - t)
        cpu = min(cpu, time.thread_time() - c)
    return out, wall, cpu


# The child process of --compile: import, then first call of each kernel.
_FIRST_CALLS = r"""
import json, time
t = time.perf_counter()
import numpy as np
from cliquewise.kernels.cliques import level_min, sweep_candidates
from cliquewise.kernels.graph import csr_from_edges
from cliquewise.kernels.incidence import incidence
out = {"import": time.perf_counter() - t}
u = np.array([0, 0, 1, 1, 2], np.int64)
v = np.array([1, 2, 2, 3, 3], np.int64)
lev = np.array([1, 1, 0, 1, 0], np.int32)
t = time.perf_counter()
csr = csr_from_edges(4, u, v, lev)
out["csr_from_edges"] = time.perf_counter() - t
t = time.perf_counter()
ptr, nodes, lmax, status, work = sweep_candidates(*csr, u, v, lev)
out["sweep_candidates"] = time.perf_counter() - t
t = time.perf_counter()
level_min(csr[0], csr[1], csr[2], ptr, nodes)
out["level_min"] = time.perf_counter() - t
t = time.perf_counter()
incidence(csr[0], csr[1], csr[3], ptr, nodes, u.size)
out["incidence"] = time.perf_counter() - t
# every dispatcher of the kernel modules: did any compile (a cache miss)?
import numba.core.registry
from cliquewise.kernels import cliques, graph, incidence as inc_mod, localbk
misses = {}
for mod in (cliques, graph, inc_mod, localbk):
    for name, obj in vars(mod).items():
        if isinstance(obj, numba.core.registry.CPUDispatcher) and obj.__module__ == mod.__name__:
            n = sum(obj.stats.cache_misses.values())
            if n:
                misses[f"{mod.__name__.rsplit('.', 1)[-1]}.{name}"] = n
out["compiled"] = misses
print(json.dumps(out))
"""


def compile_check():
    """Cold and warm runs of ``_FIRST_CALLS`` in fresh processes; print the times."""
    with tempfile.TemporaryDirectory(prefix="cw-numba-cache-") as cache:
        env = dict(os.environ, NUMBA_CACHE_DIR=cache)
        for label in ("cold", "warm"):
            t = time.perf_counter()
            res = subprocess.run([sys.executable, "-c", _FIRST_CALLS], env=env,
                                 capture_output=True, text=True, check=True)
            total = time.perf_counter() - t
            r = json.loads(res.stdout.strip().splitlines()[-1])
            calls = ", ".join(f"{k} {r[k]:.3f} s" for k in
                              ("csr_from_edges", "sweep_candidates", "level_min",
                               "incidence"))
            print(f"{label}: process {total:.2f} s; import {r['import']:.2f} s; "
                  f"first calls: {calls}")
            print(f"  kernels compiled in this process: {len(r['compiled'])}"
                  + (f" ({', '.join(sorted(r['compiled']))})" if r["compiled"] else ""))
        n_files = sum(len(f) for _, _, f in os.walk(cache))
        print(f"cache folder: {n_files} files")


def main():
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--seed", type=int, default=0)
    ap.add_argument("--nodes", type=int, default=200_000)
    ap.add_argument("--groups", type=int, default=20_000)
    ap.add_argument("--background", type=int, default=100_000)
    ap.add_argument("--levels", type=int, default=40)
    ap.add_argument("--repeat", type=int, default=3)
    ap.add_argument("--compile", action="store_true",
                    help="measure cold and warm compile/load times instead")
    args = ap.parse_args()
    if args.compile:
        compile_check()
        return

    from cliquewise.kernels.cliques import level_min, sweep_candidates
    from cliquewise.kernels.graph import csr_from_edges
    from cliquewise.kernels.incidence import incidence

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

    (ptr, nodes, lmax, status, work), w, c = best_of(
        args.repeat, lambda: sweep_candidates(indptr, nbr, nlev, eid, u, v, lev))
    k = ptr.size - 1
    print(f"sweep: {k} candidates (status {status}, work {work}) in {w:.3f} s "
          f"(cpu {c:.3f} s) -> {k / w:,.0f} candidates/s, {u.size / w:,.0f} edges/s")
    sizes = np.diff(ptr)
    print(f"candidate sizes: mean {sizes.mean():.2f}, max {sizes.max()}")

    lmin, w, c = best_of(args.repeat, lambda: level_min(indptr, nbr, nlev, ptr, nodes))
    print(f"level_min: {w:.3f} s (cpu {c:.3f} s); mean level span "
          f"{np.mean(lmax - lmin + 1):.2f}")
    (inc_ptr, inc_cand), w, c = best_of(
        args.repeat, lambda: incidence(indptr, nbr, eid, ptr, nodes, u.size))
    print(f"incidence: {inc_cand.size} entries in {w:.3f} s (cpu {c:.3f} s)")


if __name__ == "__main__":
    main()
