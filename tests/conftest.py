"""Shared test fixtures: the configs folder and the small forced-oscillator run."""

import copy
import tomllib
from pathlib import Path

import pytest

# Every tolerance in this suite is relative (DEVELOPERS.md, "Tests"). By
# default pytest.approx also accepts an absolute difference of 1e-12, which
# makes a comparison of SI quantities far below 1 (a mass in kg, a moment of
# inertia in kg m^2, a diffusion constant in J^2 s) pass whatever the value.
# Here approx is strictly relative (rel = 1e-6 unless given) when a test does
# not name an absolute tolerance itself; a test that gives `abs` gets exactly
# what it asks for.
_pytest_approx = pytest.approx


def _relative_approx(expected, rel=None, abs=None, nan_ok=False):
    if abs is None:
        abs = 0.0
        if rel is None:
            rel = 1e-6
    return _pytest_approx(expected, rel=rel, abs=abs, nan_ok=nan_ok)


pytest.approx = _relative_approx

ROOT = Path(__file__).resolve().parents[1]
CONFIGS = ROOT / "configs"

# Two 40Ca+ ions pinned by a rotating quadrupole (libration near 221 kHz),
# spun up linearly to a small rotation (2 kHz: harmonic limit) from the exact
# equilibrium (T = 0, no zero-point motion: deterministic trajectories).
# Sweeps, optimisation and their tests run it as their base config.
FORCED_OSCILLATOR_TOML = """
[species]
ion = "40Ca+"
[crystal]
ions = 2
[trap]
f_radial = "1.2 MHz"
f_axial = "2.9 MHz"
[pinning]
order = 2
strength = "2e5 V/m^2"
[[stage]]
name = "spin-up"
duration = "5 us"
f_rot = { to = "2 kHz", shape = "linear" }
[[stage]]
name = "hold"
duration = "5 us"
[initial]
temperature = "0 K"
wigner = false
[run]
trajectories = 2
seed = 1
"""


def two_ion_config(**sections) -> dict:
    """The two-ion base config (FORCED_OSCILLATOR_TOML) as a fresh dict: the
    one factory for the tests' two 40Ca+ ions in the 1.2 / 2.9 MHz trap.

    Each keyword replaces that whole section (``stage=[...]``, ``run={...}``,
    ``trap={...}``) or adds it (``rotation``, ``noise``, ``laser``);
    ``None`` drops it (``pinning=None``: no pinning)."""
    d = tomllib.loads(FORCED_OSCILLATOR_TOML)
    for name, value in sections.items():
        if value is None:
            d.pop(name, None)
        else:
            d[name] = copy.deepcopy(value)
    return d


def two_ion_toml(**sections) -> str:
    """:func:`two_ion_config` as TOML text, for the command-line tests."""
    return toml_text(two_ion_config(**sections))


def _toml_value(v) -> str:
    if isinstance(v, bool):
        return "true" if v else "false"
    if isinstance(v, (int, float)):
        return repr(v)
    if isinstance(v, str):
        return '"' + v.replace("\\", "\\\\").replace('"', '\\"') + '"'
    if isinstance(v, (list, tuple)):
        return "[" + ", ".join(_toml_value(x) for x in v) + "]"
    if isinstance(v, dict):
        return "{ " + ", ".join(f"{_toml_key(k)} = {_toml_value(x)}" for k, x in v.items()) + " }"
    raise TypeError(f"no TOML form for {v!r}")


def _toml_key(k: str) -> str:
    return k if k.replace("_", "").replace("-", "").isalnum() else _toml_value(k)


def toml_text(d: dict) -> str:
    """A config dict as TOML: tables as [section], arrays of tables as
    [[section]], anything nested inside them inline."""
    out = [f"{_toml_key(k)} = {_toml_value(v)}" for k, v in d.items() if not isinstance(v, (dict, list))]
    for k, v in d.items():
        if isinstance(v, dict):
            out.append(f"[{_toml_key(k)}]")
            out += [f"{_toml_key(kk)} = {_toml_value(vv)}" for kk, vv in v.items()]
        elif isinstance(v, list) and v and all(isinstance(x, dict) for x in v):
            for item in v:
                out.append(f"[[{_toml_key(k)}]]")
                out += [f"{_toml_key(kk)} = {_toml_value(vv)}" for kk, vv in item.items()]
        elif isinstance(v, list):
            out.insert(0, f"{_toml_key(k)} = {_toml_value(v)}")
    return "\n".join(out) + "\n"


@pytest.fixture
def configs_dir():
    return CONFIGS


def assert_identical(a, b, where: str) -> None:
    """``a`` and ``b`` equal bit for bit, recursively through dicts, lists
    and arrays (NaN equal to NaN; shapes must match); ``where`` names the
    place in the assertion message."""
    import numpy as np

    if isinstance(a, dict):
        assert set(a) == set(b), where
        for k in a:
            assert_identical(a[k], b[k], f"{where}.{k}")
    elif isinstance(a, (np.ndarray, list, tuple)) and not isinstance(a, str):
        a, b = np.asarray(a), np.asarray(b)
        assert a.shape == b.shape, where
        if a.dtype.kind in "fc":
            np.testing.assert_array_equal(a, b, err_msg=where)  # NaN == NaN here, bit for bit otherwise
        else:
            assert [str(x) for x in a.ravel()] == [str(x) for x in b.ravel()], where
    elif isinstance(a, float) and np.isnan(a):
        assert isinstance(b, float) and np.isnan(b), where
    else:
        assert a == b, where


# a weakly pinned pair released into free rotation: the quantum rotor's tests and its figure
WEAK_PAIR = two_ion_toml(
    pinning={"order": 2, "strength": "1700 V/m^2"},
    stage=[{"name": "release", "duration": "0.25 ms", "pinning": {"to": 0.0, "shape": "cosine"}},
           {"name": "free", "duration": "0.05 ms"}],
    initial={"temperature": "0 K", "occupations": {"libration": 20}}, run={"trajectories": 400, "seed": 5})
