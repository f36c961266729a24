"""Pinning from an electrode layout and a voltage plan, for the dynamics.

A run config can take its pinning from a layout (``[pinning] layout =
"file.toml"``): the rotating order-n voltage plan of :func:`solve_rotating`
makes the DC electrodes' potential about the trap point

    Phi(r, t) = sum_lm C_lm(t) S_lm(r),
    C_lm(t) = static_lm + s(t) [cos_lm cos(n theta(t)) + sin_lm sin(n theta(t))]

with every fitted order up to 6, including the terms that depend on z (the
real solid harmonics S_lm of :mod:`mdrotor.electrodes.harmonic_fit`; s(t) the
schedule's pinning multiplier, theta(t) the pinning angle). Each S_lm is a
polynomial of degree l, so Phi is a polynomial in x, y, z: we rewrite it in
monomials x^a y^b z^c (1 <= a + b + c <= 6; the constant exerts no force),
which the kernel differentiates exactly, and the statics uses the same
polynomial as an external potential.
"""

from __future__ import annotations

from dataclasses import dataclass
from functools import lru_cache
from pathlib import Path

import numpy as np

from mdrotor.electrodes.harmonic_fit import (
    fit_multipoles,
    harmonic_terms,
    solid_harmonics,
)
from mdrotor.electrodes.layout import load_layout
from mdrotor.electrodes.solve import solve_rotating
from mdrotor.errors import InputError


def monomial_exponents(order: int) -> np.ndarray:
    """Exponents (a, b, c) of x^a y^b z^c with 1 <= a + b + c <= order, (J, 3)."""
    out = [(a, b, d - a - b) for d in range(1, order + 1) for a in range(d, -1, -1) for b in range(d - a, -1, -1)]
    return np.array(out, dtype=np.int64)


def _monomials(p: np.ndarray, exps: np.ndarray) -> np.ndarray:
    return np.prod(p[:, None, :] ** exps[None, :, :], axis=-1)


@lru_cache(maxsize=8)
def harmonics_to_monomials(order: int) -> np.ndarray:
    """Matrix M (n_terms, J): S_lm(r) = sum_j M[lm, j] x^a_j y^b_j z^c_j.

    Exact: S_lm is a homogeneous polynomial of degree l, so each row is
    found by least squares over the monomials of degree l only (on random
    points, more than the unknowns) and every other entry is exactly zero;
    mixing degrees would let rounding in M carry the huge high-order
    coefficients (V/m^6 ~ 1e30) into the low orders. The constant S_00 = 1
    gets an empty row (no force).
    """

    exps = monomial_exponents(order)
    deg = exps.sum(axis=1)
    rng = np.random.default_rng(12345)
    p = rng.uniform(-1.0, 1.0, size=(8 * len(exps), 3))
    mono = _monomials(p, exps)
    s = solid_harmonics(p, order)
    m = np.zeros((s.shape[1], len(exps)))
    for t, (l, _) in enumerate(harmonic_terms(order)):
        if l == 0:
            continue
        cols = np.nonzero(deg == l)[0]
        m[t, cols] = np.linalg.lstsq(mono[:, cols], s[:, t], rcond=None)[0]
    return m


@dataclass(frozen=True)
class LayoutPinning:
    """The electrode pinning of a run as polynomial coefficients (SI).

    ``coefficients(theta, scale)`` gives the monomial coefficients (V/m^(a+b+c))
    of the potential about the trap point at pinning angle theta and
    pinning multiplier ``scale``.
    """

    path: str
    order: int
    exps: np.ndarray
    c_static: np.ndarray
    c_cos: np.ndarray
    c_sin: np.ndarray
    plan: object

    def coefficients(self, theta, scale) -> np.ndarray:
        th = np.asarray(theta, dtype=float)[..., None]
        sc = np.asarray(scale, dtype=float)[..., None]
        return self.c_static + sc * (self.c_cos * np.cos(self.order * th) + self.c_sin * np.sin(self.order * th))


def layout_pinning(path, order: int, strength_si: float, *, base_dir=None, key: str = "pinning.layout",
                   source: str | None = None, fit_order: int = 6) -> LayoutPinning:
    """Solve the rotating order-n plan of a layout and express its potential
    as polynomial coefficients for the dynamics.

    Raises
    ------
    InputError
        If the layout cannot be read, or the target strength is out of reach
        within the electrodes' voltage limits (names the shortfall).
    """

    p = Path(path)
    if not p.is_absolute() and base_dir is not None:
        p = Path(base_dir) / p
    if not p.is_file():
        raise InputError(key, f"expected the path of an electrode layout file; {str(p)!r} is not a file", source)
    layout = load_layout(p)
    if layout.trap_point_m is None:
        raise InputError(key, f"the layout {str(p)!r} has no trap point; give [trap] point = [x, y, z] or \"rf_null\"", source)
    table = fit_multipoles(layout, layout.trap_point_m, order=fit_order)
    plan = solve_rotating(layout, order, strength_si, table=table)
    if not plan.reached:
        raise InputError(key.rsplit(".", 1)[0] + (".strength" if plan.producible else ".order"),
                         f"layout {p.name}: {plan.shortfall_text()}", source)
    m = harmonics_to_monomials(table.order)
    return LayoutPinning(str(p), int(order), monomial_exponents(table.order), plan.coeff_static @ m,
                         plan.coeff_cos @ m, plan.coeff_sin @ m, plan)


class PolynomialPotential:
    """phi(r) = sum_j c_j x^a y^b z^c (r about the trap point), with its field
    and Hessian: the external-potential interface of
    :class:`mdrotor.physics.statics.Potential`."""

    def __init__(self, exps: np.ndarray, coeffs: np.ndarray):
        self.exps = np.asarray(exps)
        self.coeffs = np.asarray(coeffs, dtype=float)

    def _terms(self, r, da, db, dc):
        e = self.exps - np.array([da, db, dc])
        fac = np.ones(len(self.exps))
        for axis, k in ((0, da), (1, db), (2, dc)):
            for j in range(k):
                fac = fac * (self.exps[:, axis] - j)
        ok = np.all(e >= 0, axis=1)
        vals = np.prod(np.asarray(r)[:, None, :] ** np.where(ok[:, None], e, 0)[None], axis=-1)
        return vals @ (self.coeffs * fac * ok)

    def potential(self, r):
        return self._terms(r, 0, 0, 0)

    def field(self, r):
        return -np.stack([self._terms(r, 1, 0, 0), self._terms(r, 0, 1, 0), self._terms(r, 0, 0, 1)], axis=-1)

    def hessian(self, r):
        h = np.empty((len(r), 3, 3))
        for i in range(3):
            for j in range(i, 3):
                d = [0, 0, 0]
                d[i] += 1
                d[j] += 1
                h[:, i, j] = h[:, j, i] = self._terms(r, *d)
        return h
