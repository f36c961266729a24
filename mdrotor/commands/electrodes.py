"""``mdrotor electrodes``: design check of a layout and waveform export.

::

    mdrotor electrodes LAYOUT.toml [--config RUN.toml] [--set KEY=VALUE ...]
                       [--set-layout KEY=VALUE ...] [--json]
    mdrotor electrodes LAYOUT.toml --config RUN.toml --waveform OUT.csv|OUT.h5
                       [--rate "10 MHz"] [--allow-over] [--json]

The first form prints the design check (:mod:`mdrotor.studies.design_check`);
the second writes the electrode voltages of the run's whole schedule
(:mod:`mdrotor.electrodes.waveform`) and prints a short summary. ``--set``
overrides keys of the run config, ``--set-layout`` keys of the layout file
(``--set-layout rf.amplitude='120 V'``, ``--set-layout segments.s.limit='10 V'``).
Bad input of any kind: one line on stderr naming the file and key, exit 2.
"""

from __future__ import annotations

import json
import math

from mdrotor import units
from mdrotor.config.parse import apply_override, load_config
from mdrotor.electrodes.layout import load_layout, parse_layout
from mdrotor.electrodes.torque_scan import RIPPLE_FLOOR
from mdrotor.electrodes.waveform import write_waveform
from mdrotor.errors import InputError
from mdrotor.inputfiles import read_text
from mdrotor.numfmt import jsonable
from mdrotor.results.store import check_writable
from mdrotor.studies.design_check import design_check, prepare_design

EXIT_INPUT = 2


def add_parser(subparsers, help_text: str):
    """Add ``mdrotor electrodes`` to the command line's subparsers."""
    p = subparsers.add_parser(
        "electrodes", help=help_text,
        description="Trap frequencies and RF null, multipole table, solved pinning voltages, and the run config's crystal "
                    "in the full electrode field (pinned or not, libration, slip margin against the planned spin-up, "
                    "stray multipoles); or, with --waveform, the electrode voltages of the whole schedule. Voltages must "
                    "stay within the trap's rated limits and the lab's safety rules.")
    p.add_argument("layout", help="electrode layout (TOML)")
    p.add_argument("--config", default=None, metavar="RUN.toml",
                   help="run config: crystal, pinning order and strength (the voltage target), schedule")
    p.add_argument("--set", dest="overrides", action="append", default=[], metavar="KEY=VALUE",
                   help="override a run-config key, e.g. --set pinning.strength='2e10 V/m^3' (repeatable)")
    p.add_argument("--set-layout", dest="layout_overrides", action="append", default=[], metavar="KEY=VALUE",
                   help="override a layout key, e.g. --set-layout rf.amplitude='120 V' (repeatable)")
    p.add_argument("--waveform", default=None, metavar="OUT.csv|OUT.h5",
                   help="write the electrode voltages of the whole schedule (needs --config) instead of the check")
    p.add_argument("--rate", default="10 MHz", metavar="FREQ", help="waveform sample rate (default '10 MHz')")
    p.add_argument("--allow-over", action="store_true",
                   help="write waveform samples over a channel's limit (reported) instead of refusing (exit 2)")
    p.add_argument("--json", action="store_true", help="print one JSON object instead of text")
    return p


def _load_layout(path, overrides):
    import tomllib


    if not overrides:
        return load_layout(path)
    src = str(path)
    text = read_text(path, "layout")
    try:
        data = tomllib.loads(text)
    except tomllib.TOMLDecodeError as exc:
        raise InputError("", f"not valid TOML: {exc}", src) from None
    for ov in overrides:
        apply_override(data, ov, src)
    return parse_layout(data, src)




def _khz(f):
    return "-" if f is None else f"{f / 1e3:.6g} kHz"


def _pct(x):
    return "-" if x is None else f"{x * 100:+.3g} %"


def check_text(d: dict) -> str:
    """Human-readable report of :func:`design_check`."""
    L = []
    L.append(f"electrode design check: {d['layout_name']} ({d['layout']})")
    if d["config"]:
        L.append(f"run config: {d['config']}")
    L.append(f"CAUTION: {d['caution']}")
    rf = d["rf"]
    L.append("")
    L.append(f"RF pseudopotential ({rf['v_rf']:.4g} V amplitude at {rf['f_drive_hz'] / 1e6:.6g} MHz)")
    L.append(f"  RF null              ({', '.join(f'{x:.4f}' for x in rf['null_um'])}) um, residual |E_rf| {rf['null_field_v_per_m']:.2g} V/m")
    L.append(f"  secular frequencies  {', '.join(f'{f / 1e3:.6g}' for f in rf['secular_hz'])} kHz (principal axes, ascending)")
    if "run_config_secular_xyz_hz" in rf:
        L.append(f"  x, y, z              {', '.join(f'{f / 1e3:.6g}' for f in rf['secular_xyz_hz'])} kHz; run config "
                 f"{', '.join(f'{f / 1e3:.6g}' for f in rf['run_config_secular_xyz_hz'])} kHz")
    L.append(f"  Mathieu q            {', '.join(f'{x:.4g}' for x in rf['q'])}")
    L.append(f"  depth                {rf['depth_ev']:.4g} eV")
    tb = d["table"]
    L.append("")
    L.append(f"multipole table of the dc channels: |k_n| per volt (V/m^n per V), about "
             f"({', '.join(f'{x * 1e6:.4g}' for x in tb['center_m'])}) um, fit radius {tb['radius_m'] * 1e6:.4g} um")
    L.append("  channel      limit V  " + "".join(f"{'n=' + str(k):>11s}" for k in range(1, tb["order"] + 1)) + "   residual V/V")
    for r in tb["channels"]:
        if r["role"] != "dc":
            continue
        L.append(f"  {r['channel']:<12s} {r['limit_v']:7.4g}  " + "".join(f"{x:11.3e}" for x in r["k_abs_per_v"])
                 + f"   {r['residual_rms_v_per_v']:.2e}")
    t = d["target"]
    n = t["order"]
    p = d["plan"]
    L.append("")
    L.append(f"pinning target: order {n}, c = {t['strength_si']:.4g} V/m^{n} (from {t['from']})")
    L.append(f"solved voltages, V(theta) = static + amplitude cos({n} theta - phase), theta the pinning angle:")
    L.append("  channel      static V  amplitude V  phase deg   peak/limit")
    for ch in p["channels"]:
        if ch["amplitude_v"] == 0 and ch["static_v"] == 0:
            continue
        pk = abs(ch["static_v"]) + ch["amplitude_v"]
        L.append(f"  {ch['name']:<12s} {ch['static_v']:8.4f}  {ch['amplitude_v']:11.4f}  {math.degrees(ch['phase_rad']):9.2f}"
                 f"   {pk:.4g} / {ch['limit_v']:.4g} V")
    kc = complex(p["k_corot"]["re"], p["k_corot"]["im"])
    kk = complex(p["k_counter"]["re"], p["k_counter"]["im"])
    L.append(f"  achieved: co-rotating {abs(kc):.6g} V/m^{n}, counter-rotating {abs(kk):.3g} V/m^{n}; "
             f"target {'reached' if p['reached'] else 'NOT reached'}")
    unw = p["unwanted"][:4]
    if unw:
        L.append("  largest unwanted terms (rms on the crystal sphere / target's): "
                 + ", ".join(f"(l={u['l']}, m={u['m']}) {u['rel'] * 100:.2g} %" for u in unw))
    if "full" not in d:
        return _closing(L, d)
    fu, fi, cm = d["full"], d["fitted"], d["comparison"]
    lab = fu["lab"]
    L.append("")
    L.append("crystal in the full electrode field (pseudopotential of the rf electrodes per ion + dc electrodes at the solved voltages)")
    L.append(f"  lab frame: radius {lab['radius_m'] * 1e6:.4g} um, I = {lab['moment_of_inertia_kg_m2']:.4e} kg m^2")
    vd = fu["verdict"]
    if vd["verdict"] == "pinned":
        L.append(f"  pinned: yes, by order {fu['order']} (the crystal without the rotating voltages has "
                 f"|M_{n}| = {fu['first_order_rel']:.3g} of sum|Q| r^{n})")
    elif vd["verdict"] == "deformation":
        L.append(f"  pinned: only through its deformation, wells of order {fu['order']} (|M_{n}| = "
                 f"{fu['first_order_rel']:.2g} of sum|Q| r^{n} without the rotating voltages)")
    else:
        lo = fu["lowest_moment_order"]
        L.append(f"  pinned: NO ({vd['reason']}" + (f"; its lowest in-plane moment is order {lo})" if lo else ")"))
    if fu["held"]:
        L.append("                                 full field        fitted multipole    difference")
        L.append(f"  libration (normal mode)        {_khz(lab['f_lib_mode_hz']):<17s} {_khz(fi['f_lib_mode_hz']):<19s} {_pct(cm.get('f_lib_mode_rel'))}")
        L.append(f"  libration (relaxed crystal)    {_khz(lab['f_lib_held_hz']):<17s} {_khz(fi['f_lib_held_hz']):<19s} {_pct(cm.get('f_lib_held_rel'))}")
        fr = lab["f_lib_rigid_hz"]
        L.append(f"  libration (rigid crystal)      {_khz(fr['at_start']):<17s} {_khz(fi['f_lib_rigid_hz']):<19s} {_pct(cm.get('f_lib_rigid_rel'))}")
        L.append(f"  largest acceleration (rad/s^2) {lab['alpha_forward_rad_s2']:<17.4e} {fi['alpha_max_rad_s2']:<19.4e} {_pct(cm.get('alpha_rel'))}")
        L.append(f"    (relaxed crystal at the configured pattern angle; rigid libration {fr['min'] / 1e3:.6g} to "
                 f"{fr['max'] / 1e3:.6g} kHz over a turn of the pattern)")
        L.append(f"  pinning barrier                {lab['barrier_k'] * 1e3:.4g} mK x k_B")
    L.append(f"  largest ion displacement, full vs fitted: {cm['max_position_difference_m'] * 1e9:.3g} nm")
    if fu["held"]:
        L.append(f"  what the fitted picture misses: order-{n} torque {_pct(cm['leading_multipole_miss'])}, crystal radius "
                 f"{_pct(cm['radius_rel'])} -> rigid libration {_pct(cm['f_lib_predicted_rel'])} expected")
    sch = fu.get("schedule")
    if sch:
        L.append("")
        L.append(f"spin-up: needs at most {sch['alpha_needed_max_rad_s2']:.4e} rad/s^2 (2 pi df_rot/dt at t = "
                 f"{sch['t_alpha_needed_max_s'] * 1e3:.4g} ms), up to f_rot = {sch['f_max_hz'] / 1e3:.6g} kHz")
        if fu["held"]:
            L.append(f"  margin (held / needed, smallest over the schedule): {sch['margin']:.4g} at t = "
                     f"{sch['margin_t_s'] * 1e3:.4g} ms" if sch["margin_t_s"] is not None else "  margin: no acceleration planned")
            if sch["barrier_over_kT"] is not None:
                L.append(f"  pinning barrier / k_B T_initial = {sch['barrier_over_kT']:.4g} (T = {sch['initial_temperature_k'] * 1e3:.4g} mK; "
                         f"below {sch['barrier_kT_min']:g} is a problem)")
        rot = fu.get("rotating")
        if rot:
            if "error" in rot:
                L.append(f"  at f_rot = {rot['f_rot_hz'] / 1e3:.6g} kHz: {rot['error']}")
            else:
                L.append(f"  rotating frame at f_rot = {rot['f_rot_hz'] / 1e3:.6g} kHz (pinning x {rot['scale']:.3g}): libration "
                         f"{_khz(rot['f_lib_mode_hz'])} (fitted {_khz(rot['fitted_f_lib_mode_hz'])}; relaxed crystal "
                         f"{_khz(rot['f_lib_held_hz'])}), largest acceleration "
                         f"{rot['alpha_forward_rad_s2']:.4e} rad/s^2 (fitted {rot['fitted_alpha_max_rad_s2']:.4e})")
    st = fu["stray"]
    L.append("")
    L.append("stray multipoles' effect")
    L.append(f"  crystal centre offset from the RF null: ({', '.join(f'{x * 1e9:.3g}' for x in st['centre_offset_m'])}) nm; "
             f"out of plane: {st['out_of_plane_m'] * 1e9:.3g} nm")
    rel, what = ("rel_to_pinning", "the pinning torque") if fu["held"] else ("rel_to_ref", "n c sum|Q| r^n")
    if st["ripple"]:
        L.append(f"  torque ripple while rotating (rotating voltages; order, frequency in the pattern's frame, ratio to {what}): "
                 + ", ".join(f"{h['m']} at {h['per_f_rot']} f_rot {h[rel]:.2g}" for h in st["ripple"][:4]))
    if st["static"]:
        L.append(f"  static torque (pseudopotential, static voltages, stray field; order, ratio to {what}): "
                 + ", ".join(f"{h['m']} {h[rel]:.2g}" for h in st["static"][:3]))
    if not st["ripple"] and not st["static"]:
        L.append(f"  no torque harmonic other than the pinning above {RIPPLE_FLOOR:.0e} of {what}")
    if st["lag_ripple_rad"] is not None:
        L.append(f"  lag ripple over a turn: +-{st['lag_ripple_rad'] * 1e3:.3g} mrad")
    return _closing(L, d)


def _closing(L: list, d: dict) -> str:
    """The check's notes, its verdict and the safety caution, last in the text."""
    for note in d["notes"]:
        L.append(f"note: {note}")
    L.append("")
    L.append("verdict: " + ("OK" if d["verdict"]["ok"] else "PROBLEMS: " + "; ".join(d["verdict"]["problems"])))
    L.append(f"CAUTION: {d['caution']}")
    return "\n".join(L)


def waveform_text(d: dict) -> str:
    L = [f"CAUTION: {d['caution']}",
         f"wrote {d['path']} ({d['format']}): {d['n_samples']} samples at {d['rate_hz'] / 1e6:.6g} MHz over "
         f"{d['duration_s'] * 1e3:.6g} ms" + (f", {d['samples_per_period']:.3g} samples per pattern period at the fastest rotation"
                                             if d["samples_per_period"] else "")]
    L.append(f"pinning order {d['order']}, c = {d['strength_si']:.4g} V/m^{d['order']} (from {d['target_from']})")
    L.append("  channel      max |V|     at t (ms)   limit V   over-limit samples")
    for c in d["channels"]:
        L.append(f"  {c['name']:<12s} {c['max_abs_v']:9.4f}   {c['t_max_s'] * 1e3:9.5g}   {c['limit_v']:7.4g}   {c['over_samples']}")
    if d["over_samples"]:
        L.append(f"WARNING: {d['over_samples']} sample values exceed their channel's limit (written because of --allow-over)")
    else:
        L.append("every sample is within its channel's limit")
    L.append(f"CAUTION: {d['caution']}")
    return "\n".join(L)


def main(args) -> int:
    """Run ``mdrotor electrodes`` for parsed ``args`` (see :func:`add_electrodes_parser`)."""
    import warnings


    if args.overrides and args.config is None:
        raise InputError("--set", "overrides keys of the run config; expected --config RUN.toml (use --set-layout for the layout)",
                         "command line")
    layout = _load_layout(args.layout, args.layout_overrides)
    cfg = load_config(args.config, args.overrides) if args.config is not None else None
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        if args.waveform is not None:
            if cfg is None:
                raise InputError("--waveform", "follows the run config's schedule; expected --config RUN.toml", "command line")
            rate = units.parse(args.rate, "frequency", "--rate", "command line")
            check_writable(args.waveform, "--waveform")  # a missing or read-only folder refused before the work, as run -o
            ds = prepare_design(layout, cfg, depth=False)
            if not ds.plan.reached:
                key = "pinning.order" if not ds.plan.producible else "pinning.strength"
                raise InputError(key, f"{ds.plan.shortfall_text()}; expected a pinning the electrodes can make", cfg.source)
            d = write_waveform(args.waveform, layout, ds.plan, cfg, rate, allow_over=args.allow_over)
            d.update({"order": ds.plan.order, "strength_si": ds.plan.strength_si, "target_from": ds.target["from"],
                      "layout": layout.source, "config": cfg.source})
            print(json.dumps(jsonable(d)) if args.json else waveform_text(d))
            return 0

        d = design_check(layout, cfg)
    print(json.dumps(jsonable(d)) if args.json else check_text(d))
    return 0


