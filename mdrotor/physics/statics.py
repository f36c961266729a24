"""Crystal statics: equilibria in the lab and rotating frame, normal modes.

Potential energy of N ions (SI; see :mod:`mdrotor.physics.trap`, :mod:`mdrotor.physics.multipole`)::

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
turns that leave the potential unchanged (about z when nothing pins the
crystal: its angle and L_z) are zero modes; :mod:`mdrotor.physics.stability` finds
them from the potential, sets them aside and judges stability; they are
left out of the mode list (the one about z is reported as L).
"""

from __future__ import annotations

import warnings
from dataclasses import dataclass, field, replace

import numpy as np

from mdrotor.errors import PhysicsError
from mdrotor.physics import multipole as mp
from mdrotor.physics import rotor, stability
from mdrotor.physics.constants import HBAR, K_B, K_COULOMB
from mdrotor.physics.frame import on_axis
from mdrotor.physics.stability import turn_directions
from mdrotor.physics.trap import check_rotation, radial_limit_hz

SLOW_ROTATION_HZ = 10.0
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
        return self.energy_and_gradient(r)[0]

    def gradient(self, r: np.ndarray) -> np.ndarray:
        """dU/dr (N, 3) in J/m."""
        return self.energy_and_gradient(r)[1]

    def energy_and_gradient(self, r: np.ndarray) -> tuple[float, np.ndarray]:
        """Effective potential energy (J) and its gradient dU/dr (N, 3, J/m)
        at positions r (N, 3) in m, the pair distances computed once."""
        k = self._effective_springs()
        qs = self.charges_c[:, None] * self.stray_field_v_per_m
        e = 0.5 * np.sum(k * r * r) - np.sum(qs * r)
        g = k * r - qs
        for order, coeff in self.multipoles:
            e += np.sum(self.charges_c * mp.potential(r[:, :2], order, coeff))
            g[:, :2] += self.charges_c[:, None] * mp.gradient(r[:, :2], order, coeff)
        for ext in self.external:
            e += float(np.sum(self.charges_c * np.asarray(ext.potential(r))))
            g -= self.charges_c[:, None] * np.asarray(ext.field(r))
        d = r[:, None, :] - r[None, :, :]
        dist2 = np.einsum("ijk,ijk->ij", d, d)
        np.fill_diagonal(dist2, 1.0)
        qq = K_COULOMB * np.outer(self.charges_c, self.charges_c)
        np.fill_diagonal(qq, 0.0)
        inv = qq / np.sqrt(dist2)
        e += 0.5 * np.sum(inv)
        g -= np.einsum("ij,ijk->ik", inv / dist2, d)
        return float(e), g

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
        if n > 1:
            d = r[:, None, :] - r[None, :, :]
            dist2 = np.sum(d * d, axis=-1)
            np.fill_diagonal(dist2, 1.0)
            qq = K_COULOMB * np.outer(self.charges_c, self.charges_c)
            np.fill_diagonal(qq, 0.0)
            inv3 = qq / dist2**1.5
            # block (i, j): k Q_i Q_j (3 d d^T / |d|^5 - 1 / |d|^3), d = r_i - r_j
            blk = 3.0 * (inv3 / dist2)[:, :, None, None] * d[:, :, :, None] * d[:, :, None, :] - inv3[:, :, None, None] * np.eye(3)
            h -= blk.transpose(0, 2, 1, 3)
            h[np.arange(n), :, np.arange(n), :] += blk.sum(axis=1)
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
        if pot.omega_frame != 0:
            check_rotation(pot.omega_frame / TWO_PI, radial_limit_hz(pot.spring_n_per_m, pot.masses_kg), "f_rot")
        raise PhysicsError("trap.f_radial", "the trap does not confine in the x-y plane (non-positive radial curvature)")
    l0, e0 = _scales(pot)
    rng = np.random.default_rng(np.random.SeedSequence(seed))
    if start is not None:
        guesses = [np.asarray(start) / l0]
    else:
        guesses = _guesses(n, rng, 6 + n if n_random is None else n_random)

    def f(u):
        e, g = pot.energy_and_gradient(u.reshape(n, 3) * l0)
        return e / e0, (g * (l0 / e0)).ravel()

    last: dict = {}

    def hess(u):  # the trust region asks for it at the same point many times
        if last.get("u") is None or not np.array_equal(last["u"], u):
            last["u"], last["h"] = u.copy(), pot.hessian(u.reshape(n, 3) * l0) * (l0 * l0 / e0)
        return last["h"]

    bound = 1e3 * max(n, 2)
    results = []
    for g in guesses:
        with np.errstate(all="ignore"):
            try:
                u = _descend(f, hess, g, n, bound)
            except (np.linalg.LinAlgError, ValueError, FloatingPointError):
                continue
        if u is not None:
            results.append((pot.energy(u * l0), u))
    energies = [e for e, _ in results if np.isfinite(e)]
    # Polish the lowest and check that it is a minimum; a saddle (reached
    # from a symmetric start) is left along its negative curvature and
    # descended from again. A saddle lies above the minima its downhill
    # paths reach, so the first candidate that passes is the lowest minimum
    # the starts lead to. The descents stop at a gradient of 1e-7 (below,
    # the trust region stalls on the energy's rounding), which leaves their
    # energies uncertain by ~1e-8 relative for the softest modes: every
    # distinct candidate within ENERGY_CLOSE of the lowest is polished too.
    results = sorted((t for t in results if np.isfinite(t[0])), key=lambda t: t[0])
    best, seen = None, []
    while results and len(seen) < MAX_POLISHED:
        e, u = results.pop(0)
        if best is not None and e > best[0] + ENERGY_CLOSE * abs(best[0]):
            break
        if any(abs(e - x) <= ENERGY_SAME * abs(x) for x in seen):
            continue
        seen.append(e)
        with np.errstate(all="ignore"):
            try:
                u, down = _check_minimum(pot, u, l0, e0)
            except (np.linalg.LinAlgError, ValueError, FloatingPointError):
                continue
        if down is None:
            e = pot.energy(u * l0)
            if np.isfinite(e) and (best is None or e < best[0]):
                best = (e, u)
            continue
        with np.errstate(all="ignore"):
            try:
                u2 = _descend(f, hess, u + 0.05 * down, n, bound)
            except (np.linalg.LinAlgError, ValueError, FloatingPointError):
                u2 = None
        if u2 is not None and np.isfinite(e2 := pot.energy(u2 * l0)):
            results.append((e2, u2))
            results.sort(key=lambda t: t[0])
    if best is None:
        raise PhysicsError("crystal", "the crystal is not bound in this potential (ions escape: check pinning strength against the trap curvature)")
    e_min, u_min = best
    r_min = u_min * l0
    if np.max(np.abs(r_min)) > 1e2 * l0 * max(n, 2):
        raise PhysicsError("crystal", "the crystal is not bound in this potential (ions escape: check pinning strength against the trap curvature)")
    found = sum(1 for e in energies if abs(e - e_min) <= ENERGY_CLOSE * max(abs(e_min), e0))
    return Equilibrium(r_min, e_min, found, len(guesses), found == 1 and len(guesses) > 1)


#: Candidates of the equilibrium search within this relative energy of the
#: lowest are polished and compared (the descents' energies carry ~1e-8).
ENERGY_CLOSE = 1e-6
#: Candidates whose energies agree to this are one minimum.
ENERGY_SAME = 1e-10
#: At most this many candidates are polished.
MAX_POLISHED = 12


def _descend(f, hess, g: np.ndarray, n: int, bound: float):
    """Trust-region Newton descent (scipy's trust-krylov with the exact
    Hessian: a third of the quasi-Newton iterations' time, and it leaves
    saddles along their negative curvature) from ``g`` (scaled units);
    None when the ions run away."""
    from scipy.optimize import minimize

    res = minimize(f, np.asarray(g, dtype=float).ravel(), jac=True, hess=hess, method="trust-krylov",
                   options={"gtol": 1e-7, "maxiter": 500})
    u = res.x.reshape(n, 3)
    if not np.all(np.isfinite(u)) or np.max(np.abs(u)) > bound:
        return None
    return u


def _check_minimum(pot: Potential, u: np.ndarray, l0: float, e0: float):
    """Polish ``u`` by Newton steps; return (u, None) at a minimum, or
    (u, direction of negative curvature) at a saddle."""
    n = pot.n_ions
    u = _polish(pot, u, l0, e0)
    if not np.all(np.isfinite(u)):
        raise FloatingPointError
    h = pot.hessian(u * l0) * l0 * l0 / e0
    w, v = np.linalg.eigh(h)
    if w[0] > -1e-7 * max(1.0, abs(w[-1])):
        return u, None
    return u, v[:, 0].reshape(n, 3)


def _polish(pot: Potential, u: np.ndarray, l0: float, e0: float, iters: int = 12) -> np.ndarray:
    """Newton steps in the complement of the symmetries' flat directions
    (:func:`mdrotor.physics.stability.turn_directions`), so that soft modes (an
    intershell rotation) converge as well as stiff ones."""

    n = pot.n_ions
    flat = turn_directions(pot, u * l0)
    proj = np.eye(3 * n) - flat @ flat.T
    for _ in range(iters):
        r = u * l0
        g = proj @ (pot.gradient(r).ravel() * l0 / e0)
        if np.max(np.abs(g)) < 1e-15:
            break
        h = pot.hessian(r) * l0 * l0 / e0
        w, v = np.linalg.eigh(proj @ h @ proj)
        if w[0] < -1e-9 * abs(w[-1]):
            break  # not near a minimum; the caller pushes off the saddle
        keep = w > 1e-13 * abs(w[-1])
        step = v[:, keep] @ ((v[:, keep].T @ g) / w[keep])
        big = np.max(np.abs(step))
        if big > 0.1:  # stay within the quadratic basin (scaled length units)
            step *= 0.1 / big
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
    zero_axes: tuple = ()
    n_neutral: int = 0

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
        return quanta(*self.normal_coordinates(dxi, dpi))

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


def quanta(q: np.ndarray, p: np.ndarray) -> np.ndarray:
    """E_k / (hbar w_k) = (Q_k^2 + P_k^2) / (2 hbar) of normal coordinates
    (module docstring); the phonon number is this minus 1/2 under Wigner
    sampling. The one formula: :meth:`Modes.project` and the observables
    call it."""
    return 0.5 * (q * q + p * p) / HBAR


def normal_modes(pot: Potential, r0: np.ndarray) -> Modes:
    """Gyroscopic normal modes of the crystal at equilibrium ``r0``.

    The stability verdict and the zero modes of the potential's continuous
    symmetries (set aside, not listed) belong to :mod:`mdrotor.physics.stability`;
    the modes come from the symmetric eigenproblem there. Within a set of
    degenerate modes the basis is made canonical (:func:`_canonical_basis`),
    so that it, and every state sampled in it, does not depend on the
    linear-algebra library's arbitrary choice.

    Raises
    ------
    PhysicsError
        If the equilibrium is not stable, or a mode is too soft to resolve,
        with the mode named (:func:`mdrotor.physics.stability.judge`).
    """

    n3 = 3 * pot.n_ions
    red = stability.judge(pot, r0)
    om, vec = stability.modes(red)
    jm = stability.symplectic_j(n3)
    # Krein-orthonormalise within (near-)degenerate clusters, then a canonical basis
    eqs, eps_ = [], []
    i = 0
    while i < len(om):
        j = i + 1
        while j < len(om) and om[j] - om[i] < DEGENERATE_REL * om[i]:
            j += 1
        v = vec[:, i:j]
        g = -1j * (v.conj().T @ jm @ v)  # positive for positive-energy modes
        g = 0.5 * (g + g.conj().T)
        ev, evec = np.linalg.eigh(g)
        if np.any(ev <= 0):
            raise PhysicsError("crystal", "a mode has negative energy in the rotating frame; the rotating equilibrium is not a minimum")
        v = _canonical_basis(v @ evec / np.sqrt(ev), jm)
        for k in range(v.shape[1]):
            vk = v[:, k]
            eqs.append(np.sqrt(2.0) * vk.real)
            eps_.append(np.sqrt(2.0) * vk.imag)
        i = j
    e_q, e_p = np.array(eqs).reshape(len(om), 2 * n3), np.array(eps_).reshape(len(om), 2 * n3)
    labels, kinds, planes = _label_modes(pot, r0, e_q, e_p, om)
    return Modes(om, e_q, e_p, labels, kinds, planes, red.axes, red.n_neutral)


#: Modes closer than this (relative) form one degenerate set.
DEGENERATE_REL = 1e-8
# Thresholds of the canonical basis choice: odd values, so that the exact
# ratios of symmetric crystals (0, 1/2, 1/sqrt(2), ...) never sit on them.
_REF_MIN = 0.0173
_REF_NEW = 0.2371


def _canonical_basis(v: np.ndarray, jm: np.ndarray) -> np.ndarray:
    """A basis of span(v) fixed by the subspace alone, not by the given basis.

    ``v`` (2n3, d) is Krein-orthonormal (-i v^H J v = 1). Any other such
    basis is v U with U unitary, and the coefficients of the unit phase-space
    vectors e_k on the subspace, c_k = -i v^H J e_k, change to U^H c_k. The
    reference vectors are the first e_k, in coordinate order, whose
    coefficients are not small (>= _REF_MIN of the largest) and not nearly
    in the span of those already taken (a residual >= _REF_NEW of their
    size); U is chosen so that their coefficient matrix is upper triangular
    with a positive real diagonal (the QR factorisation, unique). For d = 1
    this fixes the phase.
    """
    d = v.shape[1]
    coef = -1j * (v.conj().T @ jm)  # (d, 2n3): c_k in column k
    size = np.linalg.norm(coef, axis=0)
    top = float(np.max(size))
    chosen, q = [], np.zeros((d, 0), dtype=complex)
    for k in range(coef.shape[1]):
        if size[k] < _REF_MIN * top:
            continue
        res = coef[:, k] - q @ (q.conj().T @ coef[:, k])
        nr = np.linalg.norm(res)
        if nr >= _REF_NEW * size[k]:
            chosen.append(k)
            q = np.hstack([q, (res / nr)[:, None]])
            if len(chosen) == d:
                break
    if len(chosen) < d:  # cannot happen for independent vectors; keep the given basis
        return v
    u, t = np.linalg.qr(coef[:, chosen])
    ph = np.diag(t) / np.abs(np.diag(t))
    return v @ (u * ph[None, :])


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
        """I_z about the trap axis (includes centrifugal stretch at f_rot);
        0 for one ion or ions all on the axis (:func:`mdrotor.physics.frame.on_axis`), which have no
        rotation about z (computed, I would be a rounding residue and hbar/I a meaningless rate)."""
        r = self.positions_m
        if len(r) < 2 or on_axis(r, self.masses_kg):
            return 0.0
        return float(np.sum(self.masses_kg * (r[:, 0] ** 2 + r[:, 1] ** 2)))

    @property
    def hbar_over_I_hz(self) -> float | None:
        """hbar / (2 pi I), Hz (:func:`mdrotor.physics.rotor.hbar_over_I_hz`); None
        without a rotation (one ion, ions on the axis)."""

        I = self.moment_of_inertia_kg_m2
        return float(rotor.hbar_over_I_hz(I)) if I > 0 else None

    @property
    def L_hbar(self) -> float | None:
        """Angular momentum 2 pi I f_rot / hbar of rigid rotation
        (:func:`mdrotor.physics.rotor.L_from_f_rot`); None without a rotation (one ion, ions on the axis)."""

        I = self.moment_of_inertia_kg_m2
        return float(rotor.L_from_f_rot(self.f_rot_hz, I)) if I > 0 else None

    def nearest_distances_m(self) -> np.ndarray:
        r = self.positions_m
        if len(r) < 2:
            return np.zeros(len(r))
        d = np.sqrt(np.sum((r[:, None] - r[None]) ** 2, axis=-1))
        np.fill_diagonal(d, np.inf)
        return d.min(axis=1)


def dynamic_moment_of_inertia(pot: Potential, f_rot_hz: float, *, seed: int = 0,
                              start: np.ndarray | None = None, rel_step: float = 1e-3) -> float:
    """``I_d = d(I w)/dw`` of the equilibrium rotating at ``f_rot_hz``, kg m^2.

    The slope of ``hbar L = I(w) w`` against the rate ``w``: a crystal
    stretched by its rotation has ``d f_rot / d L = hbar / (2 pi I_d)``, not
    ``hbar / (2 pi I)``, and ``I_d`` sets the spacing and width of its
    rotational lines, the relative rotation of two branches ``k`` quanta apart
    (``k hbar / I_d``) and their phase diffusion. For two ions in an
    isotropic trap ``I_d = I (1 + (4/3) w^2 / (w_r^2 - w^2))`` (orbit of a
    central force; ``tests/analysis/test_rotor_summary.py``). Central difference of
    ``I(w) w`` over ``+-rel_step`` of the rate (relative error ~rel_step^2);
    ``I`` itself at rest or below :data:`SLOW_ROTATION_HZ`, where ``I(w)`` is
    even in ``w`` and flat. 0 for a crystal without a rotation (one ion, ions
    on the axis).
    """
    f = float(f_rot_hz)

    def crystal_at(g):
        eq = find_equilibrium(replace(pot, omega_frame=TWO_PI * g), seed=seed, start=start)
        r = eq.positions_m
        if len(r) < 2 or on_axis(r, pot.masses_kg):
            return 0.0
        return float(np.sum(pot.masses_kg * (r[:, 0] ** 2 + r[:, 1] ** 2)))

    if abs(f) < SLOW_ROTATION_HZ:
        return crystal_at(0.0)
    h = rel_step * f
    return (crystal_at(f + h) * (f + h) - crystal_at(f - h) * (f - h)) / (2.0 * h)


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



#: The mode labels :func:`_label_modes` gives (numbered "<label>-<k>" when repeated).
MODE_LABELS = ("libration", "com-xy", "com-z", "in-plane", "out-of-plane")
#: Selectors of :func:`mode_occupations` besides the labels: every mode, a kind, a plane.
MODE_GROUPS = ("all", "com", "differential", "in-plane", "out-of-plane")


def occupation_selector_known(sel: str) -> bool:
    """True when ``sel`` can select a mode in :func:`mode_occupations`: a
    label of :data:`MODE_LABELS` (with or without its number), or one of
    :data:`MODE_GROUPS`."""
    base, _, k = sel.rpartition("-")
    return sel in MODE_GROUPS or sel in MODE_LABELS or (base in MODE_LABELS and k.isdigit())


def mode_occupations(modes, temperature_k: float, selectors=(), wigner: bool = True) -> np.ndarray:
    """Mean occupation n_k of every mode.

    Parameters
    ----------
    modes : mdrotor.physics.statics.Modes
    temperature_k : float
    selectors : sequence of (selector, n)
        selector is a mode label ("libration", "com-z"), a kind ("com",
        "differential"), a plane ("in-plane", "out-of-plane") or "all";
        later entries win.
    wigner : bool
        With zero-point motion the thermal n is Bose-Einstein; without it,
        the classical k_B T / (hbar w).
    """
    w = modes.omega
    if temperature_k > 0:
        x = HBAR * w / (K_B * temperature_k)
        n = 1.0 / np.expm1(x) if wigner else 1.0 / x
    else:
        n = np.zeros_like(w)
    n = n.copy()
    for sel, val in selectors:
        hit = np.array([sel in ("all", lab, kind, pl) or lab.startswith(sel + "-")
                        for lab, kind, pl in zip(modes.labels, modes.kinds, modes.planes)])
        n[hit] = val
    return n
