"""The ``run`` workflow: config -> plan -> initial states -> kernels -> Result."""

from __future__ import annotations

import datetime as _dt
import json
import sys
import time
from pathlib import Path

import numpy as np
from scipy.constants import k as KB

from . import __version__

TWO_PI = 2.0 * np.pi


def run(cfg, *, trajectories: int | None = None, seed: int | None = None, threads: int | None = None,
        chunk: int | None = None, progress: bool = False, order: np.ndarray | None = None):
    """Monte-Carlo spin-up / release run.

    Parameters
    ----------
    cfg : mdrotor.config.Config
    trajectories, seed, threads, chunk : optional overrides of ``[run]``.
    progress : bool
        Show a tqdm progress bar on stderr.
    order : array of int, optional
        Trajectory indices to run, in this order (default 0..T-1). Each
        trajectory's result depends only on (seed, index).

    Returns
    -------
    mdrotor.result.Result
    """
    from .engine import initial_states, integrate, make_plan
    from .result import Result, observation_from_raw

    opts = cfg.run
    n_traj = int(trajectories if trajectories is not None else opts.trajectories)
    seed = int(seed if seed is not None else opts.seed)
    threads = threads if threads is not None else opts.threads
    _set_threads(threads)
    chunk = int(chunk if chunk is not None else opts.chunk)
    if chunk == 0:  # auto: about four work items per thread; results do not depend on it
        chunk = int(np.clip(n_traj // (4 * _get_threads()), 32, 256))
    plan = make_plan(cfg)
    pre = _preflight(plan)
    idx = np.arange(n_traj) if order is None else np.asarray(order)
    pos, vel = initial_states(plan, seed, idx)
    phases = plan.rf_phases(seed, idx) if plan.rf else None
    noise_state = plan.noise.new_state(seed, idx) if plan.noise is not None else None
    bar = None
    if progress:
        from tqdm import tqdm

        bar = tqdm(total=plan.n_steps * len(idx), unit="traj-step", unit_scale=True, file=sys.stderr,
                   desc="mdrotor run", leave=False)
    try:
        raw = integrate(plan, pos, vel, chunk=chunk, progress=bar, rf_phases=phases, noise_state=noise_state)
    finally:
        if bar is not None:
            bar.close()
    if order is not None:  # back to index order
        inv = np.argsort(idx)
        for obs in [raw.initial, *raw.stages.values()]:
            for k, v in obs.items():
                if isinstance(v, np.ndarray) and v.shape[:1] == (len(idx),):
                    obs[k] = v[inv]
    sched = cfg.schedule
    bounds = sched.boundaries_s
    stages = {name: observation_from_raw(name, float(bounds[i + 1]), obs)
              for i, (name, obs) in enumerate(raw.stages.items())}
    initial = observation_from_raw("initial", 0.0, raw.initial)
    attrs = {
        "package_version": __version__,
        "config_text": cfg.text,
        "config_source": cfg.source,
        "seed": np.uint64(seed),
        "dt_s": plan.dt_s,
        "n_steps": plan.n_steps,
        "n_trajectories": n_traj,
        "integrator": cfg.run.integrator,
        "stage_names": [s.name for s in sched.stages],
        "stage_steps": np.array(plan.stage_steps),
        "stage_dt_s": np.array(plan.stage_dt),
        "f_fast_hz": plan.f_fast_hz,
        "wall_s": raw.wall_s,
        "traj_steps_per_s": plan.n_steps * n_traj / raw.wall_s if raw.wall_s > 0 else float("nan"),
        "threads": _get_threads(),
        "created": _dt.datetime.now(_dt.timezone.utc).isoformat(timespec="seconds"),
        "species": [s.name for s in cfg.species],
        "moment_of_inertia_kg_m2": plan.crystal0.moment_of_inertia_kg_m2,
        "lag_order": plan.lag_n,
        "status_bits": "1 slipped, 2 lost ion, 4 reordered, 8 non-finite",
        "notes": "; ".join(plan.notes),
        "preflight_margin_min": pre["margin_min"],
        "preflight_warnings": "\n".join(pre["warnings"]),
    }
    grid = np.linspace(0.0, sched.duration_s, 1001)
    schedule = {"t_s": grid, "f_rot_hz": sched.f_rot_hz(grid), "theta_rad": sched.theta_rad(grid),
                "stage_bounds_s": bounds, "stage_names": [s.name for s in sched.stages]}
    if len(cfg.pinning):
        schedule["pinning_strength_si"] = np.stack([sched.pinning_scale(grid, p) * t.strength for p, t in enumerate(cfg.pinning)], axis=-1)
    series = _series_arrays(raw.series) if raw.series else None
    from .pinning import preflight_group

    extra = {"preflight": preflight_group(pre)}
    if plan.rf:
        extra["micromotion"] = micromotion_report(plan, raw)
    if plan.noise is not None:
        from .noise import run_rates

        rates = run_rates(plan, raw)
        if rates:
            extra["noise"] = rates
    return Result(attrs, initial, stages, series, schedule, extra)


def _preflight(plan) -> dict:
    """The pinning core's preflight (:func:`mdrotor.pinning.preflight`):
    refuse a spin-up the pinning does not hold unless ``run.force``."""
    from .errors import PhysicsError
    from .pinning import preflight

    pre = preflight(plan)
    if pre["refusal"]:
        if not plan.cfg.run.force:
            raise PhysicsError(f"stage.{pre['refusal_stage']}", pre["refusal"] + " (run.force = true, or mdrotor run "
                               "--force, runs it anyway)", plan.cfg.source)
        pre["forced"] = True
        pre["warnings"].insert(0, "forced (run.force): " + pre["refusal"])
    return pre


def micromotion_report(plan, raw) -> dict:
    """Intrinsic micromotion of the rotating crystal at the end of the run.

    Each ion at distance r_i from the RF null moves on the RF orbit with
    amplitude (q_i / 2) r_i per in-plane axis (lowest order, Leibfried et al.,
    Rev. Mod. Phys. 75, 281 (2003); for a stray-field displacement the same
    law is the excess micromotion of D.J. Berkeland et al., J. Appl. Phys.
    83, 5025 (1998)), so its time-averaged micromotion kinetic energy is
    m_i (q_i W r_i)^2 / 16 (x and y together). The measured value is the
    RF-period average of the kinetic energy minus that of the secular
    velocity, averaged over trajectories.
    """
    from .stats import mean_sem

    fin = list(raw.stages.values())[-1]
    ok = (fin["status"] & (2 | 8)) == 0
    f_end = float(np.mean(fin["f_rot_hz"][ok])) if np.any(ok) else 0.0
    t_end = plan.schedule.duration_s
    cr = plan.crystal_at(t_end, f_end)
    q = plan.cfg.trap.q_per_ion(plan.masses, plan.charges)
    W = TWO_PI * plan.f_drive_hz
    r = cr.positions_m
    radius = np.hypot(r[:, 0], r[:, 1])
    ke = float(np.sum(plan.masses[:, None] * (q * W * r) ** 2 / 16.0))
    meas, err = mean_sem(fin["micromotion_ke_j"][ok])
    return {"amplitude_radial_m": 0.5 * np.abs(q[:, 0]) * radius, "amplitude_axial_m": 0.5 * np.abs(q[:, 2] * r[:, 2]),
            "radius_m": radius, "f_rot_hz": f_end,
            "ke_lowest_order_j": ke, "ke_measured_j": meas, "ke_measured_err_j": err}


def _series_arrays(points: list) -> dict:
    m = max(len(p["mode_n_mean"]) for p in points)
    e = np.full((len(points), m), np.nan)
    for i, p in enumerate(points):
        e[i, : len(p["mode_n_mean"])] = p["mode_n_mean"]
    out = {k: np.array([p[k] for p in points]) for k in ("t_s", "L_mean_hbar", "L_std_hbar", "lag_mean_rad", "lag_std_rad", "lag_absmax_rad")}
    out["mode_n_mean"] = e
    out["stage"] = [p["stage"] for p in points]
    out["mode_labels"] = [",".join(p["mode_labels"]) for p in points]  # the columns of each row
    return out


def _set_threads(threads) -> None:
    import numba

    if threads:
        numba.set_num_threads(max(1, min(int(threads), numba.config.NUMBA_NUM_THREADS)))


def _get_threads() -> int:
    import numba

    return int(numba.get_num_threads())


# ---------------------------------------------------------------------------
# command line
# ---------------------------------------------------------------------------
def summary_dict(res) -> dict:
    """JSON-ready summary of a Result."""
    s = res.summary
    fin = res.final
    out = {k: (float(v) if isinstance(v, (float, np.floating)) else v) for k, v in s.items() if not isinstance(v, np.ndarray)}
    out["modes"] = [{"label": lab, "kind": k, "freq_hz": float(f), "n_mean": float(n), "n_err": float(e)}
                    for lab, k, f, n, e in zip(fin.modes["label"], fin.modes["kind"], fin.modes["freq_hz"], s["mode_n_mean"], s["mode_n_err"])]
    for k in ("dt_s", "n_steps", "n_trajectories", "wall_s", "traj_steps_per_s", "integrator", "threads"):
        v = res.attrs[k]
        out[k] = v.item() if hasattr(v, "item") else v
    out["seed"] = int(res.attrs["seed"])
    pre = res.extra.get("preflight")
    if pre is not None:
        init = pre.get("initial") or {k[len("initial."):]: v for k, v in pre.items() if k.startswith("initial.")}
        out["preflight"] = {"margin_min": float(pre["margin_min"]), "initial": dict(init),
                            "warnings": [w for w in str(pre.get("warnings", "")).split("\n") if w],
                            "stages": [{"stage": s, "verdict": v, "margin": float(mg)} for s, v, mg in
                                       zip(pre.get("stage", []), pre.get("verdict", []), np.atleast_1d(pre.get("margin", [])))]}
    out["stages"] = {name: {"L_mean_hbar": o.summary["L_mean_hbar"], "L_std_hbar": o.summary["L_std_hbar"],
                            "slip_fraction": o.summary["slip_fraction"], "differential_n_mean": o.summary["differential_n_mean"]}
                     for name, o in res.stages.items()}
    return out


def summary_text(res, path=None) -> str:
    s = res.summary
    a = res.attrs
    fin = res.final
    lines = []
    if path:
        lines.append(f"result: {path}")
    lines.append(f"{a['n_trajectories']} trajectories x {a['n_steps']} steps (dt = {a['dt_s'] * 1e9:.4g} ns, {a['integrator']}), "
                 f"seed {int(a['seed'])}, wall {a['wall_s']:.3g} s, {a['traj_steps_per_s']:.3e} trajectory-steps/s on {a['threads']} thread(s)")
    pre = res.extra.get("preflight") or {}
    for w in [w for w in str(pre.get("warnings", "")).split("\n") if w]:
        lines.append(f"WARNING (preflight): {w}")
    lines.append("")
    lines.append("  stage            t_end (ms)    L mean (hbar)          L spread (hbar)     slipped    diff. phonons")
    for name, o in res.stages.items():
        ss = o.summary
        lines.append(f"  {name:<15s} {o.t_s * 1e3:10.4g}   {ss['L_mean_hbar']:12.6g} +- {ss['L_mean_err_hbar']:<8.3g} "
                     f"{ss['L_std_hbar']:10.4g} +- {ss['L_std_err_hbar']:<8.2g} {ss['slip_fraction']:7.3f}   "
                     f"{ss['differential_n_mean']:9.4g} +- {ss['differential_n_err']:.2g}")
    lines.append("")
    lines.append(f"final ({fin.name}): L = {s['L_mean_hbar']:.6g} +- {s['L_mean_err_hbar']:.3g} hbar, spread {s['L_std_hbar']:.4g} +- {s['L_std_err_hbar']:.2g} hbar, "
                 f"f_rot = {s['f_rot_mean_hz'] / 1e3:.6g} kHz")
    lines.append(f"  slipped {s['slip_fraction']:.3f} +- {s['slip_fraction_err']:.3f}, lost {s['loss_fraction']:.3f} +- {s['loss_fraction_err']:.3f}, "
                 f"reordered {s['reorder_fraction']:.3f}, non-finite {s['nonfinite_fraction']:.3f}")
    lines.append("")
    lines.append("  mode  label              kind          freq (kHz)   mean phonons")
    for k, (lab, kind, f) in enumerate(zip(fin.modes["label"], fin.modes["kind"], fin.modes["freq_hz"])):
        lines.append(f"  {k:4d}  {lab:<18s} {kind:<13s} {f / 1e3:10.4f}   {s['mode_n_mean'][k]:10.4g} +- {s['mode_n_err'][k]:.2g}")
    lines.append(f"  differential total {s['differential_n_mean']:.4g} +- {s['differential_n_err']:.2g}, COM total {s['com_n_mean']:.4g} +- {s['com_n_err']:.2g}")
    nz = res.extra.get("noise")
    if nz:
        lines.append("")
        lines.append(f"noise rates over stage '{nz['stage']}' ({nz['t0_s'] * 1e3:.4g} to {nz['t1_s'] * 1e3:.4g} ms, {nz['n_trajectories']} trajectories"
                     f"{', pinned' if nz['pinned'] else ', free rotation'}):")
        orders = np.atleast_1d(nz.get("D_analytic_orders", [])).astype(int)
        d_inf = np.atleast_1d(nz.get("D_analytic_hbar2_per_s", []))
        d_win = np.atleast_1d(nz.get("D_window_hbar2_per_s", np.full(len(orders), np.nan)))
        zero = np.atleast_1d(nz.get("D_analytic_zero_by_symmetry", np.zeros(len(orders), dtype=bool))).astype(bool)
        win_total = float(np.sum(d_win[~zero])) if "D_window_total_hbar2_per_s" in nz else None
        if "D_fit_hbar2_per_s" in nz:
            line = (f"  L diffusion D (hbar^2/s): fitted "
                    f"{_fitted_rate(nz['D_fit_hbar2_per_s'], nz['D_fit_err_hbar2_per_s'], nz.get('D_fit_resolved'))}")
            if win_total is not None:
                line += f"; expected over this window {win_total:.4g}"
                if "D_fit_z" in nz:
                    line += f" (z = {nz['D_fit_z']:.2f})"
            line += f"; infinite time {float(np.sum(d_inf[~zero])):.4g} (rigid crystal at {nz['f_rot_hz'] / 1e3:.4g} kHz)"
            lines.append(line)
        for o, d, dw, z0 in zip(orders, d_inf, d_win, zero):
            name = f"    order {o}{' (uniform field)' if o == 1 else ''}: "
            if z0:
                lines.append(name + "0 (zero by symmetry: the crystal has no such moment)")
            else:
                lines.append(name + f"{d:.4g} hbar^2/s" + (f" (over this window {dw:.4g})" if np.isfinite(dw) else ""))
        if "turchette_quanta_per_s" in nz:
            tq = np.atleast_1d(nz["turchette_quanta_per_s"])
            lines.append(f"  COM heating (Turchette) x, y, z: {tq[0]:.4g}, {tq[1]:.4g}, {tq[2]:.4g} quanta/s (lab-frame COM modes)")
        res_h = np.atleast_1d(nz.get("heating_fit_resolved", [None] * len(nz["heating_labels"])))
        for lab, r, e, ok in zip(nz["heating_labels"], np.atleast_1d(nz["heating_fit_quanta_per_s"]),
                                 np.atleast_1d(nz["heating_fit_err_quanta_per_s"]), res_h):
            lines.append(f"  heating {lab:<16s} fitted {_fitted_rate(r, e, ok)} quanta/s")
    mm = res.extra.get("micromotion")
    if mm:
        lines.append("")
        lines.append(f"RF micromotion at the end (crystal rotating at {mm['f_rot_hz'] / 1e3:.4g} kHz), amplitude per ion:")
        for i, (ar, az, rad) in enumerate(zip(np.atleast_1d(mm["amplitude_radial_m"]), np.atleast_1d(mm["amplitude_axial_m"]),
                                              np.atleast_1d(mm["radius_m"]))):
            lines.append(f"  ion {i}: radial {ar * 1e9:8.2f} nm, axial {az * 1e9:8.2f} nm   (radius {rad * 1e6:.3f} um)")
        lines.append(f"  time-averaged micromotion kinetic energy: {mm['ke_measured_j'] / KB * 1e3:.4g} +- {mm['ke_measured_err_j'] / KB * 1e3:.2g} mK k_B "
                     f"(lowest order {mm['ke_lowest_order_j'] / KB * 1e3:.4g} mK k_B)")
        lines.append("  phonons and L are measured on the secular motion (two RF-period averages; see README)")
    return "\n".join(lines)


def _fitted_rate(value, err, resolved=None) -> str:
    """A fitted rate with its error, or "not resolved (< bound at 2 sigma)"
    (:func:`mdrotor.noise.fit_resolved`, :func:`mdrotor.noise.fit_upper_bound`)."""
    from .noise import RESOLVED_SIGMA, fit_resolved, fit_upper_bound

    value, err = float(value), float(err)
    if resolved is None:
        resolved = fit_resolved(value, err)
    if not resolved:
        return f"not resolved (< {fit_upper_bound(value, err):.2g} at {RESOLVED_SIGMA:g} sigma)"
    return f"{value:.4g} +- {err:.2g}"


def cli_run(args) -> int:
    from .config import load_config
    from .errors import InputError

    ov = list(args.overrides) + (["run.force=true"] if getattr(args, "force", False) else [])
    cfg = load_config(args.config, ov)
    if args.trajectories is not None and args.trajectories < 1:
        raise InputError("--trajectories", "expected a positive number of trajectories", "command line")
    if args.seed is not None and not 0 <= args.seed < 2**64:
        raise InputError("--seed", "expected a seed in [0, 2^64)", "command line")
    out = Path(args.output) if args.output else Path(Path(args.config).stem + ".h5")
    if not out.parent.exists():
        raise InputError("-o", f"the folder {str(out.parent)!r} does not exist", "command line")
    show = not args.quiet and sys.stderr.isatty()
    t0 = time.perf_counter()
    res = run(cfg, trajectories=args.trajectories, seed=args.seed, threads=args.threads, progress=show)
    if res.attrs.get("notes"):
        print(f"mdrotor: warning: {res.attrs['notes']}", file=sys.stderr)
    for w in str(res.attrs.get("preflight_warnings", "")).split("\n"):
        if w:
            print(f"mdrotor: warning: {w}", file=sys.stderr)
    res.save(out)
    if args.json:
        d = summary_dict(res)
        d["output"] = str(out)
        d["total_wall_s"] = time.perf_counter() - t0
        print(json.dumps(d))
    else:
        print(summary_text(res, out))
    return 0
