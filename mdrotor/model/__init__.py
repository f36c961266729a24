"""Where the config meets the physics: the potentials, crystal and pinning verdict of a config.

build    config -> Potential (trap, pinning, layout polynomial), crystal, pinning verdict, escape depth
quantum  config -> the quantum rotor's setup (ladder, energies, pinning components, kick channels)
"""
