"""Pinning from an electrode layout in the dynamics: the electrodes' full potential."""

from pathlib import Path

import numpy as np
from conftest import two_ion_config

import mdrotor
from mdrotor.commands.main import main
from mdrotor.electrodes.harmonic_fit import solid_harmonics
from mdrotor.electrodes.layout import load_layout
from mdrotor.electrodes.polynomial import (
    PolynomialPotential,
    _monomials,
    harmonics_to_monomials,
    layout_pinning,
    monomial_exponents,
)

CONFIGS = Path(__file__).resolve().parents[2] / "configs"
LAYOUT = CONFIGS / "electrodes" / "ring6_string2.toml"


def test_solid_harmonics_as_monomials_exact():
    """Each real solid harmonic is a homogeneous polynomial of degree l
    (NIST DLMF 14.30; here the package's own basis): its monomial form
    reproduces it to rounding at random points."""
    m = harmonics_to_monomials(6)
    p = np.random.default_rng(3).normal(size=(50, 3))
    s = solid_harmonics(p, 6)
    assert np.allclose(_monomials(p, monomial_exponents(6)) @ m.T, s - (s[:, :1] * (np.arange(s.shape[1]) == 0)), atol=1e-12 * np.abs(s).max())


def test_polynomial_matches_full_electrode_field():
    """Near the trap point the polynomial (every fitted order up to 6) gives
    the same field and Hessian as House's closed form summed over the
    electrodes (M.G. House, Phys. Rev. A 78, 033402 (2008)) to 1e-6, at
    several phases of the rotating plan."""
    lp = layout_pinning(LAYOUT, 2, 2e5)
    lay = load_layout(LAYOUT)
    r = np.array([[1e-6, 2e-6, 0.1e-6], [3e-6, -1e-6, 0.5e-6], [-2e-6, 0.5e-6, -0.3e-6]])
    for th in (0.0, 0.4, 2.0):
        v = lp.plan.voltages_at(th)
        pp = PolynomialPotential(lp.exps, lp.coefficients(th, 1.0))
        full_e = lay.field(r + lay.trap_point_m, v)
        full_h = lay.hessian(r + lay.trap_point_m, v)
        assert np.allclose(pp.field(r), full_e, rtol=1e-6, atol=1e-6 * np.abs(full_e).max())
        assert np.allclose(pp.hessian(r), full_h, rtol=1e-6, atol=1e-6 * np.abs(full_h).max())


def _cfg(layout=True, **over):
    d = two_ion_config(trap={"f_radial": "2.23 MHz", "f_axial": "4.46 MHz"},
                       pinning={"order": 2, "strength": "1e6 V/m^2"},
                       stage=[{"name": "spin-up", "duration": "40 us", "f_rot": {"to": "50 kHz", "shape": "smoothstep"}}],
                       initial={"temperature": "0.5 mK"}, run={"trajectories": 60, "seed": 8})
    if layout:
        d["pinning"]["layout"] = "electrodes/ring6_string2.toml"
    d.update(over)
    from mdrotor.config.parse import from_dict

    return from_dict(d, str(CONFIGS / "x.toml"), base_dir=CONFIGS)  # the layout path is relative to configs/


def test_layout_run_matches_quadrupole_picture():
    """The ring-6 plan's unwanted multipoles are small at the crystal's 1.6 um
    radius: the libration frequency and a spin-up's final L agree with the
    pure quadrupole of the same strength (within 2 % and the statistical
    error), while the kernel really uses the polynomial (common practice, no
    source: the multipole expansion converges as (r / electrode distance)^l)."""
    full = _cfg(True)
    pure = _cfg(False)
    cf, cp = mdrotor.crystal(full), mdrotor.crystal(pure)
    fl = cf.modes.freq_hz[cf.modes.labels.index("libration")]
    fp = cp.modes.freq_hz[cp.modes.labels.index("libration")]
    assert abs(fl / fp - 1) < 0.02
    rf, rp = mdrotor.run(full), mdrotor.run(pure)
    a, b = rf.summary, rp.summary
    assert abs(a["L_mean_hbar"] - b["L_mean_hbar"]) < 4 * np.hypot(a["L_mean_err_hbar"], b["L_mean_err_hbar"])
    assert not np.array_equal(rf.final.arrays["L_hbar"], rp.final.arrays["L_hbar"])  # not the same code path


def test_layout_bad_input(tmp_path, capsys):
    text = (CONFIGS / "layout_string2.toml").read_text()
    p = tmp_path / "bad.toml"
    p.write_text(text.replace('layout = "electrodes/ring6_string2.toml"', 'layout = "nowhere.toml"'))
    assert main(["crystal", str(p)]) == 2
    err = capsys.readouterr().err
    assert "pinning.layout" in err and "not a file" in err
    p2 = tmp_path / "c.toml"
    import shutil

    shutil.copytree(CONFIGS / "electrodes", tmp_path / "electrodes")
    p2.write_text(text.replace('strength = "1e6 V/m^2"', 'strength = "1e9 V/m^2"'))
    assert main(["crystal", str(p2)]) == 2
    err = capsys.readouterr().err
    assert "pinning.strength" in err and "voltage limits" in err
