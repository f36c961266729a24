"""Figures and reports (``mdrotor report``): every figure is made from small
stored results and carries the expected axes, units and numbers; sweeps and
optimisations give their maps and history; a file missing optional groups
gives the figures it can and names the ones it skipped."""

import json
import math
import subprocess
import sys

import h5py
import numpy as np
import pytest
from conftest import two_ion_toml
from scipy import constants as sc

import mdrotor
from mdrotor.commands.main import main
from mdrotor.errors import InputError
from mdrotor.report.inputs import MissingData
from mdrotor.report.page import write_report
from mdrotor.report.run_figures import (
    L_histogram_figure,
    L_stages_figure,
    coherence_figure,
    phonons_figure,
    rotor_info,
    run_figures,
    schedule_figure,
    series_figure,
    spectrum_figure,
)
from mdrotor.report.study_figures import optimize_figure, sweep_figures
from mdrotor.studies.optimize import load_optimize, run_optimize
from mdrotor.studies.sweep import load_sweep, run_sweep
from mdrotor.studies.table import read_table

# Two 40Ca+ ions pinned by a rotating quadrupole, spun up to 20 kHz in 10 us,
# released in 5 us and left to rotate for 5 us: a small stored result.
BASE = two_ion_toml(
    stage=[{"name": "spin-up", "duration": "10 us", "f_rot": {"to": "20 kHz", "shape": "smoothstep"}},
           {"name": "release", "duration": "5 us", "pinning": {"to": 0.0, "shape": "cosine"}},
           {"name": "free", "duration": "5 us"}],
    initial={"temperature": "0.5 mK"}, run={"trajectories": 20, "seed": 3})
SERIES = '[observe]\nseries_interval = "1 us"\n'
NOISE = '[[noise.multipole]]\norder = 2\npsd = { kind = "white", level = "100 V^2/m^4/Hz" }\n'


def cli(argv):
    """Run ``mdrotor report ...`` in-process through the command line."""
    return main(argv)


@pytest.fixture(scope="module")
def files(tmp_path_factory):
    d = tmp_path_factory.mktemp("report")
    full = d / "full.h5"
    mdrotor.save(mdrotor.run(mdrotor.load_config(_toml(d, "full.toml", BASE + SERIES + NOISE))), full)
    bare = d / "bare.h5"
    mdrotor.save(mdrotor.run(mdrotor.load_config(_toml(d, "bare.toml", BASE))), bare)
    return {"dir": d, "full": full, "bare": bare}


def _toml(d, name, text):
    p = d / name
    p.write_text(text)
    return p


def _labels(fig):
    return [(ax.get_xlabel(), ax.get_ylabel()) for ax in fig.axes if ax.get_visible()]


# ---------------------------------------------------------------------------
def test_schedule_figure(files):
    res = mdrotor.load(files["full"])
    fig = schedule_figure(files["full"])
    top, pin = fig.axes[0], fig.axes[1]
    assert top.get_ylabel() == "rotation $f_\\mathrm{rot}$ (kHz)"
    assert pin.get_ylabel() == "pinning c₂ (V/m²)"  # the coefficient c_n of the config's multipole convention
    assert pin.get_xlabel() == "time (µs)"
    # the drawn curves are the stored schedule in the axis units
    t, f = next(ln for ln in top.get_lines() if ln.get_label() == "rotation frequency").get_data()
    assert np.allclose(t, res.schedule["t_s"] * 1e6) and np.allclose(f, res.schedule["f_rot_hz"] * 1e-3)
    p = next(ln for ln in pin.get_lines() if ln.get_label() == "pinning c₂").get_ydata()
    assert np.allclose(p, res.schedule["pinning_strength_si"][:, 0])
    # stages named on the top panel
    names = {t.get_text() for t in top.texts}
    assert {"spin-up", "release", "free"} <= names


def test_L_histogram_with_ladder(files):
    res = mdrotor.load(files["full"])
    fig = L_histogram_figure(res)
    main, zoom = fig.axes[0], fig.axes[1]
    assert main.get_xlabel() == "angular momentum L (ħ)" and main.get_ylabel().startswith("trajectories per bin (bin ")
    assert zoom.get_xlabel().startswith("L (ħ)")
    counts, edges, _ = main.patches[0].get_data()
    assert counts.sum() == res.summary["n_ok"]  # every trajectory kept in the statistics, once
    bars = next(c for c in main.containers if c.has_yerr)
    seg = bars.lines[2][0].get_segments()
    # Poisson counting errors sqrt(N) (common practice, no source)
    assert np.allclose([s[1, 1] - s[0, 1] for s in seg], 2 * np.sqrt(counts))
    mean_line = next(ln for ln in main.get_lines() if ln.get_label() == "mean ⟨L⟩")
    assert mean_line.get_xdata()[0] == pytest.approx(res.summary["L_mean_hbar"], rel=1e-12)
    # 40Ca+ counts 40 nucleons and 19 electrons: a fermion (common practice, no source); two identical
    # fermions exchanged by a rotation by pi need exp(i pi L) = -1, so only odd L are allowed
    # (from memory: L.D. Landau and E.M. Lifshitz, Quantum Mechanics, 3rd ed. (1977), ch. XI,
    # rotational levels of molecules with identical nuclei)
    comb = next(c for c in zoom.collections if c.get_label() == "allowed L")
    xs = np.array(sorted(s[0, 0] for s in comb.get_segments()))
    assert xs.size >= 4 and np.all(xs % 2 == 1) and np.all(np.diff(xs) == 2)
    lo, hi = zoom.get_xlim()
    assert lo < res.summary["L_mean_hbar"] < hi


def test_stage_histograms_and_phonons(files):
    res = mdrotor.load(files["full"])
    fig = L_stages_figure(res)
    axs = [ax for ax in fig.axes if ax.get_visible()]
    assert len(axs) == 1 + len(res.stages)  # t = 0 and every stage end
    assert all(ax.get_xlabel() == "L (ħ)" for ax in axs)
    fig = phonons_figure(res)
    com, diff = fig.axes
    assert com.get_ylabel() == "mean phonon number ⟨n⟩ (quanta)"
    assert fig.get_supxlabel().startswith("mode: label and frequency (kHz) in the ")
    kinds = res.final.modes["kind"]
    for ax, kind in ((com, "com"), (diff, "differential")):
        y = ax.containers[0].lines[0].get_ydata()
        want = [n for n, k in zip(res.summary["mode_n_mean"], kinds) if k == kind]
        assert np.allclose(y, want)
        assert len(ax.get_xticklabels()) == kinds.count(kind)


def test_identical_L_values(files):
    """A classical start at the exact equilibrium gives every trajectory the same L at t = 0:
    the histograms still draw (one unit-wide bin range) and count every trajectory."""
    res = mdrotor.load(files["bare"])
    res.initial.arrays["L_hbar"] = np.full_like(res.initial.arrays["L_hbar"], 1234.0)
    fig = L_histogram_figure(res, stage="initial")
    counts, edges, _ = fig.axes[0].patches[0].get_data()
    assert counts.sum() == res.initial.summary["n_ok"] and edges[0] < 1234.0 < edges[-1]
    L_stages_figure(res)


def test_series_figure(files):
    res = mdrotor.load(files["full"])
    fig = series_figure(res)
    a, b, c = fig.axes
    assert (a.get_ylabel(), b.get_ylabel(), c.get_ylabel()) == ("L (ħ)", "lag angle (rad)", "mean phonons ⟨n⟩ (quanta)")
    assert c.get_xlabel() == "time (µs)"
    mean = next(ln for ln in a.get_lines() if ln.get_label() == "mean ⟨L⟩")
    assert np.allclose(mean.get_ydata(), res.series["L_mean_hbar"])
    # the lag is kept modulo 2 pi / n: the wells of an order-2 pinning end at +-pi/2 (common practice, no source)
    edge = next(ln for ln in b.get_lines() if ln.get_label().startswith("well edge"))
    assert edge.get_ydata()[0] == pytest.approx(math.pi / 2)
    legend = {t.get_text() for t in c.get_legend().get_texts()}
    assert "libration" in legend  # pinned modes while pinned ...
    assert set(res.final.modes["label"]) <= legend  # ... and the free crystal's modes after release


def test_spectrum_and_coherence(files):
    info = rotor_info(files["full"])
    fig = spectrum_figure(files["full"], rotor=info)
    ax = fig.axes[0]
    assert ax.get_xlabel() == "transition frequency (kHz)" and ax.get_ylabel() == "line profile (peak = 1, no unit)"
    # rigid planar rotor E_L = hbar^2 L^2 / (2 I) with L = 2 pi I f / hbar: the line L -> L + k lies at
    # k f + k^2 hbar / (4 pi I) (textbook rigid rotor, e.g. Landau and Lifshitz, Quantum Mechanics, from memory);
    # stretched by its rotation, dE/dL = hbar w makes I the dynamic I_d = d(I w)/dw (tests/analysis/test_rotor_summary.py)
    I, f = info["dynamic_moment_of_inertia_kg_m2"], info["f_rot_hz"]
    sticks = sorted(float(c.get_segments()[0][0, 0]) for c in ax.collections if c.__class__.__name__ == "LineCollection"
                    and len(c.get_segments()) == 1 and c.get_segments()[0][0, 0] == c.get_segments()[0][1, 0])
    want = [(k * f + k * k * sc.hbar / (4 * np.pi * I)) * 1e-3 for k in (1, 2, 3)]
    assert np.allclose(sticks, want, rtol=1e-12)

    assert ax.get_xlim()[0] >= 0

    # the opposite sense of rotation: the lines adding quanta in that sense, L -> L - k, lie at
    # (E_{L-k} - E_L) / h = k |f| + k^2 hbar / (4 pi I) > 0 (same rigid rotor); lines as wide as their
    # spacing do not push the axis below zero frequency
    from mdrotor.analysis.rotor import rotor_summary

    cw = _toml(files["dir"], "ccw.toml", BASE.replace('to = "20 kHz"', 'to = "-20 kHz"'))
    info_ccw = rotor_summary(cw)
    assert info_ccw["f_rot_hz"] == pytest.approx(-20e3, rel=1e-12)
    assert [ln["dL"] for ln in info_ccw["lines"]] == [-1, -2, -3]
    I2 = info_ccw["dynamic_moment_of_inertia_kg_m2"]
    want = [(k * 20e3 + k * k * sc.hbar / (4 * np.pi * I2)) * 1e-3 for k in (1, 2, 3)]
    wide = dict(info_ccw, lines=[dict(ln, width_hz=15e3) for ln in info_ccw["lines"]])
    for d in (info_ccw, wide):
        ax = spectrum_figure(files["full"], rotor=d).axes[0]
        sticks = sorted(float(c.get_segments()[0][0, 0]) for c in ax.collections  # vertical, from 0 to 1
                        if c.__class__.__name__ == "LineCollection" and len(c.get_segments()) == 1
                        and np.ndim(c.get_segments()[0]) == 2   # a config has no L spread: no width bar
                        and c.get_segments()[0][0, 0] == c.get_segments()[0][1, 0]
                        and c.get_segments()[0][1, 1] - c.get_segments()[0][0, 1] == 1.0)
        assert np.allclose(sticks, want, rtol=1e-12)
        assert ax.get_xlim()[0] >= 0

    fig = coherence_figure(files["full"], rotor=info)
    ax = fig.axes[0]
    assert ax.get_xscale() == "log" and ax.get_ylabel() == "contrast (1 without noise)"
    unit = ax.get_xlabel().split("(")[1].rstrip(")")
    scale = {"µs": 1e6, "ms": 1e3, "s": 1.0}[unit]
    # branches k quanta apart turn relative to each other at k hbar / I (I_d when stretched): by 2 pi / N after 2 pi I / (N k hbar),
    # by 2 pi after 2 pi I / (k hbar) (rigid rotor kinematics, common practice, no source)
    k = info["k"]
    marks = sorted(ln.get_xdata()[0] for ln in ax.get_lines() if ln.get_linestyle() == "-.")
    assert marks == pytest.approx([2 * np.pi * I / (2 * k * sc.hbar) * scale, 2 * np.pi * I / (k * sc.hbar) * scale], rel=1e-12)
    ramsey = ax.get_lines()[0]
    assert ramsey.get_ydata()[0] == pytest.approx(1.0, abs=1e-3)  # no decay at t -> 0
    assert np.all(np.diff(ramsey.get_ydata()) <= 1e-12)  # pure diffusion only ever lowers the contrast
    # a given D overrides the run's (the same precedence as mdrotor rotor)
    fig = coherence_figure(files["full"], diffusion_hbar2_per_s=1e3)
    assert "D = 1000 ħ²/s (given)" in [t.get_text() for t in fig.axes[0].texts]


def test_missing_groups_are_skipped(files, tmp_path):
    stripped = tmp_path / "stripped.h5"
    stripped.write_bytes(files["bare"].read_bytes())
    with h5py.File(stripped, "a") as f:
        del f["schedule"]
    out = tmp_path / "rep"
    rep = write_report(stripped, out)
    assert set(rep["skipped"]) == {"schedule", "series", "coherence"}
    assert "/schedule" in rep["skipped"]["schedule"]
    assert "observe.series_interval" in rep["skipped"]["series"]
    assert "--diffusion" in rep["skipped"]["coherence"]
    made = sorted(p.name for p in out.glob("*.png"))
    assert made == ["L_final.png", "L_stages.png", "phonons.png", "spectrum.png"]
    text = (out / "summary.md").read_text()
    assert "Skipped figures" in text and "series:" in text and "![" in text
    assert "seed" in text and "dt_s" in text and "package_version" in text  # provenance
    with pytest.raises(MissingData) as e:
        series_figure(stripped)
    assert e.value.key == "/series"
    figs, skipped = run_figures(files["full"])
    assert set(figs) == {"schedule", "L_final", "L_stages", "series", "phonons", "spectrum", "coherence"} and not skipped
    # without /schedule the series figure takes the stage bounds from the stage-end times
    no_sched = tmp_path / "no_schedule.h5"
    no_sched.write_bytes(files["full"].read_bytes())
    with h5py.File(no_sched, "a") as f:
        del f["schedule"]
    figs, skipped = run_figures(no_sched)
    assert set(skipped) == {"schedule"} and "series" in figs
    assert {"spin-up", "release", "free"} <= {t.get_text() for t in figs["series"].axes[0].texts}


def test_cli_formats_and_bad_input(files, tmp_path, capsys):
    out = tmp_path / "svg"
    assert cli(["report", str(files["full"]), "-o", str(out), "--format", "svg", "--summary", "html", "--json"]) == 0
    rep = json.loads(capsys.readouterr().out)
    assert rep["kind"] == "run" and len(rep["figures"]) == 7 and all(p.endswith(".svg") for p in rep["figures"])
    page = (out / "summary.html").read_text()
    assert page.count("<img src='") == 7 and "L_final.svg" in page
    assert cli(["report", str(files["bare"]), "-o", str(tmp_path / "pdf"), "--format", "pdf"]) == 0
    assert "skipped coherence" in capsys.readouterr().out
    assert (tmp_path / "pdf" / "L_final.pdf").read_bytes()[:4] == b"%PDF"
    assert cli(["report", str(tmp_path / "nope.h5")]) == 2
    assert "nope.h5" in capsys.readouterr().err
    assert cli(["report", str(files["full"]), "--diffusion", "-1", "-o", str(out)]) == 2
    assert "--diffusion" in capsys.readouterr().err
    with pytest.raises(SystemExit) as e:
        cli(["report", str(files["full"]), "--format", "bmp"])
    assert e.value.code == 2


def test_import_is_light_and_figures_avoid_pyplot(files):
    """--help must not import matplotlib; figures are drawn on Agg without pyplot."""
    code = (
        "import sys\n"
        "from mdrotor.report.run_figures import L_histogram_figure\n"
        "assert 'matplotlib' not in sys.modules\n"
        f"fig = L_histogram_figure({str(files['bare'])!r})\n"
        "assert 'matplotlib.pyplot' not in sys.modules\n"
        "print(type(fig.canvas).__name__)\n"
    )
    r = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True, timeout=120)
    assert r.returncode == 0, r.stderr
    assert r.stdout.strip() == "FigureCanvasAgg"


# ---------------------------------------------------------------------------
# sweeps and optimisations
def _sweep(d, name, axes_text, trajectories=2):
    _toml(d, "base.toml", BASE)
    spec = load_sweep(_toml(d, f"{name}.toml", f'base = "base.toml"\ntrajectories = {trajectories}\n' + axes_text))
    out = d / f"{name}.h5"
    run_sweep(spec, out, workers=1)
    return out


def test_sweep_one_axis_line_plots(tmp_path):
    out = _sweep(tmp_path, "line", '[[axis]]\nkey = "stage.spin-up.duration"\nvalues = ["6 us", "10 us", "14 us"]\n')
    figs = sweep_figures(out)
    t = read_table(out)
    axs = [ax for f in figs for ax in f.axes if ax.get_visible()]
    assert all(ax.get_xlabel() == "'spin-up': duration (µs)" for ax in axs)
    ylabels = [ax.get_ylabel() for ax in axs]
    assert "mean ⟨L⟩ (ħ)" in ylabels and "rotation $f_\\mathrm{rot}$ (kHz)" in ylabels
    assert all(y.endswith(")") for y in ylabels)  # a unit on every axis
    ax = axs[ylabels.index("mean ⟨L⟩ (ħ)")]
    x, y = ax.containers[0].lines[0].get_data()
    assert np.allclose(x, [6, 10, 14]) and np.allclose(y, t["metrics"]["L_mean_hbar"])
    rep = write_report(out, tmp_path / "rep")
    assert rep["kind"] == "sweep" and rep["figures"] and not rep["skipped"]
    assert "## Points" in (tmp_path / "rep" / "summary.md").read_text()


def test_sweep_two_axes_heat_map(tmp_path):
    out = _sweep(tmp_path, "map", '[[axis]]\nkey = "stage.spin-up.duration"\nvalues = ["6 us", "10 us"]\n'
                                  '[[axis]]\nkey = "initial.temperature"\nvalues = ["0.3 mK", "1 mK"]\n')
    t = read_table(out)
    fig = sweep_figures(out, metrics="L_std_hbar,differential_n_mean")[0]
    ax = fig.axes[0]
    assert ax.get_xlabel() == "'spin-up': duration (µs)" and ax.get_ylabel() == "initial temperature (mK)"
    mesh = ax.collections[0]
    z = np.asarray(mesh.get_array()).reshape(2, 2)
    # grid order: the last axis (temperature, on y) varies fastest
    want = np.asarray(t["metrics"]["L_std_hbar"]).reshape(2, 2).T
    assert np.allclose(z, want)
    cbar_labels = [a.get_ylabel() for a in fig.axes[1:]]
    assert "spread $\\sigma_L$ (ħ)" in cbar_labels and "differential phonons (quanta)" in cbar_labels
    with pytest.raises(InputError) as e:
        sweep_figures(out, metrics="no_such_metric")
    assert e.value.key == "--metrics"


def test_slice_of_a_three_axis_grid():
    """A grid of 2 x 3 x 2 points (a table as read_table gives it): the heat map
    over the first two axes at a chosen value of the third."""
    a, b, c = ["1 us", "2 us"], ["10 kHz", "20 kHz", "30 kHz"], ["0.3 mK", "1 mK"]
    rows = [(i, j, k) for i in range(2) for j in range(3) for k in range(2)]
    n = len(rows)
    val = np.array([100 * i + 10 * j + k for i, j, k in rows], dtype=float)
    si = {"a": [1e-6, 2e-6], "b": [1e4, 2e4, 3e4], "c": [3e-4, 1e-3]}
    table = {
        "index": np.arange(n), "seed": np.zeros(n, np.uint64), "complete": np.ones(n, np.uint8),
        "failed": np.zeros(n, np.uint8), "error": [""] * n,
        "axes": {"stage.spin-up.duration": {"text": [a[i] for i, _, _ in rows], "si": np.array([si["a"][i] for i, _, _ in rows])},
                 "stage.spin-up.f_rot.to": {"text": [b[j] for _, j, _ in rows], "si": np.array([si["b"][j] for _, j, _ in rows])},
                 "initial.temperature": {"text": [c[k] for _, _, k in rows], "si": np.array([si["c"][k] for _, _, k in rows])}},
        "metrics": {"L_std_hbar": val, "L_std_err_hbar": np.full(n, 0.5)},
        "meta": {"kind": "sweep", "combine": "grid"},
    }
    fig = sweep_figures(table, metrics="L_std_hbar", fixed={"initial.temperature": "1e-3 K"})[0]
    z = np.asarray(fig.axes[0].collections[0].get_array()).reshape(3, 2)
    assert np.allclose(z, [[100 * i + 10 * j + 1 for i in range(2)] for j in range(3)])
    assert "at initial temperature = 1" in fig.get_suptitle()
    fig = sweep_figures(table, metrics="L_std_hbar", axes="stage.spin-up.f_rot.to,initial.temperature",
                               fixed={"stage.spin-up.duration": "#1"})[0]
    z = np.asarray(fig.axes[0].collections[0].get_array()).reshape(2, 3)
    assert np.allclose(z, [[100 + 10 * j + k for j in range(3)] for k in range(2)])
    with pytest.raises(InputError) as e:
        sweep_figures(table, fixed={"initial.temperature": "5 mK"})
    assert e.value.key == "--slice" and "0.3 mK" in e.value.expected


def test_optimisation_report(tmp_path):
    _toml(tmp_path, "base.toml", BASE)
    opt = _toml(tmp_path, "opt.toml", """
base = "base.toml"
trajectories = 2
seed = 5
[optimizer]
method = "nelder-mead"
budget = 4
[[parameter]]
key = "stage.spin-up.duration"
bounds = ["6 us", "14 us"]
start = "8 us"
[[objective]]
metric = "L_std_hbar"
[[constraint]]
metric = "slip_fraction"
max = 0.0
[confirm]
trajectories = 4
""")
    out = tmp_path / "opt.h5"
    s = run_optimize(load_optimize(opt), out, workers=1)
    fig = optimize_figure(out)
    top, par = fig.axes[0], fig.axes[1]
    assert top.get_ylabel() == "objective (as defined)" and par.get_xlabel() == "evaluation number"
    assert par.get_ylabel().endswith("(µs)")
    star = next(ln for ln in top.get_lines() if ln.get_label().startswith("best (#"))
    assert star.get_xdata()[0] == s["best"]["index"] and star.get_ydata()[0] == pytest.approx(s["best"]["objective"])
    conf = next(c for c in top.containers if c.get_label().startswith("confirmation"))
    assert conf.lines[0].get_ydata()[0] == pytest.approx(s["confirm"]["objective"])
    # bounds drawn in the parameter's unit
    bounds = sorted(ln.get_ydata()[0] for ln in par.get_lines() if ln.get_linestyle() == ":")
    assert bounds == pytest.approx([6.0, 14.0])
    rep = write_report(out, tmp_path / "rep")
    names = {p.split("/")[-1] for p in rep["figures"]}
    assert {"optimize_history.png", "optimize_landscape_1.png", "confirm_L_final.png", "confirm_schedule.png"} <= names
    assert set(rep["skipped"]) == {"confirm_series", "confirm_coherence"}


def test_quantum_ladder_groups_keep_the_weight_and_sit_at_their_mean_L():
    # grouping g neighbouring allowed L (L = 1 mod 2) for display: the summed
    # weight is unchanged and each group sits at the mean of the L it spans
    # (arithmetic, common practice, no source)
    from mdrotor.report.quantum_figure import _ladder_groups

    L = np.arange(-41, 60, 2).astype(float)  # odd L
    w = np.exp(-0.5 * (L / 17.0) ** 2)
    Lb, wb = _ladder_groups(L, w, 1, 2, 5)
    assert wb.sum() == pytest.approx(w.sum(), rel=1e-14)
    for c, s in zip(Lb, wb):
        members = L[(L >= c - 4.5) & (L <= c + 4.5)]
        assert len(members) <= 5 and np.all(members % 2 == 1)
        assert s == pytest.approx(w[np.isin(L, members)].sum(), rel=1e-14)
    full = np.arange(1, 60, 10)  # groups of 5 odd L starting at L = 1: 1..9, 11..19, ...
    assert np.all(np.isin(full + 4, Lb))
    same_L, same_w = _ladder_groups(L, w, 1, 2, 1)
    assert np.array_equal(same_L, L) and np.array_equal(same_w, w)
