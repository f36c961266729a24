"""What a figure reads: the kind of an mdrotor file, the error when it lacks a group, and matplotlib.

:func:`file_kind` tells a run result from a sweep, optimisation or
quantum-rotor file; a figure raises :class:`MissingData` when the file
lacks the optional group it needs. matplotlib (the optional extra
``mdrotor[plot]``) is imported only when a figure is drawn
(:func:`plotting`), so that importing the report's modules does not load
it; figures are drawn on the Agg canvas without pyplot.
"""

from __future__ import annotations

from pathlib import Path

from mdrotor.errors import InputError
from mdrotor.inputfiles import open_hdf5
from mdrotor.report import style as plotstyle

__all__ = ["MissingData", "file_kind", "plotting", "PLOT_EXTRA"]

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
