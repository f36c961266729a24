"""Command line: ``mdrotor <command> ...``.

This module only lists the commands and dispatches; each command is one
module of :mod:`mdrotor.commands` with ``add_parser(subparsers, help_text)``
and ``main(args)``. Only the module of the command that runs is imported
(``mdrotor --help`` lists the commands without loading numba or scipy: 0.4 s
against 3 s). Bad input of any kind becomes one line on stderr and exit
status 2; a run left with no finite, bound trajectory exits with status 3
(:data:`mdrotor.engine.run.EXIT_NO_STATISTICS`), its result file written and
marked.
"""

from __future__ import annotations

import argparse
import importlib
import sys

from mdrotor.commands.common import EXIT_INPUT
from mdrotor.errors import InputError
from mdrotor.version import __version__

COMMANDS = {  # name: one-line help (the command's module is mdrotor.commands.<name with _ for ->)
    "crystal": "equilibrium, normal modes and pinning margin of a config's crystal",
    "run": "Monte-Carlo spin-up / release run",
    "rotor": "quantum-rotor quantities, diffusion and coherence of a result or a config",
    "compare-trap": "the same config and seed with the pseudopotential and with the full RF force",
    "sweep": "run a parameter sweep (resumable, local processes or a Dask cluster)",
    "optimize": "optimise a ramp: derivative-free search over config values (resumable)",
    "report": "figures and a one-page summary of a result, sweep or optimisation file",
    "electrodes": "design check of a surface-electrode layout for a run's crystal; waveform export",
    "quantum": "the crystal's rotation as a quantum rotor through the schedule: discrete "
                                       "P(L), lines, and the Monte-Carlo ensemble beside it with a verdict",
}


def command_module(name: str):
    """The module of one command, imported when that command runs."""
    return importlib.import_module("mdrotor.commands." + name.replace("-", "_"))  # startup: only the command that runs


def build_parser(command: str | None = None) -> argparse.ArgumentParser:
    """The parser: every command listed; the full arguments of ``command`` (all of them when None)."""
    ap = argparse.ArgumentParser(prog="mdrotor", description="Monte-Carlo MD of rotating ion Coulomb crystals (quantum rotors).")
    ap.add_argument("--version", action="version", version=f"mdrotor {__version__}")
    sub = ap.add_subparsers(dest="command", required=True)
    for name, help_text in COMMANDS.items():
        if command is None or name == command:
            command_module(name).add_parser(sub, help_text)
        else:
            sub.add_parser(name, help=help_text)
    return ap


def main(argv=None) -> int:
    argv = list(sys.argv[1:] if argv is None else argv)
    named = next((a for a in argv if not a.startswith("-")), None)
    ap = build_parser(named if named in COMMANDS else "")
    args = ap.parse_args(argv)
    try:
        return command_module(args.command).main(args)
    except InputError as e:
        print(f"mdrotor: error: {e.line()}", file=sys.stderr)
        return EXIT_INPUT
    except KeyboardInterrupt:
        print("mdrotor: interrupted", file=sys.stderr)
        return 130


if __name__ == "__main__":  # pragma: no cover
    sys.exit(main())
