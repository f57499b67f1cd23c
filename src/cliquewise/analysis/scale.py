"""The scaling check (``cliquewise scale``): does the cost grow about linearly with edges?

Simulates exports of growing size from one family (the Harbourview model of
:mod:`cliquewise.simulate`, same options, one seed), runs the whole pipeline on
each, reads wall time and peak memory per stage from the manifests, and fits the
log-log slope of each against the number of edges (distinct pairs after ingest):
``log(cost) = a + slope * log(edges)``. A slope near 1 means linear cost; the
verdict compares the end-to-end slope with a threshold (1.10 by default).

Every size keeps its export and its run directory under the output folder, so a
scaling check that is stopped resumes where it was (finished stages are skipped).
Writes ``scale.json`` (sizes, per-stage figures, slopes, verdict) and
``scale.png`` (log-log plot of wall time and peak memory per stage).
"""

from __future__ import annotations

import json
import math
import time
from pathlib import Path

import numpy as np

from cliquewise.analysis.profile import STAGES

__all__ = ["loglog_slope", "scale_check", "plot_scale", "verdict"]


def loglog_slope(x, y) -> float:
    """Least-squares slope of ``log y`` against ``log x`` (``nan`` with fewer than 2 points).

    Points where either value is not positive are left out.
    """
    x = np.asarray(x, np.float64)
    y = np.asarray(y, np.float64)
    ok = (x > 0) & (y > 0)
    if ok.sum() < 2:
        return float("nan")
    lx, ly = np.log(x[ok]), np.log(y[ok])
    dx = lx - lx.mean()
    den = float(dx @ dx)
    return float(dx @ (ly - ly.mean()) / den) if den > 0 else float("nan")


def _run_one(out: Path, target: int, seed: int, engine_settings, levels, progress: bool) -> dict:
    from cliquewise import pipeline
    from cliquewise.config import Settings
    from cliquewise.simulate import nodes_for_edges, simulate

    data = out / f"export-{target}"
    if not (data / "truth" / "summary.json").exists():
        nodes = nodes_for_edges(target, seed=seed)
        t = time.perf_counter()
        simulate(data, nodes=nodes, seed=seed, labels="int")
        sim_seconds = time.perf_counter() - t
    else:
        sim_seconds = None
    s = Settings()
    s.input.edges = str(data / "export")
    s.run_dir = str(out / f"run-{target}")
    s.candidates.levels = levels
    for key, value in (engine_settings or {}).items():
        setattr(s.engine, key, value)
    t = time.perf_counter()
    res = pipeline.run_pipeline(s, progress=progress)
    wall = time.perf_counter() - t
    stages = {}
    for name in STAGES:
        man = res[name].manifest
        stages[name] = {"wall_seconds": man["profile"]["wall_seconds"],
                        "cpu_seconds": man["profile"]["cpu_seconds"],
                        "peak_rss_bytes": man["profile"]["peak_rss_bytes"]}
    edges = int(res["ingest"].manifest["counts"]["pairs"])
    total = sum(v["wall_seconds"] for v in stages.values())
    return {"target_edges": int(target), "edges": edges,
            "rows": int(res["ingest"].manifest["counts"]["rows_read"]),
            "candidates": int(res["enumerate"].manifest["counts"]["candidates"]),
            "incidences": int(res["enumerate"].manifest["counts"]["incidences"]),
            "iterations": int(res["fit"].manifest["counts"]["iterations"]),
            "stages": stages, "total_wall_seconds": total,
            "peak_rss_bytes": max(v["peak_rss_bytes"] for v in stages.values()),
            "bytes_per_edge": max(v["peak_rss_bytes"] for v in stages.values()) / max(edges, 1),
            "simulate_seconds": sim_seconds, "call_seconds": wall,
            "run_dir": s.run_dir}


def slopes(points: list[dict]) -> dict:
    """Log-log slopes of wall time and peak memory against edges, per stage and end to end."""
    edges = [p["edges"] for p in points]
    out = {"wall": {}, "peak_rss": {}}
    for name in STAGES:
        out["wall"][name] = loglog_slope(edges, [p["stages"][name]["wall_seconds"] for p in points])
        out["peak_rss"][name] = loglog_slope(edges, [p["stages"][name]["peak_rss_bytes"] for p in points])
    out["wall"]["total"] = loglog_slope(edges, [p["total_wall_seconds"] for p in points])
    out["peak_rss"]["total"] = loglog_slope(edges, [p["peak_rss_bytes"] for p in points])
    # the fit's cost also scales with its iteration count, which depends on the data:
    # its slope per iteration tells the sweep's own growth apart from convergence
    out["fit_per_iteration"] = loglog_slope(
        edges, [p["stages"]["fit"]["wall_seconds"] / max(p["iterations"], 1) for p in points])
    return out


def verdict(sl: dict, points: list[dict], max_slope: float = 1.10) -> str:
    """A short plain-text verdict on the slopes."""
    total = sl["wall"]["total"]
    worst = max(((k, v) for k, v in sl["wall"].items() if k != "total" and math.isfinite(v)),
                key=lambda kv: kv[1], default=("", float("nan")))
    big = max(points, key=lambda p: p["edges"]) if points else None
    lines = []
    if math.isfinite(total):
        ok = total <= max_slope
        lines.append(f"end-to-end wall time grows as edges^{total:.2f} from {min(p['edges'] for p in points):,} "
                     f"to {max(p['edges'] for p in points):,} edges: "
                     f"{'about linear' if ok else 'faster than linear'} (threshold {max_slope:.2f})")
        lines.append(f"steepest stage: {worst[0]} (slope {worst[1]:.2f}); peak memory slope "
                     f"{sl['peak_rss']['total']:.2f}")
    else:
        lines.append("need at least two sizes for a slope")
    if big:
        lines.append(f"largest size: {big['edges']:,} edges in {big['total_wall_seconds']:.1f} s, peak memory "
                     f"{big['peak_rss_bytes'] / 2**30:.2f} GB ({big['bytes_per_edge']:.0f} bytes per edge)")
    return "\n".join(lines)


def plot_scale(points: list[dict], sl: dict, path) -> Path:
    """Log-log plot of wall time and peak memory per stage against edges (matplotlib, Agg)."""
    import matplotlib

    matplotlib.use("Agg")
    import matplotlib.pyplot as plt

    pts = sorted(points, key=lambda p: p["edges"])
    x = [p["edges"] for p in pts]
    fig, (a, b) = plt.subplots(1, 2, figsize=(10, 4))
    for name in STAGES:
        a.plot(x, [p["stages"][name]["wall_seconds"] for p in pts], marker="o", label=f"{name} ({sl['wall'][name]:.2f})")
    a.plot(x, [p["total_wall_seconds"] for p in pts], marker="s", color="black", lw=2,
           label=f"end to end ({sl['wall']['total']:.2f})")
    if len(x) >= 2 and pts[0]["total_wall_seconds"] > 0:  # a slope-1 guide through the first point
        a.plot([x[0], x[-1]], [pts[0]["total_wall_seconds"], pts[0]["total_wall_seconds"] * x[-1] / x[0]],
               ls=":", color="grey", label="linear")
    a.set(xscale="log", yscale="log", xlabel="edges", ylabel="wall seconds", title="time (slope in legend)")
    a.legend(fontsize=7)
    b.plot(x, [p["peak_rss_bytes"] / 2**20 for p in pts], marker="s", color="black",
           label=f"peak of all stages ({sl['peak_rss']['total']:.2f})")
    b.set(xscale="log", yscale="log", xlabel="edges", ylabel="peak memory (MB)", title="memory")
    b.legend(fontsize=7)
    fig.tight_layout()
    path = Path(path)
    fig.savefig(path, dpi=110)
    plt.close(fig)
    return path


def scale_check(out, sizes=(100_000, 1_000_000, 10_000_000), seed: int = 1, engine_settings: dict | None = None,
                levels="all", max_slope: float = 1.10, progress: bool = True, log=print) -> dict:
    """Run the scaling check; returns what ``scale.json`` holds.

    Parameters
    ----------
    out : path
        Folder for the exports, the runs, ``scale.json`` and ``scale.png``.
    sizes : sequence of int
        Target edge counts (distinct pairs), smallest first.
    seed : int
        Seed of every simulated export (the family is fixed; sizes differ).
    engine_settings : dict, optional
        Engine fields (``workers``, ``threads``, ``memory_limit``, ``scheduler``).
    levels : str, int or list
        Candidate levels (as ``--levels``).
    max_slope : float
        Threshold of the verdict (common practice for "about linear", no source).
    """
    out = Path(out)
    out.mkdir(parents=True, exist_ok=True)
    sizes = sorted(int(s) for s in sizes)
    if not sizes or sizes[0] < 1:
        raise ValueError("sizes must be positive edge counts")
    points = []
    for target in sizes:
        log(f"scale: {target:,} edges ...")
        p = _run_one(out, target, seed, engine_settings, levels, progress)
        log(f"scale: {p['edges']:,} edges, {p['total_wall_seconds']:.1f} s, "
            f"peak {p['peak_rss_bytes'] / 2**30:.2f} GB")
        points.append(p)
    sl = slopes(points)
    text = verdict(sl, points, max_slope)
    result = {"sizes": sizes, "seed": seed, "levels": levels, "points": points, "slopes": sl,
              "max_slope": max_slope, "verdict": text}
    tmp = out / "scale.json.tmp"
    tmp.write_text(json.dumps(result, indent=1, default=float))
    tmp.replace(out / "scale.json")
    plot_scale(points, sl, out / "scale.png")
    return result
