"""A sweep killed with SIGKILL (and interrupted with SIGINT) at several points
of its run: the output opens, finished points are intact, and the resumed
sweep ends bit-identical to an uninterrupted one."""

import json
import os
import signal
import subprocess
import sys
import time
from pathlib import Path

import h5py
import numpy as np
from conftest import FORCED_OSCILLATOR_TOML

from mdrotor.studies.sweep import load_sweep, run_sweep
from mdrotor.studies.table import read_point, read_table

ROOT = Path(__file__).resolve().parents[2]

# Waits: what the test needs is that the sweep keeps making progress, not that
# it is fast. On a loaded machine (two cores shared by several suites) spawning
# two workers, compiling the kernels and running a point can take minutes, so
# every wait is bounded by a stall (nothing new for this long) or a generous
# ceiling: a hung sweep or a worker that outlives its parent still fails the test.
STALL_S = 600          # no new finished point for this long while waiting for one
EXIT_S = 300           # the sweep to end after SIGKILL / SIGINT
WORKERS_EXIT_S = 120   # the workers to follow their parent (their watchdog looks every 0.5 s)
RESUME_S = 1800        # the resumed sweep to finish the remaining points

# the forced-oscillator crystal of conftest.py, thermal and Wigner-sampled,
# with enough trajectories that a point takes a moment
BASE = (FORCED_OSCILLATOR_TOML.replace('temperature = "0 K"\nwigner = false', 'temperature = "0.5 mK"\nwigner = true')
        .replace("trajectories = 2\nseed = 1", "trajectories = 32\nseed = 3"))

SWEEP = """
base = "base.toml"
seed = 2024
[[axis]]
key = "stage.spin-up.duration"
range = { from = "2 us", to = "13 us", num = 12 }
"""


def _children(pid):
    try:
        return [int(x) for x in Path(f"/proc/{pid}/task/{pid}/children").read_text().split()]
    except OSError:
        return []


def _alive(pid):
    try:
        return Path(f"/proc/{pid}/stat").read_text().split()[2] != "Z"
    except OSError:
        return False


def _parts(out):
    d = Path(str(out) + ".parts")
    return len([p for p in d.iterdir() if p.suffix == ".h5" and not p.name.startswith(".")]) if d.is_dir() else 0


def _wait_for_parts(proc, out, target):
    """Wait until ``target`` points are on disk while the sweep runs; fail
    when it stops or makes no progress for STALL_S."""
    last, t_last = _parts(out), time.monotonic()
    while _parts(out) < target and proc.poll() is None:
        n = _parts(out)
        if n != last:
            last, t_last = n, time.monotonic()
        assert time.monotonic() - t_last < STALL_S, f"no new point for {STALL_S} s ({n} of {target} on disk)"
        time.sleep(0.002)


def _end(proc, timeout):
    """communicate() with a timeout; a sweep that does not end is killed (with
    the workers it started) and the test fails, leaving no process behind."""
    try:
        return proc.communicate(timeout=timeout)
    except subprocess.TimeoutExpired:
        _kill_tree(proc)
        raise AssertionError(f"the sweep did not end within {timeout} s") from None


def _kill_tree(proc):
    for k in _children(proc.pid):
        try:
            os.kill(k, signal.SIGKILL)
        except ProcessLookupError:
            pass
    proc.kill()
    proc.communicate()


def _start(sw, out):
    env = dict(os.environ, PYTHONPATH=str(ROOT) + os.pathsep + os.environ.get("PYTHONPATH", ""))
    return subprocess.Popen([sys.executable, "-m", "mdrotor", "sweep", str(sw), "-o", str(out), "--workers", "2", "--json"],
                            stdout=subprocess.PIPE, stderr=subprocess.PIPE, env=env, cwd=sw.parent)


def _check_intact(out, ref, ref_table):
    """The interrupted output opens; every point it calls finished equals the reference."""
    with h5py.File(out, "r") as f:
        assert f.attrs["kind"] == "sweep"
    t = read_table(out)
    done = np.flatnonzero(t["complete"])
    for i in done:
        for k, v in t["metrics"].items():
            if k != "wall_s":
                assert v[i] == ref_table["metrics"][k][i], (i, k)
        a, b = read_point(out, int(i)), read_point(ref, int(i))
        for sa, sb in zip(a.stages.values(), b.stages.values()):
            for k, v in sa.arrays.items():
                assert np.array_equal(v, sb.arrays[k], equal_nan=True), (i, k)
    return len(done)


def test_kill_and_resume_bit_identical(tmp_path):
    (tmp_path / "base.toml").write_text(BASE)
    sw = tmp_path / "sweep.toml"
    sw.write_text(SWEEP)
    ref = tmp_path / "ref.h5"
    run_sweep(load_sweep(sw), ref, workers=1)  # uninterrupted, in this process
    ref_table = read_table(ref)
    n = len(ref_table["index"])

    out = tmp_path / "out.h5"
    seen = []
    # interrupt when 2, 5 and 9 of the 12 points are on disk: SIGKILL, SIGINT (Ctrl-C), SIGKILL
    for target, sig in ((2, signal.SIGKILL), (5, signal.SIGINT), (9, signal.SIGKILL)):
        proc = _start(sw, out)
        try:
            _wait_for_parts(proc, out, target)
        except BaseException:
            _kill_tree(proc)
            raise
        assert proc.poll() is None, proc.communicate()  # still running: the interruption lands mid-sweep
        kids = _children(proc.pid)
        proc.send_signal(sig)
        _, err = _end(proc, EXIT_S)
        if sig == signal.SIGINT:
            assert proc.returncode == 130 and b"rerun the same command to resume" in err
        else:
            assert proc.returncode == -signal.SIGKILL
        # the worker processes leave with their parent (watchdog), even after SIGKILL
        t0 = time.monotonic()
        while any(_alive(k) for k in kids) and time.monotonic() - t0 < WORKERS_EXIT_S:
            time.sleep(0.1)
        stray = [k for k in kids if _alive(k)]
        for k in stray:  # do not leave processes behind if the check fails
            os.kill(k, signal.SIGKILL)
        assert not stray
        done = _check_intact(out, ref, ref_table)
        assert _parts(out) >= target
        seen.append(done)
    assert seen[-1] < n
    # resume to the end
    proc = _start(sw, out)
    stdout, err = _end(proc, RESUME_S)
    assert proc.returncode == 0, err
    summ = json.loads(stdout)
    assert summ["resumed"] >= 9 and summ["resumed"] + summ["ran"] == n
    assert not Path(str(out) + ".parts").exists()
    t = read_table(out)
    assert t["complete"].all()
    assert np.array_equal(t["seed"], ref_table["seed"])
    for k, v in ref_table["metrics"].items():
        if k != "wall_s":
            assert np.array_equal(t["metrics"][k], v, equal_nan=True), k
    assert _check_intact(out, ref, ref_table) == n
