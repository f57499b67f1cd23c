"""Exports: group graphs read back with networkx, membership tables against pandas.

Outside references:
* networkx ``read_graphml`` and ``read_gexf`` parse the files we write (XML readers
  we did not write); the groups and members they return are compared with
  ``results/members.parquet`` grouped by pandas.
* the node-by-group table is compared with ``pandas.crosstab`` of
  ``members.parquet``, and the tidy table with a ``pandas.merge``.
* the data: Knuth's Les Miserables co-appearance counts and Zachary's karate club
  (both shipped by networkx), with the names replaced by awkward labels.
"""

from __future__ import annotations

import networkx as nx
import numpy as np
import pandas as pd
import pytest

from _support import graph_frame, lesmis_export

import cliquewise
from cliquewise.analysis import export as ex

AWKWARD = ['Smith, John', 'say "hi"', "O'Brien", 'two\nlines', 'tab\there', 'cr\r\nlf', ' lead', 'trail ',
           'Zoë 🐟 東京', '<b>&amp;</b>', 'e\u0301', 'ﬁ', '', '0042', 'NA', '=1+1', 'back\\slash']


@pytest.fixture(scope="module")
def lesmis_run(tmp_path_factory):
    """Les Miserables with every name replaced by an awkward label (unique)."""
    df = lesmis_export(seed=3)
    names = sorted(set(df.source) | set(df.target))
    relabel = {n: f"{AWKWARD[i % len(AWKWARD)]}#{i}" if i >= len(AWKWARD) else AWKWARD[i]
               for i, n in enumerate(names)}
    df["source"] = df.source.map(relabel)
    df["target"] = df.target.map(relabel)
    return cliquewise.decompose(df, tmp_path_factory.mktemp("lesmis") / "run", progress=False)


@pytest.fixture(scope="module")
def karate_run(tmp_path_factory):
    """Zachary's karate club with integer labels (networkx ships the weights)."""
    df = graph_frame(nx.karate_club_graph()).astype({"source": "int64", "target": "int64"})
    df["source"] += 1000
    df["target"] += 1000
    return cliquewise.decompose(df, tmp_path_factory.mktemp("karate") / "run", progress=False)


def _expected_groups(run, top):
    """{clique_id: sorted member labels} of the ``top`` strongest kept groups, by pandas."""
    cl = run.cliques(kept_only=True).head(top)
    mem = run.members()
    mem = mem[mem.clique_id.isin(cl.clique_id)]
    return {int(k): sorted(v.tolist(), key=str) for k, v in mem.groupby("clique_id")["label"]}


def _groups_in_graph(H):
    """{clique_id: sorted member labels} read from a graph as networkx parsed it."""
    out = {}
    for node, d in H.nodes(data=True):
        if d["kind"] == "group":
            out[int(d["clique_id"])] = sorted((H.nodes[p]["label"] for p in H[node]), key=str)
    return out


@pytest.mark.parametrize("fmt,reader", [("graphml", nx.read_graphml), ("gexf", nx.read_gexf)])
def test_graph_round_trip_awkward_labels(lesmis_run, tmp_path, fmt, reader):
    top = 30
    path = ex.write_graph(lesmis_run, tmp_path / f"g.{fmt}", fmt=fmt, top=top)
    H = reader(path)  # networkx's XML reader: outside reference
    expected = _expected_groups(lesmis_run, top)
    assert len(expected) == top
    assert _groups_in_graph(H) == expected
    # every person node carries its label exactly, awkward characters included
    nodes = lesmis_run.nodes().set_index("node_id")["label"]
    persons = {int(d["node_id"]): d["label"] for _, d in H.nodes(data=True) if d["kind"] == "person"}
    assert persons == {i: nodes[i] for i in persons}
    # group attributes as in cliques.parquet
    cl = lesmis_run.cliques().set_index("clique_id")
    for node, d in H.nodes(data=True):
        if d["kind"] == "group":
            c = cl.loc[int(d["clique_id"])]
            assert int(d["size"]) == c["size"] == H.degree(node)
            assert float(d["intensity"]) == pytest.approx(c["intensity"], rel=1e-12)
            assert float(d["expected_weight"]) == pytest.approx(c["expected_weight"], rel=1e-12)
    # bipartite: edges only between people and groups
    kinds = nx.get_node_attributes(H, "kind")
    assert all({kinds[a], kinds[b]} == {"person", "group"} for a, b in H.edges())


def test_the_awkward_labels_are_exported(lesmis_run, tmp_path):
    # all groups: every label that belongs to a kept group appears, byte for byte
    path = ex.write_graph(lesmis_run, tmp_path / "all.graphml", fmt="graphml", top=None)
    H = nx.read_graphml(path)
    got = {d["label"] for _, d in H.nodes(data=True) if d["kind"] == "person"}
    mem = lesmis_run.members()
    kept = lesmis_run.cliques(kept_only=True).clique_id
    want = set(mem[mem.clique_id.isin(kept)].label)
    assert got == want
    assert {"cr\r\nlf", "two\nlines", "Zoë 🐟 東京", "say \"hi\"", "Smith, John", " lead", "e\u0301", "", "0042"} <= got


def test_integer_labels_keep_their_type_in_graphml(karate_run, tmp_path):
    path = ex.write_graph(karate_run, tmp_path / "k.graphml", fmt="graphml", top=5)
    H = nx.read_graphml(path)
    labels = [d["label"] for _, d in H.nodes(data=True) if d["kind"] == "person"]
    assert labels and all(isinstance(x, int) and x >= 1000 for x in labels)
    assert _groups_in_graph(H) == _expected_groups(karate_run, 5)
    # GEXF labels are text: the same groups, labels as strings
    K = nx.read_gexf(ex.write_graph(karate_run, tmp_path / "k.gexf", fmt="gexf", top=5))
    want = {k: sorted(map(str, v)) for k, v in _expected_groups(karate_run, 5).items()}
    assert {k: sorted(v) for k, v in _groups_in_graph(K).items()} == want


def test_wide_table_is_members_pivoted_by_pandas(lesmis_run):
    top = 12
    wide = ex.membership_wide(lesmis_run, top=top)
    cl = lesmis_run.cliques(kept_only=True).head(top)
    mem = lesmis_run.members()
    mem = mem[mem.clique_id.isin(cl.clique_id)]
    ref = pd.crosstab(mem.node_id, mem.clique_id)  # pandas pivot: outside reference
    ref = ref[cl.clique_id.tolist()]  # strongest first, like ours
    assert wide.node_id.tolist() == ref.index.tolist()
    got = wide[[f"group_{c}" for c in cl.clique_id]].to_numpy()
    np.testing.assert_array_equal(got, ref.to_numpy())
    np.testing.assert_array_equal(wide.groups.to_numpy(), ref.sum(axis=1).to_numpy())
    labels = lesmis_run.nodes().set_index("node_id")["label"]
    assert wide.label.tolist() == labels.loc[wide.node_id].tolist()


def test_long_table_is_members_merged_by_pandas(lesmis_run):
    long = ex.membership_long(lesmis_run)
    cl = lesmis_run.cliques(kept_only=True)
    ref = lesmis_run.members().merge(cl[["clique_id", "size", "intensity"]], on="clique_id")  # pandas merge
    ref = ref.sort_values(["node_id", "clique_id"]).reset_index(drop=True)
    assert long.columns.tolist() == ["node_id", "label", "clique_id", "group_size", "group_intensity"]
    np.testing.assert_array_equal(long.node_id, ref.node_id)
    np.testing.assert_array_equal(long.clique_id, ref.clique_id)
    np.testing.assert_array_equal(long.group_size, ref["size"])
    np.testing.assert_array_equal(long.group_intensity, ref["intensity"])
    assert long.label.tolist() == ref.label.tolist()
    assert (long.group_intensity > 0).all()


@pytest.mark.parametrize("layout", ["long", "wide"])
def test_tables_round_trip_through_parquet_and_csv(lesmis_run, tmp_path, layout):
    df = ex.membership_long(lesmis_run, top=20) if layout == "long" else ex.membership_wide(lesmis_run, top=20)
    pq_path = ex.write_table(df, tmp_path / "t.parquet", fmt="parquet")
    pd.testing.assert_frame_equal(pd.read_parquet(pq_path), df, check_dtype=False)
    csv_path = ex.write_table(df, tmp_path / "t.csv", fmt="csv")
    back = pd.read_csv(csv_path, keep_default_na=False, dtype={"label": str})  # pandas' CSV parser
    assert back.label.tolist() == df.label.tolist()  # commas, quotes, newlines, CR, unicode
    pd.testing.assert_frame_equal(back.drop(columns="label"), df.drop(columns="label"), check_dtype=False)


def test_cli_export_writes_each_format(lesmis_run, tmp_path, cli):
    run_dir = lesmis_run.path
    for fmt in ("graphml", "gexf", "parquet", "csv"):
        out = tmp_path / f"x.{fmt}"
        rc, stdout, err = cli("export", run_dir, "--format", fmt, "--top", "7", "--out", out)
        assert rc == 0, err
        assert stdout.strip() == str(out)
    assert len(_groups_in_graph(nx.read_graphml(tmp_path / "x.graphml"))) == 7
    assert pd.read_parquet(tmp_path / "x.parquet").clique_id.nunique() == 7
    rc, stdout, _ = cli("export", run_dir, "--format", "csv", "--layout", "wide")
    assert rc == 0 and stdout.strip().endswith("exports/memberships-wide-top100.csv")
    rc, stdout, _ = cli("export", run_dir, "--format", "gexf", "--top", "all")
    assert rc == 0 and stdout.strip().endswith("exports/groups-topall.gexf")


def test_cli_export_errors_are_one_line(lesmis_run, tmp_path, cli):
    rc, _, err = cli("export", tmp_path / "nowhere", "--format", "graphml")
    assert rc == 2 and err.count("\n") == 1 and "error" in err
    rc, _, err = cli("export", lesmis_run.path, "--format", "graphml", "--top", "0")
    assert rc == 2 and err.count("\n") == 1


def test_labels_xml_cannot_hold_are_refused(tmp_path):
    df = pd.DataFrame({"source": ["bell\x07", "b", "a"], "target": ["b", "c", "c"], "weight": [3, 3, 3]})
    run = cliquewise.decompose(df, tmp_path / "run", progress=False)
    with pytest.raises(ex.ExportError, match="XML"):
        ex.write_graph(run, tmp_path / "x.graphml", fmt="graphml")
    assert not (tmp_path / "x.graphml").exists()
    # the tables carry it unchanged
    assert "bell\x07" in set(ex.membership_long(run).label)


def test_exports_carry_the_caution(lesmis_run, tmp_path):
    import xml.etree.ElementTree as ET

    import pyarrow.parquet as pq

    want = lesmis_run.summary()["caution"]
    assert "not intent" in want
    H = nx.read_graphml(ex.write_graph(lesmis_run, tmp_path / "c.graphml", fmt="graphml", top=3))
    assert H.graph["caution"] == want
    # GEXF keeps it in <meta><description>; read with the standard library's XML parser
    root = ET.parse(ex.write_graph(lesmis_run, tmp_path / "c.gexf", fmt="gexf", top=3)).getroot()
    ns = {"g": "http://www.gexf.net/1.2draft"}
    assert root.find("g:meta/g:description", ns).text == want
    assert nx.read_gexf(tmp_path / "c.gexf").number_of_nodes() > 3  # still a valid GEXF for networkx
    path = ex.export(lesmis_run.path, "parquet", top=3, out=tmp_path / "c.parquet")
    assert pq.read_schema(path).metadata[b"caution"].decode() == want
