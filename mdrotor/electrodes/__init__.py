"""Surface-electrode designs for pinning a rotating ion crystal.

Gapless-plane electrostatics of rectangle and polygon electrodes, layout
files, the RF pseudopotential, multipole expansions at the trap point,
voltage solves for static targets and rotating in-plane multipoles, the
export of the voltages over a run's schedule, the full field of a layout on
a crystal (for the statics) and the torque on the crystal turned rigidly.

Modules
-------
polygons    planar geometry: simplicity, triangulation, overlap areas
potentials  solid angles (House; Van Oosterom-Strackee), fields, Hessians
layout      Electrode, Layout, TOML files and their validation
pseudo      RF pseudopotential: null, secular frequencies, q, depth
harmonic_fit  real solid-harmonic fit, in-plane coefficients k_n
solve       voltages for static targets and rotating order-n pinning
polynomial  a layout's voltage plan as a polynomial potential for the run
waveform    electrode voltages versus time over a schedule (CSV, HDF5)
full_field  a layout's full field on a crystal as statics terms: per-ion RF pseudopotential, dc electrodes
torque_scan torque of a layout's field on a rigidly turned crystal: harmonics, rigid libration, barrier

Typical use::

    from mdrotor.electrodes import load_layout, rf_pseudopotential, fit_multipoles, solve_rotating
    lay = load_layout("configs/electrodes/ring8_triangle3.toml")
    trap = rf_pseudopotential(lay)                 # rf amplitude, drive, species from the file
    table = fit_multipoles(lay)                    # per volt of each channel
    plan = solve_rotating(lay, 3, 2e10, table=table)  # c_3 in V/m^3
    plan.voltages_at(theta_rad)                    # V per channel

    from mdrotor.config.parse import load_config
    from mdrotor.studies.design_check import design_check
    d = design_check(lay, load_config("configs/electrodes/ring8_triangle3_run.toml"))  # JSON-ready dict
    # text: mdrotor.commands.electrodes.check_text(d), or `mdrotor electrodes LAYOUT --config RUN`

The names are loaded on first use (PEP 562), so that importing the command
line does not import scipy. Voltages must stay within the trap's rated
limits and the lab's safety rules (see :data:`CAUTION`).
"""

from importlib import import_module

_WHERE = {
    "layout": ("Electrode", "Layout", "load_layout", "parse_layout", "rectangle", "polygon", "sector", "annulus",
               "disc", "ring_segments"),
    "harmonic_fit": ("MultipoleTable", "fit_multipoles", "fit_potential", "harmonic_terms", "solid_harmonics",
                   "sphere_rule", "field_terms", "hessian_terms", "inplane_terms", "pinning_orders"),
    "pseudo": ("NullResult", "PseudoTrap", "find_rf_null", "pseudo_energy_j", "rf_pseudopotential"),
    "solve": ("CAUTION", "StaticSolution", "RotatingPlan", "solve_static", "solve_rotating"),
    "waveform": ("write_waveform", "waveform_voltages"),
    "full_field": ("RFPseudoTerm", "ElectrodeTerm", "plan_voltages", "full_potential"),
    "torque_scan": ("rigid_scan", "RIPPLE_FLOOR"),
}
_NAME_TO_MODULE = {name: mod for mod, names in _WHERE.items() for name in names}

__all__ = [*_NAME_TO_MODULE, "electrode_basis"]


def __getattr__(name):
    mod = _NAME_TO_MODULE.get(name)
    if mod is None:
        raise AttributeError(f"module {__name__!r} has no attribute {name!r}")
    value = getattr(import_module(f".{mod}", __name__), name)
    globals()[name] = value
    return value


def __dir__():
    return sorted(set(globals()) | set(__all__))


def electrode_basis(layout, points_m):
    """Potential per volt of each electrode at points (P, 3) m: shape (P, n_electrodes)."""
    return layout.electrode_basis(points_m)
