"""Stage profiles read back from the manifests (``cliquewise profile``, ``make demo``, the report).

Every number comes from a stage's ``manifest.json``: wall and CPU seconds, peak
resident memory (the stage: driver and workers; a sub-step: this process, threads
included), work counts and, from those, throughput. Nothing is measured here.
"""

from __future__ import annotations

import json
from pathlib import Path

from cliquewise.store import RunStore

STAGES = ["ingest", "split", "enumerate", "fit", "results"]
#: the count a stage's throughput is given in
WORK_KEYS = {
    "ingest": ("rows_read", "rows"),
    "split": ("nodes", "nodes"),
    "enumerate": ("edges", "edges"),
    "fit": ("iterations", "iterations"),
    "results": ("member_rows", "rows"),
}
#: the count a sub-step's throughput is given in, by preference
STEP_KEYS = ("rows", "edges", "incidences", "evaluations", "candidates", "pairs", "nodes")


def _throughput(counts: dict, keys, wall: float):
    if wall <= 0:
        return None, ""
    if counts.get("evaluations") and counts.get("incidences"):
        # an EM evaluation sweeps every incidence once
        return counts["evaluations"] * counts["incidences"] / wall, "incidences/s"
    for key in keys:
        value = counts.get(key)
        if isinstance(value, (int, float)) and value:
            return value / wall, f"{key}/s"
    return None, ""


def stage_profile(run_dir) -> list[dict]:
    """One row per completed stage and one per sub-step, in pipeline order.

    Each row: ``stage``, ``step`` (empty for the stage itself), ``wall_seconds``,
    ``cpu_seconds``, ``peak_rss_bytes`` (None where not recorded), ``counts``,
    ``throughput`` and ``throughput_unit``.
    """
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
        steps = prof.get("substeps", {})
        # in the order they ran (manifests store keys sorted; older ones have no order)
        for step, sp in sorted(steps.items(), key=lambda kv: (kv[1].get("order", 0), kv[0])):
            sc = sp.get("counts", {})
            tp, tu = _throughput(sc, STEP_KEYS, sp["wall_seconds"])
            rows.append({"stage": name, "step": step, "wall_seconds": sp["wall_seconds"],
                         "cpu_seconds": sp["cpu_seconds"], "peak_rss_bytes": sp.get("peak_rss_bytes"),
                         "counts": sc, "throughput": tp, "throughput_unit": tu})
    return rows


def _counts_text(counts: dict, limit: int = 3) -> str:
    items = [(k, v) for k, v in counts.items() if isinstance(v, (int, float)) and not isinstance(v, bool)]
    return ", ".join(f"{k} {v:,}" if isinstance(v, int) else f"{k} {v:.3g}" for k, v in items[:limit])


def format_profile(rows: list[dict], counts: bool = False) -> str:
    """A plain-text table of :func:`stage_profile` rows (``counts``: add a work column)."""
    head = f"  {'stage':<10} {'step':<12} {'wall s':>8} {'cpu s':>8} {'peak MB':>8}  {'throughput':>20}"
    lines = [head + ("  work" if counts else "")]
    for r in rows:
        rss = f"{r['peak_rss_bytes'] / 2**20:.0f}" if r["peak_rss_bytes"] else ""
        tp = f"{r['throughput']:.3g} {r['throughput_unit']}" if r["throughput"] else ""
        name = r["stage"] if not r["step"] else ""
        line = f"  {name:<10} {r['step']:<12} {r['wall_seconds']:>8.2f} {r['cpu_seconds']:>8.2f} {rss:>8}  {tp:>20}"
        if counts:
            line += "  " + _counts_text(r["counts"])
        lines.append(line)
    return "\n".join(lines)


def profile_json(run_dir) -> str:
    """The profile rows as JSON text (for machines)."""
    return json.dumps({"run_dir": str(Path(run_dir)), "rows": stage_profile(run_dir)}, indent=1, default=float)


def plot_profile(rows: list[dict], path) -> Path:
    """Bar chart of wall seconds per stage and sub-step (matplotlib, Agg), written to ``path``."""
    import matplotlib

    matplotlib.use("Agg")
    import matplotlib.pyplot as plt

    labels = [r["stage"] if not r["step"] else f"   {r['step']}" for r in rows]
    walls = [r["wall_seconds"] for r in rows]
    colours = ["#3b6ea5" if not r["step"] else "#9bb7d4" for r in rows]
    fig, ax = plt.subplots(figsize=(7, 0.28 * len(rows) + 1.2))
    y = list(range(len(rows)))[::-1]
    ax.barh(y, walls, color=colours)
    ax.set_yticks(y)
    ax.set_yticklabels(labels, fontsize=8)
    ax.set_xlabel("wall seconds")
    ax.set_title("stage profile (dark: stage, light: its sub-steps)", fontsize=9)
    for yi, w, r in zip(y, walls, rows):
        if r["peak_rss_bytes"]:
            ax.text(w, yi, f"  {r['peak_rss_bytes'] / 2**20:.0f} MB", va="center", fontsize=7)
    ax.margins(x=0.2)
    fig.tight_layout()
    path = Path(path)
    fig.savefig(path, dpi=110)
    plt.close(fig)
    return path
