"""Initial states (mdrotor.engine.initial, through engine.initial_states): thermal Wigner
sampling of the normal modes against the textbook variances of a thermal oscillator."""

import math

import numpy as np
import pytest
from conftest import two_ion_config
from scipy import constants as sc

from mdrotor.config import parse as config
from mdrotor.engine import integrate as engine
from mdrotor.physics.statics import mode_occupations

F = (1.2e6, 1.2e6, 2.9e6)  # the base config's secular frequencies (Hz)
T_K = 50e-6


def one_ion(wigner, temperature="50 uK", **initial):
    d = two_ion_config(crystal={"ions": 1}, pinning=None, stage=[{"name": "hold", "duration": "1 us"}],
                       initial={"temperature": temperature, "wigner": wigner, **initial})
    return engine.make_plan(config.from_dict(d, "one.toml"))


def bose(w, T):
    """Thermal occupation, as the mean of the geometric distribution p_k ~ e^{-k x} (summed)."""
    x = sc.hbar * w / (sc.k * T)
    k = np.arange(0, 4000)
    p = np.exp(-k * x)
    return float(np.sum(k * p) / np.sum(p))


N = 20000


@pytest.fixture(scope="module")
def wigner_states():
    plan = one_ion(True)
    return plan, engine.initial_states(plan, 7, np.arange(N))


def test_thermal_wigner_variances(wigner_states):
    # thermal Wigner function of an oscillator: <x^2> = (n + 1/2) hbar / (m w), <v^2> = (n + 1/2) hbar w / m
    # (M. Hillery et al., Phys. Rep. 106, 121 (1984); W.P. Schleich, Quantum Optics in Phase Space, ch. 4)
    plan, (pos, vel) = wigner_states
    m = plan.masses[0]
    tol = 5 * math.sqrt(2.0 / N)  # five standard errors of a variance estimate from N normal samples
    for axis in range(3):
        w = 2 * math.pi * F[axis]
        n = bose(w, T_K)
        x_var = (n + 0.5) * sc.hbar / (m * w)
        v_var = (n + 0.5) * sc.hbar * w / m
        assert np.var(pos[axis, 0]) / x_var == pytest.approx(1.0, rel=tol, abs=0), axis
        assert np.var(vel[axis, 0]) / v_var == pytest.approx(1.0, rel=tol, abs=0), axis
        assert abs(np.mean(pos[axis, 0])) < 5 * math.sqrt(x_var / N)


def test_positions_and_velocities_uncorrelated(wigner_states):
    # a thermal state's Wigner function is a product of Gaussians in x and p (Hillery et al. 1984)
    _, (pos, vel) = wigner_states
    for axis in range(3):
        r = np.corrcoef(pos[axis, 0], vel[axis, 0])[0, 1]
        assert abs(r) < 5 / math.sqrt(N)


def test_zero_temperature_keeps_the_zero_point_motion():
    # the ground state's Wigner function: <x^2> = hbar / (2 m w) (Hillery et al. 1984)
    plan = one_ion(True, temperature="0 K")
    pos, _ = engine.initial_states(plan, 3, np.arange(N))
    m, w = plan.masses[0], 2 * math.pi * F[2]
    assert np.var(pos[2, 0]) / (sc.hbar / (2 * m * w)) == pytest.approx(1.0, rel=5 * math.sqrt(2.0 / N), abs=0)


def test_classical_sampling_is_equipartition():
    # wigner = false: the Boltzmann distribution, <x^2> = k_B T / (m w^2) (equipartition)
    plan = one_ion(False)
    pos, vel = engine.initial_states(plan, 5, np.arange(N))
    m = plan.masses[0]
    for axis in range(3):
        w = 2 * math.pi * F[axis]
        assert np.var(pos[axis, 0]) / (sc.k * T_K / (m * w * w)) == pytest.approx(1.0, rel=5 * math.sqrt(2.0 / N), abs=0)
        assert np.var(vel[axis, 0]) / (sc.k * T_K / m) == pytest.approx(1.0, rel=5 * math.sqrt(2.0 / N), abs=0)


def test_occupations_override_the_temperature():
    # a sideband-cooled axis: n = 0.2 on com-z; <x^2> = (n + 1/2) hbar / (m w)
    plan = one_ion(True, occupations={"com-z": 0.2})
    pos, _ = engine.initial_states(plan, 9, np.arange(N))
    m, w = plan.masses[0], 2 * math.pi * F[2]
    assert np.var(pos[2, 0]) / (0.7 * sc.hbar / (m * w)) == pytest.approx(1.0, rel=5 * math.sqrt(2.0 / N), abs=0)


def test_mode_occupations_are_bose_einstein():
    plan = one_ion(True)
    n = mode_occupations(plan.crystal0.modes, T_K, (), True)
    w = plan.crystal0.modes.omega
    np.testing.assert_allclose(n, [bose(x, T_K) for x in w], rtol=1e-12, atol=0)
    # classical: k_B T / (hbar w)
    np.testing.assert_allclose(mode_occupations(plan.crystal0.modes, T_K, (), False), sc.k * T_K / (sc.hbar * w),
                               rtol=1e-14, atol=0)


def test_trajectory_keeps_its_state_whatever_the_others():
    # randomness keyed by (seed, trajectory): the same trajectory from another batch is bit-identical
    plan = one_ion(True)
    a, _ = engine.initial_states(plan, 11, np.arange(8))
    b, _ = engine.initial_states(plan, 11, np.array([5, 2]))
    np.testing.assert_array_equal(a[:, :, [5, 2]], b)
