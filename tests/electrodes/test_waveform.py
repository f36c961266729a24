"""Waveform export: electrode voltages versus time over a run's schedule.

The voltages read back from the file are put on the layout (solid-angle
potentials), fitted afresh, and compared with the rotating multipole the
run config asks for at each time, with the pinning angle integrated
numerically from f_rot(t) (scipy quad), independently of the schedule's
closed-form theta(t).
"""

import json
import math
import re

import h5py
import numpy as np
import pytest
from scipy.integrate import quad

from mdrotor.commands.main import main as cli_main
from mdrotor.config.parse import load_config
from mdrotor.electrodes.harmonic_fit import fit_potential, sphere_rule
from mdrotor.electrodes.layout import load_layout

LAYOUT = "configs/electrodes/ring8_triangle3.toml"
RUN = "configs/electrodes/ring8_triangle3_run.toml"
LIMIT_V = 15.0


def _read_csv(path):
    lines = [ln for ln in path.read_text().splitlines() if not ln.startswith("#")]
    names = lines[0].split(",")
    data = np.array([[float(x) for x in ln.split(",")] for ln in lines[1:]])
    return names, data


def _theta(cfg, t):
    """2 pi int_0^t f_rot dt' by adaptive quadrature, split at stage boundaries."""
    b = [x for x in cfg.schedule.boundaries_s if x < t] + [t]
    f = lambda x: float(cfg.schedule.f_rot_hz(np.array([x]))[0])  # noqa: E731
    return 2 * math.pi * sum(quad(f, b[i], b[i + 1], epsabs=0, epsrel=1e-13, limit=200)[0] for i in range(len(b) - 1))


@pytest.fixture(scope="module")
def csv_export(tmp_path_factory):
    out = tmp_path_factory.mktemp("wf") / "tri.csv"
    assert cli_main(["electrodes", LAYOUT, "--config", RUN, "--waveform", str(out), "--rate", "10 MHz"]) == 0
    return out


def test_waveform_reproduces_rotating_multipole(csv_export):
    lay = load_layout(LAYOUT)
    cfg = load_config(RUN)
    names, data = _read_csv(csv_export)
    assert names[0] == "t_s" and names[1:] == [lay.channels[i] for i in lay.dc_channels]
    t = data[:, 0]
    # sampled at k / rate over the whole schedule (1.4 ms at 10 MHz)
    assert len(t) == 14001 and t[1] - t[0] == pytest.approx(1e-7, rel=1e-9) and t[-1] == pytest.approx(1.4e-3)
    # every sample within its limit (the check's tolerance: 1e-9 relative)
    assert np.max(np.abs(data[:, 1:])) <= LIMIT_V * (1 + 1e-9)
    n, c = 3, cfg.pinning[0].strength
    unit, w = sphere_rule(18)
    rho = 3e-6
    center = lay.trap_point_m
    for tk in (0.0, 0.2137e-3, 0.5e-3, 0.8731e-3, 1.1e-3, 1.3e-3):
        k = int(round(tk * 1e7))
        v = np.zeros(lay.n_channels)
        v[lay.dc_channels] = data[k, 1:]
        fit = fit_potential(lay.potential(center + rho * unit, v), center, rho, 6, unit, w)
        got = fit.k_inplane()[0, n - 1]
        s = float(cfg.schedule.pinning_scale(np.array([t[k]]))[0])
        want = c * s * np.exp(-1j * n * _theta(cfg, t[k]))
        # tolerance, as potential on the fit sphere: the refit's own residual
        # (orders above 6), the solver's miss (target weight 1e3: ~1e-6 of c),
        # the file's 10 significant digits (~1e-10 of c)
        s_nn = fit.term_rms[fit.index(n, n)] * rho ** n
        assert abs(got - want) * s_nn <= fit.residual_rms[0] + 2e-6 * c * s_nn, (tk, got, want)
    # the release stage ends with the pinning off: no rotating voltages
    assert np.max(np.abs(data[-1, 1:])) <= 1e-12
    # the exported voltages are the ones `mdrotor run` simulates: the plan the
    # run config solved through its [pinning] layout (same solve, same
    # numbers; 10 significant digits in the file)
    plan = cfg.pinning[0].layout.plan
    th = np.array([_theta(cfg, x) for x in t[::1000]])
    s = cfg.schedule.pinning_scale(t[::1000])
    v_run = plan.static_v + s[:, None] * plan.amplitudes_v * np.cos(n * th[:, None] - plan.phases_rad)
    assert np.allclose(data[::1000, 1:], v_run[:, lay.dc_channels], rtol=0, atol=1e-8)


def test_hdf5_export_matches_csv(csv_export, tmp_path, capsys):
    out = tmp_path / "tri.h5"
    assert cli_main(["electrodes", LAYOUT, "--config", RUN, "--waveform", str(out), "--rate", "10 MHz", "--json"]) == 0
    rep = json.loads(capsys.readouterr().out)
    assert "rated limits" in rep["caution"] and rep["over_samples"] == 0 and rep["n_samples"] == 14001
    names, data = _read_csv(csv_export)
    with h5py.File(out, "r") as f:
        assert f.attrs["complete"] == 1 and "rated limits" in f.attrs["caution"]
        assert [str(x) for x in f.attrs["channels"]] == names[1:]
        assert np.allclose(f["t_s"][:], data[:, 0], rtol=1e-12, atol=0)
        # CSV keeps 10 significant digits
        assert np.allclose(f["voltages_v"][:], data[:, 1:], rtol=1e-9, atol=1e-9)
        assert f["theta_rad"][-1] == pytest.approx(_theta(load_config(RUN), 1.4e-3), rel=1e-10)
    assert not list(tmp_path.glob(".*tmp*"))


OVER = 'stage.spin-up.pinning={ to = 3.0, shape = "linear" }'


def test_over_limit_plan_exits_2_naming_the_electrode(tmp_path, capsys):
    out = tmp_path / "over.csv"
    assert cli_main(["electrodes", LAYOUT, "--config", RUN, "--set", OVER, "--waveform", str(out)]) == 2
    err = capsys.readouterr().err
    assert err.count("\n") == 1 and err.startswith(f"mdrotor: error: {LAYOUT}: segments[0].limit: channel 's")
    m = re.search(r"reaches (-?[\d.]+) V at t = ([\d.e+-]+) ms", err)
    v, t_ms = float(m.group(1)), float(m.group(2))
    assert LIMIT_V < abs(v) <= 3 * 5.8
    # the amplitude A = 5.797 V grows linearly from 1 A to 3 A over the 1 ms
    # spin-up; it first passes 15 V at t0 = (15 / A - 1) / 2 ms and a channel
    # reaches its crest within one pattern period 1 / (3 f_rot) after that
    A = 5.7966
    t0 = (LIMIT_V / A - 1) / 2
    f_rot = 150e3 * (10 * 0.8 ** 3 - 15 * 0.8 ** 4 + 6 * 0.8 ** 5)  # smoothstep near t0 = 0.79 ms
    assert t0 <= t_ms <= t0 + 1e3 / (3 * 0.9 * f_rot)
    assert not out.exists() and not list(tmp_path.iterdir())
    # written anyway with --allow-over, and every excursion counted
    assert cli_main(["electrodes", LAYOUT, "--config", RUN, "--set", OVER, "--waveform", str(out), "--allow-over", "--json"]) == 0
    rep = json.loads(capsys.readouterr().out)
    _, data = _read_csv(out)
    n_over = int(np.sum(np.abs(data[:, 1:]) > LIMIT_V * (1 + 1e-9)))
    assert n_over > 0 and rep["over_samples"] == n_over
    assert max(c["max_abs_v"] for c in rep["channels"]) == pytest.approx(np.max(np.abs(data[:, 1:])), rel=1e-9)


@pytest.mark.parametrize("where, words", [
    ("nodir/w.h5", "does not exist"),     # was created silently, where `run -o` refuses it
    ("file.txt/w.csv", "file.txt"),       # was a traceback (UnboundLocalError) after the whole check
])
def test_waveform_into_a_folder_that_cannot_hold_it(tmp_path, capsys, where, words):
    (tmp_path / "file.txt").write_text("a file, not a folder\n")
    old = tmp_path / "old.csv"
    old.write_text("OLD\n")
    before = sorted(p.name for p in tmp_path.iterdir())
    rc = cli_main(["electrodes", LAYOUT, "--config", RUN, "--waveform", str(tmp_path / where)])
    err = capsys.readouterr().err
    assert rc == 2 and err.count("\n") == 1 and "Traceback" not in err, err
    assert err.startswith("mdrotor: error: command line: --waveform: ") and words in err, err
    assert sorted(p.name for p in tmp_path.iterdir()) == before and old.read_text() == "OLD\n"


def test_refused_waveform_leaves_the_old_file(tmp_path, capsys):
    out = tmp_path / "w.csv"
    out.write_text("OLD\n")
    assert cli_main(["electrodes", LAYOUT, "--config", RUN, "--set", OVER, "--waveform", str(out)]) == 2
    assert out.read_text() == "OLD\n" and sorted(p.name for p in tmp_path.iterdir()) == ["w.csv"]


def test_write_waveform_refuses_an_unwritable_path(tmp_path):
    """The library call (no command-line check first) names the path instead
    of failing on its own cleanup (UnboundLocalError)."""
    from mdrotor.electrodes.waveform import write_waveform
    from mdrotor.errors import InputError
    from mdrotor.studies.design_check import prepare_design

    (tmp_path / "file.txt").write_text("a file, not a folder\n")
    cfg = load_config(RUN)
    ds = prepare_design(load_layout(LAYOUT), cfg, depth=False)
    for name in ("w.csv", "w.h5"):
        with pytest.raises(InputError) as exc:
            write_waveform(tmp_path / "file.txt" / name, load_layout(LAYOUT), ds.plan, cfg, 10e6)
        assert "--waveform" in str(exc.value) and "cannot write" in str(exc.value)
