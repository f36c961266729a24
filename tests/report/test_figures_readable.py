"""Figures that do not mislead: every curve its own (colour, marker, line),
axis scales that follow a sweep's spacing, labels that never overlap,
legends off the data, markers inside their panels, no internal key names,
and the frame of the modes stated.

The checks look at the artists of the laid-out figures (after
``fig.canvas.draw()``), not at pixels; the geometry is recomputed here from
matplotlib's own window extents and transforms, independently of the
layout code in :mod:`mdrotor.report.style`. Distances are in display pixels:
half a pixel of slack covers matplotlib's rounding of extents to the pixel
grid and nothing more (common practice, no source).
"""

import re

import numpy as np
import pytest
from matplotlib.colors import to_rgba
from matplotlib.text import Text
from test_report import BASE, NOISE, SERIES, _sweep, _toml

import mdrotor
from mdrotor.report import style as plotstyle
from mdrotor.report.quantum_figure import quantum_figure
from mdrotor.report.run_figures import MAX_CURVES, phonons_figure, run_figures, schedule_figure, series_figure
from mdrotor.report.study_figures import optimize_figure, sweep_figures

SLACK_PX = 0.5

# names that belong to the code or the file, not to the reader: config paths
# (stage.spin-up.duration), default pinning-term names (n2, n3), column and
# HDF5 names (slip_fraction, L_std_hbar, pinning_peak, f_rot_hz)
INTERNAL = [
    re.compile(r"\b[a-z]+\.[A-Za-z0-9_-]+\.[A-Za-z0-9_]+"),  # dotted config paths
    re.compile(r"(?<![\w-])n\d+\b"),  # a pinning term's default name
    re.compile(r"\b[A-Za-z]+_[A-Za-z0-9]+"),  # snake_case column or attribute names
]


# ---------------------------------------------------------------------------
# checks on a figure
# ---------------------------------------------------------------------------
def _drawn(fig):
    fig.canvas.draw()
    return fig.canvas.get_renderer()


def _panels(fig):
    return [ax for ax in fig.axes if ax.get_visible()]


def _overlap(a, b, slack=SLACK_PX):
    return a.x0 < b.x1 - slack and b.x0 < a.x1 - slack and a.y0 < b.y1 - slack and b.y0 < a.y1 - slack


def _texts(fig):
    """Every string a reader sees on the figure."""
    out = [fig.get_suptitle(), fig.get_supxlabel(), fig.get_supylabel()]
    for leg in fig.legends:
        out += [t.get_text() for t in leg.get_texts()]
    for ax in _panels(fig):
        out += [ax.get_xlabel(), ax.get_ylabel()] + [ax.get_title(loc=w) for w in ("left", "center", "right")]
        out += [t.get_text() for t in ax.get_xticklabels() + ax.get_yticklabels()]
        out += [t.get_text() for t in ax.texts]
        if ax.get_legend() is not None:
            out += [t.get_text() for t in ax.get_legend().get_texts()]
    return [t for t in out if t]


def assert_no_internal_names(fig):
    for text in _texts(fig):
        plain = re.sub(r"\$[^$]*\$", "", text)  # mathtext ($\sigma_L$) is typography, not a name
        for pat in INTERNAL:
            m = pat.search(plain)
            assert m is None, f"internal name {m.group(0)!r} in {text!r}"


def assert_tick_labels_clear(fig, r=None):
    r = r or _drawn(fig)
    for ax in _panels(fig):
        for axis in (ax.xaxis, ax.yaxis):
            for minor in (False, True):
                boxes = [t.get_window_extent(r) for t in axis.get_ticklabels(minor=minor)
                         if t.get_visible() and t.get_text().strip()]
                for i in range(len(boxes)):
                    for j in range(i + 1, len(boxes)):
                        assert not _overlap(boxes[i], boxes[j]), \
                            f"tick labels {i} and {j} overlap on {axis.axis_name} of {ax.get_title() or ax.get_ylabel()!r}"


def assert_headings_clear(fig, r=None):
    """Titles, axis titles, the figure's title and footnote and every legend
    stay apart from each other."""
    r = r or _drawn(fig)
    items = []
    for t in (fig._suptitle, fig._supxlabel):
        if t is not None and t.get_text():
            items.append((f"figure text {t.get_text()!r}", t.get_window_extent(r)))
    for leg in fig.legends:
        items.append(("figure legend", leg.get_window_extent(r)))
    for k, ax in enumerate(_panels(fig)):
        for t in (ax.title, ax._left_title, ax._right_title, ax.xaxis.label, ax.yaxis.label):
            if t.get_text():
                items.append((f"panel {k} {t.get_text()!r}", t.get_window_extent(r)))
        if ax.get_legend() is not None:
            items.append((f"panel {k} legend", ax.get_legend().get_window_extent(r)))
    for i in range(len(items)):
        for j in range(i + 1, len(items)):
            assert not _overlap(items[i][1], items[j][1]), f"{items[i][0]} overlaps {items[j][0]}"


def assert_panel_texts_apart(fig, r=None):
    """Texts written on a panel (stage names, line labels, notes) do not
    run into each other."""
    r = r or _drawn(fig)
    for ax in _panels(fig):
        texts = [t for t in ax.texts if t.get_visible() and t.get_text().strip()]
        boxes = [Text.get_window_extent(t, r) for t in texts]  # the text alone (an annotation's leader line aside)
        for i in range(len(boxes)):
            for j in range(i + 1, len(boxes)):
                assert not _overlap(boxes[i], boxes[j]), f"{texts[i].get_text()!r} overlaps {texts[j].get_text()!r}"


def _data_px(ax):
    pts = []
    for ln in ax.get_lines():
        if ln.get_visible() and ln.get_transform() == ax.transData:
            x, y = (np.asarray(v, float).ravel() for v in ln.get_data())
            ok = np.isfinite(x) & np.isfinite(y)
            if ok.any():
                pts.append(ax.transData.transform(np.column_stack([x[ok], y[ok]])))
    return np.vstack(pts) if pts else np.zeros((0, 2))


def assert_legends_off_data(fig, r=None):
    r = r or _drawn(fig)
    boxes = [(ax, ax.get_legend().get_window_extent(r)) for ax in _panels(fig) if ax.get_legend() is not None]
    boxes += [(None, leg.get_window_extent(r)) for leg in fig.legends]
    for owner, bb in boxes:
        for ax in ([owner] if owner is not None else _panels(fig)):
            p = _data_px(ax)
            inside = (p[:, 0] > bb.x0 + SLACK_PX) & (p[:, 0] < bb.x1 - SLACK_PX) & \
                     (p[:, 1] > bb.y0 + SLACK_PX) & (p[:, 1] < bb.y1 - SLACK_PX)
            assert not inside.any(), f"a legend covers {int(inside.sum())} data points of {ax.get_ylabel()!r}"


CAPS = ("_", "|")  # error-bar caps lie along their bar


def assert_markers_inside(fig, r=None):
    """Every marker whose centre is in view is drawn whole inside its panel."""
    r = r or _drawn(fig)
    for ax in _panels(fig):
        if not ax.get_navigate():
            continue
        box = ax.bbox
        for ln in ax.get_lines():
            m = ln.get_marker()
            if not ln.get_visible() or m in (None, "None", "none", "") or m in CAPS or ln.get_transform() != ax.transData:
                continue
            x, y = (np.asarray(v, float).ravel() for v in ln.get_data())
            ev = ln.get_markevery()
            if isinstance(ev, int):
                x, y = x[::ev], y[::ev]
            ok = np.isfinite(x) & np.isfinite(y)
            if not ok.any():
                continue
            px = ax.transData.transform(np.column_stack([x[ok], y[ok]]))
            r = 0.5 * (ln.get_markersize() + ln.get_markeredgewidth()) * fig.dpi / 72.0
            seen = (px[:, 0] >= box.x0) & (px[:, 0] <= box.x1) & (px[:, 1] >= box.y0) & (px[:, 1] <= box.y1)
            px = px[seen]
            assert np.all(px[:, 0] - r >= box.x0 - SLACK_PX) and np.all(px[:, 0] + r <= box.x1 + SLACK_PX), \
                f"a {m!r} marker of {ln.get_label()!r} is cut by a side of {ax.get_ylabel()!r}"
            assert np.all(px[:, 1] - r >= box.y0 - SLACK_PX) and np.all(px[:, 1] + r <= box.y1 + SLACK_PX), \
                f"a {m!r} marker of {ln.get_label()!r} is cut by the top or bottom of {ax.get_ylabel()!r}"


def assert_readable(fig):
    """All the checks on one drawing of the figure."""
    r = _drawn(fig)
    assert_no_internal_names(fig)
    assert_tick_labels_clear(fig, r)
    assert_headings_clear(fig, r)
    assert_panel_texts_apart(fig, r)
    assert_legends_off_data(fig, r)
    assert_markers_inside(fig, r)


def _style_of(ln):
    return (to_rgba(ln.get_color()), ln.get_marker(), ln.get_linestyle())


# ---------------------------------------------------------------------------
# the palette
# ---------------------------------------------------------------------------
def test_style_triples_are_distinct():
    """Colour i mod 7, marker i mod 9, line i mod 4: with pairwise coprime
    lengths every index below 7 * 9 * 4 has its own triple (Chinese remainder
    theorem, from memory: G.H. Hardy and E.M. Wright, An Introduction to the
    Theory of Numbers, ch. VIII), and neighbours differ in all three."""
    assert plotstyle.N_STYLES == 252 >= 90  # a 30-ion crystal has 90 modes
    triples = [tuple(plotstyle.style(i).values()) for i in range(plotstyle.N_STYLES)]
    assert len(set(triples)) == len(triples)
    for a, b in zip(triples, triples[1:]):
        assert all(x != y for x, y in zip(a, b))
    with pytest.raises(ValueError):
        plotstyle.style(plotstyle.N_STYLES)


# ---------------------------------------------------------------------------
# run figures
# ---------------------------------------------------------------------------
@pytest.fixture(scope="module")
def run(tmp_path_factory):
    d = tmp_path_factory.mktemp("readable")
    path = d / "run.h5"
    mdrotor.save(mdrotor.run(mdrotor.load_config(_toml(d, "run.toml", BASE + SERIES + NOISE))), path)
    return path


def test_every_run_figure_is_readable(run):
    figs, skipped = run_figures(run)
    assert not skipped
    for name, fig in figs.items():
        try:
            assert_readable(fig)
        except AssertionError as e:
            raise AssertionError(f"{name}: {e}") from None


def test_narrow_stages_keep_their_names_apart(run):
    """Three short stages between two long ones: the names spread out in
    stage order, each tied to its stage."""
    res = mdrotor.load(run)
    t_end = res.schedule["stage_bounds_s"][-1]
    res.schedule = dict(res.schedule, stage_bounds_s=np.array([0, 0.5, 0.505, 0.51, 0.515, 1.0]) * t_end,
                        stage_names=["spin-up", "hold-a", "hold-b", "kick", "free rotation"])
    fig = schedule_figure(res)
    assert_readable(fig)
    top = fig.axes[0]
    r = _drawn(fig)
    names = {t.get_text(): t.get_window_extent(r).x0 for t in top.texts}
    assert list(dict(sorted(names.items(), key=lambda kv: kv[1]))) == ["spin-up", "hold-a", "hold-b", "kick", "free rotation"]


def test_series_styles_distinct(tmp_path, configs_dir):
    """A three-ion triangle has nine modes while pinned (libration among
    them) and more labels after release: more curves than six."""
    cfg = mdrotor.load_config(configs_dir / "triangle_order3.toml", [
        "stage.spin-up.duration='10 us'", "stage.spin-up.f_rot.to='20 kHz'", "stage.release.duration='5 us'",
        "run.trajectories=6", "observe.series_interval='1 us'"])
    res = mdrotor.run(cfg)
    fig = series_figure(res)
    modes = fig.axes[-1]
    lines = [ln for ln in modes.get_lines() if not ln.get_label().startswith("_")]
    assert len(lines) > 6
    styles = [_style_of(ln) for ln in lines]
    assert len(set(styles)) == len(styles)
    assert_readable(fig)


def _many_modes(res, n_modes=90, n_rows=30):
    """The stored run with a 30-ion crystal's worth of modes made up (the
    figure draws what the file holds; the numbers here only need to be
    distinct): final observation and time series."""
    obs = res.final
    labels = ["com-x", "com-y", "com-z"] + [f"in-plane-{i}" for i in range(1, 58)] + [f"out-of-plane-{i}" for i in range(1, 31)]
    kinds = ["com"] * 3 + ["differential"] * (n_modes - 3)
    obs.modes = {"freq_hz": np.linspace(0.3e6, 2.9e6, n_modes), "label": labels, "kind": kinds, "plane": ["x"] * n_modes}
    obs.summary = dict(obs.summary, mode_n_mean=np.linspace(1.0, 40.0, n_modes), mode_n_err=np.full(n_modes, 0.5))
    t = np.linspace(0.0, obs.t_s, n_rows)
    res.series = {"t_s": t, "L_mean_hbar": np.linspace(0, 100, n_rows), "L_std_hbar": np.full(n_rows, 5.0),
                  "mode_n_mean": 1.0 + np.outer(np.linspace(1, 2, n_rows), np.arange(n_modes)),
                  "stage": [obs.name] * n_rows, "mode_labels": [",".join(labels)] * n_rows}
    return res


def test_thirty_ion_crystal_is_grouped_and_labelled_clearly(run):
    res = _many_modes(mdrotor.load(run))
    fig = series_figure(res)
    modes = fig.axes[-1]
    lines = [ln for ln in modes.get_lines() if not ln.get_label().startswith("_")]
    assert len(lines) <= MAX_CURVES
    assert len({_style_of(ln) for ln in lines}) == len(lines)
    band = [c for c in modes.collections if c.get_label().endswith("other modes (lowest to highest)")]
    assert len(band) == 1 and band[0].get_label().startswith(f"{90 - len(lines)} ")
    # the hottest modes are the ones drawn (made-up means rise with the column index)
    assert {ln.get_label() for ln in lines} == set(res.final.modes["label"][-len(lines):])
    assert_readable(fig)
    fig = phonons_figure(res)
    assert_tick_labels_clear(fig)
    assert_headings_clear(fig)


# ---------------------------------------------------------------------------
# frames
# ---------------------------------------------------------------------------
def test_mode_frame_in_headings(run):
    res = mdrotor.load(run)
    # as stored by the run (attributes frame, frame_f_rot_hz of the modes group, on the Observation)
    assert res.final.frame in ("lab", "rotating")
    res.final.frame, res.final.frame_f_rot_hz = "rotating", 199.3e3
    fig = phonons_figure(res)
    assert "rotating frame, 199.3 kHz" in fig.get_suptitle() and "rotating frame, 199.3 kHz" in fig.get_supxlabel()
    res.final.frame = "lab"
    assert "lab frame" in phonons_figure(res).get_suptitle()
    # without the attributes (older files): at t = 0 the pinning stands still, so the modes are the lab frame's
    # (mdrotor.engine.observe.pinned_frame measures a pinned crystal in the pinning's frame)
    res = mdrotor.load(run)
    for o in [res.initial, *res.stages.values()]:
        o.frame = None
    assert "lab frame" in phonons_figure(res, stage="initial").get_suptitle()
    # free after release: the crystal's own rotation, its mean f_rot
    f = res.final.summary["f_rot_mean_hz"]
    want = f"rotating frame, {float(f'{f / 1e3:.4g}'):g} kHz"
    assert want in phonons_figure(res).get_suptitle()
    # the time series names the frames of its mode panel
    note = series_figure(res).axes[-1].get_title(loc="right").replace("\n", " ")
    assert "pinning's rotating frame" in note and f"'free': {want}" in note


# ---------------------------------------------------------------------------
# sweeps
# ---------------------------------------------------------------------------
def _table(keys_values: dict, metrics: dict, meta: dict):
    n = len(next(iter(keys_values.values()))[0])
    return {"index": np.arange(n), "seed": np.zeros(n, np.uint64), "complete": np.ones(n, np.uint8),
            "failed": np.zeros(n, np.uint8), "error": [""] * n,
            "axes": {k: {"text": list(txt), "si": np.asarray(si, float)} for k, (txt, si) in keys_values.items()},
            "metrics": metrics, "meta": meta}


def test_axis_scale_follows_the_spacing():
    # log-spaced values (a range with spacing = "log") are drawn on a log axis ...
    vals = np.geomspace(1e5, 4e5, 4)
    t = _table({"pinning.strength": ([f"{v:.6g} V/m^2" for v in vals], vals)},
               {"L_std_hbar": np.arange(4.0)}, {"kind": "sweep", "combine": "grid", "base_config_text": BASE})
    ax = sweep_figures(t, metrics="L_std_hbar")[0].axes[0]
    assert ax.get_xscale() == "log" and ax.get_xlabel() == "pinning c₂ (V/m²)"
    # ... evenly spaced ones on a linear axis, even over two decades
    vals = np.linspace(1e-6, 100e-6, 5)
    t = _table({"stage.spin-up.duration": ([f"{v * 1e6:.6g} us" for v in vals], vals)},
               {"L_std_hbar": np.arange(5.0)}, {"kind": "sweep", "combine": "grid"})
    assert sweep_figures(t, metrics="L_std_hbar")[0].axes[0].get_xscale() == "linear"
    # scattered points: the scale = "log" the file stores with the axis decides (the values are random)
    rng = np.random.default_rng(1)
    v = 5e4 * 10 ** rng.uniform(0, 1, 12)
    t = _table({"pinning.strength": ([f"{x:.6g} V/m^2" for x in v], v)}, {"L_std_hbar": v / 1e4},
               {"kind": "sweep", "combine": "sample", "scales": {"pinning.strength": "log"}, "base_config_text": BASE})
    fig = sweep_figures(t, metrics="L_std_hbar")[0]
    assert fig.axes[0].get_xscale() == "log"
    assert_readable(fig)


def test_log_heat_map_cells_at_their_values():
    d = [0.5e-3, 1e-3, 2e-3, 4e-3]
    shapes = ["linear", "cosine"]
    rows = [(i, j) for i in range(4) for j in range(2)]
    t = _table({"stage.spin-up.duration": ([f"{d[i] * 1e3:g} ms" for i, _ in rows], [d[i] for i, _ in rows]),
                "stage.spin-up.f_rot.shape": ([shapes[j] for _, j in rows], [np.nan] * len(rows))},
               {"slip_fraction": np.array([0.01 * (i + 1) for i, _ in rows]),
                "slip_fraction_lo": np.array([0.005 * (i + 1) for i, _ in rows]),
                "slip_fraction_hi": np.array([0.02 * (i + 1) for i, _ in rows])},
               {"kind": "sweep", "combine": "grid", "base_config_text": BASE})
    fig = sweep_figures(t, metrics="slip_fraction")[0]
    ax = fig.axes[0]
    assert ax.get_xscale() == "log" and np.allclose(ax.get_xticks(), [0.5, 1, 2, 4])
    assert " ".join(ax.get_ylabel().split()) == "'spin-up': $f_\\mathrm{rot}$ ramp shape"  # wrapped to the panel
    # each cell spans the geometric midpoints of its neighbours: centred on its value on the log axis
    xe = np.unique(ax.collections[0].get_coordinates()[..., 0])
    assert np.allclose(np.sqrt(xe[1:] * xe[:-1]), [0.5, 1, 2, 4])
    # the cells state the fraction's interval when the file stores one
    assert "0.01\n[0.005, 0.02]" in [x.get_text() for x in ax.texts]
    assert_readable(fig)


def test_fraction_error_bars_are_the_stored_interval():
    v = np.array([0.0, 0.1, 0.5])
    lo, hi = np.array([0.0, 0.05, 0.4]), np.array([0.02, 0.2, 0.6])
    t = _table({"initial.temperature": (["0.1 mK", "0.2 mK", "0.3 mK"], [1e-4, 2e-4, 3e-4])},
               {"slip_fraction": v, "slip_fraction_err": np.full(3, 0.3), "slip_fraction_lo": lo, "slip_fraction_hi": hi},
               {"kind": "sweep", "combine": "grid"})
    ax = sweep_figures(t, metrics="slip_fraction")[0].axes[0]
    seg = ax.containers[0].lines[2][0].get_segments()
    assert np.allclose([s[0, 1] for s in seg], lo) and np.allclose([s[1, 1] for s in seg], hi)


def test_zip_and_labels_on_a_run_sweep(tmp_path):
    out = _sweep(tmp_path, "zip", 'combine = "zip"\n[[axis]]\nkey = "stage.spin-up.f_rot.to"\n'
                                  'values = ["10 kHz", "20 kHz", "30 kHz"]\n[[axis]]\nkey = "stage.spin-up.duration"\n'
                                  'values = ["6 us", "10 us", "14 us"]\n')
    pages = sweep_figures(out, metrics="all")  # every column of the table, stage metrics too
    assert len(pages) > 3
    for fig in pages:
        assert_no_internal_names(fig)
    assert_readable(pages[0])
    assert_readable(pages[-1])
    peak = sweep_figures(out, metrics="pinning_peak.n2")[0].axes[0]
    assert peak.get_ylabel() == "peak pinning c₂ (V/m²)"
    ax = sweep_figures(out, metrics="L_mean_hbar")[0].axes[0]
    # the zipped axis' values stand under the first's
    assert [t.get_text() for t in ax.get_xticklabels()] == ["10\n6", "20\n10", "30\n14"]


def test_optimisation_history_is_readable(tmp_path):
    _toml(tmp_path, "base.toml", BASE)
    opt = _toml(tmp_path, "opt.toml", """
base = "base.toml"
trajectories = 2
seed = 5
[optimizer]
method = "nelder-mead"
budget = 5
[[parameter]]
key = "pinning.strength"
bounds = ["1e5 V/m^2", "4e5 V/m^2"]
scale = "log"
start = "2e5 V/m^2"
[[objective]]
metric = "L_std_hbar"
[confirm]
trajectories = 3
""")
    from mdrotor.studies.optimize import load_optimize, run_optimize

    out = tmp_path / "opt.h5"
    run_optimize(load_optimize(opt), out, workers=1)
    fig = optimize_figure(out)
    assert_readable(fig)
    par = fig.axes[1]
    assert par.get_yscale() == "log" and par.get_ylabel().startswith("pinning c₂")
    star = next(ln for ln in fig.axes[0].get_lines() if ln.get_label().startswith("best (#"))
    assert star.get_marker() == "*"
    for fig in sweep_figures(out):
        assert_readable(fig)


def test_quantum_figure_is_readable(tmp_path):
    # mdrotor quantum's P(L) figure, with and without the ensemble beside it
    from conftest import WEAK_PAIR

    cfg = mdrotor.load_config(_toml(tmp_path, "weak.toml", WEAK_PAIR), ["initial.occupations.libration=2"])
    d = mdrotor.quantum(cfg, trajectories=40)
    assert_readable(quantum_figure(d))
    assert_readable(quantum_figure(mdrotor.quantum(cfg, ensemble=False)))
