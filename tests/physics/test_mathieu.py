"""Mathieu equation of the Paul trap: exponent, stability, point-trap solver.

Convention checked throughout: u'' = -(W^2/4)(a - 2 q cos W t) u, i.e.
d^2u/dxi^2 + (a - 2 q cos 2 xi) u = 0 with xi = W t / 2 (D. Leibfried,
R. Blatt, C. Monroe, D. Wineland, Rev. Mod. Phys. 75, 281 (2003);
R.E. March, J. Mass Spectrom. 32, 351 (1997); NIST DLMF 28.2.1).
"""

from __future__ import annotations

import math

import numpy as np
import pytest
from scipy import integrate, optimize, special

from mdrotor.errors import InputError, PhysicsError
from mdrotor.physics import mathieu

# ---------------------------------------------------------------------------
# Independent reference: Floquet theory integrated here, in the time domain
# ---------------------------------------------------------------------------

def beta_floquet_time_domain(a: float, q: float, f_drive_hz: float = 1.0) -> float:
    """beta from cos(pi beta) = Tr M / 2, M the monodromy matrix over one RF
    period of u'' = -(W^2/4)(a - 2 q cos W t) u (Leibfried et al., Rev. Mod.
    Phys. 75, 281 (2003); DLMF 28.2(iv)). Written independently of the
    module: physical time, not xi, so it also checks xi = W t / 2. Valid in
    the first stability region only (arccos branch)."""
    w_drive = 2.0 * math.pi * f_drive_hz

    def rhs(t, y):
        k = 0.25 * w_drive**2 * (a - 2.0 * q * math.cos(w_drive * t))
        return [y[1], -k * y[0], y[3], -k * y[2]]

    sol = integrate.solve_ivp(rhs, (0.0, 1.0 / f_drive_hz), [1.0, 0.0, 0.0, 1.0],
                              method="DOP853", rtol=1e-12, atol=1e-14)
    half_trace = 0.5 * (sol.y[0, -1] + sol.y[3, -1])
    return math.acos(half_trace) / math.pi


# ---------------------------------------------------------------------------
# Stability region
# ---------------------------------------------------------------------------

def test_first_region_edge_on_q_axis():
    """On a = 0 the first region ends where b_1(q) = 0.

    Source: scipy.special.mathieu_b (same equation, NIST DLMF 28.2.1); the
    edge q = 0.908046 is listed in the project references (computed with
    brentq) and in March, J. Mass Spectrom. 32, 351 (1997) as 0.908.
    Tolerance 1e-6: the quoted number has six decimals.
    """
    q_edge = optimize.brentq(lambda q: special.mathieu_b(1, q), 0.5, 1.2, xtol=1e-14)
    assert abs(q_edge - 0.908046) < 1e-6
    assert mathieu.is_stable(0.0, 0.90)
    assert not mathieu.is_stable(0.0, 0.92)
    # beta -> 1 at the edge: at q = 0.9080 (4.6e-5 inside) beta > 0.99
    assert mathieu.characteristic_exponent(0.0, 0.9080) > 0.99
    assert mathieu.characteristic_exponent(0.0, 0.9080) < 1.0


@pytest.mark.parametrize("q", [0.05, 0.2, 0.5, 0.8, 2.0])
def test_region_edges_match_scipy(q):
    """Edges a_0(q), b_1(q) of the first region vs scipy.special.mathieu_a /
    mathieu_b (reference library, DLMF 28.2(v)).

    Tolerance 1e-12 absolute: both are converged to rounding (observed
    agreement ~1e-16); 1e-12 still fails for a wrong truncation or a
    mislabelled branch (a_1 - b_1 ~ 2q).
    """
    a0_ref = special.mathieu_a(0, q)
    b1_ref = special.mathieu_b(1, q)
    a0, b1 = mathieu.stability_boundaries(q)
    assert abs(a0 - a0_ref) < 1e-12
    assert abs(b1 - b1_ref) < 1e-12
    # is_stable flips at these edges, also for negative q (beta depends on |q|)
    for qq in (q, -q):
        assert mathieu.is_stable(a0_ref + 1e-9, qq)
        assert not mathieu.is_stable(a0_ref - 1e-9, qq)
        assert mathieu.is_stable(b1_ref - 1e-9, qq)
        assert not mathieu.is_stable(b1_ref + 1e-9, qq)


# ---------------------------------------------------------------------------
# Characteristic exponent
# ---------------------------------------------------------------------------

CASES = [(0.0, 0.1), (0.0, 0.3), (0.0, 0.5), (0.0, 0.7), (0.0, 0.85),
         (-0.01, 0.3), (0.02, 0.3), (0.1, 0.5), (0.0, -0.3), (0.5, 0.1)]


@pytest.mark.parametrize("a,q", CASES)
def test_continued_fraction_vs_floquet_integration(a, q):
    """Continued fraction (March 1997) vs Floquet monodromy integrated in
    this file (Leibfried et al. 2003).

    Tolerance 1e-8: integration at rtol 1e-12, amplified by arccos by at
    most 1/(pi sin(pi beta)) ~ 5 for these beta (0.07 ... 0.77); observed
    agreement ~1e-13.
    """
    assert mathieu.is_stable(a, q)
    beta_cf = mathieu.characteristic_exponent(a, q)
    beta_ref = beta_floquet_time_domain(a, q)
    assert 0.0 < beta_cf < 1.0
    assert abs(beta_cf - beta_ref) < 1e-8


@pytest.mark.parametrize("a,q", CASES)
def test_module_floquet_route_agrees(a, q):
    """The module's two routes agree to 1e-9 (interior points; integration
    rtol 1e-12 through arccos, see above)."""
    assert abs(mathieu.characteristic_exponent(a, q)
               - mathieu.characteristic_exponent_floquet(a, q)) < 1e-9


def test_reference_value_q03():
    """beta(a=0, q=0.3) = 0.2160591: project reference value (computed; the
    Floquet integration above reproduces it independently). Tolerance
    1e-7: the value is quoted to 7 decimals."""
    assert abs(mathieu.characteristic_exponent(0.0, 0.3) - 0.2160591) < 1e-7
    assert abs(beta_floquet_time_domain(0.0, 0.3) - 0.2160591) < 1e-7


def test_vectorised_and_sign_of_q():
    """Array input broadcasts; beta depends on |q| only (xi -> xi + pi/2
    maps q to -q, DLMF 28.2.1 symmetry)."""
    q = np.array([0.1, 0.3, 0.5])
    beta = mathieu.characteristic_exponent(0.0, q)
    assert beta.shape == (3,)
    assert np.all(np.diff(beta) > 0)  # beta grows with q on a = 0
    np.testing.assert_allclose(mathieu.characteristic_exponent(0.0, -q), beta,
                               rtol=0, atol=1e-14)
    assert np.all(mathieu.is_stable([0.0, 0.0], [0.5, 0.95]) == [True, False])


@pytest.mark.parametrize("a,q", [(0.0, 0.05), (0.0, 0.1), (0.0, 0.2),
                                 (0.02, 0.1), (0.02, 0.2), (-0.01, 0.2)])
def test_small_q_series(a, q):
    """DLMF 28.15.1 (from memory): a = nu^2 + q^2 / (2 (nu^2 - 1))
    + (5 nu^2 + 7) q^4 / (32 (nu^2 - 1)^3 (nu^2 - 4)) + O(q^6), with nu = beta.

    The next term's coefficient is ~ -29/2304 = -0.013 for nu ~ 0 (from
    memory); tolerance 0.05 q^6 (4x that) fails if any q^2 or q^4
    coefficient were off.
    """
    nu2 = mathieu.characteristic_exponent(a, q) ** 2
    a_series = (nu2 + q**2 / (2.0 * (nu2 - 1.0))
                + (5.0 * nu2 + 7.0) * q**4 / (32.0 * (nu2 - 1.0) ** 3 * (nu2 - 4.0)))
    assert abs(a_series - a) < 0.05 * q**6


def test_lowest_order_beta():
    """beta ~ sqrt(a + q^2/2) (Leibfried et al. 2003) has relative error
    O(q^2): at a = 0, DLMF 28.15.1 gives beta^2 = q^2/2 + 25 q^4/128 + O(q^6),
    so sqrt(q^2/2) / beta - 1 = -25 q^2/128 + O(q^4) = -1.95e-3 at q = 0.1.
    (Note: this is 2e-3, not below 1e-3.) Tolerance 2% of the prediction:
    the O(q^4) remainder is ~ q^2 = 1% of it at q = 0.1.
    """
    for q in (0.1, 0.05):
        rel = mathieu.lowest_order_beta(0.0, q) / mathieu.characteristic_exponent(0.0, q) - 1.0
        predicted = -25.0 * q**2 / 128.0
        assert abs(rel / predicted - 1.0) < 0.02
    assert math.isnan(mathieu.lowest_order_beta(-0.1, 0.1))


def test_secular_frequency_convention():
    """f_secular = beta f_drive / 2 (w = beta W / 2, Leibfried et al. 2003),
    checked against the time-domain Floquet integration at a 20 MHz drive.
    Tolerance 1e-8 relative as for beta."""
    f_drive = 20e6
    a, q = -0.001, 0.2
    beta_ref = beta_floquet_time_domain(a, q, f_drive_hz=f_drive)
    f = mathieu.secular_frequency_hz(f_drive, a, q)
    assert abs(f / (0.5 * beta_ref * f_drive) - 1.0) < 1e-8


def test_micromotion_ratio_vs_floquet_harmonics():
    """Lowest order u ~ cos(w t)(1 - (q/2) cos W t) (Leibfried et al. 2003):
    the harmonics c_{+-2} of the Floquet solution sum e^{i(beta+2n)xi} c_2n
    (DLMF 28.14.4) give the micromotion, (|c_2| + |c_-2|) / |c_0| -> |q|/2.
    Corrections are O(beta^2, q^2) ~ 1e-3 at q = 0.05; tolerance 1%."""
    a, q = 0.0, 0.05
    beta = mathieu.characteristic_exponent(a, q)
    n = np.arange(-20, 21)
    hill = np.diag((beta + 2.0 * n) ** 2) + q * (np.eye(41, k=1) + np.eye(41, k=-1))
    w, v = np.linalg.eigh(hill)
    c = v[:, np.argmin(np.abs(w - a))]
    i0 = 20
    ratio = (abs(c[i0 + 1]) + abs(c[i0 - 1])) / abs(c[i0])
    assert abs(mathieu.micromotion_amplitude_ratio(q) / ratio - 1.0) < 1e-2
    assert mathieu.micromotion_amplitude_ratio(-q) == mathieu.micromotion_amplitude_ratio(q)


# ---------------------------------------------------------------------------
# Point trap
# ---------------------------------------------------------------------------

@pytest.mark.parametrize("f_sec_mhz", [(1.0, 1.05, 2.2), (0.5, 0.5, 9.5), (9.0, 9.0, 1.0),
                                       (0.01, 3.0, 6.0)])
def test_point_trap_round_trip(f_sec_mhz):
    """solve_point_trap: Laplace constraints q_z = -2 q_r, sum a = 0
    (Leibfried et al. 2003) exactly, and the frequencies reproduced by the
    module's continued fraction (1e-9 relative, the solver's own check) and
    by the independent Floquet integration here (1e-7 relative: beta = 1e-3
    in the last case makes arccos amplify the 1e-12 integration error)."""
    f_drive = 20e6
    f_sec = np.array(f_sec_mhz) * 1e6
    a, q = mathieu.solve_point_trap(f_drive, f_sec)
    assert q[0] == q[1] and q[0] > 0
    assert q[2] == -2.0 * q[0]
    assert a[0] + a[1] + a[2] == 0.0
    f_cf = mathieu.secular_frequency_hz(f_drive, a, q)
    np.testing.assert_allclose(f_cf, f_sec, rtol=1e-9, atol=0)
    for u in range(3):
        beta_ref = beta_floquet_time_domain(a[u], q[u])
        assert abs(0.5 * beta_ref * f_drive / f_sec[u] - 1.0) < 1e-7


def test_point_trap_near_lowest_order():
    """At small beta the solution is close to the lowest-order one,
    q_r^2 = sum beta_u^2 / 3, a_u = beta_u^2 - q_u^2/2 (from beta^2 ~ a +
    q^2/2, Leibfried et al. 2003). For beta ~ 0.1-0.22 the O(q^2) corrections
    are a few percent of q_r; tolerance 3%."""
    f_drive = 20e6
    beta = 2.0 * np.array([1.0e6, 1.05e6, 2.2e6]) / f_drive
    a, q = mathieu.solve_point_trap(f_drive, 0.5 * beta * f_drive)
    qr_lo = math.sqrt(np.sum(beta**2) / 3.0)
    assert abs(q[0] / qr_lo - 1.0) < 0.03
    # the DC parts have the signs lowest order predicts (here the axial
    # frequency exceeds what the RF alone gives: a_z > 0, a_x, a_y < 0)
    q_lo = qr_lo * np.array([1.0, 1.0, -2.0])
    a_lo = beta**2 - 0.5 * q_lo**2
    assert np.all(np.sign(a) == np.sign(a_lo))


# ---------------------------------------------------------------------------
# Bad input
# ---------------------------------------------------------------------------

def test_unstable_parameters_raise():
    with pytest.raises(PhysicsError) as err:
        mathieu.characteristic_exponent(0.0, 0.95, key="trap.q", source="run.toml")
    text = str(err.value)
    assert "run.toml" in text and "trap.q" in text and "stability" in text
    with pytest.raises(PhysicsError):
        mathieu.characteristic_exponent_floquet(0.0, 0.95)
    with pytest.raises(PhysicsError):  # beyond b_1 at q = 0 (beta would be > 1)
        mathieu.characteristic_exponent(1.2, 0.0)
    with pytest.raises(PhysicsError):  # below a_0: no confinement
        mathieu.characteristic_exponent(-0.05, 0.1)
    with pytest.raises(PhysicsError):  # one bad element in an array
        mathieu.characteristic_exponent([0.0, 0.0], [0.3, 1.0])
    with pytest.raises(InputError):
        mathieu.characteristic_exponent(float("nan"), 0.3)


def test_point_trap_bad_input_raises():
    f_drive = 20e6
    # secular frequency at or above half the drive: beta >= 1
    for f_z in (10e6, 12e6):
        with pytest.raises(PhysicsError) as err:
            mathieu.solve_point_trap(f_drive, (1e6, 1e6, f_z), key="trap.f_secular")
        assert "f_z" in str(err.value) and "trap.f_secular" in str(err.value)
    with pytest.raises(InputError):
        mathieu.solve_point_trap(f_drive, (1e6, 1e6))
    with pytest.raises(InputError):
        mathieu.solve_point_trap(f_drive, (1e6, -1e6, 2e6))
    with pytest.raises(InputError):
        mathieu.solve_point_trap(-f_drive, (1e6, 1e6, 2e6))
    with pytest.raises(InputError):
        mathieu.secular_frequency_hz(0.0, 0.0, 0.3)
