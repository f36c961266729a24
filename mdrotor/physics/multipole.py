"""In-plane electric multipoles: the pinning potential and multipole noise.

Convention (used everywhere in mdrotor, in configs, JSON and HDF5):

    Phi_n(x, y) = Re[ c_n (x + i y)^n e^{-i n theta} ]        [V]

with c_n real in V/m^n (the "strength") and theta the orientation angle of
the multipole (the pinning angle; it rotates with the schedule). An ion of
charge Q has potential energy Q Phi_n. Phi_n solves Laplace's equation (it is
the real part of an analytic function of x + i y), so it is a field that
electrodes can make. For n = 2, Phi = c (x^2 - y^2) at theta = 0.

Derivatives (z = x + i y, C = c e^{-i n theta}):
    dPhi/dx = Re[n C z^(n-1)],      dPhi/dy = -Im[n C z^(n-1)]
    d2Phi/dx2 = -d2Phi/dy2 = Re[n (n-1) C z^(n-2)],
    d2Phi/dxdy = -Im[n (n-1) C z^(n-2)].

A regular N-gon of identical ions centred on the axis has vanishing
order-n moment M_n = sum_i Q_i z_i^n unless N divides n, so it is pinned only
by orders that are multiples of N.
"""

from __future__ import annotations

from dataclasses import dataclass, field

import numpy as np


@dataclass(frozen=True)
class MultipoleTerm:
    """One in-plane multipole term.

    Attributes
    ----------
    order : int
        n >= 1 (1 is a uniform in-plane field; pinning needs n >= 2).
    strength : float
        c_n in V/m^n.
    angle_rad : float
        Static orientation offset theta_0 (the schedule adds theta(t)).
    name : str
        Label used in schedules and output (default ``"n<order>"``).
    layout : mdrotor.electrodes.polynomial.LayoutPinning or None
        When the pinning comes from an electrode layout: its full potential
        (every fitted order) replaces the pure order-n term in the statics
        and the dynamics; ``strength`` is then the plan's target.
    """

    order: int
    strength: float
    angle_rad: float = 0.0
    name: str = ""
    layout: object = field(default=None, compare=False, repr=False)

    def complex_coefficient(self, theta: float = 0.0) -> complex:
        """C = c_n exp(-i n (theta_0 + theta)), in V/m^n."""
        return self.strength * np.exp(-1j * self.order * (self.angle_rad + theta))


def quadrupole_magnitude(terms, scales) -> np.ndarray:
    """|c_2| of the pure order-2 terms of ``terms`` (MultipoleTerm; an
    electrode layout's term, its own fitted potential, left out) at the
    multipliers ``scales`` (..., len(terms)), V/m^2: the orientations add as
    the complex coefficients C = c_2 exp(-2 i theta_0)."""
    s = np.asarray(scales, dtype=float)
    c = sum((t.complex_coefficient() * s[..., j] for j, t in enumerate(terms) if t.order == 2 and t.layout is None),
            np.zeros(s.shape[:-1], dtype=complex))
    return np.abs(c)


def potential(xy: np.ndarray, order: int, coeff: complex) -> np.ndarray:
    """Phi = Re[C z^n] at points ``xy`` (..., 2) in m; V."""
    z = xy[..., 0] + 1j * xy[..., 1]
    return np.real(coeff * z**order)


def gradient(xy: np.ndarray, order: int, coeff: complex) -> np.ndarray:
    """(dPhi/dx, dPhi/dy) at ``xy`` (..., 2); V/m."""
    z = xy[..., 0] + 1j * xy[..., 1]
    g = order * coeff * z ** (order - 1)
    return np.stack([g.real, -g.imag], axis=-1)


def hessian(xy: np.ndarray, order: int, coeff: complex) -> np.ndarray:
    """In-plane Hessian (..., 2, 2) of Phi; V/m^2."""
    z = xy[..., 0] + 1j * xy[..., 1]
    if order < 2:
        h = np.zeros_like(z)
    else:
        h = order * (order - 1) * coeff * z ** (order - 2)
    out = np.empty(z.shape + (2, 2))
    out[..., 0, 0] = h.real
    out[..., 1, 1] = -h.real
    out[..., 0, 1] = out[..., 1, 0] = -h.imag
    return out


def moment(xy: np.ndarray, charges: np.ndarray, order: int) -> complex:
    """Order-n in-plane moment M_n = sum_i Q_i (x_i + i y_i)^n; C m^n.

    The rigid crystal's order-n pinning energy is Re[C M_n].
    """
    z = xy[..., 0] + 1j * xy[..., 1]
    return complex(np.sum(charges * z**order))
