"""The quantum rotor's figure: :func:`quantum_figure` draws a quantum-rotor file
(``mdrotor quantum -o``): P(L) on the allowed ladder beside the ensemble's
histogram, with the verdict.
"""

from __future__ import annotations

import numpy as np

from mdrotor.numfmt import compact, plus_minus
from mdrotor.report.inputs import MissingData, plotting
from mdrotor.report.labels import SIG, time_unit
from mdrotor.results.store import load_quantum
from mdrotor.studies.quantum import fixed_digits

__all__ = ["quantum_figure"]

QUANTUM_CAPTION = ("Quantum P(L) of the rigid rotor (bars, on the exchange-allowed ladder) at t = 0 and at every stage "
                   "end, beside the Monte-Carlo ensemble's L binned on the same ladder (points, error bars: "
                   "√counts / N, shifted by whole ladder steps to align the means), with the verdict on whether the "
                   "semiclassical answer holds.")


def quantum_dict(source) -> dict:
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
    ps = plotting()
    d = quantum_dict(source)
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
            txt = [f"quantum: ⟨L⟩ = {fixed_digits(st['L_mean_hbar'], 2)} ħ, {SIG} = {compact(st['L_std_hbar'], 4)} ħ"]
            top = float(np.max(Pb))
            if e is not None:
                N = float(e["n"])
                hLb, c = _ladder_groups(hL, np.asarray(e["histogram_counts"], dtype=float), off, sp, g)
                ax.errorbar(hLb, c / N, yerr=np.sqrt(c) / N, fmt=stl["marker"], color=stl["color"], ms=3.0, lw=0.8,
                            capsize=1.5, zorder=3, ls="none", label="ensemble, binned on the ladder")
                top = max(top, float(np.max((c + np.sqrt(c)) / N)))
                txt.append(f"ensemble (N = {int(N)}): ⟨L⟩ = {plus_minus(e['mean_hbar'], e['mean_err_hbar'])} ħ, "
                           f"{SIG} = {plus_minus(e['std_hbar'], e['std_err_hbar'])} ħ"
                           + (f", drawn shifted by {shift:+d} ħ" if shift else ""))
                txt.append(f"total-variation distance {e['tv']:.3f} (sampling alone, 99 %: {e['tv_null_99']:.3f})")
            if g > 1:
                txt.append(f"drawn in groups of {g} allowed L ({w} ħ wide)")
            ax.set_xlim(lo - 2.5 * sp, hi + 2.5 * sp)
            ax.set_ylim(0, (1.25 + 0.2 * len(txt)) * top)
            name = st["name"]
            ts, tu = time_unit(st["t_s"] if st["t_s"] > 0 else 1e-3)
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
