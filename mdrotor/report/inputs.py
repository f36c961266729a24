"""What a figure reads: the kind of an mdrotor file, the error when it lacks a group, and matplotlib.

:func:`file_kind` tells a run result from a sweep, optimisation or
quantum-rotor file; a figure raises :class:`MissingData` when the file
lacks the optional group it needs. matplotlib (the optional extra
``mdrotor[plot]``) is imported only when a figure is drawn
(:func:`plotting`), so that importing the report's modules does not load
it; figures are drawn on the Agg canvas without pyplot.
"""

from __future__ import annotations

import functools
from pathlib import Path

from mdrotor.config.parse import from_text
from mdrotor.errors import InputError, PhysicsError
from mdrotor.inputfiles import open_hdf5
from mdrotor.report import style as plotstyle

__all__ = ["MissingData", "file_kind", "plotting", "stored_config", "stored_names", "PLOT_EXTRA"]

PLOT_EXTRA = "pip install 'mdrotor[plot]' (or pip install matplotlib)"


class MissingData(InputError):
    """A figure needs data that the file does not hold (an optional group,
    or a quantity that cannot be derived from it). ``key`` names the group."""


def plotting():
    """The style module (:mod:`mdrotor.report.style`), once matplotlib is known to be installed."""
    try:
        import matplotlib  # noqa: F401
    except ImportError:
        raise InputError("", f"figures need matplotlib: {PLOT_EXTRA}", "mdrotor report") from None

    return plotstyle


@functools.lru_cache(maxsize=16)
def stored_config(text, base_dir=None):
    """The Config of a config text a file stores (``config_text``,
    ``base_config_text``), read back once by :func:`mdrotor.config.parse.from_text`
    (relative paths from ``base_dir``); None when it cannot be read back
    (damaged, from another version, a layout file moved): figures then fall
    back to plain labels."""
    if isinstance(text, bytes):
        text = text.decode()
    if not isinstance(text, str) or not text:
        return None
    try:
        return from_text(text, "<stored config>", base_dir)
    except (InputError, PhysicsError):
        return None


def stored_names(text, base_dir=None, stored_json=None) -> dict:
    """What the stages and pinning terms of a stored config are called
    (:meth:`mdrotor.config.parse.Config.names`): from the names a study file
    stores as parsed data (``stored_json``, the attribute ``base_config_names``),
    else from the config text read back (:func:`stored_config`), else none."""
    import json

    if stored_json:
        try:
            d = json.loads(stored_json)
            if isinstance(d, dict):
                return {"stages": [str(x) for x in d.get("stages", [])],
                        "pinning": [[str(n), int(o)] for n, o in d.get("pinning", [])]}
        except (TypeError, ValueError):
            pass
    cfg = stored_config(text, base_dir)
    return cfg.names() if cfg is not None else {"stages": [], "pinning": []}


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
