"""The physics of a rotating ion crystal: pure functions and small frozen types, no files, no config.

constants      shared constants (Coulomb constant; hbar and k_B from scipy.constants, CODATA)
species        ion table: masses, charges, nuclear spins; the usual cooling line per element
mathieu        Mathieu stability and characteristic exponents; (a, q) <-> secular frequency
trap           the harmonic trap: per-ion secular frequencies, the rotation limit of the radial confinement
multipole      the in-plane pinning multipole Phi_n = Re[c (x + i y)^n e^{-i n theta}]
frame          frames of a planar rotor: rotation about z, centre of mass, L_z, I, alignment angle
statics        Potential, equilibria, gyroscopic normal modes, phonon quanta, thermal occupations, Crystal
stability      the one verdict "is this equilibrium stable" (symmetry zero modes set aside)
pinning        "is the crystal held": moments, the relaxed held curve, verdicts, schedule margin
rotor          quantum-rotor numbers: hbar/I, lines, exchange and revival times, the allowed-L ladder
coherence      Ramsey and echo contrast under angular-momentum diffusion; coherence budget
laser          Doppler cooling: forces, rates, temperatures, the torque on a rotating crystal
noise          noise spectra and tones (the model), the analytic heating and diffusion rates
quantum_rotor  the orientation as a quantum rotor: levels, evolution, sidebands
"""
