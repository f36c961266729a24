"""Ensemble statistics with uncertainties.

Standard errors for independent samples: the mean has s / sqrt(n); the
standard deviation has s / sqrt(2 (n - 1)) (normal-theory estimate, e.g.
J.R. Taylor, An Introduction to Error Analysis, 2nd ed., ch. 5); a fraction
p has sqrt(p (1 - p) / n) (binomial), with the rule-of-three bound 3/n
quoted as its error when no event was seen (B.D. Jovanovic and P.S.
Levy, Am. Stat. 51, 137 (1997)).
"""

from __future__ import annotations

import numpy as np

OK_MASK = 2 | 8  # trajectories with a lost ion or non-finite values are left out of L and phonon statistics


def mean_sem(x: np.ndarray) -> tuple[float, float]:
    x = np.asarray(x, dtype=float)
    x = x[np.isfinite(x)]
    if x.size == 0:
        return float("nan"), float("nan")
    if x.size == 1:
        return float(x[0]), float("nan")
    return float(np.mean(x)), float(np.std(x, ddof=1) / np.sqrt(x.size))


def std_se(x: np.ndarray) -> tuple[float, float]:
    x = np.asarray(x, dtype=float)
    x = x[np.isfinite(x)]
    if x.size < 2:
        return float("nan"), float("nan")
    s = float(np.std(x, ddof=1))
    return s, s / np.sqrt(2.0 * (x.size - 1))


def fraction(flags: np.ndarray) -> tuple[float, float]:
    flags = np.asarray(flags, dtype=bool)
    n = flags.size
    if n == 0:
        return float("nan"), float("nan")
    p = float(np.mean(flags))
    err = np.sqrt(p * (1 - p) / n) if 0 < p < 1 else 3.0 / n
    return p, float(err)


def histogram(L: np.ndarray, bins: int | None = None):
    """Histogram of L (hbar) with Poisson error bars: (edges, counts, errors)."""
    L = np.asarray(L, dtype=float)
    L = L[np.isfinite(L)]
    if L.size == 0:
        return np.array([0.0, 1.0]), np.zeros(1), np.zeros(1)
    if bins is None:
        bins = int(np.clip(np.sqrt(L.size), 5, 60))
    counts, edges = np.histogram(L, bins=bins)
    return edges, counts.astype(float), np.sqrt(counts.astype(float))


def summarize(obs: dict, kinds: list) -> dict:
    """Summary numbers of one observation (``observables.observe`` output)."""
    status = obs["status"]
    ok = (status & OK_MASK) == 0
    out = {}
    out["L_mean_hbar"], out["L_mean_err_hbar"] = mean_sem(obs["L_hbar"][ok])
    out["L_std_hbar"], out["L_std_err_hbar"] = std_se(obs["L_hbar"][ok])
    out["f_rot_mean_hz"], out["f_rot_mean_err_hz"] = mean_sem(obs["f_rot_hz"][ok])
    out["slip_fraction"], out["slip_fraction_err"] = fraction(obs["slips"] != 0)
    out["loss_fraction"], out["loss_fraction_err"] = fraction(obs["lost"])
    out["reorder_fraction"], out["reorder_fraction_err"] = fraction(obs["reordered"])
    out["nonfinite_fraction"], out["nonfinite_fraction_err"] = fraction(obs["nonfinite"])
    mn = obs["mode_n"][ok]
    means = np.array([mean_sem(mn[:, k])[0] for k in range(mn.shape[1])])
    errs = np.array([mean_sem(mn[:, k])[1] for k in range(mn.shape[1])])
    out["mode_n_mean"] = means
    out["mode_n_err"] = errs
    diff = [k for k, kind in enumerate(kinds) if kind == "differential"]
    com = [k for k, kind in enumerate(kinds) if kind == "com"]
    out["differential_n_mean"], out["differential_n_err"] = mean_sem(np.sum(mn[:, diff], axis=1)) if diff else (0.0, 0.0)
    out["com_n_mean"], out["com_n_err"] = mean_sem(np.sum(mn[:, com], axis=1)) if com else (0.0, 0.0)
    out["n_ok"] = int(np.sum(ok))
    return out
