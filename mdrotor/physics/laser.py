r"""Doppler cooling: the two-level scattering force, its recoil noise, and what
a beam does to a trapped ion or a rotating crystal.

Every laser formula of mdrotor lives here, once; the compiled kick
(:func:`mdrotor.engine.kernels._laser_kick`) repeats the scattering rate and a test
(``tests/physics/test_laser.py``) compares the two. Pure functions and a small
frozen record; no config, no I/O. Units: SI inside (rad/s for Gamma and
delta here; the config gives Gamma / 2 pi and delta / 2 pi in Hz).

The model
---------
A beam is a travelling wave with wave vector ``k = (2 pi / lambda) k_hat``
driving a closed two-level transition of natural linewidth Gamma (rad/s,
Gamma = 1 / tau), detuned by delta (rad/s; delta < 0 is red of resonance),
with on-axis saturation parameter ``s0 = I / I_sat``. A Gaussian beam of
waist w (1/e^2 intensity radius) centred on the line through ``c`` along
``k_hat`` has ``s(r) = s0 exp(-2 rho^2 / w^2)``, rho the distance of r from
that line (the waist is taken as constant along the beam: Rayleigh range
much longer than the crystal). An ion moving at v sees the detuning
``delta - k . v`` (first-order Doppler shift) and scatters photons at the
steady-state rate of the optical Bloch equations

    R = (Gamma / 2) s / (1 + s + (2 (delta - k . v) / Gamma)^2)          [1/s]

(H.J. Metcalf and P. van der Straten, Laser Cooling and Trapping (1999),
ch. 2-3). Each absorption gives the ion a momentum ``hbar k`` along the
beam; each spontaneous emission ``hbar k n`` along a random unit vector n
drawn from the transition's emission pattern. The mean force is the
absorption part, ``F = hbar k R`` (the emission averages to zero for every
pattern below, which is symmetric under n -> -n).

Recoil noise. Over a time dt the number of photons is Poissonian with mean
and variance ``R dt``: the absorption impulse along k_hat has variance
``(hbar k)^2 R dt``; the emitted impulses have covariance
``(hbar k)^2 R dt M`` with ``M = <n n^T>`` the second-moment tensor of the
emission pattern (trace 1). Along a unit vector u the emission contributes
the fraction ``xi(u) = u . M . u`` of ``(hbar k)^2 R dt``:

* isotropic:      M = I / 3                               (xi = 1/3 along any axis)
* linear dipole (pi transition, dipole along a):
  pattern (3 / 8 pi) (1 - (a . n)^2),  M = (2/5) I - (1/5) a a^T
* circular dipole (sigma transition about the quantisation axis a):
  pattern (3 / 16 pi) (1 + (a . n)^2),  M = (3/10) I + (1/10) a a^T

(the angular distributions of dipole radiation: J.D. Jackson, Classical
Electrodynamics (1999), ch. 9; the moments integrate <n_i n_j> over them;
the tensors are checked against a numerical quadrature of the patterns in
the tests). A purely one-dimensional model (emission along +-k only, xi = 1)
is the textbook case.

Low-velocity limit along the beam. Expanding F for small ``k . v``,
``F = F0 - beta v_par`` with the friction coefficient

    beta = -4 hbar k^2 s (delta / Gamma) / (1 + s + (2 delta / Gamma)^2)^2     [kg/s]

(one beam: half the two-beam molasses value -8 hbar k^2 delta s / (Gamma
(1 + s + (2 delta/Gamma)^2)^2) of Metcalf and van der Straten, ch. 7;
D.J. Wineland and W.M. Itano, Phys. Rev. A 20, 1521 (1979)), positive
(cooling) for delta < 0. The momentum diffusion along the beam,
``<dp_par^2> = 2 D_p t``, is

    D_p = (1 + xi) (hbar k)^2 R0 / 2,      R0 = R(v = 0).

A harmonic mode of mass m along the beam, with frequency omega >> beta / m
(the weak-damping, secular regime; the semiclassical force assumes omega
<< Gamma, the weak-binding regime of Wineland and Itano), loses energy at
the cooling rate ``gamma_c = beta / m`` (the energy's damping rate: the
amplitude decays at beta / 2m) and is heated at ``D_p / m``; its steady
energy ``k_B T = D_p / beta`` is the Doppler temperature

    k_B T = (1 + xi) hbar Gamma^2 (1 + s + (2 delta / Gamma)^2) / (16 |delta|),

whose minimum over delta in the limit s -> 0 lies at delta = -Gamma / 2 and
is ``(1 + xi) hbar Gamma / 4``: ``hbar Gamma / 2`` for the one-dimensional
model xi = 1 (Metcalf and van der Straten, ch. 7; Wineland and Itano
1979; S. Stenholm, Rev. Mod. Phys. 58, 699 (1986)), ``hbar Gamma / 3`` for
isotropic emission. A mode along a unit vector e not parallel to the beam
sees ``(k_hat . e)^2`` of the friction and of the absorption noise and
``e . M . e`` of the emission noise: its Doppler temperature is the formula
above with ``1 + xi`` replaced by ``1 + e . M . e / (k_hat . e)^2``.

A rotating crystal under a lab-fixed beam. Ion i at ``r_i(phi)`` (the
equilibrium of the crystal rotating at omega, turned by phi about the trap
axis z) moves at ``v_i = omega z_hat x r_i``. Averaged over one turn, the
beam exerts the torque about the axis

    tau = < sum_i (r_i x F_i)_z >_phi,

computed here by quadrature over phi (trapezoidal rule on equally spaced
phases, exponentially convergent for a smooth periodic integrand; the grid
is doubled until the result is stable). It changes L at ``tau / hbar``
quanta per second. The random kicks make L diffuse with

    D_L = (1/2) < sum_i R_i hbar^2 k^2 [ (r_i x k_hat)_z^2
                  + x_i^2 M_yy + y_i^2 M_xx - 2 x_i y_i M_xy ] >_phi

(absorption: the torque impulse of each photon; emission: the variance of
``(r_i x n)_z``), ``<dL^2> = 2 D_L t``. A beam along z exerts no torque
about z. L drifts by K quanta after ``K hbar / |tau|``, and its spread
reaches K quanta after ``K^2 hbar^2 / (2 D_L)``.

Caution: cooling beams (often ultraviolet) can injure eyes and skin.
Everything here is a simulation; the lab's laser-safety rules decide.
"""

from __future__ import annotations

import math
from dataclasses import dataclass, field

import numpy as np

from mdrotor.physics.constants import HBAR, K_B

TWO_PI = 2.0 * math.pi

PATTERNS = ("isotropic", "linear", "circular")
SAFETY = ("Caution: cooling lasers (often ultraviolet) can injure eyes and skin; these are simulated beams, and "
          "real ones are set up under your laboratory's laser-safety rules and its laser-safety officer")


# ---------------------------------------------------------------------------
# Emission patterns
# ---------------------------------------------------------------------------
def emission_tensor(pattern: str = "isotropic", axis=(0.0, 0.0, 1.0)) -> np.ndarray:
    """Second moments M = <n n^T> (3, 3) of the emitted photon's direction.

    Parameters
    ----------
    pattern : {"isotropic", "linear", "circular"}
        ``"linear"``: a dipole oscillating along ``axis`` (pi light), pattern
        proportional to 1 - (a . n)^2; ``"circular"``: a dipole rotating about
        ``axis`` (sigma light), proportional to 1 + (a . n)^2.
    axis : (3,) unit vector
        Dipole or quantisation axis (ignored for ``"isotropic"``).

    Returns
    -------
    (3, 3) ndarray, symmetric, trace 1.
    """
    if pattern == "isotropic":
        return np.eye(3) / 3.0
    a = np.asarray(axis, dtype=float)
    a = a / np.linalg.norm(a)
    if pattern == "linear":
        return 0.4 * np.eye(3) - 0.2 * np.outer(a, a)
    if pattern == "circular":
        return 0.3 * np.eye(3) + 0.1 * np.outer(a, a)
    raise ValueError(f"unknown emission pattern {pattern!r}; expected one of {PATTERNS}")


def emission_fraction(tensor, direction) -> float:
    """xi(u) = u . M . u: the fraction of (hbar k)^2 per photon that the
    emission puts along the unit vector u."""
    u = np.asarray(direction, dtype=float)
    u = u / np.linalg.norm(u)
    return float(u @ np.asarray(tensor, dtype=float) @ u)


def emission_sqrt(tensor) -> np.ndarray:
    """Symmetric square root S of M (S S^T = M): the kernel draws the
    emission kick as ``hbar k sqrt(R dt) S u`` with u three independent
    unit-variance numbers."""
    w, v = np.linalg.eigh(np.asarray(tensor, dtype=float))
    return (v * np.sqrt(np.clip(w, 0.0, None))) @ v.T


# ---------------------------------------------------------------------------
# The beam
# ---------------------------------------------------------------------------
@dataclass(frozen=True, eq=False)
class Beam:
    """One laser beam (validated; build it from a config with
    :func:`mdrotor.config.parse.load_config`, or directly in Python).

    Attributes
    ----------
    name : str
    species : str
        Name of the species it addresses (``"40Ca+"``).
    ions : tuple of int
        Indices of the crystal's ions of that species.
    wavelength_m : float
    linewidth_hz : float
        Natural linewidth Gamma / 2 pi (Hz).
    detuning_hz : float
        delta / 2 pi (Hz), negative red of resonance.
    saturation : float
        On-axis s0 = I / I_sat (>= 0).
    direction : (3,) unit vector along k.
    waist_m : float or None
        1/e^2 intensity radius; None for a plane wave.
    centre_m : (3,)
        A point on the beam axis (only matters with a waist).
    emission : (3, 3)
        Second moments of the emission pattern (:func:`emission_tensor`).
    emission_label : str
    stage_scale : dict
        Intensity (saturation) multiplier per stage; stages not listed get
        ``default_scale``.
    default_scale : float
    key : str
        Config key of the entry (for messages).
    """

    name: str
    species: str
    ions: tuple
    wavelength_m: float
    linewidth_hz: float
    detuning_hz: float
    saturation: float
    direction: np.ndarray
    waist_m: float | None = None
    centre_m: np.ndarray = field(default_factory=lambda: np.zeros(3))
    emission: np.ndarray = field(default_factory=lambda: np.eye(3) / 3.0)
    emission_label: str = "isotropic"
    stage_scale: dict = field(default_factory=dict)
    default_scale: float = 1.0
    key: str = "laser"

    @property
    def k_rad_per_m(self) -> float:
        """|k| = 2 pi / lambda."""
        return TWO_PI / self.wavelength_m

    @property
    def gamma_rad_s(self) -> float:
        return TWO_PI * self.linewidth_hz

    @property
    def delta_rad_s(self) -> float:
        return TWO_PI * self.detuning_hz

    @property
    def xi(self) -> float:
        """Emission fraction along the beam, k_hat . M . k_hat."""
        return emission_fraction(self.emission, self.direction)

    def scale(self, stage: str | None) -> float:
        """Saturation multiplier during ``stage`` (None: 1)."""
        if stage is None:
            return 1.0
        return float(self.stage_scale.get(stage, self.default_scale))

    def saturation_in(self, stage: str | None) -> float:
        return self.saturation * self.scale(stage)

    def on(self, stage: str | None) -> bool:
        return self.saturation_in(stage) > 0.0 and len(self.ions) > 0

    def describe(self) -> str:
        d = ", ".join(f"{x:.4g}" for x in self.direction)
        w = f", waist {self.waist_m * 1e6:.4g} um" if self.waist_m else ""
        return (f"beam '{self.name}' on {self.species}: {self.wavelength_m * 1e9:.6g} nm, linewidth "
                f"{self.linewidth_hz / 1e6:.4g} MHz, detuning {self.detuning_hz / 1e6:.4g} MHz, s = {self.saturation:.4g}, "
                f"direction [{d}]{w}, {self.emission_label} emission")


# ---------------------------------------------------------------------------
# Formulas (SI; gamma and delta in rad/s)
# ---------------------------------------------------------------------------
def saturation_profile(s0: float, positions_m, direction, centre_m=(0.0, 0.0, 0.0), waist_m: float | None = None):
    """s(r) = s0 exp(-2 rho^2 / w^2) at positions (..., 3); s0 for a plane wave."""
    r = np.asarray(positions_m, dtype=float)
    if not waist_m:
        return np.full(r.shape[:-1], float(s0))
    u = np.asarray(direction, dtype=float)
    d = r - np.asarray(centre_m, dtype=float)
    along = d @ u
    rho2 = np.sum(d * d, axis=-1) - along * along
    return s0 * np.exp(-2.0 * rho2 / waist_m**2)


def scattering_rate(s, delta_rad_s, gamma_rad_s, k_dot_v_rad_s=0.0):
    """R = (Gamma/2) s / (1 + s + (2 (delta - k.v) / Gamma)^2), photons/s
    (Metcalf and van der Straten 1999, ch. 2-3)."""
    x = 2.0 * (np.asarray(delta_rad_s) - np.asarray(k_dot_v_rad_s)) / gamma_rad_s
    s = np.asarray(s, dtype=float)
    return 0.5 * gamma_rad_s * s / (1.0 + s + x * x)


def force_n(s, delta_rad_s, gamma_rad_s, k_rad_per_m, k_dot_v_rad_s=0.0):
    """Mean scattering force hbar k R along the beam (N)."""
    return HBAR * k_rad_per_m * scattering_rate(s, delta_rad_s, gamma_rad_s, k_dot_v_rad_s)


def friction_coefficient(s, delta_rad_s, gamma_rad_s, k_rad_per_m):
    """beta = -dF/dv_par at v = 0 for one beam, kg/s (> 0 red of resonance):
    -4 hbar k^2 s (delta/Gamma) / (1 + s + (2 delta/Gamma)^2)^2."""
    d = np.asarray(delta_rad_s) / gamma_rad_s
    return -4.0 * HBAR * k_rad_per_m**2 * s * d / (1.0 + s + 4.0 * d * d) ** 2


def max_friction_coefficient(s, k_rad_per_m):
    """The largest |dF/dv_par| of the force over all Doppler shifts, kg/s:
    dF/dv = 2 hbar k^2 s x / (1 + s + x^2)^2 with x = 2 (delta - k v) / Gamma
    is largest at x^2 = (1 + s) / 3, where it is
    (9 / 8) hbar k^2 s sqrt((1 + s) / 3) / (1 + s)^2. The engine keeps
    this rate's product with dt small (:data:`mdrotor.engine.integrate.LASER_DAMPING_PER_STEP`)."""
    a = 1.0 + s
    return 1.125 * HBAR * k_rad_per_m**2 * s * math.sqrt(a / 3.0) / a**2


def cooling_rate(s, delta_rad_s, gamma_rad_s, k_rad_per_m, mass_kg):
    """Energy damping rate beta / m (1/s) of a harmonic mode along the beam."""
    return friction_coefficient(s, delta_rad_s, gamma_rad_s, k_rad_per_m) / mass_kg


def momentum_diffusion(s, delta_rad_s, gamma_rad_s, k_rad_per_m, xi):
    """D_p = (1 + xi) (hbar k)^2 R0 / 2 along the beam (kg^2 m^2 / s^3):
    absorption plus the emission's projection xi."""
    return 0.5 * (1.0 + xi) * (HBAR * k_rad_per_m) ** 2 * scattering_rate(s, delta_rad_s, gamma_rad_s)


def doppler_temperature_k(s, delta_rad_s, gamma_rad_s, xi):
    """Steady temperature along the beam, D_p / (beta k_B), in K:
    (1 + xi) hbar Gamma^2 (1 + s + (2 delta/Gamma)^2) / (16 |delta| k_B).
    ``inf`` for delta >= 0: a beam on or blue of resonance heats without
    bound."""
    d = float(delta_rad_s)
    if d >= 0.0:
        return math.inf
    x = 2.0 * d / gamma_rad_s
    return (1.0 + xi) * HBAR * gamma_rad_s**2 * (1.0 + s + x * x) / (16.0 * abs(d) * K_B)


def doppler_minimum_k(gamma_rad_s, xi=1.0):
    """(1 + xi) hbar Gamma / (4 k_B): the s -> 0 minimum, at delta = -Gamma / 2
    (hbar Gamma / (2 k_B) for the one-dimensional model xi = 1)."""
    return (1.0 + xi) * HBAR * gamma_rad_s / (4.0 * K_B)


def mode_doppler_temperature_k(beam: Beam, mode_direction, stage: str | None = None) -> float:
    """Doppler temperature of a harmonic mode along ``mode_direction`` (an
    ion at rest, this beam alone): ``1 + xi`` becomes 1 + e.M.e / (k_hat.e)^2;
    ``inf`` if the beam has no component along the mode or is not red detuned."""
    e = np.asarray(mode_direction, dtype=float)
    e = e / np.linalg.norm(e)
    c2 = float(np.dot(beam.direction, e)) ** 2
    if c2 < 1e-12:
        return math.inf
    xi_eff = emission_fraction(beam.emission, e) / c2
    return doppler_temperature_k(beam.saturation_in(stage), beam.delta_rad_s, beam.gamma_rad_s, xi_eff)


# ---------------------------------------------------------------------------
# A rigid crystal rotating under lab-fixed beams
# ---------------------------------------------------------------------------
@dataclass(frozen=True)
class RotorLaser:
    """What the beams do to a crystal rotating rigidly about the trap axis.

    torque_n_m : total torque about z averaged over one turn (N m)
    torque_by_beam_n_m : (B,)
    rate_hz : (N,) scattering rate per ion averaged over one turn (photons/s)
    diffusion_hbar2_per_s : D_L from the recoil kicks (<dL^2> = 2 D_L t)
    drift_hbar_per_ms : tau / hbar in quanta per ms
    phases : number of quadrature phases used
    """

    torque_n_m: float
    torque_by_beam_n_m: np.ndarray
    rate_hz: np.ndarray
    diffusion_hbar2_per_s: float
    phases: int

    @property
    def drift_hbar_per_ms(self) -> float:
        return self.torque_n_m / HBAR * 1e-3

    def drift_time_s(self, quanta: float) -> float:
        """Time for the mean L to drift by ``quanta`` (inf without torque)."""
        rate = abs(self.torque_n_m) / HBAR
        return quanta / rate if rate > 0 else math.inf

    def spread_time_s(self, quanta: float) -> float:
        """Time for the recoil diffusion to spread L by ``quanta`` (rms)."""
        d = self.diffusion_hbar2_per_s
        return quanta**2 / (2.0 * d) if d > 0 else math.inf


def _turn(beams, positions_m, f_rot_hz, phi, stage):
    """Torque (B, P), rates (N, P), D_L integrand (P,) at phases phi (P,)."""
    r0 = np.asarray(positions_m, dtype=float)
    w = TWO_PI * f_rot_hz
    c, s = np.cos(phi), np.sin(phi)
    x = c[None, :] * r0[:, 0, None] - s[None, :] * r0[:, 1, None]     # (N, P)
    y = s[None, :] * r0[:, 0, None] + c[None, :] * r0[:, 1, None]
    z = np.broadcast_to(r0[:, 2, None], x.shape)
    vx, vy = -w * y, w * x
    pos = np.stack([x, y, z], axis=-1)                                 # (N, P, 3)
    torque = np.zeros((len(beams), len(phi)))
    rates = np.zeros_like(x)
    dl = np.zeros(len(phi))
    for b, bm in enumerate(beams):
        s0 = bm.saturation_in(stage)
        if s0 <= 0:
            continue
        u = np.asarray(bm.direction, dtype=float)
        k = bm.k_rad_per_m
        M = np.asarray(bm.emission, dtype=float)
        for i in bm.ions:
            sat = saturation_profile(s0, pos[i], u, bm.centre_m, bm.waist_m)
            R = scattering_rate(sat, bm.delta_rad_s, bm.gamma_rad_s, k * (u[0] * vx[i] + u[1] * vy[i]))
            rates[i] += R
            lever = x[i] * u[1] - y[i] * u[0]                           # (r x k_hat)_z
            torque[b] += HBAR * k * R * lever
            emit = x[i] ** 2 * M[1, 1] + y[i] ** 2 * M[0, 0] - 2.0 * x[i] * y[i] * M[0, 1]
            dl += 0.5 * R * (HBAR * k) ** 2 * (lever**2 + emit)
    return torque, rates, dl


def rotor_laser(beams, positions_m, f_rot_hz: float, stage: str | None = None, *, rtol: float = 1e-10,
                max_phases: int = 1 << 16) -> RotorLaser:
    """Torque, scattering rates and recoil diffusion of a crystal rotating
    rigidly at ``f_rot_hz`` about z with ions at ``positions_m`` (N, 3) (at
    phase 0), averaged over one turn by quadrature (module docstring).

    Each beam acts at its saturation in ``stage`` (None: as configured).
    The trapezoidal grid starts at 64 phases and doubles until torque, rates
    and D_L change by less than ``rtol`` of their natural scales (for the
    torque, tau0 = hbar k r_max sum_i R_i, the torque if every photon pushed
    at the largest lever arm), at most to ``max_phases`` (a beam waist
    1e-4 of the orbit still settles). A torque below 1e-12 tau0 (the
    rounding of the sum over phases: a symmetric crystal at rest, a beam
    along z) is reported as 0.
    """
    k_max = max((bm.k_rad_per_m for bm in beams), default=0.0)
    r_max = float(np.max(np.abs(positions_m)))
    p = 64
    prev = None
    while True:
        phi = TWO_PI * np.arange(p) / p
        t, r, d = _turn(beams, positions_m, f_rot_hz, phi, stage)
        cur = (np.mean(t, axis=1), np.mean(r, axis=1), float(np.mean(d)))
        tau0 = HBAR * k_max * r_max * float(np.sum(cur[1]))
        if prev is not None:
            settled = (np.max(np.abs(cur[0] - prev[0]), initial=0.0) <= rtol * tau0
                       and np.max(np.abs(cur[1] - prev[1]), initial=0.0) <= rtol * float(np.max(cur[1], initial=0.0))
                       and abs(cur[2] - prev[2]) <= rtol * cur[2])
            if settled or p >= max_phases:
                break
        prev = cur
        p *= 2
    floor = 1e-12 * tau0
    tb = np.where(np.abs(cur[0]) <= floor, 0.0, cur[0])
    total = float(np.sum(tb))
    return RotorLaser(total if abs(total) > floor else 0.0, tb, cur[1], cur[2] / HBAR**2, p)


__all__ = ["Beam", "RotorLaser", "PATTERNS", "SAFETY", "emission_tensor", "emission_fraction", "emission_sqrt",
           "saturation_profile", "scattering_rate", "force_n", "friction_coefficient", "cooling_rate",
           "max_friction_coefficient", "momentum_diffusion", "doppler_temperature_k", "doppler_minimum_k", "mode_doppler_temperature_k",
           "rotor_laser"]
