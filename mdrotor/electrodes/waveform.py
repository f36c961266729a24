"""Electrode voltages versus time for a run's whole schedule, for the lab.

Every dc channel follows

    V_e(t) = s_e + m(t) A_e cos(n (theta(t) + theta_0) - phi_e),

the rotating plan of :func:`mdrotor.electrodes.solve.solve_rotating`
(static s_e, amplitude A_e, phase phi_e), with theta(t) = 2 pi int_0^t
f_rot the schedule's exact pinning angle (``Schedule.theta_rad``), m(t) the
pinning multiplier of the schedule (``Schedule.pinning_scale``) and theta_0
the config's pinning angle. The samples are t_k = k / rate, k = 0, 1, ...,
up to the end of the schedule; rf electrodes are not part of the waveform
(they carry the rf drive and sit at dc ground).

Every sample is checked against its channel's limit: a sample with
|V| > L (1 + :data:`LIMIT_RTOL`) is an error that names the channel, its
electrodes, the time and the value (exit status 2 on the command line),
unless ``allow_over`` is set, in which case the file is written and the
excursions are reported. Files are written under a temporary name in the
target folder and renamed when complete, so a refused or interrupted export
leaves nothing behind.

Formats: CSV (comment lines starting with ``#`` carry the caution, the
sources and the formula; then a header ``t_s,<channel>,...`` and one row per
sample, volts) and HDF5 (datasets ``t_s``, ``voltages_v`` (samples x
channels), ``theta_rad``, ``f_rot_hz``, ``pinning_scale``; attributes
``channels``, ``electrodes`` (JSON), ``limits_v``, ``static_v``,
``amplitudes_v``, ``phases_rad``, ``order``, ``strength_si``,
``rate_hz``, ``caution``, ``layout``, ``config``, ``complete`` (written
last)).

Caution: voltages must stay within the trap's rated limits and the lab's
safety rules; check every waveform against them before it reaches an
amplifier.
"""

from __future__ import annotations

import json
import math
import os
from pathlib import Path

import numpy as np

from mdrotor.electrodes.solve import CAUTION
from mdrotor.errors import InputError

__all__ = ["waveform_voltages", "write_waveform", "LIMIT_RTOL", "MAX_VALUES"]

#: Relative tolerance of the limit check: the solver's own (its limits hold to
#: ~1e-9 relative), 15 nV on a 15 V limit, below any DAC step.
LIMIT_RTOL = 1e-9
#: Largest number of values (samples x channels) written in one file.
MAX_VALUES = 500_000_000
BLOCK = 65536
FORMATS = {".csv": "csv", ".h5": "hdf5", ".hdf5": "hdf5"}


def waveform_voltages(plan, schedule, t_s, *, angle_rad: float = 0.0, term: int = 0) -> np.ndarray:
    """Channel voltages (V) at times t_s (s), shape (len(t_s), n_channels)."""
    t = np.asarray(t_s, dtype=float)
    th = np.asarray(schedule.theta_rad(t), dtype=float) + angle_rad
    m = np.asarray(schedule.pinning_scale(t, term), dtype=float)
    return plan.static_v + m[:, None] * plan.amplitudes_v * np.cos(plan.order * th[:, None] - plan.phases_rad)


def _channel_where(layout, ch):
    """Key and names of the electrodes of channel index ch (for messages)."""
    name = layout.channels[ch]
    els = [e for e in layout.electrodes if e.channel == name]
    key = els[0].key if els and els[0].key else f"electrode '{els[0].name}'" if els else name
    return f"{key}.limit", ", ".join(e.name for e in els)


def write_waveform(path, layout, plan, cfg, rate_hz: float, *, allow_over: bool = False, term: int = 0) -> dict:
    """Write the schedule's electrode voltages to CSV or HDF5.

    Parameters
    ----------
    path : str or Path
        ``*.csv``, ``*.h5`` or ``*.hdf5``.
    layout : Layout
    plan : RotatingPlan
    cfg : mdrotor.config.parse.Config
        Run config with a schedule; its pinning term ``term`` gives the
        angle offset and the multiplier.
    rate_hz : float
        Sample rate, Hz (at least twice the fastest pattern frequency
        n max|f_rot|).
    allow_over : bool
        Write samples over a limit (and report them) instead of refusing.

    Returns
    -------
    dict
        ``path``, ``format``, ``n_samples``, ``rate_hz``, ``duration_s``,
        ``channels`` (name, limit, largest |V| and its time, samples over the
        limit), ``over_samples`` (total), ``samples_per_period`` (at the
        fastest rotation), ``caution``.

    Raises
    ------
    InputError
        Unknown format, no schedule, a rate below the Nyquist rate, too many
        values, or (without ``allow_over``) a sample over its limit.
    """
    path = Path(path)
    fmt = FORMATS.get(path.suffix.lower())
    if fmt is None:
        raise InputError("--waveform", f"expected a file name ending in .csv, .h5 or .hdf5, got {str(path)!r}", "command line")
    sch = cfg.schedule
    if sch is None:
        raise InputError("stage", "the waveform follows the run config's schedule; expected [[stage]] tables", cfg.source)
    if not (math.isfinite(rate_hz) and rate_hz > 0):
        raise InputError("--rate", f"expected a positive sample rate such as '10 MHz', got {rate_hz!r} Hz", "command line")
    f_max = sch.max_f_rot_hz()
    f_pat = plan.order * f_max
    if f_pat > 0 and rate_hz < 2.0 * f_pat:
        raise InputError("--rate", f"{rate_hz:.6g} Hz is below twice the fastest pattern frequency n f_rot = "
                                   f"{f_pat:.6g} Hz; expected at least {2 * f_pat:.6g} Hz (ten times that for a smooth waveform)",
                         "command line")
    T = sch.duration_s
    n_samples = int(math.floor(T * rate_hz * (1.0 + 1e-12))) + 1
    dc = list(layout.dc_channels)
    if n_samples * len(dc) > MAX_VALUES:
        raise InputError("--rate", f"{n_samples} samples x {len(dc)} channels exceed {MAX_VALUES:.0e} values; "
                                   f"expected a lower rate", "command line")
    angle = cfg.pinning[term].angle_rad if cfg.pinning else 0.0
    limits = plan.limits_v[dc]
    names = [layout.channels[i] for i in dc]
    vmax = np.zeros(len(dc))
    tmax = np.zeros(len(dc))
    over = np.zeros(len(dc), dtype=int)
    tmp = path.with_name(f".{path.name}.tmp{os.getpid()}")
    fh = h5 = None
    meta = {"caution": CAUTION, "layout": layout.source, "config": cfg.source, "order": plan.order,
            "strength_si": plan.strength_si, "rate_hz": rate_hz,
            "formula": f"V(t) = static + m(t) amplitude cos({plan.order} (theta(t) + theta0) - phase), "
                       f"theta(t) = 2 pi int f_rot dt, m(t) the pinning multiplier, theta0 = {angle!r} rad"}
    try:
        try:
            fh = open(tmp, "w", encoding="utf-8") if fmt == "csv" else None
        except OSError as e:
            raise InputError("--waveform", f"cannot write {str(path)!r} ({e.strerror}); expected a file in a writable "
                                           f"folder", "command line") from None
        if fmt == "csv":
            fh.write(f"# CAUTION: {CAUTION}\n")
            for k in ("layout", "config", "formula"):
                fh.write(f"# {k}: {meta[k]}\n")
            fh.write(f"# pinning order {plan.order}, strength {float(plan.strength_si)!r} V/m^{plan.order}; rate {float(rate_hz)!r} Hz; "
                     f"{n_samples} samples; voltages in V\n")
            fh.write("# limits_v: " + ", ".join(f"{nm}={lv:g}" for nm, lv in zip(names, limits)) + "\n")
            fh.write("# static_v, amplitude_v, phase_rad: " + ", ".join(
                f"{layout.channels[i]}=({float(plan.static_v[i])!r}, {float(plan.amplitudes_v[i])!r}, {float(plan.phases_rad[i])!r})"
                for i in dc) + "\n")
            rf = [layout.channels[i] for i in layout.rf_channels]
            if rf:
                fh.write(f"# rf channels (not in this file, dc ground): {', '.join(rf)}\n")
            fh.write("t_s," + ",".join(names) + "\n")
            h5 = None
        else:
            import h5py

            try:
                h5 = h5py.File(tmp, "w")
            except OSError as e:
                raise InputError("--waveform", f"cannot write {str(path)!r} ({e}); expected a file in a writable folder",
                                 "command line") from None
            ch = (min(BLOCK, n_samples),)
            d_t = h5.create_dataset("t_s", (n_samples,), dtype="f8", chunks=ch)
            d_v = h5.create_dataset("voltages_v", (n_samples, len(dc)), dtype="f8", chunks=(ch[0], len(dc)))
            d_th = h5.create_dataset("theta_rad", (n_samples,), dtype="f8", chunks=ch)
            d_f = h5.create_dataset("f_rot_hz", (n_samples,), dtype="f8", chunks=ch)
            d_m = h5.create_dataset("pinning_scale", (n_samples,), dtype="f8", chunks=ch)
            fh = None
        for s in range(0, n_samples, BLOCK):
            k = np.arange(s, min(n_samples, s + BLOCK))
            t = np.minimum(k / rate_hz, T)
            V = waveform_voltages(plan, sch, t, angle_rad=angle, term=term)[:, dc]
            a = np.abs(V)
            bad = a > limits * (1.0 + LIMIT_RTOL)
            if np.any(bad):
                if not allow_over:
                    r, c = np.argwhere(bad)[0]
                    key, els = _channel_where(layout, dc[c])
                    raise InputError(key, f"channel '{names[c]}' (electrodes {els}) reaches {V[r, c]:.6g} V at t = "
                                          f"{t[r] * 1e3:.9g} ms, above its limit of {limits[c]:.6g} V; expected every sample "
                                          f"within the limit (lower the pinning strength or its multiplier, or pass "
                                          f"--allow-over to write it anyway)", layout.source)
                over += bad.sum(axis=0)
            j = np.argmax(a, axis=0)
            better = a[j, np.arange(len(dc))] > vmax
            vmax = np.where(better, a[j, np.arange(len(dc))], vmax)
            tmax = np.where(better, t[j], tmax)
            if fh is not None:
                np.savetxt(fh, np.column_stack([t, V]), fmt=["%.12g"] + ["%.10g"] * len(dc), delimiter=",")
            else:
                sl = slice(int(k[0]), int(k[-1]) + 1)
                d_t[sl] = t
                d_v[sl] = V
                d_th[sl] = np.asarray(sch.theta_rad(t)) + angle
                d_f[sl] = sch.f_rot_hz(t)
                d_m[sl] = sch.pinning_scale(t, term)
        if h5 is not None:
            at = h5.attrs
            for k, v in meta.items():
                at[k] = v
            at["channels"] = np.array(names, dtype=object)
            at["electrodes"] = json.dumps({nm: [e.name for e in layout.electrodes if e.channel == nm] for nm in names})
            at["limits_v"] = limits
            at["static_v"] = plan.static_v[dc]
            at["amplitudes_v"] = plan.amplitudes_v[dc]
            at["phases_rad"] = plan.phases_rad[dc]
            at["over_limit_samples"] = int(over.sum())
            at["complete"] = 1
            h5.close()
            h5 = None
        else:
            fh.flush()
            os.fsync(fh.fileno())
            fh.close()
            fh = None
        os.replace(tmp, path)
    finally:
        if fh is not None:
            fh.close()
        if h5 is not None:
            h5.close()
        if tmp.exists():
            tmp.unlink()
    return {
        "path": str(path), "format": fmt, "n_samples": n_samples, "rate_hz": rate_hz, "duration_s": T,
        "samples_per_period": (rate_hz / f_pat) if f_pat > 0 else None,
        "channels": [{"name": nm, "limit_v": float(lv), "max_abs_v": float(vm), "t_max_s": float(tm), "over_samples": int(o)}
                     for nm, lv, vm, tm, o in zip(names, limits, vmax, tmax, over)],
        "over_samples": int(over.sum()), "caution": CAUTION,
    }
