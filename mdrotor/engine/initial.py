"""Initial states: the crystal's normal modes sampled from a thermal Wigner function.

Each normal mode k (frequency w_k, normal coordinates Q_k, P_k with energy
E_k = w_k (Q_k^2 + P_k^2) / 2, see :mod:`mdrotor.physics.statics`) is drawn from the
Wigner function of a thermal state, a Gaussian with

    <Q_k^2> = <P_k^2> = hbar (n_k + 1/2) = (hbar / 2) coth(hbar w_k / 2 k_B T)

(Wigner function of a thermal harmonic oscillator; e.g. W.P. Schleich,
Quantum Optics in Phase Space, ch. 4). Without zero-point motion
(``wigner = false``) the classical Boltzmann distribution is used,
<Q^2> = hbar n_k with n_k = k_B T / (hbar w_k) from a temperature. Per-mode
occupations n_k (after sideband cooling) override the temperature for the
modes they select. The free rotation of an unpinned crystal (the zero mode)
gets a uniform random angle and a classical thermal angular momentum,
<dL^2> = I k_B T (equipartition for a planar rotor).

Randomness: trajectory b draws from ``numpy.random.Generator(PCG64DXSM(
SeedSequence(seed, spawn_key=(b,))))``, so its state depends only on (seed,
b), never on chunking, threads or the other trajectories.
"""

from __future__ import annotations

import numpy as np

from mdrotor.physics.constants import HBAR


def trajectory_rng(seed: int, index: int, stream: int = 0) -> np.random.Generator:
    """The generator of trajectory ``index`` (stream 0: initial state,
    stream 1: the noise's numpy reference synthesis, stream 2: RF phase)."""
    return np.random.Generator(np.random.PCG64DXSM(np.random.SeedSequence(seed, spawn_key=(index, stream))))


def counter_keys(seed: int, indices, stream: int) -> np.ndarray:
    """Each trajectory's 64-bit key (T,) for the kernels' counter-based draws
    (:func:`mdrotor.engine.kernels._uniform`): ``SeedSequence(seed, spawn_key=(index,
    stream))``, a function of (seed, trajectory index, stream) only. Streams:
    3 white noise, 4 laser, 5 colored noise."""
    return np.array([np.random.SeedSequence(int(seed), spawn_key=(int(i), int(stream))).generate_state(1, np.uint64)[0]
                     for i in np.asarray(indices).reshape(-1)], dtype=np.uint64)




def sample_normal_coordinates(n_occ: np.ndarray, wigner: bool, rng: np.random.Generator):
    """Draw (Q, P) for every mode: Gaussian with variance hbar (n + 1/2) or hbar n."""
    var = HBAR * (n_occ + 0.5) if wigner else HBAR * n_occ
    sd = np.sqrt(var)
    q = rng.standard_normal(len(n_occ)) * sd
    p = rng.standard_normal(len(n_occ)) * sd
    return q, p


def phase_space_point(modes, q: np.ndarray, p: np.ndarray) -> np.ndarray:
    """zeta = sum_k Q_k e_q,k + P_k e_p,k (mass-weighted deviations and momenta)."""
    return q @ modes.e_q + p @ modes.e_p
