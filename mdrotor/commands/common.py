"""What every command shares: the --set and --json options, the exit statuses."""

from __future__ import annotations

import argparse

EXIT_INPUT = 2  # bad input: one line on stderr naming the file, the key and what was expected


def add_common(p: argparse.ArgumentParser) -> None:
    p.add_argument("--set", dest="overrides", action="append", default=[], metavar="KEY=VALUE",
                   help="override a config key, e.g. --set trap.f_radial='1.2 MHz' (repeatable)")
    p.add_argument("--json", action="store_true", help="print one JSON object instead of text")
