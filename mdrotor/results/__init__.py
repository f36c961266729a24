"""A run's outcome as data: the Result, its statistics and its HDF5 file.

result   Result and Observation (per-trajectory arrays and the summary)
status   the per-trajectory status flags and which trajectories enter statistics
stats    means, spreads, variances with their errors; fractions with Wilson intervals; histograms
store    HDF5 writing and reading of results and of the quantum rotor's report
"""
