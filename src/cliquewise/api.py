"""The Python API: open a finished run, or decompose an edge table in one call.

>>> import pandas as pd, cliquewise
>>> edges = pd.DataFrame({"source": ["ann", "ann", "bo", "cy"],
...                       "target": ["bo", "cy", "cy", "dee"],
...                       "weight": [4, 4, 4, 1]})
>>> run = cliquewise.decompose(edges, progress=False)
>>> run.cliques()[["size", "intensity"]].round(3).values.tolist()
[[3.0, 4.0], [2.0, 1.0]]
>>> sorted(run.groups_of("ann").clique_id.tolist())
[0]
>>> run.rate([("ann", "bo"), ("cy", "dee"), ("ann", "dee")]).round(3).tolist()
[4.0, 1.0, 0.0]
"""

from __future__ import annotations

import json
import os
import tempfile
from pathlib import Path
from typing import Iterable

import numpy as np
import pandas as pd

from cliquewise.store import RunStore, StoreError

__all__ = ["Run", "open_run", "decompose"]


class Run:
    """A finished run directory, read through its ``results/`` tables.

    Parameters
    ----------
    path : str or Path
        The run directory (the one given to ``cliquewise run --run-dir``).

    Raises
    ------
    StoreError
        When the run has no complete, verified results.
    """

    def __init__(self, path):
        self.path = Path(path)
        store = RunStore(self.path, create=False)
        ok, why = store.verify("results", checksums=False)
        if not ok:
            raise StoreError(f"{self.path}: no complete results ({why}); run or resume it first")
        self.results = self.path / "results"
        self._cache: dict[str, pd.DataFrame] = {}

    def __repr__(self) -> str:
        s = self.summary()
        return f"Run({str(self.path)!r}: {s['nodes']} nodes, {s['edges']} edges, {s['groups_kept']} groups kept)"

    def _table(self, name: str) -> pd.DataFrame:
        if name not in self._cache:
            self._cache[name] = pd.read_parquet(self.results / f"{name}.parquet")
        return self._cache[name]

    def nodes(self) -> pd.DataFrame:
        """One row per node: ``node_id``, ``label``, ``component``, ``degree``, ``strength``."""
        return self._table("nodes").copy()

    def cliques(self, kept_only: bool = False) -> pd.DataFrame:
        """One row per candidate, strongest first: ``clique_id``, ``size``, ``intensity``,
        ``expected_weight``, ``share``, ``level_min``, ``level_max``."""
        t = self._table("cliques")
        return (t[t.intensity > 0] if kept_only else t).copy()

    def members(self) -> pd.DataFrame:
        """One row per (candidate, member): ``clique_id``, ``node_id``, ``label``."""
        return self._table("members").copy()

    def summary(self) -> dict:
        """Counts, log-likelihood, iterations, convergence and timings."""
        return json.loads((self.results / "summary.json").read_text(encoding="utf-8"))

    def _node_ids(self, labels) -> np.ndarray:
        nodes = self._table("nodes")
        index = pd.Index(nodes["label"])
        pos = index.get_indexer(pd.Index(list(labels), dtype=index.dtype if len(index) else None))
        return np.where(pos >= 0, nodes["node_id"].to_numpy()[np.maximum(pos, 0)], -1)

    def groups_of(self, label) -> pd.DataFrame:
        """The kept groups a person belongs to, strongest first.

        Parameters
        ----------
        label : the person's label as in the input.
        """
        nid = self._node_ids([label])[0]
        if nid < 0:
            raise KeyError(f"no node labelled {label!r}")
        mem = self._table("members")
        ids = mem.loc[mem.node_id == nid, "clique_id"]
        cl = self._table("cliques")
        out = cl[cl.clique_id.isin(ids) & (cl.intensity > 0)]
        return out.sort_values("expected_weight", ascending=False).reset_index(drop=True)

    def rate(self, pairs: Iterable[tuple]) -> np.ndarray:
        """Fitted Poisson rate ``lambda`` for each (label, label) pair (0 when no group holds both)."""
        pairs = list(pairs)
        if not pairs:
            return np.zeros(0)
        a = self._node_ids([p[0] for p in pairs])
        b = self._node_ids([p[1] for p in pairs])
        mem = self._table("members")
        cl = self._table("cliques")
        mu = cl.set_index("clique_id")["intensity"]
        kept = mem[mem.clique_id.map(mu).to_numpy() > 0][["clique_id", "node_id"]]
        q = pd.DataFrame({"i": np.arange(len(pairs)), "a": a, "b": b})
        left = q.merge(kept, left_on="a", right_on="node_id")[["i", "b", "clique_id"]]
        both = left.merge(kept, left_on=["b", "clique_id"], right_on=["node_id", "clique_id"])
        both["mu"] = both.clique_id.map(mu).to_numpy()
        out = np.zeros(len(pairs))
        sums = both.groupby("i").mu.sum()
        out[sums.index.to_numpy()] = sums.to_numpy()
        out[(a == b) | (a < 0) | (b < 0)] = 0.0  # no self-pairs; unknown labels have no rate
        return out

    def to_networkx(self, top: int | None = 100):
        """A bipartite networkx graph of the ``top`` strongest kept groups and their members.

        Person nodes carry ``kind="person"`` and ``label``; group nodes are named
        ``("group", clique_id)`` and carry ``kind="group"``, ``size``, ``intensity``
        and ``expected_weight``; edges join members to their groups.
        """
        import networkx as nx

        cl = self.cliques(kept_only=True)
        if top is not None:
            cl = cl.head(top)
        mem = self._table("members")
        mem = mem[mem.clique_id.isin(cl.clique_id)]
        G = nx.Graph()
        for r in cl.itertuples(index=False):
            G.add_node(("group", int(r.clique_id)), kind="group", size=int(r.size), intensity=float(r.intensity),
                       expected_weight=float(r.expected_weight))
        for cid, nid, lab in mem[["clique_id", "node_id", "label"]].itertuples(index=False):
            G.add_node(int(nid), kind="person", label=lab if isinstance(lab, str) else int(lab))
            G.add_edge(int(nid), ("group", int(cid)))
        return G


def open_run(path) -> Run:
    """Open a finished run directory.

    Parameters
    ----------
    path : str or Path

    Returns
    -------
    Run
    """
    return Run(path)


def decompose(edges, run_dir=None, *, source="source", target="target", weight="weight", engine=None,
              progress: bool = True, **settings) -> Run:
    """Decompose an edge table (pandas) or an export path into groups; return the run.

    Parameters
    ----------
    edges : pandas.DataFrame or str or Path
        A table with ``source``, ``target`` and (optionally) ``weight`` columns, or
        a path, folder or glob of Parquet/CSV files.
    run_dir : str or Path, optional
        Where to keep the run; a temporary folder by default.
    source, target, weight : str
        Column names.
    engine : cliquewise.engine.Engine, optional
        Reuse a running engine (embedded by default).
    progress : bool
        Show progress bars.
    **settings
        ``levels``, ``tol``, ``max_iter``, ``prune``, ``accelerate``, ``merge``,
        ``on_invalid``, ``max_cliques``, ``max_seconds``.

    Returns
    -------
    Run
    """
    from cliquewise.config import Settings
    from cliquewise.pipeline import run_pipeline

    run_dir = Path(run_dir) if run_dir else Path(tempfile.mkdtemp(prefix="cliquewise-"))
    s = Settings()
    s.run_dir = str(run_dir.resolve())
    if isinstance(edges, pd.DataFrame):
        inp = run_dir / "input"
        inp.mkdir(parents=True, exist_ok=True)
        edges.to_parquet(inp / "edges.parquet", index=False)
        s.input.edges = str(inp / "edges.parquet")
    else:
        s.input.edges = os.fspath(edges)
    s.input.source, s.input.target = source, target
    s.input.weight = weight if (not isinstance(edges, pd.DataFrame) or weight in edges.columns) else ""
    for key, val in settings.items():
        for part in (s.input, s.candidates, s.fit):
            if hasattr(part, key):
                setattr(part, key, val)
                break
        else:
            raise TypeError(f"decompose() got an unknown setting {key!r}")
    s.validate()
    run_pipeline(s, engine=engine, progress=progress)
    return Run(run_dir)
