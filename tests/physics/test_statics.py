"""Crystal statics and normal modes against published and closed-form values."""

import json

import numpy as np
import pytest
from scipy import constants as sc

from mdrotor.physics.statics import (
    Potential,
    compute_crystal,
    mode_occupations,
    normal_modes,
    occupation_selector_known,
    virial_ratio,
)

M = 40 * sc.atomic_mass
Q = sc.e
TWO_PI = 2 * np.pi


def _pot(n, f_xy, f_z, mult=(), f_rot=0.0):
    m = np.full(n, M)
    q = np.full(n, Q)
    w = TWO_PI * np.array([f_xy, f_xy, f_z])
    return Potential(m, q, m[:, None] * w**2, np.zeros(3), mult, TWO_PI * f_rot)


def _james_length(f_z):
    # D.F.V. James, Appl. Phys. B 66, 181 (1998): l^3 = Z^2 e^2 / (4 pi eps0 M w^2)
    return (Q**2 / (4 * np.pi * sc.epsilon_0 * M * (TWO_PI * f_z) ** 2)) ** (1 / 3)


# James (1998) scaled equilibrium positions (computed; they match the
# paper's table from memory, see REFERENCES.md)
JAMES_POS = {2: [-0.62996, 0.62996], 3: [-1.0772, 0.0, 1.0772], 4: [-1.4368, -0.45438, 0.45438, 1.4368],
             5: [-1.7429, -0.8221, 0.0, 0.8221, 1.7429]}


def _james_reference(n):
    """Independent solution of James's scaled problem: minimise
    sum u^2/2 + sum 1/|u_m - u_n| and diagonalise his axial Hessian
    A_mm = 1 + 2 sum_p |u_m-u_p|^-3, A_mn = -2 |u_m-u_n|^-3."""
    from scipy.optimize import minimize

    def f(u):
        d = np.abs(u[:, None] - u[None])
        iu = np.triu_indices(n, 1)
        return 0.5 * np.sum(u * u) + np.sum(1 / d[iu])

    u = np.sort(minimize(f, np.linspace(-1, 1, n) * n / 2, method="BFGS", options={"gtol": 1e-12}).x)
    d = np.abs(u[:, None] - u[None]) + np.eye(n)
    a = -2 / d**3
    np.fill_diagonal(a, 0)
    np.fill_diagonal(a, 1 - a.sum(axis=1))
    return u, np.sqrt(np.linalg.eigvalsh(a))


@pytest.mark.parametrize("n", [2, 3, 4, 5])
def test_linear_chain_positions_and_axial_modes(n):
    # strong radial confinement: a linear string along z
    f_z = 1e6
    cr = compute_crystal(_pot(n, 6e6, f_z))
    z = np.sort(cr.positions_m[:, 2]) / _james_length(f_z)
    u_ref, mu_ref = _james_reference(n)
    # positions to 1e-4 in scaled units (D.F.V. James, Appl. Phys. B 66, 181 (1998))
    assert np.allclose(z, JAMES_POS[n], atol=1e-4)
    assert np.allclose(z, u_ref, atol=1e-6)
    axial = np.sort([f for f, p in zip(cr.modes.freq_hz, cr.modes.planes) if p == "out-of-plane"]) / f_z
    assert np.allclose(axial, mu_ref, rtol=1e-6)
    # COM = 1 and breathing = sqrt(3) for every N (James 1998; Euler's theorem on homogeneous potentials)
    assert abs(axial[0] - 1) < 1e-7 and abs(axial[1] - np.sqrt(3)) < 1e-7
    if n == 3:
        assert abs(axial[2] - np.sqrt(29 / 5)) < 1e-6  # James (1998), third mode of 3 ions
    if n == 4:
        assert np.allclose(axial[2:], [2.4104, 3.0510], atol=1e-4)  # computed, REFERENCES.md
    # Virial identity: Coulomb energy = 2 x trap energy (common practice, no source)
    assert abs(virial_ratio(cr.potential, cr.positions_m) - 1) < 1e-9


@pytest.mark.parametrize("n", list(range(2, 11)))
def test_zigzag_threshold_from_transverse_hessian(n):
    # Transverse eigenvalues of a linear chain: (w_r/w_z)^2 + 1/2 - mu_p^2/2
    # (REFERENCES.md, computed from James's Hessian; D.F.V. James, Appl. Phys. B 66, 181 (1998)).
    # The chain is linear just above the threshold ratio and zigzag below it.
    # Both sides are bound: 2 % below, the turn of the zigzag about the trap
    # axis is the potential's zero mode and is set aside, not read as an
    # instability (issue 11: "growth rate 151.6 Hz" on some machines).
    _, mu = _james_reference(n)
    ratio_c = np.sqrt(mu[-1] ** 2 / 2 - 0.5)
    f_z = 1e6
    lin = compute_crystal(_pot(n, 1.02 * ratio_c * f_z, f_z))
    assert np.max(np.abs(lin.positions_m[:, :2])) < 1e-12
    assert len(lin.modes.omega) == 3 * n  # a string turned about its own axis does not move
    zig = compute_crystal(_pot(n, 0.98 * ratio_c * f_z, f_z))
    assert np.max(np.hypot(zig.positions_m[:, 0], zig.positions_m[:, 1])) > 1e-8
    assert len(zig.modes.omega) == 3 * n - 1  # the turn about z is not a mode
    # the lowest transverse mode of the string: sqrt(1.02^2 - 1) ratio_c w_z
    # (same Hessian); the reference's mu carries ~1e-7, amplified 25x by the
    # near-threshold difference 1.02^2 - 1
    lowest = np.sqrt(1.02**2 - 1) * ratio_c * f_z
    assert lin.modes.freq_hz[0] == pytest.approx(lowest, rel=1e-5)
    if n == 2:
        assert abs(ratio_c - 1) < 1e-8  # N = 2 needs w_r > w_z (REFERENCES.md)


# V.M. Bedanov and F.M. Peeters, Phys. Rev. B 49, 2667 (1994): E/N in units
# E0 = (m w0^2 q^4 / (2 (4 pi eps0)^2))^(1/3) (computed; agree with the paper from memory)
BP_ENERGY = {2: 0.750000, 3: 1.310371, 4: 1.835446, 5: 2.338445, 6: 2.804556, 7: 3.238975, 8: 3.668904}
BP_SHELLS = {2: (0, 2), 3: (0, 3), 4: (0, 4), 5: (0, 5), 6: (1, 5), 7: (1, 6), 8: (1, 7)}


@pytest.mark.parametrize("n", list(BP_ENERGY))
def test_planar_clusters_bedanov_peeters(n):
    f0 = 1e6
    cr = compute_crystal(_pot(n, f0, 8 * f0))  # strong axial: planar
    w0 = TWO_PI * f0
    e0 = (M * w0**2 * Q**4 / (2 * (4 * np.pi * sc.epsilon_0) ** 2)) ** (1 / 3)
    r0 = (2 * Q**2 / (4 * np.pi * sc.epsilon_0 * M * w0**2)) ** (1 / 3)
    assert np.max(np.abs(cr.positions_m[:, 2])) < 1e-12
    # H/E0 = sum rho^2 + sum 1/rho_ij equals the total energy / E0
    assert abs(cr.energy_j / e0 / n - BP_ENERGY[n]) < 2e-6
    rho = np.hypot(cr.positions_m[:, 0], cr.positions_m[:, 1]) / r0
    centre = int(np.sum(rho < 0.2))
    assert (centre, n - centre) == BP_SHELLS[n]
    # closed forms: one ring R^3 = S_N / 8, E/N = 3 R^2; (1, n): R^3 = S_n/8 + 1/2
    k = n - centre
    s = np.sum(1 / np.sin(np.pi * np.arange(1, k) / k))
    r_ring = (s / 8 + (0.5 if centre else 0.0)) ** (1 / 3)
    assert np.allclose(rho[rho > 0.2], r_ring, rtol=1e-7)
    if centre == 0:
        assert abs(cr.energy_j / e0 / n - 3 * r_ring**2) < 1e-9
    assert abs(virial_ratio(cr.potential, cr.positions_m) - 1) < 1e-9  # common practice, no source


def test_rotating_two_ion_crystal():
    """Two ions rotating at w in an isotropic radial trap w_r, central-force
    orbit theory (Goldstein, Classical Mechanics, ch. 3):

    * equilibrium in the rotating frame: each ion at radius r with
      m w_r^2 r - m w^2 r = e^2 / (4 pi eps0 (2r)^2)  ->  r^3 = e^2 / (16 pi eps0 m (w_r^2 - w^2));
    * relative coordinate rho = 2r in the effective potential
      mu w_r^2 rho^2/2 + L^2/(2 mu rho^2) + k/rho: radial curvature
      mu (w_r^2 + 3 w^2) + 2k/rho^3 = mu (3 w_r^2 + w^2) using k/rho^3 = mu (w_r^2 - w^2)/2 ...
      giving the stretch frequency sqrt(3 w_r^2 + w^2);
    * out-of-plane tilt: the relative z coordinate sees w_z^2 - k/(mu rho^3) = w_z^2 - w_r^2 + w^2;
    * centre of mass: a free isotropic oscillator seen from a frame rotating
      at w has frequencies |w_r +- w|;
    * the orbital angle is a zero mode (L conserved).
    """
    f_r, f_z, f_rot = 1.0e6, 2.2e6, 0.23e6
    wr, wz, w = TWO_PI * f_r, TWO_PI * f_z, TWO_PI * f_rot
    cr = compute_crystal(_pot(2, f_r, f_z), f_rot)
    r = np.hypot(cr.positions_m[:, 0], cr.positions_m[:, 1])
    r_ref = (Q**2 / (16 * np.pi * sc.epsilon_0 * M * (wr**2 - w**2))) ** (1 / 3)
    assert np.allclose(r, r_ref, rtol=1e-6)
    f = cr.modes.freq_hz * TWO_PI
    expect = sorted([np.sqrt(3 * wr**2 + w**2), np.sqrt(wz**2 - wr**2 + w**2), abs(wr - w), wr + w, wz])
    assert len(f) == 5  # 6 degrees of freedom minus the zero mode
    assert np.allclose(np.sort(f), expect, rtol=1e-6)
    # the L of rigid rotation: I w / hbar
    assert abs(cr.L_hbar - 2 * M * r_ref**2 * w / sc.hbar) < 1e-6 * cr.L_hbar


def test_symplectic_normalisation_diagonalises_h2():
    """S^T A S = diag(w, w) for the mode basis (Williamson normal form; any
    quadratic Hamiltonian textbook, e.g. Arnold, Mathematical Methods of
    Classical Mechanics, appendix 6): energies map to phonon numbers."""
    pot = _pot(3, 1e6, 1.6e6, mult=((3, 2e8 + 0j),), f_rot=0.1e6)
    cr = compute_crystal(pot, 0.1e6)
    m = cr.modes
    n3 = 9
    # H2 = 1/2 zeta^T A zeta built here independently of the module
    msq = np.repeat(np.sqrt(pot.masses_kg), 3)
    kmw = cr.potential.hessian(cr.positions_m, centrifugal=False) / np.outer(msq, msq)
    c = np.zeros((n3, n3))
    for i in range(3):
        c[3 * i, 3 * i + 1], c[3 * i + 1, 3 * i] = 1.0, -1.0
    w = TWO_PI * 0.1e6
    a = np.block([[kmw, -w * c], [-w * c.T, np.eye(n3)]])
    j = np.block([[np.zeros((n3, n3)), np.eye(n3)], [-np.eye(n3), np.zeros((n3, n3))]])
    s_mat = np.vstack([m.e_q, m.e_p]).T  # columns e_q..., e_p...
    k = len(m.omega)
    diag = np.diag(np.concatenate([m.omega, m.omega]))
    assert np.allclose(s_mat.T @ a @ s_mat, diag, atol=1e-8 * m.omega.max())
    sym = s_mat.T @ j @ s_mat
    assert np.allclose(sym, np.block([[np.zeros((k, k)), np.eye(k)], [-np.eye(k), np.zeros((k, k))]]), atol=1e-8)
    # projection: a state with Q_k = 1, P_k = 0 has E_k / (hbar w_k) = 1/(2 hbar), others 0
    for kk in range(k):
        e = m.project(m.e_q[kk, :n3][None], m.e_q[kk, n3:][None])[0] * sc.hbar
        assert abs(e[kk] - 0.5) < 1e-9 and np.all(np.abs(np.delete(e, kk)) < 1e-9)


def test_unstable_rotation_named():
    """A planar two-ion rotor with w_z^2 - w_r^2 + w^2 < 0 tilts out of the
    plane (tilt frequency from central-force theory, Goldstein ch. 3); the
    mode analysis must say so."""
    from mdrotor.errors import PhysicsError

    f_r, f_z, f_rot = 1.0e6, 0.5e6, 0.2e6
    wr, w = TWO_PI * f_r, TWO_PI * f_rot
    r = (Q**2 / (16 * np.pi * sc.epsilon_0 * M * (wr**2 - w**2))) ** (1 / 3)
    planar = np.array([[r, 0, 0], [-r, 0, 0]])
    with pytest.raises(PhysicsError, match="out-of-plane"):
        normal_modes(_pot(2, f_r, f_z, f_rot=f_rot), planar)


def _cli_json(capsys, argv):
    from mdrotor.commands.main import main

    assert main(argv) == 0
    return json.loads(capsys.readouterr().out)


OBLATE_20 = """
[species]
ion = "40Ca+"
[crystal]
ions = 20
[trap]
f_radial = "1 MHz"
f_axial = "{f_axial}"
f_drive = "60 MHz"
[[stage]]
name = "hold"
duration = "1 us"
"""


def test_oblate_twenty_ions_form_a_bound_planar_cluster(tmp_path, capsys):
    """20 40Ca+ ions, f_radial 1 MHz, f_axial 10 MHz (issue 11: 'unstable
    in-plane mode (growth rate 3.4e+12 Hz)'): a planar cluster with the
    shells (1, 7, 12) of V.M. Bedanov and F.M. Peeters, Phys. Rev. B 49,
    2667 (1994), table I (from memory), and all 59 modes real (the turn
    about z set aside). The same crystal at f_axial 25 MHz, started from it,
    keeps its in-plane modes: they do not depend on w_z for a planar cluster."""
    path = tmp_path / "oblate.toml"
    path.write_text(OBLATE_20.format(f_axial="10 MHz"))
    cj = _cli_json(capsys, ["crystal", str(path), "--json"])
    r = np.array(cj["positions_m"])
    assert np.max(np.abs(r[:, 2])) < 1e-12
    rho = np.sort(np.hypot(r[:, 0], r[:, 1]))
    gaps = np.diff(rho)
    shells = np.split(rho, np.where(gaps > 0.25 * rho[-1])[0] + 1)
    assert [len(s) for s in shells] == [1, 7, 12]
    f = np.array([m["freq_hz"] for m in cj["modes"]])
    assert len(f) == 59 and np.all(f > 0)
    # the out-of-plane COM mode is w_z itself (Kohn's theorem; common practice, no source)
    assert np.min(np.abs(f - 10e6)) < 1e-6 * 10e6
    from mdrotor.config.parse import load_config

    path.write_text(OBLATE_20.format(f_axial="25 MHz"))
    cfg = load_config(str(path))
    from mdrotor.model.build import model_potential

    cr = compute_crystal(model_potential(cfg), start=r)
    inplane = np.sort([x for x, p in zip(cr.modes.freq_hz, cr.modes.planes) if p == "in-plane"])
    inplane10 = np.sort([m["freq_hz"] for m in cj["modes"] if m["plane"] == "in-plane"])
    assert np.allclose(inplane, inplane10, rtol=1e-6)


def test_one_ion_crystal_has_no_rotor_quantities(tmp_path, capsys):
    """One ion is a valid crystal (heating studies): I = 0 about its centre
    of mass, no hbar/(2 pi I), no L, and its three modes are the secular
    frequencies (common practice, no source)."""
    path = tmp_path / "one.toml"
    path.write_text(OBLATE_20.format(f_axial="2.5 MHz").replace("ions = 20", "ions = 1"))
    cj = _cli_json(capsys, ["crystal", str(path), "--json"])
    assert cj["moment_of_inertia_kg_m2"] == 0.0
    assert cj["hbar_over_I_hz"] is None and cj["L_hbar"] is None
    f = sorted(m["freq_hz"] for m in cj["modes"])
    assert np.allclose(f, [1e6, 1e6, 2.5e6], rtol=1e-9)
    from mdrotor.commands.main import main

    assert main(["crystal", str(path)]) == 0
    out = capsys.readouterr().out
    assert "I = 0" in out and "hbar/(2 pi I)" not in out and "L = " not in out


# Shell structure of 2D Coulomb clusters in a parabolic trap, V.M. Bedanov
# and F.M. Peeters, Phys. Rev. B 49, 2667 (1994), table I (from memory).
BP_SHELLS_LARGE = {9: (2, 7), 10: (2, 8), 11: (3, 8), 12: (3, 9), 13: (4, 9), 14: (4, 10), 15: (5, 10),
                   16: (1, 5, 10), 17: (1, 6, 10)}


def _planar_reference(shells):
    """Independent solution of Bedanov and Peeters's scaled problem
    H = sum rho_i^2 + sum 1/rho_ij, relaxed from concentric rings with the
    published shell occupation: its energy bounds the ground state from above."""
    from scipy.optimize import minimize

    pts = []
    for k, m in enumerate(shells):
        a = 2 * np.pi * (np.arange(m) + 0.5 * k) / m
        rad = 0.0 if m == 1 else 0.6 + 0.9 * k
        pts += [(rad * np.cos(t), rad * np.sin(t)) for t in a]
    x0 = np.array(pts).ravel()
    n = len(pts)

    def f(x):
        p = x.reshape(n, 2)
        d = np.sqrt(np.sum((p[:, None] - p[None]) ** 2, -1))
        iu = np.triu_indices(n, 1)
        return np.sum(p * p) + np.sum(1 / d[iu])

    return minimize(f, x0 + 1e-3 * np.sin(np.arange(2 * n)), method="BFGS", options={"gtol": 1e-9}).fun / n


@pytest.mark.parametrize("n", [10, 12, 15, 16, 17])  # N = 9 to 30: scripts/statics_scan.py
def test_planar_cluster_shells_at_aspect_30(n):
    """Planar clusters at f_axial/f_radial = 30 reach the published shell
    structure and an energy no higher than the relaxed published structure
    (Bedanov and Peeters 1994, units E0 of test_planar_clusters_bedanov_peeters)."""
    f0 = 1e6
    cr = compute_crystal(_pot(n, f0, 30 * f0))
    w0 = TWO_PI * f0
    e0 = (M * w0**2 * Q**4 / (2 * (4 * np.pi * sc.epsilon_0) ** 2)) ** (1 / 3)
    r0 = (2 * Q**2 / (4 * np.pi * sc.epsilon_0 * M * w0**2)) ** (1 / 3)
    assert np.max(np.abs(cr.positions_m[:, 2])) < 1e-12
    rho = np.sort(np.hypot(cr.positions_m[:, 0], cr.positions_m[:, 1])) / r0
    shells = np.split(rho, np.where(np.diff(rho) > 0.2)[0] + 1)
    assert tuple(len(s) for s in shells) == BP_SHELLS_LARGE[n]
    # energies agree to the reference minimiser's tolerance (gtol 1e-9: ~1e-12 relative)
    assert cr.energy_j / e0 / n <= _planar_reference(BP_SHELLS_LARGE[n]) * (1 + 1e-10)
    assert len(cr.modes.omega) == 3 * n - 1 and np.all(cr.modes.omega > 0)


# Thomson problem: N unit charges on a unit sphere, minimum energy (T. Erber
# and G.M. Hockney, J. Phys. A 24, L1369 (1991); D.J. Wales and S. Ulker,
# Phys. Rev. B 74, 212101 (2006); from memory). For these N every site is
# equivalent, so in a spherical harmonic trap all ions sit at one radius R
# and U = N R^2 / 2 + S / R (units l^3 = k Q^2 / (m w^2)): R^3 = S / N,
# U = 3/2 N (S / N)^(2/3).
THOMSON = {4: 3.674234614, 6: 9.985281374, 8: 19.675287861, 12: 49.165253058}


@pytest.mark.parametrize("n", list(THOMSON))
def test_spherical_clusters_thomson(n):
    f0 = 1e6
    cr = compute_crystal(_pot(n, f0, f0))
    length = _james_length(f0)
    e_unit = (Q**2 / (4 * np.pi * sc.epsilon_0)) / length
    expect = 1.5 * n * (THOMSON[n] / n) ** (2 / 3)
    assert cr.energy_j / e_unit == pytest.approx(expect, rel=1e-8)
    r = np.linalg.norm(cr.positions_m, axis=1) / length
    assert np.allclose(r, (THOMSON[n] / n) ** (1 / 3), rtol=1e-6)
    assert len(cr.modes.omega) == 3 * n - 3  # three free turns: x, y and z
    assert cr.modes.zero_axes == ("x", "y", "z")


def test_spherical_cluster_of_13_has_a_centre_ion():
    """The first 3D Coulomb cluster with an ion at the centre is N = 13,
    (1, 12) (J.P. Schiffer, as quoted by R.W. Hasse and V.V. Avilov,
    Phys. Rev. A 44, 4506 (1991); from memory)."""
    cr = compute_crystal(_pot(13, 1e6, 1e6))
    r = np.sort(np.linalg.norm(cr.positions_m, axis=1)) / _james_length(1e6)
    assert r[0] < 1e-6 and np.all(r[1:] > 1.0)


def test_one_ion_run_flags_no_loss(tmp_path, capsys):
    """One ion has no rotation rate (I about its centre of mass is 0): a
    thermal one-ion run through a spin-up schedule flags no trajectory as
    lost (issue 11, section 3: 12 % were, from an arbitrary L / I). The ion
    stays within a few thermal lengths sqrt(k_B T / m w^2) of the centre
    (equipartition; common practice, no source)."""
    path = tmp_path / "one_run.toml"
    path.write_text(OBLATE_20.format(f_axial="2.5 MHz").replace("ions = 20", "ions = 1").replace(
        '[[stage]]\nname = "hold"\nduration = "1 us"',
        '[[stage]]\nname = "spin"\nduration = "2 us"\nf_rot = { to = "200 kHz", shape = "linear" }\n'
        '[initial]\ntemperature = "1 mK"\n[run]\ntrajectories = 200\nseed = 3'))
    out = _cli_json(capsys, ["run", str(path), "--json", "--quiet", "-o", str(tmp_path / "one.h5")])
    assert out["n_trajectories"] == 200
    assert out["loss_count"] == 0 and out["nonfinite_count"] == 0


@pytest.mark.parametrize("n, f_rot, mult", [(2, 0.0, ()), (3, 0.0, ()), (4, 0.1e6, ()), (7, 0.0, ())])
def test_every_mode_label_is_a_known_occupation_selector(n, f_rot, mult):
    """The config refuses an occupation selector that names no label, kind or
    plane (a typo was ignored and the run used the temperature), so every
    label the modes get must pass that check, and each selects its mode
    (common practice, no source: a bookkeeping check)."""
    cr = compute_crystal(_pot(n, 1.0e6, 2.5e6 if n < 7 else 0.6e6, mult), f_rot)
    for k, lab in enumerate(cr.modes.labels):
        assert occupation_selector_known(lab), lab
        n_k = mode_occupations(cr.modes, 0.0, [(lab, 7.0)])
        assert n_k[k] == 7.0  # (a differential label "in-plane" is the plane too: it selects every in-plane mode)
    for kind in set(cr.modes.kinds) | set(cr.modes.planes) | {"all"}:
        assert occupation_selector_known(kind)
    for typo in ("librat", "com-x", "com", "com-xy-", "in-plane-a"):
        assert occupation_selector_known(typo) == (typo == "com")
