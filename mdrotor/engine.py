"""The Monte-Carlo driver: plan the run, sample initial states, step in blocks.

Main loop (pseudocode)::

    plan = make_plan(cfg)                    # crystal at t = 0, modes, dt, kernel arrays
    pos, vel = initial_states(plan, seed)    # Wigner sampling, one RNG key per trajectory
    observe(t = 0)
    for stage in schedule:
        for block in stage (<= BLOCK_STEPS steps, ends at series times):
            sample theta(t), pinning multipliers at every force time of the block
            kernels.advance(pos, vel, block arrays)      # whole block in numba
            [series point]
        observe(end of stage)

Memory is O(trajectories x ions) plus one block of schedule samples,
independent of the number of steps.
"""

from __future__ import annotations

import math
import time
from dataclasses import dataclass, field

import numpy as np
from scipy import constants as sc

from .errors import InputError

TWO_PI = 2.0 * np.pi
HBAR = sc.hbar
KB = sc.k
K_COULOMB = 1.0 / (4.0 * np.pi * sc.epsilon_0)
BLOCK_STEPS = 2048


@dataclass
class Plan:
    """Everything the run needs, resolved from the config (SI)."""

    cfg: object
    schedule: object
    masses: np.ndarray
    charges: np.ndarray
    species_ids: np.ndarray
    w2: np.ndarray
    stray_acc: np.ndarray
    qm: np.ndarray
    kq_i: np.ndarray
    kq_j: np.ndarray
    pin_orders: np.ndarray
    pin_strength: np.ndarray
    pin_angle: np.ndarray
    crystal0: object
    f0_hz: float
    theta0: float
    pinned0: bool
    free_rotor0: bool
    dt_s: float
    stage_steps: list
    stage_dt: list
    fracs: np.ndarray
    lag_n: int
    lag_term: int
    lag_u_ref: float
    lag_threshold: float
    loss_radius_m: float
    wigner: bool
    series_interval_s: float | None
    f_fast_hz: float
    notes: list = field(default_factory=list)

    @property
    def n_steps(self) -> int:
        return int(sum(self.stage_steps))

    def pin_scales(self, t) -> np.ndarray:
        """Pinning multipliers at time(s) t: (P,) or (len(t), P)."""
        if self.schedule is None or len(self.pin_orders) == 0:
            return np.ones(len(self.pin_orders)) if np.ndim(t) == 0 else np.ones((len(t), len(self.pin_orders)))
        vals = [self.schedule.pinning_scale(t, p) for p in range(len(self.pin_orders))]
        return np.array(vals) if np.ndim(t) == 0 else np.stack(vals, axis=-1)

    def pinned_at(self, t: float) -> bool:
        if len(self.pin_orders) == 0:
            return False
        return bool(np.any(np.abs(self.pin_scales(t) * self.pin_strength) > 0.0))

    def potential(self, f_hz: float, theta: float, scales):
        from .statics import model_potential

        return model_potential(self.cfg, f_hz, theta_rad=theta, pin_scale=scales)


def make_plan(cfg) -> Plan:
    """Resolve a config into a :class:`Plan` (crystal at t = 0, dt, kernel arrays)."""
    from .statics import compute_crystal, pinning_margin
    from .errors import PhysicsError

    sched = cfg.schedule
    if sched is None:
        raise InputError("stage", "a run needs at least one [[stage]] with a duration", cfg.source)
    m, q = cfg.masses_kg, cfg.charges_c
    n = len(m)
    w2 = cfg.trap.omega_sq(m, q)
    stray_acc = (q / m)[:, None] * np.asarray(cfg.trap.stray_field_v_per_m)[None, :]
    kqq = K_COULOMB * np.outer(q, q)
    kq_i = kqq / m[:, None]
    kq_j = kqq / m[None, :]
    orders = np.array([t.order for t in cfg.pinning], dtype=np.int64)
    strength = np.array([t.strength for t in cfg.pinning], dtype=float)
    angle = np.array([t.angle_rad for t in cfg.pinning], dtype=float)
    f0 = float(sched.f_rot_hz(0.0))
    plan = Plan(cfg, sched, m, q, _species_ids(cfg), w2, stray_acc, q / m, kq_i, kq_j, orders, strength, angle,
                None, f0, 0.0, False, False, 0.0, [], [], None, 0, -1, 0.0, 0.0,
                cfg.observe.loss_radius_m, cfg.initial.wigner, cfg.observe.series_interval_s, 0.0)
    scales0 = plan.pin_scales(0.0)
    plan.pinned0 = plan.pinned_at(0.0)
    try:
        cr = compute_crystal(plan.potential(f0, 0.0, scales0), f0, seed=cfg.search_seed)
    except PhysicsError as e:
        raise e.with_source(cfg.source)
    plan.crystal0 = cr
    plan.free_rotor0 = not any(lab == "libration" for lab in cr.modes.labels) and not plan.pinned0 and n > 1
    # the pinning term whose lag is tracked: the largest restoring torque on the crystal
    if len(orders):
        z = cr.positions_m[:, 0] + 1j * cr.positions_m[:, 1]
        zc = np.sum(m * z) / np.sum(m)
        torques = [o * abs(s) * abs(np.sum(q * (z - zc) ** o)) for o, s in zip(orders, strength)]
        ref = [o * abs(s) * np.sum(np.abs(q) * np.abs(z - zc) ** o) for o, s in zip(orders, strength)]
        best = int(np.argmax(torques))
        if torques[best] > 1e-6 * ref[best]:
            plan.lag_term, plan.lag_n = best, int(orders[best])
            from .kernels import lag_phases

            p3 = np.ascontiguousarray(cr.positions_m.T[:, :, None])
            plan.lag_u_ref = float(lag_phases(p3, m, q, plan.lag_n)[0])
            grid = np.linspace(0.0, sched.duration_s, 2001)
            plan.lag_threshold = 0.1 * float(np.max(np.abs(sched.pinning_scale(grid, best))))
        else:
            margin = pinning_margin(cr, cr.potential.multipoles)
            plan.notes.append("no pinning term has a moment on this crystal: it is not pinned; "
                              f"moments {margin['moments']}")
    # time step from the fastest frequency in the problem
    f_sec = float(np.sqrt(np.max(w2))) / TWO_PI
    f_modes = float(np.max(cr.modes.freq_hz)) + abs(f0) if len(cr.modes.omega) else 0.0
    f_pin = float(np.max(orders)) * sched.max_f_rot_hz() if len(orders) else 0.0
    plan.f_fast_hz = max(f_sec, f_modes, f_pin)
    dt = cfg.run.dt_s if cfg.run.dt_s is not None else 1.0 / (plan.f_fast_hz * cfg.run.steps_per_period)
    plan.dt_s = dt
    for st in sched.stages:
        k = max(1, int(math.ceil(st.duration_s / dt * (1 - 1e-12))))
        plan.stage_steps.append(k)
        plan.stage_dt.append(st.duration_s / k)
    from .kernels import substep_fractions

    plan.fracs = substep_fractions(cfg.run.integrator)
    return plan


def _species_ids(cfg) -> np.ndarray:
    names = [s.name for s in cfg.species]
    uniq = {nm: i for i, nm in enumerate(dict.fromkeys(names))}
    return np.array([uniq[nm] for nm in names])


# ---------------------------------------------------------------------------
# Initial states
# ---------------------------------------------------------------------------
def initial_states(plan: Plan, seed: int, indices: np.ndarray):
    """Positions and velocities (3, N, T) of trajectories ``indices``.

    See :mod:`mdrotor.sampling` for the distribution and the RNG keys.
    """
    from .sampling import mode_occupations, phase_space_point, sample_normal_coordinates, trajectory_rng

    cfg = plan.cfg
    cr = plan.crystal0
    m = plan.masses
    n = len(m)
    sqm = np.repeat(np.sqrt(m), 3)
    w = TWO_PI * plan.f0_hz
    r0 = cr.positions_m
    v0 = np.zeros_like(r0)
    v0[:, 0], v0[:, 1] = -w * r0[:, 1], w * r0[:, 0]
    n_occ = mode_occupations(cr.modes, cfg.initial.temperature_k, cfg.initial.occupations, plan.wigner)
    T = len(indices)
    pos = np.empty((3, n, T))
    vel = np.empty((3, n, T))
    I = cr.moment_of_inertia_kg_m2
    for b, idx in enumerate(indices):
        rng = trajectory_rng(seed, int(idx), 0)
        qn, pn = sample_normal_coordinates(n_occ, plan.wigner, rng)
        zeta = phase_space_point(cr.modes, qn, pn)
        r = r0 + (zeta[: 3 * n] / sqm).reshape(n, 3)
        v = v0 + (zeta[3 * n:] / sqm).reshape(n, 3)
        if n > 1:
            r, v = _curl_rotation(r, v, r0, m, w)
        if plan.free_rotor0:
            phi = rng.uniform(0.0, TWO_PI)
            dl = rng.standard_normal() * math.sqrt(I * KB * cfg.initial.temperature_k)
            rc = r - np.sum(m[:, None] * r, axis=0) / np.sum(m)
            v[:, 0] += -dl / I * rc[:, 1]
            v[:, 1] += dl / I * rc[:, 0]
            c, s = math.cos(phi), math.sin(phi)
            r[:, 0], r[:, 1] = c * r[:, 0] - s * r[:, 1], s * r[:, 0] + c * r[:, 1]
            v[:, 0], v[:, 1] = c * v[:, 0] - s * v[:, 1], s * v[:, 0] + c * v[:, 1]
        pos[:, :, b] = r.T
        vel[:, :, b] = v.T
    return pos, vel


def _curl_rotation(r, v, r0, m, w):
    """Turn the linear tangential part of a mode displacement into a true
    rotation by the same angle, so that a large libration does not stretch
    the crystal by r phi^2 / 2 (the inverse of what
    :func:`mdrotor.observables.observe` does when it measures)."""
    from .observables import _kabsch_angle

    z0 = r0[:, 0] + 1j * r0[:, 1]
    z0c = z0 - np.sum(m * z0) / np.sum(m)
    z = r[:, 0] + 1j * r[:, 1]
    phi = float(_kabsch_angle(z0c[:, None], (z - np.sum(m * z) / np.sum(m))[:, None], m)[0])
    lin = r.copy()
    lin[:, 0] += phi * r0[:, 1]
    lin[:, 1] -= phi * r0[:, 0]
    # the same linear rotation acting on the rigid-rotation velocity w z x r0
    # is phi z x (w z x r0) = -phi w (x0, y0): take it out of v as well
    v = v.copy()
    v[:, 0] += phi * w * r0[:, 0]
    v[:, 1] += phi * w * r0[:, 1]
    c, s = math.cos(phi), math.sin(phi)
    out_r = lin.copy()
    out_r[:, 0], out_r[:, 1] = c * lin[:, 0] - s * lin[:, 1], s * lin[:, 0] + c * lin[:, 1]
    out_v = v.copy()
    out_v[:, 0], out_v[:, 1] = c * v[:, 0] - s * v[:, 1], s * v[:, 0] + c * v[:, 1]
    return out_r, out_v


# ---------------------------------------------------------------------------
# The loop
# ---------------------------------------------------------------------------
@dataclass
class RawRun:
    """Raw observations of a run, before statistics."""

    plan: Plan
    initial: dict
    stages: dict
    series: list
    wall_s: float
    n_trajectories: int


def integrate(plan: Plan, pos: np.ndarray, vel: np.ndarray, *, chunk: int = 64, progress=None,
              observe_stages: bool = True) -> RawRun:
    """Run the whole schedule on the given states (modified in place)."""
    from .kernels import advance, lag_phases
    from .observables import observe

    sched = plan.schedule
    T = pos.shape[2]
    lag_u = np.zeros((2, T))
    if plan.lag_n > 0:
        raw = lag_phases(pos, plan.masses, plan.charges, plan.lag_n)
        lag_u[0] = plan.lag_u_ref + np.array([_wrap(r - plan.lag_u_ref) for r in raw])
        lag_u[1] = raw
    t0 = time.perf_counter()
    initial = observe(plan, pos, vel, 0.0, lag_u) if observe_stages else {}
    stages, series = {}, []
    t = 0.0
    bounds = sched.boundaries_s
    # a lag update every spp/4 steps: the pinning turns by at most 2 pi / 4 per order n in between
    lag_stride = max(1, plan.cfg.run.steps_per_period // 4)
    last_series = 0.0
    for k, st in enumerate(sched.stages):
        n_left = plan.stage_steps[k]
        dt = plan.stage_dt[k]
        step0 = 0
        blk = BLOCK_STEPS
        if plan.series_interval_s:
            blk = max(1, min(BLOCK_STEPS, int(round(plan.series_interval_s / dt))))
        while n_left > 0:
            nb = min(blk, n_left)
            ts = bounds[k] + dt * (step0 + np.arange(nb + 1))
            # force-evaluation times: block start, then the end of each sub-step
            sub = np.cumsum(plan.fracs)
            te = np.concatenate([[ts[0]], (ts[:-1, None] + dt * sub[None, :]).ravel()])
            te = np.minimum(te, bounds[k + 1])
            c_re, c_im = _pin_coefficients(plan, te)
            theta_steps = sched.theta_rad(ts)
            if plan.lag_n > 0:
                track = (np.abs(sched.pinning_scale(ts, plan.lag_term)) >= plan.lag_threshold).astype(np.uint8)
            else:
                track = np.zeros(nb + 1, dtype=np.uint8)
            advance(pos, vel, dt, nb, plan.fracs, plan.w2, plan.stray_acc, plan.qm, plan.kq_i, plan.kq_j,
                    plan.pin_orders, c_re, c_im, plan.masses, plan.charges, plan.lag_n, theta_steps, track,
                    lag_stride, lag_u, chunk)
            n_left -= nb
            step0 += nb
            t = bounds[k] + dt * step0
            if progress is not None:
                progress.update(nb * T)
            if plan.series_interval_s and t - last_series >= plan.series_interval_s - 0.5 * dt and n_left > 0:
                series.append(_series_point(observe(plan, pos, vel, t, lag_u), t, st.name))
                last_series = t
        t = bounds[k + 1]
        if observe_stages or k == len(sched.stages) - 1:
            stages[st.name] = observe(plan, pos, vel, t, lag_u)
        if plan.series_interval_s:
            series.append(_series_point(stages[st.name], t, st.name))
            last_series = t
    return RawRun(plan, initial, stages, series, time.perf_counter() - t0, T)


def _wrap(a):
    return a - TWO_PI * math.floor((a + math.pi) / TWO_PI)


def _pin_coefficients(plan: Plan, te: np.ndarray):
    """C_p(t) = s_p(t) c_p exp(-i n_p (angle_p + theta(t))) at times te."""
    P = len(plan.pin_orders)
    if P == 0:
        z = np.zeros((len(te), 0))
        return z, z.copy()
    theta = plan.schedule.theta_rad(te)
    scales = plan.pin_scales(te)  # (E, P)
    ph = -plan.pin_orders[None, :] * (plan.pin_angle[None, :] + theta[:, None])
    amp = scales * plan.pin_strength[None, :]
    return np.ascontiguousarray(amp * np.cos(ph)), np.ascontiguousarray(amp * np.sin(ph))


def _series_point(obs: dict, t: float, stage: str) -> dict:
    ok = (obs["status"] & (2 | 8)) == 0
    L = obs["L_hbar"][ok]
    lag = obs["lag_rad"][ok]
    e = obs["mode_n"][ok]
    return {"t_s": t, "stage": stage, "L_mean_hbar": float(np.mean(L)) if L.size else np.nan,
            "L_std_hbar": float(np.std(L, ddof=1)) if L.size > 1 else np.nan,
            "lag_mean_rad": float(np.mean(lag)) if lag.size else np.nan,
            "lag_std_rad": float(np.std(lag, ddof=1)) if lag.size > 1 else np.nan,
            "lag_absmax_rad": float(np.max(np.abs(lag))) if lag.size else np.nan,
            "mode_n_mean": np.nanmean(e, axis=0) if e.size else np.full(obs["mode_n"].shape[1], np.nan),
            "mode_labels": list(obs["_modes"].labels)}
