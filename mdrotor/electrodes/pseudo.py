"""RF pseudopotential of a layout's rf electrodes.

All rf channels are driven in phase, V(t) = V_rf cos(W t), W = 2 pi f_drive.
In the lowest-order (adiabatic) approximation an ion of mass m and charge Q
feels the time-averaged potential energy

    U(r) = Q^2 |E(r)|^2 / (4 m W^2),

with E the field for the rf electrodes at V_rf (H.G. Dehmelt, Adv. At.
Mol. Phys. 3, 53 (1967); D. Leibfried, R. Blatt, C. Monroe, D. Wineland,
Rev. Mod. Phys. 75, 281 (2003), sec. II; J.H. Wesenberg, Phys. Rev. A 78,
063410 (2008), for surface traps).

At the RF null (E = 0), with H the Hessian of the rf potential at V_rf,
grad U = -2 kappa H E and the curvature of U is 2 kappa H.H, kappa =
Q^2 / (4 m W^2). Along an eigenvector of H with eigenvalue mu the secular
angular frequency is w = Q |mu| / (sqrt(2) m W), and the Mathieu parameter
of that axis (u'' = -(W^2/4)(a - 2 q cos W t) u) is q = -2 Q mu / (m W^2),
so that w = |q| W / (2 sqrt 2) to lowest order (Leibfried et al. 2003,
eqs. 5-10). Frequencies are returned in Hz.

The trap depth is the height of the lowest barrier of U between the null
and escape (far away or onto the surface): rays from the null over the
whole sphere give the highest U along each ray; the lowest of these maxima
bounds the barrier from above and is refined to the saddle point of U
(grad U = 0) nearby.
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np
from scipy.constants import atomic_mass as _AMU
from scipy.constants import e as _E_CHARGE
from scipy.optimize import least_squares

from mdrotor.errors import InputError
from mdrotor.physics.mathieu import is_stable
from mdrotor.physics.species import get_species

__all__ = ["NullResult", "PseudoTrap", "find_rf_null", "rf_pseudopotential", "pseudo_energy_j"]


@dataclass(frozen=True)
class NullResult:
    """Result of the RF-null search.

    Attributes
    ----------
    point_m : (3,) array
    field_per_v : float
        |E| per volt of rf at the point, 1/m.
    reference_per_v : float
        Typical |E| per volt near the point (at half its height), 1/m.
    found : bool
        ``field_per_v <= 1e-6 * reference_per_v``.
    others : tuple of (3,) arrays
        Further nulls the global search found (not chosen).
    """

    point_m: np.ndarray
    field_per_v: float
    reference_per_v: float
    found: bool
    others: tuple = ()


def _rf_field(layout, pts):
    """Field per volt of all rf electrodes together, (P, 3) in 1/m."""
    return layout.rf_geometry.field_basis(pts)[:, 0, :]


def _rf_hessian(layout, pts):
    """Potential Hessian per volt of all rf electrodes together, (P, 3, 3) in 1/m^2."""
    return layout.rf_geometry.hessian_basis(pts)[:, 0]


def _rf_extent(layout):
    """Bounding box (lo, hi) of the rf electrodes in the plane (m), their
    area-weighted centroid (x, y), and their smallest feature: min over rf
    electrodes of 2 area / perimeter (a strip's width, a ring's radial width)."""
    rf = [e for e in layout.electrodes if e.role == "rf"]
    outer = np.vstack([e.outer_m for e in rf])
    lo, hi = outer.min(axis=0), outer.max(axis=0)
    areas = np.array([e.area_m2 for e in rf])
    cents = np.array([e.outer_m.mean(axis=0) for e in rf])
    c = (areas[:, None] * cents).sum(axis=0) / areas.sum()

    def perimeter(loop):
        return float(np.sum(np.linalg.norm(np.roll(loop, -1, axis=0) - loop, axis=1)))

    feature = min(2.0 * e.area_m2 / (perimeter(e.outer_m) + sum(perimeter(h) for h in e.holes_m)) for e in rf)
    return lo, hi, c, feature


#: Grid of the null search: points per axis in the plane (at most), height
#: levels per factor e, and the number of best grid minima refined.
SEARCH_XY_MAX, SEARCH_Z_PER_E, SEARCH_STARTS = 25, 4, 6


def _search_grid(layout):
    """Coarse grid over the region above the rf electrodes (their bounding
    box with a quarter of its size added on every side; heights from a tenth
    of the smallest feature to twice the box size, geometric)."""
    lo, hi, c, feature = _rf_extent(layout)
    ext = hi - lo
    size = float(np.max(ext))
    axes = []
    for k in range(2):
        n = int(np.clip(np.ceil(1.5 * ext[k] / (0.5 * feature)), 9, SEARCH_XY_MAX)) | 1  # odd: the box centre is on it
        axes.append(np.linspace(lo[k] - 0.25 * ext[k], hi[k] + 0.25 * ext[k], n))
    z_lo, z_hi = 0.1 * feature, 2.0 * size
    nz = max(8, int(np.ceil(SEARCH_Z_PER_E * math.log(z_hi / z_lo))))
    axes.append(np.geomspace(z_lo, z_hi, nz))
    return axes, lo, hi, c, size


def _grid_minima(e2):
    """Indices of the interior local minima of a 3D array (26 neighbours, ties allowed)."""
    core = e2[1:-1, 1:-1, 1:-1]
    is_min = np.ones(core.shape, dtype=bool)
    nx, ny, nz = e2.shape
    for dx in (-1, 0, 1):
        for dy in (-1, 0, 1):
            for dz in (-1, 0, 1):
                if dx == dy == dz == 0:
                    continue
                is_min &= core <= e2[1 + dx:nx - 1 + dx, 1 + dy:ny - 1 + dy, 1 + dz:nz - 1 + dz]
    return np.argwhere(is_min) + 1


def _refine(layout, x0):
    """Least-squares solve of E_rf = 0 from x0 (scaled by its height): (point, |E|, |E| at half height)."""
    scale = max(float(x0[2]), 1e-9)

    def fun(u):
        return _rf_field(layout, (u * scale)[None, :])[0] * scale

    def jac(u):
        return -_rf_hessian(layout, (u * scale)[None, :])[0] * scale * scale

    sol = least_squares(fun, x0 / scale, jac=jac, bounds=([-np.inf, -np.inf, 1e-3], np.inf),
                        xtol=1e-15, ftol=1e-15, gtol=1e-15, method="trf")
    p = sol.x * scale
    e = float(np.linalg.norm(_rf_field(layout, p[None, :])[0]))
    ref = float(np.linalg.norm(_rf_field(layout, np.array([[p[0], p[1], 0.5 * p[2]]]))[0]))
    return p, e, ref


def find_rf_null(layout, guess_m=None) -> NullResult:
    """Locate the RF null (E_rf = 0) above the surface.

    Without a guess the search is global over the region above the rf
    electrodes: |E_rf|^2 on a coarse grid (:func:`_search_grid`: the rf
    electrodes' bounding box widened by a quarter of its size on each side,
    at least a point per half feature up to 25 per axis, heights geometric
    from a tenth of the smallest rf feature to twice the layout's size), its
    interior local minima ranked by the distance to the null that a Newton
    step predicts relative to the height, |E| / (||H|| z) (small only near a
    null: far from the electrodes |E| and its Hessian H fall off together), and a
    least-squares solve of E_rf = 0 from the best few. Of the nulls found
    (|E| <= 1e-6 of the field at half their height), the one nearest the rf
    electrodes' area-weighted centre (horizontally, then the lowest) is the
    result; the others are in ``NullResult.others``. A layout whose null is
    elsewhere can name a start point (``[trap] guess``).

    Parameters
    ----------
    layout : Layout
    guess_m : (3,) array-like, optional
        Start point of a local solve instead of the global search.

    Returns
    -------
    NullResult
    """
    if not layout.rf_channels:
        raise InputError("rf", "the layout has no electrode with role = 'rf'", layout.source)
    if guess_m is not None:
        x0 = np.asarray(guess_m, dtype=float)
        if x0.shape != (3,) or x0[2] <= 0:
            raise InputError("trap.guess", "expected a point [x, y, z] above the surface", layout.source)
        p, e, ref = _refine(layout, x0)
        return NullResult(p, e, ref, bool(e <= 1e-6 * max(ref, 1e-300)))
    (gx, gy, gz), lo, hi, c, size = _search_grid(layout)
    X, Y, Z = np.meshgrid(gx, gy, gz, indexing="ij")
    pts = np.column_stack([X.ravel(), Y.ravel(), Z.ravel()])
    e2 = np.sum(_rf_field(layout, pts) ** 2, axis=1).reshape(X.shape)
    idx = _grid_minima(e2)
    if len(idx) == 0:  # no interior minimum: every point is a candidate
        idx = np.argwhere(np.ones(e2.shape, dtype=bool))
    cand = np.column_stack([gx[idx[:, 0]], gy[idx[:, 1]], gz[idx[:, 2]]])
    hess = np.linalg.norm(_rf_hessian(layout, cand), axis=(1, 2))
    score = np.sqrt(e2[tuple(idx.T)]) / np.maximum(hess * cand[:, 2], 1e-300)
    starts = cand[np.argsort(score)[:SEARCH_STARTS]]
    found, best = [], None
    centre = 0.5 * (lo + hi)
    for x0 in starts:
        p, e, ref = _refine(layout, x0)
        inside = np.all(np.abs(p[:2] - centre) <= 0.5 * (hi - lo) + size) and p[2] <= 5.0 * size
        rel = e / max(ref, 1e-300)
        if inside and rel <= 1e-6:
            if not any(np.linalg.norm(p - q) <= 1e-6 * p[2] for q, _, _ in found):
                found.append((p, e, ref))
        if inside and (best is None or rel < best[1] / max(best[2], 1e-300)):
            best = (p, e, ref)
    if not found:
        if best is None:
            best = _refine(layout, starts[0])
        return NullResult(best[0], best[1], best[2], False)
    found.sort(key=lambda r: (round(float(np.hypot(*(r[0][:2] - c))) / (1e-6 * size)), r[0][2]))
    p, e, ref = found[0]
    return NullResult(p, e, ref, True, tuple(q for q, _, _ in found[1:]))


def pseudo_energy_j(layout, points_m, v_rf, f_drive_hz, mass_kg, charge_c) -> np.ndarray:
    """Pseudopotential energy U = Q^2 |E|^2 / (4 m W^2) in J at points (P, 3) m."""
    kappa = charge_c ** 2 / (4.0 * mass_kg * (2.0 * math.pi * f_drive_hz) ** 2)
    e = _rf_field(layout, points_m) * v_rf
    return kappa * np.sum(e * e, axis=-1)


@dataclass(frozen=True)
class PseudoTrap:
    """RF pseudopotential trap of a layout.

    Attributes
    ----------
    null_m : (3,) array
        RF null (pseudopotential minimum), m.
    null_field_v_per_m : float
        |E_rf| left at the null at amplitude V_rf (0 for an exact null).
    hessian_v_per_m2 : (3, 3) array
        Hessian of the rf potential at the null at amplitude V_rf.
    secular_hz : (3,) array
        Secular frequencies, ascending, Hz.
    axes : (3, 3) array
        Unit principal axes as columns, in the order of ``secular_hz``.
    q : (3,) array
        Mathieu q along the axes (signed; sum zero by Laplace).
    q_max : float
        Largest |q|.
    depth_j, depth_ev : float
        Trap depth (barrier height of the pseudopotential), J and eV.
    saddle_m : (3,) array
        Escape point (saddle of U) the depth refers to.
    v_rf, f_drive_hz, mass_kg, charge_c : float
        Inputs.
    """

    null_m: np.ndarray
    null_field_v_per_m: float
    hessian_v_per_m2: np.ndarray
    secular_hz: np.ndarray
    axes: np.ndarray
    q: np.ndarray
    q_max: float
    depth_j: float
    depth_ev: float
    saddle_m: np.ndarray
    v_rf: float
    f_drive_hz: float
    mass_kg: float
    charge_c: float

    def to_dict(self) -> dict:
        return {
            "null_um": [float(x) * 1e6 for x in self.null_m],
            "null_field_v_per_m": self.null_field_v_per_m,
            "secular_hz": [float(x) for x in self.secular_hz],
            "axes": self.axes.T.tolist(),
            "q": [float(x) for x in self.q],
            "depth_ev": self.depth_ev,
            "saddle_um": [float(x) * 1e6 for x in self.saddle_m],
            "v_rf": self.v_rf,
            "f_drive_hz": self.f_drive_hz,
        }


def _depth(layout, null, v_rf, kappa, n_dir=300, n_step=120):
    """Barrier height of U = kappa |E|^2 around the null and its saddle."""
    h = null[2]
    # directions: Fibonacci sphere (roughly even cover of all directions)
    k = np.arange(n_dir) + 0.5
    cz = 1.0 - 2.0 * k / n_dir
    phi = math.pi * (1.0 + 5.0 ** 0.5) * k
    sz = np.sqrt(1.0 - cz * cz)
    dirs = np.column_stack([sz * np.cos(phi), sz * np.sin(phi), cz])
    s_max = np.full(n_dir, 10.0 * h)
    down = dirs[:, 2] < 0
    # stop downward rays just above the surface (z = 0.02 h)
    s_max[down] = np.minimum(s_max[down], (h - 0.02 * h) / -dirs[down, 2])
    frac = np.linspace(0.0, 1.0, n_step + 1)[1:]
    pts = null[None, None, :] + (frac[None, :, None] * s_max[:, None, None]) * dirs[:, None, :]
    u = kappa * np.sum((_rf_field(layout, pts.reshape(-1, 3)) * v_rf) ** 2, axis=1).reshape(n_dir, n_step)
    imax = np.argmax(u, axis=1)
    best = int(np.argmin(u[np.arange(n_dir), imax]))
    start = pts[best, imax[best]]
    u_ray = float(u[best, imax[best]])
    # refine to the saddle: grad U = -2 kappa V^2 H e = 0
    scale = h

    def grad(x):
        p = (x * scale)[None, :]
        e = _rf_field(layout, p)[0]
        H = _rf_hessian(layout, p)[0]
        return -2.0 * H @ e * scale ** 3

    try:
        sol = least_squares(grad, start / scale, bounds=([-np.inf, -np.inf, 0.01], np.inf), xtol=1e-13, ftol=1e-13,
                            gtol=1e-15, x_scale=1.0)
        sad = sol.x * scale
        u_sad = kappa * float(np.sum((_rf_field(layout, sad[None, :])[0] * v_rf) ** 2))
        # accept the refinement when it stays near the ray estimate and is a critical point
        moved = np.linalg.norm(sad - start)
        if np.linalg.norm(sad - null) > 0.1 * h and moved < 0.5 * h and u_sad <= u_ray * (1 + 1e-6):
            return u_sad, sad
    except (ValueError, np.linalg.LinAlgError):
        pass
    return u_ray, start


def rf_pseudopotential(layout, v_rf=None, f_drive_hz=None, mass_kg=None, charge_c=None, *, species=None,
                       guess_m=None, depth=True) -> PseudoTrap:
    """RF pseudopotential trap: null, secular frequencies and axes, q, depth.

    Parameters
    ----------
    layout : Layout
    v_rf : float, optional
        RF amplitude in V (default: ``layout.rf_amplitude_v``). Must not
        exceed the limit of any rf electrode.
    f_drive_hz : float, optional
        Drive frequency in Hz (default: ``layout.rf_drive_hz``).
    mass_kg, charge_c : float, optional
        Ion mass (kg) and charge (C). Alternatively ``species``.
    species : str, optional
        Species name such as ``"40Ca+"`` (default: ``layout.species``),
        used when ``mass_kg`` / ``charge_c`` are not given.
    guess_m : (3,) array-like, optional
        Start of the null search (default: the layout's trap point if it was
        found as the RF null, else the automatic search).
    depth : bool
        Compute the trap depth (a few hundred thousand field evaluations).

    Returns
    -------
    PseudoTrap
    """
    src = layout.source
    v_rf = layout.rf_amplitude_v if v_rf is None else v_rf
    f_drive_hz = layout.rf_drive_hz if f_drive_hz is None else f_drive_hz
    if v_rf is None or not (math.isfinite(v_rf) and v_rf > 0):
        raise InputError("rf.amplitude", f"expected a positive rf amplitude such as '200 V', got {v_rf!r}", src)
    if f_drive_hz is None or not (math.isfinite(f_drive_hz) and f_drive_hz > 0):
        raise InputError("rf.f_drive", f"expected a positive drive frequency such as '30 MHz', got {f_drive_hz!r}", src)
    if mass_kg is None or charge_c is None:
        name = species or layout.species
        if name is None:
            raise InputError("rf.species", "expected mass_kg and charge_c, or a species such as '40Ca+'", src)

        sp = get_species(name, key="rf.species", source=src)
        mass_kg = sp.mass_kg if mass_kg is None else mass_kg
        charge_c = sp.charge_c if charge_c is None else charge_c
    if not (mass_kg > 0 and charge_c != 0):
        raise InputError("species", "expected a positive mass and a nonzero charge", src)
    rf_limit = min(layout.channel_limits_v[i] for i in layout.rf_channels) if layout.rf_channels else None
    if rf_limit is None:
        raise InputError("rf", "the layout has no electrode with role = 'rf'", src)
    if v_rf > rf_limit:
        raise InputError("rf.amplitude", f"{v_rf:.6g} V exceeds the rf electrodes' limit of {rf_limit:.6g} V", src)
    if guess_m is None and layout.trap_from_rf_null:
        guess_m = layout.trap_point_m
    res = find_rf_null(layout, guess_m)
    null = res.point_m
    w_drive = 2.0 * math.pi * f_drive_hz
    kappa = charge_c ** 2 / (4.0 * mass_kg * w_drive ** 2)
    H = _rf_hessian(layout, null[None, :])[0] * v_rf
    H = 0.5 * (H + H.T)
    mu, vec = np.linalg.eigh(H)
    w = abs(charge_c) * np.abs(mu) / (math.sqrt(2.0) * mass_kg * w_drive)
    order = np.argsort(w)
    q = -2.0 * charge_c * mu / (mass_kg * w_drive ** 2)
    q_max = float(np.max(np.abs(q)))
    if not is_stable(0.0, q_max):  # the pseudopotential below would mean nothing
        raise InputError("rf.f_drive", f"Mathieu q = {q_max:.4g} ({v_rf:.6g} V at {f_drive_hz:.6g} Hz, an ion of "
                                       f"{mass_kg / _AMU:.4g} u and charge {charge_c / _E_CHARGE:.3g} e) is outside the first "
                                       f"stability region (|q| < 0.908 at a = 0): no ion is trapped; expected a faster drive "
                                       f"or a lower rf amplitude", src)
    if depth:
        d_j, sad = _depth(layout, null, v_rf, kappa)
        d_j -= kappa * (res.field_per_v * v_rf) ** 2
    else:
        d_j, sad = float("nan"), np.full(3, np.nan)
    return PseudoTrap(
        null_m=null, null_field_v_per_m=res.field_per_v * v_rf, hessian_v_per_m2=H,
        secular_hz=w[order] / (2.0 * math.pi), axes=vec[:, order], q=q[order], q_max=float(np.max(np.abs(q))),
        depth_j=float(d_j), depth_ev=float(d_j / _E_CHARGE), saddle_m=sad,
        v_rf=float(v_rf), f_drive_hz=float(f_drive_hz), mass_kg=float(mass_kg), charge_c=float(charge_c))
