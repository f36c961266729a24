"""``mdrotor optimize``: optimise ramps and voltages from an optimisation file (resumable).
"""

from __future__ import annotations

import json
import sys
from pathlib import Path

from mdrotor.commands.common import add_executor_args, check_executor_args
from mdrotor.engine.run import check_memory
from mdrotor.errors import InputError
from mdrotor.numfmt import jsonable
from mdrotor.results.store import check_writable
from mdrotor.studies.optimize import load_optimize, optimize_text, run_optimize
from mdrotor.studies.table import export_csv, output_path


# ---------------------------------------------------------------------------
# command line
# ---------------------------------------------------------------------------
def add_parser(subparsers, help_text: str):
    """Add ``mdrotor optimize`` to the command line's subparsers."""
    p = subparsers.add_parser(
        "optimize", help=help_text,
        description="Search the parameters of an optimisation file for the lowest objective, re-run the best "
                    "point with fresh seeds, and write it as a runnable config. Rerunning the same command after an "
                    "interruption replays the stored evaluations.")
    p.add_argument("optimize", help="optimisation file (TOML)")
    p.add_argument("-o", "--output", default=None, help="HDF5 output (default: <file stem>.h5); resumed if it exists")
    p.add_argument("--best", default=None, metavar="FILE", help="best config as TOML (default: <output stem>.best.toml)")
    add_executor_args(p)
    p.add_argument("--restart", action="store_true", help="discard an existing output (also one from a changed file) and start over")
    p.add_argument("--csv", default=None, metavar="FILE", help="also write the evaluation history as CSV")
    p.add_argument("--quiet", action="store_true", help="no progress bar")
    p.add_argument("--set", dest="overrides", action="append", default=[], metavar="KEY=VALUE",
                   help="override a key of the base config (repeatable)")
    p.add_argument("--json", action="store_true", help="print one JSON object instead of text")
    return p


def main(args) -> int:
    """``mdrotor optimize``: returns the exit status (InputError propagates)."""

    check_executor_args(args)
    out = output_path(args.output, args.optimize)
    if args.csv:
        check_writable(args.csv, "--csv")
    spec = load_optimize(args.optimize, args.overrides)

    start = [p.value(p.start_u if p.start_u is not None else 0.5) for p in spec.params]
    check_memory(spec.config(start, "start"), spec.trajectories or spec.config(start, "start").run.trajectories,
                 "trajectories", spec.source)
    check_memory(spec.config(start, "confirm", trajectories=spec.confirm_trajectories), spec.confirm_trajectories,
                 "confirm.trajectories", spec.source)
    if args.best and not Path(args.best).parent.is_dir():
        raise InputError("--best", f"the folder {str(Path(args.best).parent)!r} does not exist", "command line")
    show_bar = not args.quiet and sys.stderr.isatty()
    try:
        summ = run_optimize(spec, out, workers=args.workers, scheduler=args.scheduler, restart=args.restart,
                            progress=show_bar, best_path=args.best)
    except KeyboardInterrupt:
        print(f"mdrotor: interrupted; the finished evaluations are kept in {out}: rerun the same command to resume", file=sys.stderr)
        return 130
    if args.csv:
        export_csv(out, args.csv)
        summ["csv"] = str(args.csv)
    if args.json:
        print(json.dumps(jsonable(summ)))
    else:
        print(optimize_text(summ))
    return 0

