"""``mdrotor run``: a Monte-Carlo spin-up / release run, its summary and its result file.
"""

from __future__ import annotations

import json
import sys
import time
from pathlib import Path

from mdrotor.analysis.summary import summary_dict, summary_text
from mdrotor.commands.common import add_common
from mdrotor.config.parse import load_config
from mdrotor.engine.executors import DaskExecutor
from mdrotor.engine.run import EXIT_NO_STATISTICS, check_disk, check_memory, run
from mdrotor.errors import InputError
from mdrotor.results.store import check_writable, save_result


def add_parser(subparsers, help_text: str):
    """Add ``mdrotor run`` to the command line's subparsers."""
    p = subparsers.add_parser("run", help=help_text)
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
    add_common(p)
    return p


def main(args) -> int:
    ov = list(args.overrides) + (["run.force=true"] if getattr(args, "force", False) else [])
    cfg = load_config(args.config, ov)
    if args.trajectories is not None and args.trajectories < 1:
        raise InputError("--trajectories", "expected a positive number of trajectories", "command line")
    if getattr(args, "split", None) is not None and (args.split < 1 or not getattr(args, "scheduler", None)):
        raise InputError("--split", "expected a positive number of trajectories per chunk, with --scheduler", "command line")
    if args.seed is not None and not 0 <= args.seed < 2**64:
        raise InputError("--seed", "expected a seed in [0, 2^64)", "command line")
    out = Path(args.output) if args.output else Path(Path(args.config).stem + ".h5")
    check_writable(out)
    n_traj = args.trajectories if args.trajectories is not None else cfg.run.trajectories
    key = ("--trajectories", "command line") if args.trajectories is not None else ("run.trajectories", cfg.source)
    check_memory(cfg, n_traj, *key)
    check_disk(cfg, n_traj, out)
    show = not args.quiet and sys.stderr.isatty()
    t0 = time.perf_counter()
    scheduler = getattr(args, "scheduler", None)
    if scheduler:
        scheduler = DaskExecutor(scheduler)  # reached (or refused) before any work
    try:
        res = run(cfg, trajectories=args.trajectories, seed=args.seed, threads=args.threads, progress=show,
                  scheduler=scheduler, split=getattr(args, "split", None))
    finally:
        if scheduler:
            scheduler.close()
    if res.attrs.get("notes"):
        print(f"mdrotor: warning: {res.attrs['notes']}", file=sys.stderr)
    for w in str(res.attrs.get("preflight_warnings", "")).split("\n"):
        if w:
            print(f"mdrotor: warning: {w}", file=sys.stderr)
    save_result(res, out)
    if args.json:
        d = summary_dict(res)
        d["output"] = str(out)
        d["total_wall_s"] = time.perf_counter() - t0
        print(json.dumps(d))
    else:
        print(summary_text(res, out))
    if res.final.summary["n_ok"] == 0:
        print(f"mdrotor: no statistics: none of the {res.final.summary['n_trajectories']} trajectories is finite and bound "
              f"at the end; {out} is written and marked (attribute statistics)", file=sys.stderr)
        return EXIT_NO_STATISTICS
    return 0
