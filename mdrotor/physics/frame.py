"""Frames of a planar rotor: rotation about z, centre of mass, L_z, I, alignment.

Every module that turns, aligns or measures the rotation of a crystal calls
these (one owner for each formula). Positions come in two layouts:

* one configuration, ``(N, 3)`` in m (statics);
* an ensemble, ``(3, N, T)`` in m or m/s (raw trajectory states).

Formulas (Goldstein, Classical Mechanics, ch. 1 and 5; common practice):

    L_z        = sum_i m_i (x_i v_yi - y_i v_xi)
    L_z,com    = L_z - M (X V_y - Y V_x),          M = sum m_i, (X, Y) the centre of mass
    I_com      = sum_i m_i ((x_i - X)^2 + (y_i - Y)^2)
    alignment  phi = arg sum_i m_i conj(z_ref,i) z_i,  z = x + i y about the centre of mass

The alignment angle is the mass-weighted least-squares (Kabsch) rotation
that maps the reference onto the configuration in the plane: it maximises
sum_i m_i Re[conj(z_ref,i) e^{-i phi} z_i], and at that phi the Eckart
condition Im sum_i m_i conj(e^{i phi} z_ref,i) z_i = 0 holds.
"""

from __future__ import annotations

import numpy as np


def rotate_positions(r: np.ndarray, phi: float) -> np.ndarray:
    """Turn one configuration (N, 3) (positions or velocities) by phi (rad) about z."""
    c, s = np.cos(phi), np.sin(phi)
    out = np.array(r, dtype=float, copy=True)
    out[..., 0] = c * r[..., 0] - s * r[..., 1]
    out[..., 1] = s * r[..., 0] + c * r[..., 1]
    return out


def rotate_states(a: np.ndarray, phi) -> np.ndarray:
    """Turn the x, y components of an ensemble (3, N, T) by phi (T,) or a scalar, rad."""
    c, s = np.cos(phi), np.sin(phi)
    out = a.copy()
    out[0] = c * a[0] - s * a[1]
    out[1] = s * a[0] + c * a[1]
    return out


def centre_of_mass(r: np.ndarray, masses: np.ndarray) -> np.ndarray:
    """Centre of mass (3,) of one configuration (N, 3)."""
    m = np.asarray(masses, dtype=float)
    return np.sum(m[:, None] * r, axis=0) / np.sum(m)


def complex_xy(r: np.ndarray, masses: np.ndarray | None = None) -> np.ndarray:
    """x + i y of one configuration (N, 3); about the centre of mass when masses are given."""
    z = r[:, 0] + 1j * r[:, 1]
    if masses is None:
        return z
    m = np.asarray(masses, dtype=float)
    return z - np.sum(m * z) / np.sum(m)


def moment_of_inertia(r: np.ndarray, masses: np.ndarray, *, about: str = "com") -> float:
    """I_z (kg m^2) of one configuration (N, 3), about the centre of mass
    (``about="com"``) or the trap axis (``about="axis"``). About the centre
    of mass, one ion or ions all on the axis (:func:`on_axis`) have no
    rotation of their own: 0 exactly (computed, a rounding residue)."""
    m = np.asarray(masses, dtype=float)
    if about == "com" and (len(m) < 2 or on_axis(r, m)):
        return 0.0
    z = complex_xy(r, m if about == "com" else None)
    return float(np.sum(m * np.abs(z) ** 2))


def angular_momentum(pos: np.ndarray, vel: np.ndarray, m: np.ndarray):
    """L_z about the axis and about the centre of mass (J s), and I_com
    (kg m^2), of an ensemble (3, N, T); each (T,). One ion has no rotation
    about its own centre of mass: L_com = I_com = 0 exactly (computed, they
    would be rounding residues, and L_com / I_com an arbitrary rate)."""
    lz = np.sum(m[:, None] * (pos[0] * vel[1] - pos[1] * vel[0]), axis=0)
    if len(m) < 2:
        return lz, np.zeros_like(lz), np.zeros_like(lz)
    mt = np.sum(m)
    xc = np.sum(m[:, None] * pos[0], axis=0) / mt
    yc = np.sum(m[:, None] * pos[1], axis=0) / mt
    vxc = np.sum(m[:, None] * vel[0], axis=0) / mt
    vyc = np.sum(m[:, None] * vel[1], axis=0) / mt
    lcom = lz - mt * (xc * vyc - yc * vxc)
    icom = np.sum(m[:, None] * ((pos[0] - xc) ** 2 + (pos[1] - yc) ** 2), axis=0)
    return lz, lcom, icom


def alignment_angle(z_ref: np.ndarray, z: np.ndarray, m: np.ndarray) -> np.ndarray:
    """Best rotation angle phi (per trajectory) mapping z_ref onto z:
    phi = arg sum_i m_i conj(z_ref,i) z_i, both complex (N, T) and centred."""
    if z_ref.ndim != 2 or z.ndim != 2:
        raise ValueError("z_ref and z must be (N, T)")
    return np.angle(np.sum(m[:, None] * np.conj(z_ref) * z, axis=0))


def alignment_angle_of(r_ref: np.ndarray, r: np.ndarray, masses: np.ndarray) -> float:
    """Alignment angle (rad) of one configuration (N, 3) against a reference (N, 3), about their centres of mass."""
    m = np.asarray(masses, dtype=float)
    return float(alignment_angle(complex_xy(r_ref, m)[:, None], complex_xy(r, m)[:, None], m)[0])



#: Ions within this fraction of the crystal's size from the rotation axis lie on it.
AXIS_REL = 1e-6

def on_axis(positions_m, masses_kg) -> bool:
    """True when every ion lies on the rotation axis (through the centre of mass)."""
    r = np.asarray(positions_m, dtype=float)
    size = float(np.max(np.linalg.norm(r - centre_of_mass(r, masses_kg), axis=1))) if len(r) else 0.0
    rho = np.abs(complex_xy(r, masses_kg))
    return len(r) < 2 or size == 0.0 or float(np.max(rho)) <= AXIS_REL * size
