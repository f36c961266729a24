"""Ion species: masses, charges and exchange statistics.

An ion is named ``"<A><Symbol><charge>"``: ``"40Ca+"``, ``"88Sr+"``,
``"40Ca2+"`` (also written ``"40Ca++"``). Its mass is the mass of the *ion*,

    m_ion = m_atom - charge * m_e,

with m_atom the atomic mass from the Atomic Mass Evaluation 2020 (AME2020:
W.J. Huang et al., Chin. Phys. C 45, 030002 (2021); M. Wang et al., Chin.
Phys. C 45, 030003 (2021)) and m_e the electron mass (CODATA, through
``scipy.constants``). Electron binding energies (a few eV, < 1e-8 u) are
neglected.

Whether a composite ion is a boson or a fermion follows from the parity of
its number of fermionic constituents, protons + neutrons + electrons
= A + Z - charge: odd is a fermion, even a boson (common practice, no
source). This decides the sign picked up when identical ions are exchanged,
e.g. by rotating a regular N-ion crystal by 2 pi / N.

Units: masses in kg (``mass_kg``) and unified atomic mass units
(``mass_u``), charge in units of the elementary charge e (``charge``) or
coulombs (``charge_c``), nuclear spin in units of hbar.
"""

from __future__ import annotations

import math
import re
from dataclasses import dataclass

from scipy.constants import e as _E_C
from scipy.constants import physical_constants as _PC

from mdrotor.errors import InputError
from mdrotor.physics.rotor import statistics_of

__all__ = [
    "Species",
    "get_species",
    "custom_species",
    "known_species",
    "CoolingLine",
    "cooling_line",
    "ELECTRON_MASS_U",
    "ATOMIC_MASS_CONSTANT_KG",
]

#: Electron mass in u (CODATA via scipy.constants).
ELECTRON_MASS_U: float = _PC["electron mass in u"][0]
#: Atomic mass constant m_u = 1 u in kg (CODATA via scipy.constants).
ATOMIC_MASS_CONSTANT_KG: float = _PC["atomic mass constant"][0]

STATISTICS = ("boson", "fermion", "unknown")

# Isotopes used in ion traps: (mass number A, symbol, atomic number Z,
# atomic mass in u (neutral atom), nuclear ground-state spin I in hbar).
# Masses: AME2020 (W.J. Huang et al., Chin. Phys. C 45, 030002 (2021);
# M. Wang et al., Chin. Phys. C 45, 030003 (2021)).
# from memory (AME2020), cross-checked against periodictable in
# tests/physics/test_species.py. The Yb masses recalled from memory were older
# evaluations, off by up to 1.7e-6 u; they were corrected to the AME2020
# values as printed by periodictable 2.1.0 (which carries AME2020).
# Nuclear spins: from memory; tests/physics/test_species.py checks them against the
# pairing rule (even-even nuclei have I = 0, odd-A nuclei half-integer I).
_TABLE: tuple[tuple[int, str, int, float, float], ...] = (
    (6, "Li", 3, 6.0151228874, 1.0),
    (7, "Li", 3, 7.0160034366, 1.5),
    (9, "Be", 4, 9.012183065, 1.5),
    (23, "Na", 11, 22.9897692820, 1.5),
    (24, "Mg", 12, 23.985041697, 0.0),
    (25, "Mg", 12, 24.985836976, 2.5),
    (26, "Mg", 12, 25.982592968, 0.0),
    (27, "Al", 13, 26.981538408, 2.5),
    (40, "Ca", 20, 39.962590863, 0.0),
    (42, "Ca", 20, 41.95861783, 0.0),
    (43, "Ca", 20, 42.95876644, 3.5),
    (44, "Ca", 20, 43.95548156, 0.0),
    (48, "Ca", 20, 47.95252276, 0.0),
    (84, "Sr", 38, 83.9134191, 0.0),
    (86, "Sr", 38, 85.9092606, 0.0),
    (87, "Sr", 38, 86.9088775, 4.5),
    (88, "Sr", 38, 87.9056125, 0.0),
    (111, "Cd", 48, 110.90418287, 0.5),
    (113, "Cd", 48, 112.90440813, 0.5),
    (114, "Cd", 48, 113.90336509, 0.0),
    (115, "In", 49, 114.903878776, 4.5),
    (133, "Ba", 56, 132.9060074, 0.5),  # radioactive, half-life ~10.5 y
    (134, "Ba", 56, 133.90450818, 0.0),
    (135, "Ba", 56, 134.90568838, 1.5),
    (136, "Ba", 56, 135.90457573, 0.0),
    (137, "Ba", 56, 136.90582714, 1.5),
    (138, "Ba", 56, 137.90524700, 0.0),
    (171, "Yb", 70, 170.936331515, 0.5),
    (172, "Yb", 70, 171.936386654, 0.0),
    (173, "Yb", 70, 172.938216212, 2.5),
    (174, "Yb", 70, 173.938867546, 0.0),
    (176, "Yb", 70, 175.942574706, 0.0),
    (199, "Hg", 80, 198.96828064, 0.5),
    (200, "Hg", 80, 199.96832659, 0.0),
    (202, "Hg", 80, 201.97064340, 0.0),
)

# Doppler-cooling transitions of the singly charged ions, by element:
# (vacuum wavelength in m, natural linewidth Gamma / 2 pi in Hz, transition).
# from memory: check against the NIST Atomic Spectra Database
# (A. Kramida, Yu. Ralchenko, J. Reader and NIST ASD Team, https://physics.nist.gov/asd),
# wavelengths in vacuum, linewidths 1 / (2 pi tau) of the upper level's lifetime tau.
# The two-level model takes the total decay rate of the upper level; decays
# into metastable D (Ca+, Sr+, Ba+) or F/D (Yb+) levels are assumed closed by
# repumping beams, which the simulation does not model. Give
# laser.wavelength and laser.linewidth in the config for other lines.
_COOLING: dict[str, tuple[float, float, str]] = {
    "Be": (313.133e-9, 19.6e6, "2s 2S1/2 - 2p 2P3/2"),   # from memory
    "Mg": (279.635e-9, 41.8e6, "3s 2S1/2 - 3p 2P3/2"),   # from memory
    "Ca": (396.959e-9, 22.4e6, "4s 2S1/2 - 4p 2P1/2"),   # from memory
    "Sr": (421.671e-9, 21.5e6, "5s 2S1/2 - 5p 2P1/2"),   # from memory
    "Cd": (214.505e-9, 60.1e6, "5s 2S1/2 - 5p 2P3/2"),   # from memory
    "Ba": (493.545e-9, 20.1e6, "6s 2S1/2 - 6p 2P1/2"),   # from memory
    "Yb": (369.526e-9, 19.6e6, "6s 2S1/2 - 6p 2P1/2"),   # from memory
    "Hg": (194.227e-9, 70.0e6, "6s 2S1/2 - 6p 2P1/2"),   # from memory
}

_BY_KEY: dict[tuple[int, str], tuple[int, str, int, float, float]] = {
    (row[0], row[1]): row for row in _TABLE
}

# "40Ca+", "40Ca++", "40Ca2+" (a digit count goes with exactly one '+').
_NAME_RE = re.compile(r"^(?P<A>[1-9][0-9]{0,2})(?P<sym>[A-Z][a-z]?)"
                      r"(?:(?P<q>[1-9][0-9]?)\+|(?P<plus>\++))$")


@dataclass(frozen=True)
class Species:
    """One ion species.

    Parameters
    ----------
    name : str
        Canonical name, ``"40Ca+"``, ``"40Ca2+"``; free text for custom ions.
    symbol : str
        Element symbol (``"Ca"``), ``""`` for a custom ion.
    mass_number : int
        Nucleon number A; 0 if unknown (custom ion).
    atomic_number : int
        Proton number Z; 0 if unknown (custom ion).
    charge : int
        Charge state in units of the elementary charge e (1 for ``"Ca+"``).
    mass_kg : float
        Mass of the ion in kg (atomic mass minus ``charge`` electron masses).
    mass_u : float
        The same mass in unified atomic mass units u.
    nuclear_spin : float or None
        Nuclear ground-state spin I in units of hbar; None if unknown.
    statistics : str
        ``"boson"``, ``"fermion"`` or ``"unknown"``: exchange statistics of
        the whole ion (nucleons + electrons).
    """

    name: str
    symbol: str
    mass_number: int
    atomic_number: int
    charge: int
    mass_kg: float
    mass_u: float
    nuclear_spin: float | None
    statistics: str

    @property
    def charge_c(self) -> float:
        """Charge of the ion in coulombs (``charge`` x e)."""
        return self.charge * _E_C

    @property
    def electrons(self) -> int | None:
        """Number of bound electrons, Z - charge; None for a custom ion."""
        if self.atomic_number <= 0:
            return None
        return self.atomic_number - self.charge

    @property
    def is_fermion(self) -> bool | None:
        """True for a fermion, False for a boson, None if unknown."""
        if self.statistics == "unknown":
            return None
        return self.statistics == "fermion"


def _statistics_from_counts(mass_number: int, atomic_number: int, charge: int) -> str:
    """Exchange statistics by counting constituents: see
    :func:`mdrotor.physics.rotor.statistics_of` (the one place the rule lives)."""

    return statistics_of(mass_number, atomic_number, charge)


def _canonical_name(mass_number: int, symbol: str, charge: int) -> str:
    return f"{mass_number}{symbol}{'' if charge == 1 else charge}+"


def known_species() -> list[str]:
    """Names of the tabulated singly charged ions (``"40Ca+"``, ...).

    Higher charge states of the same isotopes are accepted by
    :func:`get_species` as ``"40Ca2+"`` or ``"40Ca++"``.

    Returns
    -------
    list of str
        In order of atomic number, then mass number.
    """
    return [_canonical_name(a, sym, 1) for a, sym, _, _, _ in _TABLE]


def get_species(name: str, *, key: str = "", source: str | None = None) -> Species:
    """Look up an ion by name.

    Parameters
    ----------
    name : str
        ``"<A><Symbol>+"`` for a singly charged ion (``"40Ca+"``,
        ``"171Yb+"``); higher charge states as ``"40Ca2+"`` or ``"40Ca++"``.
        Surrounding white space is ignored; case matters (``"Ca"``, not
        ``"CA"``).
    key, source : str, optional
        Config key path and file, used in the error message.

    Returns
    -------
    Species
        With the ion mass (atomic mass - charge x electron mass) in kg and u.

    Raises
    ------
    InputError
        For an unknown isotope, a malformed name, or a charge larger than Z.
    """
    if not isinstance(name, str):
        raise InputError(key, f"expected a species name such as '40Ca+', got {name!r}", source)
    text = name.strip()
    match = _NAME_RE.match(text)
    row = None
    if match is not None:
        row = _BY_KEY.get((int(match["A"]), match["sym"]))
    if row is None:
        raise InputError(
            key,
            f"unknown species {name!r}; expected a name like '40Ca+' or "
            f"'40Ca2+'; known: {', '.join(known_species())}",
            source,
        )
    charge = int(match["q"]) if match["q"] else len(match["plus"])
    mass_number, symbol, z, atom_u, spin = row
    if charge > z:
        raise InputError(
            key, f"species {name!r}: charge {charge}+ exceeds Z = {z} of {symbol}", source
        )
    mass_u = atom_u - charge * ELECTRON_MASS_U
    return Species(
        name=_canonical_name(mass_number, symbol, charge),
        symbol=symbol,
        mass_number=mass_number,
        atomic_number=z,
        charge=charge,
        mass_kg=mass_u * ATOMIC_MASS_CONSTANT_KG,
        mass_u=mass_u,
        nuclear_spin=spin,
        statistics=_statistics_from_counts(mass_number, z, charge),
    )


@dataclass(frozen=True)
class CoolingLine:
    """A Doppler-cooling transition: vacuum wavelength (m), natural linewidth
    Gamma / 2 pi (Hz) and the levels it joins."""

    wavelength_m: float
    linewidth_hz: float
    transition: str


def cooling_line(species: Species) -> CoolingLine | None:
    """The usual Doppler-cooling line of a singly charged tabulated ion, or
    None (custom ions, higher charge states, elements without an entry).

    One entry per element: isotope shifts (GHz) change the wavelength by
    about 1e-6 relative, which does not matter for the recoil; a beam's
    detuning is always counted from the addressed isotope's own resonance.
    Values from memory; see the table's comment for where to check them."""
    if species.charge != 1 or species.symbol not in _COOLING:
        return None
    lam, gam, text = _COOLING[species.symbol]
    return CoolingLine(lam, gam, text)


def custom_species(mass_kg: float, charge: int, name: str = "custom",
                   statistics: str | None = None, *, key: str = "",
                   source: str | None = None) -> Species:
    """A user-defined ion (molecular ion, isotope not in the table, ...).

    Parameters
    ----------
    mass_kg : float
        Mass of the ion in kg (already net of the missing electrons).
    charge : int
        Charge state in units of e; nonzero.
    name : str, optional
        Free-text label.
    statistics : {"boson", "fermion"} or None, optional
        Exchange statistics if known; None gives ``"unknown"``.
    key, source : str, optional
        Config key path and file, used in error messages.

    Returns
    -------
    Species
        With ``symbol=""``, ``mass_number=0``, ``atomic_number=0`` and
        ``nuclear_spin=None`` (unknown).

    Raises
    ------
    InputError
        For a non-positive or non-finite mass, a zero or non-integer charge,
        or an unknown statistics word.
    """
    if isinstance(mass_kg, bool) or not isinstance(mass_kg, (int, float)) \
            or not math.isfinite(mass_kg) or mass_kg <= 0:
        raise InputError(key, f"expected a positive finite mass in kg, got {mass_kg!r}", source)
    if isinstance(charge, bool) or not isinstance(charge, int) or charge == 0:
        raise InputError(key, f"expected a nonzero integer charge in units of e, got {charge!r}",
                         source)
    stats = "unknown" if statistics is None else statistics
    if stats not in STATISTICS:
        raise InputError(key, f"expected statistics 'boson', 'fermion' or none, got {statistics!r}",
                         source)
    return Species(
        name=str(name),
        symbol="",
        mass_number=0,
        atomic_number=0,
        charge=charge,
        mass_kg=float(mass_kg),
        mass_u=float(mass_kg) / ATOMIC_MASS_CONSTANT_KG,
        nuclear_spin=None,
        statistics=stats,
    )
