"""Crash and resume: ``cliquewise run`` killed with SIGKILL anywhere, then ``resume``.

Every case starts a real ``cliquewise run`` subprocess that kills itself with
SIGKILL at one named point (``CLIQUEWISE_FAULT``, see ``store.fault_point``), then
runs ``cliquewise resume`` on the same run directory. The results tables must be
identical, value for value, to those of one uninterrupted run of the same job
(compared with pandas, not by file size), and so must the fitted intensities.

The kill points cover every stage: inside ingest's label scan, map and aggregate
units; inside split; inside enumerate (graph build, while edge-block units run,
between a unit's files and its checkpoint marker, after a unit's checkpoint, after
collecting); inside fit (edge classes, in the middle of an EM step, between EM
checkpoints of both phases, between a checkpoint file and its marker); inside
results; between a stage folder and its manifest; and between stages.

One small simulated export (invented Harbourview data, ``cliquewise.simulate``) and
one reference run are shared by all cases. The job is configured so that every
kind of unit occurs several times: 3 read tasks, 3 buckets, 8 edge blocks, several
fit parts, an EM checkpoint every 2 iterations and a pruned refit.
"""

from __future__ import annotations

import json
import os
import subprocess
import sys
from pathlib import Path

import numpy as np
import pandas as pd
import pytest

from _support import run_cli

from cliquewise.store import RunStore

JOB = """\
[input]
edges = "export/*.parquet"
rows_per_task = 1000
rows_per_bucket = 1000

[candidates]
edges_per_unit = 400

[fit]
checkpoint_every = 2
tol = 1e-10
max_iter = 300
incidences_per_part = 5000
"""

TABLES = ("nodes", "cliques", "members")

# (fault point, stage that must not be complete after the kill)
KILL_POINTS = [
    ("task:scan_labels@2", "ingest"),          # while labels are being scanned
    ("unit:labels", "ingest"),                 # label table checkpointed
    ("pre-unit:map-t00001", "ingest"),         # map unit written, marker missing
    ("unit:agg-00001", "ingest"),              # one edge partition checkpointed
    ("before-manifest:ingest", "ingest"),      # stage folder in place, no manifest
    ("substep:split:union-find", "split"),     # components found, nothing written
    ("before-manifest:split", "split"),
    ("unit:graph", "enumerate"),               # CSR built
    ("task:_unit@3", "enumerate"),             # inside the edge-block units
    ("pre-unit:cl-e000000001200", "enumerate"),  # a unit's cliques written, marker missing
    ("unit:cl-e000000002000", "enumerate"),    # after an enumeration unit's checkpoint
    ("substep:enumerate:collect", "enumerate"),  # candidates collected, no incidence yet
    ("stage:enumerate", "fit"),                # between stages
    ("unit:classes", "fit"),                   # edge classes written
    ("task:em_part@40", "fit"),                # in the middle of an EM step
    ("unit:ckpt-full@3", "fit"),               # between EM checkpoints
    ("pre-unit:ckpt-full@5", "fit"),           # checkpoint file written, marker missing
    ("unit:ckpt-kept@2", "fit"),               # between checkpoints of the pruned refit
    ("before-manifest:fit", "fit"),
    ("substep:results:cliques", "results"),    # cliques table written, members not
    ("before-manifest:results", "results"),
]


def cli_process(args, fault=None, cwd=None):
    env = dict(os.environ)
    env.pop("CLIQUEWISE_FAULT", None)
    if fault:
        env["CLIQUEWISE_FAULT"] = fault
    return subprocess.run([sys.executable, "-m", "cliquewise.cli", "--quiet", *map(str, args)],
                          capture_output=True, text=True, env=env, cwd=cwd, timeout=180)


def read_results(run_dir) -> dict:
    run_dir = Path(run_dir)
    out = {t: pd.read_parquet(run_dir / "results" / f"{t}.parquet") for t in TABLES}
    summary = json.loads((run_dir / "results" / "summary.json").read_text())
    summary.pop("timings")
    out["summary"] = summary
    out["mu"] = np.load(run_dir / "fit" / "mu.npy", allow_pickle=False)
    return out


def assert_identical(got: dict, ref: dict) -> None:
    for t in TABLES:
        pd.testing.assert_frame_equal(got[t], ref[t], check_exact=True)
    assert got["summary"] == ref["summary"]
    np.testing.assert_array_equal(got["mu"], ref["mu"])


@pytest.fixture(scope="session")
def job(tmp_path_factory):
    """A small simulated export, the job file and one uninterrupted reference run."""
    from cliquewise.simulate import simulate

    root = tmp_path_factory.mktemp("crash")
    simulate(root, nodes=400, seed=3, partitions=3)
    (root / "job.toml").write_text(JOB, encoding="utf-8")
    proc = cli_process(["run", root / "job.toml", "--run-dir", root / "reference"])
    assert proc.returncode == 0, proc.stderr
    ref = read_results(root / "reference")
    man = json.loads((root / "reference" / "enumerate" / "manifest.json").read_text())
    fit = json.loads((root / "reference" / "fit" / "report.json").read_text())
    # the job really has the units the kill points name
    assert man["counts"]["units"] >= 6 and fit["parts"] >= 3 and fit["pruned"] > 0
    assert fit["iterations_full"] >= 10 and fit["iterations_refit"] >= 4
    return root, ref


@pytest.mark.parametrize("point, incomplete", KILL_POINTS, ids=[p for p, _ in KILL_POINTS])
def test_kill_then_resume_gives_identical_results(job, tmp_path, point, incomplete):
    root, ref = job
    run_dir = tmp_path / "run"
    crashed = cli_process(["run", root / "job.toml", "--run-dir", run_dir], fault=point)
    assert crashed.returncode == -9, f"the run did not die at {point}: {crashed.returncode} {crashed.stderr}"
    ok, why = RunStore(run_dir, create=False).verify(incomplete)
    assert not ok, f"{incomplete} is marked complete after a kill at {point}"
    assert not (run_dir / "results" / "manifest.json").exists()
    rc, out, err = run_cli("resume", run_dir)
    assert rc == 0, err
    assert_identical(read_results(run_dir), ref)
    assert not any((run_dir / ".work").iterdir()), "resume leaves no work folders behind"


def test_repeated_kills_during_resumes(job, tmp_path):
    # a resume can itself be killed: four crashes in a row, each further along
    root, ref = job
    run_dir = tmp_path / "run"
    first = cli_process(["run", root / "job.toml", "--run-dir", run_dir], fault="unit:map-t00002")
    assert first.returncode == -9, first.stderr
    for point in ("unit:cl-e000000000800", "unit:ckpt-full@2", "unit:ckpt-full@4", "substep:results:nodes"):
        again = cli_process(["resume", run_dir], fault=point)
        assert again.returncode == -9, (point, again.stderr)
    rc, _, err = run_cli("resume", run_dir)
    assert rc == 0, err
    assert_identical(read_results(run_dir), ref)
    status = cli_process(["status", run_dir, "--json"])
    assert all(r["state"] == "complete" for r in json.loads(status.stdout))
