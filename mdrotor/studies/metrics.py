"""Metrics of a run: the flat row of scalar numbers a study stores per
point, their names, and the unit each name carries.

:func:`point_metrics` is the row of a Result (the summary of the final
stage and of every stage, mode occupations, run figures, schedule peaks);
:func:`known_metric` and :func:`metric_parser` say which names can occur
and in which unit a limit on them is read; :func:`err_name` finds a
metric's standard-error column.
"""

from __future__ import annotations

import numpy as np

from mdrotor import units
from mdrotor.results.stats import summarize

RUN_METRICS = ("duration_s", "I_kg_m2", "dt_s", "n_steps", "n_trajectories", "f_rot_peak_hz")


def point_metrics(res, cfg=None) -> dict:
    """Flat table row of a run: every scalar summary metric.

    Final stage: the summary numbers unprefixed (``L_std_hbar``,
    ``slip_fraction``, ``differential_n_mean`` ...) and one
    ``mode_n_mean.<label>`` / ``mode_n_err.<label>`` per mode (NaN: a mean
    without a usable trajectory, an error with fewer than two); every stage:
    ``stage.<name>.<metric>``; run: ``duration_s``, ``I_kg_m2`` (moment of
    inertia), ``dt_s``, ``n_steps``, ``n_trajectories``, ``wall_s``,
    ``preflight_margin`` (the smallest held / asked angular acceleration of the
    run's preflight, :func:`mdrotor.engine.preflight.preflight`; inf without a spin); with the
    config: ``f_rot_peak_hz`` and ``pinning_peak.<term>`` (largest strength
    in the schedule, SI V/m^n).
    """
    out: dict = {}

    def scalars(prefix, summ):
        for k, v in summ.items():
            if isinstance(v, (bool, np.bool_, int, float, np.integer, np.floating)):
                out[prefix + k] = float(v)

    summ = res.summary
    scalars("", summ)
    fin = res.final
    seen: dict = {}
    # the summary holds a mode's mean only with a usable trajectory and its error
    # only with two (mdrotor.results.stats.summarize): NaN where there is none
    labels = list(fin.modes["label"])
    nan = np.full(len(labels), np.nan)
    for lab, n, e in zip(labels, summ.get("mode_n_mean", nan), summ.get("mode_n_err", nan)):
        seen[lab] = seen.get(lab, 0) + 1
        name = lab if seen[lab] == 1 else f"{lab}#{seen[lab]}"
        out[f"mode_n_mean.{name}"] = float(n)
        out[f"mode_n_err.{name}"] = float(e)
    for sname, obs in res.stages.items():
        scalars(f"stage.{sname}.", obs.summary)
    a = res.attrs
    if res.schedule is not None and "stage_bounds_s" in res.schedule:
        out["duration_s"] = float(np.asarray(res.schedule["stage_bounds_s"])[-1])
    for k, name in (("moment_of_inertia_kg_m2", "I_kg_m2"), ("dt_s", "dt_s"), ("n_steps", "n_steps"),
                    ("n_trajectories", "n_trajectories"), ("wall_s", "wall_s"),
                    ("preflight_margin_min", "preflight_margin")):
        if k in a:
            out[name] = float(a[k])
    if cfg is not None and cfg.schedule is not None:
        out.update(schedule_peaks(cfg))
    return out


def schedule_peaks(cfg) -> dict:
    """Largest |f_rot| (Hz) and pinning strength per term (SI) of a config's
    schedule (the schedule's own peaks, :meth:`mdrotor.config.schedule.Schedule.max_f_rot_hz`)."""
    sched = cfg.schedule
    out = {"f_rot_peak_hz": max(abs(cfg.f_start_hz), sched.max_f_rot_hz())}
    for j, term in enumerate(cfg.pinning):
        out[f"pinning_peak.{term.name}"] = max(1.0, sched.peak_pinning_scale(j)) * abs(term.strength)
    return out


def summary_metric_names() -> list:
    """Names of the scalar summary metrics (from mdrotor.results.stats.summarize)."""

    obs = {"status": np.zeros(2, dtype=np.int64), "L_hbar": np.zeros(2), "f_rot_hz": np.zeros(2), "slips": np.zeros(2),
           "lost": np.zeros(2, bool), "reordered": np.zeros(2, bool), "nonfinite": np.zeros(2, bool), "mode_n": np.zeros((2, 1))}
    s = summarize(obs, ["differential"])
    return [k for k, v in s.items() if not isinstance(v, np.ndarray)]


def known_metric(metric: str, cfg) -> bool:
    """Whether a metric name can occur (mode labels are checked at the first run)."""
    names = set(summary_metric_names())
    if metric in names or metric in RUN_METRICS:
        return True
    if metric in {f"pinning_peak.{t.name}" for t in cfg.pinning}:
        return True
    if metric.startswith(("mode_n_mean.", "mode_n_err.")) and len(metric.split(".", 1)[1]) > 0:
        return True
    for st in cfg.schedule.stages:
        pre = f"stage.{st.name}."
        if metric.startswith(pre) and metric[len(pre):] in names:
            return True
    return False


def metric_parser(metric: str, cfg):
    """Parser of limits / targets for ``metric`` in the metric's own unit."""

    order = {f"pinning_peak.{t.name}": t.order for t in cfg.pinning}
    if metric in order:
        n = order[metric]
        return lambda v, k, s: units.parse(v, "custom", k, s, dimensionality=units.multipole_dimension(n),
                                           example=units.multipole_example(n))
    if metric == "I_kg_m2":
        return lambda v, k, s: units.parse(v, "custom", k, s, dimensionality="[mass]*[length]**2", example="1e-36 kg m^2")
    if metric.endswith("_hz"):
        return lambda v, k, s: units.parse(v, "frequency", k, s)
    if metric.endswith("_s"):
        return lambda v, k, s: units.parse(v, "time", k, s)
    return lambda v, k, s: units.parse(v, "dimensionless", k, s)


def err_name(metric: str, row: dict):
    """Name of the standard-error column of a metric, if there is one."""
    cands = [metric.replace("_mean", "_err", 1), metric + "_err"]
    for unit in ("_hbar", "_hz"):
        if metric.endswith(unit):
            cands.append(metric[: -len(unit)] + "_err" + unit)
    for c in cands:
        if c != metric and c in row:
            return c
    return None
