"""Sweep figures read what a stage, a pinning term and a log axis are from
what the sweep file stores as parsed data (the base config's names, each
axis's scale), never from re-reading the stored TOML text."""

import h5py
import numpy as np
import pytest
from conftest import two_ion_toml

from mdrotor.report.inputs import MissingData
from mdrotor.report.study_figures import optimize_figure, sweep_figures
from mdrotor.studies.sweep import load_sweep, run_sweep

BASE = two_ion_toml(pinning={"order": 2, "strength": "2e5 V/m^2", "name": "quad"})


@pytest.fixture(scope="module")
def sweep_file(tmp_path_factory):
    d = tmp_path_factory.mktemp("sweepfig")
    (d / "base.toml").write_text(BASE)
    (d / "s.toml").write_text('base = "base.toml"\n[[axis]]\nkey = "pinning.strength"\n'
                              'range = { from = "2e5 V/m^2", to = "3e5 V/m^2", num = 2, spacing = "log" }\n')
    out = d / "s.h5"
    run_sweep(load_sweep(d / "s.toml"), out, workers=1)
    return out


def _damaged(src, tmp_path, **attrs):
    p = tmp_path / "damaged.h5"
    p.write_bytes(src.read_bytes())
    with h5py.File(p, "a") as f:
        for k, v in attrs.items():
            if v is None:
                del f.attrs[k]
            else:
                f.attrs[k] = v
    return p


def test_labels_and_log_axis_from_the_parsed_sweep(sweep_file):
    """Two values of a range with spacing = "log": drawn on a log axis because
    the file says so (two values are too few to tell log spacing apart);
    the pinning term is written c₂ with the config's own name."""
    ax = sweep_figures(sweep_file, metrics="L_mean_hbar")[0].axes[0]
    assert ax.get_xscale() == "log"
    assert ax.get_xlabel() == "pinning c₂ (quad) (V/m²)"


def test_stored_text_is_not_read_for_labels(sweep_file, tmp_path):
    """A file whose stored TOML texts are damaged (or absent) still gets the
    same labels and scales: they come from the parsed data stored beside them."""
    p = _damaged(sweep_file, tmp_path, base_config_text='stage = "x"\npinning = [1, 2]\n', sweep_text=None)
    ax = sweep_figures(p, metrics="L_mean_hbar")[0].axes[0]
    assert ax.get_xscale() == "log"
    assert ax.get_xlabel() == "pinning c₂ (quad) (V/m²)"


def _table(n, metrics, kind="sweep", failed=()):
    v = np.linspace(1.0, 2.0, n)
    return {"index": np.arange(n), "seed": np.zeros(n, np.uint64), "complete": np.ones(n, np.uint8),
            "failed": np.array([i in failed for i in range(n)], np.uint8), "error": [""] * n,
            "axes": {"stage.spin-up.duration": {"text": [f"{x:g} us" for x in v], "si": v * 1e-6}},
            "metrics": metrics, "meta": {"kind": kind, "combine": "grid" if kind == "sweep" else None}}


def test_metric_without_any_value_is_named_not_drawn():
    """A metric that is NaN at every point (the mode phonons of points that
    lost every ion) gets no empty panel with made-up axes: it is left out
    and named in the footnote; one NaN among values leaves a gap only."""
    t = _table(3, {"L_mean_hbar": np.array([1.0, np.nan, 3.0]), "mode_n_mean.libration": np.full(3, np.nan)})
    fig = sweep_figures(t)[0]
    labels = [ax.get_ylabel() for ax in fig.axes if ax.get_visible()]
    assert labels == ["mean ⟨L⟩ (ħ)"]
    assert "no value at any point (not drawn): ⟨n⟩ libration (quanta)" in fig.get_supxlabel()
    fig = sweep_figures(t, metrics="L_mean_hbar,mode_n_mean.libration")[0]  # asked for by name: the same
    assert [ax.get_ylabel() for ax in fig.axes if ax.get_visible()] == ["mean ⟨L⟩ (ħ)"]
    with pytest.raises(MissingData) as e:
        sweep_figures(t, metrics="mode_n_mean.libration")
    assert "no value at any point" in e.value.expected and "libration" in e.value.expected


def test_optimisation_without_any_objective_is_skipped_with_its_reason():
    """No evaluation has an objective (NaN everywhere): no empty history panel."""
    t = _table(3, {"objective": np.full(3, np.nan), "penalty": np.full(3, np.nan), "feasible": np.zeros(3)}, "optimize")
    with pytest.raises(MissingData) as e:
        optimize_figure(t)
    assert "no evaluation has an objective" in e.value.expected
    t["metrics"]["objective"] = np.array([np.nan, 2.0, 1.0])
    t["metrics"]["feasible"] = np.array([0.0, 1.0, 1.0])
    fig = optimize_figure(t)
    assert "1 evaluation without an objective" in fig.get_supxlabel()


def test_slice_and_axes_of_a_one_axis_sweep_are_checked():
    """--slice / --axes naming no axis of the sweep are refused also when the
    sweep has one axis (they were ignored, so a typo went unnoticed); the
    title counts the failed points."""
    from mdrotor.errors import InputError

    t = _table(3, {"L_mean_hbar": np.array([1.0, np.nan, 3.0])}, failed=(1,))
    with pytest.raises(InputError) as e:
        sweep_figures(t, fixed={"initial.temprature": "1 mK"})
    assert e.value.key == "--slice" and "initial.temprature" in e.value.expected
    with pytest.raises(InputError) as e:
        sweep_figures(t, axes="stage.spin-up.duration,initial.temperature")
    assert e.value.key == "--axes"
    assert "2 of 3 points finished, 1 failed" in sweep_figures(t)[0].get_suptitle()


def test_constant_heat_map_has_a_meaningful_colour_scale():
    """Every cell the same (no slip anywhere): the colour bar of a fraction
    spans 0 to 1 (it ran from -0.1 to 0.1, negative fractions), of another
    metric it starts at the value."""
    rows = [(i, j) for i in range(2) for j in range(2)]
    t = {"index": np.arange(4), "seed": np.zeros(4, np.uint64), "complete": np.ones(4, np.uint8),
         "failed": np.zeros(4, np.uint8), "error": [""] * 4,
         "axes": {"stage.spin-up.duration": {"text": [["1 us", "2 us"][i] for i, _ in rows], "si": np.array([[1e-6, 2e-6][i] for i, _ in rows])},
                  "initial.temperature": {"text": [["0.3 mK", "1 mK"][j] for _, j in rows], "si": np.array([[3e-4, 1e-3][j] for _, j in rows])}},
         "metrics": {"slip_fraction": np.zeros(4), "L_std_hbar": np.full(4, 7.0)}, "meta": {"kind": "sweep", "combine": "grid"}}
    fig = sweep_figures(t, metrics="slip_fraction,L_std_hbar")[0]
    frac, other = fig.axes[0].collections[0], fig.axes[1].collections[0]
    assert frac.get_clim() == (0.0, 1.0)
    lo, hi = other.get_clim()
    assert lo == 7.0 and hi > 7.0
