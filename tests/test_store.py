"""The run store: skipping, invalidation, corruption detection, crash and resume."""

from __future__ import annotations

import json
import os
import subprocess
import sys
from pathlib import Path

import numpy as np
import pandas as pd
import pytest

from _support import lesmis_export, read_edges

from cliquewise.config import Settings
from cliquewise.pipeline import run_pipeline
from cliquewise.store import RunStore, StoreError, save_npy, load_npy


@pytest.fixture
def two_stages(monkeypatch):
    from cliquewise import pipeline

    monkeypatch.setattr(pipeline, "STAGES", ["ingest", "split"])


def _settings(tmp_path, **input_kw) -> Settings:
    df = lesmis_export(seed=1)
    path = tmp_path / "export.parquet"
    if not path.exists():
        df.to_parquet(path)
    s = Settings()
    s.input.edges = str(path)
    s.run_dir = str(tmp_path / "run")
    for k, v in input_kw.items():
        setattr(s.input, k, v)
    return s


def test_resume_skips_completed_stages(tmp_path, two_stages):
    s = _settings(tmp_path)
    first = run_pipeline(s, progress=False)
    assert not first["ingest"].skipped and not first["split"].skipped
    again = run_pipeline(s, progress=False)
    assert again["ingest"].skipped and again["split"].skipped
    assert again["ingest"].manifest["identity"] == first["ingest"].manifest["identity"]


def test_parameter_change_reruns_that_stage_and_downstream(tmp_path, two_stages):
    s = _settings(tmp_path)
    run_pipeline(s, progress=False)
    s.input.merge = "max"
    res = run_pipeline(s, progress=False)
    assert not res["ingest"].skipped and not res["split"].skipped
    assert "changed" in res["ingest"].reason


def test_same_output_upstream_keeps_downstream(tmp_path, two_stages):
    # rows_per_task changes how ingest works, not what it writes: split stays valid
    s = _settings(tmp_path)
    run_pipeline(s, progress=False)
    s.input.rows_per_task = 100
    res = run_pipeline(s, progress=False)
    assert not res["ingest"].skipped
    assert res["split"].skipped


def test_truncated_parquet_is_detected_and_recomputed(tmp_path, two_stages):
    s = _settings(tmp_path)
    run_pipeline(s, progress=False)
    part = next((Path(s.run_dir) / "ingest" / "edges").glob("*.parquet"))
    good = read_edges(s.run_dir)
    data = part.read_bytes()
    part.write_bytes(data[: len(data) // 2])
    store = RunStore(s.run_dir)
    ok, why = store.verify("ingest")
    assert not ok and "truncated" in why
    res = run_pipeline(s, progress=False)
    assert not res["ingest"].skipped
    pd.testing.assert_frame_equal(read_edges(s.run_dir), good)


def test_altered_output_same_size_is_detected(tmp_path, two_stages):
    s = _settings(tmp_path)
    run_pipeline(s, progress=False)
    part = Path(s.run_dir) / "split" / "nodes.parquet"
    data = bytearray(part.read_bytes())
    data[len(data) // 2] ^= 0xFF
    part.write_bytes(bytes(data))
    ok, why = RunStore(s.run_dir).verify("split")
    assert not ok and "checksum" in why


def test_edited_manifest_is_detected(tmp_path, two_stages):
    s = _settings(tmp_path)
    run_pipeline(s, progress=False)
    man = Path(s.run_dir) / "ingest" / "manifest.json"
    data = json.loads(man.read_text())
    data["params"]["merge"] = "max"  # pretend it was run with other parameters
    man.write_text(json.dumps(data))
    ok, why = RunStore(s.run_dir).verify("ingest")
    assert not ok and "edited" in why


def test_half_written_stage_folder_is_not_used(tmp_path, two_stages):
    s = _settings(tmp_path)
    run_pipeline(s, progress=False)
    (Path(s.run_dir) / "split" / "manifest.json").unlink()
    ok, why = RunStore(s.run_dir).verify("split")
    assert not ok and "half-written" in why
    res = run_pipeline(s, progress=False)
    assert res["ingest"].skipped and not res["split"].skipped


def test_npy_never_pickles(tmp_path):
    with pytest.raises(TypeError):
        save_npy(tmp_path / "x.npy", np.array([{"a": 1}], dtype=object))
    np.save(tmp_path / "evil.npy", np.array([{"a": 1}], dtype=object), allow_pickle=True)
    with pytest.raises(ValueError):
        load_npy(tmp_path / "evil.npy")


def test_unwritable_run_dir_is_a_clear_error(tmp_path):
    ro = tmp_path / "ro"
    ro.mkdir()
    os.chmod(ro, 0o500)
    try:
        if os.access(ro, os.W_OK):  # running as root: permissions do not bind
            pytest.skip("permissions are not enforced for this user")
        with pytest.raises(StoreError, match="not writable|cannot create"):
            RunStore(ro / "run")
    finally:
        os.chmod(ro, 0o700)


def _cli(args, env_extra=None, cwd=None):
    env = dict(os.environ)
    env.update(env_extra or {})
    return subprocess.run([sys.executable, "-m", "cliquewise.cli", "--quiet", *map(str, args)],
                          capture_output=True, text=True, env=env, cwd=cwd, timeout=300)


@pytest.mark.parametrize("point", ["unit:map-t00001", "unit:agg-00001", "before-manifest:ingest"])
def test_kill9_during_ingest_then_resume_is_identical(tmp_path, point):
    rng = np.random.default_rng(4)
    n = 60_000
    df = pd.DataFrame({"source": rng.integers(0, 3000, n), "target": rng.integers(0, 3000, n),
                       "weight": rng.integers(1, 6, n)})
    for i in range(3):
        df.iloc[i * 20000:(i + 1) * 20000].to_parquet(tmp_path / f"p{i}.parquet")
    pipe = tmp_path / "p.toml"
    pipe.write_text('[input]\nedges = "p*.parquet"\nrows_per_task = 20000\nrows_per_bucket = 20000\n')
    ref = _cli(["run", pipe, "--run-dir", tmp_path / "ref"])
    assert ref.returncode == 0, ref.stderr
    crashed = _cli(["run", pipe, "--run-dir", tmp_path / "crash"], {"CLIQUEWISE_FAULT": point})
    assert crashed.returncode == -9, (crashed.returncode, crashed.stderr)
    assert RunStore(tmp_path / "crash").manifest("ingest") is None
    resumed = _cli(["resume", tmp_path / "crash"])
    assert resumed.returncode == 0, resumed.stderr
    pd.testing.assert_frame_equal(read_edges(tmp_path / "crash"), read_edges(tmp_path / "ref"))
    for name in ("cliques.parquet", "members.parquet", "nodes.parquet"):
        a = pd.read_parquet(tmp_path / "crash" / "results" / name)
        b = pd.read_parquet(tmp_path / "ref" / "results" / name)
        pd.testing.assert_frame_equal(a, b)
