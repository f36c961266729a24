"""``mdrotor compare-trap``: the same config and seed with the pseudopotential and with the full RF force.
"""

from __future__ import annotations

import json
import sys

from mdrotor.commands.common import add_common
from mdrotor.config.parse import load_config
from mdrotor.numfmt import interval, jsonable, value_err
from mdrotor.studies.compare_trap import compare_trap


def add_parser(subparsers, help_text: str):
    """Add ``mdrotor compare-trap`` to the command line's subparsers."""
    p = subparsers.add_parser("compare-trap", help=help_text)
    p.add_argument("config", help="run config (TOML) with trap.f_drive")
    p.add_argument("--trajectories", type=int, default=None, help="number of trajectories (overrides run.trajectories)")
    p.add_argument("--seed", type=int, default=None, help="base seed (overrides run.seed)")
    p.add_argument("--threads", type=int, default=None, help="threads for the kernels (default: all cores)")
    p.add_argument("--quiet", action="store_true", help="no progress bar")
    add_common(p)
    return p


def text(cmp: dict, cfg) -> str:
    rf = cmp["results"]["rf"]
    lines = [f"pseudopotential vs full RF: {cfg.source}, f_drive = {cfg.trap.f_drive_hz / 1e6:.6g} MHz, "
             f"q = ({', '.join(f'{x:.4g}' for x in cfg.trap.q)}), a = ({', '.join(f'{x:.3g}' for x in cfg.trap.a)}), "
             f"{rf.attrs['n_trajectories']} trajectories, seed {int(rf.attrs['seed'])}",
             "",
             f"  {'quantity':<28s} {'pseudo':>22s} {'rf':>22s} {'rf - pseudo':>22s}   z"]
    for r in cmp["rows"]:
        flag = "  <- significant" if abs(r["z"]) > 3 else ""
        if "pseudo_lo" in r:
            va, vb = interval(r["pseudo"], r["pseudo_lo"], r["pseudo_hi"]), interval(r["rf"], r["rf_lo"], r["rf_hi"])
        else:
            va, vb = value_err(r["pseudo"], r["pseudo_err"]), value_err(r["rf"], r["rf_err"])
        lines.append(f"  {r['quantity']:<28s} {va:>22s} {vb:>22s} {value_err(r['difference'], r['difference_err']):>22s} "
                     f"{r['z']:6.2f}{flag}")
    lines.append("")
    lines.append("fractions: Wilson 68 % intervals [lo, hi]; their difference with the pooled two-proportion standard error.")
    lines.append("z = difference / error (errors in quadrature); |z| > 3 is marked. RF phonons and L are measured on the")
    lines.append("secular motion; a constant offset of order q^2 in the stretch-like modes is the Coulomb-micromotion")
    lines.append("correction to the equilibrium (see docs/rf.md).")
    return "\n".join(lines)


def main(args) -> int:
    cfg = load_config(args.config, args.overrides)
    show = not args.quiet and sys.stderr.isatty()
    cmp = compare_trap(cfg, trajectories=args.trajectories, seed=args.seed, threads=args.threads, progress=show)
    if args.json:
        print(json.dumps(jsonable({"config": cfg.source, "rows": cmp["rows"]})))
    else:
        print(text(cmp, cfg))
    return 0
