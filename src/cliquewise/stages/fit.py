"""The fit stage: EM for the group intensities, as a map-reduce over incidence parts.

Reads   ``enumerate/inc_ptr.npy``, ``inc_cand.npy``, ``weight.npy``, ``cand_ptr.npy``.
Writes  ``fit/mu.npy``           fitted intensities after pruning (0 = pruned);
        ``fit/mu_full.npy``      intensities before pruning;
        ``fit/trace.json``       log-likelihood at every accepted iterate, both phases;
        ``fit/report.json``      iterations, convergence, log-likelihood, groups kept.

Before the EM each part of the edge range (about ``incidences_per_part``
incidences) gets a prefix tree of its candidate lists, and the candidates are
renumbered by first use (see :mod:`cliquewise.parts.fitting`); the EM runs in that
numbering and maps back when it ends. Each EM step maps
:func:`parts.fitting.em_part` over the parts with ``mu`` broadcast, and reduces the
partial sums in part order, so the result does not depend on the engine. SQUAREM
(on by default) wraps the step. ``mu`` and the trace are checkpointed every
``checkpoint_every`` iterations; a resumed fit continues from the checkpoint and
reaches the same result as an uninterrupted one.

Pruning: a candidate whose expected weight ``mu * P`` is below ``prune`` is set
to 0, except where that would leave one of its edges with no positive rate (the
strongest candidate on such an edge is kept); the kept groups are then refitted.
"""

from __future__ import annotations

import shutil

import numpy as np

from cliquewise.kernels.em import fit_em, loglik_constant
from cliquewise.parts import fitting as parts
from cliquewise.parts.order import candidate_sizes
from cliquewise.parts.vectors import CHUNK, Vectors, release
from cliquewise.stage import StageContext
from cliquewise.store import RunStore, load_npy, npy_blocks, read_json, scatter_mapped, write_json_atomic

NAME = "fit"
UPSTREAM = ["enumerate"]


def params_from(settings) -> dict:
    f = settings.fit
    return {"tol": f.tol, "max_iter": f.max_iter, "accelerate": f.accelerate, "prune": f.prune,
            "checkpoint_every": f.checkpoint_every, "incidences_per_part": f.incidences_per_part}


class DistributedStep:
    """``step(mu) -> (EM image of mu, log-likelihood at mu)`` over the cluster.

    The vectors come from ``vs`` (:class:`~cliquewise.parts.vectors.Vectors`): arrays,
    or files that the tasks open by path (under a memory limit).
    """

    def __init__(self, ctx: StageContext, tree_dir, part_list, P, vs, cache_bytes=None):
        self.ctx = ctx
        self.tree_dir = str(tree_dir)
        self.parts = part_list
        self.order = parts.heaviest_first(part_list)
        self.P = P
        self.vs = vs
        self.cache_bytes = cache_bytes
        self.evals = 0
        self._acc = None

    def partial(self, mu, want_loglik=True):
        """Accumulators over all parts and ``sum Y log lambda``.

        On the embedded engine the parts write their own blocks into one buffer
        (reused: the result is valid until the next call); with file vectors they
        write them into one file; otherwise they return them. Either way the
        stragglers are added in part order, so the sums do not depend on the engine.
        """
        eng = self.ctx.engine
        vs = self.vs
        order = self.order
        items = [self.parts[i] for i in order]
        if eng.client is None or vs.in_files:
            if self._acc is None:
                self._acc = vs.full(0.0)  # entries of no part stay 0
            acc = self._acc
            done = eng.map(parts.em_part, items, self.tree_dir, vs.ref(mu), want_loglik, vs.ref(acc),
                           self.cache_bytes)
        else:
            done = eng.map(parts.em_part, items, self.tree_dir, eng.scatter(mu), want_loglik)
            acc = np.zeros(len(mu), np.float64)
        res = [None] * len(order)
        for i, r in zip(order, done):
            res[i] = r
        total = 0.0
        for r in res:  # part order: deterministic whatever the engine
            parts.add_partial(acc, r)
            total += r["loglik"]
        release(acc)
        return acc, total

    def __call__(self, mu):
        self.evals += 1
        acc, total = self.partial(mu)
        nxt, pen = self.vs.update_penalty(mu, acc, self.P)
        return nxt, total - pen

    def without_loglik(self, mu):
        self.evals += 1
        acc, _ = self.partial(mu, want_loglik=False)
        nxt, _ = self.vs.update_penalty(mu, acc, self.P)
        return nxt, float("nan")

    def loglik(self, mu) -> float:
        _, total = self.partial(mu)
        return total - self.vs.penalty(mu, self.P)


def _fit_phase(ctx, step, mu0, p, phase: str, work):
    """One EM run with checkpoints; resumes from the phase's checkpoint when present.

    The checkpoint holds the iterate at the start of an outer iteration and the
    log-likelihood trace before it, which is all :func:`fit_em` needs to continue
    exactly as an uninterrupted run would.
    """
    ck_unit = f"ckpt-{phase}"
    trace0: list[float] = []
    start_iter = 0
    if RunStore.unit_done(work, ck_unit):
        info = RunStore.unit_info(work, ck_unit)
        mu0 = step.vs.load(work / f"ckpt-{phase}.npy")
        trace0 = list(info["trace"])
        start_iter = int(info["iteration"])
    seen = list(trace0)

    def checkpoint(it, mu, ll):
        seen.append(float(ll))
        if p["checkpoint_every"] and it > start_iter and it % p["checkpoint_every"] == 0:
            step.vs.save(mu, work / f"ckpt-{phase}.npy")
            RunStore.unit_commit(work, ck_unit, [f"ckpt-{phase}.npy"], {"iteration": it, "trace": seen[:-1]})
        return None

    return fit_em(step, step.loglik, mu0, tol=p["tol"], max_iter=p["max_iter"], accelerate=p["accelerate"],
                  callback=checkpoint, trace0=trace0, start_iter=start_iter, ops=step.vs)


def run(ctx: StageContext) -> dict:
    p = ctx.params
    enum_dir = ctx.input_dir("enumerate")
    work = ctx.work
    K = len(load_npy(enum_dir / "cand_ptr.npy", mmap=True)) - 1  # candidates
    inc_ptr = load_npy(enum_dir / "inc_ptr.npy", mmap=True)
    total_inc = int(inc_ptr[-1]) if len(inc_ptr) else 0
    per_part = parts.part_size(total_inc, p["incidences_per_part"])
    tree_dir = work / "trees"
    with ctx.substep("trees") as sub:
        if RunStore.unit_done(work, "trees"):
            part_list = RunStore.unit_info(work, "trees")["parts"]
        else:
            part_list = parts.prepare_trees(ctx.engine, str(enum_dir), str(tree_dir), per_part,
                                            ctx.engine.task_memory())  # also writes trees/new_id.npy
            RunStore.unit_commit(work, "trees", ["trees/new_id.npy"] + [f"trees/{f}" for r in part_list
                                                                       for f in r["files"]], {"parts": part_list})
        sub.count(incidences=total_inc, tree_nodes=sum(r["nodes"] for r in part_list), parts=len(part_list))
    budget = ctx.engine.task_memory()
    # under a memory limit the candidate-length vectors live in files, a chunk at a time in memory
    vs = Vectors(K, work / "vectors" if budget else None)
    P_stage = _pairs_in_tree_order(vs, enum_dir / "cand_ptr.npy", tree_dir / "new_id.npy")
    step = DistributedStep(ctx, tree_dir, part_list, P_stage, vs, budget // 5 if budget else None)  # tree cache

    with ctx.substep("start"):
        acc, _ = step.partial(vs.full(1.0))
        mu0 = vs.divide(acc, P_stage)  # each edge's weight shared equally among its candidates
    with ctx.substep("em") as sub:
        evals0 = step.evals
        full = _fit_phase(ctx, step, mu0, p, "full", work)
        sub.count(iterations=full.iterations, evaluations=step.evals - evals0, incidences=total_inc)
    del mu0
    mu_full = full.mu
    full_iterations, full_converged, full_loglik, full_trace = full.iterations, full.converged, full.loglik, full.trace
    del full
    with ctx.substep("prune"):
        mu = vs.pruned(mu_full, P_stage, p["prune"])
        restore = parts.restore_support(ctx.engine, part_list, str(tree_dir), vs.ref(mu), vs.ref(mu_full),
                                        step.cache_bytes)
        mu[restore] = mu_full[restore]
        pruned = vs.count_dropped(mu, mu_full)
        # the full model's mu goes to its output file now rather than staying in
        # memory through the refit (candidate-length arrays dominate at scale)
        vs.gather_to_file(mu_full, tree_dir / "new_id.npy", work / "mu_full.npy")
        del mu_full
    with ctx.substep("refit") as sub:
        evals0 = step.evals
        refit = _fit_phase(ctx, step, mu, p, "kept", work) if pruned else None
        sub.count(iterations=refit.iterations if pruned else 0, evaluations=step.evals - evals0,
                  incidences=total_inc)
    mu_fit = refit.mu if pruned else mu  # nothing pruned: the full model's mu is the fit
    del mu
    fitted_total = vs.penalty(mu_fit, P_stage)
    del P_stage, acc
    step._acc = None
    kept = vs.gather_to_file(mu_fit, tree_dir / "new_id.npy", work / "mu.npy")  # the candidates' own numbering
    del mu_fit
    const, weight_total = _weight_sums(enum_dir / "weight.npy")
    report = {
        "candidates": int(K),
        "groups_kept": kept,
        "pruned": int(K - kept),
        "redundancy": float(K / kept) if kept else None,
        "prune_threshold": p["prune"],
        "restored_for_support": int(len(restore)),
        "iterations": int(full_iterations + (refit.iterations if pruned else 0)),
        "iterations_full": int(full_iterations),
        "iterations_refit": int(refit.iterations) if pruned else 0,
        "em_evaluations": step.evals,
        "converged": bool(full_converged and (refit.converged if pruned else True)),
        "loglik_full_model": float(full_loglik) + const,
        "loglik": float(refit.loglik if pruned else full_loglik) + const,
        "loglik_constant": const,
        "weight_total": weight_total,
        "fitted_total": fitted_total,
        "parts": len(part_list),
        "tree_nodes": int(sum(r["nodes"] for r in part_list)),
        "tree_ends": int(sum(r["ends"] for r in part_list)),
        "incidences": int(sum(r["incidences"] for r in part_list)),
        "accelerate": p["accelerate"],
    }
    write_json_atomic(work / "trace.json", {"full": [float(x) + const for x in full_trace],
                                             "kept": [float(x) + const for x in refit.trace] if pruned else []})
    write_json_atomic(work / "report.json", report)
    del refit
    for f in work.glob("ckpt-*.npy"):
        f.unlink()
    parts.clear_cache()
    if not ctx.engine.in_process:
        ctx.engine.client.run(parts.clear_cache)
    shutil.rmtree(tree_dir, ignore_errors=True)
    shutil.rmtree(work / "vectors", ignore_errors=True)
    return {k: report[k] for k in ("candidates", "groups_kept", "iterations", "converged", "loglik", "parts")}


def _pairs_in_tree_order(vs: Vectors, cand_ptr_path, new_id_path):
    """``P`` in the trees' numbering: position ``new_id[k]`` holds the pairs of candidate ``k``."""
    P = vs.empty()
    new_id = load_npy(new_id_path, mmap=True)
    for start, s in candidate_sizes(cand_ptr_path, CHUNK):
        sizes = s.astype(np.float64)
        dest = np.asarray(new_id[start:start + len(sizes)])
        if vs.in_files:  # a slice of the file at a time, not every page of it at once
            scatter_mapped(P, dest, sizes * (sizes - 1.0) / 2.0)
        else:
            P[dest] = sizes * (sizes - 1.0) / 2.0
        release(P, new_id)
    return P


def _weight_sums(path) -> tuple[float, float]:
    """The log-likelihood's constant and the total weight, a chunk of edges at a time."""
    const = total = 0.0
    for _, y in npy_blocks(path, CHUNK):
        const += float(loglik_constant(y))
        total += float(np.sum(y))
    return const, total


def read_report(stage_dir) -> dict:
    return read_json(stage_dir / "report.json")
