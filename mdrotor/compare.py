"""Pseudopotential versus full RF: the same config and seed in both trap models.

Both runs draw the same secular initial states (same seed, same trajectory
keys); the RF run adds each trajectory's RF phase and micromotion. For every
summary number the difference is given with its standard error, taken as
the two errors in quadrature (conservative: the shared initial states make
the runs positively correlated), and the significance z = difference /
error. Fractions are shown with their Wilson 68 % intervals
(:mod:`mdrotor.stats`); their difference gets the standard error of the
two-proportion z test with the pooled fraction, sqrt(p (1 - p) (1/n1 +
1/n2)) (A. Agresti, Categorical Data Analysis, 3rd ed. (2013), sec. 3.1;
from memory).
"""

from __future__ import annotations

import json
import sys
from dataclasses import replace

import numpy as np

ROWS = [("L mean (hbar)", "L_mean_hbar", "L_mean_err_hbar"),
        ("L spread (hbar)", "L_std_hbar", "L_std_err_hbar"),
        ("differential phonons", "differential_n_mean", "differential_n_err"),
        ("COM phonons", "com_n_mean", "com_n_err")]
FRACTION_ROWS = [("slip fraction", "slip"), ("loss fraction", "loss")]


def compare_trap(cfg, *, trajectories=None, seed=None, threads=None, progress=False) -> dict:
    """Run ``cfg`` with ``trap.model`` = "pseudo" and = "rf"; return both
    Results and the comparison rows (name, pseudo, err, rf, err, diff, err, z)."""
    from .errors import InputError
    from .runner import run

    if cfg.trap.f_drive_hz is None:
        raise InputError("trap.f_drive", "missing; comparing with the full RF force needs the drive frequency", cfg.source)
    res = {}
    for model in ("pseudo", "rf"):
        c = replace(cfg, trap=replace(cfg.trap, model=model))
        res[model] = run(c, trajectories=trajectories, seed=seed, threads=threads, progress=progress)
    rows = []
    a, b = res["pseudo"].summary, res["rf"].summary
    for name, key, ekey in ROWS:
        if key in a and key in b and ekey in a and ekey in b:
            rows.append(_row(name, a[key], a[ekey], b[key], b[ekey]))
    for name, f in FRACTION_ROWS:
        rows.append(_fraction_row(name, f, a, b))
    fa, fb = res["pseudo"].final, res["rf"].final
    if "mode_n_err" in a and "mode_n_err" in b:
        for k, lab in enumerate(fa.modes["label"]):
            if lab in fb.modes["label"]:
                j = fb.modes["label"].index(lab)
                rows.append(_row(f"phonons {lab}", a["mode_n_mean"][k], a["mode_n_err"][k], b["mode_n_mean"][j], b["mode_n_err"][j]))
    return {"results": res, "rows": rows}


def _z(d: float, e: float) -> float:
    return d / e if e > 0 else (0.0 if d == 0 else float("inf"))


def _row(name, va, ea, vb, eb):
    d = float(vb - va)
    e = float(np.hypot(ea, eb))
    return {"quantity": name, "pseudo": float(va), "pseudo_err": float(ea), "rf": float(vb), "rf_err": float(eb),
            "difference": d, "difference_err": e, "z": _z(d, e)}


def _fraction_row(name, f, a, b):
    """A fraction of both runs with its interval; the difference with the
    pooled two-proportion standard error (module docstring)."""
    na, nb = a["n_trajectories"], b["n_trajectories"]
    ka, kb = a[f"{f}_count"], b[f"{f}_count"]
    pool = (ka + kb) / (na + nb)
    e = float(np.sqrt(pool * (1 - pool) * (1 / na + 1 / nb)))
    d = float(b[f"{f}_fraction"] - a[f"{f}_fraction"])
    return {"quantity": name, "pseudo": a[f"{f}_fraction"], "pseudo_lo": a[f"{f}_fraction_lo"], "pseudo_hi": a[f"{f}_fraction_hi"],
            "rf": b[f"{f}_fraction"], "rf_lo": b[f"{f}_fraction_lo"], "rf_hi": b[f"{f}_fraction_hi"],
            "difference": d, "difference_err": e, "z": _z(d, e)}


def text(cmp: dict, cfg) -> str:
    from .numfmt import interval, value_err

    rf = cmp["results"]["rf"]
    lines = [f"pseudopotential vs full RF: {cfg.source}, f_drive = {cfg.trap.f_drive_hz / 1e6:.6g} MHz, "
             f"q = ({', '.join(f'{x:.4g}' for x in cfg.trap.q)}), a = ({', '.join(f'{x:.3g}' for x in cfg.trap.a)}), "
             f"{rf.attrs['n_trajectories']} trajectories, seed {int(rf.attrs['seed'])}",
             "",
             f"  {'quantity':<28s} {'pseudo':>22s} {'rf':>22s} {'rf - pseudo':>22s}   z"]
    for r in cmp["rows"]:
        flag = "  <- significant" if abs(r["z"]) > 3 else ""
        if "pseudo_lo" in r:
            va, vb = interval(r["pseudo"], r["pseudo_lo"], r["pseudo_hi"]), interval(r["rf"], r["rf_lo"], r["rf_hi"])
        else:
            va, vb = value_err(r["pseudo"], r["pseudo_err"]), value_err(r["rf"], r["rf_err"])
        lines.append(f"  {r['quantity']:<28s} {va:>22s} {vb:>22s} {value_err(r['difference'], r['difference_err']):>22s} "
                     f"{r['z']:6.2f}{flag}")
    lines.append("")
    lines.append("fractions: Wilson 68 % intervals [lo, hi]; their difference with the pooled two-proportion standard error.")
    lines.append("z = difference / error (errors in quadrature); |z| > 3 is marked. RF phonons and L are measured on the")
    lines.append("secular motion; a constant offset of order q^2 in the stretch-like modes is the Coulomb-micromotion")
    lines.append("correction to the equilibrium (see docs/rf.md).")
    return "\n".join(lines)


def cli_compare(args) -> int:
    from .config import load_config

    cfg = load_config(args.config, args.overrides)
    show = not args.quiet and sys.stderr.isatty()
    cmp = compare_trap(cfg, trajectories=args.trajectories, seed=args.seed, threads=args.threads, progress=show)
    if args.json:
        from .runner import jsonable

        print(json.dumps(jsonable({"config": cfg.source, "rows": cmp["rows"]})))
    else:
        print(text(cmp, cfg))
    return 0
