"""Sweep and optimisation figures.

:func:`sweep_figures` draws every metric versus each axis (line plots for
one axis, heat maps for two with a chosen slice of the others beyond,
scatter panels for sampled points and optimisations); :func:`optimize_figure` draws the
objective and parameters per evaluation and the best point. Both read the
files of :mod:`mdrotor.studies.sweep` and :mod:`mdrotor.studies.optimize`
(or a table dict of ``read_table``'s layout).
"""

from __future__ import annotations

import json
import math
from pathlib import Path

import numpy as np

from mdrotor.errors import InputError
from mdrotor.numfmt import compact
from mdrotor.report.inputs import MissingData, file_kind, plotting, stored_names
from mdrotor.report.labels import key_label, log_ticks, metric_label, metric_name, pretty_unit
from mdrotor.report.style import wrap_text
from mdrotor.studies.metrics import err_name
from mdrotor.studies.table import read_table
from mdrotor.studies.values import convert, quantity, si_value

__all__ = ["sweep_figures", "optimize_figure"]

DEFAULT_METRICS = ("L_mean_hbar", "L_std_hbar", "f_rot_mean_hz", "differential_n_mean", "com_n_mean",
                   "slip_fraction", "loss_fraction", "reorder_fraction", "nonfinite_fraction")
BOOKKEEPING = ("wall_s", "n_steps", "dt_s", "n_trajectories", "index")


def sweep_meta(path) -> dict:
    """The attributes of a sweep or optimisation file, the bounds and declared
    scales of its axes (``bounds``, ``scales``), the base config's stage and
    pinning-term names (``names``, :func:`mdrotor.report.inputs.stored_names`)
    and the confirmation's metrics."""
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
        meta["bounds"], meta["scales"] = {}, {}
        if "axes" in f:
            for g in f["axes"].values():
                if "scale" in g.attrs:
                    sc = g.attrs["scale"]
                    meta["scales"][str(g.attrs.get("key"))] = sc.decode() if isinstance(sc, bytes) else str(sc)
                if "bounds" in g.attrs:
                    meta["bounds"][str(g.attrs.get("key"))] = [x.decode() if isinstance(x, bytes) else str(x)
                                                               for x in g.attrs["bounds"]]
        if "confirm" in f and "metrics" in f["confirm"]:
            meta["confirm_metrics"] = {k: float(v) for k, v in f["confirm"]["metrics"].attrs.items()}
    meta["names"] = stored_names(meta.get("base_config_text"), None, meta.get("base_config_names"))
    return meta


def _table(src):
    """(table, meta) of a sweep / optimisation file, or of a table dict
    (``read_table`` layout, optionally with a ``"meta"`` entry laid out as
    :func:`sweep_meta` gives it: ``combine``, ``scales``, ``base_config_text`` ...)."""
    if isinstance(src, dict):
        meta = dict(src.get("meta", {}))
        if "names" not in meta:
            meta["names"] = stored_names(meta.get("base_config_text"), None, meta.get("base_config_names"))
        return src, meta

    p = Path(src)
    kind = file_kind(p)
    if kind == "run":
        raise InputError("", "a run result, not a sweep: use run_figures", str(p))
    t = read_table(p)
    meta = sweep_meta(p)
    meta["path"] = str(p)
    return t, meta


def _declared_log(meta: dict) -> set:
    """Keys whose axis the sweep or optimisation file declares logarithmic
    (``scale = "log"`` with bounds, a range with ``spacing = "log"``), as
    the study stored it with each axis (``/axes/<key>`` attribute ``scale``,
    :func:`mdrotor.studies.table.write_axis`). Files written before the
    attribute declare nothing: their log-spaced values still give a log axis."""
    return {k for k, s in (meta.get("scales") or {}).items() if s == "log"}


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
        self.name = key_label(key, meta)

    @property
    def label(self) -> str:
        if not self.numeric:
            return self.name
        return f"{self.name} ({pretty_unit(self.unit) if self.unit else 'number'})"

    def level_value(self, i: int) -> float:
        return float(self.values[self.texts.index(self.levels[i])])

    def level_text(self, i: int) -> str:
        """The i-th level as a tick label (numeric: its value in the axis unit)."""
        if not self.numeric:
            return self.levels[i]
        return compact(self.level_value(i), 6)

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


def _interval_names(m: str, cols) -> tuple:
    """(lo, hi) column names of a fraction's interval bounds, when stored."""
    lo, hi = f"{m}_lo", f"{m}_hi"
    return (lo, hi) if lo in cols and hi in cols else (None, None)


def _pick_metrics(t: dict, meta: dict, metrics, rows=None) -> tuple[list, list, list]:
    """(metrics to draw, metrics left out because identically zero, metrics
    left out because they have no value at any finished point ``rows``)."""
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
    out, zero, empty = [], [], []
    for m in dict.fromkeys(names):
        if m not in cols:
            continue
        v = np.asarray(cols[m], float)
        v = v if rows is None else v[rows]
        v = v[np.isfinite(v)]
        if not v.size:  # NaN at every finished point: an empty panel would have made-up axes
            empty.append(m)
        elif np.all(v == 0) and metrics in (None, "", "default"):
            zero.append(m)
        else:
            out.append(m)
    return out, zero, empty


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
        A sweep / optimisation file or a :func:`mdrotor.studies.table.read_table`
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
    ps = plotting()
    t, meta = _table(source)
    keys = list(t["axes"])
    if not keys:
        raise MissingData("/axes", "the file has no axes", meta.get("path"))
    rows = np.flatnonzero(np.asarray(t["complete"], bool) & ~np.asarray(t["failed"], bool))
    if rows.size == 0:
        raise MissingData("/summary", "no finished points yet", meta.get("path"))
    views = {k: _AxisView(k, t["axes"][k]["text"], t["axes"][k]["si"], meta) for k in keys}
    fixed_levels = _parse_fixed(fixed, views)  # checked whatever the figure, so that a mistyped key is not ignored
    pair = None
    if axes:
        pair = [a.strip() for a in (axes.split(",") if isinstance(axes, str) else axes)]
        if len(pair) != 2 or any(a not in views for a in pair) or pair[0] == pair[1]:
            raise InputError("--axes", f"expected two different axis keys of this sweep, from: {', '.join(keys)}",
                             meta.get("path"))
    names, zero, empty = _pick_metrics(t, meta, metrics, rows)
    no_value = f"no value at any point (not drawn): {'; '.join(metric_name(m, meta) for m in empty)}" if empty else ""
    if not names:
        raise MissingData("/summary", no_value or "no metric to draw (every default metric is zero)", meta.get("path"))
    combine = meta.get("combine", "optimize" if meta.get("kind") == "optimize" else "grid")
    varying = [k for k in keys if len(views[k].levels) > 1]
    foot = f"zero at every point (not drawn): {'; '.join(metric_name(m, meta) for m in zero)}" if zero else ""
    foot = "\n".join(x for x in (foot, no_value) if x)
    kind_title = "optimisation" if meta.get("kind") == "optimize" else "sweep"
    n_failed = int(np.sum(np.asarray(t["failed"], bool)))
    n_done = f"{rows.size} of {len(t['index'])} points finished" + (f", {n_failed} failed" if n_failed else "")
    if combine == "zip" or (combine == "grid" and len(varying) <= 1):
        key = next((k for k in (varying or keys) if views[k].numeric), (varying or keys)[0])
        others = [views[k] for k in keys if k != key] if combine == "zip" else []
        title = f"{kind_title}: metrics versus {views[key].name} ({n_done})"
        if others:
            title += "\n" + "; ".join(f"{o.name} varies with it" for o in others) + " (second row of tick labels)"
        return _line_pages(ps, t, meta, views[key], others, names, rows, per_page, title, foot)
    if combine == "grid":
        pair = pair or varying[:2]
        fx = {k: 0 for k in keys if k not in pair}
        fx.update(fixed_levels)
        for k in pair:
            fx.pop(k, None)
        return _heat_pages(ps, t, meta, views, pair, fx, names, rows, per_page,
                           f"{kind_title}: metrics over {views[pair[0]].name} and {views[pair[1]].name} ({n_done})", foot)
    return _scatter_pages(ps, t, meta, [views[k] for k in keys], names, rows, max(1, per_page // 2),
                          f"{kind_title}: metrics versus each parameter ({n_done})", foot)


def _footnote(fig, text):
    if text:
        fig.supxlabel(text, x=0.01, ha="left", fontsize=6.5, color="#555555", wrap=True)


def _set_axis(ax, view, which="x", others=()):
    """Scale, ticks and title of a sweep axis. ``others``: zipped axes whose
    values are written under the ticks (one line each)."""
    setter = ax.set_xscale if which == "x" else ax.set_yscale
    if view.numeric:
        if view.log:
            setter("log")
            log_ticks(ax.xaxis if which == "x" else ax.yaxis)
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
                lab, sc, _ = metric_label(m, meta)
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
    (ax.set_xlabel if which == "x" else ax.set_ylabel)(view.label if which == "x" else wrap_text(view.label, 30))
    return edges, centres


def _cell_text(Z, E, LO, HI, iy, ix, small):
    s = compact(Z[iy, ix], 3)
    if np.isfinite(LO[iy, ix]) and small:
        s += f"\n[{compact(LO[iy, ix], 2)}, {compact(HI[iy, ix], 2)}]"
    elif np.isfinite(E[iy, ix]) and small:
        s += f"\n±{compact(E[iy, ix], 2)}"
    return s


def _heat_pages(ps, t, meta, views, pair, fixed, names, rows, per_page, title, foot):
    vx, vy = views[pair[0]], views[pair[1]]
    sel = [r for r in rows if all(views[k].pos[r] == i for k, i in fixed.items())]
    slice_txt = ", ".join(f"{views[k].name} = {pretty_unit(views[k].levels[i]) if views[k].numeric else views[k].levels[i]}"
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
                lab, sc, _ = metric_label(m, meta)
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
                fin = Z[np.isfinite(Z)]
                if fin.size and fin.min() == fin.max():  # one value everywhere: a scale that means something
                    v = float(fin[0])
                    mesh.set_clim(*((0.0, sc) if m.endswith("_fraction") else (v, v + (abs(v) * 0.1 or 1.0))))
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
                lab, sc, _ = metric_label(m, meta)
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
    ps = plotting()
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
    if not np.any(done & np.isfinite(obj)):
        raise MissingData("/summary", "no evaluation has an objective (each failed, or a metric of the objective "
                                      "or a constraint had no value)", meta.get("path"))
    n_none = int(np.sum(np.asarray(t["complete"], bool) & ~np.isfinite(obj)))
    none_text = (f"{n_none} evaluation{'s' if n_none != 1 else ''} without an objective (a failed run, or a metric "
                 "without a value): not drawn") if n_none else ""
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
            err = confirm_error(meta, cm)
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
                log_ticks(ax.yaxis)
            if not vw.numeric:
                ax.set_yticks(range(len(vw.levels)), vw.levels)
            ax.set_ylabel(wrap_text(vw.name, 18) + f"\n({pretty_unit(vw.unit) if vw.unit else 'number'})", fontsize=6.5)
        axs[-1].set_xlabel("evaluation number")
        from matplotlib.ticker import MaxNLocator

        axs[-1].xaxis.set_major_locator(MaxNLocator(integer=True))
        foot = [x for x in (none_text, f"optimiser: {meta['message']}" if meta.get("message") else "") if x]
        if foot:
            _footnote(fig, "\n".join(foot))
        ps.finish(fig)
    return fig


def confirm_error(meta, cm):
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
