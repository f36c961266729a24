"""mdrotor run: HDF5 layout, round trip, command line, bad schedules."""

import json

import h5py
import numpy as np
import pytest
from conftest import two_ion_toml

import mdrotor
from mdrotor.commands.main import main

CFG = two_ion_toml(
    stage=[{"name": "spin-up", "duration": "30 us", "f_rot": {"to": "20 kHz", "shape": "smoothstep"}},
           {"name": "release", "duration": "10 us", "pinning": {"to": 0.0, "shape": "cosine"}}],
    initial={"temperature": "0.5 mK"}, run={"trajectories": 24, "seed": 3}, observe={"series_interval": "5 us"})


@pytest.fixture
def cfg_path(tmp_path):
    p = tmp_path / "r.toml"
    p.write_text(CFG)
    return p


def test_hdf5_layout_and_round_trip(tmp_path, cfg_path, capsys):
    out = tmp_path / "r.h5"
    assert main(["run", str(cfg_path), "-o", str(out), "--json", "--quiet"]) == 0
    summary = json.loads(capsys.readouterr().out)
    assert summary["n_trajectories"] == 24 and summary["output"] == str(out)
    with h5py.File(out) as f:
        for k in ("format_version", "package_version", "config_text", "seed", "dt_s", "n_steps", "n_trajectories", "created"):
            assert k in f.attrs, k
        for k in ("L_hbar", "f_rot_hz", "mode_n", "status"):
            assert f["final"][k].shape[0] == 24
        assert set(f["stages"].keys()) == {"spin-up", "release"}
        for k in ("freq_hz", "label", "kind"):
            assert k in f["modes"]
        for k in ("L_mean_hbar", "L_std_hbar", "L_mean_err_hbar", "L_std_err_hbar", "slip_fraction", "loss_fraction",
                  "differential_n_mean"):
            assert k in f["summary"].attrs, k
        assert "series" in f and f["series"]["t_s"].shape[0] >= 7
    res = mdrotor.load(out)
    assert res.summary["L_mean_hbar"] == pytest.approx(summary["L_mean_hbar"])
    assert list(res.stages) == ["spin-up", "release"]
    # the config stored in the file runs again to the same numbers
    cfg2 = mdrotor.load_config(tomllib_loads(res.attrs["config_text"]))
    again = mdrotor.run(cfg2)
    assert np.array_equal(again.final.arrays["L_hbar"], res.final.arrays["L_hbar"])
    assert not list(tmp_path.glob(".*tmp*"))  # no temporary file left behind


def tomllib_loads(text):
    import tomllib

    return tomllib.loads(text)


def test_text_summary(tmp_path, cfg_path, capsys):
    out = tmp_path / "r.h5"
    assert main(["run", str(cfg_path), "-o", str(out), "--trajectories", "8", "--seed", "5", "--quiet"]) == 0
    text = capsys.readouterr().out
    assert "trajectory-steps/s" in text and "L =" in text and "libration" not in text.split("final")[1].split("mode")[0]


BAD_SCHEDULES = [
    ('pinning = { to = 0.0, shape = "cosine" }', 'pinning = { from = 2.0, to = 0.0, shape = "cosine" }', "stage.release.pinning.from", "discontinuous"),
    ('duration = "10 us"', 'duration = "-10 us"', "stage.release.duration", "positive"),
    ('shape = "smoothstep"', 'shape = "spline"', "stage.spin-up.f_rot.shape", "unknown shape"),
    ('f_rot = { to = "20 kHz", shape = "smoothstep" }',
     'f_rot = { shape = "table", points = [["0 us", "0 Hz"], ["20 us", "5 kHz"], ["10 us", "8 kHz"], ["30 us", "20 kHz"]] }',
     "stage.spin-up.f_rot.points", "increase"),
    ('to = "20 kHz"', 'to = "2 MHz"', "stage.spin-up.f_rot", "faster than the radial confinement"),
    ('f_rot = { to = "20 kHz", shape = "smoothstep" }', 'f_rot = { to = "20 kHz", shape = "exponential" }', "stage.spin-up.f_rot.tau", "time constant"),
]


@pytest.mark.parametrize("old,new,key,words", BAD_SCHEDULES)
def test_bad_schedule(tmp_path, capsys, old, new, key, words):
    p = tmp_path / "bad.toml"
    assert old in CFG
    p.write_text(CFG.replace(old, new, 1))
    out = tmp_path / "never.h5"
    assert main(["run", str(p), "-o", str(out)]) == 2
    err = capsys.readouterr().err.strip()
    assert len(err.splitlines()) == 1 and key in err and words in err, err
    assert not out.exists()


def test_schedule_inspection_and_theta():
    """theta(t) is the exact integral of f_rot: compare with scipy quad
    (scipy.integrate.quad) for every shape."""
    from scipy.integrate import quad

    cfg = mdrotor.load_config(tomllib_loads(CFG))
    sched = cfg.schedule
    for shape, extra in [("linear", {}), ("cosine", {}), ("smoothstep", {}), ("tanh", {"steepness": 5}),
                         ("exponential", {"tau": "7 us"})]:
        d = tomllib_loads(CFG)
        d["stage"][0]["f_rot"] = {"to": "20 kHz", "shape": shape, **extra}
        sched = mdrotor.load_config(d).schedule
        for t in (3e-6, 17e-6, 30e-6, 38e-6):
            ref = 2 * np.pi * quad(lambda x: float(sched.f_rot_hz(x)), 0, t, epsabs=1e-14, epsrel=1e-13, limit=200,
                                   points=[30e-6])[0]
            assert abs(sched.theta_rad(t) - ref) < 1e-10
        assert sched.f_rot_hz(0.0) == 0.0 and abs(sched.f_rot_hz(30e-6) - 20e3) < 1e-6
    d = tomllib_loads(CFG)
    d["stage"][0]["f_rot"] = {"shape": "table", "points": [["0 us", "0 Hz"], ["10 us", "3 kHz"], ["30 us", "20 kHz"]]}
    sched = mdrotor.load_config(d).schedule
    ref = 2 * np.pi * quad(lambda x: float(sched.f_rot_hz(x)), 0, 30e-6, epsabs=1e-14, points=[10e-6])[0]
    assert abs(sched.theta_rad(30e-6) - ref) < 1e-10
