"""The trap: harmonic pseudopotential per ion, static imperfections.

Pseudopotential model (per ion i, axis u):

    U_i = 1/2 m_i w_{u,i}^2 u_i^2 - Q_i E_stray . r_i

The secular frequencies are given for the reference species (the first
species of the crystal). For other species of a mixed crystal they scale as
in a Paul trap: the RF pseudopotential part of w^2 scales with (Q/m)^2 and
the DC part with Q/m (Leibfried et al., Rev. Mod. Phys. 75, 281 (2003),
lowest order: w_u^2 = (W/2)^2 (a_u + q_u^2/2) with a ~ Q/m, q ~ Q/m).
Given RF parameters (f_drive, a, q) the scaled secular frequency of each
species is exact (Mathieu characteristic exponent, :mod:`mdrotor.physics.mathieu`).
Given only secular frequencies we assume a linear-trap split: the axial
confinement is all DC, and the radial one is an RF pseudopotential minus
the DC defocusing w_z^2/2 that Laplace's equation imposes (the in-plane
anisotropy, ``radial_split``, is taken as DC).

Rotation against the confinement: in a frame turning at w the centrifugal
term -1/2 m w^2 (x^2 + y^2) lowers each ion's radial curvature to
m (w_r^2 - w^2), so no crystal is bound once w reaches the lowest radial
secular frequency over the ions (Goldstein, Classical Mechanics, ch. 4,
motion in a rotating frame). An order-2 pinning Q Re[c_2 (x + i y)^2] that
turns with the crystal is static in that frame and adds +-2 Q |c_2| to the
two in-plane spring constants: with one of them positive and the other
negative the rotating-frame motion has a real growth rate (the
characteristic polynomial l^4 + (k_1 + k_2 + 4 m W^2) l^2 / m + k_1 k_2 / m^2
of x'' - 2 W y' + k_1 x / m = 0, y'' + 2 W x' + k_2 y / m = 0 has a negative
last coefficient; common practice, no source), so the limit falls to
sqrt(w_r^2 - 2 |Q c_2| / m). :func:`max_rotation_hz` is that limit,
:func:`check_rotation` the one refusal, :func:`radial_limit_hz` the same
limit read off a potential's springs, and :data:`DECONFINED_FRACTION` the
fraction of it at which a measured crystal counts as flown apart.
"""

from __future__ import annotations

from dataclasses import dataclass
from functools import lru_cache

import numpy as np

from mdrotor.errors import PhysicsError
from mdrotor.physics.mathieu import secular_frequency_hz

TWO_PI = 2.0 * np.pi
#: A crystal measured turning at this fraction of the lowest radial secular
#: frequency or faster has flown apart (its stretch diverges as
#: 1 / (w_r^2 - w^2)); also the edge of the rotating-frame grid.
DECONFINED_FRACTION = 0.98


def radial_limit_hz(spring_n_per_m, masses_kg) -> float:
    """Lowest radial secular frequency (Hz) of springs K_iu = m_i w_iu^2 (N, 3)."""
    k = np.asarray(spring_n_per_m, dtype=float)
    w2 = k[:, :2] / np.asarray(masses_kg, dtype=float)[:, None]
    return float(np.sqrt(max(float(np.min(w2)), 0.0)) / TWO_PI)


def check_rotation(f_rot_hz: float, f_limit_hz: float, key: str, source: str | None = None, *,
                   quadrupole_v_per_m2: float = 0.0, when: str = "") -> None:
    """Refuse a rotation at or above the radial confinement's limit
    (module docstring), naming ``key``; ``f_limit_hz`` is
    :meth:`Trap.max_rotation_hz` with the order-2 pinning of magnitude
    ``quadrupole_v_per_m2`` (0: none) that turns with the crystal ``when``
    (words such as " at t = 1 ms")."""

    if f_rot_hz == 0.0 or abs(f_rot_hz) < f_limit_hz:
        return
    if quadrupole_v_per_m2 == 0.0:
        raise PhysicsError(key, f"rotation at {f_rot_hz:.6g} Hz{when} is faster than the radial confinement can hold "
                                f"(lowest radial secular frequency {f_limit_hz:.6g} Hz)", source)
    raise PhysicsError(key, f"rotation at {f_rot_hz:.6g} Hz{when} is faster than the radial confinement can hold with the "
                            f"order-2 pinning turning with it (|c_2| = {quadrupole_v_per_m2:.4g} V/m^2 takes 2 Q |c_2| / m "
                            f"from one in-plane w^2, leaving {f_limit_hz:.6g} Hz); expected a slower rotation or a weaker "
                            f"pinning", source)


@dataclass(frozen=True)
class Trap:
    """Trap description for the reference species.

    Attributes
    ----------
    f_secular_hz : tuple of 3 floats
        Secular frequencies (x, y, z) of the reference species, Hz.
    ref_mass_kg, ref_charge_c : float
        Reference species.
    model : str
        ``"pseudo"`` or ``"rf"``.
    f_drive_hz : float or None
        RF drive frequency (needed for ``rf``, optional for ``pseudo``).
    a, q : tuple of 3 floats or None
        Mathieu parameters of the reference species, when known.
    stray_field_v_per_m : tuple of 3 floats
        Static uniform stray field.
    rf_phase_rad : float or None
        RF phase at t = 0 (``None``: random per trajectory; used by the
        ``rf`` model only).
    """

    f_secular_hz: tuple
    ref_mass_kg: float
    ref_charge_c: float
    model: str = "pseudo"
    f_drive_hz: float | None = None
    a: tuple | None = None
    q: tuple | None = None
    stray_field_v_per_m: tuple = (0.0, 0.0, 0.0)
    rf_phase_rad: float | None = 0.0

    def omega_sq(self, masses_kg: np.ndarray, charges_c: np.ndarray) -> np.ndarray:
        """Per-ion, per-axis secular angular frequency squared (N, 3); rad^2/s^2."""
        return _omega_sq(self, tuple(np.asarray(masses_kg, dtype=float)), tuple(np.asarray(charges_c, dtype=float))).copy()

    def _omega_sq(self, masses_kg: np.ndarray, charges_c: np.ndarray) -> np.ndarray:
        s = (np.asarray(charges_c) / np.asarray(masses_kg)) / (self.ref_charge_c / self.ref_mass_kg)
        out = np.empty((len(s), 3))
        if self.a is not None and self.q is not None and self.f_drive_hz is not None:
            for i, si in enumerate(s):
                for u in range(3):
                    out[i, u] = (TWO_PI * secular_frequency_hz(self.f_drive_hz, si * self.a[u], si * self.q[u])) ** 2
            return out
        w2 = (TWO_PI * np.asarray(self.f_secular_hz)) ** 2
        w2_dc = np.array([-0.5 * w2[2], -0.5 * w2[2], w2[2]])
        # anisotropy taken as DC: split the radial DC part around the mean
        mean_r = 0.5 * (w2[0] + w2[1])
        w2_dc[0] += w2[0] - mean_r
        w2_dc[1] += w2[1] - mean_r
        w2_rf = w2 - w2_dc
        for i, si in enumerate(s):
            out[i] = si * w2_dc + si**2 * w2_rf
        return out

    def rf_terms(self, masses_kg, charges_c) -> tuple[np.ndarray, np.ndarray]:
        """Per-ion static and RF spring terms of the full RF force (rad^2/s^2).

        u'' = -(w2_u - rf2_u cos(W t + phase)) u with w2 = (W/2)^2 s a_u and
        rf2 = 2 (W/2)^2 s q_u, s the charge-to-mass ratio relative to the
        reference species (Mathieu form of Leibfried et al., Rev. Mod. Phys.
        75, 281 (2003)).
        """
        s = (np.asarray(charges_c) / np.asarray(masses_kg)) / (self.ref_charge_c / self.ref_mass_kg)
        half_w2 = (np.pi * self.f_drive_hz) ** 2
        w2 = half_w2 * s[:, None] * np.asarray(self.a)[None, :]
        rf2 = 2.0 * half_w2 * s[:, None] * np.asarray(self.q)[None, :]
        return w2, rf2

    def q_per_ion(self, masses_kg, charges_c) -> np.ndarray:
        """Mathieu q per ion and axis (N, 3), scaled by charge-to-mass."""
        s = (np.asarray(charges_c) / np.asarray(masses_kg)) / (self.ref_charge_c / self.ref_mass_kg)
        return s[:, None] * np.asarray(self.q)[None, :]

    def max_rotation_hz(self, masses_kg, charges_c, quadrupole_v_per_m2: float = 0.0) -> float:
        """The fastest rotation the radial confinement holds: the lowest
        radial secular frequency over the ions, Hz (module docstring); with
        an order-2 pinning of magnitude |c_2| = ``quadrupole_v_per_m2`` turning
        with the crystal, each ion's w^2 less 2 |Q| |c_2| / m (0 when that
        opens the trap)."""
        w2 = self.omega_sq(masses_kg, charges_c)[:, :2]
        w2 = w2 - (2.0 * np.abs(np.asarray(charges_c, dtype=float)) * abs(quadrupole_v_per_m2)
                   / np.asarray(masses_kg, dtype=float))[:, None]
        return float(np.sqrt(max(float(np.min(w2)), 0.0)) / TWO_PI)

    def spring_constants(self, masses_kg, charges_c) -> np.ndarray:
        """K_{i,u} = m_i w_{u,i}^2 (N, 3); N/m."""
        return np.asarray(masses_kg)[:, None] * self.omega_sq(masses_kg, charges_c)


@lru_cache(maxsize=64)
def _omega_sq(trap: Trap, masses: tuple, charges: tuple) -> np.ndarray:
    # the Mathieu exponents are worth caching: statics ask for them often
    return trap._omega_sq(np.array(masses), np.array(charges))
