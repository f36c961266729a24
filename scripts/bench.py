#!/usr/bin/env python3
"""Performance figures of the mdrotor stepper (DESIGN.md section 8).

What is measured, all in one run:

1. Trajectory-steps per second per core of :func:`mdrotor.engine.kernels.advance`
   (pseudopotential trap, rotating multipole pinning on, velocity Verlet,
   one thread) for N = 2, 4, 8, 16 and 30 ions, with and without lag
   tracking, and the cost per ion pair and step for N >= 4, beside the
   limit estimated from a bare pair-force loop (the kernel's own pair loop
   on the same chunk-sized arrays, nothing else) and the same loop with
   1/r^3 from a float32 seed refined in double (no double square root or
   division).
2. The same on two threads, and the speed-up from one to two threads.
3. Two baselines on the same physics:
   (a) a straightforward numpy velocity-Verlet integrator vectorised over
       trajectories (checked against the kernel on a short run first);
   (b) scipy.integrate.solve_ivp (DOP853) on one trajectory at a time, at
       the tolerance that makes its error after 20 us about equal to the
       kernel's Verlet error at the default dt (both errors are measured
       against an order-4 kernel run with dt/8).
4. Peak memory of a whole run with 1e4 trajectories (subprocesses, so that
   ru_maxrss belongs to one run): it must not grow with the step count.
5. Whole-engine steps (schedule sampling, noise synthesis and kernel, as a
   run does them) for N = 2 with noise off and on (white field, white field
   plus quadrupole, 1/f), and for N = 2 and 4 with the full RF force.
5b. RF runs (``--rf-only`` for this alone): the demo with the full RF force
   against the pseudopotential (whole runs, CPU time, one thread), and the
   accuracy of L and phonon numbers for several steps per RF period against
   the exact propagator at T_RF / 128 (the study behind
   engine.RF_PROPAGATOR_STEPS).
6. The quantum rotor (``mdrotor quantum`` without the ensemble) on
   ``configs/quantum_pair.toml``: two 40Ca+ spun up to 200 kHz (L ~ 1e4
   hbar) and released, libration nbar = 3; process CPU time of building
   the model and propagating it, against one minute on one core.
7. The targets: met or missed, with the ratio.
8. The demo's first run in a fresh environment (``--first-run`` for this
   alone): ``mdrotor run configs/demo.toml`` in a subprocess with
   NUMBA_CACHE_DIR an empty temporary directory, so every kernel it needs
   is compiled, then the same with that cache filled; the wall time of each
   process beside the run's own compile_s and wall_s.
9. One run spread over a local Dask cluster of 2 single-threaded workers
   (``mdrotor run --scheduler``) against the same run on 2 threads in one
   process, and the overhead of one chunk (``--dask-only`` for this alone;
   skipped without the optional ``distributed``).

Usage::

    python scripts/bench.py                # full run, Markdown table on stdout
    python scripts/bench.py --quick        # smoke run (well under a minute)
    python scripts/bench.py --json --out bench.json
    python scripts/bench.py --quantum-only # the quantum rotor case alone (run it on one thread:
                                           # NUMBA_NUM_THREADS=1 OMP_NUM_THREADS=1)
    python scripts/bench.py --kernel-only  # the kernel table alone
    python scripts/bench.py --first-run    # the demo's first run, empty numba cache, alone

With ``--json`` stdout carries one JSON object and the table goes to
stderr. Times are best-of-repeats wall-clock times. Other processes slow
the measurements down (and can bias the ratios either way): the kernel table
shows how much CPU they used during the best repeats, from /proc/stat.
"""

from __future__ import annotations

import argparse
import json
import math
import os
import platform
import resource
import subprocess
import sys
import time
import tomllib
from dataclasses import dataclass
from pathlib import Path

import numpy as np

# idle OpenMP workers sleep instead of spinning: a one-thread measurement then
# really uses one core (set before numba starts its thread pool)
os.environ.setdefault("OMP_WAIT_POLICY", "passive")

ROOT = Path(__file__).resolve().parents[1]
sys.path.insert(0, str(ROOT))

import numba  # noqa: E402

import mdrotor  # noqa: E402
from mdrotor.engine import integrate as engine
from mdrotor.engine import kernels
from mdrotor.engine.noise import kernel_state  # noqa: E402

TWO_PI = 2.0 * np.pi

# Targets
TARGET_RATE_N2 = 2e8          # trajectory-steps / s / core, N = 2, rotating pinning
TARGET_NS_PER_PAIR = 8.0      # ns per ion pair per step, N = 4
TARGET_NS_PER_PAIR_LARGE = 2.5  # ns per ion pair per step, N >= 8
TARGET_OVER_NUMPY = 8.0       # kernel (1 thread) / numpy baseline
TARGET_OVER_IVP = 1000.0      # kernel (1 thread) / solve_ivp steps-equivalent
TARGET_SPEEDUP_2T = 1.8       # 2 threads / 1 thread
TARGET_NOISE_COST = 2.0       # step time with noise / without, N = 2
TARGET_COLORED_RATE = 4e7     # trajectory-steps / s / core, N = 2 with the 1/f field noise
TARGET_COLORED_SPEEDUP = 1.9  # its 2 threads / 1 thread
TARGET_QUANTUM_S = 60.0       # s of CPU, quantum rotor spin-up and release with nbar = 3
TARGET_FIRST_RUN_S = 10.0     # s wall, the demo's first run in a fresh environment, compilation included
TARGET_RF_OVER_PSEUDO = 4.0   # CPU time of the RF demo run / the pseudopotential run of the same duration


def log(msg: str) -> None:
    print(msg, file=sys.stderr, flush=True)


def machine_busy_s() -> float:
    """CPU seconds used so far by everything on the machine (/proc/stat;
    NaN where unavailable). With time.process_time it tells how much of a
    measurement other processes were running: a flag for contended figures."""
    try:
        with open("/proc/stat") as fh:
            f = [int(x) for x in fh.readline().split()[1:]]
    except (OSError, ValueError):
        return math.nan
    idle = f[3] + f[4]  # idle + iowait
    return (sum(f[:8]) - idle) / os.sysconf("SC_CLK_TCK")


# ---------------------------------------------------------------------------
# The three test problems
# ---------------------------------------------------------------------------
def ring8_dict() -> dict:
    """Eight 40Ca+ ions in a planar 1 + 7 crystal (one ion on the axis, a
    7-ion ring), pinned by a rotating order-7 multipole: a regular 7-gon has
    no in-plane moment below order 7. Libration about 200 kHz at rest."""
    return {
        "species": {"ion": "40Ca+"},
        "crystal": {"ions": 8},
        "trap": {"model": "pseudo", "f_radial": "1.0 MHz", "f_axial": "3.0 MHz"},
        "pinning": {"order": 7, "strength": "1e30 V/m^7"},
        "stage": [
            {"name": "spin-up", "duration": "1 ms", "f_rot": {"to": "50 kHz", "shape": "smoothstep"}},
            {"name": "release", "duration": "0.5 ms", "pinning": {"to": 0.0, "shape": "cosine"}},
        ],
        "initial": {"temperature": "0.5 mK"},
        "run": {"seed": 8},
    }


def planar_dict(n: int) -> dict:
    """n 40Ca+ ions in a planar crystal (axial 5x the radial frequency), a
    weak rotating order-3 multipole turning it at 20 kHz: the large crystals
    of the pair-force table, for their cost only."""
    return {
        "species": {"ion": "40Ca+"},
        "crystal": {"ions": n},
        "trap": {"model": "pseudo", "f_radial": "1.0 MHz", "f_axial": "5.0 MHz"},
        "pinning": {"order": 3, "strength": "1e10 V/m^3"},
        "stage": [{"name": "spin-up", "duration": "1 ms", "f_rot": {"to": "20 kHz", "shape": "smoothstep"}}],
        "initial": {"temperature": "0.5 mK"},
        "run": {"seed": 8},
    }


def problem_dicts() -> list[tuple[str, dict]]:
    """(label, raw config dict) for N = 2, 4, 8, 16, 30."""
    out = []
    for name in ("demo.toml", "square_order4.toml"):
        with open(ROOT / "configs" / name, "rb") as fh:
            out.append((f"configs/{name}", tomllib.load(fh)))
    out.append(("8-ion ring (dict)", ring8_dict()))
    out.append(("16-ion planar (dict)", planar_dict(16)))
    out.append(("30-ion planar (dict)", planar_dict(30)))
    return out


def _bare_pair_loop(inv_r3):
    """The pair forces alone, ``reps`` times over one chunk ((N, B) arrays),
    as the kernel computes them, with ``inv_r3`` for 1/r^3 (compiled per
    choice, so the call is inlined as in the kernel)."""

    @numba.njit(error_model="numpy")
    def loop(px, py, pz, ax, ay, az, kq_i, kq_j, reps):
        n, nb = px.shape
        for _ in range(reps):
            for i in range(n - 1):
                for j in range(i + 1, n):
                    ki = kq_i[i, j]
                    kj = kq_j[i, j]
                    for b in range(nb):
                        dx = px[i, b] - px[j, b]
                        dy = py[i, b] - py[j, b]
                        dz = pz[i, b] - pz[j, b]
                        inv3 = inv_r3(dx * dx + dy * dy + dz * dz)
                        ax[i, b] += ki * dx * inv3
                        ay[i, b] += ki * dy * inv3
                        az[i, b] += ki * dz * inv3
                        ax[j, b] -= kj * dx * inv3
                        ay[j, b] -= kj * dy * inv3
                        az[j, b] -= kj * dz * inv3

    return loop


# the kernel's 1/r^3, and a float32 seed refined in double (no double square
# root or division): kernels._inv_r3 and kernels._inv_r3_refined
bare_pairs = _bare_pair_loop(kernels._inv_r3)
bare_pairs_refined = _bare_pair_loop(kernels._inv_r3_refined)


def bench_bare_pairs(plan, pos0, chunk: int, repeats: int) -> dict:
    """ns per ion pair and trajectory of the bare pair loop (process CPU
    time, best of repeats) on one chunk of the problem's own positions."""
    n = pos0.shape[1]
    if n < 2:
        return {"bare_ns_per_pair": None, "bare_refined_ns_per_pair": None}
    px, py, pz = (np.ascontiguousarray(pos0[u, :, :chunk]) for u in range(3))
    pairs = n * (n - 1) // 2
    reps = max(1, int(2e7 / (pairs * chunk)))
    out = {}
    for key, loop in (("bare_ns_per_pair", bare_pairs), ("bare_refined_ns_per_pair", bare_pairs_refined)):
        acc = [np.zeros_like(px) for _ in range(3)]
        loop(px, py, pz, *acc, plan.kq_i, plan.kq_j, 1)
        best = math.inf
        for _ in range(repeats):
            c = time.process_time()
            loop(px, py, pz, *acc, plan.kq_i, plan.kq_j, reps)
            best = min(best, time.process_time() - c)
        out[key] = best / (reps * pairs * chunk) * 1e9
    return out


def steady_dict(raw: dict, duration_s: float, dt_s: float | None = None) -> dict:
    """The same crystal rotating steadily at the end-of-spin-up frequency,
    pinned at full strength, for one 'hold' stage of ``duration_s``."""
    cfg = mdrotor.load_config(raw)
    f_end_hz = float(cfg.schedule.f_rot_hz(cfg.schedule.boundaries_s[1]))
    new = {k: v for k, v in raw.items() if k != "stage"}
    new["rotation"] = {"f_start": f"{f_end_hz!r} Hz"}
    new["stage"] = [{"name": "hold", "duration": f"{duration_s!r} s"}]
    if dt_s is not None:
        new["run"] = dict(raw.get("run", {}), dt=f"{dt_s!r} s")
    return new


# ---------------------------------------------------------------------------
# Calling the compiled stepper (the same arrays engine.integrate passes)
# ---------------------------------------------------------------------------
def force_times(t0: float, dt: float, n_steps: int, fracs: np.ndarray) -> np.ndarray:
    """Force-evaluation times of a block: its start, then the end of every
    sub-step (the layout kernels.advance expects for c_re, c_im)."""
    ts = t0 + dt * np.arange(n_steps + 1)
    sub = np.cumsum(fracs)
    return np.concatenate([[ts[0]], (ts[:-1, None] + dt * sub[None, :]).ravel()])


@dataclass
class Block:
    """Everything kernels.advance needs for one block of steps."""

    plan: object
    dt: float
    n_steps: int
    fracs: np.ndarray
    c_re: np.ndarray
    c_im: np.ndarray
    lag_n: int
    lag_theta: np.ndarray
    lag_track: np.ndarray
    lag_stride: int


def make_block(plan, t0: float, dt: float, n_steps: int, fracs=None, lag: bool = False) -> Block:
    fracs = plan.fracs if fracs is None else fracs
    c_re, c_im = engine._pin_coefficients(plan, force_times(t0, dt, n_steps, fracs))
    ts = t0 + dt * np.arange(n_steps + 1)
    if lag and plan.lag_n > 0:
        track = (np.abs(plan.schedule.pinning_scale(ts, plan.lag_term)) >= plan.lag_threshold).astype(np.uint8)
        lag_n = plan.lag_n
    else:
        track = np.zeros(n_steps + 1, dtype=np.uint8)
        lag_n = 0
    # engine.integrate: one lag update per quarter of the fastest period
    stride = max(1, plan.cfg.run.steps_per_period // 4)
    return Block(plan, dt, n_steps, fracs, c_re, c_im, lag_n, plan.schedule.theta_rad(ts), track, stride)


def initial_lag(plan, pos: np.ndarray) -> np.ndarray:
    """Start values of the unwrapped lag phase, as engine.integrate sets them."""
    lag_u = np.zeros((2, pos.shape[2]))
    if plan.lag_n > 0:
        raw = kernels.lag_phases(pos, plan.masses, plan.charges, plan.lag_n)
        lag_u[0] = plan.lag_u_ref + (raw - plan.lag_u_ref + np.pi) % TWO_PI - np.pi
        lag_u[1] = raw
    return lag_u


def advance(blk: Block, pos, vel, lag_u, chunk: int) -> None:
    """kernels.advance on one block, noise off, pinning by pure multipoles
    (pseudopotential: no RF drive), the variant engine.integrate runs: None
    for the drive, the polynomial pinning, the noise and the beams."""
    p = blk.plan
    if p.rf or not np.all(p.pin_is_multipole == 1.0):
        raise RuntimeError("this benchmark covers the pseudopotential model with multipole pinning only")
    pin = (p.pin_orders, blk.c_re, blk.c_im)
    lag = (p.masses, p.charges, blk.lag_n, blk.lag_theta, blk.lag_track, blk.lag_stride, lag_u)
    kernels.advance(pos, vel, blk.dt, blk.n_steps, blk.fracs, p.kernel_model(), None, pin, None, lag, None, None,
                    chunk)


def kernel_run(plan, pos, vel, duration_s: float, integrator: str, refine: int, chunk: int = 64):
    """Integrate (pos, vel) from t = 0 over ``duration_s`` with step
    plan.dt_s / refine, in blocks of at most engine.BLOCK_STEPS steps."""
    fracs = kernels.substep_fractions(integrator)
    n_total = int(round(duration_s / plan.dt_s)) * refine
    dt = duration_s / n_total
    pos, vel = pos.copy(), vel.copy()
    lag_u = np.zeros((2, pos.shape[2]))
    done = 0
    while done < n_total:
        nb = min(engine.BLOCK_STEPS, n_total - done)
        advance(make_block(plan, done * dt, dt, nb, fracs), pos, vel, lag_u, chunk)
        done += nb
    return pos, vel, dt, n_total


def auto_chunk(n_traj: int, threads: int) -> int:
    """mdrotor.engine.run's automatic chunk: about four work items per thread."""
    return int(np.clip(n_traj // (4 * threads), 32, 256))


# ---------------------------------------------------------------------------
# (a) straightforward numpy baseline, vectorised over trajectories
# ---------------------------------------------------------------------------
def numpy_accel(pos: np.ndarray, plan, c_re: np.ndarray, c_im: np.ndarray) -> np.ndarray:
    """Acceleration (3, N, T) in m/s^2 of positions ``pos`` (3, N, T) in m.

    harmonic trap per axis + stray field
    - (Q/m) grad Re[C z^n] with grad = (Re, -Im) of n C z^(n-1), z = x + i y
    + Coulomb: sum_j k Q_i Q_j (r_i - r_j) / (m_i |r_i - r_j|^3).
    """
    acc = -plan.w2.T[:, :, None] * pos + plan.stray_acc.T[:, :, None]
    z = pos[0] + 1j * pos[1]
    qm = plan.qm[:, None]
    for n, cr, ci in zip(plan.pin_orders, c_re, c_im):
        g = n * complex(cr, ci) * z ** (n - 1)
        acc[0] -= qm * g.real
        acc[1] += qm * g.imag
    d = pos[:, :, None, :] - pos[:, None, :, :]          # r_i - r_j, (3, N, N, T)
    r2 = np.sum(d * d, axis=0)                           # (N, N, T)
    diag = np.arange(pos.shape[1])
    r2[diag, diag] = np.inf                              # no self-force
    s = plan.kq_i[:, :, None] / (r2 * np.sqrt(r2))       # k Q_i Q_j / (m_i r^3)
    acc += np.sum(s[None] * d, axis=2)
    return acc


def numpy_verlet(blk: Block, pos, vel):
    """Velocity Verlet (kick-drift-kick) with the same force times as the kernel."""
    pos, vel = pos.copy(), vel.copy()
    dt = blk.dt
    acc = numpy_accel(pos, blk.plan, blk.c_re[0], blk.c_im[0])
    for s in range(blk.n_steps):
        vel += 0.5 * dt * acc
        pos += dt * vel
        acc = numpy_accel(pos, blk.plan, blk.c_re[s + 1], blk.c_im[s + 1])
        vel += 0.5 * dt * acc
    return pos, vel


def keep_freed_memory() -> bool:
    """Ask glibc malloc to keep freed blocks instead of returning them to the
    OS. numpy allocates fresh temporaries of a few MB on every force call;
    with the default thresholds each is a new mmap whose page faults cost
    more than the arithmetic on this VM (x2-x4). Returns False if not glibc."""
    import ctypes

    try:
        libc = ctypes.CDLL("libc.so.6")
    except OSError:
        return False
    M_TRIM_THRESHOLD, M_MMAP_THRESHOLD = -1, -3
    return bool(libc.mallopt(M_MMAP_THRESHOLD, 32 * 2**20)) and bool(libc.mallopt(M_TRIM_THRESHOLD, 2**30))


# ---------------------------------------------------------------------------
# (b) solve_ivp on one trajectory
# ---------------------------------------------------------------------------
def ivp_rhs_factory(plan, f_rot_hz: float):
    """dy/dt for y = (positions (3, N), velocities (3, N)) of one trajectory
    in the steady 'hold' problem, where the pinning coefficient is
    C_p(t) = c_p exp(-i n_p (angle_p + 2 pi f_rot t)) in closed form."""
    n = len(plan.masses)
    amp = plan.pin_strength
    orders = plan.pin_orders
    angle = plan.pin_angle
    # the closed form must equal what the kernel is given
    te = np.linspace(0.0, plan.schedule.duration_s, 7)
    c_re, c_im = engine._pin_coefficients(plan, te)
    closed = amp[None, :] * np.exp(-1j * orders[None, :] * (angle[None, :] + TWO_PI * f_rot_hz * te[:, None]))
    tol = 1e-10 * np.max(np.abs(amp))
    if not (np.allclose(closed.real, c_re, rtol=1e-10, atol=tol) and np.allclose(closed.imag, c_im, rtol=1e-10, atol=tol)):
        raise RuntimeError("closed-form pinning coefficient disagrees with engine._pin_coefficients")

    def rhs(t, y):
        c = amp * np.exp(-1j * orders * (angle + TWO_PI * f_rot_hz * t))
        acc = numpy_accel(y[: 3 * n].reshape(3, n, 1), plan, c.real, c.imag)
        return np.concatenate([y[3 * n:], acc.ravel()])

    return rhs


def max_position_error(pos: np.ndarray, ref: np.ndarray) -> np.ndarray:
    """Largest position-component difference (m) per trajectory."""
    return np.max(np.abs(pos - ref), axis=(0, 1))


# ---------------------------------------------------------------------------
# Measurements
# ---------------------------------------------------------------------------
def bench_kernel(label, raw, n_traj, n_steps, repeats, seed=1):
    """Rates of the kernel for one problem: 1 thread, 1 thread + lag, 2 threads."""
    cfg = mdrotor.load_config(raw)
    plan = engine.make_plan(cfg)
    pos0, vel0 = engine.initial_states(plan, seed, np.arange(n_traj))
    lag0 = initial_lag(plan, pos0)
    blk = make_block(plan, 0.0, plan.dt_s, n_steps, lag=False)
    blk_lag = make_block(plan, 0.0, plan.dt_s, n_steps, lag=True)
    n_cores = min(2, numba.config.NUMBA_NUM_THREADS)
    variants = {"1t": (1, blk), "1t_lag": (1, blk_lag), "2t": (n_cores, blk)}
    # warm-up: load (or compile) the cached kernel and start the thread pool
    for threads in (1, n_cores):
        numba.set_num_threads(threads)
        advance(make_block(plan, 0.0, plan.dt_s, 2), pos0[:, :, :64].copy(), vel0[:, :, :64].copy(),
                lag0[:, :64].copy(), 32)
    best = {k: math.inf for k in variants}
    cpu, others = {}, {}               # of the best repeat: our CPU / wall, other processes' CPU / wall
    for _ in range(repeats):           # interleaved, so that load changes hit all variants alike
        for key, (threads, b) in variants.items():
            numba.set_num_threads(threads)
            pos, vel, lag_u = pos0.copy(), vel0.copy(), lag0.copy()
            t, c, m = time.perf_counter(), time.process_time(), machine_busy_s()
            advance(b, pos, vel, lag_u, auto_chunk(n_traj, threads))
            wall = time.perf_counter() - t
            if wall < best[key]:
                best[key] = wall
                cpu[key] = (time.process_time() - c) / wall
                others[key] = max(0.0, (machine_busy_s() - m) / wall - cpu[key])
            if not np.all(np.isfinite(pos)):
                raise RuntimeError(f"{label}: non-finite positions after the benchmark block")
    numba.set_num_threads(1)
    n = len(plan.masses)
    rate = {k: n_traj * n_steps / v for k, v in best.items()}
    pairs = n * (n - 1) // 2
    bare = bench_bare_pairs(plan, pos0, auto_chunk(n_traj, 1), repeats)
    return plan, pos0, vel0, {
        "config": label, "N": n, "pin_orders": [int(o) for o in plan.pin_orders], "lag_n": int(plan.lag_n),
        "dt_s": plan.dt_s, "trajectories": n_traj, "steps": n_steps, "chunk_1t": auto_chunk(n_traj, 1),
        "chunk_2t": auto_chunk(n_traj, n_cores), "threads_2": n_cores,
        "rate_1t": rate["1t"], "rate_1t_lag": rate["1t_lag"], "rate_2t": rate["2t"],
        "rate_2t_per_core": rate["2t"] / n_cores, "speedup_2t": rate["2t"] / rate["1t"],
        "ns_per_pair_step": 1e9 / (rate["1t"] * pairs) if n >= 4 else None,
        "ns_per_pair_step_lag": 1e9 / (rate["1t_lag"] * pairs) if n >= 4 else None,
        "cpu_per_wall_1t": cpu["1t"], "cpu_per_wall_2t": cpu["2t"], "repeats": repeats,
        "other_cpu_1t": others["1t"], "other_cpu_2t": others["2t"],
        # from the process's CPU time: on a machine shared with other work closer to what a quiet one shows
        "rate_1t_cpu": rate["1t"] / cpu["1t"],
        "cpu_ns_per_pair_step": 1e9 * cpu["1t"] / (rate["1t"] * pairs) if n >= 4 else None,
        **bare,
    }


def check_numpy(plan, pos0, vel0, n_traj, n_steps) -> float:
    """Largest position difference between the numpy baseline and the kernel
    after ``n_steps`` from the same state, relative to the largest coordinate."""
    numba.set_num_threads(1)
    blk = make_block(plan, 0.0, plan.dt_s, n_steps)
    p_np, _ = numpy_verlet(blk, pos0[:, :, :n_traj], vel0[:, :, :n_traj])
    p_k, v_k = pos0[:, :, :n_traj].copy(), vel0[:, :, :n_traj].copy()
    advance(blk, p_k, v_k, np.zeros((2, n_traj)), 32)
    rel = float(np.max(np.abs(p_np - p_k)) / np.max(np.abs(p_k)))
    if not rel < 1e-9:
        raise RuntimeError(f"numpy baseline disagrees with the kernel: max relative difference {rel:.2e}")
    return rel


def time_numpy(plan, pos0, vel0, n_traj, n_steps, repeats) -> float:
    """Trajectory-steps per second of the numpy baseline (best of repeats)."""
    blk = make_block(plan, 0.0, plan.dt_s, n_steps)
    best = math.inf
    for _ in range(repeats):
        t = time.perf_counter()
        numpy_verlet(blk, pos0[:, :, :n_traj], vel0[:, :, :n_traj])
        best = min(best, time.perf_counter() - t)
    return n_traj * n_steps / best


def bench_ivp(label, raw, duration_s, n_traj, rtols, kernel_rate, tight_check, repeats, seed=3):
    """solve_ivp (DOP853) at the tolerance matching the Verlet kernel's error."""
    from scipy.integrate import solve_ivp

    numba.set_num_threads(1)
    cfg = mdrotor.load_config(steady_dict(raw, duration_s))
    plan = engine.make_plan(cfg)
    f_rot_hz = plan.f0_hz
    n = len(plan.masses)
    pos0, vel0 = engine.initial_states(plan, seed, np.arange(n_traj))
    # the kernel at its default dt, and the reference (order 4, dt / 8)
    p_v, _, dt, n_steps = kernel_run(plan, pos0, vel0, duration_s, "verlet", 1)
    p_ref, _, _, _ = kernel_run(plan, pos0, vel0, duration_s, "order4", 8)
    p_ref2, _, _, _ = kernel_run(plan, pos0, vel0, duration_s, "order4", 16)
    err_verlet = float(np.median(max_position_error(p_v, p_ref)))
    err_ref = float(np.median(max_position_error(p_ref2, p_ref)))
    # tolerance scales: crystal size and the speed of the fastest motion
    r_scale = max(float(np.max(np.abs(plan.crystal0.positions_m))), 1e-6)
    v_scale = r_scale * TWO_PI * plan.f_fast_hz
    scale = np.concatenate([np.full(3 * n, r_scale), np.full(3 * n, v_scale)])
    rhs = ivp_rhs_factory(plan, f_rot_hz)
    y0 = [np.concatenate([pos0[:, :, b].ravel(), vel0[:, :, b].ravel()]) for b in range(n_traj)]

    def solve(rtol):
        """Median final position error (m; inf if a run fails), wall time, RHS calls."""
        out, nfev, t = [], 0, time.perf_counter()
        for b in range(n_traj):
            # a loose tolerance can let the ions fly apart: that is an error, not a crash
            with np.errstate(over="ignore", invalid="ignore"):
                sol = solve_ivp(rhs, (0.0, duration_s), y0[b], method="DOP853", rtol=rtol, atol=rtol * scale)
            final = sol.y[: 3 * n, -1].reshape(3, n) if sol.status == 0 else np.full((3, n), np.inf)
            out.append(np.where(np.isfinite(final), final, np.inf))
            nfev += sol.nfev
        wall = time.perf_counter() - t
        err = float(np.median(max_position_error(np.stack(out, axis=-1), p_ref)))
        return err, wall, nfev

    scan = []
    chosen = None
    for rtol in rtols:               # loosest first: the first one at least as accurate as Verlet
        err, wall, nfev = solve(rtol)
        scan.append({"rtol": rtol, "err_m": err, "wall_s": wall, "nfev": nfev})
        log(f"    solve_ivp N={n} rtol={rtol:.1e}: error {err:.2e} m (Verlet {err_verlet:.2e} m), {wall:.2f} s")
        if err <= err_verlet:
            chosen = scan[-1]
            break
    if chosen is None:
        raise RuntimeError("no rtol in the scan reached the Verlet kernel's accuracy")
    for _ in range(repeats - 1):     # best of repeats for the timing
        chosen["wall_s"] = min(chosen["wall_s"], solve(chosen["rtol"])[1])
    ref_vs_ivp = None
    if tight_check:                  # independent check of the reference itself
        err_tight, _, _ = solve(1e-13)
        ref_vs_ivp = err_tight
    rate = n_traj * n_steps / chosen["wall_s"]
    return {"config": label, "N": n, "duration_s": duration_s, "f_rot_hz": f_rot_hz, "dt_s": dt,
            "steps_equiv": n_steps, "trajectories": n_traj, "err_verlet_m": err_verlet,
            "err_ivp_m": chosen["err_m"], "rtol": chosen["rtol"], "atol_pos_m": chosen["rtol"] * r_scale,
            "atol_vel_m_per_s": chosen["rtol"] * v_scale, "nfev_per_traj": chosen["nfev"] / n_traj,
            "reference": "kernel order4, dt/8", "reference_err_m (vs dt/16)": err_ref,
            "reference_vs_ivp_rtol1e-13_m": ref_vs_ivp, "rate_steps_equiv": rate,
            "kernel_over_ivp": kernel_rate / rate, "scan": scan}


def memory_child(n_steps: int, n_traj: int, dt_s: float) -> dict:
    """One whole run (engine.integrate) of the N = 2 demo crystal in steady
    rotation; called in a fresh interpreter so that ru_maxrss is this run's."""
    import tracemalloc

    with open(ROOT / "configs" / "demo.toml", "rb") as fh:
        raw = tomllib.load(fh)
    cfg = mdrotor.load_config(steady_dict(raw, n_steps * dt_s, dt_s))
    plan = engine.make_plan(cfg)
    if plan.n_steps != n_steps:
        raise RuntimeError(f"expected {n_steps} steps, the plan has {plan.n_steps}")
    pos, vel = engine.initial_states(plan, 5, np.arange(n_traj))
    # warm-up on a copy: loads the compiled kernel and the observables
    engine.integrate(engine.make_plan(mdrotor.load_config(steady_dict(raw, 4 * dt_s, dt_s))),
                     pos[:, :, :64].copy(), vel[:, :, :64].copy(), observe_stages=False)
    rss_before = resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024.0
    tracemalloc.start()
    t = time.perf_counter()
    engine.integrate(plan, pos, vel, chunk=auto_chunk(n_traj, numba.get_num_threads()), observe_stages=False)
    wall = time.perf_counter() - t
    _, py_peak = tracemalloc.get_traced_memory()
    tracemalloc.stop()
    rss_after = resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024.0
    return {"steps": n_steps, "trajectories": n_traj, "threads": numba.get_num_threads(),
            "state_mb": (pos.nbytes + vel.nbytes) / 2**20, "maxrss_before_mb": rss_before,
            "maxrss_mb": rss_after, "tracemalloc_peak_mb": py_peak / 2**20, "wall_s": wall}


def bench_memory(step_counts, n_traj, dt_s):
    out = []
    for n_steps in step_counts:
        cmd = [sys.executable, str(Path(__file__).resolve()), "--memory-child", str(n_steps), str(n_traj), repr(dt_s)]
        res = subprocess.run(cmd, capture_output=True, text=True, check=False)
        if res.returncode != 0:
            raise RuntimeError(f"memory run failed:\n{res.stderr}")
        out.append(json.loads(res.stdout.strip().splitlines()[-1]))
        log(f"    {n_steps} steps x {n_traj} trajectories: peak RSS {out[-1]['maxrss_mb']:.1f} MB")
    return out


# ---------------------------------------------------------------------------
# Targets and report
# ---------------------------------------------------------------------------
# ---------------------------------------------------------------------------
# Whole engine steps: noise on/off, pseudopotential vs RF
# ---------------------------------------------------------------------------
WHITE_FIELD = {"field": {"psd": {"kind": "white", "level": "1e-12 V^2/m^2/Hz"}}}
WHITE_QUAD = {"multipole": {"order": 2, "psd": {"kind": "white", "level": "1e-2 V^2/m^4/Hz"}}}
# Doppler cooling: one 397 nm beam on both ions, components along x, y and z; two beams
ONE_BEAM = [{"name": "oblique", "detuning": "-11 MHz", "saturation": 0.5, "direction": [0.6, 0.64, 0.48]}]
TWO_BEAMS = ONE_BEAM + [{"name": "axial", "detuning": "-11 MHz", "saturation": 0.5, "direction": [0, 0, 1],
                         "waist": "40 um"}]
ONE_OVER_F = {"field": {"psd": {"kind": "power", "level": "1e-12 V^2/m^2/Hz", "f_ref": "1 MHz", "alpha": 1.0,
                                "f_min": "50 kHz", "f_max": "5 MHz"}}}


def engine_cases() -> list[tuple[str, dict]]:
    """(label, raw config) for the engine-level table: the demo crystal
    (N = 2) and the square (N = 4) with noise off / on and in both trap models."""
    out = []
    with open(ROOT / "configs" / "demo.toml", "rb") as fh:
        demo = tomllib.load(fh)
    with open(ROOT / "configs" / "square_order4.toml", "rb") as fh:
        square = tomllib.load(fh)
    square["trap"]["f_drive"] = "30 MHz"
    for label, noise in (("N=2 pseudo, noise off", None), ("N=2 pseudo, white field noise", WHITE_FIELD),
                         ("N=2 pseudo, white field + quadrupole noise", {**WHITE_FIELD, **WHITE_QUAD}),
                         ("N=2 pseudo, 1/f field noise (50 kHz - 5 MHz)", ONE_OVER_F)):
        raw = json.loads(json.dumps(demo))
        if noise:
            raw["noise"] = noise
        out.append((label, raw))
    for label, beams in (("N=2 pseudo, one cooling beam", ONE_BEAM), ("N=2 pseudo, two cooling beams", TWO_BEAMS)):
        raw = json.loads(json.dumps(demo))
        raw["laser"] = beams
        out.append((label, raw))
    for label, base, model in (("N=2 rf", demo, "rf"), ("N=4 pseudo", square, "pseudo"), ("N=4 rf", square, "rf")):
        raw = json.loads(json.dumps(base))
        raw["trap"]["model"] = model
        out.append((label, raw))
    return out


def bench_engine(label, raw, n_traj, n_steps, repeats, threads, seed=1) -> dict:
    """Steps of the whole engine (engine.BlockStepper: schedule sampling, noise
    synthesis, laser kicks, kernel), as a run does them (``n_steps`` of the
    first stage in blocks of engine.BLOCK_STEPS), on ``threads`` threads."""
    from mdrotor.config.parse import from_dict

    numba.set_num_threads(threads)
    cfg = from_dict(raw, label, base_dir=ROOT / "configs")
    plan = engine.make_plan(cfg)
    idx = np.arange(n_traj)
    pos0, vel0 = engine.initial_states(plan, seed, idx)
    phases = plan.rf_phases(seed, idx) if plan.rf else None
    best = best_cpu = math.inf
    cpu_per_wall = others = math.nan   # of the best repeat: our CPU / wall, other processes' CPU / wall
    for r in range(repeats + 1):  # the first call compiles
        noise_state = kernel_state(plan.noise, seed, idx) if plan.noise is not None else None
        stepper = engine.BlockStepper(plan, auto_chunk(n_traj, threads))
        state = engine.RunState.start(plan, pos0.copy(), vel0.copy(), rf_phases=phases, noise=noise_state,
                                      laser_keys=engine.laser_keys(seed, idx) if plan.lasers else None)
        t0, c0, m0 = time.perf_counter(), time.process_time(), machine_busy_s()
        # the run's blocks of stage 0 (the next block's arrays made while the pool steps this one)
        stepper.advance_stage(state, 0, engine.stage_blocks(n_steps if r else 8))
        if r:
            wall, cpu = time.perf_counter() - t0, time.process_time() - c0
            if wall < best:
                best = wall
                cpu_per_wall = cpu / wall
                others = max(0.0, (machine_busy_s() - m0) / wall - cpu_per_wall)
            best_cpu = min(best_cpu, cpu)
    rate = n_traj * n_steps / best
    # CPU time of this process per trajectory-step: less sensitive than wall time to other
    # processes on a shared machine (they still slow it through shared caches and cores)
    return {"case": label, "threads": threads, "trajectories": n_traj, "steps": n_steps, "dt_s": plan.stage_dt[0],
            "rate": rate, "rate_per_core": rate / threads,
            "physical_time_per_s": rate * plan.stage_dt[0] / n_traj,
            "cpu_ns_per_traj_step": best_cpu / (n_traj * n_steps) * 1e9,
            # a speed-up from threads needs free cores: our CPU per wall second near the thread count, others' near 0
            "cpu_per_wall": cpu_per_wall, "other_cpu": others}


# ---------------------------------------------------------------------------
# RF runs: the exact per-step Mathieu propagator, cost and accuracy
# ---------------------------------------------------------------------------
RF_STUDY_STEPS = (8, 12, 16, 24, 32)   # steps per RF period compared with the fine reference
RF_REFERENCE_STEPS = 128               # the reference: the propagator at T_RF / 128 (splitting error 1/64 of K = 16's)


def _demo_raw(model: str, spin_up: str | None = None, **run) -> dict:
    with open(ROOT / "configs" / "demo.toml", "rb") as fh:
        raw = tomllib.load(fh)
    raw["trap"]["model"] = model
    if spin_up:
        raw["stage"][0]["duration"] = spin_up
    raw["run"].update(run)
    return raw


class _FineStepPath:
    """Inside the block, make_plan gives RF runs the former integration (the RF
    force among the Verlet kicks at T_RF / 64): the accuracy and cost the
    propagator replaces."""

    def __enter__(self):
        self.saved = engine._rf_step

        def fine(cfg, f_drive_hz, dt_auto):
            dt = min(dt_auto, 1.0 / (f_drive_hz * engine.RF_STEPS_PER_PERIOD))
            return dt, False, engine.RF_STEPS_PER_PERIOD, None

        engine._rf_step = fine
        return self

    def __exit__(self, *exc):
        engine._rf_step = self.saved


def _timed_run(raw, label):
    """One run on one thread (compiled kernels warmed up by a first short call):
    (Result, CPU seconds of the integration, wall seconds)."""
    from mdrotor.config.parse import from_dict

    cfg = from_dict(raw, label, base_dir=ROOT / "configs")
    c0 = time.process_time()
    res = mdrotor.run(cfg, threads=1)
    cpu = time.process_time() - c0
    return res, cpu, float(res.attrs["wall_s"])


def _final_numbers(res) -> dict:
    """Per trajectory: L (hbar) and the differential and COM phonon sums at the end."""
    fin = res.final
    kinds = fin.modes["kind"]
    mn = np.asarray(fin.arrays["mode_n"])
    out = {"L": np.asarray(fin.arrays["L_hbar"], dtype=float)}
    for kind in ("differential", "com"):
        idx = [k for k, kd in enumerate(kinds) if kd == kind]
        out[kind] = np.sum(mn[:, idx], axis=1)
    return out


def bench_rf(n_traj: int, cost_traj: int, spin_up: str, cost_spin_up: str | None) -> dict:
    """The demo (N = 2) with the full RF force: (1) cost of a whole run (one
    thread, CPU time; the spin-up ``cost_spin_up`` long, None: the demo's
    own) against the pseudopotential run of the same physical duration, with the propagator at its default step and with the former
    fine-step path; (2) accuracy: final L and differential / COM phonons of
    the same trajectories (same seed, every trajectory at RF phase 0, so
    runs differ only by their step) for K = RF_STUDY_STEPS steps per RF
    period and the former 64-step path, against the propagator at
    RF_REFERENCE_STEPS steps; each mean's difference from the reference
    beside the statistical error of the mean."""
    out = {"spin_up": spin_up, "accuracy_trajectories": n_traj, "cost_spin_up": cost_spin_up or "1.0 ms (the demo's)", "cost": [], "accuracy": []}
    # warm the compiled kernels (numba's cache) so that the timed runs do not include compilation
    for model in ("pseudo", "rf"):
        _timed_run(_demo_raw(model, "2 us", trajectories=2), f"warm-up {model}")
    with _FineStepPath():
        _timed_run(_demo_raw("rf", "2 us", trajectories=2), "warm-up rf fine")
    rows = [("pseudopotential", _demo_raw("pseudo", cost_spin_up, trajectories=cost_traj), False),
            (f"RF, propagator, T_RF / {engine.RF_PROPAGATOR_STEPS}",
             _demo_raw("rf", cost_spin_up, trajectories=cost_traj), False),
            (f"RF, former path, T_RF / {engine.RF_STEPS_PER_PERIOD}",
             _demo_raw("rf", cost_spin_up, trajectories=cost_traj), True)]
    for label, raw, fine in rows:
        log(f"RF cost: {label}")
        if fine:
            with _FineStepPath():
                res, cpu, wall = _timed_run(raw, label)
        else:
            res, cpu, wall = _timed_run(raw, label)
        out["cost"].append({"case": label, "trajectories": cost_traj, "steps": int(res.attrs["n_steps"]),
                            "dt_s": float(res.attrs["dt_s"]), "cpu_s": cpu, "wall_s": wall})
    base = out["cost"][0]["cpu_s"]
    for r in out["cost"]:
        r["cpu_over_pseudo"] = r["cpu_s"] / base
    W_T = 1.0 / 30e6   # the demo's T_RF
    ref_raw = _demo_raw("rf", spin_up, trajectories=n_traj, dt=f"{W_T / RF_REFERENCE_STEPS!r} s")
    ref_raw["trap"]["rf_phase"] = "0 deg"
    log(f"RF accuracy: reference T_RF / {RF_REFERENCE_STEPS}")
    ref = _final_numbers(_timed_run(ref_raw, "reference")[0])
    cases = [(f"T_RF / {k}", k, False) for k in RF_STUDY_STEPS] + \
        [(f"former path, T_RF / {engine.RF_STEPS_PER_PERIOD}", None, True)]
    for label, k, fine in cases:
        raw = _demo_raw("rf", spin_up, trajectories=n_traj, **({"dt": f"{W_T / k!r} s"} if k else {}))
        raw["trap"]["rf_phase"] = "0 deg"
        log(f"RF accuracy: {label}")
        if fine:
            with _FineStepPath():
                got = _final_numbers(_timed_run(raw, label)[0])
        else:
            got = _final_numbers(_timed_run(raw, label)[0])
        row = {"case": label}
        for q in ("L", "differential", "com"):
            ok = np.isfinite(got[q]) & np.isfinite(ref[q])
            d = got[q][ok] - ref[q][ok]
            row[f"{q}_mean"] = float(np.mean(got[q][ok]))
            row[f"{q}_sem"] = float(np.std(ref[q][ok], ddof=1) / math.sqrt(ok.sum()))
            row[f"{q}_diff"] = float(np.mean(d))
            row[f"{q}_diff_sem"] = float(np.std(d, ddof=1) / math.sqrt(ok.sum()))
            row[f"{q}_diff_over_sem"] = abs(row[f"{q}_diff"]) / row[f"{q}_sem"]
        out["accuracy"].append(row)
    for q in ("L", "differential", "com"):
        out[f"reference_{q}_mean"] = float(np.mean(ref[q]))
    return out


def rf_markdown(rf: dict) -> str:
    L = [f"Demo (2 x 40Ca+, f_drive = 30 MHz, q = 0.128), spin-up {rf['cost_spin_up']}; one thread.", "",
         "| run | trajectories | steps | dt | CPU s | CPU / pseudopotential |", "|---|---|---|---|---|---|"]
    for r in rf["cost"]:
        L.append(f"| {r['case']} | {r['trajectories']} | {r['steps']} | {r['dt_s']:.3g} s | {r['cpu_s']:.3g} | "
                 f"{r['cpu_over_pseudo']:.2f} |")
    L += ["", f"Accuracy (the demo with its spin-up shortened to {rf['spin_up']}, "
          f"{rf['accuracy_trajectories']} trajectories) against the propagator at T_RF / {RF_REFERENCE_STEPS} "
          "(same trajectories, RF phase 0): "
          "mean difference +- its standard error, and |difference| / (standard error of the mean itself).", "",
          "| step | L mean (hbar) | L: difference | / sem | differential phonons | difference | / sem | "
          "COM phonons | difference | / sem |", "|---|---|---|---|---|---|---|---|---|---|"]
    for r in rf["accuracy"]:
        L.append(f"| {r['case']} | {r['L_mean']:.1f} +- {r['L_sem']:.1f} | {r['L_diff']:+.3g} +- {r['L_diff_sem']:.2g} | "
                 f"{r['L_diff_over_sem']:.3f} | {r['differential_mean']:.3f} +- {r['differential_sem']:.2f} | "
                 f"{r['differential_diff']:+.3g} +- {r['differential_diff_sem']:.2g} | "
                 f"{r['differential_diff_over_sem']:.3f} | {r['com_mean']:.2f} +- {r['com_sem']:.2f} | "
                 f"{r['com_diff']:+.3g} +- {r['com_diff_sem']:.2g} | {r['com_diff_over_sem']:.3f} |")
    return "\n".join(L)


def bench_quantum(repeats: int) -> dict:
    """Build and propagate the quantum rotor of configs/quantum_pair.toml (best of repeats)."""
    from mdrotor.model import quantum as quantum_build
    from mdrotor.physics import quantum_rotor

    cfg = mdrotor.load_config(ROOT / "configs" / "quantum_pair.toml")
    best = None
    for _ in range(repeats):
        c0, w0 = time.process_time(), time.perf_counter()
        setup = quantum_build.build(cfg)
        c1 = time.process_time()
        ev = quantum_rotor.evolve(setup.model, setup.initial, tol=1e-3)
        c2, w2 = time.process_time(), time.perf_counter()
        row = {"case": "quantum_pair.toml: 2 x 40Ca+, spin-up to 200 kHz, release, nbar = 3",
               "cpu_s": c2 - c0, "build_cpu_s": c1 - c0, "evolve_cpu_s": c2 - c1, "wall_s": w2 - w0,
               "steps": ev.numerics["steps"], "columns": ev.numerics["columns"],
               "window_max": ev.numerics["window_max"], "L_final_hbar": ev.final.mean_hbar,
               "L_std_final_hbar": ev.final.std_hbar}
        if best is None or row["cpu_s"] < best["cpu_s"]:
            best = row
    return best


# ---------------------------------------------------------------------------
# The demo's first run: every kernel compiled, in a fresh process
# ---------------------------------------------------------------------------
def bench_first_run(repeats: int) -> dict:
    """``mdrotor run configs/demo.toml`` in a subprocess whose NUMBA_CACHE_DIR
    is an empty temporary directory (numba compiles every kernel the run
    needs and writes them there), then once more with that cache: the wall
    time of each whole process (start-up, imports, statics, compilation,
    stepping, output) and its CPU time, beside the run's own compile_s and
    wall_s (from ``--json``). Best of ``repeats`` fresh starts."""
    import tempfile

    demo = ROOT / "configs" / "demo.toml"
    rows = []
    with tempfile.TemporaryDirectory(prefix="mdrotor-first-run-") as tmp:
        for r in range(repeats):
            cache = Path(tmp) / f"numba-cache-{r}"
            cache.mkdir()
            env = dict(os.environ, NUMBA_CACHE_DIR=str(cache))
            for label in ("fresh", "cached"):
                cmd = [sys.executable, "-m", "mdrotor", "run", str(demo), "-o", str(Path(tmp) / "demo.h5"),
                       "--quiet", "--json"]
                before = os.times()
                t0 = time.perf_counter()
                res = subprocess.run(cmd, capture_output=True, text=True, env=env, check=False)
                wall = time.perf_counter() - t0
                after = os.times()
                if res.returncode != 0:
                    raise RuntimeError(f"the demo run failed:\n{res.stderr}")
                summary = json.loads(res.stdout)
                cpu = (after.children_user - before.children_user) + (after.children_system - before.children_system)
                rows.append({"cache": label, "wall_s": wall, "cpu_s": cpu, "compile_s": summary["compile_s"],
                             "run_wall_s": summary["wall_s"], "cached_files": len(list(cache.rglob("*.nbc")))})
                log(f"    {label} cache: {wall:.2f} s wall ({cpu:.2f} s CPU), compile_s {summary['compile_s']:.2f}, "
                    f"stepping {summary['wall_s']:.2f} s")
    fresh = [r for r in rows if r["cache"] == "fresh"]
    cached = [r for r in rows if r["cache"] == "cached"]
    return {"config": "configs/demo.toml", "runs": rows, "fresh_wall_s": min(r["wall_s"] for r in fresh),
            "cached_wall_s": min(r["wall_s"] for r in cached)}


def targets(result) -> list[dict]:
    rows = []

    def add(name, value, target, higher_is_better=True):
        ratio = value / target if higher_is_better else target / value
        rows.append({"target": name, "value": value, "threshold": target, "ratio": ratio, "met": bool(ratio >= 1.0)})

    k = {r["N"]: r for r in result["kernel"]}
    if 2 in k:
        add("N=2 rotating pinning, traj-steps/s/core >= 2e8 (CPU time)", k[2]["rate_1t_cpu"], TARGET_RATE_N2)
    for n in sorted(k):
        if n == 4:
            add(f"N={n}: ns per ion pair per step <= 8", k[n]["ns_per_pair_step"], TARGET_NS_PER_PAIR, False)
        elif n >= 8:
            add(f"N={n}: ns per ion pair per step <= 2.5 (CPU time)", k[n]["cpu_ns_per_pair_step"],
                TARGET_NS_PER_PAIR_LARGE, False)
    for r in result["numpy"]:
        add(f"N={r['N']}: kernel / numpy >= 8x", r["kernel_over_numpy"], TARGET_OVER_NUMPY)
    for r in result["solve_ivp"]:
        add(f"N={r['N']}: kernel / solve_ivp >= 1000x", r["kernel_over_ivp"], TARGET_OVER_IVP)
    for n in sorted(k):
        add(f"N={n}: speed-up 1 -> {k[n]['threads_2']} threads >= 1.8x", k[n]["speedup_2t"], TARGET_SPEEDUP_2T)
    e = {(r["case"], r["threads"]): r for r in result.get("engine", [])}
    off = e.get(("N=2 pseudo, noise off", 1))
    for case in ("N=2 pseudo, white field noise", "N=2 pseudo, white field + quadrupole noise"):
        on = e.get((case, 1))
        if off and on:
            add(f"{case}: step cost <= 2x noise off", off["rate"] / on["rate"], TARGET_NOISE_COST, False)
    one_f = "N=2 pseudo, 1/f field noise (50 kHz - 5 MHz)"
    c1, c2 = e.get((one_f, 1)), e.get((one_f, 2))
    if c1:
        add(f"{one_f}: traj-steps/s/core >= 4e7", c1["rate_per_core"], TARGET_COLORED_RATE)
        # per CPU time as well: on a machine busy with other work the wall-clock rate understates it
        add(f"{one_f}: traj-steps per CPU second >= 4e7", 1e9 / c1["cpu_ns_per_traj_step"], TARGET_COLORED_RATE)
    if c1 and c2:
        add(f"{one_f}: speed-up 1 -> 2 threads >= 1.9x", c2["rate"] / c1["rate"], TARGET_COLORED_SPEEDUP)
    rf = result.get("rf")
    if rf:
        prop = rf["cost"][1]
        add(f"RF demo run ({prop['case']}): CPU time <= 4x the pseudopotential run", prop["cpu_over_pseudo"],
            TARGET_RF_OVER_PSEUDO, False)
        default = next((r for r in rf["accuracy"] if r["case"] == f"T_RF / {engine.RF_PROPAGATOR_STEPS}"), None)
        if default:
            worst = max(default[f"{q}_diff_over_sem"] for q in ("L", "differential", "com"))
            add(f"RF at T_RF / {engine.RF_PROPAGATOR_STEPS}: L and phonons within their statistical error of the "
                f"T_RF / {RF_REFERENCE_STEPS} reference (|diff| / sem <= 1)", worst, 1.0, False)
    q = result.get("quantum")
    if q:
        add("quantum rotor, spin-up and release, nbar = 3: CPU s <= 60", q["cpu_s"], TARGET_QUANTUM_S, False)
    f = result.get("first_run")
    if f:
        add("demo's first run, empty numba cache: wall s <= 10", f["fresh_wall_s"], TARGET_FIRST_RUN_S, False)
    return rows


def g3(x) -> str:
    return "–" if x is None else f"{x:.3g}"


def markdown(result) -> str:
    L = []
    m = result["machine"]
    L.append(f"Machine: {m['cpu']}, {m['cores']} cores; Python {m['python']}, numpy {m['numpy']}, "
             f"numba {m['numba']}, scipy {m['scipy']}; load average {m['loadavg_start'][0]:.2f} at start, "
             f"{m['loadavg_end'][0]:.2f} at end. Pseudopotential trap, rotating pinning on, velocity Verlet.")
    L.append("")
    L.append("| N | config | pinning order | trajectories x steps | traj-steps/s, 1 thread (from CPU time) | "
             "with lag tracking | ns / ion pair / step (CPU time) | bare pair loop: ns / pair, kernel's 1/r^3 / "
             "float32 seed refined | 2 threads (per core) | speed-up 1 -> 2 | our CPU, 1 t / 2 t | others' CPU, 1 t / 2 t |")
    L.append("|---|---|---|---|---|---|---|---|---|---|---|---|")
    for r in result["kernel"]:
        L.append(f"| {r['N']} | {r['config']} | {','.join(map(str, r['pin_orders']))} | "
                 f"{r['trajectories']} x {r['steps']} | {r['rate_1t']:.3g} ({r['rate_1t_cpu']:.3g}) | "
                 f"{r['rate_1t_lag']:.3g} | "
                 f"{g3(r['ns_per_pair_step'])} ({g3(r['cpu_ns_per_pair_step'])}) | "
                 f"{g3(r['bare_ns_per_pair'])} / {g3(r['bare_refined_ns_per_pair'])} | "
                 f"{r['rate_2t']:.3g} ({r['rate_2t_per_core']:.3g}) | "
                 f"{r['speedup_2t']:.2f} | {r['cpu_per_wall_1t']:.2f} / {r['cpu_per_wall_2t']:.2f} | "
                 f"{r['other_cpu_1t']:.2f} / {r['other_cpu_2t']:.2f} |")
    L.append("")
    if result["numpy"]:
        L.append("| N | numpy baseline, traj-steps/s (default malloc / freed memory kept) | "
                 "max rel. diff vs kernel | kernel (1 thread) / faster numpy |")
        L.append("|---|---|---|---|")
        for r in result["numpy"]:
            L.append(f"| {r['N']} | {r['rate_default_malloc']:.3g} / {g3(r['rate_tuned_malloc'])} | "
                     f"{r['max_rel_diff']:.1e} ({r['check_steps']} steps) | {r['kernel_over_numpy']:.3g}x |")
        L.append("")
    if result["solve_ivp"]:
        L.append("| N | physical time | Verlet error (default dt) | solve_ivp DOP853 error | rtol | "
                 "reference error | solve_ivp steps-equiv/s | kernel / solve_ivp |")
        L.append("|---|---|---|---|---|---|---|---|")
        for r in result["solve_ivp"]:
            L.append(f"| {r['N']} | {r['duration_s'] * 1e6:.3g} us | {r['err_verlet_m']:.2e} m | {r['err_ivp_m']:.2e} m | "
                     f"{r['rtol']:.0e} | {r['reference_err_m (vs dt/16)']:.1e} m | {r['rate_steps_equiv']:.3g} | "
                     f"{r['kernel_over_ivp']:.3g}x |")
        L.append("")
    if result["memory"]:
        L.append("| run (N = 2, engine.integrate) | steps | peak RSS | peak RSS before stepping | growth while stepping | "
                 "Python-side peak while stepping (tracemalloc) | state arrays |")
        L.append("|---|---|---|---|---|---|---|")
        for r in result["memory"]:
            L.append(f"| {r['trajectories']} trajectories, {r['threads']} threads | {r['steps']} | "
                     f"{r['maxrss_mb']:.1f} MB | {r['maxrss_before_mb']:.1f} MB | "
                     f"{r['maxrss_mb'] - r['maxrss_before_mb']:.1f} MB | {r['tracemalloc_peak_mb']:.2f} MB | "
                     f"{r['state_mb']:.2f} MB |")
        L.append("")
    if result.get("engine"):
        L.append("| whole engine (engine.BlockStepper, as in a run) | threads | trajectories x steps | dt | "
                 "traj-steps/s | per core | simulated time per wall second, per trajectory | CPU ns per traj-step | "
                 "our CPU / others' CPU per wall second |")
        L.append("|---|---|---|---|---|---|---|---|---|")
        for r in result["engine"]:
            L.append(f"| {r['case']} | {r['threads']} | {r['trajectories']} x {r['steps']} | {r['dt_s'] * 1e9:.3g} ns | "
                     f"{r['rate']:.3g} | {r['rate_per_core']:.3g} | {r['physical_time_per_s'] * 1e6:.3g} us | "
                     f"{r['cpu_ns_per_traj_step']:.3g} | {r['cpu_per_wall']:.2f} / {r['other_cpu']:.2f} |")
        L.append("")
    q = result.get("quantum")
    if q:
        L.append("| quantum rotor (build + propagate) | CPU | of which build | wall | steps | state columns | "
                 "window (L values) | L at the end |")
        L.append("|---|---|---|---|---|---|---|---|")
        L.append(f"| {q['case']} | {q['cpu_s']:.3g} s | {q['build_cpu_s']:.2g} s | {q['wall_s']:.3g} s | "
                 f"{q['steps']} | {q['columns']} | {q['window_max']} | {q['L_final_hbar']:.0f} +- "
                 f"{q['L_std_final_hbar']:.3g} hbar |")
        L.append("")
    f = result.get("first_run")
    if f:
        L.append("| demo run in a new process (`mdrotor run configs/demo.toml`) | numba cache | wall | CPU | "
                 "compile_s | stepping (wall_s) | kernels cached |")
        L.append("|---|---|---|---|---|---|---|")
        for r in f["runs"]:
            L.append(f"| {f['config']} | {r['cache']} | {r['wall_s']:.3g} s | {r['cpu_s']:.3g} s | "
                     f"{r['compile_s']:.3g} s | {r['run_wall_s']:.3g} s | {r['cached_files']} |")
        L.append("")
    L.append("| target | measured | threshold | ratio | |")
    L.append("|---|---|---|---|---|")
    for t in result["targets"]:
        L.append(f"| {t['target']} | {t['value']:.3g} | {t['threshold']:.3g} | {t['ratio']:.2f} | "
                 f"{'met' if t['met'] else 'MISSED'} |")
    return "\n".join(L)


def machine_info() -> dict:
    import scipy

    cpu = platform.processor() or "unknown CPU"
    try:
        for line in Path("/proc/cpuinfo").read_text().splitlines():
            if line.startswith("model name"):
                cpu = line.split(":", 1)[1].strip()
                break
    except OSError:
        pass
    return {"cpu": cpu, "cores": os.cpu_count(), "python": platform.python_version(), "numpy": np.__version__,
            "numba": numba.__version__, "scipy": scipy.__version__, "mdrotor": mdrotor.__version__,
            "OMP_WAIT_POLICY": os.environ.get("OMP_WAIT_POLICY"),
            "loadavg_start": os.getloadavg()}


def dask_case() -> dict:
    """The demo crystal (2 x 40Ca+, quadrupole pinning) spun up to 100 kHz
    and released: the run that the Dask split is timed on."""
    with open(ROOT / "configs" / "demo.toml", "rb") as fh:
        raw = tomllib.load(fh)
    raw["stage"] = [{"name": "spin-up", "duration": "40 us", "f_rot": {"to": "100 kHz", "shape": "smoothstep"}},
                    {"name": "release", "duration": "20 us", "pinning": {"to": 0.0, "shape": "cosine"}}]
    raw.pop("observe", None)
    return raw


def bench_dask(n_traj: int, repeats: int) -> dict:
    """One run spread over a local Dask cluster of 2 single-threaded worker
    processes (``mdrotor.run(cfg, scheduler=...)``) against the same run in
    this process on 2 threads (``--threads 2``), and the overhead of a chunk:
    many chunks of one trajectory over a 1-step schedule, wall time x
    workers / chunks (task round trip, initial state, observations, merge)."""
    from distributed import LocalCluster

    from mdrotor.config.parse import from_dict

    cfg = from_dict(dask_case(), "dask case", base_dir=ROOT / "configs")
    tiny_raw = dask_case()
    tiny_raw["stage"] = [{"name": "hold", "duration": "5 ns"}]
    tiny = from_dict(tiny_raw, "one step", base_dir=ROOT / "configs")
    out = {"case": "demo crystal, spin-up to 100 kHz (40 us) and release (20 us)", "trajectories": n_traj}
    best_local = math.inf
    for _ in range(repeats):
        t0 = time.perf_counter()
        res = mdrotor.run(cfg, trajectories=n_traj, threads=2)
        best_local = min(best_local, time.perf_counter() - t0)
        out["steps"] = int(res.attrs["n_steps"])
        out["local_loop_s"] = min(out.get("local_loop_s", math.inf), float(res.attrs["wall_s"]))
    out["local_total_s"] = best_local
    with LocalCluster(n_workers=2, threads_per_worker=1, processes=True, dashboard_address=None) as cluster:
        addr = cluster.scheduler_address
        mdrotor.run(cfg, trajectories=8, scheduler=addr, split=2)   # compile and cache the plan on both workers
        mdrotor.run(tiny, trajectories=8, scheduler=addr, split=1)
        best_split, best_loop = math.inf, math.inf
        for _ in range(repeats):
            t0 = time.perf_counter()
            res = mdrotor.run(cfg, trajectories=n_traj, scheduler=addr)
            best_split = min(best_split, time.perf_counter() - t0)
            best_loop = min(best_loop, float(res.attrs["wall_s"]))
            out["chunks"] = -(-n_traj // int(res.attrs["split_trajectories"]))
        n_chunks = 64
        best_tiny = math.inf
        for _ in range(repeats):
            res = mdrotor.run(tiny, trajectories=n_chunks, scheduler=addr, split=1)
            best_tiny = min(best_tiny, float(res.attrs["wall_s"]))
    out["dask_total_s"] = best_split
    out["dask_loop_s"] = best_loop
    out["local_rate"] = n_traj * out["steps"] / out["local_loop_s"]
    out["dask_rate"] = n_traj * out["steps"] / out["dask_loop_s"]
    out["dask_over_local"] = out["dask_rate"] / out["local_rate"]
    out["chunk_overhead_s"] = best_tiny * 2 / n_chunks
    return out


def dask_markdown(d: dict) -> str:
    return "\n".join([
        f"One run across a local Dask cluster ({d['case']}; {d['trajectories']} trajectories x {d['steps']} steps):",
        "",
        "| | wall of the integration | trajectory-steps/s | whole call |",
        "|---|---|---|---|",
        f"| this process, 2 threads | {g3(d['local_loop_s'])} s | {g3(d['local_rate'])} | {g3(d['local_total_s'])} s |",
        f"| 2 Dask workers x 1 thread, {d['chunks']} chunks | {g3(d['dask_loop_s'])} s | {g3(d['dask_rate'])} "
        f"({d['dask_over_local']:.2f}x) | {g3(d['dask_total_s'])} s |",
        "",
        f"Overhead per chunk (64 chunks of one trajectory and one step, wall x 2 workers / chunks): "
        f"{d['chunk_overhead_s'] * 1e3:.3g} ms.",
    ])


def print_partial(result, t_start: float, args) -> int:
    """The end of a run of one part (``--engine-only``, ``--first-run``,
    ...): its targets and table, and the numbers as a full run gives them
    (``--json``, ``--out``)."""
    result["targets"] = targets(result)
    result["wall_s"] = time.perf_counter() - t_start
    result["machine"]["loadavg_end"] = os.getloadavg()
    table = markdown(result)
    text = json.dumps(result, indent=1, default=float)
    if args.out:
        Path(args.out).write_text(text + "\n")
    if args.json:
        print(table, file=sys.stderr)
        print(text)
    else:
        print(table)
    return 0


def main(argv=None) -> int:
    ap = argparse.ArgumentParser(description=__doc__.split("\n\n")[0],
                                 formatter_class=argparse.RawDescriptionHelpFormatter)
    ap.add_argument("--quick", action="store_true", help="small sizes: a smoke run under a minute")
    ap.add_argument("--json", action="store_true", help="one JSON object on stdout (the table goes to stderr)")
    ap.add_argument("--out", metavar="FILE.json", help="also write the JSON object to this file")
    ap.add_argument("--engine-only", action="store_true", help="only the whole-engine table (noise, lasers, RF)")
    ap.add_argument("--dask-only", action="store_true",
                    help="only one run spread over a local 2-worker Dask cluster against --threads 2")
    ap.add_argument("--quantum-only", action="store_true", help="only the quantum rotor case and its target")
    ap.add_argument("--rf-only", action="store_true",
                    help="only the RF section: cost against the pseudopotential and accuracy against a fine step")
    ap.add_argument("--kernel-only", action="store_true",
                    help="only the kernel table (N = 2 to 30, bare pair loop), no baselines")
    ap.add_argument("--first-run", action="store_true",
                    help="only the demo's first run in a fresh process with an empty numba cache, then cached")
    ap.add_argument("--memory-child", nargs=3, metavar=("STEPS", "TRAJ", "DT_S"), help=argparse.SUPPRESS)
    args = ap.parse_args(argv)

    if args.memory_child:
        s, b, dt = args.memory_child
        print(json.dumps(memory_child(int(s), int(b), float(dt))))
        return 0

    rtols = [10 ** (-k / 2) for k in range(6, 27)]   # 1e-3 ... 1e-13, half-decade steps
    if args.quick:
        sizes = dict(traj=1024, steps=500, repeats=3,                  # kernel
                     np_traj=1024, np_steps=30, np_repeats=1,          # numpy baseline
                     ivp_n=(2,), ivp_time=5e-6, ivp_traj=2, ivp_repeats=1, rtols=rtols, tight=False,
                     mem_steps=(200, 2000), mem_traj=10_000, eng_traj=512, eng_steps=256, eng_repeats=1,
                     rf_traj=16, rf_cost_traj=16, rf_spin_up="20 us", rf_cost_spin_up="20 us")
    else:
        sizes = dict(traj=4096, steps=2000, repeats=15,
                     np_traj=4096, np_steps=200, np_repeats=3,
                     ivp_n=(2, 4, 8), ivp_time=20e-6, ivp_traj=3, ivp_repeats=3, rtols=rtols, tight=True,
                     mem_steps=(1000, 10_000), mem_traj=10_000, eng_traj=2048, eng_steps=4096, eng_repeats=5,
                     rf_traj=200, rf_cost_traj=400, rf_spin_up="0.2 ms", rf_cost_spin_up=None)
    t_start = time.perf_counter()
    result = {"machine": machine_info(), "settings": {k: (list(v) if isinstance(v, tuple) else v)
                                                      for k, v in sizes.items()},
              "kernel": [], "numpy": [], "solve_ivp": [], "memory": []}
    if args.dask_only:
        result["dask"] = bench_dask(512 if args.quick else 4096, 1 if args.quick else 3)
        result["wall_s"] = time.perf_counter() - t_start
        result["machine"]["loadavg_end"] = os.getloadavg()
        print(dask_markdown(result["dask"]))
        if args.out:
            Path(args.out).write_text(json.dumps(result, indent=1, default=float) + "\n")
        return 0
    if args.engine_only:
        result["engine"] = []
        for label, raw in engine_cases():
            for threads in (1, 2):
                n_steps = sizes["eng_steps"] * (4 if " rf" in label else 1)
                log(f"engine: {label}, {threads} thread(s)")
                result["engine"].append(bench_engine(label, raw, sizes["eng_traj"], n_steps, sizes["eng_repeats"],
                                                     threads))
        return print_partial(result, t_start, args)
    if args.first_run:
        log("the demo's first run (subprocesses, empty numba cache)")
        result["first_run"] = bench_first_run(1 if args.quick else 3)
        return print_partial(result, t_start, args)
    if args.rf_only:
        result["rf"] = bench_rf(sizes["rf_traj"], sizes["rf_cost_traj"], sizes["rf_spin_up"], sizes["rf_cost_spin_up"])
        result["targets"] = targets(result)
        result["wall_s"] = time.perf_counter() - t_start
        result["machine"]["loadavg_end"] = os.getloadavg()
        print(rf_markdown(result["rf"]))
        if args.out:
            Path(args.out).write_text(json.dumps(result, indent=1, default=float) + "\n")
        return 0
    if args.quantum_only:
        log("quantum rotor")
        result["quantum"] = bench_quantum(1 if args.quick else 3)
        return print_partial(result, t_start, args)
    problems = problem_dicts()
    numpy_problems = []
    demo_dt = None
    for label, raw in problems:
        log(f"kernel: {label}")
        n_ions = raw["crystal"]["ions"]
        # the large crystals: fewer steps, about the pair-steps of N = 8
        steps = sizes["steps"] if n_ions <= 8 else max(20, sizes["steps"] * 28 // (n_ions * (n_ions - 1) // 2))
        plan, pos0, vel0, row = bench_kernel(label, raw, sizes["traj"], steps, sizes["repeats"])
        result["kernel"].append(row)
        log(f"    {row['rate_1t']:.3g} traj-steps/s (1 thread), {row['rate_2t']:.3g} (2 threads)")
        if demo_dt is None:
            demo_dt = plan.dt_s
        if n_ions > 8 or args.kernel_only:  # the baselines cover N <= 8 (numpy's (3, N, N, T) temporaries grow as N^2)
            continue
        log(f"numpy baseline: {label}")
        rel = check_numpy(plan, pos0, vel0, 64, 200)
        rate = time_numpy(plan, pos0, vel0, sizes["np_traj"], sizes["np_steps"], sizes["np_repeats"])
        result["numpy"].append({"N": row["N"], "trajectories": sizes["np_traj"], "steps": sizes["np_steps"],
                                "check_trajectories": 64, "check_steps": 200, "max_rel_diff": rel,
                                "rate_default_malloc": rate})
        numpy_problems.append((plan, pos0, vel0))
        if row["N"] in sizes["ivp_n"]:
            log(f"solve_ivp: {label}")
            result["solve_ivp"].append(bench_ivp(label, raw, sizes["ivp_time"], sizes["ivp_traj"], sizes["rtols"],
                                                 row["rate_1t"], sizes["tight"], sizes["ivp_repeats"]))
    if args.kernel_only:
        return print_partial(result, t_start, args)
    # the numpy baseline again, without page-fault overhead (conservative: the faster one counts)
    tuned = keep_freed_memory()
    for r, k, (plan, pos0, vel0) in zip(result["numpy"], result["kernel"], numpy_problems):
        log(f"numpy baseline, malloc keeps freed memory: N={r['N']}")
        r["rate_tuned_malloc"] = (time_numpy(plan, pos0, vel0, sizes["np_traj"], sizes["np_steps"], sizes["np_repeats"])
                                  if tuned else None)
        r["rate"] = max(r["rate_default_malloc"], r["rate_tuned_malloc"] or 0.0)
        r["kernel_over_numpy"] = k["rate_1t"] / r["rate"]
    result["engine"] = []
    for label, raw in engine_cases():
        for threads in (1, 2):
            n_steps = sizes["eng_steps"] * (4 if " rf" in label else 1)
            log(f"engine: {label}, {threads} thread(s)")
            result["engine"].append(bench_engine(label, raw, sizes["eng_traj"], n_steps, sizes["eng_repeats"], threads))
    log("RF runs: cost and accuracy")
    result["rf"] = bench_rf(sizes["rf_traj"], sizes["rf_cost_traj"], sizes["rf_spin_up"], sizes["rf_cost_spin_up"])
    log("quantum rotor")
    result["quantum"] = bench_quantum(1 if args.quick else 3)
    log(f"    {result['quantum']['cpu_s']:.3g} s CPU")
    log("the demo's first run (subprocesses, empty numba cache)")
    result["first_run"] = bench_first_run(1 if args.quick else 3)
    log("memory (subprocesses)")
    result["memory"] = bench_memory(sizes["mem_steps"], sizes["mem_traj"], demo_dt)
    try:
        import distributed  # noqa: F401  (the optional cluster extra)
    except ImportError:
        log("Dask split: skipped (distributed is not installed)")
    else:
        log("Dask split (a local cluster of 2 workers)")
        result["dask"] = bench_dask(512 if args.quick else 4096, 1 if args.quick else 3)
    result["targets"] = targets(result)
    result["wall_s"] = time.perf_counter() - t_start
    result["machine"]["loadavg_end"] = os.getloadavg()
    result["machine"]["threading_layer"] = numba.threading_layer()
    table = markdown(result)
    if "rf" in result:
        table += "\n\n" + rf_markdown(result["rf"])
    if "dask" in result:
        table += "\n\n" + dask_markdown(result["dask"])
    text = json.dumps(result, indent=1, default=float)
    if args.out:
        Path(args.out).write_text(text + "\n")
    if args.json:
        print(table, file=sys.stderr)
        print(text)
    else:
        print(table)
    log(f"total wall time {result['wall_s']:.0f} s")
    return 0


if __name__ == "__main__":
    sys.exit(main())
