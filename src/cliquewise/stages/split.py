"""The split stage: connected components, degree and strength of every node.

Reads   ``ingest/edges/part-*.parquet`` and ``ingest/labels.parquet``.
Writes  ``split/nodes.parquet``       ``node_id``, ``component``, ``degree``, ``strength``;
        ``split/components.parquet``  ``component``, ``nodes``, ``edges``, ``weight``.

The edge partitions are streamed through a numba union-find, so memory is a few
arrays of one entry per node, never per edge. Components are numbered by their
smallest node id.
"""

from __future__ import annotations

import numpy as np
import pyarrow as pa
import pyarrow.parquet as pq

from cliquewise.kernels.unionfind import uf_init, uf_labels, uf_union_edges
from cliquewise.stage import StageContext

NAME = "split"
UPSTREAM = ["ingest"]


def params_from(settings) -> dict:
    return {}


def edge_parts(stage_dir) -> list:
    return sorted((stage_dir / "edges").glob("part-*.parquet"))


def components(ingest_dir, n_nodes: int) -> dict:
    """Stream the edge store once: union-find, degree, strength, per-component edges."""
    parent = uf_init(n_nodes)
    degree = np.zeros(n_nodes, np.int64)
    strength = np.zeros(n_nodes, np.float64)
    files = edge_parts(ingest_dir)
    for f in files:
        t = pq.read_table(f, columns=["u", "v", "weight"])
        u = t.column("u").to_numpy()
        v = t.column("v").to_numpy()
        w = t.column("weight").to_numpy()
        uf_union_edges(parent, u, v)
        degree += np.bincount(u, minlength=n_nodes) + np.bincount(v, minlength=n_nodes)
        strength += np.bincount(u, weights=w, minlength=n_nodes) + np.bincount(v, weights=w, minlength=n_nodes)
    comp = uf_labels(parent)
    del parent
    n_comp = int(comp.max()) + 1 if n_nodes else 0
    comp_nodes = np.bincount(comp, minlength=n_comp)
    comp_edges = np.zeros(n_comp, np.int64)
    comp_weight = np.zeros(n_comp, np.float64)
    for f in files:
        t = pq.read_table(f, columns=["u", "weight"])
        cu = comp[t.column("u").to_numpy()]
        comp_edges += np.bincount(cu, minlength=n_comp)
        comp_weight += np.bincount(cu, weights=t.column("weight").to_numpy(), minlength=n_comp)
    return {"comp": comp, "degree": degree, "strength": strength,
            "comp_nodes": comp_nodes, "comp_edges": comp_edges, "comp_weight": comp_weight}


def run(ctx: StageContext) -> dict:
    ingest_dir = ctx.input_dir("ingest")
    n_nodes = pq.read_metadata(ingest_dir / "labels.parquet").num_rows
    with ctx.substep("union-find"):
        fut = ctx.engine.submit(components, ingest_dir, n_nodes)
        res = fut.result()
    with ctx.substep("write"):
        pq.write_table(pa.table({
            "node_id": pa.array(np.arange(n_nodes, dtype=np.int64)),
            "component": pa.array(res["comp"]),
            "degree": pa.array(res["degree"]),
            "strength": pa.array(res["strength"]),
        }), ctx.work / "nodes.parquet", compression="zstd")
        n_comp = len(res["comp_nodes"])
        pq.write_table(pa.table({
            "component": pa.array(np.arange(n_comp, dtype=np.int64)),
            "nodes": pa.array(res["comp_nodes"]),
            "edges": pa.array(res["comp_edges"]),
            "weight": pa.array(res["comp_weight"]),
        }), ctx.work / "components.parquet", compression="zstd")
    sizes = res["comp_nodes"]
    hist_edges = [1, 2, 3, 5, 10, 100, 1000, 10_000, 100_000, 1_000_000, 10**12]
    hist = {}
    for lo, hi in zip(hist_edges[:-1], hist_edges[1:]):
        c = int(((sizes >= lo) & (sizes < hi)).sum())
        if c:
            hist[f"{lo}-{hi - 1}" if hi - lo > 1 else str(lo)] = c
    return {
        "nodes": n_nodes,
        "components": n_comp,
        "isolated_nodes": int((sizes == 1).sum()),
        "largest_component_nodes": int(sizes.max()) if n_comp else 0,
        "largest_component_edges": int(res["comp_edges"].max()) if n_comp else 0,
        "component_size_histogram": hist,
    }
