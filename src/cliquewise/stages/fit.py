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

from cliquewise.kernels.em import em_update, em_update_penalty, fit_em, loglik_constant, penalty
from cliquewise.parts import fitting as parts
from cliquewise.stage import StageContext
from cliquewise.store import RunStore, load_npy, read_json, save_npy, write_json_atomic

NAME = "fit"
UPSTREAM = ["enumerate"]


def params_from(settings) -> dict:
    f = settings.fit
    return {"tol": f.tol, "max_iter": f.max_iter, "accelerate": f.accelerate, "prune": f.prune,
            "checkpoint_every": f.checkpoint_every, "incidences_per_part": f.incidences_per_part}


class DistributedStep:
    """``step(mu) -> (EM image of mu, log-likelihood at mu)`` over the cluster."""

    def __init__(self, ctx: StageContext, tree_dir, part_list, P):
        self.ctx = ctx
        self.tree_dir = str(tree_dir)
        self.parts = part_list
        self.order = parts.heaviest_first(part_list)
        self.P = P
        self.evals = 0
        self._acc = None

    def partial(self, mu, want_loglik=True):
        """Accumulators over all parts and ``sum Y log lambda``.

        On the embedded engine the parts write their own blocks into one buffer
        (reused: the result is valid until the next call); on a cluster they
        return them. Either way the stragglers are added in part order, so the
        sums do not depend on the engine.
        """
        eng = self.ctx.engine
        order = self.order
        shared = eng.client is None
        if shared:
            if self._acc is None or len(self._acc) != len(mu):
                self._acc = np.zeros(len(mu), np.float64)  # entries of no part stay 0
            acc = self._acc
            done = eng.map(parts.em_part, [self.parts[i] for i in order], self.tree_dir, mu, want_loglik, acc)
        else:
            done = eng.map(parts.em_part, [self.parts[i] for i in order], self.tree_dir, eng.scatter(mu),
                           want_loglik)
            acc = np.zeros(len(mu), np.float64)
        res = [None] * len(order)
        for i, r in zip(order, done):
            res[i] = r
        total = 0.0
        for r in res:  # part order: deterministic whatever the engine
            parts.add_partial(acc, r)
            total += r["loglik"]
        return acc, total

    def __call__(self, mu):
        self.evals += 1
        acc, total = self.partial(mu)
        nxt, pen = em_update_penalty(mu, acc, self.P)
        return nxt, total - pen

    def without_loglik(self, mu):
        self.evals += 1
        acc, _ = self.partial(mu, want_loglik=False)
        return em_update(mu, acc, self.P), float("nan")

    def loglik(self, mu) -> float:
        _, total = self.partial(mu)
        return total - penalty(mu, self.P)


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
        mu0 = load_npy(work / f"ckpt-{phase}.npy")
        trace0 = list(info["trace"])
        start_iter = int(info["iteration"])
    seen = list(trace0)

    def checkpoint(it, mu, ll):
        seen.append(float(ll))
        if p["checkpoint_every"] and it > start_iter and it % p["checkpoint_every"] == 0:
            save_npy(work / f"ckpt-{phase}.npy", mu)
            RunStore.unit_commit(work, ck_unit, [f"ckpt-{phase}.npy"], {"iteration": it, "trace": seen[:-1]})
        return None

    return fit_em(step, step.loglik, mu0, tol=p["tol"], max_iter=p["max_iter"], accelerate=p["accelerate"],
                  callback=checkpoint, trace0=trace0, start_iter=start_iter)


def run(ctx: StageContext) -> dict:
    p = ctx.params
    enum_dir = ctx.input_dir("enumerate")
    work = ctx.work
    sizes = np.diff(load_npy(enum_dir / "cand_ptr.npy", mmap=True)).astype(np.int32)  # members per candidate
    inc_ptr = load_npy(enum_dir / "inc_ptr.npy", mmap=True)
    total_inc = int(inc_ptr[-1]) if len(inc_ptr) else 0
    per_part = parts.part_size(total_inc, p["incidences_per_part"])
    tree_dir = work / "trees"
    with ctx.substep("trees") as sub:
        if RunStore.unit_done(work, "trees"):
            part_list = RunStore.unit_info(work, "trees")["parts"]
        else:
            part_list, new_id = parts.prepare_trees(ctx.engine, str(enum_dir), str(tree_dir), sizes, per_part,
                                                    ctx.engine.task_memory())
            del new_id  # written to trees/new_id.npy
            RunStore.unit_commit(work, "trees", ["trees/new_id.npy"] + [f"trees/{f}" for r in part_list
                                                                       for f in r["files"]], {"parts": part_list})
        new_id = load_npy(tree_dir / "new_id.npy")
        sub.count(incidences=total_inc, tree_nodes=sum(r["nodes"] for r in part_list), parts=len(part_list))
    inv = np.empty_like(new_id)
    inv[new_id] = np.arange(len(new_id))
    s_stage = sizes[inv].astype(np.float64)
    P_stage = s_stage * (s_stage - 1.0) / 2.0  # the EM runs in the trees' numbering: position new_id[k] holds candidate k
    K = len(sizes)
    del sizes, inv, s_stage, new_id  # candidate-length arrays the EM does not need (memory at scale)
    step = DistributedStep(ctx, tree_dir, part_list, P_stage)

    with ctx.substep("start"):
        acc, _ = step.partial(np.ones(K))
        mu0 = acc / P_stage  # a new array: the step reuses its buffer  # each edge's weight shared equally among its candidates
    with ctx.substep("em") as sub:
        evals0 = step.evals
        full = _fit_phase(ctx, step, mu0, p, "full", work)
        sub.count(iterations=full.iterations, evaluations=step.evals - evals0, incidences=total_inc)
    mu_full = full.mu
    full_iterations, full_converged, full_loglik, full_trace = full.iterations, full.converged, full.loglik, full.trace
    del full
    with ctx.substep("prune"):
        mu = np.where(mu_full * P_stage < p["prune"], 0.0, mu_full)
        restore = parts.restore_support(ctx.engine, part_list, str(tree_dir), mu, mu_full)
        mu[restore] = mu_full[restore]
        pruned = int(((mu == 0) & (mu_full > 0)).sum())
        # the full model's mu goes to its output file now rather than staying in
        # memory through the refit (candidate-length arrays dominate at scale)
        save_npy(work / "mu_full.npy", mu_full[load_npy(tree_dir / "new_id.npy")])
        del mu_full
    with ctx.substep("refit") as sub:
        evals0 = step.evals
        refit = _fit_phase(ctx, step, mu, p, "kept", work) if pruned else None
        sub.count(iterations=refit.iterations if pruned else 0, evaluations=step.evals - evals0,
                  incidences=total_inc)
    mu_fit = refit.mu if pruned else mu  # nothing pruned: the full model's mu is the fit
    fitted_total = float(np.sum(mu_fit * P_stage))
    del P_stage
    mu = mu_fit[load_npy(tree_dir / "new_id.npy")]  # back to the candidates' own numbering
    y = load_npy(enum_dir / "weight.npy", mmap=True)
    const = float(loglik_constant(np.asarray(y)))
    kept = int((mu > 0).sum())
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
        "weight_total": float(np.sum(y)),
        "fitted_total": fitted_total,
        "parts": len(part_list),
        "tree_nodes": int(sum(r["nodes"] for r in part_list)),
        "tree_ends": int(sum(r["ends"] for r in part_list)),
        "incidences": int(sum(r["incidences"] for r in part_list)),
        "accelerate": p["accelerate"],
    }
    save_npy(work / "mu.npy", mu)
    write_json_atomic(work / "trace.json", {"full": [float(x) + const for x in full_trace],
                                             "kept": [float(x) + const for x in refit.trace] if pruned else []})
    write_json_atomic(work / "report.json", report)
    for f in work.glob("ckpt-*.npy"):
        f.unlink()
    parts.clear_cache()
    if not ctx.engine.in_process:
        ctx.engine.client.run(parts.clear_cache)
    shutil.rmtree(tree_dir, ignore_errors=True)
    return {k: report[k] for k in ("candidates", "groups_kept", "iterations", "converged", "loglik", "parts")}


def read_report(stage_dir) -> dict:
    return read_json(stage_dir / "report.json")
