"""How numbers are written in text output: the one owner of digits.

* Results with an uncertainty (``value_err``): the error rounded to two
  significant digits and the value to the same decimal place, e.g.
  ``-65 +- 95`` rather than ``-65.437 +- 95``; large or small numbers as
  ``(2.21 +- 0.43)e+07``. The Particle Data Group's rule keeps one or two
  digits of the error depending on its leading digits (Review of Particle
  Physics, Introduction; from memory); two everywhere is common practice,
  no source.
* Fractions with an interval (``interval``): ``0.031 [0.024, 0.040]``, as
  many decimals as the interval's width supports, an exact 0 or 1 bound
  written ``0`` or ``1``.
* Inputs echoed back (``echo``): the shortest text that reads back as the
  same float (``repr``), after removing the noise of a unit conversion
  (``clean``: 5 us is 5e-06 s, not 4.9999999999999996e-06).
* Numbers with neither (``plain``): a fixed number of significant digits.
* Figures and the report page (``compact``, ``plus_minus``): a few
  significant digits without an exponent between 1e-3 and 1e6
  (``200000``, not ``2e+05``, on a tick or in a table cell), and
  ``value ± error`` with the error to two digits.

Text never shows ``nan``: a missing number is written ``n/a``.
"""

from __future__ import annotations

import math

import numpy as np

MISSING = "n/a"


def _finite(x) -> bool:
    try:
        return x is not None and math.isfinite(float(x))
    except (TypeError, ValueError):
        return False


def clean(x: float) -> float:
    """``x`` rounded to 15 significant digits: the value a user's short
    decimal input denotes, without the last-bit noise of a unit conversion
    (a double holds 15.95 decimal digits, so 15 always read back)."""
    x = float(x)
    if not math.isfinite(x) or x == 0.0:
        return x
    return float(f"{x:.15g}")


def echo(x) -> str:
    """An input value as the shortest text that reads back as the same
    (cleaned) float; integers and strings unchanged."""
    if isinstance(x, bool) or isinstance(x, str):
        return str(x)
    if isinstance(x, int):
        return str(x)
    return repr(clean(float(x)))


def plain(x, sig: int = 6) -> str:
    """A number without an uncertainty, ``sig`` significant digits."""
    if not _finite(x):
        return MISSING
    x = float(x)
    return f"{0.0 if x == 0 else x:.{sig}g}"


def compact(x, sig: int = 4) -> str:
    """``sig`` significant digits, without an exponent between 1e-3 and 1e6
    (figures, heat-map cells, the report page); ``n/a`` for a missing number."""
    if not _finite(x):
        return MISSING
    x = float(f"{float(x):.{sig}g}")
    if x == 0 or 1e-3 <= abs(x) < 1e6:
        return f"{x:.{max(sig, 7)}g}"
    return f"{x:.{sig}g}"


def plus_minus(x, err, sig: int = 4) -> str:
    """``value ± error`` on a figure or the report page: the value as
    :func:`compact` with ``sig`` digits, the error with two; the value alone
    without a finite error, ``n/a`` without a value."""
    if err is None or not _finite(err) or not _finite(x):
        return compact(x, sig)
    return f"{compact(x, sig)} ± {compact(err, 2)}"


def _decimals(err: float, sig: int) -> int:
    """Decimal places that leave ``sig`` significant digits of ``err``."""
    d = sig - 1 - math.floor(math.log10(err))
    if round(err, d) >= 10.0 ** (sig - d):  # rounding carried into a new digit (0.0996 -> 0.10)
        d -= 1
    return d


def _fixed(x: float, d: int) -> str:
    if d >= 0:
        s = f"{x:.{d}f}"
    else:
        s = f"{round(x, d):.0f}"
    return s[1:] if s.startswith("-") and float(s) == 0.0 else s


def value_err(x, err, sig: int = 2, unit: str = "") -> str:
    """``value +- error`` with the digits the error supports (module
    docstring). Without a finite positive error: the value alone
    (:func:`plain`), and ``n/a`` for a missing value."""
    u = f" {unit}" if unit else ""
    if not _finite(x):
        return MISSING
    x = float(x)
    if not _finite(err) or float(err) <= 0.0:
        return plain(x) + u + ("" if _finite(err) else " (no error)")
    err = float(err)
    big = max(abs(x), err)
    if big >= 1e6 or big < 1e-4:
        e = math.floor(math.log10(big))
        xs, es = x / 10.0**e, err / 10.0**e
        d = max(_decimals(es, sig), 0)
        return f"({_fixed(xs, d)} +- {_fixed(es, d)})e{e:+03d}{u}"
    d = _decimals(err, sig)
    return f"{_fixed(x, d)} +- {_fixed(err, d)}{u}"


def interval(p, lo, hi, sig: int = 2) -> str:
    """``p [lo, hi]`` for a fraction and its interval (module docstring)."""
    if not (_finite(p) and _finite(lo) and _finite(hi)):
        return MISSING
    p, lo, hi = float(p), float(lo), float(hi)
    width = hi - lo
    d = max(_decimals(width, sig), 0) if width > 0 else 3

    def b(v):
        return "0" if v == 0.0 else "1" if v == 1.0 else _fixed(v, d)

    return f"{_fixed(p, d)} [{b(lo)}, {b(hi)}]"

def jsonable(v):
    """A value ready for json.dumps: arrays as lists, numpy scalars as
    Python numbers, complex numbers as {"re", "im"}, non-finite floats as
    null (JSON has no NaN). The commands' --json output goes through it
    (rotor's through analysis.rotor.json_safe, which also says why a value is null)."""
    if isinstance(v, dict):
        return {str(k): jsonable(x) for k, x in v.items()}
    if isinstance(v, (list, tuple)):
        return [jsonable(x) for x in v]
    if isinstance(v, np.ndarray):
        return jsonable(v.tolist())
    if isinstance(v, (np.bool_, bool)):
        return bool(v)
    if isinstance(v, (np.integer, int)):
        return int(v)
    if isinstance(v, (complex, np.complexfloating)):
        return {"re": jsonable(v.real), "im": jsonable(v.imag)}
    if isinstance(v, (np.floating, float)):
        return float(v) if np.isfinite(v) else None
    if isinstance(v, bytes):
        return v.decode()
    return v
