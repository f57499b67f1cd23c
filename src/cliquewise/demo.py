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
    print()
    print("stage profile:")
    print(format_profile(stage_profile(settings.run_dir)))
    print()
    print(f"results: {Path(settings.run_dir) / 'results'}")
    print("Note: groups describe patterns of interaction, not intent; review findings about people "
          "under local law and policy before acting on them.")
    return 0


if __name__ == "__main__":
    sys.exit(main())
