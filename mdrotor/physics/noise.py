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
:mod:`mdrotor.physics.multipole`)::

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

Time-domain synthesis (the run's samples) is described in :mod:`mdrotor.engine.noise`.

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
:mod:`mdrotor.physics.coherence` takes; order-n noise kicks L by ``+-n`` quanta
(``kick_quanta = n`` there). The derivation assumes a rigid crystal whose
rotation rate the noise does not change during the torque correlation time
(weak noise, centrifugal stretch included in ``z_i^b``); it is checked
against a Monte-Carlo of the torque integral in ``tests/physics/test_noise.py``.

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
from dataclasses import dataclass
from typing import NamedTuple

import numpy as np

from mdrotor.errors import InputError
from mdrotor.physics.constants import HBAR
from mdrotor.physics.multipole import moment
from mdrotor.physics.pinning import MOMENT_REL, moment_rel

__all__ = [
    "PsdTerm",
    "Spectrum",
    "NoiseSource",
    "Tone",
    "NoiseModel",
    "DiffusionConstant",
    "turchette_heating_rate",
    "com_heating_rate",
    "diffusion_constant",
    "psd_for_diffusion",
    "tone_torque",
    "moment_vanishes",
]

TWO_PI = 2.0 * math.pi
AXES = ("x", "y", "z")
KINDS = ("white", "power", "lorentzian")
COMPONENTS = ("re", "im", "rotating")

FIT_DENSITIES = (2, 3, 4, 6)       # OU corners per decade, tried in turn
FIT_EXTENSIONS_DECADES = (0.5, 1.0, 1.5)   # how far the corners reach beyond the band, tried in turn per density
FIT_TOLERANCE = 2e-3               # largest relative error accepted in the band

_SRC = "mdrotor.physics.noise"


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

    Corners log-spaced at 2, 3, 4 or 6 per decade from 0.5, 1 or 1.5
    decades below ``f_min`` to as far above ``f_max`` (the first density
    that meets :data:`FIT_TOLERANCE` with any of these reaches, and of
    those the fit with the fewest modes: each mode costs the kernel a
    random number and an update per step);
    weights ``c_j >= 0`` by bounded least squares on the relative error
    over the band (M.S. Keshner, Proc. IEEE 70, 212 (1982) for the
    representation).

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
    best = met = None   # the closest fit so far; the one with the fewest modes that meets the tolerance
    for dens in FIT_DENSITIES:
        for ext in FIT_EXTENSIONS_DECADES:
            a, b = lo - ext, hi + ext
            m = int(math.ceil((b - a) * dens)) + 1
            fj = np.logspace(a, b, m)
            A = _lorentz(f_fit[:, None], fj[None, :]) / target_fit[:, None]
            col = np.linalg.norm(A, axis=0)
            sol = lsq_linear(A / col, np.ones(len(f_fit)), bounds=(0.0, np.inf), method="bvls")
            c = sol.x / col
            keep = c > 0
            fj, c = fj[keep], c[keep]
            err = float(np.max(np.abs(_lorentz(f_chk[:, None], fj[None, :]) @ c / target_chk - 1.0)))
            fit = (fj, c * level, err)
            if err <= FIT_TOLERANCE:
                if met is None or len(fj) < len(met[0]):
                    met = fit
            elif best is None or err < best[2]:
                best = fit
        if met is not None:
            return met
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


# ---------------------------------------------------------------------------
# OU step coefficients
# ---------------------------------------------------------------------------


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
    V^2/m^(2n)/Hz; e.g. with ``D`` from :func:`mdrotor.physics.coherence.coherence_budget`.
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


def moment_vanishes(positions_m, masses_kg, charges_c, order: int) -> bool:
    """True when the crystal's order-n moment about the centre of mass is zero
    by symmetry: not present by the pinning core's rule
    (:func:`mdrotor.physics.pinning.moment_rel` against :data:`mdrotor.physics.pinning.MOMENT_REL`);
    order 1 is the dipole (zero for ions of one charge-to-mass ratio)."""

    return moment_rel(positions_m, masses_kg, charges_c, order) <= MOMENT_REL


