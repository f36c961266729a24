"""Is a crystal's equilibrium stable? The one owner of that verdict, with the
zero modes of the potential's continuous symmetries set aside first.

The quadratic Hamiltonian about an equilibrium (:mod:`mdrotor.physics.statics`,
module docstring) is H2 = 1/2 zeta^T A zeta in mass-weighted phase-space
coordinates zeta = (xi, pi), with

    A = [[K, -w C], [-w C^T, 1]],

K the mass-weighted Hessian without the centrifugal term, w the frame's
rotation rate and C the L_z coupling. The motion is d zeta/dt = J A zeta.

Symmetries
----------
When turning every ion about an axis a through a point p leaves the energy
unchanged, the generator g = (sqrt(m_i) a x (r_i - p), a x pi_0i) of that
turn satisfies J A g = 0: the crystal's orientation about a is a zero mode,
paired with its conjugate momentum g' (J A g' = g, the angular momentum
about a) in a 2 x 2 Jordan block. Rounding splits such a block into
eigenvalues of size sqrt(eps) times the mode scale, of either sign, which a
test on the eigenvalues of J A reads as a growth rate (a few hundred Hz on a
MHz crystal, depending on the machine's linear-algebra library). So the
symmetries are found first, from the potential itself and not from the
config: the candidate axes are x, y and z through the trap centre (the
origin) and through the centre of mass (only z in a rotating frame, whose
own rotation is about z); an axis counts when turning a randomly displaced
copy of the crystal by two finite, incommensurate angles changes the energy
by less than :data:`SYMMETRY_REL` of the energy's scale (the sum of the
magnitudes of its terms; rounding leaves ~1e-15, a pinning or anisotropy
that matters leaves more than 1e-9). A generator that moves the crystal by
less than :data:`mdrotor.physics.frame.AXIS_REL` of its size (a string turned
about its own axis) is no zero mode.

The pairs (g, g') span a symplectic subspace Z; its symplectic complement S
(z with g^T J z = g'^T J z = 0) is invariant under J A and carries every
other mode (Arnold, Mathematical Methods of Classical Mechanics, 2nd ed.
1989, section 41 and appendix 6, from memory). The stability test and the
modes work on S only.

Stability
---------
The equilibrium is a stable minimum with every mode of positive energy
exactly when A restricted to S is positive definite: the energy H2 is then
a Lyapunov function (Lagrange-Dirichlet), and a positive-definite quadratic
Hamiltonian has real frequencies and a symplectic diagonalisation
(Williamson's theorem, Arnold appendix 6). This is judged on the symmetric
matrix B^T A B (B an orthonormal basis of S) in units where A is of order
one (time in units of 1/s, s the largest mode scale): a backward-stable
symmetric eigensolver gives its eigenvalues to a few eps times the largest
whatever the machine, library or thread count, so

* lowest eigenvalue below -:data:`UNSTABLE_REL` x the largest: unstable,
  named by the mode's plane, with its growth rate;
* otherwise stable. A direction within +-:data:`UNSTABLE_REL` x the
  largest (a frequency below 1e-6 of the mode scale) is flat within what
  the arithmetic resolves: a neutral direction that no symmetry explains
  (two identical ions under an odd multipole, whose relaxed energy does not
  depend on their angle; a structural threshold met exactly). There A z = 0,
  so z is a zero mode of J A too: it is set aside with the symmetries,
  neither listed as a mode nor called unstable.

An equilibrium whose A is indefinite but whose frequencies are all real (a
maximum of the rotating-frame potential held by the Coriolis force) is
refused as well: its negative-energy modes have no thermal state to sample.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from mdrotor.errors import PhysicsError
from mdrotor.physics import multipole as mp
from mdrotor.physics.constants import K_COULOMB
from mdrotor.physics.frame import AXIS_REL

TWO_PI = 2.0 * np.pi
#: Energy change, relative to the sum of the magnitudes of the energy's
#: terms, below which a turn about an axis counts as a symmetry.
SYMMETRY_REL = 1e-10
#: Curvatures of A on S (units of the largest) below -UNSTABLE_REL: unstable;
#: within +-UNSTABLE_REL: flat within the resolution (a frequency below 1e-6
#: of the mode scale), set aside. The Hessian's entries and the symmetric
#: eigensolver carry a few eps (1e-16) of the largest, 1000 times less. Met
#: in practice: two identical ions under an order-3 multipole, whose turn is
#: flat but for rounding and a far higher-order ripple, 1.3e-13 (it would be
#: sampled as a 1 Hz mode); the intershell rotation of a 20-ion planar
#: cluster at f_axial / f_radial = 30, a true mode at 73 Hz, 6e-12.
UNSTABLE_REL = 1e-12
#: The two finite angles (rad) of the symmetry test: incommensurate with pi,
#: so that no crystal or multipole symmetry of finite order passes them.
SYMMETRY_ANGLES = (0.7390851332, 2.2360679775)
_AXES = np.eye(3)


@dataclass
class Reduced:
    """H2 restricted to the symplectic complement of the symmetry zero modes.

    Coordinates are scaled so that A is of order one: x' = sqrt(s) xi,
    p' = pi / sqrt(s) (a symplectic change), H2 = s/2 zeta'^T A' zeta'.

    Attributes
    ----------
    scale : float
        s, rad/s (time unit 1/s).
    a : (2n3, 2n3) array
        A' in the scaled coordinates.
    basis : (2n3, m) array
        Orthonormal basis B of S (scaled coordinates).
    generators : (2n3, k) array
        The zero-mode generators g set aside (scaled coordinates),
        orthonormal: the symmetries' turns, then the neutral directions.
    curvatures : (m,) array
        Eigenvalues of B^T A' B, ascending.
    n_neutral : int
        Directions flat within the resolution that no symmetry explains,
        set aside with the symmetries (module docstring).
    axes : tuple of str
        The symmetric turns ("x", "y", "z") that move the crystal.
    """

    scale: float
    a: np.ndarray
    basis: np.ndarray
    generators: np.ndarray
    curvatures: np.ndarray
    n_neutral: int = 0
    axes: tuple = ()

    @property
    def n_symmetries(self) -> int:
        """Zero modes of the potential's symmetries set aside."""
        return self.generators.shape[1] - self.n_neutral

    def to_original(self, z: np.ndarray) -> np.ndarray:
        """Phase-space vectors (rows ... or columns, first axis 2n3) from
        scaled to original (xi, pi) coordinates."""
        n3 = z.shape[0] // 2
        d = np.r_[np.full(n3, 1.0 / np.sqrt(self.scale)), np.full(n3, np.sqrt(self.scale))]
        return z * (d[:, None] if z.ndim == 2 else d)


def coupling_matrix(n: int) -> np.ndarray:
    """C with xi^T C pi = sum_i (xi_x pi_y - xi_y pi_x) (3n x 3n)."""
    c = np.zeros((3 * n, 3 * n))
    for i in range(n):
        c[3 * i, 3 * i + 1] = 1.0
        c[3 * i + 1, 3 * i] = -1.0
    return c


def symplectic_j(n3: int) -> np.ndarray:
    return np.block([[np.zeros((n3, n3)), np.eye(n3)], [-np.eye(n3), np.zeros((n3, n3))]])


def _energy_scale(pot, r: np.ndarray) -> float:
    """Sum of the magnitudes of the energy's terms at r (J): the size the
    rounding of pot.energy is relative to."""
    k = pot._effective_springs()
    s = 0.5 * np.sum(np.abs(k) * r * r) + np.sum(np.abs(pot.charges_c[:, None] * pot.stray_field_v_per_m * r))

    for order, coeff in pot.multipoles:
        s += np.sum(np.abs(pot.charges_c * mp.potential(r[:, :2], order, coeff)))
    for ext in pot.external:
        s += float(np.sum(np.abs(pot.charges_c * np.asarray(ext.potential(r)))))
    d = np.sqrt(np.sum((r[:, None, :] - r[None, :, :]) ** 2, axis=-1))
    iu = np.triu_indices(len(r), 1)

    s += K_COULOMB * np.sum(np.abs(np.outer(pot.charges_c, pot.charges_c)[iu]) / d[iu])
    return float(s)


def _turn(r: np.ndarray, axis: np.ndarray, pivot: np.ndarray, angle: float) -> np.ndarray:
    """Positions turned by ``angle`` about ``axis`` through ``pivot`` (Rodrigues)."""
    a = axis / np.linalg.norm(axis)
    x = r - pivot
    c, s = np.cos(angle), np.sin(angle)
    return pivot + x * c + np.cross(a, x) * s + np.outer(x @ a, a) * (1.0 - c)


def symmetry_axes(pot, r0: np.ndarray) -> list:
    """The (axis, pivot) pairs about which a turn leaves ``pot`` unchanged
    (module docstring). At most one pivot per axis (the origin first)."""
    r0 = np.asarray(r0, dtype=float)
    n = len(r0)
    if n < 2:
        return []
    dist = np.sqrt(np.sum((r0[:, None] - r0[None]) ** 2, axis=-1)) + np.diag(np.full(n, np.inf))
    spacing = float(np.min(dist))
    # a fixed displacement (the test must not depend on a caller's seed)
    rng = np.random.default_rng(np.random.SeedSequence(20261202))
    r1 = r0 + 0.1 * spacing * rng.uniform(-1.0, 1.0, size=r0.shape)
    e1 = pot.energy(r1)
    floor = SYMMETRY_REL * _energy_scale(pot, r1)
    com = np.sum(pot.masses_kg[:, None] * r0, axis=0) / np.sum(pot.masses_kg)
    axes = [2] if pot.omega_frame != 0.0 else [0, 1, 2]
    found = []
    for ax in axes:
        for pivot in (np.zeros(3), com):
            if all(abs(pot.energy(_turn(r1, _AXES[ax], pivot, t)) - e1) <= floor for t in SYMMETRY_ANGLES):
                found.append((_AXES[ax].copy(), pivot.copy()))
                break
    return found


def turn_directions(pot, r: np.ndarray) -> np.ndarray:
    """Orthonormal displacement directions (3N, k) of the symmetric turns
    that move the crystal at ``r`` (plain, not mass-weighted, positions):
    the directions along which the energy is flat by symmetry, which the
    equilibrium search's Newton steps leave alone."""

    r = np.asarray(r, dtype=float)
    axes = symmetry_axes(pot, r)
    if not axes:
        return np.zeros((r.size, 0))
    g = np.array([np.cross(a, r - p).ravel() for a, p in axes]).T
    com = np.sum(pot.masses_kg[:, None] * r, axis=0) / np.sum(pot.masses_kg)
    size = np.sqrt(np.sum((r - com) ** 2))
    u, sv, _ = np.linalg.svd(g, full_matrices=False)
    return u[:, sv > AXIS_REL * size]


def _generators(pot, r0: np.ndarray, axes: list, scale: float) -> tuple[np.ndarray, tuple]:
    """Orthonormal zero-mode generators (scaled coordinates), one per
    independent symmetric turn that moves the crystal, and the axes of those turns."""

    n = len(r0)
    n3 = 3 * n
    if not axes:
        return np.zeros((2 * n3, 0)), ()
    sm = np.sqrt(pot.masses_kg)[:, None]
    w = pot.omega_frame
    pi0 = sm * w * np.cross(np.array([0.0, 0.0, 1.0]), r0)  # canonical momenta at rest in the frame
    com = np.sum(pot.masses_kg[:, None] * r0, axis=0) / np.sum(pot.masses_kg)
    size = np.sqrt(scale * np.sum(pot.masses_kg[:, None] * (r0 - com) ** 2))  # |generator| of a generic turn
    cols, moved = [], []
    for a, p in axes:
        gx = sm * np.cross(a, r0 - p)
        gp = np.cross(a, pi0)
        col = np.r_[np.sqrt(scale) * gx.ravel(), gp.ravel() / np.sqrt(scale)]
        if np.linalg.norm(col) > AXIS_REL * size:
            cols.append(col)
            moved.append("xyz"[int(np.argmax(a))])
    if not cols:
        return np.zeros((2 * n3, 0)), ()
    u, sv, _ = np.linalg.svd(np.array(cols).T, full_matrices=False)
    return u[:, sv > AXIS_REL * size], tuple(moved)


def reduce(pot, r0: np.ndarray) -> Reduced:
    """H2 about ``r0`` restricted to the complement of the symmetry zero modes."""
    r0 = np.asarray(r0, dtype=float)
    n = pot.n_ions
    n3 = 3 * n
    w = pot.omega_frame
    msq = np.repeat(np.sqrt(pot.masses_kg), 3)
    kmw = pot.hessian(r0, centrifugal=False) / np.outer(msq, msq)
    inplane = np.zeros(n3)
    inplane[0::3] = inplane[1::3] = 1.0
    scale = float(np.sqrt(np.max(np.abs(np.linalg.eigvalsh(kmw - w * w * np.diag(inplane)))) + w * w))
    c = coupling_matrix(n)
    a = np.block([[kmw / scale**2, -(w / scale) * c], [-(w / scale) * c.T, np.eye(n3)]])
    a = 0.5 * (a + a.T)
    jm = symplectic_j(n3)
    g1, moved = _generators(pot, r0, symmetry_axes(pot, r0), scale)
    basis, curv = _complement(a, jm, g1)
    top = float(curv[-1])
    soft = (curv >= -UNSTABLE_REL * top) & (curv <= UNSTABLE_REL * top)
    n_neutral = int(np.sum(soft))
    if n_neutral:
        # flat within the resolution but no symmetry (two identical ions
        # under an odd multipole): A z = 0 there, so z is a zero mode of J A
        # as well; set it aside with the symmetries
        ar = basis.T @ a @ basis
        _, v = np.linalg.eigh(0.5 * (ar + ar.T))
        g1 = np.linalg.qr(np.hstack([g1, basis @ v[:, soft]]))[0]
        basis, curv = _complement(a, jm, g1)
    return Reduced(scale, a, basis, g1, curv, n_neutral, moved)


def _complement(a: np.ndarray, jm: np.ndarray, g1: np.ndarray):
    """Orthonormal basis of the symplectic complement of the zero modes g1
    and their conjugates (J A g2 = g1), and the curvatures of A on it."""
    n = a.shape[0]
    if g1.shape[1]:
        ja = jm @ a
        g2, *_ = np.linalg.lstsq(ja, g1, rcond=None)
        z = np.hstack([g1, g2])
        gram = z.T @ jm @ z
        if np.linalg.svd(gram, compute_uv=False)[-1] < 1e-8 * np.linalg.norm(z, 2) ** 2:
            raise PhysicsError("crystal", "a zero mode has no conjugate momentum (the equilibrium is degenerate in a way "
                                          "the mode analysis does not handle)")
        _, _, vt = np.linalg.svd(z.T @ jm)
        basis = vt[z.shape[1]:].T
    else:
        basis = np.eye(n)
    ar = basis.T @ a @ basis
    return basis, np.linalg.eigvalsh(0.5 * (ar + ar.T))


def judge(pot, r0: np.ndarray, red: Reduced | None = None) -> Reduced:
    """Raise :class:`PhysicsError` unless the equilibrium ``r0`` of ``pot`` is
    stable (module docstring); return the reduction."""
    red = reduce(pot, r0) if red is None else red
    lam = red.curvatures
    top = float(lam[-1])
    rotating = pot.omega_frame != 0.0
    if lam[0] >= -UNSTABLE_REL * top:
        return red
    ar = red.basis.T @ red.a @ red.basis
    _, vecs = np.linalg.eigh(0.5 * (ar + ar.T))
    v = red.basis @ vecs[:, 0]
    n3 = len(v) // 2
    x = v[:n3]
    plane = "out-of-plane" if np.sum(x[2::3] ** 2) > 0.5 * np.sum(x * x) else "in-plane"
    om_r = red.basis.T @ symplectic_j(n3) @ red.basis
    lam_m = np.linalg.eigvals(-np.linalg.solve(om_r, ar))
    growth = float(np.max(np.abs(lam_m.real)))
    where = " at this rotation" if rotating else ""
    if growth <= 1e-6 * float(np.max(np.abs(lam_m))):
        raise PhysicsError("crystal", f"a {plane} mode has negative energy{where}: the equilibrium is a maximum of the "
                                      "rotating-frame potential held only by the Coriolis force, not a minimum")
    if plane == "out-of-plane":
        why = (f"the planar crystal is not stable against tilting out of the plane{where} (raise the axial confinement"
               + (" or lower f_rot)" if rotating else ")"))
    else:
        why = (f"the crystal is not bound{where} (an in-plane mode has imaginary frequency)" if rotating
               else "the configuration is a saddle, not a minimum (an in-plane mode has imaginary frequency)")
    raise PhysicsError("crystal", f"unstable {plane} mode (growth rate {growth * red.scale / TWO_PI:.4g} Hz): {why}")


def modes(red: Reduced) -> tuple[np.ndarray, np.ndarray]:
    """Frequencies (rad/s, ascending) and complex eigenvectors (2n3, M) of
    J A with eigenvalue +i w, in original (xi, pi) coordinates, for a
    reduction that passed :func:`judge`.

    On S, H2 = s/2 y^T A_r y with the form om_r = B^T J B, so dy/dt =
    -s om_r^-1 A_r y; with A_r = L L^T and u = L^T y the generator becomes
    the real antisymmetric K = -L^T om_r^-1 L, whose Hermitian i K a
    symmetric eigensolver diagonalises (eigenvalues -+w/s).
    """
    b = red.basis
    n3 = b.shape[0] // 2
    ar = b.T @ red.a @ b
    ar = 0.5 * (ar + ar.T)
    om_r = b.T @ symplectic_j(n3) @ b
    chol = np.linalg.cholesky(ar)
    k = -chol.T @ np.linalg.solve(om_r, chol)
    k = 0.5 * (k - k.T)
    nu, u = np.linalg.eigh(1j * k)
    m = len(nu) // 2
    # K u = -i nu u: eigenvalue -i nu of the generator; +i w for nu = -w < 0
    om = -nu[:m][::-1] * red.scale
    u = u[:, :m][:, ::-1]
    y = np.linalg.solve(chol.T, u)
    return om, red.to_original(b @ y)


__all__ = ["SYMMETRY_REL", "UNSTABLE_REL", "SYMMETRY_ANGLES", "Reduced", "symmetry_axes", "turn_directions", "reduce", "judge", "modes",
           "coupling_matrix", "symplectic_j"]
