"""The ingest stage against outside references.

References: networkx's shipped ``les_miserables_graph`` (Knuth's co-appearance
counts) for exact weights; a plain pandas groupby for event-log windows and for
duplicate merging.
"""

from __future__ import annotations

import json

import networkx as nx
import numpy as np
import pandas as pd
import pyarrow as pa
import pyarrow.parquet as pq
import pytest

from _support import lesmis_export, read_edges, run_cli


def ingest(tmp_path, edges, *extra, run="run"):
    rc, out, err = run_cli("run", "--edges", edges, "--run-dir", tmp_path / run, *extra)
    return rc, out, err


def _stop_after_ingest(monkeypatch):
    from cliquewise import pipeline

    monkeypatch.setattr(pipeline, "STAGES", ["ingest"])


def test_lesmis_weights_exact(tmp_path, monkeypatch):
    # reference: networkx.les_miserables_graph() edge weights (shipped with networkx)
    _stop_after_ingest(monkeypatch)
    df = lesmis_export(seed=3)
    assert len(df) > 254  # counts were split into several rows, some reversed
    df.iloc[: len(df) // 2].to_parquet(tmp_path / "a.parquet")
    df.iloc[len(df) // 2:].to_parquet(tmp_path / "b.parquet")
    rc, _, err = ingest(tmp_path, tmp_path / "*.parquet")
    assert rc == 0, err
    got = read_edges(tmp_path / "run")
    G = nx.les_miserables_graph()
    assert len(got) == G.number_of_edges()
    for a, b, w in got[["a", "b", "weight"]].itertuples(index=False):
        assert G[a][b]["weight"] == w
    assert (got.u < got.v).all()
    rep = json.loads((tmp_path / "run" / "ingest" / "report.json").read_text())
    assert rep["rows_read"] == len(df)
    assert rep["rows_merged"] == len(df) - G.number_of_edges()
    assert rep["nodes"] == G.number_of_nodes()


def test_csv_and_parquet_give_identical_edge_store(tmp_path, monkeypatch):
    _stop_after_ingest(monkeypatch)
    df = lesmis_export(seed=5)
    df.to_parquet(tmp_path / "x.parquet")
    df.to_csv(tmp_path / "x.csv", index=False)
    assert ingest(tmp_path, tmp_path / "x.parquet", run="p")[0] == 0
    assert ingest(tmp_path, tmp_path / "x.csv", run="c")[0] == 0
    a, b = read_edges(tmp_path / "p"), read_edges(tmp_path / "c")
    pd.testing.assert_frame_equal(a, b)
    la = pq.read_table(tmp_path / "p" / "ingest" / "labels.parquet")
    lb = pq.read_table(tmp_path / "c" / "ingest" / "labels.parquet")
    assert la.equals(lb)


def test_integer_labels_csv_and_parquet_agree(tmp_path, monkeypatch):
    _stop_after_ingest(monkeypatch)
    rng = np.random.default_rng(1)
    df = pd.DataFrame({"source": rng.integers(0, 40, 500), "target": rng.integers(0, 40, 500),
                       "weight": rng.integers(0, 5, 500)})
    df.to_parquet(tmp_path / "i.parquet")
    df.to_csv(tmp_path / "i.csv", index=False)
    assert ingest(tmp_path, tmp_path / "i.parquet", run="p")[0] == 0
    assert ingest(tmp_path, tmp_path / "i.csv", run="c")[0] == 0
    a, b = read_edges(tmp_path / "p"), read_edges(tmp_path / "c")
    pd.testing.assert_frame_equal(a, b)
    # reference: pandas groupby over the ordered pairs, self-loops and zeros removed
    d = df[(df.source != df.target) & (df.weight > 0)].copy()
    d["lo"] = d[["source", "target"]].min(axis=1)
    d["hi"] = d[["source", "target"]].max(axis=1)
    ref = d.groupby(["lo", "hi"]).weight.sum()
    mine = a.set_index(["a", "b"]).weight
    mine.index.names = ["lo", "hi"]
    pd.testing.assert_series_equal(mine.sort_index(), ref.astype(float).sort_index(), check_names=False)
    rep = json.loads((tmp_path / "p" / "ingest" / "report.json").read_text())
    assert rep["rows_read"] == rep["rows_kept"] + rep["rows_dropped_total"]
    assert rep["rows_dropped"]["self_loop"] == int((df.source == df.target).sum())
    assert rep["rows_dropped"]["zero_weight"] == int(((df.source != df.target) & (df.weight == 0)).sum())


@pytest.mark.parametrize("how", ["max", "min"])
def test_merge_rules(tmp_path, monkeypatch, how):
    _stop_after_ingest(monkeypatch)
    df = lesmis_export(seed=7)
    df.to_parquet(tmp_path / "m.parquet")
    assert ingest(tmp_path, tmp_path / "m.parquet", "--merge", how)[0] == 0
    got = read_edges(tmp_path / "run")
    # reference: pandas groupby with the same rule on the unordered pair
    key = df.apply(lambda r: tuple(sorted((r.source, r.target))), axis=1)
    ref = df.groupby(key).weight.agg(how)
    for a, b, w in got[["a", "b", "weight"]].itertuples(index=False):
        assert ref[tuple(sorted((a, b)))] == w


def test_event_log_window_matches_pandas(tmp_path, monkeypatch):
    _stop_after_ingest(monkeypatch)
    rng = np.random.default_rng(11)
    n = 3000
    names = np.array([f"p{i}" for i in range(30)])
    ev = pd.DataFrame({
        "caller": names[rng.integers(0, 30, n)],
        "callee": names[rng.integers(0, 30, n)],
        "at": pd.Timestamp("2026-03-01") + pd.to_timedelta(rng.integers(0, 90 * 24 * 3600, n), unit="s"),
    })
    ev.to_parquet(tmp_path / "events.parquet")
    since, until = "2026-04-01", "2026-05-01"
    rc, _, err = ingest(tmp_path, tmp_path / "events.parquet", "--source", "caller", "--target", "callee",
                        "--weight", "", "--time", "at", "--since", since, "--until", until)
    assert rc == 0, err
    got = read_edges(tmp_path / "run")
    # reference: plain pandas groupby over the window [since, until)
    w = ev[(ev["at"] >= since) & (ev["at"] < until) & (ev.caller != ev.callee)]
    key = [tuple(sorted(t)) for t in zip(w.caller, w.callee)]
    ref = pd.Series(1.0, index=pd.MultiIndex.from_tuples(key)).groupby(level=[0, 1]).sum()
    mine = got.set_index(["a", "b"]).weight
    pd.testing.assert_series_equal(mine.sort_index(), ref.sort_index(), check_names=False)
    rep = json.loads((tmp_path / "run" / "ingest" / "report.json").read_text())
    assert rep["rows_dropped"]["outside_window"] == int(((ev["at"] < since) | (ev["at"] >= until)).sum())


def test_large_and_fractional_weights_are_exact(tmp_path, monkeypatch):
    _stop_after_ingest(monkeypatch)
    df = pd.DataFrame({"source": ["a", "b", "a", "c"], "target": ["b", "a", "c", "d"],
                       "weight": [1e12, 3e12, 0.125, 2.5]})
    df.to_parquet(tmp_path / "w.parquet")
    assert ingest(tmp_path, tmp_path / "w.parquet")[0] == 0
    got = read_edges(tmp_path / "run").set_index(["a", "b"]).weight
    assert got[("a", "b")] == 4e12
    assert got[("a", "c")] == 0.125
    assert got[("c", "d")] == 2.5


def test_many_partitions_and_buckets(tmp_path, monkeypatch):
    # many read tasks and node-range buckets must give the same store as one of each
    _stop_after_ingest(monkeypatch)
    rng = np.random.default_rng(2)
    n = 20000
    df = pd.DataFrame({"source": rng.integers(0, 700, n), "target": rng.integers(0, 700, n),
                       "weight": rng.integers(1, 9, n)})
    for i in range(4):
        pq.write_table(pa.Table.from_pandas(df.iloc[i * 5000:(i + 1) * 5000]), tmp_path / f"p{i}.parquet",
                       row_group_size=1000)
    from cliquewise.config import Settings
    from cliquewise.pipeline import run_pipeline

    outs = []
    for name, (rpt, rpb) in {"small": (1000, 2000), "big": (10**7, 10**7)}.items():
        s = Settings()
        s.input.edges = str(tmp_path / "p*.parquet")
        s.input.rows_per_task, s.input.rows_per_bucket = rpt, rpb
        s.run_dir = str(tmp_path / name)
        run_pipeline(s, progress=False)
        outs.append(read_edges(tmp_path / name))
    assert len(list((tmp_path / "small" / "ingest" / "edges").glob("*.parquet"))) > 1
    pd.testing.assert_frame_equal(outs[0], outs[1])


@pytest.mark.parametrize("labels", ["int", "str"])
@pytest.mark.parametrize("weighted", [True, False])
def test_scratch_files_and_memory_give_the_same_store(tmp_path, monkeypatch, labels, weighted):
    # rows_in_memory=0 sends the mapped rows through scratch files; the default keeps
    # them in memory. Both must equal pandas groupby on the ordered pairs (reference:
    # pandas), with integer labels (dense-range ids) and text labels (label table).
    _stop_after_ingest(monkeypatch)
    rng = np.random.default_rng(8)
    n = 30000
    src, dst = rng.integers(0, 900, n), rng.integers(0, 900, n)
    df = pd.DataFrame({"source": src, "target": dst, "weight": rng.integers(1, 9, n).astype(float)})
    if labels == "str":
        df["source"] = "p" + df.source.astype(str)
        df["target"] = "p" + df.target.astype(str)
    if not weighted:
        df = df.drop(columns="weight")
    for i in range(3):
        pq.write_table(pa.Table.from_pandas(df.iloc[i * 10000:(i + 1) * 10000]), tmp_path / f"p{i}.parquet",
                       row_group_size=2500)
    from cliquewise.config import Settings
    from cliquewise.pipeline import run_pipeline

    outs = {}
    for name, rows_in_memory in {"files": 0, "memory": 10**7}.items():
        s = Settings()
        s.input.edges = str(tmp_path / "p*.parquet")
        s.input.weight = "weight" if weighted else ""
        s.input.rows_per_task, s.input.rows_per_bucket, s.input.rows_in_memory = 5000, 4000, rows_in_memory
        s.run_dir = str(tmp_path / name)
        run_pipeline(s, progress=False)
        outs[name] = read_edges(tmp_path / name)
    pd.testing.assert_frame_equal(outs["files"], outs["memory"])
    ref = df[df.source != df.target].copy()
    a, b = ref.source.to_numpy(), ref.target.to_numpy()
    ref["a"], ref["b"] = np.where(a < b, a, b), np.where(a < b, b, a)
    if not weighted:
        ref["weight"] = 1.0
    want = ref.groupby(["a", "b"]).weight.sum().reset_index()
    got = outs["memory"][["a", "b", "weight"]].sort_values(["a", "b"]).reset_index(drop=True)
    np.testing.assert_array_equal(got.a.to_numpy(), want.a.to_numpy())
    np.testing.assert_array_equal(got.b.to_numpy(), want.b.to_numpy())
    np.testing.assert_array_equal(got.weight.to_numpy(), want.weight.to_numpy())
