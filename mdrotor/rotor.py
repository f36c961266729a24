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

Spin statistics: a rotation of a regular N-ion crystal by ``2 pi / N`` is a
cyclic permutation of the N ions, an N-cycle; an N-cycle is a product of
N - 1 transpositions, so its sign is ``(-1)^(N-1)`` (elementary group
theory). For identical fermions it multiplies the state by
``(-1)^(N-1)``, for identical bosons by ``+1``. With the rotor factor
``e^{i L phi}`` picking up ``e^{2 pi i L / N}`` this restricts ``L`` to a
ladder, see :func:`allowed_L_ladder`.
"""

from __future__ import annotations

from typing import NamedTuple

import numpy as np
from scipy.constants import hbar

from .errors import InputError

__all__ = [
    "hbar_over_I_hz",
    "L_from_f_rot",
    "transition_frequencies_hz",
    "TransitionLines",
    "exchange_time_s",
    "revival_time_s",
    "allowed_L_ladder",
    "statistics_of",
]

_SRC = "mdrotor.rotor"


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
    return _out(hbar / (2.0 * np.pi * I))


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
    return _out(2.0 * np.pi * I * f / hbar)


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
                              sigma_L_hbar: float = 0.0) -> TransitionLines:
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
    k = np.arange(1, kmax + 1)
    quantum_hz = hbar / (2.0 * np.pi * I)          # d f_rot / d L
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
    return _out(2.0 * np.pi * I / (n * np.abs(kk) * hbar))


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
    return _out(2.0 * np.pi * I / (np.abs(kk) * hbar))


# --------------------------------------------------------------------------
# spin statistics
# --------------------------------------------------------------------------
_STATISTICS = ("boson", "fermion", "unknown")


def allowed_L_ladder(N: int, statistics: str, identical: bool = True) -> tuple[int, int]:
    """Allowed angular momenta of an N-fold symmetric crystal: ``L = residue mod modulus``.

    A rotation by ``2 pi / N`` maps a regular N-ion crystal onto itself with
    the ions cyclically permuted. The rotor factor ``e^{i L phi}`` acquires
    ``e^{2 pi i L / N}``; for identical ions this must equal the sign of the
    N-cycle under exchange, ``+1`` for bosons and ``(-1)^(N-1)`` for
    fermions. Hence

    * bosons: ``L = 0 mod N``;
    * fermions, N even: ``L = N/2 mod N``;
    * fermions, N odd: ``L = 0 mod N``.

    This assumes every other degree of freedom (internal states, nuclear
    spins, the differential vibrational modes) is in a state symmetric under
    the cyclic permutation, e.g. all ions in the same internal state and the
    differential modes in their ground state. Otherwise no restriction
    follows from symmetry and ``(1, 0)`` (every integer) is returned, as
    also for ``N = 1``, for ``statistics == "unknown"`` and for crystals of
    non-identical ions (``identical=False``: mixed species or isotopes).

    Parameters
    ----------
    N : int
        Number of ions of the regular polygon (symmetry order), >= 1.
    statistics : {"boson", "fermion", "unknown"}
        Exchange statistics of the ion species, see :func:`statistics_of`.
    identical : bool, optional
        False for a crystal of non-identical ions.

    Returns
    -------
    (modulus, residue) : tuple of int
        Allowed ``L`` satisfy ``L % modulus == residue``.
    """
    func = "allowed_L_ladder"
    n = int(_integer(N, "N", func, minimum=1))
    if statistics not in _STATISTICS:
        raise InputError("statistics", f"one of {', '.join(_STATISTICS)}, got {statistics!r}",
                         f"{_SRC}.{func}")
    if not identical or n == 1 or statistics == "unknown":
        return (1, 0)
    if statistics == "fermion" and n % 2 == 0:
        return (n, n // 2)
    return (n, 0)


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
