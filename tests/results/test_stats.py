"""Ensemble statistics (mdrotor.results.stats) against closed forms and scipy."""

import math

import numpy as np
import pytest
from scipy import special
from scipy import stats as sps

from mdrotor.results import stats
from mdrotor.results.status import Status


def wilson(k, n, z):
    """Wilson's score interval, E.B. Wilson, J. Am. Stat. Assoc. 22, 209 (1927), eq. for the
    limits of p: (p + z^2/2n +- z sqrt(p (1 - p) / n + z^2 / 4n^2)) / (1 + z^2 / n)."""
    p = k / n
    c = (p + z * z / (2 * n)) / (1 + z * z / n)
    h = z * math.sqrt(p * (1 - p) / n + z * z / (4 * n * n)) / (1 + z * z / n)
    return c - h, c + h


def test_one_sigma_is_the_normal_content_of_one_standard_deviation():
    # P(|X| < 1) of a standard normal, scipy.stats.norm
    assert stats.ONE_SIGMA == pytest.approx(sps.norm.cdf(1) - sps.norm.cdf(-1), rel=1e-14, abs=0)


@pytest.mark.parametrize("k, n", [(0, 1), (0, 400), (1, 10), (3, 97), (50, 100), (399, 400), (400, 400)])
def test_fraction_interval_is_wilsons(k, n):
    p, lo, hi = stats.fraction_interval(k, n)
    assert p == k / n
    # Wilson (1927), z = 1 (one sigma): the closed form
    wlo, whi = wilson(k, n, 1.0)
    assert lo == pytest.approx(max(wlo, 0.0), rel=1e-12, abs=1e-15)
    assert hi == pytest.approx(min(whi, 1.0), rel=1e-12, abs=1e-15)
    # and scipy's binomtest(...).proportion_ci(method="wilson") at 68.27 %
    ci = sps.binomtest(k, n).proportion_ci(confidence_level=sps.norm.cdf(1) - sps.norm.cdf(-1), method="wilson")
    assert (lo, hi) == pytest.approx((ci.low, ci.high), rel=1e-12, abs=1e-15)
    # an interval with a width even when no event or every event was seen, inside [0, 1]
    assert 0.0 <= lo <= p <= hi <= 1.0 and hi > lo


def test_fraction_interval_has_scipys_bits():
    """The closed form (R.G. Newcombe, Stat. Med. 17, 857 (1998), method 3)
    is written with the operations of scipy.stats.binomtest(k,
    n).proportion_ci(method="wilson"), so results match the ones it gave
    before to the last bit, at one and two sigma and 95 %."""
    for conf in (stats.ONE_SIGMA, sps.norm.cdf(2) - sps.norm.cdf(-2), 0.95):
        for n in (1, 2, 7, 40, 97, 400, 1000, 4096):
            for k in sorted({0, 1, n // 3, n // 2, n - 1, n}):
                ci = sps.binomtest(k, n).proportion_ci(confidence_level=conf, method="wilson")
                assert stats.fraction_interval(k, n, conf)[1:] == (ci.low, ci.high), (k, n, conf)


def test_fraction_interval_at_two_sigma():
    # Wilson (1927) with z = 2 (95.45 %)
    conf = sps.norm.cdf(2) - sps.norm.cdf(-2)
    _, lo, hi = stats.fraction_interval(7, 40, confidence=conf)
    assert (lo, hi) == pytest.approx(wilson(7, 40, 2.0), rel=1e-12, abs=0)


def test_fraction_interval_refuses_impossible_counts():
    for k, n in ((1, 0), (-1, 5), (6, 5)):
        with pytest.raises(ValueError):
            stats.fraction_interval(k, n)


def test_fraction_counts_flags():
    fr = stats.fraction(np.array([True, False, False, True, False]))
    assert fr["count"] == 2 and fr["n"] == 5 and fr["value"] == 0.4
    assert (fr["lo"], fr["hi"]) == pytest.approx(wilson(2, 5, 1.0), rel=1e-12, abs=0)
    assert stats.fraction(np.array([], dtype=bool)) == {}


def test_mean_and_its_standard_error_match_scipy():
    rng = np.random.default_rng(1)
    x = rng.normal(3.0, 2.0, 57)
    m, e = stats.mean_sem(np.append(x, [np.nan, np.inf]))  # non-finite values are left out
    assert m == pytest.approx(np.mean(x), rel=1e-14, abs=0)
    assert e == pytest.approx(sps.sem(x), rel=1e-12, abs=0)  # s / sqrt(n), scipy.stats.sem
    assert math.isnan(stats.mean_sem([])[0]) and math.isnan(stats.mean_sem([1.0])[1])


@pytest.mark.parametrize("n", [10, 100, 1000])
def test_standard_error_of_the_spread_against_the_chi_distribution(n):
    # For normal samples s / sigma is chi-distributed with n - 1 degrees of freedom:
    # E[s] = c4 sigma, sd(s) = sigma sqrt(1 - c4^2), c4 = sqrt(2 / (n - 1)) Gamma(n/2) / Gamma((n-1)/2)
    # (the c4 constant of control charts, e.g. D.C. Montgomery, Introduction to Statistical Quality
    # Control; from memory). The code's normal-theory
    # s / sqrt(2 (n - 1)) (J.R. Taylor, Error Analysis, ch. 5) must approach it: within 1 / (2 (n - 1)) relative.
    x = np.random.default_rng(n).normal(0.0, 1.0, n)
    s, se = stats.std_se(x)
    assert s == pytest.approx(np.std(x, ddof=1), rel=1e-14, abs=0)
    c4 = math.sqrt(2.0 / (n - 1)) * math.exp(special.gammaln(n / 2) - special.gammaln((n - 1) / 2))
    exact = s / c4 * math.sqrt(1 - c4 * c4)  # sd(s) estimated with sigma = s / c4
    assert abs(se / exact - 1) < 1.0 / (2 * (n - 1))
    assert all(math.isnan(v) for v in stats.std_se([2.0]))


@pytest.mark.parametrize("n", [10, 100, 1000])
def test_standard_error_of_the_variance_against_the_chi2_distribution(n):
    # For normal samples (n - 1) s^2 / sigma^2 is chi-squared with n - 1 degrees of
    # freedom, so sd(s^2) = sigma^2 sqrt(2 / (n - 1)) (scipy.stats.chi2 gives the
    # distribution's standard deviation, sqrt(2 (n - 1))); with sigma^2 estimated by s^2
    # the code's error must equal it to rounding.
    x = np.random.default_rng(n + 1).normal(0.0, 1.0, n)
    v, ve = stats.var_se(x)
    assert v == pytest.approx(np.var(x, ddof=1), rel=1e-14, abs=0)
    assert ve == pytest.approx(v * sps.chi2(n - 1).std() / (n - 1), rel=1e-12, abs=0)
    assert all(math.isnan(u) for u in stats.var_se([2.0]))


def _obs(L, status, mode_n):
    n = len(L)
    return {"L_hbar": np.asarray(L, float), "f_rot_hz": np.full(n, 1e3), "status": np.asarray(status),
            "slips": (np.asarray(status) & Status.SLIPPED) != 0, "lost": (np.asarray(status) & Status.LOST) != 0,
            "reordered": np.zeros(n, bool), "nonfinite": (np.asarray(status) & Status.NONFINITE) != 0,
            "mode_n": np.asarray(mode_n, float)}


def test_identical_values_have_no_spread_and_their_own_mean():
    # n copies of one value have mean that value and spread exactly 0 (a
    # zero-temperature classical run: every trajectory the same). Summing
    # first and subtracting the rounded mean gives a spread of rounding noise
    # (1e-12 hbar at L = 1e4) with an "error"; the deviations from a sample
    # (shifted data, T.F. Chan, G.H. Golub and R.J. LeVeque, Am. Stat. 37,
    # 242 (1983); from memory) are exactly 0.
    x = np.full(20, 10097.76526903814)
    assert stats.mean_sem(x) == (x[0], 0.0)
    assert stats.std_se(x) == (0.0, 0.0)
    # and shifting changes nothing that rounding can see on ordinary data
    y = np.random.default_rng(5).normal(1e4, 30.0, 400)
    assert stats.mean_sem(y)[0] == pytest.approx(np.mean(y), rel=1e-15)
    assert stats.mean_sem(y)[1] == pytest.approx(np.std(y, ddof=1) / math.sqrt(400), rel=1e-12)
    assert stats.std_se(y)[0] == pytest.approx(np.std(y, ddof=1), rel=1e-12)


def test_summarize_uses_usable_trajectories_and_leaves_out_what_it_cannot_compute():
    L = [10.0, 12.0, 1e9, np.nan]
    status = [Status.SLIPPED, 0, Status.LOST, Status.NONFINITE]
    mode_n = [[1.0, 2.0], [3.0, 4.0], [1e9, 1e9], [np.nan, np.nan]]
    s = stats.summarize(_obs(L, status, mode_n), ["com", "differential"])
    assert s["n_trajectories"] == 4 and s["n_ok"] == 2  # a slipped one is used; lost and non-finite are not
    assert s["L_mean_hbar"] == 11.0 and s["L_mean_err_hbar"] == pytest.approx(1.0, rel=1e-14, abs=0)
    assert s["L_std_hbar"] == pytest.approx(math.sqrt(2.0), rel=1e-14, abs=0)
    # fractions are of all trajectories, with their Wilson intervals
    assert s["slip_fraction"] == 0.25 and s["slip_count"] == 1 and s["loss_fraction"] == 0.25
    assert (s["loss_fraction_lo"], s["loss_fraction_hi"]) == pytest.approx(wilson(1, 4, 1.0), rel=1e-12, abs=0)
    assert s["com_n_mean"] == 2.0 and s["differential_n_mean"] == 3.0
    np.testing.assert_array_equal(s["mode_n_mean"], [2.0, 3.0])
    # one usable trajectory: a mean, no spread and no errors (left out, never NaN)
    one = stats.summarize(_obs(L[1:], status[1:], mode_n[1:]), ["com", "differential"])
    assert one["n_ok"] == 1 and one["L_mean_hbar"] == 12.0
    for k in ("L_mean_err_hbar", "L_std_hbar", "L_std_err_hbar", "mode_n_err", "com_n_err"):
        assert k not in one, k
    assert not any(isinstance(v, float) and math.isnan(v) for v in one.values())
