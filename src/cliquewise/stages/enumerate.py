"""The enumerate stage: candidate groups (thresholded maximal cliques) and the incidence.

Reads   ``ingest/edges``, ``ingest/labels.parquet``, ``split/nodes.parquet``.
Writes  ``enumerate/levels.npy``                       the thresholds, ascending;
        ``enumerate/cand_ptr.npy``, ``cand_nodes.npy``  candidate k = nodes[ptr[k]:ptr[k+1]];
        ``enumerate/level_min.npy``, ``level_max.npy``  level indices where k is maximal;
        ``enumerate/inc_ptr.npy``, ``inc_cand.npy``     edge -> candidates (CSR, edge order
                                                         of the edge store; ``inc_cand``
                                                         int32 below 2**31 candidates);
        ``enumerate/weight.npy``                        edge weights in that order.

Work units are blocks of edges. Every edge is handled once, whatever the number of
levels: the candidates first seen at the edge's level that contain it. Units run
as dask tasks on a memory-mapped CSR and each finished unit is checkpointed; a unit
that exceeds its budget (clique count, work, seconds) stops the stage with a
message naming the component and the ways out.
"""

from __future__ import annotations

import shutil

import numpy as np
import pyarrow.parquet as pq

from cliquewise.parts import candidates as parts
from cliquewise.parts.order import candidate_sizes
from cliquewise.stage import InputError, StageContext
from cliquewise.store import RunStore, load_npy

NAME = "enumerate"
UPSTREAM = ["ingest", "split"]
DIRECT_MIN_SIZE = 8  # clique components at least this large are emitted without a search


class BlowUpError(InputError):
    """A work unit exceeded its clique budget."""


def params_from(settings) -> dict:
    c = settings.candidates
    return {"levels": c.levels, "max_cliques": c.max_cliques, "max_seconds": c.max_seconds,
            "edges_per_unit": c.edges_per_unit}


def run(ctx: StageContext) -> dict:
    p = ctx.params
    ingest_dir = ctx.input_dir("ingest")
    work = ctx.work
    n_nodes = pq.read_metadata(ingest_dir / "labels.parquet").num_rows
    edge_files = sorted((ingest_dir / "edges").glob("part-*.parquet"))
    gdir = work / "graph"
    budget = ctx.engine.task_memory()  # None: no limit; else the pieces of each step are sized by it
    piece = budget // 3 if budget else None

    with ctx.substep("graph") as step:
        if not RunStore.unit_done(work, "graph"):
            # the edge ends (and row pointers) and the weights (and levels) side by side, then the rows
            cols = ctx.engine.map(_graph_columns, ["ends", "weights"], edge_files, n_nodes, p["levels"], gdir)
            info = ctx.engine.submit(parts.prepare_graph, edge_files, n_nodes, p["levels"], gdir, piece,
                                     ctx.engine.nthreads(), False).result()
            done = ctx.engine.map(_csr_range, info.pop("ranges"), gdir)  # ranges of rows side by side
            ctx.worker_cpu += info.pop("cpu", 0.0) + sum(d["cpu"] for d in done + cols)
            RunStore.unit_commit(work, "graph", [f"graph/{f}.npy" for f in parts.GRAPH_FILES + ("levels", "firsts")],
                                 info)
        info = RunStore.unit_info(work, "graph")
        step.count(edges=info["edges"], levels=info["levels"])
    n_edges = info["edges"]
    # several units per thread so the last ones do not leave threads idle; the
    # candidates come out in edge order whatever the unit size
    per_unit = min(p["edges_per_unit"], max(20_000, -(-n_edges // (4 * ctx.engine.nthreads()))))
    # units of about equal work (see plan_units), from each vertex's degree and edge count (in a task:
    # node-length arrays stay out of the driver)
    units = ctx.engine.submit(parts.plan_graph_units, gdir, n_edges, per_unit).result()
    tags = [f"e{lo:012d}" for lo, _ in units]

    with ctx.substep("direct"):  # components that are single-level cliques need no search
        if not RunStore.unit_done(work, "direct"):
            comps = pq.read_table(ctx.input_dir("split") / "components.parquet")
            comp = pq.read_table(ctx.input_dir("split") / "nodes.parquet", columns=["component"]).column(0).to_numpy()
            dinfo = parts.direct_components(gdir, comp, comps.column("nodes").to_numpy(),
                                            comps.column("edges").to_numpy(), DIRECT_MIN_SIZE, work / "cl")
            files = ([f"cl/direct.{n}.npy" for n in parts.UNIT_ARRAYS] + ["graph/skip.npy"]
                     if dinfo["direct"] else [])
            RunStore.unit_commit(work, "direct", files, dinfo)
        dinfo = RunStore.unit_info(work, "direct")
    if dinfo["direct"]:
        tags_all = tags + ["direct"]
    else:
        tags_all = tags

    with ctx.substep("cliques") as step:
        todo = [(lo, hi, tag) for (lo, hi), tag in zip(units, tags) if not RunStore.unit_done(work, f"cl-{tag}")]
        results = ctx.engine.map(_unit, todo, str(gdir), p["max_cliques"], p["max_seconds"], str(work),
                                 budget * 2 // 5 if budget else None, desc="enumerate: cliques")
        ctx.worker_cpu += sum(r.get("cpu", 0.0) for r in results)
        bad = [r for r in results if r["status"]]
        if bad:
            raise _blow_up_error(ctx, bad[0], gdir, p)
        unit_stats = [RunStore.unit_info(work, f"cl-{t}") for t in tags]
        step.count(edges=n_edges, units=len(todo), candidates=sum(s.get("candidates", 0) for s in unit_stats))

    with ctx.substep("collect") as step:  # candidates in unit order, and the incidence by a counting sort
        # the tables and the incidence's edge ranges (one per engine thread, or smaller
        # under a memory limit) run side by side
        # the tables while the incidence's plan counts, then the incidence's ranges
        tables, plan = ctx.engine.map(_collect, ["tables", ("plan", n_edges, piece, ctx.engine.nthreads())],
                                      work / "cl", tags_all, work)
        done = [tables] + ctx.engine.map(_collect, plan["ranges"], work / "cl", tags_all, work)
        cinfo = {**done[0], "incidences": plan["incidences"], "incidence_ranges": len(plan["ranges"]),
                 "uncovered_edges": sum(d["uncovered_edges"] for d in done[1:])}
        ctx.worker_cpu += sum(d.pop("cpu", 0.0) for d in done)
        cinfo.pop("cpu", None)
        step.count(candidates=cinfo["candidates"], incidences=cinfo["incidences"])
        shutil.rmtree(work / "cl", ignore_errors=True)
    if cinfo["uncovered_edges"]:
        raise RuntimeError(f"internal error: {cinfo['uncovered_edges']} edges lie in no candidate")

    # keep what the fit and the results need; drop the CSR
    (gdir / "skip.npy").unlink(missing_ok=True)
    shutil.move(str(gdir / "levels.npy"), str(work / "levels.npy"))
    shutil.move(str(gdir / "weight.npy"), str(work / "weight.npy"))
    shutil.rmtree(gdir, ignore_errors=True)
    hist = np.zeros(cinfo["largest_candidate"] + 1, np.int64)
    for _, sizes in candidate_sizes(work / "cand_ptr.npy", parts.READ_BLOCK):
        hist += np.bincount(sizes, minlength=len(hist))
    return {
        "edges": n_edges,
        "levels": info["levels"],
        "units": len(units),
        "candidates": cinfo["candidates"],
        "largest_candidate": cinfo["largest_candidate"],
        "incidences": cinfo["incidences"],
        "work": int(sum(s.get("work", 0) for s in unit_stats)),
        "direct_components": dinfo["direct"],
        "graph_row_ranges": info.get("row_ranges", 1),
        "incidence_ranges": cinfo.get("incidence_ranges", 1),
        "size_histogram": {str(s): int(c) for s, c in enumerate(hist) if c},
    }


def _graph_columns(part, edge_files, n_nodes, levels, gdir):
    return parts.graph_columns(edge_files, n_nodes, levels, gdir, part)


def _csr_range(rows, gdir):
    return parts.csr_range(gdir, *rows)


def _collect(item, folder, tags, out):
    if item == "tables":
        return parts.collect_tables(folder, tags, out)
    if item[0] == "plan":
        return parts.plan_incidence(folder, tags, out, *item[1:])
    return parts.incidence_range(folder, tags, out, *item)


def _unit(item, graph_dir, max_cliques, max_seconds, work, trim):
    from pathlib import Path

    lo, hi, tag = item
    work = Path(work)
    res = parts.enumerate_unit(graph_dir, lo, hi, max_cliques, max_seconds, work / "cl", tag, trim=trim)
    if not res["status"]:
        RunStore.unit_commit(work, f"cl-{tag}", [f"cl/{f}" for f in res["files"]],
                             {k: res[k] for k in ("lo", "hi", "candidates", "work", "seconds", "incidences")})
    return res


def _blow_up_error(ctx: StageContext, res: dict, gdir, p) -> BlowUpError:
    """Name the component where the budget ran out, and the ways out."""
    from cliquewise.kernels.cliques import degeneracy_order

    g = parts.load_graph(gdir)
    node = int(res["at_node"])
    split_nodes = pq.read_table(ctx.input_dir("split") / "nodes.parquet", columns=["component"])
    comp = split_nodes.column("component").to_numpy()
    c = int(comp[node])
    members = np.flatnonzero(comp == c)
    comp_edges = int(np.isin(g["u"], members).sum())
    _, core = degeneracy_order(np.asarray(g["indptr"]), np.asarray(g["nbr"]))
    degen = int(core[members].max()) if len(members) else 0
    levels = load_npy(gdir / "levels.npy")
    lev = float(levels[int(res["at_level"])]) if len(levels) else float("nan")
    what = parts.STATUS_TEXT.get(res["status"], "budget")
    limit = {1: f"{p['max_cliques']} cliques", 2: f"{p['max_cliques'] * 64} work steps",
             3: f"{p['max_seconds']:g} s"}.get(res["status"], "")
    return BlowUpError(
        f"candidate listing exceeded its {what} budget ({limit}) in component {c} "
        f"({len(members)} nodes, {comp_edges} edges, degeneracy {degen}) at weight level {lev:g}; "
        f"raise --max-cliques/--max-seconds, use coarser --levels, or drop or cap that component in the export")
