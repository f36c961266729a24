"""A run split into pieces gives the run: per-trajectory independence, the
Dask split of one run, and chunked runs.

All checks here are bit-for-bit: each trajectory's outputs are a function of
(config, seed, trajectory index) alone (counter-keyed random streams and a
fixed lattice of measurement frames; common practice, no source), so any
way of splitting the trajectories must reproduce them exactly.
"""

from __future__ import annotations

import numpy as np
import pytest
from conftest import assert_identical, toml_text, two_ion_config

import mdrotor

NOISE = {
    "field": [{"psd": [{"kind": "power", "level": "2e-13 V^2/m^2/Hz", "f_ref": "1 MHz", "alpha": 1.0,
                        "f_min": "50 kHz", "f_max": "5 MHz"},
                       {"kind": "white", "level": "2e-14 V^2/m^2/Hz"}]}],
    "multipole": [{"order": 2, "psd": [{"kind": "white", "level": "5e-3 V^2/m^4/Hz"},
                                        {"kind": "lorentzian", "level": "5e-2 V^2/m^4/Hz", "f_center": "400 kHz",
                                         "width": "30 kHz"}]}],
}


def release_dict(**over) -> dict:
    """Two 40Ca+ ions spun to 60 kHz by a quadrupole, released and left free
    (the free stage measures each trajectory at its own rate)."""
    sections = {
        "stage": [{"name": "spin-up", "duration": "20 us", "f_rot": {"to": "60 kHz", "shape": "smoothstep"}},
                  {"name": "release", "duration": "8 us", "pinning": {"to": 0.0, "shape": "cosine"}},
                  {"name": "free", "duration": "6 us"}],
        "initial": {"temperature": "0.5 mK", "wigner": True},
        "run": {"trajectories": 8, "seed": 20261202},
    }
    sections.update(over)
    return two_ion_config(**sections)


def rf_dict() -> dict:
    d = release_dict()
    d["trap"] = {"model": "rf", "f_radial": "1.2 MHz", "f_axial": "2.9 MHz", "f_drive": "30 MHz"}
    d["stage"] = [{"name": "spin-up", "duration": "4 us", "f_rot": {"to": "30 kHz", "shape": "smoothstep"}},
                  {"name": "release", "duration": "3 us", "pinning": {"to": 0.0, "shape": "cosine"}}]
    return d


def noise_dict() -> dict:
    return release_dict(noise=NOISE)


CASES = {"unpinned release": release_dict, "rf": rf_dict, "noise": noise_dict}


def observations(res) -> dict:
    out = {"initial": res.initial}
    out.update(res.stages)
    return out


def assert_same_trajectories(big, part, idx) -> None:
    """Trajectories ``idx`` of ``big`` equal those of ``part`` (a run of
    those indices alone), bit for bit, in every per-trajectory array of
    every observation."""
    ob, op = observations(big), observations(part)
    assert list(ob) == list(op)
    for name in ob:
        for key, v in op[name].arrays.items():
            assert np.array_equal(ob[name].arrays[key][idx], v, equal_nan=True), (name, key)


@pytest.mark.parametrize("case", list(CASES))
def test_trajectory_outputs_do_not_depend_on_companions(case):
    """Trajectories 0..k-1 and k..2k-1 of a run of 2k trajectories equal
    those of runs of each half alone (bit for bit); the free stage actually
    measures rotating crystals, each at its own rate."""
    cfg = mdrotor.load_config(CASES[case]())
    k = 3
    big = mdrotor.run(cfg, trajectories=2 * k)
    for idx in (np.arange(k), np.arange(k, 2 * k), np.array([2 * k - 1])):  # (one alone: the warm-up step must not touch it)
        assert_same_trajectories(big, mdrotor.run(cfg, order=idx), idx)
    fin = big.final
    assert fin.summary["n_ok"] == 2 * k
    assert fin.frame == "rotating"
    assert len(np.unique(fin.arrays["f_rot_hz"])) == 2 * k


# ---------------------------------------------------------------------------
# one run spread over a Dask cluster
# ---------------------------------------------------------------------------
@pytest.fixture(scope="module")
def cluster():
    """A local Dask cluster of 2 single-threaded worker processes."""
    distributed = pytest.importorskip("distributed")
    with distributed.LocalCluster(n_workers=2, threads_per_worker=1, processes=True, dashboard_address=None) as c:
        yield c


def assert_same_run(a, b) -> None:
    """Every per-trajectory array, summary, mode table, series and derived
    block (noise rates, micromotion) equal, bit for bit."""
    oa, ob = observations(a), observations(b)
    assert list(oa) == list(ob)
    for name in oa:
        x, y = oa[name], ob[name]
        assert_identical(x.arrays, y.arrays, f"{name}.arrays")
        assert_identical(x.summary, y.summary, f"{name}.summary")
        assert_identical(x.modes, y.modes, f"{name}.modes")
        assert (x.frame, x.frame_f_rot_hz) == (y.frame, y.frame_f_rot_hz), name
    assert_identical(a.series, b.series, "series")
    assert_identical(a.extra, b.extra, "extra")


@pytest.mark.parametrize("case", list(CASES))
def test_dask_split_equals_local_run(cluster, case):
    """A run spread over 2 Dask workers in chunks of 2 trajectories (the last
    one shorter) equals the local run bit for bit: every per-trajectory
    dataset, the statistics, the time series and the noise / RF blocks."""
    d = CASES[case]()
    d["observe"] = {"series_interval": "2 us"}
    cfg = mdrotor.load_config(d)
    local = mdrotor.run(cfg, trajectories=5)
    split = mdrotor.run(cfg, trajectories=5, scheduler=cluster.scheduler_address, split=2)
    assert split.attrs["dask_workers"] == 2 and split.attrs["split_trajectories"] == 2
    assert_same_run(local, split)
    assert local.series is not None and len(local.series["t_s"]) > 3
    if case == "noise":
        assert "D_fit_hbar2_per_s" in split.extra["noise"]
    if case == "rf":
        assert "ke_measured_j" in split.extra["micromotion"]


def test_run_command_with_scheduler(cluster, tmp_path):
    """``mdrotor run --scheduler ADDRESS`` writes the file a local run writes
    (every dataset and summary attribute; provenance such as wall time aside)."""
    import subprocess
    import sys

    import h5py

    src = tmp_path / "r.toml"
    src.write_text(toml_text(two_ion_config(
        stage=[{"name": "spin-up", "duration": "10 us", "f_rot": {"to": "40 kHz", "shape": "smoothstep"}},
               {"name": "release", "duration": "5 us", "pinning": {"to": 0.0, "shape": "cosine"}}],
        initial={"temperature": "0.5 mK"}, run={"trajectories": 7, "seed": 3})))
    outs = {}
    for name, extra in (("local", []), ("dask", ["--scheduler", cluster.scheduler_address, "--split", "3"])):
        out = tmp_path / f"{name}.h5"
        r = subprocess.run([sys.executable, "-m", "mdrotor", "run", str(src), "-o", str(out), "--quiet", *extra],
                           capture_output=True, text=True)
        assert r.returncode == 0, r.stderr
        outs[name] = out
    skip = {"wall_s", "compile_s", "traj_steps_per_s", "created", "threads", "dask_workers", "split_trajectories"}
    with h5py.File(outs["local"]) as fa, h5py.File(outs["dask"]) as fb:
        assert fb.attrs["dask_workers"] == 2
        for k in set(fa.attrs) - skip:
            assert_identical(fa.attrs[k], fb.attrs[k], k)

        def visit(name, obj):
            other = fb[name]
            if isinstance(obj, h5py.Dataset):
                assert_identical(obj[()], other[()], name)
            for k in obj.attrs:
                assert_identical(obj.attrs[k], other.attrs[k], f"{name}@{k}")

        fa.visititems(visit)


def test_slow_and_fast_free_crystals_measured_alone_or_together():
    """A free crystal barely turning (measured in the lab) and one at 60 kHz
    (in its own rotating frame), observed together after a spin-up to 60 kHz:
    the mode columns of the schedule's frame, and each trajectory's numbers
    the same as when it is observed alone."""
    from mdrotor.engine.integrate import make_plan
    from mdrotor.engine.observe import observe
    from mdrotor.physics.frame import rotate_positions

    plan = make_plan(mdrotor.load_config(release_dict()))
    t = plan.schedule.duration_s
    r0 = rotate_positions(plan.crystal0.positions_m, 0.3)
    pos = np.repeat(r0.T[:, :, None], 2, axis=2)
    vel = np.zeros_like(pos)
    for b, f in enumerate((200.0, 60e3)):
        w = 2 * np.pi * f
        vel[0, :, b], vel[1, :, b] = -w * r0[:, 1], w * r0[:, 0]
    lag = np.zeros((2, 2))
    both = observe(plan, pos, vel, t, lag)
    assert both["mode_n"].shape == (2, len(both["_modes"].omega)) and both["_frame"][0] == "rotating"
    assert np.all(np.isfinite(both["mode_n"][1]))
    assert abs(both["f_rot_hz"][0]) < 500 and abs(both["f_rot_hz"][1] / 60e3 - 1) < 0.05
    for b in range(2):
        alone = observe(plan, pos[:, :, b:b + 1].copy(), vel[:, :, b:b + 1].copy(), t, lag[:, b:b + 1].copy())
        for k in ("mode_n", "f_rot_hz", "L_hbar", "status"):
            assert np.array_equal(alone[k][0], both[k][b], equal_nan=True), k
