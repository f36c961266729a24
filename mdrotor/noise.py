r"""Electric-field noise: configuration, time-domain synthesis, analytic rates.

Noise from nearby surfaces heats the crystal and exerts random torques on it.
The sources are far from the crystal compared with its size, so the noise is
spatially smooth; mdrotor keeps a uniform field and in-plane field
multipoles of order n >= 2. The same noise values act on every ion of a
trajectory; different trajectories see independent realisations.

Conventions
-----------
*Uniform field.* ``E(t) = (E_x, E_y, E_z)`` in V/m; an ion of charge Q feels
``F = Q E``.

*Multipole noise of order n* (same machinery as the pinning, see
:mod:`mdrotor.multipole`)::

    Phi_n(x, y, t) = Re[ g_n(t) (x + i y)^n ],    g_n = g_re + i g_im  [V/m^n]

An ion has potential energy ``Q Phi_n``. ``g_n`` plays the role of the
pinning's complex coefficient ``C = c_n e^{-i n theta}``: a pinning term and
a noise term of the same order add as ``Re[(C + g_n) z^n]``, so the kernel
can add ``g_n`` to ``C``. ``g_re`` alone is a standing multipole along the
x axis (n = 2: ``g_re (x^2 - y^2)``), ``g_im`` alone the one turned by
``-pi/(2n)`` (n = 2: ``-2 g_im x y``).

*Spectral densities.* Every noise component is a stationary Gaussian
process with a one-sided power spectral density ``S(f)`` per Hz,
``<x^2> = int_0^inf S(f) df``, ``R(tau) = <x(t + tau) x(t)> =
int_0^inf S(f) cos(2 pi f tau) df`` (Wiener-Khinchin). For the field,
each selected Cartesian component has ``S`` in V^2/m^2/Hz, the components
independent. For order n, ``g_re`` and ``g_im`` are independent and each has
the configured ``S`` in V^2/m^(2n)/Hz, so ``<|g_n|^2> = 2 int S df``; the
noise has no preferred orientation. ``S`` is what ``scipy.signal.welch``
(``scaling="density"``, one-sided) returns for a record of the component.

PSD terms (the configured ``S`` is their sum; ``level`` in PSD units):

* ``white``:       ``S = level``.
* ``power``:       ``S = level (f / f_ref)^(-alpha)`` for ``f_min <= f <= f_max``
  and 0 outside, ``0 <= alpha <= 2``.
* ``lorentzian``:  ``S = level [L(f - f_c) + L(f + f_c)] / [1 + L(2 f_c)]``,
  ``L(u) = 1 / (1 + (u / width)^2)``: a peak at ``f_c`` with half width at
  half maximum ``width`` and ``S(f_c) = level``. The mirror term
  ``L(f + f_c)`` is the one-sided fold of a spectrum at ``+-f_c``; it is
  negligible for ``f_c >> width`` and makes ``f_c = 0`` the low-pass
  ``level / (1 + (f / width)^2)``.

Per stage, a noise entry's PSD is multiplied by a scale (``stages``,
amplitude squared), e.g. noise injected only during free rotation.
Deterministic tones ``A cos(2 pi f t + phase)`` (or a rotating multipole
``g_n = A e^{-i (2 pi f t + phase)}``) are on during chosen stages; ``t`` is
the run time (0 at the start of the first stage).

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
  modes: corners log-spaced at 2 per decade from 1.5 decades below
  ``f_min`` to 1.5 decades above ``f_max``, weights by non-negative least
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
(:func:`mdrotor.kernels._noise_step`, with the arrays of
:meth:`NoiseModel.kernel_arrays`). ``eta`` is split into its part along
``xi`` and a remainder independent of everything else and of the other
steps (:meth:`NoiseModel.kernel_coefficients`): the remainder is white and
joins the white kick of the same component, so a real mode takes one
random number per step and a rotating mode two. The random numbers are
uniform, of unit variance, from a counter-based hash of each trajectory's
key (``SeedSequence(seed, spawn_key=(index, 3))``) and the run's global step
index, three per hash (:func:`mdrotor.kernels._innovations`): white
components first (:meth:`NoiseModel.white_targets`), then the real modes,
then the rotating modes, in source order. Any distribution with these
variances gives the same second moments, so the same PSD and rates
(uniform kicks: B. Duenweg and W. Paul, Int. J. Mod. Phys. C 2, 817
(1991)); a slow mode, a sum of many innovations, is Gaussian to the
central limit. The OU states are carried per trajectory across blocks and
stages (:class:`KernelNoiseState`) and start from the stationary
distribution, Gaussian, by Box-Muller from the same hash
(:func:`mdrotor.kernels.normals`). Results are bit-identical whatever the
block lengths, the trajectory chunks, the order or the thread count. Cost
per step and trajectory: one hash per three random numbers and a few
multiplications per mode; a power law over D decades uses at most 2 D + 7
modes per component (x, y, z or re, im), fewer after the fit drops unused
corners (9 for 50 kHz to 5 MHz, alpha = 1).

*The numpy reference* (:meth:`NoiseModel.new_state`,
:meth:`NoiseModel.generate`; the tests compare its PSD and the kernel's
with the configured one) draws Gaussian numbers from
``mdrotor.sampling.trajectory_rng(s, b, stream=1)``: first the stationary
initial OU states, then per block an array ``(n_steps, n_normals)`` in a
fixed order (entries in config order; per entry and axis/part: white, then
per real mode (xi, eta), then per rotating mode (Re xi, Im xi, Re eta)),
and runs the recursion with ``scipy.signal.lfilter``, whose final state is
carried to the next block. About 1 us per step and trajectory for a 1/f
band of two decades on x, y, z: a run does not use it.

Heating of the centre-of-mass motion
------------------------------------
A uniform field with one-sided PSD ``S_E`` (V^2/m^2/Hz) along a mode axis
heats a single ion of mass m and charge Q in a mode of frequency
``f = omega / 2 pi`` at

    dn/dt = Q^2 S_E(f) / (4 m hbar omega)

(Q.A. Turchette et al., Phys. Rev. A 61, 063418 (2000); M. Brownnutt et al.,
Rev. Mod. Phys. 87, 1419 (2015)). The centre-of-mass mode of N identical
ions is an oscillator of mass N m and charge N Q: ``dn/dt = N Q^2 S_E /
(4 m hbar omega)``, the energy rate N times the single-ion rate. A uniform
field couples to nothing else in a crystal of identical ions.

Angular-momentum diffusion of a rotating crystal
------------------------------------------------
A rigid crystal rotating about the trap axis has lab positions
``z_i(t) = z_i^b e^{i phi(t)}``, ``phi = phi_0 + 2 pi f_rot t``, with body
positions ``z_i^b`` (any fixed orientation). Its energy in order-n noise is
``U = Re[g(t) M_n e^{i n phi}]`` with the body-frame moment
``M_n = sum_i Q_i (z_i^b)^n`` (C m^n; ``|M_n|`` does not depend on the body
orientation). The torque about the axis is

    tau = -dU/dphi = -Re[i n g M_n e^{i n phi}] = n Im[g M_n e^{i n phi}]
        = n |M_n| (g_re sin psi + g_im cos psi),   psi = n phi + arg M_n.

With ``g_re``, ``g_im`` independent with autocorrelations ``R_re``, ``R_im``,

    <tau(t + s) tau(t)> = n^2 |M_n|^2 [R_re(s) sin psi(t+s) sin psi(t)
                                       + R_im(s) cos psi(t+s) cos psi(t)].

For ``R_re = R_im = R`` this is stationary, ``n^2 |M_n|^2 R(s) cos(n w s)``
(``w = 2 pi f_rot``); otherwise its average over the rotation phase is
``n^2 |M_n|^2 [R_re + R_im](s) cos(n w s) / 2``. The diffusion constant,
``<(L(t) - L(0))^2> = 2 D t`` for t much longer than the torque's
correlation time, is ``D = (1/2) int_{-inf}^{inf} <tau(s) tau(0)> ds``.
With ``int R(s) cos(2 pi f s) ds = S(f) / 2`` (one-sided S)::

    D_n = n^2 |M_n|^2 [S_re(n |f_rot|) + S_im(n |f_rot|)] / 8
        = n^2 |M_n|^2 S(n |f_rot|) / 4        (our multipole noise, S_re = S_im = S)

It is resonant: only the noise at ``n f_rot`` counts, and it scales with the
crystal's order-n moment squared. A regular N-gon of identical ions has
``M_n = 0`` unless N divides n (``sum_k e^{2 pi i k n / N} = 0``), so it
does not diffuse under order-n noise then. Different orders and components
are independent, so their D add. ``D_hbar2_per_s = D / hbar^2`` is what
:mod:`mdrotor.coherence` takes; order-n noise kicks L by ``+-n`` quanta
(``kick_quanta = n`` there). The derivation assumes a rigid crystal whose
rotation rate the noise does not change during the torque correlation time
(weak noise, centrifugal stretch included in ``z_i^b``); it is checked
against a Monte-Carlo of the torque integral in ``tests/test_noise.py``.

*Over a finite window.* The fit (:func:`run_rates`) measures
``(var L(t0 + T) - var L(t0)) / (2 T)``, not the limit above. For torques
that start acting at ``t_s = t0 - lead`` (the noise was off, or the crystal
pinned, before) and a stationary torque autocorrelation ``C(u)``,

    var_noise L(t) = int_{t_s}^{t} int_{t_s}^{t} C(s1 - s2) ds1 ds2
                   = G(t - t_s),      G(t) = 2 int_0^t (t - u) C(u) du,

so the fit's expectation is ``D_T = [G(lead + T) - G(lead)] / (2 T)`` (the
variance of the integral of a stationary process over a window: A.
Papoulis, Probability, Random Variables and Stochastic Processes, 3rd ed.
(1991), ch. 10, from memory). In the frequency
domain, with no lead, ``D_T = n^2 |M_n|^2 / 8 int_0^inf [S_re + S_im](f)
[F_T(f - n f_rot) + F_T(f + n f_rot)] df`` with the Fejer kernel
``F_T(x) = T sinc^2(x T)``: the spectrum smoothed over ``1/T`` about
``n f_rot``; it tends to ``D_n`` for ``T >> 1/width``. The synthesised
spectrum (white level ``S_w`` plus OU modes of variance ``sigma^2``, rate
``gamma``, rotation ``Omega_c``; module docstring) gives ``G`` in closed
form: with ``C(u) = n^2 |M_n|^2 [R_re(u) + R_im(u)] cos(Omega_n u) / 2``,
``Omega_n = 2 pi n f_rot``, ``R = (S_w / 2) delta(u) + sum sigma^2
e^{-gamma |u|} cos(Omega_c u)``, per component::

    G(t) = n^2 |M_n|^2 / 2 [ S_w t / 2 + sum sigma^2 (g(t; gamma, Omega_c - Omega_n)
                                                  + g(t; gamma, Omega_c + Omega_n)) / 2 ]
    g(t; gamma, nu) = 2 int_0^t (t - u) e^{-gamma u} cos(nu u) du
                    = 2 Re[(lambda t - 1 + e^{-lambda t}) / lambda^2],   lambda = gamma - i nu.

For a Lorentzian of half width ``gamma / 2 pi`` centred on ``n f_rot`` and no
lead this is ``D_T / D_n = 1 - (1 - e^{-gamma T}) / (gamma T)``: 0.968 for
5 kHz over 1 ms. When the torques have acted for much longer than their
correlation time before ``t0`` (``lead >> 1/gamma``) the cross-covariance of
``L(t0)`` with the window's torques restores ``D_T = D_n`` exactly.
:meth:`NoiseModel.rotor_diffusion_window` computes ``D_T``; the run's
``lead`` is the time since the noise came on at the fitted stage's level
with the crystal unpinned (earlier torques are taken as uncorrelated with
the window's). Tones are deterministic and not part of D; the step
averaging (``sinc^2(n f_rot dt)``, ~1e-3 at the default step) is left out.

*Uniform field on a mixed crystal.* The torque about the centre of mass is
``d x E`` with the dipole ``d = sum_i Q_i (r_i - R_cm)``; in the notation
above this is order n = 1 with ``M_1 = sum_i Q_i (z_i - z_cm)`` and
``(g_re, g_im) = (-E_x, E_y)`` (``-E . r = Re[-(E_x - i E_y) z]``), so
``D_1 = |M_1|^2 [S_Ex(|f_rot|) + S_Ey(|f_rot|)] / 8``. For identical ions
``M_1 = (Q/m) sum_i m_i (z_i - z_cm) = 0``: no torque, no diffusion. (Rigid-
rotor approximation: in a mixed crystal the field also drives the
centre-of-mass modes, which couple to the rotation through the trap.)

*Tones.* A tone at exactly ``n f_rot`` exerts a steady torque (L grows
linearly). With ``g_re = A cos(2 pi f t + p)``, ``f = n f_rot`` and the
fast terms averaged out, ``dL/dt = (n A |M_n| / 2) sin(n phi_0 + arg M_n -
p)``; ``g_im = A cos(...)`` gives ``(n A |M_n| / 2) cos(n phi_0 + arg M_n -
p)``; the rotating tone ``g = A e^{-i (2 pi f t + p)}`` (a co-rotating
multipole, a weak pinning) gives ``n A |M_n| sin(n phi_0 + arg M_n - p)``,
twice the standing tone, of which only one of the two counter-rotating
halves is resonant. :func:`tone_torque` returns the amplitude
(``n A |M_n| / 2`` or ``n A |M_n|``).
"""

from __future__ import annotations

import math
from dataclasses import dataclass, field
from functools import cached_property
from typing import NamedTuple

import numpy as np
from scipy import constants as sc

from . import units
from .errors import InputError
from .schedule import check_stage_name, stage_scales

__all__ = [
    "PsdTerm",
    "Spectrum",
    "NoiseSource",
    "Tone",
    "NoiseModel",
    "NoiseState",
    "NoiseBlock",
    "KernelNoiseState",
    "DiffusionConstant",
    "parse_noise",
    "model_from_config",
    "turchette_heating_rate",
    "com_heating_rate",
    "diffusion_constant",
    "psd_for_diffusion",
    "tone_torque",
    "fit_resolved",
    "fit_upper_bound",
    "moment_vanishes",
    "run_rates",
]

HBAR = sc.hbar
TWO_PI = 2.0 * math.pi
AXES = ("x", "y", "z")
KINDS = ("white", "power", "lorentzian")
COMPONENTS = ("re", "im", "rotating")

FIT_DENSITIES = (2, 3, 4, 6)       # OU corners per decade, tried in turn
FIT_EXTENSION_DECADES = 1.5        # corners reach this far beyond the band
FIT_TOLERANCE = 2e-3               # largest relative error accepted in the band
DRAW_BUDGET_BYTES = 32 * 2**20     # random normals held at once by generate()
NOISE_STREAM = 3                   # counter keys (mdrotor.sampling.counter_keys) of the kernel's draws

_SRC = "mdrotor.noise"

ENTRY_KEYS = {"axes", "psd", "stages"}
MULTIPOLE_KEYS = {"order", "psd", "stages"}
TERM_KEYS = {
    "white": {"kind", "level"},
    "power": {"kind", "level", "f_ref", "alpha", "f_min", "f_max"},
    "lorentzian": {"kind", "level", "f_center", "width"},
}
TONE_KEYS = {"target", "axis", "order", "component", "amplitude", "frequency", "phase", "stages"}


# ---------------------------------------------------------------------------
# PSD dimensions
# ---------------------------------------------------------------------------
def psd_dimensionality(order: int) -> str:
    """Pint dimensionality of a PSD of order ``order`` (0: uniform field).

    V^2/m^2/Hz for the field, V^2/m^(2n)/Hz for the order-n coefficient."""
    p = 2 if order == 0 else 2 * int(order)
    return f"[electric_potential]**2/[length]**{p}*[time]"


def psd_example(order: int) -> str:
    return "1e-12 V^2/m^2/Hz" if order == 0 else f"1e-4 V^2/m^{2 * int(order)}/Hz"


def _amp_dimensionality(order: int) -> str:
    return "[electric_potential]/[length]" if order == 0 else units.multipole_dimension(order)


def _amp_example(order: int) -> str:
    return "1e-3 V/m" if order == 0 else units.multipole_example(order)


# ---------------------------------------------------------------------------
# Spectra
# ---------------------------------------------------------------------------
def _lorentz(u, width):
    return 1.0 / (1.0 + (np.asarray(u, dtype=float) / width) ** 2)


@dataclass(frozen=True)
class PsdTerm:
    """One term of a one-sided PSD (SI: level in V^2/m^(2n)/Hz, n = 1 for the field).

    ``kind`` is ``"white"``, ``"power"`` (uses ``f_ref_hz``, ``alpha``,
    ``f_min_hz``, ``f_max_hz``) or ``"lorentzian"`` (``f_center_hz``,
    ``width_hz``); formulas in the module docstring.
    """

    kind: str
    level: float
    f_ref_hz: float = 0.0
    alpha: float = 0.0
    f_min_hz: float = 0.0
    f_max_hz: float = 0.0
    f_center_hz: float = 0.0
    width_hz: float = 0.0

    def value(self, f_hz) -> np.ndarray:
        """Configured S(f) of this term at ``f_hz`` (>= 0)."""
        f = np.abs(np.asarray(f_hz, dtype=float))
        if self.kind == "white":
            return np.full_like(f, self.level)
        if self.kind == "power":
            inside = (f >= self.f_min_hz) & (f <= self.f_max_hz)
            with np.errstate(divide="ignore"):
                s = self.level * (np.where(inside, f, self.f_ref_hz) / self.f_ref_hz) ** (-self.alpha)
            return np.where(inside, s, 0.0)
        w, fc = self.width_hz, self.f_center_hz
        return self.level * (_lorentz(f - fc, w) + _lorentz(f + fc, w)) / (1.0 + _lorentz(2 * fc, w))


@dataclass(frozen=True, eq=False)
class Spectrum:
    """A configured PSD and its synthesis (white level plus OU modes).

    Attributes
    ----------
    terms : tuple of PsdTerm
    white_level : float
        Summed level of the white terms (PSD units).
    corner_hz : (M,) array
        OU mode widths ``gamma / 2 pi``, Hz.
    center_hz : (M,) array
        Rotation frequencies ``Omega / 2 pi`` (0: real mode), Hz.
    variance : (M,) array
        ``sigma^2``, the variance each mode adds to the component.
    fit_rel_error : float
        Largest relative error of the power-law fits over their bands.
    """

    terms: tuple
    white_level: float
    corner_hz: np.ndarray
    center_hz: np.ndarray
    variance: np.ndarray
    fit_rel_error: float = 0.0

    @property
    def is_real(self) -> np.ndarray:
        return self.center_hz == 0.0

    def psd(self, f_hz) -> np.ndarray:
        """Configured one-sided S(f) (sum of the terms)."""
        f = np.asarray(f_hz, dtype=float)
        out = np.zeros_like(f)
        for t in self.terms:
            out = out + t.value(f)
        return out

    def psd_generated(self, f_hz) -> np.ndarray:
        """One-sided PSD of the synthesised continuous process (white + OU modes)."""
        f = np.abs(np.asarray(f_hz, dtype=float))
        out = np.full_like(f, self.white_level)
        for fw, fc, var in zip(self.corner_hz, self.center_hz, self.variance):
            gamma = TWO_PI * fw
            out = out + (2.0 * var / gamma) * (_lorentz(f - fc, fw) + _lorentz(f + fc, fw))
        return out

    @classmethod
    def from_terms(cls, terms) -> "Spectrum":
        white = 0.0
        corners, centers, variances = [], [], []
        err = 0.0
        for t in terms:
            if t.kind == "white":
                white += t.level
            elif t.kind == "lorentzian":
                if t.level == 0.0:
                    continue
                w, fc = t.width_hz, t.f_center_hz
                corners.append(w)
                centers.append(fc)
                variances.append(t.level * math.pi * w / (1.0 + float(_lorentz(2 * fc, w))))
            else:
                if t.level == 0.0:
                    continue
                fj, cj, e = fit_power_law(t.level, t.f_ref_hz, t.alpha, t.f_min_hz, t.f_max_hz)
                err = max(err, e)
                corners.extend(fj)
                centers.extend([0.0] * len(fj))
                variances.extend(cj * math.pi * fj / 2.0)
        return cls(tuple(terms), white, np.array(corners, dtype=float), np.array(centers, dtype=float),
                   np.array(variances, dtype=float), err)


def fit_power_law(level: float, f_ref_hz: float, alpha: float, f_min_hz: float, f_max_hz: float):
    """Sum of real OU spectra ``c_j / (1 + (f / f_j)^2)`` fitted to a power law.

    Corners log-spaced (2, 3, 4 or 6 per decade, the first that meets
    :data:`FIT_TOLERANCE`) from 1.5 decades below ``f_min`` to 1.5 decades
    above ``f_max``; weights ``c_j >= 0`` by bounded least squares on the
    relative error over the band (M.S. Keshner, Proc. IEEE 70, 212 (1982)
    for the representation).

    Returns
    -------
    corner_hz : (M,) array
    weight : (M,) array, PSD units (each mode's low-frequency level)
    max_rel_error : float
        Largest ``|S_fit / S - 1|`` on a grid of 200 points per decade.
    """
    from scipy.optimize import lsq_linear

    lo, hi = math.log10(f_min_hz), math.log10(f_max_hz)
    span = max(hi - lo, 1e-3)
    f_fit = np.logspace(lo, hi, max(60, int(60 * span)))
    f_chk = np.logspace(lo, hi, max(400, int(200 * span)))
    target_fit = (f_fit / f_ref_hz) ** (-alpha)
    target_chk = (f_chk / f_ref_hz) ** (-alpha)
    best = None
    for dens in FIT_DENSITIES:
        a, b = lo - FIT_EXTENSION_DECADES, hi + FIT_EXTENSION_DECADES
        m = int(math.ceil((b - a) * dens)) + 1
        fj = np.logspace(a, b, m)
        A = _lorentz(f_fit[:, None], fj[None, :]) / target_fit[:, None]
        col = np.linalg.norm(A, axis=0)
        sol = lsq_linear(A / col, np.ones(len(f_fit)), bounds=(0.0, np.inf), method="bvls")
        c = sol.x / col
        keep = c > 0
        fj, c = fj[keep], c[keep]
        err = float(np.max(np.abs(_lorentz(f_chk[:, None], fj[None, :]) @ c / target_chk - 1.0)))
        if best is None or err < best[2]:
            best = (fj, c * level, err)
        if err <= FIT_TOLERANCE:
            break
    return best


# ---------------------------------------------------------------------------
# Model records
# ---------------------------------------------------------------------------
@dataclass(frozen=True, eq=False)
class NoiseSource:
    """One independent stationary process feeding one output channel.

    Attributes
    ----------
    target : {"field", "multipole"}
    channel : int
        Field axis (0, 1, 2) or index into :attr:`NoiseModel.orders`.
    part : int
        0 (``g_re``) or 1 (``g_im``) for multipoles; 0 for the field.
    order : int
        Multipole order n (0 for the field).
    spectrum : Spectrum
    stage_scale : dict
        PSD scale per stage name; stages not listed get ``default_scale``.
    default_scale : float
    key : str
        Config key path of the entry (for messages).
    """

    target: str
    channel: int
    part: int
    order: int
    spectrum: Spectrum
    stage_scale: dict
    default_scale: float
    key: str

    def scale(self, stage: str | None) -> float:
        """PSD scale (amplitude squared) during ``stage`` (None: 1)."""
        if stage is None:
            return 1.0
        return float(self.stage_scale.get(stage, self.default_scale))

    @property
    def n_real(self) -> int:
        return int(np.count_nonzero(self.spectrum.is_real))

    @property
    def n_rotating(self) -> int:
        return len(self.spectrum.center_hz) - self.n_real

    @property
    def n_normals(self) -> int:
        """Standard normals drawn per step."""
        return (1 if self.spectrum.white_level > 0 else 0) + 2 * self.n_real + 3 * self.n_rotating

    @property
    def n_init(self) -> int:
        """Standard normals drawn for the stationary initial state."""
        return self.n_real + 2 * self.n_rotating


@dataclass(frozen=True)
class Tone:
    """A deterministic tone (SI).

    ``target = "field"``: ``E_axis += A cos(2 pi f t + phase)``, A in V/m.
    ``target = "multipole"``: component ``"re"``/``"im"`` adds
    ``A cos(2 pi f t + phase)`` to ``g_re``/``g_im``; ``"rotating"`` adds
    ``A e^{-i (2 pi f t + phase)}`` to ``g_n``; A in V/m^n. ``stages``: names
    during which it is on (None: always).
    """

    target: str
    channel: int
    order: int
    component: str
    amplitude: float
    frequency_hz: float
    phase_rad: float
    stages: tuple | None
    key: str = ""

    def on(self, stage: str | None) -> bool:
        return stage is None or self.stages is None or stage in self.stages

    def step_average(self, t_mid_s: np.ndarray, dt_s: float) -> tuple:
        """(re, im) contributions averaged over steps centred at ``t_mid_s``.

        The average of ``cos(2 pi f t + p)`` over ``[t_mid - dt/2, t_mid +
        dt/2]`` is ``cos(2 pi f t_mid + p) sinc(f dt)``."""
        psi = TWO_PI * self.frequency_hz * t_mid_s + self.phase_rad
        a = self.amplitude * float(np.sinc(self.frequency_hz * dt_s))
        if self.component == "rotating":
            return a * np.cos(psi), -a * np.sin(psi)
        if self.component == "im":
            return None, a * np.cos(psi)
        return a * np.cos(psi), None


class DiffusionConstant(NamedTuple):
    """Angular-momentum diffusion constant, ``<dL^2> = 2 D t``."""

    D_si: float            # (J s)^2 / s
    D_hbar2_per_s: float   # hbar^2 / s


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
        initial states; stream 3), :func:`mdrotor.sampling.counter_keys`.
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


# ---------------------------------------------------------------------------
# OU step coefficients
# ---------------------------------------------------------------------------
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


def _window_g(t: float, gamma: float, nu: float) -> float:
    """g(t) = 2 int_0^t (t - u) e^{-gamma u} cos(nu u) du = 2 Re[(x - 1 + e^{-x})] t^2 / x^2,
    x = (gamma - i nu) t (module docstring, "Over a finite window"); the
    bracket by its series where |x| is small (it cancels to x^2 / 2)."""
    if t <= 0.0:
        return 0.0
    x = complex(gamma, -nu) * t
    if abs(x) < 1e-3:
        h = 0.5 - x / 6.0 + x * x / 24.0 - x**3 / 120.0
    else:
        h = (x + np.expm1(-x)) / (x * x)
    return 2.0 * t * t * float(np.real(h))


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


# ---------------------------------------------------------------------------
# The model
# ---------------------------------------------------------------------------
@dataclass(frozen=True, eq=False)
class NoiseModel:
    """Validated noise model (SI). Build it with :func:`parse_noise`.

    Attributes
    ----------
    sources : tuple of NoiseSource
    tones : tuple of Tone
    orders : tuple of int
        Multipole orders with noise or tones, ascending; channel k of
        ``g_re``/``g_im`` is ``orders[k]``.
    stage_names : tuple of str
    """

    sources: tuple = ()
    tones: tuple = ()
    orders: tuple = ()
    stage_names: tuple = ()

    # -- what is there ------------------------------------------------------
    @property
    def is_empty(self) -> bool:
        return not self.sources and not self.tones

    @property
    def has_field(self) -> bool:
        return any(s.target == "field" for s in self.sources) or any(t.target == "field" for t in self.tones)

    @property
    def has_multipole(self) -> bool:
        return len(self.orders) > 0

    @property
    def n_normals_per_step(self) -> int:
        return sum(s.n_normals for s in self.sources)

    def active(self, stage: str | None) -> bool:
        """True if any noise or tone is on during ``stage``.

        The engine may skip generation in inactive stages: the OU processes
        then pause, and their state stays a stationary sample."""
        return (any(s.scale(stage) > 0 and (s.spectrum.white_level > 0 or len(s.spectrum.variance))
                    for s in self.sources)
                or any(t.on(stage) and t.amplitude != 0 for t in self.tones))

    # -- spectra --------------------------------------------------------------
    def field_psd(self, axis, f_hz, stage: str | None = None, generated: bool = False) -> np.ndarray:
        """One-sided PSD of the field component ``axis`` ("x", "y", "z" or
        0..2) at ``f_hz``, V^2/m^2/Hz, including the stage scale."""
        ax = _axis_index(axis, "axis", "field_psd")
        return self._psd(lambda s: s.target == "field" and s.channel == ax, f_hz, stage, generated)

    def multipole_psd(self, order: int, f_hz, stage: str | None = None, generated: bool = False) -> np.ndarray:
        """One-sided PSD of each of ``g_re`` and ``g_im`` of ``order`` at
        ``f_hz``, V^2/m^(2n)/Hz, including the stage scale."""
        return self._psd(lambda s: s.target == "multipole" and s.order == order and s.part == 0,
                         f_hz, stage, generated)

    def _psd(self, select, f_hz, stage, generated):
        f = np.asarray(f_hz, dtype=float)
        out = np.zeros_like(f)
        for s in self.sources:
            if select(s):
                sp = s.spectrum.psd_generated(f) if generated else s.spectrum.psd(f)
                out = out + s.scale(stage) * sp
        return out

    # -- analytic rates -------------------------------------------------------
    def com_heating_rates(self, masses_kg, charges_c, f_com_hz, stage: str | None = None,
                          generated: bool = False) -> np.ndarray:
        """Heating of the centre-of-mass modes along x, y, z, quanta/s.

        Parameters
        ----------
        masses_kg, charges_c : (N,) arrays (identical charge-to-mass ratio)
        f_com_hz : (3,) array
            COM mode frequencies along x, y, z, Hz.
        """
        f = np.asarray(f_com_hz, dtype=float).reshape(3)
        return np.array([com_heating_rate(float(self.field_psd(u, f[u], stage, generated)),
                                          masses_kg, charges_c, f[u]) for u in range(3)])

    def rotor_diffusion(self, positions_m, masses_kg, charges_c, f_rot_hz: float,
                        stage: str | None = None, generated: bool = False) -> dict:
        """Angular-momentum diffusion of a rigid crystal rotating at ``f_rot_hz``.

        Parameters
        ----------
        positions_m : (N, 2) or (N, 3) array
            Crystal positions (any orientation) about the rotation axis, m.
        masses_kg, charges_c : (N,) arrays
        f_rot_hz : float
            Rotation frequency, Hz.
        stage : str, optional
            Apply this stage's PSD scales.
        generated : bool
            Use the synthesised PSD instead of the configured one.

        Returns
        -------
        dict
            ``{n: DiffusionConstant}`` for every multipole order with noise,
            ``1`` for the uniform field (torque on the dipole about the
            centre of mass; zero for identical ions) and ``"total"``.
        """
        from .multipole import moment

        xy = np.asarray(positions_m, dtype=float)[:, :2]
        m = np.asarray(masses_kg, dtype=float)
        q = np.asarray(charges_c, dtype=float)
        fr = abs(float(f_rot_hz))
        out = {}
        if any(s.target == "field" for s in self.sources):
            zc = np.sum(m[:, None] * xy, axis=0) / np.sum(m)
            m1 = moment(xy - zc, q, 1)
            sx = float(self.field_psd(0, fr, stage, generated))
            sy = float(self.field_psd(1, fr, stage, generated))
            out[1] = diffusion_constant(1, m1, sx, sy)
        for n in sorted({s.order for s in self.sources if s.target == "multipole"}):
            s_n = float(self.multipole_psd(n, n * fr, stage, generated))
            out[n] = diffusion_constant(n, moment(xy, q, n), s_n)
        total = sum(d.D_si for d in out.values())
        out["total"] = DiffusionConstant(total, total / HBAR**2)
        return out

    def rotor_diffusion_window(self, positions_m, masses_kg, charges_c, f_rot_hz: float, window_s: float,
                               lead_s: float = 0.0, stage: str | None = None) -> dict:
        """What a fit over a finite window measures: ``(var L(t0 + T) - var L(t0)) / (2 T)``.

        The expectation for a rigid crystal rotating at ``f_rot_hz``, the
        torques acting from ``t0 - lead_s`` on (module docstring, "Over a
        finite window"), from the synthesised spectrum (the one the run
        applies). Tends to :meth:`rotor_diffusion` (``generated=True``)
        for ``window_s`` much longer than the torque's correlation time.

        Parameters
        ----------
        positions_m, masses_kg, charges_c, stage : as :meth:`rotor_diffusion`
        f_rot_hz : float
            Rotation frequency, Hz.
        window_s : float
            The fit window T, s (> 0).
        lead_s : float
            How long the torques have acted before the window, s (>= 0).

        Returns
        -------
        dict
            ``{n: DiffusionConstant}`` as :meth:`rotor_diffusion`, and ``"total"``.
        """
        from .multipole import moment

        T = _positive(window_s, "window_s", "rotor_diffusion_window")
        lead = _nonneg(lead_s, "lead_s", "rotor_diffusion_window")
        xy = np.asarray(positions_m, dtype=float)[:, :2]
        m = np.asarray(masses_kg, dtype=float)
        q = np.asarray(charges_c, dtype=float)
        fr = abs(float(f_rot_hz))
        out = {}
        channels = {}
        if any(s.target == "field" for s in self.sources):
            zc = np.sum(m[:, None] * xy, axis=0) / np.sum(m)
            channels[1] = (moment(xy - zc, q, 1), [s for s in self.sources if s.target == "field" and s.channel in (0, 1)])
        for n in sorted({s.order for s in self.sources if s.target == "multipole"}):
            channels[n] = (moment(xy, q, n), [s for s in self.sources if s.target == "multipole" and s.order == n])
        for n, (mom, sources) in channels.items():
            om_n = TWO_PI * n * fr

            def var_growth(t, sources=sources, om_n=om_n):
                acc = 0.0
                for src in sources:
                    sp = src.spectrum
                    a = src.scale(stage) * 0.5 * sp.white_level * t
                    for fw, fc, var in zip(sp.corner_hz, sp.center_hz, sp.variance):
                        gam, om_c = TWO_PI * fw, TWO_PI * fc
                        a += 0.5 * src.scale(stage) * var * (_window_g(t, gam, om_c - om_n) + _window_g(t, gam, om_c + om_n))
                    acc += a
                return 0.5 * n * n * abs(complex(mom)) ** 2 * acc

            d = (var_growth(lead + T) - var_growth(lead)) / (2.0 * T)
            out[n] = DiffusionConstant(d, d / HBAR**2)
        total = sum(d.D_si for d in out.values())
        out["total"] = DiffusionConstant(total, total / HBAR**2)
        return out

    # -- the compiled kernel's arrays -------------------------------------------
    @property
    def n_targets(self) -> int:
        """Rows of the kernel's noise values: the field's x, y, z, then g_re,
        g_im of each order in :attr:`orders`."""
        return 3 + 2 * len(self.orders)

    @staticmethod
    def _target(src) -> int:
        return src.channel if src.target == "field" else 3 + 2 * src.channel + src.part

    @cached_property
    def _kernel_modes(self) -> tuple:
        """(real, rotating): per OU mode (source index, gamma rad/s, Omega
        rad/s, variance), sources in order, each source's modes in its
        spectrum's order."""
        real, rot = [], []
        for si, src in enumerate(self.sources):
            sp = src.spectrum
            for fw, fc, var in zip(sp.corner_hz, sp.center_hz, sp.variance):
                (real if fc == 0.0 else rot).append((si, TWO_PI * fw, TWO_PI * fc, var))
        return tuple(real), tuple(rot)

    @property
    def n_kernel_states(self) -> int:
        """Doubles of OU state per trajectory in the kernel: one per real
        mode, two per rotating mode."""
        real, rot = self._kernel_modes
        return len(real) + 2 * len(rot)

    def kernel_layout(self) -> tuple:
        """Targets (rows of the kernel's noise values, see :attr:`n_targets`)
        of the real modes (M_r,) and of the rotating modes (M_c,), int64."""
        real, rot = self._kernel_modes
        tr = np.array([self._target(self.sources[m[0]]) for m in real], dtype=np.int64)
        tc = np.array([self._target(self.sources[m[0]]) for m in rot], dtype=np.int64)
        return tr, tc

    @cached_property
    def _coefficient_cache(self) -> dict:
        return {}

    def _unit_coefficients(self, dt_s: float) -> tuple:
        """Per mode at PSD scale 1: the real modes' (e, l, m, c, r) and the
        rotating modes' (Re e, Im e, l00, l10, l11, Re m, Im m, c1, c2, r),
        r the variance of the step average's part independent of the state
        and the innovations (see :meth:`kernel_coefficients`)."""
        got = self._coefficient_cache.get(dt_s)
        if got is not None:
            return got
        real, rot = self._kernel_modes
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
        if len(self._coefficient_cache) > 16:
            self._coefficient_cache.clear()
        self._coefficient_cache[dt_s] = (rp, cp)
        return rp, cp

    def white_targets(self) -> np.ndarray:
        """The kernel's white slots: the targets (rows of the noise values,
        :attr:`n_targets`) that any noise source drives, int64, ascending.
        Fixed for the model, so the counters of the draws are too."""
        return np.array(sorted({self._target(s) for s in self.sources}), dtype=np.int64)

    def kernel_coefficients(self, dt_s: float, stage: str | None = None) -> tuple:
        """The compiled kernel's per-step coefficients (:func:`mdrotor.kernels._noise_step`).

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
        second moments as :meth:`generate`: the same PSD.

        Returns
        -------
        w_sd : (W,) array
            White per-step standard deviation of each of
            :meth:`white_targets` (V/m for the field, V/m^n for order n).
        r_par : (M_r, 4) array
            ``(e, l, a m, a c)`` per real mode, ``a = scale^(1/2)``.
        c_par : (M_c, 9) array
            ``(Re e, Im e, l00, l10, l11, a Re m, a Im m, a L20, a L21)``
            per rotating mode.
        """
        rp, cp = self._unit_coefficients(float(dt_s))
        real, rot = self._kernel_modes
        white = np.zeros(self.n_targets)
        for src in self.sources:
            white[self._target(src)] += src.scale(stage) * src.spectrum.white_level / (2.0 * dt_s)
        r_par = rp[:, :4].copy()
        for j, mode in enumerate(real):
            a2 = self.sources[mode[0]].scale(stage)
            r_par[j, 2:4] *= math.sqrt(a2)
            white[self._target(self.sources[mode[0]])] += a2 * rp[j, 4]
        c_par = cp[:, :9].copy()
        for j, mode in enumerate(rot):
            a2 = self.sources[mode[0]].scale(stage)
            c_par[j, 5:9] *= math.sqrt(a2)
            white[self._target(self.sources[mode[0]])] += a2 * cp[j, 9]
        return np.sqrt(white[self.white_targets()]), r_par, c_par

    def tone_values(self, t_start_s: float, dt_s: float, step0: int, n_steps: int, stage: str | None = None) -> np.ndarray:
        """The tones' step averages over steps ``step0 .. step0 + n_steps - 1``
        (``[t_k, t_k + dt)``, ``t_k = t_start_s + dt_s k``), (n_steps,
        :attr:`n_targets`), the same for every trajectory; (0, n_targets)
        when no tone is on during ``stage``."""
        on = [t for t in self.tones if t.on(stage) and t.amplitude != 0]
        if not on or n_steps <= 0:
            return np.zeros((0, self.n_targets))
        out = np.zeros((n_steps, self.n_targets))
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

    def kernel_state(self, seed: int, indices) -> KernelNoiseState:
        """Each trajectory's key and stationary initial OU states for the
        compiled kernel (the run's noise). The states are drawn from the
        stationary distribution, Gaussian with the mode's variance (per part
        for a rotating mode), by Box-Muller from the key's counter hash
        (:func:`mdrotor.kernels.normals`): a function of (seed, trajectory
        index) only."""
        from .kernels import normals
        from .sampling import counter_keys

        idx = np.asarray(indices, dtype=np.int64).reshape(-1)
        keys = counter_keys(seed, idx, NOISE_STREAM)
        real, rot = self._kernel_modes
        n_r, n_c = len(real), len(rot)
        g = normals(keys, np.uint64(2**64 - 1), n_r + 2 * n_c) if n_r + n_c else np.zeros((0, len(idx)))
        sd_r = np.sqrt(np.array([m[3] for m in real], dtype=float))
        sd_c = np.sqrt(np.array([m[3] for m in rot], dtype=float))
        z_real = np.ascontiguousarray(g[:n_r] * sd_r[:, None])
        z_rot = np.ascontiguousarray(g[n_r:].reshape(n_c, 2, len(idx)) * sd_c[:, None, None])
        return KernelNoiseState(int(seed), idx, keys, z_real, z_rot)

    def kernel_arrays(self, state: KernelNoiseState, *, t_start_s: float, dt_s: float, step0: int, n_steps: int,
                      global_step0: int, stage: str | None = None) -> tuple:
        """The kernel's ``noise`` tuple (:func:`mdrotor.kernels.advance`) for
        ``n_steps`` steps of ``stage`` from its step ``step0`` (time as in
        :meth:`tone_values`), the run's global step ``global_step0`` (the
        counter of the draws)."""
        r_tgt, c_tgt = self.kernel_layout()
        w_sd, r_par, c_par = self.kernel_coefficients(dt_s, stage)
        tones = self.tone_values(t_start_s, dt_s, step0, n_steps, stage)
        return (np.asarray(self.orders, dtype=np.int64), tones, state.keys, int(global_step0), self.white_targets(),
                w_sd, r_tgt, r_par, state.z_real, c_tgt, c_par, state.z_rot)

    # -- numpy reference synthesis ----------------------------------------------
    def new_state(self, seed: int, indices) -> NoiseState:
        """The numpy reference's generator state for trajectories ``indices``
        (a run uses :meth:`kernel_state`).

        Draws the stationary initial OU states from
        ``trajectory_rng(seed, index, stream=1)``."""
        from .sampling import trajectory_rng

        idx = np.asarray(indices, dtype=np.int64).reshape(-1)
        T = len(idx)
        rngs = [trajectory_rng(int(seed), int(i), 1) for i in idx]
        n_init = sum(s.n_init for s in self.sources)
        draws = np.empty((T, n_init))
        for b, r in enumerate(rngs):
            r.standard_normal(out=draws[b])
        z_real, zi_real, z_rot, zi_rot = [], [], [], []
        col = 0
        for s in self.sources:
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

    def generate(self, state: NoiseState, *, t_start_s: float, dt_s: float, step0: int, n_steps: int,
                 stage: str | None = None) -> NoiseBlock:
        """Noise samples for the next ``n_steps`` steps of every trajectory of
        ``state``: the numpy reference synthesis (the tests compare it and the
        compiled kernel's, :meth:`kernel_arrays`, with the configured PSD).

        Parameters
        ----------
        state : NoiseState
            From :meth:`new_state`; advanced in place.
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
        K = len(self.orders)
        field_arr = np.zeros((n_steps, 3, T)) if self.has_field else None
        g_re = np.zeros((n_steps, K, T)) if K else None
        g_im = np.zeros((n_steps, K, T)) if K else None
        new_dt = state.dt_s != dt_s
        coeffs = state.cache.get(dt_s)
        if coeffs is None:
            coeffs = [_coefficients(s, dt_s) for s in self.sources]
            state.cache = {dt_s: coeffs}
        n_norm = self.n_normals_per_step
        if n_steps > 0 and n_norm > 0:
            tc = max(1, min(T, DRAW_BUDGET_BYTES // (8 * n_steps * n_norm)))
            for c0 in range(0, T, tc):
                c1 = min(T, c0 + tc)
                draws = np.empty((c1 - c0, n_steps, n_norm))
                for b in range(c0, c1):
                    state.rngs[b].standard_normal(out=draws[b - c0])
                col = 0
                for si, (src, cf) in enumerate(zip(self.sources, coeffs)):
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
            for tone in self.tones:
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
        return NoiseBlock(field_arr, g_re, g_im, np.array(self.orders, dtype=np.int64),
                          float(t_start_s), float(dt_s), int(step0), int(n_steps))


def _run_source(src, cf, state, si, draws, col, c0, c1, new_dt):
    """Samples (Tc, n_steps) of one source for trajectories c0:c1; advances its state."""
    from scipy.signal import lfilter

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


# ---------------------------------------------------------------------------
# Parsing
# ---------------------------------------------------------------------------
def parse_noise(raw, source: str = "<dict>", stage_names=()) -> NoiseModel:
    """Validate a ``[noise]`` table into a :class:`NoiseModel`.

    Shape (every table optional; ``[[...]]`` may also be a single table)::

        [[noise.field]]                 # uniform field
        axes = ["x", "y"]               # default ["x", "y", "z"]; independent, same PSD
        psd = [ { kind = "white", level = "1e-12 V^2/m^2/Hz" },
                { kind = "power", level = "1e-12 V^2/m^2/Hz", f_ref = "1 MHz",
                  alpha = 1.0, f_min = "1 kHz", f_max = "10 MHz" },
                { kind = "lorentzian", level = "1e-11 V^2/m^2/Hz",
                  f_center = "400 kHz", width = "10 kHz" } ]
        stages = { free = 1.0, spin-up = 0.0 }   # PSD scale; unlisted stages 1
                                                 # (or a list: on only there)
        [[noise.multipole]]
        order = 2                       # n >= 2; g_re and g_im each get this PSD
        psd = { kind = "white", level = "1e-4 V^2/m^4/Hz" }
        [[noise.tone]]
        target = "multipole"            # or "field" (then axis = "x" | "y" | "z")
        order = 2
        component = "re"                # "re" | "im" | "rotating"
        amplitude = "10 V/m^2"          # V/m for the field
        frequency = "400 kHz"
        phase = "0 deg"                 # default 0
        stages = ["free"]               # default: all stages

    Parameters
    ----------
    raw : dict
        The ``[noise]`` table (``Config.noise``).
    source : str
        File name for messages.
    stage_names : sequence of str
        Names of the schedule's stages (``stages`` keys must be among them).

    Raises
    ------
    InputError
        Naming the key path (``noise.field[0].psd[1].level``) and what was expected.
    """
    if raw is None:
        raw = {}
    if not isinstance(raw, dict):
        raise InputError("noise", "expected a table with [[noise.field]], [[noise.multipole]], [[noise.tone]]", source)
    for k in raw:
        if k not in ("field", "multipole", "tone"):
            raise InputError(f"noise.{k}", "unknown key; expected one of ['field', 'multipole', 'tone']", source)
    names = tuple(stage_names)
    sources = []
    field_items = _items(raw.get("field"), "noise.field", source)
    for key, it in field_items:
        _check_keys(it, key, ENTRY_KEYS, source)
        axes = it.get("axes", list(AXES))
        if isinstance(axes, str):
            axes = [axes]
        if not isinstance(axes, list) or not axes or any(a not in AXES for a in axes) or len(set(axes)) != len(axes):
            raise InputError(f"{key}.axes", f"expected a non-empty list of distinct axes from ['x', 'y', 'z'], got {axes!r}", source)
        spec = _spectrum(_require(it, "psd", key, source, "a PSD term or a list of terms"), f"{key}.psd", 0, source)
        scales, default = stage_scales(it.get("stages"), f"{key}.stages", names, source, "PSD scale", " (amplitude squared)")
        for a in axes:
            sources.append(NoiseSource("field", AXES.index(a), 0, 0, spec, scales, default, key))
    multi = []
    for key, it in _items(raw.get("multipole"), "noise.multipole", source):
        _check_keys(it, key, MULTIPOLE_KEYS, source)
        order = _order(_require(it, "order", key, source, "the multipole order n >= 2"), f"{key}.order", source)
        spec = _spectrum(_require(it, "psd", key, source, "a PSD term or a list of terms"), f"{key}.psd", order, source)
        scales, default = stage_scales(it.get("stages"), f"{key}.stages", names, source, "PSD scale", " (amplitude squared)")
        multi.append((order, spec, scales, default, key))
    tones_raw = []
    for key, it in _items(raw.get("tone"), "noise.tone", source):
        tones_raw.append((key, _tone(it, key, names, source)))
    orders = tuple(sorted({m[0] for m in multi} | {t[1]["order"] for t in tones_raw if t[1]["target"] == "multipole"}))
    for order, spec, scales, default, key in multi:
        k = orders.index(order)
        sources.append(NoiseSource("multipole", k, 0, order, spec, scales, default, key))
        sources.append(NoiseSource("multipole", k, 1, order, spec, scales, default, key))
    tones = []
    for key, d in tones_raw:
        ch = d["axis"] if d["target"] == "field" else orders.index(d["order"])
        tones.append(Tone(d["target"], ch, d["order"], d["component"], d["amplitude"], d["frequency"],
                          d["phase"], d["stages"], key))
    return NoiseModel(tuple(sources), tuple(tones), orders, names)


def model_from_config(cfg) -> NoiseModel:
    """:func:`parse_noise` of a :class:`mdrotor.config.Config`."""
    names = [s.name for s in cfg.schedule.stages] if cfg.schedule is not None else []
    return parse_noise(cfg.noise, cfg.source, names)


def _items(v, key, source):
    if v is None:
        return []
    if isinstance(v, dict):
        return [(key, v)]
    if not isinstance(v, list) or not all(isinstance(x, dict) for x in v):
        raise InputError(key, "expected a table or an array of tables ([[" + key + "]])", source)
    return [(f"{key}[{i}]", x) for i, x in enumerate(v)]


def _check_keys(table, key, allowed, source):
    if not isinstance(table, dict):
        raise InputError(key, "expected a table", source)
    for k in table:
        if k not in allowed:
            raise InputError(f"{key}.{k}", f"unknown key; expected one of {sorted(allowed)}", source)


def _require(table, k, key, source, what):
    if k not in table:
        raise InputError(f"{key}.{k}", f"missing; expected {what}", source)
    return table[k]


def _order(v, key, source) -> int:
    if isinstance(v, bool) or not isinstance(v, int) or v < 2:
        raise InputError(key, f"expected an integer multipole order n >= 2 (the uniform field is [[noise.field]]), got {v!r}", source)
    return v


def _number(v, key, source, what) -> float:
    if isinstance(v, bool) or not isinstance(v, (int, float)) or not math.isfinite(v):
        raise InputError(key, f"expected {what}, got {v!r}", source)
    return float(v)


def _freq(v, key, source, positive=True) -> float:
    f = units.parse(v, "frequency", key, source)
    if not math.isfinite(f) or f < 0 or (positive and f == 0):
        raise InputError(key, f"expected a {'positive' if positive else 'non-negative'} frequency such as '1 MHz', got {v!r}", source)
    return f


def _spectrum(spec, key, order, source) -> Spectrum:
    items = [(key, spec)] if isinstance(spec, dict) else None
    if items is None:
        if not isinstance(spec, list) or not spec:
            raise InputError(key, "expected a PSD term { kind = ..., level = ... } or a non-empty list of them", source)
        items = [(f"{key}[{i}]", t) for i, t in enumerate(spec)]
    terms = []
    for k, t in items:
        if not isinstance(t, dict):
            raise InputError(k, "expected a PSD term { kind = ..., level = ... }", source)
        kind = _require(t, "kind", k, source, f"one of {list(KINDS)}")
        if kind not in KINDS:
            raise InputError(f"{k}.kind", f"expected one of {list(KINDS)}, got {kind!r}", source)
        _check_keys(t, k, TERM_KEYS[kind], source)
        level = units.parse(_require(t, "level", k, source, f"a PSD such as '{psd_example(order)}'"), "custom",
                            f"{k}.level", source, dimensionality=psd_dimensionality(order), example=psd_example(order))
        if not math.isfinite(level) or level < 0:
            raise InputError(f"{k}.level", f"expected a non-negative PSD such as '{psd_example(order)}', got {t['level']!r}", source)
        if kind == "white":
            terms.append(PsdTerm("white", level))
        elif kind == "power":
            f_ref = _freq(_require(t, "f_ref", k, source, "the reference frequency of the level, such as '1 MHz'"), f"{k}.f_ref", source)
            alpha = _number(_require(t, "alpha", k, source, "the exponent alpha in f^-alpha, 0 to 2"), f"{k}.alpha", source, "an exponent between 0 and 2")
            if not 0.0 <= alpha <= 2.0:
                raise InputError(f"{k}.alpha", f"expected an exponent between 0 and 2 (a sum of Lorentzians cannot rise or fall faster than f^-2), got {alpha!r}", source)
            f_min = _freq(_require(t, "f_min", k, source, "the lower band edge, such as '1 kHz'"), f"{k}.f_min", source)
            f_max = _freq(_require(t, "f_max", k, source, "the upper band edge, such as '10 MHz'"), f"{k}.f_max", source)
            if not f_max > f_min:
                raise InputError(f"{k}.f_max", f"expected an upper band edge above f_min ({t['f_min']!r}), got {t['f_max']!r}", source)
            terms.append(PsdTerm("power", level, f_ref_hz=f_ref, alpha=alpha, f_min_hz=f_min, f_max_hz=f_max))
        else:
            fc = _freq(t.get("f_center", "0 Hz"), f"{k}.f_center", source, positive=False)
            w = _freq(_require(t, "width", k, source, "the half width at half maximum, such as '10 kHz'"), f"{k}.width", source)
            terms.append(PsdTerm("lorentzian", level, f_center_hz=fc, width_hz=w))
    return Spectrum.from_terms(terms)


def _tone(it, key, names, source) -> dict:
    _check_keys(it, key, TONE_KEYS, source)
    target = _require(it, "target", key, source, "'field' or 'multipole'")
    if target not in ("field", "multipole"):
        raise InputError(f"{key}.target", f"expected 'field' or 'multipole', got {target!r}", source)
    d = {"target": target, "axis": 0, "order": 0, "component": "re"}
    if target == "field":
        for bad in ("order", "component"):
            if bad in it:
                raise InputError(f"{key}.{bad}", "only for target = 'multipole'; a field tone has an axis", source)
        a = _require(it, "axis", key, source, "'x', 'y' or 'z'")
        if a not in AXES:
            raise InputError(f"{key}.axis", f"expected 'x', 'y' or 'z', got {a!r}", source)
        d["axis"] = AXES.index(a)
    else:
        if "axis" in it:
            raise InputError(f"{key}.axis", "only for target = 'field'; a multipole tone has an order and a component", source)
        d["order"] = _order(_require(it, "order", key, source, "the multipole order n >= 2"), f"{key}.order", source)
        comp = it.get("component", "re")
        if comp not in COMPONENTS:
            raise InputError(f"{key}.component", f"expected one of {list(COMPONENTS)}, got {comp!r}", source)
        d["component"] = comp
    n = d["order"]
    amp = units.parse(_require(it, "amplitude", key, source, f"an amplitude such as '{_amp_example(n)}'"), "custom",
                      f"{key}.amplitude", source, dimensionality=_amp_dimensionality(n), example=_amp_example(n))
    if not math.isfinite(amp) or amp < 0:
        raise InputError(f"{key}.amplitude", f"expected a non-negative amplitude such as '{_amp_example(n)}' (use phase for the sign)", source)
    d["amplitude"] = amp
    d["frequency"] = _freq(_require(it, "frequency", key, source, "a frequency such as '400 kHz'"), f"{key}.frequency", source, positive=False)
    d["phase"] = units.parse(it.get("phase", 0.0), "angle", f"{key}.phase", source)
    st = it.get("stages")
    if st is None:
        d["stages"] = None
    else:
        if not isinstance(st, list):
            raise InputError(f"{key}.stages", "expected a list of stage names during which the tone is on", source)
        for i, s in enumerate(st):
            check_stage_name(s, f"{key}.stages[{i}]", names, source)
        d["stages"] = tuple(st)
    return d


# ---------------------------------------------------------------------------
# Analytic rates (pure formulas)
# ---------------------------------------------------------------------------
def _err(key, expected, func):
    return InputError(key, expected, f"{_SRC}.{func}")


def _nonneg(x, key, func) -> float:
    try:
        v = float(x)
    except (TypeError, ValueError):
        raise _err(key, f"a finite number >= 0, got {x!r}", func) from None
    if not math.isfinite(v) or v < 0:
        raise _err(key, f"a finite number >= 0, got {x!r}", func)
    return v


def _positive(x, key, func) -> float:
    v = _nonneg(x, key, func)
    if v == 0:
        raise _err(key, f"a finite number > 0, got {x!r}", func)
    return v


def _axis_index(axis, key, func) -> int:
    if axis in AXES:
        return AXES.index(axis)
    if isinstance(axis, (int, np.integer)) and not isinstance(axis, bool) and 0 <= axis < 3:
        return int(axis)
    raise _err(key, f"'x', 'y', 'z' or 0..2, got {axis!r}", func)


def turchette_heating_rate(S_E_v2_m2_hz: float, mass_kg: float, charge_c: float, f_mode_hz: float) -> float:
    """Heating rate of one ion's motional mode by uniform field noise, quanta/s.

    ``dn/dt = Q^2 S_E(f) / (4 m hbar omega)``, ``omega = 2 pi f``
    (Q.A. Turchette et al., Phys. Rev. A 61, 063418 (2000); M. Brownnutt et
    al., Rev. Mod. Phys. 87, 1419 (2015)).

    Parameters
    ----------
    S_E_v2_m2_hz : float
        One-sided field PSD along the mode axis at the mode frequency, V^2/m^2/Hz.
    mass_kg, charge_c : float
    f_mode_hz : float
        Mode frequency, Hz.
    """
    func = "turchette_heating_rate"
    s = _nonneg(S_E_v2_m2_hz, "S_E_v2_m2_hz", func)
    m = _positive(mass_kg, "mass_kg", func)
    q = float(charge_c)
    f = _positive(f_mode_hz, "f_mode_hz", func)
    return q * q * s / (4.0 * m * HBAR * TWO_PI * f)


def com_heating_rate(S_E_v2_m2_hz: float, masses_kg, charges_c, f_mode_hz: float) -> float:
    """Heating rate of the centre-of-mass mode of N ions along one axis, quanta/s.

    The COM of ions with one charge-to-mass ratio is an oscillator of mass
    ``sum m`` and charge ``sum Q``: Turchette's formula with those, i.e.
    N times the single-ion energy rate for identical ions.

    Raises
    ------
    InputError
        If the ions' Q/m differ (the COM motion is then not a normal mode).
    """
    func = "com_heating_rate"
    m = np.atleast_1d(np.asarray(masses_kg, dtype=float))
    q = np.atleast_1d(np.asarray(charges_c, dtype=float))
    if m.shape != q.shape or np.any(m <= 0):
        raise _err("masses_kg", "positive masses, one per charge", func)
    qm = q / m
    if np.any(np.abs(qm - qm[0]) > 1e-12 * abs(qm[0])):
        raise _err("charges_c", "ions with one charge-to-mass ratio (the centre of mass of a mixed crystal is not a normal mode)", func)
    return turchette_heating_rate(S_E_v2_m2_hz, float(np.sum(m)), float(np.sum(q)), f_mode_hz)


def diffusion_constant(order: int, moment_c_mn, S_re: float, S_im: float | None = None) -> DiffusionConstant:
    """Angular-momentum diffusion of a rigid rotor under order-n field-multipole noise.

    ``D = n^2 |M_n|^2 (S_re + S_im) / 8`` with the PSDs at ``n |f_rot|``;
    ``S_im = S_re`` (default) gives ``n^2 |M_n|^2 S / 4``. Derivation in the
    module docstring; ``<(L(t) - L(0))^2> = 2 D t``.

    Parameters
    ----------
    order : int
        n >= 1 (1: uniform in-plane field, ``S_re = S_Ex``, ``S_im = S_Ey``,
        moment about the centre of mass).
    moment_c_mn : complex or float
        Order-n moment ``M_n = sum_i Q_i z_i^n`` of the crystal, C m^n.
    S_re, S_im : float
        One-sided PSDs of ``g_re`` and ``g_im`` at ``n |f_rot|``, V^2/m^(2n)/Hz.

    Returns
    -------
    DiffusionConstant
        ``(D_si, D_hbar2_per_s)``.
    """
    func = "diffusion_constant"
    if isinstance(order, bool) or not isinstance(order, (int, np.integer)) or order < 1:
        raise _err("order", f"an integer order n >= 1, got {order!r}", func)
    s_re = _nonneg(S_re, "S_re", func)
    s_im = s_re if S_im is None else _nonneg(S_im, "S_im", func)
    m2 = abs(complex(moment_c_mn)) ** 2
    d = order**2 * m2 * (s_re + s_im) / 8.0
    return DiffusionConstant(d, d / HBAR**2)


def psd_for_diffusion(D_hbar2_per_s: float, order: int, moment_c_mn) -> float:
    """Multipole-noise PSD at ``n f_rot`` (each of g_re, g_im) that gives ``D``.

    Inverse of :func:`diffusion_constant`: ``S = 4 hbar^2 D / (n^2 |M_n|^2)``,
    V^2/m^(2n)/Hz; e.g. with ``D`` from :func:`mdrotor.coherence.coherence_budget`.
    """
    func = "psd_for_diffusion"
    d = _nonneg(D_hbar2_per_s, "D_hbar2_per_s", func)
    if isinstance(order, bool) or not isinstance(order, (int, np.integer)) or order < 1:
        raise _err("order", f"an integer order n >= 1, got {order!r}", func)
    m2 = abs(complex(moment_c_mn)) ** 2
    if m2 == 0:
        return math.inf
    return 4.0 * HBAR**2 * d / (order**2 * m2)


def tone_torque(order: int, moment_c_mn, amplitude: float, component: str = "re") -> float:
    """Largest mean torque of a tone at exactly ``n f_rot`` on a rigid rotor, N m.

    ``n A |M_n| / 2`` for a standing tone (component ``"re"`` or ``"im"``),
    ``n A |M_n|`` for a rotating one; the mean torque is this times
    ``sin(n phi_0 + arg M_n - phase)`` (``cos`` for ``"im"``), see the
    module docstring. L changes linearly at this rate.
    """
    func = "tone_torque"
    if isinstance(order, bool) or not isinstance(order, (int, np.integer)) or order < 1:
        raise _err("order", f"an integer order n >= 1, got {order!r}", func)
    if component not in COMPONENTS:
        raise _err("component", f"one of {list(COMPONENTS)}, got {component!r}", func)
    a = _nonneg(amplitude, "amplitude", func)
    t = order * a * abs(complex(moment_c_mn))
    return t if component == "rotating" else t / 2.0


# ---------------------------------------------------------------------------
# Rates from a run: analytic next to fitted
# ---------------------------------------------------------------------------
#: A fitted rate is resolved when it exceeds this many standard errors.
RESOLVED_SIGMA = 2.0


def fit_resolved(value: float, err: float) -> bool:
    """A fitted rate is resolved when it is positive and at least
    :data:`RESOLVED_SIGMA` standard errors from zero."""
    return bool(np.isfinite(value) and np.isfinite(err) and value > 0 and value >= RESOLVED_SIGMA * err)


def fit_upper_bound(value: float, err: float) -> float:
    """Upper bound at :data:`RESOLVED_SIGMA` sigma of an unresolved rate:
    max(value, 0) + 2 err (a rate cannot be negative)."""
    return max(float(value), 0.0) + RESOLVED_SIGMA * float(err)


def moment_vanishes(positions_m, masses_kg, charges_c, order: int) -> bool:
    """True when the crystal's order-n moment about the centre of mass is zero
    by symmetry: not present by the pinning core's rule
    (:func:`mdrotor.pinning.moment_rel` against :data:`mdrotor.pinning.MOMENT_REL`);
    order 1 is the dipole (zero for ions of one charge-to-mass ratio)."""
    from .pinning import MOMENT_REL, moment_rel

    return moment_rel(positions_m, masses_kg, charges_c, order) <= MOMENT_REL


def _torque_lead(plan, model, k: int) -> float:
    """How long before stage k's start the noise torques have acted on the
    free crystal at stage k's level: back through the preceding stages in
    which every noise source has stage k's scale and no pinning term is on."""
    sched = plan.schedule
    names = [s.name for s in sched.stages]
    level = [src.scale(names[k]) for src in model.sources]
    j = k
    while j > 0:
        prev = names[j - 1]
        if [src.scale(prev) for src in model.sources] != level or not model.active(prev):
            break
        t = np.linspace(sched.boundaries_s[j - 1], sched.boundaries_s[j], 201)
        if len(plan.pin_orders) and np.any(plan.pin_scales(t) * plan.pin_strength[None, :] != 0.0):
            break
        j -= 1
    return float(sched.boundaries_s[k] - sched.boundaries_s[j])


def run_rates(plan, raw) -> dict:
    """Analytic and fitted noise rates of a finished run.

    The stage used is the last one in which the noise is on; its start is
    the previous stage's end (or t = 0). Fitted, with standard errors:

    * ``D`` from the growth of the L variance, D = (var L(t1) - var L(t0)) /
      (2 (t1 - t0)) (<dL^2> = 2 D t; the error from the standard error of
      each spread, :func:`mdrotor.stats.var_se`, var = s^2 with error 2 s
      se_s, the two in quadrature). Meaningful when the crystal rotates
      freely in that stage (pinning off).
    * heating per mode, (<n_k>(t1) - <n_k>(t0)) / (t1 - t0), with the
      standard errors of the two means (:func:`mdrotor.stats.mean_sem`), for
      modes present at both times.

    A fitted rate is ``resolved`` (:func:`fit_resolved`) when positive and
    at least 2 standard errors; otherwise only its upper bound at 2 sigma
    means something (``*_bound``). The raw numbers are kept.

    Analytic, for the crystal rotating at the fitted stage's mean rate:
    Turchette COM heating along x, y, z, D per multipole order
    (:meth:`NoiseModel.rotor_diffusion`, the infinite-time limit; orders
    whose moment vanishes by the crystal's symmetry are flagged,
    ``D_analytic_zero_by_symmetry``) and D expected over the fit window
    itself (:meth:`NoiseModel.rotor_diffusion_window`, ``D_window_*``; the
    torques counted from ``D_window_lead_s`` before the window), which the
    fit's z-score ``D_fit_z`` is taken against.
    """
    from .observables import usable
    from .stats import mean_sem, var_se

    model = plan.noise
    sched = plan.schedule
    names = [s.name for s in sched.stages]
    active = [k for k, nm in enumerate(names) if model.active(nm)]
    if not active:
        return {}
    k = active[-1]
    stage = names[k]
    after = raw.stages[stage]
    before = raw.initial if k == 0 else raw.stages.get(names[k - 1])
    if before is None or not before:
        return {}
    t0, t1 = float(sched.boundaries_s[k]), float(sched.boundaries_s[k + 1])
    ok = usable(after["status"]) & usable(before["status"])
    n = int(np.sum(ok))
    out = {"stage": stage, "t0_s": t0, "t1_s": t1, "n_trajectories": n, "pinned": bool(plan.pinned_at(t1))}
    l0, l1 = before["L_com_hbar"][ok], after["L_com_hbar"][ok]
    if n > 2:
        (v0, e0), (v1, e1) = var_se(l0), var_se(l1)
        out["D_fit_hbar2_per_s"] = (v1 - v0) / (2 * (t1 - t0))
        out["D_fit_err_hbar2_per_s"] = np.hypot(e0, e1) / (2 * (t1 - t0))
        out["D_fit_resolved"] = fit_resolved(out["D_fit_hbar2_per_s"], out["D_fit_err_hbar2_per_s"])
        out["D_fit_bound_hbar2_per_s"] = fit_upper_bound(out["D_fit_hbar2_per_s"], out["D_fit_err_hbar2_per_s"])
    m0, m1 = before["_modes"], after["_modes"]
    labels, fitted, errs = [], [], []
    for j, lab in enumerate(m1.labels):
        if lab in m0.labels:
            i = m0.labels.index(lab)
            (a, ea), (b, eb) = mean_sem(before["mode_n"][ok, i]), mean_sem(after["mode_n"][ok, j])
            labels.append(lab)
            fitted.append((b - a) / (t1 - t0))
            errs.append(np.hypot(ea, eb) / (t1 - t0))
    out["heating_labels"] = labels
    out["heating_fit_quanta_per_s"] = np.array(fitted)
    out["heating_fit_err_quanta_per_s"] = np.array(errs)
    out["heating_fit_resolved"] = np.array([fit_resolved(v, e) for v, e in zip(fitted, errs)], dtype=bool)
    out["heating_fit_bound_quanta_per_s"] = np.array([fit_upper_bound(v, e) for v, e in zip(fitted, errs)])
    # analytic: the crystal rotating at the stage-end mean rate
    f_end = float(np.mean(after["f_rot_hz"][ok])) if n else 0.0
    cr = plan.crystal_at(t1, f_end)
    if model.has_field:
        # lab-frame COM frequencies along x, y, z from the secular frequencies (the COM of identical ions)
        fx, fy, fz = np.sqrt(plan.cfg.trap.omega_sq(plan.masses[:1], plan.charges[:1])[0]) / (2 * np.pi)
        try:
            out["turchette_quanta_per_s"] = model.com_heating_rates(plan.masses, plan.charges, [fx, fy, fz], stage)
            out["turchette_axes"] = ["x", "y", "z"]
        except Exception:  # mixed charge-to-mass: no single COM mode
            pass
    diff = model.rotor_diffusion(cr.positions_m, plan.masses, plan.charges, f_end, stage)
    orders = [o for o in diff if o != "total"]
    out["D_analytic_orders"] = np.array(orders, dtype=np.int64)
    out["D_analytic_hbar2_per_s"] = np.array([diff[o].D_hbar2_per_s for o in orders])
    out["D_analytic_zero_by_symmetry"] = np.array([moment_vanishes(cr.positions_m, plan.masses, plan.charges, o)
                                                   for o in orders], dtype=bool)
    out["D_analytic_total_hbar2_per_s"] = diff["total"].D_hbar2_per_s
    lead = _torque_lead(plan, model, k)
    win = model.rotor_diffusion_window(cr.positions_m, plan.masses, plan.charges, f_end, t1 - t0, lead, stage)
    out["D_window_lead_s"] = lead
    out["D_window_hbar2_per_s"] = np.array([win[o].D_hbar2_per_s for o in orders])
    out["D_window_total_hbar2_per_s"] = win["total"].D_hbar2_per_s
    if "D_fit_hbar2_per_s" in out and out["D_fit_err_hbar2_per_s"] > 0:
        out["D_fit_z"] = float((out["D_fit_hbar2_per_s"] - out["D_window_total_hbar2_per_s"]) / out["D_fit_err_hbar2_per_s"])
    out["f_rot_hz"] = f_end
    return out
