"""Full RF dynamics: Mathieu stability, secular frequency, micromotion, pseudo vs RF."""

import numpy as np
import pytest
import scipy.optimize
import scipy.special
from conftest import two_ion_config
from scipy import constants as sc
from scipy.integrate import solve_ivp

import mdrotor
from mdrotor.commands.main import main
from mdrotor.engine.integrate import NO_LINEAR, RF_PROPAGATOR_STEPS, BlockStepper, RunState, initial_states, make_plan
from mdrotor.engine.kernels import advance

M = 40 * sc.atomic_mass
TWO_PI = 2 * np.pi


class _SingleIon:
    """One ion in u'' = -(W^2/4)(a - 2 q cos W t) u along x (Leibfried et
    al., Rev. Mod. Phys. 75, 281 (2003)), integrated by the package's kernel."""

    def __init__(self, q, a, steps_per_period=256, x0=1e-7, f_drive=20e6):
        self.W = TWO_PI * f_drive
        self.spp = steps_per_period
        self.dt = TWO_PI / self.W / steps_per_period
        w2 = np.array([[self.W ** 2 / 4 * a, 1.0, 1.0]])
        rf2 = np.array([[2 * self.W ** 2 / 4 * q, 0.0, 0.0]])
        self.model = (w2, rf2, np.zeros((1, 3)), np.ones(1), np.zeros((1, 1)), np.zeros((1, 1)))
        self.pos = np.zeros((3, 1, 1))
        self.vel = np.zeros((3, 1, 1))
        self.pos[0, 0, 0] = x0
        self.step = 0

    def run(self, n):
        te = self.dt * (self.step + np.arange(n + 1))
        drive = (np.cos(self.W * te), np.sin(self.W * te), np.ones(1), np.zeros(1)) + NO_LINEAR
        pin = (np.zeros(0, np.int64), np.zeros((n + 1, 0)), np.zeros((n + 1, 0)))
        lag = (np.ones(1), np.ones(1), 0, np.zeros(n + 1), np.zeros(n + 1, np.uint8), 1, np.zeros((2, 1)))
        advance(self.pos, self.vel, self.dt, n, np.array([1.0]), self.model, drive, pin, None, lag, None, None, 1)
        self.step += n
        return self.pos[0, 0, 0]

    def stroboscopic(self, n_periods):
        """x at the start of every RF period: the secular motion sampled at a fixed RF phase."""
        return np.array([self.run(self.spp) for _ in range(n_periods)])

    def fine(self, n_steps):
        return np.array([self.run(1) for _ in range(n_steps)])


def test_stability_boundary_single_ion():
    """a = 0: stable at q = 0.90, escapes at q = 0.92; the boundary is where
    scipy.special.mathieu_b(1, q) = 0, q = 0.908046 (NIST DLMF 28.2;
    Leibfried et al., Rev. Mod. Phys. 75, 281 (2003))."""
    q_edge = scipy.optimize.brentq(lambda q: scipy.special.mathieu_b(1, q), 0.5, 1.2)
    assert abs(q_edge - 0.908046) < 1e-6
    xs = _SingleIon(0.90, 0.0, 128).stroboscopic(300)
    assert np.max(np.abs(xs)) < 20 * 1e-7  # bounded
    xs = _SingleIon(0.92, 0.0, 128).stroboscopic(300)
    assert np.max(np.abs(xs)) > 1e3 * 1e-7  # exponential escape


def test_unstable_trap_refused(tmp_path, capsys):
    p = tmp_path / "u.toml"
    p.write_text("""
[species]
ion = "40Ca+"
[crystal]
ions = 1
[trap]
model = "rf"
f_drive = "20 MHz"
q = [0.92, -0.46, -0.46]
a = [0.0, 0.0, 0.0]
[[stage]]
name = "a"
duration = "1 us"
""")
    assert main(["run", str(p)]) == 2
    err = capsys.readouterr().err
    assert "trap.q[0]" in err and "unstable" in err


def _floquet_beta(a, q):
    """beta from the monodromy matrix over xi in [0, pi] of
    u'' + (a - 2 q cos 2 xi) u = 0: cos(pi beta) = Tr M / 2 (Floquet theory,
    NIST DLMF 28.2)."""
    def f(xi, y):
        return [y[1], -(a - 2 * q * np.cos(2 * xi)) * y[0]]

    m = np.column_stack([solve_ivp(f, (0, np.pi), y0, rtol=1e-12, atol=1e-14).y[:, -1] for y0 in ([1, 0], [0, 1])])
    return np.arccos(np.trace(m) / 2) / np.pi


@pytest.mark.parametrize("a,q", [(0.0, 0.2), (0.0, 0.4), (-0.01, 0.3), (0.02, 0.25)])
def test_secular_frequency_from_motion(a, q):
    """The simulated single-ion motion oscillates at w = beta W / 2 with beta
    from Floquet theory (scipy.integrate.solve_ivp of the monodromy matrix)
    to 1e-4 relative. The secular frequency is fitted to the RF-period
    averages of x(t); the stepper resolves the drive with 256 steps."""
    ion = _SingleIon(q, a, 256)
    xs = ion.stroboscopic(1500)
    t = np.arange(len(xs)) * ion.spp * ion.dt
    beta = _floquet_beta(a, q)
    w_ref = beta * ion.W / 2
    # coarse estimate from the spectrum, then a least-squares sinusoid fit
    spec = np.abs(np.fft.rfft(xs * np.hanning(len(xs))))
    f = np.fft.rfftfreq(len(xs), ion.spp * ion.dt)
    w0 = TWO_PI * f[np.argmax(spec[1:]) + 1]

    def resid(p):
        return p[0] * np.cos(p[2] * t) + p[1] * np.sin(p[2] * t) - xs

    fit = scipy.optimize.least_squares(resid, [xs[0], 0.0, w0], x_scale=[1e-7, 1e-7, w0])
    assert abs(fit.x[2] / w_ref - 1) < 1e-4
    # and the package's own Mathieu conversion agrees with Floquet
    from mdrotor.physics.mathieu import characteristic_exponent

    assert abs(characteristic_exponent(a, q) - beta) < 1e-9


def test_micromotion_amplitude_ratio():
    """u ~ cos(w t)(1 - (q/2) cos W t) (Leibfried et al. 2003): at q = 0.1 the
    micromotion amplitude over the secular amplitude is q/2 to 2 %."""
    q = 0.1
    ion = _SingleIon(q, 0.0, 64)
    # u = X cos(w t)(1 - (q/2) cos W t) has a secular line at w of amplitude
    # X and sidebands at W -+ w of amplitude q X / 4 each: measure them in
    # the spectrum of about 12 secular periods (Hann window, peak heights)
    n = 64 * 340
    xs = ion.fine(n)
    win = np.hanning(n)
    spec = np.abs(np.fft.rfft(xs * win))
    f = np.fft.rfftfreq(n, ion.dt)
    w_sec = TWO_PI * f[np.argmax(spec[1: n // 4]) + 1]

    def peak(freq):
        k = int(round(freq / (f[1] - f[0])))
        return spec[k - 3: k + 4].max()

    carrier = peak(w_sec / TWO_PI)
    sidebands = peak((ion.W - w_sec) / TWO_PI) + peak((ion.W + w_sec) / TWO_PI)
    assert abs(sidebands / carrier / (q / 2) - 1) < 0.02


def _stray_cfg(f_drive, field):
    return {"species": {"ion": "40Ca+"}, "crystal": {"ions": 1},
            "trap": {"model": "rf", "f_radial": "1.0 MHz", "f_axial": "2.0 MHz", "f_drive": f_drive,
                     "stray_field": [field, "0 V/m", "0 V/m"], "rf_phase": "0 deg"},
            "stage": [{"name": "a", "duration": "5 us"}], "initial": {"temperature": "0 K", "wigner": False},
            "run": {"trajectories": 1, "seed": 1}}


def test_excess_micromotion_from_stray_field():
    """A stray field E displaces the ion by Q E / (m w^2) and gives it
    micromotion of amplitude (q/2) times that displacement (D.J. Berkeland
    et al., J. Appl. Phys. 83, 5025 (1998)), to the O(q^2) of the lowest-order
    theory (q = 0.13 here: 1 %)."""
    cfg = mdrotor.load_config(_stray_cfg("30 MHz", "200 V/m"))
    plan = make_plan(cfg)
    q = cfg.trap.q[0]
    pos, vel = initial_states(plan, 1, np.arange(1))
    st, state = BlockStepper(plan, 1), RunState.start(plan, pos, vel, rf_phases=plan.rf_phases(1, np.arange(1)))
    dt = plan.stage_dt[0]
    xs = []
    for j in range(64 * 30):
        st.advance_block(state, 0, j * dt, dt, 1)
        xs.append(pos[0, 0, 0])
    xs = np.array(xs)
    disp = sc.e * 200 / (M * (TWO_PI * 1.0e6) ** 2)
    assert abs(xs.mean() / disp - 1) < 0.01
    amp = 0.5 * (xs.max() - xs.min())
    assert abs(amp / (q / 2 * disp) - 1) < 0.02


def _two_ion_rotating(f_drive, f_rot="150 kHz", duration="40 us", n=4, dt=None):
    d = two_ion_config(pinning=None,
                       trap={"model": "rf", "f_radial": "1.0 MHz", "f_axial": "2.5 MHz", "f_drive": f_drive},
                       rotation={"f_start": f_rot}, stage=[{"name": "free", "duration": duration}],
                       initial={"temperature": "0 K", "wigner": False}, run={"trajectories": n, "seed": 3})
    if dt:
        d["run"]["dt"] = dt
    return mdrotor.load_config(d)


def test_rotating_two_ion_radius_rf_vs_pseudo():
    """Leading correction (derived here): each ion's in-plane micromotion
    scales its position by (1 - (q/2) cos W t), so the ions' separation does
    too and the period-averaged Coulomb force is enhanced by
    <(1 - (q/2) cos)^-2> = 1 + 3 q^2 / 8. With r^3 proportional to the
    Coulomb strength (central-force orbit, Goldstein ch. 3) the RF radius
    exceeds the pseudopotential one by dr/r = q^2 / 8; the two-ion stretch
    frequency sqrt(3 w_r^2 + w^2) does not depend on the Coulomb strength
    and is unchanged at this order. Checked at q ~ 0.08: the measured dr/r
    is q^2 / 8 to within half of itself (T_RF / 128 steps)."""
    f_drive = "40 MHz"
    cfg = _two_ion_rotating(f_drive, dt=f"{1 / 40e6 / 128} s")
    q = cfg.trap.q[0]
    assert 0.08 < q < 0.12
    plan = make_plan(cfg)
    r_pseudo = np.hypot(*plan.crystal0.positions_m[0, :2])
    idx = np.arange(4)
    pos, vel = initial_states(plan, 3, idx)
    st, state = BlockStepper(plan, 4), RunState.start(plan, pos, vel, rf_phases=plan.rf_phases(3, idx))
    dt = plan.stage_dt[0]
    radii = []
    for j in range(128 * 40):
        st.advance_block(state, 0, j * dt, dt, 1)
        radii.append(np.hypot(pos[0, 0], pos[1, 0]))
    r_rf = np.mean(radii)
    lead = q * q / 8
    # the derived term sets the size and sign of the difference; the rest is
    # O(q^2) too (the DC stiffness of the Mathieu oscillator differs from
    # beta^2 at O(a q^2, q^4), and the stepper at O((W dt)^2)), not derived
    assert abs((r_rf / r_pseudo - 1) - lead) < 0.5 * lead


def test_pseudo_vs_rf_spin_up_and_release():
    """At low q (0.1) the pseudopotential and the full RF force give the same
    final L mean and spread within statistical error (|z| < 3) for a spin-up
    and release (the pseudopotential approximation, Leibfried et al. 2003)."""
    from mdrotor.studies.compare_trap import compare_trap

    d = two_ion_config(trap={"f_radial": "1.0 MHz", "f_axial": "2.5 MHz", "f_drive": "40 MHz"},
                       stage=[{"name": "spin-up", "duration": "40 us", "f_rot": {"to": "60 kHz", "shape": "smoothstep"}},
                              {"name": "release", "duration": "20 us", "pinning": {"to": 0.0, "shape": "cosine"}}],
                       initial={"temperature": "0.5 mK"}, run={"trajectories": 120, "seed": 21})
    cfg = mdrotor.load_config(d)
    assert 0.08 < cfg.trap.q[0] < 0.12
    cmp = compare_trap(cfg)
    rows = {r["quantity"]: r for r in cmp["rows"]}
    assert abs(rows["L mean (hbar)"]["z"]) < 3
    assert abs(rows["L spread (hbar)"]["z"]) < 3
    # the RF run took the exact per-step Mathieu propagator at its default step
    assert cmp["results"]["rf"].attrs["dt_s"] == pytest.approx(1 / 40e6 / RF_PROPAGATOR_STEPS, rel=1e-12)


def test_rotating_two_ion_stretch_frequency_rf_vs_pseudo():
    """The stretch frequency sqrt(3 w_r^2 + w^2) of the rotating pair is
    independent of the Coulomb strength (central-force orbit theory,
    Goldstein ch. 3), so the q^2 / 8 enhancement derived above leaves it
    unchanged; what remains are O(q^2) terms not derived here (DC stiffness
    versus beta^2, amplitude, the stepper). The RF stretch frequency, fitted
    to the radius sampled once per RF period, agrees with the pseudopotential
    mode to within the size of the leading correction, q^2 / 8 (q ~ 0.08)."""
    d = two_ion_config(pinning=None,
                       trap={"model": "rf", "f_radial": "1.0 MHz", "f_axial": "2.5 MHz", "f_drive": "40 MHz"},
                       rotation={"f_start": "150 kHz"}, stage=[{"name": "free", "duration": "40 us"}],
                       initial={"temperature": "0 K", "wigner": False, "occupations": {"in-plane": 30}},
                       run={"trajectories": 1, "seed": 3, "dt": f"{1 / 40e6 / 128} s"})
    cfg = mdrotor.load_config(d)
    q = cfg.trap.q[0]
    plan = make_plan(cfg)
    k = plan.crystal0.modes.labels.index("in-plane")
    f_pseudo = plan.crystal0.modes.freq_hz[k]
    assert abs(f_pseudo / np.sqrt(3 * 1.0e6**2 + 150e3**2) - 1) < 1e-6
    idx = np.arange(1)
    pos, vel = initial_states(plan, 1, idx)
    st, state = BlockStepper(plan, 1), RunState.start(plan, pos, vel, rf_phases=plan.rf_phases(1, idx))
    dt = plan.stage_dt[0]
    r = []
    for j in range(600):
        st.advance_block(state, 0, j * 128 * dt, dt, 128)
        r.append(np.hypot(pos[0, 0, 0], pos[1, 0, 0]) + np.hypot(pos[0, 1, 0], pos[1, 1, 0]))
    r = np.array(r) - np.mean(r)
    t = np.arange(len(r)) * 128 * dt
    # the stretch at ~2 MHz is sampled at 40 MHz: no aliasing
    spec = np.abs(np.fft.rfft(r * np.hanning(len(r))))
    fr = np.fft.rfftfreq(len(r), 128 * dt)
    w0 = TWO_PI * fr[np.argmax(spec[1:]) + 1]
    fit = scipy.optimize.least_squares(lambda p: p[0] * np.cos(p[2] * t) + p[1] * np.sin(p[2] * t) + p[3] - r,
                                       [r.std(), 0.0, w0, 0.0], x_scale=[r.std(), r.std(), w0, r.std()])
    f_rf = fit.x[2] / TWO_PI
    assert abs(f_rf / f_pseudo - 1) < q * q / 8


def _rotating_pair(model="rf", pinning=None, temperature="0 K", trajectories=64, duration="2 us", seed=3):
    """Two 40Ca+ rotating at 100 kHz from t = 0, q ~ 0.089 (37 MHz drive)."""
    d = two_ion_config(pinning=None,
                       trap={"model": model, "f_radial": "1.0 MHz", "f_axial": "2.5 MHz", "f_drive": "37 MHz"},
                       rotation={"f_start": "100 kHz"}, stage=[{"name": "free", "duration": duration}],
                       initial={"temperature": temperature, "wigner": temperature != "0 K"},
                       run={"trajectories": trajectories, "seed": seed})
    if pinning:
        d["pinning"] = pinning
    return mdrotor.load_config(d)


def _assert_orbit_periodic(plan, rel):
    """The plan's RF orbit (phase-0 state) carried over one RF period by
    scipy's DOP853 through the full RF force and Coulomb repulsion of the
    pair returns to itself turned by w T_RF, within ``rel`` of the largest
    position and velocity."""
    from mdrotor.engine.integrate import _turn_matrix

    op, ov = plan.rf_orbit
    w2, rf2, _, _, kq_i, kq_j = plan.kernel_model()
    W = TWO_PI * plan.f_drive_hz

    def rhs(t, y):
        r, v = y[:6].reshape(2, 3), y[6:].reshape(2, 3)
        acc = -(w2 - rf2 * np.cos(W * t)) * r
        d = r[0] - r[1]
        g = d / np.linalg.norm(d) ** 3
        acc[0] += kq_i[0, 1] * g
        acc[1] -= kq_j[0, 1] * g
        return np.concatenate([v.ravel(), acc.ravel()])

    z = np.concatenate([op[0].T.ravel(), ov[0].T.ravel()])
    period = 1.0 / plan.f_drive_hz
    end = solve_ivp(rhs, (0.0, period), z, method="DOP853", rtol=1e-12, atol=1e-20).y[:, -1]
    res = end - _turn_matrix(2, TWO_PI * plan.f0_hz * period) @ z
    assert np.max(np.abs(res[:6])) < rel * np.max(np.abs(z[:6]))
    assert np.max(np.abs(res[6:])) < rel * np.max(np.abs(z[6:]))


def test_rotating_start_L_does_not_depend_on_rf_phase():
    """A pair rotating at t = 0 starts on its periodic RF orbit in the frame
    co-rotating with the pinning, so its angular momentum is the same at every
    RF phase. (Before, the rigid rotation was scaled by the micromotion factor
    and L varied as (1 -+ q/2)^2: 0.91 to 1.09 at q = 0.089.)

    Free pair: the RF force of a trap symmetric about its axis is central, so
    L_z is conserved exactly (Goldstein, Classical Mechanics, ch. 3), by the
    stepper too: its exact linear map acts alike on x and y (it commutes with
    turns about z) and the Coulomb kicks are central, so each part conserves
    the quadratic invariant L_z (E. Hairer, C. Lubich, G. Wanner, Geometric
    Numerical Integration (2006), ch. IV.2, from memory). The instantaneous L_z at t = 0 then equals the
    measured secular L at every phase, to the Newton tolerance of the orbit
    (1e-12 relative per period; asserted 1e-9).

    The orbit is a periodic orbit of the exact equations of motion: scipy's
    DOP853 (rtol 1e-12) carries its phase-0 state over one RF period back to
    itself turned by w T_RF, to the stepper's splitting error (second order,
    (W dt)^2 times the Coulomb coupling: 4e-5 relative at the default 12
    steps per period, 2.2e-5 at 16, 1.4e-6 at 64; asserted 1e-4).

    Its size against the pseudopotential crystal: below it by a few 1e-4, of
    order q^2/8 (a first-order estimate, r = R (1 - (q/2) cos W t) with R =
    R_p (1 + q^2/8) and m r^2 dtheta/dt = L, gives L / L_p = 1 - q^2/8 but
    leaves out the modulation of the centrifugal term, <r^-3>, of the same
    order; not derived further). The exact orbit gives -0.33 q^2/8 (the
    propagator at 12 to 128 steps per period: -0.312 to -0.334; order 4 at
    64: -0.322), the former 64-step Verlet orbit -1.07 q^2/8, a splitting
    error of its own. Asserted: 0 > offset > -q^2/8.

    Pinned pair (order 2 at 100 kHz): L_z is not conserved within an RF
    period, but its period average, the measured L, is the same at every
    phase of the orbit (asserted 1e-9; the orbit is periodic)."""
    cfg = _rotating_pair()
    q = cfg.trap.q[0]
    assert 0.085 < q < 0.095
    plan = make_plan(cfg)
    idx = np.arange(64)
    phases = plan.rf_phases(3, idx)
    assert len(np.unique(phases)) == plan.rf_steps  # every step phase drawn
    pos, vel = initial_states(plan, 3, idx)
    m = plan.masses[:, None]
    L = np.sum(m * (pos[0] * vel[1] - pos[1] * vel[0]), axis=0) / sc.hbar
    L_p = plan.crystal0.L_hbar
    assert np.ptp(L) / np.mean(L) < 1e-9
    assert -q * q / 8 < np.mean(L) / L_p - 1 < 0
    _assert_orbit_periodic(plan, rel=1e-4)
    # the measured (secular) L equals it
    obs = BlockStepper(plan, 16).observe(RunState.start(plan, pos, vel, rf_phases=phases), 0, 0.0, plan.stage_dt[0])
    assert np.max(np.abs(obs["L_hbar"] / L - 1)) < 1e-9

    cfg = _rotating_pair(pinning={"order": 2, "strength": "2e5 V/m^2"})
    plan = make_plan(cfg)
    pos, vel = initial_states(plan, 3, idx)
    state = RunState.start(plan, pos, vel, rf_phases=plan.rf_phases(3, idx))
    obs = BlockStepper(plan, 16).observe(state, 0, 0.0, plan.stage_dt[0])
    assert np.ptp(obs["L_hbar"]) / np.mean(obs["L_hbar"]) < 1e-9
    assert not plan.notes


def test_thermal_micromotion_first_order_in_q():
    """A secular state (U, U') gets the micromotion of the Mathieu solution
    to first order in q and beta: u = U (1 - (q/2) cos psi) + (q/W) sin(psi) U',
    u' = U' (1 + (q/2) cos psi) + (q/2) W sin(psi) U (first sidebands
    C_{+-2}/C_0 = q / (a - (beta +- 2)^2), Leibfried et al., Rev. Mod. Phys.
    75, 281 (2003), eqs. 8-10). Then the secular energy one ion is measured
    with does not depend on the RF phase it starts at, up to the neglected
    second-order terms, (q + beta)^2 = 0.02 here. The lowest-order form
    u' = U' (1 - (q/2) cos psi) + ... made it vary by 4 q (0.36)."""
    d = {"species": {"ion": "40Ca+"}, "crystal": {"ions": 1},
         "trap": {"model": "rf", "f_radial": "1.0 MHz", "f_axial": "2.5 MHz", "f_drive": "37 MHz"},
         "stage": [{"name": "free", "duration": "2 us"}],
         "initial": {"temperature": "0 K", "wigner": False}, "run": {"trajectories": 1, "seed": 3}}
    from mdrotor.engine.integrate import _add_micromotion

    cfg = mdrotor.load_config(d)
    plan = make_plan(cfg)
    q = cfg.trap.q[0]
    beta = 2 * 1.0e6 / 37e6
    K = plan.rf_steps
    phases = np.arange(K) * TWO_PI / K
    for start in ("velocity", "position"):
        pos, vel = np.zeros((3, 1, K)), np.zeros((3, 1, K))
        if start == "velocity":
            vel[0] = 1.0   # m/s (about 50 quanta; wigner off: no zero-point offset)
        else:
            pos[0] = 1e-6
        _add_micromotion(plan, pos, vel, phases)
        obs = BlockStepper(plan, K).observe(RunState.start(plan, pos, vel, rf_phases=phases), 0, 0.0,
                                            plan.stage_dt[0])
        labels = obs["_modes"].labels
        n = sum(obs["mode_n"][:, labels.index(lab)] for lab in ("com-xy-1", "com-xy-2"))
        assert np.ptp(n) / np.mean(n) < (q + beta) ** 2, start


def test_compare_trap_rotating_start_consistent():
    """A cold pair (0.03 mK) that starts rotating at 100 kHz: pseudopotential
    and full RF force (q = 0.089) agree on the L mean and spread within
    statistical error (|z| < 3; the pseudopotential approximation, Leibfried
    et al., Rev. Mod. Phys. 75, 281 (2003)). Before the rotating crystal was
    put on its RF orbit the spread came out twice the pseudopotential's
    (z ~ 10)."""
    from mdrotor.studies.compare_trap import compare_trap

    cfg = _rotating_pair(model="pseudo", temperature="0.03 mK", trajectories=200, duration="20 us", seed=5)
    cmp = compare_trap(cfg)
    rows = {r["quantity"]: r for r in cmp["rows"]}
    assert abs(rows["L mean (hbar)"]["z"]) < 3
    assert abs(rows["L spread (hbar)"]["z"]) < 3
    assert not cmp["results"]["rf"].attrs["notes"]


def test_anisotropic_rotating_start_says_what_it_assumes():
    """An in-plane anisotropic trap has no periodic RF orbit for a rotating
    crystal: the run says that it starts on the orbit of the rotation-averaged
    trap (common practice, no source)."""
    d = two_ion_config(pinning=None,
                       trap={"model": "rf", "f_drive": "37 MHz", "a": [-0.002, 0.0, 0.002], "q": [0.10, -0.08, -0.02]},
                       rotation={"f_start": "50 kHz"}, stage=[{"name": "free", "duration": "1 us"}],
                       initial={"temperature": "0 K", "wigner": False}, run={"trajectories": 2, "seed": 3})
    plan = make_plan(mdrotor.load_config(d))
    assert any("no periodic RF orbit" in s and "q_x != q_y" in s and "a_x != a_y" in s for s in plan.notes)
