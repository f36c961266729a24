"""mdrotor: Monte-Carlo semiclassical MD of rotating ion Coulomb crystals.

Notebook use::

    import mdrotor
    cfg = mdrotor.load_config("configs/demo.toml", ["trap.f_radial='1.1 MHz'"])
    cr = mdrotor.crystal(cfg, f_rot_hz=150e3)      # equilibrium + modes
    res = mdrotor.run(cfg)                          # Monte-Carlo run
    res.save("demo.h5"); res2 = mdrotor.load("demo.h5")
    q = mdrotor.quantum(cfg)                        # quantum rotor beside the ensemble

Submodules are imported on first use so that the command line starts fast.
"""

__version__ = "0.1.0"


def load_config(path_or_dict, overrides=()):
    """Load and validate a run config (file path or dict); see
    :func:`mdrotor.config.load_config`."""
    from .config import load_config as _load

    return _load(path_or_dict, overrides)


def crystal(cfg, f_rot_hz=None):
    """Equilibrium, normal modes and rotor quantities of the config's crystal
    at ``f_rot_hz`` (Hz); see :func:`mdrotor.statics.crystal_from_config`."""
    from .statics import crystal_from_config

    if not hasattr(cfg, "trap"):
        cfg = load_config(cfg)
    return crystal_from_config(cfg, f_rot_hz)


def run(cfg, **kwargs):
    """Monte-Carlo spin-up / release run; returns a :class:`mdrotor.result.Result`."""
    from .runner import run as _run

    if not hasattr(cfg, "trap"):
        cfg = load_config(cfg)
    return _run(cfg, **kwargs)


def load(path):
    """Load a result file written by :meth:`Result.save` or ``mdrotor run``."""
    from .store import load_result

    return load_result(path)


def quantum(source, **kwargs):
    """The crystal's rotation as a quantum rotor through the schedule, beside
    the Monte-Carlo ensemble (a config, a config path or a result file); a
    JSON-ready dict, see :func:`mdrotor.quantum_command.quantum_report`."""
    from .quantum_command import quantum_report

    return quantum_report(source, **kwargs)
