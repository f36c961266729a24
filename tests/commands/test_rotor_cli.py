"""mdrotor rotor: the quantities from a config and from a result with noise."""

import json

import numpy as np
import pytest
from conftest import two_ion_toml
from scipy import constants as sc

from mdrotor.commands.main import main
from mdrotor.numfmt import value_err

NOISY = two_ion_toml(
    pinning=None, rotation={"f_start": "150 kHz"}, stage=[{"name": "free", "duration": "20 us"}],
    initial={"temperature": "0 K", "wigner": False}, run={"trajectories": 300, "seed": 4},
    noise={"multipole": [{"order": 2, "psd": {"kind": "white", "level": "100 V^2/m^4/Hz"}}]})

KEYS = ("moment_of_inertia_kg_m2", "hbar_over_I_hz", "exchange_time_s", "revival_time_s", "statistics",
        "allowed_L_mod", "allowed_L_residue", "diffusion_hbar2_per_s", "coherence_time_s")


def test_rotor_from_config_and_result(tmp_path, capsys):
    p = tmp_path / "n.toml"
    p.write_text(NOISY)
    assert main(["rotor", str(p), "--json"]) == 0
    d = json.loads(capsys.readouterr().out)
    for k in KEYS:
        assert k in d, k
    I = d["moment_of_inertia_kg_m2"]
    # hbar / (2 pi I), exchange 2 pi I / (N k hbar), revival 2 pi I / (k hbar) (REFERENCES.md, rotor coherence)
    assert d["hbar_over_I_hz"] == pytest.approx(sc.hbar / (2 * np.pi * I))
    assert d["statistics"] == "fermion" and (d["allowed_L_mod"], d["allowed_L_residue"]) == (2, 1)  # 40Ca+: 59 fermions
    assert d["k"] == 2
    # (with the dynamic moment of inertia I_d = d(I w)/dw of the stretched crystal: tests/analysis/test_rotor_summary.py)
    I_d = d["dynamic_moment_of_inertia_kg_m2"]
    assert I_d > I
    assert d["exchange_time_s"] == pytest.approx(2 * np.pi * I_d / (2 * 2 * sc.hbar))
    assert d["revival_time_s"] == pytest.approx(2 * d["exchange_time_s"])
    assert d["diffusion_source"].startswith("analytic") and d["diffusion_hbar2_per_s"] > 0
    out = tmp_path / "n.h5"
    assert main(["run", str(p), "-o", str(out), "--quiet"]) == 0
    capsys.readouterr()
    assert main(["rotor", str(out), "--json"]) == 0
    r = json.loads(capsys.readouterr().out)
    assert r["diffusion_source"].startswith("fitted")
    # fitted and analytic D agree within 4 standard errors (300 trajectories)
    assert abs(r["diffusion_fitted_hbar2_per_s"] - r["diffusion_analytic_hbar2_per_s"]) < 4 * r["diffusion_fitted_err_hbar2_per_s"]
    # line widths grow as k hbar sigma_L / (2 pi I_d)
    assert r["lines"][1]["width_hz"] == pytest.approx(2 * r["lines"][0]["width_hz"])
    assert main(["rotor", str(out), "--diffusion", "0"]) == 0
    txt = capsys.readouterr().out
    assert "Ramsey 1.0000" in txt
    # the text writes L with its standard error (numfmt.value_err); no inf or nan
    assert value_err(r["L_mean_hbar"], r["L_mean_err_hbar"]) in txt and r["L_mean_err_hbar"] > 0
    assert "inf" not in txt and "nan" not in txt
    # JSON without Infinity / NaN: D = 0 leaves no finite coherence time, said as null with a reason
    assert main(["rotor", str(out), "--diffusion", "0", "--json"]) == 0
    z = json.loads(capsys.readouterr().out, parse_constant=_no_constant)
    assert z["coherence_time_s"] is None and "D = 0" in z["coherence_time_s_reason"]
    assert z["echo_coherence_time_s"] is None


def _no_constant(name):
    raise AssertionError(f"invalid JSON constant {name}")


def test_rotor_bad_options(tmp_path, capsys):
    p = tmp_path / "n.toml"
    p.write_text(NOISY)
    assert main(["rotor", str(p), "--k", "0"]) == 2
    assert "--k" in capsys.readouterr().err
    assert main(["rotor", str(p), "--diffusion", "fast"]) == 2
    assert "--diffusion" in capsys.readouterr().err
    bad = tmp_path / "b.toml"
    bad.write_text(NOISY.replace('level = "100 V^2/m^4/Hz"', 'level = "100 V^2/m^2/Hz"'))
    assert main(["rotor", str(bad)]) == 2
    err = capsys.readouterr().err
    assert "noise.multipole" in err and "level" in err


def test_rotor_of_a_layout_run_reads_the_layout_beside_the_config(tmp_path, monkeypatch, capsys):
    """A result keeps the folder its config read relative files from (config_dir): `rotor` on the
    result of a layout-pinned run works from any working directory (it failed with 'pinning.layout ...
    is not a file' when the path was taken relative to the result file)."""
    from conftest import CONFIGS

    out = tmp_path / "elsewhere" / "lay.h5"
    out.parent.mkdir()
    assert main(["run", str(CONFIGS / "layout_string2.toml"), "-o", str(out), "--trajectories", "2", "--quiet"]) == 0
    monkeypatch.chdir(tmp_path)
    capsys.readouterr()
    assert main(["rotor", str(out), "--json"]) == 0
    d = json.loads(capsys.readouterr().out)
    assert d["source_kind"] == "result" and d["moment_of_inertia_kg_m2"] > 0


def test_string_on_the_axis_has_no_rotor_quantities(tmp_path, capsys):
    """Three ions in a string along z (axial 0.5 MHz below radial 2 MHz): every ion is on the rotation
    axis, so I_z = sum m rho^2 = 0 (geometry) and hbar/I, L and the rotational lines do not exist.
    Before, the rounding residue I ~ 3e-77 kg m^2 gave hbar/(2 pi I) ~ 6e41 Hz; now `crystal` reports
    I = 0 with null rotor quantities, and `rotor` and `quantum` refuse in one line (exit 2)."""
    p = tmp_path / "string.toml"
    p.write_text(two_ion_toml(crystal={"ions": ["40Ca+"] * 3}, trap={"f_radial": "2.0 MHz", "f_axial": "0.5 MHz"},
                              pinning=None, rotation=None, stage=[{"name": "hold", "duration": "10 us"}]))
    assert main(["crystal", str(p), "--json"]) == 0
    d = json.loads(capsys.readouterr().out)
    assert d["moment_of_inertia_kg_m2"] == 0.0 and d["hbar_over_I_hz"] is None and d["L_hbar"] is None
    assert main(["rotor", str(p)]) == 2
    err = capsys.readouterr().err
    assert err.count("\n") == 1 and "rotation axis" in err and "Traceback" not in err
    # the quantum rotor takes I about the centre of mass (frame.moment_of_inertia): refused the same way
    assert main(["quantum", str(p), "--no-ensemble"]) == 2
    err = capsys.readouterr().err
    assert err.count("\n") == 1 and "rotation axis" in err and "Traceback" not in err
