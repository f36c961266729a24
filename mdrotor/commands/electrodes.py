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

Until the command is wired into ``mdrotor/cli.py`` it runs as
``python -m mdrotor.commands.electrodes LAYOUT.toml ...``.
"""

from __future__ import annotations

import json

from mdrotor import units
from mdrotor.config.parse import apply_override, load_config
from mdrotor.electrodes.layout import load_layout, parse_layout
from mdrotor.electrodes.waveform import write_waveform
from mdrotor.errors import InputError
from mdrotor.inputfiles import read_text
from mdrotor.studies.design_check import check_text, design_check, prepare_design

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


def _jsonable(x):
    import numpy as np

    if isinstance(x, dict):
        return {str(k): _jsonable(v) for k, v in x.items()}
    if isinstance(x, (list, tuple)):
        return [_jsonable(v) for v in x]
    if isinstance(x, complex):
        return {"re": x.real, "im": x.imag}
    if isinstance(x, np.ndarray):
        return _jsonable(x.tolist())
    if isinstance(x, (np.floating,)):
        return float(x)
    if isinstance(x, (np.integer,)):
        return int(x)
    if isinstance(x, np.bool_):
        return bool(x)
    if isinstance(x, float) and (x != x or x in (float("inf"), float("-inf"))):
        return None
    return x


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
            ds = prepare_design(layout, cfg, depth=False)
            if not ds.plan.reached:
                key = "pinning.order" if not ds.plan.producible else "pinning.strength"
                raise InputError(key, f"{ds.plan.shortfall_text()}; expected a pinning the electrodes can make", cfg.source)
            d = write_waveform(args.waveform, layout, ds.plan, cfg, rate, allow_over=args.allow_over)
            d.update({"order": ds.plan.order, "strength_si": ds.plan.strength_si, "target_from": ds.target["from"],
                      "layout": layout.source, "config": cfg.source})
            print(json.dumps(_jsonable(d)) if args.json else waveform_text(d))
            return 0

        d = design_check(layout, cfg)
    print(json.dumps(_jsonable(d)) if args.json else check_text(d))
    return 0


