"""Worker processes killed during a run on a LocalCluster (127.0.0.1).

A worker process kills itself with SIGKILL while it runs an enumeration unit or an
EM part (``CLIQUEWISE_FAULT=task:...``, see ``store.fault_point``). With the fault
firing once, dask reschedules the lost work on the restarted worker and the run
completes with results identical to an undisturbed run (results do not depend
on the engine, so the reference runs on in-process threads). When
workers keep dying (the fault fires in every worker), the run stops with one
clear line and a non-zero exit, nothing is marked complete that is not, and
``cliquewise resume`` finishes the job with the same results.
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

from _faults import most_frequent_task, read_trace
from _support import run_cli

from cliquewise.config import load_pipeline
from cliquewise.engine import Engine, EngineSettings
from cliquewise.pipeline import run_pipeline
from cliquewise.store import RunStore

pytestmark = pytest.mark.cluster

JOB = """\
[input]
edges = "export/*.parquet"

[candidates]
edges_per_unit = 300

[fit]
checkpoint_every = 4
tol = 1e-9
max_iter = 10
incidences_per_part = 6000
"""

TABLES = ("nodes", "cliques", "members")


@pytest.fixture(scope="module")
def job(tmp_path_factory):
    """A small simulated export and an undisturbed run."""
    from cliquewise.simulate import simulate

    root = tmp_path_factory.mktemp("workers")
    simulate(root, nodes=300, seed=5)
    (root / "job.toml").write_text(JOB, encoding="utf-8")
    ref = root / "reference"
    # results do not depend on the engine: the reference runs on in-process threads,
    # recording the fault points it passes (to find the tasks to kill workers in)
    os.environ["CLIQUEWISE_FAULT_TRACE"] = str(root / "trace.txt")
    try:
        run_pipeline(settings(root, ref), progress=False)
    finally:
        del os.environ["CLIQUEWISE_FAULT_TRACE"]
    trace = read_trace(root / "trace.txt")
    tasks = {stage: most_frequent_task(trace, stage) for stage in ("enumerate", "fit")}
    fit = json.loads((ref / "fit" / "report.json").read_text())
    enum = json.loads((ref / "enumerate" / "manifest.json").read_text())
    assert enum["counts"]["units"] >= 4 and fit["parts"] >= 3  # work really spreads over workers
    return root, ref, tasks


def cluster() -> Engine:
    return Engine(EngineSettings(workers=2, threads=1, progress=False))


def settings(root: Path, run_dir: Path):
    s = load_pipeline(root / "job.toml")
    s.run_dir = str(run_dir)
    return s


def assert_same_results(a: Path, b: Path) -> None:
    for t in TABLES:
        pd.testing.assert_frame_equal(pd.read_parquet(a / "results" / f"{t}.parquet"),
                                      pd.read_parquet(b / "results" / f"{t}.parquet"), check_exact=True)
    np.testing.assert_array_equal(np.load(a / "fit" / "mu.npy", allow_pickle=False),
                                  np.load(b / "fit" / "mu.npy", allow_pickle=False))


@pytest.mark.parametrize("stage, nth", [("enumerate", 2), ("fit", 6)])
def test_worker_killed_once_run_completes_identically(job, tmp_path, monkeypatch, stage, nth):
    root, ref, tasks = job
    fault = f"{tasks[stage]}@{nth}"  # the nth edge-block unit / EM part a worker starts
    once = tmp_path / "fired"
    # the workers inherit this environment when they start (and restart)
    monkeypatch.setenv("CLIQUEWISE_FAULT", fault)
    monkeypatch.setenv("CLIQUEWISE_FAULT_ONCE", str(once))
    with cluster() as eng:
        pids = set(eng.client.run(os.getpid).values())
        run_pipeline(settings(root, tmp_path / "run"), engine=eng, progress=False)
        after = set(eng.client.run(os.getpid).values())
    assert once.exists(), "no worker was killed"
    assert os.getpid() not in pids
    assert pids - after, "the killed worker was replaced by a new process"
    assert_same_results(tmp_path / "run", ref)


def test_workers_that_keep_dying_stop_the_run_clearly_then_resume(job, tmp_path):
    root, ref, tasks = job
    run_dir = tmp_path / "run"
    env = dict(os.environ, CLIQUEWISE_FAULT=tasks["enumerate"], DASK_DISTRIBUTED__SCHEDULER__ALLOWED_FAILURES="1")
    env.pop("CLIQUEWISE_FAULT_ONCE", None)
    proc = subprocess.run([sys.executable, "-m", "cliquewise.cli", "--quiet", "run", str(root / "job.toml"),
                           "--run-dir", str(run_dir), "--workers", "2", "--threads", "1"],
                          capture_output=True, text=True, env=env, timeout=180)
    assert proc.returncode == 2, proc.stderr
    errors = [ln for ln in proc.stderr.splitlines() if ln.startswith("cliquewise: error:")]
    assert len(errors) == 1 and "Traceback" not in proc.stderr, proc.stderr
    assert "worker processes died" in errors[0] and "cliquewise resume" in errors[0]
    assert "enumerate" in errors[0] or tasks["enumerate"].split(":")[1] in errors[0]  # says what was running
    store = RunStore(run_dir, create=False)
    assert store.verify("split")[0] and not store.verify("enumerate")[0]
    rc, _, err = run_cli("resume", run_dir)
    assert rc == 0, err
    assert_same_results(run_dir, ref)


class _ClusterThatFailsToClose:
    def close(self):
        # what distributed's local cluster raised here once, while joining a worker
        # process that was being restarted after dying
        raise AssertionError("can only join a started process")


def test_an_error_while_the_cluster_shuts_down_never_hides_the_runs_own_error(caplog):
    eng = Engine(EngineSettings(progress=False))
    eng._cluster = _ClusterThatFailsToClose()
    with caplog.at_level("DEBUG", logger="cliquewise.engine"):
        with pytest.raises(ValueError, match="the run's own error"):
            with eng:
                raise ValueError("the run's own error")
    assert any("shutting down" in r.getMessage() and r.exc_info for r in caplog.records)
    eng.close()  # and a close after a run that completed does not raise either


def test_dask_log_lines_stay_quiet_in_a_fresh_process():
    # importing distributed (which happens inside Engine) sets its loggers to INFO;
    # a worker dying then printed dask's own traceback next to our one-line error
    code = ("import logging; logging.basicConfig(level=logging.WARNING)\n"
            "from cliquewise.engine import Engine, EngineSettings\n"
            "with Engine(EngineSettings(workers=1, threads=1, progress=False)):\n"
            "    print(logging.getLogger('distributed.batched').getEffectiveLevel())\n")
    out = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True, timeout=120)
    assert out.returncode == 0, out.stderr
    assert int(out.stdout.split()[-1]) == 50, out.stdout  # logging.CRITICAL


def test_a_task_cancelled_by_the_cluster_is_reported_as_lost_workers():
    # a scattered input held only by a worker that died makes dask cancel the task
    # that needed it ("already forgotten"); that is a lost worker, not an internal error
    from distributed.client import FutureCancelledError

    from cliquewise.engine import EngineError, _raise_worker_loss

    with pytest.raises(EngineError, match="cancelled by the cluster.*cliquewise resume"):
        _raise_worker_loss(FutureCancelledError("plan-1", "already forgotten"), "fit: plan")
    _raise_worker_loss(ValueError("x"), "fit: plan")  # anything else goes through unchanged
