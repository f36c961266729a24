"""Crystal statics: equilibria in the lab and rotating frame, normal modes.

Potential energy of N ions (SI; see :mod:`mdrotor.trap`, :mod:`mdrotor.multipole`)::

    U = sum_i 1/2 sum_u K_iu r_iu^2 - sum_i Q_i E_stray . r_i
        + sum_terms sum_i Q_i Re[C_n z_i^n]
        + sum_{i<j} Q_i Q_j / (4 pi eps0 |r_i - r_j|)
        - sum_i 1/2 m_i w^2 (x_i^2 + y_i^2)          (rotating frame only)

In a frame rotating at w about z the equilibrium minimises the effective
potential (last line: the centrifugal term). The pinning multipoles co-rotate
with the frame; the in-plane anisotropy and the stray field rotate *against*
it and are replaced by their rotation average (anisotropy) or dropped (stray
field) when w != 0.

Normal modes come from the quadratic Hamiltonian about the equilibrium in
mass-weighted coordinates xi_i = sqrt(m_i) (r_i - r_i0) and their canonical
momenta pi (Goldstein, Classical Mechanics, ch. 6; the rotating-frame form
H2 = H - w L_z is ch. 4 and 6)::

    H2 = 1/2 pi.pi + 1/2 xi^T Kmw xi - w sum_i (xi_x pi_y - xi_y pi_x)
       = 1/2 zeta^T A zeta,     zeta = (xi, pi)

with Kmw = M^-1/2 Hess(U) M^-1/2 (U without the centrifugal term: it comes
out of the Coriolis term). The equations of motion d zeta/dt = J A zeta,
J = [[0, 1], [-1, 0]], have eigenvalues +-i w_k. Each mode gets a pair of
real vectors (e_Q, e_P) with e_Q^T J e_P = 1, so that the mode's normal
coordinates are Q_k = zeta^T J e_P, P_k = -zeta^T J e_Q and its energy is
E_k = w_k (Q_k^2 + P_k^2) / 2 (Williamson normal form). Phonon numbers are
n_k = E_k / (hbar w_k) - 1/2 with Wigner-sampled zero-point motion. The
rotation itself (angle and L_z) is a zero mode when nothing pins the crystal;
it is left out of the mode list and reported as L.
"""

from __future__ import annotations

import warnings
from dataclasses import dataclass, field

import numpy as np
from scipy import constants as sc

from . import multipole as mp
from .errors import PhysicsError

K_COULOMB = 1.0 / (4.0 * np.pi * sc.epsilon_0)
SLOW_ROTATION_HZ = 10.0
HBAR = sc.hbar
TWO_PI = 2.0 * np.pi


# --------------------------------------------------------------------------
# The potential
# --------------------------------------------------------------------------
@dataclass(frozen=True)
class Potential:
    """Static potential of a crystal (lab frame or a rotating frame).

    Attributes
    ----------
    masses_kg, charges_c : (N,) arrays
    spring_n_per_m : (N, 3) array
        K_iu = m_i w_{u,i}^2 (already rotation-averaged in-plane if needed).
    stray_field_v_per_m : (3,) array
    multipoles : tuple of (order, complex coefficient C in V/m^n)
    omega_frame : float
        Rotation rate of the frame, rad/s (0: lab frame).
    external : tuple of objects
        Extra static electric potentials, each with ``potential(r)`` (V),
        ``field(r)`` (E = -grad phi, V/m) and ``hessian(r)`` (V/m^2) for
        points r (P, 3) in m; an ion adds Q phi(r_i) (e.g. a surface-electrode
        layout at its voltages, :mod:`mdrotor.electrodes`).
    """

    masses_kg: np.ndarray
    charges_c: np.ndarray
    spring_n_per_m: np.ndarray
    stray_field_v_per_m: np.ndarray = field(default_factory=lambda: np.zeros(3))
    multipoles: tuple = ()
    omega_frame: float = 0.0
    external: tuple = ()

    @property
    def n_ions(self) -> int:
        return len(self.masses_kg)

    def _effective_springs(self) -> np.ndarray:
        k = self.spring_n_per_m.copy()
        k[:, :2] -= (self.masses_kg * self.omega_frame**2)[:, None]
        return k

    def energy(self, r: np.ndarray) -> float:
        """Effective potential energy (J) at positions r (N, 3) in m."""
        k = self._effective_springs()
        e = 0.5 * np.sum(k * r * r) - np.sum(self.charges_c[:, None] * self.stray_field_v_per_m * r)
        for order, coeff in self.multipoles:
            e += np.sum(self.charges_c * mp.potential(r[:, :2], order, coeff))
        for ext in self.external:
            e += float(np.sum(self.charges_c * np.asarray(ext.potential(r))))
        d = r[:, None, :] - r[None, :, :]
        dist = np.sqrt(np.sum(d * d, axis=-1))
        iu = np.triu_indices(len(r), 1)
        qq = np.outer(self.charges_c, self.charges_c)
        e += K_COULOMB * np.sum(qq[iu] / dist[iu])
        return float(e)

    def gradient(self, r: np.ndarray) -> np.ndarray:
        """dU/dr (N, 3) in J/m."""
        k = self._effective_springs()
        g = k * r - self.charges_c[:, None] * self.stray_field_v_per_m
        for order, coeff in self.multipoles:
            g[:, :2] += self.charges_c[:, None] * mp.gradient(r[:, :2], order, coeff)
        for ext in self.external:
            g -= self.charges_c[:, None] * np.asarray(ext.field(r))
        d = r[:, None, :] - r[None, :, :]
        dist2 = np.sum(d * d, axis=-1)
        np.fill_diagonal(dist2, 1.0)
        qq = np.outer(self.charges_c, self.charges_c)
        np.fill_diagonal(qq, 0.0)
        g -= K_COULOMB * np.sum((qq / dist2**1.5)[:, :, None] * d, axis=1)
        return g

    def hessian(self, r: np.ndarray, *, centrifugal: bool = True) -> np.ndarray:
        """Hessian (3N, 3N) in J/m^2; ``centrifugal=False`` leaves out the
        -m w^2 in-plane term (the form the rotating-frame H2 needs)."""
        n = len(r)
        k = self._effective_springs() if centrifugal else self.spring_n_per_m
        h = np.zeros((n, 3, n, 3))
        for i in range(n):
            h[i, :, i, :] = np.diag(k[i])
        for order, coeff in self.multipoles:
            hm = mp.hessian(r[:, :2], order, coeff)
            for i in range(n):
                h[i, :2, i, :2] += self.charges_c[i] * hm[i]
        for ext in self.external:
            he = np.asarray(ext.hessian(r))
            for i in range(n):
                h[i, :, i, :] += self.charges_c[i] * he[i]
        eye = np.eye(3)
        for i in range(n):
            for j in range(i + 1, n):
                d = r[i] - r[j]
                dist = np.sqrt(d @ d)
                blk = K_COULOMB * self.charges_c[i] * self.charges_c[j] * (3.0 * np.outer(d, d) / dist**5 - eye / dist**3)
                h[i, :, j, :] -= blk
                h[j, :, i, :] -= blk
                h[i, :, i, :] += blk
                h[j, :, j, :] += blk
        return h.reshape(3 * n, 3 * n)


# --------------------------------------------------------------------------
# Equilibrium search
# --------------------------------------------------------------------------
def _scales(pot: Potential) -> tuple[float, float]:
    """Length and energy units for the optimiser (James 1998 length)."""
    q0 = abs(pot.charges_c[0])
    k_eff = np.min(pot._effective_springs())
    k0 = max(k_eff, 1e-3 * np.max(pot.spring_n_per_m))
    l0 = (K_COULOMB * q0 * q0 / k0) ** (1.0 / 3.0)
    return l0, k0 * l0 * l0


def _guesses(n: int, rng: np.random.Generator, n_random: int) -> list[np.ndarray]:
    """Symmetric starting configurations plus seeded random ones (scaled units)."""
    out = []
    if n == 1:
        return [np.zeros((1, 3))]
    s = 0.6 * n ** (1.0 / 3.0) + 0.5
    ang = TWO_PI * np.arange(n) / n
    out.append(np.c_[s * np.cos(ang), s * np.sin(ang), np.zeros(n)])            # one ring
    lin = np.linspace(-1, 1, n) * 0.7 * n ** 0.6
    out.append(np.c_[lin, np.zeros(n), np.zeros(n)])                               # string along x
    out.append(np.c_[np.zeros(n), np.zeros(n), lin])                               # string along z
    if n >= 4:
        a2 = TWO_PI * np.arange(n - 1) / (n - 1)
        out.append(np.r_[[[0.0, 0.0, 0.0]], np.c_[s * np.cos(a2), s * np.sin(a2), np.zeros(n - 1)]])  # (1, n-1)
    if n >= 8:
        for inner in (2, 3, 4, 5):
            if n - inner >= inner + 2:
                ai = TWO_PI * np.arange(inner) / inner
                ao = TWO_PI * np.arange(n - inner) / (n - inner)
                ri, ro = 0.45 * s, 1.1 * s
                out.append(np.r_[np.c_[ri * np.cos(ai), ri * np.sin(ai), np.zeros(inner)],
                                 np.c_[ro * np.cos(ao), ro * np.sin(ao), np.zeros(n - inner)]])
    zig = np.c_[lin, 0.3 * (-1.0) ** np.arange(n), np.zeros(n)]
    out.append(zig)
    for _ in range(n_random):
        out.append(rng.normal(scale=s, size=(n, 3)))
    # break exact symmetries so that saddles are left
    return [g + 1e-3 * rng.normal(size=g.shape) for g in out]


@dataclass
class Equilibrium:
    positions_m: np.ndarray
    energy_j: float
    found: int
    tried: int
    lower_found_once: bool


def find_equilibrium(pot: Potential, *, seed: int = 0, n_random: int | None = None,
                     start: np.ndarray | None = None) -> Equilibrium:
    """Lowest-energy equilibrium of ``pot`` from several starts.

    Parameters
    ----------
    pot : Potential
    seed : int
        Seed of the random starting configurations.
    n_random : int, optional
        Number of random starts (default 6 + N).
    start : (N, 3) array, optional
        If given, only relax from this configuration (m).

    Raises
    ------
    PhysicsError
        If the crystal is not bound (no finite minimum).
    """
    n = pot.n_ions
    keff = pot._effective_springs()
    if np.any(keff[:, 2] <= 0):
        raise PhysicsError("trap.f_axial", "the trap does not confine along z (non-positive axial curvature)")
    if np.any(keff[:, :2] <= 0):
        if pot.omega_frame > 0:
            raise PhysicsError("f_rot", "rotation faster than the radial confinement can hold (need f_rot below the radial secular frequency of every ion)")
        raise PhysicsError("trap.f_radial", "the trap does not confine in the x-y plane (non-positive radial curvature)")
    l0, e0 = _scales(pot)
    rng = np.random.default_rng(np.random.SeedSequence(seed))
    if start is not None:
        guesses = [np.asarray(start) / l0]
    else:
        guesses = _guesses(n, rng, 6 + n if n_random is None else n_random)

    def f(u):
        r = u.reshape(n, 3) * l0
        return pot.energy(r) / e0, (pot.gradient(r) * l0 / e0).ravel()

    results = []
    for g in guesses:
        with np.errstate(all="ignore"):
            try:
                u = _relax(pot, f, g, l0, e0)
            except (np.linalg.LinAlgError, ValueError, FloatingPointError):
                continue
        if u is None:
            continue
        results.append((pot.energy(u * l0), u * l0))
    if not results or not np.isfinite(min(e for e, _ in results)):
        raise PhysicsError("crystal", "the crystal is not bound in this potential (ions escape: check pinning strength against the trap curvature)")
    results.sort(key=lambda t: t[0])
    e_min, r_min = results[0]
    if np.max(np.abs(r_min)) > 1e2 * l0 * max(n, 2):
        raise PhysicsError("crystal", "the crystal is not bound in this potential (ions escape: check pinning strength against the trap curvature)")
    tol = 1e-9 * max(abs(e_min), e0)
    found = sum(1 for e, _ in results if e - e_min < tol)
    return Equilibrium(r_min, e_min, found, len(guesses), found == 1 and len(guesses) > 1)


def _relax(pot: Potential, f, g: np.ndarray, l0: float, e0: float):
    """Minimise from guess ``g`` (scaled units); leave saddles along a
    negative curvature. Returns None when the ions run away."""
    from scipy.optimize import minimize

    n = pot.n_ions
    bound = 1e3 * max(n, 2)
    u = g
    for attempt in range(4):
        res = minimize(f, u.ravel(), jac=True, method="BFGS", options={"gtol": 1e-10, "maxiter": 20000})
        u = res.x.reshape(n, 3)
        if not np.all(np.isfinite(u)) or np.max(np.abs(u)) > bound:
            return None
        u = _polish(pot, u, l0, e0)
        if not np.all(np.isfinite(u)):
            return None
        h = pot.hessian(u * l0) * l0 * l0 / e0
        w, v = np.linalg.eigh(h)
        if w[0] > -1e-7 * max(1.0, abs(w[-1])):
            return u
        u = u + 0.05 * v[:, 0].reshape(n, 3)
    return u


def _polish(pot: Potential, u: np.ndarray, l0: float, e0: float, iters: int = 8) -> np.ndarray:
    """Newton steps with a pseudo-inverse Hessian (handles the rotation zero mode)."""
    n = pot.n_ions
    for _ in range(iters):
        r = u * l0
        g = pot.gradient(r).ravel() * l0 / e0
        if np.max(np.abs(g)) < 1e-14:
            break
        h = pot.hessian(r) * l0 * l0 / e0
        w, v = np.linalg.eigh(h)
        if w[0] < -1e-9 * abs(w[-1]):
            break  # not near a minimum; let the caller handle it
        keep = w > 1e-10 * abs(w[-1])
        step = v[:, keep] @ ((v[:, keep].T @ g) / w[keep])
        u = u - step.reshape(n, 3)
    return u


# --------------------------------------------------------------------------
# Normal modes
# --------------------------------------------------------------------------
@dataclass
class Modes:
    """Normal modes about an equilibrium (lab frame or rotating frame).

    Attributes
    ----------
    omega : (M,) angular frequencies, rad/s (ascending)
    e_q, e_p : (M, 6N) phase-space vectors in (xi, pi) coordinates, with
        e_q^T J e_p = 1 (see module docstring).
    labels, kinds, planes : lists of str
        ``kinds``: "com" or "differential"; ``planes``: "in-plane" /
        "out-of-plane"; ``labels``: descriptive ("com-x", "libration", ...).
    """

    omega: np.ndarray
    e_q: np.ndarray
    e_p: np.ndarray
    labels: list
    kinds: list
    planes: list

    @property
    def freq_hz(self) -> np.ndarray:
        return self.omega / TWO_PI

    def project(self, dxi: np.ndarray, dpi: np.ndarray) -> np.ndarray:
        """Mode energies over hbar w_k: E_k / (hbar w_k) for deviations.

        Parameters
        ----------
        dxi, dpi : (..., 3N) arrays
            Mass-weighted deviations sqrt(m) dr and canonical momenta dp/sqrt(m).

        Returns
        -------
        (..., M) array: E_k / (hbar w_k) (subtract 1/2 for phonon numbers
        under Wigner sampling).
        """
        q, p = self.normal_coordinates(dxi, dpi)
        return 0.5 * (q * q + p * p) / HBAR

    def normal_coordinates(self, dxi: np.ndarray, dpi: np.ndarray):
        """Normal coordinates (Q_k, P_k), each (..., M), in sqrt(J s)."""
        n3 = dxi.shape[-1]
        eqx, eqp = self.e_q[:, :n3], self.e_q[:, n3:]
        epx, epp = self.e_p[:, :n3], self.e_p[:, n3:]
        # Q = zeta^T J e_P = xi . epp - pi . epx ; P = -(xi . eqp - pi . eqx)
        if dxi.ndim == 2:  # per trajectory, whatever the batch (rows_dot)
            return (rows_dot(dxi, epp.T) - rows_dot(dpi, epx.T), -(rows_dot(dxi, eqp.T) - rows_dot(dpi, eqx.T)))
        return dxi @ epp.T - dpi @ epx.T, -(dxi @ eqp.T - dpi @ eqx.T)


def rows_dot(a: np.ndarray, b: np.ndarray) -> np.ndarray:
    """a (T, K) @ b (K, M), each row summed over K in the same order whatever
    T, so that a trajectory's numbers do not depend on how many are measured
    with it (a BLAS product may split the sum differently for another T)."""
    out = a[:, :1] * b[:1, :]
    for k in range(1, a.shape[1]):
        out += a[:, k:k + 1] * b[k:k + 1, :]
    return out


def normal_modes(pot: Potential, r0: np.ndarray, *, zero_tol: float = 1e-6) -> Modes:
    """Gyroscopic normal modes of the crystal at equilibrium ``r0``.

    Uses the symplectic eigenproblem of the rotating-frame quadratic
    Hamiltonian (module docstring); for ``omega_frame = 0`` this reduces to
    the mass-weighted Hessian's eigenproblem.

    Raises
    ------
    PhysicsError
        If a mode frequency is not real (the equilibrium is not stable), with
        the mode named.
    """
    n = pot.n_ions
    n3 = 3 * n
    w = pot.omega_frame
    msq = np.repeat(np.sqrt(pot.masses_kg), 3)
    kmw = pot.hessian(r0, centrifugal=False) / np.outer(msq, msq)
    # L_z coupling: -w (xi_x pi_y - xi_y pi_x) = -w xi^T C pi
    c = np.zeros((n3, n3))
    for i in range(n):
        c[3 * i, 3 * i + 1] = 1.0
        c[3 * i + 1, 3 * i] = -1.0
    a = np.block([[kmw, -w * c], [-w * c.T, np.eye(n3)]])
    jm = np.block([[np.zeros((n3, n3)), np.eye(n3)], [-np.eye(n3), np.zeros((n3, n3))]])
    scale = np.sqrt(np.max(np.abs(np.linalg.eigvalsh(kmw - w * w * _inplane(n)))) + w * w)  # rad/s
    ja = jm @ a / scale
    # Rotation about z (about the centre of mass) is a zero mode when nothing
    # breaks the rotational symmetry; it forms a Jordan block (angle, L_z)
    # whose eigenvalues rounding would split into +-sqrt(eps). Project it out
    # symplectically: Z = span{g1, g2} with g1 the rotation generator and
    # J A g2 = g1; P removes Z along its symplectic complement.
    rc = r0 - np.sum(pot.masses_kg[:, None] * r0, axis=0) / np.sum(pot.masses_kg)
    xi0 = (np.sqrt(pot.masses_kg)[:, None] * rc)
    rot = np.zeros_like(xi0)
    rot[:, 0], rot[:, 1] = -xi0[:, 1], xi0[:, 0]
    g1 = np.concatenate([rot.ravel(), (-w * xi0 * np.array([1.0, 1.0, 0.0])).ravel()])
    tang = rot.ravel()
    # symmetric about the centre of mass: no multipole, isotropic in-plane
    # springs, no in-plane stray field unless every ion has the same Q/m (it
    # then only shifts the crystal); decided from the potential, not from
    # rounding-limited numbers
    symmetric = (np.linalg.norm(tang) > 0 and not any(c != 0 for _, c in pot.multipoles) and not pot.external
                 and np.array_equal(pot.spring_n_per_m[:, 0], pot.spring_n_per_m[:, 1])
                 and (not np.any(pot.stray_field_v_per_m[:2]) or np.ptp(pot.charges_c / pot.masses_kg) == 0))
    if symmetric:
        g2 = np.linalg.lstsq(ja, g1, rcond=None)[0]
        s12 = g1 @ jm @ g2
        if abs(s12) > 1e-12 * np.linalg.norm(g1) * np.linalg.norm(g2):
            proj = np.eye(2 * n3) - (np.outer(g1, jm @ g2) - np.outer(g2, jm @ g1)) / s12
            # rows: z -> z - (w(z,g2) g1 - w(z,g1) g2)/w(g1,g2), w(a,b) = a^T J b
            proj = np.eye(2 * n3) - (np.outer(g1, g2 @ jm.T) - np.outer(g2, g1 @ jm.T)) / s12
            ja = ja @ proj
    lam, vec = np.linalg.eig(ja)
    unstable = np.abs(lam.real) > 1e-6
    if np.any(unstable):
        k = int(np.argmax(np.abs(lam.real)))
        v = vec[:n3, k]
        plane = "out-of-plane" if np.sum(np.abs(v[2::3]) ** 2) > 0.5 * np.sum(np.abs(v) ** 2) else "in-plane"
        why = ("the planar crystal is not stable against tilting out of the plane at this rotation (raise the axial confinement or lower f_rot)"
               if plane == "out-of-plane" else "the crystal is not bound at this rotation (an in-plane mode has imaginary frequency)")
        raise PhysicsError("crystal", f"unstable {plane} mode (growth rate {abs(lam[k].real) * scale / TWO_PI:.4g} Hz): {why}")
    om = lam.imag
    sel = om > zero_tol
    om, vec = om[sel] * scale, vec[:, sel]
    order = np.argsort(om)
    om, vec = om[order], vec[:, order]
    # orthonormalise with the Krein form within (near-)degenerate clusters
    eqs, eps_ = [], []
    i = 0
    while i < len(om):
        j = i + 1
        while j < len(om) and om[j] - om[i] < 1e-7 * om[i]:
            j += 1
        v = vec[:, i:j]
        g = -1j * (v.conj().T @ jm @ v)  # positive for positive-energy modes
        g = 0.5 * (g + g.conj().T)
        ev, evec = np.linalg.eigh(g)
        if np.any(ev <= 0):
            raise PhysicsError("crystal", "a mode has negative energy in the rotating frame; the rotating equilibrium is not a minimum")
        v = v @ evec / np.sqrt(ev)
        for k in range(v.shape[1]):
            vk = v[:, k]
            eqs.append(np.sqrt(2.0) * vk.real)
            eps_.append(np.sqrt(2.0) * vk.imag)
        i = j
    e_q, e_p = np.array(eqs), np.array(eps_)
    labels, kinds, planes = _label_modes(pot, r0, e_q, e_p, om)
    return Modes(om, e_q.reshape(len(om), 2 * n3), e_p.reshape(len(om), 2 * n3), labels, kinds, planes)


def _inplane(n: int) -> np.ndarray:
    p = np.zeros(3 * n)
    p[0::3] = p[1::3] = 1.0
    return np.diag(p)


def _label_modes(pot: Potential, r0: np.ndarray, e_q: np.ndarray, e_p: np.ndarray, om: np.ndarray):
    n = pot.n_ions
    n3 = 3 * n
    sm = np.sqrt(pot.masses_kg)
    com = np.zeros((3, n3))
    for u in range(3):
        com[u, u::3] = sm / np.linalg.norm(sm)
    tang = np.zeros(n3)
    tang[0::3] = -r0[:, 1] * sm
    tang[1::3] = r0[:, 0] * sm
    tn = np.linalg.norm(tang)
    labels, kinds, planes = [], [], []
    for k in range(len(om)):
        # displacement pattern of the mode: the xi parts of e_q and e_p
        x = np.stack([e_q[k, :n3], e_p[k, :n3]])
        nrm = np.sum(x * x)
        zfrac = np.sum(x[:, 2::3] ** 2) / nrm
        plane = "out-of-plane" if zfrac > 0.5 else "in-plane"
        comfrac = np.sum((x @ com.T) ** 2) / nrm
        libfrac = np.sum((x @ tang) ** 2) / (tn * tn * nrm) if tn > 0 else 0.0
        if comfrac > 0.5:
            kind = "com"
            axis = "z" if plane == "out-of-plane" else "xy"
            label = f"com-{axis}"
        else:
            kind = "differential"
            label = "libration" if libfrac > 0.5 else plane
        labels.append(label)
        kinds.append(kind)
        planes.append(plane)
    # number repeated labels
    counts = {lab: labels.count(lab) for lab in labels}
    seen: dict = {}
    for i, lab in enumerate(labels):
        if counts[lab] > 1:
            seen[lab] = seen.get(lab, 0) + 1
            labels[i] = f"{lab}-{seen[lab]}"
    return labels, kinds, planes


# --------------------------------------------------------------------------
# High-level: a crystal from a model
# --------------------------------------------------------------------------
@dataclass
class Crystal:
    """Equilibrium crystal, its modes and rotor quantities.

    All arrays SI; frequencies in Hz where the name says so.
    """

    positions_m: np.ndarray
    masses_kg: np.ndarray
    charges_c: np.ndarray
    energy_j: float
    f_rot_hz: float
    modes: Modes
    potential: Potential
    warnings: list = field(default_factory=list)

    @property
    def moment_of_inertia_kg_m2(self) -> float:
        """I_z about the trap axis (includes centrifugal stretch at f_rot)."""
        r = self.positions_m
        return float(np.sum(self.masses_kg * (r[:, 0] ** 2 + r[:, 1] ** 2)))

    @property
    def hbar_over_I_hz(self) -> float:
        """hbar / (2 pi I), Hz."""
        return HBAR / (TWO_PI * self.moment_of_inertia_kg_m2)

    @property
    def L_hbar(self) -> float:
        """Angular momentum I w / hbar at f_rot (rigid rotation)."""
        return self.moment_of_inertia_kg_m2 * TWO_PI * self.f_rot_hz / HBAR

    def nearest_distances_m(self) -> np.ndarray:
        r = self.positions_m
        if len(r) < 2:
            return np.zeros(len(r))
        d = np.sqrt(np.sum((r[:, None] - r[None]) ** 2, axis=-1))
        np.fill_diagonal(d, np.inf)
        return d.min(axis=1)


def virial_ratio(pot: Potential, r: np.ndarray) -> float:
    """Coulomb energy / (2 x trap energy); 1 at an equilibrium of a pure
    harmonic trap (common practice, no source)."""
    trap = 0.5 * np.sum(pot._effective_springs() * r * r)
    coul = pot.energy(r) - trap
    return coul / (2.0 * trap)


def compute_crystal(pot: Potential, f_rot_hz: float = 0.0, *, seed: int = 0,
                    start: np.ndarray | None = None) -> Crystal:
    """Equilibrium and normal modes of ``pot`` in a frame rotating at f_rot_hz.

    ``pot.omega_frame`` is overridden by ``2 pi f_rot_hz``.
    """
    from dataclasses import replace

    if abs(f_rot_hz) < SLOW_ROTATION_HZ:
        # below ~1 hbar of L for any crystal here: the lab frame, where the
        # nearly degenerate rotating-frame pairs (split by 2 w) are not
        # resolvable in double precision
        f_rot_hz = 0.0
    pot = replace(pot, omega_frame=TWO_PI * f_rot_hz)
    eq = find_equilibrium(pot, seed=seed, start=start)
    modes = normal_modes(pot, eq.positions_m)
    warn = []
    if eq.lower_found_once:
        warn.append(f"the lowest-energy configuration was reached from only 1 of {eq.tried} starts; a lower one may exist")
    for w in warn:
        warnings.warn(w, stacklevel=2)
    return Crystal(eq.positions_m, pot.masses_kg, pot.charges_c, eq.energy_j, f_rot_hz, modes, pot, warn)


# --------------------------------------------------------------------------
# From a config
# --------------------------------------------------------------------------
def model_potential(cfg, f_rot_hz: float = 0.0, *, theta_rad: float = 0.0, pin_scale=None) -> Potential:
    """The static potential of a config's crystal (SI).

    Parameters
    ----------
    cfg : mdrotor.config.Config
    f_rot_hz : float
        Frame rotation (0: lab frame). When non-zero the in-plane anisotropy
        is rotation-averaged and the stray field dropped (both rotate in that
        frame; see module docstring); the pinning co-rotates.
    theta_rad : float
        Pinning orientation.
    pin_scale : sequence of float, optional
        Multiplier per pinning term (schedule value); default 1.
    """
    m, q = cfg.masses_kg, cfg.charges_c
    k = cfg.trap.spring_constants(m, q)
    stray = np.array(cfg.trap.stray_field_v_per_m, dtype=float)
    if f_rot_hz != 0.0:
        k[:, :2] = k[:, :2].mean(axis=1, keepdims=True)
        stray = np.zeros(3)
    scales = [1.0] * len(cfg.pinning) if pin_scale is None else list(pin_scale)
    mults = tuple((t.order, s * t.complex_coefficient(theta_rad)) for t, s in zip(cfg.pinning, scales)
                  if s * t.strength != 0.0 and t.layout is None)
    external = ()
    for t, s in zip(cfg.pinning, scales):
        if t.layout is not None:  # the electrodes' whole potential, every fitted order
            from .electrodes.dynamics import PolynomialPotential

            external += (PolynomialPotential(t.layout.exps, t.layout.coefficients(theta_rad + t.angle_rad, s)),)
    return Potential(m, q, k, stray, mults, TWO_PI * f_rot_hz, external)


def crystal_from_config(cfg, f_rot_hz: float | None = None) -> Crystal:
    """Equilibrium and modes of the config's crystal at ``f_rot_hz``
    (default: the rotation at t = 0, ``rotation.f_start``), with the
    pinning at full configured strength and angle."""
    f = cfg.f_start_hz if f_rot_hz is None else float(f_rot_hz)
    w2 = cfg.trap.omega_sq(cfg.masses_kg, cfg.charges_c)
    if f != 0.0 and TWO_PI * abs(f) >= np.sqrt(np.min(w2[:, :2])):
        raise PhysicsError("f_rot", f"rotation at {f:g} Hz is faster than the radial confinement can hold "
                           f"(lowest radial secular frequency {np.sqrt(np.min(w2[:, :2])) / TWO_PI:.6g} Hz)", cfg.source)
    try:
        return compute_crystal(model_potential(cfg, f), f, seed=cfg.search_seed)
    except PhysicsError as e:
        raise e.with_source(cfg.source)
