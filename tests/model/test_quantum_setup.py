"""The quantum rotor of a config: ladder, pinning, noise, initial state, the
comparison with the Monte-Carlo ensemble, and the ``mdrotor quantum`` command."""

import json
import math
import subprocess
import sys

import numpy as np
import pytest
from conftest import CONFIGS, WEAK_PAIR, two_ion_toml
from scipy.constants import hbar
from scipy.constants import k as kB

import mdrotor
from mdrotor.errors import InputError, PhysicsError
from mdrotor.model import quantum as qb
from mdrotor.physics import noise
from mdrotor.physics import quantum_rotor as qr
from mdrotor.physics.species import get_species

# Two 40Ca+ ions pinned weakly (libration ~20 kHz, I w_lib / hbar ~ 1000) so
# that a hot libration (nbar = 20) needs only ~200 rotor levels and a few
# hundred angular momenta while its anharmonicity stays ~1 %: the classical
# limit, checked against the ensemble.


def pair_moment_2():
    """|M_2| = 2 e r^2 of two ions at rest, r^3 = e^2 / (16 pi eps0 m w_r^2)
    (force balance of the pair, H. Goldstein, Classical Mechanics, ch. 3)."""
    from scipy.constants import e, epsilon_0

    m = get_species("40Ca+").mass_kg
    r = (e**2 / (16 * math.pi * epsilon_0 * m * (2 * math.pi * 1.2e6) ** 2)) ** (1 / 3)
    return 2 * e * r**2, 2 * m * r**2


def weak_pair(tmp_path, extra=""):
    p = tmp_path / "weak_pair.toml"
    p.write_text(WEAK_PAIR + extra)
    return p


# --------------------------------------------------------------------------
# ladder from the crystal's symmetry
# --------------------------------------------------------------------------
@pytest.mark.parametrize("name, N, stat", [("demo", 2, "fermion"), ("triangle_order3", 3, "boson"),
                                           ("square_order4", 4, "fermion"), ("two_ion_quadrupole", 2, "fermion")])
def test_ladder_of_ring_crystals_is_rotor_rule(name, N, stat):
    # A ring of N identical ions: the sign of an N-cycle is (-1)^(N-1)
    # (elementary group theory); fermions with N even: L = N/2 mod N, else 0
    # mod N (hand-derived cases in tests/physics/test_rotor.py).
    cfg = mdrotor.load_config(CONFIGS / f"{name}.toml")
    s = qb.build(cfg)
    assert (s.symmetry_order, s.cycles, s.statistics) == (N, 1, stat)
    expected = (N, N // 2) if stat == "fermion" and N % 2 == 0 else (N, 0)
    assert (s.model.ladder.spacing, s.model.ladder.offset) == expected
    lad = qb.config_ladder(cfg)
    assert (lad.modulus, lad.residue, lad.symmetry_order) == (*expected, N)


def test_unlike_ions_populate_every_L_identical_ones_only_the_ladder(tmp_path):
    # Two unlike ions (40Ca+ and 44Ca+): no exchange symmetry, both parities
    # of L populated by a thermal release; identical 40Ca+: only odd L
    # (two identical fermions, tests/physics/test_rotor.py), every forbidden L at zero.
    p = weak_pair(tmp_path)
    cfg = mdrotor.load_config(p, ["initial.occupations.libration=2", "crystal.ions=['40Ca+','44Ca+']"])
    s = qb.build(cfg)
    d = qr.evolve(s.model, s.initial).final
    assert np.sum(d.P[d.L % 2 == 0]) > 0.2 and np.sum(d.P[d.L % 2 == 1]) > 0.2
    cfg = mdrotor.load_config(p, ["initial.occupations.libration=2"])
    s = qb.build(cfg)
    d = qr.evolve(s.model, s.initial).final
    assert np.all(d.L % 2 == 1)
    assert np.sum(d.P) == pytest.approx(1.0, abs=1e-12)


# --------------------------------------------------------------------------
# pinning, initial state, noise
# --------------------------------------------------------------------------
def test_pinning_amplitude_and_initial_temperature(tmp_path):
    # Pinning energy of a quadrupole on two ions at first order: Re[c M_2 e^{2 i u}],
    # M_2 = sum Q (z - z_c)^2 (mdrotor.physics.multipole convention); the relaxed curve's
    # order-2 harmonic differs by the deformation, relative c Q / (m w_r^2) =
    # 7e-5 here. The rotor well has w_lib^2 = sum k^2 |V_k| / I; the crystal's
    # libration normal mode agrees to 1 %. The thermal state: 1 / (k_B T) =
    # ln(1 + 1/nbar) / (hbar w_lib) (Bose-Einstein occupation, common practice,
    # no source), Boltzmann weights over the rotor's levels; the lowest gap is
    # hbar w_lib within 1 % (anharmonicity ~ k^2 hbar / (8 I w) = 0.05 % with
    # I w / hbar ~ 1000), so the ground and first levels have the harmonic
    # ratio nbar / (nbar + 1).
    cfg = mdrotor.load_config(weak_pair(tmp_path))
    s = qb.build(cfg)
    M2, I0 = pair_moment_2()
    assert s.I0_kg_m2 == pytest.approx(I0, rel=1e-9)       # equilibrium found to ~1e-12
    amps = {c.order: abs(complex(c.amplitude(0.0))) for c in s.model.pinning}
    assert amps[2] == pytest.approx(1700.0 * M2, rel=2e-4)
    w = math.sqrt(sum(k * k * a for k, a in amps.items()) / s.I0_kg_m2)
    assert s.f_lib_model_hz == pytest.approx(w / (2 * math.pi), rel=1e-3)
    assert s.f_lib_model_hz == pytest.approx(s.f_lib_hz, rel=0.01)
    assert s.nbar_libration == 20
    assert s.temperature_k == pytest.approx(hbar * 2 * math.pi * s.f_lib_hz / (kB * math.log(1 + 1 / 20)), rel=1e-12)
    lv, p, dropped = qr._thermal_columns(s.model, s.initial)
    beta = 1 / (kB * s.temperature_k)
    np.testing.assert_allclose(p[1:] / p[:-1], np.exp(-beta * np.diff(lv.energies_j)), rtol=1e-9)
    assert p[1] / p[0] == pytest.approx(20 / 21, rel=0.01)
    assert dropped <= s.initial.cut


def test_crystal_held_through_its_deformation():
    # A regular triangle has no order-2 moment (sum of cube roots of unity
    # squared; common practice, no source), but a quadrupole deforms it and
    # holds it with wells of order 6 = lcm(3, 2), three field factors
    # (mdrotor.physics.pinning's relaxed held curve). The rotor's well from that curve
    # librates at the crystal's libration normal mode (small oscillations of
    # one degree of freedom with the others following, L.D. Landau and E.M.
    # Lifshitz, Mechanics, section 21) within 1 %.
    cfg = mdrotor.load_config(CONFIGS / "triangle_order3.toml", ["pinning.order=2", "pinning.strength='1e5 V/m^2'"])
    s = qb.build(cfg)
    assert [(c.order, c.power) for c in s.model.pinning] == [(6, 3)]
    assert (s.model.ladder.spacing, s.model.ladder.offset) == (3, 0)
    assert s.f_lib_model_hz == pytest.approx(s.f_lib_hz, rel=0.01)
    assert "deformation" in s.holding


def test_noise_becomes_kicks_at_the_analytic_diffusion(tmp_path):
    # Order-2 white multipole noise S: D = n^2 |M_n|^2 S / 4 (mdrotor.physics.noise,
    # diffusion_constant), kicks of +-2 quanta at gamma = D / 4 per direction
    # (mdrotor.physics.coherence's convention). The uniform field exerts no torque on
    # identical ions (moment about the centre of mass zero): no kick channel.
    extra = """
[[noise.multipole]]
order = 2
psd = [ { kind = "white", level = "1e-4 V^2/m^4/Hz" } ]
[[noise.field]]
psd = [ { kind = "white", level = "1e-12 V^2/m^2/Hz" } ]
"""
    cfg = mdrotor.load_config(weak_pair(tmp_path, extra))
    s = qb.build(cfg)
    assert [k.quanta for k in s.model.kicks] == [2]
    D = noise.diffusion_constant(2, pair_moment_2()[0], 1e-4).D_hbar2_per_s
    np.testing.assert_allclose(s.model.kicks[0].rate_per_s, D / 4, rtol=1e-9)


def test_refusals_name_the_key(tmp_path):
    with pytest.raises(InputError, match="layout"):
        qb.build(mdrotor.load_config(CONFIGS / "layout_string2.toml"))
    with pytest.raises(PhysicsError, match="crystal.ions"):
        qb.build(mdrotor.load_config(weak_pair(tmp_path), ["crystal.ions=1"]))
    with pytest.raises(PhysicsError, match="configuration"):
        qb.build(mdrotor.load_config(CONFIGS / "linear_three.toml"))      # a string only while pinned
    with pytest.raises(PhysicsError, match="records"):
        s = qb.build(mdrotor.load_config(weak_pair(tmp_path)))
        qr.evolve(s.model, s.initial, max_columns=50)


# --------------------------------------------------------------------------
# the classical limit and the comparison
# --------------------------------------------------------------------------
def test_classical_limit_agrees_with_the_ensemble(tmp_path):
    # A hot libration (nbar = 20) released over five libration periods: the
    # Wigner-sampled classical ensemble follows the quantum dynamics when the
    # actions involved are large against hbar (truncated Wigner approximation,
    # E.J. Heller, J. Chem. Phys. 65, 1289 (1976), from memory). Mean |L| and
    # the spread agree within 3 standard errors of the 400-trajectory ensemble.
    from mdrotor.studies.quantum import quantum_report

    d = quantum_report(weak_pair(tmp_path), progress=False)
    fin = d["stages"][-1]
    e = fin["ensemble"]
    L = np.asarray(mdrotor.run(mdrotor.load_config(weak_pair(tmp_path))).final.arrays["L_com_hbar"])
    assert e["n"] == L.size == 400
    mean_abs, mean_abs_err = np.mean(np.abs(L)), np.std(np.abs(L), ddof=1) / math.sqrt(L.size)
    assert abs(fin["L_mean_abs_hbar"] - mean_abs) < 3 * mean_abs_err
    assert abs(e["std_diff_hbar"]) < 3 * e["std_diff_err_hbar"]
    assert d["verdict"] != "fails"


def test_compare_verdicts_on_drawn_samples():
    # The comparison's own statistics: samples drawn from P(L) itself hold;
    # samples twice as wide fail (seeded draws).
    L = np.arange(-201, 202, 2)
    P = np.exp(-0.5 * (L / 30.0) ** 2)
    P /= P.sum()
    dist = qr.Distribution("x", 0.0, L, P, float(P @ L), float(np.sqrt(P @ L**2 - (P @ L) ** 2)))
    rng = np.random.default_rng(2)
    same = rng.choice(L, size=4000, p=P) + rng.uniform(-0.9, 0.9, 4000)
    from mdrotor.analysis.quantum_compare import compare

    assert compare(dist, same, qr.Ladder(2, 1))["verdict"] == "holds"
    wide = rng.normal(0.0, 60.0, 4000)
    assert compare(dist, wide, qr.Ladder(2, 1))["verdict"] == "fails"


# --------------------------------------------------------------------------
# the command
# --------------------------------------------------------------------------
def _cli(*args):
    return subprocess.run([sys.executable, "-m", "mdrotor", "quantum", *map(str, args)], capture_output=True, text=True)


def test_command_json_and_text(tmp_path):
    p = weak_pair(tmp_path)
    r = _cli(p, "--no-ensemble", "--json", "--set", "initial.occupations.libration=1")
    assert r.returncode == 0, r.stderr
    d = json.loads(r.stdout)
    assert d["allowed_L_spacing"] == 2 and d["allowed_L_offset"] == 1
    assert [s["name"] for s in d["stages"]] == ["initial", "release", "free"]
    assert d["lines"]["dL"] == 2 and "verdict" not in d
    r = _cli(p, "--no-ensemble", "--set", "initial.occupations.libration=1")
    assert r.returncode == 0 and "allowed L = 1 mod 2" in r.stdout and "lines L -> L + 2" in r.stdout


def test_command_reads_a_result_file(tmp_path):
    cfg = mdrotor.load_config(weak_pair(tmp_path), ["initial.occupations.libration=1"])
    res = mdrotor.run(cfg, trajectories=64)
    h5 = tmp_path / "weak.h5"
    mdrotor.save(res, h5)
    r = _cli(h5, "--json")
    assert r.returncode == 0, r.stderr
    d = json.loads(r.stdout)
    assert d["source_kind"] == "result" and d["stages"][-1]["ensemble"]["n"] == 64
    assert d["verdict"] in ("holds", "fails", "undecided")


@pytest.mark.parametrize("args, key", [(["--tol", "0.5"], "--tol"), (["--tol", "x"], "--tol"),
                                       (["--cut", "0"], "--cut"), (["--lines", "-1"], "--lines"),
                                       (["--set", "initial.temperature='-1 K'"], "initial.temperature")])
def test_command_bad_input_exits_2_with_one_line(tmp_path, args, key):
    r = _cli(weak_pair(tmp_path), "--no-ensemble", *args)
    assert r.returncode == 2
    lines = r.stderr.strip().splitlines()
    assert len(lines) == 1 and key in lines[0] and "Traceback" not in r.stderr


def test_command_refuses_layout_pinning_and_overrides_on_results(tmp_path):
    r = _cli(CONFIGS / "layout_string2.toml", "--no-ensemble")
    assert r.returncode == 2 and "layout" in r.stderr and len(r.stderr.strip().splitlines()) == 1
    h5 = tmp_path / "x.h5"
    mdrotor.save(mdrotor.run(mdrotor.load_config(weak_pair(tmp_path)), trajectories=4), h5)
    r = _cli(h5, "--set", "run.seed=3")
    assert r.returncode == 2 and "--set" in r.stderr


# --------------------------------------------------------------------------
# the result file (mdrotor quantum -o) and its report figure
# --------------------------------------------------------------------------
@pytest.fixture(scope="module")
def quantum_file(tmp_path_factory):
    d = tmp_path_factory.mktemp("quantum_out")
    p = d / "weak.toml"
    p.write_text(WEAK_PAIR)
    out = d / "q.h5"
    r = _cli(p, "--trajectories", 60, "--set", "initial.occupations.libration=2", "--json", "-o", out)
    assert r.returncode == 0, r.stderr
    return out, json.loads(r.stdout), p


def test_output_file_holds_the_report(quantum_file):
    # What the command prints is what the file holds (HDF5 round trip, the
    # JSON's nulls as absent entries), in stage order, with the config.
    from mdrotor.results.store import load_quantum

    out, d, p = quantum_file
    back = load_quantum(out)
    assert [s["name"] for s in back["stages"]] == ["initial", "release", "free"]
    for a, b in zip(d["stages"], back["stages"]):
        assert a["L"] == b["L"] and a["P"] == b["P"]
        assert a["ensemble"]["histogram_L"] == b["ensemble"]["histogram_L"]
        assert a["ensemble"]["histogram_counts"] == b["ensemble"]["histogram_counts"]
        assert a["ensemble"]["tv"] == b["ensemble"]["tv"] and a["ensemble"]["verdict"] == b["ensemble"]["verdict"]
    assert back["verdict"] == d["verdict"] and back["verdict_reason"] == d["verdict_reason"]
    assert back["lines"]["freq_hz"] == d["lines"]["freq_hz"] and back["lines"]["weight"] == d["lines"]["weight"]
    assert (back["allowed_L_spacing"], back["allowed_L_offset"]) == (2, 1)
    assert "[[stage]]" in back["config_text"] and back["kind"] == "quantum"
    assert not list(out.parent.glob(".*tmp*"))  # the temporary file was renamed


def test_output_refused_before_any_work(tmp_path):
    # check_writable before the quantum rotor and the ensemble: one line, exit 2
    p = weak_pair(tmp_path)
    r = _cli(p, "--no-ensemble", "-o", tmp_path / "no_such_folder" / "q.h5")
    assert r.returncode == 2 and "-o" in r.stderr and "does not exist" in r.stderr
    assert len(r.stderr.strip().splitlines()) == 1


def test_a_file_without_the_ensemble_reads_back_as_its_text(tmp_path):
    # --no-ensemble -o: the file has no verdict (an absent attribute, None
    # when read back); its text is the command's (the report's page prints
    # it: it ended in a KeyError on the missing ensemble)
    from mdrotor.results.store import load_quantum
    from mdrotor.studies.quantum import text

    p = weak_pair(tmp_path)
    out = tmp_path / "q.h5"
    r = _cli(p, "--no-ensemble", "--json", "--set", "initial.occupations.libration=1", "-o", out)
    assert r.returncode == 0, r.stderr
    back = load_quantum(out)
    assert back["verdict"] is None
    assert text(back) == text(json.loads(r.stdout))


def test_report_draws_P_of_L_beside_the_ensemble(quantum_file, tmp_path):
    # The figure shows the stored numbers: bar heights are P(L) at the allowed
    # L, the ensemble points are counts / N at the histogram's L shifted as
    # compared (quantum_compare), with sqrt(counts) / N error bars (Poisson
    # counting, common practice, no source); the verdict is written under it.
    from mdrotor.report.inputs import file_kind
    from mdrotor.report.page import write_report
    from mdrotor.report.quantum_figure import quantum_figure

    out, d, _ = quantum_file
    assert file_kind(out) == "quantum"
    fig = quantum_figure(out)
    axs = [ax for ax in fig.axes if ax.get_visible()]
    assert len(axs) == 3
    # Wide distributions are drawn in groups of neighbouring allowed L: each
    # bar (and ensemble point) holds the sum over the allowed L inside it.
    for ax, st in zip(axs, d["stages"]):
        bars = ax.patches
        L, P = np.asarray(st["L"], float), np.asarray(st["P"], float)
        assert all(v % 2 == 1 for v in st["L"])
        width = bars[0].get_width() / 0.8  # the bars are drawn 0.8 of their group wide
        assert round(width) % 2 == 0 and width >= 2
        e = st["ensemble"]
        hL = np.asarray(e["histogram_L"], float) - e["shift_hbar"]
        c = np.asarray(e["histogram_counts"], float)
        assert sum(b.get_height() for b in bars) == pytest.approx(P.sum(), rel=1e-12)
        for b in bars:
            mid = b.get_x() + 0.5 * b.get_width()
            inside = np.abs(L - mid) < 0.5 * width
            assert b.get_height() == pytest.approx(P[inside].sum(), rel=1e-12)
        pts = [ln for ln in ax.get_lines() if ln.get_marker() not in ("None", "", None, "_")]
        x, y = pts[0].get_data()
        assert np.sum(y) == pytest.approx(c.sum() / e["n"], rel=1e-12)
        for xi, yi in zip(x, y):
            inside = np.abs(hL - xi) < 0.5 * width
            assert yi == pytest.approx(c[inside].sum() / e["n"], rel=1e-12)
    assert d["verdict"].upper() in fig.get_supxlabel()
    rep = write_report(out, tmp_path / "rep")
    assert rep["kind"] == "quantum" and [p.rsplit("/", 1)[1] for p in rep["figures"]] == ["quantum_P_L.png"]
    assert d["verdict"] in (tmp_path / "rep" / "summary.md").read_text()


# --------------------------------------------------------------------------
# mdrotor rotor and mdrotor quantum agree on what they share
# --------------------------------------------------------------------------
def noisy_pair(f_rot: str) -> str:
    """Two free 40Ca+ rotating at f_rot under weak white quadrupole noise."""
    return two_ion_toml(
        pinning=None, rotation={"f_start": f_rot}, stage=[{"name": "free", "duration": "20 us"}],
        initial={"temperature": "0 K"}, run={"trajectories": 8, "seed": 4},
        noise={"multipole": [{"order": 2, "psd": {"kind": "white", "level": "1e-6 V^2/m^4/Hz"}}]})


@pytest.mark.parametrize("f_rot, rel_I, rel_D", [("0 kHz", 1e-9, 1e-9), ("150 kHz", 1e-6, 1e-4)])
def test_rotor_and_quantum_agree(tmp_path, f_rot, rel_I, rel_D):
    # The same crystal seen by both commands: hbar / (2 pi I), the allowed
    # ladder (the one function rotor.allowed_L_ladder) and the analytic D of
    # the same noise (noise.NoiseModel.rotor_diffusion). At rest both take
    # the same equilibrium (agreement to the solver's precision). Rotating,
    # the quantum rotor interpolates I (cubic spline, ~1e-8 here) and the
    # ions' positions (linearly between rates ~12 kHz apart: for the pair,
    # r^3 ~ 1/(w_r^2 - w^2) (Goldstein, Classical Mechanics, ch. 3), the
    # interpolation error (df^2 / 8) r'' / r is ~1e-5, and D ~ |M_2|^2 ~ r^4
    # four times that), hence the looser bounds.
    from mdrotor.analysis.rotor import rotor_summary

    p = tmp_path / "pair.toml"
    p.write_text(noisy_pair(f_rot))
    r = rotor_summary(p)
    q = mdrotor.quantum(mdrotor.load_config(p), ensemble=False, records=1)
    s = qb.build(mdrotor.load_config(p))
    f = r["f_rot_hz"]
    I_q = float(s.model.energy.moment_of_inertia(2 * np.pi * f))
    assert r["hbar_over_I_hz"] == pytest.approx(hbar / (2 * np.pi * I_q), rel=rel_I, abs=0)
    if f == 0:
        assert r["hbar_over_I_hz"] == pytest.approx(q["hbar_over_I_hz"], rel=rel_I, abs=0)
    assert (r["allowed_L_mod"], r["allowed_L_residue"], r["symmetry_order"]) == \
        (q["allowed_L_spacing"], q["allowed_L_offset"], q["symmetry_order"]) == (2, 1, 2)
    assert len(q["noise"]) == 1 and q["noise"][0]["kick_quanta"] == r["kick_quanta"] == 2
    assert q["noise"][0]["D_end_hbar2_per_s"] == pytest.approx(r["diffusion_analytic_hbar2_per_s"], rel=rel_D, abs=0)
