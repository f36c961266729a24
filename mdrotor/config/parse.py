"""Run configuration: TOML files -> frozen, validated dataclasses.

Every value with a dimension is a string with units ("1.1 MHz", "5 um");
frequencies are cyclic (Hz). Every problem is reported as one
:class:`~mdrotor.errors.InputError` naming the file, the dotted key path and
what was expected. The keys are documented in docs/config.md; ``configs/demo.toml`` uses most
of them.
"""

from __future__ import annotations

import tomllib
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np

from mdrotor import units
from mdrotor.config.noise import parse_noise
from mdrotor.config.schedule import Schedule, Stage, parse_profile, stage_scales
from mdrotor.electrodes.polynomial import layout_pinning
from mdrotor.errors import InputError, PhysicsError
from mdrotor.inputfiles import read_text
from mdrotor.physics.laser import PATTERNS, Beam, emission_tensor
from mdrotor.physics.mathieu import secular_frequency_hz, solve_point_trap
from mdrotor.physics.multipole import MultipoleTerm, quadrupole_magnitude
from mdrotor.physics.noise import NoiseModel
from mdrotor.physics.species import cooling_line, custom_species, get_species
from mdrotor.physics.statics import MODE_GROUPS, MODE_LABELS, occupation_selector_known
from mdrotor.physics.trap import Trap, check_rotation

# allowed keys per section (anything else is a typo and is refused)
SECTIONS = {
    "species": {"ion", "custom"},
    "crystal": {"ions", "search_seed"},
    "trap": {"model", "f_radial", "f_axial", "radial_split", "f_drive", "a", "q", "stray_field", "rf_phase"},
    "pinning": {"order", "strength", "angle", "name", "layout"},
    "rotation": {"f_start"},
    "stage": {"name", "duration", "f_rot", "pinning"},
    "initial": {"temperature", "wigner", "occupations"},
    "run": {"trajectories", "seed", "dt", "integrator", "chunk", "threads", "steps_per_period", "force"},
    "observe": {"loss_radius", "series_interval"},
    "noise": None,  # validated by mdrotor.physics.noise
    "laser": {"name", "species", "wavelength", "linewidth", "detuning", "saturation", "direction", "waist", "centre",
              "emission", "stages"},
}
CUSTOM_KEYS = {"mass", "charge", "statistics"}
INTEGRATORS = ("verlet", "order4")


@dataclass(frozen=True)
class Initial:
    """Initial-state sampling: temperature (K), Wigner zero-point motion,
    per-mode occupations by label / kind / plane (override the temperature)."""

    temperature_k: float = 0.0
    wigner: bool = True
    occupations: tuple = ()  # ((selector, n), ...)


@dataclass(frozen=True)
class RunOptions:
    trajectories: int = 100
    seed: int = 0
    dt_s: float | None = None
    integrator: str = "verlet"
    chunk: int = 0
    threads: int = 0
    steps_per_period: int = 40
    force: bool = False  # run even when the preflight refuses (mdrotor.engine.preflight.preflight)


@dataclass(frozen=True)
class Observe:
    loss_radius_m: float = 100e-6
    series_interval_s: float | None = None


@dataclass(frozen=True)
class Config:
    """A validated run configuration (SI units inside).

    Attributes
    ----------
    source : str
        Where it came from (path, or "<dict>").
    text : str
        The TOML text (with overrides applied), stored in results.
    species : tuple of Species, one per ion
    trap : Trap
    pinning : tuple of MultipoleTerm
    schedule : Schedule or None
    initial, run, observe : option records
    noise : mdrotor.physics.noise.NoiseModel or None
        The ``[noise]`` table, parsed once (:func:`mdrotor.config.noise.parse_noise`); None without one.
    lasers : tuple of mdrotor.physics.laser.Beam
        The ``[[laser]]`` beams.
    """

    source: str
    text: str
    species: tuple
    trap: Trap
    pinning: tuple
    schedule: Schedule | None
    initial: Initial
    run: RunOptions
    observe: Observe
    f_start_hz: float = 0.0
    search_seed: int = 0
    noise: NoiseModel | None = None
    lasers: tuple = ()
    raw: dict = field(default_factory=dict, repr=False)
    base_dir: str | None = None  # the folder relative paths (layouts, ramp tables) are read from

    @property
    def n_ions(self) -> int:
        return len(self.species)

    def names(self) -> dict:
        """What the parts of this config are called, for labels: ``stages``
        (in schedule order) and ``pinning`` (``[name, order]`` per term)."""
        return {"stages": [s.name for s in self.schedule.stages] if self.schedule is not None else [],
                "pinning": [[t.name, int(t.order)] for t in self.pinning]}

    @property
    def masses_kg(self) -> np.ndarray:
        return np.array([s.mass_kg for s in self.species])

    @property
    def charges_c(self) -> np.ndarray:
        return np.array([s.charge_c for s in self.species])


# ---------------------------------------------------------------------------
# Loading
# ---------------------------------------------------------------------------
def load_config(path_or_dict, overrides=(), *, source: str | None = None) -> Config:
    """Load and validate a run config.

    Parameters
    ----------
    path_or_dict : str, Path or dict
        A TOML file, or an already parsed dict (from a notebook).
    overrides : sequence of str
        ``"key.path=value"`` strings (the CLI's ``--set``); values are read
        as TOML values when they parse, else as strings.

    Raises
    ------
    InputError
        One message naming the file, the key and what was expected.
    """
    if isinstance(path_or_dict, dict):
        import copy

        raw = copy.deepcopy(path_or_dict)
        src = source or "<dict>"
        base_dir = Path.cwd()
    else:
        p = Path(path_or_dict)
        src = source or str(path_or_dict)
        text = read_text(p, "config")
        try:
            raw = tomllib.loads(text)
        except tomllib.TOMLDecodeError as e:
            raise InputError("", f"not valid TOML ({e})", src) from None
        base_dir = p.parent
    for ov in overrides:
        apply_override(raw, ov, src)
    return from_dict(raw, src, base_dir)


def apply_override(raw: dict, text: str, source: str) -> None:
    """Apply one ``key.path=value`` override in place.

    Stages are addressed by name (``stage.spin-up.duration``) or by index
    (``stage.0.duration``).
    """
    if "=" not in text:
        raise InputError("--set", f"expected key.path=value, got {text!r}", source)
    key, val = text.split("=", 1)
    key = key.strip()
    try:
        value = tomllib.loads(f"v = {val}")["v"]
    except tomllib.TOMLDecodeError:
        value = val.strip()
    set_path(raw, key, value, source)


def set_path(raw: dict, key: str, value, source: str) -> None:
    parts = key.split(".")
    if not key or any(not p for p in parts):
        raise InputError(key, "expected a dotted key path such as 'trap.f_radial'", source)
    node = raw
    for i, part in enumerate(parts[:-1]):
        if i == 1 and parts[0] in _NAMED and isinstance(node, dict) and len(parts) > 2:
            node = [node]  # one [pinning] table is addressed by its name as an item of [[pinning]] is
        if isinstance(node, list):
            node = _list_item(node, part, ".".join(parts[: i + 1]), source, parts[0] if i == 1 else "")
            continue
        if part not in node:
            if part in ("stage", "pinning", "laser") and i == 0:
                raise InputError(key, f"the config has no [{part}] to override", source)
            node[part] = {}
        node = node[part]
    if isinstance(node, list):
        raise InputError(key, "expected a key inside a list item (e.g. stage.<name>.duration)", source)
    node[parts[-1]] = value


#: Arrays whose items --set addresses by name, and the name an item without one
#: gets (the parsers' defaults: pinning n<order>, stage<i>, laser<i>).
_NAMED = {"pinning": lambda it, i: f"n{it.get('order')}", "stage": lambda it, i: f"stage{i}",
          "laser": lambda it, i: f"laser{i}"}


def _list_item(items: list, part: str, key: str, source: str, section: str = ""):
    default = _NAMED.get(section, lambda it, i: None)
    names = [it.get("name", default(it, i)) if isinstance(it, dict) else None for i, it in enumerate(items)]
    for it, name in zip(items, names):
        if name == part:
            return it
    if part.isdigit() and int(part) < len(items):
        return items[int(part)]
    raise InputError(key, f"no item named {part!r}; have {[n for n in names if n is not None]}", source)


def _check_keys(table, section: str, allowed: set, source: str):
    if not isinstance(table, dict):
        raise InputError(section, "expected a table", source)
    for k in table:
        if k not in allowed:
            raise InputError(f"{section}.{k}", f"unknown key; expected one of {sorted(allowed)}", source)


def _require(table: dict, key: str, section: str, source: str, what: str):
    if key not in table:
        raise InputError(f"{section}.{key}", f"missing; expected {what}", source)
    return table[key]


def _int(v, key, source, minimum=None, what="an integer"):
    if isinstance(v, bool) or not isinstance(v, int):
        raise InputError(key, f"expected {what}, got {v!r}", source)
    if minimum is not None and v < minimum:
        raise InputError(key, f"expected {what} >= {minimum}, got {v}", source)
    return v


def _species_list(raw, source):
    sp = raw.get("species", {})
    _check_keys(sp, "species", SECTIONS["species"], source)
    custom = {}
    for name, c in sp.get("custom", {}).items():
        _check_keys(c, f"species.custom.{name}", CUSTOM_KEYS, source)
        try:
            get_species(name)
        except InputError:
            pass
        else:
            raise InputError(f"species.custom.{name}", f"{name!r} is a known species (AME2020 mass, its own charge and "
                                                       f"statistics); expected a name of your own such as 'X+'", source)
        mass = units.parse(_require(c, "mass", f"species.custom.{name}", source, "a mass such as '40 u'"), "mass", f"species.custom.{name}.mass", source)
        if not mass > 0:
            raise InputError(f"species.custom.{name}.mass", f"expected a positive mass, got {c['mass']!r}", source)
        charge = _int(c.get("charge", 1), f"species.custom.{name}.charge", source, what="a non-zero integer charge state")
        if charge == 0:
            raise InputError(f"species.custom.{name}.charge", "expected a non-zero integer charge state", source)
        stat = c.get("statistics")
        if stat not in (None, "boson", "fermion"):
            raise InputError(f"species.custom.{name}.statistics", "expected 'boson' or 'fermion'", source)
        custom[name] = custom_species(mass, charge, name, stat)

    def lookup(name, key):
        if not isinstance(name, str):
            raise InputError(key, f"expected a species name such as '40Ca+', got {name!r}", source)
        if name in custom:
            return custom[name]
        return get_species(name, key=key, source=source)

    cr = raw.get("crystal")
    if cr is None:
        raise InputError("crystal", "missing; expected a [crystal] table with 'ions'", source)
    _check_keys(cr, "crystal", SECTIONS["crystal"], source)
    ions = _require(cr, "ions", "crystal", source, "a number of ions (1 to 30) or a list of species")
    if isinstance(ions, list):
        if not 1 <= len(ions) <= 30:
            raise InputError("crystal.ions", f"expected 1 to 30 ions, got {len(ions)}", source)
        out = [lookup(n, f"crystal.ions[{i}]") for i, n in enumerate(ions)]
        if "ion" in sp and sp["ion"] not in ions:
            raise InputError("species.ion", f"{sp['ion']!r} is not among crystal.ions {ions}; expected one of them, or "
                                            f"no species.ion (a list of species names every ion)", source)
    else:
        n = _int(ions, "crystal.ions", source, what="a number of ions (1 to 30) or a list of species")
        if not 1 <= n <= 30:
            raise InputError("crystal.ions", f"expected 1 to 30 ions, got {n}", source)
        name = _require(sp, "ion", "species", source, "a species name such as '40Ca+'")
        out = [lookup(name, "species.ion")] * n
    return tuple(out)


def _vec3(v, key, source, dim):
    if not isinstance(v, list) or len(v) != 3:
        raise InputError(key, f"expected a list of 3 values (x, y, z), got {v!r}", source)
    return tuple(units.parse(x, dim, f"{key}[{i}]", source) for i, x in enumerate(v))


def _trap(raw, species, source) -> Trap:
    tr = raw.get("trap")
    if tr is None:
        raise InputError("trap", "missing; expected a [trap] table", source)
    _check_keys(tr, "trap", SECTIONS["trap"], source)
    model = tr.get("model", "pseudo")
    if model not in ("pseudo", "rf"):
        raise InputError("trap.model", f"expected 'pseudo' or 'rf', got {model!r}", source)
    ref = species[0]
    stray = _vec3(tr["stray_field"], "trap.stray_field", source, "field") if "stray_field" in tr else (0.0, 0.0, 0.0)
    f_drive = None
    if "f_drive" in tr:
        f_drive = units.parse(tr["f_drive"], "frequency", "trap.f_drive", source)
        if not f_drive > 0:
            raise InputError("trap.f_drive", "expected a positive drive frequency", source)
    rf_phase = tr.get("rf_phase", "random")
    rf_phase = None if rf_phase == "random" else units.parse(rf_phase, "angle", "trap.rf_phase", source)
    a = q = None
    if "q" in tr or "a" in tr:
        if f_drive is None:
            raise InputError("trap.f_drive", "missing; Mathieu a and q need the drive frequency f_drive", source)
        if "f_radial" in tr or "f_axial" in tr:
            raise InputError("trap", "give either secular frequencies (f_radial, f_axial) or Mathieu parameters (a, q), not both", source)
        q = tuple(_numbers(_require(tr, "q", "trap", source, "3 Mathieu q values [q_x, q_y, q_z]"), "trap.q", source))
        a = tuple(_numbers(tr.get("a", [0.0, 0.0, 0.0]), "trap.a", source))
        if abs(sum(q)) > 1e-9 * max(abs(x) for x in q) or abs(sum(a)) > 1e-9 * max(1e-300, max(abs(x) for x in a)):
            raise InputError("trap.q", "Laplace's equation needs q_x + q_y + q_z = 0 and a_x + a_y + a_z = 0 (a point trap has q_x = q_y = -q_z/2)", source)
        fsec = []
        for u in range(3):
            try:
                fsec.append(float(secular_frequency_hz(f_drive, a[u], q[u])))
            except InputError:
                raise PhysicsError(f"trap.q[{u}]", f"the trap is unstable for (a, q) = ({a[u]:g}, {q[u]:g}) on axis {'xyz'[u]}: outside the first Mathieu stability region", source) from None
        f_sec = tuple(fsec)
    else:
        fr = units.parse(_require(tr, "f_radial", "trap", source, "a radial secular frequency such as '1.1 MHz'"), "frequency", "trap.f_radial", source)
        fz = units.parse(_require(tr, "f_axial", "trap", source, "an axial secular frequency such as '2.6 MHz'"), "frequency", "trap.f_axial", source)
        split = units.parse(tr.get("radial_split", "0 Hz"), "frequency", "trap.radial_split", source)
        if not fr > 0:
            raise InputError("trap.f_radial", f"expected a positive frequency, got {tr['f_radial']!r}", source)
        if not fz > 0:
            raise InputError("trap.f_axial", f"expected a positive frequency, got {tr['f_axial']!r}", source)
        if abs(split) >= 2 * fr:
            raise InputError("trap.radial_split", "expected a split smaller than twice f_radial", source)
        f_sec = (fr + split / 2, fr - split / 2, fz)
        if f_drive is not None:
            try:
                a_arr, q_arr = solve_point_trap(f_drive, f_sec)
            except PhysicsError as e:
                raise _point_trap_error(e, tr, f_sec, f_drive, source) from None
            a, q = tuple(map(float, a_arr)), tuple(map(float, q_arr))
    if model == "rf" and f_drive is None:
        raise InputError("trap.f_drive", "missing; model = 'rf' needs the drive frequency", source)
    trap = Trap(f_sec, ref.mass_kg, ref.charge_c, model, f_drive, a, q, stray, rf_phase)
    # every species must be confined
    try:
        w2 = trap.omega_sq(np.array([s.mass_kg for s in species]), np.array([s.charge_c for s in species]))
    except InputError:
        raise PhysicsError("crystal.ions", "a species of this crystal is not stably trapped (outside the Mathieu stability region after scaling by its charge-to-mass ratio)", source) from None
    if np.any(w2 <= 0):
        raise PhysicsError("trap", "the trap does not confine every ion (a secular frequency squared is not positive for some species)", source)
    return trap


def _hz(f: float) -> str:
    for unit, s in (("GHz", 1e9), ("MHz", 1e6), ("kHz", 1e3)):
        if abs(f) >= s:
            return f"{f / s:.4g} {unit}"
    return f"{f:.4g} Hz"


def _point_trap_error(e: PhysicsError, tr: dict, f_sec, f_drive: float, source) -> PhysicsError:
    """The point-trap solver's error in the config's terms: the key the user
    wrote for the axis at fault, the values as written, the numbers that matter."""
    axis = getattr(e, "axis", None)
    if axis is None:
        return PhysicsError("trap", e.expected, source)
    name = "f_axial" if axis == 2 else "f_radial"
    other = "f_radial" if axis == 2 else "f_axial"
    drive = f"f_drive = {tr['f_drive']!r}"
    given = repr(tr[name])
    if axis < 2 and "radial_split" in tr:
        given += f" (radial_split = {tr['radial_split']!r})"
    cause = getattr(e, "cause", "")
    if cause == "above_half_drive":
        text = (f"{name} = {given} is not below half the drive frequency ({drive}: {_hz(0.5 * f_drive)}); "
                f"expected a secular frequency below f_drive/2 (the first Mathieu stability region)")
    elif cause == "too_weak":
        ratio = (f_sec[axis] / e.f_rf_hz) ** 2
        text = (f"the trap is too weak for this drive: {name} = {given} at {drive} leaves only {ratio:.1e} of the "
                f"curvature of the {_hz(e.f_rf_hz)} RF confinement after the static defocusing that {other} = "
                f"{tr[other]!r} needs, beyond double precision; expected a stronger trap along this axis")
    else:
        text = (f"{name} = {given} is too close to half the drive frequency ({drive}: {_hz(0.5 * f_drive)}) to be "
                f"set in double precision; expected a lower {name} or a faster drive")
    return PhysicsError(f"trap.{name}", text, source)


def _numbers(v, key, source):
    if not isinstance(v, list) or len(v) != 3:
        raise InputError(key, f"expected a list of 3 numbers, got {v!r}", source)
    return [units.number(x, f"{key}[{i}]", source, "a number") for i, x in enumerate(v)]


def _pinning(raw, source, base_dir=None) -> tuple:
    pin = raw.get("pinning")
    if pin is None:
        return ()
    items = pin if isinstance(pin, list) else [pin]
    out = []
    for i, it in enumerate(items):
        sec = f"pinning[{i}]" if isinstance(pin, list) else "pinning"
        _check_keys(it, sec, SECTIONS["pinning"], source)
        order = _int(_require(it, "order", sec, source, "the multipole order n >= 2"), f"{sec}.order", source, 2, "the multipole order n")
        strength = units.parse(_require(it, "strength", sec, source, f"a strength such as '{units.multipole_example(order)}'"),
                               "custom", f"{sec}.strength", source, dimensionality=units.multipole_dimension(order),
                               example=units.multipole_example(order))
        angle = units.parse(it.get("angle", 0.0), "angle", f"{sec}.angle", source)
        name = it.get("name", f"n{order}")
        if not isinstance(name, str):
            raise InputError(f"{sec}.name", "expected a string", source)
        layout = None
        if "layout" in it:
            if not isinstance(it["layout"], str):
                raise InputError(f"{sec}.layout", "expected the path of an electrode layout file", source)

            layout = layout_pinning(it["layout"], order, strength, base_dir=base_dir, key=f"{sec}.layout", source=source)
        out.append(MultipoleTerm(order, strength, angle, name, layout))
    names = [t.name for t in out]
    if len(set(names)) != len(names):
        raise InputError("pinning", f"pinning terms need distinct names, got {names}", source)
    return tuple(out)


def _schedule(raw, pinning, f_start, source, base_dir) -> Schedule | None:
    stages = raw.get("stage")
    if stages is None:
        return None
    if not isinstance(stages, list) or not stages:
        raise InputError("stage", "expected one or more [[stage]] tables", source)
    prev_f = f_start
    prev_k = [1.0] * len(pinning)
    out, seen = [], set()
    for i, st in enumerate(stages):
        sec = f"stage[{i}]"
        _check_keys(st, sec, SECTIONS["stage"], source)
        name = st.get("name", f"stage{i}")
        if not isinstance(name, str) or not name:
            raise InputError(f"{sec}.name", "expected a non-empty string", source)
        if name in seen:
            raise InputError(f"{sec}.name", f"stage names must be unique; {name!r} repeats", source)
        seen.add(name)
        sec = f"stage.{name}"
        dur = units.parse(_require(st, "duration", sec, source, "a duration such as '2 ms'"), "time", f"{sec}.duration", source)
        if not dur > 0:
            raise InputError(f"{sec}.duration", f"expected a positive duration, got {st['duration']!r}", source)

        def freq(v, key):
            return units.parse(v, "frequency", key, source)

        fprof = parse_profile(st.get("f_rot", {}), prev_f, dur, freq, f"{sec}.f_rot", source, base_dir)
        pspec = st.get("pinning", {})
        profs = []
        per_term = isinstance(pspec, dict) and pinning and all(k in {t.name for t in pinning} for k in pspec) and pspec
        for j, term in enumerate(pinning):
            spec = pspec.get(term.name, {}) if per_term else pspec
            key = f"{sec}.pinning.{term.name}" if per_term else f"{sec}.pinning"

            def mult(v, k, term=term):
                if isinstance(v, str):
                    val = units.parse(v, "custom", k, source, dimensionality=units.multipole_dimension(term.order),
                                      example=units.multipole_example(term.order))
                    return val / term.strength if term.strength else 0.0
                return units.number(v, k, source, f"a multiplier of the configured strength (e.g. 0.5) or a strength such as "
                                                  f"'{units.multipole_example(term.order)}'")

            profs.append(parse_profile(spec, prev_k[j], dur, mult, key, source, base_dir))
        if pspec and not pinning:
            raise InputError(f"{sec}.pinning", "the stage schedules pinning but the config has no [pinning]", source)
        stage = Stage(name, dur, fprof, tuple(profs))
        prev_f = float(fprof.value(dur))
        prev_k = [float(p.value(dur)) for p in profs]
        out.append(stage)
    return Schedule(tuple(out), tuple(t.name for t in pinning))


def _initial(raw, source) -> Initial:
    ini = raw.get("initial", {})
    _check_keys(ini, "initial", SECTIONS["initial"], source)
    temp = units.parse(ini.get("temperature", 0.0), "temperature", "initial.temperature", source)
    if temp < 0:
        raise InputError("initial.temperature", "expected a non-negative temperature", source)
    wig = ini.get("wigner", True)
    if not isinstance(wig, bool):
        raise InputError("initial.wigner", "expected true or false", source)
    occ = ini.get("occupations", {})
    if not isinstance(occ, dict):
        raise InputError("initial.occupations", "expected a table {selector = mean phonon number}", source)
    pairs = []
    for k, v in occ.items():
        n = units.number(v, f"initial.occupations.{k}", source, "a non-negative mean phonon number")
        if n < 0:
            raise InputError(f"initial.occupations.{k}", f"expected a non-negative mean phonon number, got {v!r}", source)
        if not occupation_selector_known(k):
            raise InputError(f"initial.occupations.{k}",
                             f"expected a mode label ({', '.join(repr(x) for x in MODE_LABELS)}, numbered as "
                             f"'com-xy-1' when repeated), a kind or plane, or 'all' "
                             f"({', '.join(repr(x) for x in MODE_GROUPS)}); got {k!r}", source)
        pairs.append((k, n))
    return Initial(temp, wig, tuple(pairs))


def _run(raw, source) -> RunOptions:
    r = raw.get("run", {})
    _check_keys(r, "run", SECTIONS["run"], source)
    traj = _int(r.get("trajectories", 100), "run.trajectories", source, 1, "a number of trajectories")
    seed = _int(r.get("seed", 0), "run.seed", source, 0, "a non-negative 64-bit seed")
    if seed >= 2**64:
        raise InputError("run.seed", "expected a seed below 2^64", source)
    dt = r.get("dt", "auto")
    dt_s = None if dt == "auto" else units.parse(dt, "time", "run.dt", source)
    if dt_s is not None and not dt_s > 0:
        raise InputError("run.dt", "expected a positive time step or 'auto'", source)
    integ = r.get("integrator", "verlet")
    if integ not in INTEGRATORS:
        raise InputError("run.integrator", f"expected one of {list(INTEGRATORS)}, got {integ!r}", source)
    chunk = _int(r.get("chunk", 0), "run.chunk", source, 0, "a chunk size (0: automatic)")
    threads = _int(r.get("threads", 0), "run.threads", source, 0, "a thread count (0: all cores)")
    spp = _int(r.get("steps_per_period", 40), "run.steps_per_period", source, 8, "steps per fastest period")
    force = r.get("force", False)
    if not isinstance(force, bool):
        raise InputError("run.force", f"expected true or false, got {force!r}", source)
    return RunOptions(traj, seed, dt_s, integ, chunk, threads, spp, force)


def _observe(raw, source) -> Observe:
    o = raw.get("observe", {})
    _check_keys(o, "observe", SECTIONS["observe"], source)
    lr = units.parse(o.get("loss_radius", "100 um"), "length", "observe.loss_radius", source)
    if not lr > 0:
        raise InputError("observe.loss_radius", "expected a positive radius", source)
    si = o.get("series_interval")
    si_s = units.parse(si, "time", "observe.series_interval", source) if si is not None else None
    if si_s is not None and not si_s > 0:
        raise InputError("observe.series_interval", "expected a positive interval", source)
    return Observe(lr, si_s)


def from_text(text: str, source: str = "<text>", base_dir=None) -> Config:
    """The Config of a config's TOML text as a result file stores it (``config_text``); relative
    paths in it (layouts, ramp tables) are read from ``base_dir`` (the result's ``config_dir``)."""
    try:
        raw = tomllib.loads(str(text))
    except tomllib.TOMLDecodeError as e:
        raise InputError("config_text", f"expected the TOML text of a run config ({e})", source) from None
    return from_dict(raw, source, base_dir)


def from_dict(raw: dict, source: str = "<dict>", base_dir=None) -> Config:
    """Validate a parsed TOML dict into a :class:`Config`."""
    if not isinstance(raw, dict):
        raise InputError("", "expected a TOML document", source)
    for k in raw:
        if k not in SECTIONS:
            raise InputError(k, f"unknown section; expected one of {sorted(SECTIONS)}", source)
    species = _species_list(raw, source)
    trap = _trap(raw, species, source)
    pinning = _pinning(raw, source, base_dir)
    rot = raw.get("rotation", {})
    _check_keys(rot, "rotation", SECTIONS["rotation"], source)
    f_start = units.parse(rot.get("f_start", 0.0), "frequency", "rotation.f_start", source)
    schedule = _schedule(raw, pinning, f_start, source, base_dir)
    noise = None
    if raw.get("noise"):
        noise = parse_noise(raw["noise"], source, [s.name for s in schedule.stages] if schedule is not None else [])
    cfg = Config(source=source, text=_dump(raw), species=species, trap=trap, pinning=pinning, schedule=schedule,
                 initial=_initial(raw, source), run=_run(raw, source), observe=_observe(raw, source),
                 f_start_hz=f_start, search_seed=_int(raw["crystal"].get("search_seed", 0), "crystal.search_seed", source, 0),
                 base_dir=str(Path(base_dir).resolve()) if base_dir is not None else None, noise=noise, lasers=_lasers(raw, species, schedule, source), raw=raw)
    _check_rotation(cfg)
    return cfg


def _unit_vector(v, key, source, what) -> np.ndarray:
    if not isinstance(v, list) or len(v) != 3:
        raise InputError(key, f"expected {what}: a unit vector [x, y, z] such as [1, 0, 0], got {v!r}", source)
    u = np.array([units.number(x, f"{key}[{i}]", source, "a number") for i, x in enumerate(v)])
    norm = float(np.linalg.norm(u))
    if norm == 0.0:
        raise InputError(key, f"expected {what}: a unit vector such as [1, 0, 0], got the zero vector", source)
    if abs(norm - 1.0) > 1e-3:
        raise InputError(key, f"expected {what}: a unit vector (length 1 to 1e-3) such as [0.7071, 0.7071, 0], "
                              f"got {v!r} of length {norm:.6g}", source)
    return u / norm


def _lasers(raw, species, schedule, source) -> tuple:
    """The ``[[laser]]`` beams (:class:`mdrotor.physics.laser.Beam`)."""

    items = raw.get("laser")
    if items is None:
        return ()
    if isinstance(items, dict):
        items = [items]
    if not isinstance(items, list) or not all(isinstance(x, dict) for x in items):
        raise InputError("laser", "expected one or more [[laser]] tables", source)
    stage_names = [st.name for st in schedule.stages] if schedule is not None else []
    present = list(dict.fromkeys(sp.name for sp in species))
    out = []
    for i, it in enumerate(items):
        sec = f"laser[{i}]"
        _check_keys(it, sec, SECTIONS["laser"], source)
        name = it.get("name", f"laser{i}")
        if not isinstance(name, str) or not name:
            raise InputError(f"{sec}.name", f"expected a non-empty string, got {name!r}", source)
        if "name" in it:  # addressed by name, as in --set laser.<name>.saturation=0.2
            sec = f"laser.{name}"
        if "species" in it:
            sp_name = it["species"]
            if not isinstance(sp_name, str):
                raise InputError(f"{sec}.species", f"expected a species name such as '40Ca+', got {sp_name!r}", source)
            if sp_name not in present:
                sp_name = get_species(sp_name, key=f"{sec}.species", source=source).name
            if sp_name not in present:
                raise InputError(f"{sec}.species", f"no ion of species {it['species']!r} in the crystal; it has {present}",
                                 source)
        elif len(present) == 1:
            sp_name = present[0]
        else:
            raise InputError(f"{sec}.species", f"missing; a mixed crystal needs the species the beam addresses, one of "
                                               f"{present}", source)
        sp = next(s for s in species if s.name == sp_name)
        line = cooling_line(sp)
        if "wavelength" in it:
            lam = units.parse(it["wavelength"], "length", f"{sec}.wavelength", source)
            if not lam > 0:
                raise InputError(f"{sec}.wavelength", f"expected a positive wavelength such as '397 nm', got "
                                                      f"{it['wavelength']!r}", source)
        elif line is not None:
            lam = line.wavelength_m
        else:
            raise InputError(f"{sec}.wavelength", f"missing; the species table has no cooling line for {sp_name}: "
                                                  f"give the wavelength, e.g. '397 nm'", source)
        if "linewidth" in it:
            gam = units.parse(it["linewidth"], "frequency", f"{sec}.linewidth", source)
            if not gam > 0:
                raise InputError(f"{sec}.linewidth", f"expected a positive natural linewidth Gamma/2pi such as "
                                                     f"'22 MHz', got {it['linewidth']!r}", source)
        elif line is not None:
            gam = line.linewidth_hz
        else:
            raise InputError(f"{sec}.linewidth", f"missing; the species table has no cooling line for {sp_name}: "
                                                 f"give the natural linewidth Gamma/2pi, e.g. '22 MHz'", source)
        det = units.parse(_require(it, "detuning", sec, source, "the detuning delta/2pi from resonance, such as "
                                                                "'-11 MHz' (negative: red, cooling)"),
                          "frequency", f"{sec}.detuning", source)
        sat = units.number(_require(it, "saturation", sec, source, "the on-axis saturation parameter I/I_sat, "
                                                                   "such as 0.5"),
                           f"{sec}.saturation", source, "a non-negative saturation parameter I/I_sat, such as 0.5")
        if sat < 0:
            raise InputError(f"{sec}.saturation", f"expected a non-negative saturation parameter I/I_sat, got "
                                                  f"{it['saturation']!r}", source)
        direction = _unit_vector(_require(it, "direction", sec, source, "the beam direction, a unit vector"),
                                 f"{sec}.direction", source, "the beam direction")
        waist = None
        if "waist" in it:
            waist = units.parse(it["waist"], "length", f"{sec}.waist", source)
            if not waist > 0:
                raise InputError(f"{sec}.waist", f"expected a positive 1/e^2 intensity radius such as '50 um', got "
                                                 f"{it['waist']!r}", source)
        centre = np.array(_vec3(it["centre"], f"{sec}.centre", source, "length")) if "centre" in it else np.zeros(3)
        em = it.get("emission", "isotropic")
        if isinstance(em, str):
            pattern, axis = em, None
        elif isinstance(em, dict):
            for k in em:
                if k not in ("pattern", "axis"):
                    raise InputError(f"{sec}.emission.{k}", "unknown key; expected 'pattern' and 'axis'", source)
            pattern = em.get("pattern")
            axis = em.get("axis")
        else:
            raise InputError(f"{sec}.emission", f"expected one of {list(PATTERNS)} or {{ pattern = 'linear', "
                                                f"axis = [0, 0, 1] }}, got {em!r}", source)
        if pattern not in PATTERNS:
            raise InputError(f"{sec}.emission", f"expected a pattern among {list(PATTERNS)}, got {pattern!r}", source)
        if pattern == "isotropic":
            if axis is not None:
                raise InputError(f"{sec}.emission.axis", "an isotropic pattern has no axis", source)
            tensor, label = emission_tensor("isotropic"), "isotropic"
        else:
            if axis is None:
                raise InputError(f"{sec}.emission.axis", f"missing; a {pattern} dipole pattern needs its axis, a unit "
                                                         f"vector such as [0, 0, 1]", source)
            a = _unit_vector(axis, f"{sec}.emission.axis", source, "the dipole axis")
            tensor = emission_tensor(pattern, a)
            label = f"{pattern} dipole along [{', '.join(f'{x:.4g}' for x in a)}]"
        scales, default = stage_scales(it.get("stages"), f"{sec}.stages", stage_names, source, "intensity multiplier")
        ions = tuple(j for j, s in enumerate(species) if s.name == sp_name)
        out.append(Beam(name, sp_name, ions, lam, gam, det, sat, direction, waist, centre, tensor, label, scales,
                        default, sec))
    names = [b.name for b in out]
    if len(set(names)) != len(names):
        raise InputError("laser", f"beams need distinct names, got {names}", source)
    return tuple(out)


def _check_rotation(cfg: Config) -> None:
    """Refuse a schedule whose rotation the radial confinement cannot hold."""
    if cfg.schedule is None:
        return

    f_lim = cfg.trap.max_rotation_hz(cfg.masses_kg, cfg.charges_c)
    f_max = cfg.schedule.max_f_rot_hz()
    if f_max >= f_lim:
        k = int(np.argmax([np.max(np.abs(s.f_rot.value(np.linspace(0, s.duration_s, 201)))) for s in cfg.schedule.stages]))
        check_rotation(f_max, f_lim, f"stage.{cfg.schedule.stages[k].name}.f_rot", cfg.source)
    # an order-2 pinning turns with the crystal and weakens one in-plane direction
    # (mdrotor.physics.trap, module docstring); an electrode layout's term is its
    # own fitted potential, checked by the statics
    if not any(t.order == 2 and t.layout is None for t in cfg.pinning):
        return
    for i, st in enumerate(cfg.schedule.stages):
        smp = cfg.schedule.stage_samples(i, 2001)
        c2 = quadrupole_magnitude(cfg.pinning, smp["scale"])
        c2_set, at = np.unique(c2, return_inverse=True)
        lim = np.array([cfg.trap.max_rotation_hz(cfg.masses_kg, cfg.charges_c, x) for x in c2_set])[at]
        for k in np.nonzero(np.abs(smp["f_rot_hz"]) >= lim)[0][:1]:
            check_rotation(float(smp["f_rot_hz"][k]), float(lim[k]), f"stage.{st.name}.f_rot", cfg.source,
                           quadrupole_v_per_m2=float(c2[k]), when=f" (t = {smp['t_s'][k] * 1e3:.6g} ms)")


def _dump(raw: dict) -> str:
    """TOML text of the (overridden) config, stored with results."""
    lines: list[str] = []

    def val(v):
        if isinstance(v, bool):
            return "true" if v else "false"
        if isinstance(v, str):
            return '"' + v.replace("\\", "\\\\").replace('"', '\\"') + '"'
        if isinstance(v, (int, float)):
            return repr(v)
        if isinstance(v, list):
            return "[" + ", ".join(val(x) for x in v) + "]"
        if isinstance(v, dict):
            return "{ " + ", ".join(f"{_k(k)} = {val(x)}" for k, x in v.items()) + " }"
        raise TypeError(type(v))

    def table(prefix, d):
        scal = {k: v for k, v in d.items() if not isinstance(v, dict) and not (isinstance(v, list) and v and all(isinstance(x, dict) for x in v))}
        if scal or not prefix:
            if prefix:
                lines.append(f"[{prefix}]")
            for k, v in scal.items():
                lines.append(f"{_k(k)} = {val(v)}")
            lines.append("")
        for k, v in d.items():
            if isinstance(v, dict):
                table(f"{prefix}.{_k(k)}" if prefix else _k(k), v)
            elif isinstance(v, list) and v and all(isinstance(x, dict) for x in v):
                for item in v:
                    lines.append(f"[[{prefix + '.' if prefix else ''}{_k(k)}]]")
                    for kk, vv in item.items():
                        lines.append(f"{_k(kk)} = {val(vv)}")
                    lines.append("")

    table("", raw)
    return "\n".join(lines).strip() + "\n"


def _k(k: str) -> str:
    import re

    return k if re.fullmatch(r"[A-Za-z0-9_-]+", k) else '"' + k + '"'
