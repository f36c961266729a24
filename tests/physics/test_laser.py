"""Doppler-cooling beams: formulas against the textbooks, the compiled kick
against the formulas, and the dynamics against Doppler-cooling theory
(temperature, friction, cooling rate), the rotating crystal's torque, and
sympathetic cooling of a mixed pair.

Sources: D.J. Wineland and W.M. Itano, Phys. Rev. A 20, 1521 (1979); H.J.
Metcalf and P. van der Straten, Laser Cooling and Trapping (Springer, 1999),
ch. 2, 3 and 7; S. Stenholm, Rev. Mod. Phys. 58, 699 (1986); dipole
radiation patterns: J.D. Jackson, Classical Electrodynamics, 3rd ed. (1999),
ch. 9.
"""

import math

import numba
import numpy as np
import pytest
from conftest import two_ion_config, two_ion_toml
from scipy import constants as sc
from scipy import integrate, optimize

import mdrotor
from mdrotor.engine.integrate import (
    BlockStepper,
    RunState,
    initial_states,
    laser_arrays,
    laser_keys,
    make_plan,
)
from mdrotor.engine.kernels import _laser_kick
from mdrotor.physics import laser
from mdrotor.physics.frame import angular_momentum
from mdrotor.physics.species import get_species

HBAR, KB = sc.hbar, sc.k
TWO_PI = 2 * np.pi
GAMMA = TWO_PI * 22.4e6            # 40Ca+ 397 nm (species table, from memory)
K397 = TWO_PI / 396.959e-9
M40 = get_species("40Ca+").mass_kg


# ---------------------------------------------------------------------------
# Formulas
# ---------------------------------------------------------------------------
@pytest.mark.parametrize("pattern,weight", [
    ("linear", lambda c: 3 / (8 * np.pi) * (1 - c**2)),     # pi light: sin^2 about the dipole (Jackson ch. 9)
    ("circular", lambda c: 3 / (16 * np.pi) * (1 + c**2)),  # sigma light: (1 + cos^2) about the axis (Jackson ch. 9)
])
def test_emission_moments_against_quadrature(pattern, weight):
    """<n n^T> of the dipole patterns by scipy.integrate.dblquad over the
    sphere (axis along z, then turned), against emission_tensor to 1e-9
    (quadrature tolerance 1e-12)."""
    def moment(a, b):
        def f(phi, theta):
            n = np.array([np.sin(theta) * np.cos(phi), np.sin(theta) * np.sin(phi), np.cos(theta)])
            return weight(n[2]) * n[a] * n[b] * np.sin(theta)
        return integrate.dblquad(f, 0, np.pi, 0, 2 * np.pi, epsabs=1e-12, epsrel=1e-12)[0]

    m_z = np.array([[moment(a, b) for b in range(3)] for a in range(3)])
    assert np.trace(m_z) == pytest.approx(1.0, abs=1e-9)  # the pattern is normalised
    assert np.allclose(laser.emission_tensor(pattern, [0, 0, 1]), m_z, atol=1e-9)
    # an axis along (1, 1, 1)/sqrt(3): the tensor turns with it
    u = np.array([1.0, 1.0, 1.0]) / 3**0.5
    e1 = np.cross(u, [1.0, 0.0, 0.0])
    e1 /= np.linalg.norm(e1)
    e2 = np.cross(u, e1)
    R = np.column_stack([e1, e2, u])  # maps z to u
    assert np.allclose(laser.emission_tensor(pattern, u), R @ m_z @ R.T, atol=1e-9)
    assert np.allclose(laser.emission_tensor("isotropic"), np.eye(3) / 3)
    S = laser.emission_sqrt(laser.emission_tensor(pattern, u))
    assert np.allclose(S @ S.T, laser.emission_tensor(pattern, u), atol=1e-15)


def test_friction_coefficient_against_molasses_formula():
    """One beam gives half the friction of a two-beam molasses,
    beta_2 = -8 hbar k^2 delta s / (Gamma (1 + s + (2 delta/Gamma)^2)^2)
    (Metcalf and van der Straten 1999, ch. 7), and it is -dF/dv of the force
    hbar k R at v = 0 (central difference, step 1e-4 Gamma/k: rounding and
    truncation below 1e-8)."""
    for s in (0.05, 0.5, 2.0):
        for d in (-0.25, -0.5, -1.3):
            delta = d * GAMMA
            two_beam = -8 * HBAR * K397**2 * delta * s / (GAMMA * (1 + s + (2 * delta / GAMMA) ** 2) ** 2)
            beta = laser.friction_coefficient(s, delta, GAMMA, K397)
            assert beta == pytest.approx(two_beam / 2, rel=1e-12, abs=0)
            h = 1e-4 * GAMMA / K397
            num = -(laser.force_n(s, delta, GAMMA, K397, K397 * h) - laser.force_n(s, delta, GAMMA, K397, -K397 * h)) / (2 * h)
            assert num == pytest.approx(beta, rel=1e-7, abs=0)
    # blue of resonance: negative friction (heating)
    assert laser.friction_coefficient(0.5, 0.5 * GAMMA, GAMMA, K397) < 0


def test_doppler_limit_formula():
    """k_B T = D_p / beta: its minimum over delta for s -> 0 lies at delta =
    -Gamma/2 and is hbar Gamma / 2 for the one-dimensional model xi = 1
    (Metcalf and van der Straten 1999, ch. 7; Wineland and Itano 1979);
    with saturation the minimum moves to delta = -(Gamma/2) sqrt(1 + s) (the
    same algebra, minimised here numerically with scipy)."""
    t = laser.doppler_temperature_k(0.0, -0.5 * GAMMA, GAMMA, 1.0)
    assert t == pytest.approx(HBAR * GAMMA / (2 * KB), rel=1e-12, abs=0)
    assert laser.doppler_minimum_k(GAMMA, 1.0) == pytest.approx(t, rel=1e-12, abs=0)
    # 40Ca+: about 0.54 mK (from memory: "about half a millikelvin" for Ca+)
    assert 0.5e-3 < t < 0.6e-3
    # isotropic emission: (1 + 1/3) hbar Gamma / 4
    assert laser.doppler_temperature_k(0.0, -0.5 * GAMMA, GAMMA, 1 / 3) == pytest.approx(HBAR * GAMMA / (3 * KB), rel=1e-12, abs=0)
    for s in (0.0, 0.3, 2.0):
        res = optimize.minimize_scalar(lambda d: laser.doppler_temperature_k(s, d * GAMMA, GAMMA, 1.0),
                                       bounds=(-5, -0.01), method="bounded", options={"xatol": 1e-10})
        assert res.x == pytest.approx(-0.5 * math.sqrt(1 + s), rel=1e-6, abs=0)
    # D_p / beta is the formula
    s, d = 0.2, -0.7 * GAMMA
    assert laser.momentum_diffusion(s, d, GAMMA, K397, 0.4) / laser.friction_coefficient(s, d, GAMMA, K397) / KB == \
        pytest.approx(laser.doppler_temperature_k(s, d, GAMMA, 0.4), rel=1e-12, abs=0)
    assert laser.doppler_temperature_k(0.5, 0.1 * GAMMA, GAMMA, 1 / 3) == math.inf


def _kick_once(beam, pos, vel, masses, step=7, dt=20e-9, keys=None):
    """One call of the compiled kick on (3, N, T) states (in place); returns
    the expected photon counts (N, T)."""
    from types import SimpleNamespace

    n, T = pos.shape[1], pos.shape[2]
    plan = SimpleNamespace(lasers=(beam,), masses=masses)
    khat, par, centre, vrec, emit = laser_arrays(plan, None)
    if keys is None:  # any distinct 64-bit keys (laser_keys derives them per trajectory; slow for 2e5)
        keys = np.random.default_rng(5).integers(0, 2**63, T, dtype=np.int64).astype(np.uint64)
    photons = np.zeros((n, T))
    px, py, pz = (np.ascontiguousarray(pos[u]) for u in range(3))
    vx, vy, vz = (np.ascontiguousarray(vel[u]) for u in range(3))
    _laser_kick(px, py, pz, vx, vy, vz, 0, step, dt, khat, par, centre, vrec, emit, keys, photons, np.empty(T),
                np.empty(T))
    pos[:] = np.stack([px, py, pz])
    vel[:] = np.stack([vx, vy, vz])
    return photons


def _beam(**kw):
    d = dict(name="b", species="40Ca+", ions=(0,), wavelength_m=396.959e-9, linewidth_hz=22.4e6, detuning_hz=-11.2e6,
             saturation=0.7, direction=np.array([0.6, 0.0, 0.8]))
    d.update(kw)
    return laser.Beam(**d)


def test_kernel_scattering_rate_is_the_formula():
    """The compiled kick's expected photon count per step is R dt with R =
    laser.scattering_rate at the Gaussian beam's local saturation and the
    ion's Doppler shift, to rounding (1e-12), at random positions and
    velocities of two ions, one of them not addressed."""
    rng = np.random.default_rng(3)
    T = 257
    pos = rng.normal(scale=20e-6, size=(3, 2, T))
    vel = rng.normal(scale=3.0, size=(3, 2, T))
    b = _beam(ions=(1,), waist_m=30e-6, centre_m=np.array([5e-6, -3e-6, 2e-6]),
              emission=laser.emission_tensor("linear", [0, 0, 1]))
    dt = 20e-9
    photons = _kick_once(b, pos.copy(), vel.copy(), np.array([M40, M40]), dt=dt)
    r = np.moveaxis(pos[:, 1], 0, -1)
    s = laser.saturation_profile(b.saturation, r, b.direction, b.centre_m, b.waist_m)
    kv = b.k_rad_per_m * np.einsum("u,ut->t", b.direction, vel[:, 1])
    expect = laser.scattering_rate(s, b.delta_rad_s, b.gamma_rad_s, kv) * dt
    assert np.allclose(photons[1], expect, rtol=1e-12, atol=0)
    assert np.all(photons[0] == 0)


def test_kernel_kick_moments():
    """Mean and covariance of one step's velocity kick over 2e5 identical
    ions: mean (hbar k / m) R dt k_hat (the force hbar k R, Metcalf and van
    der Straten ch. 3), covariance (hbar k / m)^2 R dt (k_hat k_hat^T + M)
    (Poissonian absorption along k, emission with the pattern's moments M).
    Tolerances: 5 standard errors of each estimate (the kick is a sum of
    uniform numbers: the standard error of the mean is sd / sqrt(T), of a
    covariance about sqrt(2) var / sqrt(T))."""
    T = 200_000
    b = _beam(emission=laser.emission_tensor("circular", [0, 1, 0]))
    dt = 200e-9
    v0 = np.array([0.4, -0.2, 0.1])
    pos = np.zeros((3, 1, T))
    vel = np.repeat(v0[:, None, None], T, axis=2)
    photons = _kick_once(b, pos, vel, np.array([M40]), dt=dt)
    n = photons[0, 0]
    R = laser.scattering_rate(b.saturation, b.delta_rad_s, b.gamma_rad_s, b.k_rad_per_m * b.direction @ v0)
    assert n == pytest.approx(R * dt, rel=1e-12, abs=0)
    vr = HBAR * b.k_rad_per_m / M40
    dv = vel[:, 0, :] - v0[:, None]
    cov = vr**2 * n * (np.outer(b.direction, b.direction) + b.emission)
    mean = dv.mean(axis=1)
    se = np.sqrt(np.diag(cov) / T)
    assert np.all(np.abs(mean - vr * n * b.direction) < 5 * se)
    c = np.cov(dv)
    assert np.all(np.abs(c - cov) < 5 * np.sqrt(2.0 / T) * np.sqrt(np.outer(np.diag(cov), np.diag(cov))))


def test_rotor_quadrature_against_scipy_quad():
    """The turn-averaged torque, rates and recoil diffusion of a rotating
    pair under an off-centre Gaussian beam (laser.rotor_laser, trapezoidal
    rule) against scipy.integrate.quad of the same integrands over the turn
    (the sum over ions of (r x F)_z with F = hbar k R at the rotating ion's
    position and velocity), to 1e-8."""
    f = 180e3
    r = np.array([[2.4e-6, 0.3e-6, 0.1e-6], [-2.4e-6, -0.3e-6, -0.1e-6]])
    b = _beam(ions=(0, 1), direction=np.array([0.8, 0.6, 0.0]), waist_m=4e-6, centre_m=np.array([0.0, 1e-6, 0.0]))
    rl = laser.rotor_laser([b], r, f)
    w = TWO_PI * f
    k = b.k_rad_per_m * b.direction

    def parts(phi):
        tq = 0.0
        rates = []
        for x0, y0, z0 in r:
            x = math.cos(phi) * x0 - math.sin(phi) * y0
            y = math.sin(phi) * x0 + math.cos(phi) * y0
            vx, vy = -w * y, w * x
            rho2 = (x - b.centre_m[0]) ** 2 + (y - b.centre_m[1]) ** 2 + (z0 - b.centre_m[2]) ** 2 \
                - ((x - b.centre_m[0]) * b.direction[0] + (y - b.centre_m[1]) * b.direction[1]) ** 2
            s = b.saturation * math.exp(-2 * rho2 / b.waist_m**2)
            R = 0.5 * b.gamma_rad_s * s / (1 + s + (2 * (b.delta_rad_s - k[0] * vx - k[1] * vy) / b.gamma_rad_s) ** 2)
            tq += x * HBAR * k[1] * R - y * HBAR * k[0] * R
            rates.append(R)
        return tq, rates

    tq = integrate.quad(lambda p: parts(p)[0], 0, TWO_PI, epsabs=0, epsrel=1e-12, limit=400)[0] / TWO_PI
    r0 = integrate.quad(lambda p: parts(p)[1][0], 0, TWO_PI, epsabs=0, epsrel=1e-12, limit=400)[0] / TWO_PI
    assert rl.torque_n_m == pytest.approx(tq, rel=1e-8, abs=0)
    assert rl.rate_hz[0] == pytest.approx(r0, rel=1e-8, abs=0)
    assert tq < 0  # red of resonance: the beam brakes the rotation
    # a beam along z exerts no torque about z
    bz = _beam(ions=(0, 1), direction=np.array([0.0, 0.0, 1.0]))
    assert laser.rotor_laser([bz], r, f).torque_n_m == 0.0


# ---------------------------------------------------------------------------
# Dynamics
# ---------------------------------------------------------------------------
def _setup(d, trajectories, seed=1):
    cfg = mdrotor.load_config(d)
    plan = make_plan(cfg)
    idx = np.arange(trajectories)
    pos, vel = initial_states(plan, seed, idx)
    return plan, pos, vel, RunState.start(plan, pos, vel, laser_keys=laser_keys(seed, idx))


def _advance(plan, state, n_steps):
    stepper = BlockStepper(plan, 256)
    dt = plan.stage_dt[0]
    done = 0
    while done < n_steps:
        nb = min(2048, n_steps - done)
        stepper.advance_block(state, 0, done * dt, dt, nb, noise_step0=done)
        done += nb


def _one_ion(detuning_frac, s, trajectories, f_trap_hz=0.3e6):
    """One 40Ca+ ion at rest (T = 0, no zero-point motion) in a weak trap
    (f << Gamma / 2 pi: the weak-binding regime), one beam along x."""
    d = {"species": {"ion": "40Ca+"}, "crystal": {"ions": 1},
         "trap": {"f_radial": f"{f_trap_hz} Hz", "f_axial": f"{1.2 * f_trap_hz} Hz"},
         "stage": [{"name": "cool", "duration": "5 ms"}],
         "initial": {"temperature": "0 K", "wigner": False}, "run": {"trajectories": trajectories, "seed": 1},
         "laser": [{"name": "x", "detuning": f"{detuning_frac * 22.4} MHz", "saturation": s, "direction": [1, 0, 0]}]}
    return _setup(d, trajectories)


@pytest.mark.parametrize("detuning_frac,s,pattern", [
    (-0.25, 0.1, "isotropic"), (-0.5, 0.1, "isotropic"), (-1.0, 0.1, "isotropic"), (-0.5, 0.05, "1d")])
def test_doppler_temperature_along_the_beam(detuning_frac, s, pattern):
    """Steady temperature of the x motion of one ion under one beam along x.

    Against k_B T = (1 + xi) hbar Gamma^2 (1 + s + (2 delta/Gamma)^2) /
    (16 |delta|) (laser.doppler_temperature_k; the low-saturation Doppler
    temperature of Wineland and Itano, Phys. Rev. A 20, 1521 (1979) and
    Metcalf and van der Straten (1999) ch. 7, with the emission's share xi
    along the beam): isotropic emission (xi = 1/3, the simulated pattern) at
    three detunings, and the one-dimensional model (emission along +-x only,
    xi = 1, set through the Python API) at delta = -Gamma/2, whose
    temperature is also checked against the textbook minimum hbar Gamma /
    (2 k_B) (Metcalf and van der Straten ch. 7): at s = 0.05 it lies 2.5 %
    above it (the factor 1 + s/2).

    From rest the mean energy approaches k_B T as 1 - exp(-gamma_c t)
    (gamma_c = beta / m, the cooling rate); after t = 5 / gamma_c the
    expectation k_B T (1 - e^-5) is used. Energy of the x motion about the
    radiation pressure's displaced centre. 6000 trajectories: the mean of an
    exponentially distributed energy has a 1.3 % standard error; Verlet at
    40 steps per period biases the measured energy by (w dt)^2 / 8 = 0.3 %;
    the nonlinearity of the force at k v_rms / Gamma ~ 0.04 is below 1 %.
    Tolerance 5 % (about 4 standard errors)."""
    T = 6000
    plan, pos, vel, st = _one_ion(detuning_frac, s, T)
    b = plan.lasers[0]
    if pattern == "1d":
        import dataclasses

        b = dataclasses.replace(b, emission=np.diag([1.0, 0.0, 0.0]), emission_label="along the beam")
        plan = dataclasses.replace(plan, lasers=(b,))
    xi = b.xi
    assert xi == pytest.approx(1.0 if pattern == "1d" else 1 / 3, rel=1e-12, abs=0)
    gamma_c = laser.cooling_rate(s, b.delta_rad_s, b.gamma_rad_s, b.k_rad_per_m, plan.masses[0])
    n = int(round(5.0 / gamma_c / plan.stage_dt[0]))
    _advance(plan, st, n)
    w = TWO_PI * 0.3e6
    m = plan.masses[0]
    x, v = pos[0, 0], vel[0, 0]
    e = 0.5 * m * v**2 + 0.5 * m * w**2 * (x - x.mean()) ** 2
    t_sim = np.mean(e) / KB
    t_d = laser.doppler_temperature_k(s, b.delta_rad_s, b.gamma_rad_s, xi)
    expect = t_d * (1 - math.exp(-gamma_c * n * plan.stage_dt[0]))
    assert abs(t_sim / expect - 1) < 0.05, (t_sim, expect)
    if pattern == "1d":
        assert abs(t_sim / (HBAR * b.gamma_rad_s / (2 * KB)) - 1) < 0.05


def test_doppler_temperature_of_modes_at_an_angle():
    """A beam at 45 degrees between the x and y modes of one ion (split
    radial frequencies): each mode sees (k_hat . e)^2 = 1/2 of the friction
    and of the absorption noise and e.M.e = 1/3 of the emission noise, so
    both reach the Doppler temperature with 1 + xi replaced by 1 + (1/3) /
    (1/2) (laser.mode_doppler_temperature_k; the projection of the
    one-beam theory of Wineland and Itano 1979 onto a mode). From rest over
    5 / gamma_c of the slower mode, 6000 trajectories (1.3 % standard error
    per mode); within 5 %; the z mode, with no beam component, is not
    cooled (inf)."""
    T = 6000
    d = {"species": {"ion": "40Ca+"}, "crystal": {"ions": 1},
         "trap": {"f_radial": "0.3 MHz", "radial_split": "0.06 MHz", "f_axial": "0.4 MHz"},
         "stage": [{"name": "cool", "duration": "5 ms"}],
         "initial": {"temperature": "0 K", "wigner": False}, "run": {"trajectories": T, "seed": 1},
         "laser": [{"name": "d", "detuning": "-11.2 MHz", "saturation": 0.1, "direction": [0.7071068, 0.7071068, 0]}]}
    plan, pos, vel, st = _setup(d, T)
    b = plan.lasers[0]
    m = plan.masses[0]
    gamma_c = 0.5 * laser.cooling_rate(0.1, b.delta_rad_s, b.gamma_rad_s, b.k_rad_per_m, m)
    n = int(round(5.0 / gamma_c / plan.stage_dt[0]))
    _advance(plan, st, n)
    for u, f in ((0, 0.33e6), (1, 0.27e6)):
        w = TWO_PI * f
        x, v = pos[u, 0], vel[u, 0]
        e = 0.5 * m * v**2 + 0.5 * m * w**2 * (x - x.mean()) ** 2
        axis = np.eye(3)[u]
        t_d = laser.mode_doppler_temperature_k(b, axis)
        assert t_d == pytest.approx(laser.doppler_temperature_k(0.1, b.delta_rad_s, b.gamma_rad_s, (1 / 3) / 0.5),
                                    rel=1e-6, abs=0)
        expect = t_d * (1 - math.exp(-gamma_c * n * plan.stage_dt[0]))
        assert abs(np.mean(e) / KB / expect - 1) < 0.05, (u, np.mean(e) / KB, expect)
    assert laser.mode_doppler_temperature_k(b, [0, 0, 1]) == math.inf


def test_friction_and_cooling_rate():
    """A velocity kick v0 along the beam decays: the ensemble-mean motion
    is a damped oscillation whose amplitude falls at beta / 2m, and the mean
    energy relaxes to k_B T_D at the cooling rate gamma_c = beta / m, with
    the one-beam friction coefficient beta = -4 hbar k^2 s (delta/Gamma) /
    (1 + s + (2 delta/Gamma)^2)^2 (half the two-beam value of Metcalf and
    van der Straten (1999) ch. 7; Wineland and Itano 1979). Both within 5 %.

    delta = -Gamma/2, s = 0.2, v0 = 1.5 m/s (k v0 / Gamma = 0.17: at
    delta = -Gamma/2 the force's cubic term is 0.15 (k v / Gamma)^2 of the
    linear one, a 0.3 % change of the damping); measured after t = 1 /
    gamma_c. 20000 trajectories: the thermal spread (Doppler temperature)
    leaves a 0.6 % standard error on the amplitude and 1 % on the energy
    excess, i.e. 1.2 % and 1 % on the two rates."""
    T = 20000
    s, v0 = 0.2, 1.5
    plan, pos, vel, st = _one_ion(-0.5, s, T)
    b = plan.lasers[0]
    m = plan.masses[0]
    w = TWO_PI * 0.3e6
    beta = laser.friction_coefficient(s, b.delta_rad_s, b.gamma_rad_s, b.k_rad_per_m)
    assert beta == pytest.approx(-4 * HBAR * b.k_rad_per_m**2 * s * (-0.5) / (1 + s + 1) ** 2, rel=1e-12, abs=0)
    gamma_c = beta / m
    x_bar = laser.force_n(s, b.delta_rad_s, b.gamma_rad_s, b.k_rad_per_m) / (m * w**2)  # radiation-pressure offset
    t_ss = laser.doppler_temperature_k(s, b.delta_rad_s, b.gamma_rad_s, b.xi)
    vel[0, 0] += v0
    n = int(round(1.0 / gamma_c / plan.stage_dt[0]))
    t = n * plan.stage_dt[0]

    def amplitude(p, v):
        return math.hypot(np.mean(v[0, 0]), w * (np.mean(p[0, 0]) - x_bar))

    def energy(p, v):
        return np.mean(0.5 * m * v[0, 0] ** 2 + 0.5 * m * w**2 * (p[0, 0] - x_bar) ** 2)

    a0, e0 = amplitude(pos, vel), energy(pos, vel)
    _advance(plan, st, n)
    beta_sim = -2 * m * math.log(amplitude(pos, vel) / a0) / t
    assert abs(beta_sim / beta - 1) < 0.05, (beta_sim, beta)
    e_ss = KB * t_ss
    rate_sim = -math.log((energy(pos, vel) - e_ss) / (e0 - e_ss)) / t
    assert abs(rate_sim / gamma_c - 1) < 0.05, (rate_sim, gamma_c)


def _rotating_pair(direction, trajectories, s=0.1, f_hz=200e3):
    """Two 40Ca+ rotating freely at f_hz from their rigid rotation (T = 0),
    each trajectory at its own random angle, under one plane-wave beam. The
    states are the equilibrium turned by random angles (what initial_states
    draws at T = 0, built here in one go: its per-trajectory loop is slow
    for 2e4 trajectories)."""
    from mdrotor.physics.frame import rotate_states

    d = two_ion_config(pinning=None, rotation={"f_start": f"{f_hz} Hz"},
                       stage=[{"name": "free", "duration": f"{1 / f_hz} s"}],
                       initial={"temperature": "0 K", "wigner": False}, run={"trajectories": trajectories, "seed": 2},
                       laser=[{"name": "b", "detuning": "-11.2 MHz", "saturation": s, "direction": direction}])
    plan = make_plan(mdrotor.load_config(d))
    r0 = plan.crystal0.positions_m
    v0 = np.zeros_like(r0)
    v0[:, 0], v0[:, 1] = -TWO_PI * f_hz * r0[:, 1], TWO_PI * f_hz * r0[:, 0]
    phi = np.random.default_rng(2).uniform(0, TWO_PI, trajectories)
    pos = rotate_states(np.repeat(r0.T[:, :, None], trajectories, axis=2), phi)
    vel = rotate_states(np.repeat(v0.T[:, :, None], trajectories, axis=2), phi)
    idx = np.arange(trajectories)
    return plan, pos, vel, RunState.start(plan, pos, vel, laser_keys=laser_keys(2, idx))


def test_rotating_pair_torque_and_recoil_diffusion():
    """A rotating pair (200 kHz, ions 2.5 um from the axis, 3 m/s) under a
    lab-frame beam in the plane: the mean change of L about the trap axis
    over one turn, against the turn average of sum_i (r_i x F_i)_z with F =
    hbar k R(delta - k.v) (laser.rotor_laser, checked against scipy quad
    above; the rigid rotating crystal of Goldstein, Classical Mechanics ch.
    3) within 2 %. The beam brakes the rotation by ~4 % of L over the turn,
    so the quadrature is taken at the turn's mean rate. 20000 trajectories:
    0.4 % standard error.

    The spread of the change, <dL^2> = 2 D_L t (recoil kicks, laser module
    docstring), within 5 %: the torque grows with L, so it damps the spread
    by about (d|tau|/dL) t = 2 % over the turn; the variance has a 1 %
    standard error."""
    T = 20000
    f = 200e3
    plan, pos, vel, st = _rotating_pair([1, 0, 0], T)
    l0 = angular_momentum(pos, vel, plan.masses)[0]
    _advance(plan, st, plan.stage_steps[0])
    dl = angular_momentum(pos, vel, plan.masses)[0] - l0
    t = plan.stage_steps[0] * plan.stage_dt[0]
    I = plan.crystal0.moment_of_inertia_kg_m2
    f_mid = f + np.mean(dl) / 2 / I / TWO_PI
    rl = laser.rotor_laser(plan.lasers, plan.crystal_at(0.0, f_mid).positions_m, f_mid)
    assert np.mean(dl) / t == pytest.approx(rl.torque_n_m, rel=0.02, abs=0)
    assert np.var(dl) / HBAR**2 == pytest.approx(2 * rl.diffusion_hbar2_per_s * t, rel=0.05, abs=0)
    assert rl.torque_n_m < 0  # red of resonance: braking


def test_beam_along_z_gives_no_torque():
    """A beam along the rotation axis pushes along z only: (r x F)_z = 0.
    The mean change of L stays within 4 standard errors of zero, and the
    spread follows the recoil diffusion D_L (emission kicks only) within 3 %
    (1 % standard error of the variance; no torque, nothing damps it)."""
    T = 20000
    plan, pos, vel, st = _rotating_pair([0, 0, 1], T)
    l0 = angular_momentum(pos, vel, plan.masses)[0]
    _advance(plan, st, plan.stage_steps[0])
    dl = angular_momentum(pos, vel, plan.masses)[0] - l0
    t = plan.stage_steps[0] * plan.stage_dt[0]
    assert abs(np.mean(dl)) < 4 * np.std(dl) / math.sqrt(T)
    rl = laser.rotor_laser(plan.lasers, plan.crystal0.positions_m, 200e3)
    assert rl.torque_n_m == 0.0
    assert np.var(dl) / HBAR**2 == pytest.approx(2 * rl.diffusion_hbar2_per_s * t, rel=0.03, abs=0)


def test_sympathetic_cooling_of_a_mixed_pair():
    """A 40Ca+ / 44Ca+ pair at 3 mK with one beam on 44Ca+ only: 40Ca+
    scatters nothing, yet both differential modes (in-plane stretch and
    out-of-plane tilt) cool at positive rates through the Coulomb coupling
    (sympathetic cooling: D.J. Larson et al., Phys. Rev. Lett. 57, 70
    (1986), from memory), each by more than 10 standard errors of its
    change over 100 us (1000 trajectories)."""
    d = {"species": {"ion": "40Ca+"}, "crystal": {"ions": ["40Ca+", "44Ca+"]},
         "trap": {"f_radial": "1.2 MHz", "f_axial": "2.9 MHz"},
         "stage": [{"name": "cool", "duration": "100 us"}],
         "initial": {"temperature": "3 mK", "wigner": False}, "run": {"trajectories": 1000, "seed": 4},
         "laser": [{"name": "b", "species": "44Ca+", "detuning": "-11.2 MHz", "saturation": 0.5,
                    "direction": [0.6, 0.64, 0.48]}]}
    res = mdrotor.run(mdrotor.load_config(d))
    lz = res.extra["laser"]
    assert lz["scatter_rate_hz"][0][0] == 0.0 and lz["scatter_rate_hz"][0][1] > 1e6
    n0, n1 = res.initial.arrays["mode_n"], res.final.arrays["mode_n"]
    kinds = res.final.modes["kind"]
    assert res.initial.modes["label"] == res.final.modes["label"]
    diff = [k for k, kind in enumerate(kinds) if kind == "differential"]
    assert len(diff) == 2
    for k in diff:
        change = n0[:, k] - n1[:, k]
        rate = np.mean(change) / res.final.t_s
        assert rate > 0 and np.mean(change) > 10 * np.std(change) / math.sqrt(len(change)), res.final.modes["label"][k]


def test_bit_identical_across_threads_chunks_and_order():
    """Recoil kicks come from a counter hash of (trajectory key, step, beam,
    ion): 1 and 2 threads, different chunk sizes and trajectory orders give
    bit-identical results (common practice, no source: counter-based random
    streams, J.K. Salmon et al., SC11 (2011), from memory)."""
    d = two_ion_config(pinning=None, rotation={"f_start": "100 kHz"},
                       stage=[{"name": "cool", "duration": "3 us"}, {"name": "dark", "duration": "1 us"}],
                       initial={"temperature": "1 mK"}, run={"trajectories": 24, "seed": 9},
                       laser=[{"name": "b", "detuning": "-11.2 MHz", "saturation": 0.5, "direction": [0.6, 0.0, 0.8],
                               "waist": "20 um", "emission": {"pattern": "linear", "axis": [0, 0, 1]},
                               "stages": {"cool": 1.0, "dark": 0.0}}])
    cfg = mdrotor.load_config(d)
    before = numba.get_num_threads()
    try:
        a = mdrotor.run(cfg, threads=1, chunk=4)
        b = mdrotor.run(cfg, threads=2, chunk=24, order=np.random.default_rng(1).permutation(24))
    finally:
        numba.set_num_threads(before)
    for name in ("cool", "dark"):
        for k, v in a.stages[name].arrays.items():
            assert np.array_equal(v, b.stages[name].arrays[k], equal_nan=True), (name, k)
    assert np.array_equal(a.extra["laser"]["scatter_rate_hz"], b.extra["laser"]["scatter_rate_hz"])
    assert a.extra["laser"]["stage"] == ["cool"]  # the beam is off in 'dark'


def test_a_beam_switched_off_changes_nothing():
    """A beam at zero intensity (a stage scale of 0, or saturation 0) leaves
    the run bit-identical to the same config without it: the laser is a kick
    outside the deterministic step, and a zero coefficient switches it off."""
    d = two_ion_config(pinning=None, rotation={"f_start": "100 kHz"}, stage=[{"name": "free", "duration": "2 us"}],
                       initial={"temperature": "1 mK"}, run={"trajectories": 8, "seed": 3})
    plain = mdrotor.run(mdrotor.load_config(d))
    for beam in ({"stages": ["free"], "saturation": 0.0}, {"stages": {"free": 0.0}, "saturation": 1.0}):
        d2 = dict(d, laser=[{"name": "b", "detuning": "-10 MHz", "direction": [1, 0, 0], **beam}])
        off = mdrotor.run(mdrotor.load_config(d2))
        for k, v in plain.final.arrays.items():
            assert np.array_equal(v, off.final.arrays[k], equal_nan=True), k
        assert "laser" not in off.extra


# ---------------------------------------------------------------------------
# Config, species table, outputs
# ---------------------------------------------------------------------------
def test_species_table_gives_the_cooling_line():
    """A beam on a tabulated ion takes the wavelength and linewidth of its
    usual cooling line (values from memory, to be checked against the NIST
    Atomic Spectra Database); given values win. Plausibility (from memory):
    the lines lie in the near UV to blue (190-500 nm) with linewidths of
    15-80 MHz, so their Doppler limits hbar Gamma / (2 k_B) are 0.4-2 mK."""
    from mdrotor.physics.species import cooling_line, custom_species

    for name in ("9Be+", "24Mg+", "40Ca+", "88Sr+", "111Cd+", "138Ba+", "171Yb+", "199Hg+"):
        line = cooling_line(get_species(name))
        assert 190e-9 < line.wavelength_m < 500e-9 and 15e6 < line.linewidth_hz < 80e6, name
        assert 0.4e-3 < laser.doppler_minimum_k(TWO_PI * line.linewidth_hz) < 2e-3, name
    assert cooling_line(get_species("40Ca2+")) is None
    assert cooling_line(custom_species(1e-25, 1)) is None
    d = {"species": {"ion": "88Sr+"}, "crystal": {"ions": 1}, "trap": {"f_radial": "1 MHz", "f_axial": "1.2 MHz"},
         "stage": [{"name": "a", "duration": "1 us"}],
         "laser": [{"detuning": "-10 MHz", "saturation": 1, "direction": [0, 0, 1]},
                   {"detuning": "-10 MHz", "saturation": 1, "direction": [0, 0.7071, 0.7071], "wavelength": "422 nm",
                    "linewidth": "20 MHz", "emission": {"pattern": "circular", "axis": [0, 0, 1]}, "stages": ["a"]}]}
    b0, b1 = mdrotor.load_config(d).lasers
    line = cooling_line(get_species("88Sr+"))
    assert (b0.wavelength_m, b0.linewidth_hz) == (line.wavelength_m, line.linewidth_hz)
    assert (b1.wavelength_m, b1.linewidth_hz) == pytest.approx((422e-9, 20e6), rel=1e-12, abs=0)
    assert np.linalg.norm(b1.direction) == pytest.approx(1.0, abs=1e-15)  # normalised
    assert b1.xi == pytest.approx(0.3 + 0.1 * 0.5, rel=1e-4, abs=0)               # u.M.u for the circular pattern
    assert (b0.name, b1.name) == ("laser0", "laser1") and b1.scale("a") == 1.0


def test_run_and_rotor_outputs(tmp_path, capsys):
    """The run summary, its JSON and the result file carry the laser block
    with the caution; mdrotor rotor says how long the beam may stay on,
    with the drift time K hbar / |tau| of the turn-averaged torque."""
    import json

    from mdrotor.commands.main import main

    cfg = tmp_path / "c.toml"
    cfg.write_text(two_ion_toml(pinning=None, rotation={"f_start": "150 kHz"}, stage=[{"name": "free", "duration": "4 us"}],
                                initial={"temperature": "0.5 mK"}, run={"trajectories": 16, "seed": 2},
                                laser=[{"name": "cool", "detuning": "-11 MHz", "saturation": 0.3, "direction": [0.6, 0.8, 0]}]))
    out = tmp_path / "r.h5"
    assert main(["run", str(cfg), "-o", str(out), "--quiet"]) == 0
    text = capsys.readouterr().out
    assert "laser beams:" in text and "scattering per ion" in text and "Caution" in text and "laser-safety" in text
    assert main(["run", str(cfg), "-o", str(out), "--quiet", "--json"]) == 0
    d = json.loads(capsys.readouterr().out)
    assert d["laser"]["stage"] == ["free"] and "laser-safety" in d["laser"]["caution"]
    res = mdrotor.load(out)
    assert res.extra["laser"]["torque_rigid_n_m"][0] < 0
    assert main(["rotor", str(out), "--drift-quanta", "500", "--json"]) == 0
    r = json.loads(capsys.readouterr().out)
    (beam,) = r["lasers"]
    assert beam["time_drift_s"] == pytest.approx(500 * HBAR / abs(beam["torque_n_m"]), rel=1e-12, abs=0)
    assert beam["time_on_s"] == min(beam["time_drift_s"], beam["time_spread_s"])
    assert main(["rotor", str(cfg), "--drift-quanta", "2"]) == 0
    text = capsys.readouterr().out
    assert "first photon" in text and "laser-safety" in text  # one photon moves L by ~30 quanta here


def test_largest_friction_over_doppler_shifts():
    """max over v of |dF/dv| (laser.max_friction_coefficient, which bounds
    the automatic time step) against a numerical maximisation with scipy of
    the central-difference slope of the force (1e-6 relative); the engine's
    dt keeps max |dF/dv| dt / m at or below 1 %."""
    from mdrotor.engine.integrate import LASER_DAMPING_PER_STEP

    for s in (0.1, 1.0, 5.0):
        def slope(x):  # x = k v / Gamma
            h = 1e-5
            f = [laser.force_n(s, -0.5 * GAMMA, GAMMA, K397, GAMMA * (x + e)) for e in (h, -h)]
            return -abs(f[0] - f[1]) / (2 * h * GAMMA / K397)

        grid = np.linspace(-3, 2, 501)  # every Doppler shift that matters, then refined around the best
        x0 = grid[np.argmin([slope(x) for x in grid])]
        res = optimize.minimize_scalar(slope, bounds=(x0 - 0.01, x0 + 0.01), method="bounded", options={"xatol": 1e-10})
        assert -res.fun == pytest.approx(laser.max_friction_coefficient(s, K397), rel=1e-6, abs=0)
    d = {"species": {"ion": "9Be+"}, "crystal": {"ions": 1}, "trap": {"f_radial": "0.2 MHz", "f_axial": "0.3 MHz"},
         "stage": [{"name": "a", "duration": "1 us"}],
         "laser": [{"detuning": "-10 MHz", "saturation": 3.0, "direction": [1, 0, 0]}]}
    plan = make_plan(mdrotor.load_config(d))
    b = plan.lasers[0]
    assert laser.max_friction_coefficient(3.0, b.k_rad_per_m) / plan.masses[0] * plan.dt_s <= LASER_DAMPING_PER_STEP * (1 + 1e-12)
