"""RF pseudopotential of a ring electrode.

Closed forms for a circular rf ring a < r < b at amplitude V with the rest of
the plane grounded, on the axis (gapless plane, phi = V Omega / 2 pi, with
the elementary on-axis solid angle of a disc 2 pi (1 - z / sqrt(z^2 + r^2));
common practice, no source):

    phi(z)   = V [z / sqrt(z^2 + a^2) - z / sqrt(z^2 + b^2)]
    phi'(z)  = V [a^2 / (z^2 + a^2)^(3/2) - b^2 / (z^2 + b^2)^(3/2)]
    phi''(z) = V [-3 z a^2 / (z^2 + a^2)^(5/2) + 3 z b^2 / (z^2 + b^2)^(5/2)]

The null is where phi' = 0: z0^2 = (b^2 - s a^2) / (s - 1), s = (b/a)^(4/3).
The pseudopotential U = Q^2 |E|^2 / (4 m W^2) (Dehmelt 1967; Leibfried et
al., Rev. Mod. Phys. 75, 281 (2003), sec. II) has on the axis the curvature
2 kappa phi''^2, so w_z = Q |phi''(z0)| / (sqrt 2 m W); the escape barrier
along the axis is max_{z > z0} kappa phi'(z)^2.

The layout draws the circles as regular K-gons inscribed in them; their
radius is short by a fraction delta = 1 - cos(pi / K) at the edge
midpoints, which shifts heights, curvatures and the barrier by O(delta)
(measured: 0.7 delta to 1.4 delta, falling as 1/K^2). Tolerances: 3 delta.
"""

import math

import numpy as np
import pytest
from scipy.optimize import minimize_scalar

from mdrotor.electrodes.layout import Layout, annulus, disc, load_layout
from mdrotor.electrodes.pseudo import pseudo_energy_j, rf_pseudopotential
from mdrotor.errors import InputError
from mdrotor.physics.species import get_species

A, B, K = 100e-6, 290e-6, 192
DELTA = 1.0 - math.cos(math.pi / K)
V_RF, F_DRIVE = 100.0, 30e6


@pytest.fixture(scope="module")
def ring():
    return Layout([annulus("rf", [0, 0], A, B, role="rf", limit_v=300, arc_segments=K),
                   disc("centre", [0, 0], A, limit_v=10, arc_segments=K)], "rf_null")


@pytest.fixture(scope="module")
def ca():
    return get_species("40Ca+")


@pytest.fixture(scope="module")
def trap(ring, ca):
    return rf_pseudopotential(ring, V_RF, F_DRIVE, ca.mass_kg, ca.charge_c)


def _d1(z):
    return A * A / (z * z + A * A) ** 1.5 - B * B / (z * z + B * B) ** 1.5


def _d2(z):
    return -3 * z * A * A / (z * z + A * A) ** 2.5 + 3 * z * B * B / (z * z + B * B) ** 2.5


def _z0():
    s = (B / A) ** (4.0 / 3.0)
    return math.sqrt((B * B - s * A * A) / (s - 1.0))


def test_null_on_axis_at_closed_form_height(trap):
    x, y, z = trap.null_m
    # symmetric ring: the null is on the axis (to roundoff of the 192-gon sums)
    assert math.hypot(x, y) < 1e-9 * z
    assert abs(z / _z0() - 1.0) < 3 * DELTA
    assert trap.null_field_v_per_m < 1e-6 * V_RF / z


def test_secular_frequencies_match_closed_form(trap, ca):
    W = 2 * math.pi * F_DRIVE
    wz = ca.charge_c * V_RF * abs(_d2(_z0())) / (math.sqrt(2) * ca.mass_kg * W)
    f_r1, f_r2, f_z = trap.secular_hz
    assert abs(f_z / (wz / (2 * math.pi)) - 1.0) < 3 * DELTA
    # axial symmetry + Laplace: H_xx = H_yy = -H_zz / 2, so w_r = w_z / 2
    # (common practice, no source); exact up to roundoff
    assert f_r1 == pytest.approx(f_z / 2, rel=1e-9) and f_r2 == pytest.approx(f_z / 2, rel=1e-9)
    assert abs(abs(trap.axes[2, 2]) - 1.0) < 1e-12


def test_secular_frequencies_match_curvature_of_energy(ring, trap, ca):
    # Finite-difference Hessian of U = Q^2 |E|^2 / (4 m W^2) at the null
    # (the definition, Leibfried et al. 2003), eigenvalues m w^2. Central
    # differences with h = 0.2 um at 117 um from the electrodes: truncation
    # (h / d)^2 ~ 1e-5 relative; roundoff eps U / h^2 negligible (U ~ 0 at
    # the null). Tolerance 1e-4.
    h = 0.2e-6
    c = trap.null_m

    def U(p):
        return pseudo_energy_j(ring, np.atleast_2d(p), V_RF, F_DRIVE, ca.mass_kg, ca.charge_c)

    Hs = np.zeros((3, 3))
    e = np.eye(3) * h
    for i in range(3):
        for j in range(3):
            Hs[i, j] = (U(c + e[i] + e[j]) - U(c + e[i] - e[j]) - U(c - e[i] + e[j]) + U(c - e[i] - e[j]))[0] / (4 * h * h)
    w = np.sqrt(np.linalg.eigvalsh(Hs) / ca.mass_kg) / (2 * math.pi)
    np.testing.assert_allclose(np.sort(w), trap.secular_hz, rtol=1e-4)


def test_q_parameters(trap, ca):
    # lowest-order Mathieu secular frequency w = |q| W / (2 sqrt 2) (Leibfried
    # et al., Rev. Mod. Phys. 75, 281 (2003), eq. 10 with a = 0); q sums to
    # zero by Laplace (point-trap relation q_x = q_y = -q_z / 2)
    W = 2 * math.pi * F_DRIVE
    np.testing.assert_allclose(np.abs(trap.q) * W / (2 * math.sqrt(2)) / (2 * math.pi), trap.secular_hz, rtol=1e-12)
    assert abs(trap.q.sum()) < 1e-9 * trap.q_max
    assert trap.q[0] == pytest.approx(-trap.q[2] / 2, rel=1e-9)


def test_depth_matches_axial_barrier(trap, ca):
    # the escape saddle of a ring trap lies on the axis above the null; the
    # ray search and saddle refinement must find the closed-form barrier
    W = 2 * math.pi * F_DRIVE
    kappa = ca.charge_c ** 2 / (4 * ca.mass_kg * W * W)
    z0 = _z0()
    r = minimize_scalar(lambda z: -kappa * (V_RF * _d1(z)) ** 2, bounds=(1.01 * z0, 10 * z0), method="bounded",
                        options={"xatol": 1e-13})
    assert abs(trap.depth_j / (-r.fun) - 1.0) < 3 * DELTA
    assert math.hypot(trap.saddle_m[0], trap.saddle_m[1]) < 1e-6 * trap.saddle_m[2]
    assert abs(trap.saddle_m[2] / r.x - 1.0) < 1e-3
    assert trap.depth_ev == pytest.approx(trap.depth_j / 1.602176634e-19, rel=1e-12)


def test_species_name_gives_same_result(ring, trap):
    t2 = rf_pseudopotential(ring, V_RF, F_DRIVE, species="40Ca+", depth=False)
    np.testing.assert_allclose(t2.secular_hz, trap.secular_hz, rtol=1e-12)
    assert math.isnan(t2.depth_j)


def test_rf_amplitude_above_limit_is_refused(ring, ca):
    with pytest.raises(InputError, match=r"rf\.amplitude: 400 V exceeds the rf electrodes' limit of 300 V"):
        rf_pseudopotential(ring, 400.0, F_DRIVE, ca.mass_kg, ca.charge_c)


def test_example_layout_is_stable():
    # first stability region of the Mathieu equation at a = 0 ends at
    # q = 0.908 (REFERENCES.md, computed with scipy); the example keeps the
    # lowest-order pseudopotential valid (|q| well below that)
    lay = load_layout("configs/electrodes/ring6_string2.toml")
    t = rf_pseudopotential(lay, depth=False)  # amplitude, drive and species from the file
    assert t.q_max < 0.5
    assert 1e6 < t.secular_hz[0] < 3e6


def test_drive_too_slow_for_the_amplitude_is_refused(ring, trap, ca):
    """q scales as 1 / f_drive^2: the ring's q_max at 30 MHz over (30 / 8)^2
    is past the end of the first Mathieu stability region at a = 0
    (q = 0.908, REFERENCES.md, computed with scipy; mdrotor.physics.mathieu
    decides it). The layout's pseudopotential then means nothing: it was
    reported as a 'secular frequency' above the drive, or refused through a
    derived config key (trap.f_radial) instead of the layout's."""
    f_slow = F_DRIVE * math.sqrt(trap.q_max / 1.2)  # q_max = 1.2
    with pytest.raises(InputError) as exc:
        rf_pseudopotential(ring, V_RF, f_slow, ca.mass_kg, ca.charge_c, depth=False)
    msg = str(exc.value)
    assert "rf.f_drive" in msg and "stability" in msg and "1.2" in msg, msg
    # just inside the region it is accepted
    ok = rf_pseudopotential(ring, V_RF, F_DRIVE * math.sqrt(trap.q_max / 0.9), ca.mass_kg, ca.charge_c, depth=False)
    assert ok.q_max == pytest.approx(0.9, rel=1e-9)
