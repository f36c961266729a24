"""Compiled kernels (numba only): forces and the symplectic time stepper.

Fixed internal units: SI (m, s, m/s, rad). Kernels see plain arrays and
scalars; schedules are sampled onto the force-evaluation times by the
Python driver (:mod:`mdrotor.engine`) one block of steps at a time, so the
kernel never calls back into Python and memory does not grow with the
number of steps.

State layout: ``pos[u, i, b]`` and ``vel[u, i, b]`` (axis u = x, y, z; ion i;
trajectory b): the trajectory index is innermost so that the compiler
vectorises every force loop across trajectories. Trajectories are
independent; the parallel loop runs over chunks of trajectories and each
chunk runs the whole block of steps. No reduction crosses trajectories and
no fast-math is used, so a trajectory's numbers do not depend on the chunk
size or the number of threads.

Acceleration of ion i (see :mod:`mdrotor.statics` for the potential)::

    a_i = -w_{u,i}^2 u_i + (Q_i/m_i) E_stray
          - (Q_i/m_i) grad Re[C_p(t) z_i^n_p]       for each multipole term p
          + sum_j k Q_i Q_j (r_i - r_j) / (m_i |r_i - r_j|^3)

with grad Re[C z^n] = (Re[n C z^(n-1)], -Im[n C z^(n-1)])
(:mod:`mdrotor.multipole`).

Stepper: velocity Verlet (kick-drift-kick), or the 4th-order symmetric
composition of three Verlet steps with weights w1, w0, w1,
w1 = 1/(2 - 2^(1/3)), w0 = 1 - 2 w1 (H. Yoshida, Phys. Lett. A 150, 262
(1990)). Both are symplectic and time-reversible; the force is evaluated at
the exact sub-step times.
"""

from __future__ import annotations

import math

import numpy as np
from numba import njit, prange

YOSHIDA_W1 = 1.0 / (2.0 - 2.0 ** (1.0 / 3.0))
YOSHIDA_W0 = 1.0 - 2.0 * YOSHIDA_W1


def substep_fractions(integrator: str) -> np.ndarray:
    """Sub-step lengths (fractions of dt) of one step."""
    if integrator == "verlet":
        return np.array([1.0])
    return np.array([YOSHIDA_W1, YOSHIDA_W0, YOSHIDA_W1])


@njit(cache=True)
def _accel(pos, b0, b1, acc, w2, stray_acc, qm, kq_i, kq_j, pin_n, c_re, c_im, zr, zi):
    """Accelerations of trajectories b0..b1-1 into acc[:, :, 0:b1-b0]."""
    n_ions = pos.shape[1]
    nb = b1 - b0
    for i in range(n_ions):
        for u in range(3):
            wu = w2[i, u]
            su = stray_acc[i, u]
            for b in range(nb):
                acc[u, i, b] = su - wu * pos[u, i, b0 + b]
    for p in range(pin_n.shape[0]):
        n = pin_n[p]
        cr = c_re[p]
        ci = c_im[p]
        if cr == 0.0 and ci == 0.0:
            continue
        for i in range(n_ions):
            f = qm[i] * n
            for b in range(nb):
                zr[b] = 1.0
                zi[b] = 0.0
            for _ in range(n - 1):
                for b in range(nb):
                    x = pos[0, i, b0 + b]
                    y = pos[1, i, b0 + b]
                    t = zr[b] * x - zi[b] * y
                    zi[b] = zr[b] * y + zi[b] * x
                    zr[b] = t
            for b in range(nb):
                gr = cr * zr[b] - ci * zi[b]
                gi = cr * zi[b] + ci * zr[b]
                acc[0, i, b] -= f * gr
                acc[1, i, b] += f * gi
    for i in range(n_ions):
        for j in range(i + 1, n_ions):
            ki = kq_i[i, j]
            kj = kq_j[i, j]
            for b in range(nb):
                dx = pos[0, i, b0 + b] - pos[0, j, b0 + b]
                dy = pos[1, i, b0 + b] - pos[1, j, b0 + b]
                dz = pos[2, i, b0 + b] - pos[2, j, b0 + b]
                r2 = dx * dx + dy * dy + dz * dz
                inv3 = 1.0 / (r2 * math.sqrt(r2))
                acc[0, i, b] += ki * dx * inv3
                acc[1, i, b] += ki * dy * inv3
                acc[2, i, b] += ki * dz * inv3
                acc[0, j, b] -= kj * dx * inv3
                acc[1, j, b] -= kj * dy * inv3
                acc[2, j, b] -= kj * dz * inv3


@njit(cache=True)
def _lag_phase(pos, b, masses, charges, n):
    """arg of the order-n moment about the centre of mass, sum Q (z - z_c)^n."""
    n_ions = pos.shape[1]
    mt = 0.0
    xc = 0.0
    yc = 0.0
    for i in range(n_ions):
        mt += masses[i]
        xc += masses[i] * pos[0, i, b]
        yc += masses[i] * pos[1, i, b]
    xc /= mt
    yc /= mt
    sr = 0.0
    si = 0.0
    for i in range(n_ions):
        x = pos[0, i, b] - xc
        y = pos[1, i, b] - yc
        zr = 1.0
        zi = 0.0
        for _ in range(n):
            t = zr * x - zi * y
            zi = zr * y + zi * x
            zr = t
        sr += charges[i] * zr
        si += charges[i] * zi
    return math.atan2(si, sr)


@njit(cache=True)
def _wrap(a):
    return a - 2.0 * math.pi * math.floor((a + math.pi) / (2.0 * math.pi))


@njit(cache=True, parallel=True)
def advance(pos, vel, dt, n_steps, fracs, w2, stray_acc, qm, kq_i, kq_j, pin_n, c_re, c_im,
            masses, charges, lag_n, lag_theta, lag_track, lag_stride, lag_u, chunk):
    """Advance every trajectory by ``n_steps`` steps of length ``dt``.

    Parameters
    ----------
    pos, vel : (3, N, T) float64, m and m/s; updated in place.
    dt : float, s. n_steps : int.
    fracs : (S,) sub-step fractions of dt (1 for Verlet, 3 for order 4).
    w2 : (N, 3) secular angular frequency squared per ion and axis, rad^2/s^2.
    stray_acc : (N, 3) Q_i E_stray / m_i, m/s^2.
    qm : (N,) Q_i / m_i, C/kg.
    kq_i, kq_j : (N, N) k Q_i Q_j / m_i and / m_j (upper triangle used).
    pin_n : (P,) int64 multipole orders.
    c_re, c_im : (S n_steps + 1, P) complex coefficient C_p at each force
        evaluation: eval e = S s + k + 1 is the end of sub-step k of step s;
        eval 0 is the block start.
    masses, charges : (N,) for the lag phase.
    lag_n : int, order of the pinning whose lag is tracked (0: none).
    lag_theta : (n_steps + 1,) pinning angle theta(t) at the step ends.
    lag_track : (n_steps + 1,) uint8, 1 while the pinning is strong enough
        to define a lag.
    lag_stride : int, steps between lag updates.
    lag_u : (2, T) [unwrapped phase arg(M_n) - n theta, last raw phase];
        updated in place.
    chunk : int, trajectories per parallel work item.
    """
    n_ions = pos.shape[1]
    T = pos.shape[2]
    n_sub = fracs.shape[0]
    n_chunks = (T + chunk - 1) // chunk
    for c in prange(n_chunks):
        b0 = c * chunk
        b1 = min(T, b0 + chunk)
        nb = b1 - b0
        acc = np.empty((3, n_ions, nb))
        zr = np.empty(nb)
        zi = np.empty(nb)
        _accel(pos, b0, b1, acc, w2, stray_acc, qm, kq_i, kq_j, pin_n, c_re[0], c_im[0], zr, zi)
        for s in range(n_steps):
            for k in range(n_sub):
                h = fracs[k] * dt
                hh = 0.5 * h
                for i in range(n_ions):
                    for u in range(3):
                        for b in range(nb):
                            v = vel[u, i, b0 + b] + hh * acc[u, i, b]
                            vel[u, i, b0 + b] = v
                            pos[u, i, b0 + b] += h * v
                e = n_sub * s + k + 1
                _accel(pos, b0, b1, acc, w2, stray_acc, qm, kq_i, kq_j, pin_n, c_re[e], c_im[e], zr, zi)
                for i in range(n_ions):
                    for u in range(3):
                        for b in range(nb):
                            vel[u, i, b0 + b] += hh * acc[u, i, b]
            if lag_n > 0 and (s + 1) % lag_stride == 0 and lag_track[s + 1] == 1:
                th = lag_n * lag_theta[s + 1]
                for b in range(nb):
                    raw = _lag_phase(pos, b0 + b, masses, charges, lag_n) - th
                    lag_u[0, b0 + b] += _wrap(raw - lag_u[1, b0 + b])
                    lag_u[1, b0 + b] = raw
