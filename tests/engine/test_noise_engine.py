"""Electric-field noise in the engine: heating, angular-momentum diffusion, tones."""

import numpy as np
import pytest
from conftest import two_ion_config
from scipy import constants as sc

import mdrotor
from mdrotor.analysis.summary import summary_text
from mdrotor.engine.noise import kernel_arrays, kernel_state
from mdrotor.physics.noise import (
    diffusion_constant,
    tone_torque,
    turchette_heating_rate,
)

HBAR = sc.hbar
TWO_PI = 2 * np.pi


def cfg(n_ions, noise, *, f_start="0 Hz", duration="40 us", trajectories=2000, trap=None, temperature="0 K"):
    d = {"species": {"ion": "40Ca+"}, "crystal": {"ions": n_ions},
         "trap": trap or {"f_radial": "1.2 MHz", "f_axial": "2.9 MHz"},
         "rotation": {"f_start": f_start}, "stage": [{"name": "free", "duration": duration}],
         "initial": {"temperature": temperature, "wigner": False},
         "run": {"trajectories": trajectories, "seed": 17}, "noise": noise}
    return mdrotor.load_config(d)


def _mode(res, label):
    fin = res.final
    k = fin.modes["label"].index(label)
    return fin.arrays["mode_n"][:, k], fin.modes["freq_hz"][k]


def test_single_ion_heating_turchette():
    """White field noise along x heats the x motion at n_dot = e^2 S_E / (4 m
    hbar w) (Q.A. Turchette et al., Phys. Rev. A 61, 063418 (2000)) within
    5 %: 4000 trajectories from rest (the mean of E / (hbar w) has a 1.6 %
    standard error)."""
    S = 1e-11
    c = cfg(1, {"field": {"axes": ["x"], "psd": {"kind": "white", "level": f"{S} V^2/m^2/Hz"}}},
            trap={"f_radial": "1.2 MHz", "f_axial": "2.9 MHz", "radial_split": "0.2 MHz"}, trajectories=4000)
    res = mdrotor.run(c)
    t = res.final.t_s
    n, f = _mode(res, "com-xy-2")  # the x mode (higher of the split pair)
    assert abs(f - 1.3e6) < 1.0
    from mdrotor.physics.species import get_species

    m = get_species("40Ca+").mass_kg
    rate = turchette_heating_rate(S, m, sc.e, f)
    assert rate == pytest.approx(sc.e**2 * S / (4 * m * HBAR * TWO_PI * f))
    assert abs(np.mean(n) / (rate * t) - 1) < 0.05
    other, _ = _mode(res, "com-xy-1")  # the y mode sees no noise
    assert np.mean(other) < 1e-3 * np.mean(n)


def test_crystal_com_heated_differential_not_no_torque():
    """A uniform field heats only the centre-of-mass motion, N times the
    single-ion energy rate (M. Brownnutt et al., Rev. Mod. Phys. 87, 1419
    (2015)), and exerts no torque on a crystal of identical ions."""
    S = 1e-11
    c = cfg(3, {"field": {"axes": ["x", "y", "z"], "psd": {"kind": "white", "level": f"{S} V^2/m^2/Hz"}}},
            trap={"f_radial": "1.0 MHz", "f_axial": "3.0 MHz"}, trajectories=1500)
    res = mdrotor.run(c)
    from mdrotor.physics.species import get_species

    m = get_species("40Ca+").mass_kg
    t = res.final.t_s
    fin = res.final
    mn = fin.arrays["mode_n"]
    for k, (lab, kind, f) in enumerate(zip(fin.modes["label"], fin.modes["kind"], fin.modes["freq_hz"])):
        if kind == "com":
            # Turchette with total mass 3m and charge 3e: 3 x the single-ion quanta rate
            rate = turchette_heating_rate(S, 3 * m, 3 * sc.e, f)
            assert abs(np.mean(mn[:, k]) / (rate * t) - 1) < 0.08, lab  # 1500 samples: 2.6 % sd
        else:
            assert np.mean(mn[:, k]) < 1e-6, lab
    assert np.max(np.abs(fin.arrays["L_com_hbar"])) < 1e-3


def _moment(res_or_cfg, order):
    cr = mdrotor.crystal(res_or_cfg, None)
    z = cr.positions_m[:, 0] + 1j * cr.positions_m[:, 1]
    return np.sum(cr.charges_c * z**order)


def test_quadrupole_noise_diffusion_two_ion_rotor():
    """Quadrupole noise on a rotating pair: <(L - L0)^2> = 2 D t with D = n^2
    |M_n|^2 S(n f_rot) / 4 (derived in mdrotor.physics.noise; resonant at n f_rot),
    within 5 % (6000 trajectories: 1.8 % sd of the variance); a noise band
    away from 2 f_rot gives none."""
    S = 100.0  # V^2/m^4/Hz: sigma_L ~ 1000 hbar after 20 us
    c = cfg(2, {"multipole": {"order": 2, "psd": {"kind": "white", "level": f"{S} V^2/m^4/Hz"}}},
            f_start="150 kHz", duration="20 us", trajectories=6000)
    res = mdrotor.run(c)
    M2 = _moment(c, 2)
    D = diffusion_constant(2, M2, S).D_si
    var = np.var(res.final.arrays["L_com_hbar"] * HBAR, ddof=1)
    assert abs(var / (2 * D * res.final.t_s) - 1) < 0.05
    # a Lorentzian at 20 kHz, 2 kHz wide: nothing near 300 kHz
    c2 = cfg(2, {"multipole": {"order": 2, "psd": {"kind": "lorentzian", "level": f"{S} V^2/m^4/Hz",
                                                   "f_center": "20 kHz", "width": "2 kHz"}}},
             f_start="150 kHz", duration="20 us", trajectories=2000)
    res2 = mdrotor.run(c2)
    var2 = np.var(res2.final.arrays["L_com_hbar"] * HBAR, ddof=1)
    assert var2 < 0.01 * var


def test_tone_gives_coherent_torque():
    """A rotating order-2 tone at 2 f_rot acts like a weak co-rotating pin:
    a steady torque n A |M_n| sin(arg M_n(0) - phase) (derived in
    mdrotor.physics.noise): L grows linearly at that rate for every trajectory (each
    starts at its own random orientation) to 1 %."""
    A = 3.0  # V/m^2
    f_rot = 150e3
    c = cfg(2, {"tone": {"target": "multipole", "order": 2, "component": "rotating", "amplitude": f"{A} V/m^2",
                         "frequency": f"{2 * f_rot} Hz", "phase": "0 deg"}},
            f_start=f"{f_rot} Hz", duration="5 us", trajectories=40)
    from mdrotor.engine.integrate import initial_states, make_plan

    plan = make_plan(c)
    pos, _ = initial_states(plan, c.run.seed, np.arange(40))
    z = pos[0] + 1j * pos[1]
    m_lab = np.sum(plan.charges[:, None] * z**2, axis=0)
    res = mdrotor.run(c)
    dl = (res.final.arrays["L_com_hbar"] - res.initial.arrays["L_com_hbar"]) * HBAR / res.final.t_s
    expect = tone_torque(2, np.abs(m_lab[0]), A, "rotating") * np.sin(np.angle(m_lab))
    big = np.abs(expect) > 0.3 * np.abs(expect).max()
    assert np.allclose(dl[big], expect[big], rtol=0.01)


def test_triangle_diffusion_by_order():
    """A regular triangle of identical ions has no order-2 moment: quadrupole
    noise does not make its L diffuse, order-3 noise does with D = 9 |M_3|^2
    S(3 f_rot) / 4 (mdrotor.physics.noise), within 5 %."""
    trap = {"f_radial": "1.0 MHz", "f_axial": "3.0 MHz"}
    S2, S3 = 100.0, 1e13
    c2 = cfg(3, {"multipole": {"order": 2, "psd": {"kind": "white", "level": f"{S2} V^2/m^4/Hz"}}},
             f_start="100 kHz", duration="20 us", trajectories=1000, trap=trap)
    var2 = np.var(mdrotor.run(c2).final.arrays["L_com_hbar"] * HBAR, ddof=1)
    M2 = _moment(c2, 2)
    pair = cfg(2, {}, f_start="100 kHz", trap=trap)  # for scale: a pair's quadrupole moment
    D_pair = diffusion_constant(2, _moment(pair, 2), S2).D_si
    assert abs(M2) < 1e-12 * abs(_moment(pair, 2))
    # what remains is second order: the noise first deforms the triangle (a
    # dynamic order-2 moment), then torques it; below 1 % of a pair's diffusion
    assert var2 < 1e-2 * 2 * D_pair * 20e-6
    c3 = cfg(3, {"multipole": {"order": 3, "psd": {"kind": "white", "level": f"{S3} V^2/m^6/Hz"}}},
             f_start="100 kHz", duration="20 us", trajectories=6000, trap=trap)
    res3 = mdrotor.run(c3)
    D3 = diffusion_constant(3, _moment(c3, 3), S3).D_si
    var3 = np.var(res3.final.arrays["L_com_hbar"] * HBAR, ddof=1)
    assert abs(var3 / (2 * D3 * res3.final.t_s) - 1) < 0.05


def test_noise_runs_independent_of_chunks_and_order():
    """White kicks and colored noise (both drawn in the kernel from (key,
    step) counters) give bit-identical
    trajectories for any chunk size and trajectory order (common practice,
    no source: counter-based random streams)."""
    c = cfg(2, {"field": {"psd": [{"kind": "white", "level": "1e-11 V^2/m^2/Hz"},
                                  {"kind": "lorentzian", "level": "1e-10 V^2/m^2/Hz", "f_center": "1 MHz", "width": "50 kHz"}]},
                "multipole": {"order": 2, "psd": {"kind": "white", "level": "100 V^2/m^4/Hz"}}},
            f_start="100 kHz", duration="5 us", trajectories=24)
    a = mdrotor.run(c, chunk=4)
    b = mdrotor.run(c, chunk=24, order=np.random.default_rng(1).permutation(24))
    for k, v in a.final.arrays.items():
        assert np.array_equal(v, b.final.arrays[k], equal_nan=True), k
    assert np.std(a.final.arrays["L_com_hbar"]) > 0  # the noise did something


COLORED = {"field": [{"axes": ["x", "y"], "psd": [{"kind": "power", "level": "1e-11 V^2/m^2/Hz", "f_ref": "1 MHz",
                                                  "alpha": 1.0, "f_min": "50 kHz", "f_max": "5 MHz"},
                                                 {"kind": "white", "level": "1e-12 V^2/m^2/Hz"}],
                      "stages": {"free": 0.5}},
                     {"axes": ["z"], "psd": {"kind": "lorentzian", "level": "1e-10 V^2/m^2/Hz", "f_center": "1 MHz",
                                             "width": "50 kHz"}}],
           "multipole": {"order": 2, "psd": {"kind": "lorentzian", "level": "10 V^2/m^4/Hz", "f_center": "300 kHz",
                                             "width": "20 kHz"}},
           "tone": [{"target": "field", "axis": "x", "amplitude": "1 mV/m", "frequency": "100 kHz"},
                    {"target": "multipole", "order": 2, "component": "rotating", "amplitude": "1 V/m^2",
                     "frequency": "300 kHz", "stages": ["free"]}]}


def test_colored_noise_bit_identical_across_threads_chunks_blocks_and_order(monkeypatch):
    """Colored noise (power law, rotating Lorentzians, tones; two stages of
    different dt and noise scale) is drawn in the kernel from (key, step)
    counters with each trajectory's OU state carried across blocks and
    stages: the run is bit-identical for 1 and 2 threads, chunk sizes 1, 7
    and 64, any trajectory order and any block length (common practice, no
    source: counter-based random streams)."""
    import numba

    from mdrotor.engine import integrate as engine

    d = {"species": {"ion": "40Ca+"}, "crystal": {"ions": 2}, "trap": {"f_radial": "1.2 MHz", "f_axial": "2.9 MHz"},
         "rotation": {"f_start": "150 kHz"},
         "stage": [{"name": "hold", "duration": "1.5 us"}, {"name": "free", "duration": "1.03 us"}],
         "initial": {"temperature": "0.1 mK", "wigner": False}, "run": {"trajectories": 24, "seed": 31},
         "noise": COLORED}
    c = mdrotor.load_config(d)
    plan = engine.make_plan(c)
    assert plan.stage_dt[0] != plan.stage_dt[1]
    threads = numba.get_num_threads()
    try:
        ref = mdrotor.run(c, chunk=64, threads=1)
        runs = [mdrotor.run(c, chunk=1, threads=2), mdrotor.run(c, chunk=7, threads=2),
                mdrotor.run(c, chunk=7, threads=1, order=np.random.default_rng(1).permutation(24))]
        monkeypatch.setattr(engine, "BLOCK_STEPS", 37)
        runs.append(mdrotor.run(c, chunk=64, threads=2))
    finally:
        numba.set_num_threads(threads)
    for other in runs:
        for name in ("hold", "free"):
            for k, v in ref.stages[name].arrays.items():
                assert np.array_equal(v, other.stages[name].arrays[k], equal_nan=True), (name, k)
    assert np.std(ref.final.arrays["L_com_hbar"]) > 0


def test_kernel_applies_the_noise_series():
    """One free ion (no trap, no other force) under colored field noise: the
    kernel's velocity change over a block is (Q/m) dt sum_k E_k of the noise
    values kernels.noise_series gives for the same steps (the impulse of a
    uniform field: the definition of the kick), and the OU states it carries
    end bit-identical. Tolerance: the rounding of 500 additions."""
    from mdrotor.config.noise import parse_noise
    from mdrotor.engine.kernels import advance, noise_series
    from mdrotor.physics.species import get_species

    model = parse_noise({"field": COLORED["field"], "tone": COLORED["tone"][:1]}, "<test>", ["free"])
    T, n, dt, step0 = 5, 500, 8e-9, 1234
    qm = sc.e / get_species("40Ca+").mass_kg
    state = kernel_state(model, 2, range(T))
    twin = kernel_state(model, 2, range(T))
    arrays = kernel_arrays(model, state, t_start_s=3e-6, dt_s=dt, step0=7, n_steps=n, global_step0=step0,
                                 stage="free")
    z = np.zeros((1, 1))
    model_t = (np.zeros((1, 3)), np.zeros((1, 3)), np.zeros((1, 3)), np.array([qm]), z, z)
    lag = (np.ones(1), np.ones(1), 0, np.zeros(n + 1), np.zeros(n + 1, np.uint8), 1, np.zeros((2, T)))
    pin = (np.zeros(0, dtype=np.int64), np.zeros((n + 1, 0)), np.zeros((n + 1, 0)))
    pos, vel = np.zeros((3, 1, T)), np.zeros((3, 1, T))
    advance(pos, vel, dt, n, np.array([1.0]), model_t, None, pin, None, lag, arrays, None, 2)
    twin_arrays = kernel_arrays(model, twin, t_start_s=3e-6, dt_s=dt, step0=7, n_steps=n, global_step0=step0,
                                      stage="free")
    e = noise_series(n, *twin_arrays[1:])[:, :3, :]
    expect = qm * dt * e.sum(axis=0)
    assert np.all(np.abs(vel[:, 0, :] - expect) <= 1e-12 * qm * dt * np.abs(e).sum(axis=0))
    assert np.array_equal(state.z_real, twin.z_real) and np.array_equal(state.z_rot, twin.z_rot)
    assert not np.array_equal(state.z_real, kernel_state(model, 2, range(T)).z_real)  # they moved


def test_single_ion_heating_turchette_colored():
    """1/f field noise (500 kHz to 5 MHz) along x heats the x motion at
    n_dot = e^2 S_E(f) / (4 m hbar w) with S_E at the mode frequency (Q.A.
    Turchette et al., Phys. Rev. A 61, 063418 (2000)), within 5 %: 4000
    trajectories from rest (1.6 % standard error); the fitted spectrum is
    within 0.2 % of the power law (FIT_TOLERANCE), and over 40 us the
    spectrum is sampled over +-25 kHz of the 1.3 MHz mode, where 1/f changes
    by +-2 % (first order cancels)."""
    S1 = 4e-12  # V^2/m^2/Hz at 1 MHz
    noise = {"field": {"axes": ["x"], "psd": {"kind": "power", "level": f"{S1} V^2/m^2/Hz", "f_ref": "1 MHz",
                                              "alpha": 1.0, "f_min": "500 kHz", "f_max": "5 MHz"}}}
    c = cfg(1, noise, trap={"f_radial": "1.2 MHz", "f_axial": "2.9 MHz", "radial_split": "0.2 MHz"},
            trajectories=4000)
    res = mdrotor.run(c)
    t = res.final.t_s
    n, f = _mode(res, "com-xy-2")
    from mdrotor.physics.species import get_species

    rate = turchette_heating_rate(S1 * 1e6 / f, get_species("40Ca+").mass_kg, sc.e, f)
    assert abs(np.mean(n) / (rate * t) - 1) < 0.05
    other, _ = _mode(res, "com-xy-1")
    assert np.mean(other) < 1e-3 * np.mean(n)


def test_fitted_D_compared_over_its_own_window():
    """A Lorentzian (half width 20 kHz) on 2 f_rot, switched on at the start
    of a 10 us free stage: the fitted D is the variance growth over that
    window, whose expectation is 0.44 of the infinite-time D (derived in
    mdrotor.physics.noise, "Over a finite window"; checked against a Monte-Carlo of
    the torque in test_noise.py). The run compares the fit with the window
    value (|z| < 3) and would be far off against the infinite-time one
    (2000 trajectories from rest: the variance has a 3 % standard error).
    Weak noise, as the rigid-rotor derivation assumes: sigma_L ~ 50 hbar of
    L ~ 7000 hbar moves 2 f_rot by ~2 kHz, well inside the 20 kHz width."""
    d = two_ion_config(pinning=None, rotation={"f_start": "150 kHz"},
                       stage=[{"name": "quiet", "duration": "1 us"}, {"name": "free", "duration": "10 us"}],
                       initial={"temperature": "0 K", "wigner": False}, run={"trajectories": 2000, "seed": 23},
                       noise={"multipole": {"order": 2, "stages": ["free"],
                                            "psd": {"kind": "lorentzian", "level": "0.8 V^2/m^4/Hz", "f_center": "300 kHz",
                                                    "width": "20 kHz"}}})
    res = mdrotor.run(mdrotor.load_config(d))
    nz = res.extra["noise"]
    assert nz["stage"] == "free" and nz["D_window_lead_s"] == 0.0
    fit, err = nz["D_fit_hbar2_per_s"], nz["D_fit_err_hbar2_per_s"]
    win, inf = nz["D_window_total_hbar2_per_s"], nz["D_analytic_total_hbar2_per_s"]
    assert 0.4 < win / inf < 0.5
    assert nz["D_fit_resolved"]
    assert abs(nz["D_fit_z"]) < 3 and nz["D_fit_z"] == pytest.approx((fit - win) / err)
    assert abs(fit - inf) > 5 * err
    text = summary_text(res)
    assert f"expected over this window {win:.4g}" in text and f"infinite time {inf:.4g}" in text


def test_unresolved_rates_and_zero_by_symmetry_are_labelled(tmp_path):
    """A regular triangle of identical ions under uniform-field and weak
    quadrupole noise: the field exerts no torque on identical ions and a
    triangle has no quadrupole moment (a regular N-gon has M_n = 0 unless N
    divides n; common practice, no source), so both analytic D are 0 by
    symmetry and print 0. The fitted D is zero within noise, and so is the
    differential modes' heating (a uniform field heats only the COM: M.
    Brownnutt et al., Rev. Mod. Phys. 87, 1419 (2015); the quadrupole noise,
    which does drive the triangle's deformation modes, is 1e4 times too weak
    to show in 20 us): they print "not resolved (< X at 2 sigma)", the COM
    modes their fitted rates, and the raw numbers and flags stay in the file."""
    S = 1e-9
    c = cfg(3, {"field": {"psd": {"kind": "white", "level": f"{S} V^2/m^2/Hz"}},
                "multipole": {"order": 2, "psd": {"kind": "white", "level": "1e-2 V^2/m^4/Hz"}}},
            trap={"f_radial": "1.0 MHz", "f_axial": "3.0 MHz"}, f_start="100 kHz", duration="20 us",
            trajectories=300, temperature="0.05 mK")
    res = mdrotor.run(c)
    nz = res.extra["noise"]
    assert list(nz["D_analytic_orders"]) == [1, 2]
    assert list(nz["D_analytic_zero_by_symmetry"]) == [True, True]
    assert not nz["D_fit_resolved"]
    text = summary_text(res)
    assert "order 1 (uniform field): 0 (zero by symmetry" in text and "order 2: 0 (zero by symmetry" in text
    bound = nz["D_fit_bound_hbar2_per_s"]
    assert bound == pytest.approx(max(nz["D_fit_hbar2_per_s"], 0) + 2 * nz["D_fit_err_hbar2_per_s"])
    assert f"fitted not resolved (< {bound:.2g} at 2 sigma)" in text
    labels = list(nz["heating_labels"])
    flags = dict(zip(labels, nz["heating_fit_resolved"]))
    kinds = dict(zip(res.final.modes["label"], res.final.modes["kind"]))
    assert not any(flags[lab] for lab in labels if kinds[lab] == "differential")
    assert all(flags[lab] for lab in labels if kinds[lab] == "com")   # the COM is heated (Turchette)
    for lab in labels:
        line = next(ln for ln in text.splitlines() if ln.strip().startswith(f"heating {lab} "))
        assert ("not resolved (<" in line) != bool(flags[lab]), line
    # the file keeps the raw numbers and the flags
    mdrotor.save(res, tmp_path / "r.h5")
    back = mdrotor.load(tmp_path / "r.h5").extra["noise"]
    assert back["D_fit_hbar2_per_s"] == nz["D_fit_hbar2_per_s"] and not back["D_fit_resolved"]
    assert np.array_equal(back["heating_fit_resolved"], nz["heating_fit_resolved"])
    assert np.array_equal(back["D_analytic_hbar2_per_s"], nz["D_analytic_hbar2_per_s"])


def test_window_lead_counts_earlier_free_noisy_stages():
    """The torques count from when the noise came on at the fitted stage's
    level on the unpinned crystal: a free stage with the same noise before
    the fitted one adds its duration to the lead; a pinned stage or a stage
    without the noise stops it (rotor_diffusion_window's lead_s)."""
    from mdrotor.analysis.noise_rates import _torque_lead
    from mdrotor.engine.integrate import make_plan

    base = two_ion_config(pinning=None, rotation={"f_start": "150 kHz"},
                          initial={"temperature": "0 K", "wigner": False}, run={"trajectories": 1, "seed": 1},
                          stage=[{"name": "a", "duration": "2 us"}, {"name": "b", "duration": "3 us"},
                                 {"name": "c", "duration": "5 us"}],
                          noise={"multipole": {"order": 2, "psd": {"kind": "white", "level": "1 V^2/m^4/Hz"}}})
    plan = make_plan(mdrotor.load_config(base))
    assert _torque_lead(plan, plan.noise, 2) == pytest.approx(5e-6)
    base["noise"]["multipole"]["stages"] = ["b", "c"]
    plan = make_plan(mdrotor.load_config(base))
    assert _torque_lead(plan, plan.noise, 2) == pytest.approx(3e-6)
    base["noise"]["multipole"]["stages"] = {"a": 1.0, "b": 0.5}
    plan = make_plan(mdrotor.load_config(base))
    assert _torque_lead(plan, plan.noise, 2) == 0.0
    base["noise"]["multipole"].pop("stages")
    base["pinning"] = {"order": 2, "strength": "2e5 V/m^2"}
    base["stage"][1]["pinning"] = {"to": 0.0, "shape": "cosine"}
    plan = make_plan(mdrotor.load_config(base))
    assert _torque_lead(plan, plan.noise, 2) == 0.0
