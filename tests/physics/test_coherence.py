"""Rotor coherence under angular-momentum diffusion (mdrotor.physics.coherence).

Checks the closed forms against
(a) direct integration of the master equation of rotational diffusion in a
    truncated angular-momentum basis (B.A. Stickler, B. Schrinski,
    K. Hornberger, Phys. Rev. Lett. 121, 040401 (2018)), done with
    scipy.sparse.linalg.expm_multiply;
(b) the short-time classical t^3 law of the same paper;
(c) classical Monte-Carlo: Gaussian phase diffusion (short times) and a
    rotor kicked at Poisson times (all times).

Dimensionless units: I = hbar, so hbar/I = 1 /s and b = hbar dl / I = dl
rad/s; times are then in units of I/hbar and D in hbar^2/s.
"""

import numpy as np
import pytest
from scipy.constants import hbar

from mdrotor.errors import InputError
from mdrotor.physics import coherence as co

I_UNIT = hbar  # kg m^2: makes hbar / I = 1 /s


# ---------------------------------------------------------------------------
# (a) master equation in a truncated basis
# ---------------------------------------------------------------------------
@pytest.mark.parametrize("kind", ["ramsey", "echo"])
@pytest.mark.parametrize("dl, D, q", [(1, 0.2, 1), (2, 0.05, 1), (3, 0.3, 2), (2, 0.6, 3)])
def test_closed_form_matches_master_equation(kind, dl, D, q):
    # Stickler, Schrinski, Hornberger, PRL 121, 040401 (2018): master equation
    # of rotational diffusion, integrated numerically. Times run from
    # q*b*t = 0.1 (t^3 regime) to q*b*t = 24 (linear regime, past the
    # turnover at t ~ I/(hbar q dl)).
    qb = q * dl
    t = np.array([0.1, 0.5, 1.0, 2.0, 4.0, 8.0, 16.0, 24.0]) / qb
    ref = co.master_equation_coherence(t, dl, D, I_UNIT, L0=2, L_cut=20, kind=kind,
                                       kick_quanta=q)
    closed = (co.ramsey_contrast if kind == "ramsey" else co.echo_contrast)(
        t, dl, D, I_UNIT, kick_quanta=q)
    # Tolerance 1e-4 (brief); expm_multiply is accurate to ~1e-12 and the
    # truncation at 20 quanta (>= 5 standard deviations of the L spread,
    # sqrt(2 D t) <= 2.2 quanta here) loses < 1e-10.
    np.testing.assert_allclose(closed, ref, rtol=0, atol=1e-4)
    # The turnover is visible: at the last times the t^3 law is far off.
    t3 = co.short_time_contrast(t, dl, D, I_UNIT, kind=kind)
    assert np.max(np.abs(t3 - ref)) > 0.05


def test_master_equation_independent_of_L0_and_truncation_matters():
    # The contrast of pure diffusion does not depend on the branch L0
    # (module derivation, step 4); a too small basis must show up.
    t = np.array([0.5, 2.0, 6.0])
    a = co.master_equation_coherence(t, 2, 0.3, I_UNIT, L0=-6, L_cut=18)
    b = co.master_equation_coherence(t, 2, 0.3, I_UNIT, L0=5, L_cut=22)
    np.testing.assert_allclose(a, b, rtol=0, atol=1e-10)  # numerical precision of expm_multiply
    small = co.master_equation_coherence(t, 2, 0.3, I_UNIT, L0=0, L_cut=1)
    assert np.max(np.abs(small - b)) > 1e-3


# ---------------------------------------------------------------------------
# (b) the t^3 law at short times
# ---------------------------------------------------------------------------
def test_short_time_limit_and_its_scaling():
    # Stickler, Schrinski, Hornberger, PRL 121, 040401 (2018): at short times
    # -ln C = dl^2 D_SI t^3 / (3 I^2). The relative error of the exponent is
    # (q b t)^2 / 20 to leading order (Taylor series of x - sin x), so it
    # drops 4x when t halves.
    dl, D, I = 3, 2.0e3, 7.0e-36
    b = hbar * dl / I
    t = np.array([0.02, 0.01, 0.005, 0.0025]) / b
    exact = co.decay_exponent(t, dl, D, I)
    np.testing.assert_allclose(co.ramsey_contrast(t, dl, D, I), np.exp(-exact), rtol=1e-15)
    law = dl**2 * (D * hbar**2) * t**3 / (3 * I**2)  # D_SI = hbar^2 D
    np.testing.assert_allclose(co.short_time_contrast(t, dl, D, I), np.exp(-law), rtol=1e-14)
    rel = (law - exact) / law
    assert np.all(rel > 0) and rel[0] < 1e-4
    np.testing.assert_allclose(rel, (b * t) ** 2 / 20, rtol=1e-3)  # next term x^2/42 relative
    np.testing.assert_allclose(rel[:-1] / rel[1:], 4.0, rtol=1e-3)
    # echo: a quarter of the Ramsey exponent at short times (derived in the
    # module docstring; checked against Monte-Carlo below)
    echo = co.decay_exponent(t, dl, D, I, kind="echo")
    np.testing.assert_allclose(co.echo_contrast(t, dl, D, I), np.exp(-echo), rtol=1e-15)
    np.testing.assert_allclose(echo / exact, 0.25, rtol=1e-4)


def test_short_time_validity():
    # R(x) = 6 (x - sin x)/x^3 = 1 - x^2/20 + x^4/840 - x^6/60480 (Taylor
    # series); with 1 - R = 0.01 the quadratic in y = x^2,
    # y^2 - 42 y + 8.4 = 0, gives x to 1e-7 (x^6 term ~ 1.3e-7 in R).
    y = (42 - np.sqrt(42**2 - 4 * 8.4)) / 2
    x_ref = np.sqrt(y)
    dl, I, q = 2, 5.0e-36, 3
    t = co.short_time_validity_s(dl, I, rel_tol=0.01, kick_quanta=q)
    np.testing.assert_allclose(t * q * hbar * dl / I, x_ref, rtol=1e-5)
    t_e = co.short_time_validity_s(dl, I, rel_tol=0.01, kind="echo", kick_quanta=q)
    np.testing.assert_allclose(t_e, 2 * t, rtol=1e-12)
    # at that time the exact exponent lies 1% below the t^3 one
    D = 10.0
    ratio = co.decay_exponent(t, dl, D, I, kick_quanta=q) / -np.log(
        co.short_time_contrast(t, dl, D, I))
    np.testing.assert_allclose(ratio, 0.99, rtol=1e-9)


def test_coherence_time_scaling():
    # DESIGN section 4: decay time scales as D^(-1/3) in the t^3 regime
    # (from the Stickler et al. short-time law); long times: -ln C -> 2 D t / q^2.
    dl, I = 1, I_UNIT
    t1 = co.coherence_time_s(dl, 1e4, I)
    t8 = co.coherence_time_s(dl, 8e4, I)
    # both in the t^3 regime (q b t < 0.15): exponent differs by < 0.1% from t^3
    assert t1 < 0.15
    np.testing.assert_allclose(t1 / t8, 2.0, rtol=2e-3)
    np.testing.assert_allclose(t1, (3.0 / 1e4) ** (1 / 3), rtol=2e-3)
    # weak diffusion: linear regime, t = 1/(2D) (ln(1/C) = 1) up to the
    # bounded sin term: |t - 1/(2D)| <= 1/(q b) = 1
    D = 1e-3
    tl = co.coherence_time_s(dl, D, I)
    assert abs(tl - 1 / (2 * D)) <= 1.0
    # root really is a root
    for kind in ("ramsey", "echo"):
        for c in (0.9, np.exp(-1), 0.01):
            tc = co.coherence_time_s(3, 0.7, 2.3 * I, contrast=c, kind=kind, kick_quanta=2)
            np.testing.assert_allclose(
                co.decay_exponent(tc, 3, 0.7, 2.3 * I, kind=kind, kick_quanta=2),
                -np.log(c), rtol=1e-10)
    assert co.coherence_time_s(1, 0.0, I) == np.inf
    assert co.coherence_time_s(0, 1.0, I) == np.inf


def test_coherence_time_of_very_strong_diffusion_is_the_t3_law():
    # Deep in the t^3 regime (D up to 1e300 hbar^2/s: the root x = q b t of
    # x - sin x = c is ~1e-100) the coherence time is the short-time law of
    # Stickler, Schrinski, Hornberger, PRL 121, 040401 (2018) solved for t:
    # t = (3 I^2 ln(1/C) / (dl^2 D_SI))^(1/3); relative error (q b t)^2 / 60
    # in t (a third of the exponent's x^2 / 20), far below rounding here.
    dl, I, q = 2, 8.6e-37, 2
    for D in (1e40, 1e100, 1e200, 1e300):
        for kind, scale in (("ramsey", 1.0), ("echo", 4.0 ** (1 / 3))):
            t = co.coherence_time_s(dl, D, I, kind=kind, kick_quanta=q)
            law = (3 * I**2 / (dl**2 * D * hbar**2)) ** (1 / 3) * scale   # echo: a quarter of the exponent
            assert t == pytest.approx(law, rel=1e-12), (D, kind)


def test_coherence_budget_inverts_contrast():
    # exponent is linear in D (module derivation), so the budget is exact
    t = np.array([0.3, 2.0, 40.0])
    for kind, fn in (("ramsey", co.ramsey_contrast), ("echo", co.echo_contrast)):
        d_max = co.coherence_budget(0.8, t, 2, I_UNIT, kind=kind)
        for ti, di in zip(t, d_max):
            np.testing.assert_allclose(fn(ti, 2, di, I_UNIT), 0.8, rtol=1e-12)
    assert co.coherence_budget(0.5, 0.0, 1, I_UNIT) == np.inf


# ---------------------------------------------------------------------------
# (c) Monte-Carlo
# ---------------------------------------------------------------------------
def _mean_phasor(phase):
    """|<e^{i phase}>| and its standard error (delta method on Re, Im)."""
    z = np.exp(1j * phase)
    m = z.mean(axis=-1)
    mag = np.abs(m)
    u = m / mag
    proj = (z * np.conj(u)[..., None]).real     # component along the mean
    return mag, proj.std(axis=-1, ddof=1) / np.sqrt(z.shape[-1])


def test_gaussian_phase_diffusion_monte_carlo():
    # Classical Gaussian phase diffusion, the short-time limit of Stickler,
    # Schrinski, Hornberger, PRL 121, 040401 (2018): L(t) random walk with
    # <dL^2> = 2 D t, phase b * int L dt (Ramsey) and with the sign flipped
    # after t/2 (echo). Regime: q b t <= 0.3 (closed form within 0.5% of the
    # t^3 law in the exponent) and 2 D t ~ 70 kicks^2, many quanta diffused.
    rng = np.random.default_rng(np.random.SeedSequence(20240611))
    dl, D, I = 1, 110.0, I_UNIT
    b = hbar * dl / I
    T = 0.3 / b
    n_steps, n_traj = 300, 40000
    dt = T / n_steps
    L = np.zeros((n_traj, n_steps + 1))
    L[:, 1:] = np.cumsum(rng.normal(0.0, np.sqrt(2 * D * dt), (n_traj, n_steps)), axis=1)
    # trapezoid integral of the walk; its variance is low by 1/(4 n^2) ~ 3e-6
    cum = np.concatenate([np.zeros((n_traj, 1)),
                          np.cumsum(0.5 * (L[:, 1:] + L[:, :-1]) * dt, axis=1)], axis=1)
    idx = np.array([100, 200, 300])            # t = T/3, 2T/3, T (even: t/2 on grid)
    t = idx * dt
    ramsey_phase = b * cum[:, idx].T
    echo_phase = b * (2 * cum[:, idx // 2] - cum[:, idx]).T
    cr, sr = _mean_phasor(ramsey_phase)
    ce, se = _mean_phasor(echo_phase)
    # 4 standard errors (two-sided false-alarm rate 6e-5 per comparison;
    # passed for 30 other seeds)
    assert np.all(np.abs(cr - co.ramsey_contrast(t, dl, D, I)) < 4 * sr)
    assert np.all(np.abs(cr - co.short_time_contrast(t, dl, D, I)) < 4 * sr)
    assert np.all(np.abs(ce - co.echo_contrast(t, dl, D, I)) < 4 * se)
    # echo / Ramsey exponent ratio -> 1/4 (t^3 with pi pulse at t/2); at
    # q b t = 0.3 the exact ratio is 1/4 (1 + 3 x^2/80) = 0.2508.
    ratio = np.log(ce[-1]) / np.log(cr[-1])
    s_ratio = ratio * np.hypot(se[-1] / (ce[-1] * np.log(ce[-1])),
                               sr[-1] / (cr[-1] * np.log(cr[-1])))
    assert abs(ratio - 0.25) < 4 * s_ratio
    assert s_ratio < 0.02                       # the test resolves 1/4 from 1/3


def test_poisson_kick_monte_carlo_through_turnover():
    # A classical rotor kicked by +-q quanta at Poisson times (rate D/q^2
    # each) accumulates the phase q b sum_j sign_j F(s_j), F(s) = t - s
    # (Ramsey) or min(s, t - s) (echo). By Campbell's theorem (N. Campbell,
    # Proc. Camb. Phil. Soc. 15, 117 (1909), from memory) its mean phasor is
    # the master-equation result at all times, including the linear regime.
    rng = np.random.default_rng(np.random.SeedSequence(777))
    dl, D, q, I = 1, 0.2, 1, I_UNIT
    b = hbar * dl / I
    t = np.array([0.5, 1.0, 2.0, 3.0, 5.0, 8.0])
    t_max = t[-1]
    n_traj = 40000
    counts = rng.poisson(2 * D / q**2 * t_max, n_traj)
    owner = np.repeat(np.arange(n_traj), counts)
    s = rng.uniform(0.0, t_max, owner.size)
    sign = rng.choice([-1.0, 1.0], owner.size)
    for kind, fn in (("ramsey", co.ramsey_contrast), ("echo", co.echo_contrast)):
        phases = np.empty((t.size, n_traj))
        for i, ti in enumerate(t):
            F = np.where(s < ti, ti - s if kind == "ramsey" else np.minimum(s, ti - s), 0.0)
            phases[i] = q * b * np.bincount(owner, sign * F, minlength=n_traj)
        c, se = _mean_phasor(phases)
        expected = fn(t, dl, D, I, kick_quanta=q)
        # 4 standard errors (se ~ 3e-3; the smallest contrast, 0.02, is well
        # above it, so the bias of |mean|, ~ se^2 / (2 C), is negligible)
        assert np.all(np.abs(c - expected) < 4 * se)
        # turnover: the t^3 law is far below the kicked-rotor contrast
        t3 = co.short_time_contrast(t, dl, D, I, kind=kind)
        assert c[-2] - t3[-2] > 10 * se[-2]


# ---------------------------------------------------------------------------
# bad input
# ---------------------------------------------------------------------------
def test_bad_input_names_the_argument():
    with pytest.raises(InputError, match="D_hbar2_per_s: a finite number >= 0"):
        co.ramsey_contrast(1.0, 1, -1.0, I_UNIT)
    with pytest.raises(InputError, match="t_s: finite times >= 0 s"):
        co.echo_contrast([1.0, -2.0], 1, 1.0, I_UNIT)
    with pytest.raises(InputError, match="dl: an integer"):
        co.ramsey_contrast(1.0, 1.5, 1.0, I_UNIT)
    with pytest.raises(InputError, match="I_kg_m2: a finite number > 0"):
        co.ramsey_contrast(1.0, 1, 1.0, 0.0)
    with pytest.raises(InputError, match="contrast strictly between 0 and 1"):
        co.coherence_time_s(1, 1.0, I_UNIT, contrast=1.2)
    with pytest.raises(InputError, match="kind: one of ramsey, echo"):
        co.decay_exponent(1.0, 1, 1.0, I_UNIT, kind="cpmg")
    with pytest.raises(InputError, match="kick_quanta: an integer >= 1"):
        co.ramsey_contrast(1.0, 1, 1.0, I_UNIT, kick_quanta=0)
    with pytest.raises(InputError, match="L_cut: an integer >= 1"):
        co.master_equation_coherence(1.0, 1, 1.0, I_UNIT, L0=0, L_cut=0)
