"""Multipole expansion of electrode potentials about the trap point.

Basis: real regular solid harmonics in a Cartesian-leading normalisation
----------------------------------------------------------------------
For l >= 0 and 0 <= m <= l let

    T_lm(x, y, z) = (x + i y)^m  r^(l-m) P_l^(m)(z / r) / P_l^(m)(1),

with P_l^(m) the m-th derivative of the Legendre polynomial P_l. T_lm is
r^l P_l^m(cos theta) e^{i m phi} up to a constant (a regular solid
harmonic, so it solves Laplace's equation), and the constant is chosen so
that T_lm = (x + i y)^m z^(l-m) + (terms with x^2 + y^2). The real basis is

    S_{l,m}  = Re T_lm   (m >= 0),      S_{l,-m} = Im T_lm   (m > 0),

so that, for example, S_10 = z, S_11 = x, S_1-1 = y, S_20 = z^2 - (x^2+y^2)/2,
S_22 = x^2 - y^2, S_2-2 = 2 x y, S_21 = x z, S_2-1 = y z. A potential is
expanded as phi(r0 + d) = sum C_lm S_lm(d) with C_lm in V/m^l.

In-plane multipoles (the project's pinning convention,
Phi_n = Re[c_n (x + i y)^n e^{-i n angle}], see :mod:`mdrotor.physics.multipole`):
the part of the potential of the form Re[k_n (x + i y)^n] is the sectoral
term l = m = n, with

    k_n = C_{n,n} - i C_{n,-n}     (V/m^n),

so an electrode contributes c_n = |k_n| at angle = -arg(k_n) / n. Terms
with l > m carry powers of z (out-of-plane forces) and of x^2 + y^2; they
are reported in the full table.

Useful identities: the field at the centre is E = -(C_11, C_1-1, C_10); the
Hessian H of a traceless quadratic part has C_20 = H_zz / 2,
C_22 = (H_xx - H_yy) / 4, C_2-2 = H_xy / 2, C_21 = H_xz, C_2-1 = H_yz.

Fit
---
The potential is sampled on a sphere of radius rho about the centre at the
nodes of a product rule (Gauss-Legendre in cos(theta), uniform in phi) that
integrates products of spherical harmonics exactly up to degree
2 n_theta - 1; the weighted least-squares fit is then the orthogonal
projection onto harmonics of degree <= order, and terms above the order
leave the fitted coefficients untouched up to degree 2 n_theta - 1 - order.
The reported residual is the rms over the sphere of what the truncated
expansion leaves out, i.e. the size of the orders above ``order`` at rho.
"""

from __future__ import annotations

from dataclasses import dataclass
from functools import lru_cache

import numpy as np
from numpy.polynomial import legendre as _leg
from numpy.polynomial import polynomial as _pol

from mdrotor.errors import InputError

__all__ = [
    "harmonic_terms",
    "solid_harmonics",
    "sphere_rule",
    "MultipoleTable",
    "fit_multipoles",
    "fit_potential",
    "field_terms",
    "hessian_terms",
    "inplane_terms",
    "pinning_orders",
]


def harmonic_terms(order: int) -> list[tuple[int, int]]:
    """Term labels (l, m) for l = 0..order, m = 0, 1, -1, 2, -2, ..., l, -l."""
    out = []
    for l in range(order + 1):
        out.append((l, 0))
        for m in range(1, l + 1):
            out += [(l, m), (l, -m)]
    return out


@lru_cache(maxsize=None)
def _axial_poly(l: int, m: int) -> np.ndarray:
    """Power coefficients of P_l^(m)(t) / P_l^(m)(1)."""
    c = _leg.leg2poly(_leg.legder(np.eye(l + 1)[l], m)) if l > 0 else np.array([1.0])
    c = np.atleast_1d(c)
    return c / _pol.polyval(1.0, c)


def solid_harmonics(d: np.ndarray, order: int) -> np.ndarray:
    """Real solid harmonics S_lm at displacements ``d`` (P, 3).

    Returns
    -------
    (P, n_terms) array
        Columns in the order of :func:`harmonic_terms`; S_lm has the units
        of length^l of ``d``.
    """
    d = np.asarray(d, dtype=float)
    x, y, z = d[:, 0], d[:, 1], d[:, 2]
    r2 = x * x + y * y + z * z
    w = x + 1j * y
    wpow = [np.ones_like(w)]
    for _ in range(order):
        wpow.append(wpow[-1] * w)
    cols = []
    for l, m in harmonic_terms(order):
        if m < 0:
            continue
        c = _axial_poly(l, m)
        deg = l - m
        axial = np.zeros_like(x)
        for k in range(deg % 2, deg + 1, 2):
            if k < len(c):
                axial = axial + c[k] * z ** k * r2 ** ((deg - k) // 2)
        t = wpow[m] * axial
        cols.append((l, m, t.real))
        if m > 0:
            cols.append((l, -m, t.imag))
    index = {lm: i for i, lm in enumerate(harmonic_terms(order))}
    out = np.empty((d.shape[0], len(index)))
    for l, m, v in cols:
        out[:, index[(l, m)]] = v
    return out


def sphere_rule(n_theta: int):
    """Product quadrature on the unit sphere.

    Returns
    -------
    points : (n_theta * 2 n_theta, 3) array
    weights : array
        Sum 4 pi; exact for spherical harmonics of degree <= 2 n_theta - 1.
    """
    t, wt = np.polynomial.legendre.leggauss(n_theta)
    n_phi = 2 * n_theta
    phi = 2.0 * np.pi * (np.arange(n_phi) + 0.5) / n_phi
    st = np.sqrt(1.0 - t * t)
    pts = np.stack([np.outer(st, np.cos(phi)), np.outer(st, np.sin(phi)), np.outer(t, np.ones(n_phi))], axis=-1)
    w = np.outer(wt, np.full(n_phi, 2.0 * np.pi / n_phi))
    return pts.reshape(-1, 3), w.ravel()


def field_terms(e_v_per_m) -> dict:
    """Coefficients C_1m of a uniform field E (V/m): phi = -E . d."""
    ex, ey, ez = (float(v) for v in e_v_per_m)
    return {(1, 1): -ex, (1, -1): -ey, (1, 0): -ez}


def hessian_terms(h_v_per_m2, source: str = "electrodes") -> dict:
    """Coefficients C_2m of the quadratic potential d^T H d / 2 (V/m^2).

    Raises
    ------
    InputError
        If H is not symmetric and traceless (an electrode potential solves
        Laplace's equation, so its Hessian has zero trace).
    """
    H = np.asarray(h_v_per_m2, dtype=float)
    scale = max(float(np.max(np.abs(H))), 1e-300)
    if H.shape != (3, 3) or np.max(np.abs(H - H.T)) > 1e-9 * scale:
        raise InputError("curvature", "expected a symmetric 3x3 Hessian in V/m^2", source)
    if abs(np.trace(H)) > 1e-9 * scale:
        raise InputError("curvature", f"expected a traceless Hessian (Laplace), trace is {np.trace(H):.4g} V/m^2", source)
    return {(2, 0): H[2, 2] / 2.0, (2, 2): (H[0, 0] - H[1, 1]) / 4.0, (2, -2): H[0, 1] / 2.0,
            (2, 1): H[0, 2], (2, -1): H[1, 2]}


def inplane_terms(n: int, k_n: complex) -> dict:
    """Coefficients of Re[k_n (x + i y)^n]: C_nn = Re k_n, C_n-n = -Im k_n."""
    k = complex(k_n)
    return {(n, n): k.real, (n, -n): -k.imag}


def pinning_orders(n_ions: int, max_order: int = 6) -> list[int]:
    """In-plane orders that exert a torque on a regular ``n_ions``-gon.

    The order-n moment sum_i (x_i + i y_i)^n of a regular N-gon centred on
    the axis vanishes unless N divides n (sum of N-th roots of unity), so
    only multiples of N pin it; a 2-ion string counts as a 2-gon.
    """
    if n_ions < 2:
        raise InputError("crystal.ions", "expected at least 2 ions for a pinning order", "electrodes")
    return [n for n in range(n_ions, max_order + 1, n_ions)]


@dataclass(frozen=True)
class MultipoleTable:
    """Multipole coefficients per volt of each column (channel or electrode).

    Attributes
    ----------
    names : tuple of str
        Column names (channels or electrodes).
    center_m : (3,) array
    radius_m : float
        Radius of the fit sphere.
    order : int
    terms : tuple of (l, m)
    coeffs : (n_names, n_terms) array
        C_lm per volt, V/m^l per V.
    residual_rms : (n_names,) array
        Rms over the sphere of potential minus fit, V per V.
    residual_max : (n_names,) array
        Largest |potential - fit| at the sample points, V per V.
    potential_rms : (n_names,) array
        Rms over the sphere of the potential minus its mean, V per V
        (for the relative residual).
    term_rms : (n_terms,) array
        Rms over the unit sphere of each S_lm (to compare terms: C_lm
        rho^l term_rms is the rms potential of the term at radius rho).
    """

    names: tuple
    center_m: np.ndarray
    radius_m: float
    order: int
    terms: tuple
    coeffs: np.ndarray
    residual_rms: np.ndarray
    residual_max: np.ndarray
    potential_rms: np.ndarray
    term_rms: np.ndarray

    def index(self, l: int, m: int) -> int:
        """Column of term (l, m)."""
        try:
            return self.terms.index((l, m))
        except ValueError:
            raise InputError("order", f"term (l={l}, m={m}) is not in the fit (order {self.order})", "electrodes") from None

    def column(self, name: str) -> int:
        return self.names.index(name)

    def coefficient(self, name: str, l: int, m: int) -> float:
        """C_lm per volt of one column, V/m^l per V."""
        return float(self.coeffs[self.column(name), self.index(l, m)])

    def k_inplane(self, max_order: int | None = None) -> np.ndarray:
        """Complex in-plane coefficients k_n per volt, shape (n_names, max_order), n = 1..max_order."""
        nmax = self.order if max_order is None else max_order
        out = np.zeros((len(self.names), nmax), dtype=complex)
        for n in range(1, nmax + 1):
            out[:, n - 1] = self.coeffs[:, self.index(n, n)] - 1j * self.coeffs[:, self.index(n, -n)]
        return out

    def combine(self, voltages) -> np.ndarray:
        """Coefficients C_lm (V/m^l) of the potential for per-column voltages."""
        return np.asarray(voltages, dtype=float) @ self.coeffs

    def significant_orders(self, name: str, rel: float = 0.0) -> list[int]:
        """In-plane orders n whose term at the fit radius, |k_n| rho^n, exceeds
        both ``rel`` times the column's rms potential and 10 x its fit residual."""
        c = self.column(name)
        k = self.k_inplane()[c]
        size = np.abs(k) * self.radius_m ** np.arange(1, self.order + 1)
        thr = max(rel * self.potential_rms[c], 10.0 * self.residual_rms[c])
        return [n + 1 for n in range(self.order) if size[n] > thr]

    def to_dict(self) -> dict:
        k = self.k_inplane()
        return {
            "center_um": [float(x) * 1e6 for x in self.center_m],
            "radius_um": self.radius_m * 1e6,
            "order": self.order,
            "convention": "phi = sum C_lm S_lm; S_lm = Re/Im[(x+iy)^|m| z^(l-|m|) + ...]; C in V/m^l per V; "
                          "k_n = C_nn - i C_n-n multiplies (x+iy)^n",
            "columns": [
                {"name": nm,
                 "k_inplane": [{"n": n + 1, "re": float(k[c, n].real), "im": float(k[c, n].imag),
                                "abs": float(abs(k[c, n]))} for n in range(self.order)],
                 "coeffs": {f"{l},{m}": float(self.coeffs[c, j]) for j, (l, m) in enumerate(self.terms)},
                 "residual_rms_v_per_v": float(self.residual_rms[c])}
                for c, nm in enumerate(self.names)],
        }


def fit_potential(values: np.ndarray, center_m, radius_m: float, order: int, unit_points: np.ndarray,
                  weights: np.ndarray, names=None) -> MultipoleTable:
    """Fit sampled potentials (already evaluated on the sphere rule).

    Parameters
    ----------
    values : (P, k) array
        Potentials at ``center_m + radius_m * unit_points``.
    unit_points, weights : from :func:`sphere_rule`.
    """
    center = np.asarray(center_m, dtype=float)
    v = np.asarray(values, dtype=float)
    if v.ndim == 1:
        v = v[:, None]
    A = solid_harmonics(unit_points, order)  # scaled coordinates d / rho
    sw = np.sqrt(weights / weights.sum())
    coef_scaled, *_ = np.linalg.lstsq(A * sw[:, None], v * sw[:, None], rcond=None)
    resid = v - A @ coef_scaled
    terms = tuple(harmonic_terms(order))
    rho_l = np.array([radius_m ** l for l, _ in terms])
    wn = weights / weights.sum()
    mean = wn @ v
    return MultipoleTable(
        names=tuple(names) if names is not None else tuple(str(i) for i in range(v.shape[1])),
        center_m=center, radius_m=float(radius_m), order=int(order), terms=terms,
        coeffs=(coef_scaled / rho_l[:, None]).T,
        residual_rms=np.sqrt(wn @ resid ** 2),
        residual_max=np.max(np.abs(resid), axis=0),
        potential_rms=np.sqrt(wn @ (v - mean) ** 2),
        term_rms=np.sqrt(wn @ A ** 2),
    )


def fit_multipoles(layout, center_m=None, radius_m=None, order: int = 6, *, per: str = "channel",
                   n_theta: int | None = None) -> MultipoleTable:
    """Multipole coefficients of every channel (or electrode) about a point.

    Parameters
    ----------
    layout : Layout
    center_m : (3,) array-like, optional
        Expansion point in m (default: the layout's trap point).
    radius_m : float, optional
        Radius of the fit sphere in m (default: 5 % of the centre's height,
        a few micrometres for a trap 50-150 um above the surface: the size
        of a small crystal).
    order : int
        Highest order l (default 6).
    per : {"channel", "electrode"}
        Columns of the table.
    n_theta : int, optional
        Quadrature size (default ``order + 12``).

    Returns
    -------
    MultipoleTable
        Coefficients per volt, with the fit residual per column.
    """
    center = layout.trap_point_m if center_m is None else np.asarray(center_m, dtype=float)
    if center is None:
        raise InputError("trap.point", "expected a trap point (the layout has none); pass center_m", layout.source)
    if not (isinstance(order, int) and 1 <= order <= 12):
        raise InputError("order", f"expected a whole number 1..12, got {order!r}", layout.source)
    rho = 0.05 * center[2] if radius_m is None else float(radius_m)
    if not (rho > 0.0 and rho < center[2]):
        raise InputError("radius", f"expected 0 < radius < height of the centre ({center[2] * 1e6:.4g} um), got {rho * 1e6:.4g} um",
                         layout.source)
    nt = order + 12 if n_theta is None else int(n_theta)
    unit, w = sphere_rule(nt)
    pts = center[None, :] + rho * unit
    if per == "channel":
        vals, names = layout.channel_basis(pts), layout.channels
    elif per == "electrode":
        vals, names = layout.electrode_basis(pts), tuple(e.name for e in layout.electrodes)
    else:
        raise InputError("per", f"expected 'channel' or 'electrode', got {per!r}", layout.source)
    return fit_potential(vals, center, rho, order, unit, w, names)
