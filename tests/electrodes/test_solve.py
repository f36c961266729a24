"""Voltage solves: static targets and rotating order-n pinning.

The solved voltages are checked against the potentials computed from the
layout itself (solid-angle formulas) and fitted afresh, not against the
table the solver used, so the check covers the linear superposition, the
sinusoidal waveform and the phase convention
Phi_n = Re[c (x + i y)^n e^{-i n theta}] (mdrotor.physics.multipole).
"""

import math

import numpy as np
import pytest

from mdrotor.electrodes.harmonic_fit import (
    field_terms,
    fit_multipoles,
    fit_potential,
    hessian_terms,
    sphere_rule,
)
from mdrotor.electrodes.layout import load_layout
from mdrotor.electrodes.solve import solve_rotating, solve_static
from mdrotor.errors import InputError


@pytest.fixture(scope="module")
def tri():
    lay = load_layout("configs/electrodes/ring8_triangle3.toml")
    return lay, fit_multipoles(lay)


@pytest.fixture(scope="module")
def square():
    lay = load_layout("configs/electrodes/ring12_square4.toml")
    return lay, fit_multipoles(lay)


def _refit(lay, volts, rho):
    unit, w = sphere_rule(18)
    c = lay.trap_point_m
    return fit_potential(lay.potential(c + rho * unit, volts), c, rho, 6, unit, w)


@pytest.mark.parametrize("which", ["tri", "square"])
def test_rotating_plan_reproduces_target_at_several_phases(which, request):
    lay, tab = request.getfixturevalue(which)
    n, c = lay.design["order"], lay.design["strength_si"]
    plan = solve_rotating(lay, n, c, table=tab)
    assert plan.reached
    rho = tab.radius_m
    for theta in (0.0, 0.37, 1.3, 2.9, -4.0):
        v = plan.voltages_at(theta)
        fit = _refit(lay, v, rho)
        k = fit.k_inplane()[0, n - 1]
        want = c * np.exp(-1j * n * theta)
        # tolerance as potentials on the crystal sphere: this fit's residual
        # (the orders above 6), plus the solver's own miss (target weight
        # 1e3: ~1e-6 of c), plus roundoff
        s = tab.term_rms[tab.index(n, n)] * rho ** n
        miss = (abs(plan.k_corot - c) + abs(plan.k_counter)) * s
        assert abs(k - want) * s <= fit.residual_rms[0] + miss + 1e-14, theta
        assert abs(k - want) <= 1e-3 * c
        # the plan's own bookkeeping of all coefficients agrees with the refit
        C = plan.coefficients_at(theta)
        w = np.array([tab.term_rms[j] * rho ** l for j, (l, m) in enumerate(tab.terms)])
        assert np.max(np.abs((C - fit.coeffs[0]) * w)[1:]) <= 10 * fit.residual_rms[0] + 1e-14


@pytest.mark.parametrize("which", ["tri", "square"])
def test_rotating_plan_stays_within_limits(which, request):
    lay, tab = request.getfixturevalue(which)
    n = lay.design["order"]
    theta = np.linspace(0, 2 * math.pi, 2001)
    for c in (lay.design["strength_si"], 30 * lay.design["strength_si"]):
        plan = solve_rotating(lay, n, c, table=tab)
        v = plan.voltages_at(theta)
        assert np.all(np.abs(v) <= plan.limits_v * (1 + 1e-12))
        assert np.all(v[:, lay.rf_channels] == 0.0)


def test_unreachable_target_reports_shortfall(tri):
    # the symmetric optimum with all 8 segments at full amplitude L in the
    # rotating pattern is c_max = (8 / 2) L |k_3 per volt of one segment|
    # (sum of the pattern over the ring; common practice, no source); asking
    # for 10 c_max reaches about c_max and says so
    lay, tab = tri
    k1 = abs(tab.k_inplane()[lay.channels.index("s0"), 2])
    c_max = 4 * 15.0 * k1
    plan = solve_rotating(lay, 3, 10 * c_max, table=tab)
    assert not plan.reached
    assert abs(plan.k_corot) == pytest.approx(c_max, rel=2e-2)
    assert plan.shortfall_si == pytest.approx(10 * c_max - abs(plan.k_corot), rel=1e-12)
    assert plan.shortfall_rel > 0.85
    assert plan.peak_ratio_unbounded > 9.0
    amps = plan.amplitudes_v[[lay.channels.index(f"s{k}") for k in range(8)]]
    assert np.all(amps > 0.99 * 15.0)
    # the phases follow the pattern n alpha_e (segment e at angle 2 pi e / 8):
    # phi_e - phi_0 = 3 (alpha_e - alpha_0) mod 2 pi
    ph = plan.phases_rad[[lay.channels.index(f"s{k}") for k in range(8)]]
    dphi = np.angle(np.exp(1j * (ph - ph[0] - 3 * 2 * math.pi * np.arange(8) / 8)))
    assert np.max(np.abs(dphi)) < 2e-2

    # a layout that can make the multipole: only the limits are in the way
    assert plan.producible and "limits would have to grow" in plan.shortfall_text()


@pytest.fixture(scope="module")
def ring6():
    lay = load_layout("configs/electrodes/ring6_string2.toml")
    return lay, fit_multipoles(lay)


@pytest.mark.parametrize("which,order,words", [
    # k equal sectors of span 2 pi / k centred at alpha_j = 2 pi j / k. A sector's
    # order-m coefficient goes as int e^{i m phi} over it = e^{i m alpha_j} (2/m)
    # sin(m pi / k) (the solid harmonics separate in phi; Jackson ch. 3):
    ("ring6", 6, "lacks order 6"),  # m = k: sin(pi) = 0, no dc channel has order 6
    # m = k / 2: e^{i m alpha_j} = (-1)^j is real, only cos(3 phi), one orientation
    ("ring6", 3, "lacks the other orientation of order 3"),
    # voltages cos(m alpha_j) = cos((k - m) alpha_j) on the k sector centres
    # (sampling): order m only together with azimuthal order k - m
    ("ring6", 4, "independent of azimuthal order 2"),
    ("tri", 6, "independent of azimuthal order 2"),
])
def test_layout_that_cannot_make_the_multipole_says_what_it_lacks(which, order, words, request):
    lay, tab = request.getfixturevalue(which)
    plan = solve_rotating(lay, order, 1e6, table=tab)
    assert not plan.reached and not plan.producible
    text = plan.shortfall_text()
    assert f"cannot produce a rotating order-{order} multipole at any voltage" in text and words in text, text
    assert "limits would have to grow" not in text
    assert plan.to_dict()["lacking"] == plan.lacking


def test_unwanted_terms_are_reported(tri):
    lay, tab = tri
    plan = solve_rotating(lay, 3, lay.design["strength_si"], table=tab)
    unw = plan.unwanted()
    assert all((d["l"], d["m"]) not in ((3, 3), (3, -3), (0, 0)) for d in unw)
    assert unw[0]["rel"] >= unw[-1]["rel"]
    # a uniform field is nulled by the 8-fold pattern (it has no m = 1 part)
    f1 = [d for d in unw if d["l"] == 1]
    assert max(d["rel"] for d in f1) < 1e-6
    d = plan.to_dict()
    assert "rated limits" in d["caution"] and len(d["channels"]) == lay.n_channels
    # the hazard itself is named, not only the limits: rf amplitudes as well as dc voltages
    assert "high voltage" in d["caution"] and "RF" in d["caution"] and "safety rules" in d["caution"]


def test_static_solve_makes_field_and_curvature(tri):
    # target: a compensation field and a static curvature; check with the
    # analytic field and Hessian at the trap point (edge formulas, independent
    # of the fitted table) to the solve's tolerance rtol = 1e-3. One ring of
    # segments has a single radial profile per m, so the m = 1 curvature
    # terms (xz, yz) follow the in-plane field and are left free.
    lay, tab = tri
    E = np.array([40.0, -25.0, 10.0])
    H = np.array([[2e6, 0.5e6, 0.0], [0.5e6, -3e6, 0.0], [0.0, 0.0, 1e6]])
    targets = {**field_terms(E), **hessian_terms(H)}
    free = [(2, 1), (2, -1)]
    for f in free:
        targets.pop(f)
    sol = solve_static(lay, targets, table=tab, free=free)
    assert sol.reached
    p = lay.trap_point_m[None, :]
    got_e = lay.field(p, sol.voltages_v)[0]
    got_h = lay.hessian(p, sol.voltages_v)[0]
    rho = tab.radius_m
    # compare as potentials on the crystal sphere (E rho, H rho^2)
    scale = max(np.max(np.abs(E)) * rho, np.max(np.abs(H)) * rho ** 2)
    assert np.max(np.abs(got_e - E)) * rho <= 2e-3 * scale
    mask = np.ones((3, 3), bool)
    mask[[0, 2, 1, 2], [2, 0, 2, 1]] = False
    assert np.max(np.abs(got_h - H)[mask]) * rho ** 2 <= 2e-3 * scale
    assert np.all(np.abs(sol.voltages_v) <= sol.limits_v)
    # asking for the xz, yz terms too cannot be met by this layout, and is reported
    hard = solve_static(lay, {**field_terms(E), **hessian_terms(H)}, table=tab)
    assert not hard.reached and abs(hard.shortfall[(2, 1)]) > 1e-2 * np.max(np.abs(H))


def test_static_unreachable_and_bad_targets(tri):
    lay, tab = tri
    sol = solve_static(lay, field_terms([1e6, 0, 0]), table=tab)
    assert not sol.reached and sol.peak_ratio_unbounded > 1.0
    assert sol.shortfall[(1, 1)] < 0  # asked -1e6 for C_11, got less negative
    with pytest.raises(InputError, match="traceless"):
        hessian_terms(np.eye(3))
    with pytest.raises(InputError, match="l >= 1"):
        solve_static(lay, {(0, 0): 1.0}, table=tab)
    with pytest.raises(InputError, match="rf channel"):
        solve_static(lay, field_terms([1, 0, 0]), table=tab, channels=["rf"])


def test_rotating_with_static_part(tri):
    lay, tab = tri
    st = solve_static(lay, field_terms([20.0, 0, 0]), table=tab)
    plan = solve_rotating(lay, 3, lay.design["strength_si"], static_v=st, table=tab)
    v = plan.voltages_at(np.linspace(0, 2 * math.pi, 721))
    assert np.all(np.abs(v) <= plan.limits_v * (1 + 1e-12))
    # the static field rides along unchanged
    C = plan.coefficients_at(0.8)
    assert C[tab.index(1, 1)] == pytest.approx(-20.0, rel=2e-3)
    with pytest.raises(InputError, match="pinning.order"):
        solve_rotating(lay, 7, 1.0, table=tab)
