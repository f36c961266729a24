"""``mdrotor sweep``: every point of a sweep file as a full run (resumable; local processes or Dask).
"""

from __future__ import annotations

import json
import sys

from mdrotor.commands.common import add_executor_args, check_executor_args
from mdrotor.numfmt import jsonable
from mdrotor.results.store import check_writable
from mdrotor.studies.points import check_points_memory
from mdrotor.studies.sweep import load_sweep, run_sweep, sweep_text
from mdrotor.studies.table import export_csv, output_path


# ---------------------------------------------------------------------------
# command line
# ---------------------------------------------------------------------------
def add_parser(subparsers, help_text: str):
    """Add ``mdrotor sweep`` to the command line's subparsers."""
    p = subparsers.add_parser(
        "sweep", help=help_text,
        description="Run every point of a sweep file as a full run. Rerunning the same command after an "
                    "interruption skips the finished points.")
    p.add_argument("sweep", help="sweep file (TOML)")
    p.add_argument("-o", "--output", default=None, help="HDF5 output (default: <sweep stem>.h5); resumed if it exists")
    add_executor_args(p)
    p.add_argument("--restart", action="store_true", help="discard an existing output (also one from a changed sweep file) and start over")
    p.add_argument("--csv", default=None, metavar="FILE", help="also write the summary table as CSV")
    p.add_argument("--trajectories", type=int, default=None, help="trajectories per point (overrides the sweep file)")
    p.add_argument("--quiet", action="store_true", help="no progress bar")
    p.add_argument("--set", dest="overrides", action="append", default=[], metavar="KEY=VALUE",
                   help="override a key of the base config (repeatable)")
    p.add_argument("--json", action="store_true", help="print one JSON object instead of text")
    return p


def main(args) -> int:
    """``mdrotor sweep``: returns the exit status (InputError propagates)."""
    check_executor_args(args)
    out = output_path(args.output, args.sweep)
    if args.csv:
        check_writable(args.csv, "--csv")
    spec = load_sweep(args.sweep, args.overrides, args.trajectories)
    check_points_memory(spec.configs, "--trajectories" if args.trajectories is not None else "trajectories",
                         "command line" if args.trajectories is not None else spec.source)
    show_bar = not args.quiet and sys.stderr.isatty()
    try:
        summ = run_sweep(spec, out, workers=args.workers, scheduler=args.scheduler, restart=args.restart, progress=show_bar)
    except KeyboardInterrupt:
        print(f"mdrotor: interrupted; the finished points are kept in {out}: rerun the same command to resume", file=sys.stderr)
        return 130
    if args.csv:
        summ["csv"] = str(args.csv)
        export_csv(out, args.csv)
    if args.json:
        print(json.dumps(jsonable(summ)))
    else:
        print(sweep_text(out, summ))
    return 0

