"""``mdrotor crystal``: equilibrium, normal modes and pinning verdict of a config's crystal, as text or JSON."""

from __future__ import annotations

import json
import sys
import warnings

import numpy as np

from mdrotor import units
from mdrotor.commands.common import add_common
from mdrotor.config.parse import load_config
from mdrotor.model.build import assess_config, crystal_from_config
from mdrotor.numfmt import jsonable
from mdrotor.physics.constants import K_B
from mdrotor.physics.pinning import MOMENT_REL
from mdrotor.version import __version__


def add_parser(subparsers, help_text: str):
    """Add ``mdrotor crystal`` to the command line's subparsers."""
    p = subparsers.add_parser("crystal", help=help_text)
    p.add_argument("config", help="run config (TOML)")
    p.add_argument("--f-rot", default=None, metavar="FREQ", help="rotation frequency, e.g. '150 kHz' (default: rotation.f_start)")
    add_common(p)
    return p


TWO_PI = 2.0 * np.pi


def _pin_notes(cfg, cr, holding) -> list[str]:
    """Notes on pinning orders that find no first-order moment on the crystal."""
    notes = []
    if holding is None:
        return notes
    n = cr.positions_m.shape[0]
    for t in cfg.pinning:
        rel = holding.moments_rel.get(t.order)
        if rel is not None and rel <= MOMENT_REL and n > 1 and holding.reason.find("axis") < 0:
            why = ("a pair of identical ions has no odd moment" if n == 2
                   else f"a regular {n}-gon of identical ions has moments only at orders that are multiples of {n}")
            notes.append(f"order {t.order} finds no moment on this crystal without the pinning ({why})")
    return notes


def crystal_json(cfg, cr, holding) -> dict:
    """JSON-ready description of a crystal, with what it takes to reproduce it."""
    trap_hz = (np.sqrt(cfg.trap.omega_sq(cfg.masses_kg[:1], cfg.charges_c[:1]))[0] / TWO_PI).tolist()
    out = {
        "mdrotor_version": __version__,
        "config": cfg.source,
        "n_ions": int(cr.positions_m.shape[0]),
        "species": [s.name for s in cfg.species],
        "positions_m": cr.positions_m.tolist(),
        "masses_kg": cfg.masses_kg.tolist(),
        "charges_c": cfg.charges_c.tolist(),
        "trap_freqs_hz": trap_hz,
        "stray_field_v_per_m": list(cfg.trap.stray_field_v_per_m),
        "pinning": [{"name": t.name, "order": t.order, "coefficient_si": t.strength, "angle_rad": t.angle_rad,
                     "convention": "Phi = Re[c (x + i y)^n exp(-i n angle)], c in V/m^n"} for t in cfg.pinning],
        "f_rot_hz": cr.f_rot_hz,
        "frame": "rotating" if cr.f_rot_hz else "lab",
        "frame_f_rot_hz": float(cr.f_rot_hz) if cr.f_rot_hz else 0.0,
        "energy_j": cr.energy_j,
        "moment_of_inertia_kg_m2": cr.moment_of_inertia_kg_m2,
        "hbar_over_I_hz": cr.hbar_over_I_hz,  # None for one ion: no rotor
        "L_hbar": cr.L_hbar,
        "nearest_distance_m": cr.nearest_distances_m().tolist(),
        "modes": [{"freq_hz": float(f), "label": lab, "kind": k, "plane": p}
                  for f, lab, k, p in zip(cr.modes.freq_hz, cr.modes.labels, cr.modes.kinds, cr.modes.planes)],
        "warnings": list(cr.warnings),
    }
    if holding is not None:
        out["pinning_verdict"] = holding.to_dict()
        out["libration_hz"] = holding.f_lib_hz
        out["max_angular_acceleration_rad_s2"] = holding.alpha_max_rad_s2
        out["pinned_by_order"] = {str(t.order): bool(holding.verdict == "pinned" and holding.order == t.order)
                                  for t in cfg.pinning}
        out["notes"] = _pin_notes(cfg, cr, holding)
    return out


def crystal_text(cfg, cr, holding) -> str:
    """Human-readable crystal report."""
    lines = []
    n = cr.positions_m.shape[0]
    frame = f"rotating frame, {cr.f_rot_hz / 1e3:.6g} kHz" if cr.f_rot_hz else "lab frame"
    lines.append(f"crystal of {n} ion(s) ({', '.join(sorted(set(s.name for s in cfg.species)))}) in the {frame}")
    lines.append(f"config: {cfg.source}")
    f = np.sqrt(cfg.trap.omega_sq(cfg.masses_kg[:1], cfg.charges_c[:1]))[0] / TWO_PI
    lines.append(f"trap ({cfg.trap.model}): secular x, y, z = {f[0] / 1e3:.6g}, {f[1] / 1e3:.6g}, {f[2] / 1e3:.6g} kHz")
    lines.append("")
    lines.append("  ion   species        x (um)      y (um)      z (um)   nearest (um)")
    dmin = cr.nearest_distances_m()
    for i, (r, s) in enumerate(zip(cr.positions_m, cfg.species)):
        lines.append(f"  {i:3d}   {s.name:<10s} {r[0] * 1e6:11.4f} {r[1] * 1e6:11.4f} {r[2] * 1e6:11.4f}   {dmin[i] * 1e6:10.4f}")
    lines.append("")
    I = cr.moment_of_inertia_kg_m2
    lines.append(f"moment of inertia about z   I = {I:.6e} kg m^2")
    if cr.hbar_over_I_hz is not None:
        lines.append(f"rotational constant         hbar/(2 pi I) = {cr.hbar_over_I_hz:.6g} Hz")
        lines.append(f"angular momentum at f_rot   L = {cr.L_hbar:.6g} hbar")
    else:
        lines.append("  (one ion, or all ions on the rotation axis: no rotation about z, no rotor quantities)")
    lines.append(f"potential energy            {cr.energy_j:.6e} J")
    lines.append("")
    lines.append(f"  modes ({frame}):")
    lines.append("  mode   freq (kHz)   label              kind           plane")
    for k, (fr, lab, kind, pl) in enumerate(zip(cr.modes.freq_hz, cr.modes.labels, cr.modes.kinds, cr.modes.planes)):
        lines.append(f"  {k:4d}   {fr / 1e3:10.4f}   {lab:<18s} {kind:<14s} {pl}")
    if cr.modes.zero_axes:
        free = " and ".join(cr.modes.zero_axes)
        lines.append(f"  (the turn{'s' if len(cr.modes.zero_axes) > 1 else ''} about {free}: free zero mode"
                     f"{'s' if len(cr.modes.zero_axes) > 1 else ''} of the trap's symmetry, not listed"
                     + ("; the one about z is reported as L)" if "z" in cr.modes.zero_axes else ")"))
    if cr.modes.n_neutral:
        lines.append(f"  ({cr.modes.n_neutral} direction(s) flat within the numerical resolution, not listed)")
    if holding is not None:
        lines.append("")
        for t in cfg.pinning:
            lines.append(f"pinning {t.name}: order {t.order}, c = {t.strength:.4g} V/m^{t.order}; "
                         f"|M_{t.order}| / sum|Q| r^{t.order} = {holding.moments_rel.get(t.order, 0.0):.3g} "
                         f"on the crystal without the pinning")
        lines.append(f"verdict: {holding.describe()}")
        if holding.held:
            lines.append(f"libration frequency (relaxed crystal)   {holding.f_lib_hz / 1e3:.6g} kHz"
                         f"   (rigid crystal {holding.f_lib_rigid_hz / 1e3:.6g} kHz)")
            alpha = holding.alpha_max_rad_s2
            lines.append(f"largest angular acceleration before a slip   {alpha:.4e} rad/s^2"
                         f" (an f_rot ramp of {alpha / TWO_PI / 1e6:.4g} kHz/ms)")
            lines.append(f"pinning barrier   {holding.barrier_j / K_B * 1e3:.4g} mK x k_B")
        for note in _pin_notes(cfg, cr, holding):
            lines.append(f"note: {note}")
    return "\n".join(lines)


def main(args) -> int:
    cfg = load_config(args.config, args.overrides)
    f_rot = None
    if args.f_rot is not None:
        f_rot = units.parse(args.f_rot, "frequency", "--f-rot", "command line")
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        cr = crystal_from_config(cfg, f_rot, f_rot_key="--f-rot" if f_rot is not None else None)
        holding = assess_config(cfg, cr.f_rot_hz, start=cr.positions_m) if cfg.pinning else None
    if args.json:
        print(json.dumps(jsonable(crystal_json(cfg, cr, holding))))
    else:
        print(crystal_text(cfg, cr, holding))
        for w in cr.warnings:
            print(f"warning: {w}", file=sys.stderr)
    return 0
