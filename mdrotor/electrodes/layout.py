"""Electrode layouts: shapes, roles, limits, and their TOML files.

A layout is a set of named electrodes in the trap plane z = 0, each a
rectangle or a polygon (optionally with holes), with a role (``"rf"`` or
``"dc"``), a voltage limit and an optional group. Electrodes of one group
are wired together: they form one *channel* (one voltage). An electrode
without a group is its own channel, named like the electrode. The rest of
the plane is grounded (gapless-plane model, see
:mod:`mdrotor.electrodes.potentials`).

Layout file (TOML; every key is listed here)::

    [layout]
    name = "ring8-triangle3"
    description = "..."          # optional
    units = "um"                 # unit of bare numbers in coordinates (optional)
    arc_segments = 96            # polygon vertices per full turn for arcs

    [trap]
    point = "rf_null"            # or ["0 um", "0 um", "80 um"]
    guess = [0, 0, 80]           # optional start for the RF-null search

    [rf]                         # optional defaults for the pseudopotential
    amplitude = "200 V"
    f_drive = "30 MHz"
    species = "40Ca+"

    [design]                     # optional: the crystal the layout is meant to pin
    ions = 3                     # regular N-gon (2: a string)
    order = 3                    # in-plane order n, a multiple of ions
    strength = "2e10 V/m^3"      # c_n

    [[electrode]]
    name = "rf"
    role = "rf"                  # "rf" or "dc"
    limit = "300 V"              # required: |V| (rf: amplitude) never above it
    group = "rf"                 # optional: electrodes of a group share a voltage
    # exactly one shape:
    annulus = { center = [0, 0], r_inner = 70, r_outer = 200 }
    # rect    = { x = [x1, x2], y = [y1, y2] }
    # polygon = [[x, y], ...]      (+ optional holes = [[[x, y], ...], ...])
    # sector  = { center = [0, 0], r_inner = 200, r_outer = 450,
    #             start = "-22.5 deg", stop = "22.5 deg" }
    # disc    = { center = [0, 0], radius = 70 }

    [[segments]]                 # a ring of `count` equal sector electrodes
    name = "s"                   # electrodes s0, s1, ... counter-clockwise
    count = 8
    role = "dc"
    limit = "15 V"
    center = [0, 0]
    r_inner = 200
    r_outer = 450
    offset = "0 deg"             # angle of the middle of s0

Coordinates are strings with units (``"120 um"``) or bare numbers in
``layout.units``. Angles need units (``"30 deg"``). Arcs are drawn on the
regular ``arc_segments``-gon inscribed in their circle (the arc's ends on
its edges), so electrodes that meet along a circle share one boundary line
and touch without gap or overlap.

Validation (one :class:`~mdrotor.errors.InputError` naming file and key):
unknown keys, missing or non-positive limits, unknown roles, duplicate
names, self-intersecting or degenerate polygons, holes outside their
electrode, overlapping electrodes (touching along edges is allowed, as the
plane is gapless), groups mixing roles, and a trap point at or below the
surface.
"""

from __future__ import annotations

import math
import tomllib
from dataclasses import dataclass
from pathlib import Path

import numpy as np

from mdrotor import units as _units
from mdrotor.electrodes import polygons as _poly
from mdrotor.electrodes.potentials import PlaneElectrodes
from mdrotor.electrodes.pseudo import find_rf_null
from mdrotor.errors import InputError
from mdrotor.inputfiles import read_text
from mdrotor.physics.species import get_species

__all__ = [
    "Electrode",
    "Layout",
    "load_layout",
    "parse_layout",
    "rectangle",
    "polygon",
    "sector",
    "annulus",
    "disc",
    "ring_segments",
    "ROLES",
]

ROLES = ("rf", "dc")
#: Relative overlap area (of the smaller electrode) still taken as touching.
OVERLAP_REL_TOL = 1e-9
DEFAULT_ARC_SEGMENTS = 96
#: The overlap check's cost grows with the square of the vertices: 1024 per turn
#: takes half a minute for a ring of six segments (4096: four minutes, 4 GB).
MAX_ARC_SEGMENTS = 1024


@dataclass(frozen=True, eq=False)
class Electrode:
    """One electrode in the plane z = 0.

    Attributes
    ----------
    name : str
    role : str
        ``"rf"`` or ``"dc"``.
    limit_v : float
        Largest allowed |V| in volts (for rf: the amplitude).
    outer_m : (k, 2) array
        Outer boundary, counter-clockwise, m.
    holes_m : tuple of (k, 2) arrays
        Holes, each counter-clockwise, m.
    rect_m : tuple or None
        ``(x1, x2, y1, y2)`` in m when the electrode is an axis-aligned
        rectangle (its potential then uses House's closed form).
    group : str or None
        Channel the electrode is wired to (``None``: its own).
    key : str
        Where it was defined (``"electrode[2]"``), for messages.
    """

    name: str
    role: str
    limit_v: float
    outer_m: np.ndarray
    holes_m: tuple = ()
    rect_m: tuple | None = None
    group: str | None = None
    key: str = ""

    @property
    def channel(self) -> str:
        """Name of the voltage channel (the group, or the electrode's name)."""
        return self.group if self.group else self.name

    @property
    def area_m2(self) -> float:
        return _poly.signed_area(self.outer_m) - sum(_poly.signed_area(h) for h in self.holes_m)

    def pieces(self):
        """Signed triangle sets: [(+1, outer triangles), (-1, hole triangles) ...]."""
        out = [(1.0, _poly.triangulate(self.outer_m))]
        out += [(-1.0, _poly.triangulate(h)) for h in self.holes_m]
        return out

    def edges(self):
        """Boundary edges (a, b), outer counter-clockwise, holes clockwise."""
        loops = [self.outer_m] + [h[::-1] for h in self.holes_m]
        a = np.vstack(loops)
        b = np.vstack([np.roll(v, -1, axis=0) for v in loops])
        return a, b


# ----------------------------------------------------------------------------
# shape builders (SI in, used by the loader and by Python callers)


def _xy(v, key, source):
    arr = np.asarray(v, dtype=float)
    if arr.ndim != 2 or arr.shape[1] != 2 or len(arr) < 3:
        raise InputError(key, "expected a list of at least 3 [x, y] vertices", source)
    if np.allclose(arr[0], arr[-1], rtol=0, atol=1e-12 * max(1e-300, float(np.max(np.abs(arr))))):
        arr = arr[:-1]  # an explicitly closed polygon
    return arr


def rectangle(name, x_m, y_m, *, role="dc", limit_v, group=None, key="", source=None) -> Electrode:
    """Axis-aligned rectangle electrode ``x_m = (x1, x2)``, ``y_m = (y1, y2)`` in m."""
    x1, x2 = sorted(float(v) for v in x_m)
    y1, y2 = sorted(float(v) for v in y_m)
    if not (x2 > x1 and y2 > y1):
        raise InputError(f"{key}.rect" if key else "rect", f"'{name}': expected a rectangle of positive width and height", source)
    outer = np.array([[x1, y1], [x2, y1], [x2, y2], [x1, y2]])
    return Electrode(name, role, float(limit_v), outer, (), (x1, x2, y1, y2), group, key)


def polygon(name, vertices_m, *, holes_m=(), role="dc", limit_v, group=None, key="", source=None) -> Electrode:
    """Polygon electrode from its vertices (m, either orientation), with holes."""
    pre = f"{key}." if key else ""
    outer = _poly.ccw(_xy(vertices_m, f"{pre}polygon", source))
    holes = tuple(_poly.ccw(_xy(h, f"{pre}holes[{i}]", source)) for i, h in enumerate(holes_m))
    return Electrode(name, role, float(limit_v), outer, holes, None, group, key)


def sector(name, center_m, r_inner_m, r_outer_m, start_rad, stop_rad, *, role="dc", limit_v, group=None,
           arc_segments=DEFAULT_ARC_SEGMENTS, key="", source=None) -> Electrode:
    """Annular sector (r_inner_m may be 0 for a pie slice), angles in rad."""
    k = f"{key}.sector" if key else "sector"
    if not (0.0 <= r_inner_m < r_outer_m):
        raise InputError(k, f"'{name}': expected 0 <= r_inner < r_outer", source)
    if not (0.0 < stop_rad - start_rad < 2.0 * math.pi):
        raise InputError(k, f"'{name}': expected start < stop < start + 360 deg", source)
    outer = _poly.arc_points(center_m, r_outer_m, start_rad, stop_rad, arc_segments)
    if r_inner_m > 0.0:
        inner = _poly.arc_points(center_m, r_inner_m, stop_rad, start_rad, arc_segments)
    else:
        inner = np.array([[center_m[0], center_m[1]]], dtype=float)
    return Electrode(name, role, float(limit_v), _poly.ccw(np.vstack([outer, inner])), (), None, group, key)


def _circle(center_m, r_m, arc_segments):
    pts = _poly.arc_points(center_m, r_m, 0.0, 2.0 * math.pi, arc_segments)
    return pts[:-1]  # the last point repeats the first


def disc(name, center_m, radius_m, *, role="dc", limit_v, group=None, arc_segments=DEFAULT_ARC_SEGMENTS,
         key="", source=None) -> Electrode:
    """Disc electrode, drawn as a regular ``arc_segments``-gon inscribed in the circle."""
    if not radius_m > 0.0:
        raise InputError(f"{key}.disc" if key else "disc", f"'{name}': expected radius > 0", source)
    return Electrode(name, role, float(limit_v), _circle(center_m, radius_m, arc_segments), (), None, group, key)


def annulus(name, center_m, r_inner_m, r_outer_m, *, role="dc", limit_v, group=None,
            arc_segments=DEFAULT_ARC_SEGMENTS, key="", source=None) -> Electrode:
    """Ring electrode: an outer regular polygon with an inner one as hole."""
    if not (0.0 < r_inner_m < r_outer_m):
        raise InputError(f"{key}.annulus" if key else "annulus", f"'{name}': expected 0 < r_inner < r_outer", source)
    return Electrode(name, role, float(limit_v), _circle(center_m, r_outer_m, arc_segments),
                     (_circle(center_m, r_inner_m, arc_segments),), None, group, key)


def ring_segments(prefix, count, center_m, r_inner_m, r_outer_m, *, offset_rad=0.0, role="dc", limit_v,
                  group=None, arc_segments=DEFAULT_ARC_SEGMENTS, key="", source=None) -> list[Electrode]:
    """``count`` equal annular sectors named prefix0, prefix1, ... counter-clockwise.

    Segment k spans the angles offset + (k -+ 1/2) 2 pi / count.
    """
    if not (isinstance(count, int) and count >= 1):
        raise InputError(f"{key}.count" if key else "count", f"expected a whole number >= 1, got {count!r}", source)
    step = 2.0 * math.pi / count
    return [sector(f"{prefix}{k}", center_m, r_inner_m, r_outer_m, offset_rad + (k - 0.5) * step,
                   offset_rad + (k + 0.5) * step, role=role, limit_v=limit_v, group=group,
                   arc_segments=arc_segments, key=key, source=source) for k in range(count)]


# ----------------------------------------------------------------------------
# the layout


def _make_geometry(electrodes, owners, n) -> PlaneElectrodes:
    """Pieces of ``electrodes`` for the potential code; electrode k belongs to
    column ``owners[k]`` of ``n``."""
    rects, rect_owner, tris, tri_sign, tri_owner, ea, eb, eo = [], [], [], [], [], [], [], []
    for e, own in zip(electrodes, owners):
        if e.rect_m is not None:
            rects.append(e.rect_m)
            rect_owner.append(own)
        else:
            for sign, t in e.pieces():
                tris.append(t)
                tri_sign.append(np.full(len(t), sign))
                tri_owner.append(np.full(len(t), own))
        a, b = e.edges()
        ea.append(a)
        eb.append(b)
        eo.append(np.full(len(a), own))
    return PlaneElectrodes(
        n=n,
        rects=np.array(rects, dtype=float).reshape(-1, 4),
        rect_owner=np.array(rect_owner, dtype=int),
        tris=np.concatenate(tris) if tris else np.zeros((0, 3, 2)),
        tri_sign=np.concatenate(tri_sign) if tri_sign else np.zeros(0),
        tri_owner=np.concatenate(tri_owner).astype(int) if tri_owner else np.zeros(0, dtype=int),
        edge_a=np.vstack(ea), edge_b=np.vstack(eb), edge_owner=np.concatenate(eo).astype(int))


class Layout:
    """A validated electrode layout and its potentials.

    Parameters
    ----------
    electrodes : sequence of Electrode
    trap_point_m : (3,) array-like, ``"rf_null"`` or None
        The trap location (z > 0), or ``"rf_null"`` to find it from the rf
        electrodes (:func:`mdrotor.electrodes.pseudo.find_rf_null`).
    guess_m : (3,) array-like, optional
        Start of the RF-null search.
    name, description, source : str
    rf_amplitude_v, rf_drive_hz : float, optional
        Defaults for the pseudopotential.
    species : str, optional
        Ion species name for the pseudopotential (``"40Ca+"``).
    design : dict, optional
        ``ions``, ``order``, ``strength_si``: the crystal the layout is meant
        to pin (informational; the solves take their own arguments).

    Raises
    ------
    InputError
        For any of the faults listed in the module docstring.

    Notes
    -----
    Voltages are given per *channel* (a group, or a lone electrode): either
    a mapping ``{channel_name: volts}`` (missing channels at 0 V) or an
    array of length ``n_channels`` in the order of :attr:`channels`.
    """

    def __init__(self, electrodes, trap_point_m=None, *, guess_m=None, name="layout", description="",
                 source=None, rf_amplitude_v=None, rf_drive_hz=None, species=None, keys=None, design=None):
        self.name = name
        self.design = dict(design or {})
        self.description = description
        self.source = source or "<layout>"
        self.electrodes = tuple(electrodes)
        self.rf_amplitude_v = rf_amplitude_v
        self.rf_drive_hz = rf_drive_hz
        self.species = species
        self._keys = dict(keys or {})
        self._validate()
        self._build()
        self.guess_m = None if guess_m is None else np.asarray(guess_m, dtype=float)
        self.trap_from_rf_null = isinstance(trap_point_m, str)
        if trap_point_m is None:
            self.trap_point_m = None
        elif isinstance(trap_point_m, str):
            if trap_point_m != "rf_null":
                raise InputError(self._keys.get("trap", "trap.point"), f"expected [x, y, z] or 'rf_null', got {trap_point_m!r}", self.source)
            if not self.rf_channels:
                raise InputError(self._keys.get("trap", "trap.point"), "'rf_null' needs at least one electrode with role = 'rf'", self.source)

            self.trap_point_m = None
            res = find_rf_null(self, guess_m=self.guess_m)
            if not res.found:
                raise InputError(self._keys.get("trap", "trap.point"),
                                 f"no RF null found above the surface (smallest |E| per volt {res.field_per_v:.3g} 1/m at "
                                 f"z = {res.point_m[2] * 1e6:.4g} um); give the trap point as [x, y, z]", self.source)
            self.trap_point_m = res.point_m
        else:
            p = np.asarray(trap_point_m, dtype=float)
            if p.shape != (3,) or not np.all(np.isfinite(p)):
                raise InputError(self._keys.get("trap", "trap.point"), "expected three coordinates [x, y, z]", self.source)
            if p[2] <= 0.0:
                raise InputError(self._keys.get("trap", "trap.point"),
                                 f"z = {p[2] * 1e6:.6g} um is at or below the trap plane; expected a point above the surface (z > 0)",
                                 self.source)
            self.trap_point_m = p

    # -- construction ---------------------------------------------------------

    def _err(self, e: Electrode, what: str, expected: str):
        key = f"{e.key}.{what}" if e.key else f"electrode '{e.name}'.{what}"
        return InputError(key, f"'{e.name}': {expected}", self.source)

    def _validate(self):
        if not self.electrodes:
            raise InputError("electrode", "expected at least one [[electrode]] or [[segments]]", self.source)
        seen = {}
        for e in self.electrodes:
            if not isinstance(e.name, str) or not e.name:
                raise InputError(f"{e.key}.name", "expected a non-empty name", self.source)
            if e.name in seen:
                raise InputError(f"{e.key}.name", f"'{e.name}' is used twice (also {seen[e.name]}); expected unique names", self.source)
            seen[e.name] = e.key or e.name
            if e.role not in ROLES:
                raise self._err(e, "role", f"expected role 'rf' or 'dc', got {e.role!r}")
            if not (math.isfinite(e.limit_v) and e.limit_v > 0.0):
                raise self._err(e, "limit", f"expected a positive voltage limit such as '15 V', got {e.limit_v!r} V")
            shape = "rect" if e.rect_m is not None else "polygon"
            bad = _poly.self_intersection(e.outer_m)
            if bad is not None:
                i, j, pt, what = bad
                raise self._err(e, shape, f"polygon is not simple: edges {i} and {j} {what} near "
                                          f"({pt[0] * 1e6:.4g}, {pt[1] * 1e6:.4g}) um; expected a simple (non-self-intersecting) polygon")
            for h, hole in enumerate(e.holes_m):
                bad = _poly.self_intersection(hole)
                if bad is not None:
                    i, j, pt, what = bad
                    raise self._err(e, f"holes[{h}]", f"hole is not simple: edges {i} and {j} {what} near "
                                                      f"({pt[0] * 1e6:.4g}, {pt[1] * 1e6:.4g}) um")
            pieces = e.pieces()
            outer_area = _poly.signed_area(e.outer_m)
            for h, hole in enumerate(e.holes_m):
                ha = _poly.signed_area(hole)
                inside = _poly.region_overlap_area([(1.0, pieces[0][1])], [(1.0, pieces[1 + h][1])])
                if abs(inside - ha) > OVERLAP_REL_TOL * outer_area:
                    raise self._err(e, f"holes[{h}]", "expected each hole inside the electrode's outer boundary")
                for g in range(h):
                    ov = _poly.region_overlap_area([(1.0, pieces[1 + g][1])], [(1.0, pieces[1 + h][1])])
                    if ov > OVERLAP_REL_TOL * ha:
                        raise self._err(e, f"holes[{h}]", f"hole overlaps hole {g}; expected disjoint holes")
            if not e.area_m2 > 0.0:
                raise self._err(e, shape, "expected an electrode of positive area")
        # groups
        names = {e.name for e in self.electrodes}
        roles = {}
        for e in self.electrodes:
            if e.group:
                if e.group in names and e.group != e.name:
                    other = next(x for x in self.electrodes if x.name == e.group)
                    if other.group != e.group:
                        raise self._err(e, "group", f"group '{e.group}' has the name of another electrode; expected a distinct group name")
                if roles.setdefault(e.group, e.role) != e.role:
                    raise self._err(e, "group", f"group '{e.group}' mixes roles 'rf' and 'dc'; expected one role per group")
        # overlaps
        pieces = [e.pieces() for e in self.electrodes]
        boxes = np.array([[e.outer_m[:, 0].min(), e.outer_m[:, 0].max(), e.outer_m[:, 1].min(), e.outer_m[:, 1].max()]
                          for e in self.electrodes])
        for j in range(len(self.electrodes)):
            for i in range(j):
                bi, bj = boxes[i], boxes[j]
                if min(bi[1], bj[1]) <= max(bi[0], bj[0]) or min(bi[3], bj[3]) <= max(bi[2], bj[2]):
                    continue
                ov = _poly.region_overlap_area(pieces[i], pieces[j])
                ei, ej = self.electrodes[i], self.electrodes[j]
                if ov > OVERLAP_REL_TOL * min(ei.area_m2, ej.area_m2):
                    shape = "rect" if ej.rect_m is not None else "polygon"
                    raise self._err(ej, shape, f"overlaps electrode '{ei.name}' ({ei.key or 'python'}) by "
                                               f"{ov * 1e12:.4g} um^2; expected electrodes that at most touch along edges")

    def _build(self):
        channels = []
        for e in self.electrodes:
            if e.channel not in channels:
                channels.append(e.channel)
        self.channels = tuple(channels)
        self.channel_roles = tuple(next(e.role for e in self.electrodes if e.channel == c) for c in channels)
        self.channel_limits_v = np.array([min(e.limit_v for e in self.electrodes if e.channel == c) for c in channels])
        self.electrode_channel = np.array([channels.index(e.channel) for e in self.electrodes], dtype=int)
        inc = np.zeros((len(self.electrodes), len(channels)))
        inc[np.arange(len(self.electrodes)), self.electrode_channel] = 1.0
        self._inc = inc
        self.geometry = _make_geometry(self.electrodes, range(len(self.electrodes)), len(self.electrodes))
        rf = [e for e in self.electrodes if e.role == "rf"]
        #: all rf electrodes as one piece (driven together), for the pseudopotential
        self.rf_geometry = _make_geometry(rf, [0] * len(rf), 1) if rf else None

    # -- bookkeeping ------------------------------------------------------------

    @property
    def n_channels(self) -> int:
        return len(self.channels)

    @property
    def rf_channels(self) -> list[int]:
        """Indices of the rf channels."""
        return [i for i, r in enumerate(self.channel_roles) if r == "rf"]

    @property
    def dc_channels(self) -> list[int]:
        """Indices of the dc channels."""
        return [i for i, r in enumerate(self.channel_roles) if r == "dc"]

    def electrode(self, name: str) -> Electrode:
        for e in self.electrodes:
            if e.name == name:
                return e
        raise KeyError(name)

    def voltage_vector(self, voltages) -> np.ndarray:
        """Per-channel voltages (V) from a mapping or an array.

        Parameters
        ----------
        voltages : mapping or array-like
            ``{channel: volts}`` (missing channels at 0 V) or an array of
            length ``n_channels``; a scalar sets every channel.
        """
        if isinstance(voltages, dict):
            v = np.zeros(self.n_channels)
            for k, val in voltages.items():
                if k not in self.channels:
                    raise InputError(f"voltages.{k}", f"unknown channel; expected one of {', '.join(self.channels)}", self.source)
                v[self.channels.index(k)] = float(val)
            return v
        v = np.asarray(voltages, dtype=float)
        if v.ndim == 0:
            return np.full(self.n_channels, float(v))
        if v.shape != (self.n_channels,):
            raise InputError("voltages", f"expected {self.n_channels} channel voltages ({', '.join(self.channels)}), got shape {v.shape}", self.source)
        return v

    # -- potentials -------------------------------------------------------------

    def electrode_basis(self, points_m) -> np.ndarray:
        """Potential per volt of each electrode at the points, shape (P, n_electrodes)."""
        return self.geometry.potential_basis(points_m)

    def channel_basis(self, points_m) -> np.ndarray:
        """Potential per volt of each channel, shape (P, n_channels)."""
        return self.geometry.potential_basis(points_m) @ self._inc

    def field_basis(self, points_m) -> np.ndarray:
        """Electric field per volt of each channel, shape (P, n_channels, 3), V/m per V."""
        return np.einsum("pek,ec->pck", self.geometry.field_basis(points_m), self._inc)

    def hessian_basis(self, points_m) -> np.ndarray:
        """Potential Hessian per volt of each channel, (P, n_channels, 3, 3), V/m^2 per V."""
        return np.einsum("peij,ec->pcij", self.geometry.hessian_basis(points_m), self._inc)

    def potential(self, points_m, voltages) -> np.ndarray:
        """Potential (V) at points (P, 3) in m for channel voltages."""
        return self.channel_basis(points_m) @ self.voltage_vector(voltages)

    def field(self, points_m, voltages) -> np.ndarray:
        """Electric field E = -grad phi (V/m), shape (P, 3)."""
        return np.einsum("pck,c->pk", self.field_basis(points_m), self.voltage_vector(voltages))

    def hessian(self, points_m, voltages) -> np.ndarray:
        """Hessian of the potential (V/m^2), shape (P, 3, 3)."""
        return np.einsum("pcij,c->pij", self.hessian_basis(points_m), self.voltage_vector(voltages))

    def rf_vector(self) -> np.ndarray:
        """Channel vector with 1 on every rf channel (all driven in phase)."""
        v = np.zeros(self.n_channels)
        v[self.rf_channels] = 1.0
        return v

    def with_trap_point(self, point_m) -> "Layout":
        """The same layout with another trap point (m)."""
        return Layout(self.electrodes, point_m, name=self.name, description=self.description, source=self.source,
                      rf_amplitude_v=self.rf_amplitude_v, rf_drive_hz=self.rf_drive_hz, species=self.species,
                      keys=self._keys, design=self.design)

    def to_dict(self) -> dict:
        """Plain summary (SI units and names with units) for JSON output."""
        return {
            "name": self.name,
            "source": self.source,
            "trap_point_um": None if self.trap_point_m is None else [float(x) * 1e6 for x in self.trap_point_m],
            "trap_from_rf_null": self.trap_from_rf_null,
            "channels": [{"name": c, "role": r, "limit_v": float(l),
                          "electrodes": [e.name for e in self.electrodes if e.channel == c]}
                         for c, r, l in zip(self.channels, self.channel_roles, self.channel_limits_v)],
            "rf_amplitude_v": self.rf_amplitude_v,
            "rf_drive_hz": self.rf_drive_hz,
            "species": self.species,
            "design": self.design,
        }

    def __repr__(self):
        tp = "None" if self.trap_point_m is None else "(" + ", ".join(f"{x * 1e6:.4g}" for x in self.trap_point_m) + ") um"
        return f"Layout({self.name!r}, {len(self.electrodes)} electrodes, {self.n_channels} channels, trap {tp})"


# ----------------------------------------------------------------------------
# TOML loading

_TOP_KEYS = {"layout", "trap", "rf", "design", "electrode", "segments"}
_DESIGN_KEYS = {"ions", "order", "strength"}
_LAYOUT_KEYS = {"name", "description", "units", "arc_segments"}
_TRAP_KEYS = {"point", "guess"}
_RF_KEYS = {"amplitude", "f_drive", "species"}
_SHAPES = ("rect", "polygon", "sector", "annulus", "disc")
_ELECTRODE_KEYS = {"name", "role", "limit", "group", "holes", *_SHAPES}
_SEGMENT_KEYS = {"name", "count", "role", "limit", "group", "center", "r_inner", "r_outer", "offset"}
_SHAPE_KEYS = {
    "rect": {"x", "y"},
    "sector": {"center", "r_inner", "r_outer", "start", "stop"},
    "annulus": {"center", "r_inner", "r_outer"},
    "disc": {"center", "radius"},
}


def _check_keys(table, allowed, key, source):
    if not isinstance(table, dict):
        raise InputError(key, "expected a table", source)
    for k in table:
        if k not in allowed:
            where = f"{key}.{k}" if key else k
            raise InputError(where, f"unknown key; expected one of {', '.join(sorted(allowed))}", source)


class _Reader:
    """Parses quantities of one layout file (units, key paths, source)."""

    def __init__(self, source, scale_m):
        self.source = source
        self.scale_m = scale_m

    def length(self, value, key):
        if isinstance(value, (int, float)) and not isinstance(value, bool):
            if self.scale_m is None:
                raise InputError(key, f"expected a length such as '120 um' (a bare number needs layout.units = \"um\"), got {value!r}", self.source)
            return _units.number(value, key, self.source, "a length") * self.scale_m
        return _units.parse(value, "length", key, self.source)

    def point2(self, value, key):
        if not (isinstance(value, list) and len(value) == 2):
            raise InputError(key, f"expected a point [x, y], got {value!r}", self.source)
        return np.array([self.length(v, f"{key}[{i}]") for i, v in enumerate(value)])

    def point3(self, value, key):
        if not (isinstance(value, list) and len(value) == 3):
            raise InputError(key, f"expected a point [x, y, z] or 'rf_null', got {value!r}", self.source)
        return np.array([self.length(v, f"{key}[{i}]") for i, v in enumerate(value)])

    def vertices(self, value, key):
        if not (isinstance(value, list) and len(value) >= 3):
            raise InputError(key, "expected a list of at least 3 [x, y] vertices", self.source)
        return np.array([self.point2(v, f"{key}[{i}]") for i, v in enumerate(value)])

    def angle(self, value, key):
        if not isinstance(value, str):
            raise InputError(key, f"expected an angle with its unit such as '30 deg', got {value!r}", self.source)
        return _units.parse(value, "angle", key, self.source)

    def voltage(self, value, key):
        return _units.parse(value, "voltage", key, self.source)


def _common(tab, key, rd, what):
    name = tab.get("name")
    if not isinstance(name, str) or not name:
        raise InputError(f"{key}.name", f"missing: every {what} needs a name", rd.source)
    if "role" not in tab:
        raise InputError(f"{key}.role", f"'{name}': missing; expected role = 'rf' or 'dc'", rd.source)
    role = tab["role"]
    if role not in ROLES:
        raise InputError(f"{key}.role", f"'{name}': expected 'rf' or 'dc', got {role!r}", rd.source)
    if "limit" not in tab:
        raise InputError(f"{key}.limit", f"'{name}': missing; every electrode needs a voltage limit such as '15 V'", rd.source)
    limit = rd.voltage(tab["limit"], f"{key}.limit")
    if not limit > 0.0:
        raise InputError(f"{key}.limit", f"'{name}': expected a positive voltage limit such as '15 V'", rd.source)
    group = tab.get("group")
    if group is not None and (not isinstance(group, str) or not group):
        raise InputError(f"{key}.group", f"'{name}': expected a group name", rd.source)
    return name, role, limit, group


def _read_electrode(tab, key, rd, arc):
    _check_keys(tab, _ELECTRODE_KEYS, key, rd.source)
    name, role, limit, group = _common(tab, key, rd, "electrode")
    shapes = [s for s in _SHAPES if s in tab]
    if len(shapes) != 1:
        raise InputError(key, f"'{name}': expected exactly one shape key ({', '.join(_SHAPES)}), got {len(shapes)}", rd.source)
    s = shapes[0]
    sk = f"{key}.{s}"
    val = tab[s]
    if "holes" in tab and s != "polygon":
        raise InputError(f"{key}.holes", f"'{name}': holes are allowed only with polygon", rd.source)
    common = dict(role=role, limit_v=limit, group=group, key=key, source=rd.source)
    if s == "polygon":
        holes = tab.get("holes", [])
        if not isinstance(holes, list):
            raise InputError(f"{key}.holes", f"'{name}': expected a list of vertex lists", rd.source)
        return polygon(name, rd.vertices(val, sk), holes_m=[rd.vertices(h, f"{key}.holes[{i}]") for i, h in enumerate(holes)], **common)
    _check_keys(val, _SHAPE_KEYS[s], sk, rd.source)

    def need(k):
        if k not in val:
            raise InputError(f"{sk}.{k}", f"'{name}': missing", rd.source)
        return val[k]

    center = rd.point2(val.get("center", [0, 0] if rd.scale_m else ["0 m", "0 m"]), f"{sk}.center")
    if s == "rect":
        xs, ys = need("x"), need("y")
        for k, v in (("x", xs), ("y", ys)):
            if not (isinstance(v, list) and len(v) == 2):
                raise InputError(f"{sk}.{k}", f"'{name}': expected [{k}1, {k}2]", rd.source)
        return rectangle(name, [rd.length(v, f"{sk}.x[{i}]") for i, v in enumerate(xs)],
                         [rd.length(v, f"{sk}.y[{i}]") for i, v in enumerate(ys)], **common)
    if s == "sector":
        return sector(name, center, rd.length(need("r_inner"), f"{sk}.r_inner"), rd.length(need("r_outer"), f"{sk}.r_outer"),
                      rd.angle(need("start"), f"{sk}.start"), rd.angle(need("stop"), f"{sk}.stop"), arc_segments=arc, **common)
    if s == "annulus":
        return annulus(name, center, rd.length(need("r_inner"), f"{sk}.r_inner"), rd.length(need("r_outer"), f"{sk}.r_outer"),
                       arc_segments=arc, **common)
    return disc(name, center, rd.length(need("radius"), f"{sk}.radius"), arc_segments=arc, **common)


def _read_segments(tab, key, rd, arc):
    _check_keys(tab, _SEGMENT_KEYS, key, rd.source)
    name, role, limit, group = _common(tab, key, rd, "segments table")
    for k in ("count", "r_inner", "r_outer"):
        if k not in tab:
            raise InputError(f"{key}.{k}", f"'{name}': missing", rd.source)
    count = tab["count"]
    if isinstance(count, bool) or not isinstance(count, int) or count < 1:
        raise InputError(f"{key}.count", f"'{name}': expected a whole number >= 1, got {count!r}", rd.source)
    center = rd.point2(tab.get("center", [0, 0] if rd.scale_m else ["0 m", "0 m"]), f"{key}.center")
    offset = rd.angle(tab["offset"], f"{key}.offset") if "offset" in tab else 0.0
    return ring_segments(name, count, center, rd.length(tab["r_inner"], f"{key}.r_inner"),
                         rd.length(tab["r_outer"], f"{key}.r_outer"), offset_rad=offset, role=role, limit_v=limit,
                         group=group, arc_segments=arc, key=key, source=rd.source)


def parse_layout(data: dict, source: str = "<dict>") -> Layout:
    """Build a :class:`Layout` from the parsed TOML tables.

    Parameters
    ----------
    data : dict
        The TOML document as a dict.
    source : str
        File name used in error messages.
    """
    _check_keys(data, _TOP_KEYS, "", source)
    lay = data.get("layout", {})
    _check_keys(lay, _LAYOUT_KEYS, "layout", source)
    scale = None
    if "units" in lay:
        scale = _units.parse(f"1 {lay['units']}" if isinstance(lay["units"], str) else lay["units"], "length", "layout.units", source)
    arc = lay.get("arc_segments", DEFAULT_ARC_SEGMENTS)
    if isinstance(arc, bool) or not isinstance(arc, int) or not 8 <= arc <= MAX_ARC_SEGMENTS:
        raise InputError("layout.arc_segments", f"expected a whole number from 8 to {MAX_ARC_SEGMENTS}, got {arc!r}",
                         source)
    rd = _Reader(source, scale)
    electrodes = []
    for what, reader in (("electrode", _read_electrode), ("segments", _read_segments)):
        tabs = data.get(what, [])
        if not isinstance(tabs, list):
            raise InputError(what, f"expected [[{what}]] tables", source)
        for i, tab in enumerate(tabs):
            got = reader(tab, f"{what}[{i}]", rd, arc)
            electrodes.extend(got if isinstance(got, list) else [got])
    trap = data.get("trap", {})
    _check_keys(trap, _TRAP_KEYS, "trap", source)
    point = trap.get("point", "rf_null")
    if isinstance(point, str):
        if point != "rf_null":
            raise InputError("trap.point", f"expected [x, y, z] or 'rf_null', got {point!r}", source)
        point_m = point
    else:
        point_m = rd.point3(point, "trap.point")
    guess = rd.point3(trap["guess"], "trap.guess") if "guess" in trap else None
    rf = data.get("rf", {})
    _check_keys(rf, _RF_KEYS, "rf", source)
    amp = _units.parse(rf["amplitude"], "voltage", "rf.amplitude", source) if "amplitude" in rf else None
    fd = _units.parse(rf["f_drive"], "frequency", "rf.f_drive", source) if "f_drive" in rf else None
    species = rf.get("species")
    if species is not None:
        get_species(species, key="rf.species", source=source)
    design = _read_design(data.get("design", {}), source)
    name = lay.get("name", Path(source).stem)
    return Layout(electrodes, point_m, guess_m=guess, name=name, description=lay.get("description", ""), source=source,
                  rf_amplitude_v=amp, rf_drive_hz=fd, species=species, keys={"trap": "trap.point"}, design=design)


def _read_design(tab, source) -> dict:
    """The optional [design] table: the crystal the layout is meant to pin.

    ``ions`` (a regular N-gon, N = 2 a string), ``order`` (in-plane order n,
    a multiple of N) and ``strength`` (c_n with units V/m^n).
    """
    _check_keys(tab, _DESIGN_KEYS, "design", source)
    out = {}
    for k in ("ions", "order"):
        if k in tab:
            v = tab[k]
            if isinstance(v, bool) or not isinstance(v, int) or v < 1:
                raise InputError(f"design.{k}", f"expected a whole number >= 1, got {v!r}", source)
            out[k] = v
    if "ions" in out and out["ions"] < 2:
        raise InputError("design.ions", "expected at least 2 ions", source)
    if "order" in out and out["order"] > 6:
        raise InputError("design.order", f"expected an order 1..6, got {out['order']}", source)
    if "ions" in out and "order" in out and out["order"] % out["ions"]:
        raise InputError("design.order", f"order {out['order']} exerts no torque on a regular {out['ions']}-ion crystal; "
                                         f"expected a multiple of {out['ions']}", source)
    if "strength" in tab:
        if "order" not in out:
            raise InputError("design.strength", "needs design.order (for its unit V/m^n)", source)
        n = out["order"]
        out["strength_si"] = _units.parse(tab["strength"], "custom", "design.strength", source,
                                          dimensionality=_units.multipole_dimension(n), example=_units.multipole_example(n))
    return out


def load_layout(path) -> Layout:
    """Read and validate a layout TOML file.

    Parameters
    ----------
    path : str or Path

    Returns
    -------
    Layout

    Raises
    ------
    InputError
        Unreadable file, invalid TOML, or any validation fault; the message
        names the file and the key.
    """
    path = Path(path)
    source = str(path)
    text = read_text(path, "layout")
    try:
        data = tomllib.loads(text)
    except tomllib.TOMLDecodeError as exc:
        raise InputError("", f"not valid TOML: {exc}", source) from None
    return parse_layout(data, source)
