"""The rotation limit of the radial confinement (mdrotor.physics.trap).

Source: in a frame turning at W, an ion of mass m with in-plane spring
constants k_1 = m w_1^2, k_2 = m w_2^2 along the frame's axes obeys
x'' - 2 W y' + (w_1^2 - W^2) x = 0, y'' + 2 W x' + (w_2^2 - W^2) y = 0
(Goldstein, Classical Mechanics, ch. 4, motion in a rotating frame); its
characteristic polynomial l^4 + (w_1^2 + w_2^2 + 2 W^2) l^2
+ (w_1^2 - W^2)(w_2^2 - W^2) has a positive real root whenever the last
coefficient is negative (common practice, no source). A quadrupole
Q Re[C (x + i y)^2] turning with the frame adds +-2 Q |C| to the two spring
constants, so the rotation must stay below sqrt(w_r^2 - 2 Q |C| / m).
"""

import math

import numpy as np
import pytest

from mdrotor.physics.trap import Trap

TWO_PI = 2.0 * math.pi
M = 6.635853248490553e-26  # 40Ca+ (kg)
Q = 1.602176634e-19


def _growth_rate(w1_sq: float, w2_sq: float, omega: float) -> float:
    """Largest real part of the rotating-frame single-ion motion (1/s), from the matrix."""
    a = np.array([[0, 0, 1, 0], [0, 0, 0, 1], [-(w1_sq - omega**2), 0, 0, 2 * omega],
                  [0, -(w2_sq - omega**2), -2 * omega, 0]])
    return float(np.max(np.linalg.eigvals(a).real))


@pytest.mark.parametrize("c2", [0.0, 2e5, -1e6, 1.1e7])
def test_rotation_limit_with_a_quadrupole(c2):
    trap = Trap((1.2e6, 1.2e6, 2.9e6), M, Q)
    f_lim = trap.max_rotation_hz([M], [Q], quadrupole_v_per_m2=abs(c2))
    w_r2 = (TWO_PI * 1.2e6) ** 2
    w1, w2 = w_r2 + 2 * Q * abs(c2) / M, w_r2 - 2 * Q * abs(c2) / M
    assert f_lim == pytest.approx(math.sqrt(w2) / TWO_PI, rel=1e-12)
    # 1e-3 below the limit the motion is bounded (rounding of the eigenvalues:
    # 1e-9 of the largest rate); 1e-3 above it grows at
    # sqrt(-k_1 k_2 / (k_1 + k_2 + 4 W^2)) >= 4e-3 of w_1 for these c2. Without
    # the quadrupole a frame turning faster than an isotropic trap is no
    # instability of one ion: there the limit is the rotating crystal's
    # (its stretch diverges), the module docstring's other fact.
    scale = math.sqrt(w1)
    assert _growth_rate(w1, w2, TWO_PI * f_lim * (1 - 1e-3)) < 1e-9 * scale
    if c2:
        assert _growth_rate(w1, w2, TWO_PI * f_lim * (1 + 1e-3)) > 1e-3 * scale


def test_no_rotation_is_held_when_the_quadrupole_opens_the_trap():
    trap = Trap((1.2e6, 1.2e6, 2.9e6), M, Q)
    assert trap.max_rotation_hz([M], [Q], quadrupole_v_per_m2=2e7) == 0.0
