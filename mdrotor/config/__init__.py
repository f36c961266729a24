"""The run config: TOML text to frozen, validated specs in SI units.

parse      sections, keys and their checks; load_config / from_dict; --set overrides
schedule   the stages and ramp profiles the user asked for: f_rot(t), theta(t), pinning multipliers
noise      the [noise] table parsed once into a physics.noise.NoiseModel
"""
