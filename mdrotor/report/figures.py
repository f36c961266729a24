"""Figures and one-page reports of runs, sweeps and optimisations.

``mdrotor report FILE.h5`` writes the figures of a result file and a
one-page summary (Markdown or HTML) into a folder. The same figures are
functions here that take a :class:`~mdrotor.results.result.Result` (or a path) and
return a matplotlib :class:`~matplotlib.figure.Figure`, for notebooks::

    from mdrotor.report import figures as report
    fig = report.L_histogram_figure("demo.h5")     # a Figure; fig.savefig("L.png")
    figs, skipped = report.run_figures("demo.h5")  # every run figure that the file allows

Run figures (each raises :class:`MissingData` when the file lacks the
optional group it needs):

* :func:`schedule_figure` -- f_rot and each pinning strength versus time,
  stages shaded and named (``/schedule``);
* :func:`L_histogram_figure` -- the final L distribution with Poisson error
  bars, mean and spread, and a zoom on a few quanta around the mean with the
  allowed-L ladder of the crystal's symmetry (:func:`mdrotor.physics.rotor.allowed_L_ladder`);
* :func:`L_stages_figure` -- the same histogram at t = 0 and at every stage end;
* :func:`series_figure` -- L mean and spread, lag envelope and mode phonons
  versus time (``/series``);
* :func:`phonons_figure` -- mean phonons per mode, centre-of-mass and
  differential modes apart;
* :func:`spectrum_figure` -- the rotational lines Delta L = 1..k with their
  widths (:func:`mdrotor.analysis.rotor.rotor_summary`);
* :func:`coherence_figure` -- Ramsey and echo contrast versus time with the
  exchange and revival times (:mod:`mdrotor.physics.coherence`), for the diffusion
  constant given, else fitted from the run's noise, else analytic.

:func:`quantum_figure` draws a quantum-rotor file (``mdrotor quantum -o``):
P(L) on the allowed ladder beside the ensemble's histogram, with the verdict.

Sweep and optimisation figures: :func:`sweep_figures` (every metric versus
each axis: line plots for one axis, heat maps for two, a chosen slice of
the others beyond) and :func:`optimize_figure` (objective and parameters
per evaluation, the best point). :func:`write_report` writes everything and
the summary. Nothing is computed here that another module owns: the
numbers come from the result, :mod:`mdrotor.results.stats`, :mod:`mdrotor.physics.rotor`,
:mod:`mdrotor.physics.coherence` and :mod:`mdrotor.analysis.rotor`.

matplotlib (the optional extra ``mdrotor[plot]``) is imported inside the
functions, and figures are drawn on the Agg canvas without pyplot.
"""

from __future__ import annotations

import html
import json
import math
from pathlib import Path

import numpy as np

from mdrotor.analysis.rotor import rotor_summary
from mdrotor.analysis.summary import summary_text
from mdrotor.config.parse import from_text
from mdrotor.engine.observe import W_GRID_HZ
from mdrotor.errors import InputError, PhysicsError
from mdrotor.inputfiles import open_hdf5
from mdrotor.model.quantum import config_ladder
from mdrotor.physics import coherence as coh
from mdrotor.physics.statics import SLOW_ROTATION_HZ
from mdrotor.report import style as plotstyle
from mdrotor.report.style import STAGE_FILL, wrap_text
from mdrotor.results.result import Result
from mdrotor.results.stats import histogram, mean_sem, std_se
from mdrotor.results.status import usable
from mdrotor.results.store import load_quantum, load_result
from mdrotor.studies.optimize import err_name
from mdrotor.studies.quantum import fixed_digits, text
from mdrotor.studies.sweep import convert, quantity, read_point, read_table, si_value

__all__ = [
    "MissingData", "file_kind", "schedule_figure", "L_histogram_figure", "L_stages_figure", "series_figure",
    "phonons_figure", "spectrum_figure", "coherence_figure", "run_figures", "sweep_figures", "optimize_figure",
    "quantum_figure",
    "write_report",
]

FORMATS = ("png", "pdf", "svg")
SUMMARY_FORMATS = ("md", "html")
PLOT_EXTRA = "pip install 'mdrotor[plot]' (or pip install matplotlib)"

# what each run figure shows (used as captions in the summary)
CAPTIONS = {
    "schedule": "The schedule: rotation frequency and each pinning strength versus time, stages shaded and named.",
    "L_final": "Final angular-momentum distribution: histogram with Poisson error bars, mean and spread, a normal curve "
               "with the same mean and spread; right, a zoom on a few quanta around the mean with the allowed-L ladder.",
    "L_stages": "Angular-momentum distribution at t = 0 and at the end of every stage.",
    "series": "Time series: L mean with its spread, lag angle behind the pinning (mean, spread, largest |lag|), "
              "mean phonons of every mode.",
    "phonons": "Mean phonon number of every mode at the end, centre-of-mass and differential modes apart (error bars: "
               "standard errors).",
    "spectrum": "Predicted rotational lines L -> L + Delta L: centres and widths from the final L spread (stick: centre; "
                "bar and profile: +-1 standard deviation).",
    "coherence": "Ramsey and spin-echo contrast of two branches k quanta apart versus free-evolution time under the "
                 "angular-momentum diffusion D, with the exchange and revival times.",
}


SIG = r"$\sigma_L$"  # figure text (mathtext)
FROT = r"$f_\mathrm{rot}$"


class MissingData(InputError):
    """A figure needs data that the file does not hold (an optional group,
    or a quantity that cannot be derived from it). ``key`` names the group."""


# ---------------------------------------------------------------------------
# matplotlib and style
# ---------------------------------------------------------------------------
def _mpl():
    try:
        import matplotlib  # noqa: F401
    except ImportError:
        raise InputError("", f"figures need matplotlib: {PLOT_EXTRA}", "mdrotor report") from None

    return plotstyle


def _sup(n: int) -> str:
    return str(n).translate(str.maketrans("0123456789-", "⁰¹²³⁴⁵⁶⁷⁸⁹⁻"))


def _sub(n) -> str:
    return str(n).translate(str.maketrans("0123456789", "₀₁₂₃₄₅₆₇₈₉"))


def _pretty_unit(u: str | None) -> str:
    """'V/m^2' -> 'V/m²', 'us' -> 'µs' (display only)."""
    import re

    if not u:
        return ""
    u = re.sub(r"\^\(?(-?\d+)\)?", lambda m: _sup(int(m.group(1))), u)
    u = re.sub(r"\*\*(-?\d+)", lambda m: _sup(int(m.group(1))), u)
    u = re.sub(r"\bu(?=[a-zA-Z])", "µ", u)
    return u.replace(" * ", " ").replace("*", " ")


def _time_unit(t_max_s: float):
    a = abs(float(t_max_s)) if np.isfinite(t_max_s) else 1.0
    if a < 1e-6:
        return 1e9, "ns"
    if a < 1e-3:
        return 1e6, "µs"
    if a < 1.0:
        return 1e3, "ms"
    return 1.0, "s"


def _freq_unit(f_max_hz: float):
    a = abs(float(f_max_hz)) if np.isfinite(f_max_hz) else 0.0
    if a >= 1e6:
        return 1e-6, "MHz"
    if a >= 1e3:
        return 1e-3, "kHz"
    return 1.0, "Hz"


def _fmt(x, digits=4) -> str:
    """``digits`` significant digits, without an exponent between 1e-3 and 1e6."""
    if x is None or not np.isfinite(float(x)):
        return "n/a"
    x = float(f"{float(x):.{digits}g}")
    if x == 0 or 1e-3 <= abs(x) < 1e6:
        return f"{x:.{max(digits, 7)}g}"
    return f"{x:.{digits}g}"


def _fraction_text(s: dict, m: str) -> str:
    """A fraction with its interval '0.031 [0.024, 0.040]' when the summary
    stores the bounds (``<m>_lo`` / ``<m>_hi``), else the value alone (the
    older ``_err`` column is a standard error or a 95 % bound depending on
    the count, and is not printed as either)."""
    v = s.get(m)
    if v is None:
        return "n/a"
    lo, hi = s.get(f"{m}_lo"), s.get(f"{m}_hi")
    if lo is not None and hi is not None:
        return f"{float(v):.3f} [{_fmt(lo, 2)}, {_fmt(hi, 2)}]"
    return f"{float(v):.3f}"


def _pm(v, e, digits=4) -> str:
    if e is None or not np.isfinite(e):
        return _fmt(v, digits)
    return f"{_fmt(v, digits)} ± {_fmt(e, 2)}"


# ---------------------------------------------------------------------------
# inputs
# ---------------------------------------------------------------------------
def file_kind(path) -> str:
    """``"run"``, ``"sweep"``, ``"optimize"`` or ``"quantum"``: what an mdrotor HDF5 file holds."""

    p = Path(path)
    with open_hdf5(p, "an mdrotor result, sweep or optimisation file (.h5)") as f:
        kind = f.attrs.get("kind")
        if kind is not None:
            kind = kind.decode() if isinstance(kind, bytes) else str(kind)
            if kind in ("sweep", "optimize", "quantum"):
                return kind
        if "stages" in f and "format_version" in f.attrs:
            return "run"
    raise InputError("", "not an mdrotor result, sweep, optimisation or quantum-rotor file", str(p))


def _load(result):
    """(Result, path or None) from a Result or a result file."""

    if isinstance(result, Result):
        return result, None
    p = Path(result)
    kind = file_kind(p)
    if kind != "run":
        use = ("quantum_figure" if kind == "quantum" else
               "sweep_figures / optimize_figure (or read_point(path, index) for one point)")
        raise InputError("", f"a {kind} file, not a run result: use {use}", str(p))

    return load_result(p), p


def _src(path) -> str:
    return str(path) if path is not None else "<result>"


def _obs(res, stage):
    if stage is None:
        return res.final
    if stage == "initial":
        if res.initial is None:
            raise MissingData("/initial", "the file has no /initial group", None)
        return res.initial
    if stage not in res.stages:
        raise InputError("stage", f"expected one of {', '.join(['initial', *res.stages])}, got {stage!r}", None)
    return res.stages[stage]


def _ok_L(obs) -> np.ndarray:
    ok = usable(obs.arrays["status"])
    L = np.asarray(obs.arrays["L_hbar"], dtype=float)[ok]
    return L[np.isfinite(L)]


def _ladder(res):
    """(modulus, residue, statistics, N) of the allowed-L ladder of the
    result's crystal (:func:`mdrotor.model.quantum.config_ladder`, the rule of
    :func:`mdrotor.physics.rotor.allowed_L_ladder`), or None when the config cannot
    be read back."""
    try:
        lad = config_ladder(from_text(res.attrs["config_text"], "<result>", res.attrs.get("config_dir")))
    except (KeyError, InputError, PhysicsError):
        return None
    return lad.modulus, lad.residue, lad.statistics, lad.symmetry_order


def _bins(L: np.ndarray, bins):
    """Bins for :func:`mdrotor.results.stats.histogram`: as asked, or unit-wide edges
    around the value when every trajectory has (nearly) the same L."""
    lo, hi = float(np.min(L)), float(np.max(L))
    if hi - lo <= 1e-9 * max(1.0, abs(hi)):
        c = 0.5 * (lo + hi)
        return np.linspace(c - 0.5, c + 0.5, 6)
    return bins


def _stage_bounds(res):
    """(bounds_s, names) of the stages, from /schedule or the stage-end times."""
    sc = res.schedule
    if sc and "stage_bounds_s" in sc and "stage_names" in sc:
        return np.asarray(sc["stage_bounds_s"], dtype=float), list(sc["stage_names"])
    names = list(res.stages)
    return np.array([0.0] + [res.stages[n].t_s for n in names]), names


def _spread(ax, centres, texts, fontsize):
    """Horizontal positions (axes fraction) for labels wanted at ``centres``
    (axes fraction, increasing) that keep them from running into each
    other, in the same order, inside the panel. Widths are estimated from
    the longest line (0.6 em a character) on the panel's share of the page;
    the layout checks confirm the result."""
    axes_w_in = 0.85 * ax.figure.get_figwidth()
    widths = [(0.6 * fontsize / 72.0 * max(len(x) for x in t.split("\n")) + 0.08) / axes_w_in for t in texts]
    pos = list(centres)
    for i in range(1, len(pos)):  # push right past the left neighbour ...
        pos[i] = max(pos[i], pos[i - 1] + 0.5 * (widths[i - 1] + widths[i]))
    if pos:  # ... then back inside the right edge, and past the right neighbour
        pos[-1] = min(pos[-1], 1.0 - 0.5 * widths[-1])
        for i in range(len(pos) - 2, -1, -1):
            pos[i] = min(pos[i], pos[i + 1] - 0.5 * (widths[i] + widths[i + 1]))
    return pos


def _shade_stages(ax, bounds_s, names, scale, label=True):
    """Stages as alternating bands; with ``label`` their names (as the config
    writes them) above the panel, spread apart where stages are too narrow
    for their names and joined to their stage by a thin line."""

    for i, name in enumerate(names):
        a, b = bounds_s[i] * scale, bounds_s[i + 1] * scale
        ax.axvspan(a, b, color=STAGE_FILL[i % 2], zorder=0, lw=0)
        if i:
            ax.axvline(a, color="#a8a8a8", lw=0.6, zorder=0.5)
    if not label or not names:
        return
    total = float(bounds_s[-1] - bounds_s[0]) or 1.0
    centres = [(0.5 * (bounds_s[i] + bounds_s[i + 1]) - bounds_s[0]) / total for i in range(len(names))]
    fs = 7.5
    pos = _spread(ax, centres, [str(n) for n in names], fs)
    for name, c, p in zip(names, centres, pos):
        if abs(p - c) < 1e-3:
            ax.text(c, 1.02, name, transform=ax.transAxes, ha="center", va="bottom", fontsize=fs, style="italic",
                    clip_on=False)
        else:
            ax.annotate(name, xy=(c, 0.95), xycoords="axes fraction", xytext=(p, 1.02), textcoords="axes fraction",
                        ha="center", va="bottom", fontsize=fs, style="italic", annotation_clip=False,
                        arrowprops={"arrowstyle": "-", "color": "#6a6a6a", "lw": 0.6, "shrinkA": 0, "shrinkB": 0})


def _pin_terms(config_text: str):
    """[(name, order)] of the pinning terms of a config (raw TOML, no validation)."""
    import tomllib

    try:
        raw = tomllib.loads(config_text)
    except Exception:
        return []
    pin = raw.get("pinning")
    if pin is None:
        return []
    items = pin if isinstance(pin, list) else [pin]
    out = []
    for it in items:
        try:
            order = int(it.get("order"))
        except Exception:
            order = None
        out.append((str(it.get("name", f"n{order}")), order))
    return out


def _term_label(name: str, order) -> str:
    """A pinning term as a physicist writes it: its coefficient c_n (the
    multipole convention Phi_n = Re[c_n (x + iy)^n e^{-in angle}]), with the
    user's own name when the config gave one (the default name is internal)."""
    if order is None:
        return f"term {name}"
    c = f"c{_sub(order)}"
    return c if name == f"n{order}" else f"{c} ({name})"


def _term_unit(order) -> str:
    return f"V/m{_sup(order)}" if order else "V/mⁿ"


def _base_terms(meta: dict) -> list:
    return _pin_terms(str((meta or {}).get("base_config_text", "")))


def _stage_names_of(config_text: str) -> list:
    import tomllib

    try:
        raw = tomllib.loads(config_text)
    except Exception:
        return []
    st = raw.get("stage", [])
    return [str(x.get("name", f"stage {i}")) for i, x in enumerate(st)] if isinstance(st, list) else []


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


def _key_label(key: str, meta: dict | None = None) -> str:
    """Axis title of a swept or optimised config key (``--set`` path): the
    quantity in words, stage names as the user wrote them (quoted), pinning
    terms as c_n; never the dotted path itself."""
    meta = meta or {}
    terms = _base_terms(meta)
    parts = key.split(".")

    def term(ref):
        for i, (name, order) in enumerate(terms):
            if ref in (name, str(i)):
                return _term_label(name, order)
        return _term_label(ref, None)

    if parts[0] == "stage" and len(parts) >= 3:
        st = parts[1]
        if st.isdigit():
            names = _stage_names_of(str(meta.get("base_config_text", "")))
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
        t = term(ref) if ref is not None else (_term_label(*terms[0]) if len(terms) == 1 else "term")
        what = {"strength": "", "angle": " angle", "order": " order"}.get(sub[0] if sub else "", " " + " ".join(sub))
        return f"pinning {t}{what}".rstrip()
    if key in _KEY_NAMES:
        return _KEY_NAMES[key]
    return " ".join(p.replace("_", " ") for p in parts)


# ---------------------------------------------------------------------------
# run figures
# ---------------------------------------------------------------------------
def schedule_figure(result):
    """f_rot and each pinning strength versus time, stages shaded and named.

    Parameters
    ----------
    result : Result or path
        A run result (needs ``/schedule``).

    Returns
    -------
    matplotlib.figure.Figure
        Top panel f_rot (kHz or MHz); one panel per pinning term in its own
        unit V/m^n; time in µs or ms.
    """
    ps = _mpl()
    res, path = _load(result)
    sc = res.schedule
    if not sc or "t_s" not in sc or "f_rot_hz" not in sc:
        raise MissingData("/schedule", "the file has no /schedule group (the sampled schedule)", _src(path))
    t = np.asarray(sc["t_s"], dtype=float)
    f = np.asarray(sc["f_rot_hz"], dtype=float)
    pin = np.asarray(sc.get("pinning_strength_si", np.zeros((len(t), 0))), dtype=float)
    if pin.ndim == 1:
        pin = pin[:, None]
    terms = _pin_terms(str(res.attrs.get("config_text", "")))
    if len(terms) != pin.shape[1]:
        terms = [(f"{j + 1}", None) for j in range(pin.shape[1])]
    bounds, names = _stage_bounds(res)
    ts, tu = _time_unit(t[-1] if len(t) else 1.0)
    fs, fu = _freq_unit(np.nanmax(np.abs(f)) if len(f) else 0.0)
    with ps.context():
        n = 1 + pin.shape[1]
        fig = ps.new_figure(ps.FULL_W, 1.9 + 1.25 * (n - 1))
        axs = fig.subplots(n, 1, sharex=True, squeeze=False)[:, 0]
        ax = axs[0]
        _shade_stages(ax, bounds, names, ts)
        ax.plot(t * ts, f * fs, color=ps.INK, lw=1.4, label="rotation frequency")
        ax.set_ylabel(f"rotation {FROT} ({fu})")
        ax.set_title("schedule", pad=14)
        for j in range(pin.shape[1]):
            ax = axs[j + 1]
            _shade_stages(ax, bounds, names, ts, label=False)
            name, order = terms[j]
            lab = f"pinning {_term_label(name, order)}"
            ax.plot(t * ts, pin[:, j], **{**ps.style(j + 1), "marker": None}, label=lab)
            ax.set_ylabel(f"{lab} ({_term_unit(order)})")
            ax.ticklabel_format(axis="y", style="sci", scilimits=(0, 0), useMathText=True)
            ax.set_ylim(bottom=min(0.0, float(np.nanmin(pin[:, j])) * 1.05))
        for ax in axs:
            ax.set_xlim(t[0] * ts, t[-1] * ts)
        axs[-1].set_xlabel(f"time ({tu})")
        ps.finish(fig)
    return fig


def L_histogram_figure(result, stage: str | None = None, bins: int | None = None, zoom_quanta: int | None = None):
    """Histogram of L at the end (or at a stage end) with the allowed-L ladder.

    Left: histogram of the trajectories kept in the statistics (no lost ion,
    finite values) with Poisson error bars sqrt(count)
    (:func:`mdrotor.results.stats.histogram`), the mean, the spread (+-sigma_L), and
    a normal curve with the same mean and spread. Right: a zoom on
    ``zoom_quanta`` quanta either side of the mean (default: 3 ladder
    spacings, at least 6) showing every allowed L (``L = residue mod
    modulus``, :func:`mdrotor.physics.rotor.allowed_L_ladder`) as a comb and the mean
    with its standard error: with L ~ 1e4 and spreads of hundreds the ladder
    is much finer than a bin.

    Parameters
    ----------
    result : Result or path
    stage : str, optional
        A stage name or ``"initial"`` (default: the final stage).
    bins : int, optional
        Number of bins (default sqrt(N), 5 to 60).
    zoom_quanta : int, optional
        Half-width of the zoom, quanta of hbar.
    """
    ps = _mpl()

    res, path = _load(result)
    obs = _obs(res, stage)
    L = _ok_L(obs)
    if L.size < 2:
        raise MissingData(f"/stages/{obs.name}/L_hbar", "fewer than two trajectories with a finite L", _src(path))
    edges, counts, errs = histogram(L, _bins(L, bins))
    mean, sem = mean_sem(L)
    std, std_err = std_se(L)
    lad = _ladder(res)
    width = float(edges[1] - edges[0])
    with ps.context():
        fig = ps.new_figure(ps.FULL_W, 3.1)
        gs = fig.add_gridspec(1, 2, width_ratios=[2.6, 1.0])
        ax = fig.add_subplot(gs[0, 0])
        centres = 0.5 * (edges[1:] + edges[:-1])
        ax.stairs(counts, edges, fill=True, color="#d6d6d6", zorder=1)
        ax.stairs(counts, edges, color=ps.INK, lw=0.9, zorder=2)
        ax.errorbar(centres, counts, yerr=errs, fmt="none", ecolor=ps.INK, elinewidth=0.8, capsize=1.5, zorder=3,
                    label="counts ± √counts")
        top = float(np.max(counts + errs))
        if std > 0:
            x = np.linspace(edges[0] - width, edges[-1] + width, 400)
            gauss = L.size * width * np.exp(-0.5 * ((x - mean) / std) ** 2) / (std * math.sqrt(2 * math.pi))
            ax.plot(x, gauss, color=ps.ACCENT, ls="--", lw=1.0, zorder=4, label=f"normal, same mean and {SIG}")
            top = max(top, float(np.max(gauss)))
            yarr = 0.55 * top
            ax.annotate("", xy=(mean - std, yarr), xytext=(mean + std, yarr),
                        arrowprops={"arrowstyle": "<->", "color": ps.INK, "lw": 0.9, "shrinkA": 0, "shrinkB": 0}, zorder=6)
            ax.text(mean, yarr, f"±{SIG}", va="bottom", ha="center", fontsize=7.5, zorder=6,
                    bbox={"boxstyle": "square,pad=0.1", "fc": "white", "ec": "none"})
        ax.axvline(mean, color=ps.ACCENT, lw=1.2, zorder=5, label="mean ⟨L⟩")
        ax.set_ylim(0, 1.32 * top)
        ax.set_xlim(edges[0] - width, edges[-1] + width)
        ax.set_xlabel("angular momentum L (ħ)")
        ax.set_ylabel(f"trajectories per bin (bin {width:.3g} ħ)")
        when = "end" if stage is None else ("t = 0" if obs.name == "initial" else f"end of '{obs.name}'")
        ax.set_title(f"L distribution at the {when}" if stage is None or obs.name != "initial" else "L distribution at t = 0")
        txt = [f"N = {L.size} trajectories", f"⟨L⟩ = {_pm(mean, sem, 6)} ħ", f"{SIG} = {_pm(std, std_err, 4)} ħ"]
        if lad:
            txt.append(f"allowed L ≡ {lad[1]} (mod {lad[0]})" if lad[0] > 1 else "every integer L allowed")
        ax.text(0.015, 0.97, "\n".join(txt), transform=ax.transAxes, va="top", ha="left", fontsize=7.5, zorder=7,
                bbox={"boxstyle": "square,pad=0.3", "fc": "white", "ec": "#b5b5b5", "lw": 0.5})
        ax.legend(loc="upper right", fontsize=6.5)
        # zoom on the ladder
        az = fig.add_subplot(gs[0, 1])
        mod = lad[0] if lad else 1
        half = int(zoom_quanta) if zoom_quanta else max(6, 3 * mod)
        c = int(round(mean))
        lo, hi = c - half, c + half
        ints = np.arange(lo, hi + 1)
        az.axvspan(mean - sem, mean + sem, facecolor="none", edgecolor="#e2cdc1", hatch="////", lw=0, zorder=0,
                   label="⟨L⟩ ± s.e.")
        if lad:
            allowed = ints[(ints - lad[1]) % lad[0] == 0]
            az.vlines(ints, 0.0, 0.25, color="#9a9a9a", lw=0.6, zorder=1, label="integer L")
            az.vlines(allowed, 0.0, 1.0, color=ps.INK, lw=1.4, zorder=2, label="allowed L")
            az.set_title(f"ladder: L ≡ {lad[1]} mod {lad[0]}" if lad[0] > 1 else "ladder: every integer")
        else:
            az.vlines(ints, 0.0, 0.25, color="#9a9a9a", lw=0.6, zorder=1, label="integer L")
            az.set_title("ladder unknown (species)")
        az.axvline(mean, color=ps.ACCENT, lw=1.2, zorder=3, label="⟨L⟩")
        az.set_xlim(lo - 0.5, hi + 0.5)
        az.set_ylim(0, 1.45)
        az.set_yticks([])
        az.grid(False)
        az.spines["left"].set_visible(False)
        from matplotlib.ticker import MaxNLocator, ScalarFormatter

        az.xaxis.set_major_locator(MaxNLocator(3, integer=True))
        fmt = ScalarFormatter(useOffset=False)
        fmt.set_scientific(False)
        az.xaxis.set_major_formatter(fmt)
        az.set_xlabel(f"L (ħ), zoom ±{half}")
        az.legend(loc="upper center", fontsize=6, ncol=2, handlelength=1.2, columnspacing=0.8)
        ax.xaxis.set_major_formatter(ScalarFormatter(useOffset=False))
        ps.finish(fig)
    return fig


def L_stages_figure(result, bins: int | None = None):
    """Histograms of L at t = 0 and at every stage end (small multiples, each
    with its mean, spread and N; error bars sqrt(count))."""
    ps = _mpl()

    res, path = _load(result)
    obs_list = ([res.initial] if res.initial is not None else []) + list(res.stages.values())
    n = len(obs_list)
    ncol = min(3, n)
    nrow = math.ceil(n / ncol)
    with ps.context():
        fig = ps.new_figure(ps.FULL_W, 0.4 + 1.95 * nrow)
        axs = np.atleast_1d(fig.subplots(nrow, ncol, squeeze=False)).ravel()
        for j, obs in enumerate(obs_list):
            ax = axs[j]
            L = _ok_L(obs)
            title = "t = 0" if obs.name == "initial" else f"end of '{obs.name}'"
            ts, tu = _time_unit(obs.t_s if obs.t_s > 0 else 1e-3)
            ax.set_title(f"{title} ({obs.t_s * ts:.4g} {tu})" if obs.t_s > 0 else title, fontsize=7.5)
            ax.set_xlabel("L (ħ)")
            if j % ncol == 0:
                ax.set_ylabel("trajectories per bin")
            if L.size < 2:
                ax.text(0.5, 0.5, "fewer than 2 trajectories", transform=ax.transAxes, ha="center")
                continue
            edges, counts, errs = histogram(L, _bins(L, bins))
            ax.stairs(counts, edges, fill=True, color="#d6d6d6")
            ax.stairs(counts, edges, color=ps.INK, lw=0.8)
            ax.errorbar(0.5 * (edges[1:] + edges[:-1]), counts, yerr=errs, fmt="none", ecolor=ps.INK, elinewidth=0.6, capsize=1)
            m, s = mean_sem(L)[0], std_se(L)[0]
            ax.axvline(m, color=ps.ACCENT, lw=1.0)
            ax.set_ylim(0, 1.45 * float(np.max(counts + errs)))
            ax.text(0.03, 0.96, f"⟨L⟩ = {m:.5g} ħ\n{SIG} = {s:.4g} ħ\nN = {L.size}", transform=ax.transAxes,
                    va="top", ha="left", fontsize=6.5)
            ax.xaxis.get_major_locator().set_params(nbins=4)
        for ax in axs[n:]:
            ax.set_visible(False)
        ps.finish(fig)
    return fig


# ---------------------------------------------------------------------------
# the frame the modes are measured in
# ---------------------------------------------------------------------------
def _frame_of(res, obs) -> tuple[str, float]:
    """``("lab", 0.0)`` or ``("rotating", f_hz)``: the frame of an
    observation's modes, as the result states it (attributes ``frame`` and
    ``frame_f_rot_hz`` of its ``modes`` group), else derived from the
    schedule by :func:`_frame_from_schedule`."""
    for src in (obs.__dict__, obs.modes, obs.summary):
        fr = src.get("frame")
        if fr is not None:
            fr = fr.decode() if isinstance(fr, bytes) else str(fr)
            f = float(src.get("frame_f_rot_hz", 0.0) or 0.0)
            return ("lab", 0.0) if fr == "lab" else ("rotating", f)
    return _frame_from_schedule(res, obs)


# -- stand-in until every result states its mode frame ----------------------
# Results written before the mode frame was stored (attributes ``frame`` and
# ``frame_f_rot_hz`` on the modes groups) get it derived here, following the
# rule the observation (mdrotor.engine.observe) followed when they were written (free crystals in
# the lab below W_GRID_HZ over the whole ensemble). Remove this helper once no such file
# is to be read (the results module then owns the frame alone).
def _frame_from_schedule(res, obs) -> tuple[str, float]:
    """Frame of an observation without stored frame attributes: while the
    pinning is on, the pinning's frame at the schedule's f_rot(t) (the lab
    below :data:`mdrotor.physics.statics.SLOW_ROTATION_HZ`); when free, the crystal's
    own rotation, here the ensemble's mean f_rot (the lab when below
    :data:`mdrotor.engine.observe.W_GRID_HZ`, where the observation measured free
    crystals in the lab)."""

    pinned, f_pin = _pinning_at(res, obs.t_s)
    if pinned is None:  # no sampled schedule: a pinned crystal has a libration mode
        pinned = "libration" in list(obs.modes.get("label", []))
    if pinned:
        f = f_pin if f_pin is not None else float(obs.summary.get("f_rot_mean_hz", 0.0))
        return ("lab", 0.0) if abs(f) < SLOW_ROTATION_HZ else ("rotating", f)
    f = float(obs.summary.get("f_rot_mean_hz", 0.0))
    return ("lab", 0.0) if not np.isfinite(f) or abs(f) < W_GRID_HZ else ("rotating", f)


def _pinning_at(res, t_s: float):
    """(pinned or None, f_rot of the schedule or None) at time t_s from the
    sampled ``/schedule``. Between two samples the pinning counts as on only
    when both are non-zero (a ramp to zero ends exactly at a stage end)."""
    sc = res.schedule
    if not sc or "t_s" not in sc:
        return None, None
    t = np.asarray(sc["t_s"], dtype=float)
    f = float(np.interp(t_s, t, np.asarray(sc["f_rot_hz"], dtype=float))) if "f_rot_hz" in sc else None
    if "pinning_strength_si" not in sc:
        return False, f
    pin = np.abs(np.atleast_2d(np.asarray(sc["pinning_strength_si"], dtype=float).reshape(len(t), -1)))
    j = int(np.clip(np.searchsorted(t, t_s), 0, len(t) - 1))
    if math.isclose(t[j], t_s, rel_tol=1e-12, abs_tol=1e-15):
        on = np.any(pin[j] > 0)
    else:
        on = np.any(np.minimum(pin[max(j - 1, 0)], pin[j]) > 0)
    return bool(on), f
# -- end of the stand-in ------------------------------------------------------


def _frame_text(frame: tuple[str, float]) -> str:
    """'lab frame' or 'rotating frame, 199.3 kHz'."""
    kind, f = frame
    if kind == "lab":
        return "lab frame"
    fs, fu = _freq_unit(f)
    return f"rotating frame, {_fmt(f * fs, 4)} {fu}"


def _series_labels(res, n_cols: int, series) -> list:
    """Mode label of every column of /series/mode_n_mean, row by row (the
    mode set changes when the pinning is switched off): the labels of the
    observation with as many modes as the row has finite entries, preferring
    the stage the row belongs to."""
    obs_by_stage = dict(res.stages)
    cands = [o.modes["label"] for o in ([res.initial] if res.initial is not None else []) + list(res.stages.values())]
    rows = []
    e = np.asarray(series["mode_n_mean"], dtype=float)
    stages = list(series.get("stage", [""] * len(e)))
    stored = series.get("mode_labels")
    if stored is not None and len(stored) == len(e):  # each row's own labels, as the run wrote them
        for i, txt in enumerate(stored):
            txt = txt.decode() if isinstance(txt, bytes) else str(txt)
            labs = [x for x in txt.split(",") if x] if txt else []
            labs = labs[:n_cols] + [f"mode {j}" for j in range(len(labs), int(np.sum(np.isfinite(e[i]))))]
            rows.append(labs + [None] * (n_cols - len(labs)))
        return rows
    for i in range(len(e)):
        k = int(np.sum(np.isfinite(e[i])))
        own = obs_by_stage.get(stages[i])
        labs = None
        if own is not None and len(own.modes["label"]) == k:
            labs = list(own.modes["label"])
        else:
            labs = next((list(c) for c in cands if len(c) == k), None)
        if labs is None:
            labs = [f"mode {j}" for j in range(k)]
        rows.append(labs + [None] * (n_cols - len(labs)))
    return rows


def _lag_panel(ps, ax, se, x, res):
    lg, lsd = np.asarray(se["lag_mean_rad"], float), np.asarray(se["lag_std_rad"], float)
    ax.fill_between(x, lg - lsd, lg + lsd, color="#bdbdbd", alpha=0.8, lw=0, label="mean ± spread")
    ax.plot(x, lg, color=ps.INK, label="mean lag")
    if "lag_absmax_rad" in se:
        ax.plot(x, np.asarray(se["lag_absmax_rad"], float), color=ps.ACCENT, ls="--", label="largest |lag|")
    n_lag = int(res.attrs.get("lag_order", 0) or 0)
    if n_lag > 0:
        edge = math.pi / n_lag
        ax.axhline(edge, color=ps.MUTED, ls=":", lw=0.9, label=f"well edge ±π/{n_lag}")
        ax.axhline(-edge, color=ps.MUTED, ls=":", lw=0.9)
    ax.set_ylabel("lag angle (rad)")
    ax.set_title("lag behind the pinning")
    ax.legend(loc="upper left", ncol=2)


def series_figure(result):
    """Time series (needs ``/series``, written with ``observe.series_interval``):
    L mean with +-spread band; the lag angle behind the pinning (mean, +-spread,
    largest |lag|, the well edges +-pi/n; left out when the config has no
    pinning); mean phonons per mode (log scale)."""
    ps = _mpl()
    res, path = _load(result)
    se = res.series
    if not se or "t_s" not in se:
        raise MissingData("/series", "the file has no /series group (run with observe.series_interval, "
                                     "e.g. --set observe.series_interval='\"10 us\"')", _src(path))
    t = np.asarray(se["t_s"], dtype=float)
    bounds, names = _stage_bounds(res)
    ts, tu = _time_unit(max(t[-1], bounds[-1]))
    pinned = bool(_pin_terms(str(res.attrs.get("config_text", "")))) and "lag_mean_rad" in se
    with ps.context():
        fig = ps.new_figure(ps.FULL_W, 6.2 if pinned else 4.3)
        axs = fig.subplots(3 if pinned else 2, 1, sharex=True)
        for j, ax in enumerate(axs):
            _shade_stages(ax, bounds, names, ts, label=(j == 0))
        x = t * ts
        lm, ls = np.asarray(se["L_mean_hbar"], float), np.asarray(se["L_std_hbar"], float)
        ax = axs[0]
        ax.fill_between(x, lm - ls, lm + ls, color="#bdbdbd", alpha=0.8, lw=0, label=f"± spread {SIG}")
        ax.plot(x, lm, color=ps.INK, marker=".", ms=3, label="mean ⟨L⟩")
        ax.set_ylabel("L (ħ)")
        ax.set_title("angular momentum", pad=14)
        ax.legend(loc="upper left")
        if pinned:
            _lag_panel(ps, axs[1], se, x, res)
        _modes_panel(ps, axs[-1], res, se, x)
        axs[-1].set_xlabel(f"time ({tu})")
        axs[-1].set_xlim(bounds[0] * ts, bounds[-1] * ts)
        ps.finish(fig)
    return fig


MAX_CURVES = 10  # mode curves drawn one by one in a panel; more are shown as one band


def _modes_panel(ps, ax, res, se, x):
    """Mean phonons of every mode versus time. Up to MAX_CURVES modes each
    get their own (colour, marker, line); with more, the MAX_CURVES - 1
    hottest modes (largest mean over the run) are drawn one by one and the
    others as one grey band from their lowest to their highest mean."""
    e = np.atleast_2d(np.asarray(se["mode_n_mean"], float))
    labs = _series_labels(res, e.shape[1], se)
    order = []
    for row in labs:
        for lab in row:
            if lab is not None and lab not in order:
                order.append(lab)
    curves = {lab: np.array([e[r, row.index(lab)] if lab in row else np.nan for r, row in enumerate(labs)])
              for lab in order}
    shown = order
    rest = []
    if len(order) > MAX_CURVES:
        heat = {lab: (np.nanmean(y) if np.any(np.isfinite(y)) else -np.inf) for lab, y in curves.items()}
        top = sorted(order, key=lambda lab: -heat[lab])[:MAX_CURVES - 1]
        shown = [lab for lab in order if lab in top]
        rest = [lab for lab in order if lab not in top]
    every = max(1, len(x) // 12)
    for i, lab in enumerate(shown):
        st = ps.style(i)
        ax.plot(x, curves[lab], color=st["color"], ls=st["linestyle"], marker=st["marker"], ms=2.5, markevery=every,
                label=lab)
    if rest:
        r = np.vstack([curves[lab] for lab in rest])
        with np.errstate(all="ignore"):
            lo, hi = np.nanmin(np.where(np.isfinite(r), r, np.inf), axis=0), np.nanmax(np.where(np.isfinite(r), r, -np.inf), axis=0)
        ok = np.isfinite(lo) & np.isfinite(hi)
        ax.fill_between(x, np.where(ok, lo, np.nan), np.where(ok, hi, np.nan), color="#c8c8c8", lw=0, zorder=1.5,
                        label=f"{len(rest)} other modes (lowest to highest)")
    fin = e[np.isfinite(e)]
    if fin.size and np.all(fin > 0):  # log scale only when every mean is positive
        ax.set_yscale("log")
        _log_ticks(ax.yaxis)
    ax.set_ylabel("mean phonons ⟨n⟩ (quanta)")
    ax.set_title("mode energies")
    ax.set_title(_wrap(_series_frame_note(res, se), 72), loc="right", fontsize=6.5, fontweight="normal")
    ax.legend(loc="upper left", bbox_to_anchor=(1.0, 1.0), ncol=1)


def _series_frame_note(res, se) -> str:
    """The frames of the time series' mode energies, in words: the pinning's
    frame while pinned, each free stage's own (from its end observation)."""
    t = np.asarray(se["t_s"], dtype=float)
    stages = list(se.get("stage", [""] * len(t)))
    parts = []
    pinned_rows = [(_pinning_at(res, float(tt))[0], st) for tt, st in zip(t, stages)]
    if any(p for p, _ in pinned_rows):
        parts.append(f"pinned: the pinning's rotating frame (lab frame below {SLOW_ROTATION_HZ:g} Hz)")
    for name in dict.fromkeys(st for (p, st) in pinned_rows if p is False):
        obs = res.stages.get(name)
        if obs is not None:
            parts.append(f"'{name}': {_frame_text(_frame_of(res, obs))}")
    if not parts:
        fr = {_frame_text(_frame_of(res, o)) for o in res.stages.values()}
        parts = sorted(fr)
    return "; ".join(parts)


def phonons_figure(result, stage: str | None = None):
    """Mean phonons per mode with standard errors at the end (or a stage end),
    centre-of-mass modes (filled squares) and differential modes (open
    circles) in separate panels, each with its total."""
    ps = _mpl()
    res, path = _load(result)
    obs = _obs(res, stage)
    s = obs.summary
    kinds = list(obs.modes["kind"])
    labels = list(obs.modes["label"])
    freq = np.asarray(obs.modes["freq_hz"], float)
    if "mode_n_mean" not in s:  # statistics leave out what cannot be computed (mdrotor.results.stats)
        raise MissingData("/summary", f"no phonon statistics at this time: none of the {s.get('n_trajectories', '?')} "
                                      "trajectories is finite and bound", _src(path))
    nm = np.asarray(s["mode_n_mean"], float)
    ne = np.asarray(s.get("mode_n_err", np.full(nm.shape, np.nan)), float)
    groups = [("com", "centre-of-mass modes", "com_n", "s", ps.INK, ps.INK),
              ("differential", "differential modes", "differential_n", "o", ps.INK, "white")]
    groups = [g for g in groups if g[0] in kinds]
    if not groups:
        raise MissingData("/modes", "no modes in the observation", _src(path))
    frame = _frame_text(_frame_of(res, obs))
    counts = [max(1, kinds.count(g[0])) for g in groups]
    stacked = sum(counts) > 16  # many modes: one full-width row per group
    with ps.context():
        if stacked:
            fig = ps.new_figure(ps.FULL_W, 0.8 + 2.6 * len(groups))
            axs = fig.subplots(len(groups), 1, squeeze=False)[:, 0]
        else:
            fig = ps.new_figure(ps.FULL_W, 3.1)
            axs = fig.subplots(1, len(groups), gridspec_kw={"width_ratios": counts}, squeeze=False)[0]
        fs, fu = 1e-3, "kHz"
        for ax, (kind, title, tot, marker, ec, fc) in zip(axs, groups):
            idx = [i for i, k in enumerate(kinds) if k == kind]
            xx = np.arange(len(idx))
            ax.errorbar(xx, nm[idx], yerr=ne[idx], fmt=marker, mec=ec, mfc=fc, color=ps.INK, ms=5 if len(idx) <= 30 else 3.5,
                        capsize=2.5 if len(idx) <= 30 else 1.2, lw=0.9)
            # two lines (label, frequency) while they fit side by side; ps.finish turns or thins them
            two = not stacked and ps.FULL_W / ps.CM / sum(counts) >= 1.6  # cm of width per mode
            sep = "\n" if two else " "
            ax.set_xticks(xx, [f"{labels[i]}{sep}{freq[i] * fs:.5g}" for i in idx], fontsize=6.5)
            ax.set_xlim(-0.6, len(idx) - 0.4)
            top = float(np.nanmax(nm[idx] + np.nan_to_num(ne[idx]))) if len(idx) else 1.0
            ax.set_ylim(0, 1.2 * top if top > 0 else 1.0)
            ax.set_title(f"{title}\ntotal {_pm(s.get(tot + '_mean'), s.get(tot + '_err'), 4)} quanta")
            if stacked:
                ax.set_ylabel("⟨n⟩ (quanta)")
        fig.supxlabel(f"mode: label and frequency ({fu}) in the {frame}", fontsize=8)
        if not stacked:
            axs[0].set_ylabel("mean phonon number ⟨n⟩ (quanta)")
        where = "end" if stage is None else ("start" if obs.name == "initial" else f"end of '{obs.name}'")
        fig.suptitle(f"phonons at the {where} (t = {obs.t_s * _time_unit(obs.t_s)[0]:.4g} {_time_unit(obs.t_s)[1]}), "
                     f"{int(s.get('n_ok', 0))} trajectories; modes and frequencies in the {frame}", fontsize=8, x=0.01,
                     ha="left")
        ps.finish(fig)
    return fig


def rotor_info(result, diffusion_hbar2_per_s: float | None = None, k: int | None = None) -> dict:
    """:func:`mdrotor.analysis.rotor.rotor_summary` of a Result or result file.
    D: the one given, else fitted from the run's noise, else analytic."""
    if not isinstance(result, (str, Path)):
        return rotor_summary(result, k=k, diffusion_hbar2_per_s=diffusion_hbar2_per_s)
    if file_kind(result) != "run":
        raise InputError("", "not a run result", str(result))
    return rotor_summary(result, k=k, diffusion_hbar2_per_s=diffusion_hbar2_per_s)


def _rotor(result, rotor, diffusion, k):
    if rotor is not None:
        return rotor
    try:
        return rotor_info(result, diffusion, k)
    except MissingData:
        raise
    except InputError as e:
        raise MissingData("config_text", f"rotor quantities unavailable: {e.line()}", None) from None


def spectrum_figure(result, rotor: dict | None = None, k: int | None = None):
    """Predicted rotational lines ``L -> L + Delta L`` for Delta L = 1..k_lines.

    Each line is drawn as a stick at its centre ``k f_rot + k^2 hbar / (4 pi
    I)`` with a bar of +-1 standard deviation (the inhomogeneous width
    ``k hbar sigma_L / (2 pi I)``) and a normal profile of that width
    (:func:`mdrotor.physics.rotor.transition_frequencies_hz`, via
    :func:`rotor_info`). Lines whose Delta L is not a multiple of the ladder
    spacing lead off the allowed ladder and are drawn dashed.

    Parameters
    ----------
    result : Result or path
    rotor : dict, optional
        A :func:`rotor_info` dict (computed when not given).
    k : int, optional
        Branch separation used for the rotor quantities (default: the ladder spacing).
    """
    ps = _mpl()
    d = _rotor(result, rotor, None, k)
    lines = d["lines"]
    cen = np.array([ln["freq_hz"] for ln in lines])
    wid = np.array([ln["width_hz"] for ln in lines])
    dls = [int(ln["dL"]) for ln in lines]
    mod = int(d.get("allowed_L_mod", 1))
    fs, fu = _freq_unit(np.max(np.abs(cen)))
    with ps.context():
        fig = ps.new_figure(ps.FULL_W, 2.9)
        ax = fig.add_subplot()
        span = float(np.max(cen) - np.min(cen)) if len(cen) > 1 else abs(float(cen[0])) or 1.0
        pad = max(0.12 * span, 4 * float(np.max(wid)))
        # the lines are positive frequencies (quanta added in the sense of rotation): no axis below 0
        lo, hi = max(float(np.min(cen)) - pad, 0.0), float(np.max(cen)) + pad
        x = np.linspace(lo, hi, 3000)
        texts = [f"ΔL = {dl}\n{c * fs:.7g} {fu}\nσ = {_fmt(w * fs, 3)} {fu}" for c, w, dl in zip(cen, wid, dls)]
        at = [(c - lo) / (hi - lo) for c in cen]
        pos = _spread(ax, at, texts, 6.5)
        for i, (c, w, dl) in enumerate(zip(cen, wid, dls)):
            on = dl % mod == 0
            col = ps.INK if on else ps.MUTED
            lsty = "-" if on else "--"
            if w > 0 and w > 2e-3 * (hi - lo):
                ax.plot(x * fs, np.exp(-0.5 * ((x - c) / w) ** 2), color=col, ls=lsty, lw=1.0)
            ax.vlines(c * fs, 0, 1.0, color=col, ls=lsty, lw=1.6)
            ax.errorbar([c * fs], [0.5], xerr=[w * fs], fmt="none", ecolor=col, capsize=3, lw=1.0)
            if abs(pos[i] - at[i]) < 1e-3:
                ax.text(c * fs, 1.04, texts[i], ha="center", va="bottom", fontsize=6.5, color=col)
            else:  # moved aside to stay clear of a neighbour: a thin line to its stick
                ax.annotate(texts[i], xy=(c * fs, 1.0), xytext=(pos[i], 1.04),
                            textcoords=("axes fraction", "data"), ha="center", va="bottom", fontsize=6.5, color=col,
                            arrowprops={"arrowstyle": "-", "color": col, "lw": 0.6, "shrinkA": 0, "shrinkB": 0})
        ax.set_xlim(lo * fs, hi * fs)
        ax.set_ylim(0, 1.55)
        ax.set_yticks([0, 0.5, 1.0])
        ax.set_xlabel(f"transition frequency ({fu})")
        ax.set_ylabel("line profile (peak = 1, no unit)")
        note = (f"{FROT} = {d['f_rot_hz'] * fs:.6g} {fu}, ħ/(2πI) = {d['hbar_over_I_hz']:.4g} Hz, "
                f"{SIG} = {d['L_std_hbar']:.4g} ħ")
        if mod > 1:
            note += f"\ndashed: ΔL not a multiple of {mod} leaves the allowed ladder L ≡ {d['allowed_L_residue']} (mod {mod})"
        ax.set_title("predicted rotational lines", loc="left")
        ax.text(0.0, -0.25, note, transform=ax.transAxes, fontsize=6.5, va="top", ha="left")
        ps.finish(fig)
    return fig


def coherence_figure(result, rotor: dict | None = None, diffusion_hbar2_per_s: float | None = None, k: int | None = None):
    """Ramsey and spin-echo contrast of branches k quanta apart versus time.

    Contrasts from :func:`mdrotor.physics.coherence.ramsey_contrast` and
    :func:`~mdrotor.physics.coherence.echo_contrast` with the D of
    :func:`rotor_info` (given, else fitted from the run's ``/noise``, else
    analytic from the config's noise spectrum); the exchange and revival
    times, the 1/e level, and (dotted) the Ramsey contrast at the largest D
    that leaves the budget contrast at the exchange time. Log time axis.
    Raises :class:`MissingData` when there is no diffusion constant.
    """
    ps = _mpl()

    d = _rotor(result, rotor, diffusion_hbar2_per_s, k)
    D = float(d["diffusion_hbar2_per_s"])
    if not D > 0:
        raise MissingData("/noise", "no angular-momentum diffusion constant: the run has no noise (/noise) and "
                                    "none was given (--diffusion D in hbar^2/s)", d.get("source"))
    I, kk, kick = float(d["moment_of_inertia_kg_m2"]), int(d["k"]), int(d["kick_quanta"])
    t_ex, t_rev = float(d["exchange_time_s"]), float(d["revival_time_s"])
    t_coh = float(d["coherence_time_s"])
    t_lo = min(t_coh, t_ex) / 300.0
    t_hi = 1.6 * t_rev
    t = np.logspace(math.log10(t_lo), math.log10(t_hi), 700)
    cr = np.asarray(coh.ramsey_contrast(t, kk, D, I, kick_quanta=kick))
    ce = np.asarray(coh.echo_contrast(t, kk, D, I, kick_quanta=kick))
    Db = float(d.get("budget_diffusion_hbar2_per_s", float("nan")))
    ts, tu = _time_unit(t_rev)
    with ps.context():
        fig = ps.new_figure(ps.FULL_W, 3.0)
        ax = fig.add_subplot()
        ax.plot(t * ts, cr, color=ps.INK, lw=1.4, label=f"Ramsey (1/e at {t_coh * ts:.4g} {tu})")
        ax.plot(t * ts, ce, color=ps.PALETTE[1], ls="--", lw=1.4,
                label=f"spin echo (1/e at {float(d['echo_coherence_time_s']) * ts:.4g} {tu})")
        if np.isfinite(Db) and Db > 0:
            cb = np.asarray(coh.ramsey_contrast(t, kk, Db, I, kick_quanta=kick))
            ax.plot(t * ts, cb, color=ps.MUTED, ls=":", lw=1.3,
                    label=f"Ramsey at D = {Db:.3g} ħ²/s (contrast {d['budget_contrast']:.2g} at exchange)")
        ax.axhline(math.exp(-1), color=ps.MUTED, lw=0.6, ls=(0, (1, 2)))
        ax.text(t[0] * ts, math.exp(-1), " 1/e", va="bottom", ha="left", fontsize=6.5, color=ps.MUTED)
        for tt, lab in ((t_ex, f"exchange (2π/{d['symmetry_order']})"), (t_rev, "revival (2π)")):
            ax.axvline(tt * ts, color=ps.ACCENT, lw=1.0, ls="-.")
            ax.annotate(f"{lab} {tt * ts:.4g} {tu}", xy=(tt * ts, 0.97), xycoords=("data", "axes fraction"),
                        xytext=(-2.5, 0), textcoords="offset points", ha="right", va="top", rotation=90, fontsize=6.5,
                        color=ps.ACCENT)
        ax.set_xscale("log")
        ax.set_xlim(t[0] * ts, t[-1] * ts)
        ax.set_ylim(0, 1.05)
        ax.set_xlabel(f"free-evolution time ({tu})")
        ax.set_ylabel("contrast (1 without noise)")
        ax.set_title(f"rotor coherence, branches k = {kk} quanta apart")
        ax.text(1.0, 1.02, f"D = {D:.4g} ħ²/s ({d['diffusion_source']})", transform=ax.transAxes, ha="right", va="bottom",
                fontsize=7)
        ax.legend(loc="lower left")
        ps.finish(fig)
    return fig


def run_figures(result, diffusion_hbar2_per_s: float | None = None, k: int | None = None):
    """Every run figure the file allows.

    Returns
    -------
    figures : dict
        name -> Figure, in the order schedule, L_final, L_stages, series,
        phonons, spectrum, coherence.
    skipped : dict
        name -> reason for each figure that could not be made.
    """
    res, path = _load(result)
    figs, skipped, _ = _run_figures(res, path, diffusion_hbar2_per_s, k)
    return figs, skipped


def _run_figures(res, path, diffusion_hbar2_per_s, k):
    figs, skipped = {}, {}
    src = path if path is not None else res

    def attempt(name, fn, *a, **kw):
        try:
            figs[name] = fn(*a, **kw)
        except MissingData as e:
            skipped[name] = e.expected

    attempt("schedule", schedule_figure, res)
    attempt("L_final", L_histogram_figure, res)
    attempt("L_stages", L_stages_figure, res)
    attempt("series", series_figure, res)
    attempt("phonons", phonons_figure, res)
    try:
        rot = _rotor(src, None, diffusion_hbar2_per_s, k)
    except MissingData as e:
        rot = None
        skipped["spectrum"] = skipped["coherence"] = e.expected
    if rot is not None:
        attempt("spectrum", spectrum_figure, res, rotor=rot)
        attempt("coherence", coherence_figure, res, rotor=rot)
    return figs, skipped, rot


# ---------------------------------------------------------------------------
# quantum rotor (mdrotor quantum -o OUT.h5)
# ---------------------------------------------------------------------------
QUANTUM_CAPTION = ("Quantum P(L) of the rigid rotor (bars, on the exchange-allowed ladder) at t = 0 and at every stage "
                   "end, beside the Monte-Carlo ensemble's L binned on the same ladder (points, error bars: "
                   "√counts / N, shifted by whole ladder steps to align the means), with the verdict on whether the "
                   "semiclassical answer holds.")


def _quantum(source) -> dict:
    """The report dict of ``mdrotor quantum``, from a dict or a file of
    :func:`mdrotor.results.store.save_quantum`."""
    if isinstance(source, dict):
        return source

    return load_quantum(source)


# at most about this many bars per panel of the quantum P(L) figure (more
# allowed L in view are drawn in groups of neighbours)
QUANTUM_BARS = 60


def _ladder_groups(L: np.ndarray, w_L: np.ndarray, offset: int, spacing: int, g: int):
    """Sum weights ``w_L`` at allowed ``L`` (``offset`` mod ``spacing``) over
    groups of ``g`` neighbouring allowed values; each group is placed at the
    mean of the g values it spans. ``g = 1`` returns the points as they are."""
    L = np.asarray(L, dtype=float)
    w_L = np.asarray(w_L, dtype=float)
    if g == 1:
        return L, w_L
    width = g * spacing
    k = np.floor((L - offset) / width).astype(np.int64)
    keys, inv = np.unique(k, return_inverse=True)
    sums = np.bincount(inv, weights=w_L, minlength=len(keys))
    return offset + keys * width + 0.5 * (width - spacing), sums


def quantum_figure(source, max_panels: int = 6):
    """Quantum ``P(L)`` beside the ensemble's ladder histogram, stage by stage.

    One panel for t = 0 and each stage end (the last ``max_panels``): the
    rotor's ``P(L)`` as bars at the allowed ``L`` (ladder of
    :func:`mdrotor.physics.rotor.allowed_L_ladder`), the ensemble's ``L`` binned on
    that ladder as fractions ``counts / N`` with ``sqrt(counts) / N`` error
    bars, drawn shifted by ``shift_hbar`` (the whole ladder steps that align
    the means, as :func:`mdrotor.analysis.quantum_compare.compare` compares them);
    means, spreads and the total-variation distance against its sampling
    99th percentile in each panel; the verdict under the panels. A panel
    with more than about ``QUANTUM_BARS`` allowed L in view draws groups of
    neighbouring allowed L (bars and points hold the sums inside them) and
    says so.

    Parameters
    ----------
    source : dict or path
        :func:`mdrotor.studies.quantum.quantum_report`'s dict, or the file
        ``mdrotor quantum -o`` wrote.
    """
    ps = _mpl()
    d = _quantum(source)
    stages = list(d["stages"])[-max_panels:]
    if not stages:
        raise MissingData("/stages", "no stage in the quantum-rotor result", None)

    n = len(stages)
    sp = int(d["allowed_L_spacing"])
    off = int(d["allowed_L_offset"])
    with ps.context():
        fig = ps.new_figure(ps.FULL_W, 1.2 + 1.75 * n)
        axs = np.atleast_1d(fig.subplots(n, 1, squeeze=False)).ravel()
        stl = ps.style(1)
        for j, st in enumerate(stages):
            ax = axs[j]
            L = np.asarray(st["L"], dtype=float)
            P = np.asarray(st["P"], dtype=float)
            big = L[P >= 1e-3 * float(np.max(P))] if P.size else L
            lo, hi = float(np.min(big)), float(np.max(big))
            e = st.get("ensemble")
            if e is not None:
                shift = int(e["shift_hbar"])
                hL = np.asarray(e["histogram_L"], dtype=float) - shift
                lo, hi = min(lo, float(np.min(hL))), max(hi, float(np.max(hL)))
            # a spread of hundreds of quanta: groups of g neighbouring allowed
            # L, so that about QUANTUM_BARS bars (and ensemble points) show
            g = max(1, int(np.ceil((hi - lo) / sp / QUANTUM_BARS)))
            w = g * sp
            Lb, Pb = _ladder_groups(L, P, off, sp, g)
            ax.bar(Lb, Pb, width=0.8 * w, color="#c9c9c9", edgecolor=ps.INK, lw=0.4, zorder=1, label="quantum P(L)")
            txt = [f"quantum: ⟨L⟩ = {fixed_digits(st['L_mean_hbar'], 2)} ħ, {SIG} = {_fmt(st['L_std_hbar'], 4)} ħ"]
            top = float(np.max(Pb))
            if e is not None:
                N = float(e["n"])
                hLb, c = _ladder_groups(hL, np.asarray(e["histogram_counts"], dtype=float), off, sp, g)
                ax.errorbar(hLb, c / N, yerr=np.sqrt(c) / N, fmt=stl["marker"], color=stl["color"], ms=3.0, lw=0.8,
                            capsize=1.5, zorder=3, ls="none", label="ensemble, binned on the ladder")
                top = max(top, float(np.max((c + np.sqrt(c)) / N)))
                txt.append(f"ensemble (N = {int(N)}): ⟨L⟩ = {_pm(e['mean_hbar'], e['mean_err_hbar'])} ħ, "
                           f"{SIG} = {_pm(e['std_hbar'], e['std_err_hbar'])} ħ"
                           + (f", drawn shifted by {shift:+d} ħ" if shift else ""))
                txt.append(f"total-variation distance {e['tv']:.3f} (sampling alone, 99 %: {e['tv_null_99']:.3f})")
            if g > 1:
                txt.append(f"drawn in groups of {g} allowed L ({w} ħ wide)")
            ax.set_xlim(lo - 2.5 * sp, hi + 2.5 * sp)
            ax.set_ylim(0, (1.25 + 0.2 * len(txt)) * top)
            name = st["name"]
            ts, tu = _time_unit(st["t_s"] if st["t_s"] > 0 else 1e-3)
            ax.set_title("t = 0" if name == "initial" else f"end of '{name}' ({st['t_s'] * ts:.4g} {tu})",
                         fontsize=7.5, loc="left")
            ax.text(0.01, 0.97, "\n".join(txt), transform=ax.transAxes, va="top", ha="left", fontsize=6.5, zorder=5)
            ax.set_ylabel("probability")
            if j == n - 1:
                ax.set_xlabel("angular momentum L (ħ)")
        # the panel's text fills its upper left and can reach the upper
        # right; the right-hand tail of the distribution is low
        axs[0].legend(loc="center right", fontsize=6.5)
        lad = f"allowed L ≡ {off} (mod {sp})" if sp > 1 else "every integer L allowed"
        fig.suptitle(f"quantum rotor and ensemble, {lad}", fontsize=8.5, fontweight="bold", x=0.01, ha="left")
        if d.get("verdict"):
            note = (f"Semiclassical answer at the end of '{d['verdict_stage']}': {d['verdict'].upper()}: "
                    f"{d['verdict_reason']}")
        else:
            note = "No ensemble beside the quantum rotor (run without --no-ensemble for the comparison)."
        fig.supxlabel(ps.wrap_text(note, 130), x=0.01, ha="left", fontsize=6.5, color="#555555")
        ps.finish(fig)
    return fig


def _report_quantum(src, out, fmt, dpi, doc, written, skipped):
    d = _quantum(src)
    doc.h(1, f"mdrotor report: {Path(src).name} (quantum rotor)")
    rows = [["allowed L", f"{d['allowed_L_offset']} mod {d['allowed_L_spacing']} ({d['symmetry_order']}-fold, "
                          f"{d['statistics']})"],
            ["ħ/(2πI)", f"{d['hbar_over_I_hz']:.5g} Hz"]]
    fin = d["stages"][-1]
    rows.append([f"final L (end of '{fin['name']}')", f"{_fmt(fin['L_mean_hbar'], 6)} ħ, spread {_fmt(fin['L_std_hbar'], 4)} ħ"])
    if d.get("verdict"):
        rows.append(["semiclassical answer", f"{d['verdict']}: {d['verdict_reason']}"])
    doc.table(["quantity", "value"], rows)
    doc.pre(text(d))
    doc.h(2, "Figures")
    try:
        _emit({"quantum_P_L": quantum_figure(d)}, out, fmt, dpi, doc, written, captions={"quantum_P_L": QUANTUM_CAPTION})
    except MissingData as e:
        skipped["quantum_P_L"] = e.expected
    doc.h(2, "Provenance")
    doc.table(["attribute", "value"], _provenance_rows(d, ("package_version", "format_version", "created", "source",
                                                           "source_kind")))
    doc.h(2, "Config (overrides applied)")
    doc.pre(str(d.get("config_text", "")))


# ---------------------------------------------------------------------------
# sweeps and optimisations
# ---------------------------------------------------------------------------
DEFAULT_METRICS = ("L_mean_hbar", "L_std_hbar", "f_rot_mean_hz", "differential_n_mean", "com_n_mean",
                   "slip_fraction", "loss_fraction", "reorder_fraction", "nonfinite_fraction")
BOOKKEEPING = ("wall_s", "n_steps", "dt_s", "n_trajectories", "index")


def _sweep_meta(path) -> dict:
    import h5py

    meta = {}
    with h5py.File(path, "r") as f:
        for k, v in f.attrs.items():
            if isinstance(v, bytes):
                v = v.decode()
            elif isinstance(v, np.ndarray):
                v = [x.decode() if isinstance(x, bytes) else (x.item() if hasattr(x, "item") else x) for x in v]
            elif hasattr(v, "item"):
                v = v.item()
            meta[k] = v
        meta["bounds"] = {}
        if "axes" in f:
            for g in f["axes"].values():
                if "bounds" in g.attrs:
                    meta["bounds"][str(g.attrs.get("key"))] = [x.decode() if isinstance(x, bytes) else str(x)
                                                               for x in g.attrs["bounds"]]
        if "confirm" in f and "metrics" in f["confirm"]:
            meta["confirm_metrics"] = {k: float(v) for k, v in f["confirm"]["metrics"].attrs.items()}
    return meta


def _table(src):
    """(table, meta) of a sweep / optimisation file, or of a table dict
    (``read_table`` layout, optionally with a ``"meta"`` entry)."""
    if isinstance(src, dict):
        return src, dict(src.get("meta", {}))

    p = Path(src)
    kind = file_kind(p)
    if kind == "run":
        raise InputError("", "a run result, not a sweep: use run_figures", str(p))
    t = read_table(p)
    meta = _sweep_meta(p)
    meta["path"] = str(p)
    return t, meta


def _declared_log(meta: dict) -> set:
    """Keys whose axis the sweep or optimisation file declares logarithmic:
    ``scale = "log"`` with bounds, or a range with ``spacing = "log"``."""
    import tomllib

    text = meta.get("sweep_text") or meta.get("optimize_text")
    if not text:
        return set()
    try:
        raw = tomllib.loads(str(text))
    except Exception:
        return set()
    out = set()
    for a in list(raw.get("axis", [])) + list(raw.get("parameter", [])):
        if not isinstance(a, dict) or "key" not in a:
            continue
        rng = a.get("range")
        if a.get("scale") == "log" or (isinstance(rng, dict) and rng.get("spacing") == "log"):
            out.add(str(a["key"]))
    return out


def _geometric(levels: np.ndarray) -> bool:
    """True for three or more positive levels spaced more evenly in their
    logarithm than in their value (0.5, 1, 2, 4 ms; 1, 3, 10, 30 mK), with
    the log steps even to 25 % (a 1-2-5 series passes)."""
    v = np.unique(levels[np.isfinite(levels)])
    if v.size < 3 or np.any(v <= 0):
        return False
    dl, dv = np.diff(np.log(v)), np.diff(v)
    cv_log = float(np.std(dl) / np.mean(dl))
    cv_lin = float(np.std(dv) / np.mean(dv))
    return cv_log < 0.25 and cv_log < 0.5 * cv_lin


class _AxisView:
    """How a sweep axis is drawn: numeric (in the unit of its texts, on a
    log scale when the file says so or the values are log-spaced) or
    categorical."""

    def __init__(self, key: str, texts: list, si: np.ndarray, meta: dict | None = None):
        meta = meta or {}
        self.key = key
        self.texts = [str(x) for x in texts]
        si = np.asarray(si, dtype=float)
        self.numeric = bool(len(si)) and bool(np.all(np.isfinite(si)))
        self.unit = None
        if self.numeric:
            try:
                _, self.unit = quantity(self.texts[0], key, "sweep")
                self.values = np.array([convert(t, self.unit, key, "sweep") for t in self.texts])
            except InputError:
                self.unit, self.values = None, si
        else:
            self.values = np.full(len(self.texts), np.nan)
        # distinct values in drawing order
        seen = {}
        for i, t in enumerate(self.texts):
            seen.setdefault(t, i)
        uniq = list(seen)
        if self.numeric:
            uniq.sort(key=lambda t: self.values[seen[t]])
        self.levels = uniq
        self.pos = np.array([uniq.index(t) for t in self.texts])
        v = self.values[np.isfinite(self.values)]
        declared = key in _declared_log(meta)
        self.log = bool(self.numeric and v.size and np.all(v > 0) and (declared or _geometric(v)))
        self.name = _key_label(key, meta)

    @property
    def label(self) -> str:
        if not self.numeric:
            return self.name
        return f"{self.name} ({_pretty_unit(self.unit) if self.unit else 'number'})"

    def level_value(self, i: int) -> float:
        return float(self.values[self.texts.index(self.levels[i])])

    def level_text(self, i: int) -> str:
        """The i-th level as a tick label (numeric: its value in the axis unit)."""
        if not self.numeric:
            return self.levels[i]
        return _fmt(self.level_value(i), 6)

    def edges(self) -> np.ndarray:
        """Cell edges around the levels (numeric): midpoints, geometric on a
        log axis; half a step beyond the outer levels."""
        c = np.array([self.level_value(i) for i in range(len(self.levels))])
        if c.size == 1:
            return np.array([c[0] / 1.25, c[0] * 1.25]) if self.log else np.array([c[0] - 0.5, c[0] + 0.5])
        u = np.log(c) if self.log else c
        mid = 0.5 * (u[1:] + u[:-1])
        e = np.concatenate([[u[0] - (mid[0] - u[0])], mid, [u[-1] + (u[-1] - mid[-1])]])
        return np.exp(e) if self.log else e


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


def _metric_label(name: str, meta: dict | None = None):
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
        order = dict(_base_terms(meta)).get(term)
        lab, sc, u = f"peak pinning {_term_label(term, order)}", 1.0, _term_unit(order)
    elif base.endswith("_hz"):
        sc, u = _freq_unit(1e4)
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


def _plain(text: str) -> str:
    """Figure text for a Markdown / HTML page: the mathtext symbols as plain characters."""
    return text.replace(SIG, "σ_L").replace(FROT, "f_rot")


def _metric_name(name: str, meta: dict | None = None) -> str:
    """The metric's label on one line (for footnotes and titles)."""
    return _metric_label(name, meta)[0].replace("\n", " ")


def _interval_names(m: str, cols) -> tuple:
    """(lo, hi) column names of a fraction's interval bounds, when stored."""
    lo, hi = f"{m}_lo", f"{m}_hi"
    return (lo, hi) if lo in cols and hi in cols else (None, None)


def _pick_metrics(t: dict, meta: dict, metrics) -> tuple[list, list]:
    """(metrics to draw, metrics left out because identically zero)."""
    cols = t["metrics"]
    if metrics in (None, "", "default"):
        if meta.get("kind") == "optimize":
            names = ["objective"]
            for key in ("objective", "constraints"):
                try:
                    names += [d["metric"] for d in json.loads(meta.get(key, "[]"))]
                except (ValueError, TypeError, KeyError):
                    pass
        else:
            names = [m for m in DEFAULT_METRICS if m in cols] + sorted(m for m in cols if m.startswith("mode_n_mean."))
    elif metrics == "all":
        errs = {err_name(m, cols) for m in cols}
        bounds = {b for m in cols for b in _interval_names(m, cols) if b}
        names = [m for m in cols if m not in errs and m not in bounds and m not in BOOKKEEPING]
    else:
        names = [m.strip() for m in (metrics.split(",") if isinstance(metrics, str) else metrics) if m.strip()]
        bad = [m for m in names if m not in cols]
        if bad:
            raise InputError("--metrics", f"unknown metric {bad[0]!r}; the file has: {', '.join(list(cols)[:30])}"
                             + (" ..." if len(cols) > 30 else ""), meta.get("path"))
    out, zero = [], []
    for m in dict.fromkeys(names):
        if m not in cols:
            continue
        v = np.asarray(cols[m], float)
        v = v[np.isfinite(v)]
        if v.size and np.all(v == 0) and metrics in (None, "", "default"):
            zero.append(m)
        else:
            out.append(m)
    return out, zero


def _errors(t, m, rows):
    """Error bars of a metric: (2, n) distances to a fraction's interval
    bounds when the file stores them (``<metric>_lo`` / ``_hi``), else its
    standard error; a fraction's bar never reaches below 0 or above 1."""

    v = np.asarray(t["metrics"][m], float)[rows]
    lo, hi = _interval_names(m, t["metrics"])
    if lo is not None:
        a = np.asarray(t["metrics"][lo], float)[rows]
        b = np.asarray(t["metrics"][hi], float)[rows]
        return np.vstack([np.clip(v - a, 0.0, None), np.clip(b - v, 0.0, None)])
    en = err_name(m, t["metrics"])
    if en is None:
        return None
    e = np.asarray(t["metrics"][en], float)[rows]
    if m.endswith("_fraction"):  # bounded by 0 and 1: no error bar beyond them
        return np.vstack([np.minimum(e, v), np.minimum(e, 1.0 - v)])
    return e


def _parse_fixed(fixed, views: dict) -> dict:
    """{key: level index} from {key: value text or '#index' or int}."""
    out = {}
    for key, val in (fixed or {}).items():
        if key not in views:
            raise InputError("--slice", f"{key!r} is not an axis of this sweep (axes: {', '.join(views)})", None)
        v = views[key]
        if isinstance(val, (int, np.integer)) or (isinstance(val, str) and val.startswith("#")):
            i = int(str(val).lstrip("#"))
            if not 0 <= i < len(v.levels):
                raise InputError("--slice", f"{key}: index {i} out of range 0..{len(v.levels) - 1}", None)
            out[key] = i
            continue
        txt = str(val).strip()
        hit = [i for i, lv in enumerate(v.levels) if lv == txt]
        if not hit and v.numeric:
            si = si_value(txt)
            lv_si = [si_value(lv) for lv in v.levels]
            hit = [i for i, s in enumerate(lv_si) if np.isfinite(si) and math.isclose(s, si, rel_tol=1e-9, abs_tol=0.0)]
        if not hit:
            raise InputError("--slice", f"{key}: expected one of {', '.join(v.levels)} (or #index), got {txt!r}", None)
        out[key] = hit[0]
    return out


def sweep_figures(source, metrics=None, axes=None, fixed: dict | None = None, per_page: int = 6) -> list:
    """Figures of a sweep's (or optimisation's) metrics over its axes.

    * one varying axis (or a ``zip`` sweep): each metric versus the axis,
      markers with error bars, joined by lines;
    * a grid with two or more varying axes: a heat map per metric over two
      axes (``axes``, default the first two), the others fixed at ``fixed``
      (default: their first value), values written in the cells;
    * scattered points (``sample`` sweeps, optimisations): each metric
      versus each axis, one row of panels per metric.

    A numeric axis is drawn on a log scale when the file declares it so
    (``scale = "log"``, ``spacing = "log"``) or its values are log-spaced;
    heat-map cells then span the geometric midpoints between values. Axis
    titles name the quantity (stage names as written, pinning terms as
    c_n), not the config path. Error bars: the interval bounds of fractions
    when the file has them, else standard errors.

    Parameters
    ----------
    source : path or dict
        A sweep / optimisation file or a :func:`mdrotor.studies.sweep.read_table`
        dict (with ``"meta": {"combine": ...}``).
    metrics : str or list, optional
        Metric names (comma-separated), ``"all"``, or None for the final-stage
        outcome metrics (optimisations: the objective and its terms).
        Metrics that are zero everywhere are then left out and named in the
        figure's footnote.
    axes : str or list of two keys, optional
        The heat-map axes.
    fixed : dict, optional
        ``{axis key: value text, '#index' or int}`` for the other axes.
    per_page : int
        Panels per figure (rows of panels for scattered points: per_page // 2).

    Returns
    -------
    list of Figure
    """
    ps = _mpl()
    t, meta = _table(source)
    keys = list(t["axes"])
    if not keys:
        raise MissingData("/axes", "the file has no axes", meta.get("path"))
    rows = np.flatnonzero(np.asarray(t["complete"], bool) & ~np.asarray(t["failed"], bool))
    if rows.size == 0:
        raise MissingData("/summary", "no finished points yet", meta.get("path"))
    views = {k: _AxisView(k, t["axes"][k]["text"], t["axes"][k]["si"], meta) for k in keys}
    names, zero = _pick_metrics(t, meta, metrics)
    if not names:
        raise MissingData("/summary", "no metric to draw (every default metric is zero)", meta.get("path"))
    combine = meta.get("combine", "optimize" if meta.get("kind") == "optimize" else "grid")
    varying = [k for k in keys if len(views[k].levels) > 1]
    foot = f"zero at every point (not drawn): {'; '.join(_metric_name(m, meta) for m in zero)}" if zero else ""
    kind_title = "optimisation" if meta.get("kind") == "optimize" else "sweep"
    n_done = f"{rows.size} of {len(t['index'])} points finished"
    if combine == "zip" or (combine == "grid" and len(varying) <= 1):
        key = next((k for k in (varying or keys) if views[k].numeric), (varying or keys)[0])
        others = [views[k] for k in keys if k != key] if combine == "zip" else []
        title = f"{kind_title}: metrics versus {views[key].name} ({n_done})"
        if others:
            title += "\n" + "; ".join(f"{o.name} varies with it" for o in others) + " (second row of tick labels)"
        return _line_pages(ps, t, meta, views[key], others, names, rows, per_page, title, foot)
    if combine == "grid":
        if axes:
            pair = [a.strip() for a in (axes.split(",") if isinstance(axes, str) else axes)]
            if len(pair) != 2 or any(a not in views for a in pair) or pair[0] == pair[1]:
                raise InputError("--axes", f"expected two different axis keys of this sweep, from: {', '.join(keys)}",
                                 meta.get("path"))
        else:
            pair = varying[:2]
        fx = {k: 0 for k in keys if k not in pair}
        fx.update(_parse_fixed(fixed, views))
        for k in pair:
            fx.pop(k, None)
        return _heat_pages(ps, t, meta, views, pair, fx, names, rows, per_page,
                           f"{kind_title}: metrics over {views[pair[0]].name} and {views[pair[1]].name} ({n_done})", foot)
    return _scatter_pages(ps, t, meta, [views[k] for k in keys], names, rows, max(1, per_page // 2),
                          f"{kind_title}: metrics versus each parameter ({n_done})", foot)


def _footnote(fig, text):
    if text:
        fig.supxlabel(text, x=0.01, ha="left", fontsize=6.5, color="#555555", wrap=True)


def _sci(v: float) -> str:
    """A tick value: plain between 1e-3 and 1e4, else 5×10⁴."""
    if v == 0 or 1e-3 <= abs(v) < 1e4:
        return _fmt(v, 3)
    e = int(math.floor(math.log10(abs(v))))
    m = float(f"{v / 10 ** e:.3g}")
    return f"10{_sup(e)}" if m == 1 else f"{_fmt(m, 3)}×10{_sup(e)}"


def _log_ticks(axis):
    """Labelled ticks at 1, 2 and 5 times the powers of ten on a log axis
    (a sweep over less than a decade still gets labels), unlabelled minor
    ticks between."""
    from matplotlib.ticker import FuncFormatter, LogLocator, NullFormatter

    axis.set_major_locator(LogLocator(base=10.0, subs=(1.0, 2.0, 5.0)))
    axis.set_major_formatter(FuncFormatter(lambda v, _pos: _sci(v)))
    axis.set_minor_locator(LogLocator(base=10.0, subs=tuple(range(2, 10))))
    axis.set_minor_formatter(NullFormatter())


def _set_axis(ax, view, which="x", others=()):
    """Scale, ticks and title of a sweep axis. ``others``: zipped axes whose
    values are written under the ticks (one line each)."""
    setter = ax.set_xscale if which == "x" else ax.set_yscale
    if view.numeric:
        if view.log:
            setter("log")
            _log_ticks(ax.xaxis if which == "x" else ax.yaxis)
        if others:
            from matplotlib.ticker import NullLocator

            ticks = [view.level_value(i) for i in range(len(view.levels))]
            texts = []
            for i, lv in enumerate(view.levels):
                j = view.texts.index(lv)
                texts.append("\n".join([view.level_text(i)] + [o.level_text(int(o.pos[j])) for o in others]))
            (ax.set_xticks if which == "x" else ax.set_yticks)(ticks, texts)
            (ax.xaxis if which == "x" else ax.yaxis).set_minor_locator(NullLocator())
    else:
        ticks = list(range(len(view.levels)))
        (ax.set_xticks if which == "x" else ax.set_yticks)(ticks, view.levels)
    label = view.label
    if others:
        label += "\n" + "\n".join(o.label for o in others)
    (ax.set_xlabel if which == "x" else ax.set_ylabel)(label)


def _line_pages(ps, t, meta, view, others, names, rows, per_page, title, foot):
    figs = []
    for p0 in range(0, len(names), per_page):
        chunk = names[p0:p0 + per_page]
        ncol = 2 if len(chunk) > 1 else 1
        nrow = math.ceil(len(chunk) / ncol)
        with ps.context():
            fig = ps.new_figure(ps.FULL_W, 0.7 + (2.1 + 0.25 * len(others)) * nrow)
            axs = np.atleast_1d(fig.subplots(nrow, ncol, squeeze=False)).ravel()
            for ax, m in zip(axs, chunk):
                lab, sc, _ = _metric_label(m, meta)
                x = view.values[rows] if view.numeric else view.pos[rows].astype(float)
                o = np.argsort(x, kind="stable")
                y = np.asarray(t["metrics"][m], float)[rows] * sc
                e = _errors(t, m, rows)
                e = None if e is None else np.asarray(e) * sc
                ax.errorbar(x[o], y[o], yerr=None if e is None else (e[..., o] if e.ndim == 2 else e[o]), fmt="o-",
                            color=ps.INK, mfc="white", ms=4, lw=1.0, capsize=2)
                ax.set_ylabel(lab)
                _set_axis(ax, view, "x", others)
            for ax in axs[len(chunk):]:
                ax.set_visible(False)
            fig.suptitle(title + (f", page {p0 // per_page + 1}" if len(names) > per_page else ""), fontsize=8, x=0.01, ha="left")
            _footnote(fig, foot)
            ps.finish(fig)
        figs.append(fig)
    return figs


def _cell_axis(ax, view, which):
    """Heat-map axis: numeric levels at their values (cells between the
    midpoints, log scale when the axis is log), categories at 0, 1, 2 ..."""
    from matplotlib.ticker import NullLocator

    n = len(view.levels)
    if view.numeric:
        edges = view.edges()
        centres = np.array([view.level_value(i) for i in range(n)])
    else:
        edges = np.arange(n + 1) - 0.5
        centres = np.arange(n, dtype=float)
    if view.numeric and view.log:
        (ax.set_xscale if which == "x" else ax.set_yscale)("log")
    (ax.set_xticks if which == "x" else ax.set_yticks)(centres, [view.level_text(i) for i in range(n)])
    (ax.xaxis if which == "x" else ax.yaxis).set_minor_locator(NullLocator())
    (ax.set_xlim if which == "x" else ax.set_ylim)(edges[0], edges[-1])
    (ax.set_xlabel if which == "x" else ax.set_ylabel)(view.label if which == "x" else _wrap(view.label, 30))
    return edges, centres


def _cell_text(Z, E, LO, HI, iy, ix, small):
    s = _fmt(Z[iy, ix], 3)
    if np.isfinite(LO[iy, ix]) and small:
        s += f"\n[{_fmt(LO[iy, ix], 2)}, {_fmt(HI[iy, ix], 2)}]"
    elif np.isfinite(E[iy, ix]) and small:
        s += f"\n±{_fmt(E[iy, ix], 2)}"
    return s


def _heat_pages(ps, t, meta, views, pair, fixed, names, rows, per_page, title, foot):
    vx, vy = views[pair[0]], views[pair[1]]
    sel = [r for r in rows if all(views[k].pos[r] == i for k, i in fixed.items())]
    slice_txt = ", ".join(f"{views[k].name} = {_pretty_unit(views[k].levels[i]) if views[k].numeric else views[k].levels[i]}"
                          for k, i in fixed.items())
    figs = []
    cm = ps.cmap()
    for p0 in range(0, len(names), per_page):
        chunk = names[p0:p0 + per_page]
        ncol = 2 if len(chunk) > 1 else 1
        nrow = math.ceil(len(chunk) / ncol)
        with ps.context():
            fig = ps.new_figure(ps.FULL_W, 0.7 + 2.6 * nrow)
            axs = np.atleast_1d(fig.subplots(nrow, ncol, squeeze=False)).ravel()
            for ax, m in zip(axs, chunk):
                lab, sc, _ = _metric_label(m, meta)
                Z = np.full((len(vy.levels), len(vx.levels)), np.nan)
                E, LO, HI = np.full_like(Z, np.nan), np.full_like(Z, np.nan), np.full_like(Z, np.nan)
                lo_n, hi_n = _interval_names(m, t["metrics"])
                e = _errors(t, m, np.asarray(sel, int)) if sel else None
                if e is not None and np.ndim(e) == 2:
                    e = None
                for j, r in enumerate(sel):
                    Z[vy.pos[r], vx.pos[r]] = float(t["metrics"][m][r]) * sc
                    if e is not None:
                        E[vy.pos[r], vx.pos[r]] = float(e[j]) * sc
                    if lo_n is not None:
                        LO[vy.pos[r], vx.pos[r]] = float(t["metrics"][lo_n][r]) * sc
                        HI[vy.pos[r], vx.pos[r]] = float(t["metrics"][hi_n][r]) * sc
                ex, cx = _cell_axis(ax, vx, "x")
                ey, cy = _cell_axis(ax, vy, "y")
                mesh = ax.pcolormesh(ex, ey, np.ma.masked_invalid(Z), cmap=cm, shading="flat")
                ax.grid(False)
                fig.colorbar(mesh, ax=ax, label=lab, fraction=0.07, pad=0.02)
                if Z.size <= 48:
                    for iy in range(Z.shape[0]):
                        for ix in range(Z.shape[1]):
                            if not np.isfinite(Z[iy, ix]):
                                ax.text(cx[ix], cy[iy], "no data", ha="center", va="center", fontsize=6, color="#777777")
                                continue
                            lum = ps.luminance(cm(mesh.norm(Z[iy, ix])))
                            ax.text(cx[ix], cy[iy], _cell_text(Z, E, LO, HI, iy, ix, Z.size <= 24), ha="center",
                                    va="center", fontsize=6, color="white" if lum < 0.45 else "black")
                ax.spines[["top", "right"]].set_visible(True)
            for ax in axs[len(chunk):]:
                ax.set_visible(False)
            sup = title + (f"\nat {slice_txt}" if slice_txt else "")
            fig.suptitle(sup + (f", page {p0 // per_page + 1}" if len(names) > per_page else ""), fontsize=8, x=0.01, ha="left")
            _footnote(fig, foot)
            ps.finish(fig)
        figs.append(fig)
    return figs


def _scatter_pages(ps, t, meta, views, names, rows, rows_per_page, title, foot):
    figs = []
    best = meta.get("best_index")
    has_best = best is not None and int(best) in set(int(r) for r in rows)
    for p0 in range(0, len(names), rows_per_page):
        chunk = names[p0:p0 + rows_per_page]
        with ps.context():
            fig = ps.new_figure(ps.FULL_W, 0.7 + 2.0 * len(chunk))
            axs = fig.subplots(len(chunk), len(views), squeeze=False, sharey="row")
            for i, m in enumerate(chunk):
                lab, sc, _ = _metric_label(m, meta)
                y = np.asarray(t["metrics"][m], float)[rows] * sc
                e = _errors(t, m, rows)
                e = None if e is None else np.asarray(e) * sc
                for j, v in enumerate(views):
                    ax = axs[i, j]
                    x = v.values[rows] if v.numeric else v.pos[rows].astype(float)
                    ax.errorbar(x, y, yerr=e, fmt="o", color=ps.INK, mfc="white", ms=3.5, lw=0.8, capsize=1.5,
                                label="evaluated point" if meta.get("kind") == "optimize" else "sweep point")
                    if has_best:
                        b = int(np.flatnonzero(rows == int(best))[0])
                        ax.plot([x[b]], [y[b]], marker="*", ms=11, color=ps.ACCENT, ls="none", label="best point")
                    _set_axis(ax, v, "x")
                    if j == 0:
                        ax.set_ylabel(lab)
                fin = y[np.isfinite(y)]
                if m == "objective" and fin.size and np.all(fin > 0) and fin.max() / fin.min() > 100:
                    axs[i, 0].set_yscale("log")  # as in the history (rows share y)
            page = f", page {p0 // rows_per_page + 1}" if len(names) > rows_per_page else ""
            fig.suptitle(title + page + ("\nstar: the best point" if has_best else ""), fontsize=8, x=0.01, ha="left")
            _footnote(fig, foot)
            ps.finish(fig)
        figs.append(fig)
    return figs


def optimize_figure(source):
    """History of an optimisation: the objective of every evaluation
    (feasible: filled circles; infeasible: crosses), the best so far, the
    best point (star) and the confirmation run (with its standard error from
    the metrics' errors, in quadrature); below, each parameter per
    evaluation in its own unit with its bounds (log scale when the file
    declares it). The legend stands above the panels, clear of the points."""
    ps = _mpl()
    t, meta = _table(source)
    if meta.get("kind") != "optimize" or "objective" not in t["metrics"]:
        raise InputError("", "not an optimisation file", meta.get("path"))
    done = np.asarray(t["complete"], bool) & ~np.asarray(t["failed"], bool)
    idx = np.asarray(t["index"], int)
    obj = np.asarray(t["metrics"]["objective"], float)
    feas = np.asarray(t["metrics"].get("feasible", np.ones_like(obj)), float) > 0.5
    keys = list(t["axes"])
    views = {k: _AxisView(k, t["axes"][k]["text"], t["axes"][k]["si"], meta) for k in keys}
    best = meta.get("best_index")
    with ps.context():
        fig = ps.new_figure(ps.FULL_W, 3.0 + 1.15 * len(keys))
        axs = fig.subplots(1 + len(keys), 1, sharex=True, squeeze=False,
                           gridspec_kw={"height_ratios": [2.2] + [1.0] * len(keys)})[:, 0]
        ax = axs[0]
        ok = done & np.isfinite(obj)
        ax.plot(idx[ok & feas], obj[ok & feas], "o", color=ps.INK, ms=3.5, label="feasible")
        if np.any(ok & ~feas):
            ax.plot(idx[ok & ~feas], obj[ok & ~feas], "x", color=ps.MUTED, ms=4, label="infeasible (penalised)")
        run_best = np.full(len(obj), np.nan)
        cur = np.inf
        for i in range(len(obj)):
            if ok[i] and feas[i]:
                cur = min(cur, obj[i])
            run_best[i] = cur if np.isfinite(cur) else np.nan
        ax.step(idx, run_best, where="post", color=ps.PALETTE[1], lw=1.0, ls="--", label="best so far")
        if best is not None and 0 <= int(best) < len(obj):
            b = int(best)
            ax.plot([idx[b]], [obj[b]], marker="*", ms=12, color=ps.ACCENT, ls="none", label=f"best (#{idx[b]})")
        cm = meta.get("confirm_metrics") or {}
        if "objective" in cm:
            err = _confirm_error(meta, cm)
            xc = idx[-1] + 1 if len(idx) else 0
            ax.errorbar([xc], [cm["objective"]], yerr=None if err is None else [err], fmt="D", color=ps.ACCENT, mfc="white",
                        ms=5, capsize=2.5, label=f"confirmation ({int(cm.get('n_trajectories', 0))} trajectories)")
        v = obj[ok]
        if v.size and np.all(v > 0) and v.max() / v.min() > 100:
            ax.set_yscale("log")
        ax.margins(x=0.03, y=0.08)
        ax.set_ylabel("objective (as defined)")
        fig.suptitle(f"optimisation ({meta.get('method', '?')}): {int(np.sum(done))} evaluations", fontsize=8.5,
                     fontweight="bold", x=0.01, ha="left")
        h, lb = ax.get_legend_handles_labels()
        fig.legend(h, lb, loc="outside right upper", fontsize=6.5)  # beside the panels: never on a point
        for ax, k in zip(axs[1:], keys):
            vw = views[k]
            y = vw.values if vw.numeric else vw.pos.astype(float)
            ax.plot(idx[done], y[done], "o-", color=ps.INK, mfc="white", ms=3, lw=0.7)
            if best is not None and 0 <= int(best) < len(y):
                ax.plot([idx[int(best)]], [y[int(best)]], marker="*", ms=10, color=ps.ACCENT, ls="none")
            bd = meta.get("bounds", {}).get(k)
            if bd and vw.numeric and vw.unit:
                for bt in bd:
                    try:
                        ax.axhline(convert(bt, vw.unit, k, "bounds"), color=ps.MUTED, ls=":", lw=0.8)
                    except InputError:
                        pass
            if vw.log:
                ax.set_yscale("log")
                _log_ticks(ax.yaxis)
            if not vw.numeric:
                ax.set_yticks(range(len(vw.levels)), vw.levels)
            ax.set_ylabel(_wrap(vw.name, 18) + f"\n({_pretty_unit(vw.unit) if vw.unit else 'number'})", fontsize=6.5)
        axs[-1].set_xlabel("evaluation number")
        from matplotlib.ticker import MaxNLocator

        axs[-1].xaxis.set_major_locator(MaxNLocator(integer=True))
        if meta.get("message"):
            _footnote(fig, f"optimiser: {meta['message']}")
        ps.finish(fig)
    return fig


def _wrap(text: str, width: int) -> str:
    return wrap_text(text, width)


def _confirm_error(meta, cm):
    """Standard error of the confirmation's objective: the weighted metrics'
    errors added in quadrature (constraints' penalties left out)."""

    try:
        terms = json.loads(meta.get("objective", "[]"))
    except (TypeError, ValueError):
        return None
    tot = 0.0
    for d in terms:
        en = err_name(d.get("metric", ""), cm)
        if en is None or not np.isfinite(cm.get(en, np.nan)):
            return None
        tot += (float(d.get("weight", 1.0)) * cm[en]) ** 2
    return math.sqrt(tot)


# ---------------------------------------------------------------------------
# the report: files and summary
# ---------------------------------------------------------------------------
class _Doc:
    """A tiny document model rendered as Markdown or HTML."""

    def __init__(self):
        self.blocks = []

    def h(self, level, text):
        self.blocks.append(("h", level, text))

    def p(self, text):
        self.blocks.append(("p", text))

    def table(self, header, rows):
        self.blocks.append(("table", header, rows))

    def pre(self, text):
        self.blocks.append(("pre", text))

    def items(self, items):
        self.blocks.append(("ul", items))

    def img(self, rel, caption):
        self.blocks.append(("img", rel, caption))

    def markdown(self) -> str:
        out = []
        for b in self.blocks:
            if b[0] == "h":
                out.append("#" * b[1] + " " + b[2])
            elif b[0] == "p":
                out.append(b[1])
            elif b[0] == "table":
                out.append("| " + " | ".join(b[1]) + " |")
                out.append("|" + "---|" * len(b[1]))
                out += ["| " + " | ".join(str(c).replace("|", "\\|") for c in r) + " |" for r in b[2]]
            elif b[0] == "pre":
                out.append("```\n" + b[1].rstrip() + "\n```")
            elif b[0] == "ul":
                out += [f"- {x}" for x in b[1]]
            elif b[0] == "img":
                out.append(f"![{b[2]}]({b[1]})\n\n*{b[2]}*")
            out.append("")
        return "\n".join(out)

    def html(self, title) -> str:
        e = html.escape
        out = ["<!DOCTYPE html>", "<html><head><meta charset='utf-8'>", f"<title>{e(title)}</title>",
               "<style>body{font-family:'DejaVu Sans',sans-serif;max-width:17cm;margin:1.5em auto;font-size:10pt;color:#1c1c1c}"
               "table{border-collapse:collapse;font-size:9pt}td,th{border-bottom:1px solid #ccc;padding:2px 8px;text-align:left}"
               "pre{background:#f4f4f4;padding:6px;font-size:8pt;overflow-x:auto}img{max-width:100%}"
               "figcaption{font-size:8.5pt;color:#444}figure{margin:1em 0}</style></head><body>"]
        for b in self.blocks:
            if b[0] == "h":
                out.append(f"<h{b[1]}>{e(b[2])}</h{b[1]}>")
            elif b[0] == "p":
                out.append(f"<p>{e(b[1])}</p>")
            elif b[0] == "table":
                out.append("<table><tr>" + "".join(f"<th>{e(str(c))}</th>" for c in b[1]) + "</tr>")
                out += ["<tr>" + "".join(f"<td>{e(str(c))}</td>" for c in r) + "</tr>" for r in b[2]]
                out.append("</table>")
            elif b[0] == "pre":
                out.append(f"<pre>{e(b[1])}</pre>")
            elif b[0] == "ul":
                out.append("<ul>" + "".join(f"<li>{e(x)}</li>" for x in b[1]) + "</ul>")
            elif b[0] == "img":
                out.append(f"<figure><img src='{e(b[1])}' alt='{e(b[2])}'><figcaption>{e(b[2])}</figcaption></figure>")
        out.append("</body></html>")
        return "\n".join(out)


def _save(fig, folder: Path, name: str, fmt: str, dpi: int) -> Path:
    p = folder / f"{name}.{fmt}"
    with _mpl().context():  # the style's savefig settings (tight box, fonts kept as text)
        fig.savefig(p, format=fmt, dpi=dpi)
    return p


def _provenance_rows(attrs: dict, keys) -> list:
    rows = []
    for k in keys:
        if k in attrs:
            v = attrs[k]
            if isinstance(v, bytes):
                v = v.decode()
            if isinstance(v, float):
                v = f"{v:.6g}"
            rows.append([k, str(v)])
    return rows


def write_report(source, output_dir=None, fmt: str = "png", *, summary: str = "md", diffusion_hbar2_per_s=None,
                 k: int | None = None, metrics=None, axes=None, fixed=None, dpi: int = 150) -> dict:
    """Write the figures and a one-page summary of a run, sweep or optimisation file.

    Parameters
    ----------
    source : path
        A result, sweep or optimisation file (``.h5``).
    output_dir : path, optional
        Folder for the figures and ``summary.md`` / ``summary.html``
        (default ``<file stem>_report`` in the current folder; created).
    fmt : {"png", "pdf", "svg"}
    summary : {"md", "html"}
    diffusion_hbar2_per_s, k
        For the coherence figure, see :func:`coherence_figure`.
    metrics, axes, fixed
        For sweeps, see :func:`sweep_figures`.
    dpi : int
        Resolution of PNG figures.

    Returns
    -------
    dict
        ``kind``, ``output_dir``, ``figures`` (list of paths), ``skipped``
        ({name: reason}), ``summary`` (path).
    """
    if fmt not in FORMATS:
        raise InputError("--format", f"expected one of {', '.join(FORMATS)}, got {fmt!r}", "command line")
    if summary not in SUMMARY_FORMATS:
        raise InputError("--summary", f"expected one of {', '.join(SUMMARY_FORMATS)}, got {summary!r}", "command line")
    _mpl()
    src = Path(source)
    kind = file_kind(src)
    out = Path(output_dir) if output_dir is not None else Path(f"{src.stem}_report")
    if out.exists() and not out.is_dir():
        raise InputError("-o", f"{str(out)!r} exists and is not a folder", "command line")
    if not out.parent.exists():
        raise InputError("-o", f"the folder {str(out.parent)!r} does not exist", "command line")
    out.mkdir(exist_ok=True)
    doc = _Doc()
    written, skipped = [], {}
    if kind == "run":
        _report_run(src, out, fmt, dpi, doc, written, skipped, diffusion_hbar2_per_s, k)
    elif kind == "quantum":
        _report_quantum(src, out, fmt, dpi, doc, written, skipped)
    else:
        _report_sweep(src, kind, out, fmt, dpi, doc, written, skipped, metrics, axes, fixed, diffusion_hbar2_per_s, k)
    title = f"mdrotor report: {src.name}"
    spath = out / f"summary.{summary}"
    spath.write_text(doc.markdown() if summary == "md" else doc.html(title), encoding="utf-8")
    return {"kind": kind, "output_dir": str(out), "figures": [str(p) for p in written], "skipped": skipped,
            "summary": str(spath)}


def _emit(figs: dict, out, fmt, dpi, doc, written, prefix="", captions=None):
    for name, fig in figs.items():
        p = _save(fig, out, prefix + name, fmt, dpi)
        written.append(p)
        doc.img(p.name, (captions or CAPTIONS).get(name, name))
        fig.clear()  # figures were never registered with pyplot: clearing frees them


def _report_run(src, out, fmt, dpi, doc, written, skipped, diffusion, k, prefix="", res=None, title=True):
    path = None
    if res is None:
        res, path = _load(src)
    figs, skip, rot = _run_figures(res, path, diffusion, k)
    if title:
        doc.h(1, f"mdrotor report: {Path(src).name}")
    a = res.attrs
    s = res.summary
    doc.h(2, "Key numbers" if not prefix else "Confirmation run: key numbers")
    def k(x, scale=1.0):  # a statistic that could not be computed is absent (mdrotor.results.stats)
        v = s.get(x)
        return None if v is None else v * scale

    rows = [["final L (mean)", f"{_pm(k('L_mean_hbar'), k('L_mean_err_hbar'), 6)} ħ"],
            ["final L spread", f"{_pm(k('L_std_hbar'), k('L_std_err_hbar'))} ħ"],
            ["rotation f_rot", f"{_pm(k('f_rot_mean_hz', 1e-3), k('f_rot_mean_err_hz', 1e-3), 7)} kHz"],
            ["slipped / lost / reordered", " / ".join(_fraction_text(s, m) for m in
                                                      ("slip_fraction", "loss_fraction", "reorder_fraction"))],
            ["differential phonons", _pm(k("differential_n_mean"), k("differential_n_err"))],
            ["COM phonons", _pm(k("com_n_mean"), k("com_n_err"))],
            ["trajectories used (finite, bound)", f"{s.get('n_ok', '?')} of {s.get('n_trajectories', '?')}"],
            ["modes measured in the", _frame_text(_frame_of(res, res.final))]]
    if rot:
        rows += [["allowed L", f"{rot['allowed_L_residue']} mod {rot['allowed_L_mod']} ({rot['statistics']})"],
                 ["ħ/(2πI)", f"{rot['hbar_over_I_hz']:.5g} Hz"],
                 [f"exchange / revival (k = {rot['k']})",
                  f"{rot['exchange_time_s'] * 1e3:.5g} ms / {rot['revival_time_s'] * 1e3:.5g} ms"],
                 ["lines ΔL = " + ", ".join(str(ln["dL"]) for ln in rot["lines"]),
                  "; ".join(f"{ln['freq_hz'] / 1e3:.7g} ± {ln['width_hz'] / 1e3:.3g} kHz" for ln in rot["lines"])],
                 ["diffusion D", f"{rot['diffusion_hbar2_per_s']:.4g} ħ²/s ({rot['diffusion_source']})"
                  if rot["diffusion_hbar2_per_s"] > 0 else "none (no noise in the run; --diffusion D sets one)"]]
        if rot["diffusion_hbar2_per_s"] > 0:
            rows.append(["coherence time (1/e) Ramsey / echo",
                         f"{rot['coherence_time_s'] * 1e3:.4g} ms / {rot['echo_coherence_time_s'] * 1e3:.4g} ms"])
    doc.table(["quantity", "value"], rows)
    doc.pre(summary_text(res))
    doc.h(2, "Figures")
    _emit(figs, out, fmt, dpi, doc, written, prefix)
    if skip:
        doc.h(3, "Skipped figures")
        doc.items([f"{n}: {r}" for n, r in skip.items()])
    for n, r in skip.items():
        skipped[prefix + n] = r
    doc.h(2, "Provenance")
    doc.table(["attribute", "value"], _provenance_rows(a, ("package_version", "format_version", "created", "seed", "dt_s",
                                                            "n_steps", "n_trajectories", "integrator", "threads", "wall_s",
                                                            "config_source")))
    doc.h(2, "Config (overrides applied)")
    doc.pre(str(a.get("config_text", "")))


def _report_sweep(src, kind, out, fmt, dpi, doc, written, skipped, metrics, axes, fixed, diffusion, k):
    t = read_table(src)
    meta = _sweep_meta(src)
    meta["path"] = str(src)
    done = np.asarray(t["complete"], bool) & ~np.asarray(t["failed"], bool)
    doc.h(1, f"mdrotor report: {src.name} ({'optimisation' if kind == 'optimize' else 'sweep'})")
    rows = [["points", f"{int(done.sum())} finished, {int(np.sum(t['failed']))} failed, {len(done)} in all"]]
    for key, ax in t["axes"].items():
        lv = list(dict.fromkeys(ax["text"]))
        rows.append([f"axis {key}", ", ".join(lv[:12]) + (" ..." if len(lv) > 12 else "")])
    for kk in ("combine", "seeding", "base_seed", "method", "budget", "message", "best_index", "penalty"):
        if kk in meta:
            rows.append([kk, str(meta[kk])])
    doc.table(["quantity", "value"], rows)
    figs = {}
    if kind == "optimize":
        try:
            figs["optimize_history"] = optimize_figure(src)
        except MissingData as e:
            skipped["optimize_history"] = e.expected
        best = meta.get("best_index")
        if best is not None:
            b = int(best)
            obj = t["metrics"]["objective"][b]
            doc.p(f"Best evaluation #{b}: objective {obj:.6g}; parameters "
                  + ", ".join(f"{key} = {ax['text'][b]}" for key, ax in t["axes"].items()))
        cm = meta.get("confirm_metrics")
        if cm and "objective" in cm:
            err = _confirm_error(meta, cm)
            doc.p(f"Confirmation run ({int(cm.get('n_trajectories', 0))} trajectories, fresh seeds): objective "
                  f"{_pm(cm['objective'], err, 6)}.")
    try:
        pages = sweep_figures(src, metrics=metrics, axes=axes, fixed=fixed)
        for i, f in enumerate(pages):
            figs[f"{'optimize_landscape' if kind == 'optimize' else 'sweep_metrics'}_{i + 1}"] = f
    except MissingData as e:
        skipped["sweep_metrics"] = e.expected
    caps = {n: ("Objective and parameters per evaluation, the best point (star) and the confirmation run."
                if n == "optimize_history" else
                "Metrics over the axes (error bars and cell values: standard errors of the means and fractions).")
            for n in figs}
    doc.h(2, "Figures")
    _emit(figs, out, fmt, dpi, doc, written, captions=caps)
    # table of the main metrics per point (first 40 rows)
    names = [m for m in ("objective", "L_mean_hbar", "L_std_hbar", "slip_fraction", "differential_n_mean") if m in t["metrics"]]
    hdr = ["#"] + [_plain(_key_label(k, meta)) for k in t["axes"]] + [_plain(_metric_name(m, meta)) for m in names]
    body = []
    for i in np.flatnonzero(done)[:40]:
        body.append([str(int(t["index"][i]))] + [ax["text"][i] for ax in t["axes"].values()]
                    + [_fmt(t["metrics"][m][i], 5) for m in names])
    doc.h(2, "Points")
    doc.table(hdr, body)
    if int(done.sum()) > 40:
        doc.p(f"... {int(done.sum()) - 40} more (mdrotor sweep ... --csv FILE writes them all).")
    if kind == "optimize" and "confirm" in _groups(src):
        try:
            conf = read_point(src, "confirm")
            _report_run(src, out, fmt, dpi, doc, written, skipped, diffusion, k, prefix="confirm_", res=conf, title=False)
        except InputError as e:
            skipped["confirm"] = e.expected
    if skipped:
        doc.h(3, "Skipped figures")
        doc.items([f"{n}: {r}" for n, r in skipped.items()])
    doc.h(2, "Provenance")
    doc.table(["attribute", "value"], _provenance_rows(meta, ("package_version", "format_version", "kind", "source",
                                                              "spec_hash", "consolidated", "finished")))
    text = meta.get("sweep_text") or meta.get("optimize_text")
    if text:
        doc.h(2, "Sweep file" if kind == "sweep" else "Optimisation file")
        doc.pre(str(text))


def _groups(path) -> list:
    import h5py

    with h5py.File(path, "r") as f:
        return list(f)







