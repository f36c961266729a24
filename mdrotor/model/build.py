"""Where a config meets the physics: its potential, crystal and pinning verdict.

Every command and the engine get these from here, so that a config's
crystal is built one way: the trap of the config (pseudopotential or the
Mathieu secular frequencies, species scaling, stray field), its pinning
terms at their schedule multipliers (in-plane multipoles, or a layout's
polynomial potential from :mod:`mdrotor.electrodes.polynomial`) and the
Coulomb interaction, as one :class:`mdrotor.physics.statics.Potential`;
its equilibrium and modes (:func:`mdrotor.physics.statics.compute_crystal`);
the pinning verdict of :func:`mdrotor.physics.pinning.assess` for the
config; and the trap's depth against an unbounded multipole.
"""

from __future__ import annotations

import numpy as np

from mdrotor.electrodes.polynomial import PolynomialPotential
from mdrotor.errors import PhysicsError
from mdrotor.physics.frame import on_axis
from mdrotor.physics.multipole import quadrupole_magnitude
from mdrotor.physics.pinning import K_B, N_PHI, Holding, assess, held_curve
from mdrotor.physics.statics import (
    SLOW_ROTATION_HZ,
    TWO_PI,
    Crystal,
    Potential,
    compute_crystal,
    find_equilibrium,
)
from mdrotor.physics.trap import check_rotation


# --------------------------------------------------------------------------
# From a config
# --------------------------------------------------------------------------
def model_potential(cfg, f_rot_hz: float = 0.0, *, theta_rad: float = 0.0, pin_scale=None) -> Potential:
    """The static potential of a config's crystal (SI).

    Parameters
    ----------
    cfg : mdrotor.config.parse.Config
    f_rot_hz : float
        Frame rotation (0: lab frame). When non-zero the in-plane anisotropy
        is rotation-averaged and the stray field dropped (both rotate in that
        frame; see module docstring); the pinning co-rotates.
    theta_rad : float
        Pinning orientation.
    pin_scale : sequence of float, optional
        Multiplier per pinning term (schedule value); default 1.
    """
    m, q = cfg.masses_kg, cfg.charges_c
    k = cfg.trap.spring_constants(m, q)
    stray = np.array(cfg.trap.stray_field_v_per_m, dtype=float)
    if f_rot_hz != 0.0:
        k[:, :2] = k[:, :2].mean(axis=1, keepdims=True)
        stray = np.zeros(3)
    scales = [1.0] * len(cfg.pinning) if pin_scale is None else list(pin_scale)
    mults = tuple((t.order, s * t.complex_coefficient(theta_rad)) for t, s in zip(cfg.pinning, scales)
                  if s * t.strength != 0.0 and t.layout is None)
    external = ()
    for t, s in zip(cfg.pinning, scales):
        if t.layout is not None:  # the electrodes' whole potential, every fitted order

            external += (PolynomialPotential(t.layout.exps, t.layout.coefficients(theta_rad + t.angle_rad, s)),)
    return Potential(m, q, k, stray, mults, TWO_PI * f_rot_hz, external)


def crystal_from_config(cfg, f_rot_hz: float | None = None, *, f_rot_key: str | None = None) -> Crystal:
    """Equilibrium and modes of the config's crystal at ``f_rot_hz``
    (default: the rotation at t = 0, ``rotation.f_start``), with the
    pinning at full configured strength and angle. A rotation the radial
    confinement cannot hold is refused naming ``f_rot_key`` (a command-line
    option, such as ``--f-rot``), else ``rotation.f_start`` or ``f_rot``."""
    f = cfg.f_start_hz if f_rot_hz is None else float(f_rot_hz)
    c2 = float(quadrupole_magnitude(cfg.pinning, np.ones(len(cfg.pinning))))
    if f_rot_key is not None:
        key, source = f_rot_key, "command line"
    else:
        key, source = ("rotation.f_start" if f_rot_hz is None else "f_rot"), cfg.source
    check_rotation(f, cfg.trap.max_rotation_hz(cfg.masses_kg, cfg.charges_c), key, source)
    check_rotation(f, cfg.trap.max_rotation_hz(cfg.masses_kg, cfg.charges_c, c2), key, source, quadrupole_v_per_m2=c2)
    try:
        return compute_crystal(model_potential(cfg, f), f, seed=cfg.search_seed)
    except PhysicsError as e:
        raise e.with_source(cfg.source)



# ---------------------------------------------------------------------------
# from a config
# ---------------------------------------------------------------------------
def config_terms(cfg, scales=None) -> list:
    """(order, strength x multiplier) of a config's pinning terms."""
    scales = [1.0] * len(cfg.pinning) if scales is None else list(scales)
    return [(t.order, s * t.strength) for t, s in zip(cfg.pinning, scales)]


def assess_config(cfg, f_rot_hz: float = 0.0, *, theta_rad: float = 0.0, scales=None, start=None,
                  n_phi: int = N_PHI, curve: bool = True) -> Holding:
    """:func:`assess` for a config's crystal rotating at ``f_rot_hz`` with the
    pinning at multipliers ``scales`` (default 1) and angle ``theta_rad``."""

    f = 0.0 if abs(f_rot_hz) < SLOW_ROTATION_HZ else float(f_rot_hz)
    scales = [1.0] * len(cfg.pinning) if scales is None else [float(s) for s in scales]
    pot_on = model_potential(cfg, f, theta_rad=theta_rad, pin_scale=scales)
    pot_off = model_potential(cfg, f, theta_rad=theta_rad, pin_scale=[0.0] * len(cfg.pinning))
    return assess(pot_on, pot_off, config_terms(cfg, scales), start=start, seed=cfg.search_seed, n_phi=n_phi, curve=curve)


def pinning_energy_harmonics(cfg, f_rot_hz: float = 0.0, *, max_order: int = 12, relaxed: bool = True,
                             scales=None, n_phi: int = N_PHI) -> dict:
    """Fourier amplitudes of the pinning energy versus the crystal angle.

    U(phi) = U_0 + sum_n Re[V_n e^{i n phi}] for the config's crystal (at
    ``f_rot_hz``, pinning multipliers ``scales``), relaxed (minimum-energy
    path) or rigid. Returns {n: V_n} in J (complex); |V_n| is the depth
    scale of the order-n wells (a pure cos(n phi) well of depth 2 |V_n|).
    """

    f = 0.0 if abs(f_rot_hz) < SLOW_ROTATION_HZ else float(f_rot_hz)
    pot = model_potential(cfg, f, pin_scale=scales)
    r0 = find_equilibrium(pot, seed=cfg.search_seed).positions_m
    if len(r0) < 2 or on_axis(r0, pot.masses_kg):
        return {n: 0j for n in range(1, max_order + 1)}
    return held_curve(pot, r0, n_phi=max(n_phi, 4 * max_order + 8), relaxed=relaxed).harmonics(max_order)


def escape_depth(cfg, scales=None) -> dict | None:
    """Depth of the trap against an unbounded pinning multipole.

    An in-plane multipole of order n >= 3 is unbounded below: Re[c z^n]
    falls as -c r^n along n directions. With the radial trap 1/2 k r^2
    (k = m w_r^2), one ion along such a valley sees
    U(r) = k r^2 / 2 - |Q| c r^n, a saddle at r* = (k / (n |Q| c))^(1/(n-2))
    of height (1/2 - 1/n) k r*^2 (Coulomb repulsion from the other ions
    lowers it further). An ion over it runs off along the valley, faster
    and faster: a non-finite trajectory. The preflight warns when the
    saddle is below :data:`BARRIER_KT_MIN` k_B T_initial.

    Returns the lowest saddle over ions and terms at multipliers ``scales``
    (default: each term's peak over the schedule): ``order``, ``term``,
    ``radius_m``, ``depth_j``, ``depth_k``; None without a term of order >= 3.
    """
    m, q = cfg.masses_kg, cfg.charges_c
    k = np.min(cfg.trap.omega_sq(m, q)[:, :2], axis=1) * m
    if scales is None:
        scales = [cfg.schedule.peak_pinning_scale(j) if cfg.schedule is not None else 1.0 for j in range(len(cfg.pinning))]
    best = None
    for j, (t, s) in enumerate(zip(cfg.pinning, scales)):
        c = abs(s * t.strength)
        if t.order < 3 or c == 0.0:
            continue
        r = (k / (t.order * np.abs(q) * c)) ** (1.0 / (t.order - 2))
        depth = (0.5 - 1.0 / t.order) * k * r * r
        i = int(np.argmin(depth))
        if best is None or depth[i] < best["depth_j"]:
            best = {"order": t.order, "term": j, "radius_m": float(r[i]), "depth_j": float(depth[i]),
                    "depth_k": float(depth[i] / K_B)}
    return best
