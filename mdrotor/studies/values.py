"""Values of swept keys: quantities with units as written in a study file.

A sweep axis or an optimisation parameter names config values as text with
units (``"2 ms"``) or bare numbers. This module reads them (magnitude and
unit), converts between units, writes them back as config values, gives
their SI magnitude for tables, and maps a ``[low, high]`` pair of bounds to
magnitudes (also from unit-cube coordinates).
"""

from __future__ import annotations

import json
import math
import re

from mdrotor import units
from mdrotor.errors import InputError
from mdrotor.numfmt import clean

_NUMBER = re.compile(r"^\s*[-+]?(?:\d+\.?\d*|\.\d+)(?:[eE][-+]?\d+)?\s*")


def quantity(value, key: str, source: str):
    """``(magnitude, unit text)`` of a value with units (``"2 ms"`` ->
    ``(2.0, "ms")``); ``(value, None)`` for a bare number."""

    if isinstance(value, bool) or not isinstance(value, (int, float, str)):
        raise InputError(key, f"expected a number or a quantity with units such as '2 ms', got {value!r}", source)
    if not isinstance(value, str):
        return units.number(value, key, source), None
    ureg = units.registry()
    text = value.strip().replace("µ", "u").replace("μ", "u")
    try:
        q = ureg.Quantity(text)
    except Exception:
        raise InputError(key, f"expected a quantity with units such as '2 ms', could not read {value!r}", source) from None
    if not isinstance(q, ureg.Quantity) or (q.dimensionless and str(q.units) == "dimensionless"):
        return units.number(float(getattr(q, "magnitude", q)), key, source), None
    m = _NUMBER.match(text)
    unit = text[m.end():].strip() if m else ""
    try:
        if not unit or not ureg.Quantity(f"1 {unit}").units == q.units:
            raise ValueError
        mag = float(ureg.Quantity(text).to(unit).magnitude)
    except Exception:
        unit = f"{q.units:~}".replace("µ", "u")
        mag = float(q.magnitude)
    if not math.isfinite(mag):
        raise InputError(key, f"expected a finite quantity such as '2 ms', got {value!r}", source)
    return mag, unit


def convert(value, unit, key: str, source: str) -> float:
    """Magnitude of ``value`` in ``unit`` (None: a bare number)."""

    mag, u = quantity(value, key, source)
    if unit is None or u is None:
        if (unit is None) != (u is None):
            raise InputError(key, f"expected {'a bare number' if unit is None else 'a quantity in ' + repr(unit)}, got {value!r}", source)
        return mag
    try:
        return float(units.registry().Quantity(mag, u).to(unit).magnitude)
    except Exception:
        raise InputError(key, f"expected a quantity convertible to {unit!r}, got {value!r}", source) from None


def with_unit(mag: float, unit, digits: int | None = 12):
    """Config value for magnitude ``mag`` in ``unit``: ``"1.5 ms"`` or a
    number; rounded to ``digits`` significant digits (None: exact, the
    shortest text that reads back as the same float)."""
    text = repr(float(mag)) if digits is None else f"{float(mag):.{digits}g}"
    if unit is None:
        return float(text)
    return f"{text} {unit}"


def si_value(value) -> float:
    """SI magnitude of a config value (NaN when it has none, e.g. a shape
    name), without the last-bit noise of the unit conversion ("5 us" ->
    5e-06, :func:`mdrotor.numfmt.clean`)."""

    if isinstance(value, bool):
        return float(value)
    if isinstance(value, (int, float)):
        return float(value)
    if isinstance(value, str):
        try:
            q = units.registry().Quantity(value.strip().replace("µ", "u").replace("μ", "u"))
            return clean(float(q.to_base_units().magnitude) if hasattr(q, "to_base_units") else float(q))
        except Exception:
            return float("nan")
    return float("nan")


def show(value) -> str:
    """A config value as written in TOML (for tables and messages)."""
    if isinstance(value, str):
        return value
    if isinstance(value, bool):
        return "true" if value else "false"
    if isinstance(value, float):
        return f"{value:.12g}"
    return json.dumps(value) if isinstance(value, (dict, list)) else str(value)


def bounds(b, scale: str, key: str, src: str):
    """``(lo, hi, unit, log)`` of a ``[low, high]`` pair with units."""
    if not isinstance(b, list) or len(b) != 2:
        raise InputError(key, "expected [low, high], e.g. [\"1 ms\", \"3 ms\"]", src)
    lo, unit = quantity(b[0], f"{key}[0]", src)
    hi = convert(b[1], unit, f"{key}[1]", src)
    if not (math.isfinite(lo) and math.isfinite(hi) and lo < hi):
        raise InputError(key, f"expected low < high, got {b!r}", src)
    if scale == "log" and lo <= 0:
        raise InputError(key, "scale = 'log' needs positive bounds", src)
    return lo, hi, unit, scale == "log"


def scaled(a, u: float) -> float:
    """Magnitude at unit-cube coordinate ``u`` of an axis or parameter with bounds."""
    if a.log:
        return float(a.lo * (a.hi / a.lo) ** u)
    return float(a.lo + u * (a.hi - a.lo))
