"""Stage profiles read back from the manifests (``cliquewise profile``, ``make demo``)."""

from __future__ import annotations

from pathlib import Path

from cliquewise.store import RunStore

STAGES = ["ingest", "split", "enumerate", "fit", "results"]
WORK_KEYS = {
    "ingest": ("rows_read", "rows"),
    "split": ("nodes", "nodes"),
    "enumerate": ("edges", "edges"),
    "fit": ("iterations", "iterations"),
    "results": ("member_rows", "rows"),
}


def stage_profile(run_dir) -> list[dict]:
    """One row per completed stage (and its sub-steps) with times, memory and work."""
    store = RunStore(run_dir, create=False)
    rows = []
    for name in STAGES:
        man = store.manifest(name)
        if man is None:
            continue
        prof = man["profile"]
        counts = man["counts"]
        key, unit = WORK_KEYS.get(name, (None, None))
        work = counts.get(key) if key else None
        wall = prof["wall_seconds"]
        rows.append({
            "stage": name, "step": "", "wall_seconds": wall, "cpu_seconds": prof["cpu_seconds"],
            "peak_rss_bytes": prof["peak_rss_bytes"], "counts": counts,
            "throughput": (work / wall if work and wall > 0 else None), "throughput_unit": f"{unit}/s" if unit else "",
        })
        for step, sp in prof.get("substeps", {}).items():
            rows.append({"stage": name, "step": step, "wall_seconds": sp["wall_seconds"],
                         "cpu_seconds": sp["cpu_seconds"], "peak_rss_bytes": None, "counts": {},
                         "throughput": None, "throughput_unit": ""})
    return rows


def format_profile(rows: list[dict]) -> str:
    """A plain-text table of :func:`stage_profile` rows."""
    lines = [f"  {'stage':<10} {'step':<12} {'wall s':>8} {'cpu s':>8} {'peak MB':>8}  {'throughput':>16}"]
    for r in rows:
        rss = f"{r['peak_rss_bytes'] / 2**20:.0f}" if r["peak_rss_bytes"] else ""
        tp = f"{r['throughput']:.3g} {r['throughput_unit']}" if r["throughput"] else ""
        name = r["stage"] if not r["step"] else ""
        lines.append(f"  {name:<10} {r['step']:<12} {r['wall_seconds']:>8.2f} {r['cpu_seconds']:>8.2f} {rss:>8}  {tp:>16}")
    return "\n".join(lines)
