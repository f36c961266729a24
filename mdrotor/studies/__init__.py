"""Studies made of many runs: sweeps, optimisation, trap comparison, the quantum rotor, electrode designs.

tasks          one run of a config as a unit of work for an executor
sweep          parameter sweeps (grid, zip, sample), their metrics and the sweep file
store          the resumable HDF5 store of sweep and optimisation entries
optimize       derivative-free optimisation of ramps and voltages
compare_trap   pseudopotential against the full RF force with the same seed
quantum        the quantum rotor through the schedule beside the ensemble
design_check   a surface-electrode layout against a run's crystal in the full field
"""
