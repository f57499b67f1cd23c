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
    assert "2 self_loop" in msg


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
