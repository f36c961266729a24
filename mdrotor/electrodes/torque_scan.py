"""Rigid scan: the torque of a layout's field on a crystal turned rigidly.

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

The scan needs the layout, its pseudopotential term
(:class:`mdrotor.electrodes.full_field.RFPseudoTerm`) and the rotating plan;
the design check (:mod:`mdrotor.studies.design_check`) reports it.
"""

from __future__ import annotations

import math

import numpy as np

from mdrotor.electrodes.full_field import RFPseudoTerm
from mdrotor.physics.constants import K_B

__all__ = ["rigid_scan", "N_PHI", "RIPPLE_FLOOR"]

TWO_PI = 2.0 * math.pi
#: Grid of crystal angles for the rigid scan (a power of 2 for the FFT).
N_PHI = 256
#: Torque harmonics below this fraction of the pinning torque are not listed
#: (the scan's rounding floor is ~1e-12 of it).
RIPPLE_FLOOR = 1e-9


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
    e = pseudo.rf_field(flat)
    h = pseudo.rf_hessian(flat)
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

