"""Heating and diffusion rates measured in a run, beside the analytic ones.

The diffusion constant D fitted from the growth of the L variance over the
last noisy stage, the expected D over that same window, the Turchette heating
of the centre-of-mass modes and the fitted heating of every mode; the
"resolved" rule (a fit is a measurement when it exceeds 2 standard errors,
else an upper bound) and the flags for rates that vanish by symmetry.
"""

from __future__ import annotations

import numpy as np

from mdrotor.physics.noise import moment_vanishes
from mdrotor.results.stats import mean_sem, var_se
from mdrotor.results.status import usable

# ---------------------------------------------------------------------------
# Rates from a run: analytic next to fitted
# ---------------------------------------------------------------------------
#: A fitted rate is resolved when it exceeds this many standard errors.
RESOLVED_SIGMA = 2.0


def fit_resolved(value: float, err: float) -> bool:
    """A fitted rate is resolved when it is positive and at least
    :data:`RESOLVED_SIGMA` standard errors from zero."""
    return bool(np.isfinite(value) and np.isfinite(err) and value > 0 and value >= RESOLVED_SIGMA * err)


def fit_upper_bound(value: float, err: float) -> float:
    """Upper bound at :data:`RESOLVED_SIGMA` sigma of an unresolved rate:
    max(value, 0) + 2 err (a rate cannot be negative)."""
    return max(float(value), 0.0) + RESOLVED_SIGMA * float(err)


def _torque_lead(plan, model, k: int) -> float:
    """How long before stage k's start the noise torques have acted on the
    free crystal at stage k's level: back through the preceding stages in
    which every noise source has stage k's scale and no pinning term is on."""
    sched = plan.schedule
    names = [s.name for s in sched.stages]
    level = [src.scale(names[k]) for src in model.sources]
    j = k
    while j > 0:
        prev = names[j - 1]
        if [src.scale(prev) for src in model.sources] != level or not model.active(prev):
            break
        t = np.linspace(sched.boundaries_s[j - 1], sched.boundaries_s[j], 201)
        if len(plan.pin_orders) and np.any(plan.pin_scales(t) * plan.pin_strength[None, :] != 0.0):
            break
        j -= 1
    return float(sched.boundaries_s[k] - sched.boundaries_s[j])


def run_rates(plan, raw) -> dict:
    """Analytic and fitted noise rates of a finished run.

    The stage used is the last one in which the noise is on; its start is
    the previous stage's end (or t = 0). Fitted, with standard errors:

    * ``D`` from the growth of the L variance, D = (var L(t1) - var L(t0)) /
      (2 (t1 - t0)) (<dL^2> = 2 D t; the error from the standard error of
      each spread, :func:`mdrotor.results.stats.var_se`, var = s^2 with error 2 s
      se_s, the two in quadrature). Meaningful when the crystal rotates
      freely in that stage (pinning off).
    * heating per mode, (<n_k>(t1) - <n_k>(t0)) / (t1 - t0), with the
      standard errors of the two means (:func:`mdrotor.results.stats.mean_sem`), for
      modes present at both times.

    A fitted rate is ``resolved`` (:func:`fit_resolved`) when positive and
    at least 2 standard errors; otherwise only its upper bound at 2 sigma
    means something (``*_bound``). The raw numbers are kept.

    Analytic, for the crystal rotating at the fitted stage's mean rate:
    Turchette COM heating along x, y, z, D per multipole order
    (:meth:`NoiseModel.rotor_diffusion`, the infinite-time limit; orders
    whose moment vanishes by the crystal's symmetry are flagged,
    ``D_analytic_zero_by_symmetry``) and D expected over the fit window
    itself (:meth:`NoiseModel.rotor_diffusion_window`, ``D_window_*``; the
    torques counted from ``D_window_lead_s`` before the window), which the
    fit's z-score ``D_fit_z`` is taken against.
    """

    model = plan.noise
    sched = plan.schedule
    names = [s.name for s in sched.stages]
    active = [k for k, nm in enumerate(names) if model.active(nm)]
    if not active:
        return {}
    k = active[-1]
    stage = names[k]
    after = raw.stages[stage]
    before = raw.initial if k == 0 else raw.stages.get(names[k - 1])
    if before is None or not before:
        return {}
    t0, t1 = float(sched.boundaries_s[k]), float(sched.boundaries_s[k + 1])
    ok = usable(after["status"]) & usable(before["status"])
    n = int(np.sum(ok))
    out = {"stage": stage, "t0_s": t0, "t1_s": t1, "n_trajectories": n, "pinned": bool(plan.pinned_at(t1))}
    l0, l1 = before["L_com_hbar"][ok], after["L_com_hbar"][ok]
    if n > 2:
        (v0, e0), (v1, e1) = var_se(l0), var_se(l1)
        out["D_fit_hbar2_per_s"] = (v1 - v0) / (2 * (t1 - t0))
        out["D_fit_err_hbar2_per_s"] = np.hypot(e0, e1) / (2 * (t1 - t0))
        out["D_fit_resolved"] = fit_resolved(out["D_fit_hbar2_per_s"], out["D_fit_err_hbar2_per_s"])
        out["D_fit_bound_hbar2_per_s"] = fit_upper_bound(out["D_fit_hbar2_per_s"], out["D_fit_err_hbar2_per_s"])
    m0, m1 = before["_modes"], after["_modes"]
    labels, fitted, errs = [], [], []
    for j, lab in enumerate(m1.labels):
        if lab in m0.labels:
            i = m0.labels.index(lab)
            (a, ea), (b, eb) = mean_sem(before["mode_n"][ok, i]), mean_sem(after["mode_n"][ok, j])
            labels.append(lab)
            fitted.append((b - a) / (t1 - t0))
            errs.append(np.hypot(ea, eb) / (t1 - t0))
    out["heating_labels"] = labels
    out["heating_fit_quanta_per_s"] = np.array(fitted)
    out["heating_fit_err_quanta_per_s"] = np.array(errs)
    out["heating_fit_resolved"] = np.array([fit_resolved(v, e) for v, e in zip(fitted, errs)], dtype=bool)
    out["heating_fit_bound_quanta_per_s"] = np.array([fit_upper_bound(v, e) for v, e in zip(fitted, errs)])
    # analytic: the crystal rotating at the stage-end mean rate
    f_end = float(np.mean(after["f_rot_hz"][ok])) if n else 0.0
    cr = plan.crystal_at(t1, f_end)
    if model.has_field:
        # lab-frame COM frequencies along x, y, z from the secular frequencies (the COM of identical ions)
        fx, fy, fz = np.sqrt(plan.cfg.trap.omega_sq(plan.masses[:1], plan.charges[:1])[0]) / (2 * np.pi)
        try:
            out["turchette_quanta_per_s"] = model.com_heating_rates(plan.masses, plan.charges, [fx, fy, fz], stage)
            out["turchette_axes"] = ["x", "y", "z"]
        except Exception:  # mixed charge-to-mass: no single COM mode
            pass
    diff = model.rotor_diffusion(cr.positions_m, plan.masses, plan.charges, f_end, stage)
    orders = [o for o in diff if o != "total"]
    out["D_analytic_orders"] = np.array(orders, dtype=np.int64)
    out["D_analytic_hbar2_per_s"] = np.array([diff[o].D_hbar2_per_s for o in orders])
    out["D_analytic_zero_by_symmetry"] = np.array([moment_vanishes(cr.positions_m, plan.masses, plan.charges, o)
                                                   for o in orders], dtype=bool)
    out["D_analytic_total_hbar2_per_s"] = diff["total"].D_hbar2_per_s
    lead = _torque_lead(plan, model, k)
    win = model.rotor_diffusion_window(cr.positions_m, plan.masses, plan.charges, f_end, t1 - t0, lead, stage)
    out["D_window_lead_s"] = lead
    out["D_window_hbar2_per_s"] = np.array([win[o].D_hbar2_per_s for o in orders])
    out["D_window_total_hbar2_per_s"] = win["total"].D_hbar2_per_s
    if "D_fit_hbar2_per_s" in out and out["D_fit_err_hbar2_per_s"] > 0:
        out["D_fit_z"] = float((out["D_fit_hbar2_per_s"] - out["D_window_total_hbar2_per_s"]) / out["D_fit_err_hbar2_per_s"])
    out["f_rot_hz"] = f_end
    return out
