"""The sweep / optimisation file as a table: the ``/axes`` and ``/summary``
groups written with every entry, reading them back (:func:`read_table`,
:func:`read_point`), CSV export, and the output path checked before any
work. Layout: docs/studies.md; entries and resuming: :mod:`mdrotor.studies.store`.
"""

from __future__ import annotations

import csv
from pathlib import Path

import numpy as np

from mdrotor.errors import InputError
from mdrotor.inputfiles import open_hdf5
from mdrotor.results.store import check_writable
from mdrotor.studies.points import point_name
from mdrotor.studies.store import read_result_group
from mdrotor.studies.values import show, si_value


def str_dtype():
    import h5py

    return h5py.string_dtype()


def table_columns(entries) -> list:
    """Metric columns in a stable order: first seen, entry by entry."""
    cols: dict = {}
    for name in sorted(entries):
        for k in entries[name].row:
            cols.setdefault(k, None)
    return list(cols)


def write_axis(axes, j: int, key: str, values, log: bool = False) -> object:
    """Group ``/axes/<key>`` of axis (parameter) ``j``: its config values
    as written (``text``) and their SI magnitudes (``si``), one per row,
    and the scale the study file declares (attribute ``scale``: ``log`` for
    ``scale = "log"`` or ``spacing = "log"``, else ``linear``); returns the group."""
    g = axes.create_group(key.replace("/", "|"))
    g.attrs["index"] = j
    g.attrs["key"] = key
    g.attrs["scale"] = "log" if log else "linear"
    g.create_dataset("text", data=np.array([show(v) for v in values], dtype=object), dtype=str_dtype())
    g.create_dataset("si", data=np.array([si_value(v) for v in values]))
    return g


def write_summary(f, n: int, names: list, entries: dict, seeds) -> None:
    """The ``/summary`` table: one row per point (``names[i]``), NaN where
    not finished."""
    s = f.create_group("summary")
    s.create_dataset("index", data=np.arange(n, dtype=np.int64))
    s.create_dataset("seed", data=np.asarray(seeds, dtype=np.uint64))
    s.create_dataset("complete", data=np.array([nm in entries for nm in names], dtype=np.uint8))
    s.create_dataset("failed", data=np.array([nm in entries and entries[nm].failed for nm in names], dtype=np.uint8))
    s.create_dataset("error", data=np.array([entries[nm].error if nm in entries else "" for nm in names], dtype=object),
                     dtype=str_dtype())
    done = {nm: entries[nm] for nm in names if nm in entries}
    cols = table_columns(done)
    s.attrs["metrics"] = cols
    for c in cols:
        col = np.full(n, np.nan)
        for i, nm in enumerate(names):
            if nm in done:
                col[i] = done[nm].row.get(c, np.nan)
        s.create_dataset(c.replace("/", "|"), data=col)


def read_table(path) -> dict:
    """The summary table of a sweep or optimisation file.

    Returns ``{"index", "seed", "complete", "failed", "error": arrays,
    "axes": {key: {"text": [...], "si": array}}, "metrics": {name: array}}``
    (for an optimisation the axes are its parameters, one row per evaluation).
    """

    src = str(path)
    with open_hdf5(path, "an mdrotor sweep or optimisation file (.h5)") as f:
        if "summary" not in f or "kind" not in f.attrs:
            raise InputError("", "not an mdrotor sweep or optimisation file", src)
        s = f["summary"]
        out = {"index": _column(f, "summary/index", src)}
        n = len(out["index"])
        out.update({k: _column(f, f"summary/{k}", src, n) for k in ("seed", "complete", "failed")})
        out["error"] = [x.decode() if isinstance(x, bytes) else str(x) for x in _column(f, "summary/error", src, n)]
        out["axes"] = {}
        if "axes" in f:
            for gname in sorted(f["axes"], key=lambda k: int(f["axes"][k].attrs.get("index", 0))):
                g = f["axes"][gname]
                out["axes"][str(g.attrs.get("key", gname))] = {
                    "text": [x.decode() if isinstance(x, bytes) else str(x) for x in _column(f, f"axes/{gname}/text", src, n)],
                    "si": _column(f, f"axes/{gname}/si", src, n)}
        out["metrics"] = {str(c): _column(f, "summary/" + str(c).replace("/", "|"), src, n) for c in s.attrs.get("metrics", [])}
    return out


def _column(f, path: str, src: str, n: int | None = None):
    """A one-row-per-entry dataset of the table, refused naming it when it
    is missing or its length differs (a damaged file, or another layout)."""
    import h5py

    d = f.get(path)
    if not isinstance(d, h5py.Dataset) or d.ndim != 1 or (n is not None and d.shape[0] != n):
        what = "missing" if d is None else "not one value per row"
        raise InputError(f"/{path}", f"{what} in this sweep or optimisation file (damaged, or written in another "
                                     f"layout); expected the table of docs/studies.md", src)
    return d[()]


def read_point(path, index) -> object:
    """The full :class:`~mdrotor.results.result.Result` of point (or evaluation)
    ``index`` of a sweep / optimisation file; ``index = "confirm"`` gives an
    optimisation's confirmation run."""
    import h5py

    name = index if isinstance(index, str) else point_name(int(index))
    with h5py.File(path, "r") as f:
        if name not in f or not bool(f[name].attrs.get("complete", False)):
            raise InputError(name, "no finished entry of that name in this file", str(path))
        if str(f[name].attrs.get("error", "")):
            raise InputError(name, f"this run failed: {f[name].attrs['error']}", str(path))
        return read_result_group(f[name])


def export_csv(path, csv_path) -> int:
    """Write the summary table of a sweep / optimisation file as CSV (one
    row per point, axis values as written and in SI, then every metric;
    an empty cell where there is no value).
    Returns the number of rows."""
    t = read_table(path)
    n = len(t["index"])
    header = ["index", "seed", "status"]
    cols = []
    for key, ax in t["axes"].items():
        header += [key, f"{key} [SI]"]
        cols += [ax["text"], ax["si"]]
    header += list(t["metrics"])
    cols += list(t["metrics"].values())
    with open(csv_path, "w", newline="") as fh:
        w = csv.writer(fh)
        w.writerow(header)
        for i in range(n):
            status = "failed" if t["failed"][i] else ("done" if t["complete"][i] else "pending")
            row = [int(t["index"][i]), int(t["seed"][i]), status]
            for c in cols:
                v = c[i]
                if isinstance(v, (float, np.floating)):  # no value (NaN): an empty cell, as CSV readers expect
                    v = "" if np.isnan(v) else repr(float(v))
                row.append(v)
            w.writerow(row)
    return n


def output_path(given, spec_path, suffix=".h5") -> Path:
    """The output file, refused before any work when its folder is missing
    or cannot be written (:func:`mdrotor.results.store.check_writable`)."""

    out = Path(given) if given else Path(Path(spec_path).stem + suffix)
    check_writable(out)
    return out
