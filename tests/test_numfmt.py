"""How numbers are written on figures and the report page (numfmt.compact,
numfmt.plus_minus): common practice, no source."""

import math

import pytest

from mdrotor.numfmt import MISSING, compact, plus_minus


@pytest.mark.parametrize("x, sig, text", [
    (200000.0, 4, "200000"),          # no exponent below 1e6 (a tick or a table cell)
    (131.0394, 5, "131.04"),          # sig significant digits, no trailing zeros
    (0.0072311, 3, "0.00723"),
    (2.5e6, 4, "2.5e+06"),            # exponent from 1e6
    (4.9e-4, 2, "0.00049"),           # below 1e-3: Python's g format (fixed down to 1e-4)
    (4.9e-6, 2, "4.9e-06"),
    (0.0, 4, "0"),
    (-1234.5678, 6, "-1234.57"),
    (math.nan, 4, MISSING), (math.inf, 4, MISSING), (None, 4, MISSING),
])
def test_compact(x, sig, text):
    assert compact(x, sig) == text


def test_plus_minus():
    assert plus_minus(10097.765, 0.834, 6) == "10097.8 ± 0.83"
    assert plus_minus(0.5, 0.0012) == "0.5 ± 0.0012"
    assert plus_minus(3.0, math.nan) == "3" and plus_minus(3.0, None) == "3"  # no error: the value alone
    assert plus_minus(math.nan, 1.0) == MISSING  # a missing value has no error to show
