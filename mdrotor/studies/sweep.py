"""Parameter sweeps: many full runs over a grid, a zip or a sample of
config values, resumable after any interruption.

A sweep file (TOML) names a base run config and one or more axes over
dotted config keys (the same paths as ``--set``)::

    base = "../two_ion_quadrupole.toml"   # or an inline [base] table
    combine = "grid"                      # grid (product) | zip | sample
    seed = 7                              # base seed (default: the base config's run.seed)
    trajectories = 100                    # per point (default: the base config's)

    [[axis]]
    key = "stage.spin-up.duration"
    values = ["1 ms", "2 ms", "4 ms"]

    [[axis]]
    key = "pinning.strength"
    range = { from = "1e5 V/m^2", to = "4e5 V/m^2", num = 4, spacing = "log" }

With ``combine = "sample"`` every axis gives ``bounds = [lo, hi]`` (and
optionally ``scale = "log"``) and a ``[sample]`` table chooses the method
(``"sobol"`` or ``"lhs"``, scipy.stats.qmc), the number of ``points`` and
the sampler's ``seed``.

Every point is a full run of its own config; its seed comes from (base
seed, point index) through numpy's SeedSequence, so the results do not
depend on the executor, the number of workers, the order in which points
finish, or on an interruption and resume. Storage: :mod:`mdrotor.studies.store`.
"""

from __future__ import annotations

import copy
import csv
import hashlib
import json
import math
import re
import sys
import time
import tomllib
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np

from mdrotor import __version__, units
from mdrotor.config.parse import apply_override, from_dict
from mdrotor.engine.executors import SerialExecutor, make_executor
from mdrotor.engine.run import check_memory
from mdrotor.errors import InputError
from mdrotor.inputfiles import open_hdf5, read_text
from mdrotor.numfmt import MISSING, clean, interval, plain, value_err
from mdrotor.results.stats import summarize
from mdrotor.results.store import check_writable
from mdrotor.studies.store import EntryStore, read_result_group
from mdrotor.studies.tasks import Task

SWEEP_KEYS = {"base", "combine", "seed", "seeding", "trajectories", "axis", "sample", "description"}
AXIS_KEYS = {"key", "values", "range", "bounds", "scale"}
RANGE_KEYS = {"from", "to", "num", "spacing"}
SAMPLE_KEYS = {"method", "points", "seed"}
COMBINE = ("grid", "zip", "sample")
SAMPLERS = ("sobol", "lhs")
SEED_LIMIT = 2**64  # as run.seed


# ---------------------------------------------------------------------------
# pieces shared with mdrotor.studies.optimize
# ---------------------------------------------------------------------------
def read_toml(path, what: str):
    """(parsed dict, text, source label, folder) of a sweep / optimisation file."""
    p = Path(path)
    src = str(path)
    text = read_text(p, what)
    try:
        raw = tomllib.loads(text)
    except tomllib.TOMLDecodeError as e:
        raise InputError("", f"not valid TOML ({e})", src) from None
    return raw, text, src, p.parent


def check_keys(table, section: str, allowed: set, source: str) -> dict:
    if not isinstance(table, dict):
        raise InputError(section, "expected a table", source)
    for k in table:
        if k not in allowed:
            raise InputError(f"{section}.{k}" if section else k, f"unknown key; expected one of {sorted(allowed)}", source)
    return table


def resolve_base(spec: dict, source: str, folder: Path, overrides=()):
    """The base run config of a sweep or optimisation file.

    Returns ``(raw dict, base folder, label, validated Config)``; ``base``
    is a path (relative to the sweep file) or an inline table.
    """

    if "base" not in spec:
        raise InputError("base", "missing; expected the base run config: a path such as \"../demo.toml\" or an inline [base] table", source)
    b = spec["base"]
    if isinstance(b, str):
        p = (folder / b) if not Path(b).is_absolute() else Path(b)
        text = read_text(p, "base config", key="base", source=source)
        try:
            raw = tomllib.loads(text)
        except tomllib.TOMLDecodeError as e:
            raise InputError("", f"not valid TOML ({e})", str(p)) from None
        label, base_dir = str(p), p.parent
    elif isinstance(b, dict):
        raw, label, base_dir = copy.deepcopy(b), f"{source} [base]", folder
    else:
        raise InputError("base", "expected a path to a run config or an inline [base] table", source)
    for ov in overrides:
        apply_override(raw, ov, "--set")
    cfg = from_dict(copy.deepcopy(raw), label, base_dir)
    return raw, base_dir, label, cfg


def assign(raw: dict, key: str, value, source: str) -> None:
    """Set the dotted ``key`` of a run config dict in place.

    Same paths as ``--set``: stages and pinning terms by name
    (``stage.spin-up.duration``, ``pinning.n2.strength``) or index, and list
    items by index anywhere (``stage.spin-up.f_rot.points.2.1``: the value
    of the third knot of a table-shaped ramp).
    """
    parts = key.split(".") if isinstance(key, str) else []
    if not parts or any(not p for p in parts):
        raise InputError(str(key), "expected a dotted key path such as 'trap.f_radial'", source)
    node = raw
    for i, part in enumerate(parts[:-1]):
        here = ".".join(parts[: i + 1])
        if isinstance(node, list):
            node = node[_list_index(node, part, here, source)]
        elif isinstance(node, dict):
            if part not in node:
                if i == 0 and part in ("stage", "pinning"):
                    raise InputError(key, f"the base config has no [{part}]", source)
                node[part] = {}
            node = node[part]
        else:
            raise InputError(key, f"'{'.'.join(parts[:i])}' is a value, not a table or list", source)
    if isinstance(node, list):
        node[_list_index(node, parts[-1], key, source)] = value
    elif isinstance(node, dict):
        node[parts[-1]] = value
    else:
        raise InputError(key, f"'{'.'.join(parts[:-1])}' is a value, not a table or list", source)


def _list_index(items: list, part: str, key: str, source: str) -> int:
    for j, it in enumerate(items):
        if isinstance(it, dict) and (it.get("name") == part or ("name" not in it and part == f"n{it.get('order')}")):
            return j
    if part.isdigit() and int(part) < len(items):
        return int(part)
    names = [it.get("name") for it in items if isinstance(it, dict) and "name" in it]
    have = f"names {names} or " if names else ""
    raise InputError(key, f"no item {part!r}; expected {have}an index below {len(items)}", source)


_NUMBER = re.compile(r"^\s*[-+]?(?:\d+\.?\d*|\.\d+)(?:[eE][-+]?\d+)?\s*")


def quantity(value, key: str, source: str):
    """``(magnitude, unit text)`` of a value with units (``"2 ms"`` ->
    ``(2.0, "ms")``); ``(value, None)`` for a bare number."""

    if isinstance(value, bool) or not isinstance(value, (int, float, str)):
        raise InputError(key, f"expected a number or a quantity with units such as '2 ms', got {value!r}", source)
    if not isinstance(value, str):
        return units.number(value, key, source), None
    ureg = units.registry()
    text = value.strip().replace("µ", "u").replace("μ", "u")
    try:
        q = ureg.Quantity(text)
    except Exception:
        raise InputError(key, f"expected a quantity with units such as '2 ms', could not read {value!r}", source) from None
    if not isinstance(q, ureg.Quantity) or (q.dimensionless and str(q.units) == "dimensionless"):
        return units.number(float(getattr(q, "magnitude", q)), key, source), None
    m = _NUMBER.match(text)
    unit = text[m.end():].strip() if m else ""
    try:
        if not unit or not ureg.Quantity(f"1 {unit}").units == q.units:
            raise ValueError
        mag = float(ureg.Quantity(text).to(unit).magnitude)
    except Exception:
        unit = f"{q.units:~}".replace("µ", "u")
        mag = float(q.magnitude)
    if not math.isfinite(mag):
        raise InputError(key, f"expected a finite quantity such as '2 ms', got {value!r}", source)
    return mag, unit


def convert(value, unit, key: str, source: str) -> float:
    """Magnitude of ``value`` in ``unit`` (None: a bare number)."""

    mag, u = quantity(value, key, source)
    if unit is None or u is None:
        if (unit is None) != (u is None):
            raise InputError(key, f"expected {'a bare number' if unit is None else 'a quantity in ' + repr(unit)}, got {value!r}", source)
        return mag
    try:
        return float(units.registry().Quantity(mag, u).to(unit).magnitude)
    except Exception:
        raise InputError(key, f"expected a quantity convertible to {unit!r}, got {value!r}", source) from None


def with_unit(mag: float, unit, digits: int | None = 12):
    """Config value for magnitude ``mag`` in ``unit``: ``"1.5 ms"`` or a
    number; rounded to ``digits`` significant digits (None: exact, the
    shortest text that reads back as the same float)."""
    text = repr(float(mag)) if digits is None else f"{float(mag):.{digits}g}"
    if unit is None:
        return float(text)
    return f"{text} {unit}"


def si_value(value) -> float:
    """SI magnitude of a config value (NaN when it has none, e.g. a shape
    name), without the last-bit noise of the unit conversion ("5 us" ->
    5e-06, :func:`mdrotor.numfmt.clean`)."""

    if isinstance(value, bool):
        return float(value)
    if isinstance(value, (int, float)):
        return float(value)
    if isinstance(value, str):
        try:
            q = units.registry().Quantity(value.strip().replace("µ", "u").replace("μ", "u"))
            return clean(float(q.to_base_units().magnitude) if hasattr(q, "to_base_units") else float(q))
        except Exception:
            return float("nan")
    return float("nan")


def show(value) -> str:
    """A config value as written in TOML (for tables and messages)."""
    if isinstance(value, str):
        return value
    if isinstance(value, bool):
        return "true" if value else "false"
    if isinstance(value, float):
        return f"{value:.12g}"
    return json.dumps(value) if isinstance(value, (dict, list)) else str(value)


def point_seed(base_seed: int, index: int) -> int:
    """Seed of point ``index``: numpy SeedSequence(base_seed, spawn_key=(index,)),
    first 64-bit word, halved into the signed 64-bit range that TOML holds."""
    ss = np.random.SeedSequence(int(base_seed), spawn_key=(int(index),))
    return int(ss.generate_state(1, dtype=np.uint64)[0]) >> 1


def build_config(base_raw: dict, assignments, source: str, base_dir, *, trajectories=None, seed=None):
    """Validated Config of the base with ``assignments`` ((key, value), ...)
    set; ``trajectories`` before them (an axis may override it), ``seed`` last."""

    raw = copy.deepcopy(base_raw)
    if trajectories is not None:
        assign(raw, "run.trajectories", trajectories, source)
    for k, v in assignments:
        assign(raw, k, v, source)
    if seed is not None:
        assign(raw, "run.seed", int(seed), source)
    return from_dict(raw, source, base_dir)


def blame(e: InputError, keys) -> list:
    """Indices of the keys (axes, parameters) an error of a point is about."""
    out = []
    for j, k in enumerate(keys):
        if e.key and (e.key == k or e.key.startswith(k + ".") or e.key.startswith(k + "[") or k.startswith(e.key + ".")):
            out.append(j)
    if not out and e.key:
        last = e.key.rsplit(".", 1)[-1]
        out = [j for j, k in enumerate(keys) if k.rsplit(".", 1)[-1] == last]
    return out


def point_metrics(res, cfg=None) -> dict:
    """Flat table row of a run: every scalar summary metric.

    Final stage: the summary numbers unprefixed (``L_std_hbar``,
    ``slip_fraction``, ``differential_n_mean`` ...) and one
    ``mode_n_mean.<label>`` / ``mode_n_err.<label>`` per mode; every stage:
    ``stage.<name>.<metric>``; run: ``duration_s``, ``I_kg_m2`` (moment of
    inertia), ``dt_s``, ``n_steps``, ``n_trajectories``, ``wall_s``,
    ``preflight_margin`` (the smallest held / asked angular acceleration of the
    run's preflight, :func:`mdrotor.engine.preflight.preflight`; inf without a spin); with the
    config: ``f_rot_peak_hz`` and ``pinning_peak.<term>`` (largest strength
    in the schedule, SI V/m^n).
    """
    out: dict = {}

    def scalars(prefix, summ):
        for k, v in summ.items():
            if isinstance(v, (bool, np.bool_, int, float, np.integer, np.floating)):
                out[prefix + k] = float(v)

    summ = res.summary
    scalars("", summ)
    fin = res.final
    seen: dict = {}
    for lab, n, e in zip(fin.modes["label"], summ["mode_n_mean"], summ["mode_n_err"]):
        seen[lab] = seen.get(lab, 0) + 1
        name = lab if seen[lab] == 1 else f"{lab}#{seen[lab]}"
        out[f"mode_n_mean.{name}"] = float(n)
        out[f"mode_n_err.{name}"] = float(e)
    for sname, obs in res.stages.items():
        scalars(f"stage.{sname}.", obs.summary)
    a = res.attrs
    if res.schedule is not None and "stage_bounds_s" in res.schedule:
        out["duration_s"] = float(np.asarray(res.schedule["stage_bounds_s"])[-1])
    for k, name in (("moment_of_inertia_kg_m2", "I_kg_m2"), ("dt_s", "dt_s"), ("n_steps", "n_steps"),
                    ("n_trajectories", "n_trajectories"), ("wall_s", "wall_s"),
                    ("preflight_margin_min", "preflight_margin")):
        if k in a:
            out[name] = float(a[k])
    if cfg is not None and cfg.schedule is not None:
        out.update(schedule_peaks(cfg))
    return out


def schedule_peaks(cfg) -> dict:
    """Largest |f_rot| (Hz) and pinning strength per term (SI) of a config's
    schedule (the schedule's own peaks, :meth:`mdrotor.config.schedule.Schedule.max_f_rot_hz`)."""
    sched = cfg.schedule
    out = {"f_rot_peak_hz": max(abs(cfg.f_start_hz), sched.max_f_rot_hz())}
    for j, term in enumerate(cfg.pinning):
        out[f"pinning_peak.{term.name}"] = max(1.0, sched.peak_pinning_scale(j)) * abs(term.strength)
    return out


def summary_metric_names() -> list:
    """Names of the scalar summary metrics (from mdrotor.results.stats.summarize)."""

    obs = {"status": np.zeros(2, dtype=np.int64), "L_hbar": np.zeros(2), "f_rot_hz": np.zeros(2), "slips": np.zeros(2),
           "lost": np.zeros(2, bool), "reordered": np.zeros(2, bool), "nonfinite": np.zeros(2, bool), "mode_n": np.zeros((2, 1))}
    s = summarize(obs, ["differential"])
    return [k for k, v in s.items() if not isinstance(v, np.ndarray)]


# ---------------------------------------------------------------------------
# sweep files
# ---------------------------------------------------------------------------
@dataclass
class Axis:
    key: str
    values: list = field(default_factory=list)  # grid / zip: config values
    lo: float = 0.0  # sample: bounds (magnitudes in ``unit``)
    hi: float = 0.0
    unit: str | None = None
    log: bool = False


@dataclass
class SweepSpec:
    """A validated sweep: its axes, points (one tuple of config values
    each), their configs and seeds, and the fingerprint of it all."""

    source: str
    text: str
    base_text: str
    combine: str
    seeding: str
    base_seed: int
    axes: list
    points: list
    configs: list
    seeds: list
    hash: str

    @property
    def keys(self) -> list:
        return [a.key for a in self.axes]

    def meta(self) -> dict:
        return {"package_version": __version__, "source": self.source, "sweep_text": self.text,
                "base_config_text": self.base_text, "combine": self.combine, "seeding": self.seeding,
                "base_seed": np.uint64(self.base_seed), "n_points": len(self.points), "axis_keys": self.keys}


def load_sweep(path, overrides=(), trajectories: int | None = None) -> SweepSpec:
    """Read and validate a sweep file, and every point's config.

    ``overrides`` (``--set``) apply to the base config; ``trajectories``
    replaces the file's trajectories per point. Raises
    :class:`InputError` naming the axis and the point of the first bad one.
    """
    spec, text, src, folder = read_toml(path, "sweep")
    check_keys(spec, "", SWEEP_KEYS, src)
    base_raw, base_dir, _label, base_cfg = resolve_base(spec, src, folder, overrides)
    combine = spec.get("combine", "grid")
    if combine not in COMBINE:
        raise InputError("combine", f"expected one of {list(COMBINE)}, got {combine!r}", src)
    seeding = spec.get("seeding", "per-point")
    if seeding not in ("per-point", "common"):
        raise InputError("seeding", f"expected 'per-point' or 'common', got {seeding!r}", src)
    base_seed = as_int(spec.get("seed", base_cfg.run.seed), "seed", src, 0, SEED_LIMIT, "a non-negative seed below 2^64")
    traj = spec.get("trajectories")
    if traj is not None:
        traj = as_int(traj, "trajectories", src, 1, None, "a number of trajectories per point")
    if trajectories is not None:
        traj = as_int(trajectories, "--trajectories", "command line", 1, None, "a number of trajectories per point")
    axes_raw = spec.get("axis")
    if not isinstance(axes_raw, list) or not axes_raw or not all(isinstance(a, dict) for a in axes_raw):
        raise InputError("axis", "expected one or more [[axis]] tables with a 'key' and 'values', 'range' or 'bounds'", src)
    axes = [_axis(a, j, combine, src) for j, a in enumerate(axes_raw)]
    keys = [a.key for a in axes]
    dup = {k for k in keys if keys.count(k) > 1}
    if dup:
        raise InputError("axis", f"each key may have one axis; repeated: {sorted(dup)}", src)
    if combine == "grid":
        import itertools

        points = [tuple(p) for p in itertools.product(*[a.values for a in axes])]
    elif combine == "zip":
        lengths = [len(a.values) for a in axes]
        if len(set(lengths)) != 1:
            raise InputError("axis", f"combine = 'zip' needs axes of equal length, got {dict(zip(keys, lengths))}", src)
        points = list(zip(*[a.values for a in axes]))
    else:
        points = _sample(spec, axes, base_seed, src)
    if "sample" in spec and combine != "sample":
        raise InputError("sample", "a [sample] table needs combine = 'sample'", src)
    seeds = [base_seed if seeding == "common" else point_seed(base_seed, i) for i in range(len(points))]
    configs = []
    for i, vals in enumerate(points):
        try:
            cfg = build_config(base_raw, list(zip(keys, vals)), f"{src} point {i}", base_dir, trajectories=traj, seed=seeds[i])
        except InputError as e:
            raise point_error(e, src, keys, vals, f"point {i}", "axis") from None
        configs.append(cfg)
    digest = hashlib.sha256(json.dumps({"kind": "sweep", "combine": combine, "axes": keys,
                                        "points": [c.text for c in configs]}).encode()).hexdigest()
    return SweepSpec(src, text, base_cfg.text, combine, seeding, base_seed, axes, points, configs, seeds, digest)


def point_error(e: InputError, src: str, keys, vals, where: str, noun: str) -> InputError:
    """The error of one point, naming the axis (parameter) and the point."""
    js = blame(e, keys)
    desc = ", ".join(f"{k} = {show(v)!r}" for k, v in zip(keys, vals))
    who = f"{noun} '{keys[js[0]]}'" if js else f"{noun}s"
    inner = f"{e.key}: {e.expected}" if e.key else e.expected
    return InputError(f"{who} at {where} ({desc})", inner, src)


def as_int(v, key, src, lo=None, hi=None, what="an integer"):
    if isinstance(v, bool) or not isinstance(v, int) or (lo is not None and v < lo) or (hi is not None and v >= hi):
        raise InputError(key, f"expected {what}, got {v!r}", src)
    return v


def _axis(a: dict, j: int, combine: str, src: str) -> Axis:
    sec = f"axis[{j}]"
    check_keys(a, sec, AXIS_KEYS, src)
    key = a.get("key")
    if not isinstance(key, str) or not key or any(not p for p in key.split(".")):
        raise InputError(f"{sec}.key", "expected a dotted config key such as 'stage.spin-up.duration'", src)
    sec = f"axis '{key}'"
    if key == "run.seed":
        raise InputError(f"{sec}", "seeds are derived per point from the sweep's 'seed'; use seeding = 'common' for one seed at every point", src)
    given = [k for k in ("values", "range", "bounds") if k in a]
    if combine == "sample":
        if given != ["bounds"]:
            raise InputError(sec, "combine = 'sample' needs 'bounds' = [low, high] on every axis (and no 'values' or 'range')", src)
    elif len(given) != 1 or given == ["bounds"]:
        raise InputError(sec, "expected exactly one of 'values' (a list) or 'range' (a table {from, to, num, spacing}); "
                              "'bounds' needs combine = 'sample'", src)
    scale = a.get("scale", "linear")
    if scale not in ("linear", "log"):
        raise InputError(f"{sec}.scale", f"expected 'linear' or 'log', got {scale!r}", src)
    if "scale" in a and "bounds" not in a:
        raise InputError(f"{sec}.scale", "'scale' goes with 'bounds'; a range has 'spacing'", src)
    if "values" in a:
        vals = a["values"]
        if not isinstance(vals, list) or not vals:
            raise InputError(f"{sec}.values", "expected a non-empty list of config values", src)
        return Axis(key, list(vals))
    if "range" in a:
        return Axis(key, _range(a["range"], f"{sec}.range", src))
    lo, hi, unit, log = bounds(a["bounds"], scale, f"{sec}.bounds", src)
    return Axis(key, [], lo, hi, unit, log)


def bounds(b, scale: str, key: str, src: str):
    """``(lo, hi, unit, log)`` of a ``[low, high]`` pair with units."""
    if not isinstance(b, list) or len(b) != 2:
        raise InputError(key, "expected [low, high], e.g. [\"1 ms\", \"3 ms\"]", src)
    lo, unit = quantity(b[0], f"{key}[0]", src)
    hi = convert(b[1], unit, f"{key}[1]", src)
    if not (math.isfinite(lo) and math.isfinite(hi) and lo < hi):
        raise InputError(key, f"expected low < high, got {b!r}", src)
    if scale == "log" and lo <= 0:
        raise InputError(key, "scale = 'log' needs positive bounds", src)
    return lo, hi, unit, scale == "log"


def _range(r, key: str, src: str) -> list:
    check_keys(r, key, RANGE_KEYS, src)
    for k in ("from", "to", "num"):
        if k not in r:
            raise InputError(f"{key}.{k}", "missing; a range is {from, to, num, spacing}", src)
    num = as_int(r["num"], f"{key}.num", src, 1, None, "a number of values >= 1")
    spacing = r.get("spacing", "linear")
    if spacing not in ("linear", "log"):
        raise InputError(f"{key}.spacing", f"expected 'linear' or 'log', got {spacing!r}", src)
    a, unit = quantity(r["from"], f"{key}.from", src)
    b = convert(r["to"], unit, f"{key}.to", src)
    if spacing == "log":
        if a <= 0 or b <= 0:
            raise InputError(f"{key}.spacing", "spacing = 'log' needs positive from and to", src)
        mags = np.geomspace(a, b, num)
    else:
        mags = np.linspace(a, b, num)
    if unit is None and all(isinstance(r[k], int) and not isinstance(r[k], bool) for k in ("from", "to")) \
            and all(float(m).is_integer() for m in mags):
        return [int(m) for m in mags]
    return [with_unit(float(m), unit) for m in mags]


def _sample(spec: dict, axes: list, base_seed: int, src: str) -> list:
    from scipy.stats import qmc

    s = check_keys(spec.get("sample", None) if "sample" in spec else _missing_sample(src), "sample", SAMPLE_KEYS, src)
    method = s.get("method", "sobol")
    if method not in SAMPLERS:
        raise InputError("sample.method", f"expected one of {list(SAMPLERS)}, got {method!r}", src)
    n = as_int(s.get("points"), "sample.points", src, 1, None, "a number of points >= 1")
    seed = as_int(s.get("seed", base_seed), "sample.seed", src, 0, SEED_LIMIT, "a non-negative seed")
    d = len(axes)
    rng = np.random.default_rng(np.random.SeedSequence(seed))
    cls = qmc.Sobol if method == "sobol" else qmc.LatinHypercube
    engine = cls(d, scramble=True, **rng_keyword(cls, rng))
    import warnings

    with warnings.catch_warnings():
        warnings.simplefilter("ignore")  # Sobol' balance warning for n not a power of 2
        u = engine.random(n)
    pts = []
    for row in u:
        pts.append(tuple(with_unit(scaled(a, float(x)), a.unit) for a, x in zip(axes, row)))
    return pts


def rng_keyword(fn, rng) -> dict:
    """``{"rng": rng}`` for scipy >= 1.15, ``{"seed": rng}`` before (same stream)."""
    import inspect

    return {"rng": rng} if "rng" in inspect.signature(fn).parameters else {"seed": rng}


def scaled(a, u: float) -> float:
    """Magnitude at unit-cube coordinate ``u`` of an axis or parameter with bounds."""
    if a.log:
        return float(a.lo * (a.hi / a.lo) ** u)
    return float(a.lo + u * (a.hi - a.lo))


def _missing_sample(src):
    raise InputError("sample", "combine = 'sample' needs a [sample] table with method ('sobol' or 'lhs') and points", src)


# ---------------------------------------------------------------------------
# running
# ---------------------------------------------------------------------------
def point_name(i: int) -> str:
    return f"points/{i:06d}"


def run_sweep(spec, output, *, workers: int | None = None, scheduler: str | None = None, restart: bool = False,
              progress: bool = False, executor=None, overrides=()) -> dict:
    """Run (or resume) a sweep into ``output`` (HDF5).

    Parameters
    ----------
    spec : SweepSpec or path of a sweep file
    output : path of the HDF5 file (resumed when it holds this sweep)
    workers : local worker processes (default one per core; 1 runs in this process)
    scheduler : address of a Dask distributed scheduler (instead of local processes)
    restart : discard an existing output (also one from a changed sweep file)
    progress : tqdm bar over points on stderr
    executor : an executor object (see :mod:`mdrotor.engine.executors`), overriding
        ``workers``/``scheduler``; it is not closed here.

    Returns
    -------
    dict with ``points``, ``completed``, ``failed``, ``resumed``, ``ran``, ``wall_s``.
    """

    t0 = time.perf_counter()
    if not isinstance(spec, SweepSpec):
        spec = load_sweep(spec, overrides)
    n = len(spec.points)
    store = EntryStore(Path(output), "sweep", spec.hash, restart)
    ex = None
    ran = 0
    try:
        todo = [i for i in range(n) if not store.has(point_name(i))]
        resumed = n - len(todo)
        meta = spec.meta()

        def view(f):
            _sweep_view(f, spec, store)

        if todo:
            ex = executor if executor is not None else make_executor(workers, scheduler, len(todo))
            store.write_main(view, {**meta, "finished": False}, force=True)
            inline = isinstance(ex, SerialExecutor)
            bar = _bar(progress, n, resumed, "mdrotor sweep", "pt")
            tasks = [Task(point_name(i), spec.configs[i], progress=progress and inline) for i in todo]
            try:
                for out in ex.run(tasks):
                    i = int(out.name.rsplit("/", 1)[1])
                    attrs = {"index": i, "seed": spec.seeds[i], "values": [show(v) for v in spec.points[i]]}
                    if out.error:
                        store.put(out.name, None, {}, attrs, out.error)
                    else:
                        store.put(out.name, out.result, point_metrics(out.result, spec.configs[i]), attrs)
                    ran += 1
                    store.write_main(view, {**meta, "finished": False})
                    if bar is not None:
                        bar.update(1)
            except BaseException:
                if ex is not executor:
                    ex.close(abort=True)
                    ex = None
                store.write_main(view, {**meta, "finished": False}, force=True)
                raise
            finally:
                if bar is not None:
                    bar.close()
        if not store.consolidated:
            store.write_main(view, {**meta, "finished": True}, consolidate=True)
    finally:
        if ex is not None and ex is not executor:
            ex.close()
        store.close()
    failed = sum(1 for e in store.entries.values() if e.failed)
    return {"output": str(output), "points": n, "completed": len(store.entries), "failed": failed,
            "resumed": resumed, "ran": ran, "wall_s": time.perf_counter() - t0}


def _bar(progress: bool, total: int, initial: int, desc: str, unit: str):
    if not progress:
        return None
    from tqdm import tqdm

    return tqdm(total=total, initial=initial, desc=desc, unit=unit, file=sys.stderr, dynamic_ncols=True)


def _str_dtype():
    import h5py

    return h5py.string_dtype()


def table_columns(entries) -> list:
    """Metric columns in a stable order: first seen, entry by entry."""
    cols: dict = {}
    for name in sorted(entries):
        for k in entries[name].row:
            cols.setdefault(k, None)
    return list(cols)


def _sweep_view(f, spec: SweepSpec, store) -> None:
    n = len(spec.points)
    ax = f.create_group("axes")
    for j, a in enumerate(spec.axes):
        g = ax.create_group(a.key.replace("/", "|"))
        g.attrs["index"] = j
        g.attrs["key"] = a.key
        col = [p[j] for p in spec.points]
        g.create_dataset("text", data=np.array([show(v) for v in col], dtype=object), dtype=_str_dtype())
        g.create_dataset("si", data=np.array([si_value(v) for v in col]))
    write_summary(f, n, [point_name(i) for i in range(n)], store.entries, np.array(spec.seeds, dtype=np.uint64))


def write_summary(f, n: int, names: list, entries: dict, seeds) -> None:
    """The ``/summary`` table: one row per point (``names[i]``), NaN where
    not finished."""
    s = f.create_group("summary")
    s.create_dataset("index", data=np.arange(n, dtype=np.int64))
    s.create_dataset("seed", data=np.asarray(seeds, dtype=np.uint64))
    s.create_dataset("complete", data=np.array([nm in entries for nm in names], dtype=np.uint8))
    s.create_dataset("failed", data=np.array([nm in entries and entries[nm].failed for nm in names], dtype=np.uint8))
    s.create_dataset("error", data=np.array([entries[nm].error if nm in entries else "" for nm in names], dtype=object),
                     dtype=_str_dtype())
    done = {nm: entries[nm] for nm in names if nm in entries}
    cols = table_columns(done)
    s.attrs["metrics"] = cols
    for c in cols:
        col = np.full(n, np.nan)
        for i, nm in enumerate(names):
            if nm in done:
                col[i] = done[nm].row.get(c, np.nan)
        s.create_dataset(c.replace("/", "|"), data=col)


# ---------------------------------------------------------------------------
# reading
# ---------------------------------------------------------------------------
def read_table(path) -> dict:
    """The summary table of a sweep or optimisation file.

    Returns ``{"index", "seed", "complete", "failed", "error": arrays,
    "axes": {key: {"text": [...], "si": array}}, "metrics": {name: array}}``
    (for an optimisation the axes are its parameters, one row per evaluation).
    """

    with open_hdf5(path, "an mdrotor sweep or optimisation file (.h5)") as f:
        if "summary" not in f or "kind" not in f.attrs:
            raise InputError("", "not an mdrotor sweep or optimisation file", str(path))
        s = f["summary"]
        out = {k: s[k][()] for k in ("index", "seed", "complete", "failed")}
        out["error"] = [x.decode() if isinstance(x, bytes) else str(x) for x in s["error"][()]]
        out["axes"] = {}
        if "axes" in f:
            for gname in sorted(f["axes"], key=lambda k: int(f["axes"][k].attrs["index"])):
                g = f["axes"][gname]
                out["axes"][str(g.attrs.get("key", gname))] = {"text": [x.decode() if isinstance(x, bytes) else str(x) for x in g["text"][()]],
                                    "si": g["si"][()]}
        out["metrics"] = {str(c): s[str(c).replace("/", "|")][()] for c in s.attrs.get("metrics", [])}
    return out


def read_point(path, index) -> object:
    """The full :class:`~mdrotor.results.result.Result` of point (or evaluation)
    ``index`` of a sweep / optimisation file; ``index = "confirm"`` gives an
    optimisation's confirmation run."""
    import h5py


    name = index if isinstance(index, str) else point_name(int(index))
    with h5py.File(path, "r") as f:
        if name not in f or not bool(f[name].attrs.get("complete", False)):
            raise InputError(name, "no finished entry of that name in this file", str(path))
        if str(f[name].attrs.get("error", "")):
            raise InputError(name, f"this run failed: {f[name].attrs['error']}", str(path))
        return read_result_group(f[name])


def export_csv(path, csv_path) -> int:
    """Write the summary table of a sweep / optimisation file as CSV (one
    row per point, axis values as written and in SI, then every metric).
    Returns the number of rows."""
    t = read_table(path)
    n = len(t["index"])
    header = ["index", "seed", "status"]
    cols = []
    for key, ax in t["axes"].items():
        header += [key, f"{key} [SI]"]
        cols += [ax["text"], ax["si"]]
    header += list(t["metrics"])
    cols += list(t["metrics"].values())
    with open(csv_path, "w", newline="") as fh:
        w = csv.writer(fh)
        w.writerow(header)
        for i in range(n):
            status = "failed" if t["failed"][i] else ("done" if t["complete"][i] else "pending")
            row = [int(t["index"][i]), int(t["seed"][i]), status]
            for c in cols:
                v = c[i]
                row.append(repr(float(v)) if isinstance(v, (float, np.floating)) else v)
            w.writerow(row)
    return n




def check_executor_args(args) -> None:
    if args.workers is not None and args.workers < 1:
        raise InputError("--workers", "expected a number of worker processes >= 1", "command line")
    if args.workers is not None and args.scheduler:
        raise InputError("--workers", "give either --workers (local processes) or --scheduler (a Dask cluster), not both", "command line")


def output_path(given, spec_path, suffix=".h5") -> Path:
    """The output file, refused before any work when its folder is missing
    or cannot be written (:func:`mdrotor.results.store.check_writable`)."""

    out = Path(given) if given else Path(Path(spec_path).stem + suffix)
    check_writable(out)
    return out




# the sweep's text table: (heading, metric, its error or its interval's bounds)
TEXT_COLUMNS = [("L mean (hbar)", "L_mean_hbar", ("L_mean_err_hbar",)),
                ("L spread (hbar)", "L_std_hbar", ("L_std_err_hbar",)),
                ("slipped", "slip_fraction", ("slip_fraction_lo", "slip_fraction_hi")),
                ("lost", "loss_fraction", ("loss_fraction_lo", "loss_fraction_hi")),
                ("diff. phonons", "differential_n_mean", ("differential_n_err",)),
                ("used", "n_ok", ())]


def _cell(t: dict, i: int, metric: str, errs: tuple) -> str:
    m = t["metrics"]
    if metric not in m or not np.isfinite(m[metric][i]):
        return MISSING
    if metric == "n_ok":
        tot = m.get("n_trajectories")
        return f"{int(m[metric][i])}" + (f"/{int(tot[i])}" if tot is not None and np.isfinite(tot[i]) else "")
    if len(errs) == 2:
        return interval(m[metric][i], *(m[e][i] if e in m else np.nan for e in errs))
    return value_err(m[metric][i], m[errs[0]][i] if errs[0] in m else np.nan)


def check_points_memory(configs, key: str, source: str) -> None:
    """Refuse, before any work, points whose runs would not fit in memory
    (:func:`mdrotor.engine.run.check_memory`; one check per distinct size)."""

    seen = set()
    for cfg in configs:
        size = (cfg.run.trajectories, len(cfg.masses_kg), len(cfg.schedule.stages) if cfg.schedule else 0, cfg.trap.model,
                bool(cfg.noise))
        if size not in seen:
            seen.add(size)
            check_memory(cfg, cfg.run.trajectories, key, source)


def sweep_text(path, summ: dict, max_rows: int = 40) -> str:
    """The sweep's summary table: each statistic with its standard error,
    each fraction with its Wilson 68 % interval [lo, hi], and how many
    trajectories were used (finite and bound)."""

    t = read_table(path)
    lines = [f"sweep: {summ['points']} points ({summ['resumed']} already done, {summ['ran']} run now, "
             f"{summ['failed']} failed) -> {path}  [{plain(summ['wall_s'], 3)} s]",
             "final stage: statistics +- standard error over the finite, bound trajectories ('used'); "
             "fractions of all trajectories with Wilson 68 % intervals [lo, hi]"]
    keys = list(t["axes"])
    cols = [c for c in TEXT_COLUMNS if c[1] in t["metrics"]]
    rows = []
    for i in range(min(len(t["index"]), max_rows)):
        vals = [str(i), *[t["axes"][k]["text"][i] for k in keys]]
        if t["failed"][i]:
            vals.append("failed: " + t["error"][i])
        elif not t["complete"][i]:
            vals.append("not run yet")
        else:
            vals += [_cell(t, i, m, e) for _h, m, e in cols]
        rows.append(vals)
    head = ["point", *keys, *[h for h, _m, _e in cols]]
    widths = [max([len(head[j])] + [len(r[j]) for r in rows if j < len(r) and not r[-1].startswith(("failed", "not run"))])
              for j in range(len(head))]
    lines.append("  " + "  ".join(f"{h:>{w}s}" for h, w in zip(head, widths)))
    for vals in rows:
        lines.append("  " + "  ".join(f"{v:>{w}s}" for v, w in zip(vals, widths + [0])))
    if len(t["index"]) > max_rows:
        lines.append(f"  ... {len(t['index']) - max_rows} more rows (--csv FILE writes them all)")
    return "\n".join(lines)





