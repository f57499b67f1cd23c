"""Shared fixtures: an embedded engine, a CLI runner, reference datasets.

Reference data come from networkx, which ships them: ``les_miserables_graph``
(Knuth's co-appearance counts), ``karate_club_graph`` (Zachary 1977, with weights),
``davis_southern_women_graph`` (Davis, Gardner and Gardner 1941).
"""

from __future__ import annotations

import contextlib
import io
import os
import sys
from pathlib import Path

import networkx as nx
import numpy as np
import pandas as pd
import pytest

os.environ.setdefault("NUMBA_CACHE_DIR", str(Path(__file__).resolve().parents[1] / ".venv" / "numba-cache"))

# In CI (CI=true) the property tests draw the same examples every run, so a run
# fails only on a real change; locally they explore new examples each time.
from hypothesis import settings as _hyp_settings  # noqa: E402

_hyp_settings.register_profile("ci", derandomize=True, print_blob=True)
if os.environ.get("CI"):
    _hyp_settings.load_profile("ci")


@pytest.fixture(scope="session")
def engine():
    from cliquewise.engine import Engine, EngineSettings

    eng = Engine(EngineSettings(progress=False))
    yield eng
    eng.close()


@pytest.fixture
def cli():
    from _support import run_cli

    return run_cli


