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
  (tracked inside the kernel; see :mod:`mdrotor.engine.kernels`).
* ``lost`` (an ion beyond the loss radius), ``reordered`` (ions changed
  sites: the best rotation with the original labels leaves a site
  assignment, by :func:`scipy.optimize.linear_sum_assignment`, that is not
  the identity), ``nonfinite``.
* ``mode_n``: phonon numbers of the co-rotating-frame modes (module
  docstring of :mod:`mdrotor.physics.statics`): the deviations from the equilibrium
  of the crystal rotating at w (centrifugally stretched) are projected onto
  its gyroscopic modes; n_k = E_k / (hbar w_k) - 1/2 with Wigner sampling.
  While the pinning is on, the frame is the pinning's (w = 2 pi f_rot(t),
  the pinning static in it) and the libration is one of the modes. When it
  is off, each trajectory is measured about the crystal rotating at its own
  w (in the lab frame when w / 2 pi is nearer 0 than W_GRID_HZ / 2); the
  equilibria come from a fixed lattice of frame rates, the multiples of
  W_GRID_HZ (1 kHz), computed when first used and kept on the plan
  (:func:`lattice_node`), interpolated linearly between the two nodes
  around w, the modes taken from the nearer node (their frequencies change
  by ~1e-4 relative per kHz). A trajectory's outputs depend on the plan and
  its own state alone, never on the other trajectories of the run (so runs
  can be split into chunks and across machines). The columns of the mode
  table (:func:`free_columns`, :func:`listed_frame`) are the modes of the
  node nearest the schedule's rate; a trajectory's modes go to the columns
  with the same meaning (:func:`column_map`: in an anisotropic trap the lab
  frame's libration is no mode of a rotating frame and stays NaN there).

Status flags (:class:`Status`, the one owner of the bits): 1 slipped, 2 lost
ion, 4 reordered, 8 non-finite (0: ok). Trajectories with a lost ion or a
non-finite value are left out of every statistic of L, the rotation rate,
the lag and the phonons (:func:`usable`).
"""

from __future__ import annotations

from dataclasses import dataclass, replace

import numpy as np

from mdrotor.physics.constants import HBAR
from mdrotor.physics.frame import (
    alignment_angle,
    alignment_angle_of,
    angular_momentum,
    rotate_positions,
    rotate_states,
)
from mdrotor.physics.statics import compute_crystal, normal_modes, quanta
from mdrotor.physics.trap import DECONFINED_FRACTION
from mdrotor.results.status import Status

TWO_PI = 2.0 * np.pi






# spacing of the lattice of frame rates at which free crystals are measured (Hz)
W_GRID_HZ = 1000.0


@dataclass
class ModeFrame:
    """Equilibria and modes used to measure one observation."""

    f_hz: np.ndarray            # (K,) frame rotation rates
    r_eq: np.ndarray            # (K, N, 3) equilibria (aligned, same labels)
    modes: list                 # K Modes
    pinned: bool


PINNED_FRAMES_KEPT = 64  # pinned frames kept on a plan (each an equilibrium and its 3N modes)


def pinned_frame(plan, t_s: float) -> ModeFrame:
    """The pinning's frame at time t (the schedule's f_rot(t), the pinning
    static in it): one equilibrium and its modes, the libration among them.
    A function of the plan and t alone, memoised on the plan (``plan.memo.frames``)
    once computed: every chunk of a run observes at the same times."""
    key = ("pinned", float(t_s))
    cache = plan.memo.frames
    if key not in cache:
        pinned = [k for k in cache if isinstance(k, tuple)]
        if len(pinned) >= PINNED_FRAMES_KEPT:  # a long time series: keep memory bounded, drop the oldest
            del cache[pinned[0]]
        cache[key] = _pinned_frame(plan, t_s)
    return cache[key]


def _pinned_frame(plan, t_s: float) -> ModeFrame:
    sched = plan.schedule
    f = float(sched.f_rot_hz(t_s)) if sched is not None else plan.f0_hz
    theta = float(sched.theta_rad(t_s)) if sched is not None else 0.0
    pot = plan.potential(f, theta, plan.pin_scales(t_s))
    start = rotate_positions(plan.crystal0.positions_m, theta - plan.theta0)
    cr = compute_crystal(pot, f, start=start)
    return ModeFrame(np.array([f]), cr.positions_m[None], [cr.modes], True)


def lattice_limit(plan) -> int:
    """Largest lattice index |j| whose frame rate j W_GRID_HZ is below
    DECONFINED_FRACTION of the lowest radial secular frequency (faster
    crystals fly apart and are flagged lost; :mod:`mdrotor.physics.trap`)."""
    return int(np.floor(DECONFINED_FRACTION * plan.omega_radial_min / (TWO_PI * W_GRID_HZ)))


def lattice_node(plan, j: int) -> tuple:
    """The free (unpinned) crystal in the frame rotating at j W_GRID_HZ:
    ``(f_hz, r_eq (N, 3), modes, I_com)``. Node 0 is the lab frame (static
    anisotropy and stray field included); every other node is the
    centrifugally stretched relative equilibrium, relaxed from the t = 0
    crystal and turned back to its orientation and labels. Each node depends
    on the plan and j alone; computed when first used, then kept on the plan
    (``plan.memo.frames``), so a trajectory's phonon numbers never depend on
    which other trajectories are measured with it."""

    cache = plan.memo.frames
    j = int(j)
    if j in cache:
        return cache[j]
    f = j * W_GRID_HZ
    zeros = np.zeros(len(plan.pin_orders))
    start = plan.crystal0.positions_m
    m = plan.masses
    if j == 0:
        cr = compute_crystal(plan.potential(0.0, 0.0, zeros), 0.0, start=start)
        r, modes = cr.positions_m, cr.modes
    else:
        pot = plan.potential(f, 0.0, zeros)
        r = compute_crystal(pot, f, start=start).positions_m
        # same orientation and labels as the t = 0 crystal (rotating an
        # equilibrium of this rotation-symmetric potential gives another one)
        r = rotate_positions(r, -alignment_angle_of(start, r, m))
        modes = normal_modes(replace(pot, omega_frame=TWO_PI * f), r)
    rc = r - np.sum(m[:, None] * r, axis=0) / np.sum(m)
    i_com = float(np.sum(m * (rc[:, 0] ** 2 + rc[:, 1] ** 2)))
    cache[j] = (f, r, modes, i_com)
    return cache[j]


def free_rates(plan, lcom: np.ndarray, icom: np.ndarray, good: np.ndarray):
    """Each free trajectory's own rotation rate and the lattice nodes it is
    measured between.

    The rate is that of the relative equilibrium with the same L_com,
    I_eq(w) w = L_com (I_eq(w) w increases with w), interpolated linearly
    between the two lattice nodes that bracket it; the bracket starts at the
    instantaneous L_com / I_com and moves one node at a time. Returns
    ``(w (T,) rad/s, lower node (T,) int)``; trajectories not ``good`` get
    their instantaneous rate and node 0.
    """
    n_traj = len(lcom)
    w_inst = np.where(icom > 0, lcom / np.where(icom > 0, icom, 1.0), 0.0)
    w = w_inst.copy()
    lo = np.zeros(n_traj, dtype=np.int64)
    jmax = lattice_limit(plan)
    if jmax < 1:
        return w, lo
    wg = TWO_PI * W_GRID_HZ

    def g(j):  # I_eq(w_j) w_j at node j
        f, _, _, i_com = lattice_node(plan, j)
        return i_com * TWO_PI * f

    for b in np.nonzero(good)[0]:
        j = int(np.clip(np.floor(w_inst[b] / wg), -jmax, jmax - 1))
        for _ in range(2 * jmax):
            if lcom[b] < g(j) and j > -jmax:
                j -= 1
            elif lcom[b] > g(j + 1) and j + 1 < jmax:
                j += 1
            else:
                break
        g0, g1 = g(j), g(j + 1)
        x = min(max((lcom[b] - g0) / (g1 - g0), 0.0), 1.0)
        w[b] = wg * (j + x)
        lo[b] = j
    return w, lo


def free_columns(plan, t_s: float) -> int:
    """The lattice node whose modes are the columns of an observation of the
    free crystal at t: the node nearest the schedule's own rotation rate at
    t, node 0 (the lab frame) when the schedule does not rotate. From the
    plan alone, so every trajectory, chunk and worker of a run writes the
    same columns; each trajectory is still measured in the frame of its own
    rate and its modes are put in these columns (:func:`column_map`)."""
    if len(plan.masses) == 1:
        return 0
    jmax = lattice_limit(plan)
    if jmax < 1:
        return 0
    f = float(plan.schedule.f_rot_hz(t_s)) if plan.schedule is not None else plan.f0_hz
    return int(np.clip(np.rint(f / W_GRID_HZ), -jmax, jmax))


def column_map(columns, modes) -> np.ndarray:
    """For each mode of ``modes``, its column among ``columns`` (-1: no
    column). Same count: one to one, in order. The lab frame of an
    anisotropic trap has one mode more than a rotating frame, the libration
    about the anisotropy, which is the free rotation itself (no mode) in a
    rotating frame: it is the column a rotating trajectory leaves empty (NaN),
    and the mode an at-rest trajectory measured against rotating columns
    leaves out. Otherwise modes go to the column with the same label."""
    cl, ml = list(columns.labels), list(modes.labels)
    if len(cl) == len(ml):
        return np.arange(len(ml))
    if len(cl) == len(ml) + 1 and "libration" in cl:
        return np.array([k for k in range(len(cl)) if cl[k] != "libration"])
    if len(ml) == len(cl) + 1 and "libration" in ml:
        out, c = np.full(len(ml), -1), 0
        for k, lab in enumerate(ml):
            if lab != "libration":
                out[k], c = c, c + 1
        return out
    return np.array([cl.index(lab) if lab in cl else -1 for lab in ml])


def listed_frame(plan, t_s: float, f_rot_hz: np.ndarray, status: np.ndarray) -> tuple:
    """The modes listed with an observation (its columns) and their frame:
    ``(modes, ("rotating", f) or ("lab", 0.0))``. While pinned, the
    pinning's frame; when free, the lattice node of :func:`free_columns` (the
    schedule's rate; each trajectory is measured in the frame of its own
    rate). From the plan alone; ``f_rot_hz`` and ``status`` are not used."""
    if plan.pinned_at(t_s):
        fr = pinned_frame(plan, t_s)
        f = float(fr.f_hz[0])
        return fr.modes[0], (("rotating", f) if f != 0.0 else ("lab", 0.0))
    j = free_columns(plan, t_s)
    f, _, modes, _ = lattice_node(plan, j)
    return modes, (("rotating", f) if j != 0 else ("lab", 0.0))


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
    windows (:meth:`mdrotor.engine.integrate.BlockStepper.observe`); each mode's normal
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
           "lost": lost, "nonfinite": nonfinite, "_t_s": t_s}
    # lag and slips (from the kernel's unwrapped phase)
    if plan.lag_n > 0:
        n = plan.lag_n
        lag_unwrapped = -(lag_u[0] - plan.lag_u_ref) / n
        # a phase that went non-finite has no slip count: the trajectory is
        # flagged non-finite (and left out of statistics) instead
        ok_lag = np.isfinite(lag_unwrapped)
        nonfinite = nonfinite | ~ok_lag
        out["nonfinite"] = nonfinite
        slips = np.rint(np.where(ok_lag, lag_unwrapped, 0.0) / (TWO_PI / n)).astype(np.int64)
        out["lag_rad"] = np.where(ok_lag, lag_unwrapped - slips * (TWO_PI / n), np.nan)
        out["slips"] = slips
    else:
        out["lag_rad"] = np.zeros(n_traj)
        out["slips"] = np.zeros(n_traj, dtype=np.int64)
    # modes
    pinned = plan.pinned_at(t_s)
    # a crystal spinning faster than the radial confinement flies apart
    lost |= np.abs(w) >= DECONFINED_FRACTION * plan.omega_radial_min
    out["lost"] = lost
    good = ~nonfinite & ~lost
    reordered = np.zeros(n_traj, dtype=bool)
    sqm = np.sqrt(m)
    z = safe_pos[0] + 1j * safe_pos[1]
    zc = np.sum(m[:, None] * z, axis=0) / np.sum(m)
    # each trajectory's frame, from the plan and the trajectory alone: while
    # pinned the pinning's; when free the lab (own rate nearer 0 than the
    # first lattice node) or its own rate, the equilibrium interpolated
    # between the two lattice nodes around it, the modes of the nearer
    lo_node = np.zeros(n_traj, dtype=np.int64)
    hi_node = np.zeros(n_traj, dtype=np.int64)
    weight = np.zeros(n_traj)
    if pinned:
        frame = pinned_frame(plan, t_s)
        nodes = {0: (frame.r_eq[0], frame.modes[0])}
        j_col = 0
        f_frame = np.full(n_traj, frame.f_hz[0])
    else:
        f_frame = np.zeros(n_traj)  # the lab frame unless rotating
        if len(m) > 1 and lattice_limit(plan) >= 1:
            w, lo = free_rates(plan, lcom, icom, good)
            out["f_rot_hz"] = w / TWO_PI
            x = w / (TWO_PI * W_GRID_HZ) - lo
            rot = good & (np.abs(w) >= 0.5 * TWO_PI * W_GRID_HZ)
            lo_node = np.where(rot, lo, 0)
            hi_node = np.where(rot, lo + 1, 0)
            weight = np.where(rot, np.clip(x, 0.0, 1.0), 0.0)
            # the lab node (anisotropy, stray field) is not interpolated towards
            lo_node = np.where(rot & (lo_node == 0), hi_node, lo_node)
            hi_node = np.where(rot & (hi_node == 0), lo_node, hi_node)
            f_frame = np.where(rot, w / TWO_PI, 0.0)
        nodes = {}
        j_col = free_columns(plan, t_s)
        for j in np.unique(np.r_[lo_node, hi_node, 0, j_col]):
            _, r_j, modes_j, _ = lattice_node(plan, int(j))
            nodes[int(j)] = (r_j, modes_j)
    keys = sorted(nodes)
    stack = np.array([nodes[j][0] for j in keys])
    r_lo = stack[np.searchsorted(keys, lo_node)]
    r_hi = stack[np.searchsorted(keys, hi_node)]
    r_eq = (1 - weight)[:, None, None] * r_lo + weight[:, None, None] * r_hi  # (T, N, 3)
    nearest = np.where(weight > 0.5, hi_node, lo_node)
    columns = nodes[j_col][1]
    n_modes = len(columns.omega)
    mode_n = np.full((n_traj, n_modes), np.nan)
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
    for kn in np.unique(nearest[good]):
        sel = good & (nearest == kn)
        if np.any(sel):
            md = nodes[int(kn)][1]
            qn, pn = md.normal_coordinates(dxi[sel], dpi[sel])
            if window_s:
                x = md.omega * window_s
                qn = qn / (np.sin(x) / x)
                pn = pn / np.sinc(x / (2 * np.pi)) ** 2
            cols = column_map(columns, md)
            keep = cols >= 0
            block = np.full((int(np.sum(sel)), n_modes), np.nan)
            block[:, cols[keep]] = (quanta(qn, pn) - (0.5 if plan.wigner else 0.0))[:, keep]
            mode_n[sel] = block
    out["reordered"] = reordered
    out["mode_n"] = mode_n
    status = np.zeros(n_traj, dtype=np.int64)
    status |= np.where(out["slips"] != 0, int(Status.SLIPPED), 0)
    status |= np.where(lost, int(Status.LOST), 0)
    status |= np.where(reordered, int(Status.REORDERED), 0)
    status |= np.where(nonfinite, int(Status.NONFINITE), 0)
    out["status"] = status
    if pinned:
        f_listed = float(frame.f_hz[0])
        out["_modes"] = frame.modes[0]
        out["_frame"] = ("rotating", f_listed) if f_listed != 0.0 else ("lab", 0.0)
    else:
        out["_modes"], out["_frame"] = listed_frame(plan, t_s, out["f_rot_hz"], status)
    return out

