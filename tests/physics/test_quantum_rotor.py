"""Physics checks of the quantum rotor solver (mdrotor.physics.quantum_rotor).

Models are built directly (rigid rotor, synthetic moment of inertia) so that
each check runs in seconds; the config builder and the comparison with the
ensemble are in tests/model/test_quantum_setup.py.
"""

import math

import numpy as np
import pytest
from scipy.constants import hbar
from scipy.special import mathieu_a, mathieu_b, mathieu_even_coef, mathieu_odd_coef

from mdrotor.config.schedule import Profile, Schedule, Stage
from mdrotor.physics import coherence, rotor
from mdrotor.physics import quantum_rotor as qr

I = 8.27e-37          # kg m^2: two 40Ca+ ions 5 um apart
W_R = hbar / I        # rad/s: the rotor's own frequency unit


def schedule(*stages, pinned=True):
    """Stages (name, duration, (f0, f1, f_shape), (m0, m1, m_shape))."""
    out = []
    for name, dur, (f0, f1, fs), (m0, m1, ms) in stages:
        pins = (Profile(ms, m0, m1, dur),) if pinned else ()
        out.append(Stage(name, dur, Profile(fs, f0, f1, dur), pins))
    return Schedule(tuple(out), ("n2",) if pinned else ())


def pendulum(q, ladder, sched, order=2):
    """Rigid rotor with V = V0 cos(order phi), V0 from the Mathieu parameter q.

    With x = order phi / 2 the Schroedinger equation becomes the Mathieu
    equation y'' + (a - 2 q cos 2x) y = 0 (NIST DLMF 28.2.1) with
    q = 4 I V0 / (hbar^2 order^2) and E = hbar^2 order^2 a / (8 I).
    """
    V0 = q * hbar**2 * order**2 / (4.0 * I)
    return qr.RotorModel(ladder, qr.RotationalEnergy(I), sched, (qr.PinningComponent(order, V0),)), V0


HOLD = schedule(("hold", 1e-3, (0.0, 0.0, "hold"), (1.0, 1.0, "hold")))


# --------------------------------------------------------------------------
def test_free_rotor_keeps_P_and_has_exact_phases():
    # Free planar rotor: eigenstates e^{i L phi}, E_L = hbar^2 L^2 / (2 I)
    # (common practice, no source). The frame rotates (f_rot ramps) but no
    # pinning acts, so the laboratory-frame state must be exactly the free
    # one: P(L) unchanged and c_L(t) = c_L(0) exp(-i hbar L^2 t / 2 I).
    sched = schedule(("a", 0.4e-3, (0.0, 5e3, "linear"), (0, 0, "hold")),
                     ("b", 0.6e-3, (5e3, 5e3, "hold"), (0, 0, "hold")), pinned=False)
    model = qr.RotorModel(qr.Ladder(1, 0), qr.RotationalEnergy(I), sched)
    rng = np.random.default_rng(1)
    L0 = np.arange(-7, 9)
    c0 = rng.normal(size=L0.size) + 1j * rng.normal(size=L0.size)
    c0 /= np.linalg.norm(c0)
    times = [0.13e-3, 0.4e-3, 0.77e-3]
    ev = qr.evolve(model, qr.PureState(tuple(L0), tuple(c0)), times_s=times, keep_states=True)
    assert ev.numerics["steps"] == 0              # exact diagonal propagation
    for st in ev.states:
        i = np.searchsorted(st.L, L0)
        c = st.coefficients[0, i]
        # relative rounding of phases of size hbar L^2 t / 2I < 50 rad
        np.testing.assert_allclose(c, c0 * np.exp(-1j * hbar * L0**2 * st.t_s / (2 * I)), rtol=0, atol=1e-12)
        rest = np.delete(st.coefficients[0], i)
        assert np.max(np.abs(rest), initial=0.0) < 1e-15
    d = ev.final
    np.testing.assert_allclose(d.P[np.searchsorted(d.L, L0)], np.abs(c0) ** 2, rtol=0, atol=1e-14)


@pytest.mark.parametrize("q", [0.5, 3.0, 12.0, 40.0])
def test_pinned_levels_are_mathieu_characteristic_values(q):
    # Allowed-L sectors of V0 cos(2 phi): L even -> pi-periodic in x = phi:
    # a_0, b_2, a_2, b_4, ...; L odd -> antiperiodic: a_1, b_1, a_3, b_3, ...;
    # every L -> all of them (scipy.special.mathieu_a / mathieu_b; M. Abramowitz
    # and I.A. Stegun, Handbook of Mathematical Functions (1964), ch. 20; NIST
    # DLMF 28.2). Eigenvalues of the banded matrix to rounding: 1e-10 relative.
    cases = {
        (2, 0): sorted([mathieu_a(2 * r, q) for r in range(4)] + [mathieu_b(2 * r + 2, q) for r in range(4)])[:6],
        (2, 1): sorted([mathieu_a(2 * r + 1, q) for r in range(4)] + [mathieu_b(2 * r + 1, q) for r in range(4)])[:6],
        (1, 0): sorted([mathieu_a(r, q) for r in range(7)] + [mathieu_b(r, q) for r in range(1, 8)])[:6],
    }
    for (s, o), ref in cases.items():
        model, _ = pendulum(q, qr.Ladder(s, o), HOLD)
        lv = qr.levels(model, 0.0, 6)
        a = lv.energies_j * 8 * I / (hbar**2 * 4)
        np.testing.assert_allclose(a, ref, rtol=1e-10, atol=1e-10)


def test_order3_levels_are_mathieu_values():
    # A triangle (ladder spacing 3) under V0 cos(3 phi): x = 3 phi / 2, L = 3 j
    # gives e^{2 i j x}, pi-periodic: a_0, b_2, a_2, ... with q = 4 I V0 / (9 hbar^2)
    # (NIST DLMF 28.2.1, scipy.special.mathieu_a / mathieu_b).
    q = 7.0
    sched = HOLD
    model, _ = pendulum(q, qr.Ladder(3, 0), sched, order=3)
    lv = qr.levels(model, 0.0, 4)
    a = lv.energies_j * 8 * I / (hbar**2 * 9)
    ref = sorted([mathieu_a(0, q), mathieu_b(2, q), mathieu_a(2, q), mathieu_b(4, q)])
    np.testing.assert_allclose(a, ref, rtol=1e-10)


@pytest.mark.parametrize("q", [5.0, 20.0, 60.0])
def test_sudden_release_gives_mathieu_fourier_coefficients(q):
    # The ground state of V0 cos(2 phi) released in a time tau << 1/w_lib keeps
    # its angular-momentum components: P(L) = squared Fourier coefficients of
    # the Mathieu ground state (NIST DLMF 28.4; scipy.special.mathieu_even_coef
    # / mathieu_odd_coef). Even L: ce_0 = sum A_2r cos 2 r x. Odd L: the lower of
    # a_1, b_1, which for q > 0 is b_1 (se_1 = sum B_2r+1 sin (2r+1) x).
    # A linear release over tau changes P by O((V0 tau / hbar)^2) ~ 1e-8 here.
    assert mathieu_b(1, q) < mathieu_a(1, q)
    w_lib = 2 * math.sqrt(q) * W_R
    tau = 1e-4 / w_lib
    sched = schedule(("release", tau, (0.0, 0.0, "hold"), (1.0, 0.0, "linear")))
    for ladder, coef in ((qr.Ladder(2, 0), mathieu_even_coef(0, q)), (qr.Ladder(2, 1), mathieu_odd_coef(1, q))):
        model, _ = pendulum(q, ladder, sched)
        d = qr.evolve(model, qr.ThermalState(math.inf)).final
        ref = {}
        for r, A in enumerate(coef):
            if ladder.offset == 0:
                if r == 0:
                    ref[0] = A**2
                else:
                    ref[2 * r] = ref[-2 * r] = A**2 / 4
            else:
                ref[2 * r + 1] = ref[-2 * r - 1] = A**2 / 4
        tot = sum(ref.values())
        got = dict(zip(d.L.tolist(), d.P))
        for L in set(ref) | set(got):
            assert abs(got.get(L, 0.0) - ref.get(L, 0.0) / tot) < 1e-6


def _release_weight(q, ladder, T, shape, tol):
    sched = schedule(("release", T, (0.0, 0.0, "hold"), (1.0, 0.0, shape)))
    model, _ = pendulum(q, ladder, sched)
    d = qr.evolve(model, qr.ThermalState(math.inf), tol=tol).final
    return dict(zip(d.L.tolist(), d.P))


def test_slow_release_ends_in_lowest_allowed_L():
    # Adiabatic theorem (A. Messiah, Quantum Mechanics, vol. II, ch. XVII):
    # a slow release carries the pinned ground state into the free state of
    # the lowest |L| with the same symmetry: L = 0 for bosons; for fermions the
    # even combination of L = +-1, equal weights by parity.
    q = 20.0
    T = 400 / W_R
    pb = _release_weight(q, qr.Ladder(2, 0), T, "cosine", 1e-4)
    assert pb[0] > 1 - 1e-6
    pf = _release_weight(q, qr.Ladder(2, 1), T, "cosine", 1e-4)
    assert pf[1] + pf[-1] > 1 - 1e-6
    assert abs(pf[1] - pf[-1]) < 1e-9


def test_nonadiabatic_weight_of_linear_and_cosine_releases():
    # First-order adiabatic perturbation theory (A. Messiah, Quantum Mechanics,
    # vol. II, ch. XVII, section 13): the amplitude left in |m> by a ramp
    # of duration T is, for large T, set by the ends of the ramp,
    # hbar <m|dH/dt|0> / (E_m - E_0)^2 where dH/dt jumps, or
    # hbar^2 <m|d2H/dt2|0> / (E_m - E_0)^3 where only the second derivative
    # jumps. A deep start (q = 20: gap 9 hbar^2/I against 2 hbar^2/I at the end,
    # whose contribution is below 1 %) leaves the end V = 0, where
    # <+-2|cos 2 phi|0> = 1/2 and E_2 - E_0 = 2 hbar^2 / I:
    #   linear  V0 (1 - t/T):  P = 2 (q / (8 w_r T))^2               (1/T^2)
    #   cosine  V0 (1 + cos(pi t/T))/2:  P = 2 (q pi^2 / (32 (w_r T)^2))^2   (1/T^4)
    # with w_r = hbar / I. The next order is smaller by about q / (4 w_r T).
    q = 20.0
    for wT in (500.0, 1000.0):
        p = _release_weight(q, qr.Ladder(2, 0), wT / W_R, "linear", 1e-4)
        na = 1.0 - p[0]
        assert na == pytest.approx(2 * (q / (8 * wT)) ** 2, rel=0.03)
    for wT in (200.0, 400.0):
        p = _release_weight(q, qr.Ladder(2, 0), wT / W_R, "cosine", 1e-6)
        na = 1.0 - p[0]
        assert na == pytest.approx(2 * (q * math.pi**2 / (32 * wT**2)) ** 2, rel=0.08)


def test_step_error_falls_with_the_tolerance():
    # Property check of the step control (module docstring): the
    # total-variation error of P(L) after a spin-up and release, against a run
    # with tol / 100, is below tol and falls at least as fast as tol (h^4).
    q = 400.0
    sched = schedule(("spin", 30 / W_R, (0.0, 200 * W_R / (2 * math.pi), "smoothstep"), (1.0, 1.0, "hold")),
                     ("release", 30 / W_R, (200 * W_R / (2 * math.pi),) * 2 + ("hold",), (1.0, 0.0, "cosine")))
    model, _ = pendulum(q, qr.Ladder(2, 1), sched)
    st = qr.ThermalState(math.log(2.0) / (hbar * 2 * math.sqrt(q) * W_R))   # nbar = 1

    def P(tol):
        d = qr.evolve(model, st, tol=tol).final
        return dict(zip(d.L.tolist(), d.P))

    ref = P(1e-5)

    def err(p):
        return 0.5 * sum(abs(p.get(L, 0) - ref.get(L, 0)) for L in set(p) | set(ref))

    e1, e2 = err(P(1e-3)), err(P(1e-4))
    assert 0 < e1 < 1e-3
    assert e2 < e1 / 5


def test_kicks_reproduce_the_closed_form_ramsey_contrast():
    # Angular-momentum diffusion D with kicks of +-q quanta at gamma = D/q^2 per
    # direction: the Ramsey contrast of branches dl apart is
    # exp[-(2D/q^2)(t - sin(q b t)/(q b))], b = hbar dl / I (B.A. Stickler,
    # B. Schrinski, K. Hornberger, Phys. Rev. Lett. 121, 040401 (2018); derived
    # in mdrotor.physics.coherence). Quantum-jump unravelling, R records: the estimate
    # of sum_m <m + dl|rho|m> has a standard error from the records' spread;
    # we allow 4 of them.
    dl, q, R = 2, 2, 3000
    b = hbar * dl / I
    D = 0.5 * q * b                              # turnover region: q b t ~ 1 at t ~ 1/(q b)
    t_end = 3.0 / (q * b)
    sched = schedule(("free", t_end, (0.0, 0.0, "hold"), (0, 0, "hold")), pinned=False)
    kick = qr.KickChannel(q, (0.0, t_end), (D / q**2,))
    model = qr.RotorModel(qr.Ladder(2, 0), qr.RotationalEnergy(I), sched, (), (kick,))
    times = [0.5 / (q * b), 1.0 / (q * b), 2.0 / (q * b), t_end]
    ev = qr.evolve(model, qr.PureState((0, dl), (1.0, 1.0)), records=R, seed=7, times_s=times, keep_states=True,
                   max_columns=R)
    for st in ev.states:
        c = st.coefficients
        z = np.sum(c[:, dl // 2:] * np.conj(c[:, : c.shape[1] - dl // 2]), axis=1)   # per record
        mean = np.mean(z)
        se = np.sqrt(np.var(z.real, ddof=1) + np.var(z.imag, ddof=1)) / math.sqrt(R)
        expected = 0.5 * coherence.ramsey_contrast(st.t_s, dl, D, I, kick_quanta=q)
        assert abs(abs(mean) - expected) < 4 * se + 1e-12


def test_same_seed_same_result_any_record_count():
    # Randomness only through the seed: each column's kicks come from
    # (seed, record, level, channel), so a run repeats bit for bit, and the
    # first records of a run with more records are the same records.
    sched = schedule(("hold", 2e-3, (0.0, 300.0, "linear"), (1.0, 1.0, "hold")),
                     ("free", 1e-3, (300.0, 300.0, "hold"), (0.0, 0.0, "hold")))
    model, _ = pendulum(30.0, qr.Ladder(2, 1), sched)
    model = qr.RotorModel(model.ladder, model.energy, sched, model.pinning, (qr.KickChannel(2, (0.0, 3e-3), (2e3,)),))
    st = qr.ThermalState(1 / (1.380649e-23 * 1e-9))
    a = qr.evolve(model, st, records=3, seed=11, keep_states=True)
    b = qr.evolve(model, st, records=3, seed=11, keep_states=True)
    c = qr.evolve(model, st, records=5, seed=11, keep_states=True)
    assert a.numerics["kicks"] > 0
    np.testing.assert_array_equal(a.final.P, b.final.P)
    ka, kc = a.states[-1], c.states[-1]
    n = ka.coefficients.shape[0]
    i = np.searchsorted(kc.L, ka.L)
    np.testing.assert_allclose(kc.coefficients[:n][:, i], ka.coefficients, rtol=0, atol=1e-12)
    assert qr.evolve(model, st, records=3, seed=12).final.P.tolist() != a.final.P.tolist()


def test_forbidden_L_stay_empty():
    # Exchange symmetry: with every coupling (pinning order, kick size) a
    # multiple of the ladder spacing, the odd-L sector of two identical
    # fermions never feeds even L (their ladder is odd L: tests/physics/test_rotor.py).
    # Propagated in the full integer basis from the odd-L thermal
    # states, with pinning, a release and kicks: even L stay below 1e-12.
    q = 50.0
    sched = schedule(("spin", 2e-3, (0.0, 400.0, "smoothstep"), (1.0, 1.0, "hold")),
                     ("release", 2e-3, (400.0, 400.0, "hold"), (1.0, 0.0, "cosine")))
    from mdrotor.physics.species import get_species

    ca = get_species("40Ca+")
    lad = rotor.allowed_L_ladder(np.array([[-3e-6, 0, 0], [3e-6, 0, 0]]), [ca, ca])
    assert (lad.modulus, lad.residue) == (2, 1)
    odd, _ = pendulum(q, qr.Ladder(2, 1), sched)
    lv = qr.levels(odd, 0.0, 3)
    kick = qr.KickChannel(2, (0.0, 4e-3), (300.0,))
    full = qr.RotorModel(qr.Ladder(1, 0), odd.energy, sched, odd.pinning, (kick,))
    for v in lv.vectors:
        ev = qr.evolve(full, qr.PureState(tuple(lv.L), tuple(v)), records=2, seed=3)
        for d in ev.distributions:
            assert np.sum(d.P[d.L % 2 == 0]) < 1e-12
            assert np.sum(d.P[d.L % 2 == 1]) == pytest.approx(1.0, abs=1e-12)


def test_lines_are_the_rotor_transition_frequencies():
    # Rigid rotor: L -> L + k at k f_rot(L) + k^2 hbar / (4 pi I) with
    # f_rot(L) = hbar L / (2 pi I): mdrotor.physics.rotor.transition_frequencies_hz.
    model = qr.RotorModel(qr.Ladder(2, 1), qr.RotationalEnergy(I), HOLD, ())
    L = np.array([995, 997, 999, 1001])
    P = np.array([0.1, 0.4, 0.3, 0.2])
    d = qr.Distribution("x", 0.0, L, P, float(P @ L), 1.0)
    lines = qr.sideband_lines(model, d, 2, p_min=0.0)
    for Li, f in zip(lines["L"], lines["freq_hz"]):
        ref = rotor.transition_frequencies_hz(hbar * Li / (2 * math.pi * I), I, 2).centre_hz[1]
        assert f == pytest.approx(ref, rel=1e-12)
    assert lines["line_spacing_hz"] == pytest.approx(2 * 2 * hbar / (2 * math.pi * I), rel=1e-9)


def test_lines_of_a_negative_rotation_add_quanta_in_its_sense():
    # A line's frequency is |E(L') - E(L)| / h > 0 (a spectrometer sees no
    # sign; common practice, no source). E_rot depends on |L| only (planar
    # rotor, E_L = hbar^2 L^2 / 2I), so the rotor turning the other way has
    # the same comb: the lines add |dL| quanta in the sense of rotation,
    # L -> L - |dL| for L < 0, as mdrotor rotor writes them (dL negative).
    w2 = np.linspace(0.0, (2 * math.pi * 3e5) ** 2, 8)
    energy = qr.RotationalEnergy(I, tuple(w2), tuple(I * (1.0 + 0.3 * w2 / w2[-1])))
    model = qr.RotorModel(qr.Ladder(2, 1), energy, HOLD, ())
    L = np.array([995, 997, 999, 1001])
    P = np.array([0.1, 0.4, 0.3, 0.2])
    pos = qr.sideband_lines(model, qr.Distribution("x", 0.0, L, P, float(P @ L), 1.0), 2, p_min=0.0)
    neg = qr.sideband_lines(model, qr.Distribution("x", 0.0, -L, P, -float(P @ L), 1.0), 2, p_min=0.0)
    assert pos["dL"] == 2 and neg["dL"] == -2
    assert neg["L"] == [-x for x in pos["L"]]
    for key in ("freq_hz",):
        np.testing.assert_allclose(neg[key], pos[key], rtol=1e-12)
    for key in ("centre_hz", "width_hz", "line_spacing_hz"):
        assert neg[key] == pytest.approx(pos[key], rel=1e-12)
    assert min(neg["freq_hz"]) > 0
    # a state at rest spanning both senses: every line still positive, each L
    # adding the quanta in its own sense (L = -1 and 1 give the same line)
    L0 = np.array([-3, -1, 1, 3])
    rest = qr.sideband_lines(model, qr.Distribution("x", 0.0, L0, np.full(4, 0.25), 0.0, 2.2), 2, p_min=0.0)
    f = dict(zip(rest["L"], rest["freq_hz"]))
    assert min(rest["freq_hz"]) > 0
    assert f[-1] == pytest.approx(f[1], rel=1e-12) and f[-3] == pytest.approx(f[3], rel=1e-12)
    assert f[1] == pytest.approx((energy.energy_j(3.0) - energy.energy_j(1.0)) / (2 * math.pi * hbar), rel=1e-12)


def test_stretched_rotational_energy_obeys_hamiltons_equation():
    # dE/dL = hbar w (Hamilton's equation for the angle; H. Goldstein, Classical
    # Mechanics, ch. 8) with hbar L = I(w) w; a rigid table gives hbar^2 L^2 / 2I.
    w2 = np.linspace(0.0, (2 * math.pi * 3e5) ** 2, 8)
    Is = I * (1.0 + 0.3 * w2 / w2[-1]) ** 1.0
    e = qr.RotationalEnergy(I, tuple(w2), tuple(Is))
    L = np.array([10.0, 3e3, 9e3, 1.5e4])
    w = e.omega_of_L(L)
    np.testing.assert_allclose(e.moment_of_inertia(w) * w / hbar, L, rtol=1e-13)
    dL = 1e-3 * L
    dE = (e.energy_j(L + dL) - e.energy_j(L - dL)) / (2 * dL)
    np.testing.assert_allclose(dE, hbar * w, rtol=1e-6)       # central difference, h^2 ~ 1e-6
    rigid = qr.RotationalEnergy(I, (0.0, 1e12), (I, I))
    np.testing.assert_allclose(rigid.energy_j(L), hbar**2 * L**2 / (2 * I), rtol=1e-12)


def test_harmonic_step_error_coefficient():
    # The step of the module docstring on a harmonic oscillator: its frequency
    # error vanishes as (w h)^4 / 4320 (S.A. Chin, Phys. Lett. A 226, 344 (1997)
    # shows the fourth order; coefficient computed here from the one-step map).
    def one_step(x):
        kick = lambda t, k: np.array([[1.0, 0.0], [-t * k, 1.0]])   # noqa: E731
        drift = lambda t: np.array([[1.0, t], [0.0, 1.0]])            # noqa: E731
        mm = kick(x / 6, 1) @ drift(x / 2) @ kick(2 * x / 3, 1 - x * x / 24) @ drift(x / 2) @ kick(x / 6, 1)
        return math.acos(np.trace(mm) / 2) / x - 1

    for x in (0.05, 0.1):
        assert one_step(x) == pytest.approx(-x**4 / 4320, rel=2e-3)    # O(x^2) relative correction
        assert qr.harmonic_frequency_error(x) == pytest.approx(one_step(x), rel=1e-9)


def test_bad_input_is_refused_with_the_key():
    from mdrotor.errors import InputError

    with pytest.raises(InputError, match="tol"):
        qr.evolve(qr.RotorModel(qr.Ladder(), qr.RotationalEnergy(I), HOLD), qr.PureState((0,), (1.0,)), tol=0.5)
    with pytest.raises(InputError, match="order"):
        qr.RotorModel(qr.Ladder(2, 1), qr.RotationalEnergy(I), HOLD, (qr.PinningComponent(3, 1e-25),))
    with pytest.raises(InputError, match="initial.L"):
        qr.evolve(qr.RotorModel(qr.Ladder(2, 1), qr.RotationalEnergy(I), HOLD), qr.PureState((0,), (1.0,)))
    with pytest.raises(InputError, match="I0_kg_m2"):
        qr.RotationalEnergy(-1.0)
