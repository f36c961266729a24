"""Planar polygon geometry (mdrotor.electrodes.polygons) against closed forms."""

import math

import numpy as np
import pytest

from mdrotor.electrodes.polygons import (
    arc_points,
    ccw,
    drop_collinear,
    region_overlap_area,
    self_intersection,
    signed_area,
    triangle_overlap_areas,
    triangulate,
)


def regular(n, R=1.0, phase=0.0):
    a = phase + 2 * np.pi * np.arange(n) / n
    return np.column_stack([R * np.cos(a), R * np.sin(a)])


def star(n, R, r):
    """A star with n points: outer radius R, inner r (non-convex for r < R cos(pi/n))."""
    a = np.pi * np.arange(2 * n) / n
    rad = np.where(np.arange(2 * n) % 2 == 0, R, r)
    return np.column_stack([rad * np.cos(a), rad * np.sin(a)])


def inside(p, v):
    """Even-odd (ray crossing) rule, W.R. Franklin's point-in-polygon test (common practice, no source)."""
    x, y = p
    c = False
    for (x1, y1), (x2, y2) in zip(v, np.roll(v, -1, axis=0)):
        if (y1 > y) != (y2 > y) and x < x1 + (y - y1) * (x2 - x1) / (y2 - y1):
            c = not c
    return c


@pytest.mark.parametrize("n", [3, 4, 6, 96])
def test_regular_polygon_area(n):
    # regular n-gon inscribed in radius R: (n / 2) R^2 sin(2 pi / n) (elementary geometry)
    R = 2.5
    v = regular(n, R, 0.3)
    assert signed_area(v) == pytest.approx(0.5 * n * R * R * math.sin(2 * math.pi / n), rel=1e-13, abs=0)
    assert signed_area(v[::-1]) == pytest.approx(-signed_area(v), rel=1e-15, abs=0)  # clockwise: negative
    assert signed_area(ccw(v[::-1])) > 0


def test_triangle_area_heron():
    # Heron's formula, A = sqrt(s (s - a)(s - b)(s - c))
    v = np.array([[0.1, 0.2], [3.7, 0.9], [1.3, 2.8]])
    a, b, c = (np.linalg.norm(v[i] - v[(i + 1) % 3]) for i in range(3))
    s = (a + b + c) / 2
    assert abs(signed_area(v)) == pytest.approx(math.sqrt(s * (s - a) * (s - b) * (s - c)), rel=1e-12, abs=0)


@pytest.mark.parametrize("n, R, r", [(5, 1.0, 0.4), (8, 2.0, 1.2), (3, 1.0, 0.2)])
def test_triangulation_of_a_star_covers_it_once(n, R, r):
    v = star(n, R, r)
    tris = triangulate(v)
    # a simple polygon of k vertices has k - 2 triangles (G.H. Meisters, Amer. Math. Monthly 82, 648 (1975))
    assert tris.shape == (2 * n - 2, 3, 2)
    areas = np.array([signed_area(t) for t in tris])
    assert np.all(areas > 0)  # each counter-clockwise
    # star area: 2 n triangles of sides R, r and angle pi / n between them (elementary geometry)
    assert areas.sum() == pytest.approx(n * R * r * math.sin(math.pi / n), rel=1e-12, abs=0)
    for t in tris:  # every triangle lies in the polygon: its centroid passes the crossing test
        assert inside(t.mean(axis=0), v)


def test_triangulation_drops_straight_vertices():
    square = np.array([[0, 0], [1, 0], [2, 0], [2, 2], [0, 2]], dtype=float)  # (1, 0) is on an edge
    assert len(drop_collinear(square)) == 4
    tris = triangulate(square)
    assert len(tris) == 2 and sum(signed_area(t) for t in tris) == pytest.approx(4.0, rel=1e-14, abs=0)


def test_self_intersection():
    assert self_intersection(star(5, 1.0, 0.4)) is None
    bowtie = np.array([[0, 0], [1, 1], [1, 0], [0, 1]], dtype=float)
    i, j, point, what = self_intersection(bowtie)
    assert what == "cross" and np.allclose(point, [0.5, 0.5], rtol=0, atol=1e-12)  # the diagonals cross at the centre
    assert self_intersection(np.array([[0, 0], [1, 0], [1, 0], [0, 1]], dtype=float))[3] == "repeated vertex"
    assert self_intersection(np.array([[0, 0], [2, 0], [1, 0], [0, 1]], dtype=float))[3] == "fold back"


@pytest.mark.parametrize("d", [0.0, 0.25, 0.6, 1.0, 1.5])
def test_overlap_of_shifted_right_triangles(d):
    # the unit right triangle and its copy shifted by d along x overlap in a similar
    # triangle with legs 1 - d: area (1 - d)^2 / 2, none for d >= 1 (elementary geometry)
    t = np.array([[[0, 0], [1, 0], [0, 1]]], dtype=float)
    s = t + np.array([d, 0.0])
    assert triangle_overlap_areas(t, s)[0] == pytest.approx(max(1 - d, 0) ** 2 / 2, rel=1e-12, abs=1e-15)


def test_overlap_of_a_region_with_a_hole():
    # [0, 2]^2 minus the hole [0.5, 1.5]^2, against [1, 3] x [0, 2]:
    # (1 x 2) minus the hole's part (0.5 x 1) = 1.5 (hand computation)
    def rect(x0, x1, y0, y1):
        return np.array([[x0, y0], [x1, y0], [x1, y1], [x0, y1]], dtype=float)

    a = [(+1, triangulate(rect(0, 2, 0, 2))), (-1, triangulate(rect(0.5, 1.5, 0.5, 1.5)))]
    b = [(+1, triangulate(rect(1, 3, 0, 2)))]
    assert region_overlap_area(a, b) == pytest.approx(1.5, rel=1e-13, abs=0)
    assert region_overlap_area(a, [(+1, triangulate(rect(5, 6, 0, 1)))]) == 0.0


def test_arcs_lie_on_one_inscribed_polygon():
    R, per_turn = 3.0, 96
    full = arc_points((0.0, 0.0), R, 0.0, 2 * np.pi, per_turn)[:-1]
    assert len(full) == per_turn
    assert np.allclose(np.hypot(full[:, 0], full[:, 1]), R, rtol=1e-14, atol=0)
    assert signed_area(full) == pytest.approx(0.5 * per_turn * R * R * math.sin(2 * math.pi / per_turn), rel=1e-13, abs=0)
    # an end between two vertices lies on the polygon's edge: collinear with its neighbours
    a = 0.3 * 2 * np.pi / per_turn
    arc = arc_points((1.0, -2.0), R, a, np.pi / 2, per_turn)
    p, v0, v1 = arc[0] - (1.0, -2.0), np.array([R, 0.0]), R * np.array([np.cos(2 * np.pi / per_turn), np.sin(2 * np.pi / per_turn)])
    cross = (v1 - v0)[0] * (p - v0)[1] - (v1 - v0)[1] * (p - v0)[0]
    assert abs(cross) < 1e-14 * R * R and math.atan2(p[1], p[0]) == pytest.approx(a, rel=1e-12, abs=0)
    # reversed direction gives the same points in reverse
    np.testing.assert_array_equal(arc_points((1.0, -2.0), R, np.pi / 2, a, per_turn), arc[::-1])
