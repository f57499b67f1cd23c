"""``cliquewise report RUN_DIR``: one self-contained HTML file about a finished run.

Sections: the caution, the export and its validation counts, the fit, the stage
profile, group sizes, the intensity spectrum and concentration, the compression
curve against the spectral baseline, the held-out check, and the strongest
groups with their members and standard errors. Plots are PNGs drawn with
matplotlib's Agg canvas (pyplot's global state is not touched) and inlined as
base64, so the file needs nothing else to be read or mailed. The file is written
to a temporary name and renamed, so a half-written report never has the final
name.

Each analysis that fails (say counts that are not whole numbers, for the
held-out check) leaves a one-line note in its section instead of stopping the
report.
"""

from __future__ import annotations

import base64
import datetime as _dt
import html
import io
import json
import math
import os
from pathlib import Path

import numpy as np
import pandas as pd
import pyarrow.parquet as pq
from matplotlib.backends.backend_agg import FigureCanvasAgg
from matplotlib.figure import Figure

from cliquewise import __version__
from cliquewise.analysis import curves, heldout, uncertainty
from cliquewise.analysis.profile import stage_profile
from cliquewise.analysis.rundata import load_run
from cliquewise.store import RunStore, StoreError, read_json

__all__ = ["write_report", "CAUTION"]

CAUTION = ("The model describes patterns of interaction, not intent. A group is a set of people who interact "
           "more than the rest of the network explains; it says nothing about why. Findings about people need "
           "human review under local law and policy before any decision rests on them.")

CSS = """
body{font-family:-apple-system,"Segoe UI",Helvetica,Arial,sans-serif;max-width:1040px;margin:2em auto;
padding:0 1em;color:#1d232a;line-height:1.45}
h1{font-size:1.7em;margin-bottom:.2em} h2{border-bottom:2px solid #d8dee4;padding-bottom:.2em;margin-top:1.8em}
.meta{color:#59636e;font-size:.9em}
.caution{background:#fff4e5;border-left:6px solid #d97706;padding:.8em 1em;margin:1.2em 0;font-size:1.02em}
table{border-collapse:collapse;margin:.6em 0;font-size:.92em}
th,td{border:1px solid #d8dee4;padding:.25em .6em;text-align:right;vertical-align:top;white-space:nowrap}
th{background:#f3f5f7} td.l,th.l{text-align:left;white-space:normal}
.kv td:first-child{text-align:left;color:#3b444e}
img{max-width:100%;border:1px solid #e5e8eb;margin:.4em 0}
.note{color:#59636e;font-size:.9em}
.ok{color:#1a7f37;font-weight:600} .bad{color:#cf222e;font-weight:600}
nav a{margin-right:.9em}
.m{display:inline-block;background:#eef2f6;border-radius:3px;padding:0 .3em;margin:0 .25em .2em 0}
"""


# -- small helpers ---------------------------------------------------------------------------------

def _png(fig: Figure) -> str:
    buf = io.BytesIO()
    FigureCanvasAgg(fig)
    fig.savefig(buf, format="png", dpi=110, bbox_inches="tight")
    return f'<img alt="plot" src="data:image/png;base64,{base64.b64encode(buf.getvalue()).decode("ascii")}">'


def _fmt(x, digits: int = 4) -> str:
    if x is None:
        return "&ndash;"
    if isinstance(x, (bool, np.bool_)):
        return "yes" if x else "no"
    if isinstance(x, (int, np.integer)):
        return f"{int(x):,}"
    if isinstance(x, (float, np.floating)):
        if not math.isfinite(x):
            return "&infin;" if x > 0 else ("&minus;&infin;" if x < 0 else "&ndash;")
        if x != 0 and (abs(x) >= 1e6 or abs(x) < 1e-3):
            return f"{x:.{digits - 1}e}"
        return f"{x:,.{digits}g}" if abs(x) < 1e4 else f"{x:,.0f}"
    return html.escape(str(x))


def _kv(rows) -> str:
    body = "".join(f"<tr><td>{html.escape(k)}</td><td>{v if isinstance(v, str) and v.startswith('<') else _fmt(v)}</td></tr>"
                   for k, v in rows)
    return f'<table class="kv">{body}</table>'


def _table(df: pd.DataFrame, left=()) -> str:
    head = "".join(f'<th class="{"l" if c in left else ""}">{html.escape(str(c))}</th>' for c in df.columns)
    body = []
    for row in df.itertuples(index=False):
        cells = []
        for c, v in zip(df.columns, row):
            text = html.escape(v) if isinstance(v, str) else _fmt(v)
            cells.append(f'<td class="{"l" if c in left else ""}">{text}</td>')
        body.append("<tr>" + "".join(cells) + "</tr>")
    return f"<table><tr>{head}</tr>{''.join(body)}</table>"


def _section(anchor: str, title: str, body: str) -> str:
    return f'<h2 id="{anchor}">{html.escape(title)}</h2>\n{body}\n'


def _failed(what: str, exc: Exception) -> str:
    return f'<p class="note">{html.escape(what)} could not be computed: {html.escape(str(exc))}</p>'


# -- sections --------------------------------------------------------------------------------------

def _export_section(root: Path, summary: dict) -> str:
    rep = read_json(root / "ingest" / "report.json")
    dropped = rep.get("rows_dropped", {})
    balance = rep["rows_read"] == rep["rows_kept"] + rep.get("rows_dropped_total", sum(dropped.values()))
    merged = rep["rows_kept"] == rep["pairs"] + rep.get("rows_merged", 0)
    check = lambda ok: '<span class="ok">holds</span>' if ok else '<span class="bad">does not hold</span>'  # noqa: E731
    rows = [("rows read", rep["rows_read"]), ("rows kept", rep["rows_kept"])]
    rows += [(f"rows dropped: {k.replace('_', ' ')}", v) for k, v in dropped.items()]
    rows += [("rows merged into an earlier pair (duplicates, reciprocal rows)", rep.get("rows_merged", 0)),
             ("distinct pairs (edges)", rep["pairs"]), ("people (nodes)", rep["nodes"]),
             ("total weight", rep.get("weight_total")),
             ("weight range", f"{_fmt(rep.get('weight_min'))} to {_fmt(rep.get('weight_max'))}"),
             ("weights are whole numbers", rep.get("weights_integral")),
             ("duplicates combined by", rep.get("merge", "")),
             ("rows read = rows kept + rows dropped", check(balance)),
             ("rows kept = pairs + rows merged", check(merged))]
    detail = rep.get("invalid_weight_detail") or {}
    if any(detail.values()):
        rows += [(f"invalid weights: {k.replace('_', ' ')}", v) for k, v in detail.items()]
    return _kv(rows)


def _fit_section(summary: dict) -> str:
    rows = [("candidate groups", summary.get("candidates")), ("groups kept (intensity > 0)", summary.get("groups_kept")),
            ("candidates per kept group", summary.get("redundancy")), ("weight thresholds (levels)", summary.get("levels")),
            ("log-likelihood", summary.get("loglik")), ("EM iterations", summary.get("iterations")),
            ("converged", summary.get("converged")), ("fitted total / observed total",
                                                       f"{_fmt(summary.get('fitted_total'))} / {_fmt(summary.get('weight_total'))}")]
    return _kv(rows)


def _profile_section(root: Path) -> str:
    rows = stage_profile(root)
    if not rows:
        return '<p class="note">No stage manifests found.</p>'
    df = pd.DataFrame([{
        "stage": r["stage"], "step": r["step"], "wall s": r["wall_seconds"], "cpu s": r["cpu_seconds"],
        "peak MB": (r["peak_rss_bytes"] / 2 ** 20 if r["peak_rss_bytes"] else None),
        "throughput": (f"{r['throughput']:.3g} {r['throughput_unit']}" if r["throughput"] else ""),
    } for r in rows])
    top = df[df.step == ""]
    fig = Figure(figsize=(7, 2.4))
    ax = fig.add_subplot()
    ax.barh(top.stage[::-1], top["wall s"][::-1], color="#4c78a8")
    ax.set_xlabel("wall seconds")
    ax.set_title("time per stage")
    return _png(fig) + _table(df.astype(object).where(df.notna(), ""), left=("stage", "step", "throughput"))


def _sizes_section(cl: pd.DataFrame) -> str:
    kept = cl[cl.intensity > 0]
    fig = Figure(figsize=(8, 3.2))
    ax = fig.add_subplot()
    allc = cl["size"].value_counts().sort_index()
    kc = kept["size"].value_counts().sort_index()
    ax.bar(allc.index - 0.2, allc.values, width=0.4, label="candidates", color="#bab0ac")
    ax.bar(kc.index + 0.2, kc.values, width=0.4, label="kept groups", color="#4c78a8")
    ax.set_yscale("log")
    ax.set_xlabel("group size (members)")
    ax.set_ylabel("number of groups")
    ax.legend()
    ax.set_title("group size distribution")
    stats = _kv([("kept groups", len(kept)), ("median size", float(kept["size"].median()) if len(kept) else None),
                 ("largest kept group", int(kept["size"].max()) if len(kept) else None)])
    return _png(fig) + stats


def _spectrum_section(cl: pd.DataFrame, conc: dict | None, conc_err: Exception | None) -> str:
    kept = cl[cl.intensity > 0]
    fig = Figure(figsize=(10, 3.4))
    ax1, ax2 = fig.subplots(1, 2)
    rank = np.arange(1, len(kept) + 1)
    ax1.loglog(rank, np.sort(kept.intensity.to_numpy())[::-1], ".", ms=3, color="#4c78a8")
    ax1.set_xlabel("rank")
    ax1.set_ylabel("intensity (interactions per pair)")
    ax1.set_title("intensity spectrum")
    ew = kept.expected_weight.to_numpy()
    share = np.cumsum(ew) / ew.sum() if len(ew) and ew.sum() > 0 else np.zeros(0)
    ax2.plot(rank / max(len(kept), 1), share, color="#4c78a8", label="groups, strongest first")
    level = conc["level"] if conc else 0.9
    ax2.axhline(level, color="#999", lw=0.8, ls="--")
    if conc and math.isfinite(conc["spectral_fraction"]):
        ax2.axvline(conc["spectral_fraction"], color="#e45756", lw=1, ls=":",
                    label=f"eigenpairs for {level:.0%} of spectral energy")
    ax2.set_xlabel("fraction of kept groups")
    ax2.set_ylabel("share of fitted weight")
    ax2.set_title("concentration")
    ax2.legend(loc="lower right", fontsize=8)
    body = _png(fig)
    if conc:
        body += _kv([(f"fraction of groups holding {level:.0%} of the fitted weight", conc["groups_fraction"]),
                     (f"fraction of eigenpairs holding {level:.0%} of the spectral energy", conc["spectral_fraction"]),
                     ("eigenpairs needed / nodes with an edge", f"{_fmt(conc['eigenpairs_needed'])} / {_fmt(conc['n_active'])}"),
                     ("spectral count", "exact (eigsh)" if conc["spectral_method"] == "eigsh"
                      else "estimated (stochastic Lanczos quadrature)")])
        body += ('<p class="note">Lower fractions mean the structure is concentrated in few groups (or few '
                 'eigenpairs). A random graph with the same total weight needs most of its groups.</p>')
    elif conc_err:
        body += _failed("The concentration", conc_err)
    return body


def _compression_section(curve: pd.DataFrame | None, err: Exception | None) -> str:
    if curve is None:
        return _failed("The compression curve", err)
    fig = Figure(figsize=(10, 3.6))
    ax1, ax2 = fig.subplots(1, 2)
    ax1.plot(curve.fraction, curve.frobenius_rel, "o-", ms=3, label="groups (full-fit intensities)", color="#4c78a8")
    if curve.frobenius_rel_refit.notna().any():
        ax1.plot(curve.fraction, curve.frobenius_rel_refit, "s--", ms=3, label="groups, refitted", color="#72b7b2")
    ax1.plot(curve.fraction, curve.spectral_frobenius_rel, "^-", ms=3, label="spectral, same budget", color="#e45756")
    ax1.set_xscale("log")
    ax1.set_ylim(0, max(1.05, float(np.nanmax(curve[["frobenius_rel", "spectral_frobenius_rel"]].to_numpy())) * 1.05))
    ax1.set_xlabel("fraction of kept groups")
    ax1.set_ylabel("relative Frobenius error (all pairs)")
    ax1.legend(fontsize=8)
    ax1.set_title("reconstruction error")
    ax2.plot(curve.fraction, curve.deviance, "o-", ms=3, label="groups", color="#4c78a8")
    if curve.deviance_refit.notna().any():
        ax2.plot(curve.fraction, curve.deviance_refit, "s--", ms=3, label="groups, refitted", color="#72b7b2")
    ax2.set_xscale("log")
    if (curve.deviance > 0).all():
        ax2.set_yscale("log")
    ax2.set_xlabel("fraction of kept groups")
    ax2.set_ylabel("Poisson deviance (all pairs)")
    ax2.legend(fontsize=8)
    ax2.set_title("deviance")
    table = curve.rename(columns={"frobenius_rel": "Frobenius", "deviance": "deviance",
                                  "frobenius_rel_refit": "Frobenius refit", "deviance_refit": "deviance refit",
                                  "spectral_rank": "spectral rank", "spectral_frobenius_rel": "spectral Frobenius"})
    note = ('<p class="note">Errors over all unordered pairs, zero counts included. The weight of the groups '
            'left out is spread evenly over all pairs. The spectral baseline keeps the eigenpairs of largest '
            'magnitude, as many as fit in the numbers the groups store (one intensity and one id per member '
            'for a group; one value per node with an edge for an eigenvector).</p>')
    return _png(fig) + note + _table(table)


def _heldout_section(res: dict | None, err: Exception | None) -> str:
    if res is None:
        return _failed("The held-out check", err)
    names = ["groups", "independence", "spectral"]
    per = [res[f"loglik_{k}"] / res["test_weight_evaluated"] for k in ("model", "independence", "spectral")]
    fig = Figure(figsize=(6, 2.6))
    ax = fig.add_subplot()
    ax.barh(names[::-1], per[::-1], color=["#e45756", "#bab0ac", "#4c78a8"])
    ax.set_xlabel("held-out log-likelihood per held-out interaction (nats, higher is better)")
    ax.set_title("held-out check")
    rows = [("share of each count held out", res["fraction"]), ("thinning seed", res["seed"]),
            ("pairs scored (positive training count)", res["pairs_evaluated"]),
            ("held-out weight scored", res["test_weight_evaluated"]),
            ("held-out weight on pairs unseen in training (not scored)", res["test_weight_unseen"]),
            ("log-likelihood: groups", res["loglik_model"]),
            ("log-likelihood: degree-corrected independence", res["loglik_independence"]),
            (f"log-likelihood: spectral, rank {res['spectral_rank']}", res["loglik_spectral"]),
            ("gain over independence (nats per held-out interaction)", res["gain_over_independence"]),
            ("gain over spectral (nats per held-out interaction)", res["gain_over_spectral"]),
            ("groups kept in the training fit", res["groups_kept_train"])]
    note = ('<p class="note">Every count was split by a binomial draw into a training and a held-out part '
            '(Poisson data thinning); the pipeline was rerun on the training part and each model, scaled to '
            'the held-out share, scored on the held-out counts. Positive gains mean the groups predict new '
            'interactions better than the baseline.</p>')
    return _png(fig) + note + _kv(rows)


def _groups_section(root: Path, cl: pd.DataFrame, se: pd.DataFrame | None, err: Exception | None,
                    top: int, members_shown: int) -> str:
    kept = cl[cl.intensity > 0].head(top)
    if kept.empty:
        return '<p class="note">No groups were kept.</p>'
    mem = pq.read_table(root / "results" / "members.parquet",
                        filters=[("clique_id", "<=", int(kept.clique_id.max()))]).to_pandas()
    listed = mem.groupby("clique_id")["label"].agg(list)
    columns = ["group", "size", "intensity"] + (["std. error", "95% interval"] if se is not None else []) + \
        ["expected weight", "share", "levels", "members"]
    s = se.set_index("clique_id") if se is not None else None
    body = []
    for r in kept.itertuples(index=False):
        cells = [_fmt(int(r.clique_id)), _fmt(int(r.size)), _fmt(r.intensity)]
        if s is not None:
            e = float(s.se.get(r.clique_id, np.nan))
            cells.append(_fmt(e))
            cells.append(f"{s.ci_low[r.clique_id]:.3g} to {s.ci_high[r.clique_id]:.3g}"
                         if r.clique_id in s.index and math.isfinite(e) else "not identifiable")
        labels = [html.escape(str(x)) for x in listed.get(r.clique_id, [])]
        more = len(labels) - members_shown
        cells += [_fmt(r.expected_weight), _fmt(r.share), f"{r.level_min:g} to {r.level_max:g}",
                  "".join(f'<span class="m">{x}</span>' for x in labels[:members_shown])
                  + (f" &hellip; and {more} more" if more > 0 else "")]
        body.append("<tr>" + "".join(f'<td class="{"l" if c == "members" else ""}">{v}</td>'
                                     for c, v in zip(columns, cells)) + "</tr>")
    head = "".join(f'<th class="{"l" if c == "members" else ""}">{html.escape(c)}</th>' for c in columns)
    table = f"<table><tr>{head}</tr>{''.join(body)}</table>"
    note = ('<p class="note">Standard errors from the observed Fisher information of the Poisson model with '
            'the groups held fixed (see docs/outputs.md for the assumptions: independent Poisson counts, '
            'groups chosen from the same data, so the errors are optimistic).</p>')
    if se is None and err is not None:
        note = _failed("Standard errors", err)
    return note + table


# -- the report ------------------------------------------------------------------------------------

def write_report(run_dir, out=None, *, top: int = 20, members_shown: int = 15, heldout_fraction: float = 0.5,
                 seed: int = 0, refit: bool = True, check_heldout: bool = True) -> Path:
    """Write the HTML report of a finished run.

    Parameters
    ----------
    run_dir : str or Path
        A run with complete results.
    out : str or Path, optional
        The HTML file; ``RUN_DIR/report.html`` by default.
    top : int
        Strongest groups listed (with standard errors).
    members_shown : int
        Members listed per group before "and N more".
    heldout_fraction, seed : float, int
        Held-out share and thinning seed of the held-out check.
    refit : bool
        Include refitted errors in the compression curve.
    check_heldout : bool
        Run the held-out check (it reruns the pipeline on the training part).

    Returns
    -------
    Path
        The file written.

    Raises
    ------
    StoreError
        When the run has no complete results.
    """
    root = Path(run_dir).resolve()
    store = RunStore(root, create=False)
    ok, why = store.verify("results", checksums=False)
    if not ok:
        raise StoreError(f"{root}: no complete results ({why}); run or resume it first")
    out = Path(out) if out else root / "report.html"
    summary = read_json(root / "results" / "summary.json")
    cl = pd.read_parquet(root / "results" / "cliques.parquet")
    run = load_run(root)

    def attempt(fn, *a, **k):
        try:
            return fn(*a, **k), None
        except (ValueError, RuntimeError, StoreError, MemoryError) as exc:
            return None, exc

    curve, curve_err = attempt(curves.compression_curve, run, refit=refit, seed=seed)
    conc, conc_err = attempt(curves.concentration, run, seed=seed)
    if check_heldout:
        held, held_err = attempt(heldout.heldout_check, run, fraction=heldout_fraction, seed=seed)
    else:
        held, held_err = None, ValueError("skipped (check_heldout=False)")
    se, se_err = attempt(uncertainty.standard_errors, run, top=top)
    caution = html.escape(summary.get("caution") or CAUTION)

    parts = [
        "<!DOCTYPE html><html lang='en'><head><meta charset='utf-8'>",
        f"<title>cliquewise report: {html.escape(root.name)}</title><style>{CSS}</style></head><body>",
        f"<h1>cliquewise report: {html.escape(root.name)}</h1>",
        f'<p class="meta">run directory {html.escape(str(root))} &middot; written '
        f'{_dt.datetime.now().strftime("%Y-%m-%d %H:%M")} by cliquewise {__version__}</p>',
        f'<div class="caution"><b>Caution.</b> {caution}</div>',
        '<nav><a href="#export">export</a><a href="#fit">fit</a><a href="#profile">profile</a>'
        '<a href="#sizes">sizes</a><a href="#spectrum">intensities</a><a href="#compression">compression</a>'
        '<a href="#heldout">held-out</a><a href="#groups">strongest groups</a></nav>',
        _section("export", "Export and validation", _export_section(root, summary)),
        _section("fit", "Fit", _fit_section(summary)),
        _section("profile", "Stage profile", _profile_section(root)),
        _section("sizes", "Group sizes", _sizes_section(cl)),
        _section("spectrum", "Intensity spectrum and concentration", _spectrum_section(cl, conc, conc_err)),
        _section("compression", "Compression curve and spectral baseline", _compression_section(curve, curve_err)),
        _section("heldout", "Held-out check", _heldout_section(held, held_err)),
        _section("groups", f"Strongest {top} groups", _groups_section(root, cl, se, se_err, top, members_shown)),
        f'<div class="caution"><b>Caution.</b> {caution}</div>',
        "</body></html>",
    ]
    out.parent.mkdir(parents=True, exist_ok=True)
    tmp = out.with_name(out.name + ".tmp")
    tmp.write_text("\n".join(parts), encoding="utf-8")
    os.replace(tmp, out)
    return out
