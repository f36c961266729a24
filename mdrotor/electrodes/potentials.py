"""Potentials, fields and Hessians of planar electrodes (gapless plane).

Model
-----
All electrodes lie in the plane z = 0 and together with the grounded rest
of the plane fill it without gaps. The potential above the plane (z > 0)
then solves the Dirichlet problem of a half space, so

    phi(r) = sum_e V_e Omega_e(r) / (2 pi),

with Omega_e the solid angle that electrode e subtends at r; equivalently
phi = integral of V(x', y') z / (2 pi R^3) dx' dy' over the plane (the
Dirichlet Green's function of the half space). Sources: M.G. House, Phys.
Rev. A 78, 033402 (2008); J.H. Wesenberg, Phys. Rev. A 78, 063410 (2008).

Formulas implemented here (each once)
-------------------------------------
* Rectangle [x1, x2] x [y1, y2] (House 2008):

      Omega = F(x2, y2) - F(x1, y2) - F(x2, y1) + F(x1, y1),
      F(X, Y) = arctan[ (X - x)(Y - y) / (z sqrt(z^2 + (X-x)^2 + (Y-y)^2)) ].

* Triangle with vertices P1, P2, P3, r_i = P_i - r (Van Oosterom and
  Strackee, IEEE Trans. Biomed. Eng. 30, 125 (1983)):

      tan(Omega / 2) = r1 . (r2 x r3)
                       / (R1 R2 R3 + (r1.r2) R3 + (r1.r3) R2 + (r2.r3) R1).

  With all P_i in the plane z = 0 the triple product is -2 z A, A the
  signed in-plane area (positive counter-clockwise), so a counter-clockwise
  triangle seen from above has Omega = 2 atan2(2 z A, denominator) in
  (0, 2 pi). A polygon is the sum over a triangulation (Wesenberg 2008).

* Field and Hessian, any polygon (a rectangle is a 4-gon): the gradient of
  the solid angle bounded by a closed curve C is a Biot-Savart line integral
  over C, grad Omega = -oint dl' x (r - r') / |r - r'|^3 for C run
  counter-clockwise seen from the side where Omega > 0 (the magnetic
  scalar potential of a current loop; J.D. Jackson, Classical
  Electrodynamics, 3rd ed., sec. 5.6; Wesenberg 2008 uses the same
  analogy, from memory). For a straight edge from A to B, a = A - r,
  b = B - r, p = |a|, q = |b|:

      g = (a x b) f,   f = (p + q) / (p q (p q + a.b)),

  and grad Omega = -sum_edges g. For the Hessian,

      d g_i / d r_j = f eps_ijk (a - b)_k + (a x b)_i d f / d r_j,
      grad f = f [ a^/p + b^/q - (a^ + b^)/(p + q) + (p + q)(a^ + b^)/w ],

  with w = p q + a.b evaluated as |a x b|^2 / (p q - a.b) when a.b < 0
  (no cancellation next to an edge; Lagrange's identity).

Units: coordinates in m, solid angles in sr, potential per volt
dimensionless, field per volt in 1/m (V/m per V), Hessian per volt in 1/m^2.
The electric field is E = -grad phi.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from mdrotor.errors import InputError

__all__ = [
    "check_points",
    "rectangle_solid_angle",
    "triangle_solid_angle",
    "edge_gradient_terms",
    "edge_hessian_terms",
    "PlaneElectrodes",
]

TWO_PI = 2.0 * np.pi

# Work arrays are (points x pieces x ...); cap their size per chunk.
_CHUNK_ELEMENTS = 1_500_000


def check_points(points_m, what: str = "points_m") -> np.ndarray:
    """Points as a float (n, 3) array strictly above the trap plane.

    Raises
    ------
    InputError
        Wrong shape, non-finite values or a point with z <= 0 (the half-space
        solution holds only above the electrode plane).
    """
    p = np.asarray(points_m, dtype=float)
    if p.ndim == 1:
        p = p[None, :]
    if p.ndim != 2 or p.shape[1] != 3:
        raise InputError(what, f"expected points of shape (n, 3) in m, got shape {np.shape(points_m)}", "electrodes")
    if not np.all(np.isfinite(p)):
        raise InputError(what, "expected finite coordinates", "electrodes")
    if np.any(p[:, 2] <= 0.0):
        bad = p[np.argmin(p[:, 2])]
        raise InputError(what, f"expected points above the trap plane (z > 0), got z = {bad[2]:.6g} m", "electrodes")
    return p


def rectangle_solid_angle(points: np.ndarray, rects: np.ndarray) -> np.ndarray:
    """Solid angle of axis-aligned rectangles (House 2008).

    Parameters
    ----------
    points : (P, 3) array, m, z > 0
    rects : (R, 4) array, m
        Rows ``x1, x2, y1, y2`` with x1 < x2, y1 < y2.

    Returns
    -------
    (P, R) array, sr
    """
    x = points[:, 0:1]
    y = points[:, 1:2]
    z = points[:, 2:3]

    def F(X, Y):
        a = X[None, :] - x
        b = Y[None, :] - y
        return np.arctan(a * b / (z * np.sqrt(z * z + a * a + b * b)))

    x1, x2, y1, y2 = rects[:, 0], rects[:, 1], rects[:, 2], rects[:, 3]
    return F(x2, y2) - F(x1, y2) - F(x2, y1) + F(x1, y1)


def triangle_solid_angle(points: np.ndarray, tris: np.ndarray) -> np.ndarray:
    """Signed solid angle of planar triangles (Van Oosterom and Strackee 1983).

    Parameters
    ----------
    points : (P, 3) array, m, z > 0
    tris : (T, 3, 2) array, m
        Triangle vertices in the plane z = 0.

    Returns
    -------
    (P, T) array, sr
        Positive for counter-clockwise triangles seen from above.
    """
    z = points[:, 2:3]
    rx = [tris[None, :, i, 0] - points[:, 0:1] for i in range(3)]
    ry = [tris[None, :, i, 1] - points[:, 1:2] for i in range(3)]
    zz = z * z
    R = [np.sqrt(rx[i] ** 2 + ry[i] ** 2 + zz) for i in range(3)]

    def dot(i, j):
        return rx[i] * rx[j] + ry[i] * ry[j] + zz

    den = R[0] * R[1] * R[2] + dot(0, 1) * R[2] + dot(0, 2) * R[1] + dot(1, 2) * R[0]
    two_area = ((tris[:, 1, 0] - tris[:, 0, 0]) * (tris[:, 2, 1] - tris[:, 0, 1])
                - (tris[:, 1, 1] - tris[:, 0, 1]) * (tris[:, 2, 0] - tris[:, 0, 0]))
    return 2.0 * np.arctan2(z * two_area[None, :], den)


def _edge_common(points, ea, eb):
    """a, b (P, E, 3), their norms, a x b, w = p q + a.b (stable), f."""
    P = points.shape[0]
    a = np.empty((P, ea.shape[0], 3))
    b = np.empty_like(a)
    a[..., 0] = ea[None, :, 0] - points[:, 0:1]
    a[..., 1] = ea[None, :, 1] - points[:, 1:2]
    a[..., 2] = -points[:, 2:3]
    b[..., 0] = eb[None, :, 0] - points[:, 0:1]
    b[..., 1] = eb[None, :, 1] - points[:, 1:2]
    b[..., 2] = a[..., 2]
    p = np.sqrt(np.sum(a * a, axis=-1))
    q = np.sqrt(np.sum(b * b, axis=-1))
    s = np.sum(a * b, axis=-1)
    axb = np.cross(a, b)
    c2 = np.sum(axb * axb, axis=-1)
    pq = p * q
    w = np.where(s >= 0.0, pq + s, c2 / np.where(s >= 0.0, 1.0, pq - s))
    f = (p + q) / (pq * w)
    return a, b, p, q, w, axb, f


def edge_gradient_terms(points: np.ndarray, ea: np.ndarray, eb: np.ndarray) -> np.ndarray:
    """Biot-Savart terms g of straight edges; grad Omega = -sum g.

    Parameters
    ----------
    points : (P, 3) array, m, z > 0
    ea, eb : (E, 2) arrays, m
        Start and end of each edge in the plane z = 0.

    Returns
    -------
    (P, E, 3) array, 1/m
    """
    _, _, _, _, _, axb, f = _edge_common(points, ea, eb)
    return axb * f[..., None]


def edge_hessian_terms(points: np.ndarray, ea: np.ndarray, eb: np.ndarray) -> np.ndarray:
    """Jacobians d g_i / d r_j of the edge terms; Hess Omega = -sum J.

    Returns
    -------
    (P, E, 3, 3) array, 1/m^2
    """
    a, b, p, q, w, axb, f = _edge_common(points, ea, eb)
    ah = a / p[..., None]
    bh = b / q[..., None]
    s_hat = ah + bh
    grad_f = f[..., None] * (ah / p[..., None] + bh / q[..., None]
                             - s_hat / (p + q)[..., None] + s_hat * ((p + q) / w)[..., None])
    c = (a - b) * f[..., None]
    J = axb[..., :, None] * grad_f[..., None, :]
    # f eps_ijk c_k
    J[..., 0, 1] += c[..., 2]
    J[..., 0, 2] -= c[..., 1]
    J[..., 1, 0] -= c[..., 2]
    J[..., 1, 2] += c[..., 0]
    J[..., 2, 0] += c[..., 1]
    J[..., 2, 1] -= c[..., 0]
    return J


@dataclass(frozen=True)
class PlaneElectrodes:
    """Electrode pieces in the plane z = 0, owned by ``n`` electrodes.

    Attributes
    ----------
    n : int
        Number of electrodes.
    rects : (R, 4) array, m
        Rectangles ``x1, x2, y1, y2`` (potential by House's formula).
    rect_owner : (R,) int array
    tris : (T, 3, 2) array, m
        Counter-clockwise triangles of polygon electrodes.
    tri_sign : (T,) array
        +1 for the outer boundary, -1 for holes.
    tri_owner : (T,) int array
    edge_a, edge_b : (E, 2) arrays, m
        Boundary edges of every electrode (rectangles included), the outer
        boundary counter-clockwise and holes clockwise.
    edge_owner : (E,) int array
    """

    n: int
    rects: np.ndarray
    rect_owner: np.ndarray
    tris: np.ndarray
    tri_sign: np.ndarray
    tri_owner: np.ndarray
    edge_a: np.ndarray
    edge_b: np.ndarray
    edge_owner: np.ndarray

    def _incidence(self, owner, sign=None):
        m = np.zeros((owner.size, self.n))
        m[np.arange(owner.size), owner] = 1.0 if sign is None else sign
        return m

    def potential_basis(self, points_m) -> np.ndarray:
        """Potential per volt of each electrode, shape (P, n) (dimensionless)."""
        pts = check_points(points_m)
        out = np.zeros((pts.shape[0], self.n))
        per_point = max(1, len(self.rects) + 3 * len(self.tris))
        chunk = max(1, _CHUNK_ELEMENTS // (8 * per_point))
        inc_r = self._incidence(self.rect_owner)
        inc_t = self._incidence(self.tri_owner, self.tri_sign)
        for s in range(0, pts.shape[0], chunk):
            p = pts[s:s + chunk]
            if len(self.rects):
                out[s:s + chunk] += rectangle_solid_angle(p, self.rects) @ inc_r
            if len(self.tris):
                out[s:s + chunk] += triangle_solid_angle(p, self.tris) @ inc_t
        return out / TWO_PI

    def field_basis(self, points_m) -> np.ndarray:
        """Electric field per volt of each electrode, shape (P, n, 3), in 1/m.

        E = -grad phi = +(1/2pi) sum over the boundary edges of g.
        """
        pts = check_points(points_m)
        out = np.zeros((pts.shape[0], self.n, 3))
        chunk = max(1, _CHUNK_ELEMENTS // (12 * max(1, len(self.edge_a))))
        inc = self._incidence(self.edge_owner)
        for s in range(0, pts.shape[0], chunk):
            g = edge_gradient_terms(pts[s:s + chunk], self.edge_a, self.edge_b)
            out[s:s + chunk] = np.einsum("pek,en->pnk", g, inc)
        return out / TWO_PI

    def hessian_basis(self, points_m) -> np.ndarray:
        """Hessian of the potential per volt, shape (P, n, 3, 3), in 1/m^2."""
        pts = check_points(points_m)
        out = np.zeros((pts.shape[0], self.n, 3, 3))
        chunk = max(1, _CHUNK_ELEMENTS // (40 * max(1, len(self.edge_a))))
        inc = self._incidence(self.edge_owner)
        for s in range(0, pts.shape[0], chunk):
            J = edge_hessian_terms(pts[s:s + chunk], self.edge_a, self.edge_b)
            out[s:s + chunk] = -np.einsum("peij,en->pnij", J, inc)
        return out / TWO_PI
