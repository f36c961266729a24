"""Quantities with units (mdrotor.units) against scipy.constants and hand conversions."""

import math

import pytest
from scipy import constants as sc

from mdrotor import units
from mdrotor.errors import InputError


@pytest.mark.parametrize("text, dimension, si", [
    ("1.1 MHz", "frequency", 1.1e6),                    # SI prefix mega (scipy.constants.mega)
    ("250 kHz", "frequency", 250 * sc.kilo),
    ("2 ms", "time", 2 * sc.milli),
    ("30 ns", "time", 30 * sc.nano),
    ("5 um", "length", 5 * sc.micro),
    ("5 µm", "length", 5 * sc.micro),                   # the micro sign is read as u
    ("397 nm", "length", 397 * sc.nano),
    ("0.4 mK", "temperature", 0.4 * sc.milli),
    ("10 V", "voltage", 10.0),
    ("2 V/cm", "field", 200.0),                         # hand conversion: 1 / 0.01 m
    ("1e9 rad/s^2", "acceleration_angular", 1e9),
])
def test_parse_to_si(text, dimension, si):
    # relative 1e-15: a product of two decimal floats rounds by at most a few ulp
    assert units.parse(text, dimension) == pytest.approx(si, rel=1e-15, abs=0)


def test_atomic_mass_unit_against_codata():
    # 40 u in kg; scipy.constants (CODATA) against pint's own definition: the two may come
    # from different CODATA adjustments, which differ below 1e-9 relative
    assert units.parse("40 u", "mass") == pytest.approx(40 * sc.atomic_mass, rel=1e-9, abs=0)


def test_angles_in_radians():
    assert units.parse("30 deg", "angle") == pytest.approx(math.pi / 6, rel=1e-15, abs=0)  # 180 deg = pi rad
    assert units.parse(0.5, "angle") == 0.5  # a bare number is in radians


def test_angular_frequency_becomes_cyclic():
    # configs use cyclic frequencies: w = 2 pi f, so 2 pi x 1e6 rad/s is 1 MHz
    assert units.parse(f"{2 * math.pi * 1e6!r} rad/s", "frequency") == pytest.approx(1e6, rel=1e-15, abs=0)


def test_multipole_coefficients_and_psd():
    # V/mm^2 = 1e6 V/m^2; V^2/cm^2/Hz = 1e4 V^2/m^2/Hz (hand conversions)
    v = units.parse("3 V/mm^2", "custom", dimensionality=units.multipole_dimension(2), example="1 V/m^2")
    assert v == pytest.approx(3e6, rel=1e-15, abs=0)
    psd = units.parse("1e-12 V^2/cm^2/Hz", "custom", dimensionality="[electric_potential]**2/[length]**2*[time]",
                      example="1e-12 V^2/m^2/Hz")
    assert psd == pytest.approx(1e-8, rel=1e-15, abs=0)


@pytest.mark.parametrize("value, dimension, words", [
    ("2 ms", "frequency", "wrong dimension"),
    ("0.5 mk", "temperature", "did you mean '0.5 mK'"),
    ("nan MHz", "frequency", "finite"),
    ("inf ms", "time", "finite"),
    (float("nan"), "dimensionless", "finite"),
    (3.0, "frequency", "needs a unit"),
    (True, "time", "expected a time"),
    ("three ms", "time", "could not read"),
])
def test_bad_values_are_refused_naming_the_key(value, dimension, words):
    with pytest.raises(InputError) as e:
        units.parse(value, dimension, "stage.spin-up.duration", "demo.toml")
    line = e.value.line()
    assert "demo.toml" in line and "stage.spin-up.duration" in line and words in line, line


def test_zero_needs_no_unit_and_numbers_are_finite():
    assert units.parse(0, "frequency") == 0.0
    assert units.number(2, "k") == 2.0
    for bad in (float("inf"), True, "2"):
        with pytest.raises(InputError):
            units.number(bad, "run.x", "c.toml")
