"""The ``run`` workflow: config -> plan -> initial states -> kernels -> Result."""

from __future__ import annotations

import datetime as _dt
import sys
import time
from dataclasses import dataclass
from pathlib import Path

import numpy as np

from mdrotor.analysis.laser import run_block
from mdrotor.analysis.micromotion import micromotion_report
from mdrotor.analysis.noise_rates import run_rates
from mdrotor.engine.executors import DASK_LOCK, DaskExecutor, dask_worker_threads
from mdrotor.engine.integrate import (
    RawRun,
    initial_states,
    integrate,
    laser_keys,
    make_plan,
    series_point,
    series_steps,
    warm_up,
)
from mdrotor.engine.noise import kernel_state, n_kernel_states
from mdrotor.engine.observe import listed_frame
from mdrotor.engine.preflight import preflight, preflight_group
from mdrotor.errors import InputError, PhysicsError
from mdrotor.numfmt import clean
from mdrotor.results.result import Result, observation_from_raw
from mdrotor.results.status import Status
from mdrotor.version import __version__

TWO_PI = 2.0 * np.pi
EXIT_NO_STATISTICS = 3
NO_STATISTICS = "none: no trajectory is finite and bound at the end"


def run(cfg, *, trajectories: int | None = None, seed: int | None = None, threads: int | None = None,
        chunk: int | None = None, progress: bool = False, order: np.ndarray | None = None,
        scheduler=None, split: int | None = None):
    """Monte-Carlo spin-up / release run.

    Parameters
    ----------
    cfg : mdrotor.config.parse.Config
    trajectories, seed, threads, chunk : optional overrides of ``[run]``.
    progress : bool
        Show a tqdm progress bar on stderr.
    order : array of int, optional
        Trajectory indices to run, in this order (default 0..T-1). Each
        trajectory's result depends only on (seed, index).
    scheduler : str or mdrotor.engine.executors.DaskExecutor, optional
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
    mdrotor.results.result.Result

    Raises
    ------
    mdrotor.errors.InputError
        Before any work, when the run's per-trajectory arrays would not fit
        in the memory available (:func:`resource_estimate`).
    """

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
        **({"config_dir": cfg.base_dir} if cfg.base_dir is not None else {}),
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
        attrs["series_interval_requested_s"] = clean(plan.series_interval_s)
        attrs["series_interval_steps"] = np.array([series_steps(plan, k) for k in range(len(sched.stages))], dtype=np.int64)
        attrs["series_interval_s"] = attrs["series_interval_steps"] * np.array(plan.stage_dt)
    grid = np.linspace(0.0, sched.duration_s, 1001)
    schedule = {"t_s": grid, "f_rot_hz": sched.f_rot_hz(grid), "theta_rad": sched.theta_rad(grid),
                "stage_bounds_s": bounds, "stage_names": [s.name for s in sched.stages]}
    if len(cfg.pinning):
        schedule["pinning_strength_si"] = np.stack([sched.pinning_scale(grid, p) * t.strength for p, t in enumerate(cfg.pinning)], axis=-1)
    series = _series_arrays(raw.series) if raw.series else None

    extra = {"preflight": preflight_group(pre)}
    if plan.rf:
        extra["micromotion"] = micromotion_report(plan, raw)
    if plan.noise is not None:
        rates = run_rates(plan, raw)
        if rates:
            extra["noise"] = rates
    if plan.lasers:
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

    pos, vel = initial_states(plan, seed, idx)
    phases = plan.rf_phases(seed, idx) if plan.rf else None
    compile_s = _warm_up(plan, pos, vel, seed, idx, phases)
    noise_state = kernel_state(plan.noise, seed, idx) if plan.noise is not None else None
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

    with DASK_LOCK:
        threads = dask_worker_threads()
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
    (:func:`mdrotor.engine.observe.listed_frame`)."""

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
    """The pinning core's preflight (:func:`mdrotor.engine.preflight.preflight`):
    refuse a spin-up the pinning does not hold unless ``run.force``."""

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

    if pos.shape[2] == 0:
        return 0.0
    ns = kernel_state(plan.noise, seed, idx[:1]) if plan.noise is not None else None
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
    mode's state and the normal numbers that start it, :meth:`mdrotor.physics.noise.
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
    if cfg.noise is not None and not cfg.noise.is_empty:
        noise = _F8 * (2 + 2 * n_kernel_states(cfg.noise))
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


    need = resource_estimate(cfg, n_traj)["file_bytes"]
    try:
        free = shutil.disk_usage(Path(out).parent).free
    except OSError:
        return
    if need > free:
        raise InputError(key, f"the result file of {n_traj} trajectories needs about {_gb(need)}, the folder "
                              f"{str(Path(out).parent)!r} has {_gb(free)} free; expected a folder with room for it", source)




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




















