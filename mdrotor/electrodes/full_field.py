"""The full field of a layout's electrodes on a crystal, for the statics.

The terms follow the "external" protocol of
:class:`mdrotor.physics.statics.Potential` (``potential``, ``field``,
``hessian`` of the ions' positions in the crystal frame, whose origin is a
point of the layout, usually the RF null):

- :class:`RFPseudoTerm`: the pseudopotential Q^2 |E_rf(r)|^2 / (4 m W^2) of
  the rf electrodes evaluated at every ion (not only its harmonic part; the
  harmonic part at the null goes into the springs);
- :class:`ElectrodeTerm`: the dc electrodes at fixed channel voltages;
- :func:`plan_voltages`: the channel voltages of a rotating plan
  (:class:`mdrotor.electrodes.solve.RotatingPlan`) at a pattern angle;
- :func:`full_potential`: the :class:`~mdrotor.physics.statics.Potential`
  of both, every term from the solid-angle formulas of
  :mod:`mdrotor.electrodes.potentials`, no multipole truncation.

The design check (:mod:`mdrotor.studies.design_check`) and the rigid scan
(:mod:`mdrotor.electrodes.torque_scan`) use them.
"""

from __future__ import annotations

import math

import numpy as np

from mdrotor.errors import InputError
from mdrotor.physics.statics import Potential

__all__ = ["RFPseudoTerm", "ElectrodeTerm", "plan_voltages", "full_potential"]

TWO_PI = 2.0 * math.pi


class RFPseudoTerm:
    """RF pseudopotential of the layout's rf electrodes, minus its harmonic part.

    Ion i feels U_i = Q_i^2 |E(r)|^2 / (4 m_i W^2) (Dehmelt 1967; see
    :mod:`mdrotor.electrodes.pseudo`), E the rf field at amplitude V_rf,
    W = 2 pi f_drive. Written as Q_i phi_i with phi_i = a_i |E|^2, a_i =
    Q_i / (4 m_i W^2). The harmonic part at the null, K_iu = 2 Q_i a_i
    (H0 H0)_uu (H0 the rf Hessian there), goes into the springs of
    :class:`mdrotor.physics.statics.Potential` (:attr:`springs_n_per_m`); this term is
    the rest, so that springs + term = the full pseudopotential.

    Points are in the crystal frame (origin at ``origin_m``) and must be the
    N ions in order (the potential differs per species).

    Derivatives: grad |E|^2 = -2 H E; Hess |E|^2 = 2 H H - 2 E_k d_k H, the
    third derivatives d_k H by central differences of the analytic Hessian
    (step 1e-3 of the null's height: truncation ~1e-6, rounding ~1e-10
    relative).
    """

    def __init__(self, layout, origin_m, v_rf, f_drive_hz, masses_kg, charges_c):
        if layout.rf_geometry is None:
            raise InputError("rf", "the layout has no electrode with role = 'rf'", layout.source)
        self.geometry = layout.rf_geometry
        self.origin = np.asarray(origin_m, dtype=float)
        self.v_rf = float(v_rf)
        w = TWO_PI * float(f_drive_hz)
        self.charges = np.asarray(charges_c, dtype=float)
        self.a = self.charges / (4.0 * np.asarray(masses_kg, dtype=float) * w * w)
        h0 = self.rf_hessian(self.origin[None, :])[0]
        self.springs_n_per_m = 2.0 * (self.charges * self.a)[:, None] * np.diag(h0 @ h0)[None, :]
        self._k_over_q = self.springs_n_per_m / self.charges[:, None]
        self.step_m = 1e-3 * self.origin[2]

    def rf_field(self, pts):
        """RF field E (V/m) at amplitude V_rf at lab points (P, 3) m: (P, 3)."""
        return self.geometry.field_basis(pts)[:, 0, :] * self.v_rf

    def rf_hessian(self, pts):
        """Hessian of the rf potential (V/m^2) at amplitude V_rf at lab points (P, 3) m: (P, 3, 3)."""
        return self.geometry.hessian_basis(pts)[:, 0] * self.v_rf

    def _pts(self, r):
        r = np.asarray(r, dtype=float)
        if r.shape != (len(self.a), 3):
            raise ValueError(f"RFPseudoTerm expects the {len(self.a)} ions' positions, got shape {r.shape}")
        return r, self.origin + r

    def potential(self, r):
        """phi_i (V) at the ions (N, 3) m: a_i |E|^2 - K_i r_i^2 / (2 Q_i)."""
        r, p = self._pts(r)
        e = self.rf_field(p)
        return self.a * np.sum(e * e, axis=1) - 0.5 * np.sum(self._k_over_q * r * r, axis=1)

    def field(self, r):
        """-grad phi_i (V/m), (N, 3)."""
        r, p = self._pts(r)
        e = self.rf_field(p)
        h = self.rf_hessian(p)
        return 2.0 * self.a[:, None] * np.einsum("pij,pj->pi", h, e) + self._k_over_q * r

    def hessian(self, r):
        """Hessian of phi_i (V/m^2), (N, 3, 3)."""
        r, p = self._pts(r)
        e = self.rf_field(p)
        h = self.rf_hessian(p)
        d = self.step_m
        dh = np.stack([(self.rf_hessian(p + d * u) - self.rf_hessian(p - d * u)) / (2.0 * d) for u in np.eye(3)], axis=1)  # (N, k, i, j)
        third = np.einsum("pk,pkij->pij", e, dh)
        out = 2.0 * self.a[:, None, None] * (np.einsum("pik,pjk->pij", h, h) - third)
        out[:, [0, 1, 2], [0, 1, 2]] -= self._k_over_q
        return out

    def energy_many(self, r):
        """Full pseudopotential energy (J) of configurations r (K, N, 3): sum_i Q_i a_i |E|^2."""
        r = np.asarray(r, dtype=float)
        e = self.rf_field((self.origin + r).reshape(-1, 3)).reshape(r.shape)
        return np.sum(self.charges * self.a * np.sum(e * e, axis=-1), axis=-1)


class ElectrodeTerm:
    """The layout's electrodes at fixed channel voltages, in the crystal frame.

    Potential, field E = -grad phi and Hessian from the solid-angle and
    line-integral formulas of :mod:`mdrotor.electrodes.potentials`.
    """

    def __init__(self, layout, origin_m, voltages_v):
        self.layout = layout
        self.origin = np.asarray(origin_m, dtype=float)
        self.voltages_v = layout.voltage_vector(voltages_v)

    def potential(self, r):
        return self.layout.potential(self.origin + np.asarray(r, dtype=float), self.voltages_v)

    def field(self, r):
        return self.layout.field(self.origin + np.asarray(r, dtype=float), self.voltages_v)

    def hessian(self, r):
        return self.layout.hessian(self.origin + np.asarray(r, dtype=float), self.voltages_v)


def plan_voltages(plan, theta_rad, scale=1.0):
    """Channel voltages (V): static + scale * amplitude * cos(n theta - phase)."""
    th = np.asarray(theta_rad, dtype=float)[..., None]
    s = np.asarray(scale, dtype=float)[..., None]
    return plan.static_v + s * plan.amplitudes_v * np.cos(plan.order * th - plan.phases_rad)


def full_potential(layout, pseudo: RFPseudoTerm, masses_kg, charges_c, voltages_v, *, stray_v_per_m=(0.0, 0.0, 0.0),
                   f_rot_hz: float = 0.0):
    """:class:`mdrotor.physics.statics.Potential` of the full electrode field.

    Springs: the pseudopotential's harmonic part at the null; externals: the
    rest of the pseudopotential and the dc electrodes at ``voltages_v``.
    ``f_rot_hz`` sets the frame (the stray field is then dropped, as in
    :func:`mdrotor.model.build.model_potential`).
    """

    stray = np.zeros(3) if f_rot_hz else np.asarray(stray_v_per_m, dtype=float)
    return Potential(np.asarray(masses_kg, dtype=float), np.asarray(charges_c, dtype=float),
                     pseudo.springs_n_per_m.copy(), stray, (), TWO_PI * f_rot_hz,
                     (pseudo, ElectrodeTerm(layout, pseudo.origin, voltages_v)))

