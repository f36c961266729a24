"""What every command shares: the --set and --json options, the exit statuses."""

from __future__ import annotations

import argparse

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
