"""Design check: does a layout's full electrode field pin the run's crystal?

The check takes a layout (rf and dc electrodes, voltage limits) and a run
config (crystal, pinning order and strength, schedule) and reports:

1. the RF pseudopotential trap (null, secular frequencies, q, depth);
2. the per-volt multipole table of the dc channels;
3. the voltages that rotate the pinning multipole (:func:`solve_rotating`);
4. the crystal in the *full* field of the electrodes -- the pseudopotential
   Q^2 |E_rf(r)|^2 / (4 m W^2) of the rf electrodes evaluated at every ion
   (not only its harmonic part) plus the dc electrodes at the solved voltages
   (static part and the rotating part at a pinning angle), every term from
   the solid-angle formulas, no multipole truncation -- and next to it the
   fitted picture, a run config whose trap is the layout's harmonic
   pseudopotential and whose pinning is the achieved leading multipole;
5. whether the crystal is pinned, the libration frequency, the largest
   angular acceleration before a slip against the one the schedule asks
   for (:mod:`mdrotor.physics.pinning`), and what the stray multipoles do;
6. the verdict: problems are a target out of reach, a crystal not pinned
   at first order, a margin below 1, a pinning barrier below
   :data:`mdrotor.physics.pinning.BARRIER_KT_MIN` k_B T_initial, a run config
   whose trap differs from the layout's by more than
   :data:`TRAP_MISMATCH_REL`, an unstable crystal at the fastest rotation.

Pinned or not, libration, held acceleration (the pinning core)
---------------------------------------------------------------
The verdict, the libration of the relaxed crystal, the largest held angular
acceleration, the barrier and the margin against the schedule come from
:mod:`mdrotor.physics.pinning`, the same core that ``mdrotor crystal``, the run's
preflight and ``mdrotor rotor`` call: the moments of the crystal without
the rotating voltages (static voltages, pseudopotential and stray field
only) decide "pinned" (first order) against "held only through its
deformation" against "not held"; the relaxed held curve in the full field
at the configured pattern angle gives the rest. The margin is the smallest
held / asked over the schedule, of the lab-frame crystal and of the crystal
rotating at the fastest f_rot, whichever is smaller.

Rigid scan (torque harmonics)
-----------------------------
For the crystal at its pinned equilibrium, held rigid and turned by phi,
the pattern's energy is Re[W(phi) e^{-i n theta}] with V_e(theta) = s_e +
A_e cos(n theta - phi_e) and W(phi) = sum_e A_e e^{i phi_e} sum_i Q_i
phi_e(R(phi) r_i) (phi_e the potential per volt of channel e). Expanding
W = sum_m w_m e^{i m phi} and writing phi = theta - lambda gives terms
Re[w_m e^{i (m - n) theta} e^{-i m lambda}]: only m = n is static in the
pattern's frame; the others ripple at |m - n| f_rot and are reported with
the static torques (pseudopotential, static voltages, stray field), the
rigid libration over a turn of the pattern and the lag ripple. The torque
is evaluated from the fields, energies and curvatures by spectral
integration and differentiation in phi.

Rotating frame
--------------
At the fastest rotation of the schedule the equilibrium and modes are
computed in the frame rotating at f_rot (centrifugal stretch, Coriolis
coupling) with the electrode field frozen at one pattern angle: the
co-rotating pinning is static in that frame, the ripple terms above are not
(they are reported separately), and the stray field is dropped, as
:func:`mdrotor.model.build.model_potential` does.

Caution: voltages and rf amplitudes must stay within the trap's rated limits
and the lab's safety rules (:data:`CAUTION`).
"""

from __future__ import annotations

import copy
import math
from dataclasses import dataclass
from pathlib import Path

import numpy as np
from scipy import constants as sc

from mdrotor.config.parse import from_dict
from mdrotor.electrodes.harmonic_fit import fit_multipoles
from mdrotor.electrodes.pseudo import rf_pseudopotential
from mdrotor.electrodes.solve import CAUTION, solve_rotating
from mdrotor.errors import InputError, PhysicsError
from mdrotor.model.build import assess_config, model_potential
from mdrotor.physics import pinning as pin
from mdrotor.physics.statics import Potential, compute_crystal, normal_modes

__all__ = ["RFPseudoTerm", "ElectrodeTerm", "full_potential", "rigid_scan", "resolve_target",
           "design_check", "check_text", "TRAP_MISMATCH_REL", "CAUTION"]

TWO_PI = 2.0 * math.pi
K_B = sc.k
#: The run config's secular frequencies may differ from the layout's by this
#: fraction before the check calls it a problem (the libration and the held
#: acceleration of a crystal scale with the trap; a few per cent is what a
#: calibrated trap frequency is known to; common practice, no source).
TRAP_MISMATCH_REL = 0.02
#: Order of the multipole fit (as for a run's [pinning] layout).
FIT_ORDER = 6
#: Grid of crystal angles for the rigid scan (a power of 2 for the FFT).
N_PHI = 256
#: Torque harmonics below this fraction of the pinning torque are not listed
#: (the scan's rounding floor is ~1e-12 of it).
RIPPLE_FLOOR = 1e-9


# ----------------------------------------------------------------------------
# full-field potential terms (mdrotor.physics.statics.Potential "external" protocol)


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
        h0 = self._h(self.origin[None, :])[0]
        self.springs_n_per_m = 2.0 * (self.charges * self.a)[:, None] * np.diag(h0 @ h0)[None, :]
        self._k_over_q = self.springs_n_per_m / self.charges[:, None]
        self.step_m = 1e-3 * self.origin[2]

    def _e(self, pts):
        return self.geometry.field_basis(pts)[:, 0, :] * self.v_rf

    def _h(self, pts):
        return self.geometry.hessian_basis(pts)[:, 0] * self.v_rf

    def _pts(self, r):
        r = np.asarray(r, dtype=float)
        if r.shape != (len(self.a), 3):
            raise ValueError(f"RFPseudoTerm expects the {len(self.a)} ions' positions, got shape {r.shape}")
        return r, self.origin + r

    def potential(self, r):
        """phi_i (V) at the ions (N, 3) m: a_i |E|^2 - K_i r_i^2 / (2 Q_i)."""
        r, p = self._pts(r)
        e = self._e(p)
        return self.a * np.sum(e * e, axis=1) - 0.5 * np.sum(self._k_over_q * r * r, axis=1)

    def field(self, r):
        """-grad phi_i (V/m), (N, 3)."""
        r, p = self._pts(r)
        e = self._e(p)
        h = self._h(p)
        return 2.0 * self.a[:, None] * np.einsum("pij,pj->pi", h, e) + self._k_over_q * r

    def hessian(self, r):
        """Hessian of phi_i (V/m^2), (N, 3, 3)."""
        r, p = self._pts(r)
        e = self._e(p)
        h = self._h(p)
        d = self.step_m
        dh = np.stack([(self._h(p + d * u) - self._h(p - d * u)) / (2.0 * d) for u in np.eye(3)], axis=1)  # (N, k, i, j)
        third = np.einsum("pk,pkij->pij", e, dh)
        out = 2.0 * self.a[:, None, None] * (np.einsum("pik,pjk->pij", h, h) - third)
        out[:, [0, 1, 2], [0, 1, 2]] -= self._k_over_q
        return out

    def energy_many(self, r):
        """Full pseudopotential energy (J) of configurations r (K, N, 3): sum_i Q_i a_i |E|^2."""
        r = np.asarray(r, dtype=float)
        e = self._e((self.origin + r).reshape(-1, 3)).reshape(r.shape)
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


# ----------------------------------------------------------------------------
# rigid scan: torque versus crystal angle and pattern angle


def _spectral(x):
    """Spectral derivative and antiderivative (mean dropped) of periodic samples x over [0, 2 pi)."""
    K = len(x)
    m = np.fft.fftfreq(K, 1.0 / K)
    fx = np.fft.fft(x)
    d1 = 1j * m * fx
    inv = np.zeros_like(fx)
    nz = m != 0
    inv[nz] = fx[nz] / (1j * m[nz])
    if K % 2 == 0:
        d1[K // 2] = 0.0
        inv[K // 2] = 0.0
    return np.fft.ifft(d1), np.fft.ifft(inv)


def _peak(y, k):
    """Parabolic refinement of the extremum of samples y around index k (wrapping): (value, offset)."""
    n = len(y)
    a, b, c = y[(k - 1) % n], y[k], y[(k + 1) % n]
    den = a - 2 * b + c
    if den == 0:
        return b, 0.0
    off = max(-1.0, min(1.0, 0.5 * (a - c) / den))
    return b - 0.25 * (a - c) * off, off


def _torque_per_volt(layout, pts, r, q):
    """Torque about z (N m per volt of each channel) on charges q at r (K, N, 3); pts = origin + r."""
    E = layout.field_basis(pts.reshape(-1, 3)).reshape(r.shape[:2] + (-1, 3))  # (K, N, nch, 3)
    return np.einsum("n,knc->kc", q, r[..., 0, None] * E[..., 1] - r[..., 1, None] * E[..., 0])


def rigid_scan(layout, pseudo: RFPseudoTerm, positions_m, masses_kg, charges_c, plan, *, angle_rad=0.0, scale=1.0,
               stray_v_per_m=(0.0, 0.0, 0.0), n_phi: int = N_PHI, n_rows: int = 128) -> dict:
    """Torque on the rigid crystal versus its angle and the pattern angle.

    The torque about the trap axis, tau = sum_i Q_i (r_i x E(r_i))_z, is
    evaluated from the fields (E of every channel per volt, the
    pseudopotential force 2 Q a H E, the stray field) at the crystal turned
    rigidly to ``n_phi`` angles; energies and curvatures follow by spectral
    integration and differentiation in the angle (dU/dphi = -tau). Working
    from fields avoids the rounding of the large constant potential.

    Parameters
    ----------
    layout, pseudo
        The layout and its pseudopotential term (origin = crystal frame).
    positions_m : (N, 3) array
        Crystal (crystal frame, m); turned rigidly about the z axis.
    plan : RotatingPlan
    angle_rad : float
        Pattern angle offset (the config's pinning angle).
    scale : float
        Pinning multiplier.
    n_phi, n_rows : int
        Crystal-angle grid (FFT) and number of pattern angles examined.

    Returns
    -------
    dict
        ``I_kg_m2``; ``tau_pin_n_m`` (the pinning torque amplitude, the
        harmonic m = n of the rotating part); ``tau_ref_n_m`` (n c sum |Q|
        rho^n, c the achieved strength) and ``pinning_rel`` (their ratio);
        ``tau_lead_n_m`` (n c |M_n|, the leading multipole's torque on this
        crystal); ``ripple`` and ``static`` (torque amplitude per crystal-angle
        harmonic m of the rotating and of the fixed part, relative to the
        pinning torque, above :data:`RIPPLE_FLOOR`); over the pattern angles,
        the rigid libration frequency (Hz), the forward / backward torque
        before a slip (N m) and accelerations (rad/s^2), the lowest barrier
        (J, and in K), and the lag ripple (rad).
    """
    r0 = np.asarray(positions_m, dtype=float)
    q = np.asarray(charges_c, dtype=float)
    m = np.asarray(masses_kg, dtype=float)
    n = plan.order
    K = int(n_phi)
    phi = TWO_PI * np.arange(K) / K
    c, s = np.cos(phi)[:, None], np.sin(phi)[:, None]
    rot = np.empty((K,) + r0.shape)
    rot[..., 0] = c * r0[None, :, 0] - s * r0[None, :, 1]
    rot[..., 1] = s * r0[None, :, 0] + c * r0[None, :, 1]
    rot[..., 2] = r0[None, :, 2]
    pts = pseudo.origin + rot
    T = _torque_per_volt(layout, pts, rot, q)  # (K, nch)
    # pseudopotential force Q_i 2 a_i H E (full, springs included)
    flat = pts.reshape(-1, 3)
    e = pseudo._e(flat)
    h = pseudo._h(flat)
    f_ps = (2.0 * (q * pseudo.a)[None, :, None] * np.einsum("pij,pj->pi", h, e).reshape(rot.shape))
    stray = np.asarray(stray_v_per_m, dtype=float)
    f_tot = f_ps + q[None, :, None] * stray[None, None, :]
    tau_fixed = T @ plan.static_v + np.sum(rot[..., 0] * f_tot[..., 1] - rot[..., 1] * f_tot[..., 0], axis=1)
    tau_w = scale * (T @ (plan.amplitudes_v * np.exp(1j * plan.phases_rad)))  # rotating part: Re[tau_w e^{-i n theta}]
    d_tf, int_tf = _spectral(tau_fixed)
    d_tw, int_tw = _spectral(tau_w)
    u_fixed = -int_tf.real
    W = -int_tw
    kap_fixed = -d_tf.real
    kap_w = -d_tw
    I = float(np.sum(m * (r0[:, 0] ** 2 + r0[:, 1] ** 2)))
    rho = np.hypot(r0[:, 0], r0[:, 1])
    fw = np.fft.fft(tau_w) / K
    ff = np.fft.fft(tau_fixed) / K
    harm = np.fft.fftfreq(K, 1.0 / K).astype(int)
    tau_pin = abs(fw[n % K])
    rows = np.linspace(0, K, n_rows, endpoint=False).astype(int)
    th = phi[rows] + angle_rad
    idx = (rows[:, None] - np.arange(K)[None, :]) % K  # crystal angle phi = theta - lambda
    ph = np.exp(-1j * n * th)[:, None]
    U = u_fixed[idx] + np.real(W[idx] * ph)
    tau = tau_fixed[idx] + np.real(tau_w[idx] * ph)
    kap = kap_fixed[idx] + np.real(kap_w[idx] * ph)
    dl = TWO_PI / K
    per = max(1, int(round(K / n)))  # one pattern period in lag samples
    fwd, back, lib, barrier, lag = [], [], [], [], []
    for j in range(len(rows)):
        Uj, tj = U[j], tau[j]
        k0 = int(np.argmin(Uj))
        _, off = _peak(-Uj, k0)
        lag.append((k0 + off) * dl)
        lib.append(max(float(np.interp(k0 + off, [k0 - 1, k0, k0 + 1],
                                       [kap[j, (k0 - 1) % K], kap[j, k0], kap[j, (k0 + 1) % K]])), 0.0))
        # forward (lag grows): first local maximum of tau above the well bottom
        k = k0
        for _ in range(per):
            if tj[(k + 1) % K] < tj[k % K] and tj[k % K] > 0:
                break
            k += 1
        fwd.append(max(_peak(tj, k % K)[0], 0.0))
        k = k0
        for _ in range(per):
            if tj[(k - 1) % K] > tj[k % K] and tj[k % K] < 0:
                break
            k -= 1
        back.append(max(_peak(-tj, k % K)[0], 0.0))
        win_f = Uj[(k0 + np.arange(1, per + 1)) % K]
        win_b = Uj[(k0 - np.arange(1, per + 1)) % K]
        barrier.append(min(win_f.max(), win_b.max()) - Uj[k0])
    lag = np.unwrap(np.array(lag) * n) / n
    lib = np.array(lib)
    fwd, back, barrier = np.array(fwd), np.array(back), np.array(barrier)
    f_lib = np.sqrt(lib / I) / TWO_PI if I > 0 else np.zeros_like(lib)
    c_ach = abs(plan.k_corot)
    z = r0[:, 0] + 1j * r0[:, 1]
    tau_ref = n * c_ach * float(np.sum(np.abs(q) * rho ** n)) * scale
    tau_lead = n * c_ach * abs(np.sum(q * z ** n)) * scale

    def top(f, fixed):
        amp = np.abs(f) * (2.0 if fixed else 1.0)  # a real function's +-m pair, one entry
        out = []
        for k in np.argsort(-amp):
            if (fixed and harm[k] <= 0) or (not fixed and harm[k] == n) or harm[k] == 0:
                continue
            rel = amp[k] / tau_pin if tau_pin > 0 else float("inf")
            rel_ref = amp[k] / tau_ref if tau_ref > 0 else float("inf")
            if min(rel, rel_ref) < RIPPLE_FLOOR or len(out) >= 8:
                break
            out.append({"m": int(harm[k]), "torque_n_m": float(amp[k]), "rel_to_pinning": float(rel),
                        "rel_to_ref": float(rel_ref), "per_f_rot": int(abs(harm[k])) if fixed else int(abs(harm[k] - n))})
        return out

    return {
        "I_kg_m2": I,
        "tau_pin_n_m": float(tau_pin),
        "tau_ref_n_m": float(tau_ref),
        "tau_lead_n_m": float(tau_lead),
        "pinning_rel": float(tau_pin / tau_ref) if tau_ref > 0 else 0.0,
        "f_lib_rigid_hz": {"at_start": float(f_lib[0]), "min": float(f_lib.min()), "max": float(f_lib.max())},
        "torque_forward_n_m": {"min": float(fwd.min()), "max": float(fwd.max())},
        "torque_backward_n_m": {"min": float(back.min()), "max": float(back.max())},
        "alpha_forward_rad_s2": float(fwd.min() / I) if I > 0 else 0.0,
        "alpha_backward_rad_s2": float(back.min() / I) if I > 0 else 0.0,
        "barrier_j": float(barrier.min()),
        "barrier_k": float(barrier.min() / K_B),
        "lag_ripple_rad": float(0.5 * (lag.max() - lag.min())),
        "ripple": top(fw, False),
        "static": top(ff, True),
    }


# ----------------------------------------------------------------------------
# what the schedule asks for


# ----------------------------------------------------------------------------
# target, configs


def resolve_target(layout, cfg, notes: list) -> dict:
    """Pinning order, strength and angle the voltages must make.

    The run config's [pinning] is the target (it is what ``mdrotor run``
    simulates); without a run config, the layout's [design] table. A
    layout [design] that disagrees with the run config is noted, not used.
    """
    d = layout.design or {}
    if cfg is not None and cfg.pinning:
        if len(cfg.pinning) != 1:
            raise InputError("pinning", f"the electrode check handles one pinning term; the config has {len(cfg.pinning)}",
                             cfg.source)
        t = cfg.pinning[0]
        out = {"order": t.order, "strength_si": t.strength, "angle_rad": t.angle_rad, "from": f"{cfg.source} [pinning]"}
        if "order" in d and d["order"] != t.order:
            notes.append(f"the layout's [design] order {d['order']} differs from the run config's pinning order {t.order}; "
                         f"the run config's is used")
        elif "strength_si" in d and abs(d["strength_si"] - t.strength) > 1e-9 * t.strength:
            notes.append(f"the layout's [design] strength {d['strength_si']:.4g} V/m^{t.order} differs from the run config's "
                         f"{t.strength:.4g}; the run config's is used")
        if "ions" in d and d["ions"] != cfg.n_ions:
            notes.append(f"the layout is designed for {d['ions']} ions; the run config has {cfg.n_ions}")
        return out
    if cfg is not None and not cfg.pinning:
        raise InputError("pinning", "the run config has no [pinning]; the electrode check needs the pinning order and strength",
                         cfg.source)
    if "order" not in d or "strength_si" not in d:
        raise InputError("design", "expected a pinning target: a run config with [pinning] (--config RUN.toml) or "
                                   "[design] order and strength in the layout", layout.source)
    return {"order": d["order"], "strength_si": d["strength_si"], "angle_rad": 0.0, "from": f"{layout.source} [design]"}


def _design_config(layout, target):
    """A run config of the layout's [design] crystal (no schedule), or None."""

    d = layout.design or {}
    if "ions" not in d or layout.species is None:
        return None
    n = target["order"]
    raw = {"species": {"ion": layout.species}, "crystal": {"ions": d["ions"]},
           "trap": {"f_radial": "1 MHz", "f_axial": "2 MHz"},
           "pinning": {"order": n, "strength": f"{target['strength_si']!r} V/m^{n}"}}
    return from_dict(raw, f"{layout.source} [design]")


def _fitted_config(cfg, f_xyz_hz, f_drive_hz, order, strength_si, angle_rad, source):
    """The run config with the layout's harmonic trap and a given leading pinning multipole."""

    raw = copy.deepcopy(cfg.raw)
    tr = dict(raw.get("trap", {}))
    for k in ("a", "q", "f_radial", "f_axial", "radial_split", "f_drive"):
        tr.pop(k, None)
    fx, fy, fz = (float(v) for v in f_xyz_hz)
    tr.update({"f_radial": f"{0.5 * (fx + fy)!r} Hz", "radial_split": f"{fx - fy!r} Hz", "f_axial": f"{fz!r} Hz",
               "f_drive": f"{float(f_drive_hz)!r} Hz"})
    raw["trap"] = tr
    pin = raw["pinning"][0] if isinstance(raw["pinning"], list) else raw["pinning"]
    pin.pop("layout", None)  # the pure leading multipole, not the electrodes' polynomial
    pin["order"] = order
    pin["strength"] = f"{float(strength_si)!r} V/m^{order}"
    pin["angle"] = float(angle_rad)
    try:
        return from_dict(raw, source)
    except InputError as e:
        raise e.with_source(source)


def _libration(cr):
    """Frequency (Hz) of the mode labelled libration, or None."""
    for f, lab in zip(cr.modes.freq_hz, cr.modes.labels):
        if lab.startswith("libration"):
            return float(f)
    return None


def _match(a, b):
    """Largest distance (m) between the ions of two configurations, matched one to one."""
    from scipy.optimize import linear_sum_assignment

    d = np.sqrt(np.sum((a[:, None, :] - b[None, :, :]) ** 2, axis=-1))
    i, j = linear_sum_assignment(d)
    return float(np.max(d[i, j]))


# ----------------------------------------------------------------------------
# the check


@dataclass
class Design:
    """The solved design: target, pseudopotential trap, table, voltages.

    Attributes
    ----------
    layout : Layout
    run_cfg : Config or None
        The run config as given.
    cfg : Config or None
        The crystal's config (the run config, or one made from the layout's
        [design] table; None when neither names a crystal).
    target : dict
        ``order``, ``strength_si``, ``angle_rad``, ``from``.
    trap : PseudoTrap
    pseudo : RFPseudoTerm or None
    f_xyz_hz : (3,) array or None
        Harmonic secular frequencies along x, y, z (first species).
    fitted_source : str or None
    crystal_radius_m : float or None
        Radius of the crystal in the fitted picture (weights the solve).
    table : MultipoleTable
    plan : RotatingPlan
    notes : list of str
    fitted_crystal : Crystal or None
        The crystal in the fitted picture at the target strength (lab frame).
    """

    layout: object
    run_cfg: object
    cfg: object
    target: dict
    trap: object
    pseudo: object
    f_xyz_hz: object
    fitted_source: object
    crystal_radius_m: object
    table: object
    plan: object
    notes: list
    fitted_crystal: object = None


def prepare_design(layout, cfg=None, *, depth: bool = True) -> Design:
    """Pseudopotential, multipole table and rotating voltages for a run config.

    The fit (order 6, default sphere about the trap point) and the solve
    (default weights) are those of a run whose ``[pinning] layout`` names
    this layout (:func:`mdrotor.electrodes.polynomial.layout_pinning`), so the
    voltages checked and exported are the ones the run simulates.
    ``depth=False`` skips the trap depth (faster, for waveforms).
    """

    notes: list[str] = []
    target = resolve_target(layout, cfg, notes)
    n, c_target, angle = target["order"], target["strength_si"], target["angle_rad"]
    run_cfg = cfg
    if cfg is None:
        cfg = _design_config(layout, target)
        if cfg is None:
            notes.append("no crystal to check: give --config RUN.toml, or [design] ions and [rf] species in the layout")
    if cfg is not None:
        masses, charges = cfg.masses_kg, cfg.charges_c
        if layout.species is not None and cfg.species[0].name != layout.species and run_cfg is not None:
            notes.append(f"the layout's [rf] species is {layout.species}; the run config's {cfg.species[0].name} is used")
        pt = rf_pseudopotential(layout, mass_kg=float(masses[0]), charge_c=float(charges[0]), depth=depth)
    else:
        pt = rf_pseudopotential(layout, depth=depth)
    if run_cfg is not None and run_cfg.trap.f_drive_hz is not None and layout.rf_drive_hz is not None \
            and abs(run_cfg.trap.f_drive_hz - layout.rf_drive_hz) > 1e-6 * layout.rf_drive_hz:
        notes.append(f"the run config's trap.f_drive ({run_cfg.trap.f_drive_hz / 1e6:.6g} MHz) differs from the layout's rf "
                     f"drive ({layout.rf_drive_hz / 1e6:.6g} MHz); the layout's is used")
    origin = pt.null_m
    center = layout.trap_point_m
    if center is not None and np.linalg.norm(center - origin) > 1e-3 * origin[2]:
        notes.append(f"the layout's trap point is {np.linalg.norm(center - origin) * 1e6:.3g} um from the RF null; "
                     f"the multipoles are fitted about the trap point, the crystal sits at the null")
    pseudo = f_xyz = src_fit = rho_c = cr0 = None
    if cfg is not None:
        pseudo = RFPseudoTerm(layout, origin, pt.v_rf, pt.f_drive_hz, masses, charges)
        f_xyz = np.sqrt(pseudo.springs_n_per_m[0] / masses[0]) / TWO_PI
        src_fit = f"{cfg.source} (trap and pinning fitted from {layout.source})"
        fit_cfg = _fitted_config(cfg, f_xyz, pt.f_drive_hz, n, c_target, angle, src_fit)
        try:
            cr0 = compute_crystal(model_potential(fit_cfg), 0.0, seed=fit_cfg.search_seed)
        except PhysicsError as e:
            raise e.with_source(src_fit)
        rho_c = float(np.max(np.hypot(cr0.positions_m[:, 0], cr0.positions_m[:, 1])))
    # the same fit and solve as a run whose [pinning] takes this layout
    # (mdrotor.electrodes.polynomial.layout_pinning): identical voltages
    table = fit_multipoles(layout, layout.trap_point_m, order=FIT_ORDER)
    plan = solve_rotating(layout, n, c_target, table=table)
    if rho_c is not None and rho_c > 0.8 * table.radius_m:
        notes.append(f"the crystal's radius {rho_c * 1e6:.3g} um reaches beyond 80 % of the fit sphere "
                     f"({table.radius_m * 1e6:.3g} um): the fitted table and the solve's weighting describe it less well "
                     f"(the full-field check itself does not use the fit)")
    if run_cfg is not None and run_cfg.pinning and run_cfg.pinning[0].layout is not None:
        used = Path(run_cfg.pinning[0].layout.path).resolve()
        if layout.source is None or used != Path(layout.source).resolve():
            notes.append(f"the run config takes its pinning from {run_cfg.pinning[0].layout.path}; this check is of "
                         f"{layout.source}")
    return Design(layout, run_cfg, cfg, target, pt, pseudo, f_xyz, src_fit, rho_c, table, plan, notes, cr0)


def design_check(layout, cfg=None, *, n_phi: int = N_PHI, n_rows: int = 128) -> dict:
    """Check a layout against a run config's crystal and schedule.

    Parameters
    ----------
    layout : Layout
    cfg : mdrotor.config.parse.Config, optional
        The run config (crystal, species, pinning target, schedule). Without
        it, the layout's [design] table (ions, order, strength) and [rf]
        species make the crystal, and there is no schedule to compare with.
    n_phi, n_rows : int
        Grids of the rigid scan (:func:`rigid_scan`).

    Returns
    -------
    dict
        JSON-ready; see :func:`check_text` for the meaning of the entries.
        Always carries ``caution``.
    """

    ds = prepare_design(layout, cfg)
    notes, target, pt, pseudo, table, plan = ds.notes, ds.target, ds.trap, ds.pseudo, ds.table, ds.plan
    run_cfg, cfg = ds.run_cfg, ds.cfg
    n, angle = target["order"], target["angle_rad"]
    f_xyz, src_fit = ds.f_xyz_hz, ds.fitted_source
    out = {"layout": layout.source, "layout_name": layout.name, "config": run_cfg.source if run_cfg is not None else None,
           "caution": CAUTION, "target": target, "rf": pt.to_dict(), "notes": notes}
    if f_xyz is not None:
        out["rf"]["secular_xyz_hz"] = [float(x) for x in f_xyz]
    if run_cfg is not None:
        masses, charges = cfg.masses_kg, cfg.charges_c
        f_cfg = np.sqrt(run_cfg.trap.omega_sq(masses[:1], charges[:1]))[0] / TWO_PI
        out["rf"]["run_config_secular_xyz_hz"] = [float(x) for x in f_cfg]
        dev = float(np.max(np.abs(f_cfg / f_xyz - 1.0)))
        out["rf"]["run_config_mismatch_rel"] = dev
        if dev > 0.01:
            notes.append(f"the run config's trap frequencies differ from the layout's pseudopotential by up to "
                         f"{dev * 100:.3g} %; the check uses the layout's")
    out["table"] = _table_dict(layout, table)
    out["plan"] = plan.to_dict()
    out["plan"]["peak_v"] = {ch: float(abs(s) + a) for ch, s, a in zip(plan.channels, plan.static_v, plan.amplitudes_v)}
    out["plan"]["fit_residual_v"] = plan.fit_residual_v
    out["plan"]["crystal_radius_m"] = plan.crystal_radius_m
    verdict = []
    dev = out["rf"].get("run_config_mismatch_rel", 0.0)
    if dev > TRAP_MISMATCH_REL:
        fc, fl = out["rf"]["run_config_secular_xyz_hz"], out["rf"]["secular_xyz_hz"]
        verdict.append(f"the run config's trap ({', '.join(f'{x / 1e6:.4g}' for x in fc)} MHz) differs from the layout's "
                       f"({', '.join(f'{x / 1e6:.4g}' for x in fl)} MHz) by {dev * 100:.3g} %, above "
                       f"{TRAP_MISMATCH_REL * 100:g} %: the run would simulate another trap than these electrodes make")
    if not plan.reached:
        verdict.append(plan.shortfall_text())
    if cfg is None:
        out["verdict"] = {"ok": not verdict, "problems": verdict}
        return out
    masses, charges = cfg.masses_kg, cfg.charges_c
    # fitted picture with the achieved leading multipole
    k_co = complex(plan.k_corot)
    c_ach = abs(k_co)
    angle_fit = angle - math.atan2(k_co.imag, k_co.real) / n
    fit_cfg = _fitted_config(cfg, f_xyz, pt.f_drive_hz, n, c_ach, angle_fit, src_fit)
    try:  # relaxed from the target-strength crystal (the global search was done there)
        cr_fit = compute_crystal(model_potential(fit_cfg), 0.0, start=ds.fitted_crystal.positions_m)
    except PhysicsError as e:
        raise e.with_source(src_fit)
    hold_fit = assess_config(fit_cfg, 0.0, start=cr_fit.positions_m)
    stray = np.asarray(cfg.trap.stray_field_v_per_m, dtype=float)
    # the pinning core's verdict: the crystal without the rotating voltages
    # (first order) and the relaxed held curve with them, lab frame
    pot_off = full_potential(layout, pseudo, masses, charges, plan.static_v, stray_v_per_m=stray)
    V0 = plan_voltages(plan, angle, 1.0)
    pot_on = full_potential(layout, pseudo, masses, charges, V0, stray_v_per_m=stray)
    try:
        hold = pin.assess(pot_on, pot_off, [(n, c_ach)], start=cr_fit.positions_m)
    except PhysicsError as e:
        raise e.with_source(cfg.source)
    pinned = hold.held
    moments = {m_: pin.moment_rel(hold.positions_off_m, masses, charges, m_) for m_ in range(1, 7)}
    lowest = pin.lowest_moment_order(hold.positions_off_m, masses, charges, range(2, 7))
    full = {"pinned": hold.verdict == "pinned", "held": pinned, "verdict": hold.to_dict(),
            "order": hold.order if pinned else None, "first_order_rel": moments[n],
            "moments_rel": {str(k): v for k, v in moments.items()}, "lowest_moment_order": lowest}
    if hold.verdict == "none":
        verdict.append(f"the crystal is not held by the order-{n} pattern: {hold.reason}"
                       + (f"; its lowest in-plane moment is order {lowest}" if lowest else ""))
    elif hold.verdict == "deformation":
        verdict.append(f"the order-{n} pattern finds no moment on the crystal: it is {hold.describe()}"
                       + (f"; its lowest in-plane moment is order {lowest}" if lowest else ""))
    pos = hold.positions_m
    f_lib_mode = None
    modes_lab = None
    if pinned:
        try:
            md = normal_modes(pot_on, pos)
            modes_lab = [{"freq_hz": float(f), "label": lab, "kind": k, "plane": p}
                         for f, lab, k, p in zip(md.freq_hz, md.labels, md.kinds, md.planes)]
            f_lib_mode = next((float(f) for f, lab in zip(md.freq_hz, md.labels) if lab.startswith("libration")), None)
        except PhysicsError as e:
            notes.append(f"normal modes in the full field (lab frame): {e.expected}")
    scan = rigid_scan(layout, pseudo, pos, masses, charges, plan, angle_rad=angle, scale=1.0, stray_v_per_m=stray,
                      n_phi=n_phi, n_rows=n_rows)
    com = np.sum(masses[:, None] * pos, axis=0) / np.sum(masses)
    rho = np.hypot(pos[:, 0], pos[:, 1])
    lab = {
        "positions_m": pos.tolist(), "energy_j": float(pot_on.energy(pos)), "radius_m": float(rho.max()),
        "moment_of_inertia_kg_m2": scan["I_kg_m2"], "f_lib_mode_hz": f_lib_mode,
        "f_lib_rigid_hz": scan["f_lib_rigid_hz"] if pinned else None,
        "f_lib_held_hz": hold.f_lib_hz,
        "alpha_forward_rad_s2": hold.alpha_forward_rad_s2,
        "alpha_backward_rad_s2": hold.alpha_backward_rad_s2,
        "barrier_k": hold.barrier_j / K_B,
        "pinning_torque_n_m": scan["tau_pin_n_m"], "pinning_rel": scan["pinning_rel"], "modes": modes_lab,
    }
    full["lab"] = lab
    f_lib_fit_mode = _libration(cr_fit)
    fitted = {"config_source": src_fit, "strength_si": c_ach, "angle_rad": angle_fit,
              "trap_xyz_hz": [float(x) for x in f_xyz], "positions_m": cr_fit.positions_m.tolist(),
              "f_lib_rigid_hz": hold_fit.f_lib_rigid_hz, "f_lib_held_hz": hold_fit.f_lib_hz, "f_lib_mode_hz": f_lib_fit_mode,
              "alpha_max_rad_s2": hold_fit.alpha_forward_rad_s2, "verdict": hold_fit.verdict, "config_text": fit_cfg.text}
    cmp_ = {"max_position_difference_m": _match(pos, cr_fit.positions_m)}
    if pinned and hold_fit.f_lib_hz > 0:
        cmp_["f_lib_rigid_rel"] = scan["f_lib_rigid_hz"]["at_start"] / hold_fit.f_lib_rigid_hz - 1.0
        cmp_["f_lib_held_rel"] = hold.f_lib_hz / hold_fit.f_lib_hz - 1.0
        cmp_["alpha_rel"] = hold.alpha_forward_rad_s2 / hold_fit.alpha_forward_rad_s2 - 1.0
        if f_lib_mode and f_lib_fit_mode:
            cmp_["f_lib_mode_rel"] = f_lib_mode / f_lib_fit_mode - 1.0
    # what the leading-multipole picture leaves out: the order-n torque of the
    # exact field on this crystal against n c |M_n| (terms such as S_{n+2,n}
    # add to the same harmonic), and the radius change (anharmonic
    # pseudopotential); rigid f_lib ~ sqrt(c) rho^(n/2 - 1) then predicts
    # the difference to first order
    lead_miss = scan["tau_pin_n_m"] / scan["tau_lead_n_m"] - 1.0 if scan["tau_lead_n_m"] > 0 else float("nan")
    rho_fit_c = np.hypot(cr_fit.positions_m[:, 0], cr_fit.positions_m[:, 1])
    radius_rel = float(np.mean(rho) / np.mean(rho_fit_c) - 1.0)
    cmp_["leading_multipole_miss"] = float(lead_miss)
    cmp_["radius_rel"] = radius_rel
    cmp_["f_lib_predicted_rel"] = float(0.5 * lead_miss + (0.5 * n - 1.0) * radius_rel)
    stray_fx = {"centre_offset_m": [float(x) for x in com], "out_of_plane_m": float(np.max(np.abs(pos[:, 2] - com[2]))),
                "ripple": scan["ripple"], "static": scan["static"], "lag_ripple_rad": scan["lag_ripple_rad"] if pinned else None,
                "unwanted_terms": plan.unwanted()[:6]}
    # the schedule
    need = None
    rot = None
    if run_cfg is not None and abs(run_cfg.f_start_hz) >= 10.0:
        notes.append(f"the schedule starts at f_rot = {run_cfg.f_start_hz / 1e3:.6g} kHz; the first check above is in the "
                     f"lab frame")
    if run_cfg is not None and run_cfg.schedule is not None:
        need = run_cfg.schedule.acceleration_profile()
        f_max, s_max = need["f_max_hz"], need["scale_at_f_max"]
        mg = pin.schedule_margin(hold, need, 1.0, [n]) if pinned else {"ratio": 0.0, "t_s": None, "needed_rad_s2": 0.0,
                                                                        "held_rad_s2": 0.0}
        if pinned and abs(f_max) >= 10.0 and s_max > 0:
            Vr = plan_voltages(plan, angle, s_max)
            pot_r = full_potential(layout, pseudo, masses, charges, Vr, f_rot_hz=f_max)
            pot_r_off = full_potential(layout, pseudo, masses, charges, plan.static_v, f_rot_hz=f_max)
            rot = {"f_rot_hz": f_max, "t_s": need["t_f_max_s"], "scale": s_max}
            try:
                cr_r = compute_crystal(pot_r, f_max, start=pos)
                rot["f_lib_mode_hz"] = _libration(cr_r)
                rot["positions_m"] = cr_r.positions_m.tolist()
                rot["moment_of_inertia_kg_m2"] = cr_r.moment_of_inertia_kg_m2
                hold_r = pin.assess(pot_r, pot_r_off, [(n, c_ach * s_max)], start=cr_r.positions_m)
                rot["verdict"] = hold_r.verdict
                rot["f_lib_held_hz"] = hold_r.f_lib_hz
                rot["f_lib_rigid_hz"] = hold_r.f_lib_rigid_hz
                rot["alpha_forward_rad_s2"] = hold_r.alpha_forward_rad_s2
                rot["alpha_backward_rad_s2"] = hold_r.alpha_backward_rad_s2
                # the margin: the worse of the lab and the rotating crystal
                if hold_r.held:
                    mg_r = pin.schedule_margin(hold_r, need, s_max, [n])
                    if mg_r["ratio"] < mg["ratio"]:
                        mg = mg_r
                else:
                    verdict.append(f"at f_rot = {f_max / 1e3:.6g} kHz the pattern does not hold the crystal: {hold_r.reason}")
                    mg = {"ratio": 0.0, "t_s": need["t_f_max_s"], "needed_rad_s2": need["alpha_max_rad_s2"],
                          "held_rad_s2": 0.0}
                cr_rf = compute_crystal(model_potential(fit_cfg, f_max, pin_scale=[s_max]), f_max, start=cr_r.positions_m)
                rot["fitted_f_lib_mode_hz"] = _libration(cr_rf)
                rot["fitted_alpha_max_rad_s2"] = assess_config(fit_cfg, f_max, scales=[s_max],
                                                                   start=cr_rf.positions_m).alpha_forward_rad_s2
            except PhysicsError as e:
                rot["error"] = e.expected
                verdict.append(f"at f_rot = {f_max / 1e3:.6g} kHz: {e.expected}")
        T = run_cfg.initial.temperature_k
        full["schedule"] = {"alpha_needed_max_rad_s2": need["alpha_max_rad_s2"], "t_alpha_needed_max_s": need["t_alpha_max_s"],
                            "f_max_hz": f_max, "margin": mg["ratio"], "margin_t_s": mg["t_s"],
                            "margin_needed_rad_s2": mg["needed_rad_s2"], "margin_held_rad_s2": mg["held_rad_s2"],
                            "initial_temperature_k": T,
                            "barrier_over_kT": (lab["barrier_k"] / T) if T > 0 and pinned else None,
                            "barrier_kT_min": pin.BARRIER_KT_MIN}
        if pinned and mg["ratio"] < 1.0:
            verdict.append(f"the spin-up needs {mg['needed_rad_s2']:.3e} rad/s^2 at t = {mg['t_s'] * 1e3:.4g} ms but the "
                           f"pinning holds only {mg['held_rad_s2']:.3e} (margin {mg['ratio']:.3g})")
        bkt = full["schedule"]["barrier_over_kT"]
        if bkt is not None and bkt < pin.BARRIER_KT_MIN:
            verdict.append(f"the pinning barrier is only {bkt:.3g} k_B T_initial (below {pin.BARRIER_KT_MIN:g}): the crystal "
                           f"hops between the pinning wells at its starting temperature")
    full["rotating"] = rot
    full["stray"] = stray_fx
    out["full"] = full
    out["fitted"] = fitted
    out["comparison"] = cmp_
    out["verdict"] = {"ok": not verdict, "problems": verdict}
    return out


def _table_dict(layout, table):
    k = table.k_inplane()
    rows = []
    for c, name in enumerate(table.names):
        i = layout.channels.index(name)
        rows.append({"channel": name, "role": layout.channel_roles[i], "limit_v": float(layout.channel_limits_v[i]),
                     "k_abs_per_v": [float(abs(x)) for x in k[c]], "k_arg_rad": [float(np.angle(x)) for x in k[c]],
                     "residual_rms_v_per_v": float(table.residual_rms[c])})
    return {"center_m": [float(x) for x in table.center_m], "radius_m": table.radius_m, "order": table.order,
            "convention": "in-plane k_n per volt: the channel's potential contains Re[k_n (x + i y)^n], V/m^n per V",
            "channels": rows}


# ----------------------------------------------------------------------------
# text


def _khz(f):
    return "-" if f is None else f"{f / 1e3:.6g} kHz"


def _pct(x):
    return "-" if x is None else f"{x * 100:+.3g} %"


def check_text(d: dict) -> str:
    """Human-readable report of :func:`design_check`."""
    L = []
    L.append(f"electrode design check: {d['layout_name']} ({d['layout']})")
    if d["config"]:
        L.append(f"run config: {d['config']}")
    L.append(f"CAUTION: {d['caution']}")
    rf = d["rf"]
    L.append("")
    L.append(f"RF pseudopotential ({rf['v_rf']:.4g} V amplitude at {rf['f_drive_hz'] / 1e6:.6g} MHz)")
    L.append(f"  RF null              ({', '.join(f'{x:.4f}' for x in rf['null_um'])}) um, residual |E_rf| {rf['null_field_v_per_m']:.2g} V/m")
    L.append(f"  secular frequencies  {', '.join(f'{f / 1e3:.6g}' for f in rf['secular_hz'])} kHz (principal axes, ascending)")
    if "run_config_secular_xyz_hz" in rf:
        L.append(f"  x, y, z              {', '.join(f'{f / 1e3:.6g}' for f in rf['secular_xyz_hz'])} kHz; run config "
                 f"{', '.join(f'{f / 1e3:.6g}' for f in rf['run_config_secular_xyz_hz'])} kHz")
    L.append(f"  Mathieu q            {', '.join(f'{x:.4g}' for x in rf['q'])}")
    L.append(f"  depth                {rf['depth_ev']:.4g} eV")
    tb = d["table"]
    L.append("")
    L.append(f"multipole table of the dc channels: |k_n| per volt (V/m^n per V), about "
             f"({', '.join(f'{x * 1e6:.4g}' for x in tb['center_m'])}) um, fit radius {tb['radius_m'] * 1e6:.4g} um")
    L.append("  channel      limit V  " + "".join(f"{'n=' + str(k):>11s}" for k in range(1, tb["order"] + 1)) + "   residual V/V")
    for r in tb["channels"]:
        if r["role"] != "dc":
            continue
        L.append(f"  {r['channel']:<12s} {r['limit_v']:7.4g}  " + "".join(f"{x:11.3e}" for x in r["k_abs_per_v"])
                 + f"   {r['residual_rms_v_per_v']:.2e}")
    t = d["target"]
    n = t["order"]
    p = d["plan"]
    L.append("")
    L.append(f"pinning target: order {n}, c = {t['strength_si']:.4g} V/m^{n} (from {t['from']})")
    L.append(f"solved voltages, V(theta) = static + amplitude cos({n} theta - phase), theta the pinning angle:")
    L.append("  channel      static V  amplitude V  phase deg   peak/limit")
    for ch in p["channels"]:
        if ch["amplitude_v"] == 0 and ch["static_v"] == 0:
            continue
        pk = abs(ch["static_v"]) + ch["amplitude_v"]
        L.append(f"  {ch['name']:<12s} {ch['static_v']:8.4f}  {ch['amplitude_v']:11.4f}  {math.degrees(ch['phase_rad']):9.2f}"
                 f"   {pk:.4g} / {ch['limit_v']:.4g} V")
    kc = complex(p["k_corot"]["re"], p["k_corot"]["im"])
    kk = complex(p["k_counter"]["re"], p["k_counter"]["im"])
    L.append(f"  achieved: co-rotating {abs(kc):.6g} V/m^{n}, counter-rotating {abs(kk):.3g} V/m^{n}; "
             f"target {'reached' if p['reached'] else 'NOT reached'}")
    unw = p["unwanted"][:4]
    if unw:
        L.append("  largest unwanted terms (rms on the crystal sphere / target's): "
                 + ", ".join(f"(l={u['l']}, m={u['m']}) {u['rel'] * 100:.2g} %" for u in unw))
    if "full" not in d:
        for note in d["notes"]:
            L.append(f"note: {note}")
        L.append("")
        L.append("verdict: " + ("OK" if d["verdict"]["ok"] else "PROBLEMS: " + "; ".join(d["verdict"]["problems"])))
        L.append(f"CAUTION: {d['caution']}")
        return "\n".join(L)
    fu, fi, cm = d["full"], d["fitted"], d["comparison"]
    lab = fu["lab"]
    L.append("")
    L.append("crystal in the full electrode field (pseudopotential of the rf electrodes per ion + dc electrodes at the solved voltages)")
    L.append(f"  lab frame: radius {lab['radius_m'] * 1e6:.4g} um, I = {lab['moment_of_inertia_kg_m2']:.4e} kg m^2")
    vd = fu["verdict"]
    if vd["verdict"] == "pinned":
        L.append(f"  pinned: yes, by order {fu['order']} (the crystal without the rotating voltages has "
                 f"|M_{n}| = {fu['first_order_rel']:.3g} of sum|Q| r^{n})")
    elif vd["verdict"] == "deformation":
        L.append(f"  pinned: only through its deformation, wells of order {fu['order']} (|M_{n}| = "
                 f"{fu['first_order_rel']:.2g} of sum|Q| r^{n} without the rotating voltages)")
    else:
        lo = fu["lowest_moment_order"]
        L.append(f"  pinned: NO ({vd['reason']}" + (f"; its lowest in-plane moment is order {lo})" if lo else ")"))
    if fu["held"]:
        L.append("                                 full field        fitted multipole    difference")
        L.append(f"  libration (normal mode)        {_khz(lab['f_lib_mode_hz']):<17s} {_khz(fi['f_lib_mode_hz']):<19s} {_pct(cm.get('f_lib_mode_rel'))}")
        L.append(f"  libration (relaxed crystal)    {_khz(lab['f_lib_held_hz']):<17s} {_khz(fi['f_lib_held_hz']):<19s} {_pct(cm.get('f_lib_held_rel'))}")
        fr = lab["f_lib_rigid_hz"]
        L.append(f"  libration (rigid crystal)      {_khz(fr['at_start']):<17s} {_khz(fi['f_lib_rigid_hz']):<19s} {_pct(cm.get('f_lib_rigid_rel'))}")
        L.append(f"  largest acceleration (rad/s^2) {lab['alpha_forward_rad_s2']:<17.4e} {fi['alpha_max_rad_s2']:<19.4e} {_pct(cm.get('alpha_rel'))}")
        L.append(f"    (relaxed crystal at the configured pattern angle; rigid libration {fr['min'] / 1e3:.6g} to "
                 f"{fr['max'] / 1e3:.6g} kHz over a turn of the pattern)")
        L.append(f"  pinning barrier                {lab['barrier_k'] * 1e3:.4g} mK x k_B")
    L.append(f"  largest ion displacement, full vs fitted: {cm['max_position_difference_m'] * 1e9:.3g} nm")
    if fu["held"]:
        L.append(f"  what the fitted picture misses: order-{n} torque {_pct(cm['leading_multipole_miss'])}, crystal radius "
                 f"{_pct(cm['radius_rel'])} -> rigid libration {_pct(cm['f_lib_predicted_rel'])} expected")
    sch = fu.get("schedule")
    if sch:
        L.append("")
        L.append(f"spin-up: needs at most {sch['alpha_needed_max_rad_s2']:.4e} rad/s^2 (2 pi df_rot/dt at t = "
                 f"{sch['t_alpha_needed_max_s'] * 1e3:.4g} ms), up to f_rot = {sch['f_max_hz'] / 1e3:.6g} kHz")
        if fu["held"]:
            L.append(f"  margin (held / needed, smallest over the schedule): {sch['margin']:.4g} at t = "
                     f"{sch['margin_t_s'] * 1e3:.4g} ms" if sch["margin_t_s"] is not None else "  margin: no acceleration planned")
            if sch["barrier_over_kT"] is not None:
                L.append(f"  pinning barrier / k_B T_initial = {sch['barrier_over_kT']:.4g} (T = {sch['initial_temperature_k'] * 1e3:.4g} mK; "
                         f"below {sch['barrier_kT_min']:g} is a problem)")
        rot = fu.get("rotating")
        if rot:
            if "error" in rot:
                L.append(f"  at f_rot = {rot['f_rot_hz'] / 1e3:.6g} kHz: {rot['error']}")
            else:
                L.append(f"  rotating frame at f_rot = {rot['f_rot_hz'] / 1e3:.6g} kHz (pinning x {rot['scale']:.3g}): libration "
                         f"{_khz(rot['f_lib_mode_hz'])} (fitted {_khz(rot['fitted_f_lib_mode_hz'])}; relaxed crystal "
                         f"{_khz(rot['f_lib_held_hz'])}), largest acceleration "
                         f"{rot['alpha_forward_rad_s2']:.4e} rad/s^2 (fitted {rot['fitted_alpha_max_rad_s2']:.4e})")
    st = fu["stray"]
    L.append("")
    L.append("stray multipoles' effect")
    L.append(f"  crystal centre offset from the RF null: ({', '.join(f'{x * 1e9:.3g}' for x in st['centre_offset_m'])}) nm; "
             f"out of plane: {st['out_of_plane_m'] * 1e9:.3g} nm")
    rel, what = ("rel_to_pinning", "the pinning torque") if fu["held"] else ("rel_to_ref", "n c sum|Q| r^n")
    if st["ripple"]:
        L.append(f"  torque ripple while rotating (rotating voltages; order, frequency in the pattern's frame, ratio to {what}): "
                 + ", ".join(f"{h['m']} at {h['per_f_rot']} f_rot {h[rel]:.2g}" for h in st["ripple"][:4]))
    if st["static"]:
        L.append(f"  static torque (pseudopotential, static voltages, stray field; order, ratio to {what}): "
                 + ", ".join(f"{h['m']} {h[rel]:.2g}" for h in st["static"][:3]))
    if not st["ripple"] and not st["static"]:
        L.append(f"  no torque harmonic other than the pinning above {RIPPLE_FLOOR:.0e} of {what}")
    if st["lag_ripple_rad"] is not None:
        L.append(f"  lag ripple over a turn: +-{st['lag_ripple_rad'] * 1e3:.3g} mrad")
    for note in d["notes"]:
        L.append(f"note: {note}")
    L.append("")
    L.append("verdict: " + ("OK" if d["verdict"]["ok"] else "PROBLEMS: " + "; ".join(d["verdict"]["problems"])))
    L.append(f"CAUTION: {d['caution']}")
    return "\n".join(L)
