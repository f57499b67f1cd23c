"""A real dask cluster: a ``dask scheduler`` and two ``dask worker`` processes on
127.0.0.1, started here, joined with ``cliquewise run --scheduler``.

Reference: the same export run on the embedded engine in this process; the
results tables must be identical (pandas ``assert_frame_equal``, exact), as the
reductions run in a fixed order whatever the engine.
"""

from __future__ import annotations

import os
import socket
import subprocess
import sys
import time
from pathlib import Path

import networkx as nx
import pandas as pd
import pytest

from _support import graph_frame

pytestmark = pytest.mark.cluster

BIN = Path(sys.executable).parent


def _free_port() -> int:
    with socket.socket() as s:
        s.bind(("127.0.0.1", 0))
        return s.getsockname()[1]


@pytest.fixture
def real_cluster(tmp_path):
    port = _free_port()
    address = f"tcp://127.0.0.1:{port}"
    env = dict(os.environ, PYTHONUNBUFFERED="1")
    procs = [subprocess.Popen([str(BIN / "dask"), "scheduler", "--host", "127.0.0.1", "--port", str(port),
                               "--dashboard-address", "127.0.0.1:0"],
                              stdout=subprocess.DEVNULL, stderr=open(tmp_path / "scheduler.log", "w"), env=env)]
    for i in range(2):
        procs.append(subprocess.Popen([str(BIN / "dask"), "worker", address, "--nthreads", "1", "--host", "127.0.0.1",
                                       "--dashboard-address", "127.0.0.1:0", "--local-directory",
                                       str(tmp_path / f"w{i}")],
                                      stdout=subprocess.DEVNULL, stderr=open(tmp_path / f"worker{i}.log", "w"),
                                      env=env))
    try:
        from distributed import Client

        deadline = time.time() + 60
        while True:
            try:
                with Client(address, timeout="5s") as c:
                    c.wait_for_workers(2, timeout=max(1.0, deadline - time.time()))
                break
            except (OSError, TimeoutError):
                if time.time() > deadline:
                    raise
                time.sleep(0.5)
        yield address
    finally:
        for p in procs[::-1]:
            p.terminate()
        for p in procs:
            try:
                p.wait(timeout=20)
            except subprocess.TimeoutExpired:
                p.kill()


def _tables(run_dir: Path) -> dict:
    return {n: pd.read_parquet(run_dir / "results" / f"{n}.parquet") for n in ("nodes", "cliques", "members")}


def test_run_on_a_real_cluster_equals_the_embedded_engine(real_cluster, tmp_path, cli):
    # Les Miserables co-appearance counts, shipped with networkx
    export = tmp_path / "export.parquet"
    graph_frame(nx.les_miserables_graph()).to_parquet(export)
    rc, out, err = cli("run", "--edges", export, "--run-dir", tmp_path / "embedded")
    assert rc == 0, err
    proc = subprocess.run([str(BIN / "cliquewise"), "--quiet", "run", "--edges", str(export),
                           "--run-dir", str(tmp_path / "cluster"), "--scheduler", real_cluster],
                          capture_output=True, text=True, timeout=600)
    assert proc.returncode == 0, proc.stderr
    a, b = _tables(tmp_path / "embedded"), _tables(tmp_path / "cluster")
    for name in a:
        pd.testing.assert_frame_equal(a[name], b[name], check_exact=True)
    # the engine that ran it is recorded: the cluster's scheduler, not local threads
    import json

    man = json.loads((tmp_path / "cluster" / "fit" / "manifest.json").read_text())
    assert man["profile"]["peak_rss_workers_bytes"] > 0
