"""Pinning: is the crystal held by the rotating multipole, how firmly, and
against which schedule. The one owner of these facts; ``crystal``, ``run``
(its preflight and lag tracking), ``rotor`` and ``electrodes`` call it.

Moments (first order in the pinning strength)
---------------------------------------------
The order-n in-plane moment about the centre of mass,

    M_n = sum_i Q_i (z_i - z_c)^n,      z = x + i y,  z_c = sum m_i z_i / sum m_i,

sets the first-order pinning energy of the crystal turned by phi,
Re[C M_n e^{i n phi}] (:mod:`mdrotor.physics.multipole`). It counts as present when
|M_n| > :data:`MOMENT_REL` sum_i |Q_i| |z_i - z_c|^n (all moments adding
up). A regular N-gon of identical ions has M_n = 0 unless N divides n (the
sum of the N-th roots of unity raised to n; common practice, no source), a
pair of identical ions has no odd moment, ions on the axis have none.

Held curve (the relaxed crystal)
--------------------------------
A crystal without a first-order moment is still held, weakly, when the
pinning deforms it (a triangle under a quadrupole: the deformed triangle has
a moment, so its energy varies with the angle at higher order in the
strength). Rotating the equilibrium rigidly misses this: it overstates the
libration and the held acceleration. Here the curve is the minimum-energy
path: at each imposed crystal angle phi every other coordinate is relaxed.
The angle is imposed by the Eckart condition in the body frame,

    Im sum_i m_i conj(e^{i phi} w_i) z_i = 0,      w_i = z_i,0 - z_c,0,

a linear constraint on the positions (the reference w is centred, so the
centre of mass drops out); each point is a constrained minimum found by
Newton steps on the Lagrange (KKT) system, continued along phi. At a
constrained minimum grad U = lambda g, and the envelope theorem gives
dU/dphi = -tau_z exactly, tau_z = -sum_i (x_i dU/dy_i - y_i dU/dx_i) the
torque about the axis: the curve's torque comes from the gradient, without
differentiating rounded energies.

The libration frequency is sqrt(U''(phi_0) / I) / (2 pi), U'' the curve's
curvature at its minimum (central difference of the exact torque) and I
the mass-weighted path inertia sum_i m_i |dr_i/dphi|^2 (the moment of
inertia about the centre of mass plus the deformation's share; Landau and
Lifshitz, Mechanics, section 21, small oscillations of a system with one
degree of freedom, the other coordinates following adiabatically). It
equals the libration normal mode when the other modes are much faster.

Held angular acceleration: in the frame of a pinning that turns with
angular acceleration alpha, the crystal feels the pseudo-torque -I alpha
(I about the trap axis, the axis of that frame) and stays in its well while I alpha is below
the largest restoring torque between the well bottom and the barrier top:
alpha_forward (spin-up, the crystal lags) = max_{phi < phi_0} tau / I,
alpha_backward = max_{phi > phi_0} (-tau) / I.

Verdict
-------
Decided from the crystal *without* the pinning (every pinning multiplier 0,
relaxed from the pinned crystal), so that the pinning's own deformation
cannot fake a moment:

* ``pinned``: a pinning term of order n finds M_n on it (first order); the
  lowest such n is the order;
* ``deformation``: no first-order moment, but the relaxed curve holds
  (largest restoring torque above :data:`HELD_REL` of the first-order
  reference sum_n n |c_n| sum_i |Q_i| |z_i - z_c|^n and above the curve's
  rounding floor); the order is the curve's lowest energy harmonic;
* ``none``: one ion, ions on the rotation axis, no pinning, or a flat relaxed
  curve (two identical ions under order 3: the odd field only shifts the
  pair, by the same amount at every angle).
"""

from __future__ import annotations

import math
from dataclasses import dataclass, field

import numpy as np

from mdrotor.physics import frame
from mdrotor.physics.constants import K_B
from mdrotor.physics.statics import find_equilibrium

TWO_PI = 2.0 * math.pi
#: An order-n moment is present when |M_n| exceeds this fraction of
#: sum_i |Q_i| |z_i - z_c|^n. A regular N-gon's vanishing moments come out
#: at the equilibrium search's precision (~1e-10); a present one is ~1.
MOMENT_REL = 1e-6
#: The relaxed curve holds when its largest restoring torque exceeds this
#: fraction of the first-order reference torque (a deformation-held crystal
#: reaches 1e-4 to 1e-1; a flat curve the Newton tolerance, ~1e-11).
HELD_REL = 1e-7
#: Points of the held curve over one turn (a multiple of 12, so that orders
#: 2, 3, 4 and 6 get whole periods).
N_PHI = 96
#: A barrier below this many k_B T_initial is not a well the crystal stays
#: in: the Boltzmann weight of the barrier top, e^{-B / k_B T}, is the
#: fraction of libration periods in which a thermal crystal crosses it
#: (Kramers' escape rate ~ f_lib e^{-B / k_B T}); at 5 it is 0.7 % per
#: period, hundreds of crossings over a millisecond at ~100 kHz below it
#: (common practice, no source).
BARRIER_KT_MIN = 5.0

VERDICTS = ("pinned", "deformation", "none")


# ---------------------------------------------------------------------------
# moments
# ---------------------------------------------------------------------------
def moments(positions_m, masses_kg, charges_c, orders) -> dict:
    """{n: M_n} (complex, C m^n) about the centre of mass."""
    z = frame.complex_xy(np.asarray(positions_m, dtype=float), masses_kg)
    q = np.asarray(charges_c, dtype=float)
    return {int(n): complex(np.sum(q * z ** int(n))) for n in orders}


def moment_rel(positions_m, masses_kg, charges_c, order: int) -> float:
    """|M_n| / sum_i |Q_i| |z_i - z_c|^n (0 when every ion is on the axis)."""
    z = frame.complex_xy(np.asarray(positions_m, dtype=float), masses_kg)
    q = np.asarray(charges_c, dtype=float)
    ref = float(np.sum(np.abs(q) * np.abs(z) ** order))
    if ref == 0.0:
        return 0.0
    return float(abs(np.sum(q * z**order)) / ref)


def lowest_moment_order(positions_m, masses_kg, charges_c, orders=range(2, 13)):
    """The lowest order in ``orders`` whose moment is present (:data:`MOMENT_REL`), or None."""
    for n in orders:
        if moment_rel(positions_m, masses_kg, charges_c, n) > MOMENT_REL:
            return int(n)
    return None




# ---------------------------------------------------------------------------
# the held curve
# ---------------------------------------------------------------------------
def _torque(pot, r):
    """Torque about the axis, -sum_i (x_i dU/dy_i - y_i dU/dx_i) (N m), and the gradient."""
    g = pot.gradient(r)
    return float(-np.sum(r[:, 0] * g[:, 1] - r[:, 1] * g[:, 0])), g


def _constraint(w: np.ndarray, m: np.ndarray, phi: float) -> np.ndarray:
    """g (3N,) with g . r = Im sum_i m_i conj(e^{i phi} w_i) z_i."""
    a = m * np.conj(np.exp(1j * phi) * w)
    g = np.zeros((len(w), 3))
    g[:, 0], g[:, 1] = a.imag, a.real
    return g.ravel()


def relax_at_angle(pot, w: np.ndarray, phi: float, start: np.ndarray, *, hessian=None, force_scale: float,
                   max_iter: int = 60):
    """Constrained minimum of ``pot`` at crystal angle ``phi`` (module docstring).

    Parameters
    ----------
    pot : mdrotor.physics.statics.Potential
    w : (N,) complex
        Reference orientation: the reference configuration's x + i y about its centre of mass.
    phi : float
        Imposed angle (rad).
    start : (N, 3)
        Starting positions (m).
    hessian : (3N, 3N) array, optional
        A Hessian to start the Newton steps with (refreshed when they stall).
    force_scale : float
        Typical force (N) for the convergence test.

    Returns
    -------
    positions (N, 3), converged projected-gradient norm over ``force_scale``.
    """
    m = pot.masses_kg
    n3 = 3 * len(m)
    g = _constraint(w, m, phi)
    gg = float(g @ g)
    r = start.ravel() - g * (g @ start.ravel()) / gg
    h = pot.hessian(r.reshape(-1, 3)) if hessian is None else hessian
    fresh = hessian is None
    prev = np.inf
    rel = np.inf
    for _ in range(max_iter):
        grad = pot.gradient(r.reshape(-1, 3)).ravel()
        proj = grad - g * (g @ grad) / gg
        rel = float(np.linalg.norm(proj)) / force_scale
        if rel < 1e-13:
            break
        if rel > 0.5 * prev:  # slow: refresh the Hessian (or stop when it is fresh)
            if fresh:
                if rel >= prev:
                    break
            else:
                h = pot.hessian(r.reshape(-1, 3))
                fresh = True
        prev = rel
        kkt = np.zeros((n3 + 1, n3 + 1))
        kkt[:n3, :n3] = h
        kkt[:n3, n3] = kkt[n3, :n3] = g
        try:
            sol = np.linalg.solve(kkt, np.concatenate([-grad, [-(g @ r)]]))
        except np.linalg.LinAlgError:
            sol = np.linalg.lstsq(kkt, np.concatenate([-grad, [-(g @ r)]]), rcond=None)[0]
        step = _descent(pot, r, sol[:n3], energy_slack=ENERGY_SLACK * force_scale * float(np.linalg.norm(r)))
        if step is None:  # the Newton step climbs: from the Hessian here, else stop where we are
            if fresh:
                break
            h = pot.hessian(r.reshape(-1, 3))
            fresh = True
            prev = np.inf
            continue
        r = r + step
    return r.reshape(-1, 3), rel


#: A Newton step is taken whole when the energy it reaches is below the
#: start's plus this fraction of force scale x crystal size: rounding of the
#: energy (a few 1e-16 of it) passes, an overshoot does not.
ENERGY_SLACK = 1e-12


def _descent(pot, r: np.ndarray, step: np.ndarray, *, energy_slack: float):
    """The Newton step, halved until it does not raise the energy (backtracking
    line search; Nocedal and Wright, Numerical Optimization, 2nd ed. 2006,
    section 3.1, from memory); None when no fraction down to 2^-30 does.

    A Newton step from a Hessian taken elsewhere (the reference Hessian
    turned with the crystal, far from right when the pinning is nearly as
    strong as the trap) can overshoot through the other ions into a
    collapsed pair, where the Coulomb energy is infinite; the step is along
    the constraint's null space plus the correction to it, so every fraction
    of it keeps the constraint as well as the whole step does."""
    e0 = pot.energy(r.reshape(-1, 3))
    t = 1.0
    for _ in range(31):
        with np.errstate(all="ignore"):
            e1 = pot.energy((r + t * step).reshape(-1, 3))
        if np.isfinite(e1) and e1 <= e0 + energy_slack:
            return t * step
        t *= 0.5
    return None


@dataclass
class HeldCurve:
    """Energy and restoring torque of the relaxed crystal versus its angle.

    Attributes
    ----------
    phi_rad : (K,) crystal angle relative to the reference (the pinned equilibrium), over one turn
    torque_n_m : (K,) restoring torque tau = -dU/dphi (exact, from the gradient)
    energy_j : (K,) U(phi) - U(0), the torque integrated spectrally (rounding-free)
    positions_m : (K, N, 3) relaxed configurations
    moment_of_inertia_kg_m2 : I of the reference about the trap axis (the axis the pinning turns about)
    curvature_n_m : U''(0) (N m per rad), central difference of the torque
    path_inertia_kg_m2 : sum m |dr/dphi|^2 at phi = 0 (the relaxed crystal turning about the trap axis)
    residual : largest projected gradient over the force scale (convergence)
    """

    phi_rad: np.ndarray
    torque_n_m: np.ndarray
    energy_j: np.ndarray
    positions_m: np.ndarray
    moment_of_inertia_kg_m2: float
    curvature_n_m: float
    path_inertia_kg_m2: float
    residual: float

    @property
    def f_lib_hz(self) -> float:
        """Libration frequency sqrt(U''(0) / I_path) / (2 pi), Hz (Landau and Lifshitz, Mechanics, section 21)."""
        if self.curvature_n_m <= 0 or self.path_inertia_kg_m2 <= 0:
            return 0.0
        return math.sqrt(self.curvature_n_m / self.path_inertia_kg_m2) / TWO_PI

    def harmonics(self, max_order: int = 12) -> dict:
        """Fourier amplitudes of the pinning energy: {n: V_n} (complex, J) with
        U(phi) = U_0 + sum_{n >= 1} Re[V_n e^{i n phi}], phi the crystal angle."""
        K = len(self.phi_rad)
        t = np.fft.fft(self.torque_n_m) / K
        out = {}
        for n in range(1, min(max_order, K // 2 - 1) + 1):
            # tau = -dU/dphi = sum Re[-i n V_n e^{i n phi}] -> tau_hat_n = -i n V_n / 2
            out[n] = complex(2.0 * t[n] / (-1j * n))
        return out

    def well(self) -> dict:
        """Held accelerations and barrier of the well at phi = 0 (module docstring)."""
        tau, u, K = self.torque_n_m, self.energy_j, len(self.phi_rad)
        I = self.moment_of_inertia_kg_m2
        out = {}
        for name, step, sign in (("forward", -1, 1.0), ("backward", 1, -1.0)):
            best, top = 0.0, None
            for j in range(1, K):
                k = (step * j) % K
                val = sign * tau[k]
                if val <= 0.0:
                    # the barrier's top is the highest sample walked over: the
                    # first sample past the sign change may lie beyond it
                    top = k if u[k] >= u[(k - step) % K] else (k - step) % K
                    break
                if val > best:
                    kp = k
                    best = val
            if best > 0.0:
                a, b, c = (sign * tau[(kp - 1) % K], sign * tau[kp], sign * tau[(kp + 1) % K])
                den = a - 2 * b + c
                if den < 0:
                    off = max(-1.0, min(1.0, 0.5 * (a - c) / den))
                    best = b - 0.25 * (a - c) * off
            out[f"torque_{name}_n_m"] = best
            out[f"alpha_{name}_rad_s2"] = best / I if I > 0 else 0.0
            out[f"barrier_{name}_j"] = float(u[top] - u[0]) if top is not None else 0.0
        out["barrier_j"] = min(out["barrier_forward_j"], out["barrier_backward_j"])
        return out


def _spectral_energy(tau: np.ndarray) -> np.ndarray:
    """U(phi) - U(0) from tau = -dU/dphi sampled over one turn (mean torque dropped)."""
    K = len(tau)
    m = np.fft.fftfreq(K, 1.0 / K)
    ft = np.fft.fft(tau)
    inv = np.zeros_like(ft)
    nz = m != 0
    inv[nz] = -ft[nz] / (1j * m[nz])
    if K % 2 == 0:
        inv[K // 2] = 0.0
    u = np.fft.ifft(inv).real
    return u - u[0]


def held_curve(pot, r0: np.ndarray, *, n_phi: int = N_PHI, relaxed: bool = True) -> HeldCurve:
    """The held curve of the crystal at its equilibrium ``r0`` in ``pot``.

    ``relaxed=False`` turns the equilibrium rigidly about the axis instead
    (the rigid picture, kept for comparison).
    """
    r0 = np.asarray(r0, dtype=float)
    m = pot.masses_kg
    w = frame.complex_xy(r0, m)
    I = frame.moment_of_inertia(r0, m, about="axis")
    K = int(n_phi)
    phi = TWO_PI * np.arange(K) / K
    force_scale = float(np.linalg.norm(pot._effective_springs() * (r0 - frame.centre_of_mass(r0, m))))
    force_scale = max(force_scale, float(np.linalg.norm(pot.spring_n_per_m)) * math.sqrt(I / np.sum(m)) + 1e-300)
    h0 = pot.hessian(r0) if relaxed else None

    def rotated_hessian(a):
        # the reference Hessian turned with the crystal (exact for a symmetric
        # potential; a starting guess otherwise)
        c, s = math.cos(a), math.sin(a)
        rot = np.kron(np.eye(len(m)), np.array([[c, -s, 0.0], [s, c, 0.0], [0.0, 0.0, 1.0]]))
        return rot @ h0 @ rot.T

    def point(a, start):
        if not relaxed:
            return frame.rotate_positions(r0, a), 0.0
        return relax_at_angle(pot, w, a, start, hessian=rotated_hessian(a), force_scale=force_scale)

    pos = np.empty((K,) + r0.shape)
    tau = np.empty(K)
    resid = 0.0
    # continue from phi = 0 both ways round, meeting half a turn away
    prev_f = prev_b = r0
    order_idx = [0]
    for j in range(1, K // 2 + 1):
        order_idx += [j, K - j] if K - j != j else [j]
    for k in order_idx:
        a = phi[k] if k <= K // 2 else phi[k] - TWO_PI
        start = prev_f if k <= K // 2 else prev_b
        r, res = point(a, frame.rotate_positions(start, TWO_PI / K * (1 if k <= K // 2 else -1)) if k else r0)
        resid = max(resid, res)
        pos[k] = r
        tau[k] = _torque(pot, r)[0]
        if k <= K // 2:
            prev_f = r
        else:
            prev_b = r
    # curvature and path inertia at phi = 0 from two close constrained minima
    hstep = 1e-4
    rp, _ = point(hstep, frame.rotate_positions(r0, hstep))
    rm, _ = point(-hstep, frame.rotate_positions(r0, -hstep))
    curv = -(_torque(pot, rp)[0] - _torque(pot, rm)[0]) / (2 * hstep)
    # path inertia: the crystal turns about the trap axis, so the centre of
    # mass moves with it when it is off the axis (a mixed-species pair)
    dr = (rp - rm) / (2 * hstep)
    i_path = float(np.sum(m[:, None] * dr * dr)) if relaxed else I
    return HeldCurve(phi, tau, _spectral_energy(tau), pos, I, float(curv), i_path, resid)


# ---------------------------------------------------------------------------
# the verdict
# ---------------------------------------------------------------------------
@dataclass
class Holding:
    """How the pinning holds a crystal (module docstring).

    ``verdict`` is one of :data:`VERDICTS`; ``order`` the order of the wells
    (the pinning order at first order, the curve's lowest harmonic when held
    through the deformation; None when not held); ``term`` the index of the
    pinning term that holds; ``reason`` says why in words.
    """

    verdict: str
    order: int | None
    term: int | None
    reason: str
    moments_rel: dict
    positions_m: np.ndarray
    moment_of_inertia_kg_m2: float
    f_rot_hz: float = 0.0
    f_lib_hz: float = 0.0
    f_lib_rigid_hz: float = 0.0
    alpha_forward_rad_s2: float = 0.0
    alpha_backward_rad_s2: float = 0.0
    barrier_j: float = 0.0
    torque_rel: float = 0.0
    curve: HeldCurve | None = field(default=None, repr=False)
    positions_off_m: np.ndarray | None = field(default=None, repr=False)

    @property
    def held(self) -> bool:
        return self.verdict != "none"

    @property
    def alpha_max_rad_s2(self) -> float:
        """The held acceleration in the weaker direction (rad/s^2)."""
        return min(self.alpha_forward_rad_s2, self.alpha_backward_rad_s2)

    def alpha_held_rad_s2(self, direction: float) -> float:
        """Held acceleration for a spin-up (direction > 0) or spin-down (< 0)."""
        return self.alpha_forward_rad_s2 if direction >= 0 else self.alpha_backward_rad_s2

    def describe(self) -> str:
        """One line: the verdict in words."""
        if self.verdict == "pinned":
            return f"pinned by its order-{self.order} moment (first order in the strength)"
        if self.verdict == "deformation":
            return (f"held only through its deformation (higher order in the strength; wells of order {self.order}): "
                    f"{self.reason}")
        return f"not held at all: {self.reason}"

    def to_dict(self) -> dict:
        out = {"verdict": self.verdict, "order": self.order, "term": self.term, "reason": self.reason,
               "description": self.describe(),
               "moments_rel": {str(k): float(v) for k, v in self.moments_rel.items()},
               "f_rot_hz": self.f_rot_hz, "libration_hz": self.f_lib_hz, "libration_rigid_hz": self.f_lib_rigid_hz,
               "alpha_forward_rad_s2": self.alpha_forward_rad_s2, "alpha_backward_rad_s2": self.alpha_backward_rad_s2,
               "max_angular_acceleration_rad_s2": self.alpha_max_rad_s2, "barrier_j": self.barrier_j,
               "barrier_k": self.barrier_j / K_B, "torque_rel": self.torque_rel,
               "moment_of_inertia_kg_m2": self.moment_of_inertia_kg_m2}
        return out


def _equilibrium(pot, start, seed):
    if start is not None:
        return find_equilibrium(pot, start=np.asarray(start, dtype=float)).positions_m
    return find_equilibrium(pot, seed=seed).positions_m


def assess(pot_on, pot_off, terms, *, start=None, seed: int = 0, n_phi: int = N_PHI, curve: bool = True) -> Holding:
    """Verdict, libration and held accelerations of the crystal in ``pot_on``.

    Parameters
    ----------
    pot_on : mdrotor.physics.statics.Potential
        The potential with the pinning (lab frame or rotating frame).
    pot_off : mdrotor.physics.statics.Potential
        The same potential with every pinning multiplier 0.
    terms : sequence of (order, strength)
        The pinning terms (order n, c_n in V/m^n; electrode terms: their target
        order and strength); ``Holding.term`` indexes this sequence.
    start : (N, 3) array, optional
        The pinned equilibrium (or a start for it); default: a global search with ``seed``.
    curve : bool
        False: skip the held curve when the verdict is first order (the
        verdict and order only; libration and accelerations left 0).
    """
    r_on = _equilibrium(pot_on, start, seed)
    m, q = pot_on.masses_kg, pot_on.charges_c
    f_rot = pot_on.omega_frame / TWO_PI
    I_on = frame.moment_of_inertia(r_on, m, about="axis")
    terms = [(int(n), float(c)) for n, c in terms]
    active = [(j, n, c) for j, (n, c) in enumerate(terms) if c != 0.0]
    orders = sorted({n for _, n, _ in active})
    base = dict(positions_m=r_on, moment_of_inertia_kg_m2=I_on, f_rot_hz=f_rot)
    if len(m) < 2:
        return Holding("none", None, None, "one ion has no orientation to hold", {}, **base)
    if not active:
        return Holding("none", None, None, "the pinning is off (every strength is 0)", {}, **base)
    r_off = _equilibrium(pot_off, r_on, seed)
    base["positions_off_m"] = r_off
    rel = {n: moment_rel(r_off, m, q, n) for n in orders}
    if frame.on_axis(r_off, m) or frame.on_axis(r_on, m):
        return Holding("none", None, None, "the ions lie on the rotation axis (no in-plane moment of any order)", rel, **base)
    first = [n for n in orders if rel[n] > MOMENT_REL]
    z = frame.complex_xy(r_on, m)
    tau_ref = sum(n * abs(c) * float(np.sum(np.abs(q) * np.abs(z) ** n)) for _, n, c in active)
    if first:
        n = first[0]
        term = max((j for j, o, _ in active if o == n), key=lambda j: abs(terms[j][1]))
        reason = f"order-{n} moment |M_{n}| = {rel[n]:.3g} of sum |Q| r^{n} on the crystal without the pinning"
        if not curve:
            return Holding("pinned", n, term, reason, rel, **base)
    hc = held_curve(pot_on, r_on, n_phi=n_phi)
    well = hc.well()
    tmax = max(well["torque_forward_n_m"], well["torque_backward_n_m"])
    floor = 1e3 * max(hc.residual, 1e-13) * float(np.linalg.norm(pot_on.spring_n_per_m)) * float(np.max(np.abs(z))) ** 2
    torque_rel = tmax / tau_ref if tau_ref > 0 else 0.0
    if first:
        verdict, order = "pinned", first[0]
    elif torque_rel > HELD_REL and tmax > floor:
        verdict = "deformation"
        amp = hc.harmonics(max_order=min(24, len(hc.phi_rad) // 2 - 2))
        big = max(abs(v) for v in amp.values())
        order = next(k for k, v in amp.items() if abs(v) > 0.05 * big)
        term = max((j for j, _, _ in active),
                   key=lambda j: terms[j][0] * abs(terms[j][1]) * float(np.sum(np.abs(q) * np.abs(z) ** terms[j][0])))
        reason = (f"no pinning order ({', '.join(map(str, orders))}) finds a moment on the undeformed crystal; "
                  f"the deformed crystal's largest restoring torque is {torque_rel:.3g} of the first-order reference")
    else:
        return Holding("none", None, None,
                       f"no pinning order ({', '.join(map(str, orders))}) finds a moment on the crystal and the relaxed "
                       f"curve is flat (largest torque {torque_rel:.2g} of the first-order reference)",
                       rel, torque_rel=torque_rel, curve=hc, **base)
    rigid = held_curve(pot_on, r_on, n_phi=n_phi, relaxed=False)
    return Holding(verdict, int(order), int(term), reason, rel, f_lib_hz=hc.f_lib_hz, f_lib_rigid_hz=rigid.f_lib_hz,
                   alpha_forward_rad_s2=well["alpha_forward_rad_s2"], alpha_backward_rad_s2=well["alpha_backward_rad_s2"],
                   barrier_j=well["barrier_j"], torque_rel=torque_rel, curve=hc, **base)











# ---------------------------------------------------------------------------
# the preflight of a run
# ---------------------------------------------------------------------------
def _scale_power(h: Holding, orders) -> float:
    """How the held acceleration scales with the pinning multiplier s: s^1 at
    first order; held through the deformation, wells of order k from a term of
    order n need k / n field factors (s^(k/n), e.g. s^3 for a triangle under
    a quadrupole), else s^2 (leading order of a response)."""
    if h.verdict == "pinned":
        return 1.0
    n = orders[h.term] if h.term is not None else 0
    return float(h.order // n) if n and h.order and h.order % n == 0 else 2.0


def schedule_margin(h: Holding, profile: dict, scale_ref: float, orders) -> dict:
    """Smallest held / asked angular acceleration over a sampled schedule.

    ``profile``: arrays ``t_s``, ``alpha_rad_s2`` (asked, 2 pi d f_rot/dt)
    and ``scale`` (the multiplier of the holding term); ``h`` was assessed at
    multiplier ``scale_ref``. The held acceleration at multiplier s is
    h's (forward for alpha > 0, backward for alpha < 0) times
    (s / scale_ref)^p (:func:`_scale_power`).

    Returns ``ratio`` (inf when nothing is asked), ``t_s``,
    ``needed_rad_s2`` and ``held_rad_s2`` where the ratio is smallest.
    """
    a = np.asarray(profile["alpha_rad_s2"], dtype=float)
    s = np.abs(np.asarray(profile["scale"], dtype=float))
    t = np.asarray(profile["t_s"], dtype=float)
    amax = float(np.max(np.abs(a))) if len(a) else 0.0
    if amax <= 0.0:
        return {"ratio": float("inf"), "t_s": None, "needed_rad_s2": 0.0, "held_rad_s2": None}
    p = _scale_power(h, orders)
    held = np.where(a >= 0, h.alpha_forward_rad_s2, h.alpha_backward_rad_s2)
    held = held * (s / scale_ref) ** p if scale_ref > 0 else np.zeros(len(a))
    act = np.abs(a) > 1e-9 * amax
    ratio = np.full(len(a), np.inf)
    ratio[act] = held[act] / np.abs(a[act])
    j = int(np.argmin(ratio))
    return {"ratio": float(ratio[j]), "t_s": float(t[j]), "needed_rad_s2": float(abs(a[j])), "held_rad_s2": float(held[j])}








__all__ = ["MOMENT_REL", "HELD_REL", "BARRIER_KT_MIN", "N_PHI", "VERDICTS", "moments", "moment_rel",
           "lowest_moment_order", "relax_at_angle", "HeldCurve", "held_curve", "Holding", "assess", "schedule_margin",]
