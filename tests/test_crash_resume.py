"""Crash and resume: ``cliquewise run`` killed with SIGKILL anywhere, then ``resume``.

Every case starts a real ``cliquewise run`` subprocess that kills itself with
SIGKILL at one named point (``CLIQUEWISE_FAULT``, see ``store.fault_point``), then
runs ``cliquewise resume`` on the same run directory. The results tables must be
identical, value for value, to those of one uninterrupted run of the same job
(compared with pandas, not by file size), and so must the fitted intensities.

The kill points cover every stage: inside ingest's label scan, map and aggregate
units; inside split; inside enumerate (graph build, while edge-block units run,
between a unit's files and its checkpoint marker, after a unit's checkpoint, after
collecting); inside fit (prefix trees, in the middle of an EM step, between EM
checkpoints of both phases, between a checkpoint file and its marker); inside
results; between a stage folder and its manifest; and between stages.

One small simulated export (invented Harbourview data, ``cliquewise.simulate``) and
one reference run are shared by all cases; the reference run records every fault
point it passes, and each case names its kill point by stage, kind and position
(``_faults.resolve``), so unit names can change without breaking the harness. The job is configured so that every
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

from _faults import STAGES, read_trace, resolve
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

# (stage, kind of fault point, which one) -> resolved against a traced run of the job;
# the stage named is the one that must not be complete after the kill
KILL_POINTS = [
    ("ingest", "task", 1),               # while labels are being scanned
    ("ingest", "unit", 0),               # first unit checkpointed (the label table)
    ("ingest", "pre-unit", 1),           # a unit's files written, its marker missing
    ("ingest", "unit", -1),              # the last edge partition checkpointed
    ("ingest", "before-manifest", 0),    # stage folder in place, no manifest
    ("split", "substep", 0),             # components found, nothing written
    ("split", "before-manifest", 0),
    ("enumerate", "unit", 0),            # CSR built
    ("enumerate", "task", 3),            # while edge-block units run
    ("enumerate", "pre-unit", "mid"),    # a unit's cliques written, its marker missing
    ("enumerate", "unit", -1),           # after an enumeration unit's checkpoint
    ("enumerate", "substep", -1),        # candidates collected, stage not committed
    ("enumerate", "stage", 0),           # between stages
    ("fit", "unit", 0),                  # the fit's parts prepared
    ("fit", "task", 40),                 # in the middle of an EM step
    ("fit", "unit", 3),                  # between EM checkpoints
    ("fit", "pre-unit", 5),              # checkpoint file written, marker missing
    ("fit", "unit", -3),                 # between checkpoints of the pruned refit
    ("fit", "before-manifest", 0),
    ("results", "substep", 1),           # a table written, the next not
    ("results", "before-manifest", 0),
]


def _id(point) -> str:
    return "-".join(map(str, point))


def cli_process(args, fault=None, cwd=None, env_extra=None):
    env = dict(os.environ)
    for var in ("CLIQUEWISE_FAULT", "CLIQUEWISE_FAULT_ONCE", "CLIQUEWISE_FAULT_TRACE"):
        env.pop(var, None)
    env.update(env_extra or {})
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
    proc = cli_process(["run", root / "job.toml", "--run-dir", root / "reference"],
                       env_extra={"CLIQUEWISE_FAULT_TRACE": str(root / "trace.txt")})
    assert proc.returncode == 0, proc.stderr
    ref = read_results(root / "reference")
    trace = read_trace(root / "trace.txt")
    man = json.loads((root / "reference" / "enumerate" / "manifest.json").read_text())
    fit = json.loads((root / "reference" / "fit" / "report.json").read_text())
    # the job really has the units the kill points name
    assert man["counts"]["units"] >= 6 and fit["parts"] >= 3 and fit["pruned"] > 0
    assert fit["iterations_full"] >= 10 and fit["iterations_refit"] >= 4
    return root, ref, trace


@pytest.mark.parametrize("point", KILL_POINTS, ids=[_id(p) for p in KILL_POINTS])
def test_kill_then_resume_gives_identical_results(job, tmp_path, point):
    root, ref, trace = job
    stage, kind, index = point
    fault = resolve(trace, stage, kind, index)
    incomplete = STAGES[STAGES.index(stage) + 1] if kind == "stage" else stage
    run_dir = tmp_path / "run"
    crashed = cli_process(["run", root / "job.toml", "--run-dir", run_dir], fault=fault)
    assert crashed.returncode == -9, f"the run did not die at {fault}: {crashed.returncode} {crashed.stderr}"
    ok, why = RunStore(run_dir, create=False).verify(incomplete)
    assert not ok, f"{incomplete} is marked complete after a kill at {fault}"
    assert not (run_dir / "results" / "manifest.json").exists()
    rc, out, err = run_cli("resume", run_dir)
    assert rc == 0, err
    assert_identical(read_results(run_dir), ref)
    assert not any((run_dir / ".work").iterdir()), "resume leaves no work folders behind"


def test_repeated_kills_during_resumes(job, tmp_path):
    # a resume can itself be killed: four crashes in a row, each further along
    root, ref, trace = job
    run_dir = tmp_path / "run"
    first = cli_process(["run", root / "job.toml", "--run-dir", run_dir], fault=resolve(trace, "ingest", "unit", -2))
    assert first.returncode == -9, first.stderr
    for point in (("enumerate", "unit", "mid"), ("fit", "unit", 2), ("fit", "unit", 4), ("results", "substep", 0)):
        fault = resolve(trace, *point)
        again = cli_process(["resume", run_dir], fault=fault)
        assert again.returncode == -9, (fault, again.stderr)
    rc, _, err = run_cli("resume", run_dir)
    assert rc == 0, err
    assert_identical(read_results(run_dir), ref)
    status = cli_process(["status", run_dir, "--json"])
    assert all(r["state"] == "complete" for r in json.loads(status.stdout))
