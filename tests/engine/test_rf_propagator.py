"""RF runs with the exact per-step Mathieu propagator (engine.RF_PROPAGATOR_STEPS
steps per RF period, linear trap force exact, every other force as kicks)."""

import numpy as np
import pytest
import scipy.optimize
from conftest import assert_identical, two_ion_config

import mdrotor
from mdrotor.engine.integrate import RF_PROPAGATOR_STEPS, RF_STEPS_PER_PERIOD, BlockStepper, RunState, make_plan
from mdrotor.physics.mathieu import characteristic_exponent, transfer_matrices

TWO_PI = 2 * np.pi


@pytest.mark.parametrize("a,q", [(0.0, 0.2), (-0.01, 0.3), (0.02, 0.25), (-0.002, 0.7)])
@pytest.mark.parametrize("K", [7, 16])
def test_transfer_matrices_symplectic_and_floquet(a, q, K):
    """Each step's map has det 1 (Liouville: a linear Hamiltonian flow; NIST
    DLMF 28.2(iv)), and the product of the K maps that tile one period xi in
    [xi0, xi0 + pi] is the monodromy matrix, whose half trace is cos(pi
    beta) with beta the characteristic exponent (Floquet theory, DLMF
    28.2(iv); beta from the continued fraction, R.E. March, J. Mass
    Spectrom. 32, 351 (1997)). Tolerance: each map to ~1e-13 (DOP853 at
    rtol 1e-13), K of them multiplied: 1e-11."""
    xi0 = 0.3 + np.pi / K * np.arange(K)
    m = transfer_matrices(a, q, xi0, np.pi / K)
    assert np.max(np.abs(np.linalg.det(m) - 1.0)) < 1e-12
    mono = np.eye(2)
    for k in range(K):
        mono = m[k] @ mono
    assert abs(0.5 * np.trace(mono) - np.cos(np.pi * characteristic_exponent(a, q))) < 1e-11


def _single_ion(a, q, f_drive="20 MHz", duration="50 us", dt=None):
    d = {"species": {"ion": "40Ca+"}, "crystal": {"ions": 1},
         "trap": {"model": "rf", "f_drive": f_drive, "a": [a, a, -2 * a], "q": [q, q, -2 * q], "rf_phase": "0 deg"},
         "stage": [{"name": "a", "duration": duration}], "initial": {"temperature": "0 K", "wigner": False},
         "run": {"trajectories": 1, "seed": 1}}
    if dt:
        d["run"]["dt"] = dt
    return mdrotor.load_config(d)


@pytest.mark.parametrize("a,q", [(0.0, 0.2), (-0.01, 0.3), (0.004, 0.4)])
def test_single_ion_secular_frequency(a, q):
    """One ion, moved off the RF null along x, oscillates at w = beta W / 2
    with beta the characteristic exponent (Leibfried et al., Rev. Mod. Phys.
    75, 281 (2003), eqs. 8-10; beta from the continued fraction, March 1997).
    The stepper at its default 12 steps per RF period propagates the linear
    trap exactly, so the frequency fitted to the stroboscopic positions (one
    per RF period, 1000 periods) agrees to 1e-8 (the fit's own precision is
    ~1e-10 at this length), 1000 times tighter than the 256-step Verlet
    check of tests/engine/test_rf.py."""
    cfg = _single_ion(a, q)
    plan = make_plan(cfg)
    assert plan.rf_exact and plan.rf_steps >= RF_PROPAGATOR_STEPS  # more when the axial motion asks for it
    K = plan.rf_steps
    dt = plan.stage_dt[0]
    st = BlockStepper(plan, 1)
    pos, vel = np.zeros((3, 1, 1)), np.zeros((3, 1, 1))
    pos[0, 0, 0] = 1e-7
    state = RunState.start(plan, pos, vel, rf_phases=np.zeros(1))
    xs = []
    for j in range(1000):
        st.advance_block(state, 0, j * K * dt, dt, K)
        xs.append(pos[0, 0, 0])
    xs = np.array(xs)
    t = np.arange(1, len(xs) + 1) * K * dt
    w_ref = characteristic_exponent(a, q) * TWO_PI * plan.f_drive_hz / 2
    spec = np.abs(np.fft.rfft(xs * np.hanning(len(xs))))
    w0 = TWO_PI * np.fft.rfftfreq(len(xs), K * dt)[np.argmax(spec[1:]) + 1]

    def resid(p):
        return (p[0] * np.cos(p[2] * t) + p[1] * np.sin(p[2] * t) + p[3] * np.cos(p[4] * t) + p[5] * np.sin(p[4] * t)
                - xs) / 1e-7

    # the stroboscopic samples of u = Re[e^{i beta xi} P(xi)]: the secular line and its alias at W - w
    W = TWO_PI * plan.f_drive_hz
    fit = scipy.optimize.least_squares(resid, [xs[0], 0.0, w0, 0.0, 0.0, W - w0], x_scale=[1e-7, 1e-7, w0, 1e-8, 1e-8, W],
                                       xtol=1e-15, ftol=1e-15, gtol=1e-15)
    w_fit = fit.x[2] if abs(fit.x[2] - w_ref) < abs(fit.x[4] - w_ref) else fit.x[4]
    assert abs(w_fit / w_ref - 1) < 1e-8


def test_step_choice_and_fallback():
    """The automatic step of an RF run is T_RF / RF_PROPAGATOR_STEPS with the
    propagator; a stage that is not a whole number of such steps, a run.dt
    that does not divide T_RF, or the order-4 integrator take the fine-step
    path (T_RF / RF_STEPS_PER_PERIOD) and say so in a note (common practice,
    no source)."""
    plan = make_plan(_single_ion(0.0, 0.2, duration="1 us"))
    assert plan.rf_exact and plan.dt_s == pytest.approx(1 / 20e6 / RF_PROPAGATOR_STEPS, rel=1e-12)
    for cfg, why in ((_single_ion(0.0, 0.2, duration="1.001 us"), "stage 'a'"),
                     (_single_ion(0.0, 0.2, dt="0.7 ns"), "run.dt"),
                     (mdrotor.load_config({**two_ion_config(trap={"model": "rf", "f_radial": "1.0 MHz",
                                                                  "f_axial": "2.5 MHz", "f_drive": "40 MHz"},
                                                            pinning=None, stage=[{"name": "s", "duration": "1 us"}]),
                                           "run": {"integrator": "order4"}}), "order4")):
        p = make_plan(cfg)
        assert not p.rf_exact and p.rf_steps == RF_STEPS_PER_PERIOD
        assert any("without the exact Mathieu propagator" in n and why in n for n in p.notes), p.notes
        assert p.dt_s <= 1 / (cfg.trap.f_drive_hz * RF_STEPS_PER_PERIOD) * (1 + 1e-12)


def _pinned_rf_pair(**run):
    d = two_ion_config(trap={"model": "rf", "f_radial": "1.0 MHz", "f_axial": "2.5 MHz", "f_drive": "37 MHz"},
                       rotation={"f_start": "100 kHz"},
                       stage=[{"name": "hold", "duration": "3 us"},
                              {"name": "release", "duration": "2 us", "pinning": {"to": 0.0, "shape": "cosine"}}],
                       initial={"temperature": "0.5 mK", "wigner": True},
                       noise={"field": {"psd": {"kind": "white", "level": "1e-11 V^2/m^2/Hz"}}},
                       run={"trajectories": 24, "seed": 5, **run})
    return mdrotor.load_config(d)


def test_bit_identical_across_threads_and_chunks():
    """An RF run with the propagator, pinning, a release and white field noise
    is bit-identical for 1 and 2 threads and chunk sizes 1, 7 and 64 (every
    trajectory's step uses only its own numbers, in a fixed order; common
    practice, no source)."""
    import numba

    cfg = _pinned_rf_pair()
    assert make_plan(cfg).rf_exact
    threads = numba.get_num_threads()
    try:
        ref = mdrotor.run(cfg, chunk=64, threads=1)
        others = [mdrotor.run(cfg, chunk=1, threads=2), mdrotor.run(cfg, chunk=7, threads=2),
                  mdrotor.run(cfg, chunk=7, threads=1)]
    finally:
        numba.set_num_threads(threads)
    for other in others:
        for name in ("hold", "release"):
            assert_identical(ref.stages[name].arrays, other.stages[name].arrays, name)
    assert np.std(ref.final.arrays["L_hbar"]) > 0


def test_coarse_step_agrees_with_fine_reference():
    """Same seed, same RF phase (0) for every trajectory: the final L and
    phonon numbers of a thermal pinned pair after spin-down of the pinning
    agree between the default step (12 per RF period) and the propagator at
    128 steps per period (its splitting error over 100 times smaller) far inside
    their spread over the ensemble: the per-trajectory difference of L is
    below 2 % of the ensemble's L spread, of the stretch phonons below 2 %
    of their mean (the splitting error is second order in W dt; common
    practice, no source)."""
    runs = []
    for dt in (None, f"{1 / 37e6 / 128} s"):
        raw = two_ion_config(trap={"model": "rf", "f_radial": "1.0 MHz", "f_axial": "2.5 MHz", "f_drive": "37 MHz",
                                   "rf_phase": "0 deg"},
                             rotation={"f_start": "100 kHz"},
                             stage=[{"name": "hold", "duration": "3 us"},
                                    {"name": "release", "duration": "2 us", "pinning": {"to": 0.0, "shape": "cosine"}}],
                             initial={"temperature": "0.5 mK", "wigner": True},
                             run={"trajectories": 16, "seed": 5, **({"dt": dt} if dt else {})})
        cfg = mdrotor.load_config(raw)
        assert make_plan(cfg).rf_exact
        runs.append(mdrotor.run(cfg).final.arrays)
    coarse, fine = runs
    spread = np.std(fine["L_hbar"])
    assert spread > 0
    assert np.max(np.abs(coarse["L_hbar"] - fine["L_hbar"])) < 0.02 * spread
    n_c, n_f = coarse["mode_n"], fine["mode_n"]
    assert np.all(np.isfinite(n_f))
    assert np.max(np.abs(n_c - n_f)) < 0.02 * np.max(np.mean(n_f, axis=0))


def test_off_lattice_phase_takes_the_fine_path():
    """A trajectory whose RF phase is not one of the step phases has no
    precomputed map: the stepper integrates it with the RF force among the
    kicks instead of rounding its phase. One ion at q = 0.2 with a phase
    half a lattice step off: after one RF period its position agrees with
    scipy's DOP853 on u'' = -(W^2/4)(a - 2 q cos(W t + phase)) u (Leibfried
    et al., Rev. Mod. Phys. 75, 281 (2003)) to the Verlet error at T_RF / 12
    (1.2 % of the start offset; asserted 2 %), while the maps of the rounded
    phase are off by the micromotion's phase error, (q/2) x pi/12 and more
    (4.5 %; asserted above 3 %)."""
    from scipy.integrate import solve_ivp

    cfg = _single_ion(0.0, 0.2)
    plan = make_plan(cfg)
    K = plan.rf_steps
    dt = plan.stage_dt[0]
    W = TWO_PI * plan.f_drive_hz
    w2, rf2 = plan.kernel_model()[0][0, 0], plan.kernel_model()[1][0, 0]

    def final_x(phase, stepper_phase):
        pos, vel = np.zeros((3, 1, 1)), np.zeros((3, 1, 1))
        pos[0, 0, 0] = 1e-7
        state = RunState.start(plan, pos, vel, rf_phases=np.array([stepper_phase]))
        BlockStepper(plan, 1).advance_block(state, 0, 0.0, dt, n_per * K)
        return pos[0, 0, 0], state.rf_on_lattice

    phase = 3.5 * TWO_PI / K
    n_per = 1
    exact = solve_ivp(lambda t, y: [y[1], -(w2 - rf2 * np.cos(W * t + phase)) * y[0]], (0.0, n_per * K * dt),
                      [1e-7, 0.0], method="DOP853", rtol=1e-12, atol=1e-22).y[0, -1]
    x_off, on = final_x(phase, phase)
    assert not on
    assert abs(x_off - exact) < 0.02 * 1e-7
    x_lat, on = final_x(phase, 4 * TWO_PI / K)   # the nearest lattice phase: another trajectory
    assert on
    assert abs(x_lat - exact) > 0.03 * 1e-7
