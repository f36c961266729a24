"""The look of mdrotor's figures (used by :mod:`mdrotor.report`).

Made for a lab-log page and a black-and-white printer:

* widths of 16 cm (a full A4 text width) or 8 cm (half), heights to match;
* one ink colour for the main curve, then a short palette whose members
  differ in lightness as well as hue, each paired with its own line style
  and marker, so that curves stay apart in grey;
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
PALETTE = ("#1c1c1c", "#2b6a8f", "#b3562e", "#5f7f2a", "#7a4c92", "#8a8a8a")
LINESTYLES = ("-", "--", "-.", ":", (0, (6, 1.5, 1, 1.5, 1, 1.5)), (0, (1, 1)))
MARKERS = ("o", "s", "^", "D", "v", "P")
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
        "axes.prop_cycle": cycler(color=list(PALETTE)) + cycler(linestyle=list(LINESTYLES)),
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
    """Colour, line style and marker of the i-th curve of a panel."""
    return {"color": PALETTE[i % len(PALETTE)], "linestyle": LINESTYLES[i % len(LINESTYLES)],
            "marker": MARKERS[i % len(MARKERS)]}


def luminance(rgba) -> float:
    """Relative luminance of a colour (sRGB, ITU-R BT.709 weights), to pick
    black or white text on a heat-map cell (common practice, no source)."""
    r, g, b = rgba[:3]
    return 0.2126 * r + 0.7152 * g + 0.0722 * b
