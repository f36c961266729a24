"""The quantum rotor's P(L) against the Monte-Carlo ensemble's L.

The ensemble's ``L`` (about the centre of mass: the rotor's own angular
momentum) is continuous; binned on the allowed ladder (each value to the
nearest allowed ``L``) it becomes a histogram comparable with ``P(L)``.

Distances
---------
* Mean and spread: the ensemble's with their standard errors
  (:func:`mdrotor.results.stats.mean_sem`, :func:`mdrotor.results.stats.std_se`), the
  quantum ones exact (or with the standard errors of the noise records);
  differences with the combined error.
* Total-variation distance ``TV = (1/2) sum_L |P(L) - p_cl(L)|`` between
  ``P(L)`` and the binned ensemble, after shifting the ensemble by the whole
  number of ladder steps nearest to the difference of the means (the mean
  is set by ``L = I Omega / hbar``, classical mechanics, and a rigid-rotor
  model of ``I`` can be off by a few quanta; the shape is what quantisation
  changes). A finite ensemble has ``TV > 0`` even when it is drawn from
  ``P(L)`` itself: the same number of draws from ``P(L)`` (seeded, repeated)
  give the sampling distribution of ``TV``, whose median and 99th
  percentile are reported beside it.

Verdict (whether the semiclassical answer holds for this config)
----------------------------------------------------------------
With the spread difference ``d = s_cl - s_q``, its combined standard error
``e``, the tolerance ``tau = rel_tol * s_q`` (default 10 %, at least 0.05
ladder steps) and ``TV`` against its sampling 99th percentile ``TV99``:

* **holds**: ``|d| + 2 e <= tau`` and ``TV <= TV99`` (the spreads agree
  within the tolerance at about 95 % confidence, and the binned shapes
  differ no more than sampling explains);
* **fails**: ``|d| - 2 e > tau``, or ``TV > TV99 + tv_tol`` (default 0.1);
* **undecided** otherwise: the ensemble is too small to tell (more
  trajectories narrow ``e`` and ``TV99``).

This is an equivalence test on the spread (two one-sided bounds at the 2
standard-error level) plus a goodness-of-fit bound on the shape; the
tolerances are choices, printed with the verdict.
"""

from __future__ import annotations

import math

import numpy as np

from mdrotor.errors import InputError
from mdrotor.results.stats import mean_sem, std_se

__all__ = ["ladder_histogram", "compare", "REL_TOL", "TV_TOL"]

REL_TOL = 0.1
TV_TOL = 0.1
N_NULL = 400


def ladder_histogram(L_hbar, ladder) -> tuple[np.ndarray, np.ndarray]:
    """Counts of the finite ``L_hbar`` values at their nearest allowed ``L``.

    Returns ``(L, counts)``, ``L`` the allowed values hit (int64, ascending).
    """
    L = np.asarray(L_hbar, dtype=float)
    L = L[np.isfinite(L)]
    j = np.round((L - ladder.offset) / ladder.spacing).astype(np.int64)
    vals, counts = np.unique(j, return_counts=True)
    return ladder.value(vals), counts.astype(float)


def _tv(La, Pa, Lb, Pb) -> float:
    """Total-variation distance of two distributions on integer supports."""
    lo = int(min(La.min(), Lb.min()))
    hi = int(max(La.max(), Lb.max()))
    a = np.zeros(hi - lo + 1)
    b = np.zeros(hi - lo + 1)
    np.add.at(a, La - lo, Pa)
    np.add.at(b, Lb - lo, Pb)
    return 0.5 * float(np.sum(np.abs(a - b)))


def compare(dist, L_hbar, ladder, *, seed: int = 0, rel_tol: float = REL_TOL, tv_tol: float = TV_TOL) -> dict:
    """Quantum ``P(L)`` (a :class:`mdrotor.physics.quantum_rotor.Distribution`)
    against ensemble samples ``L_hbar`` (module docstring).

    Returns
    -------
    dict
        ``n``, ensemble ``mean``/``std`` with errors, the quantum ones, their
        differences with errors, the binned histogram, ``tv``, ``tv_null_median``,
        ``tv_null_99``, ``shift_hbar`` (the alignment), ``verdict`` ("holds",
        "fails", "undecided") and ``reason``.
    """

    L = np.asarray(L_hbar, dtype=float)
    L = L[np.isfinite(L)]
    n = int(L.size)
    if n < 2:
        raise InputError("ensemble", f"at least 2 finite trajectories to compare with, got {n}")
    m_cl, m_cl_e = mean_sem(L)
    s_cl, s_cl_e = std_se(L)
    m_q, s_q = dist.mean_hbar, dist.std_hbar
    d_mean = m_cl - m_q
    d_mean_e = math.hypot(m_cl_e, dist.mean_err_hbar)
    d_std = s_cl - s_q
    d_std_e = math.hypot(s_cl_e, dist.std_err_hbar)
    shift = ladder.spacing * int(round(d_mean / ladder.spacing))
    hist_L, counts = ladder_histogram(L - shift, ladder)
    p_cl = counts / counts.sum()
    tv = _tv(dist.L, dist.P, hist_L, p_cl)
    rng = np.random.Generator(np.random.PCG64DXSM(np.random.SeedSequence(seed, spawn_key=(15,))))
    P = dist.P / dist.P.sum()
    null = np.empty(N_NULL)
    for i in range(N_NULL):
        c = rng.multinomial(n, P)
        null[i] = 0.5 * float(np.sum(np.abs(c / n - P)))
    tv_med, tv99 = float(np.median(null)), float(np.quantile(null, 0.99))
    tau = max(rel_tol * s_q, 0.05 * ladder.spacing)
    if abs(d_std) + 2 * d_std_e <= tau and tv <= tv99:
        verdict = "holds"
        reason = (f"spreads agree within {rel_tol:.0%} ({s_cl:.4g} +- {s_cl_e:.2g} vs {s_q:.4g} hbar) and the "
                  f"binned shape differs no more than sampling explains (TV {tv:.3f} <= {tv99:.3f})")
    elif abs(d_std) - 2 * d_std_e > tau or tv > tv99 + tv_tol:
        verdict = "fails"
        why = []
        if abs(d_std) - 2 * d_std_e > tau:
            why.append(f"the spreads differ by {d_std:+.4g} +- {d_std_e:.2g} hbar, more than {rel_tol:.0%} of "
                       f"{s_q:.4g} hbar")
        if tv > tv99 + tv_tol:
            why.append(f"the binned shapes differ (TV {tv:.3f}, sampling alone gives <= {tv99:.3f})")
        reason = "; ".join(why)
    else:
        verdict = "undecided"
        reason = (f"spread difference {d_std:+.4g} +- {d_std_e:.2g} hbar against a tolerance of {tau:.3g} hbar, "
                  f"TV {tv:.3f} against {tv99:.3f}: more trajectories needed")
    return {
        "n": n, "mean_hbar": m_cl, "mean_err_hbar": m_cl_e, "std_hbar": s_cl, "std_err_hbar": s_cl_e,
        "quantum_mean_hbar": m_q, "quantum_mean_err_hbar": dist.mean_err_hbar,
        "quantum_std_hbar": s_q, "quantum_std_err_hbar": dist.std_err_hbar,
        "mean_diff_hbar": d_mean, "mean_diff_err_hbar": d_mean_e,
        "std_diff_hbar": d_std, "std_diff_err_hbar": d_std_e,
        "shift_hbar": int(shift), "histogram_L": [int(x) for x in hist_L + shift],
        "histogram_counts": [int(x) for x in counts],
        "tv": tv, "tv_null_median": tv_med, "tv_null_99": tv99,
        "rel_tol": rel_tol, "tv_tol": tv_tol, "tolerance_hbar": tau,
        "verdict": verdict, "reason": reason,
    }
