"""The ``[noise]`` table of a config, parsed once into a
:class:`mdrotor.physics.noise.NoiseModel` (keys, units, per-stage scales,
tones) with one message per bad value naming the key.
"""

from __future__ import annotations

import math

from mdrotor import units
from mdrotor.config.schedule import check_stage_name, stage_scales
from mdrotor.errors import InputError
from mdrotor.physics.noise import (
    AXES,
    COMPONENTS,
    KINDS,
    NoiseModel,
    NoiseSource,
    PsdTerm,
    Spectrum,
    Tone,
)

ENTRY_KEYS = {"axes", "psd", "stages"}


MULTIPOLE_KEYS = {"order", "psd", "stages"}


TERM_KEYS = {
    "white": {"kind", "level"},
    "power": {"kind", "level", "f_ref", "alpha", "f_min", "f_max"},
    "lorentzian": {"kind", "level", "f_center", "width"},
}


TONE_KEYS = {"target", "axis", "order", "component", "amplitude", "frequency", "phase", "stages"}


# ---------------------------------------------------------------------------
# PSD dimensions
# ---------------------------------------------------------------------------
def psd_dimensionality(order: int) -> str:
    """Pint dimensionality of a PSD of order ``order`` (0: uniform field).

    V^2/m^2/Hz for the field, V^2/m^(2n)/Hz for the order-n coefficient."""
    p = 2 if order == 0 else 2 * int(order)
    return f"[electric_potential]**2/[length]**{p}*[time]"


def psd_example(order: int) -> str:
    return "1e-12 V^2/m^2/Hz" if order == 0 else f"1e-4 V^2/m^{2 * int(order)}/Hz"


def _amp_dimensionality(order: int) -> str:
    return "[electric_potential]/[length]" if order == 0 else units.multipole_dimension(order)


def _amp_example(order: int) -> str:
    return "1e-3 V/m" if order == 0 else units.multipole_example(order)


# ---------------------------------------------------------------------------
# Parsing
# ---------------------------------------------------------------------------
def parse_noise(raw, source: str = "<dict>", stage_names=()) -> NoiseModel:
    """Validate a ``[noise]`` table into a :class:`NoiseModel`.

    Shape (every table optional; ``[[...]]`` may also be a single table)::

        [[noise.field]]                 # uniform field
        axes = ["x", "y"]               # default ["x", "y", "z"]; independent, same PSD
        psd = [ { kind = "white", level = "1e-12 V^2/m^2/Hz" },
                { kind = "power", level = "1e-12 V^2/m^2/Hz", f_ref = "1 MHz",
                  alpha = 1.0, f_min = "1 kHz", f_max = "10 MHz" },
                { kind = "lorentzian", level = "1e-11 V^2/m^2/Hz",
                  f_center = "400 kHz", width = "10 kHz" } ]
        stages = { free = 1.0, spin-up = 0.0 }   # PSD scale; unlisted stages 1
                                                 # (or a list: on only there)
        [[noise.multipole]]
        order = 2                       # n >= 2; g_re and g_im each get this PSD
        psd = { kind = "white", level = "1e-4 V^2/m^4/Hz" }
        [[noise.tone]]
        target = "multipole"            # or "field" (then axis = "x" | "y" | "z")
        order = 2
        component = "re"                # "re" | "im" | "rotating"
        amplitude = "10 V/m^2"          # V/m for the field
        frequency = "400 kHz"
        phase = "0 deg"                 # default 0
        stages = ["free"]               # default: all stages

    Parameters
    ----------
    raw : dict
        The ``[noise]`` table of a config.
    source : str
        File name for messages.
    stage_names : sequence of str
        Names of the schedule's stages (``stages`` keys must be among them).

    Raises
    ------
    InputError
        Naming the key path (``noise.field[0].psd[1].level``) and what was expected.
    """
    if raw is None:
        raw = {}
    if not isinstance(raw, dict):
        raise InputError("noise", "expected a table with [[noise.field]], [[noise.multipole]], [[noise.tone]]", source)
    for k in raw:
        if k not in ("field", "multipole", "tone"):
            raise InputError(f"noise.{k}", "unknown key; expected one of ['field', 'multipole', 'tone']", source)
    names = tuple(stage_names)
    sources = []
    field_items = _items(raw.get("field"), "noise.field", source)
    for key, it in field_items:
        _check_keys(it, key, ENTRY_KEYS, source)
        axes = it.get("axes", list(AXES))
        if isinstance(axes, str):
            axes = [axes]
        if not isinstance(axes, list) or not axes or any(a not in AXES for a in axes) or len(set(axes)) != len(axes):
            raise InputError(f"{key}.axes", f"expected a non-empty list of distinct axes from ['x', 'y', 'z'], got {axes!r}", source)
        spec = _spectrum(_require(it, "psd", key, source, "a PSD term or a list of terms"), f"{key}.psd", 0, source)
        scales, default = stage_scales(it.get("stages"), f"{key}.stages", names, source, "PSD scale", " (amplitude squared)")
        for a in axes:
            sources.append(NoiseSource("field", AXES.index(a), 0, 0, spec, scales, default, key))
    multi = []
    for key, it in _items(raw.get("multipole"), "noise.multipole", source):
        _check_keys(it, key, MULTIPOLE_KEYS, source)
        order = _order(_require(it, "order", key, source, "the multipole order n >= 2"), f"{key}.order", source)
        spec = _spectrum(_require(it, "psd", key, source, "a PSD term or a list of terms"), f"{key}.psd", order, source)
        scales, default = stage_scales(it.get("stages"), f"{key}.stages", names, source, "PSD scale", " (amplitude squared)")
        multi.append((order, spec, scales, default, key))
    tones_raw = []
    for key, it in _items(raw.get("tone"), "noise.tone", source):
        tones_raw.append((key, _tone(it, key, names, source)))
    orders = tuple(sorted({m[0] for m in multi} | {t[1]["order"] for t in tones_raw if t[1]["target"] == "multipole"}))
    for order, spec, scales, default, key in multi:
        k = orders.index(order)
        sources.append(NoiseSource("multipole", k, 0, order, spec, scales, default, key))
        sources.append(NoiseSource("multipole", k, 1, order, spec, scales, default, key))
    tones = []
    for key, d in tones_raw:
        ch = d["axis"] if d["target"] == "field" else orders.index(d["order"])
        tones.append(Tone(d["target"], ch, d["order"], d["component"], d["amplitude"], d["frequency"],
                          d["phase"], d["stages"], key))
    return NoiseModel(tuple(sources), tuple(tones), orders, names)



def _items(v, key, source):
    if v is None:
        return []
    if isinstance(v, dict):
        return [(key, v)]
    if not isinstance(v, list) or not all(isinstance(x, dict) for x in v):
        raise InputError(key, "expected a table or an array of tables ([[" + key + "]])", source)
    return [(f"{key}[{i}]", x) for i, x in enumerate(v)]


def _check_keys(table, key, allowed, source):
    if not isinstance(table, dict):
        raise InputError(key, "expected a table", source)
    for k in table:
        if k not in allowed:
            raise InputError(f"{key}.{k}", f"unknown key; expected one of {sorted(allowed)}", source)


def _require(table, k, key, source, what):
    if k not in table:
        raise InputError(f"{key}.{k}", f"missing; expected {what}", source)
    return table[k]


def _order(v, key, source) -> int:
    if isinstance(v, bool) or not isinstance(v, int) or v < 2:
        raise InputError(key, f"expected an integer multipole order n >= 2 (the uniform field is [[noise.field]]), got {v!r}", source)
    return v


def _number(v, key, source, what) -> float:
    if isinstance(v, bool) or not isinstance(v, (int, float)) or not math.isfinite(v):
        raise InputError(key, f"expected {what}, got {v!r}", source)
    return float(v)


def _freq(v, key, source, positive=True) -> float:
    f = units.parse(v, "frequency", key, source)
    if not math.isfinite(f) or f < 0 or (positive and f == 0):
        raise InputError(key, f"expected a {'positive' if positive else 'non-negative'} frequency such as '1 MHz', got {v!r}", source)
    return f


def _spectrum(spec, key, order, source) -> Spectrum:
    items = [(key, spec)] if isinstance(spec, dict) else None
    if items is None:
        if not isinstance(spec, list) or not spec:
            raise InputError(key, "expected a PSD term { kind = ..., level = ... } or a non-empty list of them", source)
        items = [(f"{key}[{i}]", t) for i, t in enumerate(spec)]
    terms = []
    for k, t in items:
        if not isinstance(t, dict):
            raise InputError(k, "expected a PSD term { kind = ..., level = ... }", source)
        kind = _require(t, "kind", k, source, f"one of {list(KINDS)}")
        if kind not in KINDS:
            raise InputError(f"{k}.kind", f"expected one of {list(KINDS)}, got {kind!r}", source)
        _check_keys(t, k, TERM_KEYS[kind], source)
        level = units.parse(_require(t, "level", k, source, f"a PSD such as '{psd_example(order)}'"), "custom",
                            f"{k}.level", source, dimensionality=psd_dimensionality(order), example=psd_example(order))
        if not math.isfinite(level) or level < 0:
            raise InputError(f"{k}.level", f"expected a non-negative PSD such as '{psd_example(order)}', got {t['level']!r}", source)
        if kind == "white":
            terms.append(PsdTerm("white", level))
        elif kind == "power":
            f_ref = _freq(_require(t, "f_ref", k, source, "the reference frequency of the level, such as '1 MHz'"), f"{k}.f_ref", source)
            alpha = _number(_require(t, "alpha", k, source, "the exponent alpha in f^-alpha, 0 to 2"), f"{k}.alpha", source, "an exponent between 0 and 2")
            if not 0.0 <= alpha <= 2.0:
                raise InputError(f"{k}.alpha", f"expected an exponent between 0 and 2 (a sum of Lorentzians cannot rise or fall faster than f^-2), got {alpha!r}", source)
            f_min = _freq(_require(t, "f_min", k, source, "the lower band edge, such as '1 kHz'"), f"{k}.f_min", source)
            f_max = _freq(_require(t, "f_max", k, source, "the upper band edge, such as '10 MHz'"), f"{k}.f_max", source)
            if not f_max > f_min:
                raise InputError(f"{k}.f_max", f"expected an upper band edge above f_min ({t['f_min']!r}), got {t['f_max']!r}", source)
            terms.append(PsdTerm("power", level, f_ref_hz=f_ref, alpha=alpha, f_min_hz=f_min, f_max_hz=f_max))
        else:
            fc = _freq(t.get("f_center", "0 Hz"), f"{k}.f_center", source, positive=False)
            w = _freq(_require(t, "width", k, source, "the half width at half maximum, such as '10 kHz'"), f"{k}.width", source)
            terms.append(PsdTerm("lorentzian", level, f_center_hz=fc, width_hz=w))
    return Spectrum.from_terms(terms)


def _tone(it, key, names, source) -> dict:
    _check_keys(it, key, TONE_KEYS, source)
    target = _require(it, "target", key, source, "'field' or 'multipole'")
    if target not in ("field", "multipole"):
        raise InputError(f"{key}.target", f"expected 'field' or 'multipole', got {target!r}", source)
    d = {"target": target, "axis": 0, "order": 0, "component": "re"}
    if target == "field":
        for bad in ("order", "component"):
            if bad in it:
                raise InputError(f"{key}.{bad}", "only for target = 'multipole'; a field tone has an axis", source)
        a = _require(it, "axis", key, source, "'x', 'y' or 'z'")
        if a not in AXES:
            raise InputError(f"{key}.axis", f"expected 'x', 'y' or 'z', got {a!r}", source)
        d["axis"] = AXES.index(a)
    else:
        if "axis" in it:
            raise InputError(f"{key}.axis", "only for target = 'field'; a multipole tone has an order and a component", source)
        d["order"] = _order(_require(it, "order", key, source, "the multipole order n >= 2"), f"{key}.order", source)
        comp = it.get("component", "re")
        if comp not in COMPONENTS:
            raise InputError(f"{key}.component", f"expected one of {list(COMPONENTS)}, got {comp!r}", source)
        d["component"] = comp
    n = d["order"]
    amp = units.parse(_require(it, "amplitude", key, source, f"an amplitude such as '{_amp_example(n)}'"), "custom",
                      f"{key}.amplitude", source, dimensionality=_amp_dimensionality(n), example=_amp_example(n))
    if not math.isfinite(amp) or amp < 0:
        raise InputError(f"{key}.amplitude", f"expected a non-negative amplitude such as '{_amp_example(n)}' (use phase for the sign)", source)
    d["amplitude"] = amp
    d["frequency"] = _freq(_require(it, "frequency", key, source, "a frequency such as '400 kHz'"), f"{key}.frequency", source, positive=False)
    d["phase"] = units.parse(it.get("phase", 0.0), "angle", f"{key}.phase", source)
    st = it.get("stages")
    if st is None:
        d["stages"] = None
    else:
        if not isinstance(st, list):
            raise InputError(f"{key}.stages", "expected a list of stage names during which the tone is on", source)
        for i, s in enumerate(st):
            check_stage_name(s, f"{key}.stages[{i}]", names, source)
        d["stages"] = tuple(st)
    return d
