"""Benchmark of the EM kernels: sweep speed against scipy, and SQUAREM against plain EM.

1. One EM sweep on a planted random incidence (about 5M incidences by default),
   in ns per incidence: the fused numba sweep (:func:`em_partial` + :func:`em_update`
   + :func:`penalty`, which also yields the log-likelihood) against the scipy CSR
   baseline ``lam = A @ mu; g = A.T @ (y / lam); mu *= g / P``, with and without
   the extra ``sum(y * log(lam))``. Median of several runs; the ratio is printed.
2. On a smaller planted problem: EM evaluations (and wall time) for plain EM to
   stop at ``--tol``, and for SQUAREM to reach at least that log-likelihood.

Run: ``python benchmarks/kernel_em.py [--incidences 5e6] [--repeats 7]``.
"""

from __future__ import annotations

import argparse
import json
import time

import numpy as np
import scipy.sparse as sp

from cliquewise.kernels import em


def planted_problem(n_groups, rng, window=24, sizes=(3, 9), decoy_share=0.3, local_ids=True):
    """Planted overlapping groups on a line of nodes, plus decoy sub-groups.

    Each group takes 3..8 distinct nodes from a window of ``window`` consecutive
    nodes at a random place, so nearby groups overlap. A share of the groups also
    contributes a decoy candidate: a subset (size >= 2) of its members.
    Counts are Poisson on the pairs inside the planted groups; pairs with count 0
    are dropped (as in real data). With ``local_ids`` candidates are numbered
    along the line (as the enumerate stage numbers them by the edges that found
    them); otherwise in random order. Returns the CSR incidence, y, P, true mu.
    """
    n_nodes = max(n_groups * 2, window + 1)
    size = rng.integers(sizes[0], sizes[1], n_groups)
    mu_true = rng.lognormal(0.0, 1.0, n_groups)
    # decoys: subsets of planted groups (still cliques), with true intensity 0
    n_decoy = int(decoy_share * n_groups)
    parent = rng.choice(n_groups, n_decoy, replace=False)
    dsize = np.maximum(2, (rng.random(n_decoy) * size[parent]).astype(np.int64))
    start = rng.integers(0, n_nodes - window, n_groups)
    offs = np.argsort(rng.random((n_groups, window)), axis=1)[:, : sizes[1] - 1]
    offs = np.sort(np.where(np.arange(sizes[1] - 1) < size[:, None], offs, window), axis=1)
    members = start[:, None] + offs  # unused slots hold start + window (masked below)
    all_members = np.vstack([members, members[parent]])
    all_size = np.concatenate([size, dsize])
    # decoys keep the first dsize members of their (sorted) parent
    K = all_size.shape[0]
    position = np.concatenate([start, start[parent]])
    relabel = np.argsort(position, kind="stable") if local_ids else rng.permutation(K)
    all_members, all_size = all_members[relabel], all_size[relabel]
    mu_all = np.concatenate([mu_true, np.zeros(n_decoy)])[relabel]
    ii, jj = np.triu_indices(sizes[1] - 1, k=1)
    keep = jj[None, :] < all_size[:, None]
    kk = np.broadcast_to(np.arange(K)[:, None], keep.shape)[keep]
    pu = all_members[:, ii][keep]
    pv = all_members[:, jj][keep]
    key = pu * n_nodes + pv
    edges, edge_of = np.unique(key, return_inverse=True)
    E = edges.shape[0]
    order = np.argsort(edge_of, kind="stable")
    inc_cand = kk[order].astype(np.int64)
    counts = np.bincount(edge_of, minlength=E)
    lam = np.bincount(edge_of, weights=mu_all[kk], minlength=E)
    y = rng.poisson(lam).astype(np.float64)
    # drop edges with y == 0 (they are not in the data)
    keep_e = y > 0
    keep_inc = np.repeat(keep_e, counts)
    inc_cand = inc_cand[keep_inc]
    inc_ptr = np.zeros(int(keep_e.sum()) + 1, dtype=np.int64)
    np.cumsum(counts[keep_e], out=inc_ptr[1:])
    P = all_size * (all_size - 1) / 2.0
    return inc_ptr, inc_cand, y[keep_e], P.astype(np.float64), mu_all


def time_interleaved(fns, repeats):
    """Median and best wall time of each callable, run in interleaved rounds.

    Interleaving spreads any background load evenly over the contenders.
    """
    for fn in fns.values():
        fn()  # warm-up (compilation, first-touch page faults)
    times = {name: [] for name in fns}
    for _ in range(repeats):
        for name, fn in fns.items():
            t = time.perf_counter()
            fn()
            times[name].append(time.perf_counter() - t)
    return {name: (float(np.median(t)), float(np.min(t))) for name, t in times.items()}


def bench_sweep(n_inc, repeats, rng, local_ids):
    n_groups = max(int(n_inc / 10.4), 10)  # about 10.4 incidences per planted group
    inc_ptr, inc_cand, y, P, _ = planted_problem(n_groups, rng, local_ids=local_ids)
    K = P.shape[0]
    nnz = inc_cand.shape[0]
    mu = em.initial_mu(inc_ptr, inc_cand, y, P)
    A = sp.csr_matrix((np.ones(nnz), inc_cand, inc_ptr), shape=(y.shape[0], K))
    AT = A.T.tocsr()

    def fused():
        acc = np.zeros(K)
        part = em.em_partial(inc_ptr, inc_cand, y, mu, acc, 0)
        return em.em_update(mu, acc, P), part - em.penalty(mu, P)

    def scipy_plain():
        lam = A @ mu
        g = A.T @ (y / lam)
        return mu * (g / P)

    def scipy_loglik():
        lam = A @ mu
        g = A.T @ (y / lam)
        return mu * (g / P), float(y @ np.log(lam) - mu @ P)

    def scipy_pre_t():
        lam = A @ mu
        g = AT @ (y / lam)
        return mu * (g / P)

    # sanity: same step
    np.testing.assert_allclose(fused()[0], scipy_plain(), rtol=1e-10)
    out = {"incidences": int(nnz), "edges": int(y.shape[0]), "candidates": int(K)}
    fns = {"numba_fused": fused, "scipy_csr": scipy_plain,
           "scipy_csr_with_loglik": scipy_loglik, "scipy_csr_pretransposed": scipy_pre_t}
    for name, (med, best) in time_interleaved(fns, repeats).items():
        out[name] = {"median_ns_per_incidence": med / nnz * 1e9,
                     "best_ns_per_incidence": best / nnz * 1e9}
    return out


def bench_squarem(n_groups, tol, rng):
    inc_ptr, inc_cand, y, P, _ = planted_problem(n_groups, rng)
    t = time.perf_counter()
    plain = em.fit_local(inc_ptr, inc_cand, y, P, tol=tol, max_iter=200000, accelerate=False)
    t_plain = time.perf_counter() - t
    target = plain.loglik

    t = time.perf_counter()
    fast = em.fit_local(inc_ptr, inc_cand, y, P, tol=0.0, max_iter=200000, accelerate=True,
                        callback=lambda it, mu, ll: ll >= target)
    t_fast = time.perf_counter() - t
    return {
        "incidences": int(inc_cand.shape[0]), "candidates": int(P.shape[0]), "tol": tol,
        "target_loglik": target,
        "plain": {"iterations": plain.iterations, "em_evals": plain.n_evals,
                  "converged": plain.converged, "seconds": t_plain},
        "squarem": {"iterations": fast.iterations, "em_evals": fast.n_evals,
                    "loglik": fast.loglik, "reached": bool(fast.loglik >= target),
                    "seconds": t_fast},
    }


def main(argv=None):
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--incidences", type=float, default=5e6)
    ap.add_argument("--repeats", type=int, default=7)
    ap.add_argument("--planted-groups", type=int, default=20000)
    ap.add_argument("--tol", type=float, default=1e-10)
    ap.add_argument("--seed", type=int, default=0)
    ap.add_argument("--json", help="also write the figures to this JSON file")
    args = ap.parse_args(argv)
    rng = np.random.default_rng(args.seed)

    sweeps = {}
    for local_ids in (True, False):
        sweep = bench_sweep(int(args.incidences), args.repeats, rng, local_ids)
        label = "local" if local_ids else "shuffled"
        sweeps[label] = sweep
        print(f"EM sweep, {label} candidate ids: {sweep['incidences']:,} incidences, "
              f"{sweep['edges']:,} edges, {sweep['candidates']:,} candidates "
              f"(median of {args.repeats} interleaved runs)")
        base = sweep["numba_fused"]["median_ns_per_incidence"]
        for name in ("numba_fused", "scipy_csr", "scipy_csr_with_loglik", "scipy_csr_pretransposed"):
            med = sweep[name]["median_ns_per_incidence"]
            print(f"  {name:26s} {med:7.2f} ns/incidence (best {sweep[name]['best_ns_per_incidence']:.2f})"
                  f"   time / numba = {med / base:.2f}")

    sq = bench_squarem(args.planted_groups, args.tol, rng)
    p, s = sq["plain"], sq["squarem"]
    print(f"SQUAREM vs plain EM: planted problem, {sq['incidences']:,} incidences, "
          f"{sq['candidates']:,} candidates; target = plain EM's value at tol {args.tol:g}")
    print(f"  plain EM : {p['iterations']:6d} iterations, {p['em_evals']:6d} EM evaluations, "
          f"{p['seconds']:.2f} s (converged={p['converged']})")
    print(f"  SQUAREM  : {s['iterations']:6d} iterations, {s['em_evals']:6d} EM evaluations, "
          f"{s['seconds']:.2f} s (reached={s['reached']})")
    print(f"  ratio plain/SQUAREM: EM evaluations {p['em_evals'] / max(s['em_evals'], 1):.1f}x, "
          f"wall time {p['seconds'] / max(s['seconds'], 1e-12):.1f}x")
    if args.json:
        with open(args.json, "w") as fh:
            json.dump({"sweep": sweeps, "squarem": sq}, fh, indent=2)


if __name__ == "__main__":
    main()
