"""Compiled kernels (numba only): forces and the symplectic time stepper.

Fixed internal units: SI (m, s, m/s, rad). Kernels see plain arrays and
scalars; schedules are sampled onto the force-evaluation times by the
Python driver (:mod:`mdrotor.engine.integrate`) one block of steps at a time, so the
kernel never calls back into Python and memory does not grow with the
number of steps.

State layout: ``pos[u, i, b]`` and ``vel[u, i, b]`` (axis u = x, y, z; ion i;
trajectory b): the trajectory index is innermost so that the compiler
vectorises every force loop across trajectories. Trajectories are
independent; threads take chunks of trajectories and each chunk runs the
whole block of steps. No reduction crosses trajectories and no fast-math is
used, so a trajectory's numbers do not depend on the chunk size or the
number of threads.

Compilation (the first run in a fresh environment): a feature that is off
reaches the stepper as None, and numba compiles a variant of the chunk
function without its code (:func:`advance`); the chunk function is a plain
compiled function run on a thread pool, not numba's parallel loop, whose
compilation took about twice as long. Compiled code is cached (cache=True):
next to this file in ``__pycache__``, or in a user cache directory when the
installed package is read-only, or in ``NUMBA_CACHE_DIR`` when set; every
process importing the same installation, sweep and cluster workers
included, finds it there.

Acceleration of ion i (see :mod:`mdrotor.physics.statics` for the potential)::

    a_i = -w_{u,i}^2 u_i [+ 2 (W/2)^2 q_{u,i} cos(W t + phase) u_i] + (Q_i/m_i) E_stray
          - (Q_i/m_i) grad Re[C_p(t) z_i^n_p]       for each multipole term p
          + sum_j k Q_i Q_j (r_i - r_j) / (m_i |r_i - r_j|^3)

with grad Re[C z^n] = (Re[n C z^(n-1)], -Im[n C z^(n-1)])
(:mod:`mdrotor.physics.multipole`).

Stochastic terms (field noise, laser beams) act as kicks after each
deterministic step; with none of them on, the stepper is the plain
symplectic scheme below.

RF runs with the exact linear propagator (the default for Verlet): the
linear trap force is integrated exactly over each step by precomputed 2 x 2
maps per ion, axis and step phase (:func:`mdrotor.physics.mathieu.transfer_matrices`);
every other force acts as half-kicks around it (Strang splitting of
"linear trap" and "the rest": symmetric, second order, symplectic).

Stepper: velocity Verlet (kick-drift-kick), or the 4th-order symmetric
composition of three Verlet steps with weights w1, w0, w1,
w1 = 1/(2 - 2^(1/3)), w0 = 1 - 2 w1 (H. Yoshida, Phys. Lett. A 150, 262
(1990)). Both are symplectic and time-reversible; the force is evaluated at
the exact sub-step times.
"""

from __future__ import annotations

import math
import os
from concurrent.futures import ThreadPoolExecutor

import numba
import numpy as np
from numba import njit

YOSHIDA_W1 = 1.0 / (2.0 - 2.0 ** (1.0 / 3.0))
YOSHIDA_W0 = 1.0 - 2.0 * YOSHIDA_W1


def substep_fractions(integrator: str) -> np.ndarray:
    """Sub-step lengths (fractions of dt) of one step."""
    if integrator == "verlet":
        return np.array([1.0])
    return np.array([YOSHIDA_W1, YOSHIDA_W0, YOSHIDA_W1])


@njit(cache=True, inline="always")
def _inv_r3(r2):
    """1 / r^3 from r^2 (m^2 -> m^-3) for the pair forces: 1 / (r2 sqrt(r2)),
    within 2 units in the last place (two correctly rounded operations and a
    division)."""
    return 1.0 / (r2 * math.sqrt(r2))


@njit(cache=True, inline="always")
def _inv_r3_refined(r2):
    """1 / r^3 from r^2 (m^2 -> m^-3), to 2 units in the last place.

    A single-precision seed y = 1 / sqrt(r2) (IEEE float32 square root and
    division: relative error below 2e-7), then one correction of y^3 by the
    binomial series (1 - e)^(-3/2) = 1 + 3 e/2 + 15 e^2/8 + ... with
    e = 1 - r2 y^2 (common practice, no source). y has 24 significant bits,
    so y^2 is exact in double and e carries one rounding; the series'
    truncation, 35 e^3 / 16 < 2e-20, is far below double rounding. The pair
    loop then needs no double square root or division (the slowest vector
    instructions; float32 ones run twice as many lanes at once). Every
    operation is a correctly rounded IEEE one with no fused multiply-add (no
    fast-math), so the vectorised loop and its scalar remainder give the same
    bits on every trajectory. Valid while r2 is a normal float32, 1e-19 m <
    r < 1e19 m (tests/engine/test_kernels_inv_r3.py checks 1e-15 m to 1e15 m).

    Not used by the kernel: on the machine measured (Intel Xeon, AVX-512,
    KVM) the pair loop's other arithmetic already fills the vector ports, and
    the double square root and division (a separate divider unit) came out
    12-17 % faster. scripts/bench.py times both bare loops, so a machine
    where this one wins shows it; switching changes results by an ulp per
    pair.
    """
    y = np.float64(np.float32(1.0) / math.sqrt(np.float32(r2)))
    yy = y * y
    e = 1.0 - r2 * yy
    t = yy * y
    return t + t * (e * (1.5 + 1.875 * e))


@njit(cache=True, error_model="numpy")
def inv_r3(r2, out, refined=False):
    """out[k] = 1 / r^3 for r2[k] = r^2 by the pair-force kernel's formula
    (:func:`_inv_r3`), or by :func:`_inv_r3_refined`; for tests."""
    if refined:
        for k in range(r2.shape[0]):
            out[k] = _inv_r3_refined(r2[k])
    else:
        for k in range(r2.shape[0]):
            out[k] = _inv_r3(r2[k])


@njit(cache=True, inline="always")
def _z_power(px, py, i, nb, zr, zi, k):
    """z^k (k >= 1) of ion i over the chunk into (zr, zi), z = x + i y: z^2 in
    the first pass, then k - 2 multiplications by z in place; the same
    operations in the same order as multiplying z by itself k - 1 times. The
    pinning and the multipole noise take z^(n-1) = z^(n-2) z from it."""
    if k == 1:
        for b in range(nb):
            zr[b] = px[i, b]
            zi[b] = py[i, b]
        return
    for b in range(nb):
        x = px[i, b]
        y = py[i, b]
        zr[b] = x * x - y * y
        zi[b] = x * y + y * x
    for _ in range(k - 2):
        for b in range(nb):
            x = px[i, b]
            y = py[i, b]
            t = zr[b] * x - zi[b] * y
            zi[b] = zr[b] * y + zi[b] * x
            zr[b] = t


@njit(cache=True, error_model="numpy")
def _accel(px, py, pz, ax, ay, az, w2, rf2, rf, stray_acc, qm, kq_i, kq_j, pin_n, c_re, c_im, zr, zi, fx, fy, fz):
    """Accelerations (ax, ay, az) of one chunk; every array (N, B) or (B,).

    Trap: a_u = -(w2_u - rf2_u rf[b]) u, with w2 = (W/2)^2 a_u and
    rf2 = 2 (W/2)^2 q_u and rf[b] = cos(W t + phase_b) in the RF model
    (u'' = -(W^2/4)(a - 2 q cos(W t)) u, Leibfried et al., Rev. Mod. Phys.
    75, 281 (2003)); w2 = w_u^2 and rf2 = 0 for the pseudopotential.
    """
    n_ions, nb = px.shape
    for i in range(n_ions):
        wx, wy, wz = w2[i, 0], w2[i, 1], w2[i, 2]
        sx, sy, sz = stray_acc[i, 0], stray_acc[i, 1], stray_acc[i, 2]
        for b in range(nb):
            ax[i, b] = sx - wx * px[i, b]
            ay[i, b] = sy - wy * py[i, b]
            az[i, b] = sz - wz * pz[i, b]
        qx, qy, qz = rf2[i, 0], rf2[i, 1], rf2[i, 2]
        if qx != 0.0 or qy != 0.0 or qz != 0.0:
            for b in range(nb):
                ax[i, b] += qx * rf[b] * px[i, b]
                ay[i, b] += qy * rf[b] * py[i, b]
                az[i, b] += qz * rf[b] * pz[i, b]
    for p in range(pin_n.shape[0]):
        n = pin_n[p]
        cr = c_re[p]
        ci = c_im[p]
        if cr == 0.0 and ci == 0.0:
            continue
        for i in range(n_ions):
            f = qm[i] * n
            if n == 2:
                for b in range(nb):
                    x = px[i, b]
                    y = py[i, b]
                    ax[i, b] -= f * (cr * x - ci * y)
                    ay[i, b] += f * (cr * y + ci * x)
                continue
            # z^(n-1): z^(n-2) by _z_power, the last multiplication in the
            # pass that uses it (fewer passes over the chunk; the same
            # operations in the same order)
            if n == 3:
                for b in range(nb):
                    x = px[i, b]
                    y = py[i, b]
                    wr = x * x - y * y
                    wi = x * y + y * x
                    ax[i, b] -= f * (cr * wr - ci * wi)
                    ay[i, b] += f * (cr * wi + ci * wr)
                continue
            _z_power(px, py, i, nb, zr, zi, n - 2)
            for b in range(nb):
                x = px[i, b]
                y = py[i, b]
                wr = zr[b] * x - zi[b] * y
                wi = zr[b] * y + zi[b] * x
                ax[i, b] -= f * (cr * wr - ci * wi)
                ay[i, b] += f * (cr * wi + ci * wr)
    # Coulomb: each pair's force added to both ions in one pass over the chunk
    for i in range(n_ions - 1):
        for j in range(i + 1, n_ions):
            ki = kq_i[i, j]
            kj = kq_j[i, j]
            for b in range(nb):
                dx = px[i, b] - px[j, b]
                dy = py[i, b] - py[j, b]
                dz = pz[i, b] - pz[j, b]
                inv3 = _inv_r3(dx * dx + dy * dy + dz * dz)
                gx = dx * inv3
                gy = dy * inv3
                gz = dz * inv3
                ax[i, b] += ki * gx
                ay[i, b] += ki * gy
                az[i, b] += ki * gz
                ax[j, b] -= kj * gx
                ay[j, b] -= kj * gy
                az[j, b] -= kj * gz


@njit(cache=True)
def _kick(vx, vy, vz, ax, ay, az, h):
    n_ions, nb = vx.shape
    for i in range(n_ions):
        for b in range(nb):
            vx[i, b] += h * ax[i, b]
            vy[i, b] += h * ay[i, b]
            vz[i, b] += h * az[i, b]

@njit(cache=True)
def _kick_drift(px, py, pz, vx, vy, vz, ax, ay, az, hk, h):
    """v += hk a, then x += h v: the opening half-kick and the drift in one
    pass over the chunk (the same operations as _kick then _drift)."""
    n_ions, nb = vx.shape
    for i in range(n_ions):
        for b in range(nb):
            u = vx[i, b] + hk * ax[i, b]
            vx[i, b] = u
            px[i, b] += h * u
            u = vy[i, b] + hk * ay[i, b]
            vy[i, b] = u
            py[i, b] += h * u
            u = vz[i, b] + hk * az[i, b]
            vz[i, b] = u
            pz[i, b] += h * u


@njit(cache=True)
def _drift(px, py, pz, vx, vy, vz, h):
    n_ions, nb = vx.shape
    for i in range(n_ions):
        for b in range(nb):
            px[i, b] += h * vx[i, b]
            py[i, b] += h * vy[i, b]
            pz[i, b] += h * vz[i, b]


@njit(cache=True)
def _lag_raw(px, py, masses, charges, n, zr, zi, sr, si, out):
    """out[b] = arg sum_i Q_i (z_i - z_c)^n, the phase of the order-n moment
    about the centre of mass (z_c), for every trajectory b of a chunk."""
    n_ions, nb = px.shape
    mt = 0.0
    for i in range(n_ions):
        mt += masses[i]
    for b in range(nb):
        fx = 0.0
        fy = 0.0
        for i in range(n_ions):
            fx += masses[i] * px[i, b]
            fy += masses[i] * py[i, b]
        zr[b] = fx / mt  # centre of mass, stored in the scratch arrays
        zi[b] = fy / mt
        sr[b] = 0.0
        si[b] = 0.0
    for i in range(n_ions):
        q = charges[i]
        for b in range(nb):
            x = px[i, b] - zr[b]
            y = py[i, b] - zi[b]
            ar = x
            ai = y
            for _ in range(n - 1):
                t = ar * x - ai * y
                ai = ar * y + ai * x
                ar = t
            sr[b] += q * ar
            si[b] += q * ai
    for b in range(nb):
        out[b] = math.atan2(si[b], sr[b])


def lag_phases(pos, masses, charges, n):
    """Phase of the order-n moment about the centre of mass for every
    trajectory of ``pos`` (3, N, T); used to start the lag tracking. Plain
    Python around the stepper's own compiled :func:`_lag_raw`, with the
    argument types the stepper calls it with (one compilation serves both)."""
    T = pos.shape[2]
    px = np.ascontiguousarray(pos[0], dtype=np.float64)
    py = np.ascontiguousarray(pos[1], dtype=np.float64)
    masses = np.ascontiguousarray(masses, dtype=np.float64)
    charges = np.ascontiguousarray(charges, dtype=np.float64)
    out = np.empty(T)
    _lag_raw(px, py, masses, charges, int(n), np.empty(T), np.empty(T), np.empty(T), np.empty(T), out)
    return out


@njit(cache=True)
def wrap_angle(a):
    return a - 2.0 * math.pi * math.floor((a + math.pi) / (2.0 * math.pi))


@njit(cache=True)
def _poly_accel(px, py, pz, ax, ay, az, qm, exps, coef, xp, yp, zp):
    """Add -(Q/m) grad phi for phi = sum_j coef_j x^a y^b z^c (the electrodes'
    potential about the trap point, :mod:`mdrotor.electrodes.polynomial`).
    xp, yp, zp: (D + 1, B) scratch for the powers."""
    n_ions, nb = px.shape
    deg = xp.shape[0] - 1
    for i in range(n_ions):
        for b in range(nb):
            xp[0, b] = 1.0
            yp[0, b] = 1.0
            zp[0, b] = 1.0
        for k in range(1, deg + 1):
            for b in range(nb):
                xp[k, b] = xp[k - 1, b] * px[i, b]
                yp[k, b] = yp[k - 1, b] * py[i, b]
                zp[k, b] = zp[k - 1, b] * pz[i, b]
        for j in range(exps.shape[0]):
            cj = coef[j] * qm[i]
            if cj == 0.0:
                continue
            a = exps[j, 0]
            bb = exps[j, 1]
            c = exps[j, 2]
            if a > 0:
                f = cj * a
                for b in range(nb):
                    ax[i, b] -= f * xp[a - 1, b] * yp[bb, b] * zp[c, b]
            if bb > 0:
                f = cj * bb
                for b in range(nb):
                    ay[i, b] -= f * xp[a, b] * yp[bb - 1, b] * zp[c, b]
            if c > 0:
                f = cj * c
                for b in range(nb):
                    az[i, b] -= f * xp[a, b] * yp[bb, b] * zp[c - 1, b]


SQRT3 = math.sqrt(3.0)


@njit(cache=True)
def _hash64(key, counter):
    """The SplitMix64 output function of key + counter x golden ratio (the
    bits behind :func:`_uniform`)."""
    z = key + counter * np.uint64(0x9E3779B97F4A7C15)
    z = (z ^ (z >> np.uint64(30))) * np.uint64(0xBF58476D1CE4E5B9)
    z = (z ^ (z >> np.uint64(27))) * np.uint64(0x94D049BB133111EB)
    return z ^ (z >> np.uint64(31))


@njit(cache=True)
def _uniform(key, counter):
    """A uniform number in [0, 1) from the 64-bit key and counter: the
    SplitMix64 output function (G.L. Steele, D. Lea, C.H. Flood, OOPSLA 2014)
    applied to key + counter x golden ratio (:func:`_hash64`). A pure function
    of (key, counter): no generator state, so chunks and threads cannot change it."""
    return float(_hash64(key, counter) >> np.uint64(11)) * (1.0 / 9007199254740992.0)


UNIFORM_BITS = 21   # three uniform numbers from each 64-bit hash
_U_CENTRE = 1.5 - 2.0 ** -(UNIFORM_BITS + 1)   # the mean of 1 + k 2^-21, k = 0 .. 2^21 - 1
_U_SCALE = 2.0 * math.sqrt(3.0)                # (1 + k 2^-21 - centre) 2 sqrt(3): unit variance


@njit(cache=True)
def normals(keys, first, n):
    """(n, T) standard normal numbers, column b from ``keys[b]`` and the
    counters ``first - 2 j``, ``first - 2 j - 1`` of pair j (Box-Muller: G.E.P.
    Box and M.E. Muller, Ann. Math. Stat. 29, 610 (1958)). The noise draws its
    stationary initial states here, from counters counted down from 2^64 - 1,
    far from the step counters it counts up from 0."""
    T = keys.shape[0]
    out = np.empty((n, T))
    for b in range(T):
        for j in range((n + 1) // 2):
            c = np.uint64(first) - np.uint64(2 * j)
            u1 = 1.0 - _uniform(keys[b], c)              # (0, 1]
            u2 = _uniform(keys[b], c - np.uint64(1))
            r = math.sqrt(-2.0 * math.log(u1))
            out[2 * j, b] = r * math.cos(2.0 * math.pi * u2)
            if 2 * j + 1 < n:
                out[2 * j + 1, b] = r * math.sin(2.0 * math.pi * u2)
    return out


@njit(cache=True)
def _innovations(keys, b0, step, us):
    """The noise's uniform numbers of one step, us (3 H, B), as raw doubles
    v = 1 + k 2^-21: hash h of trajectory b (key ``keys[b0 + b]``, counter
    step H + h) gives rows 3 h, 3 h + 1, 3 h + 2 from its bits 43-63, 22-42
    and 1-21, each 21-bit integer k written into the mantissa (cheaper than
    an integer conversion). The number of zero mean and unit variance is u =
    (v - _U_CENTRE) _U_SCALE = (k - (2^21 - 1) / 2) sqrt(3) / 2^20 (symmetric
    about 0, variance 1 - 2^-42); _noise_step folds the centre and scale into
    its coefficients (:func:`_noise_offsets`) instead of converting."""
    n_hash = us.shape[0] // 3
    nb = us.shape[1]
    ub = us.view(np.uint64)
    c0 = np.uint64(step) * np.uint64(n_hash)
    one = np.uint64(0x3FF0000000000000)
    mant = np.uint64(0x000FFFFF80000000)   # the mantissa's top 21 bits
    kb = keys[b0:b0 + nb]   # indexed from 0: no negative-index wraparound per element (which blocks contiguous loads)
    for h in range(n_hash):
        c = c0 + np.uint64(h)
        for b in range(nb):
            x = _hash64(kb[b], c)
            ub[3 * h, b] = ((x >> np.uint64(12)) & mant) | one
            ub[3 * h + 1, b] = ((x << np.uint64(9)) & mant) | one
            ub[3 * h + 2, b] = ((x << np.uint64(30)) & mant) | one


@njit(cache=True)
def _noise_step(b0, s, step, tones, keys, w_tgt, w_sd, r_tgt, r_par, zr_loc, c_tgt, c_par, zc_loc, us, nv, offs):
    """The noise values of step s for the chunk's trajectories, nv (3 + 2 K, B):
    rows 0-2 the uniform field (V/m), rows 3 + 2 p and 4 + 2 p g_re and g_im
    of the multipole order p (V/m^n); each the average of the process over
    the step (the arrays: :meth:`mdrotor.physics.noise.NoiseModel.kernel_arrays`).

    * Tones: deterministic, the same for every trajectory, ``tones[s]``
      (n_steps, 3 + 2 K), or no rows when none is on.
    * White parts: nv[w_tgt[i]] += w_sd[i] u, u of unit variance: kicks of
      the white variance S_w / (2 dt), to which the colored modes'
      independent parts are added (uniform numbers in place of Gaussian
      ones: any distribution with that variance gives the same white
      spectrum, B. Duenweg and W. Paul, Int. J. Mod. Phys. C 2, 817 (1991)).
    * Colored parts, Ornstein-Uhlenbeck modes advanced here, the step
      average from the exact joint update of a mode and its integral: a
      real mode j with state z (zr_loc[j], the process at PSD scale 1) and
      one innovation u adds m z + c u to nv[r_tgt[j]] and steps z <- e z +
      l u, r_par[j] = (e, l, m, c); a rotating mode (z = zc_loc[j, 0] + i
      zc_loc[j, 1], innovations u1, u2) adds Re(m z) + c1 u1 + c2 u2 and
      steps z <- e z + (l00 u1 + i (l10 u1 + l11 u2)), c_par[j] = (Re e, Im
      e, l00, l10, l11, Re m, Im m, c1, c2).

    The step's numbers u come from :func:`_innovations`: row i for white
    slot i (W of them), row W + j for real mode j, rows W + M_r + 2 j and
    W + M_r + 2 j + 1 for rotating mode j. Uniform innovations give every
    mode the exact second moments (so the PSD) of the Gaussian process; a
    slow mode, a sum of many innovations, is Gaussian to the central limit.
    The numbers arrive raw (v, see _innovations): every coefficient of a u is
    multiplied by _U_SCALE here, and the constant parts, -_U_CENTRE _U_SCALE
    times each coefficient, go into the state updates and, summed per
    target, into ``offs`` (:func:`_noise_offsets`)."""
    nb = nv.shape[1]
    n_t = nv.shape[0]
    for t in range(n_t):
        v = offs[t]
        if tones.shape[0] > 0:
            v += tones[s, t]
        for b in range(nb):
            nv[t, b] = v
    n_w = w_sd.shape[0]
    n_r = r_par.shape[0]
    n_c = c_par.shape[0]
    if n_w + n_r + n_c == 0:
        return
    _innovations(keys, b0, step, us)
    for i in range(n_w):
        w = w_sd[i] * _U_SCALE
        t = w_tgt[i]
        if w != 0.0:
            for b in range(nb):
                nv[t, b] += w * us[i, b]
    for j in range(n_r):
        e = r_par[j, 0]
        l = r_par[j, 1] * _U_SCALE
        d = -l * _U_CENTRE
        m = r_par[j, 2]
        c = r_par[j, 3] * _U_SCALE
        t = r_tgt[j]
        k = n_w + j
        for b in range(nb):
            u = us[k, b]
            z = zr_loc[j, b]
            nv[t, b] += m * z + c * u
            zr_loc[j, b] = e * z + (l * u + d)
    for j in range(n_c):
        er = c_par[j, 0]
        ei = c_par[j, 1]
        l00 = c_par[j, 2] * _U_SCALE
        l10 = c_par[j, 3] * _U_SCALE
        l11 = c_par[j, 4] * _U_SCALE
        d0 = -l00 * _U_CENTRE
        d1 = -(l10 + l11) * _U_CENTRE
        mr = c_par[j, 5]
        mi = c_par[j, 6]
        c1 = c_par[j, 7] * _U_SCALE
        c2 = c_par[j, 8] * _U_SCALE
        t = c_tgt[j]
        k = n_w + n_r + 2 * j
        for b in range(nb):
            u1 = us[k, b]
            u2 = us[k + 1, b]
            zre = zc_loc[j, 0, b]
            zim = zc_loc[j, 1, b]
            nv[t, b] += mr * zre - mi * zim + c1 * u1 + c2 * u2
            zc_loc[j, 0, b] = er * zre - ei * zim + (l00 * u1 + d0)
            zc_loc[j, 1, b] = er * zim + ei * zre + (l10 * u1 + l11 * u2 + d1)


@njit(cache=True)
def _noise_offsets(n_t, w_tgt, w_sd, r_tgt, r_par, c_tgt, c_par):
    """Per target, the constant that the raw numbers of _innovations add to
    the step's noise values: -_U_CENTRE _U_SCALE times the sum of the
    coefficients of the numbers on that target (_noise_step)."""
    offs = np.zeros(n_t)
    for i in range(w_sd.shape[0]):
        offs[w_tgt[i]] -= w_sd[i] * _U_SCALE * _U_CENTRE
    for j in range(r_par.shape[0]):
        offs[r_tgt[j]] -= r_par[j, 3] * _U_SCALE * _U_CENTRE
    for j in range(c_par.shape[0]):
        offs[c_tgt[j]] -= (c_par[j, 7] + c_par[j, 8]) * _U_SCALE * _U_CENTRE
    return offs


@njit(cache=True)
def _n_hashes(w_sd, r_par, c_par):
    """Hashes per step: three uniform numbers each (see _innovations)."""
    return (w_sd.shape[0] + r_par.shape[0] + 2 * c_par.shape[0] + 2) // 3


@njit(cache=True)
def noise_series(n_steps, tones, keys, step0, w_tgt, w_sd, r_tgt, r_par, z_real, c_tgt, c_par, z_rot):
    """The noise values (n_steps, 3 + 2 K, T) that :func:`advance` applies
    over ``n_steps`` steps from the global step ``step0``, from the same
    per-step function (:func:`_noise_step`); K from the tones' width (3 + 2
    K columns); z_real (M_r, T) and z_rot (M_c, 2, T) are advanced in place.
    For tests and diagnostics: a run never stores them."""
    T = keys.shape[0]
    n_t = tones.shape[1]
    out = np.empty((n_steps, n_t, T))
    us = np.empty((3 * _n_hashes(w_sd, r_par, c_par), T))
    nv = np.empty((n_t, T))
    zr = z_real.copy()
    zc = z_rot.copy()
    offs = _noise_offsets(n_t, w_tgt, w_sd, r_tgt, r_par, c_tgt, c_par)
    for s in range(n_steps):
        _noise_step(0, s, step0 + s, tones, keys, w_tgt, w_sd, r_tgt, r_par, zr, c_tgt, c_par, zc, us, nv, offs)
        out[s] = nv
    z_real[:] = zr
    z_rot[:] = zc
    return out


@njit(cache=True)
def _noise_field_kick(vx, vy, vz, qm, nv, h):
    """v += h (Q/m) E(s): the uniform noise field's kick, in one pass."""
    n_ions, nb = vx.shape
    for i in range(n_ions):
        f = qm[i]
        for b in range(nb):
            vx[i, b] += h * (f * nv[0, b])
            vy[i, b] += h * (f * nv[1, b])
            vz[i, b] += h * (f * nv[2, b])


@njit(cache=True)
def _noise_accel(px, py, qm, n_orders, nv, field, nx, ny, nz, zr, zi):
    """Noise accelerations (nx, ny, nz) at the current positions: the uniform
    field's (Q/m) E (when ``field``; else 0), plus -(Q/m) grad Re[g_n z^n]
    for each multipole order (the pinning formula with C = g_n,
    :mod:`mdrotor.physics.multipole`)."""
    n_ions, nb = px.shape
    for i in range(n_ions):
        f = qm[i] if field else 0.0
        for b in range(nb):
            nx[i, b] = f * nv[0, b]
            ny[i, b] = f * nv[1, b]
            nz[i, b] = f * nv[2, b]
    for p in range(n_orders.shape[0]):
        n = n_orders[p]
        for i in range(n_ions):
            f = qm[i] * n
            if n == 2:  # z^(n-1) = z: one pass
                for b in range(nb):
                    x = px[i, b]
                    y = py[i, b]
                    cr = nv[3 + 2 * p, b]
                    ci = nv[4 + 2 * p, b]
                    nx[i, b] -= f * (cr * x - ci * y)
                    ny[i, b] += f * (cr * y + ci * x)
                continue
            # z^(n-1): z^(n-2) by _z_power, the last multiplication in the pass that uses it
            _z_power(px, py, i, nb, zr, zi, n - 2)
            for b in range(nb):
                x = px[i, b]
                y = py[i, b]
                wr = zr[b] * x - zi[b] * y
                wi = zr[b] * y + zi[b] * x
                cr = nv[3 + 2 * p, b]
                ci = nv[4 + 2 * p, b]
                nx[i, b] -= f * (cr * wr - ci * wi)
                ny[i, b] += f * (cr * wi + ci * wr)


@njit(cache=True)
def _laser_kick(px, py, pz, vx, vy, vz, b0, step, dt, khat, par, centre, vrec, emit, keys, photons, n_ph, sd_ph):
    """One step's laser impulse on a chunk, after the deterministic step.

    For each beam l and addressed ion i (vrec[l, i] = hbar k / m_i > 0),
    at the step's end position and velocity: the saturation s = s0
    exp(-2 rho^2 / w^2) (par[l, 4] = 2 / w^2, 0 for a plane wave), the
    expected photon number n = R dt with the scattering rate of
    :func:`mdrotor.physics.laser.scattering_rate`,
    R = (Gamma/2) s / (1 + s + (2 (delta - k.v) / Gamma)^2), and the kick

        dv = vrec [ n k_hat + sqrt(n) C (u0, u1, u2) ],   C C^T = k_hat k_hat^T + M

    (mean: the scattering force; covariance n (k_hat k_hat^T + M): the
    Poissonian absorption along k plus the emission with the pattern's
    moments M; C = emit[l]). u0..u2 are uniform numbers of unit variance
    from the counter hash of the trajectory's key and (step, beam, ion)
    (any distribution with the right variance gives the same diffusion: B.
    Duenweg and W. Paul, Int. J. Mod. Phys. C 2, 817 (1991)).
    par[l] = (|k| rad/m, Gamma rad/s, delta rad/s, s0, 2 / w^2).
    photons[i, b0 + b] accumulates n. n_ph, sd_ph: (B,) scratch (the rates
    are computed in a first pass that the compiler can vectorise)."""
    n_beams = khat.shape[0]
    n_ions, nb = px.shape
    for ll in range(n_beams):
        ux = khat[ll, 0]
        uy = khat[ll, 1]
        uz = khat[ll, 2]
        s0 = par[ll, 3]
        iw2 = par[ll, 4]
        if s0 == 0.0:
            continue
        a0 = 2.0 * par[ll, 2] / par[ll, 1]   # 2 delta / Gamma
        a1 = 2.0 * par[ll, 0] / par[ll, 1]   # 2 k / Gamma
        hg = 0.5 * par[ll, 1] * dt           # Gamma dt / 2
        cx = centre[ll, 0]
        cy = centre[ll, 1]
        cz = centre[ll, 2]
        c00, c01, c02 = emit[ll, 0, 0], emit[ll, 0, 1], emit[ll, 0, 2]
        c10, c11, c12 = emit[ll, 1, 0], emit[ll, 1, 1], emit[ll, 1, 2]
        c20, c21, c22 = emit[ll, 2, 0], emit[ll, 2, 1], emit[ll, 2, 2]
        for i in range(n_ions):
            vr = vrec[ll, i]
            if vr == 0.0:
                continue
            if iw2 != 0.0:  # local saturation of the Gaussian beam (kept in sd_ph for the next pass)
                for b in range(nb):
                    dx = px[i, b] - cx
                    dy = py[i, b] - cy
                    dz = pz[i, b] - cz
                    a = dx * ux + dy * uy + dz * uz
                    sd_ph[b] = s0 * math.exp(-iw2 * (dx * dx + dy * dy + dz * dz - a * a))
            else:
                for b in range(nb):
                    sd_ph[b] = s0
            for b in range(nb):
                s = sd_ph[b]
                x = a0 - a1 * (ux * vx[i, b] + uy * vy[i, b] + uz * vz[i, b])
                n = hg * s / (1.0 + s + x * x)
                n_ph[b] = n
                sd_ph[b] = SQRT3 * math.sqrt(n)
            for b in range(nb):
                photons[i, b0 + b] += n_ph[b]
            c0 = np.uint64(((step * n_beams + ll) * n_ions + i) * 3)
            c1 = c0 + np.uint64(1)
            c2 = c0 + np.uint64(2)
            for b in range(nb):
                sd = sd_ph[b]
                key = keys[b0 + b]
                r0 = sd * (2.0 * _uniform(key, c0) - 1.0)
                r1 = sd * (2.0 * _uniform(key, c1) - 1.0)
                r2 = sd * (2.0 * _uniform(key, c2) - 1.0)
                along = vr * n_ph[b]
                vx[i, b] += along * ux + vr * (c00 * r0 + c01 * r1 + c02 * r2)
                vy[i, b] += along * uy + vr * (c10 * r0 + c11 * r1 + c12 * r2)
                vz[i, b] += along * uz + vr * (c20 * r0 + c21 * r1 + c22 * r2)


@njit(cache=True)
def _rf_phase(rf, rf_c, rf_s, ph_c, ph_s, b0, e):
    """rf[b] = cos(W t_e + phase_b) = cos W t_e cos phase_b - sin W t_e sin phase_b."""
    for b in range(rf.shape[0]):
        rf[b] = rf_c[e] * ph_c[b0 + b] - rf_s[e] * ph_s[b0 + b]


@njit(cache=True)
def _kick_propagate(px, py, pz, vx, vy, vz, ax, ay, az, hk, lin, jb):
    """v += hk a (the opening half-kick), then the exact map of the linear
    trap force over one step, per ion and axis: (u, u') <- M (u, u') with M
    = lin[k, i, axis] = (m00, m01, m10, m11), k = jb[b] the step's phase of
    trajectory b on the lattice of K step phases per RF period; one pass over
    the chunk. jb (B,) uint64 (unsigned: the table lookups need no
    negative-index wraparound) is advanced to the next step's phases, k + 1
    mod K, without an integer division."""
    K = np.uint64(lin.shape[0])
    n_ions, nb = px.shape
    for i in range(n_ions):
        for b in range(nb):
            k = jb[b]
            x = px[i, b]
            v = vx[i, b] + hk * ax[i, b]
            px[i, b] = lin[k, i, 0, 0] * x + lin[k, i, 0, 1] * v
            vx[i, b] = lin[k, i, 0, 2] * x + lin[k, i, 0, 3] * v
            x = py[i, b]
            v = vy[i, b] + hk * ay[i, b]
            py[i, b] = lin[k, i, 1, 0] * x + lin[k, i, 1, 1] * v
            vy[i, b] = lin[k, i, 1, 2] * x + lin[k, i, 1, 3] * v
            x = pz[i, b]
            v = vz[i, b] + hk * az[i, b]
            pz[i, b] = lin[k, i, 2, 0] * x + lin[k, i, 2, 1] * v
            vz[i, b] = lin[k, i, 2, 2] * x + lin[k, i, 2, 3] * v
    one = np.uint64(1)
    zero = np.uint64(0)
    for b in range(nb):
        k = jb[b] + one
        jb[b] = k if k < K else zero


def advance(pos, vel, dt, n_steps, fracs, model, drive, pin, poly, lag, noise, laser, chunk):
    """Advance every trajectory by ``n_steps`` steps of length ``dt``.

    Parameters
    ----------
    pos, vel : (3, N, T) float64, m and m/s; updated in place.
    dt : float, s. n_steps : int.
    fracs : (S,) sub-step fractions of dt (1 for Verlet, 3 for order 4).
    model : tuple (w2, rf2, stray_acc, qm, kq_i, kq_j)
        w2, rf2 : (N, 3) static and RF spring terms, rad^2/s^2 (see _accel);
        stray_acc : (N, 3) Q_i E_stray / m_i, m/s^2; qm : (N,) Q_i / m_i,
        C/kg; kq_i, kq_j : (N, N) k Q_i Q_j / m_i and / m_j (upper triangle).
    drive : tuple (rf_c, rf_s, ph_c, ph_s, lin, lin_idx, lin_j0)
        cos and sin of W t at every force evaluation (E,), cos and sin of
        each trajectory's RF phase (T,). Ignored when rf2 is zero.
        lin (K, N, 3, 4): the exact per-step maps of the linear trap force
        (see _kick_propagate) at the K step phases of the RF period, K = 0
        for none; with K > 0 the stepper is the Strang splitting half-kick
        (every other force), exact linear map over dt, half-kick, one
        sub-step only (fracs = [1]), and w2, rf2 must be zero (the linear
        trap is in lin). lin_idx (T,) int64: each trajectory's RF phase in
        lattice steps; lin_j0: the block's first step's lattice index.
    pin : tuple (pin_n, c_re, c_im)
        (P,) int64 multipole orders; (E, P) complex coefficient C_p at each
        force evaluation: eval e = S s + k + 1 is the end of sub-step k of
        step s; eval 0 is the block start. E = S n_steps + 1.
    poly : tuple (exps, coef)
        A polynomial potential phi = sum_j coef_j x^a y^b z^c about the trap
        point (an electrode layout's pinning): exps (J, 3) int64, coef
        (E, J) in V/m^(a+b+c) at each force evaluation; J = 0 for none.
    lag : tuple (masses, charges, lag_n, lag_theta, lag_track, lag_stride, lag_u)
        lag_n: order of the pinning whose lag is tracked (0: none);
        lag_theta, lag_track : (n_steps + 1,) pinning angle and a uint8 flag
        (1 while the pinning is strong enough to define a lag) at the step
        ends; lag_stride: steps between updates; lag_u : (2, T) [unwrapped
        phase arg(M_n) - n theta, last raw phase], updated in place.
    noise : tuple (n_orders, tones, keys, step0, w_tgt, w_sd, r_tgt, r_par, z_real, c_tgt, c_par, z_rot)
        Noise values held constant over each step (:mod:`mdrotor.physics.noise`),
        all computed here per step (see _noise_step): multipole orders
        (K,); the tones' step averages (n_steps, 3 + 2 K), or no rows; each
        trajectory's 64-bit key (T,) and the global index of the block's
        first step (the counters of the draws); the white slots' targets
        (W,) and per-step standard deviations (W,); the colored
        Ornstein-Uhlenbeck modes: real modes' targets (M_r,), coefficients
        (M_r, 4) and states z_real (M_r, T), rotating modes' targets (M_c,),
        coefficients (M_c, 9) and states z_rot (M_c, 2, T); the states are
        advanced in place. Targets are rows of the noise values: 0-2 the
        field's x, y, z, 3 + 2 p and 4 + 2 p g_re and g_im of order p.
        Step s's values give one kick after the deterministic step, dt
        times the noise acceleration at the step's end (a first-order
        splitting, exact for the impulse of a uniform field; a white process
        has no timing within a step to resolve).
    laser : tuple (khat, par, centre, vrec, emit, keys, step0, photons)
        Doppler-cooling beams (:mod:`mdrotor.physics.laser`), L of them (L = 0:
        none): khat (L, 3) unit vectors, par (L, 5) (|k|, Gamma, delta,
        s0, 2/w^2), centre (L, 3) m, vrec (L, N) hbar k / m_i for the
        addressed ions (0 for the others), emit (L, 3, 3) square root of
        k_hat k_hat^T + M (absorption and emission moments), each
        trajectory's 64-bit key (T,), the global
        index of the block's first step, and photons (N, T), which
        accumulates each ion's expected photon count. Like the noise, one
        kick after the deterministic step (see _laser_kick), after the
        noise kick.
    chunk : int, trajectories per work item. The chunks run on numba's
        number of threads (``numba.set_num_threads``), each a call of the
        compiled :func:`_advance_chunk`, which releases the GIL.

    A feature that is off comes as None (``drive`` in the pseudopotential
    model, ``poly``, ``noise``, ``laser``): numba compiles a separate variant
    of the chunk function for each combination used, with the feature's code
    pruned at compile time, so a run compiles only the code it needs; the
    other arguments' empty arrays (no rows) also mean "off".
    """
    start_advance(pos, vel, dt, n_steps, fracs, model, drive, pin, poly, lag, noise, laser, chunk).wait()


class Advancing:
    """A block of steps under way on the thread pool (:func:`start_advance`):
    :meth:`wait` returns when every chunk is done (and raises what a chunk
    raised). Until then the arrays given to the kernel must not be read or
    written: the chunks update them in place."""

    def __init__(self, jobs: list):
        self._jobs = jobs

    def wait(self) -> None:
        for job in self._jobs:
            job.result()
        self._jobs = []


def start_advance(pos, vel, dt, n_steps, fracs, model, drive, pin, poly, lag, noise, laser, chunk) -> Advancing:
    """Start :func:`advance` (the same arguments) and return at once when
    it runs on more than one thread, so that the caller can prepare the next
    block's arrays while the chunks run (:meth:`Advancing.wait` joins
    them); on one thread (or one chunk) it runs here, before returning.
    The chunks and their numbers are the same either way."""
    T = pos.shape[2]
    starts = range(0, T, chunk)
    args = (pos, vel, dt, n_steps, fracs, model, drive, pin, poly, lag, noise, laser)
    threads = numba.get_num_threads()
    if threads == 1 or len(starts) == 1:
        for b0 in starts:
            _advance_chunk(b0, min(T, b0 + chunk), *args)
        return Advancing([])
    pool = _pool(threads)
    # every chunk writes only its own trajectories' columns: the order the threads take them in is free
    return Advancing([pool.submit(_advance_chunk, b0, min(T, b0 + chunk), *args) for b0 in starts])


_POOLS: dict = {}


def _pool(threads: int) -> ThreadPoolExecutor:
    """The process's pool of ``threads`` worker threads for :func:`advance`
    (one per thread count asked, kept for the next block). Keyed by the
    process id too: a process forked from one that had a pool inherits the
    pool object but not its threads, and would wait on it for ever."""
    key = (os.getpid(), threads)
    if key not in _POOLS:
        _POOLS[key] = ThreadPoolExecutor(max_workers=threads, thread_name_prefix="mdrotor-kernel")
    return _POOLS[key]


@njit(cache=True, nogil=True)
def _advance_chunk(b0, b1, pos, vel, dt, n_steps, fracs, model, drive, pin, poly, lag, noise, laser):
    """Trajectories b0 .. b1 - 1 of :func:`advance` (the same arguments),
    copied into local (N, B) arrays per component: with them the compiler
    can prove that nothing aliases and vectorises every loop."""
    w2, rf2, stray_acc, qm, kq_i, kq_j = model
    pin_n, c_re, c_im = pin
    masses, charges, lag_n, lag_theta, lag_track, lag_stride, lag_u = lag
    # A feature that is off comes as None: its code below sits under `x is
    # not None` tests of the argument, which numba prunes at compile time.
    # The scratch arrays exist in every variant (size 0 when unused).
    use_rf = False
    use_lin = False
    if drive is not None:
        rf_c, rf_s, ph_c, ph_s, lin, lin_idx, lin_j0 = drive
        use_lin = lin.shape[0] > 0
        for i in range(rf2.shape[0]):
            for u in range(3):
                if rf2[i, u] != 0.0:
                    use_rf = True
    use_poly = False
    poly_deg = 0
    if poly is not None:
        poly_exps, poly_coef = poly
        use_poly = poly_exps.shape[0] > 0
        for j in range(poly_exps.shape[0]):
            poly_deg = max(poly_deg, poly_exps[j, 0], poly_exps[j, 1], poly_exps[j, 2])
    has_field = False
    has_multipole = False
    n_orders_k = 0
    n_mr = 0
    n_mc = 0
    n_hash = 0
    if noise is not None:
        n_orders, tones, keys, step0, w_tgt, w_sd, r_tgt, r_par, z_real, c_tgt, c_par, z_rot = noise
        for j in range(w_tgt.shape[0]):
            if w_tgt[j] < 3 and w_sd[j] != 0.0:
                has_field = True
        for j in range(r_tgt.shape[0]):
            if r_tgt[j] < 3:
                has_field = True
        for j in range(c_tgt.shape[0]):
            if c_tgt[j] < 3:
                has_field = True
        for st in range(tones.shape[0]):
            if tones[st, 0] != 0.0 or tones[st, 1] != 0.0 or tones[st, 2] != 0.0:
                has_field = True
        n_orders_k = n_orders.shape[0]
        has_multipole = n_orders_k > 0
        n_mr = r_par.shape[0]
        n_mc = c_par.shape[0]
        n_hash = _n_hashes(w_sd, r_par, c_par)
        offs = _noise_offsets(3 + 2 * n_orders_k, w_tgt, w_sd, r_tgt, r_par, c_tgt, c_par)
    n_beams = 0
    if laser is not None:
        l_khat, l_par, l_centre, l_vrec, l_emit, l_keys, l_step0, l_photons = laser
        n_beams = l_khat.shape[0]
    n_ions = pos.shape[1]
    n_sub = fracs.shape[0]
    nb = b1 - b0
    px = np.empty((n_ions, nb))
    py = np.empty((n_ions, nb))
    pz = np.empty((n_ions, nb))
    vx = np.empty((n_ions, nb))
    vy = np.empty((n_ions, nb))
    vz = np.empty((n_ions, nb))
    ax = np.empty((n_ions, nb))
    ay = np.empty((n_ions, nb))
    az = np.empty((n_ions, nb))
    for i in range(n_ions):
        for b in range(nb):
            px[i, b] = pos[0, i, b0 + b]
            py[i, b] = pos[1, i, b0 + b]
            pz[i, b] = pos[2, i, b0 + b]
            vx[i, b] = vel[0, i, b0 + b]
            vy[i, b] = vel[1, i, b0 + b]
            vz[i, b] = vel[2, i, b0 + b]
    zr = np.empty(nb)
    zi = np.empty(nb)
    fx = np.empty(nb)
    fy = np.empty(nb)
    fz = np.empty(nb)
    raw = np.empty(nb)
    rf = np.zeros(nb)
    xp = np.empty((poly_deg + 1, nb))
    yp = np.empty((poly_deg + 1, nb))
    zp = np.empty((poly_deg + 1, nb))
    nx = np.zeros((n_ions, nb))
    ny = np.zeros((n_ions, nb))
    nz = np.zeros((n_ions, nb))
    nv = np.zeros((3 + 2 * n_orders_k, nb))
    us = np.empty((3 * n_hash, nb))
    zr_loc = np.empty((n_mr, nb))
    zc_loc = np.empty((n_mc, 2, nb))
    if noise is not None:
        for j in range(n_mr):
            for b in range(nb):
                zr_loc[j, b] = z_real[j, b0 + b]
        for j in range(n_mc):
            for b in range(nb):
                zc_loc[j, 0, b] = z_rot[j, 0, b0 + b]
                zc_loc[j, 1, b] = z_rot[j, 1, b0 + b]
    n_ph = np.empty(nb if n_beams > 0 else 0)
    sd_ph = np.empty(nb if n_beams > 0 else 0)
    jb = np.empty(nb if use_lin else 0, dtype=np.uint64)
    if use_lin:  # each trajectory's step phase on the lattice (advanced by _kick_propagate)
        for b in range(nb):
            jb[b] = np.uint64((lin_j0 + lin_idx[b0 + b]) % lin.shape[0])
    if drive is not None:
        if use_rf:
            _rf_phase(rf, rf_c, rf_s, ph_c, ph_s, b0, 0)
    _accel(px, py, pz, ax, ay, az, w2, rf2, rf, stray_acc, qm, kq_i, kq_j, pin_n, c_re[0], c_im[0],
           zr, zi, fx, fy, fz)
    if poly is not None:
        if use_poly:
            _poly_accel(px, py, pz, ax, ay, az, qm, poly_exps, poly_coef[0], xp, yp, zp)
    for s in range(n_steps):
        if noise is not None:
            if has_field or has_multipole:
                _noise_step(b0, s, step0 + s, tones, keys, w_tgt, w_sd, r_tgt, r_par, zr_loc, c_tgt, c_par,
                            zc_loc, us, nv, offs)
        for k in range(n_sub):
            h = fracs[k] * dt
            if drive is not None:
                if use_lin:
                    _kick_propagate(px, py, pz, vx, vy, vz, ax, ay, az, 0.5 * h, lin, jb)
                else:
                    _kick_drift(px, py, pz, vx, vy, vz, ax, ay, az, 0.5 * h, h)
            else:
                _kick_drift(px, py, pz, vx, vy, vz, ax, ay, az, 0.5 * h, h)
            e = n_sub * s + k + 1
            if drive is not None:
                if use_rf:
                    _rf_phase(rf, rf_c, rf_s, ph_c, ph_s, b0, e)
            _accel(px, py, pz, ax, ay, az, w2, rf2, rf, stray_acc, qm, kq_i, kq_j, pin_n, c_re[e], c_im[e],
                   zr, zi, fx, fy, fz)
            if poly is not None:
                if use_poly:
                    _poly_accel(px, py, pz, ax, ay, az, qm, poly_exps, poly_coef[e], xp, yp, zp)
            _kick(vx, vy, vz, ax, ay, az, 0.5 * h)
        # the step's noise impulse, dt times the noise acceleration at the
        # step's end (a kick after the deterministic step)
        if noise is not None:
            if has_multipole:
                _noise_accel(px, py, qm, n_orders, nv, has_field, nx, ny, nz, zr, zi)
                _kick(vx, vy, vz, nx, ny, nz, dt)
            elif has_field:
                _noise_field_kick(vx, vy, vz, qm, nv, dt)
        if laser is not None:
            if n_beams > 0:
                _laser_kick(px, py, pz, vx, vy, vz, b0, l_step0 + s, dt, l_khat, l_par, l_centre, l_vrec,
                            l_emit, l_keys, l_photons, n_ph, sd_ph)
        if lag_n > 0 and (s + 1) % lag_stride == 0 and lag_track[s + 1] == 1:
            th = lag_n * lag_theta[s + 1]
            _lag_raw(px, py, masses, charges, lag_n, zr, zi, fx, fy, raw)
            for b in range(nb):
                r = raw[b] - th
                lag_u[0, b0 + b] += wrap_angle(r - lag_u[1, b0 + b])
                lag_u[1, b0 + b] = r
    for i in range(n_ions):
        for b in range(nb):
            pos[0, i, b0 + b] = px[i, b]
            pos[1, i, b0 + b] = py[i, b]
            pos[2, i, b0 + b] = pz[i, b]
            vel[0, i, b0 + b] = vx[i, b]
            vel[1, i, b0 + b] = vy[i, b]
            vel[2, i, b0 + b] = vz[i, b]
    if noise is not None:
        for j in range(n_mr):
            for b in range(nb):
                z_real[j, b0 + b] = zr_loc[j, b]
        for j in range(n_mc):
            for b in range(nb):
                z_rot[j, 0, b0 + b] = zc_loc[j, 0, b]
                z_rot[j, 1, b0 + b] = zc_loc[j, 1, b]
