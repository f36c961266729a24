"""Sweep figures read what a stage, a pinning term and a log axis are from
what the sweep file stores as parsed data (the base config's names, each
axis's scale), never from re-reading the stored TOML text."""

import h5py
import pytest
from conftest import two_ion_toml

from mdrotor.report.study_figures import sweep_figures
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
