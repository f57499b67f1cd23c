"""Per-network covariates: one row of numbers that summarises a finished run.

``cliquewise batch`` writes one such row per network into ``covariates.parquet``,
ready for a regression across networks (schools, towns, months...). Every column
is explained in ``docs/outputs.md``; in short:

* size of the export: ``nodes``, ``edges``, ``weight_total``;
* the decomposition: ``candidates``, ``groups_kept``, ``redundancy``,
  ``largest_group``, ``memberships_per_node``, ``converged``;
* how concentrated the structure is: ``concentration`` (fraction of kept groups,
  strongest first, that carry 90% of the fitted weight), the same for the
  spectral energy (``concentration_spectral``: eigenpairs needed over nodes with
  an edge), and ``error_10`` /
  ``error_25`` (relative Frobenius error over all pairs when only the strongest
  10% / 25% of the kept groups keep their fitted intensities, no refit);
* fit on held-out counts: ``heldout_gain`` (nats per held-out interaction by
  which the groups beat a degree-corrected independence model on a binomial
  thinning of the counts).

The curve and held-out numbers come from :mod:`cliquewise.analysis.curves` and
:mod:`cliquewise.analysis.heldout`; this module only gathers them.
"""

from __future__ import annotations

import numpy as np

from cliquewise.api import Run

COLUMNS = ["nodes", "edges", "weight_total", "candidates", "groups_kept", "redundancy", "concentration",
           "concentration_spectral", "error_10", "error_25", "memberships_per_node", "largest_group", "heldout_gain", "converged"]
CONCENTRATION_LEVEL = 0.9
ERROR_FRACTIONS = (0.1, 0.25)


def covariate_params(heldout_fraction: float = 0.5, seed: int = 0) -> dict:
    """Everything besides the run that decides the row (hashed to reuse rows on resume)."""
    return {"concentration_level": CONCENTRATION_LEVEL, "error_fractions": list(ERROR_FRACTIONS),
            "heldout_fraction": float(heldout_fraction), "seed": int(seed), "columns": COLUMNS}


def network_covariates(run_dir, heldout_fraction: float = 0.5, seed: int = 0) -> dict:
    """The covariate row of one finished run.

    Parameters
    ----------
    run_dir : str or Path
        A run directory with complete results.
    heldout_fraction : float
        Share of each count held out by the held-out check (binomial thinning).
    seed : int
        Seed of the held-out split, so a row is reproducible.

    Returns
    -------
    dict
        The keys of :data:`COLUMNS`, as plain Python numbers.
    """
    from cliquewise.analysis.curves import concentration, error_at
    from cliquewise.analysis.heldout import heldout_check

    run = Run(run_dir)
    s = run.summary()
    kept = run.cliques(kept_only=True)
    mem = run.members()
    memberships = int(mem.clique_id.isin(kept.clique_id.to_numpy()).sum())
    err = error_at(run_dir, fractions=ERROR_FRACTIONS)
    conc = concentration(run_dir, level=CONCENTRATION_LEVEL)
    held = heldout_check(run_dir, fraction=heldout_fraction, seed=seed)
    row = {
        "nodes": int(s["nodes"]),
        "edges": int(s["edges"]),
        "weight_total": float(s["weight_total"]),
        "candidates": int(s["candidates"]),
        "groups_kept": int(s["groups_kept"]),
        "redundancy": float(s["redundancy"]),
        "concentration": float(conc["groups_fraction"]),
        "concentration_spectral": float(conc["spectral_fraction"]),
        "error_10": float(_at(err, ERROR_FRACTIONS[0])),
        "error_25": float(_at(err, ERROR_FRACTIONS[1])),
        "memberships_per_node": memberships / s["nodes"] if s["nodes"] else float("nan"),
        "largest_group": int(kept["size"].max()) if len(kept) else 0,
        "heldout_gain": float(held["gain_over_independence"]),
        "converged": bool(s["converged"]),
    }
    assert list(row) == COLUMNS
    return row


def _at(errors: dict, fraction: float) -> float:
    """``errors[fraction]``, tolerant of how the float key was spelled."""
    for key, val in errors.items():
        if np.isclose(float(key), fraction):
            return float(val)
    raise KeyError(f"no error at fraction {fraction} (have {sorted(errors)})")
