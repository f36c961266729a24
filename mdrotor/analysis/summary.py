"""The run summary of a Result: the JSON-ready dict and the text the
``run`` command prints (numbers written through :mod:`mdrotor.numfmt`).
"""

from __future__ import annotations

import numpy as np

from mdrotor.analysis.laser import run_lines
from mdrotor.analysis.noise_rates import RESOLVED_SIGMA, fit_resolved, fit_upper_bound
from mdrotor.numfmt import MISSING, interval, jsonable, plain, value_err
from mdrotor.physics.constants import K_B
from mdrotor.results.stats import FRACTION_INTERVAL


def _modes_list(obs) -> list:
    s = obs.summary
    means = s.get("mode_n_mean")
    errs = s.get("mode_n_err")
    out = []
    for k, (lab, kind, f) in enumerate(zip(obs.modes["label"], obs.modes["kind"], obs.modes["freq_hz"])):
        d = {"label": lab, "kind": kind, "freq_hz": float(f)}
        if means is not None and np.isfinite(means[k]):
            d["n_mean"] = float(means[k])
        if errs is not None and np.isfinite(errs[k]):
            d["n_err"] = float(errs[k])
        out.append(d)
    return out


def _obs_dict(obs) -> dict:
    """Scalar summary of an observation, its modes and their frame."""
    d = {k: v for k, v in obs.summary.items() if not isinstance(v, np.ndarray)}
    d["t_s"] = obs.t_s
    d["modes_frame"] = obs.frame
    d["modes_frame_f_rot_hz"] = obs.frame_f_rot_hz
    d["modes"] = _modes_list(obs)
    return d


def summary_dict(res) -> dict:
    """JSON-ready summary of a Result: the final summary (only numbers that
    could be computed; ``n_ok`` of ``n_trajectories`` used), the fraction
    intervals' kind, the final modes with their frame, every stage, the run's
    provenance and speed (compilation apart), the noise rates and the RF
    micromotion when the run has them."""

    fin = res.final
    out = _obs_dict(fin)
    out["fraction_interval"] = FRACTION_INTERVAL
    a = res.attrs
    for k in ("dt_s", "n_steps", "n_trajectories", "wall_s", "compile_s", "traj_steps_per_s", "integrator", "threads",
              "statistics", "series_interval_requested_s", "series_interval_s", "notes"):
        if k in a:
            out[k] = a[k]
    out["seed"] = int(a["seed"])
    pre = res.extra.get("preflight")
    if pre is not None:
        init = pre.get("initial") or {k[len("initial."):]: v for k, v in pre.items() if k.startswith("initial.")}
        out["preflight"] = {"margin_min": float(pre["margin_min"]), "initial": dict(init),
                            "warnings": [w for w in str(pre.get("warnings", "")).split("\n") if w],
                            "stages": [{"stage": s, "verdict": v, "margin": float(mg)} for s, v, mg in
                                       zip(pre.get("stage", []), pre.get("verdict", []), np.atleast_1d(pre.get("margin", [])))]}
    out["stages"] = {name: _obs_dict(o) for name, o in res.stages.items()}
    for name in ("noise", "micromotion", "laser"):
        if res.extra.get(name):
            out[name] = res.extra[name]
    return jsonable(out)


def _fractions_text(s: dict) -> str:
    parts = []
    for name, word in (("slip", "slipped"), ("loss", "lost"), ("reorder", "reordered"), ("nonfinite", "non-finite")):
        if f"{name}_fraction" in s:
            parts.append(f"{word} {interval(s[f'{name}_fraction'], s[f'{name}_fraction_lo'], s[f'{name}_fraction_hi'])}")
    return ", ".join(parts)


def mode_table(obs, indent: str = "  ") -> list:
    """Text lines of an observation's mode table, its frame in the heading."""

    s = obs.summary
    means, errs = s.get("mode_n_mean"), s.get("mode_n_err")
    lines = [f"{indent}modes ({obs.frame_text()}):",
             f"{indent}mode  label              kind          freq (kHz)   mean phonons"]
    for k, (lab, kind, f) in enumerate(zip(obs.modes["label"], obs.modes["kind"], obs.modes["freq_hz"])):
        n = value_err(means[k], errs[k] if errs is not None else None) if means is not None else MISSING
        lines.append(f"{indent}{k:4d}  {lab:<18s} {kind:<13s} {f / 1e3:10.4f}   {n}")
    return lines


def summary_text(res, path=None) -> str:
    s = res.summary
    a = res.attrs
    fin = res.final
    lines = []
    if path:
        lines.append(f"result: {path}")
    speed = (f", {plain(a['traj_steps_per_s'], 3)} trajectory-steps/s" if "traj_steps_per_s" in a else "")
    comp = f" (+ {plain(a['compile_s'], 3)} s kernel compilation or cache loading, not in the speed)" if "compile_s" in a else ""
    lines.append(f"{a['n_trajectories']} trajectories x {a['n_steps']} steps (dt = {plain(a['dt_s'] * 1e9, 4)} ns, {a['integrator']}), "
                 f"seed {int(a['seed'])}, wall {plain(a['wall_s'], 3)} s{comp}{speed} on {a['threads']} thread(s)")
    if "series_interval_s" in a:
        used = ", ".join(f"{plain(x * 1e6, 6)} us" for x in np.atleast_1d(a["series_interval_s"]))
        lines.append(f"time series every {plain(a['series_interval_requested_s'] * 1e6, 6)} us asked, rounded to whole steps: {used} (per stage)")
    pre = res.extra.get("preflight") or {}
    for w in [w for w in str(pre.get("warnings", "")).split("\n") if w]:
        lines.append(f"WARNING (preflight): {w}")
    lines.append("statistics of L, f_rot and phonons over the finite, bound trajectories; fractions of all trajectories "
                 "with Wilson 68 % intervals [lo, hi]")
    lines.append("")
    lines.append(f"  {'stage':<15s} {'t_end (ms)':>10s}  {'used':>11s}   {'L mean (hbar)':<20s} {'L spread (hbar)':<18s} "
                 f"{'slipped':<22s} diff. phonons")
    for name, o in res.stages.items():
        ss = o.summary
        used = f"{ss['n_ok']}/{ss['n_trajectories']}"
        slip = _fractions_text({k: v for k, v in ss.items() if k.startswith("slip_")}).replace("slipped ", "") or MISSING
        lines.append(f"  {name:<15s} {plain(o.t_s * 1e3, 4):>10s}  {used:>11s}   "
                     f"{value_err(ss.get('L_mean_hbar'), ss.get('L_mean_err_hbar')):<20s} "
                     f"{value_err(ss.get('L_std_hbar'), ss.get('L_std_err_hbar')):<18s} {slip:<22s} "
                     f"{value_err(ss.get('differential_n_mean'), ss.get('differential_n_err'))}")
    lines.append("")
    if s["n_ok"] == 0:
        lines.append(f"final ({fin.name}): no statistics: none of the {s['n_trajectories']} trajectories is finite and bound "
                     f"at the end (the result file is written and marked: attribute statistics)")
        lines.append(f"  {_fractions_text(s)}")
    else:
        f_rot = value_err(s["f_rot_mean_hz"] / 1e3, s.get("f_rot_mean_err_hz", float("nan")) / 1e3) if "f_rot_mean_hz" in s else MISSING
        lines.append(f"final ({fin.name}), {s['n_ok']} of {s['n_trajectories']} trajectories finite and bound: "
                     f"L = {value_err(s.get('L_mean_hbar'), s.get('L_mean_err_hbar'))} hbar, "
                     f"spread {value_err(s.get('L_std_hbar'), s.get('L_std_err_hbar'))} hbar, f_rot = {f_rot} kHz")
        lines.append(f"  {_fractions_text(s)}")
        lines.append("")
        lines += mode_table(fin)
        lines.append(f"  differential total {value_err(s.get('differential_n_mean'), s.get('differential_n_err'))}, "
                     f"COM total {value_err(s.get('com_n_mean'), s.get('com_n_err'))}")
    nz = res.extra.get("noise")
    if nz:
        lines += _noise_text(nz)
    if res.extra.get("laser"):
        lines += run_lines(res.extra["laser"])
    mm = res.extra.get("micromotion")
    if mm:
        lines.append("")
        lines.append(f"RF micromotion at the end (crystal rotating at {plain(mm['f_rot_hz'] / 1e3, 4)} kHz), amplitude per ion:")
        for i, (ar, az, rad) in enumerate(zip(np.atleast_1d(mm["amplitude_radial_m"]), np.atleast_1d(mm["amplitude_axial_m"]),
                                              np.atleast_1d(mm["radius_m"]))):
            lines.append(f"  ion {i}: radial {ar * 1e9:8.2f} nm, axial {az * 1e9:8.2f} nm   (radius {rad * 1e6:.3f} um)")
        mk = 1e3 / K_B
        lines.append(f"  time-averaged micromotion kinetic energy: {value_err(mm['ke_measured_j'] * mk, mm['ke_measured_err_j'] * mk)} mK k_B "
                     f"(lowest order {plain(mm['ke_lowest_order_j'] * mk, 4)} mK k_B)")
        lines.append("  phonons and L are measured on the secular motion (two RF-period averages; see docs/rf.md)")
    return "\n".join(lines)


def _fitted_rate(value, err, resolved=None) -> str:
    """A fitted rate with its error, or "not resolved (< bound at 2 sigma)"
    (:func:`mdrotor.analysis.noise_rates.fit_resolved`, :func:`mdrotor.analysis.noise_rates.fit_upper_bound`)."""

    value, err = float(value), float(err)
    if resolved is None:
        resolved = fit_resolved(value, err)
    if not resolved:
        return f"not resolved (< {fit_upper_bound(value, err):.2g} at {RESOLVED_SIGMA:g} sigma)"
    return value_err(value, err)


def _noise_text(nz: dict) -> list:
    """Text lines of the run's noise rates (:func:`mdrotor.analysis.noise_rates.run_rates`)."""

    lines = ["", f"noise rates over stage '{nz['stage']}' ({plain(nz['t0_s'] * 1e3, 4)} to {plain(nz['t1_s'] * 1e3, 4)} ms, "
                 f"{nz['n_trajectories']} trajectories{', pinned' if nz['pinned'] else ', free rotation'}):"]
    orders = np.atleast_1d(nz.get("D_analytic_orders", [])).astype(int)
    d_inf = np.atleast_1d(nz.get("D_analytic_hbar2_per_s", []))
    d_win = np.atleast_1d(nz.get("D_window_hbar2_per_s", np.full(len(orders), np.nan)))
    zero = np.atleast_1d(nz.get("D_analytic_zero_by_symmetry", np.zeros(len(orders), dtype=bool))).astype(bool)
    win_total = float(np.sum(d_win[~zero])) if "D_window_total_hbar2_per_s" in nz else None
    if "D_fit_hbar2_per_s" in nz:
        line = (f"  L diffusion D (hbar^2/s): fitted "
                f"{_fitted_rate(nz['D_fit_hbar2_per_s'], nz['D_fit_err_hbar2_per_s'], nz.get('D_fit_resolved'))}")
        if win_total is not None:
            line += f"; expected over this window {plain(win_total, 4)}"
            if "D_fit_z" in nz:
                line += f" (z = {nz['D_fit_z']:.2f})"
        line += f"; infinite time {plain(float(np.sum(d_inf[~zero])), 4)} (rigid crystal at {plain(nz['f_rot_hz'] / 1e3, 4)} kHz)"
        lines.append(line)
    for o, d, dw, z0 in zip(orders, d_inf, d_win, zero):
        name = f"    order {o}{' (uniform field)' if o == 1 else ''}: "
        if z0:
            lines.append(name + "0 (zero by symmetry: the crystal has no such moment)")
        else:
            lines.append(name + f"{plain(d, 4)} hbar^2/s" + (f" (over this window {plain(dw, 4)})" if np.isfinite(dw) else ""))
    if "turchette_quanta_per_s" in nz:
        tq = np.atleast_1d(nz["turchette_quanta_per_s"])
        lines.append(f"  COM heating (Turchette) x, y, z: {plain(tq[0], 4)}, {plain(tq[1], 4)}, {plain(tq[2], 4)} quanta/s (lab-frame COM modes)")
    res_h = np.atleast_1d(nz.get("heating_fit_resolved", [None] * len(nz["heating_labels"])))
    for lab, r, e, ok in zip(nz["heating_labels"], np.atleast_1d(nz["heating_fit_quanta_per_s"]),
                             np.atleast_1d(nz["heating_fit_err_quanta_per_s"]), res_h):
        lines.append(f"  heating {lab:<16s} fitted {_fitted_rate(r, e, ok)} quanta/s")
    return lines
