"""The quantum rotor of a config: statics, schedule, spin statistics, noise.

Builds the :class:`mdrotor.quantum_rotor.RotorModel` and its initial
thermal state from a :class:`mdrotor.config.Config`:

* the crystal without pinning, in frames rotating at a few rates up to the
  schedule's largest ``f_rot`` (rotation-averaged in-plane anisotropy, no
  stray field: what the rotating-frame statics keep, see
  :mod:`mdrotor.statics`): its moment of inertia about the centre of mass
  (the rotational energy, stretched with ``L`` unless ``stretch=False``)
  and its pinning moments;
* the pinning as Fourier components of the crystal's pinning energy versus
  its angle (:func:`_rigid_pinning_components`, the one place here that
  computes it), with the schedule's multipliers;
* the exchange-allowed ladder: the crystal's rotational symmetry (the
  largest ``N`` such that a turn by ``2 pi / N`` maps every ion onto an ion
  of the same species) and the permutation that turn makes: ``c`` cycles of
  ``N`` ions, of which those made of fermions contribute the sign
  ``(-1)^(N-1)`` each. Its rule is :func:`mdrotor.rotor.allowed_L_ladder`'s
  for one ring of ``N``, applied with the statistics of the whole
  permutation (fermionic if an odd number of fermion cycles, bosonic
  otherwise);
* angular-momentum diffusion of the config's noise
  (:meth:`mdrotor.noise.NoiseModel.rotor_diffusion`, per stage, at the
  schedule's ``f_rot``) as kicks of ``+-n`` quanta for an order-n multipole
  (``+-1`` for the uniform field);
* the initial state: Boltzmann-weighted eigenstates of the pinned rotor at
  the temperature that gives the libration mode of the statics its mean
  occupation from ``[initial]`` (:func:`mdrotor.sampling.mode_occupations`):
  ``1 / (k_B T) = ln(1 + 1/n) / (hbar w_lib)``, i.e. ``T`` itself when only
  a temperature is given.

Not in the model (said in ``notes``): the pinning's deformation of the
crystal (the rigid moments of the unpinned crystal are used), static
anisotropy and stray field, deterministic noise tones, and motion other
than the rotation (every other mode is taken as a spectator in a state
symmetric under the exchange, as the ladder requires).
"""

from __future__ import annotations

import math
import warnings
from dataclasses import dataclass, replace

import numpy as np
from scipy import constants as sc

from .errors import InputError, PhysicsError
from .quantum_rotor import (KickChannel, Ladder, PinningComponent, RotationalEnergy, RotorModel,
                            ThermalState)

HBAR = sc.hbar
KB = sc.k
TWO_PI = 2.0 * np.pi
MOMENT_REL = 1e-6        # a moment below this fraction of sum |Q| |z - z_c|^n counts as zero (as the engine)
SYMMETRY_REL = 1e-6      # positions equal within this fraction of the crystal's radius
STRETCH_NODES = 10
NOISE_NODES = 33         # rate samples per stage


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


# --------------------------------------------------------------------------
# crystals
# --------------------------------------------------------------------------
def _bare_potential(cfg, f_hz: float):
    """The crystal's potential without pinning in a frame rotating at f_hz
    (rotation-averaged anisotropy and no stray field also at f = 0)."""
    from .statics import model_potential

    pot = model_potential(cfg, f_hz, pin_scale=[0.0] * len(cfg.pinning))
    if f_hz == 0.0:
        k = pot.spring_n_per_m.copy()
        k[:, :2] = k[:, :2].mean(axis=1, keepdims=True)
        pot = replace(pot, spring_n_per_m=k, stray_field_v_per_m=np.zeros(3))
    return pot


def _centred(r: np.ndarray, m: np.ndarray):
    """In-plane complex positions about the centre of mass, and z."""
    z = r[:, 0] + 1j * r[:, 1]
    return z - np.sum(m * z) / np.sum(m), r[:, 2]


def _crystals(cfg, f_nodes_hz):
    """Equilibria without pinning at each rotation rate, turned to the first one's orientation."""
    from .statics import find_equilibrium

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
            z0, _ = _centred(out[0], m)
            z, _ = _centred(r, m)
            alpha = float(np.angle(np.sum(m * np.conj(z0) * z)))
            c, s = math.cos(-alpha), math.sin(-alpha)
            r = r @ np.array([[c, s, 0.0], [-s, c, 0.0], [0.0, 0.0, 1.0]])
        out.append(r)
        prev = r
    return out


def _inertia(r: np.ndarray, m: np.ndarray) -> float:
    z, _ = _centred(r, m)
    return float(np.sum(m * np.abs(z) ** 2))


# --------------------------------------------------------------------------
# symmetry and the allowed ladder
# --------------------------------------------------------------------------
def crystal_symmetry(positions_m, species) -> tuple[int, int, list]:
    """Rotational symmetry of a crystal about the axis through its centre of mass.

    Returns ``(N, cycles, orbits)``: the largest ``N`` such that a turn by
    ``2 pi / N`` maps every ion onto an ion of the same species (positions
    equal within ``SYMMETRY_REL`` of the crystal's radius), the number of
    cycles of the permutation it makes (ions on the axis are fixed points),
    and each cycle's species name. ``N = 1`` if there is no such turn.
    """
    r = np.asarray(positions_m, dtype=float)
    m = np.array([s.mass_kg for s in species])
    names = [s.name for s in species]
    z, zz = _centred(r, m)
    scale = float(np.max(np.abs(z))) if len(z) else 0.0
    if scale == 0.0:
        return 1, 0, []
    tol = SYMMETRY_REL * scale
    off = np.nonzero(np.abs(z) > tol)[0]
    for N in range(len(off), 1, -1):
        if len(off) % N:
            continue
        zr = z * np.exp(2j * math.pi / N)
        image = {}
        for i in off:
            d = np.abs(z[off] - zr[i]) + np.abs(zz[off] - zz[i])
            j = int(off[int(np.argmin(d))])
            if d.min() > tol or names[j] != names[i]:
                break
            image[int(i)] = j
        else:
            if len(set(image.values())) != len(off):
                continue
            seen, orbits = set(), []
            for i in off:
                if int(i) in seen:
                    continue
                k, n = int(i), 0
                while k not in seen:
                    seen.add(k)
                    k = image[k]
                    n += 1
                orbits.append(names[int(i)])
            return N, len(orbits), orbits
    return 1, 0, []


def allowed_ladder(positions_m, species) -> tuple[Ladder, int, int, str]:
    """The exchange-allowed ladder of a crystal (module docstring).

    Returns ``(ladder, N, cycles, statistics)``.
    """
    from .rotor import allowed_L_ladder

    N, cycles, orbits = crystal_symmetry(positions_m, species)
    if N == 1:
        return Ladder(1, 0), 1, 0, "distinguishable"
    stats = {s.name: s.statistics for s in species}
    if any(stats[o] not in ("boson", "fermion") for o in orbits):
        return Ladder(1, 0), N, cycles, "unknown"
    n_fermion = sum(1 for o in orbits if stats[o] == "fermion")
    stat = "fermion" if n_fermion % 2 else "boson"
    mod, res = allowed_L_ladder(N, stat, identical=True)
    return Ladder(int(mod), int(res)), N, cycles, stat


# --------------------------------------------------------------------------
# PINNING ENERGY VERSUS THE CRYSTAL'S ANGLE (rigid moments).
# A shared pinning module (moments about the centre of mass, the relaxed
# held curve) is to own this fact; until it exists, this is the one place
# where the quantum model computes it.
# --------------------------------------------------------------------------
def _moment_ratio(z: np.ndarray, charges: np.ndarray, n: int):
    """``M_n = sum Q (z - z_c)^n`` and ``|M_n| / sum |Q| |z - z_c|^n``."""
    mn = complex(np.sum(charges * z**n))
    ref = float(np.sum(np.abs(charges) * np.abs(z) ** n))
    return mn, (abs(mn) / ref if ref > 0 else 0.0)


def _rigid_pinning_components(cfg, crystals, f_nodes_hz, ladder: Ladder):
    """Fourier components of the rigid crystal's pinning energy, per term.

    A term ``Phi = Re[c e^{-i n (theta_0 + theta)} (x + i y)^n]`` on the
    crystal turned by ``phi`` has energy ``Re[c M_n e^{-i n theta_0}
    e^{i n (phi - theta)}]`` (:mod:`mdrotor.multipole`), ``M_n`` the moment
    about the centre of mass of the crystal at ``phi = 0``: one component of
    order ``n``, amplitude ``c M_n e^{-i n theta_0}``, first order in the
    multiplier. Terms whose moment is below ``MOMENT_REL`` at every node
    are left out (a regular N-gon feels only orders that are multiples of
    N), with a note.
    """
    m, q = cfg.masses_kg, cfg.charges_c
    comps, notes = [], []
    for j, term in enumerate(cfg.pinning):
        n = int(term.order)
        amps, rel = [], []
        for r in crystals:
            z, _ = _centred(r, m)
            mn, ratio = _moment_ratio(z, q, n)
            amps.append(term.strength * mn * np.exp(-1j * n * term.angle_rad))
            rel.append(ratio)
        if max(rel) <= MOMENT_REL:
            notes.append(f"pinning term {term.name!r} (order {n}) has no moment on the rigid crystal "
                         f"(|M_{n}| / sum |Q| r^{n} = {max(rel):.1e}); left out")
            continue
        if n % ladder.spacing:
            raise PhysicsError(f"pinning.{term.name}", f"order {n} has a moment on the crystal but is not a "
                               f"multiple of its symmetry's ladder spacing {ladder.spacing}", cfg.source)
        comps.append(PinningComponent(n, tuple(complex(a) for a in amps),
                                      tuple(float(f) for f in f_nodes_hz) if len(f_nodes_hz) > 1 else (),
                                      term=j, power=1))
    return tuple(comps), notes


# --------------------------------------------------------------------------
# noise
# --------------------------------------------------------------------------
def _kick_channels(cfg, f_nodes_hz, crystals, ladder: Ladder):
    from .noise import model_from_config

    notes = []
    model = model_from_config(cfg)
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
            z, _ = _centred(pos, m)
            for order, dc in d.items():
                if order == "total":
                    continue
                mom_ratio = _moment_ratio(z, q, int(order))[1]
                rate = dc.D_hbar2_per_s / int(order) ** 2 if mom_ratio > MOMENT_REL else 0.0
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


def _check_shape(cfg, bare: np.ndarray, grid: np.ndarray) -> None:
    """Refuse when the pinning changes the crystal's configuration.

    The crystal at the schedule's strongest pinning is compared with the
    unpinned one: the ions' distances from the centre of mass, sorted, may
    differ by at most ``SHAPE_REL`` of the radius (a deformation), else the
    rigid rotor does not describe the crystal (e.g. three ions that are a
    string while pinned and a triangle when free).
    """
    from .statics import find_equilibrium, model_potential

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
    rb = np.sort(np.abs(_centred(bare, m)[0]))
    rp = np.sort(np.abs(_centred(pinned, m)[0]))
    dev = float(np.max(np.abs(rb - rp)) / max(rb.max(), 1e-300))
    if dev > SHAPE_REL:
        raise PhysicsError("pinning", f"the pinning changes the crystal's configuration (ions move by {dev:.0%} of "
                           f"its radius at t = {t_star * 1e3:.4g} ms against the unpinned crystal): the rigid "
                           "quantum rotor does not describe it", cfg.source)


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
    cfg : mdrotor.config.Config
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
    from .sampling import mode_occupations
    from .statics import compute_crystal, model_potential

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
    I_nodes = np.array([_inertia(r, m) for r in crystals])
    I0 = float(I_nodes[0])
    if not I0 > 0:
        raise PhysicsError("crystal", "the ions lie on the rotation axis (moment of inertia 0): the crystal "
                           "has no rotation of its own", src)
    energy = (RotationalEnergy(I0, tuple(float(x) for x in (TWO_PI * f_nodes) ** 2), tuple(float(x) for x in I_nodes))
              if len(f_nodes) > 1 else RotationalEnergy(I0))
    ladder, N, cycles, stat = allowed_ladder(crystals[0], cfg.species)
    if stat == "unknown":
        notes.append("the exchange statistics of a species is unknown: every L allowed")
    comps, pin_notes = _rigid_pinning_components(cfg, crystals, f_nodes, ladder)
    notes += pin_notes
    grid = np.linspace(0.0, sched.duration_s, 2001)
    pin_on = [np.max(np.abs(sched.pinning_scale(grid, j))) * abs(t.strength) > 0 for j, t in enumerate(cfg.pinning)]
    if any(pin_on) and not comps:
        raise PhysicsError("pinning", "no pinning term has a first-order moment on this crystal (it is held only "
                           "through its deformation, or not at all); the rigid quantum rotor needs a moment",
                           src)
    if any(pin_on):
        _check_shape(cfg, crystals[0], grid)
    kicks, noise_notes = _kick_channels(cfg, f_nodes, crystals, ladder) if cfg.noise else ((), [])
    notes += noise_notes
    model = RotorModel(ladder, energy, sched, comps, kicks)
    notes.append("rigid rotor: the pinning's deformation of the crystal and motion other than the rotation "
                 "are left out; static anisotropy and stray field are rotation-averaged")

    # initial state: the libration's occupation at t = 0 -> temperature
    f0 = float(sched.f_rot_hz(0.0))
    scales0 = [float(sched.pinning_scale(0.0, j)) for j in range(len(cfg.pinning))]
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        try:
            cr0 = compute_crystal(model_potential(cfg, f0, pin_scale=scales0), f0, seed=cfg.search_seed)
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
        beta = 1.0 / (KB * ini.temperature_k) if ini.temperature_k > 0 else math.inf
        if any(sel == "libration" for sel, _ in ini.occupations):
            notes.append("the crystal is not pinned at t = 0: the libration occupation is not used")
    temp = 0.0 if math.isinf(beta) else 1.0 / (KB * beta)
    return QuantumSetup(model, ThermalState(beta, cut), I0, N, cycles, stat, f_lib, _libration_of_model(model),
                        nbar, temp, tuple(notes))
