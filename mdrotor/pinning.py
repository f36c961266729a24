"""Pinning: is the crystal held by the rotating multipole, how firmly, and
against which schedule. The one owner of these facts; ``crystal``, ``run``
(its preflight and lag tracking), ``rotor`` and ``electrodes`` call it.

Moments (first order in the pinning strength)
---------------------------------------------
The order-n in-plane moment about the centre of mass,

    M_n = sum_i Q_i (z_i - z_c)^n,      z = x + i y,  z_c = sum m_i z_i / sum m_i,

sets the first-order pinning energy of the crystal turned by phi,
Re[C M_n e^{i n phi}] (:mod:`mdrotor.multipole`). It counts as present when
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
from scipy import constants as sc

from . import frame

TWO_PI = 2.0 * math.pi
K_B = sc.k
#: An order-n moment is present when |M_n| exceeds this fraction of
#: sum_i |Q_i| |z_i - z_c|^n. A regular N-gon's vanishing moments come out
#: at the equilibrium search's precision (~1e-10); a present one is ~1.
MOMENT_REL = 1e-6
#: The relaxed curve holds when its largest restoring torque exceeds this
#: fraction of the first-order reference torque (a deformation-held crystal
#: reaches 1e-4 to 1e-1; a flat curve the Newton tolerance, ~1e-11).
HELD_REL = 1e-7
#: Ions within this fraction of the crystal's size from the rotation axis lie on it.
AXIS_REL = 1e-6
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


def on_axis(positions_m, masses_kg) -> bool:
    """True when every ion lies on the rotation axis (through the centre of mass)."""
    r = np.asarray(positions_m, dtype=float)
    size = float(np.max(np.linalg.norm(r - frame.centre_of_mass(r, masses_kg), axis=1))) if len(r) else 0.0
    rho = np.abs(frame.complex_xy(r, masses_kg))
    return len(r) < 2 or size == 0.0 or float(np.max(rho)) <= AXIS_REL * size


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
    pot : mdrotor.statics.Potential
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
        r = r + sol[:n3]
    return r.reshape(-1, 3), rel


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
                    top = k
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
    from .statics import find_equilibrium

    if start is not None:
        return find_equilibrium(pot, start=np.asarray(start, dtype=float)).positions_m
    return find_equilibrium(pot, seed=seed).positions_m


def assess(pot_on, pot_off, terms, *, start=None, seed: int = 0, n_phi: int = N_PHI, curve: bool = True) -> Holding:
    """Verdict, libration and held accelerations of the crystal in ``pot_on``.

    Parameters
    ----------
    pot_on : mdrotor.statics.Potential
        The potential with the pinning (lab frame or rotating frame).
    pot_off : mdrotor.statics.Potential
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
    if on_axis(r_off, m) or on_axis(r_on, m):
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
# from a config
# ---------------------------------------------------------------------------
def config_terms(cfg, scales=None) -> list:
    """(order, strength x multiplier) of a config's pinning terms."""
    scales = [1.0] * len(cfg.pinning) if scales is None else list(scales)
    return [(t.order, s * t.strength) for t, s in zip(cfg.pinning, scales)]


def assess_config(cfg, f_rot_hz: float = 0.0, *, theta_rad: float = 0.0, scales=None, start=None,
                  n_phi: int = N_PHI, curve: bool = True) -> Holding:
    """:func:`assess` for a config's crystal rotating at ``f_rot_hz`` with the
    pinning at multipliers ``scales`` (default 1) and angle ``theta_rad``."""
    from .statics import SLOW_ROTATION_HZ, model_potential

    f = 0.0 if abs(f_rot_hz) < SLOW_ROTATION_HZ else float(f_rot_hz)
    scales = [1.0] * len(cfg.pinning) if scales is None else [float(s) for s in scales]
    pot_on = model_potential(cfg, f, theta_rad=theta_rad, pin_scale=scales)
    pot_off = model_potential(cfg, f, theta_rad=theta_rad, pin_scale=[0.0] * len(cfg.pinning))
    return assess(pot_on, pot_off, config_terms(cfg, scales), start=start, seed=cfg.search_seed, n_phi=n_phi, curve=curve)


def pinning_energy_harmonics(cfg, f_rot_hz: float = 0.0, *, max_order: int = 12, relaxed: bool = True,
                             scales=None, n_phi: int = N_PHI) -> dict:
    """Fourier amplitudes of the pinning energy versus the crystal angle.

    U(phi) = U_0 + sum_n Re[V_n e^{i n phi}] for the config's crystal (at
    ``f_rot_hz``, pinning multipliers ``scales``), relaxed (minimum-energy
    path) or rigid. Returns {n: V_n} in J (complex); |V_n| is the depth
    scale of the order-n wells (a pure cos(n phi) well of depth 2 |V_n|).
    """
    from .statics import SLOW_ROTATION_HZ, find_equilibrium, model_potential

    f = 0.0 if abs(f_rot_hz) < SLOW_ROTATION_HZ else float(f_rot_hz)
    pot = model_potential(cfg, f, pin_scale=scales)
    r0 = find_equilibrium(pot, seed=cfg.search_seed).positions_m
    if len(r0) < 2 or on_axis(r0, pot.masses_kg):
        return {n: 0j for n in range(1, max_order + 1)}
    return held_curve(pot, r0, n_phi=max(n_phi, 4 * max_order + 8), relaxed=relaxed).harmonics(max_order)





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


def escape_depth(cfg, scales=None) -> dict | None:
    """Depth of the trap against an unbounded pinning multipole.

    An in-plane multipole of order n >= 3 is unbounded below: Re[c z^n]
    falls as -c r^n along n directions. With the radial trap 1/2 k r^2
    (k = m w_r^2), one ion along such a valley sees
    U(r) = k r^2 / 2 - |Q| c r^n, a saddle at r* = (k / (n |Q| c))^(1/(n-2))
    of height (1/2 - 1/n) k r*^2 (Coulomb repulsion from the other ions
    lowers it further). An ion over it runs off along the valley, faster
    and faster: a non-finite trajectory. The preflight warns when the
    saddle is below :data:`BARRIER_KT_MIN` k_B T_initial.

    Returns the lowest saddle over ions and terms at multipliers ``scales``
    (default: each term's peak over the schedule): ``order``, ``term``,
    ``radius_m``, ``depth_j``, ``depth_k``; None without a term of order >= 3.
    """
    m, q = cfg.masses_kg, cfg.charges_c
    k = np.min(cfg.trap.omega_sq(m, q)[:, :2], axis=1) * m
    if scales is None:
        scales = [cfg.schedule.peak_pinning_scale(j) if cfg.schedule is not None else 1.0 for j in range(len(cfg.pinning))]
    best = None
    for j, (t, s) in enumerate(zip(cfg.pinning, scales)):
        c = abs(s * t.strength)
        if t.order < 3 or c == 0.0:
            continue
        r = (k / (t.order * np.abs(q) * c)) ** (1.0 / (t.order - 2))
        depth = (0.5 - 1.0 / t.order) * k * r * r
        i = int(np.argmin(depth))
        if best is None or depth[i] < best["depth_j"]:
            best = {"order": t.order, "term": j, "radius_m": float(r[i]), "depth_j": float(depth[i]),
                    "depth_k": float(depth[i] / K_B)}
    return best


def preflight(plan, *, n_samples: int = 401) -> dict:
    """Check a planned run before any integration (module docstring).

    Per stage whose f_rot changes: the largest angular acceleration the
    schedule asks, 2 pi |d f_rot / dt|, against the largest the pinning holds
    at that time's strength, in the frame rotating at that time's f_rot
    (:func:`assess` on the relaxed crystal there); the stage's margin is the
    smallest held / asked over the stage, the held acceleration scaled with
    the multiplier (:func:`_scale_power`). At t = 0: the verdict and the
    pinning barrier against k_B T_initial (:data:`BARRIER_KT_MIN`).

    Returns
    -------
    dict (JSON-ready): ``initial`` (verdict, order, libration_hz, barrier_k,
    barrier_over_kT), ``stages`` (one entry per stage whose f_rot changes),
    ``margin_min`` (smallest stage margin; inf without a spin), ``warnings``
    (lines), ``refusal`` (a line, or None: a spin-up of a crystal that the
    pinning does not hold, or a rotation the crystal does not survive) and
    ``refusal_stage`` (its stage's name).
    """
    from .errors import PhysicsError

    cfg, sched = plan.cfg, plan.schedule
    n_ions = len(plan.masses)
    orders = [t.order for t in cfg.pinning]
    warnings_: list[str] = []
    refusal = refusal_stage = None
    start0 = plan.crystal0.positions_m
    h0 = getattr(plan, "holding0", None)
    if h0 is None:
        h0 = assess(plan.potential(plan.f0_hz, 0.0, plan.pin_scales(0.0)),
                    plan.potential(plan.f0_hz, 0.0, np.zeros(len(orders))),
                    config_terms(cfg, plan.pin_scales(0.0)), start=start0, seed=cfg.search_seed)
    T = float(cfg.initial.temperature_k)
    init = {"verdict": h0.verdict, "order": h0.order or 0, "description": h0.describe(), "libration_hz": h0.f_lib_hz,
            "alpha_forward_rad_s2": h0.alpha_forward_rad_s2, "alpha_backward_rad_s2": h0.alpha_backward_rad_s2,
            "barrier_k": h0.barrier_j / K_B, "temperature_k": T,
            "barrier_over_kT": (h0.barrier_j / (K_B * T)) if (T > 0 and h0.held) else float("inf"),
            "f_rot_hz": plan.f0_hz}
    if h0.held and init["barrier_over_kT"] < BARRIER_KT_MIN:
        warnings_.append(f"at t = 0 the pinning barrier is {init['barrier_over_kT']:.3g} k_B T_initial "
                         f"({init['barrier_k'] * 1e3:.4g} mK x k_B against T = {T * 1e3:.4g} mK), below "
                         f"{BARRIER_KT_MIN:g}: the crystal hops between the pinning wells at its starting temperature")
    f_lim = plan.omega_radial_min / TWO_PI
    stages = []
    for i, st in enumerate(sched.stages):
        if not sched.spins(i):
            continue
        smp = sched.stage_samples(i, n_samples)
        a = smp["alpha_rad_s2"]
        if not np.any(a != 0.0):
            continue
        k = int(np.argmax(np.abs(a)))
        t_k, f_k = float(smp["t_s"][k]), float(smp["f_rot_hz"][k])
        s_k = smp["scale"][k] if smp["scale"].shape[1] else np.zeros(0)
        f_top = float(np.max(np.abs(smp["f_rot_hz"])))
        entry = {"stage": st.name, "t_s": t_k, "f_rot_hz": f_k, "f_rot_max_hz": f_top,
                 "f_rot_max_over_radial": f_top / f_lim, "alpha_needed_rad_s2": float(abs(a[k])),
                 "verdict": "none", "order": 0, "libration_hz": 0.0, "alpha_held_rad_s2": 0.0,
                 "margin": 0.0, "t_margin_s": t_k}
        theta = float(sched.theta_rad(t_k))
        try:
            h = assess(plan.potential(f_k, theta, s_k), plan.potential(f_k, theta, np.zeros(len(orders))),
                       config_terms(cfg, s_k), start=frame.rotate_positions(start0, theta), seed=cfg.search_seed)
        except PhysicsError as e:
            msg = (f"stage '{st.name}' asks for f_rot = {f_k / 1e3:.6g} kHz at t = {t_k * 1e3:.4g} ms, where the crystal "
                   f"is not stable: {e.expected}")
            refusal_stage = refusal_stage or st.name
            refusal = refusal or msg
            entry["error"] = e.expected
            stages.append(entry)
            continue
        entry.update(verdict=h.verdict, order=h.order or 0, libration_hz=h.f_lib_hz, description=h.describe())
        need = (f"asks up to {abs(a[k]):.4g} rad/s^2 (an f_rot ramp of {abs(a[k]) / TWO_PI / 1e6:.4g} kHz/ms) at "
                f"t = {t_k * 1e3:.4g} ms, f_rot = {f_k / 1e3:.6g} kHz")
        if not h.held:
            if n_ions > 1:
                refusal_stage = refusal_stage or st.name
                refusal = refusal or (f"stage '{st.name}' changes f_rot ({st.f_rot.v0 / 1e3:.6g} to {st.f_rot.v1 / 1e3:.6g} kHz) "
                                      f"and {need}, but the pinning does not hold the crystal: {h.reason}")
            else:
                warnings_.append(f"stage '{st.name}' changes f_rot, but one ion has no orientation: the spin-up turns nothing")
            stages.append(entry)
            continue
        s_all = smp["scale"][:, h.term] if smp["scale"].shape[1] else np.zeros(len(a))
        mg = schedule_margin(h, {"t_s": smp["t_s"], "alpha_rad_s2": a, "scale": s_all},
                             float(abs(s_k[h.term])) if len(s_k) else 0.0, orders)
        entry.update(alpha_held_rad_s2=float(h.alpha_held_rad_s2(a[k])), margin=mg["ratio"], t_margin_s=mg["t_s"])
        if mg["ratio"] < 1.0:
            warnings_.append(f"stage '{st.name}' asks {mg['needed_rad_s2']:.4g} rad/s^2 "
                             f"({mg['needed_rad_s2'] / TWO_PI / 1e6:.4g} kHz/ms) at t = {mg['t_s'] * 1e3:.4g} ms, but the "
                             f"pinning holds only {mg['held_rad_s2']:.4g} rad/s^2 ({mg['held_rad_s2'] / TWO_PI / 1e6:.4g} "
                             f"kHz/ms) there (margin {mg['ratio']:.3g}, {h.verdict}): expect slips")
        stages.append(entry)
    margins = [s["margin"] for s in stages]
    esc = escape_depth(cfg)
    if esc is not None:
        init["escape_depth_k"] = esc["depth_k"]
        init["escape_radius_m"] = esc["radius_m"]
        if T > 0 and esc["depth_k"] < BARRIER_KT_MIN * T:
            warnings_.append(f"the trap holds an ion against the order-{esc['order']} pinning only up to a saddle of "
                             f"{esc['depth_k'] * 1e3:.4g} mK x k_B at r = {esc['radius_m'] * 1e6:.4g} um, below "
                             f"{BARRIER_KT_MIN:g} k_B T_initial: hot ions run off and end non-finite")
    return {"initial": init, "stages": stages, "margin_min": float(min(margins)) if margins else float("inf"),
            "warnings": warnings_, "refusal": refusal, "refusal_stage": refusal_stage}


def preflight_group(pre: dict) -> dict:
    """The preflight as an HDF5 group of the result (``/preflight``; docs/results.md)."""
    st = pre["stages"]
    return {
        "margin_min": pre["margin_min"], "warnings": "\n".join(pre["warnings"]),
        "refusal": pre["refusal"] or "", "forced": bool(pre.get("forced", False)),
        "initial": {k: v for k, v in pre["initial"].items() if isinstance(v, (int, float, str))},
        "stage": [s["stage"] for s in st], "verdict": [s["verdict"] for s in st],
        "order": np.array([s["order"] for s in st], dtype=np.int64),
        "t_s": np.array([s["t_s"] for s in st], dtype=float),
        "f_rot_hz": np.array([s["f_rot_hz"] for s in st], dtype=float),
        "alpha_needed_rad_s2": np.array([s["alpha_needed_rad_s2"] for s in st], dtype=float),
        "alpha_held_rad_s2": np.array([s["alpha_held_rad_s2"] for s in st], dtype=float),
        "libration_hz": np.array([s["libration_hz"] for s in st], dtype=float),
        "margin": np.array([s["margin"] for s in st], dtype=float),
    }


__all__ = ["MOMENT_REL", "HELD_REL", "AXIS_REL", "BARRIER_KT_MIN", "N_PHI", "VERDICTS", "moments", "moment_rel",
           "lowest_moment_order", "on_axis", "relax_at_angle", "HeldCurve", "held_curve", "Holding", "assess",
           "assess_config", "config_terms", "pinning_energy_harmonics", "schedule_margin", "escape_depth", "preflight", "preflight_group"]
