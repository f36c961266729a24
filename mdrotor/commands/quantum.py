"""``mdrotor quantum``: the crystal's rotation as a quantum rotor through the schedule, beside the ensemble.
"""

from __future__ import annotations

import json
import sys

from mdrotor.errors import InputError
from mdrotor.numfmt import jsonable
from mdrotor.studies.quantum import number_in_range, quantum_report, text


def add_parser(sub, help_text: str):
    """Add ``mdrotor quantum`` to the command line's subparsers."""
    p = sub.add_parser(
        "quantum", help=help_text)
    p.add_argument("source", help="run config (.toml; the ensemble is run) or result file (.h5; its config and "
                                  "trajectories are used)")
    p.add_argument("--trajectories", type=int, default=None, help="ensemble size when it is run (default: run.trajectories)")
    p.add_argument("--no-ensemble", action="store_true", help="the quantum rotor only")
    p.add_argument("--tol", default="1e-3", help="relative frequency error of the propagator's step (default 1e-3)")
    p.add_argument("--cut", default="1e-4", help="Boltzmann weight left out of the thermal state (default 1e-4)")
    p.add_argument("--records", type=int, default=None, help="noise records per thermal level (default 4 with noise)")
    p.add_argument("--seed", type=int, default=None, help="seed of the noise records (default: run.seed)")
    p.add_argument("--max-columns", type=int, default=512,
                   help="refuse when thermal levels x noise records exceed this (default 512)")
    p.add_argument("--rigid", action="store_true", help="moment of inertia at rest (no centrifugal stretch with L)")
    p.add_argument("--lines", type=int, default=8, help="strongest lines listed in the text (default 8)")
    p.add_argument("--quiet", action="store_true", help="no progress bar")
    p.add_argument("--set", dest="overrides", action="append", default=[], metavar="KEY=VALUE",
                   help="override a config key (configs only; repeatable)")
    p.add_argument("-o", "--output", default=None, metavar="OUT.h5",
                   help="also write the result (P(L) per stage end, lines, ensemble histograms, distances, verdict) "
                        "to this HDF5 file; mdrotor report OUT.h5 draws it")
    p.add_argument("--json", action="store_true", help="print one JSON object instead of text")


def main(args) -> int:
    tol = number_in_range(args.tol, "--tol", 0.0, 0.01)
    cut = number_in_range(args.cut, "--cut", 0.0, 0.1)
    if args.lines < 0:
        raise InputError("--lines", "expected a non-negative number of lines", "command line")
    d = quantum_report(args.source, overrides=args.overrides, trajectories=args.trajectories,
                       ensemble=not args.no_ensemble, tol=tol, cut=cut, records=args.records, seed=args.seed,
                       stretch=not args.rigid, progress=not args.quiet and not args.json,
                       max_columns=args.max_columns, output=args.output)
    if args.json:
        print(json.dumps(jsonable(d)))
    else:
        print(text(d, args.lines))
    sys.stdout.flush()
    return 0
