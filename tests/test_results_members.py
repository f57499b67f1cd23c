"""``results/members.parquet`` written one row group at a time equals the table built
in one piece with pandas (reference: pandas ``DataFrame.sort_values`` on the
candidates' member lists, ranked by ``cliques.parquet``)."""

import networkx as nx
import numpy as np
import pandas as pd
import pyarrow.parquet as pq

from _support import graph_frame


def test_members_in_small_row_groups_equal_a_pandas_build(tmp_path, monkeypatch):
    import cliquewise
    from cliquewise.stages import results
    from cliquewise.store import load_npy

    monkeypatch.setattr(results, "MEMBER_ROWS_PER_GROUP", 7)  # many row groups, cliques cut between them
    run = cliquewise.decompose(graph_frame(nx.les_miserables_graph()), run_dir=tmp_path / "run", progress=False)
    got = pd.read_parquet(tmp_path / "run" / "results" / "members.parquet")
    assert pq.ParquetFile(tmp_path / "run" / "results" / "members.parquet").num_row_groups > 10

    ptr = load_npy(tmp_path / "run" / "enumerate" / "cand_ptr.npy")
    nodes = load_npy(tmp_path / "run" / "enumerate" / "cand_nodes.npy")
    mu = load_npy(tmp_path / "run" / "fit" / "mu.npy")
    size = np.diff(ptr)
    expected = mu * size * (size - 1) / 2
    order = np.lexsort((np.arange(len(mu)), -expected))
    clique_id = np.empty(len(mu), np.int64)
    clique_id[order] = np.arange(len(mu))
    labels = run.nodes().set_index("node_id")["label"]
    want = pd.DataFrame({"clique_id": np.repeat(clique_id, size), "node_id": nodes.astype(np.int64)})
    want = want.sort_values(["clique_id", "node_id"], kind="stable").reset_index(drop=True)
    want["label"] = labels.loc[want.node_id].to_numpy()
    pd.testing.assert_frame_equal(got, want, check_dtype=False)
    # the cliques table agrees on sizes
    cl = run.cliques().sort_values("clique_id")
    np.testing.assert_array_equal(got.groupby("clique_id").size().to_numpy(), cl["size"].to_numpy())
