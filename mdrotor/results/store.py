"""HDF5 storage of results (h5py). The layout is documented in docs/results.md.

Files are written to a temporary name in the target folder and renamed when
complete, so an interrupted run never leaves a half file under the final
name. ``FORMAT_VERSION`` changes whenever the layout does.
"""

from __future__ import annotations

import os
from pathlib import Path

import numpy as np

from mdrotor.errors import InputError
from mdrotor.inputfiles import open_hdf5
from mdrotor.results.result import ARRAYS, Observation, Result
from mdrotor.results.stats import FRACTION_INTERVAL
from mdrotor.version import __version__

FORMAT_VERSION = 2  # 2: fraction intervals (_lo, _hi, _count), n_trajectories, mode frames, no NaN statistics
# root attributes that every reader of a result relies on (the summary text, the rotor analysis, the report)
REQUIRED_ATTRS = ("config_text", "seed", "dt_s", "n_steps", "n_trajectories", "integrator", "wall_s", "threads")


def _write_obs(g, obs: Observation) -> None:
    g.attrs["t_s"] = obs.t_s
    g.attrs["name"] = obs.name
    for k, v in obs.arrays.items():
        g.create_dataset(k, data=v)
    _write_modes(g.create_group("modes"), obs)
    sg = g.create_group("summary")
    _write_summary(sg, obs.summary)


def _write_modes(mg, obs: Observation) -> None:
    """Mode metadata, and the frame of the frequencies as attributes
    ``frame`` ("lab" or "rotating") and ``frame_f_rot_hz``."""
    mg.create_dataset("freq_hz", data=obs.modes["freq_hz"])
    for k in ("label", "kind", "plane"):
        mg.create_dataset(k, data=np.array(obs.modes[k], dtype=object), dtype=_str_dtype())
    if obs.frame is not None:
        mg.attrs["frame"] = obs.frame
        mg.attrs["frame_f_rot_hz"] = float(obs.frame_f_rot_hz)


def _write_summary(g, summary: dict) -> None:
    g.attrs["fraction_interval"] = FRACTION_INTERVAL
    for k, v in summary.items():
        if v is None:
            continue
        if isinstance(v, np.ndarray):
            g.create_dataset(k, data=v)
        else:
            g.attrs[k] = v


def check_writable(path, key: str = "-o", source: str = "command line") -> None:
    """Refuse, before any work, an output that cannot be written: create
    the temporary file that :func:`save_result` would write, then remove it."""

    path = Path(path)
    folder = path.parent
    if not folder.is_dir():
        raise InputError(key, f"the folder {str(folder)!r} does not exist", source)
    if path.is_dir():
        raise InputError(key, f"{str(path)!r} is a folder; expected a file name such as result.h5", source)
    tmp = path.with_name(f".{path.name}.tmp{os.getpid()}")
    try:
        with open(tmp, "wb"):
            pass
    except OSError as e:
        raise InputError(key, f"cannot write into the folder {str(folder)!r} ({e.strerror}); expected a writable folder", source) from None
    finally:
        try:
            tmp.unlink()
        except OSError:
            pass


def _str_dtype():
    import h5py

    return h5py.string_dtype()


def save_result(res: Result, path) -> None:
    import h5py

    path = Path(path)
    tmp = path.with_name(f".{path.name}.tmp{os.getpid()}")
    try:
        with h5py.File(tmp, "w") as f:
            f.attrs["format_version"] = FORMAT_VERSION
            for k, v in res.attrs.items():
                f.attrs[k] = v
            if res.initial is not None:
                _write_obs(f.create_group("initial"), res.initial)
            st = f.create_group("stages")
            for name, obs in res.stages.items():
                _write_obs(st.create_group(name), obs)
            fin = res.final
            g = f.create_group("final")
            g.attrs["stage"] = fin.name
            g.attrs["t_s"] = fin.t_s
            for k, v in fin.arrays.items():
                g.create_dataset(k, data=v)
            _write_modes(f.create_group("modes"), fin)
            sg = f.create_group("summary")
            _write_summary(sg, fin.summary)
            if res.series:
                se = f.create_group("series")
                for k, v in res.series.items():
                    if k in ("stage", "mode_labels"):
                        se.create_dataset(k, data=np.array(v, dtype=object), dtype=_str_dtype())
                    else:
                        se.create_dataset(k, data=np.asarray(v))
            if res.schedule:
                sc = f.create_group("schedule")
                for k, v in res.schedule.items():
                    if k == "stage_names":
                        sc.create_dataset(k, data=np.array(v, dtype=object), dtype=_str_dtype())
                    else:
                        sc.create_dataset(k, data=np.asarray(v))
            for gname, content in res.extra.items():
                eg = f.create_group(gname)
                for k, v in content.items():
                    if isinstance(v, dict):
                        for kk, vv in v.items():
                            eg.attrs[f"{k}.{kk}"] = vv
                    elif np.ndim(v) == 0 and not isinstance(v, np.ndarray):
                        eg.attrs[k] = v
                    elif isinstance(v, (list, tuple)) and all(isinstance(x, str) for x in v):
                        eg.create_dataset(k, data=np.array(v, dtype=object), dtype=_str_dtype())
                    else:
                        eg.create_dataset(k, data=np.asarray(v))
        os.replace(tmp, path)
    finally:
        if tmp.exists():
            tmp.unlink()


def need(g, name: str):
    """``g[name]``, refused naming the HDF5 path and the file when it is
    missing (a damaged file, or one written in another layout), instead of
    h5py's KeyError."""
    if name not in g:
        raise InputError(f"{g.name.rstrip('/')}/{name}", "missing from this file (damaged, or written in another layout); "
                                                         "expected a result laid out as docs/results.md", g.file.filename)
    return g[name]


def _need_attr(g, name: str):
    """``g.attrs[name]``, refused as :func:`need` does."""
    if name not in g.attrs:
        raise InputError(f"{g.name} (attribute {name})", "missing from this file (damaged, or written in another layout); "
                                                        "expected a result laid out as docs/results.md", g.file.filename)
    return g.attrs[name]


def need_root_attrs(g) -> None:
    """Refuse a result (file root or a study's point group) without an
    attribute of ``REQUIRED_ATTRS``, naming it."""
    for k in REQUIRED_ATTRS:
        _need_attr(g, k)


def read_observation(g) -> Observation:
    for k in ARRAYS:  # every observation is written with all of them
        need(g, k)
    arrays = {k: g[k][()] for k in g if k not in ("modes", "summary")}
    mg = need(g, "modes")
    modes = {"freq_hz": need(mg, "freq_hz")[()]}
    for k in ("label", "kind", "plane"):
        modes[k] = [x.decode() if isinstance(x, bytes) else str(x) for x in need(mg, k)[()]]
    frame = mg.attrs.get("frame")
    frame = (frame.decode() if isinstance(frame, bytes) else str(frame)) if frame is not None else None
    return Observation(str(_need_attr(g, "name")), float(_need_attr(g, "t_s")), arrays, modes, _read_summary(need(g, "summary")),
                       frame, float(mg.attrs.get("frame_f_rot_hz", 0.0)))


def _read_summary(g) -> dict:
    out = {k: (v.item() if hasattr(v, "item") else v) for k, v in g.attrs.items() if k != "fraction_interval"}
    for k in g:
        out[k] = g[k][()]
    return out


def load_result(path) -> Result:
    """Read a result file written by :func:`save_result`."""

    with open_hdf5(path, "an mdrotor result file (.h5, written by mdrotor run)") as f:
        if "format_version" not in f.attrs or "stages" not in f:
            raise InputError("", "not an mdrotor result file (no format_version or /stages)", str(path))
        need_root_attrs(f)
        attrs = {k: (v.item() if hasattr(v, "item") and np.ndim(v) == 0 else v) for k, v in f.attrs.items()}
        initial = read_observation(f["initial"]) if "initial" in f else None
        order = list(attrs.get("stage_names", list(f["stages"].keys())))
        stages = {str(n): read_observation(need(f["stages"], str(n))) for n in order}
        series = None
        if "series" in f:
            series = {}
            for k in f["series"]:
                v = f["series"][k][()]
                if v.dtype == object:
                    v = [x.decode() if isinstance(x, bytes) else str(x) for x in v]
                series[k] = v
        schedule = None
        if "schedule" in f:
            schedule = {}
            for k in f["schedule"]:
                v = f["schedule"][k][()]
                if v.dtype == object:
                    v = [x.decode() if isinstance(x, bytes) else str(x) for x in v]
                schedule[k] = v
        extra = {}
        for gname in f:
            if gname in ("initial", "stages", "final", "modes", "summary", "series", "schedule"):
                continue
            g = f[gname]
            content = {k: (v.item() if hasattr(v, "item") and np.ndim(v) == 0 else v) for k, v in g.attrs.items()}
            for k in g:
                v = g[k][()]
                if getattr(v, "dtype", None) == object:
                    v = [x.decode() if isinstance(x, bytes) else str(x) for x in v]
                content[k] = v
            extra[gname] = content
    return Result(attrs, initial, stages, series, schedule, extra)


# ---------------------------------------------------------------------------
# quantum-rotor results (mdrotor quantum -o OUT.h5)
# ---------------------------------------------------------------------------
QUANTUM_FORMAT_VERSION = 1
QUANTUM_KIND = "quantum"


def _write_tree(g, d: dict) -> None:
    """A JSON-like dict into an HDF5 group: numbers, strings and booleans as
    attributes, lists of numbers or strings as datasets, dicts as groups,
    lists of dicts as groups named 0, 1, ... (attribute ``list``); None is
    left out (absent means null)."""
    for k, v in d.items():
        if v is None:
            continue
        if isinstance(v, dict):
            _write_tree(g.create_group(k), v)
        elif isinstance(v, (list, tuple)) and v and all(isinstance(x, dict) for x in v):
            lg = g.create_group(k)
            lg.attrs["list"] = True
            for i, x in enumerate(v):
                _write_tree(lg.create_group(str(i)), x)
        elif isinstance(v, (list, tuple, np.ndarray)):
            if len(v) and all(isinstance(x, str) for x in v):
                g.create_dataset(k, data=np.array(v, dtype=object), dtype=_str_dtype())
            else:
                g.create_dataset(k, data=np.asarray(v, dtype=np.int64 if v and all(
                    isinstance(x, (int, np.integer)) and not isinstance(x, bool) for x in v) else float))
        else:
            g.attrs[k] = v


def _read_tree(g) -> dict:
    def value(v):
        if isinstance(v, bytes):
            return v.decode()
        if isinstance(v, np.ndarray):
            if v.dtype == object:
                return [x.decode() if isinstance(x, bytes) else str(x) for x in v]
            return v.tolist()
        return v.item() if hasattr(v, "item") else v

    out = {k: value(v) for k, v in g.attrs.items() if k != "list"}
    for k in g:
        item = g[k]
        if hasattr(item, "keys"):
            if item.attrs.get("list", False):
                out[k] = [_read_tree(item[str(i)]) for i in range(len(item))]
            else:
                out[k] = _read_tree(item)
        else:
            out[k] = value(item[()])
    return out


def save_quantum(report: dict, path, config_text: str) -> None:
    """Write ``mdrotor quantum``'s result (the dict of
    :func:`mdrotor.studies.quantum.quantum_report`) to HDF5: temporary file
    and rename. Layout in the README: root attributes (``kind`` =
    "quantum", format and package versions, the config text, the scalar
    fields: ladder, symmetry, verdict, ...), ``/stages/<name>`` per stage
    end in order (``stage_names``) with ``L`` and ``P`` and, with an
    ensemble, ``/stages/<name>/ensemble`` (histogram on the ladder,
    distances, verdict), ``/lines``, ``/numerics``, ``/pinning``, ``/noise``."""
    import datetime as _dt

    import h5py


    path = Path(path)
    tmp = path.with_name(f".{path.name}.tmp{os.getpid()}")
    d = dict(report)
    stages = d.pop("stages")
    try:
        with h5py.File(tmp, "w") as f:
            f.attrs["kind"] = QUANTUM_KIND
            f.attrs["format_version"] = QUANTUM_FORMAT_VERSION
            f.attrs["package_version"] = __version__
            f.attrs["created"] = _dt.datetime.now(_dt.timezone.utc).isoformat(timespec="seconds")
            f.attrs["config_text"] = config_text
            f.attrs["stage_names"] = np.array([s["name"] for s in stages], dtype=object)
            st = f.create_group("stages")
            for s in stages:
                _write_tree(st.create_group(s["name"]), s)
            _write_tree(f, d)
        os.replace(tmp, path)
    finally:
        if tmp.exists():
            tmp.unlink()


def load_quantum(path) -> dict:
    """Read a file written by :func:`save_quantum` back into the report dict
    (absent entries as None where the report has them), with
    ``config_text``, ``package_version``, ``format_version`` and ``created``."""

    with open_hdf5(path, "an mdrotor quantum-rotor file (.h5, written by mdrotor quantum -o)") as f:
        kind = f.attrs.get("kind")
        kind = kind.decode() if isinstance(kind, bytes) else kind
        if kind != QUANTUM_KIND or "stages" not in f:
            raise InputError("", "not an mdrotor quantum-rotor file (kind attribute 'quantum' and /stages expected)",
                             str(path))
        d = _read_tree(f)
        names = d.pop("stage_names")
        d["stages"] = [d["stages"][n] for n in names]
    for k in ("lines", "verdict", "f_lib_hz", "f_lib_model_hz", "nbar_libration", "holding"):
        d.setdefault(k, None)
    return d
