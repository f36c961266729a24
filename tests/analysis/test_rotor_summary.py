"""mdrotor.analysis.rotor: the rotor quantities of a centrifugally stretched crystal.

Two 40Ca+ ions rotating freely in an isotropic radial trap w_r, fast enough
(0.6 w_r) that the stretch matters. Central-force orbit theory (H. Goldstein,
Classical Mechanics, ch. 3): each ion on the circle r^3 = e^2 / (16 pi eps0 m
(w_r^2 - w^2)), so I(w) = 2 m r^2 and the dynamic moment of inertia

    I_d = d(I w)/dw = I (1 + (4/3) w^2 / (w_r^2 - w^2)),

the slope of L = I w / hbar against w: everything that compares rotors of
neighbouring L (line spacing and width, the relative rotation of two
branches, phase diffusion) goes with I_d, not with I.
"""

import json
import math

import numpy as np
import pytest
from conftest import two_ion_toml
from scipy import constants as sc

from mdrotor.analysis.rotor import rotor_summary
from mdrotor.commands.main import main
from mdrotor.physics.species import get_species
from mdrotor.results.status import usable

F_R = 1.2e6        # Hz, radial secular frequency of the tests' trap (conftest)
F_ROT = 0.6 * F_R  # Hz


def stretched_config(trajectories=1):
    return two_ion_toml(pinning=None, rotation={"f_start": f"{F_ROT / 1e3} kHz"},
                        stage=[{"name": "free", "duration": "2 us"}],
                        initial={"temperature": "0.02 mK"}, run={"trajectories": trajectories, "seed": 3})


def goldstein(w):
    """I and I_d of the rotating pair (module docstring)."""
    m = get_species("40Ca+").mass_kg
    wr = 2 * math.pi * F_R
    r = (sc.e**2 / (16 * math.pi * sc.epsilon_0 * m * (wr**2 - w**2))) ** (1 / 3)
    I = 2 * m * r**2
    return I, I * (1 + 4 / 3 * w**2 / (wr**2 - w**2))


def test_rotor_of_a_stretched_pair_uses_the_dynamic_moment_of_inertia(tmp_path):
    p = tmp_path / "fast.toml"
    p.write_text(stretched_config())
    d = rotor_summary(str(p))
    I, I_d = goldstein(2 * math.pi * F_ROT)
    # the equilibrium is solved to ~1e-12; the central difference over
    # +-1e-3 of the rate has a relative error ~1e-6 x the curvature of I w
    assert d["moment_of_inertia_kg_m2"] == pytest.approx(I, rel=1e-9)
    assert d["dynamic_moment_of_inertia_kg_m2"] == pytest.approx(I_d, rel=1e-5)
    assert I_d / I > 1.7   # the stretch is large here: I alone would be 40 % off
    k, N = d["k"], d["symmetry_order"]
    # branches k quanta apart turn relative to each other at k hbar / I_d
    assert d["exchange_time_s"] == pytest.approx(2 * math.pi / N * I_d / (k * sc.hbar), rel=1e-5)
    assert d["revival_time_s"] == pytest.approx(2 * math.pi * I_d / (k * sc.hbar), rel=1e-5)
    # (E(L + j) - E(L)) / h = j f_rot + j^2 hbar / (4 pi I_d) to second order (dE/dL = hbar w)
    for ln in d["lines"]:
        j = ln["dL"]
        quad = j**2 * sc.hbar / (4 * math.pi * I_d)   # known to the 1e-5 of I_d
        assert ln["freq_hz"] == pytest.approx(j * F_ROT + quad, abs=1e-5 * quad)
    assert d["hbar_over_I_d_hz"] == pytest.approx(sc.hbar / (2 * math.pi * I_d), rel=1e-5)


def test_line_width_is_the_ensembles_own_spread_of_rates(tmp_path):
    # The simulated trajectories carry their own rotation rates: the line
    # L -> L + j of the ensemble has width j std(f_rot) over the trajectories
    # (each trajectory's line sits at j f_rot; common practice, no source).
    p = tmp_path / "fast.toml"
    p.write_text(stretched_config(200))
    out = tmp_path / "fast.h5"
    assert main(["run", str(p), "-o", str(out), "--quiet"]) == 0
    d = rotor_summary(str(out))
    import h5py

    with h5py.File(out) as h:
        ok = usable(h["/final/status"][:])
        f = h["/final/f_rot_hz"][:][ok]
    spread = float(np.std(f, ddof=1))
    # linear in L to sigma_L / L ~ 5e-3 here (the curvature of f(L)); the
    # L spread about the centre of mass is what moves the rate
    for ln in d["lines"]:
        assert ln["width_hz"] == pytest.approx(abs(ln["dL"]) * spread, rel=0.01)


def test_rotor_without_a_spread_says_so(tmp_path, capsys):
    # a config, or a result of one trajectory, has no spread of L: the line
    # widths are unknown, not 0 (a line of width 0 Hz would be a claim)
    p = tmp_path / "one.toml"
    p.write_text(stretched_config(1))
    out = tmp_path / "one.h5"
    assert main(["run", str(p), "-o", str(out), "--quiet"]) == 0
    for src in (p, out):
        capsys.readouterr()
        assert main(["rotor", str(src), "--json"]) == 0
        d = json.loads(capsys.readouterr().out)
        assert all(ln["width_hz"] is None and "spread" in ln["width_hz_reason"] for ln in d["lines"])
        assert main(["rotor", str(src)]) == 0
        txt = capsys.readouterr().out
        assert "width 0 Hz" not in txt and "spread 0" not in txt and "nan" not in txt
        assert "width n/a" in txt


def test_lines_off_the_allowed_ladder_are_marked(tmp_path, capsys):
    # Two identical 40Ca+ (fermions) in one internal state allow only odd L
    # (REFERENCES.md, spin statistics; common practice, no source): L -> L + 1
    # joins an allowed L to a forbidden one, so it is no line of that crystal.
    p = tmp_path / "fast.toml"
    p.write_text(stretched_config())
    assert main(["rotor", str(p), "--json"]) == 0
    d = json.loads(capsys.readouterr().out)
    assert (d["allowed_L_mod"], d["allowed_L_residue"]) == (2, 1)
    assert [ln["on_ladder"] for ln in d["lines"]] == [False, True, False]
    assert main(["rotor", str(p)]) == 0
    rows = [r for r in capsys.readouterr().out.splitlines() if r.strip().startswith("dL =")]
    assert ["off the allowed ladder" in r for r in rows] == [True, False, True]


def test_a_crystal_still_pinned_at_the_end_is_said_to_be_no_free_rotor(tmp_path, capsys):
    # The tests' base config keeps the quadrupole on to the end: the crystal
    # turns with the pinning, L is what the pinning imposes, and there are no
    # free-rotor lines (mdrotor quantum says so too; common practice, no source).
    p = tmp_path / "held.toml"
    p.write_text(two_ion_toml())
    assert main(["rotor", str(p), "--json"]) == 0
    d = json.loads(capsys.readouterr().out)
    assert d["pinned_at_end"] is True
    assert main(["rotor", str(p)]) == 0
    assert "no free rotor" in capsys.readouterr().out
    free = tmp_path / "free.toml"
    free.write_text(stretched_config())
    assert main(["rotor", str(free), "--json"]) == 0
    d = json.loads(capsys.readouterr().out)
    assert d["pinned_at_end"] is False


def test_a_large_branch_separation_lists_its_own_line_only(tmp_path, capsys):
    # --k sets the branches compared; the lines listed are dL = 1..3 and k
    # itself (--k 1e12 allocated an array of 1e12 lines and ended in a
    # MemoryError traceback). The line L -> L + k lies at k f + k^2 hbar / (4 pi I_d)
    # (rotor energy, second order; module docstring).
    p = tmp_path / "fast.toml"
    p.write_text(stretched_config())
    k = 10**12
    assert main(["rotor", str(p), "--k", str(k), "--json"]) == 0
    d = json.loads(capsys.readouterr().out)
    assert [ln["dL"] for ln in d["lines"]] == [1, 2, 3, k]
    I_d = d["dynamic_moment_of_inertia_kg_m2"]
    assert d["lines"][-1]["freq_hz"] == pytest.approx(k * F_ROT + k**2 * sc.hbar / (4 * math.pi * I_d), rel=1e-12)
