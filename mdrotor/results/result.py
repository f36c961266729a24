"""Run results: per-trajectory observations, their statistics, provenance."""

from __future__ import annotations

from dataclasses import dataclass, field

import numpy as np

from mdrotor.numfmt import plain
from mdrotor.results.stats import summarize

ARRAYS = ("L_hbar", "L_com_hbar", "f_rot_hz", "mode_n", "status", "lag_rad", "slips")


@dataclass
class Observation:
    """Observables of every trajectory at one time (a stage end, or t = 0).

    ``arrays``: ``L_hbar``, ``L_com_hbar``, ``f_rot_hz`` (T,), ``mode_n``
    (T, modes), ``status`` (T,) bit flags (1 slipped, 2 lost ion, 4
    reordered, 8 non-finite), ``lag_rad`` (T,), ``slips`` (T,).
    ``modes``: ``freq_hz``, ``label``, ``kind``, ``plane`` of the modes the
    phonon numbers refer to. ``summary``: see :func:`mdrotor.results.stats.summarize`.
    ``frame``: the frame of those mode frequencies, ``"lab"`` or
    ``"rotating"`` (at ``frame_f_rot_hz``; while pinned the pinning's frame,
    when free the rate of the listed modes, each trajectory being measured
    in the frame of its own rate); ``None`` in files written before it was
    stored.
    """

    name: str
    t_s: float
    arrays: dict
    modes: dict
    summary: dict
    frame: str | None = None
    frame_f_rot_hz: float = 0.0

    def frame_text(self) -> str:
        """The frame of the mode table in words, e.g. "rotating frame, 199.3 kHz"."""

        if self.frame == "rotating":
            return f"rotating frame, {plain(self.frame_f_rot_hz / 1e3, 6)} kHz"
        if self.frame == "lab":
            return "lab frame"
        return "frame not recorded"


@dataclass
class Result:
    """A finished run. ``attrs`` holds the provenance (config text, version,
    seed, dt, steps, trajectories, creation time)."""

    attrs: dict
    initial: Observation | None
    stages: dict
    series: dict | None = None
    schedule: dict | None = None
    extra: dict = field(default_factory=dict)

    @property
    def final(self) -> Observation:
        return list(self.stages.values())[-1]

    @property
    def summary(self) -> dict:
        return self.final.summary



def observation_from_raw(name: str, t_s: float, obs: dict) -> Observation:
    modes = obs["_modes"]
    arrays = {k: np.asarray(obs[k]) for k in ARRAYS}
    meta = {"freq_hz": np.asarray(modes.freq_hz), "label": list(modes.labels), "kind": list(modes.kinds),
            "plane": list(modes.planes)}
    frame, f_frame = obs.get("_frame", (None, 0.0))
    return Observation(name, t_s, arrays, meta, summarize(obs, meta["kind"]), frame, float(f_frame))
