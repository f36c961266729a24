"""The metric row of a run (studies.metrics.point_metrics) when the run has
too few usable trajectories for some statistics."""

import math

from conftest import two_ion_config

from mdrotor import load_config, run
from mdrotor.studies.metrics import point_metrics


def _row(**sections):
    cfg = load_config(two_ion_config(**sections))
    return point_metrics(run(cfg, progress=False), cfg)


def test_one_trajectory_has_means_but_no_errors():
    """One usable trajectory: a mean phonon number per mode, no standard
    error (NaN, never a made-up 0); the row is still written."""
    row = _row(run={"trajectories": 1, "seed": 1})
    assert row["n_ok"] == 1.0
    means = {k: v for k, v in row.items() if k.startswith("mode_n_mean.")}
    errs = {k: v for k, v in row.items() if k.startswith("mode_n_err.")}
    assert "mode_n_mean.libration" in means and all(math.isfinite(v) for v in means.values())
    assert set(k.split(".", 1)[1] for k in errs) == set(k.split(".", 1)[1] for k in means)
    assert all(math.isnan(v) for v in errs.values())


def test_no_usable_trajectory_gives_nan_modes():
    """Every trajectory lost (a loss radius inside the crystal): the mode
    columns exist, as NaN (docs/studies.md: NaN where a point has no such number)."""
    row = _row(run={"trajectories": 2, "seed": 1}, observe={"loss_radius": "0.5 um"})
    assert row["n_ok"] == 0.0 and row["loss_fraction"] == 1.0
    means = [v for k, v in row.items() if k.startswith("mode_n_mean.")]
    assert means and all(math.isnan(v) for v in means)
    assert "L_mean_hbar" not in row or math.isnan(row["L_mean_hbar"])
