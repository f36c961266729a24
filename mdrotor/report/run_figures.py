"""The figures of one run: functions that take a :class:`~mdrotor.results.result.Result` (or a path) and
return a matplotlib :class:`~matplotlib.figure.Figure`, for notebooks::

    from mdrotor.report.run_figures import L_histogram_figure, run_figures
    fig = L_histogram_figure("demo.h5")     # a Figure; fig.savefig("L.png")
    figs, skipped = run_figures("demo.h5")  # every run figure that the file allows

Each raises :class:`~mdrotor.report.inputs.MissingData` when the file lacks
the optional group it needs:

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

The numbers come from the result, :mod:`mdrotor.results.stats`,
:mod:`mdrotor.physics.rotor`, :mod:`mdrotor.physics.coherence` and
:mod:`mdrotor.analysis.rotor`.
"""

from __future__ import annotations

import math
from pathlib import Path

import numpy as np

from mdrotor.analysis.rotor import rotor_summary
from mdrotor.engine.observe import W_GRID_HZ
from mdrotor.errors import InputError, PhysicsError
from mdrotor.model.quantum import config_ladder
from mdrotor.numfmt import compact, plus_minus
from mdrotor.physics import coherence as coh
from mdrotor.physics.statics import SLOW_ROTATION_HZ
from mdrotor.report.inputs import MissingData, file_kind, plotting, stored_config
from mdrotor.report.labels import (
    FROT,
    SIG,
    frame_text,
    freq_unit,
    log_ticks,
    term_label,
    term_unit,
    time_unit,
)
from mdrotor.report.style import STAGE_FILL, wrap_text
from mdrotor.results.result import Result
from mdrotor.results.stats import histogram, mean_sem, std_se
from mdrotor.results.status import usable
from mdrotor.results.store import load_result

__all__ = ["schedule_figure", "L_histogram_figure", "L_stages_figure", "series_figure", "phonons_figure",
           "spectrum_figure", "coherence_figure", "run_figures", "rotor_info"]

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


def load_run(result):
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
    cfg = _config(res)
    if cfg is None:
        return None
    try:
        lad = config_ladder(cfg)
    except (InputError, PhysicsError):
        return None
    return lad.modulus, lad.residue, lad.statistics, lad.symmetry_order


def _config(res):
    """The result's config read back once (:func:`mdrotor.report.inputs.stored_config`), or None."""
    return stored_config(res.attrs.get("config_text"), res.attrs.get("config_dir"))


def _pin_terms(res) -> list:
    """[(name, order)] of the result's pinning terms, from its parsed config ([] when it cannot be read back)."""
    cfg = _config(res)
    return [tuple(t) for t in cfg.names()["pinning"]] if cfg is not None else []


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
    ps = plotting()
    res, path = load_run(result)
    sc = res.schedule
    if not sc or "t_s" not in sc or "f_rot_hz" not in sc:
        raise MissingData("/schedule", "the file has no /schedule group (the sampled schedule)", _src(path))
    t = np.asarray(sc["t_s"], dtype=float)
    f = np.asarray(sc["f_rot_hz"], dtype=float)
    pin = np.asarray(sc.get("pinning_strength_si", np.zeros((len(t), 0))), dtype=float)
    if pin.ndim == 1:
        pin = pin[:, None]
    terms = _pin_terms(res)
    if len(terms) != pin.shape[1]:
        terms = [(f"{j + 1}", None) for j in range(pin.shape[1])]
    bounds, names = _stage_bounds(res)
    ts, tu = time_unit(t[-1] if len(t) else 1.0)
    fs, fu = freq_unit(np.nanmax(np.abs(f)) if len(f) else 0.0)
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
            lab = f"pinning {term_label(name, order)}"
            ax.plot(t * ts, pin[:, j], **{**ps.style(j + 1), "marker": None}, label=lab)
            ax.set_ylabel(f"{lab} ({term_unit(order)})")
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
    ps = plotting()

    res, path = load_run(result)
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
        txt = [f"N = {L.size} trajectories", f"⟨L⟩ = {plus_minus(mean, sem, 6)} ħ", f"{SIG} = {plus_minus(std, std_err, 4)} ħ"]
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
    ps = plotting()

    res, path = load_run(result)
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
            ts, tu = time_unit(obs.t_s if obs.t_s > 0 else 1e-3)
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


def frame_of(res, obs) -> tuple[str, float]:
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
    ps = plotting()
    res, path = load_run(result)
    se = res.series
    if not se or "t_s" not in se:
        raise MissingData("/series", "the file has no /series group (run with observe.series_interval, "
                                     "e.g. --set observe.series_interval='\"10 us\"')", _src(path))
    t = np.asarray(se["t_s"], dtype=float)
    bounds, names = _stage_bounds(res)
    ts, tu = time_unit(max(t[-1], bounds[-1]))
    pinned = "lag_mean_rad" in se and (bool(res.schedule and "pinning_strength_si" in res.schedule) or bool(_pin_terms(res)))
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
        log_ticks(ax.yaxis)
    ax.set_ylabel("mean phonons ⟨n⟩ (quanta)")
    ax.set_title("mode energies")
    ax.set_title(wrap_text(_series_frame_note(res, se), 72), loc="right", fontsize=6.5, fontweight="normal")
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
            parts.append(f"'{name}': {frame_text(frame_of(res, obs))}")
    if not parts:
        fr = {frame_text(frame_of(res, o)) for o in res.stages.values()}
        parts = sorted(fr)
    return "; ".join(parts)


def phonons_figure(result, stage: str | None = None):
    """Mean phonons per mode with standard errors at the end (or a stage end),
    centre-of-mass modes (filled squares) and differential modes (open
    circles) in separate panels, each with its total."""
    ps = plotting()
    res, path = load_run(result)
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
    frame = frame_text(frame_of(res, obs))
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
            ax.set_title(f"{title}\ntotal {plus_minus(s.get(tot + '_mean'), s.get(tot + '_err'), 4)} quanta")
            if stacked:
                ax.set_ylabel("⟨n⟩ (quanta)")
        fig.supxlabel(f"mode: label and frequency ({fu}) in the {frame}", fontsize=8)
        if not stacked:
            axs[0].set_ylabel("mean phonon number ⟨n⟩ (quanta)")
        where = "end" if stage is None else ("start" if obs.name == "initial" else f"end of '{obs.name}'")
        fig.suptitle(f"phonons at the {where} (t = {obs.t_s * time_unit(obs.t_s)[0]:.4g} {time_unit(obs.t_s)[1]}), "
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
    ps = plotting()
    d = _rotor(result, rotor, None, k)
    lines = d["lines"]
    cen = np.array([ln["freq_hz"] for ln in lines])
    wid = np.array([ln["width_hz"] for ln in lines])
    dls = [int(ln["dL"]) for ln in lines]
    mod = int(d.get("allowed_L_mod", 1))
    fs, fu = freq_unit(np.max(np.abs(cen)))
    with ps.context():
        fig = ps.new_figure(ps.FULL_W, 2.9)
        ax = fig.add_subplot()
        span = float(np.max(cen) - np.min(cen)) if len(cen) > 1 else abs(float(cen[0])) or 1.0
        pad = max(0.12 * span, 4 * float(np.max(wid)))
        # the lines are positive frequencies (quanta added in the sense of rotation): no axis below 0
        lo, hi = max(float(np.min(cen)) - pad, 0.0), float(np.max(cen)) + pad
        x = np.linspace(lo, hi, 3000)
        texts = [f"ΔL = {dl}\n{c * fs:.7g} {fu}\nσ = {compact(w * fs, 3)} {fu}" for c, w, dl in zip(cen, wid, dls)]
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
    Raises :class:`~mdrotor.report.inputs.MissingData` when there is no diffusion constant.
    """
    ps = plotting()

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
    ts, tu = time_unit(t_rev)
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
    res, path = load_run(result)
    figs, skipped, _ = draw_run_figures(res, path, diffusion_hbar2_per_s, k)
    return figs, skipped


def draw_run_figures(res, path, diffusion_hbar2_per_s, k):
    """(figures, skipped, rotor info or None) of a loaded run: :func:`run_figures` and the report page share it."""
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
