"""The ``cliquewise`` command line: a thin layer over the pipeline and the API.

Errors the user can act on print one line on stderr and exit with status 2 (1 for
anything unexpected); ``--debug`` shows the traceback.
"""

from __future__ import annotations

import argparse
import json
import logging
import sys
from pathlib import Path

from cliquewise import __version__

EXIT_USER = 2
EXIT_BUG = 1


def _add_engine(p: argparse.ArgumentParser) -> None:
    g = p.add_argument_group("engine")
    g.add_argument("--scheduler", metavar="ADDRESS", help="join a running dask cluster, e.g. tcp://10.0.0.5:8786")
    g.add_argument("--workers", type=int, metavar="N", help="start N local worker processes (default: threads in this process)")
    g.add_argument("--threads", type=int, metavar="N", help="threads per worker (default: all cores)")
    g.add_argument("--memory-limit", metavar="SIZE", help="memory per worker process, e.g. 2GB (spills to disk beyond it)")
    g.add_argument("--dashboard", metavar="HOST:PORT", help="serve the dask dashboard (binds 127.0.0.1 unless a host is given)")


def _add_run_options(p: argparse.ArgumentParser) -> None:
    p.add_argument("pipeline", nargs="?", help="a pipeline file (TOML); options below override it")
    p.add_argument("--edges", metavar="PATH_OR_GLOB", help="the export: Parquet or CSV file, folder or glob")
    p.add_argument("--run-dir", metavar="DIR", help="where stages keep their results and checkpoints")
    g = p.add_argument_group("input")
    g.add_argument("--source", metavar="COL", help="column of the first person (default source)")
    g.add_argument("--target", metavar="COL", help="column of the second person (default target)")
    g.add_argument("--weight", metavar="COL", help="column of counts (default weight); '' counts rows")
    g.add_argument("--time", metavar="COL", help="time column, for --since/--until on an event log")
    g.add_argument("--since", metavar="WHEN", help="keep rows with time >= WHEN (ISO time or number)")
    g.add_argument("--until", metavar="WHEN", help="keep rows with time < WHEN")
    g.add_argument("--merge", choices=["sum", "max", "min"], help="how duplicate and reciprocal rows combine (default sum)")
    g.add_argument("--on-invalid", choices=["error", "drop"], help="NaN, infinite, negative or non-numeric weights: stop (default) or drop and count")
    g = p.add_argument_group("candidates")
    g.add_argument("--levels", metavar="all|N|LIST", help="weight thresholds: every distinct weight (default), N quantile levels, or a list")
    g.add_argument("--max-cliques", type=int, metavar="N", help="blow-up guard: cliques allowed per work unit")
    g.add_argument("--max-seconds", type=float, metavar="S", help="blow-up guard: seconds allowed per work unit")
    g = p.add_argument_group("fit")
    g.add_argument("--tol", type=float, help="stop when the log-likelihood changes by less than this, relatively")
    g.add_argument("--max-iter", type=int, help="EM iterations at most")
    g.add_argument("--no-accelerate", action="store_true", help="plain EM steps (no SQUAREM)")
    g.add_argument("--prune", type=float, metavar="W", help="drop groups whose expected weight falls below W")
    _add_engine(p)


def _settings_from_args(args):
    from cliquewise.config import Settings, load_pipeline, parse_levels

    s = load_pipeline(args.pipeline) if args.pipeline else Settings()
    i = s.input
    if args.edges:
        i.edges = args.edges
    if args.run_dir:
        s.run_dir = str(Path(args.run_dir).resolve())
    for opt in ("source", "target", "time", "since", "until", "merge", "on_invalid"):
        val = getattr(args, opt)
        if val is not None:
            setattr(i, opt, val)
    if args.weight is not None:
        i.weight = args.weight
    c = s.candidates
    if args.levels is not None:
        c.levels = parse_levels(args.levels)
    if args.max_cliques is not None:
        c.max_cliques = args.max_cliques
    if args.max_seconds is not None:
        c.max_seconds = args.max_seconds
    f = s.fit
    if args.tol is not None:
        f.tol = args.tol
    if args.max_iter is not None:
        f.max_iter = args.max_iter
    if args.no_accelerate:
        f.accelerate = False
    if args.prune is not None:
        f.prune = args.prune
    _engine_from_args(s, args)
    s.validate()
    if not i.edges:
        raise _UserError("no export given: pass --edges PATH_OR_GLOB or a pipeline file with [input] edges")
    if not s.run_dir:
        raise _UserError("no run directory given: pass --run-dir DIR or set run_dir in the pipeline file")
    return s


def _engine_from_args(s, args) -> None:
    e = s.engine
    if getattr(args, "scheduler", None):
        e.scheduler = args.scheduler
    if getattr(args, "workers", None) is not None:
        e.workers = args.workers
    if getattr(args, "threads", None) is not None:
        e.threads = args.threads
    if getattr(args, "memory_limit", None):
        e.memory_limit = args.memory_limit
    if getattr(args, "dashboard", None):
        d = args.dashboard
        e.dashboard = d if ":" in d else f"127.0.0.1:{d}"


class _UserError(Exception):
    pass


# -- commands -----------------------------------------------------------------

def cmd_run(args) -> int:
    from cliquewise.pipeline import run_pipeline

    settings = _settings_from_args(args)
    return _run(settings, args)


def cmd_resume(args) -> int:
    from cliquewise.pipeline import load_settings

    settings = load_settings(args.run_dir)
    _engine_from_args(settings, args)
    return _run(settings, args)


def _run(settings, args) -> int:
    from cliquewise.pipeline import run_pipeline

    def on_stage(res):
        prof = res.manifest.get("profile", {})
        note = "up to date" if res.skipped else f"{prof.get('wall_seconds', 0):.1f} s, peak {_mb(prof.get('peak_rss_bytes', 0))}"
        print(f"  {res.name:<10} {note}", file=sys.stderr)

    print(f"run directory: {settings.run_dir}", file=sys.stderr)
    run_pipeline(settings, on_stage=on_stage, progress=not args.quiet)
    results = Path(settings.run_dir) / "results"
    if results.exists():
        print(f"results: {results}")
    return 0


def cmd_status(args) -> int:
    from cliquewise.pipeline import stage_status

    rows = stage_status(args.run_dir)
    if args.json:
        print(json.dumps(rows, indent=1))
        return 0
    print(f"{'stage':<10} {'state':<28} {'wall s':>8} {'peak RSS':>10}  counts")
    for r in rows:
        wall = f"{r['wall_seconds']:.2f}" if r["wall_seconds"] is not None else "-"
        rss = _mb(r["peak_rss_bytes"]) if r["peak_rss_bytes"] else "-"
        counts = ", ".join(f"{k}={v}" for k, v in list(r["counts"].items())[:5])
        print(f"{r['stage']:<10} {r['state']:<28} {wall:>8} {rss:>10}  {counts}")
    return 0


def cmd_profile(args) -> int:
    from cliquewise.analysis.profile import format_profile, plot_profile, profile_json, stage_profile
    from cliquewise.store import RunStore

    if RunStore(args.run_dir, create=False).manifest("ingest") is None:
        raise _UserError(f"{args.run_dir}: no completed stage to profile (run or resume it first)")
    rows = stage_profile(args.run_dir)
    if args.json:
        print(profile_json(args.run_dir))
    else:
        print(format_profile(rows, counts=True))
    png = Path(args.png) if args.png else Path(args.run_dir) / "profile.png"
    if not args.no_png:
        plot_profile(rows, png)
        if not args.json:
            print(f"chart: {png}")
    return 0


def cmd_scale(args) -> int:
    from cliquewise.analysis.scale import scale_check
    from cliquewise.config import Settings, parse_levels

    try:
        sizes = [int(float(x)) for x in args.sizes.split(",") if x.strip()]
    except ValueError:
        raise _UserError(f"--sizes takes edge counts separated by commas, e.g. 1e5,1e6,1e7 (got {args.sizes!r})")
    if not sizes or min(sizes) < 100:
        raise _UserError("--sizes needs at least one edge count of 100 or more")
    s = Settings()
    _engine_from_args(s, args)
    engine = {k: v for k, v in s.engine.__dict__.items() if v}
    res = scale_check(args.out, sizes=sizes, seed=args.seed, engine_settings=engine,
                      levels=parse_levels(args.levels) if args.levels else "all", max_slope=args.max_slope,
                      progress=not args.quiet, log=(lambda m: None) if args.quiet else
                      (lambda m: print(m, file=sys.stderr, flush=True)))
    if args.json:
        print(json.dumps(res, indent=1, default=float))
    else:
        print(res["verdict"])
        print(f"figures: {Path(args.out) / 'scale.json'}, plot: {Path(args.out) / 'scale.png'}")
    return 0


def cmd_simulate(args) -> int:
    from cliquewise.simulate import simulate

    summary = simulate(args.out, nodes=args.nodes, seed=args.seed, labels=args.labels,
                       intensity=args.intensity, levels=args.levels, events=args.events)
    print(json.dumps(summary, indent=1, default=str))
    return 0


# -- export (graph files and membership tables) ------------------------------------

def _top_arg(text: str):
    if str(text).strip().lower() == "all":
        return "all"
    try:
        return int(text)
    except ValueError:
        raise argparse.ArgumentTypeError(f"--top takes a whole number or 'all', not {text!r}") from None


def cmd_export(args) -> int:
    from cliquewise.analysis.export import DEFAULT_TOP, GRAPH_FORMATS, ExportError, export

    top = args.top
    if top is None:  # all groups for the tidy table, the strongest 100 otherwise
        top = "all" if (args.format not in GRAPH_FORMATS and args.layout == "long") else DEFAULT_TOP
    top = None if top == "all" else top
    try:
        path = export(args.run_dir, args.format, top=top, out=args.out, layout=args.layout)
    except ExportError as exc:
        raise _UserError(str(exc)) from None
    print(path)
    return 0


# -- batch (many networks, one run each) --------------------------------------------

_BATCH_RUN_OPTIONS = {  # option -> (part of the settings, field)
    "source": ("input", "source"), "target": ("input", "target"), "weight": ("input", "weight"),
    "time": ("input", "time"), "since": ("input", "since"), "until": ("input", "until"),
    "merge": ("input", "merge"), "on_invalid": ("input", "on_invalid"),
    "max_cliques": ("candidates", "max_cliques"), "max_seconds": ("candidates", "max_seconds"),
    "tol": ("fit", "tol"), "max_iter": ("fit", "max_iter"), "prune": ("fit", "prune"),
}
_BATCH_OPTIONS = ("network", "folders", "inside", "parallel", "threads_per_network", "heldout_fraction", "seed")


def _batch_settings_from_args(args):
    from cliquewise.batch import BatchSettings, load_batch_file, load_request
    from cliquewise.config import Settings, parse_levels

    if args.run_dir:
        raise _UserError("cliquewise batch takes --batch-dir; each network's run is BATCH_DIR/runs/<network>")
    new_input = args.edges or args.folders
    if args.pipeline:
        s, b = load_batch_file(args.pipeline)
    elif args.batch_dir and not new_input and (Path(args.batch_dir) / "batch.json").exists():
        s, b = load_request(args.batch_dir)  # resume a batch with the settings it started with
    else:
        s, b = Settings(), BatchSettings()
    if args.edges:
        s.input.edges, b.folders = args.edges, ""
    if args.folders:
        s.input.edges, b.folders = None, str(Path(args.folders).resolve())
    if args.batch_dir:
        b.dir = str(Path(args.batch_dir).resolve())
    for opt in _BATCH_OPTIONS:
        if getattr(args, opt) is not None:
            setattr(b, opt, getattr(args, opt))
    for opt, (part, name) in _BATCH_RUN_OPTIONS.items():
        if getattr(args, opt) is not None:
            setattr(getattr(s, part), name, getattr(args, opt))
    if args.levels is not None:
        s.candidates.levels = parse_levels(args.levels)
    if args.no_accelerate:
        s.fit.accelerate = False
    _engine_from_args(s, args)
    s.validate()
    b.validate(s)
    return s, b


def cmd_batch(args) -> int:
    from cliquewise.batch import run_batch

    settings, batch = _batch_settings_from_args(args)
    print(f"batch directory: {batch.dir}", file=sys.stderr)
    try:
        out = run_batch(settings, batch, progress=not args.quiet)
    except KeyboardInterrupt:
        print(f"cliquewise: interrupted; 'cliquewise batch --batch-dir {batch.dir}' continues where it stopped",
              file=sys.stderr)
        return 130
    for st in out["networks"]:
        if st["state"] != "done":
            note = f"failed: {st['error']}"
        elif st["stages_run"]:
            note = f"ran {', '.join(st['stages_run'])} ({st['seconds']:.1f} s)"
        else:
            note = "up to date" + ("" if st["row_reused"] else f", covariates computed ({st['seconds']:.1f} s)")
        print(f"  {st['slug']:<24} {note}", file=sys.stderr)
    print(out["covariates"])
    if out["failed"]:
        raise _UserError(f"{out['failed']} of {len(out['networks'])} networks failed (listed above and in "
                         f"{Path(batch.dir) / 'status.json'}); run the same command again to retry them")
    return 0


# -- report (one HTML file about a finished run) ------------------------------------

def cmd_report(args) -> int:
    from cliquewise.analysis.report import write_report

    if not 0.0 < args.heldout_fraction < 1.0:
        raise _UserError("--heldout-fraction must lie strictly between 0 and 1")
    path = write_report(args.run_dir, args.out, top=args.top, heldout_fraction=args.heldout_fraction,
                        seed=args.seed, refit=not args.no_refit, check_heldout=not args.no_heldout)
    print(path)
    return 0


def _mb(n) -> str:
    return f"{(n or 0) / 2**20:.0f} MB"


def build_parser() -> argparse.ArgumentParser:
    p = argparse.ArgumentParser(prog="cliquewise", description="Overlapping weighted groups in large interaction networks.")
    p.add_argument("--version", action="version", version=f"cliquewise {__version__}")
    p.add_argument("--debug", action="store_true", help="show tracebacks and debug logging")
    p.add_argument("--quiet", action="store_true", help="no progress bars")
    common = argparse.ArgumentParser(add_help=False)
    common.add_argument("--debug", action="store_true", default=argparse.SUPPRESS, help="show tracebacks")
    common.add_argument("--quiet", action="store_true", default=argparse.SUPPRESS, help="no progress bars")
    sub = p.add_subparsers(dest="command", metavar="COMMAND")
    _orig_add = sub.add_parser

    def add_parser(name, **kw):
        return _orig_add(name, parents=[common], **kw)

    sub.add_parser = add_parser

    r = sub.add_parser("run", help="run the whole job on an export")
    _add_run_options(r)
    r.set_defaults(func=cmd_run)

    r = sub.add_parser("resume", help="continue a run from its checkpoints")
    r.add_argument("run_dir")
    _add_engine(r)
    r.set_defaults(func=cmd_resume)

    r = sub.add_parser("status", help="each stage's state, time, memory and counts")
    r.add_argument("run_dir")
    r.add_argument("--json", action="store_true")
    r.set_defaults(func=cmd_status)

    r = sub.add_parser("profile", help="time, memory, work and throughput of every stage and sub-step")
    r.add_argument("run_dir")
    r.add_argument("--json", action="store_true", help="print the table as JSON")
    r.add_argument("--png", metavar="FILE", help="bar chart file (default RUN_DIR/profile.png)")
    r.add_argument("--no-png", action="store_true", help="no chart")
    r.set_defaults(func=cmd_profile)

    r = sub.add_parser("scale", help="simulate exports of growing size, run each, fit the cost's slope against edges")
    r.add_argument("--out", required=True, metavar="DIR", help="where the exports, runs, scale.json and scale.png go")
    r.add_argument("--sizes", default="1e5,1e6,1e7", metavar="N,N,...", help="edge counts (default 1e5,1e6,1e7)")
    r.add_argument("--seed", type=int, default=1)
    r.add_argument("--levels", metavar="all|N|LIST", help="candidate levels, as for run (default all)")
    r.add_argument("--max-slope", type=float, default=1.10, help="slope still called about linear (default 1.10)")
    r.add_argument("--json", action="store_true", help="print scale.json")
    _add_engine(r)
    r.set_defaults(func=cmd_scale)

    r = sub.add_parser("simulate", help="write an invented export with planted groups")
    r.add_argument("--out", required=True, metavar="DIR")
    r.add_argument("--nodes", type=int, default=10_000)
    r.add_argument("--seed", type=int, default=0)
    r.add_argument("--labels", choices=["str", "int"], default="str")
    r.add_argument("--intensity", choices=["lognormal", "pareto"], default="lognormal")
    r.add_argument("--levels", type=int, default=None, help="round intensities onto about this many values")
    r.add_argument("--events", action="store_true", help="one row per interaction with a time column")
    r.set_defaults(func=cmd_simulate)

    r = sub.add_parser("export", help="the strongest groups as GraphML/GEXF, or a membership table")
    r.add_argument("run_dir")
    r.add_argument("--format", required=True, choices=["graphml", "gexf", "parquet", "csv"],
                   help="graphml or gexf: a person-group graph; parquet or csv: the membership table")
    r.add_argument("--top", type=_top_arg, metavar="N|all",
                   help="the N strongest kept groups (default 100; all for the long table)")
    r.add_argument("--layout", choices=["long", "wide"], default="long",
                   help="membership table: one row per membership (long) or per person with a 0/1 column per group (wide)")
    r.add_argument("--out", metavar="FILE", help="where to write (default RUN_DIR/exports/...)")
    r.set_defaults(func=cmd_export)

    r = sub.add_parser("batch", help="many networks: one resumable run each, and a covariates table")
    _add_run_options(r)
    for act in r._actions:  # the shared run options, worded for a batch
        if act.dest == "run_dir":
            act.help = argparse.SUPPRESS
        elif act.dest == "pipeline":
            act.help = "a batch file: a pipeline file (TOML) with a [batch] table; options below override it"
        elif act.dest == "edges":
            act.help = "one export holding every network, told apart by a network column (--network)"
    g = r.add_argument_group("batch")
    g.add_argument("--batch-dir", metavar="DIR", help="where the batch keeps its runs and covariates.parquet; "
                   "alone, it resumes that batch")
    g.add_argument("--network", metavar="COL", help="with --edges: the column naming each row's network (default network)")
    g.add_argument("--folders", metavar="DIR", help="instead of --edges: one dataset per subfolder of DIR")
    g.add_argument("--inside", metavar="PATH", help="with --folders: where the data sits inside each subfolder (e.g. export)")
    g.add_argument("--parallel", type=int, metavar="N", help="networks at a time (default: one per core or worker thread)")
    g.add_argument("--threads-per-network", type=int, metavar="N", help="engine threads inside each network")
    g.add_argument("--heldout-fraction", type=float, metavar="F", help="share of each count held out for heldout_gain (default 0.5)")
    g.add_argument("--seed", type=int, help="seed of the held-out split (default 0)")
    r.set_defaults(func=cmd_batch)

    r = sub.add_parser("report", help="one self-contained HTML report about a finished run")
    r.add_argument("run_dir")
    r.add_argument("--out", metavar="FILE", help="where to write (default RUN_DIR/report.html)")
    r.add_argument("--top", type=int, default=20, metavar="N", help="strongest groups listed (default 20)")
    r.add_argument("--heldout-fraction", type=float, default=0.5, metavar="F",
                   help="share of each count held out for the held-out check (default 0.5)")
    r.add_argument("--seed", type=int, default=0, help="seed of the held-out split (default 0)")
    r.add_argument("--no-refit", action="store_true", help="compression curve without refitting (faster)")
    r.add_argument("--no-heldout", action="store_true", help="skip the held-out check (it reruns the pipeline)")
    r.set_defaults(func=cmd_report)
    return p


def main(argv=None) -> int:
    parser = build_parser()
    args = parser.parse_args(argv)
    logging.basicConfig(level=logging.WARNING, format="%(levelname)s %(name)s: %(message)s")
    logging.getLogger("cliquewise").setLevel(logging.DEBUG if args.debug else logging.WARNING)
    if not getattr(args, "func", None):
        parser.print_help()
        return EXIT_USER
    from cliquewise.config import ConfigError
    from cliquewise.engine import EngineError
    from cliquewise.stage import InputError
    from cliquewise.store import StoreError

    try:
        return args.func(args)
    except (InputError, ConfigError, StoreError, EngineError, _UserError) as exc:
        if args.debug:
            raise
        print(f"cliquewise: error: {exc}", file=sys.stderr)
        return EXIT_USER
    except OSError as exc:
        if args.debug:
            raise
        where = f" ({exc.filename})" if getattr(exc, "filename", None) else ""
        print(f"cliquewise: error: {exc.strerror or exc}{where}", file=sys.stderr)
        return EXIT_USER
    except KeyboardInterrupt:
        print("cliquewise: interrupted; 'cliquewise resume RUN_DIR' continues from the last checkpoint", file=sys.stderr)
        return 130
    except Exception as exc:  # noqa: BLE001
        if args.debug:
            raise
        print(f"cliquewise: internal error: {type(exc).__name__}: {exc} (rerun with --debug for details)", file=sys.stderr)
        return EXIT_BUG


if __name__ == "__main__":
    sys.exit(main())
