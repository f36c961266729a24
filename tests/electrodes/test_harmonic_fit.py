"""Multipole fits of electrode potentials about the trap point."""

import math

import numpy as np
import pytest

from mdrotor.electrodes.harmonic_fit import (
    field_terms,
    fit_multipoles,
    fit_potential,
    harmonic_terms,
    hessian_terms,
    inplane_terms,
    pinning_orders,
    solid_harmonics,
    sphere_rule,
)
from mdrotor.electrodes.layout import (
    Layout,
    load_layout,
    rectangle,
    ring_segments,
    sector,
)
from mdrotor.errors import InputError


def test_solid_harmonics_explicit_forms_and_harmonicity():
    # explicit low orders (regular solid harmonics r^l P_l^m e^{im phi} up to
    # normalisation; e.g. Jackson, Classical Electrodynamics, sec. 3.6 table
    # of Y_lm, from memory), in our normalisation (x+iy)^m z^(l-m) + ...
    rng = np.random.default_rng(0)
    d = rng.normal(size=(20, 3))
    x, y, z = d.T
    S = solid_harmonics(d, 3)
    col = {lm: i for i, lm in enumerate(harmonic_terms(3))}
    np.testing.assert_allclose(S[:, col[(2, 0)]], z * z - (x * x + y * y) / 2, rtol=1e-13, atol=1e-13)
    np.testing.assert_allclose(S[:, col[(2, -2)]], 2 * x * y, rtol=1e-13, atol=1e-13)
    np.testing.assert_allclose(S[:, col[(3, 1)]], x * (4 * z * z - x * x - y * y) / 4, rtol=1e-13, atol=1e-13)
    np.testing.assert_allclose(S[:, col[(3, 0)]], z * (2 * z * z - 3 * (x * x + y * y)) / 2, rtol=1e-13, atol=1e-13)
    np.testing.assert_allclose(S[:, col[(3, -3)]], 3 * x * x * y - y ** 3, rtol=1e-13, atol=1e-13)
    # every basis function up to order 6 solves Laplace's equation: the
    # fourth-order central stencil has truncation h^4 f^(6)/90 ~ 1e-10 for
    # these degree-6 polynomials at |d| ~ 1 with h = 1e-2
    S6 = solid_harmonics(d[:5], 6)
    h = 1e-2
    lap = np.zeros_like(S6)
    for e in np.eye(3):
        f = [solid_harmonics(d[:5] + k * h * e, 6) for k in (-2, -1, 1, 2)]
        lap += (-f[0] + 16 * f[1] - 30 * S6 + 16 * f[2] - f[3]) / (12 * h * h)
    assert np.max(np.abs(lap)) < 1e-6


def test_sphere_rule_makes_basis_orthogonal():
    # spherical harmonics of different (l, m) are orthogonal on the sphere
    # (common practice, no source); the product rule integrates them exactly
    unit, w = sphere_rule(18)
    S = solid_harmonics(unit, 6)
    G = (S * w[:, None]).T @ S
    off = G - np.diag(np.diag(G))
    assert np.max(np.abs(off)) < 1e-13 * np.max(np.diag(G))
    assert w.sum() == pytest.approx(4 * math.pi, rel=1e-14)


def test_fit_recovers_known_expansion():
    # a manufactured potential sum C_lm S_lm(r - c) comes back exactly
    # (roundoff); residual is roundoff
    rng = np.random.default_rng(5)
    terms = harmonic_terms(6)
    C = rng.normal(size=len(terms)) * np.array([10.0 ** (3 * l) for l, _ in terms])
    c = np.array([1e-6, -2e-6, 80e-6])
    rho = 4e-6
    unit, w = sphere_rule(18)
    vals = solid_harmonics(rho * unit, 6) @ C
    tab = fit_potential(vals, c, rho, 6, unit, w, ["x"])
    scaled = np.array([rho ** l for l, _ in terms])
    np.testing.assert_allclose(tab.coeffs[0] * scaled, C * scaled, rtol=0, atol=1e-13 * np.max(np.abs(C * scaled)))
    assert tab.residual_rms[0] < 1e-14 * np.max(np.abs(vals))


@pytest.fixture(scope="module")
def triangle_layout():
    return load_layout("configs/electrodes/ring8_triangle3.toml")


def test_low_orders_match_analytic_field_and_hessian(triangle_layout):
    # The l = 1 and l = 2 parts of a harmonic function's expansion about a
    # point are its gradient and Hessian there (Taylor's theorem); the fit
    # samples potentials (solid-angle formulas), field and Hessian come from
    # the edge formulas. Agreement is limited by roundoff over the sphere
    # (1e-16 of phi against rho * |grad phi| ~ 1e-3 of it): 1e-8 relative.
    lay = triangle_layout
    tab = fit_multipoles(lay)
    c = lay.trap_point_m
    E = lay.field_basis(c[None, :])[0]  # (n_ch, 3)
    H = lay.hessian_basis(c[None, :])[0]
    for ch in ("s0", "s3", "centre"):
        i = lay.channels.index(ch)
        want1 = field_terms(E[i])
        want2 = hessian_terms(H[i])
        for (l, m), v in list(want1.items()) + list(want2.items()):
            scale = np.max(np.abs(E[i])) if l == 1 else np.max(np.abs(H[i]))
            assert abs(tab.coefficient(ch, l, m) - v) <= 1e-8 * scale, (ch, l, m)
        k = tab.k_inplane()[i]
        # k_1 = dphi/dx - i dphi/dy = -E_x + i E_y
        assert abs(k[0] - (-E[i, 0] + 1j * E[i, 1])) <= 1e-8 * np.max(np.abs(E[i]))
        # k_2 = (H_xx - H_yy)/4 - i H_xy/2
        assert abs(k[1] - ((H[i, 0, 0] - H[i, 1, 1]) / 4 - 0.5j * H[i, 0, 1])) <= 1e-8 * np.max(np.abs(H[i]))


def _allowed(m, n_fold):
    return m % n_fold == 0


@pytest.mark.parametrize("n_fold", [3, 4, 5])
def test_rotational_symmetry_allows_only_multiples(n_fold):
    # Group theory (common practice, no source): a potential invariant under
    # rotation by 2 pi / N about z contains only harmonics with N | m. A ring
    # of 2N segments at alternating voltages and N separate pie slices, about
    # a point on the axis: every other coefficient vanishes to the fit
    # residual. The arc polygon has a multiple of N vertices per turn, so the
    # drawn layout is exactly N-fold symmetric too.
    per_turn = 24 * n_fold
    els = ring_segments("s", 2 * n_fold, [0, 0], 150e-6, 400e-6, offset_rad=0.3, limit_v=10, arc_segments=per_turn)
    step = 2 * math.pi / n_fold
    els += [sector(f"p{k}", [0, 0], 0.0, 150e-6, 0.1 + k * step, 0.1 + k * step + 0.4 * step, limit_v=10,
                   arc_segments=per_turn) for k in range(n_fold)]
    lay = Layout(els, [0, 0, 90e-6])
    tab = fit_multipoles(lay, radius_m=6e-6)
    v = np.array([(1.0 if int(name[1:]) % 2 else -0.4) if name.startswith("s") else -0.7 for name in lay.channels])
    unit, w = sphere_rule(18)
    c0 = np.array([0, 0, 90e-6])
    whole = fit_potential(lay.potential(c0 + 6e-6 * unit, v), c0, 6e-6, 6, unit, w)
    C = whole.coeffs[0]
    resid = whole.residual_rms[0]
    rho_l = np.array([6e-6 ** l for l, m in tab.terms])
    assert np.max(np.abs(C - tab.combine(v)) * rho_l) < 1e-13  # linearity, as potentials at rho (V)
    size = C * np.array([tab.term_rms[j] * tab.radius_m ** l for j, (l, m) in enumerate(tab.terms)])
    bad = [j for j, (l, m) in enumerate(tab.terms) if not _allowed(m, n_fold)]
    good = [j for j, (l, m) in enumerate(tab.terms) if _allowed(m, n_fold) and l > 0 and abs(m) == n_fold]
    assert np.max(np.abs(size[bad])) <= max(resid, 1e-15)
    # the allowed order-N terms are present (the check can fail)
    assert np.max(np.abs(size[good])) > 10 * max(resid, 1e-15)
    # slice k+1 is slice k turned by 2 pi / N: k_n(k+1) = k_n(k) e^{-i n 2 pi / N}
    # (rotating the argument of Re[k (x+iy)^n]); compared as potentials on the
    # fit sphere, |dk_n| rho^n, to 1e-13 V per V (the potentials are below 1 V
    # per V and carry roundoff ~1e-16 each; 1e3 x that for the fit)
    k = tab.k_inplane()
    i0, i1 = lay.channels.index("p0"), lay.channels.index("p1")
    n = np.arange(1, 7)
    turn = np.exp(-1j * n * step)
    assert np.all(np.abs(k[i1] - k[i0] * turn) * tab.radius_m ** n <= 1e-13)
    assert np.all(np.abs(k[i0]) * tab.radius_m ** n > 1e-11)


def test_chiral_fourfold_rectangles():
    # A pinwheel of four rectangles (House formula) has 4-fold symmetry but no
    # mirror: only m = 0, +-4 survive, and the sine part of m = 4 need not vanish.
    a, b = 20e-6, 120e-6
    rects = []
    for k in range(4):
        x1, x2, y1, y2 = a, b, -a + 15e-6, a + 15e-6
        corners = np.array([[x1, y1], [x2, y2]])
        rot = np.array([[math.cos(k * math.pi / 2), -math.sin(k * math.pi / 2)],
                        [math.sin(k * math.pi / 2), math.cos(k * math.pi / 2)]])
        c2 = corners @ rot.T
        rects.append(rectangle(f"r{k}", sorted(c2[:, 0]), sorted(c2[:, 1]), limit_v=1, group="all"))
    lay = Layout(rects, [0, 0, 60e-6])
    tab = fit_multipoles(lay, radius_m=3e-6)
    C = tab.coeffs[0]
    size = C * np.array([tab.term_rms[j] * tab.radius_m ** l for j, (l, m) in enumerate(tab.terms)])
    resid = tab.residual_rms[0]
    bad = [j for j, (l, m) in enumerate(tab.terms) if m % 4]
    assert np.max(np.abs(size[bad])) <= max(resid, 1e-15)
    k4 = tab.k_inplane()[0, 3]
    assert abs(k4.imag) > 1e-3 * abs(k4)


def test_rf_ring_has_no_inplane_orders(triangle_layout):
    # a 96-gon ring is 96-fold symmetric: no in-plane order up to 6
    tab = fit_multipoles(triangle_layout)
    assert tab.significant_orders("rf") == []
    assert tab.significant_orders("s0") == [1, 2, 3, 4, 5, 6]


def test_per_electrode_table_and_errors(triangle_layout):
    tab = fit_multipoles(triangle_layout, per="electrode", order=4)
    assert tab.names[2] == "s0" and tab.coeffs.shape == (10, 25)
    with pytest.raises(InputError, match="radius"):
        fit_multipoles(triangle_layout, radius_m=1.0)
    with pytest.raises(InputError, match="term"):
        tab.index(5, 5)


def test_pinning_orders():
    # the order-n moment of a regular N-gon vanishes unless N | n (sum of
    # roots of unity; common practice, no source)
    assert pinning_orders(2) == [2, 4, 6]
    assert pinning_orders(3) == [3, 6]
    assert pinning_orders(4) == [4]
    for N in (2, 3, 4, 5):
        z = np.exp(2j * math.pi * np.arange(N) / N) * 1.3
        moments = [abs(np.sum(z ** n)) for n in range(1, 7)]
        assert [n for n in range(1, 7) if moments[n - 1] > 1e-9] == pinning_orders(N)


def test_inplane_terms_convention():
    # Re[k (x+iy)^n] with k = 2 - 3i, n = 3, against the basis
    d = np.array([[0.3, -0.2, 0.0], [0.1, 0.5, 0.0]])
    terms = harmonic_terms(3)
    C = np.zeros(len(terms))
    for (l, m), v in inplane_terms(3, 2 - 3j).items():
        C[terms.index((l, m))] = v
    w = d[:, 0] + 1j * d[:, 1]
    np.testing.assert_allclose(solid_harmonics(d, 3) @ C, ((2 - 3j) * w ** 3).real, rtol=1e-14)
