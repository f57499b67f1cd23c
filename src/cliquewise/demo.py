"""``make demo``: simulate an invented export, run the whole job, show what came out.

The export is the invented town of Harbourview (see :mod:`cliquewise.simulate`):
residents in overlapping households, work crews, clubs and choirs, counting the
messages each pair exchanged. Everything is generated from a fixed seed.
"""

from __future__ import annotations

import sys
from pathlib import Path

ROOT = Path(__file__).resolve().parents[2]


def main(argv=None) -> int:
    from cliquewise.config import load_pipeline
    from cliquewise.pipeline import run_pipeline
    from cliquewise.simulate import simulate
    from cliquewise.analysis.profile import format_profile, stage_profile

    pipe = ROOT / "pipelines" / "demo.toml"
    data = ROOT / "demo-data"
    if not (data / "truth" / "summary.json").exists():
        print("simulating the Harbourview export into demo-data/ ...", file=sys.stderr)
        simulate(data, nodes=20_000, seed=7)
    settings = load_pipeline(pipe)
    print(f"running {pipe.relative_to(ROOT)} -> {Path(settings.run_dir).relative_to(ROOT)}/", file=sys.stderr)

    def on_stage(res):
        prof = res.manifest["profile"]
        state = "up to date" if res.skipped else f"{prof['wall_seconds']:.1f} s"
        print(f"  {res.name:<10} {state}", file=sys.stderr)

    run_pipeline(settings, on_stage=on_stage)
    import cliquewise

    run = cliquewise.open_run(settings.run_dir)
    cl = run.cliques()
    mem = run.members()
    summ = run.summary()
    print()
    print(f"{summ['nodes']} residents, {summ['edges']} pairs, {summ['candidates']} candidate groups, "
          f"{summ['groups_kept']} kept; log-likelihood {summ['loglik']:.1f} after {summ['iterations']} EM iterations")
    print()
    print("strongest groups (expected messages = intensity x pairs):")
    print(f"  {'group':>5} {'size':>4} {'intensity':>9} {'expected':>9}  members")
    for row in cl.head(10).itertuples():
        labels = mem.loc[mem.clique_id == row.clique_id, "label"].tolist()
        shown = ", ".join(map(str, labels[:5])) + (f", ... (+{len(labels) - 5})" if len(labels) > 5 else "")
        print(f"  {row.clique_id:>5} {row.size:>4} {row.intensity:>9.2f} {row.expected_weight:>9.1f}  {shown}")
    rec = recovery(data / "truth", cl, mem)
    print()
    print(f"planted groups with expected weight >= {rec['min_expected']:g} whose pairs all appear: "
          f"{rec['recovered']} of {rec['planted']} matched by a kept group with Jaccard >= 0.9; "
          f"median intensity error {rec['median_rel_error']:.1%}")
    print()
    print("stage profile:")
    print(format_profile(stage_profile(settings.run_dir)))
    print()
    print(f"results: {Path(settings.run_dir) / 'results'}")
    print("Note: groups describe patterns of interaction, not intent; review findings about people "
          "under local law and policy before acting on them.")
    return 0


def recovery(truth: Path, cliques, members, min_expected: float = 10.0) -> dict:
    """How many planted groups a kept group matches (Jaccard >= 0.9), and intensity error."""
    import numpy as np
    import pandas as pd

    groups = pd.read_parquet(truth / "groups.parquet")
    tmem = pd.read_parquet(truth / "members.parquet")
    # a clique method can only find a group whose every pair shows up in the export
    complete = groups.observed_pairs == groups["size"] * (groups["size"] - 1) // 2
    groups = groups[(groups.expected_weight >= min_expected) & complete]
    tmem = tmem[tmem.group_id.isin(groups.group_id)]
    kept = cliques[cliques.intensity > 0][["clique_id", "size", "intensity"]]
    fmem = members[members.clique_id.isin(kept.clique_id)][["clique_id", "label"]]
    both = tmem.merge(fmem, on="label")
    overlap = both.groupby(["group_id", "clique_id"]).size().rename("shared").reset_index()
    overlap = overlap.merge(groups[["group_id", "size", "intensity"]], on="group_id")
    overlap = overlap.merge(kept.rename(columns={"size": "fsize", "intensity": "fmu"}), on="clique_id")
    overlap["jaccard"] = overlap.shared / (overlap["size"] + overlap.fsize - overlap.shared)
    best = overlap.sort_values("jaccard", ascending=False).drop_duplicates("group_id")
    hit = best[best.jaccard >= 0.9]
    err = (hit.fmu - hit.intensity).abs() / hit.intensity
    return {"planted": int(len(groups)), "recovered": int(len(hit)), "min_expected": min_expected,
            "median_rel_error": float(np.median(err)) if len(err) else float("nan")}


if __name__ == "__main__":
    sys.exit(main())
