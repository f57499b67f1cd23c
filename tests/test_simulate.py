"""Tests for the Harbourview export generator (cliquewise.simulate).

Outside references: scipy.stats (norm, chi2, poisson, chisquare, kstest, lognorm,
truncpareto, zipfian, nbinom), pandas groupby / merge for pair aggregation and for
listing the pairs of every planted group, itertools.combinations and Python string
formatting for the small helpers.
"""

from __future__ import annotations

import itertools
import json
import math
import re

import numpy as np
import pandas as pd
import pyarrow.parquet as pq
import pytest
import scipy.stats as st

from cliquewise import simulate as sim
from cliquewise.simulate import nodes_for_edges, simulate

# Tolerance used by the statistical checks: |z| < Z_TOL. With a fixed seed each
# check is deterministic; under the model a fresh seed would fail it with
# probability about 6e-5 (two-sided normal tail at 4, from scipy.stats.norm).
Z_TOL = 4.0


# --------------------------------------------------------------------------- helpers


def read_export(out) -> pd.DataFrame:
    files = sorted((out / "export").glob("part-*.parquet"))
    return pd.concat([pd.read_parquet(f) for f in files], ignore_index=True)


def pair_sums(df: pd.DataFrame) -> pd.Series:
    """Summed count per unordered pair (pandas groupby on the sorted pair)."""
    lo = np.minimum(df["source"].to_numpy(), df["target"].to_numpy())
    hi = np.maximum(df["source"].to_numpy(), df["target"].to_numpy())
    w = df["weight"].to_numpy() if "weight" in df else np.ones(len(df), dtype=np.int64)
    return pd.DataFrame({"lo": lo, "hi": hi, "w": w}).groupby(["lo", "hi"])["w"].sum()


def planted_pairs(out) -> pd.DataFrame:
    """Every pair inside every planted group, with that group's rate (pandas self-merge)."""
    mem = pd.read_parquet(out / "truth" / "members.parquet")
    grp = pd.read_parquet(out / "truth" / "groups.parquet")
    both = mem.merge(mem, on="group_id")
    both = both[both["label_x"] < both["label_y"]]
    both = both.merge(grp[["group_id", "intensity"]], on="group_id")
    return both.rename(columns={"label_x": "lo", "label_y": "hi"})


def covered(out, export: pd.DataFrame, times: int) -> pd.DataFrame:
    """Pairs inside exactly ``times`` groups: summed planted rate and observed count."""
    pp = planted_pairs(out)
    per = pp.groupby(["lo", "hi"]).agg(n=("group_id", "size"), mu=("intensity", "sum"))
    per = per[per["n"] == times]
    obs = pair_sums(export).rename("y")
    per = per.join(obs, how="left")
    per["y"] = per["y"].fillna(0).astype(np.int64)
    return per


def merge_small_bins(obs: np.ndarray, exp: np.ndarray, least: float = 5.0):
    """Pool the bins whose expected count is below ``least`` into one (chi-square rule of thumb)."""
    keep = exp >= least
    if keep.all():
        return obs, exp
    return np.append(obs[keep], obs[~keep].sum()), np.append(exp[keep], exp[~keep].sum())


def z_mean(y: np.ndarray, mu: np.ndarray) -> float:
    """z of the summed residual: sum(y - mu) / sqrt(sum mu), N(0, 1) for Poisson counts."""
    return float((y - mu).sum() / math.sqrt(mu.sum()))


def z_dispersion(y: np.ndarray, mu: np.ndarray) -> float:
    """z of D = sum (y-mu)^2/mu; for Poisson E[D] = N, Var[D] = sum(2 + 1/mu)."""
    d = ((y - mu) ** 2 / mu).sum()
    return float((d - y.size) / math.sqrt((2.0 + 1.0 / mu).sum()))


# --------------------------------------------------------------------------- fixtures


@pytest.fixture(scope="module")
def base(tmp_path_factory):
    """No noise, three intensity levels, integer labels: the Poisson checks."""
    out = tmp_path_factory.mktemp("base")
    summary = simulate(out, nodes=20_000, seed=3, noise=0.0, levels=3, labels="int", size_range=(2, 40),
                       rows_per_partition=50_000)
    return out, summary, read_export(out)


@pytest.fixture(scope="module")
def noisy(tmp_path_factory):
    out = tmp_path_factory.mktemp("noisy")
    summary = simulate(out, nodes=8_000, seed=11, noise=0.5, labels="int")
    return out, summary, read_export(out)


# --------------------------------------------------------------------------- Poisson model


def test_single_group_pairs_have_poisson_mean(base):
    out, _, export = base
    per = covered(out, export, 1)
    assert len(per) > 100_000
    y, mu = per["y"].to_numpy(float), per["mu"].to_numpy()
    z = z_mean(y, mu)
    assert abs(z) < Z_TOL, z
    # the check has power: rates off by 3 % are rejected on the same data
    assert abs(z_mean(y, 1.03 * mu)) > Z_TOL
    # per level, the sample mean is within Z_TOL standard errors (scipy.stats.norm p-value)
    for m_val, part in per.groupby("mu"):
        if len(part) < 1000:
            continue
        se = math.sqrt(m_val / len(part))
        z = (part["y"].mean() - m_val) / se
        assert 2 * st.norm.sf(abs(z)) > 2 * st.norm.sf(Z_TOL), (m_val, z)


def test_single_group_pairs_variance_equals_mean(base):
    out, _, export = base
    per = covered(out, export, 1)
    y, mu = per["y"].to_numpy(float), per["mu"].to_numpy()
    assert abs(z_dispersion(y, mu)) < Z_TOL
    # dispersion test against scipy.stats.chi2 with N degrees of freedom
    d = ((y - mu) ** 2 / mu).sum()
    assert st.chi2.sf(d, y.size) > 1e-4 and st.chi2.cdf(d, y.size) > 1e-4
    # variance-to-mean ratio per level, tolerance Z_TOL * sqrt((2 + 1/mu) / N)
    for m_val, part in per.groupby("mu"):
        if len(part) < 1000:
            continue
        ratio = part["y"].var() / m_val
        assert abs(ratio - 1) < Z_TOL * math.sqrt((2 + 1 / m_val) / len(part)), (m_val, ratio)
    # the check has power: overdispersed counts with the same means
    # (scipy.stats.nbinom, variance 1.1 * mean) are rejected
    r = 10.0 * mu
    fake = st.nbinom(r, r / (r + mu)).rvs(random_state=np.random.default_rng(0))
    assert z_dispersion(fake.astype(float), mu) > Z_TOL


def test_single_group_counts_follow_poisson_pmf(base):
    """Chi-square goodness of fit of the counts at each level to scipy.stats.poisson."""
    out, _, export = base
    per = covered(out, export, 1)
    tested = 0
    for m_val, part in per.groupby("mu"):
        if len(part) < 1000:
            continue
        n = len(part)
        top = int(st.poisson.ppf(1 - 5.0 / n, m_val))  # bins 0..top-1 plus a tail bin
        obs = np.bincount(np.minimum(part["y"].to_numpy(), top), minlength=top + 1)
        exp = n * np.append(st.poisson.pmf(np.arange(top), m_val), st.poisson.sf(top - 1, m_val))
        obs, exp = merge_small_bins(obs, exp)
        assert st.chisquare(obs, exp).pvalue > 1e-4, m_val
        tested += 1
    assert tested >= 2


def test_pairs_in_two_groups_sum_rates(base):
    """Duplicate rows of a shared pair sum to Poisson(mu_1 + mu_2)."""
    out, _, export = base
    per = covered(out, export, 2)
    assert len(per) > 2_000
    y, mu = per["y"].to_numpy(float), per["mu"].to_numpy()
    assert abs(z_mean(y, mu)) < Z_TOL
    assert abs(z_dispersion(y, mu)) < Z_TOL
    # shared pairs really arrive as several rows (the export has duplicate pairs)
    lo = np.minimum(export["source"], export["target"])
    hi = np.maximum(export["source"], export["target"])
    assert pd.DataFrame({"lo": lo, "hi": hi}).duplicated().sum() > 1_000


def test_export_rows_are_planted_pairs_without_noise(base):
    out, summary, export = base
    pp = planted_pairs(out)
    planted = set(zip(pp["lo"], pp["hi"]))
    sums = pair_sums(export)
    assert set(sums.index) <= planted
    assert (export["weight"] > 0).all()
    assert (export["source"] != export["target"]).all()
    grp = pd.read_parquet(out / "truth" / "groups.parquet")
    assert grp["observed_weight"].sum() == export["weight"].sum() == summary["total_weight"]
    assert grp["observed_pairs"].sum() == len(export) == summary["rows_written"]
    assert summary["noise"]["rows"] == 0
    # a fair coin sets each row's direction: of a pair written twice (two groups),
    # the two rows point opposite ways with probability 1/2
    lo = np.minimum(export["source"], export["target"])
    hi = np.maximum(export["source"], export["target"])
    rows = pd.DataFrame({"lo": lo, "hi": hi, "fwd": export["source"] < export["target"]})
    per = rows.groupby(["lo", "hi"])["fwd"].agg(["size", "sum"])
    twice = per[per["size"] == 2]
    assert len(twice) > 1_000
    mixed = (twice["sum"] == 1).mean()
    assert abs(mixed - 0.5) < Z_TOL * 0.5 / math.sqrt(len(twice))


def test_one_giant_component(base):
    """Locality windows on a ring plus long-range members: one giant component
    (scipy.sparse.csgraph.connected_components on the export)."""
    from scipy.sparse import coo_matrix
    from scipy.sparse.csgraph import connected_components

    _, summary, export = base
    n = summary["parameters"]["nodes"]
    adj = coo_matrix((np.ones(len(export)), (export["source"], export["target"])), shape=(n, n))
    _, comp = connected_components(adj, directed=False)
    sizes = np.bincount(comp)
    assert sizes.max() > 0.95 * summary["nodes_in_groups"]
    assert summary["nodes_in_groups"] < n  # a few residents belong to no group


# --------------------------------------------------------------------------- truth tables


def test_truth_tables_match_members(base):
    out, summary, _ = base
    grp = pd.read_parquet(out / "truth" / "groups.parquet")
    mem = pd.read_parquet(out / "truth" / "members.parquet")
    assert grp["group_id"].tolist() == list(range(len(grp)))
    assert len(grp) == summary["parameters"]["groups"]
    counts = mem.groupby("group_id")["label"].agg(["size", "nunique"])
    assert (counts["size"].to_numpy() == grp["size"].to_numpy()).all()
    assert (counts["nunique"].to_numpy() == grp["size"].to_numpy()).all()  # distinct members
    assert grp["size"].between(2, 40).all()
    p = grp["size"] * (grp["size"] - 1) / 2
    np.testing.assert_allclose(grp["expected_weight"], grp["intensity"] * p)
    assert (grp["observed_pairs"] <= p).all()
    assert grp["intensity"].nunique() <= 3
    assert set(grp["kind"]) <= {"household", "work crew", "sports club", "choir"}
    saved = json.loads((out / "truth" / "summary.json").read_text())
    assert saved["rows_written"] == summary["rows_written"]
    assert saved["seed"] == 3 and saved["parameters"]["levels"] == 3


def test_group_sizes_follow_truncated_power_law(base):
    """Sizes vs scipy.stats.zipfian(a=2, n=40) conditioned on size >= 2."""
    out, summary, _ = base
    sizes = pd.read_parquet(out / "truth" / "groups.parquet")["size"].to_numpy()
    k = np.arange(2, 41)
    pmf = st.zipfian.pmf(k, sim.SIZE_EXPONENT, 40)
    pmf /= pmf.sum()
    exp = sizes.size * pmf
    obs = np.bincount(sizes, minlength=41)[2:]
    obs, exp = merge_small_bins(obs, exp)
    assert st.chisquare(obs, exp).pvalue > 1e-4
    # default group count: 2.5 memberships per resident on average, mean size from scipy
    mean_size = float((k * pmf).sum())
    assert summary["parameters"]["groups"] == math.ceil(sim.MEAN_MEMBERSHIPS * 20_000 / mean_size)


def test_intensity_laws(tmp_path):
    """KS tests against scipy.stats.lognorm and scipy.stats.truncpareto."""
    s1 = simulate(tmp_path / "ln", nodes=6_000, seed=5, noise=0.0)
    mu = pd.read_parquet(tmp_path / "ln" / "truth" / "groups.parquet")["intensity"]
    ref = st.lognorm(s=sim.LOGNORMAL_SIGMA, scale=sim.LOGNORMAL_MEDIAN)
    assert st.kstest(mu, ref.cdf).pvalue > 1e-4
    assert st.kstest(mu, st.lognorm(s=sim.LOGNORMAL_SIGMA, scale=1.1 * sim.LOGNORMAL_MEDIAN).cdf).pvalue < 1e-4

    s2 = simulate(tmp_path / "pa", nodes=6_000, seed=5, intensity="pareto", noise=0.0)
    mu = pd.read_parquet(tmp_path / "pa" / "truth" / "groups.parquet")["intensity"]
    ref = st.truncpareto(b=sim.PARETO_ALPHA, c=sim.PARETO_HIGH / sim.PARETO_LOW, scale=sim.PARETO_LOW)
    assert st.kstest(mu, ref.cdf).pvalue > 1e-4
    assert mu.max() <= sim.PARETO_HIGH
    # the heavy tail gives many more distinct count levels than the lognormal
    assert s2["distinct_weights"] > 200 > s1["distinct_weights"]
    export = read_export(tmp_path / "pa")
    assert export["weight"].nunique() == s2["distinct_weights"]


def test_levels_snap_intensities(tmp_path):
    s = simulate(tmp_path, nodes=5_000, seed=2, levels=40, intensity="pareto")
    mu = pd.read_parquet(tmp_path / "truth" / "groups.parquet")["intensity"]
    grid = np.geomspace(sim.PARETO_LOW, sim.PARETO_HIGH, 40)
    assert 10 <= mu.nunique() <= 40
    assert np.isin(mu.to_numpy(), grid).all()
    assert s["parameters"]["levels"] == 40


# --------------------------------------------------------------------------- noise


def test_noise_rows_and_counts(noisy):
    out, summary, export = noisy
    nz = summary["noise"]
    exp_rows = 0.5 * summary["group_pairs"]
    assert nz["rows"] + summary["group_rows"] == summary["rows_written"] == len(export)
    assert abs(nz["rows"] - exp_rows) < Z_TOL * math.sqrt(exp_rows)  # Poisson row count
    # rows on pairs outside every group are noise; their counts follow 1 + Poisson(0.5)
    pp = planted_pairs(out)
    planted = pd.MultiIndex.from_arrays([pp["lo"], pp["hi"]]).unique()
    lo = np.minimum(export["source"], export["target"])
    hi = np.maximum(export["source"], export["target"])
    outside = ~pd.MultiIndex.from_arrays([lo, hi]).isin(planted)
    c = export["weight"].to_numpy()[outside]
    assert c.size > 0.95 * nz["rows"]
    obs = np.bincount(np.minimum(c, 4), minlength=5)[1:]
    pmf = st.poisson.pmf(np.arange(3), sim.NOISE_EXTRA_MEAN)
    exp = c.size * np.append(pmf, 1 - pmf.sum())
    assert st.chisquare(obs, exp).pvalue > 1e-4
    assert nz["rate_per_pair"] == pytest.approx(exp_rows * 1.5 / (8_000 * 7_999 / 2))


# --------------------------------------------------------------------------- files, memory, determinism


def test_rows_per_file_bounded_and_partition_independent(tmp_path, base):
    _, ref_summary, ref = base
    s = simulate(tmp_path / "a", nodes=20_000, seed=3, noise=0.0, levels=3, labels="int", size_range=(2, 40),
                 rows_per_partition=7_777)
    rows = [pq.ParquetFile(tmp_path / "a" / "export" / f["file"]).metadata.num_rows for f in s["files"]]
    assert rows == [f["rows"] for f in s["files"]]
    assert max(rows) <= 7_777 and all(r == 7_777 for r in rows[:-1])
    assert len(rows) == math.ceil(s["rows_written"] / 7_777)
    pd.testing.assert_frame_equal(read_export(tmp_path / "a"), ref)

    s = simulate(tmp_path / "b", nodes=20_000, seed=3, noise=0.0, levels=3, labels="int", partitions=3,
                 size_range=(2, 40))
    assert len(s["files"]) == 3
    assert max(f["rows"] for f in s["files"]) - min(f["rows"] for f in s["files"]) <= 2
    pd.testing.assert_frame_equal(read_export(tmp_path / "b"), ref)
    # a rerun into the same folder with fewer files leaves no stale parts behind
    s = simulate(tmp_path / "a", nodes=20_000, seed=3, noise=0.0, levels=3, labels="int", partitions=2,
                 size_range=(2, 40))
    assert len(list((tmp_path / "a" / "export").glob("part-*.parquet"))) == 2


def test_determinism(tmp_path):
    kw = dict(nodes=3_000, rows_per_partition=10_000)
    simulate(tmp_path / "a", seed=7, **kw)
    simulate(tmp_path / "b", seed=7, **kw)
    simulate(tmp_path / "c", seed=8, **kw)
    a, b, c = (read_export(tmp_path / x) for x in "abc")
    pd.testing.assert_frame_equal(a, b)
    for name in ("groups", "members"):
        pd.testing.assert_frame_equal(pd.read_parquet(tmp_path / "a" / "truth" / f"{name}.parquet"),
                                      pd.read_parquet(tmp_path / "b" / "truth" / f"{name}.parquet"))
    assert not (len(a) == len(c) and a.equals(c))
    ga = pd.read_parquet(tmp_path / "a" / "truth" / "groups.parquet")
    gc = pd.read_parquet(tmp_path / "c" / "truth" / "groups.parquet")
    assert not np.array_equal(ga["intensity"].to_numpy()[:100], gc["intensity"].to_numpy()[:100])


def test_progress_reports_rows(tmp_path):
    seen = []
    s = simulate(tmp_path, nodes=12_000, seed=1, rows_per_partition=30_000, progress=seen.append)
    assert len(seen) >= 2 and seen == sorted(seen) and seen[-1] == s["rows_written"]


# --------------------------------------------------------------------------- labels, events


def test_string_labels(tmp_path):
    s = simulate(tmp_path, nodes=4_000, seed=4, noise=0.0)
    export = read_export(tmp_path)
    mem = pd.read_parquet(tmp_path / "truth" / "members.parquet")
    pattern = re.compile(r"hv-\d{7}")
    assert all(pattern.fullmatch(x) for x in export["source"].head(2000))
    assert set(export["source"]) | set(export["target"]) <= set(mem["label"])
    numbers = np.array([int(x[3:]) for x in mem["label"].unique()])
    assert numbers.min() >= 0 and numbers.max() < 4_000
    assert s["nodes_in_groups"] == numbers.size


def test_str_labels_helper_matches_python_format():
    nums = np.array([0, 7, 1234, 9_999_999, 123_456_789, 42], dtype=np.int64)
    got = sim._str_labels(nums, 9).to_pylist()
    assert got == [f"hv-{x:09d}" for x in nums]  # reference: Python string formatting


def test_pair_positions_match_combinations():
    """Reference: itertools.combinations (small k) and math.isqrt (huge k)."""
    for s in (2, 3, 7, 40, 200):
        k = np.arange(s * (s - 1) // 2)
        a, b = sim._pair_positions(k)
        assert sorted(zip(a.tolist(), b.tolist())) == list(itertools.combinations(range(s), 2))
        assert (a < b).all() and (b < s).all()
    k = np.array([10**12, 10**12 + 1, 2**40 - 1, 5 * 10**11], dtype=np.int64)
    a, b = sim._pair_positions(k)
    for kk, aa, bb in zip(k.tolist(), a.tolist(), b.tolist()):
        ref_b = (1 + math.isqrt(1 + 8 * kk)) // 2
        assert (aa, bb) == (kk - ref_b * (ref_b - 1) // 2, ref_b)


def test_events_aggregate_to_weighted_export(tmp_path, monkeypatch):
    monkeypatch.setattr(sim, "EVENT_CHUNK", 1_000)  # many chunks, rows split across chunks
    kw = dict(nodes=4_000, seed=9, intensity="pareto")
    sw = simulate(tmp_path / "w", **kw)
    se = simulate(tmp_path / "e", events=True, rows_per_partition=25_000, **kw)
    weighted, ev = read_export(tmp_path / "w"), read_export(tmp_path / "e")
    assert list(ev.columns) == ["source", "target", "time"]
    assert len(ev) == sw["total_weight"] == se["rows_written"]
    pd.testing.assert_series_equal(pair_sums(ev), pair_sums(weighted), check_names=False)
    assert ev["time"].min() >= pd.Timestamp("2024-06-01") and ev["time"].max() < pd.Timestamp("2024-09-01")
    # times spread over the season: about a third in each month (June, July, August)
    months = ev["time"].dt.month.value_counts(normalize=True)
    assert set(months.index) == {6, 7, 8} and months.min() > 0.3
    assert max(f["rows"] for f in se["files"]) <= 25_000
    # each message has its own direction (fair coin): a pair written as one row of
    # count c >= 2 shows both directions with probability 1 - 2**(1 - c)
    def per_pair(df):
        lo = np.minimum(df["source"], df["target"])
        hi = np.maximum(df["source"], df["target"])
        w = df["weight"] if "weight" in df else pd.Series(1, index=df.index)
        frame = pd.DataFrame({"lo": lo, "hi": hi, "w": w, "fwd": (df["source"] < df["target"]) * w})
        return frame.groupby(["lo", "hi"]).agg(rows=("w", "size"), w=("w", "sum"), fwd=("fwd", "sum"))
    pw, pe = per_pair(weighted), per_pair(ev)
    single = pw[(pw["rows"] == 1) & (pw["w"] >= 2)].index
    c, fwd = pe.loc[single, "w"].to_numpy(), pe.loc[single, "fwd"].to_numpy()
    mixed = ((fwd > 0) & (fwd < c)).sum()
    p = 1 - 0.5 ** (c - 1)
    assert abs(mixed - p.sum()) < Z_TOL * math.sqrt((p * (1 - p)).sum())


# --------------------------------------------------------------------------- calibration, validation


@pytest.mark.parametrize("target,opts", [(40_000, {}), (300_000, {"intensity": "pareto", "seed": 2})])
def test_nodes_for_edges_calibration(tmp_path, target, opts):
    n = nodes_for_edges(target, **opts)
    simulate(tmp_path, nodes=n, **{**opts, "seed": 17})  # another seed than the pilot's
    distinct = len(pair_sums(read_export(tmp_path)))
    assert target / 1.5 < distinct < target * 1.5, (n, distinct)


@pytest.mark.parametrize("bad", [
    dict(nodes=1), dict(size_range=(1, 5)), dict(size_range=(5, 3)), dict(nodes=10, size_range=(2, 40)),
    dict(intensity="gamma"), dict(levels=0), dict(noise=-1), dict(labels="uuid"),
    dict(rows_per_partition=0), dict(partitions=0), dict(locality=2.0),
])
def test_invalid_arguments(tmp_path, bad):
    with pytest.raises(ValueError):
        simulate(tmp_path, **bad)
    with pytest.raises(ValueError):
        nodes_for_edges(10, groups=5)
