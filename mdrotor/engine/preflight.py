"""The run's preflight: before any step, is the crystal held at t = 0 and at
the largest angular acceleration each stage asks for?

It calls the pinning verdict (:func:`mdrotor.physics.pinning.assess`) and the
margin against the schedule (:func:`mdrotor.physics.pinning.schedule_margin`)
on the plan's crystal; a spin-up the pinning does not hold is refused unless
``run.force``.
"""

from __future__ import annotations

import numpy as np

from mdrotor.errors import PhysicsError
from mdrotor.model.build import config_terms, escape_depth
from mdrotor.physics import frame
from mdrotor.physics.pinning import BARRIER_KT_MIN, K_B, TWO_PI, assess, schedule_margin


def preflight(plan, *, n_samples: int = 401) -> dict:
    """Check a planned run before any integration (module docstring).

    Per stage whose f_rot changes: the largest angular acceleration the
    schedule asks, 2 pi |d f_rot / dt|, against the largest the pinning holds
    at that time's strength, in the frame rotating at that time's f_rot
    (:func:`assess` on the relaxed crystal there); the stage's margin is the
    smallest held / asked over the stage, the held acceleration scaled with
    the multiplier (:func:`_scale_power`). At t = 0: the verdict and the
    pinning barrier against k_B T_initial (:data:`BARRIER_KT_MIN`).

    Returns
    -------
    dict (JSON-ready): ``initial`` (verdict, order, libration_hz, barrier_k,
    barrier_over_kT), ``stages`` (one entry per stage whose f_rot changes),
    ``margin_min`` (smallest stage margin; inf without a spin), ``warnings``
    (lines), ``refusal`` (a line, or None: a spin-up of a crystal that the
    pinning does not hold, or a rotation the crystal does not survive) and
    ``refusal_stage`` (its stage's name).
    """

    cfg, sched = plan.cfg, plan.schedule
    n_ions = len(plan.masses)
    orders = [t.order for t in cfg.pinning]
    warnings_: list[str] = []
    refusal = refusal_stage = None
    start0 = plan.crystal0.positions_m
    h0 = getattr(plan, "holding0", None)
    if h0 is None:
        h0 = assess(plan.potential(plan.f0_hz, 0.0, plan.pin_scales(0.0)),
                    plan.potential(plan.f0_hz, 0.0, np.zeros(len(orders))),
                    config_terms(cfg, plan.pin_scales(0.0)), start=start0, seed=cfg.search_seed)
    T = float(cfg.initial.temperature_k)
    init = {"verdict": h0.verdict, "order": h0.order or 0, "description": h0.describe(), "libration_hz": h0.f_lib_hz,
            "alpha_forward_rad_s2": h0.alpha_forward_rad_s2, "alpha_backward_rad_s2": h0.alpha_backward_rad_s2,
            "barrier_k": h0.barrier_j / K_B, "temperature_k": T,
            "barrier_over_kT": (h0.barrier_j / (K_B * T)) if (T > 0 and h0.held) else float("inf"),
            "f_rot_hz": plan.f0_hz}
    if h0.held and init["barrier_over_kT"] < BARRIER_KT_MIN:
        warnings_.append(f"at t = 0 the pinning barrier is {init['barrier_over_kT']:.3g} k_B T_initial "
                         f"({init['barrier_k'] * 1e3:.4g} mK x k_B against T = {T * 1e3:.4g} mK), below "
                         f"{BARRIER_KT_MIN:g}: the crystal hops between the pinning wells at its starting temperature")
    f_lim = plan.omega_radial_min / TWO_PI
    stages = []
    for i, st in enumerate(sched.stages):
        if not sched.spins(i):
            continue
        smp = sched.stage_samples(i, n_samples)
        a = smp["alpha_rad_s2"]
        if not np.any(a != 0.0):
            continue
        k = int(np.argmax(np.abs(a)))
        t_k, f_k = float(smp["t_s"][k]), float(smp["f_rot_hz"][k])
        s_k = smp["scale"][k] if smp["scale"].shape[1] else np.zeros(0)
        f_top = float(np.max(np.abs(smp["f_rot_hz"])))
        entry = {"stage": st.name, "t_s": t_k, "f_rot_hz": f_k, "f_rot_max_hz": f_top,
                 "f_rot_max_over_radial": f_top / f_lim, "alpha_needed_rad_s2": float(abs(a[k])),
                 "verdict": "none", "order": 0, "libration_hz": 0.0, "alpha_held_rad_s2": 0.0,
                 "margin": 0.0, "t_margin_s": t_k}
        theta = float(sched.theta_rad(t_k))
        try:
            h = assess(plan.potential(f_k, theta, s_k), plan.potential(f_k, theta, np.zeros(len(orders))),
                       config_terms(cfg, s_k), start=frame.rotate_positions(start0, theta), seed=cfg.search_seed)
        except PhysicsError as e:
            msg = (f"stage '{st.name}' asks for f_rot = {f_k / 1e3:.6g} kHz at t = {t_k * 1e3:.4g} ms, where the crystal "
                   f"is not stable: {e.expected}")
            refusal_stage = refusal_stage or st.name
            refusal = refusal or msg
            entry["error"] = e.expected
            stages.append(entry)
            continue
        entry.update(verdict=h.verdict, order=h.order or 0, libration_hz=h.f_lib_hz, description=h.describe())
        need = (f"asks up to {abs(a[k]):.4g} rad/s^2 (an f_rot ramp of {abs(a[k]) / TWO_PI / 1e6:.4g} kHz/ms) at "
                f"t = {t_k * 1e3:.4g} ms, f_rot = {f_k / 1e3:.6g} kHz")
        if not h.held:
            if n_ions > 1:
                refusal_stage = refusal_stage or st.name
                refusal = refusal or (f"stage '{st.name}' changes f_rot ({st.f_rot.v0 / 1e3:.6g} to {st.f_rot.v1 / 1e3:.6g} kHz) "
                                      f"and {need}, but the pinning does not hold the crystal: {h.reason}")
            else:
                warnings_.append(f"stage '{st.name}' changes f_rot, but one ion has no orientation: the spin-up turns nothing")
            stages.append(entry)
            continue
        s_all = smp["scale"][:, h.term] if smp["scale"].shape[1] else np.zeros(len(a))
        mg = schedule_margin(h, {"t_s": smp["t_s"], "alpha_rad_s2": a, "scale": s_all},
                             float(abs(s_k[h.term])) if len(s_k) else 0.0, orders)
        entry.update(alpha_held_rad_s2=float(h.alpha_held_rad_s2(a[k])), margin=mg["ratio"], t_margin_s=mg["t_s"])
        if mg["ratio"] < 1.0:
            warnings_.append(f"stage '{st.name}' asks {mg['needed_rad_s2']:.4g} rad/s^2 "
                             f"({mg['needed_rad_s2'] / TWO_PI / 1e6:.4g} kHz/ms) at t = {mg['t_s'] * 1e3:.4g} ms, but the "
                             f"pinning holds only {mg['held_rad_s2']:.4g} rad/s^2 ({mg['held_rad_s2'] / TWO_PI / 1e6:.4g} "
                             f"kHz/ms) there (margin {mg['ratio']:.3g}, {h.verdict}): expect slips")
        stages.append(entry)
    margins = [s["margin"] for s in stages]
    esc = escape_depth(cfg)
    if esc is not None:
        init["escape_depth_k"] = esc["depth_k"]
        init["escape_radius_m"] = esc["radius_m"]
        if T > 0 and esc["depth_k"] < BARRIER_KT_MIN * T:
            warnings_.append(f"the trap holds an ion against the order-{esc['order']} pinning only up to a saddle of "
                             f"{esc['depth_k'] * 1e3:.4g} mK x k_B at r = {esc['radius_m'] * 1e6:.4g} um, below "
                             f"{BARRIER_KT_MIN:g} k_B T_initial: hot ions run off and end non-finite")
    return {"initial": init, "stages": stages, "margin_min": float(min(margins)) if margins else float("inf"),
            "warnings": warnings_, "refusal": refusal, "refusal_stage": refusal_stage}


def preflight_group(pre: dict) -> dict:
    """The preflight as an HDF5 group of the result (``/preflight``; docs/results.md)."""
    st = pre["stages"]
    return {
        "margin_min": pre["margin_min"], "warnings": "\n".join(pre["warnings"]),
        "refusal": pre["refusal"] or "", "forced": bool(pre.get("forced", False)),
        "initial": {k: v for k, v in pre["initial"].items() if isinstance(v, (int, float, str))},
        "stage": [s["stage"] for s in st], "verdict": [s["verdict"] for s in st],
        "order": np.array([s["order"] for s in st], dtype=np.int64),
        "t_s": np.array([s["t_s"] for s in st], dtype=float),
        "f_rot_hz": np.array([s["f_rot_hz"] for s in st], dtype=float),
        "alpha_needed_rad_s2": np.array([s["alpha_needed_rad_s2"] for s in st], dtype=float),
        "alpha_held_rad_s2": np.array([s["alpha_held_rad_s2"] for s in st], dtype=float),
        "libration_hz": np.array([s["libration_hz"] for s in st], dtype=float),
        "margin": np.array([s["margin"] for s in st], dtype=float),
    }
