"""Shared test fixtures: the configs folder and the small forced-oscillator run."""

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
    """The two-ion base config (FORCED_OSCILLATOR_TOML) as a fresh dict.

    Each keyword replaces that section (``stage=[...]``, ``run={...}``);
    ``None`` drops it."""
    d = tomllib.loads(FORCED_OSCILLATOR_TOML)
    for name, value in sections.items():
        if value is None:
            d.pop(name, None)
        else:
            d[name] = value
    return d


@pytest.fixture
def configs_dir():
    return CONFIGS
