"""How quantities are written on a figure and on the report page (display only).

* numbers (digits and value ± error from :mod:`mdrotor.numfmt`): a fraction with its interval,
  powers of ten on a log axis;
* units: ``V/m^2`` -> ``V/m²``, the time or frequency unit that suits a range;
* config keys that a sweep or optimisation varies: the quantity in words,
  stage names as the config writes them, pinning terms as c_n, never the
  dotted path;
* metrics of a sweep or optimisation: the metric -> (label, scale, unit)
  table, never the column name;
* the frame the modes are measured in.
"""

from __future__ import annotations

import math

import numpy as np

from mdrotor.numfmt import compact

SIG = r"$\sigma_L$"  # figure text (mathtext)
FROT = r"$f_\mathrm{rot}$"


def _sup(n: int) -> str:
    return str(n).translate(str.maketrans("0123456789-", "⁰¹²³⁴⁵⁶⁷⁸⁹⁻"))


def _sub(n) -> str:
    return str(n).translate(str.maketrans("0123456789", "₀₁₂₃₄₅₆₇₈₉"))


def pretty_unit(u: str | None) -> str:
    """'V/m^2' -> 'V/m²', 'us' -> 'µs' (display only)."""
    import re

    if not u:
        return ""
    u = re.sub(r"\^\(?(-?\d+)\)?", lambda m: _sup(int(m.group(1))), u)
    u = re.sub(r"\*\*(-?\d+)", lambda m: _sup(int(m.group(1))), u)
    u = re.sub(r"\bu(?=[a-zA-Z])", "µ", u)
    return u.replace(" * ", " ").replace("*", " ")


def time_unit(t_max_s: float):
    """(scale, unit) of a time axis reaching ``t_max_s``: ns, µs, ms or s."""
    a = abs(float(t_max_s)) if np.isfinite(t_max_s) else 1.0
    if a < 1e-6:
        return 1e9, "ns"
    if a < 1e-3:
        return 1e6, "µs"
    if a < 1.0:
        return 1e3, "ms"
    return 1.0, "s"


def freq_unit(f_max_hz: float):
    """(scale, unit) of a frequency axis reaching ``f_max_hz``: Hz, kHz or MHz."""
    a = abs(float(f_max_hz)) if np.isfinite(f_max_hz) else 0.0
    if a >= 1e6:
        return 1e-6, "MHz"
    if a >= 1e3:
        return 1e-3, "kHz"
    return 1.0, "Hz"


def fraction_text(s: dict, m: str) -> str:
    """A fraction with its interval '0.031 [0.024, 0.040]' when the summary
    stores the bounds (``<m>_lo`` / ``<m>_hi``), else the value alone (the
    older ``_err`` column is a standard error or a 95 % bound depending on
    the count, and is not printed as either)."""
    v = s.get(m)
    if v is None:
        return "n/a"
    lo, hi = s.get(f"{m}_lo"), s.get(f"{m}_hi")
    if lo is not None and hi is not None:
        return f"{float(v):.3f} [{compact(lo, 2)}, {compact(hi, 2)}]"
    return f"{float(v):.3f}"


def term_label(name: str, order) -> str:
    """A pinning term as a physicist writes it: its coefficient c_n (the
    multipole convention Phi_n = Re[c_n (x + iy)^n e^{-in angle}]), with the
    user's own name when the config gave one (the default name is internal)."""
    if order is None:
        return f"term {name}"
    c = f"c{_sub(order)}"
    return c if name == f"n{order}" else f"{c} ({name})"


def term_unit(order) -> str:
    """Unit of a pinning term's coefficient c_n: V/mⁿ."""
    return f"V/m{_sup(order)}" if order else "V/mⁿ"


def _names(meta: dict | None) -> dict:
    """The base config's names as the study file stores them (``meta["names"]``,
    :func:`mdrotor.report.inputs.stored_names`): ``stages``, ``pinning`` [(name, order)]."""
    return (meta or {}).get("names") or {"stages": [], "pinning": []}


# config keys that a sweep or optimisation varies, as a physicist names them
_KEY_NAMES = {
    "initial.temperature": "initial temperature", "initial.wigner": "zero-point motion (Wigner)",
    "trap.f_radial": "radial secular frequency", "trap.f_axial": "axial secular frequency",
    "trap.radial_split": "in-plane frequency splitting", "trap.f_drive": "RF drive frequency",
    "trap.q": "Mathieu q", "trap.a": "Mathieu a", "trap.model": "trap model", "trap.stray_field": "stray field",
    "crystal.ions": "number of ions", "run.trajectories": "trajectories", "run.seed": "seed",
    "run.integrator": "integrator", "run.dt": "time step", "observe.loss_radius": "loss radius",
    "observe.series_interval": "time-series interval",
}


_RAMP_PARTS = {"to": "final", "from": "initial", "shape": "ramp shape", "steepness": "ramp steepness",
               "tau": "ramp time constant", "table": "ramp table"}


def key_label(key: str, meta: dict | None = None) -> str:
    """Axis title of a swept or optimised config key (``--set`` path): the
    quantity in words, stage names as the user wrote them (quoted), pinning
    terms as c_n; never the dotted path itself."""
    meta = meta or {}
    terms = [tuple(t) for t in _names(meta)["pinning"]]
    parts = key.split(".")

    def term(ref):
        for i, (name, order) in enumerate(terms):
            if ref in (name, str(i)):
                return term_label(name, order)
        return term_label(ref, None)

    if parts[0] == "stage" and len(parts) >= 3:
        st = parts[1]
        if st.isdigit():
            names = _names(meta)["stages"]
            st = names[int(st)] if int(st) < len(names) else f"stage {st}"
        where = f"'{st}':"
        rest = parts[2:]
        if rest == ["duration"]:
            return f"{where} duration"
        if rest[0] == "f_rot":
            if len(rest) == 1:
                return f"{where} final {FROT}"
            if rest[1] == "points" and len(rest) >= 4:
                return f"{where} {FROT if rest[3] == '1' else 'time'} at knot {rest[2]}"
            part = _RAMP_PARTS.get(rest[1], rest[1].replace("_", " "))
            return f"{where} {part} {FROT}" if rest[1] in ("to", "from") else f"{where} {FROT} {part}"
        if rest[0] == "pinning":
            sub = rest[1:]
            who = "pinning"
            if sub and sub[0] not in _RAMP_PARTS and sub[0] != "points":
                who, sub = f"pinning {term(sub[0])}", sub[1:]
            if not sub:
                return f"{where} final {who} multiplier"
            if sub[0] == "points" and len(sub) >= 3:
                return f"{where} {who} {'multiplier' if sub[2] == '1' else 'time'} at knot {sub[1]}"
            part = _RAMP_PARTS.get(sub[0], sub[0].replace("_", " "))
            return f"{where} {part} {who} multiplier" if sub[0] in ("to", "from") else f"{where} {who} {part}"
        return f"{where} " + " ".join(p.replace("_", " ") for p in rest)
    if parts[0] == "pinning":
        sub = parts[1:]
        ref = None
        if len(sub) >= 2:
            ref, sub = sub[0], sub[1:]
        t = term(ref) if ref is not None else (term_label(*terms[0]) if len(terms) == 1 else "term")
        what = {"strength": "", "angle": " angle", "order": " order"}.get(sub[0] if sub else "", " " + " ".join(sub))
        return f"pinning {t}{what}".rstrip()
    if key in _KEY_NAMES:
        return _KEY_NAMES[key]
    return " ".join(p.replace("_", " ") for p in parts)


def frame_text(frame: tuple[str, float]) -> str:
    """'lab frame' or 'rotating frame, 199.3 kHz'."""
    kind, f = frame
    if kind == "lab":
        return "lab frame"
    fs, fu = freq_unit(f)
    return f"rotating frame, {compact(f * fs, 4)} {fu}"


_METRIC_NAMES = {
    "L_mean_hbar": ("mean ⟨L⟩", 1.0, "ħ"), "L_std_hbar": (f"spread {SIG}", 1.0, "ħ"),
    "L_com_mean_hbar": ("mean L about the centre of mass", 1.0, "ħ"),
    "differential_n_mean": ("differential phonons", 1.0, "quanta"), "com_n_mean": ("COM phonons", 1.0, "quanta"),
    "slip_fraction": ("slipped", 1.0, "fraction"), "loss_fraction": ("lost an ion", 1.0, "fraction"),
    "reorder_fraction": ("reordered", 1.0, "fraction"), "nonfinite_fraction": ("non-finite", 1.0, "fraction"),
    "n_ok": ("trajectories kept", 1.0, "count"), "n_trajectories": ("trajectories", 1.0, "count"),
    "n_steps": ("steps", 1.0, "count"), "I_kg_m2": ("moment of inertia", 1.0, "kg m²"),
    "objective": ("objective", 1.0, "as defined"), "penalty": ("penalty", 1.0, "objective units"),
    "feasible": ("feasible", 1.0, "1 = yes"), "duration_s": ("schedule duration", 1e6, "µs"),
    "dt_s": ("time step", 1e9, "ns"), "wall_s": ("wall-clock time", 1.0, "s"),
    "f_rot_mean_hz": (f"rotation {FROT}", 1e-3, "kHz"), "f_rot_peak_hz": (f"peak {FROT}", 1e-3, "kHz"),
}


def metric_label(name: str, meta: dict | None = None):
    """(label, scale, unit) of a metric for an axis: the quantity in words
    with its unit, never the column name."""
    suffix = ""
    base = name
    if name.startswith("stage.") and name.count(".") >= 2:
        _, st, base = name.split(".", 2)
        suffix = f"\nat the end of '{st}'"
    if base in _METRIC_NAMES:
        lab, sc, u = _METRIC_NAMES[base]
    elif base.startswith("mode_n_mean."):
        lab, sc, u = f"⟨n⟩ {base.split('.', 1)[1]}", 1.0, "quanta"
    elif base.startswith("pinning_peak."):
        term = base.split(".", 1)[1]
        order = dict(tuple(t) for t in _names(meta)["pinning"]).get(term)
        lab, sc, u = f"peak pinning {term_label(term, order)}", 1.0, term_unit(order)
    elif base.endswith("_hz"):
        sc, u = freq_unit(1e4)
        lab = base[:-3].replace("_", " ")
    elif base.endswith("_hbar"):
        lab, sc, u = base[:-5].replace("_", " "), 1.0, "ħ"
    elif base.endswith("_rad"):
        lab, sc, u = base[:-4].replace("_", " "), 1.0, "rad"
    elif base.endswith("_s"):
        lab, sc, u = base[:-2].replace("_", " "), 1.0, "s"
    else:
        lab, sc, u = base.replace("_", " "), 1.0, "as stored"
    return f"{lab} ({u}){suffix}", sc, u


def plain_text(text: str) -> str:
    """Figure text for a Markdown / HTML page: the mathtext symbols as plain characters."""
    return text.replace(SIG, "σ_L").replace(FROT, "f_rot")


def metric_name(name: str, meta: dict | None = None) -> str:
    """The metric's label on one line (for footnotes and titles)."""
    return metric_label(name, meta)[0].replace("\n", " ")


def _sci(v: float) -> str:
    """A tick value: plain between 1e-3 and 1e4, else 5×10⁴."""
    if v == 0 or 1e-3 <= abs(v) < 1e4:
        return compact(v, 3)
    e = int(math.floor(math.log10(abs(v))))
    m = float(f"{v / 10 ** e:.3g}")
    return f"10{_sup(e)}" if m == 1 else f"{compact(m, 3)}×10{_sup(e)}"


def log_ticks(axis):
    """Labelled ticks at 1, 2 and 5 times the powers of ten on a log axis
    (a sweep over less than a decade still gets labels), unlabelled minor
    ticks between."""
    from matplotlib.ticker import FuncFormatter, LogLocator, NullFormatter

    axis.set_major_locator(LogLocator(base=10.0, subs=(1.0, 2.0, 5.0)))
    axis.set_major_formatter(FuncFormatter(lambda v, _pos: _sci(v)))
    axis.set_minor_locator(LogLocator(base=10.0, subs=tuple(range(2, 10))))
    axis.set_minor_formatter(NullFormatter())
