"""Sweeps: the forced-oscillator law across a grid, executor independence,
resuming and change detection, CSV export, sampling, bad sweep files."""

import csv
import json
import math

import numpy as np
import pytest
from conftest import FORCED_OSCILLATOR_TOML
from scipy import constants as sc

from mdrotor.commands.main import main
from mdrotor.engine.executors import ProcessExecutor, SerialExecutor
from mdrotor.studies.sweep import load_sweep, run_sweep
from mdrotor.studies.table import export_csv, read_point, read_table

# the forced-oscillator crystal of conftest.py (deterministic trajectories)
FO_BASE = FORCED_OSCILLATOR_TOML
F_ROT_END_HZ = 2e3

# The same crystal, thermal and Wigner-sampled: results depend on the seeds.
THERMAL = FO_BASE.replace('temperature = "0 K"\nwigner = false', 'temperature = "0.5 mK"\nwigner = true')

SKIP_COLUMNS = {"wall_s"}  # wall-clock time is the one metric that is not reproducible


def write(tmp_path, name, text):
    p = tmp_path / name
    p.write_text(text)
    return p


def cli(argv):
    """Run ``mdrotor sweep ...`` in-process through the command line."""
    return main(argv)


def assert_same_results(a, b, n):
    """Every point's per-trajectory arrays and every table metric equal, bit for bit."""
    ta, tb = read_table(a), read_table(b)
    assert np.array_equal(ta["complete"], tb["complete"]) and ta["complete"].all()
    assert np.array_equal(ta["seed"], tb["seed"])
    assert set(ta["metrics"]) == set(tb["metrics"])
    for k in ta["metrics"]:
        if k not in SKIP_COLUMNS:
            assert np.array_equal(ta["metrics"][k], tb["metrics"][k], equal_nan=True), k
    for i in range(n):
        ra, rb = read_point(a, i), read_point(b, i)
        assert ra.attrs["config_text"] == rb.attrs["config_text"]
        for obs_a, obs_b in [(ra.initial, rb.initial), *zip(ra.stages.values(), rb.stages.values())]:
            for k, v in obs_a.arrays.items():
                assert np.array_equal(v, obs_b.arrays[k], equal_nan=True), (i, obs_a.name, k)


# ---------------------------------------------------------------------------
def test_forced_oscillator_law_across_grid(tmp_path):
    """Libration energy after a linear spin-up of duration T.

    In the frame of the pinning potential the ramp is a constant torque
    -I alpha (alpha = 2 pi f_rot / T) switched on for a time T; an oscillator
    at rest driven so is left with E = 2 I (alpha / w)^2 sin^2(w T / 2)
    (L.D. Landau and E.M. Lifshitz, Mechanics, 3rd ed., Pergamon 1976, sec. 22,
    problem 2). With a classical start, mode_n = E / (hbar w).
    """
    write(tmp_path, "base.toml", FO_BASE)
    sw = write(tmp_path, "sweep.toml", """
base = "base.toml"
[[axis]]
key = "stage.spin-up.duration"
range = { from = "2 us", to = "10 us", num = 9 }
""")
    spec = load_sweep(sw)
    out = tmp_path / "fo.h5"
    summ = run_sweep(spec, out, workers=1)
    assert summ["completed"] == 9 and summ["failed"] == 0
    table = read_table(out)
    T = table["axes"]["stage.spin-up.duration"]["si"]
    assert np.allclose(T, np.linspace(2e-6, 10e-6, 9), rtol=1e-12, atol=0)
    n_sim, n_law, n_scale = [], [], []
    for i in range(9):
        res = read_point(out, i)
        k = res.final.modes["label"].index("libration")
        w = 2 * np.pi * res.final.modes["freq_hz"][k]
        inertia = res.attrs["moment_of_inertia_kg_m2"]
        alpha = 2 * np.pi * F_ROT_END_HZ / T[i]
        scale = 2 * inertia * (alpha / w) ** 2 / (sc.hbar * w)  # largest value the law allows at this T
        n_sim.append(res.final.arrays["mode_n"][:, k])
        n_law.append(scale * np.sin(w * T[i] / 2) ** 2)
        n_scale.append(scale)
        # the table column is the mean over the trajectories
        # (a mean differs from numpy's only by the order of rounding: results.stats sums deviations)
        assert table["metrics"]["mode_n_mean.libration"][i] == pytest.approx(
            np.mean(res.final.arrays["mode_n"][:, k]), rel=1e-13)
    n_sim, n_law, n_scale = np.array(n_sim), np.array(n_law)[:, None], np.array(n_scale)[:, None]
    # Tolerance 1e-3 of the law's amplitude at each T. Expected deviations:
    # Verlet energy error ~ (w dt)^2 / 24 with w dt ~ 0.012 (40 steps per
    # period of the fastest motion, ~13x faster than the libration): 1e-5;
    # shift of w by the 2 kHz rotation ~ (f_rot / f_lib)^2 ~ 1e-4; anharmonicity
    # of the cos(2 phi) well at amplitudes phi <= 2 alpha / w^2 ~ 7e-3 rad: 1e-5.
    assert np.all(np.abs(n_sim - n_law) <= 1e-3 * n_scale), np.c_[n_sim[:, 0], n_law[:, 0]]
    # the grid spans a zero and maxima of sin^2: the law is really tested
    assert n_law.min() < 1e-2 * n_law.max()


def thermal_sweep(tmp_path):
    write(tmp_path, "base.toml", THERMAL)
    sw = write(tmp_path, "sweep.toml", """
base = "base.toml"
trajectories = 12
seed = 99
[[axis]]
key = "stage.spin-up.duration"
values = ["3 us", "6 us"]
[[axis]]
key = "initial.temperature"
values = ["0.2 mK", "1 mK"]
""")
    return load_sweep(sw)


def test_results_do_not_depend_on_executor(tmp_path):
    """1 worker (in process), the points run in reverse order, and 2 local
    worker processes give bit-identical results."""
    spec = thermal_sweep(tmp_path)
    n = len(spec.points)
    assert n == 4 and len(set(spec.seeds)) == 4  # per-point seeds differ

    class Reversed(SerialExecutor):
        def run(self, tasks):
            yield from super().run(list(tasks)[::-1])

    run_sweep(spec, tmp_path / "one.h5", workers=1)
    run_sweep(spec, tmp_path / "rev.h5", executor=Reversed())
    pool = ProcessExecutor(2)
    try:
        run_sweep(spec, tmp_path / "two.h5", executor=pool)
    finally:
        pool.close()
    assert_same_results(tmp_path / "one.h5", tmp_path / "rev.h5", n)
    assert_same_results(tmp_path / "one.h5", tmp_path / "two.h5", n)
    # the thermal ensemble really is random: the points differ from each other
    t = read_table(tmp_path / "one.h5")["metrics"]["L_std_hbar"]
    assert np.all(t > 0) and len(set(t)) == 4


def test_dask_cluster_gives_same_results(tmp_path):
    """A Dask LocalCluster (worker processes on loopback) gives the same
    results as one local worker, bit for bit."""
    distributed = pytest.importorskip("distributed")
    spec = thermal_sweep(tmp_path)
    run_sweep(spec, tmp_path / "one.h5", workers=1)
    with distributed.LocalCluster(n_workers=2, threads_per_worker=1, processes=True, host="127.0.0.1",
                                  dashboard_address=None) as cluster:
        s = run_sweep(spec, tmp_path / "dask.h5", scheduler=cluster.scheduler_address)
    assert s["ran"] == len(spec.points)
    assert_same_results(tmp_path / "one.h5", tmp_path / "dask.h5", len(spec.points))


def test_resume_change_detection_and_csv(tmp_path, capsys):
    write(tmp_path, "base.toml", FO_BASE)
    text = """
base = "base.toml"
[[axis]]
key = "stage.spin-up.duration"
values = ["3 us", "4 us"]
"""
    sw = write(tmp_path, "sweep.toml", text)
    out = tmp_path / "out.h5"
    args = ["sweep", str(sw), "-o", str(out), "--workers", "1", "--json", "--quiet"]
    assert cli(args) == 0
    first = json.loads(capsys.readouterr().out)
    assert first["ran"] == 2 and first["resumed"] == 0
    assert not (tmp_path / "out.h5.parts").exists()  # consolidated into one file
    # the same command again: nothing to run
    assert cli(args) == 0
    again = json.loads(capsys.readouterr().out)
    assert again["ran"] == 0 and again["resumed"] == 2
    # a changed sweep file is refused ...
    sw.write_text(text.replace('"4 us"', '"4.5 us"'))
    assert cli(args) == 2
    err = capsys.readouterr().err.strip().splitlines()
    assert len(err) == 1 and "--restart" in err[0]
    # ... unless --restart
    assert cli(args + ["--restart", "--csv", str(tmp_path / "t.csv")]) == 0
    third = json.loads(capsys.readouterr().out)
    assert third["ran"] == 2
    with open(tmp_path / "t.csv") as fh:
        rows = list(csv.DictReader(fh))
    t = read_table(out)
    assert [r["stage.spin-up.duration"] for r in rows] == ["3 us", "4.5 us"]
    assert [float(r["stage.spin-up.duration [SI]"]) for r in rows] == [3e-6, 4.5e-6]
    for r, i in zip(rows, range(2)):
        assert r["status"] == "done" and int(r["seed"]) == int(t["seed"][i])
        assert float(r["L_mean_hbar"]) == t["metrics"]["L_mean_hbar"][i]  # repr round trip: exact
    assert export_csv(out, tmp_path / "u.csv") == 2


def test_sampling_within_bounds_and_stratified(tmp_path):
    """Latin hypercube: each of n equal strata of every axis holds exactly
    one point (M.D. McKay, R.J. Beckman, W.J. Conover, Technometrics 21, 239
    (1979)); scrambled Sobol' points, n = 2^m, are a (0, m, 1)-net in each
    coordinate, so the same holds (I.M. Sobol', USSR Comput. Math. Math.
    Phys. 7, 86 (1967); A.B. Owen, 1995: scrambling keeps the net property)."""
    write(tmp_path, "base.toml", FO_BASE)
    for method in ("lhs", "sobol"):
        sw = write(tmp_path, f"{method}.toml", f"""
base = "base.toml"
combine = "sample"
[sample]
method = "{method}"
points = 8
seed = 3
[[axis]]
key = "stage.spin-up.duration"
bounds = ["2 us", "6 us"]
[[axis]]
key = "pinning.strength"
bounds = ["1e5 V/m^2", "4e5 V/m^2"]
scale = "log"
""")
        spec = load_sweep(sw)
        T = np.array([c.schedule.stages[0].duration_s for c in spec.configs])
        k = np.array([c.pinning[0].strength for c in spec.configs])
        uT = (T - 2e-6) / 4e-6
        uk = np.log(k / 1e5) / np.log(4.0)
        for u in (uT, uk):
            assert np.all((u >= 0) & (u <= 1))
            # values are written with 12 significant digits: strata edges are safe by far
            assert sorted(np.floor(u * 8).astype(int)) == list(range(8))
        again = load_sweep(sw)
        assert again.points == spec.points and again.hash == spec.hash  # same seed, same sample


BAD_SWEEPS = [
    ('[[axis]]\nkey = "pinning.strenght"\nvalues = ["1e5 V/m^2"]', ["axis 'pinning.strenght'", "point 0", "unknown key"]),
    ('[[axis]]\nkey = "pinning.strength"\nvalues = ["1e5 V/m^2", "2 kHz"]', ["axis 'pinning.strength'", "point 1", "2 kHz"]),
    ('[[axis]]\nkey = "stage.spin-up.duration"\nvalues = ["1 us", "-1 us"]', ["axis 'stage.spin-up.duration'", "point 1", "positive"]),
    ('[[axis]]\nkey = "stage.ramp.duration"\nvalues = ["1 us"]', ["axis 'stage.ramp.duration'", "no item 'ramp'"]),
    ('combine = "zip"\n[[axis]]\nkey = "pinning.strength"\nvalues = ["1e5 V/m^2"]\n[[axis]]\nkey = "initial.temperature"\nvalues = ["1 mK", "2 mK"]',
     ["equal length"]),
    ('combine = "product"\n[[axis]]\nkey = "pinning.strength"\nvalues = ["1e5 V/m^2"]', ["combine", "grid"]),
    ('[[axis]]\nkey = "stage.spin-up.duration"\nrange = { from = "1 us", to = "3 kHz", num = 3 }', ["range.to", "us"]),
    ('combine = "sample"\n[[axis]]\nkey = "pinning.strength"\nbounds = ["1e5 V/m^2", "2e5 V/m^2"]', ["[sample]"]),
    ('[[axis]]\nkey = "run.seed"\nvalues = [1, 2]', ["run.seed", "seeding"]),
    ('step = 3\n[[axis]]\nkey = "pinning.strength"\nvalues = ["1e5 V/m^2"]', ["step", "unknown key"]),
    ('[[axis]]\nkey = "pinning.strength"\nvalues = ["1e5 V/m^2"', ["not valid TOML"]),
]


@pytest.mark.parametrize("body, words", BAD_SWEEPS)
def test_bad_sweep_files_one_line_exit_2(tmp_path, capsys, body, words):
    write(tmp_path, "base.toml", FO_BASE)
    sw = write(tmp_path, "bad.toml", 'base = "base.toml"\n' + body + "\n")
    out = tmp_path / "out.h5"
    assert cli(["sweep", str(sw), "-o", str(out), "--workers", "1", "--quiet"]) == 2
    err = capsys.readouterr().err.strip().splitlines()
    assert len(err) == 1, err
    assert err[0].startswith("mdrotor: error: ") and str(sw) in err[0]
    for w in words:
        assert w in err[0], err[0]
    assert not out.exists()  # validation comes before anything runs


def test_bad_command_lines(tmp_path, capsys):
    write(tmp_path, "base.toml", FO_BASE)
    sw = write(tmp_path, "s.toml", 'base = "missing.toml"\n[[axis]]\nkey = "pinning.strength"\nvalues = ["1e5 V/m^2"]\n')
    cases = [
        (["sweep", str(sw)], ["base", "missing.toml"]),
        (["sweep", str(tmp_path / "nope.toml")], ["cannot read sweep file"]),
        (["sweep", str(sw), "--workers", "0"], ["--workers"]),
        (["sweep", str(sw), "--workers", "2", "--scheduler", "tcp://127.0.0.1:1"], ["--scheduler"]),
        (["sweep", str(sw), "-o", str(tmp_path / "no" / "out.h5")], ["does not exist"]),
    ]
    for argv, words in cases:
        assert cli(argv) == 2
        err = capsys.readouterr().err.strip().splitlines()
        assert len(err) == 1, err
        for w in words:
            assert w in err[0], err[0]


def test_example_sweep_files_validate(configs_dir):
    """Every example in configs/sweeps is a valid sweep or optimisation file."""
    from mdrotor.studies.optimize import load_optimize

    files = sorted((configs_dir / "sweeps").glob("*.toml"))
    assert files
    for f in files:
        if "optimize" in f.name:
            spec = load_optimize(f)
            assert spec.budget >= 2
        else:
            spec = load_sweep(f)
            assert len(spec.points) == len(spec.configs) >= 2
            assert math.prod(len(a.values) for a in spec.axes) == len(spec.points) or spec.combine != "grid"


def test_failed_point_is_recorded_not_retried(tmp_path):
    """A run refused by the physics is stored as a failed point (NaN row,
    its message kept) and counts as finished on a rerun."""
    from mdrotor.errors import InputError
    from mdrotor.studies.tasks import Outcome, run_task

    class FailSecond(SerialExecutor):
        def run(self, tasks):
            for t in tasks:
                yield Outcome(t.name, None, "crystal not bound (test)") if t.name.endswith("000001") else run_task(t)

    write(tmp_path, "base.toml", FO_BASE)
    sw = write(tmp_path, "s.toml", 'base = "base.toml"\n[[axis]]\nkey = "stage.spin-up.duration"\nvalues = ["3 us", "4 us", "5 us"]\n')
    out = tmp_path / "f.h5"
    s = run_sweep(load_sweep(sw), out, executor=FailSecond())
    assert s["failed"] == 1 and s["completed"] == 3
    t = read_table(out)
    assert list(t["failed"]) == [0, 1, 0] and t["error"][1] == "crystal not bound (test)"
    assert np.isnan(t["metrics"]["L_mean_hbar"][1]) and np.all(np.isfinite(t["metrics"]["L_mean_hbar"][[0, 2]]))
    with pytest.raises(InputError, match="failed"):
        read_point(out, 1)
    export_csv(out, tmp_path / "f.csv")
    with open(tmp_path / "f.csv") as fh:
        rows = list(csv.DictReader(fh))
    assert [r["status"] for r in rows] == ["done", "failed", "done"]
    # a failed point has no numbers: empty cells (the CSV reader's missing value), never the text 'nan'
    assert rows[1]["L_mean_hbar"] == "" and float(rows[0]["L_mean_hbar"]) > 0
    assert "nan" not in (tmp_path / "f.csv").read_text().lower()
    again = run_sweep(load_sweep(sw), out, workers=1)
    assert again["ran"] == 0 and again["failed"] == 1


def test_csv_path_checked_before_any_work(tmp_path, capsys):
    """--csv into a missing folder is refused before the sweep runs (it was a
    FileNotFoundError traceback after the last point)."""
    write(tmp_path, "base.toml", FO_BASE)
    sw = write(tmp_path, "s.toml", 'base = "base.toml"\n[[axis]]\nkey = "stage.spin-up.duration"\nvalues = ["4 us"]\n')
    out = tmp_path / "s.h5"
    assert cli(["sweep", str(sw), "-o", str(out), "--csv", str(tmp_path / "no" / "t.csv"), "--workers", "1", "--quiet"]) == 2
    err = capsys.readouterr().err.strip().splitlines()
    assert len(err) == 1 and "--csv" in err[0] and "does not exist" in err[0], err
    assert not out.exists()


def test_point_error_not_blamed_on_one_axis(tmp_path, capsys):
    """A point refused by a rule that involves several keys names the point
    and its values under 'axes' (it said 'axiss')."""
    write(tmp_path, "base.toml", FO_BASE)
    sw = write(tmp_path, "s.toml", 'base = "base.toml"\n[[axis]]\nkey = "pinning.strength"\n'
                                   'values = ["2e5 V/m^2", "5e12 V/m^2"]\n')
    assert cli(["sweep", str(sw), "-o", str(tmp_path / "s.h5"), "--workers", "1", "--quiet"]) == 2
    err = capsys.readouterr().err.strip().splitlines()
    assert len(err) == 1 and "axes at point 1 (pinning.strength = '5e12 V/m^2')" in err[0], err


def test_one_point_sweep_text(tmp_path, capsys):
    """A sweep of one point runs and says so in words ('1 point', not '1 points')."""
    write(tmp_path, "base.toml", FO_BASE)
    sw = write(tmp_path, "s.toml", 'base = "base.toml"\n[[axis]]\nkey = "stage.spin-up.duration"\nvalues = ["4 us"]\n')
    assert cli(["sweep", str(sw), "-o", str(tmp_path / "s.h5"), "--workers", "1", "--quiet"]) == 0
    out = capsys.readouterr().out
    assert out.startswith("sweep: 1 point (0 already done, 1 run now, 0 failed)"), out
