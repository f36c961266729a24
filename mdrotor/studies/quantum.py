"""``mdrotor quantum``: the quantum rotor of a config beside its Monte-Carlo ensemble.

For a config (or a result file, whose config and trajectories are used):
the rigid quantum rotor through the schedule (:mod:`mdrotor.model.quantum`,
:mod:`mdrotor.physics.quantum_rotor`), ``P(L)`` at t = 0 and at every stage end
with its mean and spread, the discrete rotational lines at the end, and the
ensemble's ``L`` about the centre of mass at the same times (run here, or
read from the result file) with the distances and the verdict of
:mod:`mdrotor.analysis.quantum_compare`.
"""

from __future__ import annotations

import math
from pathlib import Path

import numpy as np

from mdrotor.analysis.quantum_compare import compare
from mdrotor.config.parse import from_text, load_config
from mdrotor.engine.run import run
from mdrotor.errors import InputError
from mdrotor.model.quantum import build
from mdrotor.physics.quantum_rotor import evolve, sideband_lines
from mdrotor.physics.rotor import hbar_over_I_hz
from mdrotor.results.status import usable
from mdrotor.results.store import check_writable, load_result, save_quantum

TWO_PI = 2.0 * math.pi




def number_in_range(text, key, lo, hi):
    try:
        x = float(text)
    except (TypeError, ValueError):
        x = math.nan
    if not (lo < x <= hi):
        raise InputError(key, f"expected a number in ({lo:g}, {hi:g}], got {text!r}", "command line")
    return x


def _ensemble_from_result(path):
    res = load_result(path)
    cfg = from_text(res.attrs["config_text"], str(path), res.attrs.get("config_dir"))
    out = {}
    for name, obs in [("initial", res.initial), *res.stages.items()]:
        if obs is None:
            continue
        ok = usable(obs.arrays["status"])
        out[name] = np.asarray(obs.arrays["L_com_hbar"])[ok]
    return cfg, out


def _ensemble_run(cfg, trajectories, progress):

    res = run(cfg, trajectories=trajectories, progress=progress)
    out = {}
    for name, obs in [("initial", res.initial), *res.stages.items()]:
        ok = usable(obs.arrays["status"])
        out[name] = np.asarray(obs.arrays["L_com_hbar"])[ok]
    return out


def quantum_report(source, *, overrides=(), trajectories=None, ensemble: bool = True, tol: float = 1e-3,
                   cut: float = 1e-4, records=None, seed=None, stretch: bool = True, progress: bool = False,
                   max_columns: int = 512, output=None) -> dict:
    """The quantum rotor of ``source`` beside its ensemble, as a JSON-ready dict.

    Parameters
    ----------
    source : path or Config
        A run config (``.toml``, or a loaded Config) or a result file
        (``.h5``: its config, and its trajectories as the ensemble).
    overrides : sequence of str
        ``key.path=value`` overrides (configs only).
    trajectories : int, optional
        Ensemble size when the ensemble is run.
    ensemble : bool
        False: the quantum rotor only.
    tol, cut, records, seed, stretch, max_columns
        See :func:`mdrotor.physics.quantum_rotor.evolve` and
        :func:`mdrotor.model.quantum.build`; ``seed`` defaults to the
        config's ``run.seed``.
    progress : bool
        Progress bar of the ensemble run on stderr.
    output : path, optional
        Also write the result to this HDF5 file
        (:func:`mdrotor.results.store.save_quantum`); refused before any work when
        it cannot be written.
    """

    samples = None
    if output is not None:
        check_writable(output)
    if hasattr(source, "trap"):
        cfg, kind = source, "config"
    else:
        p = Path(source)
        if p.suffix in (".h5", ".hdf5"):
            if overrides:
                raise InputError("--set", "a result file carries its own config; --set applies to configs only",
                                 "command line")
            cfg, samples = _ensemble_from_result(p)
            kind = "result"
        else:
            cfg, kind = load_config(p, overrides), "config"
    if trajectories is not None and trajectories < 2:
        raise InputError("--trajectories", "expected at least 2 trajectories", "command line")
    if records is not None and records < 1:
        raise InputError("--records", "expected a positive number of noise records", "command line")
    seed = cfg.run.seed if seed is None else int(seed)
    if seed < 0:
        raise InputError("--seed", "expected a non-negative seed", "command line")
    setup = build(cfg, stretch=stretch, cut=cut)
    model = setup.model
    if max_columns < 1:
        raise InputError("--max-columns", "expected a positive number of columns", "command line")
    try:
        ev = evolve(model, setup.initial, tol=tol, records=records, seed=seed, max_columns=max_columns)
    except InputError as e:
        raise e.with_source(cfg.source)
    if ensemble and samples is None:
        samples = _ensemble_run(cfg, trajectories, progress)
    if not ensemble:
        samples = None

    lad = model.ladder
    I0 = setup.I0_kg_m2
    sched = cfg.schedule
    stages = []
    for d in ev.distributions:
        row = d.to_dict()
        row["f_rot_hz"] = float(sched.f_rot_hz(d.t_s))
        if samples is not None and d.name in samples:
            row["ensemble"] = compare(d, samples[d.name], lad, seed=seed)
        stages.append(row)
    final = ev.final
    pinned_end = bool(np.any(model.amplitudes(np.array(sched.duration_s)) != 0))
    lines = None
    if not pinned_end:
        lines = sideband_lines(model, final, lad.spacing)
    noise = []
    for ch in model.kicks:
        r = np.asarray(ch.rate_per_s)
        noise.append({"label": ch.label, "kick_quanta": ch.quanta,
                      "D_max_hbar2_per_s": float(r.max() * ch.quanta**2),
                      "D_end_hbar2_per_s": float(r[-1] * ch.quanta**2)})
    pins = [{"order": c.order, "term": cfg.pinning[c.term].name, "power": c.power,
             "amplitude_at_rest_j": float(abs(complex(c.amplitude(0.0))))} for c in model.pinning]
    out = {
        "source": str(getattr(source, "source", source)), "source_kind": kind,
        "n_ions": cfg.n_ions, "species": [s.name for s in cfg.species],
        "moment_of_inertia_kg_m2": I0, "hbar_over_I_hz": hbar_over_I_hz(I0),
        "stretched": model.energy.stretched,
        "symmetry_order": setup.symmetry_order, "symmetry_cycles": setup.cycles, "statistics": setup.statistics,
        "allowed_L_spacing": lad.spacing, "allowed_L_offset": lad.offset,
        "pinning": pins, "f_lib_hz": setup.f_lib_hz, "f_lib_model_hz": setup.f_lib_model_hz,
        "nbar_libration": setup.nbar_libration, "temperature_k": setup.temperature_k, "holding": setup.holding,
        "noise": noise, "numerics": ev.numerics, "notes": list(setup.notes),
        "stages": stages, "pinned_at_end": pinned_end, "lines": lines,
    }
    fin = stages[-1].get("ensemble")
    if fin is not None:
        out["verdict"] = fin["verdict"]
        out["verdict_reason"] = fin["reason"]
        out["verdict_stage"] = stages[-1]["name"]
    if output is not None:
        save_quantum(out, output, cfg.text)
    return out


def fixed_digits(x: float, digits: int) -> str:
    """Fixed-point text without a negative zero."""
    t = f"{x:.{digits}f}"
    return t[1:] if t.lstrip("-").strip("0.") == "" and t.startswith("-") else t


def text(d: dict, n_lines: int = 8) -> str:
    sp = ", ".join(sorted(set(d["species"])))
    out = [f"quantum rotor of {d['n_ions']} ions ({sp}) from the {d['source_kind']} {d['source']}"]
    out.append(f"  I = {d['moment_of_inertia_kg_m2']:.6e} kg m^2 at rest"
               f" ({'stretched with L' if d['stretched'] else 'rigid'}), hbar/(2 pi I) = "
               f"{d['hbar_over_I_hz']:.6g} Hz")
    out.append(f"  symmetry: {d['symmetry_order']}-fold ({d['statistics']}); allowed L = "
               f"{d['allowed_L_offset']} mod {d['allowed_L_spacing']}")
    if d["holding"]:
        out.append(f"  pinning: {d['holding']}")
    for p in d["pinning"]:
        mult = "multiplier" if p["power"] == 1 else f"multiplier^{p['power']}"
        out.append(f"    energy harmonic {p['order']} of term {p['term']}: {p['amplitude_at_rest_j']:.4e} J x {mult}")
    if d["f_lib_model_hz"] is not None:
        lib = f"  libration at t = 0: rotor well {d['f_lib_model_hz'] / 1e3:.6g} kHz"
        if d["f_lib_hz"] is not None:
            lib += f" (crystal's mode {d['f_lib_hz'] / 1e3:.6g} kHz)"
        out.append(lib)
    nb = d["nbar_libration"]
    out.append("  initial: " + ("ground state" if d["temperature_k"] == 0 else
                                f"thermal, T = {d['temperature_k'] * 1e6:.4g} uK")
               + (f" (libration nbar = {nb:.4g})" if nb is not None else "")
               + f", {d['numerics']['levels']} levels (weight left out {d['numerics']['thermal_weight_left_out']:.1e})")
    for n in d["noise"]:
        out.append(f"  noise: {n['label']}, kicks +-{n['kick_quanta']}, D up to {n['D_max_hbar2_per_s']:.4g} hbar^2/s")
    nm = d["numerics"]
    out.append(f"  numerics: tol {nm['tol']:g} (relative frequency error of a step), {nm['steps']} steps"
               + (f" (dt {nm['dt_min_s'] * 1e6:.3g}-{nm['dt_max_s'] * 1e6:.3g} us)" if nm["steps"] else "")
               + f", window <= {nm['window_max']} L values, {nm['columns']} columns, {nm['cpu_s']:.1f} s CPU"
               + f" ({nm['wall_s']:.1f} s wall)")
    out.append("")
    has_ens = any("ensemble" in s for s in d["stages"])
    head = f"  {'stage':<12} {'t (ms)':>9} {'f_rot (kHz)':>12} {'<L> quantum':>14} {'sigma_L quantum':>16}"
    if has_ens:
        head += f"   {'<L> ensemble':>22} {'sigma_L ensemble':>18} {'TV (sampling 99%)':>18}"
    out.append(head)
    for s in d["stages"]:
        qerr = f" +- {s['L_std_err_hbar']:.2g}" if s["L_std_err_hbar"] else ""
        row = (f"  {s['name']:<12} {s['t_s'] * 1e3:9.4f} {s['f_rot_hz'] / 1e3:12.4f} {fixed_digits(s['L_mean_hbar'], 2):>14} "
               f"{s['L_std_hbar']:10.3f}{qerr:>6}")
        e = s.get("ensemble")
        if e is not None:
            row += (f"   {fixed_digits(e['mean_hbar'], 2):>12} +- {e['mean_err_hbar']:<6.2g} {e['std_hbar']:9.3f} +- {e['std_err_hbar']:<5.2g}"
                    f" {e['tv']:8.3f} ({e['tv_null_99']:.3f})")
        out.append(row)
    if d["lines"] is not None:
        ln = d["lines"]
        out.append("")
        sense = "+" if ln["dL"] > 0 else "-"   # quanta added in the sense of rotation (frequencies > 0)
        out.append(f"  lines L -> L {sense} {abs(ln['dL'])} at the end: centre {ln['centre_hz'] / 1e3:.6f} kHz, rms width "
                   f"{ln['width_hz']:.4g} Hz, {ln['line_spacing_hz']:.4g} Hz apart")
        order = sorted(range(len(ln["weight"])), key=lambda i: -ln["weight"][i])[:n_lines]
        for i in sorted(order, key=lambda i: ln["L"][i]):
            out.append(f"    L = {ln['L'][i]:>8d}: {ln['freq_hz'][i] / 1e3:.6f} kHz  P = {ln['weight'][i]:.4f}")
    elif d["pinned_at_end"]:
        out.append("")
        out.append("  the pinning is on at the end: no free-rotor lines")
    if d.get("verdict") is not None:   # absent without the ensemble (None when read back from a file)
        e = d["stages"][-1]["ensemble"]
        out.append("")
        out.append(f"  semiclassical answer at the end of '{d['verdict_stage']}': {d['verdict'].upper()}: {d['verdict_reason']}")
        out.append(f"    (ensemble of {e['n']}, L about the centre of mass, shifted by {e['shift_hbar']:+d} hbar to align "
                   f"the means; mean difference {e['mean_diff_hbar']:+.3g} +- {e['mean_diff_err_hbar']:.2g} hbar)")
        out.append(f"    criterion: holds if |d sigma| + 2 err <= {e['rel_tol']:.0%} of the quantum spread and TV <= its "
                   f"sampling 99th percentile; fails if |d sigma| - 2 err exceeds that or TV exceeds it by {e['tv_tol']:g}")
    for n in d["notes"]:
        out.append(f"  note: {n}")
    return "\n".join(out)


