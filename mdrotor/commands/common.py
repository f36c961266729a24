"""What the commands share: the --set and --json options, the executor options, --diffusion, the exit statuses."""

from __future__ import annotations

import argparse
import math

from mdrotor.errors import InputError

EXIT_INPUT = 2  # bad input: one line on stderr naming the file, the key and what was expected


def add_common(p: argparse.ArgumentParser) -> None:
    p.add_argument("--set", dest="overrides", action="append", default=[], metavar="KEY=VALUE",
                   help="override a config key, e.g. --set trap.f_radial='1.2 MHz' (repeatable)")
    p.add_argument("--json", action="store_true", help="print one JSON object instead of text")


def check_executor_args(args) -> None:
    """Refuse --workers below 1, or --workers with --scheduler."""
    if args.workers is not None and args.workers < 1:
        raise InputError("--workers", "expected a number of worker processes >= 1", "command line")
    if args.workers is not None and args.scheduler:
        raise InputError("--workers", "give either --workers (local processes) or --scheduler (a Dask cluster), not both", "command line")


def add_executor_args(p: argparse.ArgumentParser) -> None:
    """--workers and --scheduler: where the runs of a sweep or an optimisation execute."""
    p.add_argument("--workers", type=int, default=None, help="local worker processes (default: one per core; 1: in this process)")
    p.add_argument("--scheduler", default=None, metavar="ADDRESS", help="run on a Dask distributed cluster, e.g. tcp://10.0.0.5:8786")


def diffusion_arg(text) -> float | None:
    """--diffusion D in hbar^2/s: None when not given, else a finite D >= 0 or one line naming the option."""
    if text is None:
        return None
    try:
        D = float(text)
    except ValueError:
        raise InputError("--diffusion", f"expected a number in hbar^2/s, got {text!r}", "command line") from None
    if not (math.isfinite(D) and D >= 0):
        raise InputError("--diffusion", f"expected a finite, non-negative diffusion constant in hbar^2/s, got {text!r}",
                         "command line")
    return D
