"""``cliquewise scale``: the log-log slope, and a tiny scaling run end to end.

Reference for the slope: ``numpy.polyfit`` of ``log y`` on ``log x`` (degree 1).
"""

import json
import math

import numpy as np
import pytest
from hypothesis import assume, given, settings, strategies as st

from cliquewise.analysis.scale import loglog_slope, slopes, verdict


@settings(max_examples=100, deadline=None)
@given(st.lists(st.tuples(st.floats(1.0, 1e9), st.floats(1e-3, 1e6)), min_size=2, max_size=8))
def test_slope_equals_numpy_polyfit(points):
    x = np.array([p[0] for p in points])
    y = np.array([p[1] for p in points])
    if np.all(x == x[0]):
        assert math.isnan(loglog_slope(x, y))  # no spread in x: no slope
        return
    assume(np.ptp(np.log(x)) > 1e-3)  # nearly equal sizes: the fit is ill-conditioned for both
    want = np.polyfit(np.log(x), np.log(y), 1)[0]  # numpy as reference
    assert loglog_slope(x, y) == pytest.approx(want, rel=1e-7, abs=1e-9)


def test_slope_of_synthetic_timings():
    # t = 3e-6 * E^1.2 exactly: the slope is 1.2 whatever the constant
    edges = np.array([1e5, 1e6, 1e7])
    assert loglog_slope(edges, 3e-6 * edges ** 1.2) == pytest.approx(1.2)
    assert math.isnan(loglog_slope([1e5], [1.0]))


def _point(edges, t):
    st_ = {s: {"wall_seconds": t / 5, "cpu_seconds": t / 5, "peak_rss_bytes": 100 * edges}
           for s in ("ingest", "split", "enumerate", "fit", "results")}
    return {"edges": edges, "stages": st_, "total_wall_seconds": t, "peak_rss_bytes": 100 * edges,
            "bytes_per_edge": 100.0, "iterations": 10}


def test_verdict_reads_the_slopes():
    pts = [_point(e, 1e-5 * e) for e in (10_000, 100_000, 1_000_000)]
    sl = slopes(pts)
    assert sl["wall"]["total"] == pytest.approx(1.0) and sl["peak_rss"]["total"] == pytest.approx(1.0)
    assert "about linear" in verdict(sl, pts)
    pts = [_point(e, 1e-7 * e ** 1.5) for e in (10_000, 100_000, 1_000_000)]
    assert "faster than linear" in verdict(slopes(pts), pts)


@pytest.mark.slow
def test_scale_command_runs_tiny_sizes(cli, tmp_path):
    rc, out, err = cli("scale", "--out", tmp_path, "--sizes", "1500,3000", "--json")
    assert rc == 0, err
    res = json.loads(out)
    assert [p["target_edges"] for p in res["points"]] == [1500, 3000]
    assert res["points"][1]["edges"] > res["points"][0]["edges"]
    saved = json.loads((tmp_path / "scale.json").read_text())
    # the slopes in the file are those of its own points (numpy.polyfit as reference)
    e = [p["edges"] for p in saved["points"]]
    w = [p["total_wall_seconds"] for p in saved["points"]]
    assert saved["slopes"]["wall"]["total"] == pytest.approx(np.polyfit(np.log(e), np.log(w), 1)[0])
    assert (tmp_path / "scale.png").read_bytes()[:4] == b"\x89PNG"
    # rerunning reuses the finished runs (the stages are skipped) and gives the same points' edges
    rc, out2, err = cli("scale", "--out", tmp_path, "--sizes", "1500,3000", "--json")
    assert rc == 0 and [p["edges"] for p in json.loads(out2)["points"]] == e


def test_scale_rejects_bad_sizes(cli, tmp_path):
    rc, out, err = cli("scale", "--out", tmp_path, "--sizes", "ten")
    assert rc == 2 and "--sizes" in err
