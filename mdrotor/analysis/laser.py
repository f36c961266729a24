"""What the laser beams did in a run, and how long a beam may stay on a rotor.

Two users:

* ``mdrotor run`` (:func:`run_block`, :func:`run_lines`): per stage in which
  a beam is on, the scattering rate per ion measured in the run (each ion's
  expected photon count, accumulated by the kernel, over the stage) next to
  the rigid crystal's (:func:`mdrotor.physics.laser.rotor_laser`, the stage-end
  crystal turning at each trajectory's own stage-end rate: averaged over
  RATE_NODES quantiles of the rates), the L drift measured (mean change of
  L about the trap axis over the stage) next to the rigid crystal's torque
  / hbar (the torque at the stage end: a beam that brakes the rotation
  during the stage gives a larger mean drift than at the end; while the
  pinning holds the crystal it turns at the schedule's rate, and the
  torque over I is an angular acceleration the pinning must hold on top of
  the schedule's), and
  the mode temperatures reached at the stage end, k_B T_k = hbar w_k
  (n_k + 1/2) with Wigner sampling (hbar w_k n_k without): the classical
  energy of each mode. It includes the static displacement of the crystal
  by the mean radiation pressure. With the pinning on, the pinning holds the
  rotation against the torque, and the L drift measured is the schedule's.
* ``mdrotor rotor`` (:func:`rotor_beams`): for the crystal rotating at the
  schedule's (or the result's) final rate, each beam at its configured
  saturation: the torque, the L drift per ms, the recoil diffusion of L,
  and how long the beam can stay on before the mean L drifts by K quanta or
  its spread reaches K quanta.

Every formula is in :mod:`mdrotor.physics.laser`; this module only collects.
"""

from __future__ import annotations

import math

import numpy as np

from mdrotor.numfmt import plain, value_err
from mdrotor.physics.constants import HBAR, K_B
from mdrotor.physics.laser import SAFETY, doppler_temperature_k, rotor_laser
from mdrotor.results.stats import mean_sem
from mdrotor.results.status import usable

RATE_NODES = 16  # quantiles of the trajectories' rotation rates at which the rigid crystal is evaluated


def run_block(plan, raw) -> dict:
    """The ``/laser`` group of a run's result (empty if no beam is ever on)."""

    beams = plan.lasers
    sched = plan.schedule
    names = [s.name for s in sched.stages]
    rows = [k for k, nm in enumerate(names) if any(b.on(nm) for b in beams) and nm in raw.stages]
    if not rows:
        return {}
    n = len(plan.masses)
    out = {"caution": SAFETY, "beam_names": [b.name for b in beams], "beam_species": [b.species for b in beams],
           "beam_description": [b.describe() for b in beams], "stage": [names[k] for k in rows]}
    cols = {k: [] for k in ("t0_s", "t1_s", "pinned_start", "pinned_end", "moment_of_inertia_kg_m2", "f_rot_hz", "n_trajectories", "scatter_rate_hz",
                            "scatter_rate_err_hz", "scatter_rate_rigid_hz", "torque_rigid_n_m",
                            "L_drift_rigid_hbar_per_ms", "diffusion_rigid_hbar2_per_s", "L_drift_hbar_per_ms",
                            "L_drift_err_hbar_per_ms", "doppler_limit_k", "mode_temperature_k",
                            "mode_temperature_err_k", "mode_labels")}
    for k in rows:
        name = names[k]
        t0, t1 = float(sched.boundaries_s[k]), float(sched.boundaries_s[k + 1])
        after = raw.stages[name]
        before = raw.initial if k == 0 else raw.stages.get(names[k - 1])
        ok = usable(after["status"])
        if before:
            ok &= usable(before["status"])
        dur = t1 - t0
        ph = after["_laser_photons"][ok] / dur                                         # (T_ok, N)
        ms = [mean_sem(ph[:, i]) for i in range(n)]
        f_traj = after["f_rot_hz"][ok]
        f_end = float(np.mean(f_traj)) if f_traj.size else 0.0
        pinned_end = plan.pinned_at(t1)
        if pinned_end:  # the crystal turns with the pinning
            nodes = np.array([float(sched.f_rot_hz(t1))])
        elif f_traj.size:  # each trajectory at its own rate: RATE_NODES quantiles of the rates
            nodes = np.quantile(f_traj, (np.arange(RATE_NODES) + 0.5) / RATE_NODES)
        else:
            nodes = np.zeros(1)
        cr = plan.crystal_at(t1, float(np.mean(nodes)))
        rls = [rotor_laser(beams, cr.positions_m, float(f), stage=name) for f in nodes]
        if before:
            dl, dl_err = mean_sem((after["L_hbar"][ok] - before["L_hbar"][ok]) / (dur * 1e3))
        else:
            dl, dl_err = math.nan, math.nan
        modes = after["_modes"]
        off = 0.5 if plan.wigner else 0.0
        e = (after["mode_n"][ok] + off) * (HBAR * np.asarray(modes.omega))[None, :] / K_B
        temps = [mean_sem(e[:, j]) for j in range(e.shape[1])]
        cols["t0_s"].append(t0)
        cols["t1_s"].append(t1)
        cols["pinned_start"].append(bool(plan.pinned_at(t0)))
        cols["pinned_end"].append(bool(pinned_end))
        cols["moment_of_inertia_kg_m2"].append(cr.moment_of_inertia_kg_m2)
        cols["f_rot_hz"].append(f_end)
        cols["n_trajectories"].append(int(np.sum(ok)))
        cols["scatter_rate_hz"].append([m for m, _ in ms])
        cols["scatter_rate_err_hz"].append([s for _, s in ms])
        cols["scatter_rate_rigid_hz"].append(np.mean([r.rate_hz for r in rls], axis=0))
        cols["torque_rigid_n_m"].append(float(np.mean([r.torque_n_m for r in rls])))
        cols["L_drift_rigid_hbar_per_ms"].append(float(np.mean([r.drift_hbar_per_ms for r in rls])))
        cols["diffusion_rigid_hbar2_per_s"].append(float(np.mean([r.diffusion_hbar2_per_s for r in rls])))
        cols["L_drift_hbar_per_ms"].append(dl)
        cols["L_drift_err_hbar_per_ms"].append(dl_err)
        cols["doppler_limit_k"].append([doppler_temperature_k(b.saturation_in(name), b.delta_rad_s, b.gamma_rad_s, b.xi)
                                        if b.on(name) else math.nan for b in beams])
        cols["mode_temperature_k"].append([m for m, _ in temps])
        cols["mode_temperature_err_k"].append([s for _, s in temps])
        cols["mode_labels"].append(",".join(modes.labels))
    width = max(len(t) for t in cols["mode_temperature_k"])
    for key in ("mode_temperature_k", "mode_temperature_err_k"):
        cols[key] = [list(t) + [math.nan] * (width - len(t)) for t in cols[key]]
    for key, v in cols.items():
        out[key] = v if key == "mode_labels" else np.array(v)
    return out


def run_lines(block: dict) -> list[str]:
    """The laser block of ``mdrotor run``'s summary (digits by :mod:`mdrotor.numfmt`)."""

    if not block:
        return []

    def row(key, j):
        return np.atleast_2d(np.asarray(block[key], dtype=float))[j]

    lines = ["", "laser beams:"]
    for d in block["beam_description"]:
        lines.append(f"  {d}")
    beam_names = list(block["beam_names"])
    for j, name in enumerate(block["stage"]):
        t0, t1 = float(block["t0_s"][j]), float(block["t1_s"][j])
        start, end = bool(np.atleast_1d(block["pinned_start"])[j]), bool(np.atleast_1d(block["pinned_end"])[j])
        state = "pinned" if start and end else ("released during the stage" if start else
                                                ("pinned during the stage" if end else "free rotation"))
        lines.append(f"  stage '{name}' ({plain(t0 * 1e3, 4)} to {plain(t1 * 1e3, 4)} ms, {int(block['n_trajectories'][j])} "
                     f"trajectories, ending at {plain(block['f_rot_hz'][j] / 1e3, 4)} kHz on average, {state}):")
        lim_text = ", ".join(f"'{b}' {plain(t * 1e3, 3)} mK" if math.isfinite(t) else f"'{b}' none (not red detuned)"
                             for b, t in zip(beam_names, row("doppler_limit_k", j)) if not math.isnan(t))
        lines.append(f"    Doppler limit along each beam on (an ion at rest): {lim_text}")
        run = ", ".join(value_err(r * 1e-6, e * 1e-6) for r, e in zip(row("scatter_rate_hz", j), row("scatter_rate_err_hz", j)))
        rigid = ", ".join(plain(r * 1e-6, 4) for r in row("scatter_rate_rigid_hz", j))
        lines.append(f"    scattering per ion (photons/us): run {run}; rigid crystal at the stage-end rates {rigid}")
        drift = f"run {value_err(block['L_drift_hbar_per_ms'][j], block['L_drift_err_hbar_per_ms'][j])} hbar/ms"
        if end:
            drift += " (the pinning sets L)"
        tq = float(block["torque_rigid_n_m"][j])
        lines.append(f"    L drift: {drift}; rigid crystal {plain(block['L_drift_rigid_hbar_per_ms'][j], 4)} hbar/ms "
                     f"(torque {plain(tq, 3)} N m), recoil diffusion {plain(block['diffusion_rigid_hbar2_per_s'][j], 3)} "
                     f"hbar^2/s")
        if end and tq != 0.0:
            lines.append(f"    the pinning must hold the beams' torque: |torque| / I = "
                         f"{plain(abs(tq) / float(block['moment_of_inertia_kg_m2'][j]), 3)} rad/s^2 on top of the "
                         f"schedule's angular acceleration")
        labels = str(block["mode_labels"][j]).split(",")
        temps = ", ".join(f"{lab} {value_err(t * 1e3, e * 1e3)}"
                          for lab, t, e in zip(labels, row("mode_temperature_k", j), row("mode_temperature_err_k", j)))
        lines.append(f"    mode temperatures at the stage end (mK): {temps}")
    lines.append(f"  {block['caution']}")
    return lines


def rotor_beams(cfg, positions_m, f_rot_hz: float, quanta: float) -> list[dict]:
    """Per beam (at its configured saturation) on the crystal rotating at
    ``f_rot_hz`` with ions at ``positions_m``: torque, L drift, recoil
    diffusion, and how long the beam can stay on before L moves by
    ``quanta``: the shorter of the time for the mean L to drift by that much
    and the time for the recoil spread to reach it; when one photon already
    moves L by more than ``quanta`` (rms kick sqrt(2 D_L / R), R the
    crystal's photons per second; its mean, the drift per photon, is
    included), drift and diffusion do not apply and the bound is the mean
    wait for the first photon, 1 / R."""

    out = []
    for b in cfg.lasers:
        rl = rotor_laser([b], positions_m, f_rot_hz)
        rate = float(np.sum(rl.rate_hz))
        kick = math.sqrt(2.0 * rl.diffusion_hbar2_per_s / rate) if rate > 0 else 0.0
        t_drift, t_spread = rl.drift_time_s(quanta), rl.spread_time_s(quanta)
        t_photon = 1.0 / rate if rate > 0 else math.inf
        if kick >= quanta:  # one photon's kick (rms, its mean included) is already too much
            t_on, limit = t_photon, "single photon"
        else:
            t_on, limit = min(t_drift, t_spread), ("mean drift" if t_drift <= t_spread else "recoil spread")
        out.append({"name": b.name, "description": b.describe(), "torque_n_m": rl.torque_n_m,
                    "drift_hbar_per_ms": rl.drift_hbar_per_ms, "diffusion_hbar2_per_s": rl.diffusion_hbar2_per_s,
                    "scatter_rate_hz": [float(x) for x in rl.rate_hz], "photon_kick_rms_hbar": kick, "quanta": quanta,
                    "time_drift_s": t_drift, "time_spread_s": t_spread, "time_first_photon_s": t_photon,
                    "time_on_s": t_on, "limited_by": limit})
    return out


def rotor_lines(beams: list[dict], f_rot_hz: float) -> list[str]:
    """The laser block of ``mdrotor rotor``'s text."""

    if not beams:
        return []
    lines = ["", f"  laser beams on the crystal rotating at {plain(f_rot_hz / 1e3, 6)} kHz (rigid, averaged over a turn, "
                 f"each at its configured saturation):"]
    for b in beams:
        q = b["quanta"]
        lines.append(f"    {b['description']}")
        lines.append(f"      {plain(sum(b['scatter_rate_hz']) * 1e-6, 4)} photons/us; torque {plain(b['torque_n_m'], 3)} N m: "
                     f"L drifts {plain(b['drift_hbar_per_ms'], 4)} hbar/ms; recoil diffusion "
                     f"{plain(b['diffusion_hbar2_per_s'], 3)} hbar^2/s, {plain(b['photon_kick_rms_hbar'], 3)} hbar rms per photon")
        why = {"mean drift": f"the mean L drifts by {q:g} quanta",
               "recoil spread": f"the recoil spread of L reaches {q:g} quanta",
               "single photon": f"the first photon (mean wait), which alone moves L by more than {q:g} quanta"}
        drift = (f"mean drift after {_time(b['time_drift_s'])}" if math.isfinite(b["time_drift_s"])
                 else "no mean drift")
        lines.append(f"      on for at most {_time(b['time_on_s'])}: {why[b['limited_by']]} "
                     f"({drift}, spread after {_time(b['time_spread_s'])})")
    lines.append(f"  {SAFETY}")
    return lines


def _time(t: float) -> str:
    if not math.isfinite(t):
        return "never"

    for unit, s in (("s", 1.0), ("ms", 1e-3), ("us", 1e-6)):
        if t >= s:
            return f"{plain(t / s, 4)} {unit}"
    return f"{plain(t * 1e9, 4)} ns"
