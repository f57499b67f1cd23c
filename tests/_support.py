"""Helpers shared by the tests (importable as ``_support``)."""

from __future__ import annotations

import contextlib
import io
from pathlib import Path

import networkx as nx
import numpy as np
import pandas as pd


def run_cli(*argv) -> tuple[int, str, str]:
    """Run ``cliquewise ARGV`` in this process; return (exit code, stdout, stderr)."""
    from cliquewise.cli import main

    out, err = io.StringIO(), io.StringIO()
    with contextlib.redirect_stdout(out), contextlib.redirect_stderr(err):
        rc = main(["--quiet", *map(str, argv)])
    return rc, out.getvalue(), err.getvalue()


def graph_frame(G, weight="weight") -> pd.DataFrame:
    """A networkx graph as an edge table (source, target, weight)."""
    return pd.DataFrame([(a, b, d.get(weight, 1)) for a, b, d in G.edges(data=True)],
                        columns=["source", "target", "weight"])


def lesmis_export(seed=0) -> pd.DataFrame:
    """Les Miserables co-appearances as a messy export: shuffled rows, counts split
    into several rows, some of them reversed (networkx ships the graph)."""
    rng = np.random.default_rng(seed)
    df = graph_frame(nx.les_miserables_graph())
    rows = []
    for a, b, w in df.itertuples(index=False):
        w = int(w)
        k = int(rng.integers(1, min(w, 3) + 1))
        cuts = np.sort(rng.choice(np.arange(1, w), size=k - 1, replace=False)) if k > 1 else []
        pieces = np.diff(np.concatenate([[0], cuts, [w]]))
        for p in pieces:
            rows.append((b, a, int(p)) if rng.random() < 0.5 else (a, b, int(p)))
    out = pd.DataFrame(rows, columns=["source", "target", "weight"])
    return out.sample(frac=1.0, random_state=seed).reset_index(drop=True)


def read_edges(run_dir) -> pd.DataFrame:
    """The edge store with labels, as a frame sorted by (u, v)."""
    import pyarrow.parquet as pq

    run_dir = Path(run_dir)
    edges = pd.concat([pd.read_parquet(f) for f in sorted((run_dir / "ingest" / "edges").glob("part-*.parquet"))])
    labels = pq.read_table(run_dir / "ingest" / "labels.parquet").to_pandas()
    lab = labels.set_index("node_id")["label"]
    edges["a"] = lab.loc[edges.u].to_numpy()
    edges["b"] = lab.loc[edges.v].to_numpy()
    return edges.sort_values(["u", "v"]).reset_index(drop=True)
