"""``cliquewise profile``: the table repeats the manifests' numbers; the chart is drawn.

Reference: the stage manifests themselves (``manifest.json``, read with ``json``),
for every number the table shows.
"""

import json

import networkx as nx
import pytest

from _support import graph_frame


@pytest.fixture(scope="module")
def finished_run(tmp_path_factory):
    import cliquewise

    # Zachary's karate club with its interaction counts (shipped with networkx)
    out = tmp_path_factory.mktemp("prof") / "run"
    cliquewise.decompose(graph_frame(nx.karate_club_graph()), run_dir=out, progress=False)
    return out


def test_profile_rows_are_the_manifest_numbers(finished_run):
    from cliquewise.analysis.profile import stage_profile

    rows = stage_profile(finished_run)
    stages = [r for r in rows if not r["step"]]
    assert [r["stage"] for r in stages] == ["ingest", "split", "enumerate", "fit", "results"]
    for r in rows:
        man = json.loads((finished_run / r["stage"] / "manifest.json").read_text())
        prof = man["profile"]
        if not r["step"]:
            assert r["wall_seconds"] == prof["wall_seconds"]
            assert r["cpu_seconds"] == prof["cpu_seconds"]
            assert r["peak_rss_bytes"] == prof["peak_rss_bytes"]
            assert r["counts"] == man["counts"]
        else:
            sp = prof["substeps"][r["step"]]
            assert r["wall_seconds"] == sp["wall_seconds"]
            assert r["peak_rss_bytes"] == sp.get("peak_rss_bytes")
            assert r["counts"] == sp.get("counts", {})
    # sub-steps are listed in the order they ran
    fit_steps = [r["step"] for r in rows if r["stage"] == "fit" and r["step"]]
    assert fit_steps.index("trees") < fit_steps.index("em") < fit_steps.index("prune")
    em = next(r for r in rows if r["stage"] == "fit" and r["step"] == "em")
    assert em["counts"]["evaluations"] >= em["counts"]["iterations"] >= 1
    # an EM evaluation sweeps every incidence once
    assert em["throughput_unit"] == "incidences/s"
    assert em["throughput"] == pytest.approx(em["counts"]["evaluations"] * em["counts"]["incidences"]
                                             / em["wall_seconds"])
    # throughput is work over wall time
    ing = rows[0]
    assert ing["throughput"] == pytest.approx(ing["counts"]["rows_read"] / ing["wall_seconds"])


def test_profile_command_json_and_chart(finished_run, cli, tmp_path):
    png = tmp_path / "p.png"
    rc, out, err = cli("profile", finished_run, "--json", "--png", png)
    assert rc == 0, err
    data = json.loads(out)
    assert {r["stage"] for r in data["rows"]} == {"ingest", "split", "enumerate", "fit", "results"}
    assert png.read_bytes()[:8] == b"\x89PNG\r\n\x1a\n"
    rc, out, err = cli("profile", finished_run, "--no-png")
    assert rc == 0 and "enumerate" in out and "cliques" in out


def test_profile_of_an_empty_folder_is_one_line(cli, tmp_path):
    rc, out, err = cli("profile", tmp_path)
    assert rc == 2 and err.count("\n") == 1
