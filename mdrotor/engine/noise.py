r"""Noise synthesis: the samples of the configured noise, step by step.

The model (spectra, tones, stages) and the analytic rates are in
:mod:`mdrotor.physics.noise`; this module turns a model into the compiled kernel's arrays
and keeps the numpy reference synthesis the tests compare it with.

Time-domain synthesis
---------------------
Each noise sample is the exact average of a continuous-time process over one
integration step: sample ``k`` of a block is ``(1/dt) int x(t) dt`` over
``[t_k, t_k + dt)``, ``t_k = t_start + dt (step0 + k)``, and the kernel
applies it as one kick of duration dt after step k.
For a position-independent force the momentum transferred in a step is then
exactly ``Q int E dt`` of the continuous process. The continuous process is
a sum of independent pieces:

* white level ``S_w``: the step average of white noise is Gaussian with
  variance ``S_w / (2 dt)``, independent between steps (a discrete white
  kick, momentum ``Q E_k dt``; this reproduces the heating rate of
  Turchette et al., below);
* Ornstein-Uhlenbeck (OU) modes, real (``dx = -gamma x dt + noise``, one-sided
  PSD ``(4 sigma^2 / gamma) / (1 + (2 pi f / gamma)^2)``) or rotating complex
  (``dz = -(gamma - i Omega) z dt + noise``, ``x = Re z``, PSD
  ``(2 sigma^2 / gamma) [L(f - f_c) + L(f + f_c)]`` with ``Omega = 2 pi f_c``,
  width ``gamma / 2 pi``; ``sigma^2 = <x^2>``). A Lorentzian term is one mode
  (rotating if ``f_c > 0``) and is exact. A power law is fitted by real OU
  modes: corners log-spaced at 2 per decade from 0.5, 1 or 1.5 decades
  below ``f_min`` to as far above ``f_max`` (the fewest modes that meet
  the tolerance below), weights by non-negative least
  squares on the relative error over the band (the sum-of-Lorentzians
  representation of 1/f^alpha noise: M.S. Keshner, Proc. IEEE 70, 212
  (1982)). The fit is checked on a fine grid and refined (3, 4, 6 per
  decade) until the largest relative error in the band is below 0.2 %
  (:attr:`Spectrum.fit_rel_error` reports it; 0 < alpha < 2 typically gives
  < 0.1 %, the edge cases alpha = 0 or 2 about 0.1 %). Outside the band the
  synthesised spectrum is not zero: it flattens below ``f_min`` and falls as
  ``f^-2`` above ``f_max`` (:meth:`Spectrum.psd_generated` gives it exactly).

OU modes advance with the exact joint Gaussian update of the state and its
step integral (D.T. Gillespie, Phys. Rev. E 54, 2084 (1996), extended to the
complex rate ``lambda = gamma - i Omega``): with ``mu = lambda dt``,
``phi(w) = (1 - e^{-w}) / w`` and ``a = gamma dt``::

    z_{k+1} = e^{-mu} z_k + xi_k,        avg_k = Re[phi(mu) z_k] + eta_k
    <|xi|^2> = 2 sigma^2 (1 - e^{-2a})
    <|eta|^2> = 4 a sigma^2 [1 - 2 Re phi(mu) + phi(2a)] / |mu|^2
    <xi eta*> = 4 a sigma^2 [phi(mu) - phi(2a)] / conj(mu)

(``xi``, ``eta`` circular complex Gaussians; the real mode uses the real
parts, whose covariances are half of these). In the band the dynamics
responds to (``f << 1/dt``) the sampled sequence has the configured PSD
times ``sinc^2(f dt)`` plus aliases, within 0.3 % for ``f dt <= 1/40`` (the
engine's default time step).

*In a run* the compiled kernel computes every sample per step
(:func:`mdrotor.engine.kernels._noise_step`, with the arrays of
:func:`kernel_arrays`). ``eta`` is split into its part along
``xi`` and a remainder independent of everything else and of the other
steps (:func:`kernel_coefficients`): the remainder is white and
joins the white kick of the same component, so a real mode takes one
random number per step and a rotating mode two. The random numbers are
uniform, of unit variance, from a counter-based hash of each trajectory's
key (``SeedSequence(seed, spawn_key=(index, 3))``) and the run's global step
index, three per hash (:func:`mdrotor.engine.kernels._innovations`): white
components first (:func:`white_targets`), then the real modes,
then the rotating modes, in source order. Any distribution with these
variances gives the same second moments, so the same PSD and rates
(uniform kicks: B. Duenweg and W. Paul, Int. J. Mod. Phys. C 2, 817
(1991)); a slow mode, a sum of many innovations, is Gaussian to the
central limit. The OU states are carried per trajectory across blocks and
stages (:class:`KernelNoiseState`) and start from the stationary
distribution, Gaussian, by Box-Muller from the same hash
(:func:`mdrotor.engine.kernels.normals`). Results are bit-identical whatever the
block lengths, the trajectory chunks, the order or the thread count. Cost
per step and trajectory: one hash per three random numbers and a few
multiplications per mode; a power law over D decades uses at most 2 D + 7
modes per component (x, y, z or re, im), fewer after the fit drops unused
corners (9 for 50 kHz to 5 MHz, alpha = 1).

*The numpy reference* (:func:`new_state`,
:func:`generate`; the tests compare its PSD and the kernel's
with the configured one) draws Gaussian numbers from
``mdrotor.engine.initial.trajectory_rng(s, b, stream=1)``: first the stationary
initial OU states, then per block an array ``(n_steps, n_normals)`` in a
fixed order (entries in config order; per entry and axis/part: white, then
per real mode (xi, eta), then per rotating mode (Re xi, Im xi, Re eta)),
and runs the recursion with ``scipy.signal.lfilter``, whose final state is
carried to the next block. About 1 us per step and trajectory for a 1/f
band of two decades on x, y, z: a run does not use it.
"""

from __future__ import annotations

import functools
import math
from dataclasses import dataclass, field

import numpy as np
from scipy.signal import lfilter

from mdrotor.engine.initial import counter_keys, trajectory_rng
from mdrotor.engine.kernels import normals
from mdrotor.physics.noise import TWO_PI, NoiseSource

DRAW_BUDGET_BYTES = 32 * 2**20     # random normals held at once by generate()


NOISE_STREAM = 3                   # counter keys (mdrotor.engine.initial.counter_keys) of the kernel's draws


@dataclass
class NoiseBlock:
    """Noise samples for one block of steps and a set of trajectories.

    Sample ``k`` is the average over step k, ``[t_k, t_k + dt)`` with
    ``t_k = t_start_s + dt_s (step0 + k)``; hold it constant over the step.

    Attributes
    ----------
    field_v_per_m : (n_steps, 3, T) float64 or None
        Uniform field (E_x, E_y, E_z), V/m; None when the model has no field noise.
    g_re, g_im : (n_steps, K, T) float64 or None
        Multipole coefficients for ``orders``, V/m^n; None when K = 0.
    orders : (K,) int64
    """

    field_v_per_m: np.ndarray | None
    g_re: np.ndarray | None
    g_im: np.ndarray | None
    orders: np.ndarray
    t_start_s: float
    dt_s: float
    step0: int
    n_steps: int


@dataclass(eq=False)
class NoiseState:
    """Per-trajectory generator state, carried from block to block.

    ``rngs[b]`` is ``trajectory_rng(seed, indices[b], stream=1)``; ``z`` and
    ``zi`` hold, per source, the OU states at the end of the last block and
    the ``lfilter`` state (real modes float (M_r, T), rotating modes complex
    (M_c, T)).
    """

    seed: int
    indices: np.ndarray
    rngs: list
    z_real: list
    zi_real: list
    z_rot: list
    zi_rot: list
    dt_s: float | None = None
    cache: dict = field(default_factory=dict)

    @property
    def n_trajectories(self) -> int:
        return len(self.indices)


@dataclass(eq=False)
class KernelNoiseState:
    """What the compiled kernel carries for each trajectory from block to
    block and stage to stage (:meth:`NoiseModel.kernel_state`).

    Attributes
    ----------
    seed : int
    indices : (T,) int64
        The trajectories' indices in the run.
    keys : (T,) uint64
        Counter keys of every draw (white kicks, colored innovations,
        initial states; stream 3), :func:`mdrotor.engine.initial.counter_keys`.
    z_real : (M_r, T) float64
        Real OU modes' states (the process at PSD scale 1), in the order of
        :meth:`NoiseModel.kernel_layout`.
    z_rot : (M_c, 2, T) float64
        Rotating modes' states (real and imaginary parts).
    """

    seed: int
    indices: np.ndarray
    keys: np.ndarray
    z_real: np.ndarray
    z_rot: np.ndarray

    @property
    def n_trajectories(self) -> int:
        return len(self.indices)


_GL_X, _GL_W = np.polynomial.legendre.leggauss(32)


_GL_X = 0.5 * (_GL_X + 1.0)


_GL_W = 0.5 * _GL_W


def _phi(w):
    """(1 - e^{-w}) / w for complex w (1 at w = 0)."""
    w = np.asarray(w, dtype=complex)
    small = np.abs(w) < 1e-8
    safe = np.where(small, 1.0, w)
    return np.where(small, 1.0 - w / 2.0, -np.expm1(-safe) / safe)


def ou_step_covariance(gamma: float, omega: float, var: float, dt: float):
    """Exact one-step coefficients of an OU mode and its step average.

    Parameters
    ----------
    gamma : float
        Damping rate, 1/s (> 0).
    omega : float
        Rotation rate Omega, rad/s (0: real mode).
    var : float
        ``sigma^2``, variance of the real part.
    dt : float
        Step, s.

    Returns
    -------
    decay : complex
        ``e^{-mu}``, ``mu = (gamma - i Omega) dt``.
    mean : complex
        ``phi(mu)``: ``<avg | z_k> = Re[phi(mu) z_k]``.
    cov : (3, 3) array
        Covariance of ``(Re xi, Im xi, Re eta)`` (module docstring); the
        leading (Re xi, Re eta) block serves a real mode.
    """
    mu = complex(gamma * dt, -omega * dt)
    a = gamma * dt
    p = -2.0 * var * math.expm1(-2.0 * a)                      # <|xi|^2>
    if abs(mu) <= 2.0:
        # entire integrands on [0, 1]; 32-point Gauss-Legendre is exact to rounding
        ph = _phi(mu * _GL_X)
        g = float(np.sum(_GL_W * _GL_X**2 * np.abs(ph) ** 2))
        k = complex(np.sum(_GL_W * _GL_X * np.exp(-mu * _GL_X) * np.conj(ph)))
    else:
        phi_mu = complex(_phi(mu))
        phi_2a = float(np.real(_phi(2.0 * a)))
        g = (1.0 - 2.0 * phi_mu.real + phi_2a) / abs(mu) ** 2
        k = (phi_mu - phi_2a) / mu.conjugate()
    q = 4.0 * a * var * g                                       # <|eta|^2>
    c = 4.0 * a * var * k                                       # <xi eta*>
    cov = np.array([[p / 2, 0.0, c.real / 2],
                    [0.0, p / 2, c.imag / 2],
                    [c.real / 2, c.imag / 2, q / 2]])
    return complex(np.exp(-mu)), complex(_phi(mu)), cov


def _cholesky(cov: np.ndarray) -> np.ndarray:
    try:
        return np.linalg.cholesky(cov)
    except np.linalg.LinAlgError:
        # rounding can leave a vanishing eigenvalue slightly negative
        jitter = 1e-14 * float(np.max(np.diag(cov)))
        return np.linalg.cholesky(cov + jitter * np.eye(len(cov)))


@dataclass(frozen=True, eq=False)
class _SourceCoefficients:
    white_sd: float
    real_decay: np.ndarray   # (M_r,)
    real_mean: np.ndarray
    real_chol: np.ndarray    # (M_r, 2, 2)
    rot_decay: np.ndarray    # (M_c,) complex
    rot_mean: np.ndarray     # complex
    rot_chol: np.ndarray     # (M_c, 3, 3)


def _coefficients(src: NoiseSource, dt: float) -> _SourceCoefficients:
    sp = src.spectrum
    rd, rm, rc, cd, cm, cc = [], [], [], [], [], []
    for fw, fc, var in zip(sp.corner_hz, sp.center_hz, sp.variance):
        decay, mean, cov = ou_step_covariance(TWO_PI * fw, TWO_PI * fc, var, dt)
        if fc == 0.0:
            rd.append(decay.real)
            rm.append(mean.real)
            rc.append(_cholesky(cov[np.ix_([0, 2], [0, 2])]))
        else:
            cd.append(decay)
            cm.append(mean)
            cc.append(_cholesky(cov))
    return _SourceCoefficients(
        math.sqrt(sp.white_level / (2.0 * dt)),
        np.array(rd, dtype=float), np.array(rm, dtype=float), np.array(rc, dtype=float).reshape(-1, 2, 2),
        np.array(cd, dtype=complex), np.array(cm, dtype=complex), np.array(cc, dtype=float).reshape(-1, 3, 3))


def _run_source(src, cf, state, si, draws, col, c0, c1, new_dt):
    """Samples (Tc, n_steps) of one source for trajectories c0:c1; advances its state."""

    tc, n = draws.shape[0], draws.shape[1]
    y = np.zeros((tc, n))
    if src.spectrum.white_level > 0:
        y += cf.white_sd * draws[:, :, col]
        col += 1
    zr, zir = state.z_real[si], state.zi_real[si]
    for j in range(len(cf.real_decay)):
        L = cf.real_chol[j]
        u1, u2 = draws[:, :, col], draws[:, :, col + 1]
        col += 2
        xi = L[0, 0] * u1
        eta = L[1, 0] * u1 + L[1, 1] * u2
        e = cf.real_decay[j]
        z0 = zr[j, c0:c1]
        zi = e * z0 if new_dt else zir[j, c0:c1]
        zs, zf = lfilter([1.0], [1.0, -e], xi, axis=1, zi=zi[:, None])
        y += cf.real_mean[j] * np.concatenate([z0[:, None], zs[:, :-1]], axis=1) + eta
        zr[j, c0:c1] = zs[:, -1]
        zir[j, c0:c1] = zf[:, 0]
    zc, zic = state.z_rot[si], state.zi_rot[si]
    for j in range(len(cf.rot_decay)):
        L = cf.rot_chol[j]
        u1, u2, u3 = draws[:, :, col], draws[:, :, col + 1], draws[:, :, col + 2]
        col += 3
        xi = (L[0, 0] * u1) + 1j * (L[1, 0] * u1 + L[1, 1] * u2)
        eta = L[2, 0] * u1 + L[2, 1] * u2 + L[2, 2] * u3
        e = cf.rot_decay[j]
        z0 = zc[j, c0:c1]
        zi = e * z0 if new_dt else zic[j, c0:c1]
        zs, zf = lfilter(np.array([1.0 + 0j]), np.array([1.0 + 0j, -e]), xi, axis=1, zi=zi[:, None])
        start = np.concatenate([z0[:, None], zs[:, :-1]], axis=1)
        y += (cf.rot_mean[j] * start).real + eta
        zc[j, c0:c1] = zs[:, -1]
        zic[j, c0:c1] = zf[:, 0]
    return y, col


def n_targets(model) -> int:
    """Rows of the kernel's noise values: the field's x, y, z, then g_re,
    g_im of each order in :attr:`NoiseModel.orders`."""
    return 3 + 2 * len(model.orders)

def target_row(src) -> int:
    return src.channel if src.target == "field" else 3 + 2 * src.channel + src.part

@functools.lru_cache(maxsize=64)
def kernel_modes(model) -> tuple:
    """(real, rotating): per OU mode (source index, gamma rad/s, Omega
    rad/s, variance), sources in order, each source's modes in its
    spectrum's order."""
    real, rot = [], []
    for si, src in enumerate(model.sources):
        sp = src.spectrum
        for fw, fc, var in zip(sp.corner_hz, sp.center_hz, sp.variance):
            (real if fc == 0.0 else rot).append((si, TWO_PI * fw, TWO_PI * fc, var))
    return tuple(real), tuple(rot)

def n_kernel_states(model) -> int:
    """Doubles of OU state per trajectory in the kernel: one per real
    mode, two per rotating mode."""
    real, rot = kernel_modes(model)
    return len(real) + 2 * len(rot)

def kernel_layout(model) -> tuple:
    """Targets (rows of the kernel's noise values, see :func:`n_targets`)
    of the real modes (M_r,) and of the rotating modes (M_c,), int64."""
    real, rot = kernel_modes(model)
    tr = np.array([target_row(model.sources[m[0]]) for m in real], dtype=np.int64)
    tc = np.array([target_row(model.sources[m[0]]) for m in rot], dtype=np.int64)
    return tr, tc

@functools.lru_cache(maxsize=64)
def unit_coefficients(model, dt_s: float) -> tuple:
    """Per mode at PSD scale 1: the real modes' (e, l, m, c, r) and the
    rotating modes' (Re e, Im e, l00, l10, l11, Re m, Im m, c1, c2, r),
    r the variance of the step average's part independent of the state
    and the innovations (see :func:`kernel_coefficients`)."""
    real, rot = kernel_modes(model)
    rp = np.zeros((len(real), 5))
    for j, (_, gam, _, var) in enumerate(real):
        decay, mean, cov = ou_step_covariance(gam, 0.0, var, dt_s)
        L = _cholesky(cov[np.ix_([0, 2], [0, 2])])
        rp[j] = (decay.real, L[0, 0], mean.real, L[1, 0], L[1, 1] ** 2)
    cp = np.zeros((len(rot), 10))
    for j, (_, gam, om, var) in enumerate(rot):
        decay, mean, cov = ou_step_covariance(gam, om, var, dt_s)
        L = _cholesky(cov)
        cp[j] = (decay.real, decay.imag, L[0, 0], L[1, 0], L[1, 1], mean.real, mean.imag, L[2, 0], L[2, 1],
                 L[2, 2] ** 2)
    return rp, cp

def white_targets(model) -> np.ndarray:
    """The kernel's white slots: the targets (rows of the noise values,
    :func:`n_targets`) that any noise source drives, int64, ascending.
    Fixed for the model, so the counters of the draws are too."""
    return np.array(sorted({target_row(s) for s in model.sources}), dtype=np.int64)

def kernel_coefficients(model, dt_s: float, stage: str | None = None) -> tuple:
    """The compiled kernel's per-step coefficients (:func:`mdrotor.engine.kernels._noise_step`).

    The exact joint update of an OU mode and its step average
    (:func:`ou_step_covariance`), written with one innovation per real
    mode: ``(xi, eta)`` has the Cholesky factor ``L``, ``xi = l u1``,
    ``eta = c u1 + r^(1/2) u2`` with ``l = L00``, ``c = L10``, ``r =
    L11^2``, u1, u2 independent of unit variance, so

        avg_k = m z_k + c u1 + r^(1/2) u2,      z_{k+1} = e z_k + l u1

    (``e = e^{-gamma dt}``, ``m = phi(gamma dt)``). The last term is
    independent of everything else and of the other steps: white, so it
    joins the white kick of the mode's target, whose per-step variance
    becomes ``scale (S_w / (2 dt) + sum r)``. A rotating mode does the
    same with two innovations (``(Re xi, Im xi, Re eta)`` from the 3 x 3
    factor). The state is the process at PSD scale 1; the stage's scale
    multiplies the mode's contribution by ``scale^(1/2)``. The same
    second moments as :func:`generate`: the same PSD.

    Returns
    -------
    w_sd : (W,) array
        White per-step standard deviation of each of
        :func:`white_targets` (V/m for the field, V/m^n for order n).
    r_par : (M_r, 4) array
        ``(e, l, a m, a c)`` per real mode, ``a = scale^(1/2)``.
    c_par : (M_c, 9) array
        ``(Re e, Im e, l00, l10, l11, a Re m, a Im m, a L20, a L21)``
        per rotating mode.
    """
    rp, cp = unit_coefficients(model, float(dt_s))
    real, rot = kernel_modes(model)
    white = np.zeros(n_targets(model))
    for src in model.sources:
        white[target_row(src)] += src.scale(stage) * src.spectrum.white_level / (2.0 * dt_s)
    r_par = rp[:, :4].copy()
    for j, mode in enumerate(real):
        a2 = model.sources[mode[0]].scale(stage)
        r_par[j, 2:4] *= math.sqrt(a2)
        white[target_row(model.sources[mode[0]])] += a2 * rp[j, 4]
    c_par = cp[:, :9].copy()
    for j, mode in enumerate(rot):
        a2 = model.sources[mode[0]].scale(stage)
        c_par[j, 5:9] *= math.sqrt(a2)
        white[target_row(model.sources[mode[0]])] += a2 * cp[j, 9]
    return np.sqrt(white[white_targets(model)]), r_par, c_par

def tone_values(model, t_start_s: float, dt_s: float, step0: int, n_steps: int, stage: str | None = None) -> np.ndarray:
    """The tones' step averages over steps ``step0 .. step0 + n_steps - 1``
    (``[t_k, t_k + dt)``, ``t_k = t_start_s + dt_s k``), (n_steps,
    :func:`n_targets`), the same for every trajectory; (0, n_targets)
    when no tone is on during ``stage``."""
    on = [t for t in model.tones if t.on(stage) and t.amplitude != 0]
    if not on or n_steps <= 0:
        return np.zeros((0, n_targets(model)))
    out = np.zeros((n_steps, n_targets(model)))
    t_mid = t_start_s + dt_s * (step0 + np.arange(n_steps) + 0.5)
    for tone in on:
        re, im = tone.step_average(t_mid, dt_s)
        if tone.target == "field":
            out[:, tone.channel] += re
            continue
        if re is not None:
            out[:, 3 + 2 * tone.channel] += re
        if im is not None:
            out[:, 4 + 2 * tone.channel] += im
    return out

def kernel_state(model, seed: int, indices) -> KernelNoiseState:
    """Each trajectory's key and stationary initial OU states for the
    compiled kernel (the run's noise). The states are drawn from the
    stationary distribution, Gaussian with the mode's variance (per part
    for a rotating mode), by Box-Muller from the key's counter hash
    (:func:`mdrotor.engine.kernels.normals`): a function of (seed, trajectory
    index) only."""

    idx = np.asarray(indices, dtype=np.int64).reshape(-1)
    keys = counter_keys(seed, idx, NOISE_STREAM)
    real, rot = kernel_modes(model)
    n_r, n_c = len(real), len(rot)
    g = normals(keys, np.uint64(2**64 - 1), n_r + 2 * n_c) if n_r + n_c else np.zeros((0, len(idx)))
    sd_r = np.sqrt(np.array([m[3] for m in real], dtype=float))
    sd_c = np.sqrt(np.array([m[3] for m in rot], dtype=float))
    z_real = np.ascontiguousarray(g[:n_r] * sd_r[:, None])
    z_rot = np.ascontiguousarray(g[n_r:].reshape(n_c, 2, len(idx)) * sd_c[:, None, None])
    return KernelNoiseState(int(seed), idx, keys, z_real, z_rot)

def kernel_arrays(model, state: KernelNoiseState, *, t_start_s: float, dt_s: float, step0: int, n_steps: int,
                  global_step0: int, stage: str | None = None) -> tuple:
    """The kernel's ``noise`` tuple (:func:`mdrotor.engine.kernels.advance`) for
    ``n_steps`` steps of ``stage`` from its step ``step0`` (time as in
    :func:`tone_values`), the run's global step ``global_step0`` (the
    counter of the draws)."""
    r_tgt, c_tgt = kernel_layout(model)
    w_sd, r_par, c_par = kernel_coefficients(model, dt_s, stage)
    tones = tone_values(model, t_start_s, dt_s, step0, n_steps, stage)
    return (np.asarray(model.orders, dtype=np.int64), tones, state.keys, int(global_step0), white_targets(model),
            w_sd, r_tgt, r_par, state.z_real, c_tgt, c_par, state.z_rot)

def new_state(model, seed: int, indices) -> NoiseState:
    """The numpy reference's generator state for trajectories ``indices``
    (a run uses :func:`kernel_state`).

    Draws the stationary initial OU states from
    ``trajectory_rng(seed, index, stream=1)``."""

    idx = np.asarray(indices, dtype=np.int64).reshape(-1)
    T = len(idx)
    rngs = [trajectory_rng(int(seed), int(i), 1) for i in idx]
    n_init = sum(s.n_init for s in model.sources)
    draws = np.empty((T, n_init))
    for b, r in enumerate(rngs):
        r.standard_normal(out=draws[b])
    z_real, zi_real, z_rot, zi_rot = [], [], [], []
    col = 0
    for s in model.sources:
        var = s.spectrum.variance
        real = s.spectrum.is_real
        sd_r = np.sqrt(var[real])
        sd_c = np.sqrt(var[~real])
        mr, mc = len(sd_r), len(sd_c)
        zr = (draws[:, col:col + mr] * sd_r).T.copy()
        col += mr
        u = draws[:, col:col + 2 * mc].reshape(T, mc, 2)
        zc = ((u[..., 0] + 1j * u[..., 1]) * sd_c).T.copy()
        col += 2 * mc
        z_real.append(zr)
        zi_real.append(np.zeros_like(zr))
        z_rot.append(zc)
        zi_rot.append(np.zeros_like(zc))
    return NoiseState(int(seed), idx, rngs, z_real, zi_real, z_rot, zi_rot)

def generate(model, state: NoiseState, *, t_start_s: float, dt_s: float, step0: int, n_steps: int,
             stage: str | None = None) -> NoiseBlock:
    """Noise samples for the next ``n_steps`` steps of every trajectory of
    ``state``: the numpy reference synthesis (the tests compare it and the
    compiled kernel's, :func:`kernel_arrays`, with the configured PSD).

    Parameters
    ----------
    state : NoiseState
        From :func:`new_state`; advanced in place.
    t_start_s, dt_s, step0 : float, float, int
        Step k of the block covers ``[t_k, t_k + dt_s)``,
        ``t_k = t_start_s + dt_s * (step0 + k)`` (the engine's stage
        start, stage step and step index within the stage). Only the
        tones depend on the time; the processes continue from the state.
    n_steps : int
    stage : str, optional
        Stage name (PSD scales and tones); None: scale 1, every tone on.

    Returns
    -------
    NoiseBlock
    """
    if n_steps < 0 or not dt_s > 0:
        raise ValueError("generate needs n_steps >= 0 and dt_s > 0")
    T = state.n_trajectories
    K = len(model.orders)
    field_arr = np.zeros((n_steps, 3, T)) if model.has_field else None
    g_re = np.zeros((n_steps, K, T)) if K else None
    g_im = np.zeros((n_steps, K, T)) if K else None
    new_dt = state.dt_s != dt_s
    coeffs = state.cache.get(dt_s)
    if coeffs is None:
        coeffs = [_coefficients(s, dt_s) for s in model.sources]
        state.cache = {dt_s: coeffs}
    n_norm = model.n_normals_per_step
    if n_steps > 0 and n_norm > 0:
        tc = max(1, min(T, DRAW_BUDGET_BYTES // (8 * n_steps * n_norm)))
        for c0 in range(0, T, tc):
            c1 = min(T, c0 + tc)
            draws = np.empty((c1 - c0, n_steps, n_norm))
            for b in range(c0, c1):
                state.rngs[b].standard_normal(out=draws[b - c0])
            col = 0
            for si, (src, cf) in enumerate(zip(model.sources, coeffs)):
                y, col = _run_source(src, cf, state, si, draws, col, c0, c1, new_dt)
                a = math.sqrt(src.scale(stage))
                if a != 1.0:
                    y *= a
                if src.target == "field":
                    field_arr[:, src.channel, c0:c1] += y.T
                else:
                    (g_re if src.part == 0 else g_im)[:, src.channel, c0:c1] += y.T
    state.dt_s = dt_s
    if n_steps > 0:
        t_mid = t_start_s + dt_s * (step0 + np.arange(n_steps) + 0.5)
        for tone in model.tones:
            if not tone.on(stage) or tone.amplitude == 0:
                continue
            re, im = tone.step_average(t_mid, dt_s)
            if tone.target == "field":
                field_arr[:, tone.channel, :] += re[:, None]
                continue
            if re is not None:
                g_re[:, tone.channel, :] += re[:, None]
            if im is not None:
                g_im[:, tone.channel, :] += im[:, None]
    return NoiseBlock(field_arr, g_re, g_im, np.array(model.orders, dtype=np.int64),
                      float(t_start_s), float(dt_s), int(step0), int(n_steps))
