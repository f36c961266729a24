"""Ensemble statistics with uncertainties.

Only usable trajectories (finite and bound, :func:`mdrotor.results.status.usable`)
enter the statistics of L, the rotation rate and the phonons; every summary
says how many were used (``n_ok``) out of how many (``n_trajectories``). A
number that cannot be computed from the trajectories left (a mean of none, a
spread or an error of fewer than two) is left out of the summary, never
stored as NaN.

Standard errors for independent samples: the mean has s / sqrt(n); the
standard deviation has s / sqrt(2 (n - 1)) (normal-theory estimate, e.g.
J.R. Taylor, An Introduction to Error Analysis, 2nd ed., ch. 5). Both are
computed from the deviations from the first sample (shifted data: T.F. Chan,
G.H. Golub and R.J. LeVeque, Am. Stat. 37, 242 (1983)), so that identical
values (a zero-temperature classical run) have their own value as mean and
a spread of exactly 0, not rounding noise shown with an error.

Fractions (slipped, lost, reordered, non-finite) get one kind of interval:
the Wilson score interval at the one-sigma level (68.27 %), E.B. Wilson,
J. Am. Stat. Assoc. 22, 209 (1927), as recommended over the Wald and the
exact interval by A. Agresti and B.A. Coull, Am. Stat. 52, 119 (1998);
computed in closed form as R.G. Newcombe, Stat. Med. 17, 857 (1998) writes
it (method 3), the same operations as ``scipy.stats.binomtest(k,
n).proportion_ci(method="wilson")``, without importing scipy.stats (0.65 s
of every run's start-up).
Unlike p +- sqrt(p (1 - p) / n) it stays inside [0, 1] and has a width when
no event (or every event) was seen.
"""

from __future__ import annotations

import math

import numpy as np

from mdrotor.results.status import usable

# two-sided probability content of +-1 standard deviation of a normal distribution
ONE_SIGMA = math.erf(1.0 / math.sqrt(2.0))
FRACTION_INTERVAL = "Wilson score interval, 68.27 % (one sigma)"
# the fractions of a summary: name -> key of the observation's per-trajectory flags
FRACTIONS = {"slip": "slips", "loss": "lost", "reorder": "reordered", "nonfinite": "nonfinite"}


def mean_sem(x: np.ndarray) -> tuple[float, float]:
    """Mean and its standard error of the finite values (NaN where not
    defined: no value, or one value for the error). Callers that report
    use :func:`summarize`, which leaves such numbers out."""
    x = np.asarray(x, dtype=float)
    x = x[np.isfinite(x)]
    if x.size == 0:
        return float("nan"), float("nan")
    if x.size == 1:
        return float(x[0]), float("nan")
    d = x - x[0]    # shifted data: identical values give exactly their value and 0 (module docstring)
    return float(x[0] + np.mean(d)), float(np.std(d, ddof=1) / np.sqrt(x.size))


def std_se(x: np.ndarray) -> tuple[float, float]:
    """Sample standard deviation and its normal-theory standard error."""
    x = np.asarray(x, dtype=float)
    x = x[np.isfinite(x)]
    if x.size < 2:
        return float("nan"), float("nan")
    s = float(np.std(x - x[0], ddof=1))
    return s, s / np.sqrt(2.0 * (x.size - 1))


def var_se(x: np.ndarray) -> tuple[float, float]:
    """Sample variance s^2 and its normal-theory standard error,
    2 s se(s) = s^2 sqrt(2 / (n - 1)) (from :func:`std_se`)."""
    s, e = std_se(x)
    return s * s, 2.0 * s * e


def fraction_interval(k: int, n: int, confidence: float = ONE_SIGMA) -> tuple[float, float, float]:
    """Fraction k / n and its Wilson score interval (lo, hi) at ``confidence``.

    Returns ``(p, lo, hi)``; ``n`` must be positive.
    """
    from scipy.special import ndtri

    k, n = int(k), int(n)
    if n < 1 or not 0 <= k <= n:
        raise ValueError(f"fraction_interval needs 0 <= k <= n and n >= 1, got k = {k}, n = {n}")
    p = k / n
    z = ndtri(0.5 + 0.5 * confidence)   # the two-sided normal quantile
    denom = 2 * (n + z**2)
    center = (2 * n * p + z**2) / denom
    delta = z / denom * math.sqrt(4 * n * p * (1 - p) + z**2)
    lo = 0.0 if k == 0 else center - delta
    hi = 1.0 if k == n else center + delta
    return p, float(lo), float(hi)


def fraction(flags: np.ndarray) -> dict:
    """``{"value", "lo", "hi", "count", "n"}`` of a boolean array (see
    :func:`fraction_interval`); empty for no trajectory."""
    flags = np.asarray(flags, dtype=bool)
    n = int(flags.size)
    if n == 0:
        return {}
    k = int(np.count_nonzero(flags))
    p, lo, hi = fraction_interval(k, n)
    return {"value": p, "lo": lo, "hi": hi, "count": k, "n": n}


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


def _put(out: dict, key: str, err_key: str | None, pair) -> None:
    """Store a (value, error) pair, leaving out what is not a number."""
    v, e = pair
    if math.isfinite(v):
        out[key] = float(v)
        if err_key is not None and math.isfinite(e):
            out[err_key] = float(e)


def summarize(obs: dict, kinds: list) -> dict:
    """Summary numbers of one observation (``observables.observe`` output).

    Keys (each only when it can be computed): ``n_trajectories``, ``n_ok``
    (trajectories used: finite and bound); ``L_mean_hbar`` (``_err``),
    ``L_std_hbar`` (``_err``), ``f_rot_mean_hz`` (``_err``); per fraction
    ``<name>_fraction`` with ``_lo``, ``_hi`` (Wilson 68 %) and
    ``<name>_count``; ``mode_n_mean`` and ``mode_n_err`` (arrays per mode);
    ``differential_n_mean`` and ``com_n_mean`` (``_err``).
    """

    status = np.asarray(obs["status"])
    ok = usable(status)
    out: dict = {"n_trajectories": int(status.size), "n_ok": int(np.count_nonzero(ok))}
    _put(out, "L_mean_hbar", "L_mean_err_hbar", mean_sem(obs["L_hbar"][ok]))
    _put(out, "L_std_hbar", "L_std_err_hbar", std_se(obs["L_hbar"][ok]))
    _put(out, "f_rot_mean_hz", "f_rot_mean_err_hz", mean_sem(obs["f_rot_hz"][ok]))
    for name, key in FRACTIONS.items():
        flags = np.asarray(obs[key]) != 0
        fr = fraction(flags)
        if fr:
            out[f"{name}_fraction"] = fr["value"]
            out[f"{name}_fraction_lo"] = fr["lo"]
            out[f"{name}_fraction_hi"] = fr["hi"]
            out[f"{name}_count"] = fr["count"]
    mn = np.asarray(obs["mode_n"])[ok]
    if out["n_ok"] >= 1:
        out["mode_n_mean"] = np.array([mean_sem(mn[:, k])[0] for k in range(mn.shape[1])])
    if out["n_ok"] >= 2:
        out["mode_n_err"] = np.array([mean_sem(mn[:, k])[1] for k in range(mn.shape[1])])
    for kind, key in (("differential", "differential_n"), ("com", "com_n")):
        idx = [k for k, kd in enumerate(kinds) if kd == kind]
        if not idx:
            out[f"{key}_mean"], out[f"{key}_err"] = 0.0, 0.0  # no such mode: exactly none
        else:
            _put(out, f"{key}_mean", f"{key}_err", mean_sem(np.sum(mn[:, idx], axis=1)))
    return out
