"""The arrays of a finished run that the analyses read, loaded once.

A fitted run is held as :class:`FittedRun`: the edges (``u < v`` node ids and
their counts ``y``, in the edge-store order that the incidence uses), the
edge -> candidate incidence, candidate sizes and fitted intensities ``mu``
(candidate order, 0 = pruned). Everything is one array per edge, incidence or
candidate, so memory grows with the edges; nothing is dense.

Files read (see ``docs/architecture.md``)::

    ingest/edges/part-*.parquet   u, v (weights are taken from enumerate/weight.npy)
    ingest/labels.parquet         number of nodes
    ingest/report.json            whether the weights are whole numbers
    enumerate/inc_ptr.npy, inc_cand.npy, cand_ptr.npy, weight.npy
    fit/mu.npy
"""

from __future__ import annotations

from dataclasses import dataclass, field
from pathlib import Path

import numpy as np
import pyarrow.parquet as pq
import scipy.sparse as sp

from cliquewise.store import RunStore, StoreError, load_npy, read_json

__all__ = ["FittedRun", "load_run", "pair_count"]


def pair_count(n: int) -> float:
    """Number of unordered pairs ``n (n - 1) / 2`` (as a float: it can pass 2**63)."""
    return float(n) * (float(n) - 1.0) / 2.0


@dataclass
class FittedRun:
    """Edges, incidence and intensities of a fitted run.

    Attributes
    ----------
    n : int
        Number of nodes (every label seen, isolated ones included).
    u, v : int64 arrays, length ``E``
        Edge endpoints, ``u < v``, in the incidence's edge order.
    y : float64 array, length ``E``
        Edge counts.
    inc_ptr, inc_cand : int64 arrays
        Edge -> candidate CSR (candidate ids index ``sizes`` and ``mu``).
    sizes : int64 array, length ``K``
        Candidate sizes.
    mu : float64 array, length ``K``
        Fitted intensities (0 = pruned).
    integral : bool
        Whether every count is a whole number.
    settings : dict
        The run's settings (``run.json``), empty when built from arrays.
    """

    n: int
    u: np.ndarray
    v: np.ndarray
    y: np.ndarray
    inc_ptr: np.ndarray
    inc_cand: np.ndarray
    sizes: np.ndarray
    mu: np.ndarray
    integral: bool = True
    settings: dict = field(default_factory=dict)
    path: Path | None = None

    @property
    def P(self) -> np.ndarray:
        """Pairs per candidate, ``s (s - 1) / 2``."""
        s = self.sizes.astype(np.float64)
        return s * (s - 1.0) / 2.0

    @property
    def kept(self) -> np.ndarray:
        """Candidate ids with ``mu > 0``, strongest (largest ``mu * P``) first, ties by id."""
        idx = np.flatnonzero(self.mu > 0)
        ew = self.mu[idx] * self.P[idx]
        return idx[np.lexsort((idx, -ew))]

    def incidence(self) -> sp.csr_matrix:
        """The 0/1 edge-by-candidate matrix ``A`` (scipy CSR, ``E x K``)."""
        E, K = len(self.y), len(self.sizes)
        data = np.ones(len(self.inc_cand), dtype=np.float64)
        return sp.csr_matrix((data, np.asarray(self.inc_cand), np.asarray(self.inc_ptr)), shape=(E, K))

    @classmethod
    def from_arrays(cls, n, u, v, y, inc_ptr, inc_cand, sizes, mu) -> "FittedRun":
        y = np.asarray(y, dtype=np.float64)
        return cls(n=int(n), u=np.asarray(u, np.int64), v=np.asarray(v, np.int64), y=y,
                   inc_ptr=np.asarray(inc_ptr, np.int64), inc_cand=np.asarray(inc_cand, np.int64),
                   sizes=np.asarray(sizes, np.int64), mu=np.asarray(mu, np.float64),
                   integral=bool(np.all(y == np.round(y))))


def _require(store: RunStore, stage: str) -> None:
    ok, why = store.verify(stage, checksums=False)
    if not ok:
        raise StoreError(f"{store.root}: stage {stage!r} is not complete ({why}); run or resume the run first")


def load_run(run_dir) -> FittedRun:
    """Load the arrays of a finished run.

    Parameters
    ----------
    run_dir : str or Path

    Returns
    -------
    FittedRun

    Raises
    ------
    StoreError
        When the run has no complete ingest, enumerate or fit stage.
    """
    store = RunStore(run_dir, create=False)
    for stage in ("ingest", "enumerate", "fit"):
        _require(store, stage)
    root = store.root
    files = sorted((root / "ingest" / "edges").glob("part-*.parquet"))  # the order enumerate used
    us, vs = [], []
    for f in files:
        t = pq.read_table(f, columns=["u", "v"])
        us.append(t.column("u").to_numpy().astype(np.int64, copy=False))
        vs.append(t.column("v").to_numpy().astype(np.int64, copy=False))
    u = np.concatenate(us) if us else np.zeros(0, np.int64)
    v = np.concatenate(vs) if vs else np.zeros(0, np.int64)
    enu = root / "enumerate"
    y = np.asarray(load_npy(enu / "weight.npy"), dtype=np.float64)
    if len(y) != len(u):
        raise StoreError(f"{root}: edge store and enumerate/weight.npy disagree ({len(u)} vs {len(y)} edges)")
    sizes = np.diff(load_npy(enu / "cand_ptr.npy")).astype(np.int64)
    mu = np.asarray(load_npy(root / "fit" / "mu.npy"), dtype=np.float64)
    if len(mu) != len(sizes):
        raise StoreError(f"{root}: fit/mu.npy and enumerate/cand_ptr.npy disagree; resume the run")
    n = pq.read_metadata(root / "ingest" / "labels.parquet").num_rows
    report = read_json(root / "ingest" / "report.json")
    integral = bool(report.get("weights_integral", bool(np.all(y == np.round(y)))))
    run_json = root / "run.json"
    settings = read_json(run_json).get("settings", {}) if run_json.exists() else {}
    return FittedRun(n=int(n), u=u, v=v, y=y, inc_ptr=np.asarray(load_npy(enu / "inc_ptr.npy"), np.int64),
                     inc_cand=np.asarray(load_npy(enu / "inc_cand.npy"), np.int64), sizes=sizes, mu=mu,
                     integral=integral, settings=settings, path=root)
