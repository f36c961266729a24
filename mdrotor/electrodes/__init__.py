"""Surface-electrode designs for pinning a rotating ion crystal.

Gapless-plane electrostatics of rectangle and polygon electrodes, layout
files, the RF pseudopotential, multipole expansions at the trap point and
voltage solves for static targets and rotating in-plane multipoles.

Modules
-------
polygons    planar geometry: simplicity, triangulation, overlap areas
potentials  solid angles (House; Van Oosterom-Strackee), fields, Hessians
layout      Electrode, Layout, TOML files and their validation
pseudo      RF pseudopotential: null, secular frequencies, q, depth
multipoles  real solid-harmonic fit, in-plane coefficients k_n
solve       voltages for static targets and rotating order-n pinning

Typical use::

    from mdrotor.electrodes import load_layout, rf_pseudopotential, fit_multipoles, solve_rotating
    lay = load_layout("configs/electrodes/ring8_triangle3.toml")
    trap = rf_pseudopotential(lay)                 # rf amplitude, drive, species from the file
    table = fit_multipoles(lay)                    # per volt of each channel
    plan = solve_rotating(lay, 3, 2e10, table=table)  # c_3 in V/m^3
    plan.voltages_at(theta_rad)                    # V per channel

Voltages must stay within the trap's rated limits and the lab's safety
rules (see :data:`CAUTION`).
"""

from .layout import (Electrode, Layout, annulus, disc, load_layout, parse_layout, polygon, rectangle,
                     ring_segments, sector)
from .multipoles import (MultipoleTable, field_terms, fit_multipoles, fit_potential, harmonic_terms,
                         hessian_terms, inplane_terms, pinning_orders, solid_harmonics, sphere_rule)
from .pseudo import NullResult, PseudoTrap, find_rf_null, pseudo_energy_j, rf_pseudopotential
from .solve import CAUTION, RotatingPlan, StaticSolution, solve_rotating, solve_static


def electrode_basis(layout: Layout, points_m):
    """Potential per volt of each electrode at points (P, 3) m: shape (P, n_electrodes)."""
    return layout.electrode_basis(points_m)


__all__ = [
    "Electrode", "Layout", "load_layout", "parse_layout", "rectangle", "polygon", "sector", "annulus", "disc",
    "ring_segments", "electrode_basis",
    "MultipoleTable", "fit_multipoles", "fit_potential", "harmonic_terms", "solid_harmonics", "sphere_rule",
    "field_terms", "hessian_terms", "inplane_terms", "pinning_orders",
    "NullResult", "PseudoTrap", "find_rf_null", "pseudo_energy_j", "rf_pseudopotential",
    "CAUTION", "StaticSolution", "RotatingPlan", "solve_static", "solve_rotating",
]
