"""Ion species: table masses, ion masses, spin statistics, name parsing."""

from __future__ import annotations

import subprocess
import sys

import periodictable
import pytest
import scipy.constants as sc

from mdrotor.errors import InputError
from mdrotor.physics import species as species_module
from mdrotor.physics.species import Species, custom_species, get_species, known_species

TABLE = species_module._TABLE


@pytest.mark.parametrize("row", TABLE, ids=[f"{r[0]}{r[1]}" for r in TABLE])
def test_table_mass_matches_periodictable(row):
    """Every tabulated atomic mass agrees with periodictable's isotope mass.

    Source: AME2020 (W.J. Huang et al., Chin. Phys. C 45, 030002 (2021);
    M. Wang et al., Chin. Phys. C 45, 030003 (2021)), as carried by the
    periodictable package (its mass module cites AME2020).
    Tolerance 1e-6 u: a relative 1e-8 of the mass, far below anything the
    dynamics can resolve, yet a wrong digit beyond the sixth decimal place or
    a value from an older evaluation fails it.
    """
    mass_number, symbol, z, mass_u, _spin = row
    element = periodictable.elements.symbol(symbol)
    assert element.number == z  # periodictable's atomic number
    assert abs(mass_u - element[mass_number].mass) < 1e-6


@pytest.mark.parametrize("row", TABLE, ids=[f"{r[0]}{r[1]}" for r in TABLE])
def test_nuclear_spin_pairing_rule(row):
    """Nuclear ground-state spins obey the pairing rule: even-even nuclei have
    I = 0, odd-A nuclei half-integer I, odd-odd nuclei integer I > 0.
    # common practice, no source
    """
    mass_number, _symbol, z, _mass, spin = row
    neutrons = mass_number - z
    twice = 2 * spin
    assert twice == int(twice) and spin >= 0
    if mass_number % 2:
        assert int(twice) % 2 == 1
    elif z % 2 == 0 and neutrons % 2 == 0:
        assert spin == 0
    else:
        assert spin > 0 and int(twice) % 2 == 0


def test_required_isotopes_present():
    names = set(known_species())
    for name in ["9Be+", "24Mg+", "25Mg+", "26Mg+", "27Al+", "40Ca+", "42Ca+",
                 "43Ca+", "44Ca+", "48Ca+", "84Sr+", "86Sr+", "87Sr+", "88Sr+",
                 "133Ba+", "134Ba+", "135Ba+", "136Ba+", "137Ba+", "138Ba+",
                 "171Yb+", "172Yb+", "173Yb+", "174Yb+", "176Yb+", "111Cd+",
                 "113Cd+", "114Cd+", "115In+", "199Hg+", "200Hg+", "202Hg+",
                 "6Li+", "7Li+"]:
        assert name in names


def test_ion_mass_is_atomic_minus_electrons_by_hand():
    """40Ca+ and 40Ca2+: m_ion = m_atom - q m_e, computed here with
    scipy.constants' m_e / m_u (CODATA) and the AME2020 atomic mass of 40Ca,
    39.962590863 u (from memory; periodictable 2.1.0 lists 39.962590851).
    Tolerance 1e-12 u: the only difference between this route and the
    module's is the last-digit rounding of CODATA's tabulated m_e in u
    (~1e-20 u); 1e-12 u is still far below one electron mass (5.5e-4 u).
    """
    m_e_u = sc.m_e / sc.m_u
    atom_u = periodictable.elements.symbol("Ca")[40].mass
    single = get_species("40Ca+")
    double = get_species("40Ca2+")
    # read the module's own atomic mass back out through the ion mass:
    assert abs((single.mass_u + m_e_u) - atom_u) < 1e-6  # see table test
    assert abs(single.mass_u - (39.962590863 - 1 * m_e_u)) < 1e-12
    assert abs(double.mass_u - (39.962590863 - 2 * m_e_u)) < 1e-12
    # kg: mass_u x atomic mass constant (scipy.constants.atomic_mass = m_u);
    # relative tolerance 1e-14 covers double rounding of the product.
    assert single.mass_kg == pytest.approx(single.mass_u * sc.atomic_mass, rel=1e-14)
    # one electron mass apart (by hand: 9.1093837e-31 kg), to rounding of the
    # difference of two ~6.6e-26 kg numbers (1e-41 kg absolute):
    assert abs((single.mass_kg - double.mass_kg) - sc.m_e) < 1e-40


def test_charge_in_coulombs():
    # scipy.constants.e (CODATA, exact in the 2019 SI)
    assert get_species("40Ca+").charge_c == sc.e
    assert get_species("40Ca2+").charge_c == 2 * sc.e


@pytest.mark.parametrize(
    "name, protons, neutrons, electrons, statistics",
    [
        ("40Ca+", 20, 20, 19, "fermion"),   # 59, odd
        ("9Be+", 4, 5, 3, "boson"),         # 12, even
        ("88Sr+", 38, 50, 37, "fermion"),   # 125, odd
        ("171Yb+", 70, 101, 69, "boson"),   # 240, even
        ("43Ca+", 20, 23, 19, "boson"),     # 62, even
        ("40Ca2+", 20, 20, 18, "boson"),    # 58, even
        ("138Ba+", 56, 82, 55, "fermion"),  # 193, odd
        ("25Mg+", 12, 13, 11, "boson"),     # 36, even
    ],
)
def test_spin_statistics_hand_counts(name, protons, neutrons, electrons, statistics):
    """Composite-particle statistics from the parity of the number of
    fermionic constituents, counted by hand.
    # common practice, no source
    """
    sp = get_species(name)
    assert sp.atomic_number == protons
    assert sp.mass_number - sp.atomic_number == neutrons
    assert sp.electrons == electrons
    assert sp.statistics == statistics
    assert sp.is_fermion == (statistics == "fermion")


@pytest.mark.parametrize(
    "text, name, charge",
    [
        ("40Ca+", "40Ca+", 1),
        ("  40Ca+ ", "40Ca+", 1),
        ("40Ca++", "40Ca2+", 2),
        ("40Ca2+", "40Ca2+", 2),
        ("88Sr+", "88Sr+", 1),
        ("9Be+", "9Be+", 1),
        ("171Yb+", "171Yb+", 1),
        ("138Ba+", "138Ba+", 1),
        ("138Ba+++", "138Ba3+", 3),
    ],
)
def test_parsing_variants(text, name, charge):
    sp = get_species(text)
    assert isinstance(sp, Species)
    assert sp.name == name
    assert sp.charge == charge


def test_charge_notations_agree():
    assert get_species("40Ca++") == get_species("40Ca2+")


@pytest.mark.parametrize(
    "bad", ["Ca40+", "40Ca", "40ca+", "41Ca+", "40Ca2++", "40Ca0+", "", "Ca+", "40 Ca+"]
)
def test_bad_name_raises_input_error_naming_it(bad):
    with pytest.raises(InputError) as info:
        get_species(bad, key="species.ion", source="run.toml")
    message = str(info.value)
    assert message.startswith("run.toml: species.ion: ")
    assert f"unknown species {bad!r}" in message
    assert "40Ca+" in message  # the list of known names


def test_charge_above_z_refused():
    with pytest.raises(InputError) as info:
        get_species("9Be5+", key="species.ion")
    assert "9Be5+" in str(info.value) and "Z = 4" in str(info.value)


def test_non_string_refused():
    with pytest.raises(InputError, match="species name"):
        get_species(40, key="species.ion")


def test_custom_species():
    m = 30 * sc.atomic_mass
    sp = custom_species(m, 1, name="30 u test ion")
    assert sp.mass_kg == m
    assert sp.mass_u == pytest.approx(30.0, rel=1e-14)  # m / m_u, rounding only
    assert sp.statistics == "unknown" and sp.is_fermion is None
    assert sp.electrons is None and sp.nuclear_spin is None
    assert custom_species(m, 2, statistics="fermion").statistics == "fermion"


@pytest.mark.parametrize(
    "kwargs, word",
    [
        (dict(mass_kg=-1e-26, charge=1), "mass"),
        (dict(mass_kg=float("nan"), charge=1), "mass"),
        (dict(mass_kg=1e-26, charge=0), "charge"),
        (dict(mass_kg=1e-26, charge=1.5), "charge"),
        (dict(mass_kg=1e-26, charge=1, statistics="anyon"), "anyon"),
    ],
)
def test_custom_species_bad_input(kwargs, word):
    with pytest.raises(InputError) as info:
        custom_species(**kwargs, key="species.custom", source="run.toml")
    assert word in str(info.value)
    assert "species.custom" in str(info.value)


def test_package_does_not_import_periodictable():
    """periodictable is a test-only dependency."""
    code = ("import sys, mdrotor.physics.species; "
            "sys.exit(1 if 'periodictable' in sys.modules else 0)")
    assert subprocess.run([sys.executable, "-c", code]).returncode == 0
