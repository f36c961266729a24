"""Quantities with units, parsed from config strings.

Configs write quantities as strings with units (``"1.1 MHz"``, ``"5 um"``,
``"3e13 V/m^4"``). We parse them with `pint` rather than by hand: pint knows
SI prefixes, compound units, powers and the dimensional analysis needed to
refuse "2 ms" where a frequency is expected. It is imported lazily so that
``mdrotor --help`` stays fast.

Everything returned here is a plain float in SI base units.
"""

from __future__ import annotations

import math
import re
from functools import lru_cache

from mdrotor.errors import InputError

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


def _to_si(q, dimension: str, dimensionality: str, text: str) -> float:
    """SI magnitude of pint quantity ``q``; ValueError for the wrong dimension."""
    ureg = registry()
    if not isinstance(q, ureg.Quantity):
        q = ureg.Quantity(float(q))
    if dimensionality == "":
        if not q.dimensionless:
            raise ValueError
        return float(q.to("radian").magnitude) if dimension == "angle" else float(q.to("").magnitude)
    if q.dimensionality != ureg.get_dimensionality(dimensionality):
        raise ValueError
    out = float(q.to_base_units().magnitude)
    if dimension == "frequency" and "rad" in text:
        # an angular frequency (rad/s) given where configs use cyclic Hz
        out /= 2.0 * math.pi
    return out


def _read(text: str, dimension: str, dimensionality: str) -> float:
    """``text`` in SI; raises on unreadable text or the wrong dimension."""
    return _to_si(registry().Quantity(text), dimension, dimensionality, text)


#: Unit symbols a config writes, with the SI prefixes that make sense for
#: each; the candidates of "did you mean" (common practice, no source).
SYMBOLS = {"Hz": ("", "k", "M", "G"), "s": ("", "m", "u", "n", "p"), "m": ("", "c", "m", "u", "n"),
           "K": ("", "m", "u", "n"), "V": ("", "m", "k", "u"), "u": ("",), "Da": ("",), "g": ("", "k"),
           "rad": ("", "m"), "deg": ("",), "eV": ("", "m", "k", "M")}
_NUMBER = re.compile(r"^\s*[-+]?(?:\d+\.?\d*|\.\d+)(?:[eE][-+]?\d+)?")
_WORD = re.compile(r"[A-Za-z_]+")


def suggest(text: str, dimension: str, dimensionality: str | None = None) -> list[str]:
    """Spellings of ``text`` that read as a quantity of the wanted dimension.

    Each unit word of ``text`` is replaced by the known symbols
    (:data:`SYMBOLS` with their prefixes) that differ from it only by case
    or are a near spelling (:func:`difflib.get_close_matches`, ratio >= 0.75);
    the variants that parse to ``dimension`` are returned, closest first
    (case changes before spelling changes; at most two).

    Examples: ``"0.5 mk"`` -> ``["0.5 mK"]`` for a temperature,
    ``"1.2 mhz"`` -> ``["1.2 MHz"]`` for a frequency.
    """
    import difflib
    import itertools

    if dimension != "custom":
        dimensionality = DIMENSIONS[dimension][0]
    m = _NUMBER.match(text)
    if m is None:
        return []
    head, rest = text[:m.end()], text[m.end():]
    words = list(_WORD.finditer(rest))
    if not words or len(words) > 4:
        return []
    symbols = [p + s for s, prefixes in SYMBOLS.items() for p in prefixes]
    lower = {}
    for s in symbols:
        lower.setdefault(s.lower(), []).append(s)
    options = []
    for w in words:
        word = w.group()
        opts = [(0.0, word)]
        for s in lower.get(word.lower(), []):
            if s != word:
                opts.append((1.0, s))
        for near in difflib.get_close_matches(word.lower(), list(lower), n=3, cutoff=0.75):
            if near != word.lower():
                ratio = difflib.SequenceMatcher(None, word.lower(), near).ratio()
                opts.extend((3.0 - ratio, s) for s in lower[near])
        options.append(opts)
    found = {}
    for combo in itertools.product(*options):
        cost = sum(c for c, _ in combo)
        if cost == 0.0:
            continue
        out, last = [], 0
        for w, (_, s) in zip(words, combo):
            out.append(rest[last:w.start()] + s)
            last = w.end()
        cand = head + "".join(out) + rest[last:]
        try:
            _read(cand, dimension, dimensionality)
        except Exception:
            continue
        found[cand] = min(cost, found.get(cand, math.inf))
    ranked = sorted(found, key=lambda c: found[c])
    return [c for c in ranked if found[c] == found[ranked[0]]][:2] if ranked else []


def _did_you_mean(text: str, dimension: str, dimensionality: str) -> str:
    try:
        cands = suggest(text, dimension, dimensionality)
    except Exception:  # a suggestion is a courtesy; never let it hide the error
        return ""
    return ("; did you mean " + " or ".join(repr(c) for c in cands) + "?") if cands else ""


def parse(value, dimension: str, key: str = "", source: str | None = None,
          *, dimensionality: str | None = None, example: str | None = None) -> float:
    """Parse ``value`` (string with units, or bare number) into SI float.

    Parameters
    ----------
    value : str or float or int
        ``"1.1 MHz"``; a bare number is accepted only for dimensionless and
        angle quantities (angles then in radians), and 0 for any quantity.
    dimension : str
        One of :data:`DIMENSIONS` or ``"custom"`` together with
        ``dimensionality`` and ``example``.
    key, source : str
        Used in the error message.

    Returns
    -------
    float
        The value in SI base units (Hz, s, m, K, kg, V, V/m, rad, V/m^n),
        always finite.

    Raises
    ------
    InputError
        Naming ``key``: unreadable text, the wrong dimension (with "did you
        mean" when a unit differs only by case or a near spelling, see
        :func:`suggest`), a bare number where a unit is needed, or a value
        that is not finite (nan, inf, or beyond the float range in SI).
    """
    if dimension != "custom":
        dimensionality, example = DIMENSIONS[dimension]
    what = dimension.replace("_", " ") if dimension != "custom" else "quantity"
    expected = f"expected a {what} such as '{example}'"
    if isinstance(value, bool):
        raise InputError(key, f"{expected}, got {value!r}", source)
    if isinstance(value, (int, float)):
        if not math.isfinite(value):
            raise InputError(key, f"expected a finite {what} such as '{example}', got {value!r}", source)
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
        raise InputError(key, f"{expected}, could not read {value!r}{_did_you_mean(text, dimension, dimensionality)}",
                         source) from None
    try:
        out = _to_si(q, dimension, dimensionality, text)
    except Exception:
        raise InputError(key, f"{expected}, got {value!r} of the wrong dimension"
                              f"{_did_you_mean(text, dimension, dimensionality)}", source) from None
    if not math.isfinite(out):
        raise InputError(key, f"expected a finite {what} such as '{example}', got {value!r}", source)
    return out


def number(value, key: str = "", source: str | None = None, what: str = "a number") -> float:
    """A plain (unitless) config number as a finite float.

    Raises
    ------
    InputError
        Naming ``key`` when ``value`` is not an int or float (booleans
        included) or is nan / inf.
    """
    if isinstance(value, bool) or not isinstance(value, (int, float)):
        raise InputError(key, f"expected {what}, got {value!r}", source)
    if not math.isfinite(value):
        raise InputError(key, f"expected {what} (finite), got {value!r}", source)
    return float(value)
