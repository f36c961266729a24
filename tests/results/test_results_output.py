"""Outputs a physicist can trust: fraction intervals, digits, no NaN shown,
mode frames, compilation timed apart, the series interval used, the
optimiser's repeated points, and bad outputs refused before any work."""

import json
import math

import h5py
import numpy as np
import pytest
from conftest import FORCED_OSCILLATOR_TOML, two_ion_toml
from scipy.stats import norm

import mdrotor
from mdrotor import numfmt
from mdrotor.analysis.summary import summary_text
from mdrotor.commands.main import main
from mdrotor.results.stats import ONE_SIGMA, fraction_interval, summarize
from mdrotor.results.status import Status, usable

# a pinned spin-up to 20 kHz, then the pinning ramped off: a free rotor at the end
CFG = two_ion_toml(
    stage=[{"name": "spin-up", "duration": "20 us", "f_rot": {"to": "20 kHz", "shape": "smoothstep"}},
           {"name": "release", "duration": "10 us", "pinning": {"to": 0.0, "shape": "cosine"}}],
    initial={"temperature": "0.5 mK"}, run={"trajectories": 16, "seed": 3})


def _no_nan(obj):
    """JSON text must parse without NaN or Infinity tokens."""
    def bad(token):
        raise AssertionError(f"non-finite JSON token {token}")

    return json.loads(obj, parse_constant=bad)


@pytest.fixture
def cfg_path(tmp_path):
    p = tmp_path / "r.toml"
    p.write_text(CFG)
    return p


# ---------------------------------------------------------------------------
# fractions: one kind of interval
# ---------------------------------------------------------------------------
@pytest.mark.parametrize("k, n, lo, hi", [(81, 263, 0.2553, 0.3662), (15, 148, 0.0624, 0.1605),
                                          (0, 20, 0.0, 0.1611), (1, 29, 0.0061, 0.1718)])
def test_wilson_interval_reproduces_published_examples(k, n, lo, hi):
    """95 % score intervals without continuity correction: R.G. Newcombe,
    Stat. Med. 17, 857 (1998), Table II, method 3 (values from memory, to
    the four decimals printed there)."""
    p, a, b = fraction_interval(k, n, confidence=0.95)
    assert p == k / n
    assert a == pytest.approx(lo, abs=5e-5) and b == pytest.approx(hi, abs=5e-5)


@pytest.mark.parametrize("k, n", [(0, 400), (3, 400), (31, 1000), (400, 400), (1, 4)])
def test_wilson_interval_at_one_sigma_is_the_closed_form(k, n):
    """The score interval solves |p - p_hat| = z sqrt(p (1 - p) / n):
    (p_hat + z^2/2n +- z sqrt(p_hat (1 - p_hat)/n + z^2/4n^2)) / (1 + z^2/n),
    E.B. Wilson, J. Am. Stat. Assoc. 22, 209 (1927), eq. (3); z = 1 at the
    one-sigma level (68.27 %, A. Agresti and B.A. Coull, Am. Stat. 52, 119
    (1998) recommend this interval). Tolerance: rounding only."""
    z = norm.ppf(0.5 + ONE_SIGMA / 2)
    assert z == pytest.approx(1.0, rel=1e-12)
    ph = k / n
    centre = (ph + z * z / (2 * n)) / (1 + z * z / n)
    half = z * math.sqrt(ph * (1 - ph) / n + z * z / (4 * n * n)) / (1 + z * z / n)
    p, lo, hi = fraction_interval(k, n)
    assert lo == pytest.approx(max(0.0, centre - half), abs=1e-12)
    assert hi == pytest.approx(min(1.0, centre + half), abs=1e-12)
    assert 0.0 <= lo <= p <= hi <= 1.0 and hi > lo  # a width even when no event (or every one) was seen


def test_summary_leaves_out_what_cannot_be_computed():
    """No statistic is stored as NaN: a mean of no trajectory, or a spread
    or error of one, is absent; fractions always have their interval."""
    def obs(status):
        t = len(status)
        return {"status": np.array(status, dtype=np.int64), "L_hbar": np.linspace(1.0, 2.0, t),
                "f_rot_hz": np.full(t, 5.0), "slips": np.zeros(t), "lost": (np.array(status) & 2) != 0,
                "reordered": np.zeros(t, bool), "nonfinite": (np.array(status) & 8) != 0,
                "mode_n": np.ones((t, 2))}

    none_left = summarize(obs([int(Status.LOST), int(Status.NONFINITE), int(Status.LOST | Status.SLIPPED)]),
                          ["com", "differential"])
    assert none_left["n_ok"] == 0 and none_left["n_trajectories"] == 3
    for k in ("L_mean_hbar", "L_std_hbar", "f_rot_mean_hz", "mode_n_mean", "differential_n_mean", "com_n_mean"):
        assert k not in none_left
    assert none_left["loss_fraction"] == pytest.approx(2 / 3) and none_left["loss_count"] == 2
    one_left = summarize(obs([0, int(Status.LOST)]), ["com", "differential"])
    assert one_left["L_mean_hbar"] == 1.0 and "L_mean_err_hbar" not in one_left and "L_std_hbar" not in one_left
    for s in (none_left, one_left):
        for v in s.values():
            assert np.all(np.isfinite(v))
    assert list(usable(np.array([0, 1, 2, 4, 8, 5]))) == [True, True, False, True, False, True]


# ---------------------------------------------------------------------------
# digits (our conventions: common practice, no source)
# ---------------------------------------------------------------------------
def test_digits_follow_the_error_and_inputs_echo_short():
    assert numfmt.value_err(-65.437, 95) == "-65 +- 95"
    assert numfmt.value_err(9906.7, 21.3) == "9907 +- 21"
    assert numfmt.value_err(0.51234, 0.0996) == "0.51 +- 0.10"  # the rounded error gains a digit
    assert numfmt.value_err(2.211e7, 4.3e6) == "(2.21 +- 0.43)e+07"
    assert numfmt.value_err(float("nan"), 1.0) == numfmt.MISSING
    assert numfmt.interval(0.031, 0.024, 0.0403) == "0.031 [0.024, 0.040]"
    assert numfmt.interval(0.0, 0.0, 0.0045) == "0.0000 [0, 0.0045]"
    assert numfmt.echo(4.9999999999999996e-06) == "5e-06"
    assert numfmt.echo(28.874999999999996) == "28.875"
    assert numfmt.clean(0.1 + 0.2) == 0.3


# ---------------------------------------------------------------------------
# runs
# ---------------------------------------------------------------------------
def test_run_outputs_frames_intervals_and_compile_time(tmp_path, cfg_path, capsys):
    out = tmp_path / "r.h5"
    assert main(["run", str(cfg_path), "-o", str(out), "--json", "--quiet"]) == 0
    d = _no_nan(capsys.readouterr().out)
    assert d["n_ok"] == d["n_trajectories"] == 16 and d["statistics"] == "ok"
    for f in ("slip", "loss", "reorder", "nonfinite"):
        assert d[f"{f}_fraction_lo"] <= d[f"{f}_fraction"] <= d[f"{f}_fraction_hi"]
    # compilation apart: the speed is steps over the timed loop alone
    assert d["compile_s"] >= 0.0
    assert d["traj_steps_per_s"] == pytest.approx(d["n_steps"] * 16 / d["wall_s"], rel=1e-12)
    with h5py.File(out) as f:
        groups = ["modes", "initial/modes", "stages/spin-up/modes", "stages/release/modes"]
        for g in groups:
            assert f[g].attrs["frame"] in ("lab", "rotating") and "frame_f_rot_hz" in f[g].attrs, g
        assert f["initial/modes"].attrs["frame"] == "lab"  # f_start = 0
        # pinned at the end of the spin-up: the pinning's frame at the schedule's rate
        assert f["stages/spin-up/modes"].attrs["frame"] == "rotating"
        assert f["stages/spin-up/modes"].attrs["frame_f_rot_hz"] == pytest.approx(20e3, rel=1e-12)
        for k in ("slip_fraction_lo", "slip_fraction_hi", "loss_fraction_lo", "loss_fraction_hi", "n_ok", "n_trajectories"):
            assert k in f["summary"].attrs, k
        assert f["summary"].attrs["fraction_interval"].startswith("Wilson")
    res = mdrotor.load(out)
    assert res.stages["spin-up"].frame == "rotating" and res.initial.frame == "lab"
    text = summary_text(res)
    assert "modes (rotating frame, " in text and "nan" not in text.lower()
    assert "kernel compilation" in text


def test_no_usable_trajectory_exits_3_with_the_file_marked(tmp_path, cfg_path, capsys):
    """Every ion beyond a 0.1 um loss radius: no statistics, said so, exit 3,
    the file written and marked."""
    out = tmp_path / "r.h5"
    rc = main(["run", str(cfg_path), "-o", str(out), "--quiet", "--set", "observe.loss_radius='0.1 um'"])
    cap = capsys.readouterr()
    assert rc == 3
    assert "no statistics" in cap.out and "nan" not in cap.out.lower()
    assert len(cap.err.strip().splitlines()) == 1 and "Traceback" not in cap.err
    with h5py.File(out) as f:
        assert f.attrs["statistics"] != "ok"
        assert f["summary"].attrs["n_ok"] == 0 and "L_mean_hbar" not in f["summary"].attrs
        assert f["summary"].attrs["loss_fraction"] == 1.0
    rc = main(["run", str(cfg_path), "-o", str(out), "--quiet", "--json", "--set", "observe.loss_radius='0.1 um'"])
    assert rc == 3
    d = _no_nan(capsys.readouterr().out)
    assert d["n_ok"] == 0 and "L_mean_hbar" not in d


def test_series_interval_is_stored_as_used(tmp_path, cfg_path):
    """observe.series_interval is rounded to whole steps of each stage."""
    cfg = mdrotor.load_config(str(cfg_path), ["observe.series_interval='3.3 us'", "run.trajectories=2"])
    res = mdrotor.run(cfg)
    steps = np.asarray(res.attrs["series_interval_steps"])
    dts = np.asarray(res.attrs["stage_dt_s"])
    assert list(steps) == [max(1, round(3.3e-6 / dt)) for dt in dts]
    assert res.attrs["series_interval_requested_s"] == 3.3e-6  # as the user wrote it, no conversion noise
    t = np.asarray(res.series["t_s"])
    first = t[np.asarray(res.series["stage"]) == "spin-up"]
    assert np.diff(first)[:-1] == pytest.approx(np.full(len(first) - 2, steps[0] * dts[0]), rel=1e-9)


def test_outputs_that_cannot_be_written_are_refused_before_any_work(tmp_path, cfg_path, capsys, monkeypatch):
    def no_work(*a, **k):
        raise AssertionError("the run started before the output was checked")

    # patched where the commands hold it (imported, then patched: each module keeps its own name after the test)
    monkeypatch.setattr("mdrotor.commands.run.run", no_work)
    monkeypatch.setattr("mdrotor.studies.tasks.run", no_work)
    blocker = tmp_path / "file"
    blocker.write_text("x")
    for target in (str(blocker / "out.h5"), "/sys/out.h5", str(tmp_path)):  # no folder, no permission (even as root), a folder
        assert main(["run", str(cfg_path), "-o", target, "--quiet"]) == 2
        err = capsys.readouterr().err
        assert err.count("\n") == 1 and "-o" in err and "Traceback" not in err
    sweep = tmp_path / "s.toml"
    (tmp_path / "base.toml").write_text(FORCED_OSCILLATOR_TOML)
    sweep.write_text('base = "base.toml"\n[[axis]]\nkey = "stage.spin-up.duration"\nvalues = ["3 us", "4 us"]\n')
    assert main(["sweep", str(sweep), "-o", "/sys/out.h5", "--quiet"]) == 2
    err = capsys.readouterr().err
    assert err.count("\n") == 1 and "-o" in err


@pytest.mark.parametrize("count", ["1000000000", "1000000000000"])
def test_trajectory_counts_beyond_memory_are_refused_up_front(tmp_path, cfg_path, capsys, count):
    out = tmp_path / "r.h5"
    assert main(["run", str(cfg_path), "-o", str(out), "--trajectories", count, "--quiet"]) == 2
    err = capsys.readouterr().err
    assert err.count("\n") == 1 and "--trajectories" in err and "GB" in err and "Traceback" not in err
    assert not out.exists() and not list(tmp_path.glob(".*tmp*"))
    cfg = mdrotor.load_config(str(cfg_path), [f"run.trajectories={count}"])
    with pytest.raises(mdrotor.errors.InputError, match="run.trajectories"):
        mdrotor.run(cfg)


def test_memory_estimate_bounds_the_measured_growth(cfg_path):
    """The estimate per trajectory is an upper bound of what a run holds:
    the growth of the traced peak from 200 to 400 trajectories."""
    import tracemalloc

    from mdrotor.engine.run import resource_estimate

    cfg = mdrotor.load_config(str(cfg_path))
    mdrotor.run(cfg, trajectories=2)
    peaks = []
    for t in (200, 400):
        tracemalloc.start()
        mdrotor.run(cfg, trajectories=t)
        peaks.append(tracemalloc.get_traced_memory()[1])
        tracemalloc.stop()
    per = (peaks[1] - peaks[0]) / 200
    est = resource_estimate(cfg, 1)["memory_per_trajectory_bytes"]
    assert per <= est, (per, est)


def test_run_json_carries_the_noise_rates(tmp_path, capsys):
    p = tmp_path / "n.toml"
    p.write_text(CFG.replace("trajectories = 16", "trajectories = 8")
                 + '[[noise.field]]\npsd = { kind = "white", level = "1e-12 V^2/m^2/Hz" }\n')
    assert main(["run", str(p), "-o", str(tmp_path / "n.h5"), "--json", "--quiet"]) == 0
    d = _no_nan(capsys.readouterr().out)
    assert d["noise"]["stage"] == "release" and "D_analytic_total_hbar2_per_s" in d["noise"]


# ---------------------------------------------------------------------------
# sweeps, optimisation, rotor
# ---------------------------------------------------------------------------
def test_sweep_text_has_an_error_or_interval_beside_every_statistic(tmp_path, capsys):
    (tmp_path / "base.toml").write_text(FORCED_OSCILLATOR_TOML.replace('temperature = "0 K"', 'temperature = "0.1 mK"')
                                        .replace("trajectories = 2", "trajectories = 4"))
    sweep = tmp_path / "s.toml"
    sweep.write_text('base = "base.toml"\n[[axis]]\nkey = "stage.spin-up.duration"\nvalues = ["3 us", "4 us"]\n')
    assert main(["sweep", str(sweep), "-o", str(tmp_path / "s.h5"), "--workers", "1", "--quiet"]) == 0
    rows = [ln for ln in capsys.readouterr().out.splitlines() if ln.strip().startswith(("0 ", "1 "))]
    assert len(rows) == 2
    for ln in rows:
        assert ln.count("+-") == 3 and ln.count("[") == 2 and "4/4" in ln and "nan" not in ln.lower()


def test_optimiser_answers_repeated_points_without_spending_the_budget(tmp_path):
    """Bounded Nelder-Mead started at the upper bound reflects outside and is
    clipped back onto the bound: a point it already has. With common random
    numbers it has the same value, so it is not run again and the budget
    counts new points only."""
    from mdrotor.studies.optimize import load_optimize, run_optimize
    from mdrotor.studies.table import read_table

    (tmp_path / "base.toml").write_text(FORCED_OSCILLATOR_TOML)
    opt = tmp_path / "o.toml"
    opt.write_text('base = "base.toml"\ntrajectories = 2\nseed = 5\n[optimizer]\nmethod = "nelder-mead"\nbudget = 6\n'
                   '[[parameter]]\nkey = "stage.spin-up.duration"\nbounds = ["3 us", "6 us"]\nstart = "6 us"\n'
                   '[[objective]]\nmetric = "mode_n_mean.libration"\n[confirm]\ntrajectories = 2\n')
    s = run_optimize(load_optimize(opt), tmp_path / "o.h5", workers=1)
    u = read_table(tmp_path / "o.h5")
    with h5py.File(tmp_path / "o.h5") as f:
        pts = [tuple(r) for r in f["history/u"][()]]
    assert len(pts) == len(set(pts)) == s["evaluations"]  # no point run twice
    assert s["repeated_points"] >= 1
    assert s["evaluations"] <= 6 and len(u["index"]) == s["evaluations"]
    # the stored values carry no conversion noise
    for text in u["axes"]["stage.spin-up.duration"]["text"]:
        v = float(text.split()[0])
        assert numfmt.clean(v) == v, text


def test_rotor_states_the_spin_statistics_assumption(capsys):
    from pathlib import Path

    demo = str(Path(__file__).resolve().parents[2] / "configs" / "demo.toml")
    assert main(["rotor", demo]) == 0
    assert "assumes identical ions, all in one internal" in capsys.readouterr().out
    assert main(["rotor", demo, "--json"]) == 0
    assert "one internal" in json.loads(capsys.readouterr().out)["statistics_assumption"]


def test_sweep_and_optimisation_sizes_beyond_memory_are_refused_up_front(tmp_path, capsys):
    (tmp_path / "base.toml").write_text(FORCED_OSCILLATOR_TOML)
    sweep = tmp_path / "s.toml"
    sweep.write_text('base = "base.toml"\n[[axis]]\nkey = "stage.spin-up.duration"\nvalues = ["3 us", "4 us"]\n')
    assert main(["sweep", str(sweep), "-o", str(tmp_path / "s.h5"), "--trajectories", "1000000000000", "--quiet"]) == 2
    err = capsys.readouterr().err
    assert err.count("\n") == 1 and "--trajectories" in err and "GB" in err
    assert not (tmp_path / "s.h5").exists()
    opt = tmp_path / "o.toml"
    opt.write_text('base = "base.toml"\ntrajectories = 2\n[[parameter]]\nkey = "stage.spin-up.duration"\n'
                   'bounds = ["3 us", "6 us"]\n[[objective]]\nmetric = "L_std_hbar"\n[confirm]\ntrajectories = 1000000000000\n')
    assert main(["optimize", str(opt), "-o", str(tmp_path / "o.h5"), "--quiet"]) == 2
    err = capsys.readouterr().err
    assert err.count("\n") == 1 and "confirm.trajectories" in err and "GB" in err
    assert not (tmp_path / "o.h5").exists()
