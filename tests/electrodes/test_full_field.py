"""The full field of a layout's electrodes as statics terms (mdrotor.electrodes.full_field).

The terms' fields and Hessians are checked against central differences of
their potentials, and the springs (the pseudopotential's harmonic part at the
null) against the closed-form secular frequencies of the rf Hessian.
"""

import math

import numpy as np
import pytest

from mdrotor.electrodes.full_field import RFPseudoTerm
from mdrotor.electrodes.layout import load_layout
from mdrotor.electrodes.pseudo import rf_pseudopotential

STRING_LAYOUT = "configs/electrodes/ring6_string2.toml"


def test_pseudopotential_term_is_conservative():
    """Field = -grad and Hessian = grad of the field of the per-ion pseudopotential term.

    Checked by central differences (common practice). The term is the
    pseudopotential minus its harmonic part, a small remainder of a large
    force, so the scale is the full pseudopotential force K r / Q (~100 V/m
    here) and curvature K / Q. Step h = 1 nm: the truncation (h^2 / 6 times the third derivative)
    of the strongly anharmonic z direction is ~1e-5 V/m (it grows as h^2:
    0.14 V/m at 200 nm), the rounding ~1e-12 V/m; tolerance 1e-6 of the
    scale.
    """
    lay = load_layout(STRING_LAYOUT)
    pt = rf_pseudopotential(lay, depth=False)
    m = np.array([6.64e-26, 6.64e-26])
    q = np.array([1.602e-19, 1.602e-19])
    term = RFPseudoTerm(lay, pt.null_m, pt.v_rf, pt.f_drive_hz, m, q)
    r = np.array([[1.7e-6, 0.4e-6, 0.3e-6], [-1.5e-6, -0.2e-6, -0.1e-6]])
    h = 1e-9
    grad = np.zeros_like(r)
    jac = np.zeros((2, 3, 3))
    for u in range(3):
        dr = np.zeros_like(r)
        dr[:, u] = h
        grad[:, u] = (term.potential(r + dr) - term.potential(r - dr)) / (2 * h)
        jac[:, :, u] = -(term.field(r + dr) - term.field(r - dr)) / (2 * h)
    f = term.field(r)
    k_q = term.springs_n_per_m / q[:, None]
    assert np.max(np.abs(f + grad)) <= 1e-6 * np.max(np.abs(k_q * r))
    H = term.hessian(r)
    assert np.max(np.abs(H - jac)) <= 1e-6 * np.max(k_q)
    # the springs are the harmonic part at the null: the remainder has no
    # curvature on the diagonal there (Leibfried et al., Rev. Mod. Phys. 75,
    # 281 (2003), eq. 10: w = Q |mu| / (sqrt 2 m W) along the Hessian's axes)
    H0 = term.hessian(np.zeros((2, 3)))
    w = np.sqrt(term.springs_n_per_m[0] / m[0])
    w_closed = np.sort(q[0] * np.abs(np.linalg.eigvalsh(pt.hessian_v_per_m2)) / (math.sqrt(2) * m[0] * 2 * math.pi * pt.f_drive_hz))
    assert np.sort(w) == pytest.approx(w_closed, rel=1e-9)
    assert np.max(np.abs(np.diagonal(H0, axis1=1, axis2=2))) <= 1e-6 * np.max(term.springs_n_per_m / q[0])
