"""The quantum rotor of a config: statics, schedule, spin statistics, noise.

Builds the :class:`mdrotor.physics.quantum_rotor.RotorModel` and its initial
thermal state from a :class:`mdrotor.config.parse.Config`:

* the crystal without pinning, in frames rotating at a few rates up to the
  schedule's largest ``f_rot`` (rotation-averaged in-plane anisotropy, no
  stray field: what the rotating-frame statics keep, see
  :mod:`mdrotor.physics.statics`): its moment of inertia about the centre of mass
  (the rotational energy, stretched with ``L`` unless ``stretch=False``)
  and its pinning moments;
* the pinning as Fourier components of the crystal's pinning energy versus
  its angle: the relaxed held curve of :mod:`mdrotor.physics.pinning` (every other
  coordinate relaxed at each angle, so a crystal held only through its
  deformation is held here too), per pinning term at full strength and at
  each rotation rate, scaled by the schedule's multiplier to the power
  that the curve itself shows between full and half strength (1 for a
  first-order moment, 3 for a triangle under a quadrupole);
* the exchange-allowed ladder of the unpinned crystal at rest
  (:func:`mdrotor.physics.rotor.allowed_L_ladder`, the one owner of the rule; also
  :func:`config_ladder`, which ``mdrotor rotor`` and the report use);
* angular-momentum diffusion of the config's noise
  (:meth:`mdrotor.physics.noise.NoiseModel.rotor_diffusion`, per stage, at the
  schedule's ``f_rot``) as kicks of ``+-n`` quanta for an order-n multipole
  (``+-1`` for the uniform field);
* the initial state: Boltzmann-weighted eigenstates of the pinned rotor at
  the temperature that gives the libration mode of the statics its mean
  occupation from ``[initial]`` (:func:`mdrotor.physics.statics.mode_occupations`):
  ``1 / (k_B T) = ln(1 + 1/n) / (hbar w_lib)``, i.e. ``T`` itself when only
  a temperature is given.

Not in the model (said in ``notes``): the pinning's deformation of the
moment of inertia (the unpinned crystal's is used), cross terms between
different pinning terms, static anisotropy and stray field, deterministic
noise tones, and motion other than the rotation (every other mode is taken
as a spectator in a state symmetric under the exchange, as the ladder
requires). A crystal whose configuration the pinning changes is refused.
"""

from __future__ import annotations

import math
import warnings
from dataclasses import dataclass, replace

import numpy as np

from mdrotor.errors import InputError, PhysicsError
from mdrotor.model.build import assess_config, model_potential
from mdrotor.physics import frame, pinning
from mdrotor.physics.constants import HBAR, K_B
from mdrotor.physics.noise import moment_vanishes
from mdrotor.physics.quantum_rotor import (
    KickChannel,
    Ladder,
    PinningComponent,
    RotationalEnergy,
    RotorModel,
    ThermalState,
)
from mdrotor.physics.rotor import allowed_L_ladder
from mdrotor.physics.statics import compute_crystal, find_equilibrium, mode_occupations

TWO_PI = 2.0 * np.pi
STRETCH_NODES = 10
NOISE_NODES = 33         # rate samples per stage
MAX_HARMONIC = 24        # highest order of the held curve's energy kept
HARMONIC_REL = 1e-4      # harmonics below this fraction of the largest are the curve's noise
OFF_LADDER_REL = 1e-2    # a harmonic off the allowed ladder above this fraction is an inconsistency


@dataclass(frozen=True)
class QuantumSetup:
    """A config's quantum rotor and what it was built from.

    Attributes
    ----------
    model : RotorModel
    initial : ThermalState
    I0_kg_m2 : float
        Moment of inertia at rest about the centre of mass.
    symmetry_order, cycles : int
        A turn by ``2 pi / symmetry_order`` maps the crystal onto itself,
        permuting its ions in ``cycles`` cycles.
    statistics : str
        "boson", "fermion" (the sign of that permutation), "distinguishable"
        (no symmetry) or "unknown".
    f_lib_hz : float or None
        Libration normal mode of the pinned crystal at t = 0 (statics).
    f_lib_model_hz : float or None
        Libration of the rigid rotor's well at t = 0 (harmonic).
    nbar_libration : float or None
        Mean occupation of the libration at t = 0 from ``[initial]``.
    temperature_k : float
        ``1 / (k_B beta)`` of the initial state (0: ground state).
    notes : tuple of str
    holding : str or None
        :meth:`mdrotor.physics.pinning.Holding.describe` at the strongest pinning.
    """

    model: RotorModel
    initial: ThermalState
    I0_kg_m2: float
    symmetry_order: int
    cycles: int
    statistics: str
    f_lib_hz: float | None
    f_lib_model_hz: float | None
    nbar_libration: float | None
    temperature_k: float
    notes: tuple
    holding: str | None = None


# --------------------------------------------------------------------------
# crystals
# --------------------------------------------------------------------------
def _bare_potential(cfg, f_hz: float):
    """The crystal's potential without pinning in a frame rotating at f_hz
    (rotation-averaged anisotropy and no stray field also at f = 0)."""

    pot = model_potential(cfg, f_hz, pin_scale=[0.0] * len(cfg.pinning))
    if f_hz == 0.0:
        k = pot.spring_n_per_m.copy()
        k[:, :2] = k[:, :2].mean(axis=1, keepdims=True)
        pot = replace(pot, spring_n_per_m=k, stray_field_v_per_m=np.zeros(3))
    return pot


def _crystals(cfg, f_nodes_hz):
    """Equilibria without pinning at each rotation rate, turned to the first one's orientation."""

    m = cfg.masses_kg
    out = []
    prev = None
    for f in f_nodes_hz:
        pot = _bare_potential(cfg, float(f))
        try:
            eq = find_equilibrium(pot, seed=cfg.search_seed, start=prev)
        except PhysicsError as e:
            raise e.with_source(cfg.source)
        r = eq.positions_m
        if out:
            r = frame.rotate_positions(r, -frame.alignment_angle_of(out[0], r, m))
        out.append(r)
        prev = r
    return out


def config_ladder(cfg):
    """The exchange-allowed ladder of a config's crystal.

    :func:`mdrotor.physics.rotor.allowed_L_ladder` of the crystal without pinning at
    rest (rotation-averaged anisotropy, no stray field), the free rotor whose
    symmetry the ladder describes; the same crystal :func:`build` takes.
    Returns a :class:`mdrotor.physics.rotor.ExchangeLadder`.
    """

    return allowed_L_ladder(_crystals(cfg, [0.0])[0], cfg.species)


# --------------------------------------------------------------------------
# pinning: harmonics of the relaxed held curve (mdrotor.physics.pinning)
# --------------------------------------------------------------------------
def _curve_harmonics(cfg, f_hz: float, scales, reference: np.ndarray) -> dict:
    """{k: A_k} (J) of the held curve at ``f_hz`` and multipliers ``scales``,
    referred to the crystal angle of ``reference`` (the unpinned crystal):
    the curve's angle is measured from the pinned equilibrium, turned by
    ``alpha`` from the reference, so ``A_k = V_k e^{-i k alpha}``."""

    pot = model_potential(cfg, f_hz, pin_scale=list(scales))
    try:
        r0 = find_equilibrium(pot, start=reference).positions_m
    except PhysicsError as e:
        raise e.with_source(cfg.source)
    alpha = frame.alignment_angle_of(reference, r0, cfg.masses_kg)
    h = pinning.held_curve(pot, r0, n_phi=max(pinning.N_PHI, 4 * MAX_HARMONIC + 8)).harmonics(MAX_HARMONIC)
    return {k: v * np.exp(-1j * k * alpha) for k, v in h.items()}


def _pinning_components(cfg, crystals, f_nodes_hz, ladder: Ladder):
    """Fourier components of each pinning term's held curve (module docstring)."""
    comps, notes = [], []
    n_terms = len(cfg.pinning)
    for j, term in enumerate(cfg.pinning):
        unit = [1.0 if i == j else 0.0 for i in range(n_terms)]
        half = [0.5 if i == j else 0.0 for i in range(n_terms)]
        table = [_curve_harmonics(cfg, float(f), unit, r) for f, r in zip(f_nodes_hz, crystals)]
        big = max((abs(v) for h in table for v in h.values()), default=0.0)
        if big == 0.0:
            notes.append(f"pinning term {term.name!r} does not change the crystal's energy with its angle; left out")
            continue
        h_half = _curve_harmonics(cfg, float(f_nodes_hz[0]), half, crystals[0])
        for k in range(1, MAX_HARMONIC + 1):
            amps = np.array([h[k] for h in table])
            if np.max(np.abs(amps)) <= HARMONIC_REL * big:
                continue
            if k % ladder.spacing:
                if np.max(np.abs(amps)) > OFF_LADDER_REL * big:
                    raise PhysicsError(f"pinning.{term.name}", f"the held curve has an order-{k} harmonic, off the "
                                       f"crystal's allowed ladder (spacing {ladder.spacing})", cfg.source)
                continue
            # the power of the multiplier: the curve at half strength
            ratio = abs(table[0][k]) / max(abs(h_half[k]), 1e-300)
            power = int(np.clip(round(math.log2(ratio)), 1, 8)) if ratio > 1.0 else 1
            comps.append(PinningComponent(k, tuple(complex(a) for a in amps),
                                          tuple(float(f) for f in f_nodes_hz) if len(f_nodes_hz) > 1 else (),
                                          term=j, power=power))
    return tuple(comps), notes


# --------------------------------------------------------------------------
# noise
# --------------------------------------------------------------------------
def _kick_channels(cfg, f_nodes_hz, crystals, ladder: Ladder):
    notes = []
    model = cfg.noise
    if model.tones:
        notes.append("deterministic noise tones are not in the quantum model")
    if not model.sources:
        return (), notes
    sched = cfg.schedule
    m, q = cfg.masses_kg, cfg.charges_c
    nodes = np.asarray(f_nodes_hz, dtype=float)
    stacked = np.stack(crystals)                              # (F, N, 3)
    t_all, rates = [], {}
    for st, ta, tb in zip(sched.stages, sched.boundaries_s[:-1], sched.boundaries_s[1:]):
        tn = np.linspace(ta, tb, NOISE_NODES + 1)
        tm = 0.5 * (tn[:-1] + tn[1:])
        t_all.append(tn[:-1])
        for t in tm:
            f = abs(float(sched.f_rot_hz(t)))
            if len(nodes) > 1:
                k = int(np.clip(np.searchsorted(nodes, f) - 1, 0, len(nodes) - 2))
                w = float(np.clip((f - nodes[k]) / (nodes[k + 1] - nodes[k]), 0.0, 1.0))
                pos = (1 - w) * stacked[k] + w * stacked[k + 1]
            else:
                pos = stacked[0]
            d = model.rotor_diffusion(pos, m, q, f, st.name)
            for order, dc in d.items():
                if order == "total":
                    continue
                zero = moment_vanishes(pos, m, q, int(order))
                rate = 0.0 if zero else dc.D_hbar2_per_s / int(order) ** 2
                rates.setdefault(int(order), []).append(rate)
    t_nodes = tuple(float(x) for x in np.r_[np.concatenate(t_all), sched.duration_s])
    chans = []
    for order, r in sorted(rates.items()):
        r = np.asarray(r)
        if not np.any(r > 0):
            continue
        if order % ladder.spacing:
            raise PhysicsError("noise", f"order-{order} noise exerts a torque on the crystal but kicks by "
                               f"{order} quanta, off its ladder spacing {ladder.spacing}", cfg.source)
        label = "uniform field" if order == 1 else f"order-{order} multipole"
        chans.append(KickChannel(order, t_nodes, tuple(float(x) for x in r), label))
    return tuple(chans), notes


SHAPE_REL = 0.05        # the pinning may move ions by at most this fraction of the crystal's radius


def _check_shape(cfg, bare: np.ndarray, grid: np.ndarray):
    """Refuse when the pinning changes the crystal's configuration.

    The crystal at the schedule's strongest pinning is compared with the
    unpinned one: the ions' distances from the centre of mass, sorted, may
    differ by at most ``SHAPE_REL`` of the radius (a deformation), else the
    rigid rotor does not describe the crystal (e.g. three ions that are a
    string while pinned and a triangle when free). Returns that time and
    the pinned crystal.
    """

    sched = cfg.schedule
    scales = np.stack([np.abs(sched.pinning_scale(grid, j)) * abs(t.strength)
                       for j, t in enumerate(cfg.pinning)], axis=-1)
    k = int(np.argmax(np.sum(scales / np.maximum(scales.max(axis=0), 1e-300), axis=1)))
    t_star = float(grid[k])
    f = float(sched.f_rot_hz(t_star))
    pot = model_potential(cfg, f, theta_rad=float(sched.theta_rad(t_star)),
                          pin_scale=[float(sched.pinning_scale(t_star, j)) for j in range(len(cfg.pinning))])
    try:
        pinned = find_equilibrium(pot, seed=cfg.search_seed).positions_m
    except PhysicsError as e:
        raise e.with_source(cfg.source)
    m = cfg.masses_kg
    rb = np.sort(np.abs(frame.complex_xy(bare, m)))
    rp = np.sort(np.abs(frame.complex_xy(pinned, m)))
    dev = float(np.max(np.abs(rb - rp)) / max(rb.max(), 1e-300))
    if dev > SHAPE_REL:
        raise PhysicsError("pinning", f"the pinning changes the crystal's configuration (ions move by {dev:.0%} of "
                           f"its radius at t = {t_star * 1e3:.4g} ms against the unpinned crystal): the rigid "
                           "quantum rotor does not describe it", cfg.source)
    return t_star, pinned


# --------------------------------------------------------------------------
# the whole setup
# --------------------------------------------------------------------------
def _libration_of_model(model: RotorModel) -> float | None:
    """Harmonic libration frequency (Hz) of the rotor's well at t = 0."""
    a = model.amplitudes(np.array(0.0))
    if not np.any(a != 0):
        return None
    k = model.orders.astype(float)
    phi = np.linspace(0.0, TWO_PI, 4096, endpoint=False)
    V = np.real(np.exp(1j * np.outer(phi, k)) @ a)
    i = int(np.argmin(V))
    p0 = phi[i]
    for _ in range(30):                                   # Newton on V'(phi) = 0
        e = np.exp(1j * k * p0)
        d1 = float(np.real(1j * k * a * e).sum())
        d2 = float(np.real(-(k**2) * a * e).sum())
        if d2 <= 0:
            break
        p0 -= d1 / d2
        if abs(d1 / d2) < 1e-15:
            break
    d2 = float(np.real(-(k**2) * a * np.exp(1j * k * p0)).sum())
    I = float(model.energy.moment_of_inertia(model.omega_frame(0.0)))
    return math.sqrt(max(d2, 0.0) / I) / TWO_PI


def build(cfg, *, stretch: bool = True, cut: float = 1e-4) -> QuantumSetup:
    """The quantum rotor of a config (module docstring).

    Parameters
    ----------
    cfg : mdrotor.config.parse.Config
    stretch : bool
        Stretch the rotor's moment of inertia with L (centrifugal); False
        keeps the moment of inertia at rest.
    cut : float
        Boltzmann weight left out of the initial thermal state.

    Raises
    ------
    InputError, PhysicsError
        No schedule, one ion, ions on the rotation axis, electrode-layout
        pinning (not supported by the quantum model), rotation faster than
        the confinement.
    """

    src = cfg.source
    sched = cfg.schedule
    if sched is None:
        raise InputError("stage", "the quantum rotor follows a schedule: give at least one [[stage]]", src)
    if cfg.n_ions < 2:
        raise PhysicsError("crystal.ions", "one ion has no rotation of its own (moment of inertia 0 about its "
                           "centre of mass): the quantum rotor needs 2 ions or more", src)
    for t in cfg.pinning:
        if t.layout is not None:
            raise InputError(f"pinning.{t.name}.layout", "the quantum rotor takes multipole pinning only; "
                             "electrode-layout pinning is not supported yet (remove 'layout')", src)
    notes = []
    m = cfg.masses_kg
    f_max = float(sched.max_f_rot_hz())
    w2 = cfg.trap.omega_sq(m, cfg.charges_c)
    f_lim = math.sqrt(float(np.min(w2[:, :2]))) / TWO_PI
    if stretch and f_max > 0:
        f_top = min(1.2 * f_max, 0.95 * f_lim)
        f_nodes = np.sqrt(np.linspace(0.0, f_top**2, STRETCH_NODES))
    else:
        f_nodes = np.zeros(1)
    crystals = _crystals(cfg, f_nodes)
    I_nodes = np.array([frame.moment_of_inertia(r, m, about="com") for r in crystals])
    I0 = float(I_nodes[0])
    if not I0 > 0:
        raise PhysicsError("crystal", "the ions lie on the rotation axis (moment of inertia 0): the crystal "
                           "has no rotation of its own", src)
    energy = (RotationalEnergy(I0, tuple(float(x) for x in (TWO_PI * f_nodes) ** 2), tuple(float(x) for x in I_nodes))
              if len(f_nodes) > 1 else RotationalEnergy(I0))
    ex = allowed_L_ladder(crystals[0], cfg.species)
    ladder, N, cycles, stat = Ladder(ex.modulus, ex.residue), ex.symmetry_order, ex.cycles, ex.statistics
    if stat == "unknown":
        notes.append("the exchange statistics of a species is unknown: every L allowed")
    grid = np.linspace(0.0, sched.duration_s, 2001)
    pin_on = [np.max(np.abs(sched.pinning_scale(grid, j))) * abs(t.strength) > 0 for j, t in enumerate(cfg.pinning)]
    holding = pinned = None
    if any(pin_on):
        t_star, pinned = _check_shape(cfg, crystals[0], grid)
        holding = assess_config(cfg, float(sched.f_rot_hz(t_star)), curve=False, start=pinned,
                                        theta_rad=float(sched.theta_rad(t_star)),
                                        scales=[float(sched.pinning_scale(t_star, j)) for j in range(len(cfg.pinning))])

    comps, pin_notes = _pinning_components(cfg, crystals, f_nodes, ladder) if any(pin_on) else ((), [])
    notes += pin_notes
    kicks, noise_notes = _kick_channels(cfg, f_nodes, crystals, ladder) if cfg.noise else ((), [])
    notes += noise_notes
    model = RotorModel(ladder, energy, sched, comps, kicks)
    notes.append("rigid rotor with the unpinned crystal's moment of inertia (while pinned, the crystal's own is "
                 "larger by the pinning's deformation, and so is its mean L); motion other than the rotation left "
                 "out; static anisotropy and stray field rotation-averaged")

    # initial state: the libration's occupation at t = 0 -> temperature
    f0 = float(sched.f_rot_hz(0.0))
    scales0 = [float(sched.pinning_scale(0.0, j)) for j in range(len(cfg.pinning))]
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        try:
            # the pinned crystal is the unpinned one's configuration (checked above): a start for the relaxation
            cr0 = compute_crystal(model_potential(cfg, f0, pin_scale=scales0), f0, seed=cfg.search_seed, start=pinned)
        except PhysicsError as e:
            raise e.with_source(src)
    ini = cfg.initial
    f_lib = nbar = None
    if "libration" in cr0.modes.labels and comps:
        k = cr0.modes.labels.index("libration")
        f_lib = float(cr0.modes.freq_hz[k])
        nbar = float(mode_occupations(cr0.modes, ini.temperature_k, ini.occupations, wigner=True)[k])
        beta = math.log1p(1.0 / nbar) / (HBAR * TWO_PI * f_lib) if nbar > 0 else math.inf
    else:
        beta = 1.0 / (K_B * ini.temperature_k) if ini.temperature_k > 0 else math.inf
        if any(sel == "libration" for sel, _ in ini.occupations):
            notes.append("the crystal is not pinned at t = 0: the libration occupation is not used")
    temp = 0.0 if math.isinf(beta) else 1.0 / (K_B * beta)
    return QuantumSetup(model, ThermalState(beta, cut), I0, N, cycles, stat, f_lib, _libration_of_model(model),
                        nbar, temp, tuple(notes), holding.describe() if holding is not None else None)
