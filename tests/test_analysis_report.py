"""``cliquewise report``: one self-contained HTML file, checked as text and rendered.

References: Python's html.parser (the file parses, every tag closes where it
should for our checks), PNG signature from the PNG specification (W3C/ISO 15948:
bytes 89 50 4E 47 0D 0A 1A 0A), Debian's chromium in headless mode for the
rendering (skipped when it is not installed). Data: networkx's
les_miserables_graph with a few invented rows whose labels carry commas, quotes,
markup and non-ASCII letters.
"""

from __future__ import annotations

import base64
import re
import shutil
import subprocess
from html.parser import HTMLParser

import networkx as nx
import numpy as np
import pandas as pd
import pytest

import cliquewise
from _support import graph_frame, run_cli
from cliquewise.analysis.report import write_report

ODD = ['Smith, "Jo"', "<b>Ana</b>", "Zoë Ångström", "O'Neil & co"]


@pytest.fixture(scope="module")
def run_dir(tmp_path_factory):
    d = tmp_path_factory.mktemp("report")
    df = graph_frame(nx.les_miserables_graph())
    odd = pd.DataFrame({"source": [ODD[0], ODD[0], ODD[1], ODD[0]], "target": [ODD[1], ODD[2], ODD[2], ODD[3]],
                        "weight": [40, 40, 40, 2]})
    cliquewise.decompose(pd.concat([df, odd], ignore_index=True), run_dir=d / "run", progress=False)
    return d / "run"


class _Collect(HTMLParser):
    def __init__(self):
        super().__init__()
        self.ids, self.imgs, self.text = [], [], []

    def handle_starttag(self, tag, attrs):
        a = dict(attrs)
        if "id" in a:
            self.ids.append(a["id"])
        if tag == "img":
            self.imgs.append(a.get("src", ""))

    def handle_data(self, data):
        self.text.append(data)


def test_report_is_self_contained_and_complete(run_dir, tmp_path):
    out = write_report(run_dir, tmp_path / "r.html", top=10)
    html_text = out.read_text(encoding="utf-8")
    p = _Collect()
    p.feed(html_text)
    assert set(p.ids) >= {"export", "fit", "profile", "sizes", "spectrum", "compression", "heldout", "groups"}
    assert len(p.imgs) == 5  # profile, sizes, spectrum, compression, held-out
    for src in p.imgs:  # inline PNGs only, nothing fetched from elsewhere
        assert src.startswith("data:image/png;base64,")
        assert base64.b64decode(src.split(",", 1)[1])[:8] == b"\x89PNG\r\n\x1a\n"  # PNG signature
    assert not re.search(r"""(src|href)=["'](https?:|file:|//)""", html_text)
    text = " ".join(p.text)
    assert "not intent" in text and "human review under local law and policy" in text
    for needle in ("rows read", "Held-out check", "gain over independence", "spectral", "Strongest 10 groups"):
        assert needle in text
    assert "could not be computed" not in text
    # odd labels are shown as text, never as markup
    assert "<b>Ana</b>" not in html_text and "&lt;b&gt;Ana&lt;/b&gt;" in html_text
    assert 'Smith, "Jo"' in text and "Zoë Ångström" in text
    assert not (tmp_path / "r.html.tmp").exists()


def test_cli_report_writes_and_fails_cleanly(run_dir, tmp_path):
    rc, out, err = run_cli("report", run_dir, "--out", tmp_path / "x.html", "--no-heldout", "--no-refit", "--top", "5")
    assert rc == 0, err
    assert out.strip() == str(tmp_path / "x.html")
    assert "skipped" in (tmp_path / "x.html").read_text(encoding="utf-8")
    rc, out, err = run_cli("report", tmp_path / "not-a-run")
    assert rc == 2 and err.startswith("cliquewise: error:") and len(err.strip().splitlines()) == 1
    rc, _, err = run_cli("report", run_dir, "--heldout-fraction", "1.5")
    assert rc == 2 and "heldout-fraction" in err


def _chromium():
    return shutil.which("chromium") or shutil.which("chromium-browser")


@pytest.mark.skipif(_chromium() is None, reason="chromium is not installed (Debian: apt-get install -y chromium); "
                                                 "the HTML checks above still ran")
def test_report_renders_in_headless_chromium(run_dir, tmp_path):
    from matplotlib.image import imread

    out = write_report(run_dir, tmp_path / "r.html", top=5)
    shot = tmp_path / "r.png"
    proc = subprocess.run([_chromium(), "--headless", "--no-sandbox", "--disable-gpu", "--hide-scrollbars",
                           "--window-size=1200,3000", f"--screenshot={shot}", out.as_uri()],
                          capture_output=True, text=True, timeout=120)
    assert shot.exists(), proc.stderr[-2000:]
    img = imread(shot)
    assert img.shape[0] == 3000 and img.shape[1] == 1200
    gray = img[..., :3].mean(axis=2)
    # a rendered page: mostly white background, with a real amount of ink (text, plots)
    assert 0.02 < float((gray < 0.5).mean()) < 0.5
    assert float(np.std(gray)) > 0.05
