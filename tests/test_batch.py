"""``cliquewise batch``: one resumable run per network, and the covariates table.

Outside references:
* the data are networks networkx ships: Knuth's Les Miserables co-appearances,
  Zachary's karate club (with its weights) and the Davis, Gardner and Gardner
  Southern Women attendance graph projected onto the women (co-attendance counts,
  ``networkx.algorithms.bipartite.weighted_projected_graph``);
* ``nodes``, ``edges`` and ``weight_total`` are checked against a pandas groupby of
  the input rows;
* every covariate of a network is checked against the same computation on a
  single-network run of that network's rows alone (``cliquewise.decompose``), so
  the split, the per-network runs and the parallel engine must not change a number.
"""

from __future__ import annotations

import json
import os
import shutil
import subprocess
import sys
from pathlib import Path

import networkx as nx
import numpy as np
import pandas as pd
import pytest
from networkx.algorithms import bipartite

from _support import graph_frame, lesmis_export

import cliquewise
from cliquewise.analysis.covariates import COLUMNS, network_covariates
from cliquewise.batch import BatchSettings, load_batch_file, run_batch
from cliquewise.config import Settings

ROOT = Path(__file__).resolve().parents[1]


def _davis() -> pd.DataFrame:
    B = nx.davis_southern_women_graph()
    return graph_frame(bipartite.weighted_projected_graph(B, B.graph["top"]))


def _karate() -> pd.DataFrame:
    df = graph_frame(nx.karate_club_graph())
    df["source"] = "member-" + df.source.astype(str)
    df["target"] = "member-" + df.target.astype(str)
    return df


NETWORKS = {"les misérables": lambda: lesmis_export(seed=5), "karate/club": _karate, "davis": _davis}


def _export() -> pd.DataFrame:
    """The three networks in one table with a ``network`` column, rows shuffled."""
    parts = []
    for name, make in NETWORKS.items():
        df = make()
        df["network"] = name
        parts.append(df)
    df = pd.concat(parts, ignore_index=True)
    df["weight"] = df.weight.astype("int64")
    return df.sample(frac=1.0, random_state=0).reset_index(drop=True)


def _pandas_counts(df: pd.DataFrame) -> pd.DataFrame:
    """nodes, edges and total weight per network, by pandas alone (the reference)."""
    lo = np.minimum(df.source.to_numpy(), df.target.to_numpy())
    hi = np.maximum(df.source.to_numpy(), df.target.to_numpy())
    pairs = pd.DataFrame({"network": df.network, "lo": lo, "hi": hi, "weight": df.weight})
    pairs = pairs[pairs.lo != pairs.hi]
    per = pairs.groupby(["network", "lo", "hi"]).weight.sum().reset_index()
    per = per[per.weight > 0]
    people = pd.concat([df[["network", "source"]].set_axis(["network", "label"], axis=1),
                        df[["network", "target"]].set_axis(["network", "label"], axis=1)])
    return pd.DataFrame({"nodes": people.groupby("network").label.nunique(),
                         "edges": per.groupby("network").size(),
                         "weight_total": per.groupby("network").weight.sum().astype(float)})


def _batch(tmp: Path, **kw) -> tuple[Settings, BatchSettings]:
    s = Settings()
    b = BatchSettings(dir=str(tmp / "batch"), **kw)
    return s, b


def _assert_row_equal(got: dict, want: dict) -> None:
    for c in COLUMNS:
        if isinstance(want[c], float):
            assert got[c] == pytest.approx(want[c], rel=1e-9, abs=1e-12, nan_ok=True), c
        else:
            assert got[c] == want[c], c


@pytest.fixture(scope="module")
def column_batch(tmp_path_factory):
    """The three networks as two Parquet files with a network column, run in parallel."""
    tmp = tmp_path_factory.mktemp("colbatch")
    df = _export()
    (tmp / "export").mkdir()
    half = len(df) // 2  # every network spans both files
    df.iloc[:half].to_parquet(tmp / "export" / "a.parquet", index=False)
    df.iloc[half:].to_parquet(tmp / "export" / "b.parquet", index=False)
    s, b = _batch(tmp, parallel=2, threads_per_network=1)
    s.input.edges = str(tmp / "export")
    out = run_batch(s, b, progress=False)
    return tmp, df, out


def test_one_row_per_network_with_counts_from_pandas(column_batch):
    tmp, df, out = column_batch
    assert out["failed"] == 0
    cov = pd.read_parquet(out["covariates"])
    assert cov.network.tolist() == sorted(NETWORKS)
    assert cov.columns.tolist() == ["network", "run_dir"] + COLUMNS
    ref = _pandas_counts(df)  # pandas groupby: outside reference
    got = cov.set_index("network")[["nodes", "edges", "weight_total"]]
    pd.testing.assert_frame_equal(got.sort_index(), ref.sort_index(), check_dtype=False, check_names=False)
    # every network is an ordinary run directory
    for rd in cov.run_dir:
        assert (tmp / "batch" / rd / "results" / "manifest.json").is_file()
    assert set(cov.run_dir) == {"runs/les_mis_rables", "runs/karate_club", "runs/davis"}


def test_covariates_equal_single_network_runs(column_batch, tmp_path):
    tmp, df, out = column_batch
    cov = pd.read_parquet(out["covariates"]).set_index("network")
    for name in NETWORKS:
        rows = df[df.network == name].drop(columns="network")
        single = cliquewise.decompose(rows, tmp_path / f"single-{len(rows)}", progress=False)
        want = network_covariates(single.path, heldout_fraction=0.5, seed=0)
        got = cov.loc[name, COLUMNS].to_dict()
        _assert_row_equal({k: (v.item() if hasattr(v, "item") else v) for k, v in got.items()}, want)
        # and the planted sanity facts any decomposition must satisfy
        assert want["groups_kept"] <= want["candidates"]
        assert want["largest_group"] >= 2 and want["memberships_per_node"] > 0


def test_rerun_reuses_everything(column_batch):
    tmp, df, out = column_batch
    s, b = _batch(tmp, parallel=2, threads_per_network=1)
    s.input.edges = str(tmp / "export")
    again = run_batch(s, b, progress=False)
    assert all(st["state"] == "done" and not st["stages_run"] and st["row_reused"] for st in again["networks"])
    pd.testing.assert_frame_equal(pd.read_parquet(again["covariates"]), pd.read_parquet(out["covariates"]))


def _folder_dataset(tmp: Path) -> Path:
    """One dataset per subfolder, CSV files, under ``data/<name>/export/``."""
    root = tmp / "data"
    for name, make in NETWORKS.items():
        d = root / name.replace("/", "-").replace(" ", "-") / "export"
        d.mkdir(parents=True)
        make().to_csv(d / "rows.csv", index=False)
        (d.parent / "notes.txt").write_text("not data")
    return root


def test_folders_resume_recomputes_only_the_deleted_network(tmp_path):
    root = _folder_dataset(tmp_path)
    s, b = _batch(tmp_path, folders=str(root), inside="export", parallel=2, threads_per_network=1)
    first = run_batch(s, b, progress=False)
    assert first["failed"] == 0 and len(first["networks"]) == 3
    before = pd.read_parquet(first["covariates"])
    victim = first["networks"][1]["run_dir"]
    shutil.rmtree(tmp_path / "batch" / victim)
    again = run_batch(s, b, progress=False)
    for st in again["networks"]:
        if st["run_dir"] == victim:
            assert st["stages_run"] == ["ingest", "split", "enumerate", "fit", "results"] and not st["row_reused"]
        else:
            assert st["stages_run"] == [] and st["row_reused"]
    pd.testing.assert_frame_equal(pd.read_parquet(again["covariates"]), before)
    # and `cliquewise resume` works on one network's run directory alone
    from _support import run_cli

    rc, _, err = run_cli("resume", tmp_path / "batch" / victim)
    assert rc == 0, err


def test_killed_batch_redoes_only_unfinished_networks(tmp_path, cli):
    root = _folder_dataset(tmp_path)
    cmd = [sys.executable, "-m", "cliquewise.cli", "--quiet", "batch", "--folders", root, "--inside", "export",
           "--batch-dir", tmp_path / "batch", "--parallel", "1"]
    env = dict(os.environ, CLIQUEWISE_FAULT="batch-network:@2")  # SIGKILL once the 2nd network is complete
    proc = subprocess.run([str(c) for c in cmd], env=env, capture_output=True, text=True, timeout=300)
    assert proc.returncode == -9, proc.stderr
    assert not (tmp_path / "batch" / "covariates.parquet").exists()
    rc, stdout, err = cli("batch", "--batch-dir", tmp_path / "batch")  # resume with the saved request
    assert rc == 0, err
    st = json.loads((tmp_path / "batch" / "status.json").read_text())["networks"]
    # in network order, which is the order they ran in (one at a time)
    assert [x["stages_run"] for x in st] == [[], [], ["ingest", "split", "enumerate", "fit", "results"]]
    assert [x["row_reused"] for x in st] == [True, True, False]
    assert len(pd.read_parquet(stdout.strip())) == 3


def test_one_bad_network_fails_alone(tmp_path, cli):
    root = _folder_dataset(tmp_path)
    bad = root / "broken" / "export"
    bad.mkdir(parents=True)
    pd.DataFrame({"source": ["a", "b"], "target": ["b", "c"], "weight": ["3", "lots"]}).to_csv(bad / "x.csv", index=False)
    rc, stdout, err = cli("batch", "--folders", root, "--inside", "export", "--batch-dir", tmp_path / "b",
                          "--parallel", "2")
    assert rc == 2
    assert "failed" in err and err.strip().splitlines()[-1].startswith("cliquewise: error: 1 of 4 networks failed")
    cov = pd.read_parquet(stdout.strip())
    assert sorted(cov.network) == sorted(n for n in os.listdir(root) if n != "broken")
    status = json.loads((tmp_path / "b" / "status.json").read_text())
    broken = [x for x in status["networks"] if x["network"] == "broken"][0]
    assert broken["state"] == "failed" and "weight" in broken["error"]


def test_missing_network_values_are_refused(tmp_path, cli):
    df = _export()
    df.loc[df.index[:3], "network"] = None
    df.to_parquet(tmp_path / "x.parquet", index=False)
    rc, _, err = cli("batch", "--edges", tmp_path / "x.parquet", "--batch-dir", tmp_path / "b")
    assert rc == 2 and err.count("\n") == 2 and "3 rows have no value in the network column" in err
    rc, _, err = cli("batch", "--edges", tmp_path / "x.parquet", "--batch-dir", tmp_path / "b", "--network", "team")
    assert rc == 2 and "missing column 'team'" in err


def test_demo_batch_file_parses():
    s, b = load_batch_file(ROOT / "pipelines" / "batch-demo.toml")
    assert Path(b.dir).is_absolute() and Path(b.folders).is_absolute() and b.inside == "export"
    b.validate(s)


def test_network_column_in_csv(tmp_path):
    # CSV columns are read as text, so network values come back as text; counts by pandas
    df = _export()
    df = df[df.network != "les misérables"]
    df.to_csv(tmp_path / "rows.csv", index=False)
    s, b = _batch(tmp_path, parallel=2, threads_per_network=1)
    s.input.edges = str(tmp_path / "rows.csv")
    out = run_batch(s, b, progress=False)
    cov = pd.read_parquet(out["covariates"]).set_index("network")
    assert cov.index.tolist() == ["davis", "karate/club"]
    ref = _pandas_counts(df)
    pd.testing.assert_frame_equal(cov[["nodes", "edges", "weight_total"]], ref.sort_index(),
                                  check_dtype=False, check_names=False)
    split = json.loads((tmp_path / "batch" / "inputs" / "split.json").read_text())
    assert split["rows"] == len(df) and split["networks"] == 2
