"""The look of mdrotor's figures (used by every figure of :mod:`mdrotor.report`).

Made for a lab-log page and a black-and-white printer:

* widths of 16 cm (a full A4 text width) or 8 cm (half), heights to match;
* one ink colour for the main curve, then a palette whose members differ
  in lightness as well as hue; curve i takes colour i mod 7, marker i mod 9
  and line style i mod 4 (:func:`style`): 7, 9 and 4 have no common factor,
  so the first 252 curves of a panel all differ in their (colour, marker,
  line) triple, and two neighbours differ in all three, so that curves stay
  apart in grey and for colour-blind readers;
* stages shown as alternating light-grey and white bands, named at the top;
* axes open on top and right, ticks outward, a faint dotted grid on y;
* a sequential colour map of our own whose lightness rises monotonically
  (dark ink to pale sand), so heat maps print in grey.

Nothing here touches matplotlib's global state: :func:`context` returns an
``rc_context`` for use while a figure is built, and :func:`new_figure`
makes a free-standing Figure on the Agg canvas (no pyplot, no GUI).
"""

from __future__ import annotations

CM = 1.0 / 2.54  # inches per centimetre
FULL_W = 16.0 * CM
HALF_W = 8.0 * CM

INK = "#1c1c1c"
# lengths pairwise coprime (7, 9, 4): see style()
PALETTE = ("#1c1c1c", "#2b6a8f", "#b3562e", "#5f7f2a", "#7a4c92", "#8a8a8a", "#c39a2b")
MARKERS = ("o", "s", "^", "D", "v", "P", "X", "<", ">")
LINESTYLES = ("-", "--", "-.", ":")  # named styles only: Line2D reports a custom dash tuple as "--"
N_STYLES = len(PALETTE) * len(MARKERS) * len(LINESTYLES)  # 252 distinct triples
STAGE_FILL = ("#e9e9e9", "#ffffff")
ACCENT = "#b3562e"
MUTED = "#8a8a8a"

# dark ink-blue -> slate -> sage -> sand: lightness rises monotonically
_MAP_COLOURS = ("#14172b", "#2c3d63", "#3f6b84", "#6c9a8b", "#b3c48f", "#f2e9b8")


def rc() -> dict:
    """The rcParams of the style."""
    from cycler import cycler

    return {
        "font.family": "DejaVu Sans",
        "font.size": 8.0,
        "axes.titlesize": 8.5,
        "axes.titleweight": "bold",
        "axes.titlelocation": "left",
        "axes.labelsize": 8.0,
        "axes.linewidth": 0.7,
        "axes.edgecolor": INK,
        "axes.labelcolor": INK,
        "axes.spines.top": False,
        "axes.spines.right": False,
        "axes.grid": True,
        "axes.grid.axis": "y",
        "grid.linestyle": ":",
        "grid.linewidth": 0.6,
        "grid.color": "#b5b5b5",
        "axes.prop_cycle": cycler(color=[style(i)["color"] for i in range(28)])
        + cycler(linestyle=[style(i)["linestyle"] for i in range(28)]),
        "axes.formatter.use_mathtext": True,
        "axes.formatter.limits": (-4, 6),
        "xtick.direction": "out",
        "ytick.direction": "out",
        "xtick.labelsize": 7.5,
        "ytick.labelsize": 7.5,
        "xtick.major.size": 3.0,
        "ytick.major.size": 3.0,
        "xtick.color": INK,
        "ytick.color": INK,
        "lines.linewidth": 1.2,
        "lines.markersize": 4.0,
        "errorbar.capsize": 2.0,
        "legend.fontsize": 7.0,
        "legend.frameon": False,
        "legend.handlelength": 2.6,
        "figure.dpi": 100,
        "savefig.dpi": 150,
        "savefig.bbox": "tight",
        "savefig.pad_inches": 0.04,
        "mathtext.default": "regular",
        "svg.fonttype": "none",
        "pdf.fonttype": 42,
    }


def context():
    """``with context(): ...``: the style, for the duration of the block."""
    import matplotlib

    return matplotlib.rc_context(rc())


def new_figure(width_in: float = FULL_W, height_in: float = 3.0):
    """A Figure on the Agg canvas (no pyplot: nothing global, no window)."""
    from matplotlib.backends.backend_agg import FigureCanvasAgg
    from matplotlib.figure import Figure

    fig = Figure(figsize=(width_in, height_in), layout="constrained")
    FigureCanvasAgg(fig)
    return fig


def cmap():
    """The sequential colour map (lightness rising monotonically)."""
    from matplotlib.colors import LinearSegmentedColormap

    m = LinearSegmentedColormap.from_list("mdrotor_sand", list(_MAP_COLOURS), N=256)
    return m.with_extremes(bad="#ffffff")


def style(i: int) -> dict:
    """Colour, line style and marker of the i-th curve of a panel.

    Colour ``i mod 7``, marker ``i mod 9``, line ``i mod 4``: the three
    lengths have no common factor, so by the Chinese remainder theorem the
    triples of curves 0 .. N_STYLES - 1 (252) are all different, and any
    two consecutive curves differ in all three. A panel with more curves
    than that must group them (the figures draw at most a dozen and one
    band for the rest).
    """
    i = int(i)
    if not 0 <= i < N_STYLES:
        raise ValueError(f"curve index {i} outside 0..{N_STYLES - 1}: group the curves")
    return {"color": PALETTE[i % len(PALETTE)], "linestyle": LINESTYLES[i % len(LINESTYLES)],
            "marker": MARKERS[i % len(MARKERS)]}


def luminance(rgba) -> float:
    """Relative luminance of a colour (sRGB, ITU-R BT.709 weights), to pick
    black or white text on a heat-map cell (common practice, no source)."""
    r, g, b = rgba[:3]
    return 0.2126 * r + 0.7152 * g + 0.0722 * b


# ---------------------------------------------------------------------------
# layout checks: labels that do not collide, markers inside, legends off data
# ---------------------------------------------------------------------------
# Each check looks at the laid-out figure (constrained layout, ticks and
# legends placed) and takes one step per panel; finish() lays the figure out
# again after any step and stops when no check asks for another.

CAP_MARKERS = ("_", "|", 0, 1, 2, 3, 4, 5, 6, 7, 8, 9, 10, 11)  # error-bar caps and ticks: drawn along a line
LEGEND_PLACES = ("upper right", "upper left", "lower left", "lower right", "center right", "center left",
                 "upper center", "lower center")


def _draw(fig):
    """Lay the figure out (constrained layout, tick positions, legend
    placement) without rasterising it; the renderer for text extents."""
    fig.draw_without_rendering()
    return fig.canvas.get_renderer()


def _panels(fig):
    return [a for a in fig.axes if a.get_visible()]


def boxes_overlap(boxes, pad_px: float = 0.0) -> bool:
    """True when any two of the bounding boxes overlap (closer than ``pad_px``)."""
    for i in range(len(boxes)):
        a = boxes[i]
        for b in boxes[i + 1:]:
            if a.x0 < b.x1 + pad_px and b.x0 < a.x1 + pad_px and a.y0 < b.y1 + pad_px and b.y0 < a.y1 + pad_px:
                return True
    return False


def tick_label_boxes(ax, which: str, renderer, minor: bool = False) -> list:
    """Window extents of the shown, non-empty tick labels of one axis."""
    axis = ax.xaxis if which == "x" else ax.yaxis
    return [t.get_window_extent(renderer) for t in axis.get_ticklabels(minor=minor)
            if t.get_visible() and t.get_text().strip()]


def _thin(ax, which: str, keep_every: int) -> None:
    """Fewer tick labels: every k-th of a fixed list, or fewer automatic ticks."""
    from matplotlib.ticker import FixedFormatter, LogLocator, MaxNLocator

    axis = ax.xaxis if which == "x" else ax.yaxis
    fmt, loc = axis.get_major_formatter(), axis.get_major_locator()
    if isinstance(fmt, FixedFormatter):
        ticks = list(axis.get_majorticklocs())
        if not hasattr(axis, "_mdrotor_texts"):
            axis._mdrotor_texts = list(fmt.seq)  # the full list, so that thinning again starts from it
        full = axis._mdrotor_texts
        axis.set_ticks(ticks, [t if i % keep_every == 0 else "" for i, t in enumerate(full[:len(ticks)])])
        return
    if not hasattr(axis, "_mdrotor_n0"):
        axis._mdrotor_n0 = len(axis.get_majorticklocs())  # the count before thinning
    n = max(2, axis._mdrotor_n0 // keep_every)
    if isinstance(loc, MaxNLocator):
        loc.set_params(nbins=n)
    elif isinstance(loc, LogLocator):
        axis.set_major_locator(LogLocator(numticks=n))
    else:
        axis.set_major_locator(MaxNLocator(nbins=n))


def _tick_step(ax, which: str, renderer, state: dict) -> bool:
    """One step towards tick labels clear of each other on one axis: drop
    minor-tick labels, turn x labels by 30 then 90 degrees, then keep every
    2nd, 3rd ... label (or ask the locator for fewer ticks)."""
    from matplotlib.ticker import NullFormatter

    axis = ax.xaxis if which == "x" else ax.yaxis
    minor = tick_label_boxes(ax, which, renderer, minor=True)
    if minor and boxes_overlap(minor + tick_label_boxes(ax, which, renderer)):
        axis.set_minor_formatter(NullFormatter())
        return True
    if not boxes_overlap(tick_label_boxes(ax, which, renderer)):
        return False
    k = state.get((id(ax), which), 0)
    state[(id(ax), which)] = k + 1
    steps = ([30, 90] if which == "x" else []) + [("thin", j) for j in range(2, 60)]
    if k >= len(steps):
        return False
    step = steps[k]
    if isinstance(step, tuple):
        _thin(ax, which, step[1])
    else:  # "xtick": the label's end sits under its tick whatever the angle
        ax.tick_params(axis="x", labelrotation=step, labelrotation_mode="xtick")
    return True


def _every(ev, n: int):
    """Indices of the points that carry a marker (``Line2D.markevery``)."""
    import numpy as np

    if isinstance(ev, (int, np.integer)) and not isinstance(ev, bool):
        return np.arange(0, n, max(1, int(ev)))
    if isinstance(ev, tuple) and len(ev) == 2 and all(isinstance(v, (int, np.integer)) for v in ev):
        return np.arange(int(ev[0]), n, max(1, int(ev[1])))
    return np.arange(n)  # other forms: every point (the safe side for the checks)


def marker_points(ax, caps: bool = False):
    """[(x_px, y_px, radius_px)] of every marker drawn in data coordinates
    (lines and error-bar markers) on a laid-out figure; error-bar caps only
    with ``caps``."""
    import numpy as np

    out = []
    dpi = ax.figure.dpi
    for ln in ax.get_lines():
        m = ln.get_marker()
        if not ln.get_visible() or m in (None, "None", "none", "", " ") or ln.get_markersize() <= 0:
            continue
        if (not caps and m in CAP_MARKERS) or ln.get_transform() != ax.transData:
            continue
        x, y = (np.asarray(v, dtype=float).ravel() for v in ln.get_data())
        if x.size == 0:
            continue
        ev = ln.get_markevery()
        if ev is not None:
            idx = _every(ev, x.size)
            x, y = x[idx], y[idx]
        ok = np.isfinite(x) & np.isfinite(y)
        if not np.any(ok):
            continue
        px = ax.transData.transform(np.column_stack([x[ok], y[ok]]))
        rad = 0.5 * (ln.get_markersize() + ln.get_markeredgewidth()) * dpi / 72.0
        out += [(float(a), float(b), rad) for a, b in px]
    return out


def _marker_step(ax) -> bool:
    """Widen the view limits of one panel so that no marker whose centre is
    in view is cut by the panel's edge (a best point at the lowest
    objective, a time series' last point)."""
    if not ax.get_navigate():  # colour bars
        return False
    box = ax.bbox
    pts = [p for p in marker_points(ax) if box.x0 - 0.5 <= p[0] <= box.x1 + 0.5 and box.y0 - 0.5 <= p[1] <= box.y1 + 0.5]
    if not pts:
        return False
    pad = 1.5  # pixels between a marker and the spine
    left = max(box.x0 + r + pad - x for x, _, r in pts)
    right = max(x + r + pad - box.x1 for x, _, r in pts)
    bottom = max(box.y0 + r + pad - y for _, y, r in pts)
    top = max(y + r + pad - box.y1 for _, y, r in pts)
    changed = False
    inv = ax.transData.inverted()
    if max(left, right) > 0.5:
        a = inv.transform([[box.x0 - max(left, 0.0), box.y0]])[0][0]
        b = inv.transform([[box.x1 + max(right, 0.0), box.y0]])[0][0]
        ax.set_xlim(a, b) if ax.get_xlim()[0] <= ax.get_xlim()[1] else ax.set_xlim(b, a)
        changed = True
    if max(bottom, top) > 0.5:
        a = inv.transform([[box.x0, box.y0 - max(bottom, 0.0)]])[0][1]
        b = inv.transform([[box.x0, box.y1 + max(top, 0.0)]])[0][1]
        ax.set_ylim(a, b) if ax.get_ylim()[0] <= ax.get_ylim()[1] else ax.set_ylim(b, a)
        changed = True
    return changed


def data_points_px(ax):
    """(n, 2) display coordinates of the data drawn in data coordinates:
    line vertices (curves, markers, error-bar caps) and scatter offsets."""
    import numpy as np

    pts = []
    for ln in ax.get_lines():
        if not ln.get_visible() or ln.get_transform() != ax.transData:
            continue
        x, y = (np.asarray(v, dtype=float).ravel() for v in ln.get_data())
        ok = np.isfinite(x) & np.isfinite(y)
        if np.any(ok):
            pts.append(ax.transData.transform(np.column_stack([x[ok], y[ok]])))
    for c in ax.collections:
        if c.__class__.__name__ == "PathCollection" and c.get_visible():
            off = np.asarray(c.get_offsets(), dtype=float)
            if off.size:
                pts.append(ax.transData.transform(off))
    return np.vstack(pts) if pts else np.zeros((0, 2))


def legend_covers_data(ax, renderer) -> bool:
    """True when the panel's legend box lies over a drawn data point."""
    import numpy as np

    leg = ax.get_legend()
    if leg is None or not leg.get_visible():
        return False
    bb = leg.get_window_extent(renderer)
    p = data_points_px(ax)
    return bool(np.any((p[:, 0] >= bb.x0) & (p[:, 0] <= bb.x1) & (p[:, 1] >= bb.y0) & (p[:, 1] <= bb.y1)))


def _legend_step(ax, renderer, state: dict) -> bool:
    """Move a legend that lies over data to the next free-looking corner of
    its panel; after the last, outside the panel to the right."""
    if not legend_covers_data(ax, renderer):
        return False
    leg = ax.get_legend()
    k = state.get((id(ax), "legend"), 0)
    state[(id(ax), "legend")] = k + 1
    if k < len(LEGEND_PLACES):
        leg.set_loc(LEGEND_PLACES[k])
        return True
    if k == len(LEGEND_PLACES):
        leg.set_loc("upper left")
        leg.set_bbox_to_anchor((1.01, 1.0), transform=ax.transAxes)
        return True
    return False


def wrap_text(text: str, width: int) -> str:
    """Wrap to ``width`` visible characters a line; a mathtext piece
    ($f_\\mathrm{rot}$) counts as the letters it shows and is never split."""
    import re
    import textwrap

    pieces = re.findall(r"\$[^$]*\$", text)
    for i, p in enumerate(pieces):
        shown = max(1, len(re.sub(r"\\[a-zA-Z]+|[{}_^$ ]", "", p)))
        text = text.replace(p, chr(0xE000 + i) * shown, 1)
    out = "\n".join(textwrap.wrap(text, width, break_long_words=False)) or text
    for i, p in enumerate(pieces):
        out = re.sub(chr(0xE000 + i) + "+", lambda _m, p=p: p, out, count=1)
    return out


def _narrower(t) -> bool:
    """Re-wrap a text to 80 % of its longest line (at least 10 characters)."""
    import re

    lines = t.get_text().split("\n")
    shown = [len(re.sub(r"\$[^$]*\$", lambda m: "x" * max(1, len(re.sub(r"\\[a-zA-Z]+|[{}_^$ ]", "", m.group(0)))), x))
             for x in lines]
    width = int(max(shown) * 0.8)
    if width < 10:
        return False
    new = wrap_text(" ".join(t.get_text().split()), width)
    if new == t.get_text():
        return False
    t.set_text(new)
    return True


def _label_step(fig, renderer) -> bool:
    """Re-wrap axis titles of neighbouring panels that run into each other
    (side-by-side panels with long x titles)."""
    labels = [ax.xaxis.label for ax in _panels(fig) if ax.xaxis.label.get_text()]
    labels += [ax.yaxis.label for ax in _panels(fig) if ax.yaxis.label.get_text()]
    boxes = [t.get_window_extent(renderer) for t in labels]
    changed = False
    for i in range(len(labels)):
        for j in range(i + 1, len(labels)):
            if boxes_overlap([boxes[i], boxes[j]]):
                changed |= _narrower(labels[i]) | _narrower(labels[j])
    return changed


def _title_step(ax, renderer) -> bool:
    """Re-wrap a panel's right-hand title to fewer characters a line while
    it runs into the left-hand one."""
    left, right = ax._left_title, ax._right_title
    if not (left.get_text() and right.get_text()):
        return False
    if not boxes_overlap([left.get_window_extent(renderer), right.get_window_extent(renderer)]):
        return False
    return _narrower(right)


def finish(fig, max_rounds: int = 24):
    """The layout checks every figure goes through before it is returned:
    markers inside their panels, tick labels clear of each other, legends
    off the data, a panel's two titles apart, axis titles of neighbouring
    panels apart. Each round lays the figure out once and lets every check
    take one step on every panel; it ends when none asks for another."""
    state: dict = {}
    for _ in range(max_rounds):
        r = _draw(fig)
        changed = False
        for ax in _panels(fig):
            changed |= _marker_step(ax)
            changed |= _tick_step(ax, "x", r, state)
            changed |= _tick_step(ax, "y", r, state)
            changed |= _legend_step(ax, r, state)
            changed |= _title_step(ax, r)
        changed |= _label_step(fig, r)
        if not changed:
            break
    return fig
