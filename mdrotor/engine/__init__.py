"""The Monte-Carlo engine: from a config to raw per-trajectory states and a Result.

initial     per-trajectory random keys and thermal Wigner sampling of the initial states
kernels     numba kernels: forces, the symplectic stepper, noise and laser kicks, lag tracking
noise       noise synthesis: the kernel's arrays and the numpy reference
integrate   the frozen plan of a run, its RunState, the BlockStepper, RF orbit, observations
observe     per-trajectory L, rates, lag, slips, losses and co-rotating phonons
preflight   the run's pinning and escape checks before stepping
run         run(cfg) -> Result; resources, splitting over a Dask cluster
executors   where runs execute: serial, local processes, a Dask cluster
"""
