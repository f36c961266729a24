"""The Monte-Carlo driver: plan the run, sample initial states, step in blocks.

Main loop (pseudocode)::

    plan = make_plan(cfg)                    # crystal at t = 0, modes, dt, kernel arrays
    pos, vel = initial_states(plan, seed)    # Wigner sampling, one RNG key per trajectory
    observe(t = 0)
    for stage in schedule:
        for block in stage (<= BLOCK_STEPS steps, ends at series times):
            sample theta(t), pinning multipliers at every force time of the block
            kernels.start_advance(pos, vel, block arrays)   # whole block in numba, chunks on the pool
            [sample the next block while the pool steps this one]
            wait; [series point]
        observe(end of stage)

Memory is O(trajectories x ions) plus one block of schedule samples,
independent of the number of steps.

The plan is frozen (:class:`Plan`; what is derived from it later is memoised
in ``plan.memo``); everything that changes during a run is a
:class:`RunState`, advanced only by :class:`BlockStepper`.
"""

from __future__ import annotations

import math
import time
from dataclasses import dataclass, field, replace

import numpy as np

from mdrotor.engine.initial import (
    counter_keys,
    phase_space_point,
    sample_normal_coordinates,
    trajectory_rng,
)
from mdrotor.engine.kernels import advance, lag_phases, start_advance, substep_fractions, wrap_angle
from mdrotor.engine.noise import kernel_arrays
from mdrotor.engine.observe import observe
from mdrotor.errors import InputError, PhysicsError
from mdrotor.model.build import config_terms, model_potential
from mdrotor.physics.constants import HBAR, K_B, K_COULOMB
from mdrotor.physics.frame import alignment_angle, rotate_positions, rotate_states
from mdrotor.physics.laser import emission_sqrt, max_friction_coefficient
from mdrotor.physics.mathieu import transfer_matrices
from mdrotor.physics.pinning import BARRIER_KT_MIN, MOMENT_REL, assess, moment_rel
from mdrotor.physics.statics import compute_crystal, mode_occupations
from mdrotor.results.status import usable

TWO_PI = 2.0 * np.pi
BLOCK_STEPS = 2048
LASER_STREAM = 4  # SeedSequence spawn_key (trajectory, 4): each trajectory's key for the recoil kicks
# the laser kick is a first-order splitting of a velocity-dependent force: the automatic dt keeps its
# largest damping per step, max |dF/dv| dt / m, at or below this
LASER_DAMPING_PER_STEP = 0.01
# the exact linear propagator's "off" arrays in the kernel's drive tuple (see kernels.advance)
NO_LINEAR = (np.zeros((0, 1, 3, 4)), np.zeros(1, dtype=np.int64), 0)
# RF runs: steps per RF period of the fine-step path (Verlet with the RF force in the kicks; the order-4
# integrator, and runs whose stages do not last a whole number of propagator steps)
RF_STEPS_PER_PERIOD = 64
# RF runs with the exact per-step Mathieu propagator (Verlet): default steps per RF period, from the
# accuracy study in scripts/bench.py (docs/rf.md, "Step")
RF_PROPAGATOR_STEPS = 12


@dataclass(eq=False)
class PlanMemo:
    """Memoised pure functions of a plan, computed when first asked for.

    The plan itself is frozen; what is derived from it later and kept (every
    chunk of a run observes at the same times) lives here, so a cached value
    is the same whoever asks first."""

    # measurement frames: the free crystal per lattice rate (observe.lattice_node)
    # and the pinned crystal per observation time (observe.pinned_frame, at most 64)
    frames: dict = field(default_factory=dict)
    # the exact propagator's per-step maps: (stage, dt, model) -> (K, N, 3, 4) (Plan.rf_table)
    rf_tables: dict = field(default_factory=dict)


@dataclass(frozen=True, eq=False)
class Plan:
    """Everything the run needs, resolved from the config (SI); frozen, made
    by :func:`make_plan` alone. Per-run state (positions, velocities, RF
    phases, noise states, lag) is a :class:`RunState`; values derived later
    from the plan are memoised in ``memo`` (:class:`PlanMemo`)."""

    cfg: object
    schedule: object
    masses: np.ndarray
    charges: np.ndarray
    species_ids: np.ndarray
    w2: np.ndarray
    rf2: np.ndarray
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
    stage_steps: tuple           # steps per stage
    stage_dt: tuple              # each stage's step (its duration over its steps)
    fracs: np.ndarray
    lag_n: int
    lag_term: int
    lag_u_ref: float
    lag_threshold: float
    loss_radius_m: float
    wigner: bool
    series_interval_s: float | None
    f_fast_hz: float
    f_drive_hz: float = 0.0
    rf_orbit: tuple | None = None
    noise: object = None
    notes: tuple = ()
    holding: object = None
    holding0: object = None
    rotor_cdf: tuple | None = None
    lasers: tuple = ()
    # RF runs: steps per RF period (dt = T_RF / rf_steps; the trajectories' RF phases lie on this lattice)
    # and whether the linear trap force is propagated exactly per step (rf_exact) or kicked (fine-step path)
    rf_steps: int = RF_STEPS_PER_PERIOD
    rf_exact: bool = False
    memo: PlanMemo = field(default_factory=PlanMemo)

    @property
    def pin_is_multipole(self) -> np.ndarray:
        """1 for pinning terms applied as pure multipoles, 0 for layout terms
        (those act through their polynomial potential)."""
        return np.array([0.0 if t.layout is not None else 1.0 for t in self.cfg.pinning])

    @property
    def omega_radial_min(self) -> float:
        """Lowest radial secular angular frequency over the ions (rad/s;
        :meth:`mdrotor.physics.trap.Trap.max_rotation_hz`)."""
        return TWO_PI * self.cfg.trap.max_rotation_hz(self.masses, self.charges)

    @property
    def rf(self) -> bool:
        return bool(np.any(self.rf2 != 0.0))

    def kernel_model(self) -> tuple:
        return (self.w2, self.rf2, self.stray_acc, self.qm, self.kq_i, self.kq_j)

    def rf_phases(self, seed: int, indices) -> np.ndarray:
        """RF phase of every trajectory at t = 0: one of the ``rf_steps``
        step phases of the RF orbit, fixed (nearest to ``trap.rf_phase``) or
        drawn from the trajectory's own key (stream 2)."""

        K = self.rf_steps
        step = TWO_PI / K
        fixed = self.cfg.trap.rf_phase_rad
        if fixed is not None:
            return np.full(len(indices), step * (round(float(fixed) / step) % K))
        return np.array([step * trajectory_rng(seed, int(i), 2).integers(K) for i in indices])

    def rf_table(self, stage: int, dt: float, model: tuple) -> np.ndarray:
        """The exact per-step maps of the linear trap force for steps of ``dt``
        (= T_RF / rf_steps) in ``stage``, at the rf_steps step phases W t_k
        = W t_stage + 2 pi k / rf_steps (t_stage the stage's start): (K, N,
        3, 4), entries (m00, m01, m10, m11) of (u, u') <- M (u, u') in SI,
        from :func:`mdrotor.physics.mathieu.transfer_matrices` with a = w2 / (W/2)^2,
        q = rf2 / (2 (W/2)^2) of ``model`` (each distinct (a, q) once)."""

        w2, rf2 = model[0], model[1]
        key = (stage, dt, w2.tobytes(), rf2.tobytes())
        got = self.memo.rf_tables.get(key)
        if got is not None:
            return got
        K = self.rf_steps
        half = 0.5 * TWO_PI * self.f_drive_hz
        base = math.fmod(TWO_PI * self.f_drive_hz * float(self.schedule.boundaries_s[stage]), TWO_PI)
        xi0 = 0.5 * (base + TWO_PI * np.arange(K) / K)
        a_all, q_all = w2 / half**2, rf2 / (2.0 * half**2)
        out = np.empty((K, len(self.masses), 3, 4))
        done = {}
        for i in range(len(self.masses)):
            for u in range(3):
                aq = (float(a_all[i, u]), float(q_all[i, u]))
                if aq not in done:
                    done[aq] = transfer_matrices(aq[0], aq[1], xi0, half * dt)
                m = done[aq]
                # (u, du/dxi) -> (u, du/dt): du/dt = (W/2) du/dxi
                out[:, i, u, 0] = m[:, 0, 0]
                out[:, i, u, 1] = m[:, 0, 1] / half
                out[:, i, u, 2] = m[:, 1, 0] * half
                out[:, i, u, 3] = m[:, 1, 1]
        self.memo.rf_tables[key] = out
        return out

    @property
    def n_steps(self) -> int:
        return int(sum(self.stage_steps))

    def pin_scales(self, t) -> np.ndarray:
        """Pinning multipliers at time(s) t: (P,) or (len(t), P)."""
        return _pin_scales(self.schedule, len(self.pin_orders), t)

    def pinned_at(self, t: float) -> bool:
        return _pinned(self.pin_scales(t), self.pin_strength)

    def crystal_at(self, t_s: float, f_hz: float):
        """Equilibrium and modes of the crystal rotating at f_hz with the
        pinning as scheduled at time t_s (relaxed from the t = 0 crystal)."""

        return compute_crystal(self.potential(f_hz, float(self.schedule.theta_rad(t_s)), self.pin_scales(t_s)), f_hz,
                               start=self.crystal0.positions_m)

    def potential(self, f_hz: float, theta: float, scales):
        return model_potential(self.cfg, f_hz, theta_rad=theta, pin_scale=scales)


def _pin_scales(sched, n_terms: int, t) -> np.ndarray:
    """Pinning multipliers of the ``n_terms`` terms at time(s) t: (P,) or (len(t), P)."""
    if sched is None or n_terms == 0:
        return np.ones(n_terms) if np.ndim(t) == 0 else np.ones((len(t), n_terms))
    vals = [sched.pinning_scale(t, p) for p in range(n_terms)]
    return np.array(vals) if np.ndim(t) == 0 else np.stack(vals, axis=-1)


def _pinned(scales: np.ndarray, strength: np.ndarray) -> bool:
    """Whether any pinning term acts at these multipliers."""
    if len(strength) == 0:
        return False
    return bool(np.any(np.abs(scales * strength) > 0.0))


def make_plan(cfg) -> Plan:
    """Resolve a config into a :class:`Plan` (crystal at t = 0, dt, kernel arrays).

    Everything is computed first, then the plan made in one call; an RF run's
    orbit at t = 0 is found by stepping that plan and added to a copy of it
    (``dataclasses.replace``; the copy shares the memo)."""

    sched = cfg.schedule
    if sched is None:
        raise InputError("stage", "a run needs at least one [[stage]] with a duration", cfg.source)
    m, q = cfg.masses_kg, cfg.charges_c
    n = len(m)
    w2 = cfg.trap.omega_sq(m, q)
    rf2 = np.zeros_like(w2)
    if cfg.trap.model == "rf":
        w2, rf2 = cfg.trap.rf_terms(m, q)
    stray_acc = (q / m)[:, None] * np.asarray(cfg.trap.stray_field_v_per_m)[None, :]
    kqq = K_COULOMB * np.outer(q, q)
    kq_i = kqq / m[:, None]
    kq_j = kqq / m[None, :]
    orders = np.array([t.order for t in cfg.pinning], dtype=np.int64)
    strength = np.array([t.strength for t in cfg.pinning], dtype=float)
    angle = np.array([t.angle_rad for t in cfg.pinning], dtype=float)
    f0 = float(sched.f_rot_hz(0.0))

    def potential(scales):
        return model_potential(cfg, f0, theta_rad=0.0, pin_scale=scales)

    notes = []
    scales0 = _pin_scales(sched, len(orders), 0.0)
    pinned0 = _pinned(scales0, strength)
    try:
        cr = compute_crystal(potential(scales0), f0, seed=cfg.search_seed)
    except PhysicsError as e:
        raise e.with_source(cfg.source)
    free_rotor0 = not any(lab == "libration" for lab in cr.modes.labels) and not pinned0 and n > 1
    holding0 = holding = rotor_cdf = None
    if len(orders) and n > 1:
        # the pinning core at t = 0; a well shallower than BARRIER_KT_MIN k_B T
        # is not a harmonic libration: the angle is drawn from the Boltzmann
        # weight of the relaxed held curve instead (see initial_states)

        try:
            holding0 = assess(potential(scales0), potential(np.zeros(len(orders))), config_terms(cfg, scales0),
                              start=cr.positions_m, seed=cfg.search_seed)
        except PhysicsError as e:
            raise e.with_source(cfg.source)
        h0 = holding0
        kT = K_B * cfg.initial.temperature_k
        if (h0.held and kT > 0 and h0.barrier_j < BARRIER_KT_MIN * kT and h0.curve is not None
                and "libration" in cr.modes.labels):
            u = h0.curve.energy_j - np.min(h0.curve.energy_j)
            wgt = np.exp(-u / kT)
            step = TWO_PI / len(wgt)
            edges = h0.curve.phi_rad - 0.5 * step
            rotor_cdf = (np.r_[edges, edges[-1] + step], np.r_[0.0, np.cumsum(wgt)] / np.sum(wgt))
    # the pinning term whose lag is tracked, and the order of its wells: the
    # pinning core's verdict on the t = 0 crystal with every term at its
    # largest multiplier of the schedule (a pinning that ramps up from 0 counts)
    lag_n, lag_term, lag_u_ref, lag_threshold = 0, -1, 0.0, 0.0
    if len(orders):
        peak = np.array([sched.peak_pinning_scale(j) for j in range(len(orders))])
        try:
            hold = assess(potential(peak), potential(np.zeros(len(orders))), config_terms(cfg, peak),
                          start=cr.positions_m, seed=cfg.search_seed, curve=False)
        except PhysicsError as e:
            raise e.with_source(cfg.source)
        holding = hold
        if hold.held and moment_rel(cr.positions_m, m, q, hold.order) > MOMENT_REL:
            lag_term, lag_n = hold.term, int(hold.order)

            p3 = np.ascontiguousarray(cr.positions_m.T[:, :, None])
            lag_u_ref = float(lag_phases(p3, m, q, lag_n)[0])
            lag_threshold = 0.1 * float(peak[hold.term])
            if hold.verdict == "deformation":
                notes.append(f"the pinning holds this crystal only through its deformation: {hold.reason}")
        elif hold.held:
            notes.append(f"the crystal is {hold.describe()}, but has no order-{hold.order} moment at t = 0 to "
                         f"track its lag by; lag and slips are not measured")
        else:
            notes.append(f"the pinning does not hold this crystal: {hold.reason}")
    # time step from the fastest frequency in the problem
    f_sec = float(np.sqrt(np.max(cfg.trap.omega_sq(m, q)))) / TWO_PI
    f_modes = float(np.max(cr.modes.freq_hz)) + abs(f0) if len(cr.modes.omega) else 0.0
    f_pin = float(np.max(orders)) * sched.max_f_rot_hz() if len(orders) else 0.0
    f_fast = max(f_sec, f_modes, f_pin)
    dt = 1.0 / (f_fast * cfg.run.steps_per_period)
    if cfg.lasers and sched is not None:
        for b in cfg.lasers:
            s_max = max(b.saturation_in(st.name) for st in sched.stages)
            if s_max > 0 and b.ions:
                rate = max_friction_coefficient(s_max, b.k_rad_per_m) / float(np.min(m[list(b.ions)]))
                dt = min(dt, LASER_DAMPING_PER_STEP / rate)
    f_drive, rf_exact, rf_steps = 0.0, False, RF_STEPS_PER_PERIOD
    if cfg.trap.model == "rf":
        f_drive = float(cfg.trap.f_drive_hz)
        dt, rf_exact, rf_steps, note = _rf_step(cfg, f_drive, dt)
        if note:
            notes.append(note)
    elif cfg.run.dt_s is not None:
        dt = cfg.run.dt_s
    stage_steps = tuple(max(1, int(math.ceil(st.duration_s / dt * (1 - 1e-12)))) for st in sched.stages)
    stage_dt = tuple(st.duration_s / k for st, k in zip(sched.stages, stage_steps))
    noise = None if cfg.noise is None or cfg.noise.is_empty else cfg.noise
    plan = Plan(cfg=cfg, schedule=sched, masses=m, charges=q, species_ids=_species_ids(cfg), w2=w2, rf2=rf2,
                stray_acc=stray_acc, qm=q / m, kq_i=kq_i, kq_j=kq_j, pin_orders=orders, pin_strength=strength,
                pin_angle=angle, crystal0=cr, f0_hz=f0, theta0=0.0, pinned0=pinned0, free_rotor0=free_rotor0,
                dt_s=dt, stage_steps=stage_steps, stage_dt=stage_dt, fracs=substep_fractions(cfg.run.integrator),
                lag_n=lag_n, lag_term=lag_term, lag_u_ref=lag_u_ref, lag_threshold=lag_threshold,
                loss_radius_m=cfg.observe.loss_radius_m, wigner=cfg.initial.wigner,
                series_interval_s=cfg.observe.series_interval_s, f_fast_hz=f_fast, f_drive_hz=f_drive,
                noise=noise, notes=tuple(notes), holding=holding, holding0=holding0, rotor_cdf=rotor_cdf,
                lasers=tuple(cfg.lasers), rf_steps=rf_steps, rf_exact=rf_exact)
    if plan.rf:
        orbit, orbit_notes = rf_orbit(plan)
        plan = replace(plan, rf_orbit=orbit, notes=plan.notes + orbit_notes)
    return plan


def _whole_steps(duration_s: float, dt: float) -> int | None:
    """The number of steps of ``dt`` in ``duration_s`` if it is whole (to
    1e-9 of a step), else None."""
    k = duration_s / dt
    n = int(round(k))
    return n if n >= 1 and abs(k - n) <= 1e-9 * max(1.0, k) else None


def _rf_step(cfg, f_drive_hz: float, dt_auto: float) -> tuple:
    """The step of an RF run and whether the linear trap force is propagated
    exactly: ``(dt, rf_exact, rf_steps, note or None)`` (docs/rf.md).

    Verlet with the automatic dt: dt = T_RF / K with K = RF_PROPAGATOR_STEPS,
    or more when the secular motion, the pinning or the beams ask for a
    shorter step than that. A given ``run.dt`` is used as it is when T_RF is
    a whole number K of it. The propagator needs every step to start on the
    lattice of K RF phases: every stage must last a whole number of steps. If
    not (or with the order-4 integrator, whose negative sub-step would need
    its own maps), the run takes the fine-step path: the RF force among the
    kicks of the plain stepper at dt <= T_RF / RF_STEPS_PER_PERIOD, with a
    note saying why.
    """
    period = 1.0 / f_drive_hz
    given = cfg.run.dt_s
    why = None
    if cfg.run.integrator != "verlet":
        why = f"the {cfg.run.integrator} integrator"
    if given is None:
        K = max(RF_PROPAGATOR_STEPS, int(math.ceil(period / dt_auto * (1 - 1e-12))))
    else:
        K = _whole_steps(period, given)
        if K is None and why is None:
            why = f"run.dt = {given:.6g} s does not divide the RF period {period:.6g} s"
    if why is None:
        bad = [st.name for st in cfg.schedule.stages if _whole_steps(st.duration_s, period / K) is None]
        if bad:
            why = (f"stage {', '.join(repr(b) for b in bad)} does not last a whole number of steps of T_RF / {K} "
                   f"= {period / K:.6g} s")
    if why is None:
        return period / K, True, K, None
    note = (f"RF run without the exact Mathieu propagator ({why}): the RF force is integrated by the "
            f"plain stepper at dt <= T_RF / {RF_STEPS_PER_PERIOD}, several times slower")
    dt = given if given is not None else min(dt_auto, period / RF_STEPS_PER_PERIOD)
    return dt, False, RF_STEPS_PER_PERIOD, note


def laser_keys(seed: int, indices) -> np.ndarray:
    """Each trajectory's 64-bit key for the laser's recoil kicks (drawn in the
    kernel from a counter hash of the key and (step, beam, ion)): a function
    of (seed, trajectory index) only."""

    return counter_keys(seed, indices, LASER_STREAM)


def laser_arrays(plan: Plan, stage: str):
    """The kernel's beam arrays (khat, par, centre, vrec, emit) for the beams
    on during ``stage`` (see kernels.advance), or None if none is on."""

    beams = [b for b in plan.lasers if b.on(stage)]
    if not beams:
        return None
    n = len(plan.masses)
    khat = np.array([b.direction for b in beams], dtype=float)
    par = np.array([[b.k_rad_per_m, b.gamma_rad_s, b.delta_rad_s, b.saturation_in(stage),
                     2.0 / b.waist_m**2 if b.waist_m else 0.0] for b in beams])
    centre = np.array([b.centre_m for b in beams], dtype=float)
    vrec = np.zeros((len(beams), n))
    for j, b in enumerate(beams):
        idx = np.array(b.ions, dtype=int)
        vrec[j, idx] = HBAR * b.k_rad_per_m / plan.masses[idx]
    # one square root for absorption (along k) and emission (moments M) together
    emit = np.array([emission_sqrt(np.outer(b.direction, b.direction) + b.emission) for b in beams])
    return khat, par, centre, vrec, emit


def _species_ids(cfg) -> np.ndarray:
    names = [s.name for s in cfg.species]
    uniq = {nm: i for i, nm in enumerate(dict.fromkeys(names))}
    return np.array([uniq[nm] for nm in names])


# ---------------------------------------------------------------------------
# Initial states
# ---------------------------------------------------------------------------
def initial_states(plan: Plan, seed: int, indices: np.ndarray):
    """Positions and velocities (3, N, T) of trajectories ``indices``.

    See :mod:`mdrotor.engine.initial` for the distribution and the RNG keys. A
    crystal that nothing holds at t = 0 gets a uniform random angle and a
    thermal L_com (Gaussian, variance I k_B T). A crystal held in wells
    shallower than :data:`mdrotor.physics.pinning.BARRIER_KT_MIN` k_B T is not a
    harmonic libration (its thermal angle spans wells, and the linear mode
    vector would carry the crystal's deformation far out): its libration
    mode is left unexcited and its angle drawn from the classical Boltzmann
    weight exp(-U(phi) / k_B T) of the relaxed held curve
    (:func:`mdrotor.physics.pinning.held_curve`), L_com thermal as above.
    """

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
    thermal_rotor = plan.rotor_cdf is not None
    k_lib = cr.modes.labels.index("libration") if thermal_rotor else -1
    spin = np.zeros(T)  # a drawn orientation (free or thermal rotor); the RF orbit is turned with it
    for b, idx in enumerate(indices):
        rng = trajectory_rng(seed, int(idx), 0)
        qn, pn = sample_normal_coordinates(n_occ, plan.wigner, rng)
        if thermal_rotor:  # the rotation is drawn below, not as a harmonic libration
            qn[k_lib] = pn[k_lib] = 0.0
        zeta = phase_space_point(cr.modes, qn, pn)
        r = r0 + (zeta[: 3 * n] / sqm).reshape(n, 3)
        v = v0 + (zeta[3 * n:] / sqm).reshape(n, 3)
        if n > 1:
            r, v = _curl_rotation(r, v, r0, m, w)
        if plan.free_rotor0 or thermal_rotor:
            phi = rng.uniform(0.0, TWO_PI)
            if thermal_rotor:  # inverse CDF of the Boltzmann weight on the held curve
                phi = float(np.interp(phi / TWO_PI, plan.rotor_cdf[1], plan.rotor_cdf[0]))
            dl = rng.standard_normal() * math.sqrt(I * K_B * cfg.initial.temperature_k)
            rc = r - np.sum(m[:, None] * r, axis=0) / np.sum(m)
            v[:, 0] += -dl / I * rc[:, 1]
            v[:, 1] += dl / I * rc[:, 0]
            r, v = rotate_positions(r, phi), rotate_positions(v, phi)
            spin[b] = phi
        pos[:, :, b] = r.T
        vel[:, :, b] = v.T
    if plan.rf:
        _add_micromotion(plan, pos, vel, plan.rf_phases(seed, indices), spin)
    return pos, vel


def _add_micromotion(plan: Plan, pos, vel, phases, spin=None) -> None:
    """Put the sampled secular states on the RF orbit at t = 0.

    The equilibrium crystal, at rest or rotating at f_rot(0), is replaced by
    its periodic orbit under the full RF force (found numerically,
    :func:`rf_orbit`, so the Coulomb coupling of the micromotion and the
    integrator's own discretisation are included), taken at each
    trajectory's RF phase (and turned by ``spin`` (T,), the orientation
    drawn for a free or thermal rotor). The rigid rotation is part of that orbit:
    it is not scaled by the micromotion.

    The thermal deviation from the equilibrium, in the frame co-rotating at
    w = 2 pi f_rot(0) (position U, velocity U' relative to the frame), gets
    the micromotion of the Mathieu solution to first order in q and in
    beta = 2 w_k / W::

        u  = U (1 - (q/2) cos psi) + (q / W) sin(psi) U'
        u' = U' (1 + (q/2) cos psi) + (q/2) W sin(psi) U,     psi = W t + phase

    (from the first sidebands of the Floquet solution, C_{+-2} / C_0 =
    q / (a - (beta +- 2)^2) = -(q/4)(1 -+ beta) + O(q^2, beta^2); Leibfried et
    al., Rev. Mod. Phys. 75, 281 (2003), eqs. 8-10; March, J. Mass Spectrom.
    32, 351 (1997)). The often quoted u' = U' (1 - (q/2) cos psi) + ... is
    the derivative of the lowest-order form and is wrong at first order in q
    for the secular velocity: it would change L_z of a rotating state by
    (1 -+ q/2)^2 with the RF phase, although an axially symmetric RF force
    conserves L_z. In-plane the RF force is the same in the co-rotating
    frame, so the same form holds there; lab velocities add w z x u.
    """
    W = TWO_PI * plan.f_drive_hz
    w = TWO_PI * plan.f0_hz
    qh = 0.5 * plan.cfg.trap.q_per_ion(plan.masses, plan.charges).T[:, :, None]  # (3, N, 1)
    c, s = np.cos(phases)[None, None, :], np.sin(phases)[None, None, :]
    orbit_p, orbit_v = plan.rf_orbit
    k = np.rint(phases / (TWO_PI / plan.rf_steps)).astype(int) % plan.rf_steps
    op = orbit_p[k].transpose(1, 2, 0)
    ov = orbit_v[k].transpose(1, 2, 0)
    r0 = np.broadcast_to(plan.crystal0.positions_m.T[:, :, None], pos.shape)
    if spin is not None and np.any(spin != 0.0):
        op, ov, r0 = rotate_states(op, spin), rotate_states(ov, spin), rotate_states(r0, spin)
    du = pos - r0
    dv = vel - _spin_velocity(w, pos)          # velocity relative to the co-rotating frame
    p_new = op + du * (1.0 - qh * c) + (2.0 * qh / W) * s * dv
    u_new = (ov - _spin_velocity(w, op)) + dv * (1.0 + qh * c) + du * qh * W * s
    pos[:] = p_new
    vel[:] = u_new + _spin_velocity(w, p_new)


def _spin_velocity(w: float, p: np.ndarray) -> np.ndarray:
    """w z x r for positions p (3, ...): the velocity of rigid rotation at w (rad/s)."""
    out = np.zeros_like(p)
    out[0] = -w * p[1]
    out[1] = w * p[0]
    return out


def _orbit_model(plan: Plan):
    """Kernel model for the RF-orbit search, and a note when it is not the run's.

    A crystal rotating at t = 0 has a periodic orbit only in the frame
    co-rotating with the pinning, and only if the trap is symmetric about
    its axis in the plane (then the RF force and the co-rotating pinning are
    both periodic with T_RF there). An in-plane anisotropy (a_x != a_y or
    q_x != q_y) or an in-plane stray field rotates against that frame: there
    is no periodic orbit. The orbit is then searched in the trap averaged
    over the rotation (the mean of the x and y terms, the in-plane stray
    field left out), the same approximation as the rotating-frame statics
    (:func:`mdrotor.model.build.model_potential`); the run integrates the full
    trap from t = 0.
    """
    model = plan.kernel_model()
    if plan.f0_hz == 0.0:
        return model, None
    w2, rf2, stray, qm, kq_i, kq_j = model
    if np.array_equal(w2[:, 0], w2[:, 1]) and np.array_equal(rf2[:, 0], rf2[:, 1]) and not np.any(stray[:, :2]):
        return model, None
    w2a, rf2a, straya = w2.copy(), rf2.copy(), stray.copy()
    w2a[:, :2] = w2[:, :2].mean(axis=1, keepdims=True)
    rf2a[:, :2] = rf2[:, :2].mean(axis=1, keepdims=True)
    straya[:, :2] = 0.0
    why = [w for w, bad in (("RF q_x != q_y", not np.array_equal(rf2[:, 0], rf2[:, 1])),
                            ("static a_x != a_y", not np.array_equal(w2[:, 0], w2[:, 1])),
                            ("an in-plane stray field", bool(np.any(stray[:, :2])))) if bad]
    note = (f"the trap is not symmetric about its axis in the plane ({', '.join(why)}), so the crystal rotating "
            "at t = 0 has no periodic RF orbit: it starts on the periodic orbit of the trap averaged over the "
            "rotation (mean of the x and y terms, in-plane stray field left out, as in the rotating-frame "
            "statics); the full trap acts from t = 0")
    return (w2a, rf2a, straya, qm, kq_i, kq_j), note


def rf_orbit(plan: Plan, *, tol: float = 1e-12, max_iter: int = 12) -> tuple:
    """The periodic orbit of the equilibrium crystal under the full RF force.

    At rest (f_rot(0) = 0) the orbit is periodic in the lab. A crystal
    rotating at w = 2 pi f_rot(0), with the pinning co-rotating, has an orbit
    that is periodic with T_RF in the frame co-rotating with the pinning
    (where an in-plane isotropic RF force and the co-rotating pinning are
    both T_RF-periodic): seen from the lab it comes back turned by w T_RF.
    Newton's method on the one-period map P (integrated with the run's own
    stepper at dt = T_RF / ``plan.rf_steps``, the pinning strength frozen
    at its t = 0 value and its angle turning at w): solve
    P(z) = R(w T_RF) z for the phase-space point z at RF phase 0, R the
    rotation about the axis acting on positions and velocities, with the
    Jacobian from finite differences, all perturbed copies integrated as one
    batch of trajectories (least squares: a free crystal's orientation is a
    continuous family). For an in-plane anisotropic trap see
    :func:`_orbit_model`.

    Returns ``((positions, velocities), notes)``: the orbit (lab frame) at
    the ``plan.rf_steps`` step phases, each (K, 3, N), turned back by -w t_k
    to the orientation the pinning has at t = 0 (the state a trajectory
    starting at t = 0 with RF phase W t_k takes), and the notes for the plan
    (a tuple: the averaged trap, a residual left).
    """
    n = len(plan.masses)
    dim = 6 * n
    W = TWO_PI * plan.f_drive_hz
    w = TWO_PI * plan.f0_hz
    period = TWO_PI / W
    K = plan.rf_steps
    dt = period / K
    qh = 0.5 * plan.cfg.trap.q_per_ion(plan.masses, plan.charges)  # (N, 3)
    model, note = _orbit_model(plan)
    notes = (note,) if note else ()
    r0 = plan.crystal0.positions_m
    p_start = r0 * (1.0 - qh)                       # lowest order at phase 0
    v_start = _spin_velocity(w, p_start.T).T
    z = np.concatenate([p_start.ravel(), v_start.ravel()])
    size = np.max(np.abs(r0)) + 1e-6
    scale = np.concatenate([np.full(3 * n, size), np.full(3 * n, W * size)])
    stepper = BlockStepper(plan, dim + 1, model=model)
    eps = 1e-7
    turn = _turn_matrix(n, w * period)

    def one_period(states):
        p = np.ascontiguousarray(states[:, : 3 * n].reshape(-1, n, 3).transpose(2, 1, 0))
        v = np.ascontiguousarray(states[:, 3 * n:].reshape(-1, n, 3).transpose(2, 1, 0))
        stepper.advance_block(RunState.start(plan, p, v, rf_phases=np.zeros(dim + 1)), 0, 0.0, dt, K, frozen=True,
                              spin=w)
        return np.concatenate([p.transpose(2, 1, 0).reshape(-1, 3 * n), v.transpose(2, 1, 0).reshape(-1, 3 * n)], axis=1)

    best = (np.inf, z)
    for _ in range(max_iter):
        batch = np.repeat(z[None, :], dim + 1, axis=0)
        batch[1:] += np.diag(eps * scale)
        out = one_period(batch)
        res = out[0] - turn @ z
        err = float(np.max(np.abs(res) / scale))
        if err < best[0]:
            best = (err, z)
        if err < tol:
            break
        # in units of `scale` (positions and velocities mixed in SI span 16 decades)
        jac = (out[1:] - out[0]).T / (eps * scale)[:, None]
        step = np.linalg.lstsq(jac - turn, -res / scale, rcond=1e-10)[0]
        z = z + step * scale
    err, z = best
    if err > 1e-8:
        notes += (f"the RF orbit at t = 0 was found only to a relative residual {err:.2g} per RF period "
                  "(the field is not periodic in the frame co-rotating with the pinning)",)
    # sample the orbit at every step phase, turned back to the t = 0 orientation
    p = np.ascontiguousarray(z[: 3 * n].reshape(1, n, 3).transpose(2, 1, 0))
    v = np.ascontiguousarray(z[3 * n:].reshape(1, n, 3).transpose(2, 1, 0))
    stepper1 = BlockStepper(plan, 1, model=model)
    state = RunState.start(plan, p, v, rf_phases=np.zeros(1))
    op, ov = [], []

    for j in range(K):
        back = -w * j * dt
        op.append(rotate_states(p, back)[:, :, 0])
        ov.append(rotate_states(v, back)[:, :, 0])
        stepper1.advance_block(state, 0, j * dt, dt, 1, frozen=True, spin=w)
    return (np.array(op), np.array(ov)), notes


def _turn_matrix(n: int, angle: float) -> np.ndarray:
    """R(angle) about z acting on a phase-space point (positions, velocities; 6N)."""
    c, s = math.cos(angle), math.sin(angle)
    blk = np.array([[c, -s, 0.0], [s, c, 0.0], [0.0, 0.0, 1.0]])
    return np.kron(np.eye(2 * n), blk)


def _curl_rotation(r, v, r0, m, w):
    """Turn the linear tangential part of a mode displacement into a true
    rotation by the same angle, so that a large libration does not stretch
    the crystal by r phi^2 / 2 (the inverse of what
    :func:`mdrotor.engine.observe.observe` does when it measures)."""

    z0 = r0[:, 0] + 1j * r0[:, 1]
    z0c = z0 - np.sum(m * z0) / np.sum(m)
    z = r[:, 0] + 1j * r[:, 1]
    phi = float(alignment_angle(z0c[:, None], (z - np.sum(m * z) / np.sum(m))[:, None], m)[0])
    lin = r.copy()
    lin[:, 0] += phi * r0[:, 1]
    lin[:, 1] -= phi * r0[:, 0]
    # the same linear rotation acting on the rigid-rotation velocity w z x r0
    # is phi z x (w z x r0) = -phi w (x0, y0): take it out of v as well
    v = v.copy()
    v[:, 0] += phi * w * r0[:, 0]
    v[:, 1] += phi * w * r0[:, 1]
    return rotate_positions(lin, phi), rotate_positions(v, phi)


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
    split: int = 0  # trajectories per chunk of a run spread over a cluster (0: one piece)


def integrate(plan: Plan, pos: np.ndarray, vel: np.ndarray, *, chunk: int = 64, progress=None,
              observe_stages: bool = True, rf_phases: np.ndarray | None = None, noise_state=None,
              laser_keys: np.ndarray | None = None, series_raw: bool = False) -> RawRun:
    """Run the whole schedule on the given states (modified in place).

    ``rf_phases`` (T,): each trajectory's RF phase at t = 0 (RF model only).
    ``noise_state``: from ``kernel_state(plan.noise, seed, indices)`` when the
    config has noise (each trajectory's keys and colored-noise state, carried
    across blocks and stages). ``laser_keys``: from :func:`laser_keys` when it has
    beams; each stage's observation then carries ``_laser_photons`` (T, N),
    every ion's expected photon count over the stage. ``series_raw``: keep
    each time-series point as the trajectories' own values
    (:func:`series_values`) instead of their ensemble statistics, for a
    run split into parts (the statistics are taken on the merged values).
    """

    sched = plan.schedule
    T = pos.shape[2]
    if plan.rf and rf_phases is None:
        raise ValueError("the RF model needs each trajectory's RF phase")
    if plan.noise is not None and noise_state is None:
        raise ValueError("a run with noise needs the trajectories' noise state")
    if plan.lasers and laser_keys is None:
        raise ValueError("a run with laser beams needs the trajectories' laser keys")
    state = RunState.start(plan, pos, vel, rf_phases=rf_phases, noise=noise_state, laser_keys=laser_keys)
    stepper = BlockStepper(plan, chunk)
    if plan.lag_n > 0:
        raw = lag_phases(pos, plan.masses, plan.charges, plan.lag_n)
        state.lag_u[0] = plan.lag_u_ref + np.array([wrap_angle(r - plan.lag_u_ref) for r in raw])
        state.lag_u[1] = raw
    t0 = time.perf_counter()
    initial = stepper.observe(state, 0, 0.0, plan.stage_dt[0]) if observe_stages else {}
    stages, series = {}, []
    t = 0.0
    bounds = sched.boundaries_s
    for k, st in enumerate(sched.stages):
        dt = plan.stage_dt[k]
        every = series_steps(plan, k) if plan.series_interval_s else 0  # series point every `every` steps

        def after_block(step0, nb, k=k, st=st, dt=dt, every=every):
            end = step0 + nb
            if progress is not None:
                progress.update(nb * T)
            if every and end % every == 0 and end < plan.stage_steps[k]:
                t = bounds[k] + dt * end
                obs = stepper.observe(state, k, t, dt)
                series.append(series_values(obs, t, st.name) if series_raw else _series_point(obs, t, st.name))

        stepper.advance_stage(state, k, stage_blocks(plan.stage_steps[k], every), after_block)
        t = bounds[k + 1]
        if observe_stages or k == len(sched.stages) - 1:
            stages[st.name] = stepper.observe(state, k, t, dt)
            if plan.lasers:
                stages[st.name]["_laser_photons"] = state.photons.T.copy()
        if plan.lasers:
            state.photons[:] = 0.0
        if plan.series_interval_s:
            obs = stages[st.name]
            series.append(series_values(obs, t, st.name) if series_raw else _series_point(obs, t, st.name))
    return RawRun(plan, initial, stages, series, time.perf_counter() - t0, T)


def stage_blocks(n_steps: int, every: int = 0):
    """The blocks of a stage of ``n_steps`` steps, ``(step0, n)`` in order:
    at most BLOCK_STEPS steps each, ending at every multiple of ``every``
    steps (the time-series points; 0: none)."""
    step0 = 0
    while step0 < n_steps:
        nb = min(BLOCK_STEPS, n_steps - step0, every - step0 % every if every else BLOCK_STEPS)
        yield step0, nb
        step0 += nb


def series_steps(plan: Plan, k: int) -> int:
    """Steps between time-series points in stage k: ``observe.series_interval``
    rounded to a whole number of the stage's steps (at least one). Each stage
    also ends with a point, so the last interval of a stage can be shorter."""
    return max(1, int(round(plan.series_interval_s / plan.stage_dt[k])))


def warm_up(plan: Plan, pos: np.ndarray, vel: np.ndarray, rf_phases=None, noise_state=None) -> float:
    """Compile (or load from numba's cache) the kernels a run calls, by one
    step of the first trajectory on a copy in every stage (each stage's
    features, noise and beams, select the kernel's variant, see
    kernels.advance), and in an RF run one without noise and beams (the
    observations' variant); returns the seconds it took, so that a run's
    speed can be reported without them. ``noise_state``: the first
    trajectory's alone (it is advanced)."""

    t0 = time.perf_counter()
    # copies (ascontiguousarray would hand back the run's own state when T = 1)
    p = np.array(pos[:, :, :1], order="C", copy=True)
    v = np.array(vel[:, :, :1], order="C", copy=True)
    ph = None if rf_phases is None else np.asarray(rf_phases)[:1]
    if plan.lag_n > 0:
        lag_phases(p, plan.masses, plan.charges, plan.lag_n)
    # beams: any key will do (their kicks are stateless); their kick runs only with a step index
    keys = np.zeros(1, dtype=np.uint64) if plan.lasers else None
    kicks = noise_state is not None or (plan.lasers and plan.noise is None)
    state = RunState.start(plan, p, v, rf_phases=ph, noise=noise_state, laser_keys=keys)
    stepper = BlockStepper(plan, 1)
    bounds = plan.schedule.boundaries_s
    for k in range(len(plan.stage_dt)):
        stepper.advance_block(state, k, bounds[k], plan.stage_dt[k], 1, noise_step0=0 if kicks else None)
    if plan.rf:
        stepper.advance_block(state, 0, 0.0, plan.stage_dt[0], 1)
    return time.perf_counter() - t0


@dataclass(eq=False)
class RunState:
    """The trajectories' state during a run: the only mutable thing of the
    engine, and only a :class:`BlockStepper` advances it (``advance_block``,
    ``advance_stage``; the kernel updates positions, velocities, lag, colored-noise states and photon
    counts in place); :func:`integrate` sets the lag's start and resets the
    photon counts at each stage's end.

    The RF phases are each trajectory's at t = 0, as cosine and sine and, for
    the exact propagator, as a step of the plan's lattice of ``rf_steps``
    phases (``rf_on_lattice``: all of them lie on it; phases given by a
    caller, not drawn by :meth:`Plan.rf_phases`, may not)."""

    pos: np.ndarray                # (3, N, T)
    vel: np.ndarray                # (3, N, T)
    lag_u: np.ndarray              # (2, T): unwrapped lag phase, last raw phase (kernels.advance)
    rf_c: np.ndarray               # (T,) cos of the RF phase at t = 0
    rf_s: np.ndarray               # (T,) sin of the RF phase at t = 0
    rf_idx: np.ndarray             # (T,) the RF phase in lattice steps (mod plan.rf_steps)
    rf_on_lattice: bool
    noise: object = None           # each trajectory's keys and colored-noise states (noise.KernelNoiseState)
    laser_keys: np.ndarray | None = None   # (T,) each trajectory's key for the recoil kicks
    photons: np.ndarray | None = None      # (N, T) expected photon counts since the last reset

    @classmethod
    def start(cls, plan: Plan, pos: np.ndarray, vel: np.ndarray, *, rf_phases=None, noise=None,
              laser_keys=None) -> RunState:
        """The state of trajectories at ``pos``, ``vel`` (kept, not copied:
        they are advanced in place) with RF phases ``rf_phases`` (T,) at t = 0."""
        T = pos.shape[2]
        ph = np.zeros(T) if rf_phases is None else np.asarray(rf_phases, dtype=float)
        lattice = ph / (TWO_PI / plan.rf_steps)
        on = bool(np.all(np.abs(lattice - np.rint(lattice)) <= 1e-9 * np.maximum(1.0, np.abs(lattice))))
        photons = np.zeros((len(plan.masses), T)) if laser_keys is not None else None
        return cls(pos, vel, np.zeros((2, T)), np.cos(ph), np.sin(ph),
                   np.rint(lattice).astype(np.int64) % plan.rf_steps, on, noise, laser_keys, photons)

    def window(self) -> RunState:
        """A copy for a measurement window: positions, velocities and lag
        copied, the RF phases shared, without noise and beams."""
        return RunState(self.pos.copy(), self.vel.copy(), self.lag_u.copy(), self.rf_c, self.rf_s, self.rf_idx,
                        self.rf_on_lattice)


class BlockStepper:
    """Advances a :class:`RunState` by blocks of steps: builds the kernel's
    per-block arrays from the plan (schedule samples, pinning coefficients,
    RF drive and propagator maps, noise, beams) and calls
    :func:`mdrotor.engine.kernels.advance`; observes (the secular state in
    RF runs). It holds only what the plan fixes, never a trajectory's state.
    ``model``: the kernel's trap model, if not the plan's (the RF orbit search)."""

    def __init__(self, plan: Plan, chunk: int, model=None):
        self.plan = plan
        self.chunk = chunk
        self.model = plan.kernel_model() if model is None else model
        self.rf = bool(np.any(self.model[1] != 0.0))  # the RF spring terms rf2
        # a lag update every spp/4 steps: the pinning turns by at most 2 pi / 4 per order n in between
        self.lag_stride = max(1, plan.cfg.run.steps_per_period // 4)
        # the exact propagator's kicks: the model without the linear trap force (it is in the maps)
        w2, rf2, *rest = self.model
        self.kick_model = (np.zeros_like(w2), np.zeros_like(rf2), *rest)

    def advance_block(self, state: RunState, stage: int, t_start: float, dt: float, n: int, *,
                      frozen: bool = False, noise_step0: int | None = None, spin: float = 0.0) -> None:
        """Advance ``state`` ``n`` steps from ``t_start``; ``frozen``: the
        schedule held at t = 0 (the RF drive still runs from phase W
        t_start), except the pinning angle, which turns at ``spin`` (rad/s)
        from 0. Noise and laser beams act only when ``noise_step0`` (the
        block's first step within the stage) is given: measurement windows
        run without them."""
        advance(*self.kernel_args(state, stage, t_start, dt, n, frozen=frozen, noise_step0=noise_step0, spin=spin))

    def advance_stage(self, state: RunState, stage: int, blocks, after=None) -> None:
        """Advance ``state`` through ``blocks`` of ``stage`` in order, each
        ``(step0, n)``: n steps from the stage's step step0, noise and beams
        on, as :meth:`advance_block` does them one by one (the same
        numbers); after each block, ``after(step0, n)`` (progress, a series
        point) sees the state at the block's end.

        On more than one thread the next block's arrays (schedule samples,
        noise and beam arrays: they depend on the plan and the times, never
        on the state's values) are made while the thread pool steps the
        current block, so that this Python part of each block does not
        leave a core idle (:func:`mdrotor.engine.kernels.start_advance`)."""
        dt = self.plan.stage_dt[stage]
        t0 = float(self.plan.schedule.boundaries_s[stage])

        def kernel_args(block):
            return self.kernel_args(state, stage, t0 + dt * block[0], dt, block[1], noise_step0=block[0])

        blocks = iter(blocks)
        block = next(blocks, None)
        args = kernel_args(block) if block is not None else None
        while block is not None:
            running = start_advance(*args)
            try:
                following = next(blocks, None)
                args = kernel_args(following) if following is not None else None
            finally:  # never leave the pool writing into the state
                running.wait()
            if after is not None:
                after(*block)
            block = following

    def kernel_args(self, state: RunState, stage: int, t_start: float, dt: float, n: int, *,
                    frozen: bool = False, noise_step0: int | None = None, spin: float = 0.0) -> tuple:
        """The arguments of :func:`mdrotor.engine.kernels.advance` for the
        block of :meth:`advance_block` (the same parameters): the schedule
        sampled at the block's force times, the pinning coefficients, the RF
        drive and propagator maps, the noise and beam arrays, and the state's
        arrays (referenced, not copied: the kernel updates them in place)."""

        plan = self.plan
        sched = plan.schedule
        end = sched.boundaries_s[stage + 1]
        ts = t_start + dt * np.arange(n + 1)
        # force-evaluation times: block start, then the end of each sub-step
        sub = np.cumsum(plan.fracs)
        te = np.concatenate([[ts[0]], (ts[:-1, None] + dt * sub[None, :]).ravel()])
        if t_start + dt * n <= end * (1 + 1e-12):
            te = np.minimum(te, end)
        t_sched, theta = (np.zeros_like(te), spin * te) if frozen else (te, None)
        c_re, c_im = _pin_coefficients(plan, t_sched, theta)
        if plan.lag_n > 0:
            track = (np.abs(sched.pinning_scale(ts, plan.lag_term)) >= plan.lag_threshold).astype(np.uint8)
        else:
            track = np.zeros(n + 1, dtype=np.uint8)
        W = TWO_PI * plan.f_drive_hz
        # a feature that is off goes as None: the kernel's variant without its code (see kernels.advance)
        drive, model_k = None, self.model
        if self.rf:
            drive = (np.cos(W * te), np.sin(W * te), state.rf_c, state.rf_s) + NO_LINEAR
            j0 = self._lattice_step(state, stage, t_start, dt)
            if j0 is not None:  # the linear trap force by its exact per-step maps, the rest as kicks
                drive = (drive[0], drive[1], state.rf_c, state.rf_s, plan.rf_table(stage, dt, self.model),
                         state.rf_idx, j0)
                model_k = self.kick_model
        lag = (plan.masses, plan.charges, plan.lag_n, sched.theta_rad(ts), track, self.lag_stride, state.lag_u)
        noise = None
        model = plan.noise
        if model is not None and noise_step0 is not None and model.active(sched.stages[stage].name):
            # white kicks, colored modes (their states carried in state.noise) and tones, all drawn in the kernel
            step = int(sum(plan.stage_steps[:stage])) + int(noise_step0)
            noise = kernel_arrays(model, state.noise, t_start_s=sched.boundaries_s[stage], dt_s=dt,
                                  step0=noise_step0, n_steps=n, global_step0=step,
                                  stage=sched.stages[stage].name)
        laser = None
        if plan.lasers and noise_step0 is not None and state.laser_keys is not None:
            arrays = laser_arrays(plan, sched.stages[stage].name)
            if arrays is not None:  # beams on: recoil kicks counted by the global step, like the white noise
                step = int(sum(plan.stage_steps[:stage])) + int(noise_step0)
                laser = arrays + (state.laser_keys, step, state.photons)
        poly = _poly_coefficients(plan, t_sched, theta)
        return (state.pos, state.vel, dt, n, plan.fracs, model_k, drive, (plan.pin_orders, c_re, c_im), poly, lag,
                noise, laser, self.chunk)

    def _lattice_step(self, state: RunState, stage: int, t_start: float, dt: float) -> int | None:
        """The lattice index (mod rf_steps) of a block's first step in
        ``stage`` when the exact propagator applies (RF run, dt = T_RF /
        rf_steps, the block starting a whole number of steps after the
        stage's start, every trajectory's RF phase on the lattice), else None
        (the fine-step path)."""
        plan = self.plan
        if not (plan.rf and plan.rf_exact and state.rf_on_lattice):
            return None
        K = plan.rf_steps
        if abs(dt * plan.f_drive_hz * K - 1.0) > 1e-9:
            return None
        off = t_start - float(plan.schedule.boundaries_s[stage])
        k = 0 if off == 0.0 else _whole_steps(off, dt)
        return None if k is None else k % K

    def observe(self, state: RunState, stage: int, t: float, dt: float) -> dict:
        """Observables at time t. In an RF run they are measured on the
        secular motion, from two consecutive RF periods after t (run on a
        copy, :meth:`RunState.window`): the secular position is the mean of
        the two period averages, the secular velocity their difference over
        T_RF (both refer to t + T_RF; the filters' gains are divided out per
        mode), and L_z is the average of the instantaneous L_z over both
        periods."""

        plan = self.plan
        if not plan.rf:
            return observe(plan, state.pos, state.vel, t, state.lag_u)
        n = max(1, int(round(1.0 / (plan.f_drive_hz * dt))))
        win = state.window()
        p, v = win.pos, win.vel
        means = [np.zeros_like(p), np.zeros_like(p)]
        ke = np.zeros(p.shape[2])
        lz = np.zeros(p.shape[2])
        m = plan.masses[None, :, None]
        for j in range(2 * n):
            self.advance_block(win, stage, t + j * dt, dt, 1)
            means[j // n] += p / n
            ke += 0.5 * np.sum(m * v * v, axis=(0, 1)) / (2 * n)
            lz += np.sum(m[0] * (p[0] * v[1] - p[1] * v[0]), axis=0) / (2 * n)
        period = n * dt
        p_sec = 0.5 * (means[0] + means[1])
        v_sec = (means[1] - means[0]) / period
        out = observe(plan, p_sec, v_sec, t + period, win.lag_u, window_s=period, L_z=lz)
        # time-averaged kinetic energy of the micromotion: <KE> - KE(secular velocity)
        out["micromotion_ke_j"] = ke - 0.5 * np.sum(m * v_sec * v_sec, axis=(0, 1))
        return out


def _pin_coefficients(plan: Plan, te: np.ndarray, theta: np.ndarray | None = None):
    """C_p(t) = s_p(t) c_p exp(-i n_p (angle_p + theta(t))) at times te
    (``theta``: pinning angles to use instead of the schedule's)."""
    P = len(plan.pin_orders)
    if P == 0:
        z = np.zeros((len(te), 0))
        return z, z.copy()
    theta = plan.schedule.theta_rad(te) if theta is None else theta
    scales = plan.pin_scales(te)  # (E, P)
    ph = -plan.pin_orders[None, :] * (plan.pin_angle[None, :] + theta[:, None])
    amp = scales * plan.pin_strength[None, :] * plan.pin_is_multipole[None, :]
    return np.ascontiguousarray(amp * np.cos(ph)), np.ascontiguousarray(amp * np.sin(ph))


def _poly_coefficients(plan: Plan, te: np.ndarray, theta: np.ndarray | None = None) -> tuple:
    """The layout pinning terms' polynomial coefficients at times te: (exps, (E, J)), or None without such terms
    (``theta``: pinning angles to use instead of the schedule's)."""
    terms = [(p, t) for p, t in enumerate(plan.cfg.pinning) if t.layout is not None]
    if not terms:
        return None
    theta = plan.schedule.theta_rad(te) if theta is None else theta
    scales = plan.pin_scales(te)
    coef = 0.0
    for p, t in terms:
        coef = coef + t.layout.coefficients(theta + t.angle_rad, scales[:, p])
    return terms[0][1].layout.exps, np.ascontiguousarray(coef)


SERIES_VALUES = ("L_hbar", "lag_rad", "mode_n", "status")


def series_values(obs: dict, t: float, stage: str) -> dict:
    """What a time-series point needs of each trajectory (its statistics are
    taken later, :func:`series_point`, on the values of every part of a
    split run merged in index order)."""
    out = {k: obs[k] for k in SERIES_VALUES}
    out.update({"_t_s": t, "_stage": stage, "_mode_labels": list(obs["_modes"].labels)})
    return out


def series_point(values: dict) -> dict:
    """The ensemble statistics of one time-series point from the
    trajectories' values (:func:`series_values`)."""
    return _series_point(values, values["_t_s"], values["_stage"])


def _series_point(obs: dict, t: float, stage: str) -> dict:
    ok = usable(obs["status"])
    L = obs["L_hbar"][ok]
    lag = obs["lag_rad"][ok]
    e = obs["mode_n"][ok]
    return {"t_s": t, "stage": stage, "L_mean_hbar": float(np.mean(L)) if L.size else np.nan,
            "L_std_hbar": float(np.std(L, ddof=1)) if L.size > 1 else np.nan,
            "lag_mean_rad": float(np.mean(lag)) if lag.size else np.nan,
            "lag_std_rad": float(np.std(lag, ddof=1)) if lag.size > 1 else np.nan,
            "lag_absmax_rad": float(np.max(np.abs(lag))) if lag.size else np.nan,
            "mode_n_mean": np.nanmean(e, axis=0) if e.size else np.full(obs["mode_n"].shape[1], np.nan),
            "mode_labels": list(obs["_modes"].labels) if "_modes" in obs else list(obs["_mode_labels"])}
