"""Pseudopotential versus full RF: the same config and seed in both trap models.

Both runs draw the same secular initial states (same seed, same trajectory
keys); the RF run adds each trajectory's RF phase and micromotion. For every
summary number the difference is given with its standard error, taken as
the two errors in quadrature (conservative: the shared initial states make
the runs positively correlated), and the significance z = difference /
error. Fractions are shown with their Wilson 68 % intervals
(:mod:`mdrotor.results.stats`); their difference gets the standard error of the
two-proportion z test with the pooled fraction, sqrt(p (1 - p) (1/n1 +
1/n2)) (A. Agresti, Categorical Data Analysis, 3rd ed. (2013), sec. 3.1;
from memory).
"""

from __future__ import annotations

from dataclasses import replace

import numpy as np

from mdrotor.engine.run import run
from mdrotor.errors import InputError

ROWS = [("L mean (hbar)", "L_mean_hbar", "L_mean_err_hbar"),
        ("L spread (hbar)", "L_std_hbar", "L_std_err_hbar"),
        ("differential phonons", "differential_n_mean", "differential_n_err"),
        ("COM phonons", "com_n_mean", "com_n_err")]
FRACTION_ROWS = [("slip fraction", "slip"), ("loss fraction", "loss")]


def compare_trap(cfg, *, trajectories=None, seed=None, threads=None, progress=False) -> dict:
    """Run ``cfg`` with ``trap.model`` = "pseudo" and = "rf"; return both
    Results and the comparison rows (name, pseudo, err, rf, err, diff, err, z)."""

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




