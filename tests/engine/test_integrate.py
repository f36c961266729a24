"""The Monte-Carlo engine: integrator properties and physics of spin-up and release."""

import numpy as np
import pytest
from scipy import constants as sc

import mdrotor
from mdrotor.engine.integrate import NO_LINEAR, _pin_coefficients, initial_states, integrate, make_plan
from mdrotor.engine.kernels import advance
from mdrotor.engine.observe import observe

HBAR = sc.hbar
TWO_PI = 2 * np.pi


def base(n=2, **over):
    """A small run config as a dict (40Ca+ ions, ring trap, quadrupole pin)."""
    d = {
        "species": {"ion": "40Ca+"},
        "crystal": {"ions": n},
        "trap": {"f_radial": "1.2 MHz", "f_axial": "2.9 MHz"},
        "pinning": {"order": 2, "strength": "2e5 V/m^2"},
        "stage": [{"name": "hold", "duration": "20 us"}],
        "initial": {"temperature": "0 K", "wigner": False},
        "run": {"trajectories": 8, "seed": 5},
    }
    for k, v in over.items():
        d[k] = v
    return d


def step(plan, pos, vel, n_steps, dt=None, t0=0.0, lag=False):
    """Advance with the compiled stepper through the schedule's pinning."""
    dt = plan.dt_s if dt is None else dt
    sub = np.cumsum(plan.fracs)
    ts = t0 + dt * np.arange(n_steps + 1)
    te = np.concatenate([[ts[0]], (ts[:-1, None] + dt * sub[None, :]).ravel()])
    c_re, c_im = _pin_coefficients(plan, te)
    n_t = pos.shape[2]
    lag = (plan.masses, plan.charges, 0, np.zeros(n_steps + 1), np.zeros(n_steps + 1, np.uint8), 1, np.zeros((2, n_t)))
    advance(pos, vel, dt, n_steps, plan.fracs, plan.kernel_model(), None, (plan.pin_orders, c_re, c_im), None, lag, None, None, 16)


def energy(plan, pos, vel):
    """Lab-frame energy of every trajectory with a static potential (J)."""
    from mdrotor.model.build import model_potential

    pot = model_potential(plan.cfg, 0.0)
    out = []
    for b in range(pos.shape[2]):
        r = pos[:, :, b].T
        out.append(pot.energy(r) + 0.5 * np.sum(plan.masses[:, None] * vel[:, :, b].T ** 2))
    return np.array(out)


def thermal_plan(n=3, temp="0.5 mK", unpinned=True, **over):
    d = base(n, initial={"temperature": temp, "wigner": False}, **over)
    if unpinned:
        d.pop("pinning")
    return make_plan(mdrotor.load_config(d))


def test_angular_momentum_conserved_to_rounding():
    """Velocity Verlet conserves L_z exactly (to rounding) when every force is
    central or radial about the axis: each kick changes m v by F dt with zero
    torque, and the drift r += v dt keeps r x v (a property of the splitting:
    J.M. Sanz-Serna and M.P. Calvo, Numerical Hamiltonian Problems (1994),
    conservation of quadratic invariants by symplectic Runge-Kutta-Nystrom)."""
    plan = thermal_plan(4, "2 mK")
    pos, vel = initial_states(plan, 1, np.arange(16))
    from mdrotor.physics.frame import angular_momentum

    l0 = angular_momentum(pos, vel, plan.masses)[0]
    step(plan, pos, vel, 20000)
    l1 = angular_momentum(pos, vel, plan.masses)[0]
    # scale of the individual terms m |r| |v| that L sums (rounding is relative to them)
    scale = np.max(np.sum(plan.masses[:, None] * np.linalg.norm(pos, axis=0) * np.linalg.norm(vel, axis=0), axis=0))
    assert np.max(np.abs(l1 - l0)) < 1e-11 * scale


def test_energy_bounded_no_drift_over_1e6_steps():
    """Symplectic integrators keep the energy error bounded and oscillating,
    with no secular drift (E. Hairer, C. Lubich, G. Wanner, Geometric
    Numerical Integration (2006), ch. IX: backward error analysis)."""
    plan = thermal_plan(2, "1 mK", unpinned=False)
    pos, vel = initial_states(plan, 3, np.arange(4))
    e0 = energy(plan, pos, vel)
    errs = []
    for _ in range(20):
        step(plan, pos, vel, 50000)
        errs.append((energy(plan, pos, vel) - e0) / e0)
    errs = np.abs(np.array(errs))
    # bounded: Verlet's shadow energy differs by ~(w dt)^2 / 8 of the mode
    # energy; relative to the total (mostly static Coulomb + trap) it is ~1e-5
    assert errs.max() < 5e-5
    # no drift: the second half of the run is not worse than the first
    assert errs[10:].max() < 2.0 * errs[:10].max()


@pytest.mark.parametrize("integrator,order", [("verlet", 2), ("order4", 4)])
def test_convergence_order(integrator, order):
    """Global error ~ dt^2 for velocity Verlet and ~ dt^4 for the Yoshida
    composition (H. Yoshida, Phys. Lett. A 150, 262 (1990)); measured from the
    final positions against a run with dt / 16 of the same method."""
    d = base(2, initial={"temperature": "1 mK", "wigner": False})
    d["run"] = {"trajectories": 4, "seed": 2, "integrator": integrator}
    plan = make_plan(mdrotor.load_config(d))
    pos0, vel0 = initial_states(plan, 2, np.arange(4))
    t_end = 2e-6
    finals = []
    for n in (200, 400, 6400):
        p, v = pos0.copy(), vel0.copy()
        step(plan, p, v, n, dt=t_end / n)
        finals.append(p)
    e1 = np.max(np.abs(finals[0] - finals[2]))
    e2 = np.max(np.abs(finals[1] - finals[2]))
    measured = np.log2(e1 / e2)
    assert abs(measured - order) < 0.3, measured


def test_time_reversibility():
    """Forward n steps, flip velocities, n steps back: the initial state comes
    back to rounding (velocity Verlet is symmetric; Hairer, Lubich, Wanner
    (2006), ch. V)."""
    plan = thermal_plan(3, "1 mK", unpinned=False)
    pos, vel = initial_states(plan, 4, np.arange(8))
    p0, v0 = pos.copy(), vel.copy()
    step(plan, pos, vel, 5000)
    vel *= -1
    step(plan, pos, vel, 5000)
    vel *= -1
    assert np.max(np.abs(pos - p0)) < 1e-9 * np.max(np.abs(p0))
    assert np.max(np.abs(vel - v0)) < 1e-9 * np.max(np.abs(v0))


def _libration_energy(res):
    fin = res.final
    k = fin.modes["label"].index("libration")
    return fin.arrays["mode_n"][:, k] * HBAR * 2 * np.pi * fin.modes["freq_hz"][k]


def test_forced_oscillator_linear_ramp():
    """A pinned crystal at zero temperature whose f_rot ramps linearly with
    angular acceleration alpha over time T (sudden start and stop) ends with
    libration energy E = 2 I (alpha / w)^2 sin^2(w T / 2) in the harmonic
    limit (L.D. Landau and E.M. Lifshitz, Mechanics, section 22: a constant
    force switched on and off); a smoothstep ramp leaves orders of magnitude
    less."""
    f1 = 2e3
    T = 30.3e-6  # about 6.7 libration periods, not near a zero of the law
    d = base(2)
    d["stage"] = [{"name": "spin-up", "duration": f"{T} s", "f_rot": {"to": f"{f1} Hz", "shape": "linear"}},
                  {"name": "hold", "duration": "5 us"}]
    cfg = mdrotor.load_config(d)
    res = mdrotor.run(cfg, trajectories=1)
    cr = mdrotor.crystal(cfg)
    k = cr.modes.labels.index("libration")
    w = cr.modes.omega[k]
    I = cr.moment_of_inertia_kg_m2
    alpha = TWO_PI * f1 / T
    expect = 2 * I * (alpha / w) ** 2 * np.sin(w * T / 2) ** 2
    assert np.sin(w * T / 2) ** 2 > 0.3
    e = _libration_energy(res)[0]
    # harmonic limit: lag ~ 1e-3 rad, anharmonic and rotating-frame corrections ~1e-3
    assert abs(e / expect - 1) < 0.01
    d["stage"][0]["f_rot"]["shape"] = "smoothstep"
    e_smooth = _libration_energy(mdrotor.run(mdrotor.load_config(d), trajectories=1))[0]
    assert e_smooth < 1e-3 * expect


def test_adiabatic_invariant_lowering_the_pinning():
    """Slowly lowering the pinning strength keeps E_lib / w_lib (the action)
    constant (Landau and Lifshitz, Mechanics, section 49): the libration
    phonon number of every trajectory is conserved to 1 %."""
    d = base(2, initial={"temperature": "0 K", "wigner": False, "occupations": {"libration": 30}})
    d["stage"] = [{"name": "start", "duration": "2 us"},
                  {"name": "lower", "duration": "150 us", "pinning": {"to": 0.25, "shape": "cosine"}}]
    d["run"] = {"trajectories": 16, "seed": 9}
    res = mdrotor.run(mdrotor.load_config(d))
    k0 = res.stages["start"].modes["label"].index("libration")
    k1 = res.stages["lower"].modes["label"].index("libration")
    n0 = res.stages["start"].arrays["mode_n"][:, k0]
    n1 = res.stages["lower"].arrays["mode_n"][:, k1]
    f0, f1 = res.stages["start"].modes["freq_hz"][k0], res.stages["lower"].modes["freq_hz"][k1]
    assert f1 < 0.6 * f0  # the libration frequency really changed (sqrt(0.25) rigid)
    assert np.max(np.abs(n1 / n0 - 1)) < 0.01


def test_thermal_sampling_energy():
    """The sampled ensemble has <E - E_min> = sum_k hbar w_k (n_k + 1/2) with
    Wigner sampling and N_modes k_B T classically (equipartition), measured
    from positions and velocities with the full potential, not from the
    mode projection (the Wigner function of a thermal oscillator: W.P.
    Schleich, Quantum Optics in Phase Space (2001), ch. 4)."""
    for wigner in (True, False):
        d = base(3, initial={"temperature": "0.02 mK", "wigner": wigner}, pinning={"order": 3, "strength": "2e9 V/m^3"})
        d["trap"] = {"f_radial": "1.2 MHz", "f_axial": "3.6 MHz"}
        plan = make_plan(mdrotor.load_config(d))
        pos, vel = initial_states(plan, 11, np.arange(3000))
        e = energy(plan, pos, vel) - plan.crystal0.energy_j
        w = plan.crystal0.modes.omega
        kt = sc.k * 0.02e-3
        if wigner:
            expect = np.sum(HBAR * w * (1 / np.expm1(HBAR * w / kt) + 0.5))
        else:
            expect = len(w) * kt
        # anharmonic corrections ~ amplitude / spacing ~ 1e-3; statistics 3000 samples
        err = np.std(e) / np.sqrt(len(e))
        assert abs(np.mean(e) - expect) < 4 * err + 2e-3 * expect


def test_thermal_sampling_per_mode():
    """Per mode: the projected ensemble gives n_k = 1/(exp(hbar w/kT) - 1)
    within statistical error (Bose-Einstein, the thermal state's Wigner
    function)."""
    d = base(2, initial={"temperature": "0.05 mK", "wigner": True})
    d["run"] = {"trajectories": 2000, "seed": 3}
    plan = make_plan(mdrotor.load_config(d))
    pos, vel = initial_states(plan, 3, np.arange(2000))
    obs = observe(plan, pos, vel, 0.0, np.zeros((2, 2000)))
    w = plan.crystal0.modes.omega
    n_th = 1 / np.expm1(HBAR * w / (sc.k * 0.05e-3))
    mean = obs["mode_n"].mean(axis=0)
    err = np.sqrt((n_th + 0.5) ** 2 / 2000)  # sd of E/(hbar w) for a Gaussian Wigner state is n + 1/2
    assert np.all(np.abs(mean - n_th) < 4 * err)


@pytest.mark.parametrize("n_ions,order,strength,f_rot", [(2, 2, "0 V/m^2", "150 kHz"), (4, 4, "0 V/m^4", "80 kHz")])
def test_mode_projection_rotating_crystal(n_ions, order, strength, f_rot):
    """A trajectory started exactly in one co-rotating mode with n quanta is
    measured back as n in that mode and ~0 in the others after evolving
    (harmonic limit: the gyroscopic normal modes are exact invariants of the
    linearised rotating-frame motion, Goldstein, Classical Mechanics, ch. 6)."""
    d = base(n_ions, pinning={"order": order, "strength": strength}, rotation={"f_start": f_rot})
    d["trap"] = {"f_radial": "1.2 MHz", "f_axial": "3.6 MHz"}
    d["stage"] = [{"name": "free", "duration": "3 us"}]
    # order-4 steps: the measured energy of a Verlet run oscillates by ~(w dt)^2 / 4
    d["run"] = {"integrator": "order4", "steps_per_period": 60}
    plan = make_plan(mdrotor.load_config(d))
    modes = plan.crystal0.modes
    m = plan.masses
    sqm = np.repeat(np.sqrt(m), 3)
    w = TWO_PI * plan.f0_hz
    r0 = plan.crystal0.positions_m
    v0 = np.zeros_like(r0)
    v0[:, 0], v0[:, 1] = -w * r0[:, 1], w * r0[:, 0]
    n_q = 1.0
    K = len(modes.omega)
    pos = np.empty((3, n_ions, K))
    vel = np.empty((3, n_ions, K))
    for k in range(K):
        zeta = np.sqrt(2 * HBAR * n_q) * modes.e_q[k]
        pos[:, :, k] = (r0 + (zeta[: 3 * n_ions] / sqm).reshape(n_ions, 3)).T
        vel[:, :, k] = (v0 + (zeta[3 * n_ions:] / sqm).reshape(n_ions, 3)).T
    raw = integrate(plan, pos, vel, chunk=16)
    got = raw.stages["free"]["mode_n"]
    assert got.shape == (K, K)
    # Degenerate modes (the square's out-of-plane pair) have no preferred
    # basis: compare the sums over each degenerate cluster.
    f = modes.freq_hz
    cluster = np.cumsum(np.r_[0, np.diff(f) > 1e-6 * f[1:]])
    summed = np.array([[got[k, cluster == c].sum() for c in range(cluster[-1] + 1)] for k in range(K)])
    own = summed[np.arange(K), cluster]
    # n quanta in the excited mode, others ~0. The quadratic projection
    # misses the cubic Coulomb term of the stretch mode: an error ~ amplitude /
    # ion spacing (0.3 % for one quantum here; it grows as sqrt(n), measured).
    assert np.allclose(own, n_q, rtol=5e-3)
    mask = np.ones_like(summed, dtype=bool)
    mask[np.arange(K), cluster] = False
    assert np.max(np.abs(summed[mask])) < 1e-3 * n_q


def test_free_rotor_temperature():
    """A free (unpinned) rotor ensemble at temperature T has sigma_L^2 =
    I k_B T (equipartition for one rotational degree of freedom; any
    statistical mechanics text, e.g. K. Huang, Statistical Mechanics, ch. 6)."""
    d = base(2, initial={"temperature": "0.3 mK", "wigner": False})
    d.pop("pinning")
    d["stage"] = [{"name": "free", "duration": "20 us"}]
    res = mdrotor.run(mdrotor.load_config(d), trajectories=3000)
    I = res.attrs["moment_of_inertia_kg_m2"]
    var = np.var(res.final.arrays["L_com_hbar"] * HBAR, ddof=1)
    expect = I * sc.k * 0.3e-3
    # variance estimate: relative sd sqrt(2/(n-1)) = 2.6 %; plus the thermal
    # stretch of I (~1e-3)
    assert abs(var / expect - 1) < 4 * np.sqrt(2 / 2999)


def _final_arrays(res):
    return {k: v for k, v in res.final.arrays.items()}


def test_seed_order_and_chunk_independence():
    """Each trajectory depends only on (seed, index): any chunk size and any
    order of trajectories give bit-identical results (common practice, no
    source: counter-keyed random streams)."""
    d = base(2, initial={"temperature": "0.5 mK", "wigner": True})
    d["stage"] = [{"name": "spin-up", "duration": "20 us", "f_rot": {"to": "20 kHz", "shape": "smoothstep"}}]
    cfg = mdrotor.load_config(d)
    a = mdrotor.run(cfg, trajectories=40, chunk=8)
    b = mdrotor.run(cfg, trajectories=40, chunk=32)
    c = mdrotor.run(cfg, trajectories=40, chunk=16, order=np.random.default_rng(0).permutation(40))
    for k, v in _final_arrays(a).items():
        assert np.array_equal(v, _final_arrays(b)[k], equal_nan=True), k
        assert np.array_equal(v, _final_arrays(c)[k], equal_nan=True), k


def test_feature_off_as_none_gives_the_same_bits():
    """A feature that is off reaches the kernel as None, and numba compiles a
    variant without its code; the general code given the same features as
    empty arrays (no RF spring terms, no polynomial terms, no noise targets,
    no beams: every loop of length zero) must give the same bits (common
    practice, no source: pruning dead code does not change the arithmetic)."""
    plan = thermal_plan(3, "1 mK", unpinned=False)
    pos0, vel0 = initial_states(plan, 3, np.arange(12))
    n = 200
    dt = plan.dt_s
    sub = np.cumsum(plan.fracs)
    ts = dt * np.arange(n + 1)
    te = np.concatenate([[ts[0]], (ts[:-1, None] + dt * sub[None, :]).ravel()])
    c_re, c_im = _pin_coefficients(plan, te)
    T = pos0.shape[2]
    e = len(te)
    drive = (np.zeros(e), np.zeros(e), np.ones(T), np.zeros(T)) + NO_LINEAR  # no RF, no exact propagator
    poly = (np.zeros((0, 3), dtype=np.int64), np.zeros((e, 0)))
    i64, f = np.int64, float
    noise = (np.zeros(0, i64), np.zeros((0, 3)), np.zeros(T, np.uint64), 0, np.zeros(0, i64), np.zeros(0),
             np.zeros(0, i64), np.zeros((0, 4)), np.zeros((0, T)), np.zeros(0, i64), np.zeros((0, 9)),
             np.zeros((0, 2, T)))
    laser = (np.zeros((0, 3)), np.zeros((0, 5)), np.zeros((0, 3)), np.zeros((0, 3)), np.zeros((0, 3, 3)),
             np.zeros(T, np.uint64), 0, np.zeros((3, T), f))
    out = []
    for off in ((None, None, None, None), (drive, poly, noise, laser)):
        pos, vel = pos0.copy(), vel0.copy()
        lag = (plan.masses, plan.charges, plan.lag_n, plan.schedule.theta_rad(ts), np.ones(n + 1, np.uint8), 4,
               np.zeros((2, T)))
        advance(pos, vel, dt, n, plan.fracs, plan.kernel_model(), off[0], (plan.pin_orders, c_re, c_im), off[1],
                lag, off[2], off[3], 5)
        out.append((pos, vel, lag[6]))
    assert plan.lag_n > 0 and np.any(out[0][2] != 0.0)  # the lag tracking ran
    for a, b in zip(*out):
        assert np.array_equal(a, b)


def test_kernel_threads_in_a_forked_process():
    """A process forked after a run on two threads (multiprocessing's
    default start method on Linux) steps on two threads too, with the
    parent's bits: the kernel's thread pool belongs to the process that
    made it (common practice, no source: a forked child inherits no
    threads). A hang is the failure, hence the timeout."""
    import json
    import subprocess
    import sys

    d = base(2, initial={"temperature": "0.5 mK", "wigner": True})
    script = f"""
import json, multiprocessing as mp, numpy as np, mdrotor
cfg = mdrotor.load_config(json.loads({json.dumps(json.dumps(d))}))
def final(_=None):
    r = mdrotor.run(cfg, trajectories=64, chunk=16, threads=2)
    assert r.attrs["threads"] == 2
    return r.final.arrays
a = final()
with mp.get_context("fork").Pool(1) as pool:
    b = pool.apply(final)
for k, v in a.items():
    assert np.array_equal(v, b[k], equal_nan=True), k
print("same bits")
"""
    import os
    import signal

    env = dict(os.environ, NUMBA_NUM_THREADS="2")
    proc = subprocess.Popen([sys.executable, "-c", script], env=env, stdout=subprocess.PIPE, stderr=subprocess.PIPE,
                            text=True, start_new_session=True)
    try:
        out, err = proc.communicate(timeout=240)
    except subprocess.TimeoutExpired:
        os.killpg(proc.pid, signal.SIGKILL)  # the forked child too
        proc.communicate()
        raise AssertionError("the forked process did not finish its run in 240 s") from None
    assert proc.returncode == 0 and "same bits" in out, err


def test_thread_count_independence(tmp_path):
    """Bit-identical /final arrays with NUMBA_NUM_THREADS = 1 and 2."""
    import subprocess
    import sys

    import h5py

    cfg = tmp_path / "c.toml"
    cfg.write_text("""
[species]
ion = "40Ca+"
[crystal]
ions = 3
[trap]
f_radial = "1.2 MHz"
f_axial = "3.5 MHz"
[pinning]
order = 3
strength = "1e9 V/m^3"
[[stage]]
name = "spin-up"
duration = "20 us"
f_rot = { to = "10 kHz", shape = "smoothstep" }
[initial]
temperature = "0.5 mK"
[run]
trajectories = 64
seed = 77
""")
    outs = []
    for threads in ("1", "2"):
        out = tmp_path / f"r{threads}.h5"
        env = dict(__import__("os").environ, NUMBA_NUM_THREADS=threads)
        r = subprocess.run([sys.executable, "-m", "mdrotor", "run", str(cfg), "-o", str(out), "--quiet"],
                           env=env, capture_output=True, text=True)
        assert r.returncode == 0, r.stderr
        outs.append(out)
    with h5py.File(outs[0]) as f1, h5py.File(outs[1]) as f2:
        assert f1.attrs["threads"] == 1 and f2.attrs["threads"] == 2
        for k in f1["final"]:
            assert np.array_equal(f1["final"][k][()], f2["final"][k][()], equal_nan=True), k
