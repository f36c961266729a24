"""``mdrotor report``: figures and a one-page summary of a result, sweep or optimisation file.
"""

from __future__ import annotations

import json

from mdrotor.commands.common import diffusion_arg
from mdrotor.errors import InputError
from mdrotor.numfmt import jsonable
from mdrotor.report.inputs import PLOT_EXTRA
from mdrotor.report.page import FORMATS, SUMMARY_FORMATS, write_report


# ---------------------------------------------------------------------------
# command line
# ---------------------------------------------------------------------------
def add_parser(subparsers, help_text: str):
    """Add ``mdrotor report`` to the command line's subparsers."""
    p = subparsers.add_parser(
        "report", help=help_text,
                              description="Figures (schedule, L histograms with the allowed-L ladder, time series, "
                                          "phonons, rotational lines, coherence; for sweeps metric maps, for "
                                          f"optimisations the history) and a summary page. Needs matplotlib: {PLOT_EXTRA}.")
    p.add_argument("source", help="result, sweep or optimisation file (.h5)")
    p.add_argument("-o", "--output", default=None, metavar="DIR",
                   help="folder for the figures and the summary (default: <file stem>_report in the current folder)")
    p.add_argument("--format", default="png", choices=FORMATS, help="figure format (default png)")
    p.add_argument("--summary", default="md", choices=SUMMARY_FORMATS, help="summary page as Markdown or HTML (default md)")
    p.add_argument("--diffusion", default=None, metavar="D",
                   help="angular-momentum diffusion constant in hbar^2/s for the coherence figure "
                        "(default: fitted from the run's noise, else analytic)")
    p.add_argument("--k", type=int, default=None, help="branch separation in quanta (default: the allowed-L spacing)")
    p.add_argument("--metrics", default=None, metavar="M1,M2",
                   help="sweep metrics to draw (default: the final-stage outcome metrics; 'all' for every column)")
    p.add_argument("--axes", default=None, metavar="KEY1,KEY2",
                   help="the two sweep axes of the heat maps (default: the first two)")
    p.add_argument("--slice", dest="slices", action="append", default=[], metavar="KEY=VALUE",
                   help="fix a further sweep axis at a value as written in the sweep file, or at #index (repeatable)")
    p.add_argument("--dpi", type=int, default=150, help="resolution of PNG figures (default 150)")
    p.add_argument("--json", action="store_true", help="print one JSON object instead of text")
    return p


def main(args) -> int:
    """``mdrotor report``: write the figures and the summary, print what was written and skipped."""
    D = diffusion_arg(args.diffusion)
    if args.k is not None and args.k < 1:
        raise InputError("--k", "expected a positive number of quanta", "command line")
    if not 10 <= args.dpi <= 2400:
        raise InputError("--dpi", "expected a resolution between 10 and 2400", "command line")
    fixed = {}
    for s in args.slices:
        if "=" not in s:
            raise InputError("--slice", f"expected KEY=VALUE (e.g. initial.temperature='1 mK' or KEY=#0), got {s!r}",
                             "command line")
        key, val = s.split("=", 1)
        fixed[key.strip()] = val.strip().strip("'\"")
    rep = write_report(args.source, args.output, args.format, summary=args.summary, diffusion_hbar2_per_s=D, k=args.k,
                       metrics=args.metrics, axes=args.axes, fixed=fixed, dpi=args.dpi)
    if args.json:
        print(json.dumps(jsonable(rep)))
        return 0
    print(f"report of {args.source} ({rep['kind']}) in {rep['output_dir']}/")
    for p in rep["figures"]:
        print(f"  wrote {p}")
    for n, r in rep["skipped"].items():
        print(f"  skipped {n}: {r}")
    print(f"  summary {rep['summary']}")
    return 0

