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
from cliquewise.store import NpyStream, RunStore, StoreError, load_npy, save_npy


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
    with pytest.raises(StoreError, match="pickle"):
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
    env.pop("CLIQUEWISE_FAULT_TRACE", None)
    env.update(env_extra or {})
    return subprocess.run([sys.executable, "-m", "cliquewise.cli", "--quiet", *map(str, args)],
                          capture_output=True, text=True, env=env, cwd=cwd, timeout=300)


# rows_in_memory = 0: mapped rows go through checkpointed scratch files; the
# default keeps them in memory (no map checkpoints, map-counts marks the map done)
@pytest.mark.parametrize("point,in_memory", [("unit:map-t00001", 0), ("unit:agg-00001", 0),
                                             ("unit:map-counts", 1000000), ("unit:agg-00001", 1000000),
                                             ("before-manifest:ingest", 1000000)])
def test_kill9_during_ingest_then_resume_is_identical(tmp_path, point, in_memory):
    rng = np.random.default_rng(4)
    n = 60_000
    df = pd.DataFrame({"source": rng.integers(0, 3000, n), "target": rng.integers(0, 3000, n),
                       "weight": rng.integers(1, 6, n)})
    for i in range(3):
        df.iloc[i * 20000:(i + 1) * 20000].to_parquet(tmp_path / f"p{i}.parquet")
    pipe = tmp_path / "p.toml"
    pipe.write_text('[input]\nedges = "p*.parquet"\nrows_per_task = 20000\nrows_per_bucket = 20000\n'
                    f'rows_in_memory = {in_memory}\n')
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


# --------------------------------------------------------------------------------------
# corrupt run stores, end to end: every case is detected, the stage recomputed (or the
# user told what to do), and the results equal those of the untouched run

import shutil

from _support import run_cli as _run_cli

STAGES_ALL = ["ingest", "split", "enumerate", "fit", "results"]


@pytest.fixture(scope="module")
def finished(tmp_path_factory):
    """One finished run on the Les Miserables export (networkx ships the graph)."""
    root = tmp_path_factory.mktemp("finished")
    lesmis_export(seed=3).to_parquet(root / "export.parquet")
    rc, _, err = _run_cli("run", "--edges", root / "export.parquet", "--run-dir", root / "run")
    assert rc == 0, err
    return root / "run"


def _copy(finished, tmp_path) -> Path:
    dst = tmp_path / "run"
    shutil.copytree(finished, dst)
    return dst


def _results(run_dir) -> dict:
    out = {t: pd.read_parquet(Path(run_dir) / "results" / f"{t}.parquet") for t in ("nodes", "cliques", "members")}
    out["mu"] = np.load(Path(run_dir) / "fit" / "mu.npy", allow_pickle=False)
    return out


def _assert_same(a, b) -> None:
    ra, rb = _results(a), _results(b)
    for t in ("nodes", "cliques", "members"):
        pd.testing.assert_frame_equal(ra[t], rb[t], check_exact=True)
    np.testing.assert_array_equal(ra["mu"], rb["mu"])


def _resume(run_dir) -> dict:
    """Resume through the CLI; return {stage: rerun?} from its per-stage lines."""
    rc, _, err = _run_cli("resume", run_dir)
    assert rc == 0, err
    lines = {ln.split()[0]: "up to date" not in ln for ln in err.splitlines() if ln.startswith("  ")}
    assert set(lines) == set(STAGES_ALL), err
    return lines


def _truncate(p: Path):
    data = p.read_bytes()
    p.write_bytes(data[: len(data) // 2])


def _flip(p: Path):
    data = bytearray(p.read_bytes())
    data[len(data) // 2] ^= 0x01  # same size, one bit changed
    p.write_bytes(bytes(data))


CORRUPTIONS = [
    ("ingest", "edges/part-00000.parquet", _truncate, "truncated"),
    ("split", "nodes.parquet", _flip, "checksum"),
    ("enumerate", "cand_nodes.npy", _truncate, "truncated"),
    ("enumerate", "inc_cand.npy", _flip, "checksum"),
    ("fit", "mu.npy", _flip, "checksum"),
    ("results", "members.parquet", Path.unlink, "missing"),
    ("results", "summary.json", _truncate, "truncated"),
]


@pytest.mark.parametrize("stage, rel, damage, word", CORRUPTIONS, ids=[f"{s}/{r}" for s, r, _, _ in CORRUPTIONS])
def test_damaged_output_is_detected_and_recomputed(finished, tmp_path, stage, rel, damage, word):
    run = _copy(finished, tmp_path)
    damage(run / stage / rel)
    ok, why = RunStore(run).verify(stage)
    assert not ok and word in why
    rows = {r["stage"]: r["state"] for r in json.loads(_run_cli("status", run, "--json")[1])}
    if word != "checksum":  # status checks sizes; resume also checksums
        assert rows[stage] != "complete"
    rerun = _resume(run)
    assert rerun[stage]
    upstream = STAGES_ALL[:STAGES_ALL.index(stage)]
    assert not any(rerun[s] for s in upstream), "stages above the damage are reused"
    _assert_same(run, finished)


def _edit_params(man):
    man["params"]["max_iter"] = 5


def _edit_identity(man):
    man["identity"] = "0" * 32


def _edit_checksum(man):
    first = sorted(man["outputs"])[0]
    man["outputs"][first]["checksum"] = "0" * 32


def _edit_version(man):
    man["version"] = 999


MANIFEST_EDITS = [("fit", _edit_params, "edited"), ("enumerate", _edit_identity, "edited"),
                  ("split", _edit_checksum, "edited"), ("ingest", _edit_version, "format version")]


@pytest.mark.parametrize("stage, edit, word", MANIFEST_EDITS, ids=[e.__name__ for _, e, _ in MANIFEST_EDITS])
def test_edited_manifest_is_detected_and_recomputed(finished, tmp_path, stage, edit, word):
    run = _copy(finished, tmp_path)
    path = run / stage / "manifest.json"
    man = json.loads(path.read_text())
    edit(man)
    path.write_text(json.dumps(man))
    ok, why = RunStore(run).verify(stage)
    assert not ok and word in why
    assert _resume(run)[stage]
    _assert_same(run, finished)


@pytest.mark.parametrize("garbage", [b"", b"{not json", b"[]", b'{"stage": "split"'])
def test_unreadable_manifest_means_half_written(finished, tmp_path, garbage):
    run = _copy(finished, tmp_path)
    (run / "split" / "manifest.json").write_bytes(garbage)
    ok, why = RunStore(run).verify("split")
    assert not ok and "half-written" in why
    # and everything below no longer counts as complete either
    for below in ("enumerate", "fit", "results"):
        assert not RunStore(run).verify(below)[0]
    with pytest.raises(StoreError, match="no complete results"):
        import cliquewise
        cliquewise.open_run(run)
    rerun = _resume(run)
    assert rerun["split"] and not rerun["ingest"]
    _assert_same(run, finished)


def test_stray_work_folders_are_ignored_or_cleaned(finished, tmp_path):
    # a half-written attempt with another key, and a unit marker whose file is damaged
    run = _copy(finished, tmp_path)
    junk = run / ".work" / "enumerate-0123456789abcdef"
    (junk / "units").mkdir(parents=True)
    (junk / "units" / "graph.json").write_text('{"files": {"graph/x.npy": {"bytes": 3, "checksum": "00"}}}')
    (run / "enumerate" / "manifest.json").unlink()
    rerun = _resume(run)
    assert rerun["enumerate"] and not junk.exists()
    _assert_same(run, finished)


def test_damaged_unit_checkpoint_is_redone(tmp_path, monkeypatch):
    # a run killed after an enumeration unit, whose checkpointed files are then damaged
    from _faults import read_trace, resolve

    lesmis_export(seed=3).to_parquet(tmp_path / "export.parquet")
    (tmp_path / "job.toml").write_text('[input]\nedges = "export.parquet"\n[candidates]\nedges_per_unit = 60\n')
    monkeypatch.setenv("CLIQUEWISE_FAULT_TRACE", str(tmp_path / "trace.txt"))
    rc, _, err = _run_cli("run", tmp_path / "job.toml", "--run-dir", tmp_path / "straight")
    assert rc == 0, err
    monkeypatch.delenv("CLIQUEWISE_FAULT_TRACE")
    fault = resolve(read_trace(tmp_path / "trace.txt"), "enumerate", "unit", "mid")
    killed = _cli(["run", tmp_path / "job.toml", "--run-dir", tmp_path / "killed"], {"CLIQUEWISE_FAULT": fault})
    assert killed.returncode == -9, killed.stderr
    work = next((tmp_path / "killed" / ".work").glob("enumerate-*"))
    damaged = 0
    for marker in (work / "units").glob("*.json"):
        for rel in json.loads(marker.read_text())["files"]:
            _truncate(work / rel)
            damaged += 1
    assert damaged, "checkpointed unit files are on disk"
    assert _resume(tmp_path / "killed")["enumerate"]
    _assert_same(tmp_path / "killed", tmp_path / "straight")


def test_changed_levels_rerun_enumerate_and_below_only(finished, tmp_path):
    run = _copy(finished, tmp_path)
    export = json.loads((run / "run.json").read_text())["settings"]["input"]["edges"]
    rc, _, err = _run_cli("run", "--edges", export, "--run-dir", run, "--levels", 3)
    assert rc == 0, err
    assert "ingest     up to date" in err and "split      up to date" in err
    assert "enumerate  up to date" not in err and "fit        up to date" not in err
    rc, _, err = _run_cli("run", "--edges", export, "--run-dir", tmp_path / "fresh", "--levels", 3)
    assert rc == 0, err
    _assert_same(run, tmp_path / "fresh")
    assert _resume(run) == dict.fromkeys(STAGES_ALL, False)  # resume keeps the new parameters


def test_changed_export_is_detected_on_resume(tmp_path):
    df = lesmis_export(seed=3)
    df.to_parquet(tmp_path / "export.parquet")
    rc, _, err = _run_cli("run", "--edges", tmp_path / "export.parquet", "--run-dir", tmp_path / "run")
    assert rc == 0, err
    df.iloc[: len(df) // 2].to_parquet(tmp_path / "export.parquet")  # the export changes in place
    assert all(_resume(tmp_path / "run").values())
    rc, _, err = _run_cli("run", "--edges", tmp_path / "export.parquet", "--run-dir", tmp_path / "fresh")
    assert rc == 0, err
    _assert_same(tmp_path / "run", tmp_path / "fresh")


def test_failed_rerun_leaves_no_stale_results(finished, tmp_path):
    # rerun with an export that fails: the old results must not look current
    run = _copy(finished, tmp_path)
    pd.DataFrame({"source": ["a"], "target": ["a"], "weight": [1]}).to_parquet(tmp_path / "loops.parquet")
    rc, _, err = _run_cli("run", "--edges", tmp_path / "loops.parquet", "--run-dir", run)
    assert rc == 2 and "self-loops" in err
    states = {r["stage"]: r["state"] for r in json.loads(_run_cli("status", run, "--json")[1])}
    assert all(s != "complete" for s in states.values()), states
    import cliquewise

    with pytest.raises(StoreError, match="no complete results"):
        cliquewise.open_run(run)


@pytest.mark.parametrize("content, word", [("{broken", "corrupt"), ('{"settings": {"fit": {"tol": "x"}}}', "invalid"),
                                           ('{"settings": {"input": {"edgez": "x"}}}', "invalid"), (None, "no run.json")])
def test_damaged_run_json_tells_what_to_do(finished, tmp_path, content, word):
    run = _copy(finished, tmp_path)
    if content is None:
        (run / "run.json").unlink()
    else:
        (run / "run.json").write_text(content)
    rc, _, err = _run_cli("resume", run)
    assert rc == 2 and word in err and "cliquewise run" in err
    assert len(err.strip().splitlines()) == 1


def test_a_moved_run_directory_resumes_where_it_is(finished, tmp_path):
    run = _copy(finished, tmp_path)
    (run / "results" / "manifest.json").unlink()
    rerun = _resume(run)
    assert rerun["results"] and (run / "results" / "manifest.json").exists()
    assert (finished / "results" / "manifest.json").exists()  # the original is untouched
    _assert_same(run, finished)


# --------------------------------------------------------------------------------------
# full and read-only disks: a clear line, earlier stages intact, resume finishes


@pytest.mark.parametrize("code, word", [(28, "no space left"), (30, "read-only"), (122, "quota")])
def test_disk_errors_in_a_later_stage(finished, tmp_path, monkeypatch, code, word):
    from cliquewise.parts.vectors import Vectors

    run = _copy(finished, tmp_path)
    for st in ("fit", "results"):
        (run / st / "manifest.json").unlink()
    real = Vectors.gather_to_file

    def failing(self, x, index_path, path):  # the fit writing mu_full.npy / mu.npy
        raise OSError(code, os.strerror(code), str(path))

    monkeypatch.setattr(Vectors, "gather_to_file", failing)
    rc, _, err = _run_cli("resume", run)
    lines = [ln for ln in err.splitlines() if ln.startswith("cliquewise:")]
    assert rc == 2 and len(lines) == 1, err
    assert word in lines[0] and "stage 'fit'" in lines[0] and ".npy" in lines[0] and "cliquewise resume" in lines[0]
    store = RunStore(run)
    assert all(store.verify(s)[0] for s in ("ingest", "split", "enumerate"))
    assert not store.verify("fit")[0] and not store.verify("results")[0]
    monkeypatch.setattr(Vectors, "gather_to_file", real)
    rerun = _resume(run)
    assert rerun["fit"] and not rerun["enumerate"]
    _assert_same(run, finished)


def _can_unshare_mounts() -> bool:
    if not shutil.which("unshare") or os.geteuid() != 0:
        return False
    probe = subprocess.run(["unshare", "-m", "sh", "-c", "mount -t tmpfs -o size=64k tmpfs /mnt"],
                           capture_output=True)
    return probe.returncode == 0


@pytest.mark.skipif(not _can_unshare_mounts(), reason="needs root and mount namespaces for a real tmpfs")
def test_a_really_full_disk(tmp_path):
    # a real tmpfs in a private mount namespace: a finished run loses its last three
    # stages, the disk is filled up to 8 KB, enumerate fails with ENOSPC; then space is
    # freed and resume completes
    lesmis_export(seed=3).to_parquet(tmp_path / "export.parquet")
    py = sys.executable
    script = f"""
set -u
D={tmp_path}/disk
mkdir -p $D && mount -t tmpfs -o size=4m tmpfs $D
CW="{py} -m cliquewise.cli --quiet"
$CW run --edges {tmp_path}/export.parquet --run-dir $D/run > /dev/null 2>&1
rm -rf $D/run/enumerate $D/run/fit $D/run/results
dd if=/dev/zero of=$D/reserve bs=4k count=2 > /dev/null 2>&1
dd if=/dev/zero of=$D/filler bs=4k > /dev/null 2>&1
rm $D/reserve
$CW resume $D/run 2> {tmp_path}/full.err; echo $? > {tmp_path}/full.rc
$CW status $D/run --json > {tmp_path}/full.status
rm $D/filler
$CW resume $D/run 2> {tmp_path}/resume.err; echo $? > {tmp_path}/resume.rc
cp -a $D/run {tmp_path}/kept
"""
    proc = subprocess.run(["unshare", "-m", "sh", "-c", script], capture_output=True, text=True, timeout=300)
    assert proc.returncode == 0, proc.stderr
    err = (tmp_path / "full.err").read_text()
    assert (tmp_path / "full.rc").read_text().strip() == "2", err
    line = [ln for ln in err.splitlines() if ln.startswith("cliquewise:")]
    assert len(line) == 1 and "no space left" in line[0] and "cliquewise resume" in line[0], err
    assert "stage 'enumerate'" in line[0]  # 8 KB were left: run.json fits, the candidates do not
    states = {r["stage"]: r["state"] for r in json.loads((tmp_path / "full.status").read_text())}
    assert states["ingest"] == states["split"] == "complete" and states["enumerate"] != "complete"
    assert (tmp_path / "resume.rc").read_text().strip() == "0", (tmp_path / "resume.err").read_text()
    rc, _, e = _run_cli("run", "--edges", tmp_path / "export.parquet", "--run-dir", tmp_path / "straight")
    assert rc == 0, e
    _assert_same(tmp_path / "kept", tmp_path / "straight")


@pytest.mark.skipif(not _can_unshare_mounts(), reason="needs root and mount namespaces for a read-only bind mount")
def test_a_really_read_only_run_directory(finished, tmp_path):
    run = _copy(finished, tmp_path)
    (run / "results" / "manifest.json").unlink()
    before = {p: p.read_bytes() for p in run.rglob("*") if p.is_file()}
    script = f"""
mount --bind {run} {run} && mount -o remount,bind,ro {run}
{sys.executable} -m cliquewise.cli --quiet resume {run}
"""
    proc = subprocess.run(["unshare", "-m", "sh", "-c", script], capture_output=True, text=True, timeout=120)
    assert proc.returncode == 2, proc.stderr
    assert proc.stderr.count("cliquewise: error:") == 1 and "not writable" in proc.stderr, proc.stderr
    assert {p: p.read_bytes() for p in run.rglob("*") if p.is_file()} == before


def test_save_npy_parts_equals_numpy_concatenate(tmp_path):
    # reference: numpy.concatenate + numpy.load (the .npy format is numpy's own)
    from cliquewise.store import load_npy, save_npy_parts

    rng = np.random.default_rng(3)
    parts = [rng.integers(0, 1000, n) for n in (0, 5, 1, 17, 0, 3)]
    save_npy_parts(tmp_path / "a.npy", iter(parts), np.int32, sum(map(len, parts)))
    got = np.load(tmp_path / "a.npy", allow_pickle=False)
    np.testing.assert_array_equal(got, np.concatenate(parts).astype(np.int32))
    assert got.dtype == np.int32
    np.testing.assert_array_equal(load_npy(tmp_path / "a.npy", mmap=True), got)
    with pytest.raises(ValueError, match="expected"):
        save_npy_parts(tmp_path / "b.npy", iter(parts), np.int64, 99)


@pytest.mark.parametrize("copy", ["os", "fails at once", "fails after one piece", "absent"])
def test_npy_stream_append_file_equals_numpy_concatenate(tmp_path, monkeypatch, copy):
    # reference: numpy's concatenate of the same arrays
    rng = np.random.default_rng(3)
    parts = [rng.integers(-9, 9, n).astype(dt) for n, dt in ((5, np.int64), (0, np.int64), (7, np.int32),
                                                               (3, np.int64), (4, np.int64))]
    files = []
    for i, a in enumerate(parts):
        files.append(tmp_path / f"p{i}.npy")
        np.save(files[-1], a)
    real = getattr(os, "copy_file_range", None)
    calls = []

    def flaky(src, dst, count, offset_src=None):
        calls.append(count)
        if copy == "fails at once" or len(calls) > 1:
            raise OSError(18, "cross-device link")
        return real(src, dst, min(count, 16), offset_src)  # a short copy: the rest must follow

    if copy == "absent":
        monkeypatch.delattr(os, "copy_file_range", raising=False)
    elif copy != "os":
        monkeypatch.setattr(os, "copy_file_range", flaky)
    out = tmp_path / "all.npy"
    total = sum(len(a) for a in parts) + 2
    with NpyStream(out, np.int64, total) as s:
        s.write(np.array([100, 101]))
        for f in files:
            s.append_file(f)
    want = np.concatenate([[100, 101]] + [a.astype(np.int64) for a in parts])
    np.testing.assert_array_equal(np.load(out), want)
    assert np.load(out).dtype == np.int64


@pytest.mark.parametrize("size", [0, 1, 4095, 4096, 10_000, 3 * 4096 + 7])
def test_file_checksum_is_zlibs_crc32_of_the_bytes(tmp_path, size):
    # zlib.crc32 over the whole file in one call as reference (CRC-32 as in zip and
    # gzip); a small chunk drives the loop through several reads and a partial last one
    from zlib import crc32

    from cliquewise.store import file_checksum

    data = np.random.default_rng(size).integers(0, 256, size, dtype=np.uint8).tobytes()
    p = tmp_path / "f.bin"
    p.write_bytes(data)
    want = f"crc32:{crc32(data):08x}"
    assert file_checksum(p) == want
    assert file_checksum(p, chunk=4096) == want
