"""Gapless-plane potentials, fields and Hessians of planar electrodes.

Reference: the Dirichlet Green's function of the half space z > 0 gives
phi(r) = integral V(x', y') z / (2 pi R^3) dx' dy' (J.D. Jackson, Classical
Electrodynamics, 3rd ed., ch. 2, method of images, from memory; M.G. House,
Phys. Rev. A 78, 033402 (2008)); we integrate it with scipy.integrate.dblquad
as the independent check of House's rectangle formula and of the
Van Oosterom-Strackee triangle formula (IEEE Trans. Biomed. Eng. 30, 125
(1983)).
"""

import math

import numpy as np
import pytest
from scipy.integrate import dblquad

from mdrotor.electrodes.layout import Layout, annulus, load_layout, polygon, rectangle
from mdrotor.electrodes.potentials import rectangle_solid_angle, triangle_solid_angle
from mdrotor.errors import InputError

TWO_PI = 2.0 * math.pi


def _green(xp, yp, p):
    r2 = (xp - p[0]) ** 2 + (yp - p[1]) ** 2 + p[2] ** 2
    return p[2] / (TWO_PI * r2 ** 1.5)


def _rect_quad(x1, x2, y1, y2, p):
    """dblquad of the Green's function; the domain is split at the point's
    projection so the peak (width ~ z) sits at a corner of each piece."""
    xs = [x1] + [v for v in [p[0]] if x1 < v < x2] + [x2]
    ys = [y1] + [v for v in [p[1]] if y1 < v < y2] + [y2]
    tot = 0.0
    for i in range(len(xs) - 1):
        for j in range(len(ys) - 1):
            v, _ = dblquad(lambda yy, xx: _green(xx, yy, p), xs[i], xs[i + 1], ys[j], ys[j + 1],
                           epsabs=1e-13, epsrel=1e-12)
            tot += v
    return tot


def _tri_quad(tri, p):
    """dblquad over a triangle: x from its left to right vertex, split at the
    middle vertex and at the point's x."""
    tri = tri[np.argsort(tri[:, 0])]
    (xa, ya), (xb, yb), (xc, yc) = tri

    def line(x0, y0, x1, y1):
        return lambda x: y0 + (y1 - y0) * (x - x0) / (x1 - x0)

    long_edge = line(xa, ya, xc, yc)
    tot = 0.0
    for lo, hi, short in ((xa, xb, line(xa, ya, xb, yb)), (xb, xc, line(xb, yb, xc, yc))):
        cuts = [lo] + [v for v in [p[0]] if lo < v < hi] + [hi]
        for s in range(len(cuts) - 1):
            v, _ = dblquad(lambda yy, xx: _green(xx, yy, p), cuts[s], cuts[s + 1],
                           lambda x: min(long_edge(x), short(x)), lambda x: max(long_edge(x), short(x)),
                           epsabs=1e-13, epsrel=1e-12)
            tot += v
    return tot


@pytest.mark.parametrize("p", [(0.3, -0.2, 0.02), (0.3, -0.2, 0.7), (2.5, 3.0, 0.4), (-0.99, 1.49, 0.005), (0.0, 0.5, 3.0)])
def test_rectangle_matches_green_function_quadrature(p):
    # House, PRA 78, 033402 (2008) closed form vs dblquad of z / (2 pi R^3);
    # tolerance 1e-8 as asked (quadrature converges to ~1e-13 here)
    p = np.array(p)
    exact = rectangle_solid_angle(p[None, :], np.array([[-1.0, 1.0, -0.5, 1.5]]))[0, 0] / TWO_PI
    assert abs(exact - _rect_quad(-1.0, 1.0, -0.5, 1.5, p)) < 1e-8


@pytest.mark.parametrize("p", [(0.2, 0.1, 0.03), (1.5, -0.4, 0.5), (0.0, 0.0, 2.0)])
def test_triangle_matches_green_function_quadrature(p):
    # Van Oosterom and Strackee, IEEE TBME 30, 125 (1983) vs dblquad; 1e-8
    tri = np.array([[-0.5, -0.3], [1.2, 0.1], [0.1, 0.9]])
    p = np.array(p)
    exact = triangle_solid_angle(p[None, :], tri[None])[0, 0] / TWO_PI
    assert abs(exact - _tri_quad(tri, p)) < 1e-8
    # clockwise order flips the sign (signed solid angle)
    assert triangle_solid_angle(p[None, :], tri[None, ::-1])[0, 0] == pytest.approx(-TWO_PI * exact, rel=1e-13)


def test_cube_face_is_one_third():
    # a face of a cube seen from the centre subtends 4 pi / 6, so phi / V = 1/3
    # exactly (REFERENCES.md, surface electrodes); roundoff only
    el = rectangle("a", (-1e-6, 1e-6), (-1e-6, 1e-6), limit_v=1.0)
    lay = Layout([el], [0.0, 0.0, 1e-6])
    assert lay.potential([[0.0, 0.0, 1e-6]], [1.0])[0] == pytest.approx(1.0 / 3.0, abs=1e-15)
    # the same square as a polygon (triangulated, Van Oosterom-Strackee)
    poly = polygon("b", [[-1e-6, -1e-6], [1e-6, -1e-6], [1e-6, 1e-6], [-1e-6, 1e-6]], limit_v=1.0)
    lay2 = Layout([poly], [0.0, 0.0, 1e-6])
    assert lay2.potential([[0.0, 0.0, 1e-6]], [1.0])[0] == pytest.approx(1.0 / 3.0, abs=1e-15)


def test_long_rectangle_matches_infinite_strip():
    # Jackson, Classical Electrodynamics, ch. 2: strip x1 < x < x2 at V gives
    # phi = (V / pi)[arctan((x2 - x)/z) - arctan((x1 - x)/z)]. A finite length
    # |y| < Y misses at most two half-strips, each seen under a solid angle
    # below w z / (2 Y^2) (w the width), so |phi_rect - phi_strip| <= w z / (2 pi Y^2).
    x1, x2, Y = -30e-6, 50e-6, 0.5
    w = x2 - x1
    el = rectangle("strip", (x1, x2), (-Y, Y), limit_v=1.0)
    lay = Layout([el], None)
    pts = np.array([[0.0, 0.0, 40e-6], [70e-6, 1e-6, 10e-6], [-29e-6, -2e-6, 1e-6], [10e-6, 0.0, 300e-6]])
    got = lay.potential(pts, [1.0])
    x, z = pts[:, 0], pts[:, 2]
    strip = (np.arctan((x2 - x) / z) - np.arctan((x1 - x) / z)) / math.pi
    bound = w * z / (TWO_PI * Y ** 2)
    assert np.all(np.abs(got - strip) <= bound + 1e-14)


def _l_shape_um():
    return np.array([[0, 0], [60, 0], [60, 20], [25, 20], [25, 70], [0, 70]], dtype=float) * 1e-6


def test_polygon_split_two_ways_gives_same_potential():
    # common practice, no source: the potential is additive over a partition
    # of the electrode; compare one polygon (ear clipping), the same polygon
    # listed from another vertex and clockwise, two rectangles (House), and
    # two polygons (Van Oosterom-Strackee). Roundoff tolerance.
    L = _l_shape_um()
    pts = np.array([[10e-6, 10e-6, 5e-6], [40e-6, 30e-6, 20e-6], [-20e-6, 80e-6, 50e-6], [24.9e-6, 20.1e-6, 0.5e-6]])
    one = Layout([polygon("L", L, limit_v=1)], None).potential(pts, [1.0])
    turned = Layout([polygon("L", np.roll(L, 3, axis=0)[::-1], limit_v=1)], None).potential(pts, [1.0])
    rects = Layout([rectangle("a", (0, 60e-6), (0, 20e-6), limit_v=1, group="L"),
                    rectangle("b", (0, 25e-6), (20e-6, 70e-6), limit_v=1, group="L")], None).potential(pts, [1.0])
    polys = Layout([polygon("a", [[0, 0], [25e-6, 0], [25e-6, 70e-6], [0, 70e-6]], limit_v=1, group="L"),
                    polygon("b", [[25e-6, 0], [60e-6, 0], [60e-6, 20e-6], [25e-6, 20e-6]], limit_v=1, group="L")],
                   None).potential(pts, [1.0])
    for other in (turned, rects, polys):
        np.testing.assert_allclose(other, one, rtol=0, atol=1e-13)


def test_whole_plane_at_one_voltage_gives_that_voltage():
    # A plane at V throughout gives phi = V above it (uniqueness of the
    # Dirichlet problem). The layout ring12-square4, a square of half-side
    # 700 um with the layout's outer circle as a hole, and four rectangles
    # out to |x|, |y| < S tile that square; the missing outside is seen under
    # less than the region |r| > S, whose share is z / sqrt(z^2 + S^2) on the
    # axis (elementary solid angle of a disc) and smaller off it, so
    # |phi - 1| <= z / sqrt(z^2 + S^2) (~1e-7 here).
    base = load_layout("configs/electrodes/ring12_square4.toml")
    S, a = 1000.0, 700e-6
    circle = annulus("tmp", [0, 0], 290e-6, 600e-6, limit_v=1).outer_m  # same vertices as the segments' arcs
    fill = [polygon("g0", [[-a, -a], [a, -a], [a, a], [-a, a]], holes_m=[circle], limit_v=1.0, group="g"),
            rectangle("g1", (-S, S), (a, S), limit_v=1.0, group="g"),
            rectangle("g2", (-S, S), (-S, -a), limit_v=1.0, group="g"),
            rectangle("g3", (a, S), (-a, a), limit_v=1.0, group="g"),
            rectangle("g4", (-S, -a), (-a, a), limit_v=1.0, group="g")]
    lay = Layout(list(base.electrodes) + fill, None)
    pts = np.array([[0, 0, 117e-6], [150e-6, -80e-6, 20e-6], [400e-6, 300e-6, 2e-6], [-1e-3, 2e-3, 5e-4],
                    [0.1, -0.3, 0.05]])
    got = lay.potential(pts, np.ones(lay.n_channels))
    bound = pts[:, 2] / np.sqrt(pts[:, 2] ** 2 + S ** 2)
    assert np.all(np.abs(got - 1.0) <= bound + 1e-12)
    # without the ground fill the potential is visibly below 1 (the test can fail)
    assert base.potential(pts[:1], np.ones(base.n_channels))[0] < 0.99


@pytest.fixture(scope="module")
def ring():
    return load_layout("configs/electrodes/ring8_triangle3.toml")


def test_laplacian_of_summed_potential_vanishes(ring):
    # Laplace's equation (common practice, no source). Central second
    # differences with step h have truncation error h^2/12 phi'''' ~ (h/d)^2
    # relative to the curvature scale phi'' (d the distance to the nearest
    # edge, here >= 60 um, h = 0.1 um: ~3e-6) plus roundoff 4 eps phi / h^2
    # (~1e-6 of the curvature here); we allow 1e-4 of sum |d2phi/dxi2|.
    rng = np.random.default_rng(7)
    v = rng.uniform(-10, 10, ring.n_channels)
    pts = np.array([[0, 0, 127e-6], [30e-6, -20e-6, 100e-6], [200e-6, 150e-6, 60e-6], [-350e-6, 50e-6, 80e-6]])
    h = 0.1e-6
    p0 = ring.potential(pts, v)
    lap = 0.0
    scale = 0.0
    for k in range(3):
        d = np.zeros(3)
        d[k] = h
        second = (ring.potential(pts + d, v) - 2 * p0 + ring.potential(pts - d, v)) / h ** 2
        lap = lap + second
        scale = scale + np.abs(second)
    assert np.all(np.abs(lap) <= 1e-4 * scale)
    # the analytic Hessian is traceless and symmetric to roundoff
    H = ring.hessian(pts, v)
    assert np.all(np.abs(np.trace(H, axis1=1, axis2=2)) <= 1e-10 * np.abs(H).max(axis=(1, 2)))
    assert np.max(np.abs(H - np.swapaxes(H, 1, 2))) <= 1e-10 * np.abs(H).max()


def test_field_and_hessian_match_finite_differences(ring):
    # The edge (Biot-Savart) formulas for E and the Hessian against central
    # differences of the solid-angle potential and of the field: an
    # independent code path. Truncation (h/d)^2 ~ 1e-6 with h = 0.05 um.
    rng = np.random.default_rng(3)
    v = rng.uniform(-10, 10, ring.n_channels)
    pts = np.array([[5e-6, -3e-6, 127e-6], [250e-6, 100e-6, 40e-6], [-500e-6, -500e-6, 30e-6]])
    h = 0.05e-6
    E = ring.field(pts, v)
    H = ring.hessian(pts, v)
    for k in range(3):
        d = np.zeros(3)
        d[k] = h
        fd_e = -(ring.potential(pts + d, v) - ring.potential(pts - d, v)) / (2 * h)
        np.testing.assert_allclose(E[:, k], fd_e, rtol=0, atol=1e-5 * np.abs(E).max())
        fd_h = -(ring.field(pts + d, v) - ring.field(pts - d, v)) / (2 * h)
        np.testing.assert_allclose(H[:, :, k], fd_h, rtol=0, atol=1e-5 * np.abs(H).max())


def test_points_below_the_plane_are_refused(ring):
    with pytest.raises(InputError, match=r"above the trap plane"):
        ring.potential([[0.0, 0.0, -1e-6]], np.zeros(ring.n_channels))


def test_basis_shapes_and_channel_sum(ring):
    pts = np.array([[0, 0, 127e-6], [1e-5, 0, 1e-4]])
    eb = ring.electrode_basis(pts)
    cb = ring.channel_basis(pts)
    assert eb.shape == (2, len(ring.electrodes)) and cb.shape == (2, ring.n_channels)
    assert ring.field_basis(pts).shape == (2, ring.n_channels, 3)
    assert ring.hessian_basis(pts).shape == (2, ring.n_channels, 3, 3)
    # a mapping of voltages equals the array form
    v = {"rf": 0.0, "s1": 2.0, "centre": -1.0}
    arr = ring.voltage_vector(v)
    np.testing.assert_array_equal(ring.potential(pts, v), cb @ arr)
    with pytest.raises(InputError, match="unknown channel"):
        ring.voltage_vector({"nope": 1.0})
