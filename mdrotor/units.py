"""Quantities with units, parsed from config strings.

Configs write quantities as strings with units (``"1.1 MHz"``, ``"5 um"``,
``"3e13 V/m^4"``). We parse them with `pint` rather than by hand: pint knows
SI prefixes, compound units, powers and the dimensional analysis needed to
refuse "2 ms" where a frequency is expected. It is imported lazily so that
``mdrotor --help`` stays fast.

Everything returned here is a plain float in SI base units.
"""

from __future__ import annotations

from functools import lru_cache

from .errors import InputError

# Dimension name -> (pint dimensionality expression, example for messages)
DIMENSIONS = {
    "frequency": ("1/[time]", "1.1 MHz"),
    "time": ("[time]", "2 ms"),
    "length": ("[length]", "5 um"),
    "temperature": ("[temperature]", "0.4 mK"),
    "mass": ("[mass]", "40 u"),
    "voltage": ("[electric_potential]", "10 V"),
    "field": ("[electric_potential]/[length]", "2 V/m"),
    "angle": ("", "30 deg"),
    "dimensionless": ("", "0.5"),
    "acceleration_angular": ("1/[time]**2", "1e9 rad/s^2"),
}


@lru_cache(maxsize=1)
def registry():
    import pint

    ureg = pint.UnitRegistry()
    return ureg


def multipole_dimension(order: int) -> str:
    """Pint dimensionality of an order-n potential coefficient, V/m^n."""
    return f"[electric_potential]/[length]**{int(order)}"


def multipole_example(order: int) -> str:
    return f"3e13 V/m^{int(order)}"


def parse(value, dimension: str, key: str = "", source: str | None = None,
          *, dimensionality: str | None = None, example: str | None = None) -> float:
    """Parse ``value`` (string with units, or bare number) into SI float.

    Parameters
    ----------
    value : str or float or int
        ``"1.1 MHz"``; a bare number is accepted only for dimensionless and
        angle quantities (angles then in radians).
    dimension : str
        One of :data:`DIMENSIONS` or ``"custom"`` together with
        ``dimensionality`` and ``example``.
    key, source : str
        Used in the error message.

    Returns
    -------
    float
        The value in SI base units (Hz, s, m, K, kg, V, V/m, rad, V/m^n).
    """
    if dimension != "custom":
        dimensionality, example = DIMENSIONS[dimension]
    expected = f"expected a {dimension.replace('_', ' ') if dimension != 'custom' else 'quantity'} such as '{example}'"
    if isinstance(value, bool):
        raise InputError(key, f"{expected}, got {value!r}", source)
    if isinstance(value, (int, float)):
        if dimensionality == "":
            return float(value)
        if value == 0:
            return 0.0
        raise InputError(key, f"{expected} (a number needs a unit here), got {value!r}", source)
    if not isinstance(value, str):
        raise InputError(key, f"{expected}, got {value!r}", source)
    text = value.strip().replace("µ", "u").replace("μ", "u")
    ureg = registry()
    try:
        q = ureg.Quantity(text)
    except Exception:
        raise InputError(key, f"{expected}, could not read {value!r}", source) from None
    if not isinstance(q, ureg.Quantity):
        q = ureg.Quantity(float(q))
    try:
        if dimensionality == "":
            if not q.dimensionless:
                raise ValueError
            out = float(q.to("radian").magnitude) if dimension == "angle" else float(q.to("").magnitude)
        else:
            if q.dimensionality != ureg.get_dimensionality(dimensionality):
                raise ValueError
            out = float(q.to_base_units().magnitude)
            if dimension == "frequency" and "rad" in text:
                # an angular frequency (rad/s) given where configs use cyclic Hz
                import math
                out /= 2.0 * math.pi
    except Exception:
        raise InputError(key, f"{expected}, got {value!r} of the wrong dimension", source) from None
    return out
