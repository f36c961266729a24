"""The ``run`` workflow: config -> plan -> initial states -> kernels -> Result."""

from __future__ import annotations

import datetime as _dt
import json
import sys
import time
from dataclasses import dataclass
from pathlib import Path

import numpy as np
from scipy.constants import k as KB

from . import __version__
from .numfmt import clean
from .observables import Status

TWO_PI = 2.0 * np.pi
EXIT_NO_STATISTICS = 3
NO_STATISTICS = "none: no trajectory is finite and bound at the end"


def run(cfg, *, trajectories: int | None = None, seed: int | None = None, threads: int | None = None,
        chunk: int | None = None, progress: bool = False, order: np.ndarray | None = None,
        scheduler=None, split: int | None = None):
    """Monte-Carlo spin-up / release run.

    Parameters
    ----------
    cfg : mdrotor.config.Config
    trajectories, seed, threads, chunk : optional overrides of ``[run]``.
    progress : bool
        Show a tqdm progress bar on stderr.
    order : array of int, optional
        Trajectory indices to run, in this order (default 0..T-1). Each
        trajectory's result depends only on (seed, index).
    scheduler : str or mdrotor.executors.DaskExecutor, optional
        Address of a running Dask scheduler (or an executor connected to
        one): the trajectories are integrated there in chunks of ``split``
        consecutive indices (:func:`run_chunk`) and merged in index order.
        The result is bit-identical to a local run of the same config and
        seed.
    split : int, optional
        Trajectories per chunk of a run spread over a cluster (default
        about four chunks per worker).

    Returns
    -------
    mdrotor.result.Result

    Raises
    ------
    mdrotor.errors.InputError
        Before any work, when the run's per-trajectory arrays would not fit
        in the memory available (:func:`resource_estimate`).
    """
    from .engine import make_plan
    from .result import Result, observation_from_raw

    opts = cfg.run
    n_traj = int(trajectories if trajectories is not None else opts.trajectories)
    seed = int(seed if seed is not None else opts.seed)
    traj_key = ("--trajectories", "command line") if trajectories is not None else ("run.trajectories", cfg.source)
    check_memory(cfg, n_traj, *traj_key)
    threads = threads if threads is not None else opts.threads
    _set_threads(threads)
    chunk = int(chunk if chunk is not None else opts.chunk)
    plan = make_plan(cfg)
    pre = _preflight(plan)
    if scheduler is not None:
        if order is not None:
            raise ValueError("a run spread over a cluster runs the trajectories in index order")
        raw, compile_s, n_workers = _run_split(cfg, plan, seed, n_traj, scheduler, split, chunk, progress)
    else:
        if chunk == 0:  # auto: about four work items per thread; results do not depend on it
            chunk = auto_chunk(n_traj, _get_threads())
        idx = np.arange(n_traj) if order is None else np.asarray(order)
        raw, compile_s = _integrate_indices(plan, seed, idx, chunk, progress)
        n_workers = 0
        if order is not None:  # back to index order
            inv = np.argsort(idx)
            for obs in [raw.initial, *raw.stages.values()]:
                for k, v in obs.items():
                    if isinstance(v, np.ndarray) and v.shape[:1] == (len(idx),):
                        obs[k] = v[inv]
    sched = cfg.schedule
    bounds = sched.boundaries_s
    stages = {name: observation_from_raw(name, float(bounds[i + 1]), obs)
              for i, (name, obs) in enumerate(raw.stages.items())}
    initial = observation_from_raw("initial", 0.0, raw.initial)
    attrs = {
        "package_version": __version__,
        "config_text": cfg.text,
        "config_source": cfg.source,
        "seed": np.uint64(seed),
        "dt_s": plan.dt_s,
        "n_steps": plan.n_steps,
        "n_trajectories": n_traj,
        "integrator": cfg.run.integrator,
        "stage_names": [s.name for s in sched.stages],
        "stage_steps": np.array(plan.stage_steps),
        "stage_dt_s": np.array(plan.stage_dt),
        "f_fast_hz": plan.f_fast_hz,
        "wall_s": raw.wall_s,
        "compile_s": compile_s,
        "threads": _get_threads(),
        "created": _dt.datetime.now(_dt.timezone.utc).isoformat(timespec="seconds"),
        "species": [s.name for s in cfg.species],
        "moment_of_inertia_kg_m2": plan.crystal0.moment_of_inertia_kg_m2,
        "lag_order": plan.lag_n,
        "status_bits": Status.describe(),
        "notes": "; ".join(plan.notes),
        "preflight_margin_min": pre["margin_min"],
        "preflight_warnings": "\n".join(pre["warnings"]),
    }
    if n_workers:  # spread over a Dask cluster: the parts' sizes (results do not depend on them)
        attrs["dask_workers"] = n_workers
        attrs["split_trajectories"] = int(raw.split)
    # the file is marked when no statistics could be made (the CLI exits 3)
    attrs["statistics"] = "ok" if stages[sched.stages[-1].name].summary["n_ok"] > 0 else NO_STATISTICS
    if raw.wall_s > 0:
        attrs["traj_steps_per_s"] = plan.n_steps * n_traj / raw.wall_s
    if plan.series_interval_s:
        from .engine import series_steps

        attrs["series_interval_requested_s"] = clean(plan.series_interval_s)
        attrs["series_interval_steps"] = np.array([series_steps(plan, k) for k in range(len(sched.stages))], dtype=np.int64)
        attrs["series_interval_s"] = attrs["series_interval_steps"] * np.array(plan.stage_dt)
    grid = np.linspace(0.0, sched.duration_s, 1001)
    schedule = {"t_s": grid, "f_rot_hz": sched.f_rot_hz(grid), "theta_rad": sched.theta_rad(grid),
                "stage_bounds_s": bounds, "stage_names": [s.name for s in sched.stages]}
    if len(cfg.pinning):
        schedule["pinning_strength_si"] = np.stack([sched.pinning_scale(grid, p) * t.strength for p, t in enumerate(cfg.pinning)], axis=-1)
    series = _series_arrays(raw.series) if raw.series else None
    from .pinning import preflight_group

    extra = {"preflight": preflight_group(pre)}
    if plan.rf:
        extra["micromotion"] = micromotion_report(plan, raw)
    if plan.noise is not None:
        from .noise import run_rates

        rates = run_rates(plan, raw)
        if rates:
            extra["noise"] = rates
    if plan.lasers:
        from .laser_report import run_block

        block = run_block(plan, raw)
        if block:
            extra["laser"] = block
    return Result(attrs, initial, stages, series, schedule, extra)


def auto_chunk(n_traj: int, threads: int) -> int:
    """The kernel's trajectories per work item: about four per thread (32 to
    256); results do not depend on it."""
    return int(np.clip(n_traj // (4 * threads), 32, 256))


def _integrate_indices(plan, seed: int, idx: np.ndarray, chunk: int, progress: bool, series_raw: bool = False):
    """Initial states and the whole schedule for trajectories ``idx`` (in
    this process): ``(RawRun, seconds spent compiling the kernels)``."""
    from .engine import initial_states, integrate, laser_keys

    pos, vel = initial_states(plan, seed, idx)
    phases = plan.rf_phases(seed, idx) if plan.rf else None
    compile_s = _warm_up(plan, pos, vel, seed, idx, phases)
    noise_state = plan.noise.kernel_state(seed, idx) if plan.noise is not None else None
    bar = None
    if progress:
        from tqdm import tqdm

        bar = tqdm(total=plan.n_steps * len(idx), unit="traj-step", unit_scale=True, file=sys.stderr,
                   desc="mdrotor run", leave=False)
    try:
        raw = integrate(plan, pos, vel, chunk=chunk, progress=bar, rf_phases=phases, noise_state=noise_state,
                        laser_keys=laser_keys(seed, idx) if plan.lasers else None, series_raw=series_raw)
    finally:
        if bar is not None:
            bar.close()
    return raw, compile_s


# ---------------------------------------------------------------------------
# one run in chunks of trajectories (a Dask cluster)
# ---------------------------------------------------------------------------
CHUNKS_PER_WORKER = 4
_PLANS: dict = {}  # a worker's plans, by config (each chunk of a run needs the same one)


@dataclass
class Chunk:
    """Trajectories ``start`` .. ``stop - 1`` of a run of ``cfg`` with ``seed``;
    ``kernel_chunk``: the kernel's work item (0: automatic)."""

    cfg: object
    seed: int
    start: int
    stop: int
    kernel_chunk: int = 0


def _plan_for(cfg):
    import hashlib
    import pickle

    from .engine import make_plan

    key = hashlib.sha256(pickle.dumps(cfg)).hexdigest()
    if key not in _PLANS:
        _PLANS.clear()  # one run at a time
        _PLANS[key] = make_plan(cfg)
    return _PLANS[key]


def run_chunk(task: Chunk) -> dict:
    """Integrate one chunk of a run (in whichever process or cluster worker
    it lands): the trajectories' own values at every observation and series
    point, without any statistic over them (those are taken once the chunks
    are merged, :func:`merge_chunks`). The worker's plan is made once per
    config and reused for its next chunks."""
    from .executors import _DASK_LOCK, _dask_worker_threads

    with _DASK_LOCK:
        threads = _dask_worker_threads()
        if threads is not None:
            _set_threads(threads)
        plan = _plan_for(task.cfg)
        idx = np.arange(task.start, task.stop)
        chunk = task.kernel_chunk or auto_chunk(len(idx), _get_threads())
        raw, compile_s = _integrate_indices(plan, task.seed, idx, chunk, False, series_raw=True)
    keep = lambda obs: {k: v for k, v in obs.items() if k not in ("_modes", "_frame")}  # noqa: E731
    return {"start": task.start, "stop": task.stop, "initial": keep(raw.initial),
            "stages": {k: keep(v) for k, v in raw.stages.items()}, "series": raw.series,
            "wall_s": raw.wall_s, "compile_s": compile_s}


def _merge_obs(plan, parts: list) -> dict:
    """One observation from its chunks (in index order): every per-trajectory
    array joined; the listed modes and their frame chosen on the whole
    (:func:`mdrotor.observables.listed_frame`)."""
    from .observables import listed_frame

    if not parts[0]:
        return {}
    out = {k: (np.concatenate([p[k] for p in parts]) if isinstance(v, np.ndarray) else v)
           for k, v in parts[0].items()}
    if "f_rot_hz" in out:
        out["_modes"], out["_frame"] = listed_frame(plan, out["_t_s"], out["f_rot_hz"], out["status"])
    return out


def merge_chunks(plan, parts: list, n_traj: int):
    """The RawRun of a whole run from its chunks' outputs (:func:`run_chunk`),
    in index order; refuses chunks that do not cover 0 .. n_traj - 1 once."""
    from .engine import RawRun, series_point

    parts = sorted(parts, key=lambda p: p["start"])
    if [p["start"] for p in parts] != [0] + [p["stop"] for p in parts[:-1]] or parts[-1]["stop"] != n_traj:
        raise RuntimeError("the chunks of a split run do not cover its trajectories exactly once")
    initial = _merge_obs(plan, [p["initial"] for p in parts])
    stages = {name: _merge_obs(plan, [p["stages"][name] for p in parts]) for name in parts[0]["stages"]}
    series = []
    for j, first in enumerate(parts[0]["series"]):
        vals = {k: (np.concatenate([p["series"][j][k] for p in parts]) if isinstance(v, np.ndarray) else v)
                for k, v in first.items()}
        series.append(series_point(vals))
    return RawRun(plan, initial, stages, series, 0.0, n_traj)


def split_ranges(n_traj: int, size: int) -> list:
    """Consecutive index ranges [start, stop) of at most ``size`` trajectories."""
    size = max(1, int(size))
    return [(a, min(a + size, n_traj)) for a in range(0, n_traj, size)]


def _run_split(cfg, plan, seed: int, n_traj: int, scheduler, split, kernel_chunk: int, progress: bool):
    """Spread the run's trajectories over a Dask cluster in chunks and merge
    them: ``(RawRun, largest compile time of a chunk, number of workers)``."""
    from .errors import InputError
    from .executors import DaskExecutor

    own = isinstance(scheduler, str)
    ex = DaskExecutor(scheduler) if own else scheduler
    try:
        workers = max(1, ex.workers)
        if split is not None and split < 1:
            raise InputError("--split", f"expected a positive number of trajectories per chunk, got {split}", "command line")
        size = int(split) if split else max(1, -(-n_traj // (CHUNKS_PER_WORKER * workers)))
        ranges = split_ranges(n_traj, size)
        tasks = [Chunk(cfg, seed, a, b, kernel_chunk) for a, b in ranges]
        bar = None
        if progress:
            from tqdm import tqdm

            bar = tqdm(total=n_traj, unit="traj", file=sys.stderr, desc=f"mdrotor run ({workers} Dask workers)", leave=False)
        t0 = time.perf_counter()
        parts = []
        try:
            for _, out in ex.map(run_chunk, tasks, [f"chunk-{a}-{b}" for a, b in ranges]):
                parts.append(out)
                if bar is not None:
                    bar.update(out["stop"] - out["start"])
        finally:
            if bar is not None:
                bar.close()
        wall = time.perf_counter() - t0
    finally:
        if own:
            ex.close()
    raw = merge_chunks(plan, parts, n_traj)
    raw.wall_s = wall
    raw.split = size
    return raw, max(p["compile_s"] for p in parts), workers


def _preflight(plan) -> dict:
    """The pinning core's preflight (:func:`mdrotor.pinning.preflight`):
    refuse a spin-up the pinning does not hold unless ``run.force``."""
    from .errors import PhysicsError
    from .pinning import preflight

    pre = preflight(plan)
    if pre["refusal"]:
        if not plan.cfg.run.force:
            raise PhysicsError(f"stage.{pre['refusal_stage']}", pre["refusal"] + " (run.force = true, or mdrotor run "
                               "--force, runs it anyway)", plan.cfg.source)
        pre["forced"] = True
        pre["warnings"].insert(0, "forced (run.force): " + pre["refusal"])
    return pre


def _warm_up(plan, pos, vel, seed, idx, phases) -> float:
    """Seconds to compile (or load from the cache) the run's kernels, spent
    on one step of a copy of the first trajectory before the timed loop."""
    from .engine import warm_up

    if pos.shape[2] == 0:
        return 0.0
    ns = plan.noise.kernel_state(seed, idx[:1]) if plan.noise is not None else None
    return warm_up(plan, pos, vel, phases, ns)


# bytes per trajectory of what a run holds in memory, per item (see resource_estimate)
_F8 = 8


def resource_estimate(cfg, n_traj: int) -> dict:
    """Memory and file size of a run of ``n_traj`` trajectories (bytes).

    Counted per trajectory, N ions and M <= 3 N modes, S stages:
    the state (positions and velocities, 6 N doubles); every observation kept
    (t = 0 and each stage end: L, L_com, f_rot, lag, slips, status and M
    phonon numbers, plus three flags); the temporary arrays of one
    observation (about 60 N doubles, 90 N in the RF model, where the state is
    also filtered over two RF periods, and 512 bytes of bookkeeping); with
    noise, the kernel's per-trajectory state (a key, each Ornstein-Uhlenbeck
    mode's state and the normal numbers that start it, :meth:`mdrotor.noise.
    NoiseModel.kernel_state`).
    The file holds the observations at t = 0, at every stage end and again
    under /final. The peaks measured with tracemalloc (docs/results.md, "Memory
    and file size") stay below this estimate by 0 to 40 %.
    """
    n = len(cfg.masses_kg)
    m = 3 * n
    s = len(cfg.schedule.stages) if cfg.schedule is not None else 1
    per_obs = _F8 * (6 + m) + 3
    temp = _F8 * (90 if cfg.trap.model == "rf" else 60) * n + 512
    noise = 0
    if cfg.noise:
        from .noise import model_from_config

        model = model_from_config(cfg)
        if not model.is_empty:
            noise = _F8 * (2 + 2 * model.n_kernel_states)
    mem = _F8 * 6 * n + (s + 1) * per_obs + temp + noise
    disk = (s + 2) * _F8 * (6 + m)
    return {"memory_per_trajectory_bytes": mem, "file_per_trajectory_bytes": disk,
            "memory_bytes": mem * n_traj, "file_bytes": disk * n_traj}


def _available_memory_bytes() -> int | None:
    """Memory this process may still take: MemAvailable of /proc/meminfo
    (Linux), else the physical memory; None when neither is known."""
    try:
        with open("/proc/meminfo") as fh:
            for line in fh:
                if line.startswith("MemAvailable:"):
                    return int(line.split()[1]) * 1024
    except OSError:
        pass
    try:
        import os

        return int(os.sysconf("SC_PAGE_SIZE") * os.sysconf("SC_PHYS_PAGES"))
    except (ValueError, OSError, AttributeError):
        return None


def _gb(b: float) -> str:
    return f"{b / 1e9:.3g} GB"


def check_memory(cfg, n_traj: int, key: str = "run.trajectories", source: str | None = None) -> None:
    """Refuse, before any work, a trajectory count whose arrays would not fit
    in the available memory (:func:`resource_estimate`)."""
    from .errors import InputError

    if n_traj < 1:
        raise InputError(key, f"expected a positive number of trajectories, got {n_traj}", source or cfg.source)
    est = resource_estimate(cfg, n_traj)
    avail = _available_memory_bytes()
    if avail is not None and est["memory_bytes"] > avail:
        fit = max(1, int(avail // est["memory_per_trajectory_bytes"]))
        raise InputError(key, f"{n_traj} trajectories need about {_gb(est['memory_bytes'])} of memory "
                              f"({est['memory_per_trajectory_bytes'] / 1e3:.3g} kB each), {_gb(avail)} is available; "
                              f"expected at most about {fit} trajectories per run (split the work with a sweep "
                              f"over run.seed, or more machines)", source or cfg.source)


def check_disk(cfg, n_traj: int, out, key: str = "-o", source: str = "command line") -> None:
    """Refuse, before any work, a result file larger than the free space of its folder."""
    import shutil

    from .errors import InputError

    need = resource_estimate(cfg, n_traj)["file_bytes"]
    try:
        free = shutil.disk_usage(Path(out).parent).free
    except OSError:
        return
    if need > free:
        raise InputError(key, f"the result file of {n_traj} trajectories needs about {_gb(need)}, the folder "
                              f"{str(Path(out).parent)!r} has {_gb(free)} free; expected a folder with room for it", source)


def micromotion_report(plan, raw) -> dict:
    """Intrinsic micromotion of the rotating crystal at the end of the run.

    Each ion at distance r_i from the RF null moves on the RF orbit with
    amplitude (q_i / 2) r_i per in-plane axis (lowest order, Leibfried et al.,
    Rev. Mod. Phys. 75, 281 (2003); for a stray-field displacement the same
    law is the excess micromotion of D.J. Berkeland et al., J. Appl. Phys.
    83, 5025 (1998)), so its time-averaged micromotion kinetic energy is
    m_i (q_i W r_i)^2 / 16 (x and y together). The measured value is the
    RF-period average of the kinetic energy minus that of the secular
    velocity, averaged over trajectories.
    """
    from .observables import usable
    from .stats import mean_sem

    fin = list(raw.stages.values())[-1]
    ok = usable(fin["status"])
    f_end = float(np.mean(fin["f_rot_hz"][ok])) if np.any(ok) else 0.0
    t_end = plan.schedule.duration_s
    cr = plan.crystal_at(t_end, f_end)
    q = plan.cfg.trap.q_per_ion(plan.masses, plan.charges)
    W = TWO_PI * plan.f_drive_hz
    r = cr.positions_m
    radius = np.hypot(r[:, 0], r[:, 1])
    ke = float(np.sum(plan.masses[:, None] * (q * W * r) ** 2 / 16.0))
    meas, err = mean_sem(fin["micromotion_ke_j"][ok])
    return {"amplitude_radial_m": 0.5 * np.abs(q[:, 0]) * radius, "amplitude_axial_m": 0.5 * np.abs(q[:, 2] * r[:, 2]),
            "radius_m": radius, "f_rot_hz": f_end,
            "ke_lowest_order_j": ke, "ke_measured_j": meas, "ke_measured_err_j": err}


def _series_arrays(points: list) -> dict:
    m = max(len(p["mode_n_mean"]) for p in points)
    e = np.full((len(points), m), np.nan)
    for i, p in enumerate(points):
        e[i, : len(p["mode_n_mean"])] = p["mode_n_mean"]
    out = {k: np.array([p[k] for p in points]) for k in ("t_s", "L_mean_hbar", "L_std_hbar", "lag_mean_rad", "lag_std_rad", "lag_absmax_rad")}
    out["mode_n_mean"] = e
    out["stage"] = [p["stage"] for p in points]
    out["mode_labels"] = [",".join(p["mode_labels"]) for p in points]  # the columns of each row
    return out


def _set_threads(threads) -> None:
    import numba

    if threads:
        numba.set_num_threads(max(1, min(int(threads), numba.config.NUMBA_NUM_THREADS)))


def _get_threads() -> int:
    import numba

    return int(numba.get_num_threads())


# ---------------------------------------------------------------------------
# command line
# ---------------------------------------------------------------------------
def jsonable(v):
    """A value ready for json.dumps: arrays as lists, numpy scalars as
    Python numbers, non-finite floats as null (JSON has no NaN)."""
    if isinstance(v, dict):
        return {str(k): jsonable(x) for k, x in v.items()}
    if isinstance(v, (list, tuple)):
        return [jsonable(x) for x in v]
    if isinstance(v, np.ndarray):
        return jsonable(v.tolist())
    if isinstance(v, (np.bool_, bool)):
        return bool(v)
    if isinstance(v, (np.integer, int)):
        return int(v)
    if isinstance(v, (np.floating, float)):
        return float(v) if np.isfinite(v) else None
    if isinstance(v, bytes):
        return v.decode()
    return v


def _modes_list(obs) -> list:
    s = obs.summary
    means = s.get("mode_n_mean")
    errs = s.get("mode_n_err")
    out = []
    for k, (lab, kind, f) in enumerate(zip(obs.modes["label"], obs.modes["kind"], obs.modes["freq_hz"])):
        d = {"label": lab, "kind": kind, "freq_hz": float(f)}
        if means is not None and np.isfinite(means[k]):
            d["n_mean"] = float(means[k])
        if errs is not None and np.isfinite(errs[k]):
            d["n_err"] = float(errs[k])
        out.append(d)
    return out


def _obs_dict(obs) -> dict:
    """Scalar summary of an observation, its modes and their frame."""
    d = {k: v for k, v in obs.summary.items() if not isinstance(v, np.ndarray)}
    d["t_s"] = obs.t_s
    d["modes_frame"] = obs.frame
    d["modes_frame_f_rot_hz"] = obs.frame_f_rot_hz
    d["modes"] = _modes_list(obs)
    return d


def summary_dict(res) -> dict:
    """JSON-ready summary of a Result: the final summary (only numbers that
    could be computed; ``n_ok`` of ``n_trajectories`` used), the fraction
    intervals' kind, the final modes with their frame, every stage, the run's
    provenance and speed (compilation apart), the noise rates and the RF
    micromotion when the run has them."""
    from .stats import FRACTION_INTERVAL

    fin = res.final
    out = _obs_dict(fin)
    out["fraction_interval"] = FRACTION_INTERVAL
    a = res.attrs
    for k in ("dt_s", "n_steps", "n_trajectories", "wall_s", "compile_s", "traj_steps_per_s", "integrator", "threads",
              "statistics", "series_interval_requested_s", "series_interval_s", "notes"):
        if k in a:
            out[k] = a[k]
    out["seed"] = int(a["seed"])
    pre = res.extra.get("preflight")
    if pre is not None:
        init = pre.get("initial") or {k[len("initial."):]: v for k, v in pre.items() if k.startswith("initial.")}
        out["preflight"] = {"margin_min": float(pre["margin_min"]), "initial": dict(init),
                            "warnings": [w for w in str(pre.get("warnings", "")).split("\n") if w],
                            "stages": [{"stage": s, "verdict": v, "margin": float(mg)} for s, v, mg in
                                       zip(pre.get("stage", []), pre.get("verdict", []), np.atleast_1d(pre.get("margin", [])))]}
    out["stages"] = {name: _obs_dict(o) for name, o in res.stages.items()}
    for name in ("noise", "micromotion", "laser"):
        if res.extra.get(name):
            out[name] = res.extra[name]
    return jsonable(out)


def _fractions_text(s: dict) -> str:
    from .numfmt import interval

    parts = []
    for name, word in (("slip", "slipped"), ("loss", "lost"), ("reorder", "reordered"), ("nonfinite", "non-finite")):
        if f"{name}_fraction" in s:
            parts.append(f"{word} {interval(s[f'{name}_fraction'], s[f'{name}_fraction_lo'], s[f'{name}_fraction_hi'])}")
    return ", ".join(parts)


def mode_table(obs, indent: str = "  ") -> list:
    """Text lines of an observation's mode table, its frame in the heading."""
    from .numfmt import MISSING, value_err

    s = obs.summary
    means, errs = s.get("mode_n_mean"), s.get("mode_n_err")
    lines = [f"{indent}modes ({obs.frame_text()}):",
             f"{indent}mode  label              kind          freq (kHz)   mean phonons"]
    for k, (lab, kind, f) in enumerate(zip(obs.modes["label"], obs.modes["kind"], obs.modes["freq_hz"])):
        n = value_err(means[k], errs[k] if errs is not None else None) if means is not None else MISSING
        lines.append(f"{indent}{k:4d}  {lab:<18s} {kind:<13s} {f / 1e3:10.4f}   {n}")
    return lines


def summary_text(res, path=None) -> str:
    from .numfmt import MISSING, plain, value_err

    s = res.summary
    a = res.attrs
    fin = res.final
    lines = []
    if path:
        lines.append(f"result: {path}")
    speed = (f", {plain(a['traj_steps_per_s'], 3)} trajectory-steps/s" if "traj_steps_per_s" in a else "")
    comp = f" (+ {plain(a['compile_s'], 3)} s kernel compilation or cache loading, not in the speed)" if "compile_s" in a else ""
    lines.append(f"{a['n_trajectories']} trajectories x {a['n_steps']} steps (dt = {plain(a['dt_s'] * 1e9, 4)} ns, {a['integrator']}), "
                 f"seed {int(a['seed'])}, wall {plain(a['wall_s'], 3)} s{comp}{speed} on {a['threads']} thread(s)")
    if "series_interval_s" in a:
        used = ", ".join(f"{plain(x * 1e6, 6)} us" for x in np.atleast_1d(a["series_interval_s"]))
        lines.append(f"time series every {plain(a['series_interval_requested_s'] * 1e6, 6)} us asked, rounded to whole steps: {used} (per stage)")
    pre = res.extra.get("preflight") or {}
    for w in [w for w in str(pre.get("warnings", "")).split("\n") if w]:
        lines.append(f"WARNING (preflight): {w}")
    lines.append("statistics of L, f_rot and phonons over the finite, bound trajectories; fractions of all trajectories "
                 "with Wilson 68 % intervals [lo, hi]")
    lines.append("")
    lines.append(f"  {'stage':<15s} {'t_end (ms)':>10s}  {'used':>11s}   {'L mean (hbar)':<20s} {'L spread (hbar)':<18s} "
                 f"{'slipped':<22s} diff. phonons")
    for name, o in res.stages.items():
        ss = o.summary
        used = f"{ss['n_ok']}/{ss['n_trajectories']}"
        slip = _fractions_text({k: v for k, v in ss.items() if k.startswith("slip_")}).replace("slipped ", "") or MISSING
        lines.append(f"  {name:<15s} {plain(o.t_s * 1e3, 4):>10s}  {used:>11s}   "
                     f"{value_err(ss.get('L_mean_hbar'), ss.get('L_mean_err_hbar')):<20s} "
                     f"{value_err(ss.get('L_std_hbar'), ss.get('L_std_err_hbar')):<18s} {slip:<22s} "
                     f"{value_err(ss.get('differential_n_mean'), ss.get('differential_n_err'))}")
    lines.append("")
    if s["n_ok"] == 0:
        lines.append(f"final ({fin.name}): no statistics: none of the {s['n_trajectories']} trajectories is finite and bound "
                     f"at the end (the result file is written and marked: attribute statistics)")
        lines.append(f"  {_fractions_text(s)}")
    else:
        f_rot = value_err(s["f_rot_mean_hz"] / 1e3, s.get("f_rot_mean_err_hz", float("nan")) / 1e3) if "f_rot_mean_hz" in s else MISSING
        lines.append(f"final ({fin.name}), {s['n_ok']} of {s['n_trajectories']} trajectories finite and bound: "
                     f"L = {value_err(s.get('L_mean_hbar'), s.get('L_mean_err_hbar'))} hbar, "
                     f"spread {value_err(s.get('L_std_hbar'), s.get('L_std_err_hbar'))} hbar, f_rot = {f_rot} kHz")
        lines.append(f"  {_fractions_text(s)}")
        lines.append("")
        lines += mode_table(fin)
        lines.append(f"  differential total {value_err(s.get('differential_n_mean'), s.get('differential_n_err'))}, "
                     f"COM total {value_err(s.get('com_n_mean'), s.get('com_n_err'))}")
    nz = res.extra.get("noise")
    if nz:
        lines += _noise_text(nz)
    if res.extra.get("laser"):
        from .laser_report import run_lines

        lines += run_lines(res.extra["laser"])
    mm = res.extra.get("micromotion")
    if mm:
        lines.append("")
        lines.append(f"RF micromotion at the end (crystal rotating at {plain(mm['f_rot_hz'] / 1e3, 4)} kHz), amplitude per ion:")
        for i, (ar, az, rad) in enumerate(zip(np.atleast_1d(mm["amplitude_radial_m"]), np.atleast_1d(mm["amplitude_axial_m"]),
                                              np.atleast_1d(mm["radius_m"]))):
            lines.append(f"  ion {i}: radial {ar * 1e9:8.2f} nm, axial {az * 1e9:8.2f} nm   (radius {rad * 1e6:.3f} um)")
        mk = 1e3 / KB
        lines.append(f"  time-averaged micromotion kinetic energy: {value_err(mm['ke_measured_j'] * mk, mm['ke_measured_err_j'] * mk)} mK k_B "
                     f"(lowest order {plain(mm['ke_lowest_order_j'] * mk, 4)} mK k_B)")
        lines.append("  phonons and L are measured on the secular motion (two RF-period averages; see docs/rf.md)")
    return "\n".join(lines)


def _fitted_rate(value, err, resolved=None) -> str:
    """A fitted rate with its error, or "not resolved (< bound at 2 sigma)"
    (:func:`mdrotor.noise.fit_resolved`, :func:`mdrotor.noise.fit_upper_bound`)."""
    from .noise import RESOLVED_SIGMA, fit_resolved, fit_upper_bound
    from .numfmt import value_err

    value, err = float(value), float(err)
    if resolved is None:
        resolved = fit_resolved(value, err)
    if not resolved:
        return f"not resolved (< {fit_upper_bound(value, err):.2g} at {RESOLVED_SIGMA:g} sigma)"
    return value_err(value, err)


def _noise_text(nz: dict) -> list:
    """Text lines of the run's noise rates (:func:`mdrotor.noise.run_rates`)."""
    from .numfmt import plain

    lines = ["", f"noise rates over stage '{nz['stage']}' ({plain(nz['t0_s'] * 1e3, 4)} to {plain(nz['t1_s'] * 1e3, 4)} ms, "
                 f"{nz['n_trajectories']} trajectories{', pinned' if nz['pinned'] else ', free rotation'}):"]
    orders = np.atleast_1d(nz.get("D_analytic_orders", [])).astype(int)
    d_inf = np.atleast_1d(nz.get("D_analytic_hbar2_per_s", []))
    d_win = np.atleast_1d(nz.get("D_window_hbar2_per_s", np.full(len(orders), np.nan)))
    zero = np.atleast_1d(nz.get("D_analytic_zero_by_symmetry", np.zeros(len(orders), dtype=bool))).astype(bool)
    win_total = float(np.sum(d_win[~zero])) if "D_window_total_hbar2_per_s" in nz else None
    if "D_fit_hbar2_per_s" in nz:
        line = (f"  L diffusion D (hbar^2/s): fitted "
                f"{_fitted_rate(nz['D_fit_hbar2_per_s'], nz['D_fit_err_hbar2_per_s'], nz.get('D_fit_resolved'))}")
        if win_total is not None:
            line += f"; expected over this window {plain(win_total, 4)}"
            if "D_fit_z" in nz:
                line += f" (z = {nz['D_fit_z']:.2f})"
        line += f"; infinite time {plain(float(np.sum(d_inf[~zero])), 4)} (rigid crystal at {plain(nz['f_rot_hz'] / 1e3, 4)} kHz)"
        lines.append(line)
    for o, d, dw, z0 in zip(orders, d_inf, d_win, zero):
        name = f"    order {o}{' (uniform field)' if o == 1 else ''}: "
        if z0:
            lines.append(name + "0 (zero by symmetry: the crystal has no such moment)")
        else:
            lines.append(name + f"{plain(d, 4)} hbar^2/s" + (f" (over this window {plain(dw, 4)})" if np.isfinite(dw) else ""))
    if "turchette_quanta_per_s" in nz:
        tq = np.atleast_1d(nz["turchette_quanta_per_s"])
        lines.append(f"  COM heating (Turchette) x, y, z: {plain(tq[0], 4)}, {plain(tq[1], 4)}, {plain(tq[2], 4)} quanta/s (lab-frame COM modes)")
    res_h = np.atleast_1d(nz.get("heating_fit_resolved", [None] * len(nz["heating_labels"])))
    for lab, r, e, ok in zip(nz["heating_labels"], np.atleast_1d(nz["heating_fit_quanta_per_s"]),
                             np.atleast_1d(nz["heating_fit_err_quanta_per_s"]), res_h):
        lines.append(f"  heating {lab:<16s} fitted {_fitted_rate(r, e, ok)} quanta/s")
    return lines


def cli_run(args) -> int:
    from .config import load_config
    from .errors import InputError
    from .store import check_writable

    ov = list(args.overrides) + (["run.force=true"] if getattr(args, "force", False) else [])
    cfg = load_config(args.config, ov)
    if args.trajectories is not None and args.trajectories < 1:
        raise InputError("--trajectories", "expected a positive number of trajectories", "command line")
    if getattr(args, "split", None) is not None and (args.split < 1 or not getattr(args, "scheduler", None)):
        raise InputError("--split", "expected a positive number of trajectories per chunk, with --scheduler", "command line")
    if args.seed is not None and not 0 <= args.seed < 2**64:
        raise InputError("--seed", "expected a seed in [0, 2^64)", "command line")
    out = Path(args.output) if args.output else Path(Path(args.config).stem + ".h5")
    check_writable(out)
    n_traj = args.trajectories if args.trajectories is not None else cfg.run.trajectories
    key = ("--trajectories", "command line") if args.trajectories is not None else ("run.trajectories", cfg.source)
    check_memory(cfg, n_traj, *key)
    check_disk(cfg, n_traj, out)
    show = not args.quiet and sys.stderr.isatty()
    t0 = time.perf_counter()
    scheduler = getattr(args, "scheduler", None)
    if scheduler:
        from .executors import DaskExecutor

        scheduler = DaskExecutor(scheduler)  # reached (or refused) before any work
    try:
        res = run(cfg, trajectories=args.trajectories, seed=args.seed, threads=args.threads, progress=show,
                  scheduler=scheduler, split=getattr(args, "split", None))
    finally:
        if scheduler:
            scheduler.close()
    if res.attrs.get("notes"):
        print(f"mdrotor: warning: {res.attrs['notes']}", file=sys.stderr)
    for w in str(res.attrs.get("preflight_warnings", "")).split("\n"):
        if w:
            print(f"mdrotor: warning: {w}", file=sys.stderr)
    res.save(out)
    if args.json:
        d = summary_dict(res)
        d["output"] = str(out)
        d["total_wall_s"] = time.perf_counter() - t0
        print(json.dumps(d))
    else:
        print(summary_text(res, out))
    if res.final.summary["n_ok"] == 0:
        print(f"mdrotor: no statistics: none of the {res.final.summary['n_trajectories']} trajectories is finite and bound "
              f"at the end; {out} is written and marked (attribute statistics)", file=sys.stderr)
        return EXIT_NO_STATISTICS
    return 0
