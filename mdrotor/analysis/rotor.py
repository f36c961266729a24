"""``mdrotor rotor``: quantum-rotor quantities of a result or a config.

Collects, for the crystal rotating at the end of the run (or of the config's
schedule): the moment of inertia with its centrifugal stretch, hbar / I, the
dynamic moment of inertia I_d = d(I w)/dw (one more quantum changes the rate
by hbar / (2 pi I_d): the lines' quadratic term and widths, the relative
rotation of branches and their phase diffusion go with I_d), the
rotational lines adding 1..k quanta in the sense of rotation (positive
frequencies for either sense) with the width from the spread of L about the
centre of mass (NaN, said as null with a reason, without two usable
trajectories or from a config), the
exchange time (branches k quanta apart turn by 2 pi / N relative to each
other) and the revival time, the spin statistics and allowed L ladder, the
angular-momentum diffusion constant D (given, fitted from the run's noise,
or analytic from the config's noise spectrum), the Ramsey and echo contrast
it leaves (:mod:`mdrotor.physics.coherence`), and the coherence budget: the largest
D, and the noise PSD at n f_rot that produces it, that still leaves a chosen
contrast at the exchange time.
"""

from __future__ import annotations

import math
from pathlib import Path

import numpy as np

from mdrotor.analysis.laser import rotor_beams
from mdrotor.analysis.noise_rates import fit_resolved
from mdrotor.config.parse import from_text, load_config
from mdrotor.errors import InputError, PhysicsError
from mdrotor.model.build import assess_config, model_potential
from mdrotor.model.quantum import config_ladder
from mdrotor.physics import coherence as coh
from mdrotor.physics import pinning, rotor
from mdrotor.physics.noise import psd_for_diffusion
from mdrotor.physics.statics import compute_crystal, dynamic_moment_of_inertia
from mdrotor.results.result import Result
from mdrotor.results.stats import std_se
from mdrotor.results.status import usable
from mdrotor.results.store import load_result

# what the allowed-L ladder assumes (printed by the command, stated in docs/run.md)
SPIN_ASSUMPTION = ("identical ions, all in one internal (electronic and nuclear spin) state: only then is a rotation "
                   "by 2 pi / N an exchange of identical particles that restricts L; ions in different internal "
                   "states are distinguishable and every L is allowed")


def _from_result(res, path):
    cfg = from_text(res.attrs["config_text"], str(path), res.attrs.get("config_dir"))
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
    # the rate, and so the lines, move with L about the centre of mass (the COM's motion adds to L about the axis)
    fin = res.final.arrays
    l_com = np.asarray(fin["L_com_hbar"])[usable(np.asarray(fin["status"]))] if "L_com_hbar" in fin else np.zeros(0)
    errs["L_com_std_hbar"], errs["L_com_std_err_hbar"] = std_se(l_com)   # NaN from fewer than two
    return cfg, f, float(s["L_mean_hbar"]), float(s.get("L_std_hbar", math.nan)), fitted, "result", errs


def _from_config(path, overrides):
    cfg = load_config(path, overrides)
    f = float(cfg.schedule.f_rot_hz(cfg.schedule.duration_s)) if cfg.schedule is not None else cfg.f_start_hz
    return cfg, f, None, math.nan, None, "config", {"L_com_std_hbar": math.nan}


def rotor_summary(source, *, k: int | None = None, diffusion_hbar2_per_s: float | None = None,
                  contrast: float = 0.5, k_lines: int = 3, overrides=(), drift_quanta: float = 1.0) -> dict:
    """All rotor quantities as a JSON-ready dict (see module docstring).

    Parameters
    ----------
    source : Result or path
        A Result, a result file (``.h5``) or a run config (``.toml``).
    k : int, optional
        Branch separation in quanta (default: the allowed ladder's spacing).
    diffusion_hbar2_per_s : float, optional
        D to use instead of the fitted or analytic one.
    contrast : float
        Target contrast of the coherence budget at the exchange time.
    drift_quanta : float
        With ``[[laser]]`` beams: the change of L (quanta) that bounds how
        long each beam may stay on (:func:`mdrotor.analysis.laser.rotor_beams`).
    """

    if isinstance(source, Result):
        cfg, f, l_mean, sigma_l, fitted, kind, l_errs = _from_result(source, "<result>")
    elif Path(source).suffix in (".h5", ".hdf5"):
        cfg, f, l_mean, sigma_l, fitted, kind, l_errs = _from_result(load_result(source), source)
    else:
        cfg, f, l_mean, sigma_l, fitted, kind, l_errs = _from_config(source, overrides)
    if not 0 < contrast < 1:
        raise InputError("--contrast", "expected a contrast between 0 and 1", "command line")
    sched = cfg.schedule
    t_end = sched.duration_s if sched is not None else 0.0
    scales = [sched.pinning_scale(t_end, j) for j in range(len(cfg.pinning))] if sched is not None else None
    cr = compute_crystal(model_potential(cfg, f, pin_scale=scales), f, seed=cfg.search_seed)
    I = cr.moment_of_inertia_kg_m2
    n_ions = cr.positions_m.shape[0]
    if I == 0.0:
        why = "it has one ion" if n_ions < 2 else "its ions all lie on the rotation axis (a string along z)"
        raise PhysicsError("crystal", f"a crystal that can rotate about the trap axis; {why}, so it has no moment "
                                      "of inertia about z and no rotor quantities", str(source) if not isinstance(source, Result) else "<result>")
    names = [s.name for s in cfg.species]
    identical = len(set(names)) == 1
    stat = cfg.species[0].statistics if identical else "mixed"

    ladder = config_ladder(cfg)  # the crystal's own symmetry (mdrotor.physics.rotor.allowed_L_ladder)
    mod = ladder.modulus
    if k is None:
        k = int(mod) if mod > 1 else 1
    if l_mean is None:
        l_mean = float(rotor.L_from_f_rot(f, I))
    # what compares rotors of neighbouring L goes with I_d = d(I w)/dw (the stretched crystal's d f_rot/dL):
    # line spacing and width, the relative rotation of branches, phase diffusion
    I_d = dynamic_moment_of_inertia(cr.potential, f, seed=cfg.search_seed, start=cr.positions_m)
    # lines that add |dL| quanta in the sense of rotation: k |f_rot| + k^2 hbar / (4 pi I_d) > 0 for either sense;
    # the width from the spread of L about the centre of mass (unknown without two usable trajectories)
    sense = -1 if f < 0 else 1
    sigma_com = l_errs.get("L_com_std_hbar", math.nan)
    listed = list(range(1, k_lines + 1)) + ([k] if k > k_lines else [])   # 1..k_lines and the branches' own k
    lines = rotor.transition_frequencies_hz(abs(f), I_d, k_lines, sigma_com if math.isfinite(sigma_com) else 0.0,
                                            k_values=listed)
    widths = lines.width_hz if math.isfinite(sigma_com) else np.full(len(lines.k), math.nan)
    t_ex = float(rotor.exchange_time_s(I_d, k, ladder.symmetry_order))
    t_rev = float(rotor.revival_time_s(I_d, k))
    # the lowest multipole order that the crystal feels (its noise torques kick L by n quanta)
    order = pinning.lowest_moment_order(cr.positions_m, cr.masses_kg, cr.charges_c) or 2
    m_n = pinning.moments(cr.positions_m, cr.masses_kg, cr.charges_c, [order])[order]
    holding = assess_config(cfg, f, scales=scales, start=cr.positions_m) if cfg.pinning else None
    # D: given > fitted from the run > analytic from the config's noise
    analytic = None

    model = cfg.noise
    if model is not None:
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
        "dynamic_moment_of_inertia_kg_m2": I_d, "hbar_over_I_d_hz": float(rotor.hbar_over_I_hz(I_d)),
        "statistics": stat, **ladder.to_dict(),
        "statistics_assumption": SPIN_ASSUMPTION,
        "k": int(k), "lines": [{"dL": sense * int(a), "freq_hz": float(b), "width_hz": float(c), "on_ladder": bool(int(a) % mod == 0)}
                               for a, b, c in zip(lines.k, lines.centre_hz, widths)],
        "exchange_time_s": t_ex, "revival_time_s": t_rev,
        "diffusion_hbar2_per_s": D, "diffusion_source": d_src, "noise_order": order, "kick_quanta": kick,
    }
    # a crystal the pinning still holds turns with it: no free rotor (mdrotor quantum lists no lines then)
    out["pinned_at_end"] = bool(holding is not None and holding.held)
    if holding is not None:
        out["pinning"] = holding.to_dict()
    if fitted is not None:
        out["diffusion_fitted_hbar2_per_s"], out["diffusion_fitted_err_hbar2_per_s"] = fitted
    if analytic is not None:
        out["diffusion_analytic_hbar2_per_s"] = float(analytic)
    if D > 0:
        out["coherence_time_s"] = float(coh.coherence_time_s(k, D, I_d, kind="ramsey", kick_quanta=kick))
        out["echo_coherence_time_s"] = float(coh.coherence_time_s(k, D, I_d, kind="echo", kick_quanta=kick))
    else:
        out["coherence_time_s"] = out["echo_coherence_time_s"] = float("inf")
    out["ramsey_contrast_at_exchange"] = float(coh.ramsey_contrast(t_ex, k, D, I_d, kick_quanta=kick))
    out["echo_contrast_at_exchange"] = float(coh.echo_contrast(t_ex, k, D, I_d, kick_quanta=kick))
    out["ramsey_contrast_at_revival"] = float(coh.ramsey_contrast(t_rev, k, D, I_d, kick_quanta=kick))
    out["short_time_law_valid_until_s"] = float(coh.short_time_validity_s(k, I_d, kick_quanta=kick))
    budget = float(coh.coherence_budget(contrast, t_ex, k, I_d, kick_quanta=kick))

    out["budget_contrast"] = contrast
    out["budget_diffusion_hbar2_per_s"] = budget
    out["budget_psd_at_n_f_rot"] = float(psd_for_diffusion(budget, order, m_n))
    out["budget_psd_unit"] = f"V^2/m^{2 * order}/Hz"
    out["budget_psd_frequency_hz"] = order * abs(f)
    if cfg.lasers:
        out["lasers"] = rotor_beams(cfg, cr.positions_m, f, drift_quanta)
    return out








# why a quantity of rotor_summary has no finite value (JSON: null and "<key>_reason")
NULL_REASONS = {
    "coherence_time_s": "no angular-momentum diffusion (D = 0): the contrast does not decay",
    "echo_coherence_time_s": "no angular-momentum diffusion (D = 0): the contrast does not decay",
    "budget_psd_at_n_f_rot": "the crystal has no multipole moment of this order: no such noise exerts a torque",
    "budget_diffusion_hbar2_per_s": "the contrast asked is kept at the exchange time whatever D",
    "time_drift_s": "the beam exerts no mean torque: L does not drift",
    "time_spread_s": "the beam gives no recoil diffusion of L",
    "time_first_photon_s": "the beam scatters no photons",
    "time_on_s": "the beam never moves L by the quanta asked",
    "L_std_hbar": "no spread of L: a config gives none, a result needs two usable trajectories",
    "L_com_std_hbar": "no spread of L: a config gives none, a result needs two usable trajectories",
    "L_com_std_err_hbar": "no spread of L: a config gives none, a result needs two usable trajectories",
    "width_hz": "line width unknown: no spread of L (a config gives none, a result needs two usable trajectories)",
}


def json_safe(d):
    """``d`` with every non-finite number replaced by null and a
    ``<key>_reason`` beside it saying why (JSON has no Infinity or NaN)."""
    if isinstance(d, dict):
        out = {}
        for k, v in d.items():
            if isinstance(v, (float, np.floating)) and not math.isfinite(v):
                out[k] = None
                out[f"{k}_reason"] = NULL_REASONS.get(k, "not a finite number") + (
                    " (infinite)" if v == math.inf and k not in NULL_REASONS else "")
            else:
                out[k] = json_safe(v)
        return out
    if isinstance(d, (list, tuple)):
        return [json_safe(x) for x in d]
    if isinstance(d, np.generic):
        return json_safe(d.item())
    return d
