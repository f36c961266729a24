"""``mdrotor rotor``: quantum-rotor quantities, diffusion and coherence of a result or a config, as text or JSON.
"""

from __future__ import annotations

import json
import math

from mdrotor.analysis.laser import rotor_lines
from mdrotor.analysis.rotor import NULL_REASONS, json_safe, rotor_summary
from mdrotor.commands.common import add_common, diffusion_arg
from mdrotor.errors import InputError
from mdrotor.numfmt import plain, value_err


def add_parser(subparsers, help_text: str):
    """Add ``mdrotor rotor`` to the command line's subparsers."""
    p = subparsers.add_parser("rotor", help=help_text)
    p.add_argument("source", help="result file (.h5) or run config (.toml)")
    p.add_argument("--k", type=int, default=None, help="branch separation in quanta (default: the allowed-L spacing)")
    p.add_argument("--diffusion", default=None, metavar="D", help="angular-momentum diffusion constant in hbar^2/s (default: fitted or from the noise spectrum)")
    p.add_argument("--contrast", type=float, default=0.5, help="target contrast at the exchange time for the coherence budget (default 0.5)")
    p.add_argument("--drift-quanta", type=float, default=1.0, metavar="K",
                   help="with [[laser]] beams: how long each may stay on before L drifts (or spreads) by K quanta (default 1)")
    add_common(p)
    return p


def _symmetry_text(d: dict) -> str:
    """The crystal's symmetry turn and the sign of its permutation, in words."""
    N, c, st = d["symmetry_order"], d["symmetry_cycles"], d["exchange_statistics"]
    if N == 1:
        return "no turn maps the crystal onto itself (ions distinguishable)"
    sign = {"boson": "symmetric", "fermion": "antisymmetric"}.get(st, "of unknown sign")
    return f"a turn by 2 pi/{N} permutes the ions in {c} cycle{'s' if c > 1 else ''} of {N} ({sign})"


def text(d: dict) -> str:
    lines = [f"rotor of {d['n_ions']} ion(s) ({', '.join(sorted(set(d['species'])))}) from the {d['source_kind']} {d['source']}",
             (f"  rotating at {plain(d['f_rot_hz'] / 1e3)} kHz, L = {value_err(d['L_mean_hbar'], d.get('L_mean_err_hbar'))} hbar, "
              f"spread {value_err(d['L_std_hbar'], d.get('L_std_err_hbar'))} hbar" if d["source_kind"] == "result" else
              f"  rotating at {plain(d['f_rot_hz'] / 1e3)} kHz, L = {plain(d['L_mean_hbar'])} hbar (at the schedule's "
              "final rate; a config gives no spread)"),
             f"  moment of inertia I = {d['moment_of_inertia_kg_m2']:.6e} kg m^2 (centrifugally stretched), hbar/(2 pi I) = {d['hbar_over_I_hz']:.6g} Hz",
             f"    dynamic I_d = d(I w)/dw = {d['dynamic_moment_of_inertia_kg_m2']:.6e} kg m^2: d f_rot / dL = hbar/(2 pi I_d) = "
             f"{d['hbar_over_I_d_hz']:.6g} Hz per quantum (line spacing and widths, branch separation, phase diffusion)",
             f"  spin statistics: {d['statistics']}; {_symmetry_text(d)}: allowed L = {d['allowed_L_residue']} mod {d['allowed_L_mod']}",
             f"    assumes {d['statistics_assumption']}",
             ]
    if "pinning" in d:
        pn = d["pinning"]
        lines.append(f"  pinning at the end of the schedule: {pn['description']}"
                     + (f"; libration {pn['libration_hz'] / 1e3:.6g} kHz" if pn["verdict"] != "none" else ""))
    if d["pinned_at_end"]:
        lines.append("  caution: the pinning still holds the crystal at the end of the schedule, so it is no free rotor "
                     "(L is what the pinning imposes); the lines, times and coherence below are those of this crystal "
                     "rotating freely at this rate, as after a release that left it unchanged")
    known = all(math.isfinite(ln["width_hz"]) for ln in d["lines"])
    lines += ["", "  rotational lines L -> L + dL" + (" (width from the spread of L about the centre of mass):" if known else
                                                      f" (width n/a: {NULL_REASONS['L_std_hbar']}):")]
    for ln in d["lines"]:
        width = f"{ln['width_hz']:.4g} Hz" if math.isfinite(ln["width_hz"]) else "n/a"
        off = "" if ln["on_ladder"] else (f" (off the allowed ladder: L and L + dL are not both {d['allowed_L_residue']} "
                                          f"mod {d['allowed_L_mod']}, no line of identical ions in one internal state)")
        lines.append(f"    dL = {ln['dL']}: {ln['freq_hz'] / 1e3:14.6f} kHz, width {width}{off}")
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
        lines.append(f"  coherence time: none, {NULL_REASONS['coherence_time_s']}")
    lines += [
              f"  contrast at the exchange time: Ramsey {d['ramsey_contrast_at_exchange']:.4f}, echo {d['echo_contrast_at_exchange']:.4f}; "
              f"Ramsey at the revival {d['ramsey_contrast_at_revival']:.4f}",
              f"  the t^3 short-time law holds to 1 % until {d['short_time_law_valid_until_s'] * 1e3:.4g} ms",
              f"  budget: contrast {d['budget_contrast']:.3g} at the exchange time needs D <= {d['budget_diffusion_hbar2_per_s']:.4g} hbar^2/s,",
              f"          i.e. order-{d['noise_order']} field noise S <= {d['budget_psd_at_n_f_rot']:.4g} {d['budget_psd_unit']} at "
              f"{d['budget_psd_frequency_hz'] / 1e3:.6g} kHz (n f_rot)"]
    if d.get("lasers"):
        lines += rotor_lines(d["lasers"], d["f_rot_hz"])
    return "\n".join(lines)


def main(args) -> int:
    D = diffusion_arg(args.diffusion)
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
