"""Schedules (mdrotor.config.schedule): profiles, f_rot(t), the exact angle theta(t), rates and peaks,
against scipy quadrature, scipy's PCHIP interpolant and the shapes' closed forms."""

import math

import numpy as np
import pytest
from conftest import two_ion_config
from scipy.integrate import quad
from scipy.interpolate import PchipInterpolator

from mdrotor.config import parse as config
from mdrotor.errors import InputError

US = 1e-6
STAGES = [
    {"name": "lin", "duration": "10 us", "f_rot": {"to": "20 kHz", "shape": "linear"}},
    {"name": "cos", "duration": "7 us", "f_rot": {"to": "50 kHz", "shape": "cosine"}, "pinning": {"to": 0.5, "shape": "cosine"}},
    {"name": "smooth", "duration": "12 us", "f_rot": {"to": "150 kHz", "shape": "smoothstep"}},
    {"name": "hold", "duration": "3 us"},
    {"name": "tanh", "duration": "9 us", "f_rot": {"to": "80 kHz", "shape": "tanh", "steepness": 5}},
    {"name": "exp", "duration": "6 us", "f_rot": {"to": "120 kHz", "shape": "exponential", "tau": "2 us"}},
    {"name": "table", "duration": "8 us",
     "f_rot": {"shape": "table", "points": [["0 us", "120 kHz"], ["2 us", "160 kHz"], ["5 us", "90 kHz"], ["8 us", "100 kHz"]]},
     "pinning": {"to": 0.0, "shape": "smoothstep"}},
]
# (stage, start time, duration, f0, f1) as written above
BOUNDS = [("lin", 0, 10, 0, 20e3), ("cos", 10, 7, 20e3, 50e3), ("smooth", 17, 12, 50e3, 150e3), ("hold", 29, 3, 150e3, 150e3),
          ("tanh", 32, 9, 150e3, 80e3), ("exp", 41, 6, 80e3, 120e3), ("table", 47, 8, 120e3, 100e3)]


@pytest.fixture(scope="module")
def sched():
    return config.from_dict(two_ion_config(stage=STAGES), "s.toml").schedule


def closed_form(name, s, T, f0, f1):
    """The shapes g(s) as their sources write them."""
    if name == "lin":
        g = s
    elif name == "cos":  # raised cosine (Hann window half period)
        g = (1 - np.cos(np.pi * s)) / 2
    elif name == "smooth":  # quintic smoothstep, K. Perlin, ACM Trans. Graph. 21, 681 (2002) ("Improving noise")
        g = 6 * s**5 - 15 * s**4 + 10 * s**3
    elif name == "hold":
        g = 0 * s
    elif name == "tanh":  # tanh ramp rescaled to run from 0 to 1 (common practice, no source)
        w = 5.0
        g = (np.tanh(w * (s - 0.5)) + np.tanh(w / 2)) / (2 * np.tanh(w / 2))
    elif name == "exp":  # first-order (RC) approach with time constant tau, rescaled to end at 1
        g = (1 - np.exp(-s * T / 2.0)) / (1 - np.exp(-T / 2.0))
    return f0 + (f1 - f0) * g


def test_f_rot_follows_each_shape(sched):
    assert list(sched.boundaries_s / US) == pytest.approx([b[1] for b in BOUNDS] + [55], rel=1e-12, abs=0)
    for name, t0, T, f0, f1 in BOUNDS[:-1]:
        s = np.linspace(0, 1, 41)
        t = (t0 + s * T) * US
        t[-1] -= 1e-9 * US  # the boundary itself belongs to the next stage
        np.testing.assert_allclose(sched.f_rot_hz(t), closed_form(name, s, T, f0, f1), rtol=1e-9, atol=1e-6, err_msg=name)


def test_table_is_the_pchip_interpolant(sched):
    # shape-preserving cubic of F.N. Fritsch and R.E. Carlson, SIAM J. Numer. Anal. 17, 238 (1980), as scipy builds it
    ref = PchipInterpolator([0, 2, 5, 8], [120e3, 160e3, 90e3, 100e3])
    tl = np.linspace(0, 7.999, 97)
    np.testing.assert_allclose(sched.f_rot_hz((47 + tl) * US), ref(tl), rtol=1e-12, atol=0)


def test_theta_is_the_integral_of_f_rot(sched):
    # theta(t) = 2 pi int_0^t f_rot dt'; scipy.integrate.quad per stage (its error estimate ~1e-14 relative)
    f = lambda t: float(sched.f_rot_hz(t))
    edges = sched.boundaries_s
    for t in np.array([3.3, 10.0, 15.2, 28.9, 30.0, 37.7, 44.1, 50.3, 55.0]) * US:
        total = 0.0
        for a, b in zip(edges[:-1], edges[1:]):
            if a >= t:
                break
            val, err = quad(f, a, min(b, t), epsabs=0, epsrel=1e-13, limit=200)
            total += val
        assert float(sched.theta_rad(t)) == pytest.approx(2 * math.pi * total, rel=1e-11, abs=0), t


def test_rate_is_the_derivative_of_f_rot(sched):
    # central differences, error h^2 f''' / 6: with h = 1e-3 of a stage, below 1e-5 of the largest rate
    for name, t0, T, f0, f1 in BOUNDS:
        if name == "hold":
            continue
        h = 1e-3 * T * US
        t = (t0 + np.linspace(0.1, 0.9, 9) * T) * US
        num = (sched.f_rot_hz(t + h) - sched.f_rot_hz(t - h)) / (2 * h)
        scale = np.max(np.abs(num))
        np.testing.assert_allclose(sched.f_rot_rate_hz_per_s(t), num, rtol=0, atol=1e-5 * scale, err_msg=name)
        np.testing.assert_allclose(sched.angular_acceleration_rad_s2(t), 2 * np.pi * sched.f_rot_rate_hz_per_s(t),
                                   rtol=1e-15, atol=0)


def test_peaks(sched):
    # the table overshoots nowhere (PCHIP is monotone between knots): its peak is the knot 160 kHz
    t = np.linspace(0, 55, 200001) * US
    sampled = np.max(np.abs(sched.f_rot_hz(t)))
    assert sched.max_f_rot_hz() == pytest.approx(160e3, rel=1e-12, abs=0)
    assert sampled <= sched.max_f_rot_hz() * (1 + 1e-12) and sampled == pytest.approx(160e3, rel=1e-6, abs=0)
    assert sched.peak_pinning_scale() == 1.0
    # the pinning multiplier: 1, a raised cosine down to 0.5, held, a smoothstep to 0
    assert float(sched.pinning_scale(13.5 * US)) == pytest.approx(0.75, rel=1e-12, abs=0)  # cosine at s = 1/2
    assert float(sched.pinning_scale(51 * US)) == pytest.approx(0.25, rel=1e-12, abs=0)  # smoothstep at s = 1/2
    assert float(sched.pinning_scale(55 * US - 1e-15)) == pytest.approx(0.0, abs=1e-9)
    assert [sched.spins(i) for i in range(len(STAGES))] == [True, True, True, False, True, True, True]


@pytest.mark.parametrize("f_rot", [
    {"to": "50 kHz", "shape": "exponential", "tau": "1e6 s"},   # r = T / tau = 1e-10: theta was 0 throughout
    {"to": "50 kHz", "shape": "exponential", "tau": "1 s"},     # r = 1e-4
    {"to": "50 kHz", "shape": "exponential", "tau": "1 ns"},    # nearly a step at the start
    {"to": "50 kHz", "shape": "tanh", "steepness": 1e4},        # a step in the middle: cosh overflowed (warning)
])
def test_extreme_shape_parameters_keep_theta_the_integral(f_rot):
    """theta(t) = 2 pi int f_rot dt (scipy quad, split where the steps are) for
    shapes at the edge of their parameters. An exponential with tau >> the
    stage lost G(s) to cancellation (s + expm1(-s r) / r with r = 1e-10:
    theta stayed 0 while f_rot ramped, and every trajectory slipped)."""
    import warnings

    T = 100 * US
    with warnings.catch_warnings():
        warnings.simplefilter("error")
        sch = config.from_dict(two_ion_config(stage=[{"name": "a", "duration": "100 us", "f_rot": f_rot}]), "s.toml").schedule
        f = lambda t: float(sch.f_rot_hz(t))
        for t in np.array([0.2, 0.5, 0.7, 1.0]) * T:
            pts = [x for x in (1e-6 * T, 1e-5 * T, 1e-4 * T, 1e-3 * T, 0.499 * T, 0.5 * T, 0.501 * T) if x < t]
            val = quad(f, 0.0, t, epsabs=0, epsrel=1e-12, limit=400, points=pts or None)[0]
            # quad resolves the 1e-4-wide steps to a few 1e-9 (its estimate), the closed forms to rounding
            assert float(sch.theta_rad(t)) == pytest.approx(2 * math.pi * val, rel=2e-8), t
            assert np.isfinite(sch.f_rot_rate_hz_per_s(t))


@pytest.mark.parametrize("stage, key", [
    # keys the shape does not use were ignored: a 'to' contradicting the table's end, points
    # under a linear shape, a table given twice, a time constant on a linear ramp
    ({"name": "a", "duration": "1 us", "f_rot": {"to": "2 kHz", "shape": "table",
                                                  "points": [["0 us", "0 Hz"], ["1 us", "1 kHz"]]}}, "stage.a.f_rot.to"),
    ({"name": "a", "duration": "1 us", "f_rot": {"to": "1 kHz", "shape": "linear",
                                                  "points": [["0 us", "0 Hz"], ["1 us", "1 kHz"]]}}, "stage.a.f_rot.points"),
    ({"name": "a", "duration": "1 us", "f_rot": {"shape": "table", "table": "r.csv",
                                                  "points": [["0 us", "0 Hz"], ["1 us", "1 kHz"]]}}, "stage.a.f_rot.points"),
    ({"name": "a", "duration": "1 us", "f_rot": {"to": "1 kHz", "shape": "linear", "tau": "1 us"}}, "stage.a.f_rot.tau"),
    ({"name": "a", "duration": "1 us", "f_rot": {"to": "1 kHz", "shape": "cosine", "steepness": 3}},
     "stage.a.f_rot.steepness"),
    ({"name": "a", "duration": "1 us", "f_rot": {"from": "1 kHz", "to": "2 kHz"}}, "stage.a.f_rot.from"),
    ({"name": "a", "duration": "1 us", "f_rot": {"to": "2 kHz", "shape": "hold"}}, "stage.a.f_rot.to"),
    ({"name": "a", "duration": "1 us", "f_rot": {"to": "2 kHz", "shape": "exponential"}}, "stage.a.f_rot.tau"),
    ({"name": "a", "duration": "1 us", "f_rot": {"shape": "table", "points": [["0 us", "0 Hz"], ["0.5 us", "1 kHz"]]}},
     "stage.a.f_rot.points"),
    ({"name": "a", "duration": "1 us", "f_rot": {"to": "2 kHz", "shape": "wiggle"}}, "stage.a.f_rot.shape"),
])
def test_discontinuous_or_malformed_profiles_are_refused(stage, key):
    with pytest.raises(InputError) as e:
        config.from_dict(two_ion_config(stage=[stage]), "s.toml")
    assert key in e.value.line(), e.value.line()


@pytest.mark.parametrize("csv, words", [
    ("0,0,7\n0.000001,1000,7\n", "2 columns"),        # a third column was dropped silently
    ("t_s,f_hz\n0,0\n", "increase"),                 # one row
])
def test_ramp_table_file_faults_are_refused(tmp_path, csv, words):
    (tmp_path / "r.csv").write_text(csv)
    stage = {"name": "a", "duration": "1 us", "f_rot": {"shape": "table", "table": "r.csv"}}
    with pytest.raises(InputError) as e:
        config.from_dict(two_ion_config(stage=[stage]), "s.toml", tmp_path)
    assert "stage.a.f_rot.table" in e.value.line() and words in e.value.line(), e.value.line()
