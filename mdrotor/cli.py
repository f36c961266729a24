"""Command line: ``mdrotor <command> ...``.

This module only parses arguments and dispatches; the work is in the
library modules, imported inside each command so that ``--help`` stays fast.
Bad input of any kind becomes one line on stderr and exit status 2; a run
left with no finite, bound trajectory exits with status 3
(``runner.EXIT_NO_STATISTICS``), its result file written and marked.
"""

from __future__ import annotations

import argparse
import json
import sys

EXIT_INPUT = 2


def _add_common(p: argparse.ArgumentParser) -> None:
    p.add_argument("--set", dest="overrides", action="append", default=[], metavar="KEY=VALUE",
                   help="override a config key, e.g. --set trap.f_radial='1.2 MHz' (repeatable)")
    p.add_argument("--json", action="store_true", help="print one JSON object instead of text")


def build_parser() -> argparse.ArgumentParser:
    from . import __version__

    ap = argparse.ArgumentParser(prog="mdrotor", description="Monte-Carlo MD of rotating ion Coulomb crystals (quantum rotors).")
    ap.add_argument("--version", action="version", version=f"mdrotor {__version__}")
    sub = ap.add_subparsers(dest="command", required=True)

    p = sub.add_parser("crystal", help="equilibrium, normal modes and pinning margin of a config's crystal")
    p.add_argument("config", help="run config (TOML)")
    p.add_argument("--f-rot", default=None, metavar="FREQ", help="rotation frequency, e.g. '150 kHz' (default: rotation.f_start)")
    _add_common(p)

    p = sub.add_parser("run", help="Monte-Carlo spin-up / release run")
    p.add_argument("config", help="run config (TOML)")
    p.add_argument("-o", "--output", default=None, help="HDF5 result file (default: <config stem>.h5 in the current folder)")
    p.add_argument("--trajectories", type=int, default=None, help="number of trajectories (overrides run.trajectories)")
    p.add_argument("--seed", type=int, default=None, help="base seed (overrides run.seed)")
    p.add_argument("--threads", type=int, default=None, help="threads for the kernels (default: all cores)")
    p.add_argument("--quiet", action="store_true", help="no progress bar")
    p.add_argument("--force", action="store_true",
                   help="run even when the preflight refuses (a spin-up that the pinning does not hold); same as --set run.force=true")
    p.add_argument("--scheduler", default=None, metavar="ADDRESS",
                   help="spread the trajectories over the workers of a running Dask cluster (e.g. tcp://host:8786); "
                        "bit-identical to a local run (optional dependency: pip install 'mdrotor[cluster]')")
    p.add_argument("--split", type=int, default=None, metavar="N",
                   help="with --scheduler: trajectories per chunk sent to a worker (default: about 4 chunks per worker)")
    _add_common(p)

    p = sub.add_parser("rotor", help="quantum-rotor quantities, diffusion and coherence of a result or a config")
    p.add_argument("source", help="result file (.h5) or run config (.toml)")
    p.add_argument("--k", type=int, default=None, help="branch separation in quanta (default: the allowed-L spacing)")
    p.add_argument("--diffusion", default=None, metavar="D", help="angular-momentum diffusion constant in hbar^2/s (default: fitted or from the noise spectrum)")
    p.add_argument("--contrast", type=float, default=0.5, help="target contrast at the exchange time for the coherence budget (default 0.5)")
    p.add_argument("--drift-quanta", type=float, default=1.0, metavar="K",
                   help="with [[laser]] beams: how long each may stay on before L drifts (or spreads) by K quanta (default 1)")
    _add_common(p)

    p = sub.add_parser("compare-trap", help="the same config and seed with the pseudopotential and with the full RF force")
    p.add_argument("config", help="run config (TOML) with trap.f_drive")
    p.add_argument("--trajectories", type=int, default=None, help="number of trajectories (overrides run.trajectories)")
    p.add_argument("--seed", type=int, default=None, help="base seed (overrides run.seed)")
    p.add_argument("--threads", type=int, default=None, help="threads for the kernels (default: all cores)")
    p.add_argument("--quiet", action="store_true", help="no progress bar")
    _add_common(p)

    from .optimize import add_optimize_parser
    from .sweep import add_sweep_parser

    from .electrodes.command import add_electrodes_parser
    from .quantum_command import add_quantum_parser
    from .report import add_report_parser

    add_sweep_parser(sub)  # each adds its own --set, --json, --quiet
    add_optimize_parser(sub)
    add_report_parser(sub)
    add_electrodes_parser(sub)
    add_quantum_parser(sub)
    return ap


def main(argv=None) -> int:
    ap = build_parser()
    args = ap.parse_args(argv)
    from .errors import InputError

    try:
        if args.command == "crystal":
            return cmd_crystal(args)
        if args.command == "run":
            return cmd_run(args)
        if args.command == "rotor":
            from .rotor_report import cli_rotor

            return cli_rotor(args)
        if args.command == "sweep":
            from .sweep import cli_sweep

            return cli_sweep(args)
        if args.command == "optimize":
            from .optimize import cli_optimize

            return cli_optimize(args)
        if args.command == "electrodes":
            from .electrodes.command import cli_electrodes

            return cli_electrodes(args)
        if args.command == "report":
            from .report import cli_report

            return cli_report(args)
        if args.command == "quantum":
            from .quantum_command import cli_quantum

            return cli_quantum(args)
        if args.command == "compare-trap":
            from .compare import cli_compare

            return cli_compare(args)
    except InputError as e:
        print(f"mdrotor: error: {e.line()}", file=sys.stderr)
        return EXIT_INPUT
    except KeyboardInterrupt:
        print("mdrotor: interrupted", file=sys.stderr)
        return 130
    return 0


def _load(args):
    from .config import load_config

    return load_config(args.config, args.overrides)


# ---------------------------------------------------------------------------
def cmd_crystal(args) -> int:
    import warnings

    from . import units
    from .pinning import assess_config
    from .statics import crystal_from_config
    from .report_text import crystal_json, crystal_text

    cfg = _load(args)
    f_rot = None
    if args.f_rot is not None:
        f_rot = units.parse(args.f_rot, "frequency", "--f-rot", "command line")
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        cr = crystal_from_config(cfg, f_rot)
        holding = assess_config(cfg, cr.f_rot_hz, start=cr.positions_m) if cfg.pinning else None
    if args.json:
        print(json.dumps(crystal_json(cfg, cr, holding)))
    else:
        print(crystal_text(cfg, cr, holding))
        for w in cr.warnings:
            print(f"warning: {w}", file=sys.stderr)
    return 0


def cmd_run(args) -> int:
    from .runner import cli_run

    return cli_run(args)


if __name__ == "__main__":  # pragma: no cover
    sys.exit(main())
