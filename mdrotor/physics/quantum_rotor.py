r"""The crystal's orientation as a quantum rigid rotor, through a schedule.

Pure functions and small frozen types; no configs, no files (the builder
from a config is :mod:`mdrotor.model.quantum`).

Model
-----
The crystal is a rigid planar rotor: its orientation ``phi`` about the trap
axis and the conjugate angular momentum ``L`` (units of hbar). In the
laboratory frame

.. math::

    H(t) = E_{rot}(L) + \sum_c \mathrm{Re}\left[a_c(t)\,
           e^{i k_c (\phi - \theta(t))}\right]

* ``E_rot(L)`` is the rotational energy (:class:`RotationalEnergy`):
  ``hbar^2 L^2 / (2 I)`` for a rigid rotor, or with the centrifugal stretch
  of the crystal, ``I = I(w)``, the energy whose derivative is the rotation
  rate, ``dE/dL = hbar w`` (Hamilton's equation for the angle) with
  ``hbar L = I(w) w``. Integrating by parts,
  ``E = I(w) w^2 - (1/2) int_0^{w^2} I(u) du`` (``u = w^2``); for constant
  ``I`` this is ``I w^2 / 2``.
* The pinning is a sum of Fourier components (:class:`PinningComponent`) of
  the crystal's pinning energy against its angle ``u = phi - theta`` relative
  to the rotating pattern: ``Re[a e^{i k u}]``, ``a = m(t)^p A(f_rot(t))``
  with ``m(t)`` the schedule's multiplier of the component's pinning term.
  A rigid crystal under an order-n multipole has one component ``k = n``,
  ``p = 1``; a crystal held only through its deformation has components at
  other orders and higher powers of the multiplier.
* ``theta(t) = 2 pi int f_rot`` and ``f_rot(t)`` are the schedule's
  (:class:`mdrotor.config.schedule.Schedule`), exact.

Frame
-----
With ``phi' = phi - theta(t)`` the state's angular-momentum components
become ``c'_L = e^{i L theta} c_L`` (so ``P(L)`` is the same in both frames)
and

.. math::

    H' = E_{rot}(L) - \hbar\Omega(t) L + V(\phi', t),
    \qquad \Omega = d\theta/dt = 2\pi f_{rot},

whose diagonal part is centred on the co-rotating ``L_c = I Omega / hbar``.
The solver works in this frame and returns laboratory-frame states.

Basis
-----
Only the exchange-allowed angular momenta ``L = offset + spacing j``
(:class:`Ladder`, from :func:`mdrotor.physics.rotor.allowed_L_ladder`) are kept;
every pinning order and every noise kick must be a multiple of the spacing,
so the dynamics never leaves the ladder. A window of ``M`` consecutive
ladder values follows the state (after a spin-up ``L`` is ~1e4 while its
spread is ~1e2). On the angle grid ``phi_p = 2 pi p / (spacing M)`` the
discrete Fourier transform maps the window exactly onto angle samples
(``c_j -> sum_j c_j e^{2 pi i j p / M}``; the common factor
``e^{i L_lo phi}`` commutes with every function of the angle). A potential
multiplies on the grid and acts in ``L`` as a circulant that wraps around
the window's ends; the window keeps empty margins beyond the state's
support (the range outside which every column has less than
:data:`SUPPORT_FLOOR` of weight on either side) so that the wrap never
carries weight. Weight cut off when the window moves is added up and
reported (``window_weight_discarded``).

Propagator and step control
---------------------------
A fourth-order factorisation of the propagator with positive coefficients,
S.A. Chin, Phys. Lett. A 226, 344 (1997) ("algorithm 4A"), over a step
``h`` from ``t``:

.. math::

    U = e^{-\frac{i}{\hbar}\frac h6 V(t+h)}\,
        e^{-\frac{i}{\hbar}\int_{t+h/2}^{t+h} T}\,
        e^{-\frac{i}{\hbar}\frac{2h}3 \tilde V(t+h/2)}\,
        e^{-\frac{i}{\hbar}\int_{t}^{t+h/2} T}\,
        e^{-\frac{i}{\hbar}\frac h6 V(t)},
    \qquad \tilde V = V - \frac{h^2}{48\,I_d} V'(\phi)^2 ,

with ``T = E_rot(L) - hbar Omega L``. The diagonal part is integrated
exactly, ``int T = E_rot(L) (t_2 - t_1) - hbar L (theta(t_2) - theta(t_1))``
(it commutes with itself at all times); the potential factors are diagonal
on the angle grid (two FFTs each; the outer factors of neighbouring steps
merge, so a step costs two). ``tilde V`` carries the double commutator
``[V, [T, V]] = hbar^2 V'^2 / I_d`` of the quadratic kinetic energy
(``I_d = hbar^2 / E_rot''(L)``, the dynamic moment of inertia, ``I`` for a
rigid rotor; taken at the co-rotating ``L`` when the rotor is stretched).
Time is carried by the diagonal part, so the scheme is the same
factorisation of the problem made autonomous (the commutators with
``d/dt`` add nothing to ``tilde V``); it is exact for ``V = 0``.

Step error. For a harmonic well of angular frequency ``w`` the step is a
linear symplectic map whose trace gives the frequency ``w~`` of the
simulated motion, ``w~ / w - 1 = -(w h)^4 / 4320 + O(h^6)``
(:func:`harmonic_frequency_error` evaluates it exactly; a test reproduces
the coefficient). The step is ``h = x / w_char`` with ``x`` the root of
``|harmonic_frequency_error(x)| = tol`` and
``w_char = max(w_well, w_move, w_ramp)``, so that the frequencies of the simulated motion differ from the true ones
by at most ``tol`` (relative): ``w_well = sqrt(sum_c k_c^2 |a_c| / I)``
bounds ``sqrt(max |V''| / I)``; ``w_move = k_max hbar (|<L> - L_c| + 4
sigma_L + k_max / 2) / I`` bounds the frequencies ``|E(L + k) - E(L)| /
hbar - k Omega`` of the transitions the potential drives from the state's
components out to four standard deviations; ``w_ramp = pi / T``
for a stage of duration ``T`` in which the pinning changes (the schedule's
own time scale). A stage where the pinning is zero throughout is
propagated exactly (diagonal phases and kicks only). Phase errors of
eigenstates do not accumulate into the populations: the error of ``P(L)``
falls at least as fast as ``tol`` (``h^4``) and stays below it in the tests
(a spin-up and release, total-variation distance against ``tol / 100``).

Initial states and noise
------------------------
:class:`ThermalState`: Boltzmann-weighted eigenstates of the pinned rotor
``H'(0)`` (each propagated as one column; the density matrix of the thermal
state is their weighted sum), cut where the left-out Boltzmann weight falls
below ``cut``. :class:`PureState`: a given superposition.

Noise (:class:`KickChannel`): the rotor master equation of angular-momentum
diffusion, whose jump operators ``sqrt(gamma) e^{+-i q phi}`` kick ``L`` by
``+-q`` quanta, each at rate ``gamma = D / q^2`` per direction
(:mod:`mdrotor.physics.coherence`, module docstring; B.A. Stickler, B. Schrinski,
K. Hornberger, Phys. Rev. Lett. 121, 040401 (2018)). The jump operators are
unitary, so ``sum_j J_j^+ J_j = 2 gamma`` is a multiple of the identity: the
quantum-jump unravelling (J. Dalibard, Y. Castin, K. Molmer, Phys. Rev.
Lett. 68, 580 (1992)) has jump times independent of the state (a Poisson
process of total rate ``2 gamma(t)``) and no non-Hermitian drift. Each
column gets its own record of kicks from ``SeedSequence(seed,
spawn_key=(record, eigenstate, channel))``: the result depends only on the
seed. With ``R`` records per eigenstate the estimates carry standard errors
from the spread between records.
"""

from __future__ import annotations

import math
import time
from dataclasses import dataclass, field

import numpy as np

from mdrotor.errors import InputError, PhysicsError
from mdrotor.physics.constants import HBAR

__all__ = [
    "Ladder",
    "RotationalEnergy",
    "PinningComponent",
    "KickChannel",
    "RotorModel",
    "ThermalState",
    "PureState",
    "Levels",
    "Distribution",
    "StateSnapshot",
    "Evolution",
    "levels",
    "evolve",
    "sideband_lines",
    "harmonic_frequency_error",
    "SUPPORT_FLOOR",
]

TWO_PI = 2.0 * np.pi
_SRC = "mdrotor.physics.quantum_rotor"
SUPPORT_FLOOR = 1e-20      # weight a column may have beyond the window's support on each side
_BLOCK_STEPS = 64          # steps per block between window checks
_MIN_MARGIN = 16           # ladder points of empty margin on each side of the state, at least
_MAX_WINDOW = 1 << 20


def _err(key: str, expected: str, func: str) -> InputError:
    return InputError(key, expected, f"{_SRC}.{func}")


def _int(v, key, func, minimum=None):
    if isinstance(v, bool) or not isinstance(v, (int, np.integer)):
        raise _err(key, f"an integer, got {v!r}", func)
    if minimum is not None and v < minimum:
        raise _err(key, f"an integer >= {minimum}, got {v!r}", func)
    return int(v)


# --------------------------------------------------------------------------
# model types
# --------------------------------------------------------------------------
@dataclass(frozen=True)
class Ladder:
    """Allowed angular momenta ``L = offset + spacing * j`` (units of hbar).

    ``(spacing, offset)`` is :func:`mdrotor.physics.rotor.allowed_L_ladder`'s
    ``(modulus, residue)``; ``Ladder()`` allows every integer.
    """

    spacing: int = 1
    offset: int = 0

    def __post_init__(self):
        s = _int(self.spacing, "spacing", "Ladder", 1)
        o = _int(self.offset, "offset", "Ladder")
        if not 0 <= o < s:
            raise _err("offset", f"an integer in [0, spacing), got {o}", "Ladder")

    def value(self, j):
        """``L`` of ladder index ``j`` (int64)."""
        return self.offset + self.spacing * np.asarray(j, dtype=np.int64)

    def nearest_index(self, L_real: float) -> int:
        """Index of the allowed ``L`` nearest to a real ``L``."""
        return int(np.round((float(L_real) - self.offset) / self.spacing))

    def allows(self, L) -> np.ndarray:
        return (np.asarray(L, dtype=np.int64) - self.offset) % self.spacing == 0


@dataclass(frozen=True)
class RotationalEnergy:
    """Rotational energy ``E_rot(L)`` of the free crystal.

    Rigid (no nodes): ``hbar^2 L^2 / (2 I0)``. Stretched: ``I`` tabulated
    against ``u = w^2`` (``omega2_nodes`` in rad^2/s^2, increasing, from 0)
    and interpolated by a natural cubic spline (linear continuation beyond
    the last node); ``E = I(u) u - (1/2) int_0^u I`` at the rate ``w`` with
    ``I(w) w = hbar |L|`` (module docstring).

    Parameters
    ----------
    I0_kg_m2 : float
        Moment of inertia at rest, kg m^2.
    omega2_nodes, I_nodes_kg_m2 : tuple of float, optional
        The stretch table.
    """

    I0_kg_m2: float
    omega2_nodes: tuple = ()
    I_nodes_kg_m2: tuple = ()
    _spline: object = field(default=None, init=False, repr=False, compare=False)

    def __post_init__(self):
        func = "RotationalEnergy"
        I0 = float(self.I0_kg_m2)
        if not (np.isfinite(I0) and I0 > 0):
            raise _err("I0_kg_m2", f"a moment of inertia > 0, got {self.I0_kg_m2!r}", func)
        if len(self.omega2_nodes) != len(self.I_nodes_kg_m2):
            raise _err("I_nodes_kg_m2", "one value per node of omega2_nodes", func)
        if len(self.omega2_nodes):
            u = np.asarray(self.omega2_nodes, dtype=float)
            I = np.asarray(self.I_nodes_kg_m2, dtype=float)
            if len(u) < 2 or u[0] != 0.0 or np.any(np.diff(u) <= 0) or not np.all(np.isfinite(u)):
                raise _err("omega2_nodes", "at least 2 increasing nodes starting at 0", func)
            if not np.all(np.isfinite(I)) or np.any(I <= 0):
                raise _err("I_nodes_kg_m2", "moments of inertia > 0", func)
            from scipy.interpolate import CubicSpline

            spl = CubicSpline(u, I, bc_type="natural")
            object.__setattr__(self, "_spline", (spl, spl.derivative(), spl.antiderivative()))
            # L = I w must grow with w: d(I w)/dw = I + 2 u dI/du > 0
            uu = np.linspace(0.0, u[-1], 257)
            if np.any(spl(uu) + 2.0 * uu * spl(uu, 1) <= 0):
                raise PhysicsError("I_nodes_kg_m2", "the stretched moment of inertia grows so fast that L(w) is not monotonic")

    @property
    def stretched(self) -> bool:
        return self._spline is not None

    def _I_dI_J(self, u):
        """I(u), dI/du and int_0^u I for u = w^2 >= 0 (arrays)."""
        u = np.asarray(u, dtype=float)
        if self._spline is None:
            I0 = float(self.I0_kg_m2)
            return np.full(u.shape, I0), np.zeros(u.shape), I0 * u
        spl, d1, anti = self._spline
        u_top = float(self.omega2_nodes[-1])
        inside = u <= u_top
        ui = np.minimum(u, u_top)
        I = spl(ui)
        dI = d1(ui)
        J = anti(ui) - anti(0.0)
        x = np.where(inside, 0.0, u - u_top)
        # linear continuation beyond the table
        I = I + dI * x
        J = J + spl(u_top) * x + 0.5 * d1(u_top) * x * x
        return I, dI, J

    def moment_of_inertia(self, omega) -> np.ndarray:
        """I at rotation rate ``omega`` (rad/s), kg m^2."""
        return self._I_dI_J(np.asarray(omega, dtype=float) ** 2)[0]

    def dynamic_moment_of_inertia(self, omega) -> np.ndarray:
        """``d(I w)/dw = hbar^2 / E_rot''(L)`` at rotation rate ``omega``, kg m^2."""
        u = np.asarray(omega, dtype=float) ** 2
        I, dI, _J = self._I_dI_J(u)
        return I + 2.0 * u * dI

    def L_of_omega(self, omega) -> np.ndarray:
        """``I(w) w / hbar``: the angular momentum of the crystal rotating at ``w``."""
        w = np.asarray(omega, dtype=float)
        return self.moment_of_inertia(w) * w / HBAR

    def omega_of_L(self, L) -> np.ndarray:
        """Rotation rate ``w`` (rad/s) with ``I(w) w = hbar L`` (Newton's method)."""
        L = np.asarray(L, dtype=float)
        y = HBAR * np.abs(L)
        w = y / float(self.I0_kg_m2)
        if self._spline is not None:
            for _ in range(40):
                I, dI, _J = self._I_dI_J(w * w)
                f = I * w - y
                step = f / (I + 2.0 * w * w * dI)
                w = w - step
                if np.all(np.abs(step) <= 1e-15 * np.maximum(w, 1e-300)):
                    break
        return np.sign(L) * w

    def energy_j(self, L) -> np.ndarray:
        """``E_rot(L)``, J (``L`` real or integer, units of hbar)."""
        L = np.asarray(L, dtype=float)
        if self._spline is None:
            return HBAR**2 * L * L / (2.0 * float(self.I0_kg_m2))
        w = self.omega_of_L(L)
        u = w * w
        I, _dI, J = self._I_dI_J(u)
        return I * u - 0.5 * J


@dataclass(frozen=True)
class PinningComponent:
    """One Fourier component ``Re[a e^{i k u}]`` of the pinning energy.

    ``u = phi - theta(t)`` is the crystal's angle relative to the pinning
    pattern; ``a = m_term(t)^power * A(f_rot(t))`` with ``m_term`` the
    schedule's multiplier of pinning term ``term``.

    Parameters
    ----------
    order : int
        ``k`` (>= 1).
    amplitude_j : complex or tuple of complex
        ``A`` in J at full configured strength; one value, or one per node
        of ``f_nodes_hz`` (interpolated linearly in ``|f_rot|``, held beyond
        the ends).
    f_nodes_hz : tuple of float, optional
        Increasing rotation frequencies of the table.
    term : int
        Index of the schedule's pinning multiplier.
    power : int
        Power of the multiplier (1: first order in the pinning strength).
    """

    order: int
    amplitude_j: object
    f_nodes_hz: tuple = ()
    term: int = 0
    power: int = 1

    def __post_init__(self):
        func = "PinningComponent"
        _int(self.order, "order", func, 1)
        _int(self.term, "term", func, 0)
        _int(self.power, "power", func, 1)
        a = np.atleast_1d(np.asarray(self.amplitude_j, dtype=complex))
        if not np.all(np.isfinite(a)):
            raise _err("amplitude_j", "finite amplitudes in J", func)
        if len(self.f_nodes_hz):
            f = np.asarray(self.f_nodes_hz, dtype=float)
            if len(f) != len(a) or np.any(np.diff(f) <= 0) or np.any(f < 0):
                raise _err("f_nodes_hz", "increasing frequencies >= 0, one per amplitude", func)
        elif len(a) != 1:
            raise _err("amplitude_j", "one amplitude, or one per node of f_nodes_hz", func)

    def amplitude(self, f_hz) -> np.ndarray:
        """``A(f_rot)`` (complex, J) at full strength."""
        a = np.atleast_1d(np.asarray(self.amplitude_j, dtype=complex))
        f = np.abs(np.asarray(f_hz, dtype=float))
        if len(a) == 1:
            return np.full(f.shape, a[0])
        nodes = np.asarray(self.f_nodes_hz, dtype=float)
        return np.interp(f, nodes, a.real) + 1j * np.interp(f, nodes, a.imag)


@dataclass(frozen=True)
class KickChannel:
    """Random kicks of ``+quanta`` or ``-quanta``, each at ``rate_per_s(t)``.

    The rate per direction ``gamma = D / quanta^2`` (D in hbar^2/s) is
    constant on each interval ``[t_nodes_s[i], t_nodes_s[i + 1])``.
    """

    quanta: int
    t_nodes_s: tuple
    rate_per_s: tuple
    label: str = ""

    def __post_init__(self):
        func = "KickChannel"
        _int(self.quanta, "quanta", func, 1)
        t = np.asarray(self.t_nodes_s, dtype=float)
        r = np.asarray(self.rate_per_s, dtype=float)
        if len(t) < 2 or np.any(np.diff(t) <= 0) or len(r) != len(t) - 1:
            raise _err("rate_per_s", "one rate per interval of increasing t_nodes_s", func)
        if not np.all(np.isfinite(r)) or np.any(r < 0):
            raise _err("rate_per_s", "finite rates >= 0 (1/s)", func)

    @property
    def is_zero(self) -> bool:
        return not np.any(np.asarray(self.rate_per_s) > 0)


@dataclass(frozen=True)
class RotorModel:
    """The rotor of the module docstring: ladder, energy, schedule, pinning, kicks."""

    ladder: Ladder
    energy: RotationalEnergy
    schedule: object
    pinning: tuple = ()
    kicks: tuple = ()

    def __post_init__(self):
        func = "RotorModel"
        s = self.ladder.spacing
        n_terms = len(self.schedule.stages[0].pinning) if self.schedule.stages else 0
        for i, c in enumerate(self.pinning):
            if c.order % s:
                raise _err(f"pinning[{i}].order", f"a multiple of the ladder spacing {s} (order {c.order} "
                           "would couple allowed to forbidden L)", func)
            if c.term >= n_terms:
                raise _err(f"pinning[{i}].term", f"a pinning term of the schedule (it has {n_terms})", func)
        for i, k in enumerate(self.kicks):
            if k.quanta % s:
                raise _err(f"kicks[{i}].quanta", f"a multiple of the ladder spacing {s}", func)

    @property
    def orders(self) -> np.ndarray:
        return np.array(sorted({c.order for c in self.pinning}), dtype=np.int64)

    def amplitudes(self, t) -> np.ndarray:
        """Complex amplitudes ``a_k(t)`` (J), shape ``t.shape + (len(orders),)``."""
        t = np.asarray(t, dtype=float)
        orders = list(self.orders)
        out = np.zeros(t.shape + (len(orders),), dtype=complex)
        if not orders:
            return out
        f = self.schedule.f_rot_hz(t)
        for c in self.pinning:
            m = self.schedule.pinning_scale(t, c.term)
            out[..., orders.index(c.order)] += m**c.power * c.amplitude(f)
        return out

    def omega_frame(self, t) -> np.ndarray:
        return TWO_PI * self.schedule.f_rot_hz(np.asarray(t, dtype=float))

    def L_centre(self, t) -> np.ndarray:
        """Co-rotating angular momentum ``I Omega / hbar`` at time ``t``."""
        return self.energy.L_of_omega(self.omega_frame(t))

    def well_frequency(self, t) -> np.ndarray:
        """``sqrt(sum_k k^2 |a_k| / I)`` (rad/s): bounds the libration frequency."""
        a = np.abs(self.amplitudes(t))
        k2 = self.orders.astype(float) ** 2
        I = self.energy.moment_of_inertia(self.omega_frame(t))
        return np.sqrt(np.sum(a * k2, axis=-1) / I) if len(k2) else np.zeros(np.shape(t))


@dataclass(frozen=True)
class ThermalState:
    """Boltzmann-weighted eigenstates of the pinned rotor ``H'(0)``.

    ``beta_per_j = 1 / (k_B T)``; ``math.inf`` for the ground state. Levels
    are added until the left-out Boltzmann weight is below ``cut``.
    """

    beta_per_j: float
    cut: float = 1e-4

    def __post_init__(self):
        b = float(self.beta_per_j)
        if not (b > 0):
            raise _err("beta_per_j", f"1/(k_B T) > 0 (inf for the ground state), got {self.beta_per_j!r}",
                       "ThermalState")
        if not (0 < float(self.cut) < 0.5):
            raise _err("cut", f"a weight in (0, 0.5), got {self.cut!r}", "ThermalState")


@dataclass(frozen=True)
class PureState:
    """A superposition ``sum_L c_L |L>`` (normalised on use); allowed ``L`` only."""

    L: tuple
    amplitudes: tuple


# --------------------------------------------------------------------------
# results
# --------------------------------------------------------------------------
@dataclass(frozen=True)
class Levels:
    """Lowest eigenstates of ``H'(t)`` in an angular-momentum window.

    ``energies_j``: rotating-frame energies (``E_rot(L) - hbar Omega L + V``),
    ascending; ``L``: the window (int64); ``vectors``: ``(n, M)`` rows.
    """

    energies_j: np.ndarray
    L: np.ndarray
    vectors: np.ndarray


@dataclass(frozen=True)
class Distribution:
    """``P(L)`` at one time, with its mean and spread (hbar).

    Errors are standard errors over the noise records (0 without noise:
    the result is then deterministic up to the step error).
    """

    name: str
    t_s: float
    L: np.ndarray
    P: np.ndarray
    mean_hbar: float
    std_hbar: float
    mean_err_hbar: float = 0.0
    std_err_hbar: float = 0.0

    @property
    def mean_abs_hbar(self) -> float:
        return float(np.sum(self.P * np.abs(self.L)))

    def to_dict(self, p_min: float = 1e-12) -> dict:
        keep = self.P >= p_min
        return {"name": self.name, "t_s": self.t_s, "L_mean_hbar": self.mean_hbar,
                "L_mean_err_hbar": self.mean_err_hbar, "L_std_hbar": self.std_hbar,
                "L_std_err_hbar": self.std_err_hbar, "L_mean_abs_hbar": self.mean_abs_hbar,
                "L": [int(x) for x in self.L[keep]], "P": [float(x) for x in self.P[keep]],
                "P_listed_above": p_min}


@dataclass(frozen=True)
class StateSnapshot:
    """Laboratory-frame state columns at ``t_s``: ``coefficients[col, j]`` on ``L[j]``.

    The density matrix is ``sum_col weights[col] |c_col><c_col|``.
    """

    t_s: float
    L: np.ndarray
    coefficients: np.ndarray
    weights: np.ndarray
    records: np.ndarray


@dataclass(frozen=True)
class Evolution:
    """What :func:`evolve` returns."""

    distributions: tuple
    states: tuple
    numerics: dict

    def distribution(self, name: str) -> Distribution:
        for d in self.distributions:
            if d.name == name:
                return d
        raise KeyError(name)

    @property
    def final(self) -> Distribution:
        return self.distributions[-1]


# --------------------------------------------------------------------------
# eigenstates of the pinned rotor
# --------------------------------------------------------------------------
def _band(model: RotorModel, t: float, L: np.ndarray):
    """Lower band form of ``H'(t)`` on the window ``L`` and its diagonal reference."""
    s = model.ladder.spacing
    a = model.amplitudes(np.array(t))
    orders = model.orders
    omega = float(model.omega_frame(t))
    diag = model.energy.energy_j(L) - HBAR * omega * L.astype(float)
    ref = float(np.min(diag))
    nb = int(orders.max() // s) if len(orders) else 0
    band = np.zeros((nb + 1, len(L)), dtype=complex)
    band[0] = diag - ref
    for k, ak in zip(orders, a):
        d = int(k // s)
        # <L + k| Re[a e^{i k phi}] |L> = a / 2
        band[d, : len(L) - d] += 0.5 * ak
    return band, ref


def levels(model: RotorModel, t_s: float = 0.0, n: int = 1, *, half_width: int | None = None) -> Levels:
    """The ``n`` lowest eigenstates of the rotating-frame ``H'(t_s)``.

    The window is centred on the co-rotating ``L`` and widened until the
    highest requested state has amplitude below 1e-10 in the window's outer
    ladder points (scipy.linalg.eig_banded on the banded Hermitian matrix).

    Parameters
    ----------
    model : RotorModel
    t_s : float
        Time, s.
    n : int
        Number of levels (>= 1).
    half_width : int, optional
        Initial half width of the window in ladder points.
    """
    from scipy.linalg import eig_banded

    n = _int(n, "n", "levels", 1)
    s = model.ladder.spacing
    I = float(model.energy.moment_of_inertia(model.omega_frame(t_s)))
    vpp = 2.0 * float(np.sum(np.abs(model.amplitudes(np.array(t_s)))))
    j_c = model.ladder.nearest_index(float(model.L_centre(t_s)))
    if half_width is None:
        # harmonic estimate of the n-th level's energy above the well bottom,
        # at most the barrier; above it the levels are those of a free rotor
        w_well = float(model.well_frequency(t_s))
        e_n = min(1.5 * HBAR * w_well * (n + 1), vpp)
        half_width = int(math.ceil(1.2 * math.sqrt(2.0 * I * e_n) / HBAR / s)) + n // 2 + _MIN_MARGIN
    h = max(int(half_width), n + 4)
    while True:
        j = np.arange(j_c - h, j_c + h + 1)
        L = model.ladder.value(j)
        band, ref = _band(model, t_s, L)
        w, v = eig_banded(band, lower=True, select="i", select_range=(0, n - 1))
        v = v.T
        edge = max(float(np.max(np.abs(v[:, :4]) ** 2)), float(np.max(np.abs(v[:, -4:]) ** 2)))
        if edge < 1e-20:
            return Levels(w + ref, L, v)
        h = int(h * 1.6) + 8
        if 2 * h + 1 > _MAX_WINDOW:
            raise PhysicsError("initial", "the pinned rotor's levels need more than "
                               f"{_MAX_WINDOW} angular-momentum states (well too deep for the quantum model)")


def _thermal_columns(model: RotorModel, st: ThermalState):
    """Eigenvectors and Boltzmann weights of the initial thermal state."""
    beta = float(st.beta_per_j)
    if math.isinf(beta):
        lv = levels(model, 0.0, 1)
        return lv, np.ones(1), 0.0
    # harmonic estimate of the number of levels: weights exp(-beta hbar w k)
    w_well = float(model.well_frequency(0.0))
    x = beta * HBAR * w_well if w_well > 0 else 0.0
    n_try = 8
    if x > 0:
        n_try = max(n_try, int(math.ceil(-math.log(st.cut) / x)) + 8)
    while True:
        lv = levels(model, 0.0, n_try)
        e = lv.energies_j - lv.energies_j[0]
        logw = -beta * e
        w = np.exp(logw - logw.max())
        z = w.sum()
        # tail beyond the computed levels: continue the last decade of levels
        # geometrically (their ratio over the last quarter of the levels)
        q = max(n_try // 4, 1)
        ratio = float(np.exp(-beta * (e[-1] - e[-1 - q]) / q)) if n_try > q else 1.0
        tail = w[-1] * ratio / (1.0 - ratio) if ratio < 1.0 else np.inf
        if tail / z < 0.1 * st.cut:
            break
        if n_try > 20000:
            raise PhysicsError("initial", "the thermal state needs more than 20000 rotor levels "
                               "(temperature too high for the quantum model)")
        n_try = int(n_try * 1.6) + 8
    # keep the lowest K levels whose left-out weight (incl. the tail) is below cut
    cum_out = (np.cumsum(w[::-1])[::-1] + tail) / (z + tail)      # weight of levels >= k
    K = int(np.argmax(np.r_[cum_out[1:], tail / (z + tail)] <= st.cut)) + 1
    dropped = float(cum_out[K]) if K < len(w) else float(tail / (z + tail))
    p = w[:K] / w[:K].sum()
    return Levels(lv.energies_j[:K], lv.L, lv.vectors[:K]), p, dropped


# --------------------------------------------------------------------------
# the window that follows the state
# --------------------------------------------------------------------------
class _Window:
    """State columns ``c[col, j]`` on ``L = ladder.value(j_lo + j)`` (rotating frame)."""

    def __init__(self, model: RotorModel, j_lo: int, c: np.ndarray, weights: np.ndarray):
        self.model = model
        self.j_lo = int(j_lo)
        self.c = np.ascontiguousarray(c, dtype=complex)
        self.weights = weights
        self.discarded = 0.0
        self.max_M = self.c.shape[1]
        self._refresh()

    @property
    def M(self) -> int:
        return self.c.shape[1]

    def _refresh(self):
        s = self.model.ladder.spacing
        self.L = self.model.ladder.value(self.j_lo + np.arange(self.M))
        self.Lf = self.L.astype(float)
        self.Eh = self.model.energy.energy_j(self.Lf) / HBAR            # rad/s
        phi = TWO_PI * np.arange(self.M) / (s * self.M)
        k = self.model.orders.astype(float)
        self.cos = np.cos(np.outer(k, phi))
        self.sin = np.sin(np.outer(k, phi))
        self.max_M = max(self.max_M, self.M)

    def support(self):
        """First and last index of the state's support: outside it every
        column has less than SUPPORT_FLOOR of weight on either side."""
        p = np.abs(self.c) ** 2
        left = np.cumsum(p, axis=1)
        right = np.cumsum(p[:, ::-1], axis=1)
        lo = int(np.min(np.argmax(left > SUPPORT_FLOOR, axis=1)))
        hi = self.M - 1 - int(np.min(np.argmax(right > SUPPORT_FLOOR, axis=1)))
        if hi < lo:
            raise PhysicsError("initial", "the rotor state has no weight left (internal error)")
        return lo, hi

    def moments(self):
        """Mean and standard deviation of L over the mixture."""
        P = self.weights @ (np.abs(self.c) ** 2)
        P = P / P.sum()
        ref = float(self.Lf[self.M // 2])
        d = self.Lf - ref
        mean = float(P @ d)
        return mean + ref, float(np.sqrt(max(P @ (d - mean) ** 2, 0.0)))

    def place(self, j_lo_new: int, M_new: int):
        """Move the window to ``[j_lo_new, j_lo_new + M_new)``; weight outside is discarded."""
        if j_lo_new == self.j_lo and M_new == self.M:
            return
        new = np.zeros((self.c.shape[0], M_new), dtype=complex)
        a = max(self.j_lo, j_lo_new)
        b = min(self.j_lo + self.M, j_lo_new + M_new)
        total = self.weights @ np.sum(np.abs(self.c) ** 2, axis=1)
        if b > a:
            new[:, a - j_lo_new: b - j_lo_new] = self.c[:, a - self.j_lo: b - self.j_lo]
        kept = self.weights @ np.sum(np.abs(new) ** 2, axis=1)
        self.discarded += max(float(total - kept), 0.0)
        self.c, self.j_lo = new, int(j_lo_new)
        self._refresh()

    def fit(self, drift: float = 0.0, extra: int = 0):
        """Recentre / resize so that the state has empty margins that also
        hold a drift of ``drift`` ladder points (signed) and ``extra`` more."""
        from scipy.fft import next_fast_len

        lo, hi = self.support()
        width = hi - lo + 1
        margin = max(_MIN_MARGIN, int(math.ceil(0.1 * width))) + int(math.ceil(abs(drift))) + int(extra)
        need = width + 2 * margin
        M = self.M
        if need > M or M > 2 * need:
            M = next_fast_len(int(math.ceil(1.15 * need)))
        if M > _MAX_WINDOW:
            raise PhysicsError("stage", f"the rotor state spreads over more than {_MAX_WINDOW} "
                               "angular-momentum states")
        if M != self.M or lo < margin or self.M - 1 - hi < margin:
            centre = self.j_lo + 0.5 * (lo + hi) + 0.5 * drift
            self.place(int(round(centre - 0.5 * (M - 1))), M)
        return margin

    def shift_column(self, col: int, quanta: int):
        """Kick column ``col`` by ``quanta`` (a multiple of the spacing), widening the window if needed."""
        m = int(quanta // self.model.ladder.spacing)
        p = np.abs(self.c[col]) ** 2
        lo = int(np.argmax(np.cumsum(p) > SUPPORT_FLOOR))
        hi = self.M - 1 - int(np.argmax(np.cumsum(p[::-1]) > SUPPORT_FLOOR))
        if lo + m < _MIN_MARGIN or hi + m > self.M - 1 - _MIN_MARGIN:
            self.fit(extra=abs(m))
        self.shift_row(col, quanta)

    def shift_row(self, col: int, quanta: int):
        """Kick column ``col`` by ``quanta`` inside the window (weight pushed out is discarded and counted)."""
        m = int(quanta // self.model.ladder.spacing)
        row = self.c[col]
        w = float(self.weights[col])
        if m > 0:
            self.discarded += w * float(np.sum(np.abs(row[-m:]) ** 2))
            row[m:] = row[:-m].copy()
            row[:m] = 0.0
        elif m < 0:
            self.discarded += w * float(np.sum(np.abs(row[:-m]) ** 2))
            row[:m] = row[-m:].copy()
            row[m:] = 0.0

    def phase(self, t1, t2, th1, th2):
        """``exp(-i int_t1^t2 T / hbar)`` on the window: E_rot dt - hbar L dtheta."""
        return np.exp(-1j * (self.Eh * (t2 - t1) - self.Lf * (th2 - th1)))

    def lab(self, theta: float) -> np.ndarray:
        """Laboratory-frame coefficients ``c_L = e^{-i L theta} c'_L``."""
        return self.c * np.exp(-1j * self.Lf * theta)[None, :]


# --------------------------------------------------------------------------
# noise records
# --------------------------------------------------------------------------
def _kick_times(ch: KickChannel, rng: np.random.Generator):
    """Poisson times of total rate ``2 gamma(t)`` and their signs."""
    t = np.asarray(ch.t_nodes_s, dtype=float)
    r = 2.0 * np.asarray(ch.rate_per_s, dtype=float)
    lam = np.r_[0.0, np.cumsum(r * np.diff(t))]
    total = lam[-1]
    if total <= 0:
        return np.zeros(0), np.zeros(0, dtype=np.int64)
    draws = []
    acc = 0.0
    while True:
        n = int(total - acc + 5.0 * math.sqrt(total - acc + 1.0) + 8)
        e = np.cumsum(rng.standard_exponential(n)) + acc
        draws.append(e)
        acc = float(e[-1])
        if acc > total:
            break
    hits = np.concatenate(draws)
    hits = hits[hits < total]
    i = np.clip(np.searchsorted(lam, hits, side="right") - 1, 0, len(r) - 1)
    times = t[i] + (hits - lam[i]) / np.where(r[i] > 0, r[i], 1.0)
    signs = np.where(rng.integers(0, 2, size=hits.size) == 1, 1, -1)
    return times, signs.astype(np.int64)


def _events(model: RotorModel, keys, seed: int):
    """All kicks of all columns, sorted by time: arrays (t, col, quanta)."""
    ts, cols, qs = [], [], []
    for col, (r, k) in enumerate(keys):
        for ci, ch in enumerate(model.kicks):
            if ch.is_zero:
                continue
            rng = np.random.Generator(np.random.PCG64DXSM(np.random.SeedSequence(seed, spawn_key=(r, k, ci))))
            t, sg = _kick_times(ch, rng)
            ts.append(t)
            cols.append(np.full(t.size, col, dtype=np.int64))
            qs.append(sg * ch.quanta)
    if not ts:
        return np.zeros(0), np.zeros(0, dtype=np.int64), np.zeros(0, dtype=np.int64)
    t, c, q = np.concatenate(ts), np.concatenate(cols), np.concatenate(qs)
    order = np.lexsort((c, t))
    return t[order], c[order], q[order]


# --------------------------------------------------------------------------
# propagation
# --------------------------------------------------------------------------
def _block(W: _Window, t_a: float, t_b: float, n: int, sched, I_d: float, kicks=None) -> None:
    """``n`` equal fourth-order steps (module docstring) from ``t_a`` to ``t_b``.

    ``kicks = (times, columns, quanta)`` in ``(t_a, t_b]``: each is applied at
    its exact time inside the diagonal (exactly integrated) factor that
    contains it, so the kicks cost no extra steps.
    """
    from scipy.fft import fft, ifft

    b = np.linspace(t_a, t_b, n + 1)
    h = (t_b - t_a) / n
    m = b[:-1] + 0.5 * h
    # potential factors: V(b_0) h/6, V~(m_0) 2h/3, V(b_1) h/3, ..., V~(m_{n-1}) 2h/3, V(b_n) h/6
    tv = np.empty(2 * n + 1)
    tv[0::2], tv[1::2] = b, m
    a = W.model.amplitudes(tv)                                            # (2n + 1, nk)
    V = a.real @ W.cos - a.imag @ W.sin                                   # J on the angle grid
    k = W.model.orders.astype(float)
    dV = -(a.real * k) @ W.sin - (a.imag * k) @ W.cos                     # dV/dphi
    V[1::2] -= (h * h / (48.0 * I_d)) * dV[1::2] ** 2
    wts = np.full(2 * n + 1, h / 3.0)
    wts[1::2] = 2.0 * h / 3.0
    wts[0] = wts[-1] = h / 6.0
    vexp = np.exp((-1j / HBAR) * V * wts[:, None])
    th = sched.theta_rad(tv)
    tph = np.exp(-1j * (np.outer(np.diff(tv), W.Eh) - np.outer(np.diff(th), W.Lf)))  # (2n, M)
    if kicks is not None and kicks[0].size:
        kt, kc, kq = kicks
        kth = sched.theta_rad(kt)
        stage_of = np.clip(np.searchsorted(tv, kt, side="left") - 1, 0, 2 * n - 1)
    else:
        stage_of = None
    c = W.c
    for i in range(2 * n + 1):
        c = fft(ifft(c, axis=-1, overwrite_x=True) * vexp[i], axis=-1, overwrite_x=True)
        if i == 2 * n:
            break
        hit = np.nonzero(stage_of == i)[0] if stage_of is not None else ()
        if len(hit) == 0:
            c *= tph[i]
            continue
        W.c = c
        t_cur, th_cur = {}, {}
        for e in hit:                                   # in time order
            col = int(kc[e])
            t0, h0 = t_cur.get(col, tv[i]), th_cur.get(col, th[i])
            c[col] *= W.phase(t0, kt[e], h0, kth[e])
            W.shift_row(col, int(kq[e]))
            t_cur[col], th_cur[col] = kt[e], kth[e]
        rest = np.setdiff1d(np.arange(c.shape[0]), list(t_cur))
        c[rest] *= tph[i]
        for col, t0 in t_cur.items():
            c[col] *= W.phase(t0, tv[i + 1], th_cur[col], th[i + 1])
    W.c = c


def _excursion(cols, quanta, spacing: int) -> int:
    """Largest displacement (ladder points) any column reaches through its kicks."""
    out = 0
    for col in np.unique(cols):
        path = np.cumsum(quanta[cols == col]) // spacing
        out = max(out, int(np.max(np.abs(path))))
    return out


def harmonic_frequency_error(w_h):
    """Relative frequency error ``w~ / w - 1`` of one step on a harmonic well.

    The step of the module docstring applied to ``H = p^2 / 2 + w^2 x^2 / 2``
    is a linear map (kick, drift, modified kick, drift, kick); ``cos(w~ h)``
    is half its trace. ``= -(w h)^4 / 4320 + O(h^6)``; ``nan`` where the
    map is unstable (``w h`` above about 3.5).
    """
    x = np.asarray(w_h, dtype=float)
    # kick(t, k) = [[1, 0], [-t k, 1]], drift(t) = [[1, t], [0, 1]] with w = 1
    def mat(x):
        kick = lambda t, k: np.array([[1.0, 0.0], [-t * k, 1.0]])  # noqa: E731
        drift = lambda t: np.array([[1.0, t], [0.0, 1.0]])           # noqa: E731
        return (kick(x / 6, 1.0) @ drift(x / 2) @ kick(2 * x / 3, 1.0 - x * x / 24)
                @ drift(x / 2) @ kick(x / 6, 1.0))
    out = np.empty(x.shape)
    for i, xi in np.ndenumerate(x):
        c = 0.5 * np.trace(mat(float(xi)))
        out[i] = math.acos(c) / xi - 1.0 if (abs(c) <= 1.0 and xi > 0) else (0.0 if xi == 0 else math.nan)
    return float(out) if out.ndim == 0 else out


def _step_product(tol: float) -> float:
    """``w h`` at which the harmonic frequency error reaches ``tol``."""
    from scipy.optimize import brentq

    return float(brentq(lambda x: abs(harmonic_frequency_error(x)) - tol, 1e-3, 3.4, xtol=1e-12))


def _distribution(name: str, t: float, W: _Window, records: np.ndarray, R: int) -> Distribution:
    p_cols = np.abs(W.c) ** 2
    P = W.weights @ p_cols
    tot = float(P.sum())
    P = P / tot
    nz = np.nonzero(P > 0)[0]
    lo, hi = (nz[0], nz[-1] + 1) if nz.size else (0, 1)
    L = W.L[lo:hi]
    P = P[lo:hi]
    L0 = float(L[len(L) // 2])
    dl = L.astype(float) - L0
    mean = float(np.sum(P * dl))
    std = float(np.sqrt(max(np.sum(P * (dl - mean) ** 2), 0.0)))
    me = se = 0.0
    if R > 1:
        ms, ss = [], []
        for r in range(R):
            sel = records == r
            Pr = (W.weights[sel] @ p_cols[sel])[lo:hi]
            Pr = Pr / Pr.sum()
            mr = float(np.sum(Pr * dl))
            ms.append(mr)
            ss.append(float(np.sqrt(max(np.sum(Pr * (dl - mr) ** 2), 0.0))))
        me = float(np.std(ms, ddof=1) / math.sqrt(R))
        se = float(np.std(ss, ddof=1) / math.sqrt(R))
    return Distribution(name, float(t), L.copy(), P, mean + L0, std, me, se)


def evolve(model: RotorModel, initial, *, tol: float = 1e-3, records: int | None = None, seed: int = 0,
           times_s=(), keep_states: bool = False, progress=None, max_columns: int = 512) -> Evolution:
    """Propagate the rotor through its schedule.

    Parameters
    ----------
    model : RotorModel
    initial : ThermalState or PureState
        The state at t = 0 (a thermal state of ``H'(0)``, or a superposition).
    tol : float
        Bound on the relative frequency error of the splitting (module
        docstring), in (0, 0.01]; the error of P(L) scales with it.
    records : int, optional
        Noise records per initial eigenstate (default 4 with noise, 1
        without); with 2 or more the distributions carry standard errors.
    seed : int
        Seed of the kick records (>= 0).
    times_s : sequence of float
        Extra times at which to keep the state (with ``keep_states``) or a
        distribution named ``"t=<time>"``.
    keep_states : bool
        Keep laboratory-frame state snapshots at ``times_s`` and at every
        stage end.
    progress : callable, optional
        ``progress(t_s)`` after each block.
    max_columns : int
        Refuse (PhysicsError) when the thermal levels times the noise
        records exceed this: a hot libration is the semiclassical
        ensemble's regime, and the cost grows with the number of columns.

    Returns
    -------
    Evolution
        Distributions at t = 0 (``"initial"``), at every stage end (stage
        names) and at ``times_s``; state snapshots; numerics (steps, window,
        columns, thermal levels, weights left out, wall and CPU time).
    """
    func = "evolve"
    t_wall, t_cpu = time.perf_counter(), time.process_time()
    tol = float(tol)
    if not (0.0 < tol <= 0.01):
        raise _err("tol", f"a relative frequency error in (0, 0.01], got {tol!r}", func)
    seed = _int(seed, "seed", func, 0)
    sched = model.schedule
    bounds = sched.boundaries_s
    t_end = float(bounds[-1])
    extra_t = sorted({float(x) for x in times_s})
    if any(not (0.0 <= x <= t_end) for x in extra_t):
        raise _err("times_s", f"times within the schedule [0, {t_end:g}] s", func)
    noisy = any(not k.is_zero for k in model.kicks)
    R = (4 if noisy else 1) if records is None else _int(records, "records", func, 1)
    if not noisy:
        R = 1

    # -- initial columns
    dropped = 0.0
    if isinstance(initial, ThermalState):
        lv, p, dropped = _thermal_columns(model, initial)
        L0, vecs = lv.L, lv.vectors
    elif isinstance(initial, PureState):
        Ls = np.asarray(initial.L, dtype=np.int64)
        amps = np.asarray(initial.amplitudes, dtype=complex)
        if Ls.size == 0 or Ls.shape != amps.shape or not np.all(model.ladder.allows(Ls)):
            raise _err("initial.L", f"allowed L values (L = {model.ladder.offset} mod {model.ladder.spacing}), "
                       "one amplitude each", func)
        nrm = float(np.sqrt(np.sum(np.abs(amps) ** 2)))
        if not nrm > 0:
            raise _err("initial.amplitudes", "a nonzero state", func)
        s = model.ladder.spacing
        j = (Ls - model.ladder.offset) // s
        j0 = int(j.min()) - _MIN_MARGIN
        L0 = model.ladder.value(np.arange(j0, int(j.max()) + _MIN_MARGIN + 1))
        vecs = np.zeros((1, L0.size), dtype=complex)
        np.add.at(vecs[0], j - j0, amps / nrm)
        p = np.ones(1)
    else:
        raise _err("initial", "a ThermalState or a PureState", func)
    K = vecs.shape[0]
    if K * R > max_columns:
        raise PhysicsError("initial", f"the thermal state needs {K} rotor levels x {R} noise records = {K * R} "
                           f"state columns, more than {max_columns}: too hot for the quantum model to be quick "
                           "(the ensemble is the semiclassical answer there); lower the temperature or the "
                           "records, or allow more columns")
    keys = [(r, k) for r in range(R) for k in range(K)]
    c0 = np.tile(vecs, (R, 1))
    weights = np.tile(p, R) / R
    recs = np.repeat(np.arange(R), K)
    j_lo = int((int(L0[0]) - model.ladder.offset) // model.ladder.spacing)
    W = _Window(model, j_lo, c0, weights)

    ev_t, ev_col, ev_q = _events(model, keys, seed)
    n_steps = n_blocks = 0
    dt_min, dt_max = math.inf, 0.0
    dists = [_distribution("initial", 0.0, W, recs, R)]
    states = []

    def snapshot(name, t):
        dists.append(_distribution(name, t, W, recs, R))
        if keep_states:
            states.append(StateSnapshot(float(t), W.L.copy(), W.lab(float(sched.theta_rad(t))),
                                        W.weights.copy(), recs.copy()))

    wh = _step_product(tol)             # w_char h for a relative frequency error tol
    kmax = float(model.orders.max()) if len(model.orders) else 0.0
    for si, stage in enumerate(sched.stages):
        ta, tb = float(bounds[si]), float(bounds[si + 1])
        grid = np.linspace(ta, tb, 257)
        amps = model.amplitudes(grid)
        free = not np.any(amps != 0)
        stops = sorted({x for x in extra_t if ta < x < tb})
        sel = (ev_t > ta) & (ev_t <= tb)
        st_t, st_col, st_q = ev_t[sel], ev_col[sel], ev_q[sel]
        if free:
            # exact: diagonal phases between kicks, per column
            seg = [ta] + stops + [tb]
            for s0, s1 in zip(seg[:-1], seg[1:]):
                th0, th1 = (float(x) for x in sched.theta_rad(np.array([s0, s1])))
                in_seg = (st_t > s0) & (st_t <= s1)
                kicked = np.unique(st_col[in_seg])
                quiet = np.setdiff1d(np.arange(W.c.shape[0]), kicked)
                if quiet.size:
                    W.c[quiet] *= W.phase(s0, s1, th0, th1)
                for col in kicked:
                    tprev, thprev = s0, th0
                    for te, q in zip(st_t[in_seg & (st_col == col)], st_q[in_seg & (st_col == col)]):
                        the = float(sched.theta_rad(te))
                        W.c[col] *= W.phase(tprev, te, thprev, the)
                        W.shift_column(int(col), int(q))
                        tprev, thprev = float(te), the
                    W.c[col] *= W.phase(tprev, s1, thprev, th1)
                if s1 < tb:
                    snapshot(f"t={s1:.9g}", s1)
            snapshot(stage.name, tb)
            continue
        w_ramp = math.pi / (tb - ta) if np.ptp(np.abs(amps), axis=0).max() > 0 else 0.0
        I_stage = float(np.min(model.energy.moment_of_inertia(model.omega_frame(grid))))
        t = ta
        while t < tb:
            # step from the state's spread and the potential over the next block
            lo, hi = W.support()
            Lc = float(model.L_centre(t))
            mean, std = W.moments()
            w_move = kmax * HBAR * (abs(mean - Lc) + 4.0 * std + 0.5 * kmax) / I_stage
            w0 = max(float(model.well_frequency(t)), w_move, w_ramp, 1e-300)
            span = min(tb - t, _BLOCK_STEPS * wh / w0)
            probe = t + span * np.linspace(0.0, 1.0, 9)
            w_char = max(float(np.max(model.well_frequency(probe))), w_move, w_ramp, 1e-300)
            dt = wh / w_char
            t_e = min(tb, t + _BLOCK_STEPS * dt)
            for x in stops:
                if t < x < t_e:
                    t_e = x
            # a block lets the co-rotating L drift by at most a tenth of the state's width
            drift = (float(model.L_centre(t_e)) - Lc) / model.ladder.spacing
            while abs(drift) > max(0.1 * (hi - lo + 1), _MIN_MARGIN) and t_e - t > 4 * dt:
                t_e = t + 0.5 * (t_e - t)
                drift = (float(model.L_centre(t_e)) - Lc) / model.ladder.spacing
            inb = (st_t > t) & (st_t <= t_e)
            W.fit(drift=drift, extra=_excursion(st_col[inb], st_q[inb], model.ladder.spacing))
            n = max(1, int(math.ceil((t_e - t) / dt - 1e-9)))
            w_c = float(model.omega_frame(t))
            I_d = float(model.energy.dynamic_moment_of_inertia(w_c))
            _block(W, t, t_e, n, sched, I_d, (st_t[inb], st_col[inb], st_q[inb]))
            n_steps += n
            n_blocks += 1
            dt_min, dt_max = min(dt_min, (t_e - t) / n), max(dt_max, (t_e - t) / n)
            t = t_e
            if t in stops and t < tb:
                snapshot(f"t={t:.9g}", t)
            if progress is not None:
                progress(t)
        snapshot(stage.name, tb)

    numerics = {
        "tol": tol, "steps": n_steps, "blocks": n_blocks,
        "dt_min_s": dt_min if n_steps else 0.0, "dt_max_s": dt_max,
        "window_max": int(W.max_M), "columns": int(W.c.shape[0]), "levels": int(K), "records": int(R),
        "thermal_weight_left_out": float(dropped), "window_weight_discarded": float(W.discarded),
        "kicks": int(ev_t.size), "wall_s": time.perf_counter() - t_wall, "cpu_s": time.process_time() - t_cpu,
    }
    return Evolution(tuple(dists), tuple(states), numerics)


# --------------------------------------------------------------------------
# lines
# --------------------------------------------------------------------------
def sideband_lines(model: RotorModel, dist: Distribution, dL: int, *, p_min: float = 1e-4) -> dict:
    """Discrete rotational lines adding ``|dL|`` quanta in the sense of rotation.

    Each populated ``L`` gives a line ``L -> L + sign(L) |dL|`` (``L = 0``
    either way: the same frequency) at ``(E_rot(|L| + |dL|) - E_rot(|L|)) / h``,
    positive for either sense (``E_rot`` depends on ``|L|`` only), with weight
    ``P(L)``; for the rigid rotor this is ``|dL| |f_rot(L)| + dL^2 hbar / (4 pi I)``
    (:func:`mdrotor.physics.rotor.transition_frequencies_hz`, the convention of
    ``mdrotor rotor``). Adjacent allowed ``L`` give lines
    ``spacing |dL| hbar / (2 pi I_d)`` apart.

    Returns
    -------
    dict
        ``dL`` (signed: ``-|dL|`` when the mean ``L`` is negative), ``L`` and
        ``freq_hz`` and ``weight`` of the lines with ``P >= p_min``, the
        weighted centre and rms width (over all lines), and the spacing
        between adjacent lines at the centre.
    """
    dL = _int(dL, "dL", "sideband_lines")
    if dL == 0 or dL % model.ladder.spacing:
        raise _err("dL", f"a nonzero multiple of the ladder spacing {model.ladder.spacing}", "sideband_lines")
    k = abs(dL)
    e = model.energy.energy_j
    A = np.abs(dist.L.astype(float))
    f = (e(A + k) - e(A)) / (TWO_PI * HBAR)
    centre = float(np.sum(dist.P * f))
    width = float(np.sqrt(max(np.sum(dist.P * (f - centre) ** 2), 0.0)))
    Lm = abs(float(np.round(dist.mean_hbar)))
    s = model.ladder.spacing
    spacing = float(((e(Lm + s + k) - e(Lm + s)) - (e(Lm + k) - e(Lm))) / (TWO_PI * HBAR))
    keep = dist.P >= p_min
    return {"dL": -k if dist.mean_hbar < 0 else k, "L": dist.L[keep].astype(int).tolist(), "freq_hz": f[keep].tolist(),
            "weight": dist.P[keep].tolist(), "centre_hz": centre, "width_hz": width,
            "line_spacing_hz": spacing, "weight_listed": float(np.sum(dist.P[keep]))}
