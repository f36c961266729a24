"""Physical constants the physics shares (CODATA values through scipy.constants)."""

import numpy as np
from scipy import constants as sc

K_COULOMB = 1.0 / (4.0 * np.pi * sc.epsilon_0)  # Coulomb constant 1/(4 pi eps0), N m^2 / C^2
HBAR = sc.hbar  # reduced Planck constant, J s
K_B = sc.k  # Boltzmann constant, J / K
