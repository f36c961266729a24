"""Design check: does a layout's full electrode field pin the run's crystal?

The check takes a layout (rf and dc electrodes, voltage limits) and a run
config (crystal, pinning order and strength, schedule) and reports:

1. the RF pseudopotential trap (null, secular frequencies, q, depth);
2. the per-volt multipole table of the dc channels;
3. the voltages that rotate the pinning multipole (:func:`solve_rotating`);
4. the crystal in the *full* field of the electrodes -- the pseudopotential
   Q^2 |E_rf(r)|^2 / (4 m W^2) of the rf electrodes evaluated at every ion
   (not only its harmonic part) plus the dc electrodes at the solved voltages
   (static part and the rotating part at a pinning angle), every term from
   the solid-angle formulas, no multipole truncation -- and next to it the
   fitted picture, a run config whose trap is the layout's harmonic
   pseudopotential and whose pinning is the achieved leading multipole;
5. whether the crystal is pinned, the libration frequency, the largest
   angular acceleration before a slip against the one the schedule asks
   for (:mod:`mdrotor.physics.pinning`), and what the stray multipoles do;
6. the verdict: problems are a target out of reach, a crystal not pinned
   at first order, a margin below 1, a pinning barrier below
   :data:`mdrotor.physics.pinning.BARRIER_KT_MIN` k_B T_initial, a run config
   whose trap differs from the layout's by more than
   :data:`TRAP_MISMATCH_REL`, an unstable crystal at the fastest rotation.

Pinned or not, libration, held acceleration (the pinning core)
---------------------------------------------------------------
The verdict, the libration of the relaxed crystal, the largest held angular
acceleration, the barrier and the margin against the schedule come from
:mod:`mdrotor.physics.pinning`, the same core that ``mdrotor crystal``, the run's
preflight and ``mdrotor rotor`` call: the moments of the crystal without
the rotating voltages (static voltages, pseudopotential and stray field
only) decide "pinned" (first order) against "held only through its
deformation" against "not held"; the relaxed held curve in the full field
at the configured pattern angle gives the rest. The margin is the smallest
held / asked over the schedule, of the lab-frame crystal and of the crystal
rotating at the fastest f_rot, whichever is smaller.

Rigid scan (torque harmonics)
-----------------------------
The torque harmonics, rigid libration, barrier and lag ripple of the crystal
at its pinned equilibrium turned rigidly come from
:func:`mdrotor.electrodes.torque_scan.rigid_scan`; the full field is that of
:mod:`mdrotor.electrodes.full_field`.

Rotating frame
--------------
At the fastest rotation of the schedule the equilibrium and modes are
computed in the frame rotating at f_rot (centrifugal stretch, Coriolis
coupling) with the electrode field frozen at one pattern angle: the
co-rotating pinning is static in that frame, the ripple terms above are not
(they are reported separately), and the stray field is dropped, as
:func:`mdrotor.model.build.model_potential` does.

Caution: voltages and rf amplitudes must stay within the trap's rated limits
and the lab's safety rules (:data:`CAUTION`).
"""

from __future__ import annotations

import copy
import math
from dataclasses import dataclass
from pathlib import Path

import numpy as np

from mdrotor.config.parse import from_dict
from mdrotor.electrodes.full_field import RFPseudoTerm, full_potential, plan_voltages
from mdrotor.electrodes.harmonic_fit import fit_multipoles
from mdrotor.electrodes.pseudo import rf_pseudopotential
from mdrotor.electrodes.solve import CAUTION, solve_rotating
from mdrotor.electrodes.torque_scan import N_PHI, rigid_scan
from mdrotor.errors import InputError, PhysicsError
from mdrotor.model.build import assess_config, model_potential
from mdrotor.physics import pinning as pin
from mdrotor.physics.constants import K_B
from mdrotor.physics.statics import compute_crystal, normal_modes

__all__ = ["resolve_target", "Design", "prepare_design", "design_check", "TRAP_MISMATCH_REL", "CAUTION"]

TWO_PI = 2.0 * math.pi
#: The run config's secular frequencies may differ from the layout's by this
#: fraction before the check calls it a problem (the libration and the held
#: acceleration of a crystal scale with the trap; a few per cent is what a
#: calibrated trap frequency is known to; common practice, no source).
TRAP_MISMATCH_REL = 0.02
#: Order of the multipole fit (as for a run's [pinning] layout).
FIT_ORDER = 6


# ----------------------------------------------------------------------------
# target, configs


def resolve_target(layout, cfg, notes: list) -> dict:
    """Pinning order, strength and angle the voltages must make.

    The run config's [pinning] is the target (it is what ``mdrotor run``
    simulates); without a run config, the layout's [design] table. A
    layout [design] that disagrees with the run config is noted, not used.
    """
    d = layout.design or {}
    if cfg is not None and cfg.pinning:
        if len(cfg.pinning) != 1:
            raise InputError("pinning", f"the electrode check handles one pinning term; the config has {len(cfg.pinning)}",
                             cfg.source)
        t = cfg.pinning[0]
        out = {"order": t.order, "strength_si": t.strength, "angle_rad": t.angle_rad, "from": f"{cfg.source} [pinning]"}
        if "order" in d and d["order"] != t.order:
            notes.append(f"the layout's [design] order {d['order']} differs from the run config's pinning order {t.order}; "
                         f"the run config's is used")
        elif "strength_si" in d and abs(d["strength_si"] - t.strength) > 1e-9 * t.strength:
            notes.append(f"the layout's [design] strength {d['strength_si']:.4g} V/m^{t.order} differs from the run config's "
                         f"{t.strength:.4g}; the run config's is used")
        if "ions" in d and d["ions"] != cfg.n_ions:
            notes.append(f"the layout is designed for {d['ions']} ions; the run config has {cfg.n_ions}")
        return out
    if cfg is not None and not cfg.pinning:
        raise InputError("pinning", "the run config has no [pinning]; the electrode check needs the pinning order and strength",
                         cfg.source)
    if "order" not in d or "strength_si" not in d:
        raise InputError("design", "expected a pinning target: a run config with [pinning] (--config RUN.toml) or "
                                   "[design] order and strength in the layout", layout.source)
    return {"order": d["order"], "strength_si": d["strength_si"], "angle_rad": 0.0, "from": f"{layout.source} [design]"}


def _design_config(layout, target):
    """A run config of the layout's [design] crystal (no schedule), or None."""

    d = layout.design or {}
    if "ions" not in d or layout.species is None:
        return None
    n = target["order"]
    raw = {"species": {"ion": layout.species}, "crystal": {"ions": d["ions"]},
           "trap": {"f_radial": "1 MHz", "f_axial": "2 MHz"},
           "pinning": {"order": n, "strength": f"{target['strength_si']!r} V/m^{n}"}}
    return from_dict(raw, f"{layout.source} [design]")


def _fitted_config(cfg, f_xyz_hz, f_drive_hz, order, strength_si, angle_rad, source):
    """The run config with the layout's harmonic trap and a given leading pinning multipole."""

    raw = copy.deepcopy(cfg.raw)
    tr = dict(raw.get("trap", {}))
    for k in ("a", "q", "f_radial", "f_axial", "radial_split", "f_drive"):
        tr.pop(k, None)
    fx, fy, fz = (float(v) for v in f_xyz_hz)
    tr.update({"f_radial": f"{0.5 * (fx + fy)!r} Hz", "radial_split": f"{fx - fy!r} Hz", "f_axial": f"{fz!r} Hz",
               "f_drive": f"{float(f_drive_hz)!r} Hz"})
    raw["trap"] = tr
    pin = raw["pinning"][0] if isinstance(raw["pinning"], list) else raw["pinning"]
    pin.pop("layout", None)  # the pure leading multipole, not the electrodes' polynomial
    pin["order"] = order
    pin["strength"] = f"{float(strength_si)!r} V/m^{order}"
    pin["angle"] = float(angle_rad)
    try:
        return from_dict(raw, source)
    except InputError as e:
        raise e.with_source(source)


def _libration(cr):
    """Frequency (Hz) of the mode labelled libration, or None."""
    for f, lab in zip(cr.modes.freq_hz, cr.modes.labels):
        if lab.startswith("libration"):
            return float(f)
    return None


def _match(a, b):
    """Largest distance (m) between the ions of two configurations, matched one to one."""
    from scipy.optimize import linear_sum_assignment

    d = np.sqrt(np.sum((a[:, None, :] - b[None, :, :]) ** 2, axis=-1))
    i, j = linear_sum_assignment(d)
    return float(np.max(d[i, j]))


# ----------------------------------------------------------------------------
# the check


@dataclass
class Design:
    """The solved design: target, pseudopotential trap, table, voltages.

    Attributes
    ----------
    layout : Layout
    run_cfg : Config or None
        The run config as given.
    cfg : Config or None
        The crystal's config (the run config, or one made from the layout's
        [design] table; None when neither names a crystal).
    target : dict
        ``order``, ``strength_si``, ``angle_rad``, ``from``.
    trap : PseudoTrap
    pseudo : RFPseudoTerm or None
    f_xyz_hz : (3,) array or None
        Harmonic secular frequencies along x, y, z (first species).
    fitted_source : str or None
    crystal_radius_m : float or None
        Radius of the crystal in the fitted picture (weights the solve).
    table : MultipoleTable
    plan : RotatingPlan
    notes : list of str
    fitted_crystal : Crystal or None
        The crystal in the fitted picture at the target strength (lab frame).
    """

    layout: object
    run_cfg: object
    cfg: object
    target: dict
    trap: object
    pseudo: object
    f_xyz_hz: object
    fitted_source: object
    crystal_radius_m: object
    table: object
    plan: object
    notes: list
    fitted_crystal: object = None


def prepare_design(layout, cfg=None, *, depth: bool = True) -> Design:
    """Pseudopotential, multipole table and rotating voltages for a run config.

    The fit (order 6, default sphere about the trap point) and the solve
    (default weights) are those of a run whose ``[pinning] layout`` names
    this layout (:func:`mdrotor.electrodes.polynomial.layout_pinning`), so the
    voltages checked and exported are the ones the run simulates.
    ``depth=False`` skips the trap depth (faster, for waveforms).
    """

    notes: list[str] = []
    target = resolve_target(layout, cfg, notes)
    n, c_target, angle = target["order"], target["strength_si"], target["angle_rad"]
    run_cfg = cfg
    if cfg is None:
        cfg = _design_config(layout, target)
        if cfg is None:
            notes.append("no crystal to check: give --config RUN.toml, or [design] ions and [rf] species in the layout")
    if cfg is not None:
        masses, charges = cfg.masses_kg, cfg.charges_c
        if layout.species is not None and cfg.species[0].name != layout.species and run_cfg is not None:
            notes.append(f"the layout's [rf] species is {layout.species}; the run config's {cfg.species[0].name} is used")
        pt = rf_pseudopotential(layout, mass_kg=float(masses[0]), charge_c=float(charges[0]), depth=depth)
    else:
        pt = rf_pseudopotential(layout, depth=depth)
    if run_cfg is not None and run_cfg.trap.f_drive_hz is not None and layout.rf_drive_hz is not None \
            and abs(run_cfg.trap.f_drive_hz - layout.rf_drive_hz) > 1e-6 * layout.rf_drive_hz:
        notes.append(f"the run config's trap.f_drive ({run_cfg.trap.f_drive_hz / 1e6:.6g} MHz) differs from the layout's rf "
                     f"drive ({layout.rf_drive_hz / 1e6:.6g} MHz); the layout's is used")
    origin = pt.null_m
    center = layout.trap_point_m
    if center is not None and np.linalg.norm(center - origin) > 1e-3 * origin[2]:
        notes.append(f"the layout's trap point is {np.linalg.norm(center - origin) * 1e6:.3g} um from the RF null; "
                     f"the multipoles are fitted about the trap point, the crystal sits at the null")
    pseudo = f_xyz = src_fit = rho_c = cr0 = None
    if cfg is not None:
        pseudo = RFPseudoTerm(layout, origin, pt.v_rf, pt.f_drive_hz, masses, charges)
        f_xyz = np.sqrt(pseudo.springs_n_per_m[0] / masses[0]) / TWO_PI
        src_fit = f"{cfg.source} (trap and pinning fitted from {layout.source})"
        fit_cfg = _fitted_config(cfg, f_xyz, pt.f_drive_hz, n, c_target, angle, src_fit)
        try:
            cr0 = compute_crystal(model_potential(fit_cfg), 0.0, seed=fit_cfg.search_seed)
        except PhysicsError as e:
            raise e.with_source(src_fit)
        rho_c = float(np.max(np.hypot(cr0.positions_m[:, 0], cr0.positions_m[:, 1])))
    # the same fit and solve as a run whose [pinning] takes this layout
    # (mdrotor.electrodes.polynomial.layout_pinning): identical voltages
    table = fit_multipoles(layout, layout.trap_point_m, order=FIT_ORDER)
    plan = solve_rotating(layout, n, c_target, table=table)
    if rho_c is not None and rho_c > 0.8 * table.radius_m:
        notes.append(f"the crystal's radius {rho_c * 1e6:.3g} um reaches beyond 80 % of the fit sphere "
                     f"({table.radius_m * 1e6:.3g} um): the fitted table and the solve's weighting describe it less well "
                     f"(the full-field check itself does not use the fit)")
    if run_cfg is not None and run_cfg.pinning and run_cfg.pinning[0].layout is not None:
        used = Path(run_cfg.pinning[0].layout.path).resolve()
        if layout.source is None or used != Path(layout.source).resolve():
            notes.append(f"the run config takes its pinning from {run_cfg.pinning[0].layout.path}; this check is of "
                         f"{layout.source}")
    return Design(layout, run_cfg, cfg, target, pt, pseudo, f_xyz, src_fit, rho_c, table, plan, notes, cr0)


def design_check(layout, cfg=None, *, n_phi: int = N_PHI, n_rows: int = 128) -> dict:
    """Check a layout against a run config's crystal and schedule.

    Parameters
    ----------
    layout : Layout
    cfg : mdrotor.config.parse.Config, optional
        The run config (crystal, species, pinning target, schedule). Without
        it, the layout's [design] table (ions, order, strength) and [rf]
        species make the crystal, and there is no schedule to compare with.
    n_phi, n_rows : int
        Grids of the rigid scan (:func:`rigid_scan`).

    Returns
    -------
    dict
        JSON-ready; see :func:`mdrotor.commands.electrodes.check_text` for the meaning of the entries.
        Always carries ``caution``.
    """

    ds = prepare_design(layout, cfg)
    notes, target, pt, pseudo, table, plan = ds.notes, ds.target, ds.trap, ds.pseudo, ds.table, ds.plan
    run_cfg, cfg = ds.run_cfg, ds.cfg
    n, angle = target["order"], target["angle_rad"]
    f_xyz, src_fit = ds.f_xyz_hz, ds.fitted_source
    out = {"layout": layout.source, "layout_name": layout.name, "config": run_cfg.source if run_cfg is not None else None,
           "caution": CAUTION, "target": target, "rf": pt.to_dict(), "notes": notes}
    if f_xyz is not None:
        out["rf"]["secular_xyz_hz"] = [float(x) for x in f_xyz]
    if run_cfg is not None:
        masses, charges = cfg.masses_kg, cfg.charges_c
        f_cfg = np.sqrt(run_cfg.trap.omega_sq(masses[:1], charges[:1]))[0] / TWO_PI
        out["rf"]["run_config_secular_xyz_hz"] = [float(x) for x in f_cfg]
        dev = float(np.max(np.abs(f_cfg / f_xyz - 1.0)))
        out["rf"]["run_config_mismatch_rel"] = dev
        if dev > 0.01:
            notes.append(f"the run config's trap frequencies differ from the layout's pseudopotential by up to "
                         f"{dev * 100:.3g} %; the check uses the layout's")
    out["table"] = _table_dict(layout, table)
    out["plan"] = plan.to_dict()
    out["plan"]["peak_v"] = {ch: float(abs(s) + a) for ch, s, a in zip(plan.channels, plan.static_v, plan.amplitudes_v)}
    out["plan"]["fit_residual_v"] = plan.fit_residual_v
    out["plan"]["crystal_radius_m"] = plan.crystal_radius_m
    verdict = []
    dev = out["rf"].get("run_config_mismatch_rel", 0.0)
    if dev > TRAP_MISMATCH_REL:
        fc, fl = out["rf"]["run_config_secular_xyz_hz"], out["rf"]["secular_xyz_hz"]
        verdict.append(f"the run config's trap ({', '.join(f'{x / 1e6:.4g}' for x in fc)} MHz) differs from the layout's "
                       f"({', '.join(f'{x / 1e6:.4g}' for x in fl)} MHz) by {dev * 100:.3g} %, above "
                       f"{TRAP_MISMATCH_REL * 100:g} %: the run would simulate another trap than these electrodes make")
    if not plan.reached:
        verdict.append(plan.shortfall_text())
    if cfg is None:
        out["verdict"] = {"ok": not verdict, "problems": verdict}
        return out
    masses, charges = cfg.masses_kg, cfg.charges_c
    # fitted picture with the achieved leading multipole
    k_co = complex(plan.k_corot)
    c_ach = abs(k_co)
    angle_fit = angle - math.atan2(k_co.imag, k_co.real) / n
    fit_cfg = _fitted_config(cfg, f_xyz, pt.f_drive_hz, n, c_ach, angle_fit, src_fit)
    try:  # relaxed from the target-strength crystal (the global search was done there)
        cr_fit = compute_crystal(model_potential(fit_cfg), 0.0, start=ds.fitted_crystal.positions_m)
    except PhysicsError as e:
        raise e.with_source(src_fit)
    hold_fit = assess_config(fit_cfg, 0.0, start=cr_fit.positions_m)
    stray = np.asarray(cfg.trap.stray_field_v_per_m, dtype=float)
    # the pinning core's verdict: the crystal without the rotating voltages
    # (first order) and the relaxed held curve with them, lab frame
    pot_off = full_potential(layout, pseudo, masses, charges, plan.static_v, stray_v_per_m=stray)
    V0 = plan_voltages(plan, angle, 1.0)
    pot_on = full_potential(layout, pseudo, masses, charges, V0, stray_v_per_m=stray)
    try:
        hold = pin.assess(pot_on, pot_off, [(n, c_ach)], start=cr_fit.positions_m)
    except PhysicsError as e:
        raise e.with_source(cfg.source)
    pinned = hold.held
    moments = {m_: pin.moment_rel(hold.positions_off_m, masses, charges, m_) for m_ in range(1, 7)}
    lowest = pin.lowest_moment_order(hold.positions_off_m, masses, charges, range(2, 7))
    full = {"pinned": hold.verdict == "pinned", "held": pinned, "verdict": hold.to_dict(),
            "order": hold.order if pinned else None, "first_order_rel": moments[n],
            "moments_rel": {str(k): v for k, v in moments.items()}, "lowest_moment_order": lowest}
    if hold.verdict == "none":
        verdict.append(f"the crystal is not held by the order-{n} pattern: {hold.reason}"
                       + (f"; its lowest in-plane moment is order {lowest}" if lowest else ""))
    elif hold.verdict == "deformation":
        verdict.append(f"the order-{n} pattern finds no moment on the crystal: it is {hold.describe()}"
                       + (f"; its lowest in-plane moment is order {lowest}" if lowest else ""))
    pos = hold.positions_m
    f_lib_mode = None
    modes_lab = None
    if pinned:
        try:
            md = normal_modes(pot_on, pos)
            modes_lab = [{"freq_hz": float(f), "label": lab, "kind": k, "plane": p}
                         for f, lab, k, p in zip(md.freq_hz, md.labels, md.kinds, md.planes)]
            f_lib_mode = next((float(f) for f, lab in zip(md.freq_hz, md.labels) if lab.startswith("libration")), None)
        except PhysicsError as e:
            notes.append(f"normal modes in the full field (lab frame): {e.expected}")
    scan = rigid_scan(layout, pseudo, pos, masses, charges, plan, angle_rad=angle, scale=1.0, stray_v_per_m=stray,
                      n_phi=n_phi, n_rows=n_rows)
    com = np.sum(masses[:, None] * pos, axis=0) / np.sum(masses)
    rho = np.hypot(pos[:, 0], pos[:, 1])
    lab = {
        "positions_m": pos.tolist(), "energy_j": float(pot_on.energy(pos)), "radius_m": float(rho.max()),
        "moment_of_inertia_kg_m2": scan["I_kg_m2"], "f_lib_mode_hz": f_lib_mode,
        "f_lib_rigid_hz": scan["f_lib_rigid_hz"] if pinned else None,
        "f_lib_held_hz": hold.f_lib_hz,
        "alpha_forward_rad_s2": hold.alpha_forward_rad_s2,
        "alpha_backward_rad_s2": hold.alpha_backward_rad_s2,
        "barrier_k": hold.barrier_j / K_B,
        "pinning_torque_n_m": scan["tau_pin_n_m"], "pinning_rel": scan["pinning_rel"], "modes": modes_lab,
    }
    full["lab"] = lab
    f_lib_fit_mode = _libration(cr_fit)
    fitted = {"config_source": src_fit, "strength_si": c_ach, "angle_rad": angle_fit,
              "trap_xyz_hz": [float(x) for x in f_xyz], "positions_m": cr_fit.positions_m.tolist(),
              "f_lib_rigid_hz": hold_fit.f_lib_rigid_hz, "f_lib_held_hz": hold_fit.f_lib_hz, "f_lib_mode_hz": f_lib_fit_mode,
              "alpha_max_rad_s2": hold_fit.alpha_forward_rad_s2, "verdict": hold_fit.verdict, "config_text": fit_cfg.text}
    cmp_ = {"max_position_difference_m": _match(pos, cr_fit.positions_m)}
    if pinned and hold_fit.f_lib_hz > 0:
        cmp_["f_lib_rigid_rel"] = scan["f_lib_rigid_hz"]["at_start"] / hold_fit.f_lib_rigid_hz - 1.0
        cmp_["f_lib_held_rel"] = hold.f_lib_hz / hold_fit.f_lib_hz - 1.0
        cmp_["alpha_rel"] = hold.alpha_forward_rad_s2 / hold_fit.alpha_forward_rad_s2 - 1.0
        if f_lib_mode and f_lib_fit_mode:
            cmp_["f_lib_mode_rel"] = f_lib_mode / f_lib_fit_mode - 1.0
    # what the leading-multipole picture leaves out: the order-n torque of the
    # exact field on this crystal against n c |M_n| (terms such as S_{n+2,n}
    # add to the same harmonic), and the radius change (anharmonic
    # pseudopotential); rigid f_lib ~ sqrt(c) rho^(n/2 - 1) then predicts
    # the difference to first order
    lead_miss = scan["tau_pin_n_m"] / scan["tau_lead_n_m"] - 1.0 if scan["tau_lead_n_m"] > 0 else float("nan")
    rho_fit_c = np.hypot(cr_fit.positions_m[:, 0], cr_fit.positions_m[:, 1])
    radius_rel = float(np.mean(rho) / np.mean(rho_fit_c) - 1.0)
    cmp_["leading_multipole_miss"] = float(lead_miss)
    cmp_["radius_rel"] = radius_rel
    cmp_["f_lib_predicted_rel"] = float(0.5 * lead_miss + (0.5 * n - 1.0) * radius_rel)
    stray_fx = {"centre_offset_m": [float(x) for x in com], "out_of_plane_m": float(np.max(np.abs(pos[:, 2] - com[2]))),
                "ripple": scan["ripple"], "static": scan["static"], "lag_ripple_rad": scan["lag_ripple_rad"] if pinned else None,
                "unwanted_terms": plan.unwanted()[:6]}
    # the schedule
    need = None
    rot = None
    if run_cfg is not None and abs(run_cfg.f_start_hz) >= 10.0:
        notes.append(f"the schedule starts at f_rot = {run_cfg.f_start_hz / 1e3:.6g} kHz; the first check above is in the "
                     f"lab frame")
    if run_cfg is not None and run_cfg.schedule is not None:
        need = run_cfg.schedule.acceleration_profile()
        f_max, s_max = need["f_max_hz"], need["scale_at_f_max"]
        mg = pin.schedule_margin(hold, need, 1.0, [n]) if pinned else {"ratio": 0.0, "t_s": None, "needed_rad_s2": 0.0,
                                                                        "held_rad_s2": 0.0}
        if pinned and abs(f_max) >= 10.0 and s_max > 0:
            Vr = plan_voltages(plan, angle, s_max)
            pot_r = full_potential(layout, pseudo, masses, charges, Vr, f_rot_hz=f_max)
            pot_r_off = full_potential(layout, pseudo, masses, charges, plan.static_v, f_rot_hz=f_max)
            rot = {"f_rot_hz": f_max, "t_s": need["t_f_max_s"], "scale": s_max}
            try:
                cr_r = compute_crystal(pot_r, f_max, start=pos)
                rot["f_lib_mode_hz"] = _libration(cr_r)
                rot["positions_m"] = cr_r.positions_m.tolist()
                rot["moment_of_inertia_kg_m2"] = cr_r.moment_of_inertia_kg_m2
                hold_r = pin.assess(pot_r, pot_r_off, [(n, c_ach * s_max)], start=cr_r.positions_m)
                rot["verdict"] = hold_r.verdict
                rot["f_lib_held_hz"] = hold_r.f_lib_hz
                rot["f_lib_rigid_hz"] = hold_r.f_lib_rigid_hz
                rot["alpha_forward_rad_s2"] = hold_r.alpha_forward_rad_s2
                rot["alpha_backward_rad_s2"] = hold_r.alpha_backward_rad_s2
                # the margin: the worse of the lab and the rotating crystal
                if hold_r.held:
                    mg_r = pin.schedule_margin(hold_r, need, s_max, [n])
                    if mg_r["ratio"] < mg["ratio"]:
                        mg = mg_r
                else:
                    verdict.append(f"at f_rot = {f_max / 1e3:.6g} kHz the pattern does not hold the crystal: {hold_r.reason}")
                    mg = {"ratio": 0.0, "t_s": need["t_f_max_s"], "needed_rad_s2": need["alpha_max_rad_s2"],
                          "held_rad_s2": 0.0}
                cr_rf = compute_crystal(model_potential(fit_cfg, f_max, pin_scale=[s_max]), f_max, start=cr_r.positions_m)
                rot["fitted_f_lib_mode_hz"] = _libration(cr_rf)
                rot["fitted_alpha_max_rad_s2"] = assess_config(fit_cfg, f_max, scales=[s_max],
                                                                   start=cr_rf.positions_m).alpha_forward_rad_s2
            except PhysicsError as e:
                rot["error"] = e.expected
                verdict.append(f"at f_rot = {f_max / 1e3:.6g} kHz: {e.expected}")
        T = run_cfg.initial.temperature_k
        full["schedule"] = {"alpha_needed_max_rad_s2": need["alpha_max_rad_s2"], "t_alpha_needed_max_s": need["t_alpha_max_s"],
                            "f_max_hz": f_max, "margin": mg["ratio"], "margin_t_s": mg["t_s"],
                            "margin_needed_rad_s2": mg["needed_rad_s2"], "margin_held_rad_s2": mg["held_rad_s2"],
                            "initial_temperature_k": T,
                            "barrier_over_kT": (lab["barrier_k"] / T) if T > 0 and pinned else None,
                            "barrier_kT_min": pin.BARRIER_KT_MIN}
        if pinned and mg["ratio"] < 1.0:
            verdict.append(f"the spin-up needs {mg['needed_rad_s2']:.3e} rad/s^2 at t = {mg['t_s'] * 1e3:.4g} ms but the "
                           f"pinning holds only {mg['held_rad_s2']:.3e} (margin {mg['ratio']:.3g})")
        bkt = full["schedule"]["barrier_over_kT"]
        if bkt is not None and bkt < pin.BARRIER_KT_MIN:
            verdict.append(f"the pinning barrier is only {bkt:.3g} k_B T_initial (below {pin.BARRIER_KT_MIN:g}): the crystal "
                           f"hops between the pinning wells at its starting temperature")
    full["rotating"] = rot
    full["stray"] = stray_fx
    out["full"] = full
    out["fitted"] = fitted
    out["comparison"] = cmp_
    out["verdict"] = {"ok": not verdict, "problems": verdict}
    return out


def _table_dict(layout, table):
    k = table.k_inplane()
    rows = []
    for c, name in enumerate(table.names):
        i = layout.channels.index(name)
        rows.append({"channel": name, "role": layout.channel_roles[i], "limit_v": float(layout.channel_limits_v[i]),
                     "k_abs_per_v": [float(abs(x)) for x in k[c]], "k_arg_rad": [float(np.angle(x)) for x in k[c]],
                     "residual_rms_v_per_v": float(table.residual_rms[c])})
    return {"center_m": [float(x) for x in table.center_m], "radius_m": table.radius_m, "order": table.order,
            "convention": "in-plane k_n per volt: the channel's potential contains Re[k_n (x + i y)^n], V/m^n per V",
            "channels": rows}
