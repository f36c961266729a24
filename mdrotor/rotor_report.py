"""``mdrotor rotor``: quantum-rotor quantities of a result or a config.

Collects, for the crystal rotating at the end of the run (or of the config's
schedule): the moment of inertia with its centrifugal stretch, hbar / I, the
rotational lines adding 1..k quanta in the sense of rotation (positive
frequencies for either sense) with the width from the L spread, the
exchange time (branches k quanta apart turn by 2 pi / N relative to each
other) and the revival time, the spin statistics and allowed L ladder, the
angular-momentum diffusion constant D (given, fitted from the run's noise,
or analytic from the config's noise spectrum), the Ramsey and echo contrast
it leaves (:mod:`mdrotor.coherence`), and the coherence budget: the largest
D, and the noise PSD at n f_rot that produces it, that still leaves a chosen
contrast at the exchange time.
"""

from __future__ import annotations

import json
import math
from pathlib import Path

import numpy as np

# what the allowed-L ladder assumes (printed by the command, stated in docs/run.md)
SPIN_ASSUMPTION = ("identical ions, all in one internal (electronic and nuclear spin) state: only then is a rotation "
                   "by 2 pi / N an exchange of identical particles that restricts L; ions in different internal "
                   "states are distinguishable and every L is allowed")


def _from_result(path):
    import tomllib

    from . import load
    from .config import from_dict

    from .errors import InputError

    res = load(path)
    cfg = from_dict(tomllib.loads(res.attrs["config_text"]), str(path))
    s = res.summary
    if "L_mean_hbar" not in s or "f_rot_mean_hz" not in s:
        raise InputError("/summary", f"no statistics in this result: none of its {s.get('n_trajectories', '?')} trajectories "
                                     "is finite and bound at the end; expected a result with at least one", str(path))
    f = float(s["f_rot_mean_hz"])
    fitted = None
    nz = res.extra.get("noise")
    if nz and "D_fit_hbar2_per_s" in nz:
        fitted = (float(nz["D_fit_hbar2_per_s"]), float(nz["D_fit_err_hbar2_per_s"]))
    errs = {k: float(s[k]) for k in ("L_mean_err_hbar", "L_std_err_hbar") if k in s}
    return cfg, f, float(s["L_mean_hbar"]), float(s.get("L_std_hbar", 0.0)), fitted, "result", errs


def _from_config(path, overrides):
    from .config import load_config

    cfg = load_config(path, overrides)
    f = float(cfg.schedule.f_rot_hz(cfg.schedule.duration_s)) if cfg.schedule is not None else cfg.f_start_hz
    return cfg, f, None, 0.0, None, "config", {}


def rotor_summary(source, *, k: int | None = None, diffusion_hbar2_per_s: float | None = None,
                  contrast: float = 0.5, k_lines: int = 3, overrides=(), drift_quanta: float = 1.0) -> dict:
    """All rotor quantities as a JSON-ready dict (see module docstring).

    Parameters
    ----------
    source : path
        A result file (``.h5``) or a run config (``.toml``).
    k : int, optional
        Branch separation in quanta (default: the allowed ladder's spacing).
    diffusion_hbar2_per_s : float, optional
        D to use instead of the fitted or analytic one.
    contrast : float
        Target contrast of the coherence budget at the exchange time.
    drift_quanta : float
        With ``[[laser]]`` beams: the change of L (quanta) that bounds how
        long each beam may stay on (:func:`mdrotor.laser_report.rotor_beams`).
    """
    from . import coherence as coh
    from . import rotor
    from .errors import InputError
    from . import pinning
    from .statics import compute_crystal, model_potential

    p = Path(source)
    if p.suffix in (".h5", ".hdf5"):
        cfg, f, l_mean, sigma_l, fitted, kind, l_errs = _from_result(p)
    else:
        cfg, f, l_mean, sigma_l, fitted, kind, l_errs = _from_config(p, overrides)
    if not 0 < contrast < 1:
        raise InputError("--contrast", "expected a contrast between 0 and 1", "command line")
    sched = cfg.schedule
    t_end = sched.duration_s if sched is not None else 0.0
    scales = [sched.pinning_scale(t_end, j) for j in range(len(cfg.pinning))] if sched is not None else None
    cr = compute_crystal(model_potential(cfg, f, pin_scale=scales), f, seed=cfg.search_seed)
    I = cr.moment_of_inertia_kg_m2
    n_ions = cr.positions_m.shape[0]
    names = [s.name for s in cfg.species]
    identical = len(set(names)) == 1
    stat = cfg.species[0].statistics if identical else "mixed"
    from .quantum_build import config_ladder

    ladder = config_ladder(cfg)  # the crystal's own symmetry (mdrotor.rotor.allowed_L_ladder)
    mod, res_ = ladder.modulus, ladder.residue
    if k is None:
        k = int(mod) if mod > 1 else 1
    if l_mean is None:
        l_mean = float(rotor.L_from_f_rot(f, I))
    # lines that add |dL| quanta in the sense of rotation: k |f_rot| + k^2 hbar / (4 pi I) > 0 for either sense
    sense = -1 if f < 0 else 1
    lines = rotor.transition_frequencies_hz(abs(f), I, max(k_lines, k), sigma_l)
    t_ex = float(rotor.exchange_time_s(I, k, ladder.symmetry_order))
    t_rev = float(rotor.revival_time_s(I, k))
    # the lowest multipole order that the crystal feels (its noise torques kick L by n quanta)
    order = pinning.lowest_moment_order(cr.positions_m, cr.masses_kg, cr.charges_c) or 2
    m_n = pinning.moments(cr.positions_m, cr.masses_kg, cr.charges_c, [order])[order]
    holding = pinning.assess_config(cfg, f, scales=scales, start=cr.positions_m) if cfg.pinning else None
    # D: given > fitted from the run > analytic from the config's noise
    analytic = None
    from .noise import fit_resolved

    if cfg.noise:
        from .noise import model_from_config

        model = model_from_config(cfg)
        if not model.is_empty:
            stage = sched.stages[-1].name if sched is not None else None
            analytic = model.rotor_diffusion(cr.positions_m, cr.masses_kg, cr.charges_c, f, stage)["total"].D_hbar2_per_s
    if diffusion_hbar2_per_s is not None:
        D, d_src = float(diffusion_hbar2_per_s), "given"
    elif fitted is not None and fit_resolved(*fitted):  # an unresolved fit says only D < bound
        D, d_src = fitted[0], "fitted from the run"
    elif analytic is not None:
        D, d_src = float(analytic), "analytic from the noise spectrum"
    else:
        D, d_src = 0.0, "none (no noise given)"
    kick = order
    out = {
        "source": str(source), "source_kind": kind, "n_ions": n_ions, "species": names,
        "f_rot_hz": f, "L_mean_hbar": l_mean, "L_std_hbar": sigma_l, **l_errs,
        "moment_of_inertia_kg_m2": I, "hbar_over_I_hz": float(rotor.hbar_over_I_hz(I)),
        "statistics": stat, **ladder.to_dict(),
        "statistics_assumption": SPIN_ASSUMPTION,
        "k": int(k), "lines": [{"dL": sense * int(a), "freq_hz": float(b), "width_hz": float(c)}
                               for a, b, c in zip(lines.k, lines.centre_hz, lines.width_hz)],
        "exchange_time_s": t_ex, "revival_time_s": t_rev,
        "diffusion_hbar2_per_s": D, "diffusion_source": d_src, "noise_order": order, "kick_quanta": kick,
    }
    if holding is not None:
        out["pinning"] = holding.to_dict()
    if fitted is not None:
        out["diffusion_fitted_hbar2_per_s"], out["diffusion_fitted_err_hbar2_per_s"] = fitted
    if analytic is not None:
        out["diffusion_analytic_hbar2_per_s"] = float(analytic)
    if D > 0:
        out["coherence_time_s"] = float(coh.coherence_time_s(k, D, I, kind="ramsey", kick_quanta=kick))
        out["echo_coherence_time_s"] = float(coh.coherence_time_s(k, D, I, kind="echo", kick_quanta=kick))
    else:
        out["coherence_time_s"] = out["echo_coherence_time_s"] = float("inf")
    out["ramsey_contrast_at_exchange"] = float(coh.ramsey_contrast(t_ex, k, D, I, kick_quanta=kick))
    out["echo_contrast_at_exchange"] = float(coh.echo_contrast(t_ex, k, D, I, kick_quanta=kick))
    out["ramsey_contrast_at_revival"] = float(coh.ramsey_contrast(t_rev, k, D, I, kick_quanta=kick))
    out["short_time_law_valid_until_s"] = float(coh.short_time_validity_s(k, I, kick_quanta=kick))
    budget = float(coh.coherence_budget(contrast, t_ex, k, I, kick_quanta=kick))
    from .noise import psd_for_diffusion

    out["budget_contrast"] = contrast
    out["budget_diffusion_hbar2_per_s"] = budget
    out["budget_psd_at_n_f_rot"] = float(psd_for_diffusion(budget, order, m_n))
    out["budget_psd_unit"] = f"V^2/m^{2 * order}/Hz"
    out["budget_psd_frequency_hz"] = order * abs(f)
    if cfg.lasers:
        from .laser_report import rotor_beams

        out["lasers"] = rotor_beams(cfg, cr.positions_m, f, drift_quanta)
    return out


def _symmetry_text(d: dict) -> str:
    """The crystal's symmetry turn and the sign of its permutation, in words."""
    N, c, st = d["symmetry_order"], d["symmetry_cycles"], d["exchange_statistics"]
    if N == 1:
        return "no turn maps the crystal onto itself (ions distinguishable)"
    sign = {"boson": "symmetric", "fermion": "antisymmetric"}.get(st, "of unknown sign")
    return f"a turn by 2 pi/{N} permutes the ions in {c} cycle{'s' if c > 1 else ''} of {N} ({sign})"


def text(d: dict) -> str:
    from .numfmt import plain, value_err

    lines = [f"rotor of {d['n_ions']} ion(s) ({', '.join(sorted(set(d['species'])))}) from the {d['source_kind']} {d['source']}",
             (f"  rotating at {plain(d['f_rot_hz'] / 1e3)} kHz, L = {value_err(d['L_mean_hbar'], d.get('L_mean_err_hbar'))} hbar, "
              f"spread {value_err(d['L_std_hbar'], d.get('L_std_err_hbar'))} hbar" if d["source_kind"] == "result" else
              f"  rotating at {plain(d['f_rot_hz'] / 1e3)} kHz, L = {plain(d['L_mean_hbar'])} hbar (at the schedule's "
              "final rate; a config gives no spread)"),
             f"  moment of inertia I = {d['moment_of_inertia_kg_m2']:.6e} kg m^2 (centrifugally stretched), hbar/(2 pi I) = {d['hbar_over_I_hz']:.6g} Hz",
             f"  spin statistics: {d['statistics']}; {_symmetry_text(d)}: allowed L = {d['allowed_L_residue']} mod {d['allowed_L_mod']}",
             f"    assumes {d['statistics_assumption']}",
             ]
    if "pinning" in d:
        pn = d["pinning"]
        lines.append(f"  pinning at the end of the schedule: {pn['description']}"
                     + (f"; libration {pn['libration_hz'] / 1e3:.6g} kHz" if pn["verdict"] != "none" else ""))
    lines += ["", "  rotational lines L -> L + dL:"]
    for ln in d["lines"]:
        lines.append(f"    dL = {ln['dL']}: {ln['freq_hz'] / 1e3:14.6f} kHz, width {ln['width_hz']:.4g} Hz")
    lines += ["",
              f"  branches k = {d['k']} quanta apart: exchange (2 pi / {d['symmetry_order']}) after {d['exchange_time_s'] * 1e3:.6g} ms, "
              f"revival (2 pi) after {d['revival_time_s'] * 1e3:.6g} ms",
              f"  angular-momentum diffusion D = {d['diffusion_hbar2_per_s']:.4g} hbar^2/s ({d['diffusion_source']}; "
              f"order-{d['noise_order']} torques kick L by {d['kick_quanta']})"]
    if "diffusion_fitted_hbar2_per_s" in d:
        lines.append(f"    fitted {value_err(d['diffusion_fitted_hbar2_per_s'], d['diffusion_fitted_err_hbar2_per_s'])} hbar^2/s")
    if "diffusion_analytic_hbar2_per_s" in d:
        lines.append(f"    analytic {d['diffusion_analytic_hbar2_per_s']:.4g} hbar^2/s")
    if math.isfinite(d["coherence_time_s"]):
        lines.append(f"  coherence time (1/e): Ramsey {d['coherence_time_s'] * 1e3:.4g} ms, "
                     f"echo {d['echo_coherence_time_s'] * 1e3:.4g} ms")
    else:
        lines.append(f"  coherence time: none, {_REASONS['coherence_time_s']}")
    lines += [
              f"  contrast at the exchange time: Ramsey {d['ramsey_contrast_at_exchange']:.4f}, echo {d['echo_contrast_at_exchange']:.4f}; "
              f"Ramsey at the revival {d['ramsey_contrast_at_revival']:.4f}",
              f"  the t^3 short-time law holds to 1 % until {d['short_time_law_valid_until_s'] * 1e3:.4g} ms",
              f"  budget: contrast {d['budget_contrast']:.2f} at the exchange time needs D <= {d['budget_diffusion_hbar2_per_s']:.4g} hbar^2/s,",
              f"          i.e. order-{d['noise_order']} field noise S <= {d['budget_psd_at_n_f_rot']:.4g} {d['budget_psd_unit']} at "
              f"{d['budget_psd_frequency_hz'] / 1e3:.6g} kHz (n f_rot)"]
    if d.get("lasers"):
        from .laser_report import rotor_lines

        lines += rotor_lines(d["lasers"], d["f_rot_hz"])
    return "\n".join(lines)


def cli_rotor(args) -> int:
    from .errors import InputError

    D = None
    if args.diffusion is not None:
        try:
            D = float(args.diffusion)
        except ValueError:
            raise InputError("--diffusion", f"expected a number in hbar^2/s, got {args.diffusion!r}", "command line") from None
        if not (np.isfinite(D) and D >= 0):
            raise InputError("--diffusion", f"expected a finite, non-negative diffusion constant in hbar^2/s, got {args.diffusion!r}",
                             "command line")
    if args.k is not None and args.k < 1:
        raise InputError("--k", "expected a positive number of quanta", "command line")
    dq = getattr(args, "drift_quanta", 1.0)
    if not (math.isfinite(dq) and dq > 0):
        raise InputError("--drift-quanta", f"expected a finite, positive number of quanta, got {dq!r}", "command line")
    d = rotor_summary(args.source, k=args.k, diffusion_hbar2_per_s=D, contrast=args.contrast, overrides=args.overrides,
                      drift_quanta=dq)
    if args.json:
        print(json.dumps(json_safe(d), allow_nan=False))
    else:
        print(text(d))
    return 0


# why a quantity of rotor_summary has no finite value (JSON: null and "<key>_reason")
_REASONS = {
    "coherence_time_s": "no angular-momentum diffusion (D = 0): the contrast does not decay",
    "echo_coherence_time_s": "no angular-momentum diffusion (D = 0): the contrast does not decay",
    "budget_psd_at_n_f_rot": "the crystal has no multipole moment of this order: no such noise exerts a torque",
    "budget_diffusion_hbar2_per_s": "the contrast asked is kept at the exchange time whatever D",
    "time_drift_s": "the beam exerts no mean torque: L does not drift",
    "time_spread_s": "the beam gives no recoil diffusion of L",
    "time_first_photon_s": "the beam scatters no photons",
    "time_on_s": "the beam never moves L by the quanta asked",
}


def json_safe(d):
    """``d`` with every non-finite number replaced by null and a
    ``<key>_reason`` beside it saying why (JSON has no Infinity or NaN)."""
    if isinstance(d, dict):
        out = {}
        for k, v in d.items():
            if isinstance(v, (float, np.floating)) and not math.isfinite(v):
                out[k] = None
                out[f"{k}_reason"] = _REASONS.get(k, "not a finite number") + (
                    " (infinite)" if v == math.inf and k not in _REASONS else "")
            else:
                out[k] = json_safe(v)
        return out
    if isinstance(d, (list, tuple)):
        return [json_safe(x) for x in d]
    if isinstance(d, np.generic):
        return json_safe(d.item())
    return d
