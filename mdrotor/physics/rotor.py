"""Quantum-rotor quantities of a freely rotating planar ion crystal.

The crystal, once released from the pinning field, is treated as a rigid
planar rotor with moment of inertia ``I`` about the trap axis. Conventions
used throughout (SI inside, cyclic frequency in Hz at the boundary):

* angular momentum ``L`` in units of hbar (integer for the bare rotor),
  angle ``phi`` conjugate to it;
* energy ``E_L = hbar^2 L^2 / (2 I)`` (free planar rigid rotor, textbook);
* the crystal's rotation frequency ``f_rot = hbar L / (2 pi I)``, so
  ``L = 2 pi I f_rot / hbar`` (not necessarily an integer when ``f_rot``
  is a mean over trajectories);
* a transition ``L -> L + k`` has cyclic frequency
  ``(E_{L+k} - E_L) / h = (2 L k + k^2) hbar / (4 pi I)
  = k f_rot + k^2 hbar / (4 pi I)``.

Two branches of the rotor that differ by ``k`` quanta rotate relative to one
another at the angular velocity ``k hbar / I``. This sets the exchange time
(relative rotation ``2 pi / N``: the branches of an N-fold symmetric crystal
of identical ions are then related by a cyclic permutation of the ions) and
the revival time (relative rotation ``2 pi``).

Spin statistics: a turn by ``2 pi / N`` that maps the crystal onto itself
permutes its identical ions in cycles of ``N``; an N-cycle is a product of
N - 1 transpositions, so its sign is ``(-1)^(N-1)`` (elementary group
theory). For identical fermions it multiplies the state by that sign, for
identical bosons by ``+1``. With the rotor factor ``e^{i L phi}`` picking up
``e^{2 pi i L / N}`` this restricts ``L`` to a ladder. The crystal's own
symmetry decides ``N`` (a centred ring, a string through the axis or a
crystal of unlike ions is not ``C_N`` of its ion count):
:func:`allowed_L_ladder` takes the crystal and is the one owner of the
rule.
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import NamedTuple

import numpy as np

from mdrotor.errors import InputError
from mdrotor.physics import frame
from mdrotor.physics.constants import HBAR
from mdrotor.physics.frame import AXIS_REL

__all__ = [
    "hbar_over_I_hz",
    "L_from_f_rot",
    "transition_frequencies_hz",
    "TransitionLines",
    "exchange_time_s",
    "revival_time_s",
    "allowed_L_ladder",
    "ExchangeLadder",
    "crystal_symmetry",
    "statistics_of",
]

_SRC = "mdrotor.physics.rotor"


# --------------------------------------------------------------------------
# input checks (user-facing: InputError, never assert)
# --------------------------------------------------------------------------
def _positive(value, key: str, func: str) -> np.ndarray:
    arr = np.asarray(value, dtype=float)
    if not np.all(np.isfinite(arr)) or np.any(arr <= 0):
        raise InputError(key, f"a finite number > 0, got {value!r}", f"{_SRC}.{func}")
    return arr


def _integer(value, key: str, func: str, *, minimum: int | None = None,
             nonzero: bool = False) -> np.ndarray:
    arr = np.asarray(value)
    try:
        as_float = arr.astype(float)
    except (TypeError, ValueError):
        raise InputError(key, f"an integer, got {value!r}", f"{_SRC}.{func}") from None
    if not np.all(np.isfinite(as_float)) or np.any(as_float != np.round(as_float)):
        raise InputError(key, f"an integer, got {value!r}", f"{_SRC}.{func}")
    ints = np.round(as_float).astype(np.int64)
    if minimum is not None and np.any(ints < minimum):
        raise InputError(key, f"an integer >= {minimum}, got {value!r}", f"{_SRC}.{func}")
    if nonzero and np.any(ints == 0):
        raise InputError(key, f"a nonzero integer, got {value!r}", f"{_SRC}.{func}")
    return ints


def _out(x):
    """Return a Python float for 0-d results, the array otherwise."""
    x = np.asarray(x)
    return float(x) if x.ndim == 0 else x


# --------------------------------------------------------------------------
# spectrum
# --------------------------------------------------------------------------
def hbar_over_I_hz(I_kg_m2):
    """Rotational quantum ``hbar / (2 pi I)`` as a cyclic frequency.

    It is the change of the rotation frequency per quantum of angular
    momentum, ``d f_rot / d L``, and twice the quadratic term of the
    ``Delta L = 1`` transition frequency.

    Parameters
    ----------
    I_kg_m2 : float or array_like
        Moment of inertia about the rotation axis, kg m^2 (> 0).

    Returns
    -------
    float or ndarray
        ``hbar / (2 pi I)`` in Hz.
    """
    I = _positive(I_kg_m2, "I_kg_m2", "hbar_over_I_hz")
    return _out(HBAR / (2.0 * np.pi * I))


def L_from_f_rot(f_rot_hz, I_kg_m2):
    """Angular momentum ``L = 2 pi I f_rot / hbar`` in units of hbar.

    Parameters
    ----------
    f_rot_hz : float or array_like
        Rotation frequency, Hz (sign gives the sense of rotation).
    I_kg_m2 : float or array_like
        Moment of inertia, kg m^2 (> 0).

    Returns
    -------
    float or ndarray
        ``L`` in units of hbar (real; the quantum number is its nearest
        allowed integer).
    """
    I = _positive(I_kg_m2, "I_kg_m2", "L_from_f_rot")
    f = np.asarray(f_rot_hz, dtype=float)
    if not np.all(np.isfinite(f)):
        raise InputError("f_rot_hz", f"a finite frequency, got {f_rot_hz!r}",
                         f"{_SRC}.L_from_f_rot")
    return _out(2.0 * np.pi * I * f / HBAR)


class TransitionLines(NamedTuple):
    """Rotational lines ``L -> L + k`` for ``k = 1 .. k_max``.

    Attributes
    ----------
    k : ndarray of int
        Change of angular momentum, quanta.
    centre_hz : ndarray
        Line centre ``k f_rot + k^2 hbar / (4 pi I)``, Hz.
    width_hz : ndarray
        Standard deviation of the line frequency over the ensemble's
        spread of ``L``: ``k hbar sigma_L / (2 pi I)``, Hz.
    """

    k: np.ndarray
    centre_hz: np.ndarray
    width_hz: np.ndarray


def transition_frequencies_hz(f_rot_hz: float, I_kg_m2: float, k_max: int,
                              sigma_L_hbar: float = 0.0, *, k_values=None) -> TransitionLines:
    """Frequencies and widths of the rotational transitions ``L -> L + k``.

    With ``E_L = hbar^2 L^2 / (2 I)`` and ``L = 2 pi I f_rot / hbar`` the
    transition ``L -> L + k`` (absorption of ``k`` quanta in the sense of
    rotation when ``f_rot > 0``) lies at

    ``f_k = (E_{L+k} - E_L) / h = (2 L k + k^2) hbar / (4 pi I)
    = k f_rot + k^2 hbar / (4 pi I)``.

    The line is linear in ``L`` with slope ``k hbar / (2 pi I)``, so an
    ensemble with standard deviation ``sigma_L`` (quanta) gives a line whose
    frequency has standard deviation ``k hbar sigma_L / (2 pi I)``
    (inhomogeneous width; no lifetime broadening is included).

    Parameters
    ----------
    f_rot_hz : float
        Mean rotation frequency, Hz.
    I_kg_m2 : float
        Moment of inertia (including centrifugal stretch), kg m^2.
    k_max : int
        Largest ``Delta L`` (>= 1).
    sigma_L_hbar : float, optional
        Standard deviation of ``L`` over the ensemble, in hbar (>= 0).
    k_values : sequence of int, optional
        The ``Delta L`` to list (each >= 1) instead of ``1 .. k_max``.

    Returns
    -------
    TransitionLines
        ``(k, centre_hz, width_hz)``, arrays of length ``k_max``.
    """
    func = "transition_frequencies_hz"
    I = float(_positive(I_kg_m2, "I_kg_m2", func))
    f = float(np.asarray(f_rot_hz, dtype=float))
    if not np.isfinite(f):
        raise InputError("f_rot_hz", f"a finite frequency, got {f_rot_hz!r}", f"{_SRC}.{func}")
    kmax = int(_integer(k_max, "k_max", func, minimum=1))
    sig = float(np.asarray(sigma_L_hbar, dtype=float))
    if not np.isfinite(sig) or sig < 0:
        raise InputError("sigma_L_hbar", f"a finite number >= 0, got {sigma_L_hbar!r}",
                         f"{_SRC}.{func}")
    k = (np.arange(1, kmax + 1) if k_values is None else
         _integer(k_values, "k_values", func, minimum=1).astype(float))
    quantum_hz = hbar_over_I_hz(I)                 # d f_rot / d L
    centre = k * f + 0.5 * k**2 * quantum_hz       # k f_rot + k^2 hbar/(4 pi I)
    width = k * quantum_hz * sig
    return TransitionLines(k, centre, width)


# --------------------------------------------------------------------------
# exchange and revival
# --------------------------------------------------------------------------
def exchange_time_s(I_kg_m2, k, N):
    """Time for two branches differing by ``k`` quanta to turn by ``2 pi / N``.

    The branches rotate relative to each other at ``k hbar / I`` (the
    difference of the angular velocities ``hbar L / I``), so

    ``t_exchange = (2 pi / N) / (|k| hbar / I) = 2 pi I / (N |k| hbar)``.

    For a regular N-ion crystal this is the time after which the two
    branches differ by a cyclic permutation of the ions.

    Parameters
    ----------
    I_kg_m2 : float or array_like
        Moment of inertia, kg m^2 (> 0).
    k : int or array_like of int
        Difference of angular momentum between the branches, quanta
        (nonzero; the sign is irrelevant).
    N : int or array_like of int
        Symmetry order of the crystal (number of ions of a regular polygon),
        >= 1.

    Returns
    -------
    float or ndarray
        Exchange time, s.
    """
    func = "exchange_time_s"
    I = _positive(I_kg_m2, "I_kg_m2", func)
    kk = _integer(k, "k", func, nonzero=True)
    n = _integer(N, "N", func, minimum=1)
    return _out(2.0 * np.pi * I / (n * np.abs(kk) * HBAR))


def revival_time_s(I_kg_m2, k):
    """Time for two branches differing by ``k`` quanta to turn by ``2 pi``.

    ``t_revival = 2 pi I / (|k| hbar)``: the relative orientation of the two
    branches repeats. Equal to :func:`exchange_time_s` with ``N = 1``.

    Parameters
    ----------
    I_kg_m2 : float or array_like
        Moment of inertia, kg m^2 (> 0).
    k : int or array_like of int
        Difference of angular momentum between the branches, quanta (nonzero).

    Returns
    -------
    float or ndarray
        Revival time, s.
    """
    func = "revival_time_s"
    I = _positive(I_kg_m2, "I_kg_m2", func)
    kk = _integer(k, "k", func, nonzero=True)
    return _out(2.0 * np.pi * I / (np.abs(kk) * HBAR))


# --------------------------------------------------------------------------
# spin statistics
# --------------------------------------------------------------------------
SYMMETRY_REL = 1e-6      # positions equal within this fraction of the crystal's radius


@dataclass(frozen=True)
class ExchangeLadder:
    """The allowed angular momenta of a crystal: ``L = residue mod modulus``.

    Attributes
    ----------
    modulus, residue : int
        Allowed ``L`` satisfy ``L % modulus == residue`` (``(1, 0)``: every
        integer).
    symmetry_order : int
        The largest ``N`` such that a turn by ``2 pi / N`` about the axis
        through the centre of mass maps every ion onto an ion of the same
        species (1: no such turn).
    cycles : int
        Cycles of ``N`` ions of the permutation that turn makes (ions on
        the axis are fixed points and not counted).
    cycle_species : tuple of str
        The species of each cycle.
    statistics : str
        The sign of that permutation for identical particles: "boson"
        (symmetric, +1), "fermion" (antisymmetric, -1), "distinguishable"
        (no symmetry turn) or "unknown" (a species in a cycle has unknown
        statistics: no restriction).
    """

    modulus: int
    residue: int
    symmetry_order: int
    cycles: int
    cycle_species: tuple
    statistics: str

    def allows(self, L) -> np.ndarray:
        """True where the integer ``L`` is on the ladder."""
        return (np.asarray(L, dtype=np.int64) - self.residue) % self.modulus == 0

    def to_dict(self) -> dict:
        return {"allowed_L_mod": self.modulus, "allowed_L_residue": self.residue,
                "symmetry_order": self.symmetry_order, "symmetry_cycles": self.cycles,
                "exchange_statistics": self.statistics}


def crystal_symmetry(positions_m, species) -> tuple[int, list]:
    """Rotational symmetry of a crystal about the axis through its centre of mass.

    Returns ``(N, cycles)``: the largest ``N`` such that a turn by
    ``2 pi / N`` maps every ion onto an ion of the same species (positions
    equal within ``SYMMETRY_REL`` of the crystal's radius, ``z`` included),
    and the cycles of the permutation it makes as lists of ion indices (ions
    on the axis, within :data:`mdrotor.physics.frame.AXIS_REL` of the radius, are
    fixed points and left out). ``(1, [])`` if there is no such turn.

    Parameters
    ----------
    positions_m : array_like, shape (n, 3)
        Ion positions, m.
    species : sequence of :class:`mdrotor.physics.species.Species`
        One per ion (``name``, ``mass_kg``).
    """

    r = np.asarray(positions_m, dtype=float)
    if r.ndim != 2 or r.shape[1] != 3 or len(species) != r.shape[0]:
        raise InputError("positions_m", f"an (n, 3) array with one species per ion, got shape {r.shape} and "
                         f"{len(species)} species", f"{_SRC}.crystal_symmetry")
    m = np.array([s.mass_kg for s in species], dtype=float)
    names = [s.name for s in species]
    z, zz = frame.complex_xy(r, m), r[:, 2]
    scale = float(np.max(np.abs(z))) if len(z) else 0.0
    if not scale > 0.0:
        return 1, []
    tol = SYMMETRY_REL * scale
    off = np.nonzero(np.abs(z) > AXIS_REL * scale)[0]
    for N in range(len(off), 1, -1):
        if len(off) % N:
            continue
        zr = z * np.exp(2j * np.pi / N)
        image = {}
        for i in off:
            d = np.abs(z[off] - zr[i]) + np.abs(zz[off] - zz[i])
            j = int(off[int(np.argmin(d))])
            if d.min() > tol or names[j] != names[i]:
                break
            image[int(i)] = j
        else:
            if len(set(image.values())) != len(off):
                continue
            seen, cycles = set(), []
            for i in off:
                k, cyc = int(i), []
                while k not in seen:
                    seen.add(k)
                    cyc.append(k)
                    k = image[k]
                if cyc:
                    cycles.append(cyc)
            return N, cycles
    return 1, []


def allowed_L_ladder(positions_m, species) -> ExchangeLadder:
    """The exchange-allowed ``L`` of a crystal (the one owner of the rule).

    A turn by ``2 pi / N`` that maps the crystal onto itself
    (:func:`crystal_symmetry`) is a permutation of its identical ions:
    ``c`` cycles of ``N`` ions (ions on the axis stay). An ``N``-cycle is a
    product of ``N - 1`` transpositions, so for identical fermions it has the
    sign ``(-1)^(N-1)``, for bosons ``+1``; the whole turn has the product of
    its cycles' signs. The rotor factor ``e^{i L phi}`` acquires
    ``e^{2 pi i L / N}`` under the turn, and the state of identical
    particles must acquire that sign (the rule that restricts the rotational
    levels of molecules with identical nuclei: Landau and Lifshitz, Quantum
    Mechanics, 3rd ed., §86 for diatomic and §105 for symmetric-top
    molecules, from memory). Hence

    * symmetric turn (sign +1): ``L = 0 mod N``;
    * antisymmetric turn (sign -1, only for even ``N``): ``L = N/2 mod N``.

    Examples: two identical fermions (40Ca+), sign -1, odd ``L``; a
    triangle of them, a 3-cycle of sign +1, ``L = 0 mod 3``; a square,
    ``L = 2 mod 4``; five on a ring around a sixth on the axis, ``L = 0 mod
    5``; a string of three through the axis, a transposition, odd ``L``;
    unlike ions (40Ca+ beside 44Ca+), no symmetry turn, every ``L``.

    This assumes every other degree of freedom (internal states, nuclear
    spins, the differential vibrational modes) is in a state symmetric under
    the permutation, e.g. all ions of a species in the same internal state
    and the differential modes in their ground state; otherwise no
    restriction follows from symmetry. A species of unknown statistics in a
    cycle gives no restriction either (``statistics == "unknown"``).

    Parameters
    ----------
    positions_m : array_like, shape (n, 3)
        The crystal's ion positions, m (its equilibrium without pinning: the
        free rotor's symmetry).
    species : sequence of :class:`mdrotor.physics.species.Species`
        One per ion (``name``, ``mass_kg``, ``statistics``).

    Returns
    -------
    ExchangeLadder
    """
    N, cycles = crystal_symmetry(positions_m, species)
    kinds = tuple(species[c[0]].name for c in cycles)
    if N == 1:
        return ExchangeLadder(1, 0, 1, 0, (), "distinguishable")
    stats = [species[c[0]].statistics for c in cycles]
    if any(s not in ("boson", "fermion") for s in stats):
        return ExchangeLadder(1, 0, N, len(cycles), kinds, "unknown")
    n_odd = sum(1 for s in stats if s == "fermion") * (N - 1)
    if n_odd % 2:                               # antisymmetric: e^{2 pi i L / N} = -1
        return ExchangeLadder(N, N // 2, N, len(cycles), kinds, "fermion")
    return ExchangeLadder(N, 0, N, len(cycles), kinds, "boson")


def statistics_of(mass_number: int, atomic_number: int, charge: int) -> str:
    """Exchange statistics of an atomic ion from its constituents.

    A composite particle with an odd number of fermionic constituents is a
    fermion, with an even number a boson (common practice, no source). The
    constituents counted are the nucleons (``mass_number``) and the
    electrons (``atomic_number - charge``).

    Parameters
    ----------
    mass_number : int
        Number of nucleons A (>= 1).
    atomic_number : int
        Number of protons Z (1 <= Z <= A).
    charge : int
        Charge state in units of e (``+1`` for a singly charged cation);
        at most Z.

    Returns
    -------
    {"boson", "fermion"}

    Examples
    --------
    >>> statistics_of(40, 20, 1)     # 40Ca+: 40 nucleons + 19 electrons
    'fermion'
    >>> statistics_of(9, 4, 1)       # 9Be+: 9 + 3
    'boson'
    """
    func = "statistics_of"
    A = int(_integer(mass_number, "mass_number", func, minimum=1))
    Z = int(_integer(atomic_number, "atomic_number", func, minimum=1))
    q = int(_integer(charge, "charge", func))
    if Z > A:
        raise InputError("atomic_number", f"at most the mass number {A}, got {Z}",
                         f"{_SRC}.{func}")
    if q > Z:
        raise InputError("charge", f"at most the atomic number {Z}, got {q}",
                         f"{_SRC}.{func}")
    n_electrons = Z - q
    return "fermion" if (A + n_electrons) % 2 else "boson"
