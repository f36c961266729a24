"""The RF-null search finds the null without a guess on layouts a user draws.

Reference: the infinitely long five-wire surface trap (two rf strips of widths
a and b with a grounded strip of width c between them, the rest of the plane
grounded). A strip x1 < x < x2 at potential V gives, in the gapless plane,

    phi = (V / pi) [arctan((x2 - x)/z) - arctan((x1 - x)/z)]

(J.D. Jackson, Classical Electrodynamics, ch. 2; the strip limit of the
rectangle formula of M.G. House, Phys. Rev. A 78, 033402 (2008) and of the
polygon formula of J.H. Wesenberg, Phys. Rev. A 78, 063410 (2008)). With
w = x + i z this is phi = (V / pi) Im G(w), G(w) = sum over the rf strips of
log((w - x2) / (w - x1)), G analytic in the upper half plane. By the
Cauchy-Riemann equations G'(w) = pi (phi_z + i phi_x) / V, so the field
vanishes exactly where

    G'(w) = sum [1 / (w - x2) - 1 / (w - x1)] = 0.

For rf strips [a1, a2] (width A) and [b1, b2] (width B) this is the quadratic

    (A + B) w^2 - [A (b1 + b2) + B (a1 + a2)] w + A b1 b2 + B a1 a2 = 0,

whose root with Im w > 0 is the null (x0, h) = (Re w, Im w). For the
five-wire trap (a1 = -c/2 - a, a2 = -c/2, b1 = c/2, b2 = c/2 + b) it gives
h = sqrt(a b c (a + b + c)) / (a + b) and x0 = c (a - b) / (2 (a + b)), the
forms quoted by M.G. House (2008) and by M. Nizamani and W.K. Hensinger,
Appl. Phys. B 106, 327 (2012) (from memory; checked below against the
quadratic). The Hessian of phi per volt in the x-z plane has eigenvalues
+-|G''(w0)| / pi (phi is harmonic in two dimensions).

Finite strips |y| < Y. The missing parts |y'| > Y of each strip change the
field at the centre by at most 5 w / (4 pi Y^2) per volt (both ends, strip of
width w): |grad (z / R^3)| <= 2.5 / R^3 with R >= |y'|, integrated over
y' > Y. The null then moves by at most (this field) / (|G''| / pi), to first
order, in the x-z plane (no y shift: the layout is symmetric in y).
"""

import math
from pathlib import Path

import numpy as np
import pytest

from mdrotor.electrodes.layout import Layout, load_layout, polygon, rectangle
from mdrotor.electrodes.pseudo import find_rf_null

LAYOUTS = Path(__file__).resolve().parents[2] / "configs" / "electrodes"
UM = 1e-6


def _closed_form(a1, a2, b1, b2):
    """Null (x0, h) and in-plane Hessian eigenvalue |G''| / pi (1/m^2 per volt)
    of two infinitely long rf strips [a1, a2], [b1, b2] (module docstring)."""
    A, B = a2 - a1, b2 - b1
    roots = np.roots([A + B, -(A * (b1 + b2) + B * (a1 + a2)), A * b1 * b2 + B * a1 * a2])
    w0 = roots[np.argmax(roots.imag)]
    g2 = sum(-1.0 / (w0 - x2) ** 2 + 1.0 / (w0 - x1) ** 2 for x1, x2 in ((a1, a2), (b1, b2)))
    return float(w0.real), float(w0.imag), abs(g2) / math.pi


def _five_wire(a, b, c, half_length, x_shift=0.0, angle=0.0):
    """Two rf strips of widths a, b with a gap c between, |y| < half_length,
    shifted by x_shift and turned by ``angle`` about the origin (polygons)."""
    rot = np.array([[math.cos(angle), -math.sin(angle)], [math.sin(angle), math.cos(angle)]])

    def strip(name, x1, x2):
        if angle == 0.0:
            return rectangle(name, (x1 + x_shift, x2 + x_shift), (-half_length, half_length), role="rf", limit_v=300.0,
                             group="rf")
        corners = np.array([[x1, -half_length], [x2, -half_length], [x2, half_length], [x1, half_length]])
        corners[:, 0] += x_shift
        return polygon(name, corners @ rot.T, role="rf", limit_v=300.0, group="rf")

    return Layout([strip("rf1", -c / 2 - a, -c / 2), strip("rf2", c / 2, c / 2 + b)], None)


def test_closed_form_matches_the_published_height_and_offset():
    # House (2008); Nizamani and Hensinger, Appl. Phys. B 106, 327 (2012) (from memory)
    for a, b, c in ((100.0, 300.0, 200.0), (50.0, 150.0, 80.0), (200.0, 60.0, 40.0), (120.0, 120.0, 70.0)):
        x0, h, _ = _closed_form(-c / 2 - a, -c / 2, c / 2, c / 2 + b)
        assert h == pytest.approx(math.sqrt(a * b * c * (a + b + c)) / (a + b), rel=1e-12)
        assert x0 == pytest.approx(c * (a - b) / (2 * (a + b)), rel=1e-12, abs=1e-12 * c)


@pytest.mark.parametrize("a,b,c,shift_um,angle_deg", [
    (100.0, 300.0, 200.0, 0.0, 0.0),     # the issue's strips, x in [-200, -100] and [100, 400] um
    (50.0, 150.0, 80.0, 0.0, 0.0),
    (200.0, 60.0, 40.0, 0.0, 0.0),       # the wide strip on the left
    (120.0, 120.0, 70.0, 0.0, 0.0),      # symmetric
    (100.0, 300.0, 200.0, 1500.0, 0.0),  # far from the origin
    (80.0, 200.0, 60.0, 300.0, 30.0),    # turned: polygons, not rectangles
])
def test_long_asymmetric_strips_give_the_closed_form_null(a, b, c, shift_um, angle_deg):
    Y = 20e-3  # strips 40 mm long
    lay = _five_wire(a * UM, b * UM, c * UM, Y, shift_um * UM, math.radians(angle_deg))
    res = find_rf_null(lay)
    assert res.found
    x0, h, mu = _closed_form(-c / 2 - a, -c / 2, c / 2, c / 2 + b)
    x0, h, mu = x0 * UM, h * UM, mu / UM ** 2
    th = math.radians(angle_deg)
    want = np.array([(x0 + shift_um * UM) * math.cos(th), (x0 + shift_um * UM) * math.sin(th), h])
    # first-order shift of the null by the missing strip ends (module docstring)
    bound = 5.0 * (a + b) * UM / (4.0 * math.pi * Y ** 2) / mu
    assert np.linalg.norm(res.point_m - want) <= bound + 1e-9 * h, (res.point_m, want, bound)


def test_short_asymmetric_strips_of_the_issue():
    # rf strips at x in [-200, -100] um and [100, 400] um, |y| < 300 um: a
    # null exists (|E| at it 1e-6 of the field at half its height or less) and the
    # local solve started at the long-strip null converges to the same point
    lay = _five_wire(100 * UM, 300 * UM, 200 * UM, 300 * UM)
    res = find_rf_null(lay)
    assert res.found and res.field_per_v <= 1e-6 * res.reference_per_v
    x0, h, _ = _closed_form(-200.0, -100.0, 100.0, 400.0)
    local = find_rf_null(lay, guess_m=[x0 * UM, 0.0, h * UM])
    assert local.found
    assert np.linalg.norm(res.point_m - local.point_m) <= 1e-9 * res.point_m[2]
    assert abs(res.point_m[1]) <= 1e-9 * res.point_m[2]  # symmetric in y
    # the short strips pull the null down and towards the wide strip, but it
    # stays above the gap between the rf strips
    assert -100 * UM < res.point_m[0] < 100 * UM and 0 < res.point_m[2] < h * UM


def _ring_height(r_in, r_out):
    """On-axis null of an rf ring r_in < r < r_out: phi'(z) = 0 with
    phi = V [z / sqrt(z^2 + r_in^2) - z / sqrt(z^2 + r_out^2)] (the on-axis
    solid angle of a disc, 2 pi (1 - z / sqrt(z^2 + r^2)); common practice, no
    source), i.e. z0^2 = (r_in r_out)^(4/3) / (r_in^(2/3) + r_out^(2/3))."""
    return (r_in * r_out) ** (2.0 / 3.0) / math.sqrt(r_in ** (2.0 / 3.0) + r_out ** (2.0 / 3.0))


@pytest.mark.parametrize("name,r_in,r_out", [
    ("ring6_string2", 100e-6, 290e-6),
    ("ring8_triangle3", 110e-6, 310e-6),
    ("ring12_square4", 100e-6, 290e-6),
])
def test_example_layouts_null_on_axis_at_the_ring_height(name, r_in, r_out):
    lay = load_layout(LAYOUTS / f"{name}.toml")
    assert lay.trap_from_rf_null
    p = lay.trap_point_m
    # the circles are regular 96-gons inscribed in them: radii short by up to
    # delta = 1 - cos(pi / 96), heights shifted by O(delta) (the tolerance 3
    # delta of tests/electrodes/test_pseudo.py)
    delta = 1.0 - math.cos(math.pi / 96)
    assert math.hypot(p[0], p[1]) <= 1e-9 * p[2]
    assert p[2] == pytest.approx(_ring_height(r_in, r_out), rel=3 * delta)
    # and the global search agrees with a local solve started on the axis
    local = find_rf_null(lay, guess_m=[0.0, 0.0, 0.8 * p[2]])
    assert np.linalg.norm(local.point_m - p) <= 1e-9 * p[2]


def test_layout_without_a_null_is_refused_with_one_line(tmp_path):
    # a single rf strip has no null above it (G' = 1/(w - x2) - 1/(w - x1) != 0)
    from mdrotor.errors import InputError

    lay = Layout([rectangle("rf", (-50 * UM, 50 * UM), (-2e-3, 2e-3), role="rf", limit_v=100.0)], None)
    assert not find_rf_null(lay).found
    with pytest.raises(InputError, match="no RF null found"):
        Layout([rectangle("rf", (-50 * UM, 50 * UM), (-2e-3, 2e-3), role="rf", limit_v=100.0)], "rf_null")
