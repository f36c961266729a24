"""Studies made of many runs: sweeps, optimisation, trap comparison, the quantum rotor, electrode designs.

tasks          one run of a config as a unit of work for an executor
values         quantities with units of swept values: read, convert, write back, SI, bounds
points         a study file's base config and points: overrides, each point's config, seed and name
metrics        the metric row of a Result, metric names and their units
table          the sweep / optimisation file as a table: axes, summary, read, CSV, output path
sweep          parameter sweeps (grid, zip, sample): the sweep file and its run
store          the resumable HDF5 store of sweep and optimisation entries
optimize       derivative-free optimisation of ramps and voltages
compare_trap   pseudopotential against the full RF force with the same seed
quantum        the quantum rotor through the schedule beside the ensemble
design_check   a surface-electrode layout against a run's crystal in the full field
"""
