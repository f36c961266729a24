"""Observables of raw trajectory states (vectorised over trajectories).

At an observation time every trajectory gets:

* ``L_hbar``: L_z of all ions about the trap axis, in units of hbar;
  ``L_com_hbar``: about the centre of mass.
* ``f_rot_hz``: its own rotation rate w / 2 pi: the rate of the rigidly
  rotating (centrifugally stretched) equilibrium with the same L_com,
  I_eq(w) w = L_com (while pinned, L_com / I_com of the instantaneous
  configuration).
* ``lag_rad``, ``slips``: orientation lag behind the pinning angle, wrapped
  into (-pi/n, pi/n], and the net number of pinning wells slipped
  (tracked inside the kernel; see :mod:`mdrotor.kernels`).
* ``lost`` (an ion beyond the loss radius), ``reordered`` (ions changed
  sites: the best rotation with the original labels leaves a site
  assignment, by :func:`scipy.optimize.linear_sum_assignment`, that is not
  the identity), ``nonfinite``.
* ``mode_n``: phonon numbers of the co-rotating-frame modes (module
  docstring of :mod:`mdrotor.statics`): the deviations from the equilibrium
  of the crystal rotating at w (centrifugally stretched) are projected onto
  its gyroscopic modes; n_k = E_k / (hbar w_k) - 1/2 with Wigner sampling.
  While the pinning is on, the frame is the pinning's (w = 2 pi f_rot(t),
  the pinning static in it) and the libration is one of the modes. When it
  is off, each trajectory is measured about the crystal rotating at its own
  w; equilibria are computed on a grid of w spanning the ensemble (spacing
  <= 1 kHz, at most 32 nodes) and interpolated linearly, modes taken from
  the nearest node (their frequencies change by ~1e-4 relative per kHz).

Status flags (:class:`Status`, the one owner of the bits): 1 slipped, 2 lost
ion, 4 reordered, 8 non-finite (0: ok). Trajectories with a lost ion or a
non-finite value are left out of every statistic of L, the rotation rate,
the lag and the phonons (:func:`usable`).
"""

from __future__ import annotations

import enum
from dataclasses import dataclass, replace

import numpy as np
from scipy import constants as sc

from .frame import alignment_angle, angular_momentum, rotate_positions, rotate_states

HBAR = sc.hbar
TWO_PI = 2.0 * np.pi


class Status(enum.IntFlag):
    """Per-trajectory status flags, stored as the integer ``status`` arrays."""

    OK = 0
    SLIPPED = 1
    LOST = 2
    REORDERED = 4
    NONFINITE = 8

    @classmethod
    def describe(cls) -> str:
        """The bits in words, as stored in result files."""
        return "1 slipped, 2 lost ion, 4 reordered, 8 non-finite"


# trajectories with these flags are left out of the statistics of L, the rate, the lag and the phonons
EXCLUDED = Status.LOST | Status.NONFINITE


def usable(status) -> np.ndarray:
    """Mask of the trajectories that enter the statistics: finite and bound
    (no ion lost). ``status``: the integer status array."""
    return (np.asarray(status) & int(EXCLUDED)) == 0
W_GRID_HZ = 1000.0


@dataclass
class ModeFrame:
    """Equilibria and modes used to measure one observation."""

    f_hz: np.ndarray            # (K,) frame rotation rates
    r_eq: np.ndarray            # (K, N, 3) equilibria (aligned, same labels)
    modes: list                 # K Modes
    pinned: bool


def mode_frame(plan, t_s: float, w_traj: np.ndarray, pinned: bool) -> ModeFrame:
    """Equilibria and modes to measure trajectories at time t."""
    from .statics import compute_crystal, normal_modes

    sched = plan.schedule
    if pinned:
        f = float(sched.f_rot_hz(t_s)) if sched is not None else plan.f0_hz
        theta = float(sched.theta_rad(t_s)) if sched is not None else 0.0
        scales = plan.pin_scales(t_s)
        pot = plan.potential(f, theta, scales)
        start = rotate_positions(plan.crystal0.positions_m, theta - plan.theta0)
        cr = compute_crystal(pot, f, start=start)
        return ModeFrame(np.array([f]), cr.positions_m[None], [cr.modes], True)
    ok = np.isfinite(w_traj)
    wmin, wmax = (np.min(w_traj[ok]), np.max(w_traj[ok])) if np.any(ok) else (0.0, 0.0)
    if len(plan.masses) == 1 or max(abs(wmin), abs(wmax)) < TWO_PI * W_GRID_HZ:
        # not rotating (or a single ion): the lab frame, static anisotropy and stray field included
        cr = compute_crystal(plan.potential(0.0, 0.0, np.zeros(len(plan.pin_orders))), 0.0, start=plan.crystal0.positions_m)
        return ModeFrame(np.array([0.0]), cr.positions_m[None], [cr.modes], False)
    # L / I_inst scatters around the rate of the relative equilibrium with
    # the same L by the thermal stretch of I: widen the grid to cover it
    pad = 0.03 * max(abs(wmin), abs(wmax)) + TWO_PI * W_GRID_HZ
    w_lim = 0.98 * plan.omega_radial_min
    wmin, wmax = max(wmin - pad, -w_lim), min(wmax + pad, w_lim)
    k = int(np.clip(1 + np.ceil((wmax - wmin) / (TWO_PI * W_GRID_HZ)), 1, 32))
    fs = np.linspace(wmin, wmax, k) / TWO_PI
    r_list, modes = [], []
    start = plan.crystal0.positions_m
    for f in fs:
        pot = plan.potential(f, 0.0, np.zeros(len(plan.pin_orders)))
        r = compute_crystal(pot, f, start=start).positions_m
        # same orientation and labels as the previous node (rotating an
        # equilibrium of this rotation-symmetric potential gives another one)
        phi = alignment_angle((start[:, 0] + 1j * start[:, 1])[:, None], (r[:, 0] + 1j * r[:, 1])[:, None], plan.masses)[0]
        r = rotate_positions(r, -phi)
        start = r
        r_list.append(r)
        modes.append(normal_modes(replace(pot, omega_frame=TWO_PI * f), r))
    return ModeFrame(fs, np.array(r_list), modes, False)


def v_rigid_gen(r_eq: np.ndarray, wf: np.ndarray) -> np.ndarray:
    """z x (w z x r) = -w (x, y, 0): how a small rotation changes the
    rigid-rotation velocity; r_eq (T, N, 3), wf (T,) rad/s."""
    out = np.zeros_like(r_eq)
    out[:, :, 0] = -wf[:, None] * r_eq[:, :, 0]
    out[:, :, 1] = -wf[:, None] * r_eq[:, :, 1]
    return out


def observe(plan, pos: np.ndarray, vel: np.ndarray, t_s: float, lag_u: np.ndarray, *,
            window_s: float | None = None, L_z: np.ndarray | None = None) -> dict:
    """All per-trajectory observables at time ``t_s`` (see module docstring).

    ``window_s``: pos and vel are secular estimates filtered by RF-period
    windows (:meth:`mdrotor.engine._Stepper.observe`); each mode's normal
    coordinates are divided by the filters' known gains at its frequency,
    sin(w T) / (w T) for positions and sinc^2(w T / 2) for velocities.
    ``L_z`` (J s): the angular momentum to report instead of the one from
    pos and vel (the RF-period average of the instantaneous L_z)."""
    from scipy.optimize import linear_sum_assignment

    m = plan.masses
    n_traj = pos.shape[2]
    nonfinite = ~np.all(np.isfinite(pos), axis=(0, 1)) | ~np.all(np.isfinite(vel), axis=(0, 1))
    safe_pos = np.where(nonfinite[None, None], 0.0, pos)
    safe_vel = np.where(nonfinite[None, None], 0.0, vel)
    lz, lcom, icom = angular_momentum(safe_pos, safe_vel, m)
    if L_z is not None:
        lcom = lcom + (L_z - lz)
        lz = np.asarray(L_z, dtype=float)
    w = np.where(icom > 0, lcom / np.where(icom > 0, icom, 1.0), 0.0)
    lost = np.any(safe_pos[0] ** 2 + safe_pos[1] ** 2 + safe_pos[2] ** 2 > plan.loss_radius_m**2, axis=0)
    out = {"L_hbar": lz / HBAR, "L_com_hbar": lcom / HBAR, "f_rot_hz": w / TWO_PI,
           "lost": lost, "nonfinite": nonfinite}
    # lag and slips (from the kernel's unwrapped phase)
    if plan.lag_n > 0:
        n = plan.lag_n
        lag_unwrapped = -(lag_u[0] - plan.lag_u_ref) / n
        slips = np.rint(lag_unwrapped / (TWO_PI / n)).astype(np.int64)
        out["lag_rad"] = lag_unwrapped - slips * (TWO_PI / n)
        out["slips"] = slips
    else:
        out["lag_rad"] = np.zeros(n_traj)
        out["slips"] = np.zeros(n_traj, dtype=np.int64)
    # modes
    pinned = plan.pinned_at(t_s)
    # a crystal spinning faster than the radial confinement flies apart
    lost |= np.abs(w) >= 0.98 * plan.omega_radial_min
    out["lost"] = lost
    good = ~nonfinite & ~lost
    frame = mode_frame(plan, t_s, np.where(good, w, np.nan), pinned)
    if not pinned and len(frame.f_hz) > 1:  # (a single node is the lab frame or a rigid ensemble)
        # the crystal's own rate: the relative equilibrium with the same L,
        # I_eq(w) w = L_com, inverted on the grid (I_eq(w) w increases with w)
        w_nodes = TWO_PI * frame.f_hz
        r = frame.r_eq
        rc = r - np.sum(m[None, :, None] * r, axis=1, keepdims=True) / np.sum(m)
        i_nodes = np.sum(m[None, :] * (rc[:, :, 0] ** 2 + rc[:, :, 1] ** 2), axis=1)
        w = np.interp(lcom, i_nodes * w_nodes, w_nodes)
        out["f_rot_hz"] = w / TWO_PI
    n_modes = len(frame.modes[0].omega)
    mode_n = np.full((n_traj, n_modes), np.nan)
    reordered = np.zeros(n_traj, dtype=bool)
    sqm = np.sqrt(m)
    z = safe_pos[0] + 1j * safe_pos[1]
    zc = np.sum(m[:, None] * z, axis=0) / np.sum(m)
    if pinned:
        node = np.zeros(n_traj, dtype=np.int64)
        weight = np.zeros(n_traj)
        f_frame = np.full(n_traj, frame.f_hz[0])
    else:
        k = len(frame.f_hz)
        if k == 1:
            node = np.zeros(n_traj, dtype=np.int64)
            weight = np.zeros(n_traj)
        else:
            x = (w / TWO_PI - frame.f_hz[0]) / (frame.f_hz[1] - frame.f_hz[0])
            node = np.clip(np.floor(x).astype(np.int64), 0, k - 2)
            weight = np.clip(x - node, 0.0, 1.0)
        f_frame = w / TWO_PI
        if len(frame.f_hz) == 1 and frame.f_hz[0] == 0.0:
            f_frame = np.zeros(n_traj)  # lab frame
    kk = len(frame.f_hz)
    nxt = np.minimum(node + 1, kk - 1)
    r_eq = (1 - weight)[:, None, None] * frame.r_eq[node] + weight[:, None, None] * frame.r_eq[nxt]  # (T, N, 3)
    nearest = np.where(weight > 0.5, nxt, node)
    z_eq = (r_eq[:, :, 0] + 1j * r_eq[:, :, 1]).T  # (N, T)
    z_eq_c = z_eq - np.sum(m[:, None] * z_eq, axis=0) / np.sum(m)
    phi = alignment_angle(z_eq_c, z - zc, m)
    # Rotate each configuration by its best-fit angle phi so that a finite
    # rotation does not leak into the radial modes through 1 - cos(phi); in
    # the pinning frame the angle from the nearest well, phi - phi_well, is
    # put back as a linear tangential displacement (the libration coordinate).
    if pinned and plan.lag_n > 0:
        step = TWO_PI / plan.lag_n
        phi_well = np.rint(phi / step) * step
    elif pinned:
        phi_well = np.zeros(n_traj)
    else:
        phi_well = phi
    body_pos = rotate_states(safe_pos, -phi)
    body_vel = rotate_states(safe_vel, -phi)
    species = plan.species_ids
    for b in np.nonzero(good)[0]:
        d = body_pos[:, :, b].T[:, None, :] - r_eq[b][None, :, :]
        cost = np.sum(d * d, axis=-1)
        cost = np.where(species[:, None] == species[None, :], cost, 1e30)
        rows, cols = linear_sum_assignment(cost)
        perm = np.empty_like(cols)
        perm[cols] = rows  # site j holds ion perm[j]
        if not np.all(perm == np.arange(len(perm))):
            reordered[b] = True
            body_pos[:, :, b] = body_pos[:, perm, b]
            body_vel[:, :, b] = body_vel[:, perm, b]
    # deviations in the rotating frame (canonical momentum minus rigid rotation)
    wf = TWO_PI * f_frame
    tangent = np.zeros_like(r_eq)
    tangent[:, :, 0], tangent[:, :, 1] = -r_eq[:, :, 1], r_eq[:, :, 0]
    dxi = sqm[None, :, None] * (body_pos.transpose(2, 1, 0) - r_eq + (phi - phi_well)[:, None, None] * tangent)  # (T, N, 3)
    v_rigid = np.zeros_like(r_eq)
    v_rigid[:, :, 0] = -wf[:, None] * r_eq[:, :, 1]
    v_rigid[:, :, 1] = wf[:, None] * r_eq[:, :, 0]
    # the rotation generator acting on the rigid-rotation velocity: z x v_rigid = -w r_xy
    dpi = sqm[None, :, None] * (body_vel.transpose(2, 1, 0) - v_rigid
                                + (phi - phi_well)[:, None, None] * v_rigid_gen(r_eq, wf))
    dxi = dxi.reshape(n_traj, -1)
    dpi = dpi.reshape(n_traj, -1)
    for kn in range(kk):
        sel = good & (nearest == kn)
        if np.any(sel):
            md = frame.modes[kn]
            qn, pn = md.normal_coordinates(dxi[sel], dpi[sel])
            if window_s:
                x = md.omega * window_s
                qn = qn / (np.sin(x) / x)
                pn = pn / np.sinc(x / (2 * np.pi)) ** 2
            mode_n[sel] = 0.5 * (qn * qn + pn * pn) / HBAR - (0.5 if plan.wigner else 0.0)
    out["reordered"] = reordered
    out["mode_n"] = mode_n
    status = np.zeros(n_traj, dtype=np.int64)
    status |= np.where(out["slips"] != 0, int(Status.SLIPPED), 0)
    status |= np.where(lost, int(Status.LOST), 0)
    status |= np.where(reordered, int(Status.REORDERED), 0)
    status |= np.where(nonfinite, int(Status.NONFINITE), 0)
    out["status"] = status
    mid = len(frame.modes) // 2
    out["_modes"] = frame.modes[mid]
    # the frame of the listed modes: the pinning's (or the middle node of the
    # trajectories' own rates when free), or the lab frame when nothing rotates
    f_listed = float(frame.f_hz[mid])
    out["_frame"] = ("rotating", f_listed) if f_listed != 0.0 else ("lab", 0.0)
    return out

