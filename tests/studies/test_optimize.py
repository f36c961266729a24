"""Ramp optimisation: finds the zero of the forced-oscillator law, resumes
bit-identically, writes a runnable best config; bad files are refused."""

import json

import numpy as np
import pytest
from conftest import FORCED_OSCILLATOR_TOML

import mdrotor
from mdrotor.commands.main import main
from mdrotor.engine.executors import ProcessExecutor, SerialExecutor
from mdrotor.studies.optimize import load_optimize, run_optimize
from mdrotor.studies.table import read_point, read_table

# the forced-oscillator crystal of conftest.py (deterministic trajectories)
BASE = FORCED_OSCILLATOR_TOML

OPT = """
base = "base.toml"
trajectories = 2
seed = 5
[optimizer]
method = "{method}"
budget = {budget}
{extra}
[[parameter]]
key = "stage.spin-up.duration"
bounds = ["3 us", "6 us"]
{start}
[[objective]]
metric = "mode_n_mean.libration"
[[constraint]]
metric = "slip_fraction"
max = 0.0
[confirm]
trajectories = 4
"""


def write_opt(tmp_path, method="nelder-mead", budget=40, extra="xatol = 1e-3", start='start = "3.5 us"', name="opt.toml"):
    (tmp_path / "base.toml").write_text(BASE)
    p = tmp_path / name
    p.write_text(OPT.format(method=method, budget=budget, extra=extra, start=start))
    return p


def cli(argv):
    """Run ``mdrotor optimize ...`` in-process through the command line."""
    return main(argv)


def test_finds_zero_of_forced_oscillator_law(tmp_path):
    """The libration energy left by a linear ramp of duration T is
    E = 2 I (alpha / w)^2 sin^2(w T / 2) (Landau and Lifshitz, Mechanics,
    3rd ed., 1976, sec. 22): zero at T = 2 pi / w. Started at T = 3.5 us,
    where E is near its largest, the optimiser must land on one libration period."""
    opt = write_opt(tmp_path)
    out = tmp_path / "opt.h5"
    s = run_optimize(load_optimize(opt), out, workers=1)
    best = read_point(out, s["best"]["index"])
    k = best.final.modes["label"].index("libration")
    period = 1.0 / best.final.modes["freq_hz"][k]
    t_best = best.stages["spin-up"].t_s
    # Tolerance: Nelder-Mead stops when the simplex is smaller than xatol =
    # 1e-3 of the 3 us bound width (3 ns); the best vertex then lies within
    # about two simplex sizes of the minimum (6 ns). The simulated zero sits
    # off 2 pi / w by the Verlet phase error (~1e-5 relative) and the shift of
    # w with the 2 kHz rotation (~1e-4 relative): 0.5 ns.
    assert abs(t_best - period) <= 6.5e-9, (t_best, period)
    first = read_table(out)["metrics"]["mode_n_mean.libration"][0]
    assert first > 1e3 * s["best"]["objective"]  # it started far from the zero
    # the confirmation run uses fresh seeds and more trajectories ...
    conf = read_point(out, "confirm")
    assert conf.attrs["n_trajectories"] == 4 and int(conf.attrs["seed"]) != 5
    # ... and the best config written as TOML runs and reproduces it bit for bit
    cfg = mdrotor.load_config(s["best_toml"])
    again = mdrotor.run(cfg)
    for name, obs in conf.stages.items():
        for key, v in obs.arrays.items():
            assert np.array_equal(again.stages[name].arrays[key], v, equal_nan=True), (name, key)


class StopAfter(SerialExecutor):
    """Runs n tasks, then behaves like Ctrl-C."""

    def __init__(self, n):
        self.n = n

    def run(self, tasks):
        for out in super().run(tasks):
            if self.n == 0:
                raise KeyboardInterrupt
            self.n -= 1
            yield out


def test_differential_evolution_resumes_bit_identically(tmp_path):
    """Parallel batches, an interruption in the middle and a resume on 2
    worker processes give the same history as one uninterrupted serial run."""
    opt = write_opt(tmp_path, method="differential-evolution", budget=15, extra="popsize = 5\nseed = 3", start="")
    spec = load_optimize(opt)
    a = run_optimize(spec, tmp_path / "a.h5", workers=1)
    with pytest.raises(KeyboardInterrupt):
        run_optimize(spec, tmp_path / "b.h5", executor=StopAfter(7))
    assert read_table(tmp_path / "b.h5")["complete"].sum() == 7
    pool = ProcessExecutor(2)
    try:
        b = run_optimize(spec, tmp_path / "b.h5", executor=pool)
    finally:
        pool.close()
    ta, tb = read_table(tmp_path / "a.h5"), read_table(tmp_path / "b.h5")
    assert len(ta["index"]) == len(tb["index"]) == 15  # 3 generations of 5
    key = "stage.spin-up.duration"
    assert ta["axes"][key]["text"] == tb["axes"][key]["text"]
    for k, v in ta["metrics"].items():
        if k != "wall_s":
            assert np.array_equal(v, tb["metrics"][k], equal_nan=True), k
    assert a["best"] == b["best"] and a["confirm"] == b["confirm"]
    # the population explores: not all evaluations at one point
    assert len(set(ta["axes"][key]["text"])) == 15


# extra tables go before the file's own [[objective]] and [[constraint]]: they are number 0
BAD_OPTS = [
    ({"extra": "xatol = 1e-3\n[[objective]]\nmetric = \"L_spread\""}, ["objective[0].metric", "unknown metric"]),
    ({"extra": "[[objective]]\nmetric = \"L_std_hbar * 2\""}, ["unknown metric"]),
    ({"extra": "[[objective]]\nmetric = \"wall_s\""}, ["not reproducible"]),
    ({"method": "cma"}, ["optimizer.method"]),
    ({"start": 'start = "7 us"'}, ["start", "within the bounds"]),
    ({"start": 'start = "3.5 kHz"'}, ["start", "us"]),
    ({"method": "differential-evolution", "budget": 3, "start": ""}, ["budget", "population"]),
    ({"extra": "[[constraint]]\nmetric = \"pinning_peak.n2\"\nmax = \"3e5 V/m\""}, ["constraint[0].max", "V/m^2"]),
    ({"extra": "[[constraint]]\nmetric = \"loss_fraction\""}, ["constraint[0]", "max"]),
]


@pytest.mark.parametrize("kw, words", BAD_OPTS)
def test_bad_optimisation_files_one_line_exit_2(tmp_path, capsys, kw, words):
    opt = write_opt(tmp_path, **kw)
    out = tmp_path / "o.h5"
    assert cli(["optimize", str(opt), "-o", str(out), "--workers", "1", "--quiet"]) == 2
    err = capsys.readouterr().err.strip().splitlines()
    assert len(err) == 1, err
    for w in words:
        assert w in err[0], err[0]
    assert not out.exists()


def test_bad_parameter_key_and_bounds(tmp_path, capsys):
    base = write_opt(tmp_path).read_text()
    cases = [
        (base.replace('key = "stage.spin-up.duration"', 'key = "stage.spin-up.duratoin"'),
         ["parameter 'stage.spin-up.duratoin'", "unknown key"]),
        (base.replace('bounds = ["3 us", "6 us"]', 'bounds = ["6 us", "3 us"]'), ["bounds", "low < high"]),
        (base.replace('bounds = ["3 us", "6 us"]', 'bounds = ["-3 us", "6 us"]').replace('start = "3.5 us"', ""),
         ["parameter 'stage.spin-up.duration'", "lower bounds", "positive"]),
    ]
    for text, words in cases:
        p = tmp_path / "bad.toml"
        p.write_text(text)
        assert cli(["optimize", str(p), "-o", str(tmp_path / "b.h5"), "--workers", "1", "--quiet"]) == 2
        err = capsys.readouterr().err.strip().splitlines()
        assert len(err) == 1, err
        for w in words:
            assert w in err[0], err[0]


def test_unknown_mode_label_named_after_first_run(tmp_path, capsys):
    """Mode labels are known once a run has been made: one line, exit 2."""
    opt = write_opt(tmp_path)
    opt.write_text(opt.read_text().replace('metric = "mode_n_mean.libration"', 'metric = "mode_n_mean.wobble"'))
    assert cli(["optimize", str(opt), "-o", str(tmp_path / "w.h5"), "--workers", "1", "--quiet", "--json"]) == 2
    err = capsys.readouterr().err.strip().splitlines()
    assert len(err) == 1 and "mode_n_mean.wobble" in err[0] and "mode_n_mean.libration" in err[0], err


def test_cli_json_and_rerun(tmp_path, capsys):
    opt = write_opt(tmp_path, budget=6, extra="xatol = 1e-3")
    out = tmp_path / "c.h5"
    argv = ["optimize", str(opt), "-o", str(out), "--workers", "1", "--quiet", "--json", "--csv", str(tmp_path / "h.csv")]
    assert cli(argv) == 0
    s1 = json.loads(capsys.readouterr().out)
    assert s1["evaluations"] == 6  # the budget
    assert (tmp_path / "h.csv").read_text().count("\n") == 7  # header + 6 evaluations
    assert cli(argv) == 0  # finished file: replayed, nothing run
    s2 = json.loads(capsys.readouterr().out)
    assert {k: v for k, v in s1.items() if k != "wall_s"} == {k: v for k, v in s2.items() if k != "wall_s"}


def test_start_without_objective_value_is_left_behind(tmp_path, capsys):
    """The start point loses every ion (a loss radius inside the crystal), so
    L has no mean there: that evaluation has no objective (NaN in the table,
    never a stand-in number such as 1e30), the optimiser moves on, and the best
    point is a real one."""
    opt = write_opt(tmp_path, budget=6)
    opt.write_text(opt.read_text()
                   .replace('key = "stage.spin-up.duration"\nbounds = ["3 us", "6 us"]', 'key = "observe.loss_radius"\nbounds = ["0.5 um", "100 um"]')
                   .replace('start = "3.5 us"', 'start = "0.5 um"').replace('"mode_n_mean.libration"', '"L_mean_hbar"'))
    out = tmp_path / "o.h5"
    argv = ["optimize", str(opt), "-o", str(out), "--workers", "1", "--quiet", "--json", "--csv", str(tmp_path / "o.csv")]
    assert cli(argv) == 0, capsys.readouterr().err
    s = json.loads(capsys.readouterr().out)
    t = read_table(out)
    obj = t["metrics"]["objective"]
    assert t["metrics"]["n_ok"][0] == 0 and np.isnan(obj[0]) and t["metrics"]["feasible"][0] == 0
    assert s["best"]["index"] != 0 and s["best"]["feasible"]
    assert obj[s["best"]["index"]] == pytest.approx(s["best"]["objective"]) and np.nanmax(obj) < 1e3  # L is ~100 hbar
    assert "1e+30" not in (tmp_path / "o.csv").read_text()


def test_no_evaluation_with_an_objective_is_refused(tmp_path, capsys):
    """Every evaluation loses every ion: no objective anywhere, so no best
    point; one line naming the metric that had no value, exit 2."""
    opt = write_opt(tmp_path, budget=3)
    opt.write_text(opt.read_text()
                   .replace('key = "stage.spin-up.duration"\nbounds = ["3 us", "6 us"]', 'key = "observe.loss_radius"\nbounds = ["0.2 um", "0.5 um"]')
                   .replace('start = "3.5 us"', 'start = "0.5 um"').replace('"mode_n_mean.libration"', '"L_mean_hbar"'))
    assert cli(["optimize", str(opt), "-o", str(tmp_path / "n.h5"), "--workers", "1", "--quiet"]) == 2
    err = capsys.readouterr().err.strip().splitlines()
    assert len(err) == 1 and "opt.toml" in err[0] and "L_mean_hbar" in err[0], err
    assert not (tmp_path / "n.best.toml").exists()


def test_output_of_the_other_kind_is_refused(tmp_path, capsys):
    """An optimisation refuses a sweep's output file in words (studies.store), leaving it untouched."""
    (tmp_path / "base.toml").write_text(FORCED_OSCILLATOR_TOML)
    (tmp_path / "s.toml").write_text('base = "base.toml"\n[[axis]]\nkey = "stage.spin-up.duration"\nvalues = ["4 us"]\n')
    (tmp_path / "o.toml").write_text('base = "base.toml"\n[optimizer]\nmethod = "nelder-mead"\nbudget = 2\n'
                                     '[[parameter]]\nkey = "stage.spin-up.duration"\nbounds = ["3 us", "6 us"]\n'
                                     '[[objective]]\nmetric = "L_mean_hbar"\n')
    out = tmp_path / "x.h5"
    assert main(["sweep", str(tmp_path / "s.toml"), "-o", str(out), "--workers", "1", "--quiet"]) == 0
    before = out.read_bytes()
    capsys.readouterr()
    assert main(["optimize", str(tmp_path / "o.toml"), "-o", str(out), "--workers", "1", "--quiet"]) == 2
    err = capsys.readouterr().err
    assert "x.h5 holds an mdrotor sweep, not an optimisation" in err, err
    assert out.read_bytes() == before  # nothing written over it


def test_csv_path_checked_before_any_work(tmp_path, capsys):
    opt = write_opt(tmp_path, budget=2)
    out = tmp_path / "o.h5"
    assert cli(["optimize", str(opt), "-o", str(out), "--csv", str(tmp_path / "no" / "h.csv"), "--workers", "1", "--quiet"]) == 2
    err = capsys.readouterr().err.strip().splitlines()
    assert len(err) == 1 and "--csv" in err[0] and "does not exist" in err[0], err
    assert not out.exists()
