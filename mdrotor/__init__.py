"""mdrotor: Monte-Carlo semiclassical MD of rotating ion Coulomb crystals.

Notebook use::

    import mdrotor
    cfg = mdrotor.load_config("configs/demo.toml", ["trap.f_radial='1.1 MHz'"])
    cr = mdrotor.crystal(cfg, f_rot_hz=150e3)      # equilibrium + modes
    res = mdrotor.run(cfg)                          # Monte-Carlo run
    mdrotor.save(res, "demo.h5"); res2 = mdrotor.load("demo.h5")
    q = mdrotor.quantum(cfg)                        # quantum rotor beside the ensemble

Submodules are imported on first use (the ``startup:`` lines) so that the command line starts fast.
"""

from mdrotor.version import __version__  # noqa: F401  (the face hands it on)


def load_config(path_or_dict, overrides=()):
    """Load and validate a run config (file path or dict); see
    :func:`mdrotor.config.parse.load_config`."""
    from mdrotor.config.parse import load_config as _load  # startup: the command line imports this face

    return _load(path_or_dict, overrides)


def crystal(cfg, f_rot_hz=None):
    """Equilibrium, normal modes and rotor quantities of the config's crystal
    at ``f_rot_hz`` (Hz); see :func:`mdrotor.model.build.crystal_from_config`."""
    from mdrotor.model.build import crystal_from_config  # startup: the command line imports this face

    if not hasattr(cfg, "trap"):
        cfg = load_config(cfg)
    return crystal_from_config(cfg, f_rot_hz)


def run(cfg, **kwargs):
    """Monte-Carlo spin-up / release run; returns a :class:`mdrotor.results.result.Result`."""
    from mdrotor.engine.run import run as _run  # startup: the command line imports this face

    if not hasattr(cfg, "trap"):
        cfg = load_config(cfg)
    return _run(cfg, **kwargs)


def save(result, path):
    """Write a result to HDF5 (a temporary file in the same folder, then renamed)."""
    from mdrotor.results.store import save_result  # startup: the command line imports this face

    save_result(result, path)


def load(path):
    """Load a result file written by :func:`save` or ``mdrotor run``."""
    from mdrotor.results.store import load_result  # startup: the command line imports this face

    return load_result(path)


def quantum(source, **kwargs):
    """The crystal's rotation as a quantum rotor through the schedule, beside
    the Monte-Carlo ensemble (a config, a config path or a result file); a
    JSON-ready dict, see :func:`mdrotor.studies.quantum.quantum_report`."""
    from mdrotor.studies.quantum import quantum_report  # startup: the command line imports this face

    return quantum_report(source, **kwargs)
