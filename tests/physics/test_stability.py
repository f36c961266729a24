"""The stability verdict: symmetry zero modes set aside, instability judged
with a machine-independent margin, degenerate modes in a canonical basis
(issue 11, section 2)."""

import json
import os
import subprocess
import sys
import textwrap

import numpy as np
import pytest
from scipy import constants as sc

from mdrotor.errors import PhysicsError
from mdrotor.physics import stability
from mdrotor.physics.statics import (
    Potential,
    _canonical_basis,
    compute_crystal,
    find_equilibrium,
    normal_modes,
)

M = 40 * sc.atomic_mass
Q = sc.e
TWO_PI = 2 * np.pi


def _pot(n, f_x, f_y, f_z, mult=(), f_rot=0.0, masses=None, stray=(0.0, 0.0, 0.0)):
    m = np.full(n, M) if masses is None else np.asarray(masses, dtype=float)
    q = np.full(n, Q)
    w = TWO_PI * np.array([f_x, f_y, f_z])
    return Potential(m, q, m[:, None] * w**2, np.array(stray, dtype=float), mult, TWO_PI * f_rot)


def _axes(pot):
    r0 = find_equilibrium(pot).positions_m
    return sorted("xyz"[int(np.argmax(a))] for a, _ in stability.symmetry_axes(pot, r0)), r0


def test_symmetries_found_from_the_potential():
    """Turns that leave the potential unchanged, found numerically: a
    spherical trap has all three, a radially isotropic one only z, an
    anisotropic one or a multipole none; a rotating frame keeps at most z.
    (Noether: each continuous symmetry gives a conserved momentum and a zero
    mode; Goldstein, Classical Mechanics, 3rd ed., section 13.7.)"""
    assert _axes(_pot(4, 1e6, 1e6, 1e6))[0] == ["x", "y", "z"]
    assert _axes(_pot(4, 1e6, 1e6, 2e6))[0] == ["z"]
    assert _axes(_pot(4, 1e6, 1.1e6, 2e6))[0] == []
    assert _axes(_pot(4, 1e6, 1e6, 2e6, mult=((3, 2e8 + 0j),)))[0] == []
    assert _axes(_pot(4, 1e6, 1e6, 1e6, f_rot=1e5))[0] == ["z"]
    # an in-plane stray field shifts identical ions together: still a turn
    # about the centre of mass (common practice, no source)
    axes, r0 = _axes(_pot(3, 1e6, 1e6, 2e6, stray=(3.0, 0.0, 0.0)))
    assert axes == ["z"] and abs(np.mean(r0[:, 0])) > 1e-7
    # mixed species with equal springs in an isotropic trap: the pair sits
    # symmetrically about the trap axis, its centre of mass off it; the turn
    # is about the trap axis
    m = np.array([M, 9 * sc.atomic_mass])
    k = np.full((2, 3), M * (TWO_PI * 1e6) ** 2) * [1.0, 1.0, 6.25]
    pot = Potential(m, np.full(2, Q), k, np.zeros(3))
    r0 = find_equilibrium(pot).positions_m
    found = stability.symmetry_axes(pot, r0)
    assert len(found) == 1 and found[0][0][2] == 1.0 and np.all(found[0][1] == 0.0)
    assert np.linalg.norm(m @ r0) / m.sum() > 1e-7


def test_six_ions_below_zigzag_threshold_are_bound():
    """Six ions 2 % below their zigzag threshold in an isotropic radial trap
    (issue 11: 'unstable in-plane mode (growth rate 185.5 Hz)'). The zigzag
    is a minimum; its turn about z is the one zero mode (threshold from
    James's axial Hessian, D.F.V. James, Appl. Phys. B 66, 181 (1998); the
    transverse Hessian (w_r/w_z)^2 + 1/2 - mu^2/2, REFERENCES.md)."""
    from test_statics import _james_reference

    _, mu = _james_reference(6)
    ratio_c = np.sqrt(mu[-1] ** 2 / 2 - 0.5)
    pot = _pot(6, 0.98 * ratio_c * 1e6, 0.98 * ratio_c * 1e6, 1e6)
    cr = compute_crystal(pot)
    red = stability.reduce(cr.potential, cr.positions_m)
    assert red.n_symmetries == 1
    # every curvature left is positive far beyond the margin
    assert red.curvatures[0] > 1e3 * stability.UNSTABLE_REL * red.curvatures[-1]
    assert len(cr.modes.omega) == 17 and np.all(cr.modes.omega > 0)


def test_lab_frame_message_does_not_mention_rotation():
    """A planar pair in the lab frame with w_z < w_r tilts out of the plane
    (relative z curvature w_z^2 - w_r^2, Goldstein ch. 3 at w = 0). The
    message names the plane and does not say 'at this rotation'."""
    f_r, f_z = 1.0e6, 0.5e6
    r = (Q**2 / (16 * np.pi * sc.epsilon_0 * M * (TWO_PI * f_r) ** 2)) ** (1 / 3)
    planar = np.array([[r, 0, 0], [-r, 0, 0]])
    with pytest.raises(PhysicsError) as err:
        normal_modes(_pot(2, f_r, f_r, f_z), planar)
    msg = str(err.value)
    assert "out-of-plane" in msg and "rotation" not in msg
    # growth rate sqrt(w_r^2 - w_z^2) / 2 pi (same central-force theory)
    rate = float(msg.split("growth rate ")[1].split(" Hz")[0])
    assert rate == pytest.approx(np.sqrt(f_r**2 - f_z**2), rel=1e-3)


def test_canonical_basis_ignores_the_solvers_choice():
    """Degenerate modes (the x and y transverse modes of a string, the
    three-fold sets of a spherical cluster) come out in one basis whatever
    Krein-orthonormal basis the eigensolver returns: a random unitary mix
    of it gives the same vectors to rounding."""
    rng = np.random.default_rng(5)
    for pot in (_pot(4, 3e6, 3e6, 1e6), _pot(6, 1e6, 1e6, 1e6)):
        r0 = find_equilibrium(pot).positions_m
        red = stability.judge(pot, r0)
        om, vec = stability.modes(red)
        jm = stability.symplectic_j(vec.shape[0] // 2)
        groups = np.split(np.arange(len(om)), np.where(np.diff(om) > 1e-8 * om[1:])[0] + 1)
        degenerate = [g for g in groups if len(g) > 1]
        assert degenerate
        for g in degenerate:
            v = vec[:, g] * np.sqrt(om[g] / red.scale)[None, :]  # Krein-normalised (G = 1/w in scaled units)
            krein = -1j * v.conj().T @ jm @ v
            assert np.allclose(krein, np.eye(len(g)), atol=1e-9)
            a = rng.normal(size=(len(g), len(g))) + 1j * rng.normal(size=(len(g), len(g)))
            u, _ = np.linalg.qr(a)
            ref, mixed = _canonical_basis(v, jm), _canonical_basis(v @ u, jm)
            assert np.allclose(ref, mixed, atol=1e-9 * np.max(np.abs(ref)))


_BITS_SCRIPT = textwrap.dedent("""
    import hashlib, json, sys
    import numpy as np
    from scipy import constants as sc
    from mdrotor.physics.statics import Potential, compute_crystal
    M, Q, TP = 40 * sc.atomic_mass, sc.e, 2 * np.pi
    out = {}
    for name, (n, fr, fz, frot) in {"zigzag6": (6, 1.5e6, 1e6, 0.0), "string4": (4, 3e6, 1e6, 0.0),
                                   "planar7_rot": (7, 1e6, 8e6, 1e5)}.items():
        m = np.full(n, M)
        pot = Potential(m, np.full(n, Q), m[:, None] * (TP * np.array([fr, fr, fz])) ** 2, np.zeros(3), (), 0.0)
        cr = compute_crystal(pot, frot)
        h = hashlib.sha256()
        for a in (cr.positions_m, cr.modes.omega, cr.modes.e_q, cr.modes.e_p):
            h.update(np.ascontiguousarray(a).tobytes())
        out[name] = h.hexdigest()
    print(json.dumps(out))
""")


def test_modes_bit_identical_across_blas_threads():
    """Equilibrium and modes, degenerate sets included, are bit-identical
    with 1 and 2 BLAS threads (runs compared across processes rely on it;
    common practice, no source)."""
    outs = []
    for threads in ("1", "2"):
        env = dict(os.environ, OPENBLAS_NUM_THREADS=threads, OMP_NUM_THREADS=threads, MKL_NUM_THREADS=threads)
        res = subprocess.run([sys.executable, "-c", _BITS_SCRIPT], env=env, capture_output=True, text=True, timeout=600)
        assert res.returncode == 0, res.stderr
        outs.append(json.loads(res.stdout.strip().splitlines()[-1]))
    assert outs[0] == outs[1]


def test_flat_direction_without_symmetry_is_set_aside():
    """Two identical ions under an order-3 multipole: the potential has no
    turn symmetry, but the odd field only shifts the pair, by the same
    amount at every angle (the pinning core's "none" verdict), so the pair's
    turn is flat within the arithmetic's resolution. It is set aside as a
    neutral direction: five modes, none called unstable (common practice,
    no source)."""
    pot = _pot(2, 1e6, 1e6, 2.5e6, mult=((3, 1e9 + 0j),))
    r0 = find_equilibrium(pot).positions_m
    red = stability.judge(pot, r0)
    assert red.n_symmetries == 0 and red.n_neutral == 1
    assert len(normal_modes(pot, r0).omega) == 5
