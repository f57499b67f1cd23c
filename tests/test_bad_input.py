"""Bad exports: each gives one clear line, a non-zero exit and nothing marked complete,
or a documented handling that the ingest report counts."""

from __future__ import annotations

import json
from pathlib import Path

import numpy as np
import pandas as pd
import pyarrow as pa
import pyarrow.parquet as pq
import pytest

from _support import read_edges, run_cli

from cliquewise.store import RunStore


@pytest.fixture(autouse=True)
def ingest_only(monkeypatch):
    from cliquewise import pipeline

    monkeypatch.setattr(pipeline, "STAGES", ["ingest"])


def fails(tmp_path, *args, edges=None):
    rc, out, err = run_cli("run", "--edges", edges, "--run-dir", tmp_path / "run", *args)
    assert rc == 2, (rc, err)
    lines = [ln for ln in err.splitlines() if ln.strip() and not ln.startswith("run directory")]
    assert len(lines) == 1 and lines[0].startswith("cliquewise: error: "), err
    assert "Traceback" not in err
    if (tmp_path / "run").exists():
        assert RunStore(tmp_path / "run").manifest("ingest") is None
    return lines[0]


def ok(tmp_path, *args, edges=None):
    rc, out, err = run_cli("run", "--edges", edges, "--run-dir", tmp_path / "run", *args)
    assert rc == 0, err
    return json.loads((tmp_path / "run" / "ingest" / "report.json").read_text())


def frame(**cols):
    return pd.DataFrame(cols)


def test_missing_column_names_what_was_found(tmp_path):
    frame(src=["a"], dst=["b"], weight=[1]).to_parquet(tmp_path / "x.parquet")
    msg = fails(tmp_path, edges=tmp_path / "x.parquet")
    assert "x.parquet" in msg and "'source'" in msg and "'src'" in msg and "'dst'" in msg


def test_misspelt_column_option(tmp_path):
    frame(source=["a"], target=["b"], weight=[1]).to_csv(tmp_path / "x.csv", index=False)
    msg = fails(tmp_path, "--weight", "wieght", edges=tmp_path / "x.csv")
    assert "'wieght'" in msg and "'weight'" in msg


@pytest.mark.parametrize("bad, word", [(np.nan, "NaN"), (np.inf, "infinite"), (-2.0, "negative")])
def test_invalid_numeric_weight(tmp_path, bad, word):
    frame(source=["a", "b", "c"], target=["b", "c", "a"], weight=[1.0, bad, 2.0]).to_parquet(tmp_path / "x.parquet")
    msg = fails(tmp_path, edges=tmp_path / "x.parquet")
    assert "1 invalid weight" in msg and word in msg and "'b' -> 'c'" in msg and "--on-invalid drop" in msg
    rep = ok(tmp_path, "--on-invalid", "drop", edges=tmp_path / "x.parquet")
    assert rep["rows_dropped"]["invalid_weight"] == 1 and rep["pairs"] == 2


def test_non_numeric_weights_in_csv(tmp_path):
    (tmp_path / "x.csv").write_text("source,target,weight\na,b,3\nb,c,lots\nc,d,2.5\nd,e,\n")
    msg = fails(tmp_path, edges=tmp_path / "x.csv")
    assert "2 invalid weights" in msg and "1 non-numeric" in msg and "1 NaN or missing" in msg and "'lots'" in msg
    rep = ok(tmp_path, "--on-invalid", "drop", edges=tmp_path / "x.csv")
    assert rep["invalid_weight_detail"]["non_numeric_weight"] == 1 and rep["pairs"] == 2
    assert rep["invalid_weight_detail"]["nan_weight"] == 1


def test_string_weight_column_in_parquet(tmp_path):
    frame(source=["a", "b"], target=["b", "c"], weight=["1", "x"]).to_parquet(tmp_path / "x.parquet")
    msg = fails(tmp_path, edges=tmp_path / "x.parquet")
    assert "1 invalid weight" in msg


def test_empty_input(tmp_path):
    (tmp_path / "x.csv").write_text("source,target,weight\n")
    msg = fails(tmp_path, edges=tmp_path / "x.csv")
    assert "no usable interaction" in msg and "0 rows" in msg


def test_only_self_loops(tmp_path):
    frame(source=["a", "b"], target=["a", "b"], weight=[1, 2]).to_parquet(tmp_path / "x.parquet")
    msg = fails(tmp_path, edges=tmp_path / "x.parquet")
    assert "2 self-loops ('source' = 'target')" in msg


def test_glob_matching_nothing(tmp_path):
    msg = fails(tmp_path, edges=tmp_path / "nothing-*.parquet")
    assert "matches no file" in msg


def test_missing_path(tmp_path):
    msg = fails(tmp_path, edges=tmp_path / "absent.parquet")
    assert "no such file" in msg


def test_corrupt_parquet_among_many(tmp_path):
    for i in range(3):
        frame(source=["a", "b"], target=["b", "c"], weight=[1, 2]).to_parquet(tmp_path / f"p{i}.parquet")
    data = (tmp_path / "p1.parquet").read_bytes()
    (tmp_path / "p1.parquet").write_bytes(data[: len(data) // 2])
    msg = fails(tmp_path, edges=tmp_path / "p*.parquet")
    assert "p1.parquet" in msg and "Parquet" in msg


def test_partitions_with_different_schemas(tmp_path):
    frame(source=["a"], target=["b"], weight=[1]).to_parquet(tmp_path / "p0.parquet")
    frame(source=["b"], other=["c"], weight=[1]).to_parquet(tmp_path / "p1.parquet")
    msg = fails(tmp_path, edges=tmp_path / "p*.parquet")
    assert "p1.parquet" in msg and "'target'" in msg


def test_weight_types_differ_across_files(tmp_path):
    # int64 weights in one file, float64 in another: both are numbers, accepted
    frame(source=["a"], target=["b"], weight=[1]).to_parquet(tmp_path / "p0.parquet")
    frame(source=["a"], target=["b"], weight=[0.5]).to_parquet(tmp_path / "p1.parquet")
    rep = ok(tmp_path, edges=tmp_path / "p*.parquet")
    assert rep["weight_total"] == 1.5


def test_labels_mixing_integers_and_text_across_files(tmp_path):
    # documented handling: labels become text when any file has text labels
    frame(source=[1, 2], target=[2, 3], weight=[1, 1]).to_parquet(tmp_path / "p0.parquet")
    frame(source=["3", "x"], target=["1", "1"], weight=[1, 1]).to_parquet(tmp_path / "p1.parquet")
    rep = ok(tmp_path, edges=tmp_path / "p*.parquet")
    assert rep["label_kind"] == "str" and rep["labels_mixed_int_and_text"]
    got = read_edges(tmp_path / "run").set_index(["a", "b"]).weight
    assert got[("1", "3")] == 1 and got[("1", "2")] == 1 and got[("1", "x")] == 1


def test_awkward_labels_round_trip(tmp_path):
    labels = ['Smith, Jo', 'say "hi"', "line\nbreak", "Zoë 🐟", "  spaced  ", "日本"]
    src = labels
    dst = labels[1:] + labels[:1]
    df = frame(source=src, target=dst, weight=[1, 2, 3, 4, 5, 6])
    df.to_csv(tmp_path / "x.csv", index=False)
    df.to_parquet(tmp_path / "x.parquet")
    for name in ("x.csv", "x.parquet"):
        rc, _, err = run_cli("run", "--edges", tmp_path / name, "--run-dir", tmp_path / name.replace(".", "_"))
        assert rc == 0, err
        got = read_edges(tmp_path / name.replace(".", "_"))
        assert sorted(set(got.a) | set(got.b)) == sorted(labels)
        pairs = {tuple(sorted(p)): w for p, w in zip(zip(src, dst), df.weight)}
        for a, b, w in got[["a", "b", "weight"]].itertuples(index=False):
            assert pairs[tuple(sorted((a, b)))] == w


def test_null_labels_are_counted(tmp_path):
    t = pa.table({"source": pa.array(["a", None, "b"]), "target": pa.array(["b", "c", "c"]),
                  "weight": pa.array([1, 1, 1])})
    pq.write_table(t, tmp_path / "x.parquet")
    rep = ok(tmp_path, edges=tmp_path / "x.parquet")
    assert rep["rows_dropped"]["null_label"] == 1 and rep["rows_read"] == 3


def test_window_without_time_column(tmp_path):
    frame(source=["a"], target=["b"], weight=[1]).to_parquet(tmp_path / "x.parquet")
    msg = fails(tmp_path, "--since", "2026-01-01", edges=tmp_path / "x.parquet")
    assert "--time" in msg


def test_bad_pipeline_file(tmp_path):
    (tmp_path / "p.toml").write_text("[input]\nedgez = 'x'\n")
    rc, _, err = run_cli("run", tmp_path / "p.toml", "--run-dir", tmp_path / "run")
    assert rc == 2 and "unknown setting 'input.edgez'" in err
    (tmp_path / "q.toml").write_text("[input\n")
    rc, _, err = run_cli("run", tmp_path / "q.toml", "--run-dir", tmp_path / "run")
    assert rc == 2 and "not valid TOML" in err


# --------------------------------------------------------------------------------------
# more cases: every failure names the file, the column where one applies, and a row count


@pytest.mark.parametrize("kind", ["zero-byte csv", "header-only csv", "empty parquet", "header-only tsv"])
def test_empty_inputs_of_every_kind(tmp_path, kind):
    if kind == "zero-byte csv":
        path = tmp_path / "x.csv"
        path.write_bytes(b"")
    elif kind == "header-only csv":
        path = tmp_path / "x.csv"
        path.write_text("source,target,weight\n")
    elif kind == "header-only tsv":
        path = tmp_path / "x.tsv"
        path.write_text("source\ttarget\tweight\n")
    else:
        path = tmp_path / "x.parquet"
        frame(source=pd.Series([], dtype=str), target=pd.Series([], dtype=str),
              weight=pd.Series([], dtype=float)).to_parquet(path)
    msg = fails(tmp_path, edges=path)
    assert path.name in msg and "0 rows" in msg and "the input is empty" in msg


def test_empty_files_among_good_ones_are_counted_as_nothing(tmp_path):
    frame(source=["a"], target=["b"], weight=[2]).to_parquet(tmp_path / "p0.parquet")
    frame(source=pd.Series([], dtype=str), target=pd.Series([], dtype=str),
          weight=pd.Series([], dtype=float)).to_parquet(tmp_path / "p1.parquet")
    rep = ok(tmp_path, edges=tmp_path / "p*.parquet")
    assert rep["files"] == 2 and rep["rows_read"] == 1 and rep["pairs"] == 1


def test_corrupt_pages_in_one_parquet_file_among_many(tmp_path):
    # the footer is intact (the file opens), a data page is garbage
    for i in range(3):
        frame(source=["a", "b"] * 50, target=["b", "c"] * 50,
              weight=list(range(1, 101))).to_parquet(tmp_path / f"p{i}.parquet", compression=None)
    data = bytearray((tmp_path / "p1.parquet").read_bytes())
    data[40:400] = b"\xab" * 360
    (tmp_path / "p1.parquet").write_bytes(bytes(data))
    msg = fails(tmp_path, edges=tmp_path / "p*.parquet")
    assert "p1.parquet" in msg and "corrupt" in msg and "p0.parquet" not in msg


def test_a_file_that_is_not_parquet_at_all(tmp_path):
    frame(source=["a"], target=["b"], weight=[1]).to_parquet(tmp_path / "p0.parquet")
    (tmp_path / "p1.parquet").write_bytes(np.random.default_rng(0).bytes(500))
    msg = fails(tmp_path, edges=tmp_path / "p*.parquet")
    assert "p1.parquet" in msg and "not a readable Parquet file" in msg


@pytest.mark.parametrize("text, problem", [('source,target,weight\na,b,1\n"c,d,2\n', "malformed"),
                                           ("source,target,weight\na,b,1\nc,d\n", "columns")])
def test_malformed_csv(tmp_path, text, problem):
    (tmp_path / "x.csv").write_text(text)
    msg = fails(tmp_path, edges=tmp_path / "x.csv")
    assert "x.csv" in msg and "CSV" in msg


def test_weight_types_mixed_across_files(tmp_path):
    # documented: numbers written as text are numbers; text that is not a number is an
    # invalid weight, reported with the file that holds it
    frame(source=["a", "b"], target=["b", "c"], weight=[1, 2]).to_parquet(tmp_path / "p0.parquet")
    frame(source=["a", "c"], target=["b", "d"], weight=["2.5", "4"]).to_parquet(tmp_path / "p1.parquet")
    rep = ok(tmp_path, edges=tmp_path / "p*.parquet")
    got = read_edges(tmp_path / "run").set_index(["a", "b"]).weight
    assert got[("a", "b")] == 3.5 and got[("c", "d")] == 4 and rep["weight_total"] == 9.5
    frame(source=["d", "e"], target=["e", "f"], weight=["7", "seven"]).to_parquet(tmp_path / "p2.parquet")
    msg = fails(tmp_path, edges=tmp_path / "p*.parquet")
    assert "p2.parquet" in msg and "'weight'" in msg and "1 invalid weight" in msg and "'seven'" in msg


def test_boolean_weights_count_one_and_zero(tmp_path):
    # documented: true counts 1, false is a zero weight (dropped and counted)
    frame(source=["a", "b", "c"], target=["b", "c", "a"], weight=[True, False, True]).to_parquet(tmp_path / "x.parquet")
    rep = ok(tmp_path, edges=tmp_path / "x.parquet")
    assert rep["rows_dropped"]["zero_weight"] == 1 and rep["pairs"] == 2 and rep["weight_total"] == 2


@pytest.mark.parametrize("column, values, what", [
    ("source", pa.array([[1], [2], [3]]), "labels"),
    ("target", pa.array([{"x": 1}, {"x": 2}, {"x": 3}]), "labels"),
    ("weight", pa.array([[1], [2], [3]]), "weights"),
    ("weight", pa.array([1, 2, 3], pa.timestamp("s")), "weights"),
])
def test_a_column_of_an_unusable_type_in_one_partition(tmp_path, column, values, what):
    frame(source=["a"], target=["b"], weight=[1]).to_parquet(tmp_path / "p0.parquet")
    cols = {"source": pa.array(["a", "b", "c"]), "target": pa.array(["b", "c", "d"]), "weight": pa.array([1, 1, 1])}
    cols[column] = values
    pq.write_table(pa.table(cols), tmp_path / "p1.parquet")
    msg = fails(tmp_path, edges=tmp_path / "p*.parquet")
    assert "p1.parquet" in msg and f"column {column!r}" in msg and what in msg and "(3 rows)" in msg


def test_missing_column_names_rows_affected(tmp_path):
    frame(source=["a"], target=["b"], weight=[1]).to_parquet(tmp_path / "p0.parquet")
    frame(source=["b", "c"], dst=["c", "d"], weight=[1, 2]).to_parquet(tmp_path / "p1.parquet")
    msg = fails(tmp_path, edges=tmp_path / "p*.parquet")
    assert "p1.parquet" in msg and "missing column 'target' (2 rows)" in msg


@pytest.mark.parametrize("weights, word", [([0, 0], "with 'weight' = 0")])
def test_only_zero_weights(tmp_path, weights, word):
    frame(source=["a", "b"], target=["b", "c"], weight=weights).to_parquet(tmp_path / "x.parquet")
    msg = fails(tmp_path, edges=tmp_path / "x.parquet")
    assert "x.parquet" in msg and f"2 {word}" in msg


def test_only_missing_labels(tmp_path):
    t = pa.table({"source": pa.array([None, None], pa.string()), "target": pa.array(["b", "c"]),
                  "weight": pa.array([1, 1])})
    pq.write_table(t, tmp_path / "x.parquet")
    msg = fails(tmp_path, edges=tmp_path / "x.parquet")
    assert "x.parquet" in msg and "2 with a missing 'source' or 'target'" in msg


def test_sums_that_overflow_float64_are_refused(tmp_path):
    frame(source=["a", "b", "a"], target=["b", "a", "c"], weight=[1e308, 1e308, 1.0]).to_parquet(tmp_path / "x.parquet")
    msg = fails(tmp_path, edges=tmp_path / "x.parquet")
    assert "x.parquet" in msg and "'weight'" in msg and "overflows float64 for 1 pair" in msg
    rep = ok(tmp_path, "--merge", "max", edges=tmp_path / "x.parquet")  # the way out the message names
    assert rep["weight_max"] == 1e308


def test_integer_weights_float64_would_round_are_refused(tmp_path):
    big = 2**53 + 1  # float64(2**53 + 1) == 2**53: it would be rounded silently
    pq.write_table(pa.table({"source": ["a", "b"], "target": ["b", "c"], "weight": pa.array([big, 3], pa.int64())}),
                   tmp_path / "x.parquet")
    msg = fails(tmp_path, edges=tmp_path / "x.parquet")
    assert "x.parquet" in msg and "'weight'" in msg and "1 integer weight above 2**53" in msg
    pq.write_table(pa.table({"source": ["a", "b"], "target": ["b", "c"], "weight": pa.array([2**53, 3], pa.int64())}),
                   tmp_path / "x.parquet")
    rep = ok(tmp_path, edges=tmp_path / "x.parquet")  # 2**53 itself is exact
    assert rep["weight_max"] == 2**53


def test_large_and_fractional_weights_through_the_whole_run(tmp_path, monkeypatch):
    # no overflow, no rounding: the edge store, the weight levels and the fitted total
    # keep 1e12-sized and fractional weights exactly
    from cliquewise import pipeline

    monkeypatch.setattr(pipeline, "STAGES", ["ingest", "split", "enumerate", "fit", "results"])
    w = {("a", "b"): 1e12, ("b", "c"): 1e12 + 0.5, ("a", "c"): 3e12, ("c", "d"): 0.125, ("d", "e"): 2.75,
         ("e", "c"): 0.375}
    rows = []
    for (s, t), x in w.items():  # each pair split into two rows, one reversed
        rows += [(s, t, x / 2), (t, s, x / 2)]
    pd.DataFrame(rows, columns=["source", "target", "weight"]).to_parquet(tmp_path / "x.parquet")
    rc, _, err = run_cli("run", "--edges", tmp_path / "x.parquet", "--run-dir", tmp_path / "run")
    assert rc == 0, err
    got = read_edges(tmp_path / "run")
    assert {tuple(sorted((a, b))): x for a, b, x in got[["a", "b", "weight"]].itertuples(index=False)} == \
        {tuple(sorted(k)): x for k, x in w.items()}
    levels = np.load(tmp_path / "run" / "enumerate" / "levels.npy", allow_pickle=False)
    assert sorted(levels.tolist()) == sorted(set(w.values()))
    summary = json.loads((tmp_path / "run" / "results" / "summary.json").read_text())
    assert summary["weight_total"] == sum(w.values())
    # at a fixed point of the EM the fitted total equals the observed total
    # (common practice, no source: the Poisson score equation for the rates)
    assert summary["fitted_total"] == pytest.approx(sum(w.values()), rel=1e-9)
    assert np.isfinite(pd.read_parquet(tmp_path / "run" / "results" / "cliques.parquet").expected_weight).all()


def test_awkward_labels_round_trip_through_the_results(tmp_path, monkeypatch):
    from cliquewise import open_run, pipeline

    monkeypatch.setattr(pipeline, "STAGES", ["ingest", "split", "enumerate", "fit", "results"])
    labels = ['Smith, Jo', 'say "hi"', "line\nbreak", "Zoë 🐟", "  spaced  ", "日本", "tab\there", "'single'"]
    rows = [(a, b, 3) for i, a in enumerate(labels) for b in labels[i + 1:i + 3]]
    df = frame(source=[r[0] for r in rows], target=[r[1] for r in rows], weight=[r[2] for r in rows])
    df.to_csv(tmp_path / "x.csv", index=False)
    rc, _, err = run_cli("run", "--edges", tmp_path / "x.csv", "--run-dir", tmp_path / "run")
    assert rc == 0, err
    run = open_run(tmp_path / "run")
    assert sorted(run.nodes().label) == sorted(labels)
    mem = run.members()
    groups = {frozenset(g.label) for _, g in mem.groupby("clique_id")}
    assert all(set(g) <= set(labels) for g in groups)
    for a, b, _ in rows:  # every input pair lies in some group, under its own labels
        assert any({a, b} <= g for g in groups)
        assert run.rate([(a, b)])[0] > 0
    assert len(run.groups_of("line\nbreak")) >= 1
