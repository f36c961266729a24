"""Planar polygon geometry for electrode layouts.

Pure two-dimensional helpers used to validate and triangulate electrode
shapes: signed area, orientation, simplicity (no self-intersection), ear-
clipping triangulation and the overlap area of two polygon regions. They work
in any length unit; tolerances are relative to the size of the shapes, so
call them with coordinates of order one (the layout loader passes
micrometres).

A *region* here is a list of ``(sign, triangles)`` pieces whose signed sum of
indicator functions is the electrode: an outer boundary with sign +1 and its
holes with sign -1. Overlap areas follow by inclusion-exclusion over the
pieces, which is exact when the holes lie inside the outer boundary.
"""

from __future__ import annotations

import numpy as np

__all__ = [
    "signed_area",
    "ccw",
    "self_intersection",
    "drop_collinear",
    "triangulate",
    "triangle_overlap_areas",
    "region_overlap_area",
    "arc_points",
]

#: Relative tolerance for orientation tests (a cross product smaller than
#: this times the product of the two edge lengths counts as collinear).
REL_TOL = 1e-12


def signed_area(v: np.ndarray) -> float:
    """Shoelace area of a closed polygon, positive when counter-clockwise.

    Parameters
    ----------
    v : (k, 2) array
        Vertices in order, the closing edge implied.
    """
    x, y = v[:, 0], v[:, 1]
    return 0.5 * float(np.sum(x * np.roll(y, -1) - np.roll(x, -1) * y))


def ccw(v: np.ndarray) -> np.ndarray:
    """The vertices in counter-clockwise order (reversed if clockwise)."""
    return v if signed_area(v) >= 0.0 else v[::-1].copy()


def _cross(o, a, b):
    """z-component of (a - o) x (b - o), broadcasting over leading axes."""
    return (a[..., 0] - o[..., 0]) * (b[..., 1] - o[..., 1]) - (a[..., 1] - o[..., 1]) * (b[..., 0] - o[..., 0])


def self_intersection(v: np.ndarray):
    """Find where a closed polygon fails to be simple.

    Parameters
    ----------
    v : (k, 2) array
        Vertices (closing edge implied, no repeated closing vertex).

    Returns
    -------
    None or (i, j, point, what)
        ``None`` for a simple polygon; otherwise the indices of two offending
        edges (edge i joins vertex i to vertex i+1), a point near the fault
        and a short description ("cross", "touch", "fold back",
        "repeated vertex").
    """
    k = len(v)
    if k < 3:
        return (0, 0, v[0], "fewer than 3 vertices")
    nxt = np.roll(v, -1, axis=0)
    d = nxt - v
    length = np.hypot(d[:, 0], d[:, 1])
    size = float(np.max(np.ptp(v, axis=0)))
    if size == 0.0:
        return (0, 0, v[0], "repeated vertex")
    zero = np.nonzero(length <= REL_TOL * size)[0]
    if zero.size:
        i = int(zero[0])
        return (i, (i + 1) % k, v[i], "repeated vertex")
    # adjacent edges that fold back onto each other
    prev = np.roll(d, 1, axis=0)
    cr = prev[:, 0] * d[:, 1] - prev[:, 1] * d[:, 0]
    dot = np.sum(prev * d, axis=1)
    fold = (np.abs(cr) <= REL_TOL * np.roll(length, 1) * length) & (dot < 0)
    if np.any(fold):
        i = int(np.nonzero(fold)[0][0])
        return ((i - 1) % k, i, v[i], "fold back")
    # all pairs of non-adjacent edges
    i, j = np.triu_indices(k, 2)
    keep = ~((i == 0) & (j == k - 1))
    i, j = i[keep], j[keep]
    if i.size == 0:
        return None
    p1, p2, q1, q2 = v[i], nxt[i], v[j], nxt[j]
    tol = REL_TOL * size * size
    d1 = _cross(q1, q2, p1)
    d2 = _cross(q1, q2, p2)
    d3 = _cross(p1, p2, q1)
    d4 = _cross(p1, p2, q2)
    proper = (((d1 > tol) & (d2 < -tol)) | ((d1 < -tol) & (d2 > tol))) & (
        ((d3 > tol) & (d4 < -tol)) | ((d3 < -tol) & (d4 > tol)))

    def on_seg(a, b, p, dd):
        lo = np.minimum(a, b) - REL_TOL * size
        hi = np.maximum(a, b) + REL_TOL * size
        return (np.abs(dd) <= tol) & np.all((p >= lo) & (p <= hi), axis=-1)

    touch = on_seg(q1, q2, p1, d1) | on_seg(q1, q2, p2, d2) | on_seg(p1, p2, q1, d3) | on_seg(p1, p2, q2, d4)
    bad = proper | touch
    if not np.any(bad):
        return None
    n = int(np.nonzero(bad)[0][0])
    a, b, c, e = p1[n], p2[n], q1[n], q2[n]
    den = (b[0] - a[0]) * (e[1] - c[1]) - (b[1] - a[1]) * (e[0] - c[0])
    if abs(den) > tol:
        t = ((c[0] - a[0]) * (e[1] - c[1]) - (c[1] - a[1]) * (e[0] - c[0])) / den
        point = a + t * (b - a)
    else:
        point = 0.5 * (a + b)
    return (int(i[n]), int(j[n]), point, "cross" if proper[n] else "touch")


def drop_collinear(v: np.ndarray) -> np.ndarray:
    """Remove vertices where the boundary goes straight on (same region)."""
    out = np.asarray(v, dtype=float)
    size = float(np.max(np.ptp(out, axis=0)))
    while len(out) > 3:
        cr = _cross(np.roll(out, 1, axis=0), out, np.roll(out, -1, axis=0))
        straight = np.abs(cr) <= REL_TOL * size * size
        if not np.any(straight) or np.count_nonzero(~straight) < 3:
            break
        out = out[~straight]
    return out


def triangulate(v: np.ndarray) -> np.ndarray:
    """Ear-clipping triangulation of a simple polygon.

    Parameters
    ----------
    v : (k, 2) array
        Vertices of a simple polygon, either orientation.

    Returns
    -------
    (k - 2, 3, 2) array
        Triangles covering the polygon exactly once, each counter-clockwise.

    Notes
    -----
    An ear is a convex vertex whose triangle with its two neighbours holds no
    other remaining vertex; every simple polygon with more than three
    vertices has at least two (Meisters' two-ears theorem, G.H. Meisters,
    Amer. Math. Monthly 82, 648 (1975); from memory). O(k^2) with the
    containment test vectorised, fine for the few hundred vertices of an
    electrode.
    """
    pts = drop_collinear(ccw(np.asarray(v, dtype=float)))
    size = float(np.max(np.ptp(pts, axis=0)))
    tol = REL_TOL * size * size
    idx = list(range(len(pts)))
    tris = []
    guard = 0
    while len(idx) > 3:
        guard += 1
        if guard > 4 * len(pts) ** 2:
            raise ValueError("ear clipping failed: polygon is not simple")
        m = len(idx)
        found = False
        arr = np.array(idx)
        for s in range(m):
            ia, ib, ic = idx[s - 1], idx[s], idx[(s + 1) % m]
            a, b, c = pts[ia], pts[ib], pts[ic]
            if _cross(a, b, c) <= tol:
                continue  # reflex or straight vertex: not an ear
            others = arr[(arr != ia) & (arr != ib) & (arr != ic)]
            p = pts[others]
            inside = (_cross(a, b, p) >= -tol) & (_cross(b, c, p) >= -tol) & (_cross(c, a, p) >= -tol)
            if np.any(inside):
                continue
            tris.append((a, b, c))
            del idx[s]
            found = True
            break
        if not found:
            raise ValueError("ear clipping failed: polygon is not simple")
    tris.append(tuple(pts[i] for i in idx))
    return np.array(tris, dtype=float)


def _clip_convex(poly, count, c0, c1):
    """Clip polygons (K, M, 2) with ``count`` vertices by the half plane left
    of the directed lines c0 -> c1 (K, 2): one Sutherland-Hodgman pass."""
    K, M, _ = poly.shape
    out = np.zeros((K, M + 1, 2))
    nout = np.zeros(K, dtype=int)
    rows = np.arange(K)
    dirx = c1[:, 0] - c0[:, 0]
    diry = c1[:, 1] - c0[:, 1]

    def side(p):
        return dirx * (p[:, 1] - c0[:, 1]) - diry * (p[:, 0] - c0[:, 0])

    for i in range(M):
        active = i < count
        if not np.any(active):
            break
        cur = poly[:, i]
        prev = poly[rows, (i - 1) % np.maximum(count, 1)]
        dc = side(cur)
        dp = side(prev)
        cin = dc >= 0.0
        pin = dp >= 0.0
        denom = np.where(dp - dc == 0.0, 1.0, dp - dc)
        t = dp / denom
        inter = prev + t[:, None] * (cur - prev)
        emit_inter = active & (cin != pin)
        r = rows[emit_inter]
        out[r, nout[r]] = inter[r]
        nout[r] += 1
        emit_cur = active & cin
        r = rows[emit_cur]
        out[r, nout[r]] = cur[r]
        nout[r] += 1
    return out, nout


def triangle_overlap_areas(ta: np.ndarray, tb: np.ndarray) -> np.ndarray:
    """Areas of the intersections of triangle pairs.

    Parameters
    ----------
    ta, tb : (K, 3, 2) arrays
        Counter-clockwise triangles, paired row by row.

    Returns
    -------
    (K,) array
        Intersection areas (Sutherland-Hodgman clipping of ``ta`` by the
        three edges of ``tb``, then the shoelace formula).
    """
    K = len(ta)
    if K == 0:
        return np.zeros(0)
    poly = np.array(ta, dtype=float)
    count = np.full(K, 3)
    for e in range(3):
        poly, count = _clip_convex(poly, count, tb[:, e], tb[:, (e + 1) % 3])
    M = poly.shape[1]
    idx = np.minimum(np.arange(M)[None, :], np.maximum(count, 1)[:, None] - 1)
    filled = np.take_along_axis(poly, idx[..., None], axis=1)
    x, y = filled[..., 0], filled[..., 1]
    area = 0.5 * np.sum(x * np.roll(y, -1, axis=1) - np.roll(x, -1, axis=1) * y, axis=1)
    return np.where(count >= 3, area, 0.0)


def region_overlap_area(pieces_a, pieces_b) -> float:
    """Overlap area of two regions given as signed triangle sets.

    Parameters
    ----------
    pieces_a, pieces_b : list of (sign, (k, 3, 2) array)
        Each region is the signed sum of the indicator functions of its
        pieces (outer boundary +1, holes -1).

    Returns
    -------
    float
        Area of the intersection (inclusion-exclusion over the pieces).
    """
    total = 0.0
    for sa, ta in pieces_a:
        for sb, tb in pieces_b:
            lo_a, hi_a = ta.min(axis=1), ta.max(axis=1)
            lo_b, hi_b = tb.min(axis=1), tb.max(axis=1)
            ov = (np.minimum(hi_a[:, None, :], hi_b[None, :, :]) > np.maximum(lo_a[:, None, :], lo_b[None, :, :])).all(axis=2)
            ia, ib = np.nonzero(ov)
            if ia.size:
                total += sa * sb * float(np.sum(triangle_overlap_areas(ta[ia], tb[ib])))
    return total


def arc_points(center, radius, start, stop, per_turn):
    """Points on a circular arc for polygon approximation.

    Every arc of a circle is drawn on the same regular ``per_turn``-gon
    inscribed in the circle (vertices at angles 2 pi j / per_turn): the
    arc's points are the polygon's vertices strictly between ``start`` and
    ``stop`` plus its two ends, and an end that falls between two vertices
    is put on the polygon's edge (where the ray at that angle crosses it).
    Electrodes that meet along a circle therefore share one boundary line
    and touch without gap or overlap, whatever their angles.

    Returns
    -------
    (k, 2) array
        Points from ``start`` to ``stop`` (radians, either direction).
    """
    step = 2.0 * np.pi / per_turn
    lo, hi = min(start, stop), max(start, stop)
    eps = 1e-9
    j0 = int(np.ceil(lo / step - eps))
    j1 = int(np.floor(hi / step + eps))
    inner = [j for j in range(j0, j1 + 1) if lo / step + eps < j < hi / step - eps]

    def vertex(j):
        a = (j % per_turn) * step  # same arithmetic for every arc: shared vertices match exactly
        return (center[0] + radius * np.cos(a), center[1] + radius * np.sin(a))

    def end(a):
        j = a / step
        if abs(j - round(j)) < eps:
            return vertex(int(round(j)))
        mid = (np.floor(j) + 0.5) * step
        r = radius * np.cos(0.5 * step) / np.cos(a - mid)
        return (center[0] + r * np.cos(a), center[1] + r * np.sin(a))

    pts = np.array([end(lo)] + [vertex(j) for j in inner] + [end(hi)], dtype=float)
    return pts[::-1].copy() if stop < start else pts
