"""Schedules: named stages with profiles for f_rot(t) and pinning strengths.

A stage has a duration and, for each scheduled quantity, a profile that goes
from the value at the end of the previous stage (``from``, default: that
value) to ``to`` (default: ``from``) with a shape g(s), s = t / T in [0, 1]:

    value(t) = v0 + (v1 - v0) g(t / T)

Shapes (g(0) = 0, g(1) = 1) and their integrals G(s) = int_0^s g:

    hold        g = 0 (v1 must equal v0)
    linear      g = s                             G = s^2 / 2
    cosine      g = (1 - cos pi s) / 2            G = s/2 - sin(pi s) / (2 pi)
    smoothstep  g = 10 s^3 - 15 s^4 + 6 s^5       G = 5/2 s^4 - 3 s^5 + s^6
                (quintic: zero first and second derivative at both ends)
    tanh        g = (tanh(w (s - 1/2)) + h) / (2 h),   h = tanh(w / 2)
                G = [(ln cosh(w (s - 1/2)) - ln cosh(w / 2)) / w + h s] / (2 h)
                (``steepness`` w, default 8)
    exponential g = (1 - e^{-s T / tau}) / (1 - e^{-T / tau})
                G = (s - (tau / T)(1 - e^{-s T / tau})) / (1 - e^{-T / tau})
    table       (t, value) points, shape-preserving cubic (PCHIP) interpolant,
                integral from its exact antiderivative

The rotation angle theta(t) = 2 pi int_0^t f_rot dt' is exact to rounding:
each stage contributes T (v0 s + (v1 - v0) G(s)).
"""

from __future__ import annotations

import math
from dataclasses import dataclass, field

import numpy as np

from mdrotor import units
from mdrotor.errors import InputError
from mdrotor.inputfiles import read_text
from mdrotor.units import number, parse

SHAPES = ("hold", "linear", "cosine", "smoothstep", "tanh", "exponential", "table")


@dataclass(frozen=True)
class Profile:
    """One quantity's profile over one stage (SI values)."""

    shape: str
    v0: float
    v1: float
    duration_s: float
    steepness: float = 8.0
    tau_s: float = 0.0
    table_t: tuple = ()
    table_v: tuple = ()

    def _table(self):
        from scipy.interpolate import PchipInterpolator

        return PchipInterpolator(np.asarray(self.table_t), np.asarray(self.table_v))

    def g(self, s: np.ndarray) -> np.ndarray:
        s = np.asarray(s, dtype=float)
        if self.shape == "hold":
            return np.zeros_like(s)
        if self.shape == "linear":
            return s
        if self.shape == "cosine":
            return 0.5 * (1.0 - np.cos(np.pi * s))
        if self.shape == "smoothstep":
            return s**3 * (10.0 + s * (-15.0 + 6.0 * s))
        if self.shape == "tanh":
            w, h = self.steepness, math.tanh(self.steepness / 2)
            return (np.tanh(w * (s - 0.5)) + h) / (2 * h)
        if self.shape == "exponential":
            r = self.duration_s / self.tau_s
            return -np.expm1(-s * r) / -math.expm1(-r)
        raise ValueError(self.shape)

    def G(self, s: np.ndarray) -> np.ndarray:
        s = np.asarray(s, dtype=float)
        if self.shape == "hold":
            return np.zeros_like(s)
        if self.shape == "linear":
            return 0.5 * s * s
        if self.shape == "cosine":
            return 0.5 * s - np.sin(np.pi * s) / (2 * np.pi)
        if self.shape == "smoothstep":
            return s**4 * (2.5 + s * (-3.0 + s))
        if self.shape == "tanh":
            w, h = self.steepness, math.tanh(self.steepness / 2)
            return ((_logcosh(w * (s - 0.5)) - _logcosh(w / 2)) / w + h * s) / (2 * h)
        if self.shape == "exponential":
            r = self.duration_s / self.tau_s
            return _x_plus_expm1_neg(s * r) / (r * -math.expm1(-r))
        raise ValueError(self.shape)

    def dg(self, s: np.ndarray) -> np.ndarray:
        """dg/ds of the shape (analytic)."""
        s = np.asarray(s, dtype=float)
        if self.shape == "hold":
            return np.zeros_like(s)
        if self.shape == "linear":
            return np.ones_like(s)
        if self.shape == "cosine":
            return 0.5 * np.pi * np.sin(np.pi * s)
        if self.shape == "smoothstep":
            return 30.0 * s * s * (1.0 - s) ** 2
        if self.shape == "tanh":
            w, h = self.steepness, math.tanh(self.steepness / 2)
            a = np.exp(-2.0 * np.abs(w * (s - 0.5)))  # 1 / cosh^2 y = 4 e^{-2|y|} / (1 + e^{-2|y|})^2, no overflow
            return w * 4.0 * a / (1.0 + a) ** 2 / (2 * h)
        if self.shape == "exponential":
            r = self.duration_s / self.tau_s
            return r * np.exp(-s * r) / -math.expm1(-r)
        raise ValueError(self.shape)

    def rate(self, t_local: np.ndarray) -> np.ndarray:
        """d value / dt (SI value per s), analytic per shape (the table's
        interpolant differentiated exactly)."""
        t = np.clip(np.asarray(t_local, dtype=float), 0.0, self.duration_s)
        if self.shape == "table":
            return self._table().derivative()(t)
        return (self.v1 - self.v0) * self.dg(t / self.duration_s) / self.duration_s

    def extremes(self) -> tuple:
        """(smallest, largest) value over the stage. Every shape is monotone
        and a table's interpolant is shape-preserving (PCHIP), so they sit
        at the ends or at the knots."""
        v = [self.v0, self.v1, *self.table_v]
        return min(v), max(v)

    def value(self, t_local: np.ndarray) -> np.ndarray:
        t = np.clip(np.asarray(t_local, dtype=float), 0.0, self.duration_s)
        if self.shape == "table":
            return self._table()(t)
        return self.v0 + (self.v1 - self.v0) * self.g(t / self.duration_s)

    def integral(self, t_local: np.ndarray) -> np.ndarray:
        """int_0^t value dt' (SI value x s)."""
        t = np.clip(np.asarray(t_local, dtype=float), 0.0, self.duration_s)
        if self.shape == "table":
            return self._table().antiderivative()(t) - self._table().antiderivative()(0.0)
        s = t / self.duration_s
        return self.duration_s * (self.v0 * s + (self.v1 - self.v0) * self.G(s))


def _x_plus_expm1_neg(x):
    """x + e^{-x} - 1 for x >= 0 without cancellation: its series
    sum_{k >= 2} (-x)^k / k! below x = 0.5 (20 terms: the next is below
    1e-25 of the sum), the direct form above (it loses less than a digit)."""
    x = np.asarray(x, dtype=float)
    small = x < 0.5
    xs = np.where(small, x, 0.0)
    term = 0.5 * xs * xs
    acc = term.copy()
    for k in range(3, 22):
        term = term * (-xs / k)
        acc = acc + term
    return np.where(small, acc, x + np.expm1(-np.where(small, 0.0, x)))


def _logcosh(x):
    x = np.abs(x)
    return x + np.log1p(np.exp(-2 * x)) - math.log(2.0)


@dataclass(frozen=True)
class Stage:
    """A named stage: duration, the f_rot profile and one multiplier profile
    per pinning term (dimensionless factor on the configured strength)."""

    name: str
    duration_s: float
    f_rot: Profile
    pinning: tuple  # Profiles, one per pinning term, in config order


@dataclass(frozen=True)
class Schedule:
    """The whole run: a tuple of stages back to back from t = 0.

    All queries take absolute times in s and return SI values (Hz for
    f_rot, rad for theta, dimensionless multipliers for pinning).
    """

    stages: tuple
    pinning_names: tuple = field(default=())

    @property
    def boundaries_s(self) -> np.ndarray:
        return np.concatenate([[0.0], np.cumsum([s.duration_s for s in self.stages])])

    @property
    def duration_s(self) -> float:
        return float(self.boundaries_s[-1])

    def _locate(self, t):
        b = self.boundaries_s
        t = np.asarray(t, dtype=float)
        k = np.clip(np.searchsorted(b, t, side="right") - 1, 0, len(self.stages) - 1)
        return t, k, b

    def f_rot_hz(self, t) -> np.ndarray:
        t, k, b = self._locate(t)
        out = np.empty(t.shape)
        for i, st in enumerate(self.stages):
            m = k == i
            out[m] = st.f_rot.value(t[m] - b[i])
        return out

    def pinning_scale(self, t, term: int = 0) -> np.ndarray:
        t, k, b = self._locate(t)
        out = np.empty(t.shape)
        for i, st in enumerate(self.stages):
            m = k == i
            out[m] = st.pinning[term].value(t[m] - b[i])
        return out

    def theta_rad(self, t) -> np.ndarray:
        """Pinning angle theta(t) = 2 pi int_0^t f_rot, exact per shape."""
        t, k, b = self._locate(t)
        offsets = np.concatenate([[0.0], np.cumsum([st.f_rot.integral(st.duration_s) for st in self.stages])])
        out = np.empty(t.shape)
        for i, st in enumerate(self.stages):
            m = k == i
            out[m] = offsets[i] + st.f_rot.integral(t[m] - b[i])
        return 2.0 * np.pi * out

    def f_rot_rate_hz_per_s(self, t) -> np.ndarray:
        """d f_rot / dt (Hz/s) at absolute times t (the rate inside the stage
        that holds t; at a boundary, the later stage's)."""
        t, k, b = self._locate(t)
        out = np.empty(t.shape)
        for i, st in enumerate(self.stages):
            m = k == i
            out[m] = st.f_rot.rate(t[m] - b[i])
        return out

    def angular_acceleration_rad_s2(self, t) -> np.ndarray:
        """The angular acceleration the schedule asks of the pinning, 2 pi d f_rot / dt (rad/s^2)."""
        return 2.0 * np.pi * self.f_rot_rate_hz_per_s(t)

    def max_f_rot_hz(self) -> float:
        """Largest |f_rot| over the schedule (Hz), exact (:meth:`Profile.extremes`)."""
        return max(max(abs(v) for v in st.f_rot.extremes()) for st in self.stages)

    def peak_pinning_scale(self, term: int = 0) -> float:
        """Largest |pinning multiplier| of a term over the schedule."""
        return max(max(abs(v) for v in st.pinning[term].extremes()) for st in self.stages)

    def spins(self, stage: int) -> bool:
        """True when f_rot changes during stage ``stage`` (a spin-up or spin-down)."""
        lo, hi = self.stages[stage].f_rot.extremes()
        return hi != lo

    def stage_samples(self, stage: int, n: int = 2001) -> dict:
        """A stage sampled on ``n`` points: absolute times ``t_s``,
        ``f_rot_hz``, ``alpha_rad_s2`` (2 pi d f_rot/dt, analytic) and
        ``scale`` ((n, P) pinning multipliers, one column per term)."""
        st = self.stages[stage]
        tl = np.linspace(0.0, st.duration_s, n)
        scales = np.stack([np.asarray(p.value(tl), dtype=float) for p in st.pinning], axis=-1) if st.pinning \
            else np.zeros((n, 0))
        return {"t_s": self.boundaries_s[stage] + tl, "f_rot_hz": np.asarray(st.f_rot.value(tl), dtype=float),
                "alpha_rad_s2": 2.0 * np.pi * np.asarray(st.f_rot.rate(tl), dtype=float), "scale": scales}

    def acceleration_profile(self, term: int = 0, n_per_stage: int = 4001) -> dict:
        """The angular acceleration asked over the whole schedule.

        Returns
        -------
        dict with arrays ``t_s``, ``alpha_rad_s2`` (2 pi d f_rot/dt),
        ``scale`` (multiplier of pinning term ``term``, 1 without pinning),
        ``f_rot_hz``; and ``alpha_max_rad_s2``, ``t_alpha_max_s``,
        ``f_max_hz``, ``t_f_max_s``, ``scale_at_f_max``.
        """
        parts = [self.stage_samples(i, n_per_stage) for i in range(len(self.stages))]
        t = np.concatenate([p["t_s"] for p in parts])
        a = np.concatenate([p["alpha_rad_s2"] for p in parts])
        f = np.concatenate([p["f_rot_hz"] for p in parts])
        s = np.concatenate([p["scale"][:, term] if p["scale"].shape[1] > term else np.ones(len(p["t_s"])) for p in parts])
        ka = int(np.argmax(np.abs(a)))
        kf = int(np.argmax(np.abs(f)))
        return {"t_s": t, "alpha_rad_s2": a, "scale": s, "f_rot_hz": f, "alpha_max_rad_s2": float(abs(a[ka])),
                "t_alpha_max_s": float(t[ka]), "f_max_hz": float(f[kf]), "t_f_max_s": float(t[kf]),
                "scale_at_f_max": float(s[kf])}


# ---------------------------------------------------------------------------
# Parsing from config tables
# ---------------------------------------------------------------------------
def parse_profile(spec, previous: float, duration_s: float, parse_value, key: str, source: str,
                  base_dir=None) -> Profile:
    """Build a Profile from a config value.

    ``spec`` is a table ``{from, to, shape, steepness, tau, table, points}``
    or a bare value (a hold at that value). ``parse_value(v, key)`` turns a
    config value into SI. ``previous`` is the value at the end of the last
    stage; a ``from`` that differs from it is refused (discontinuity).
    """
    if not isinstance(spec, dict):
        spec = {"to": spec, "shape": "hold"}
    allowed = {"from", "to", "shape", "steepness", "tau", "table", "points"}
    for k in spec:
        if k not in allowed:
            raise InputError(f"{key}.{k}", f"unknown key; expected one of {sorted(allowed)}", source)
    shape = spec.get("shape", "linear" if "to" in spec else "hold")
    if shape not in SHAPES:
        raise InputError(f"{key}.shape", f"unknown shape {shape!r}; expected one of {list(SHAPES)}", source)
    # a key the shape does not read would be ignored: refuse it
    for k, user in (("steepness", "tanh"), ("tau", "exponential"), ("points", "table"), ("table", "table")):
        if k in spec and shape != user:
            raise InputError(f"{key}.{k}", f"is read by the '{user}' shape only, and this profile's shape is {shape!r}; "
                                           f"expected shape = '{user}' or no '{k}'", source)
    if "points" in spec and "table" in spec:
        raise InputError(f"{key}.points", "a table comes from 'points' or from a 'table' file, not both", source)
    v0 = previous
    if "from" in spec:
        v0 = parse_value(spec["from"], f"{key}.from")
        tol = 1e-9 * max(abs(previous), abs(v0), 1e-300)
        if abs(v0 - previous) > tol:
            raise InputError(f"{key}.from", f"discontinuous schedule: starts at {v0:g} but the previous stage ends at {previous:g} (SI units); stages must join continuously", source)
    if shape == "table":
        if "table" in spec:
            ts, vs = _read_table(spec["table"], f"{key}.table", source, base_dir)
        else:
            pts = spec.get("points")
            if not pts or not isinstance(pts, list):
                raise InputError(f"{key}", "a 'table' shape needs 'points' = [[\"0 ms\", value], ...] or 'table' = \"file.csv\"", source)
            ts, vs = [], []
            for i, p in enumerate(pts):
                if not isinstance(p, (list, tuple)) or len(p) != 2:
                    raise InputError(f"{key}.points[{i}]", "expected a pair [time, value]", source)
                ts.append(parse(p[0], "time", f"{key}.points[{i}]", source))
                vs.append(parse_value(p[1], f"{key}.points[{i}]"))
        ts, vs = np.array(ts), np.array(vs)
        where = f"{key}.table" if "table" in spec else f"{key}.points"  # the key the user wrote
        if len(ts) < 2 or np.any(np.diff(ts) <= 0):
            raise InputError(where, "table times must increase strictly (at least two rows)", source)
        if abs(ts[0]) > 1e-15 or abs(ts[-1] - duration_s) > 1e-9 * duration_s:
            raise InputError(where, f"table must span the stage from 0 to its duration ({duration_s:g} s)", source)
        if abs(vs[0] - previous) > 1e-9 * max(abs(previous), abs(vs[0]), 1e-300):
            raise InputError(where, f"discontinuous schedule: table starts at {vs[0]:g} but the previous stage ends at {previous:g}", source)
        if "to" in spec:
            to = parse_value(spec["to"], f"{key}.to")
            if abs(to - vs[-1]) > 1e-9 * max(abs(to), abs(vs[-1]), 1e-300):
                raise InputError(f"{key}.to", f"the table ends at {vs[-1]:g} (SI units), not at 'to' = {to:g}; expected "
                                              f"no 'to' with a table (its last value is the stage's end)", source)
        return Profile("table", float(vs[0]), float(vs[-1]), duration_s, table_t=tuple(ts), table_v=tuple(vs))
    v1 = parse_value(spec["to"], f"{key}.to") if "to" in spec else v0
    if shape == "hold" and abs(v1 - v0) > 1e-12 * max(abs(v0), abs(v1)):
        raise InputError(f"{key}.to", "a 'hold' cannot change the value; give a shape such as 'linear' or 'smoothstep'", source)
    steep = 8.0
    if "steepness" in spec:
        steep = number(spec["steepness"], f"{key}.steepness", source, "a positive number")
        if steep <= 0:
            raise InputError(f"{key}.steepness", "expected a positive number", source)
    tau = 0.0
    if shape == "exponential":
        if "tau" not in spec:
            raise InputError(f"{key}.tau", "an 'exponential' shape needs a time constant such as '0.3 ms'", source)

        tau = parse(spec["tau"], "time", f"{key}.tau", source)
        if tau <= 0:
            raise InputError(f"{key}.tau", "expected a positive time constant", source)
    return Profile(shape, v0, v1, duration_s, float(steep), tau)


def _read_table(path, key, source, base_dir):
    from pathlib import Path

    p = Path(path)
    if not p.is_absolute() and base_dir is not None:
        p = Path(base_dir) / p

    rows = []
    for line in read_text(p, "table", key=key, source=source).splitlines():
        line = line.strip()
        if not line or line.startswith("#"):
            continue
        parts = [x.strip() for x in line.split(",")]
        try:
            row = [float(parts[0]), float(parts[1])]
        except (ValueError, IndexError):
            if rows:
                raise InputError(key, f"{str(p)!r}: cannot read the row {line!r}; expected 'time_s, value'", source) from None
            continue
        if len(parts) != 2:
            raise InputError(key, f"{str(p)!r}: the row {line!r} has {len(parts)} columns; expected 2 columns "
                                  f"'time_s, value'", source)
        if not all(math.isfinite(x) for x in row):
            raise InputError(key, f"{str(p)!r}: the row {line!r} is not finite; expected finite 'time_s, value'", source)
        rows.append(row)
    # CSV tables: first column time in s, second the value in SI
    # (Hz for f_rot, a multiplier for pinning); a header line is skipped.
    if not rows:
        raise InputError(key, f"{str(p)!r} holds no rows 'time_s, value'", source)
    return [r[0] for r in rows], [r[1] for r in rows]


# --------------------------------------------------------------------------
# per-stage scales of a stage-dependent term (noise PSD, laser intensity)
# --------------------------------------------------------------------------
def check_stage_name(st, key: str, names, source) -> None:
    """Refuse a ``stages`` entry that is not one of the schedule's stage names."""
    if not isinstance(st, str):
        raise InputError(key, f"expected a stage name, got {st!r}", source)
    if st not in names:
        raise InputError(key, f"no stage named {st!r}; the stages are {list(names)}", source)


def stage_scales(v, key: str, names, source, quantity: str, detail: str = "") -> tuple[dict, float]:
    """A config's ``stages`` entry of a stage-dependent term: ``(scales, default)``.

    A table ``{ stage = scale }`` (non-negative numbers; unlisted stages get
    ``default`` 1) or a list of the stages in which the term is on (scale 1
    there, ``default`` 0 elsewhere); absent: every stage at 1. The one
    parser of that shape, for noise entries (``quantity`` "PSD scale") and
    laser beams ("intensity multiplier"); ``detail`` follows the quantity in
    messages.
    """

    if v is None:
        return {}, 1.0
    if isinstance(v, list):
        for i, st in enumerate(v):
            check_stage_name(st, f"{key}[{i}]", names, source)
        return {st: 1.0 for st in v}, 0.0
    if not isinstance(v, dict):
        raise InputError(key, f"expected a table {{ stage = {quantity} }} or a list of stage names", source)
    out = {}
    what = f"a non-negative {quantity}{detail}"
    for st, x in v.items():
        check_stage_name(st, f"{key}.{st}", names, source)
        val = units.number(x, f"{key}.{st}", source, f"{what}, e.g. 1.0")
        if val < 0:
            raise InputError(f"{key}.{st}", f"expected {what}, got {x!r}", source)
        out[st] = val
    return out, 1.0
