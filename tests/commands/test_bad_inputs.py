"""Bad input of every kind: exit status 2, one line on stderr naming the file
and the key, no traceback, no warning printed first, no output file left.

``BAD`` is the table: each case writes its input files into an empty folder,
runs the command line there (``mdrotor.commands.main.main`` in this process, with
stderr captured; ``test_real_process_exit_status`` runs a few in a
subprocess), and checks the message for the key and the words expected.
Cases cover run configs (typos, wrong dimensions, non-finite values,
impossible traps and ramps), ``--set`` overrides, ramp tables, noise tables,
sweep and optimisation files, electrode layouts, result files and command
line options.
"""

import subprocess
import sys
import warnings
from pathlib import Path

import pytest
from conftest import two_ion_toml

from mdrotor.commands.main import main

GOOD = two_ion_toml(
    trap={"f_radial": "1.0 MHz", "f_axial": "2.5 MHz"}, pinning={"order": 2, "strength": "5e4 V/m^2"},
    stage=[{"name": "spin-up", "duration": "1 ms", "f_rot": {"to": "100 kHz", "shape": "smoothstep"}},
           {"name": "release", "duration": "0.2 ms", "pinning": {"to": 0.0, "shape": "cosine"}}],
    initial={"temperature": "0.5 mK"}, run={"trajectories": 10, "seed": 1})

DRIVEN = GOOD.replace('f_axial = "2.5 MHz"', 'f_axial = "2.5 MHz"\nf_drive = "30 MHz"')

LAYOUT = """
[layout]
name = "strip"
units = "um"
[trap]
point = [0, 0, 100]
[rf]
amplitude = "100 V"
f_drive = "30 MHz"
species = "40Ca+"
[design]
ions = 2
order = 2
strength = "1e6 V/m^2"
[[electrode]]
name = "rf"
role = "rf"
limit = "300 V"
rect = { x = [-100, 100], y = [-300, 300] }
"""

SWEEP = """
base = "good.toml"
trajectories = 2
[[axis]]
key = "stage.spin-up.duration"
values = ["0.5 ms", "1 ms"]
"""

OPTIMIZE = """
base = "good.toml"
trajectories = 2
[[parameter]]
key = "stage.spin-up.duration"
bounds = ["0.5 ms", "2 ms"]
[[objective]]
metric = "L_std_hbar"
"""

LASER = GOOD + """[[laser]]
name = "cool"
detuning = "-11 MHz"
saturation = 0.5
direction = [1, 0, 0]
"""

BINARY = bytes(range(128, 256)) * 4  # not UTF-8 from the first byte
RUN = ["run", "c.toml", "-o", "out.h5", "--quiet"]


def _edit(text, old, new):
    assert old in text, old
    return text.replace(old, new, 1)


def _cfg(old, new, base=GOOD):
    return {"c.toml": _edit(base, old, new)}


# (id, files {name: text or bytes}, argv, key the message must name, words it must contain)
BAD = [
    # --- run configs (the first 22 are the original config-error table) ---
    ("unknown species", _cfg('ion = "40Ca+"', 'ion = "41Xx+"'), RUN, "species.ion", "unknown species"),
    # species.ion was ignored when crystal.ions is a list, whatever it said
    ("species.ion not among the listed ions", _cfg("ions = 2", 'ions = ["40Ca+", "40Ca+"]', _edit(GOOD, '"40Ca+"', '"9Be+"')),
     RUN, "species.ion", "not among crystal.ions"),
    # a custom species named like a known one silently replaced its AME2020 mass
    ("custom species shadowing a known one", _cfg('ion = "40Ca+"', 'ion = "40Ca+"\n[species.custom."40Ca+"]\nmass = "4 u"'),
     RUN, "species.custom.40Ca+", "known species"),
    ("no ions", _cfg("ions = 2", "ions = 0"), RUN, "crystal.ions", "1 to 30"),
    ("too many ions", _cfg("ions = 2", "ions = 31"), RUN, "crystal.ions", "1 to 30"),
    ("time for a frequency", _cfg('f_radial = "1.0 MHz"', 'f_radial = "1.0 ms"'), RUN, "trap.f_radial", "frequency"),
    ("negative frequency", _cfg('f_radial = "1.0 MHz"', 'f_radial = "-1.0 MHz"'), RUN, "trap.f_radial", "positive"),
    ("key typo", _cfg('f_axial = "2.5 MHz"', 'f_axil = "2.5 MHz"'), RUN, "trap.f_axil", "unknown key"),
    ("missing key", _cfg('f_axial = "2.5 MHz"', ""), RUN, "trap.f_axial", "missing"),
    ("wrong multipole unit", _cfg('strength = "5e4 V/m^2"', 'strength = "5e4 V/m^3"'), RUN, "pinning.strength", "V/m^2"),
    ("order 1", _cfg("order = 2", "order = 1"), RUN, "pinning.order", ">= 2"),
    ("negative duration", _cfg('duration = "1 ms"', 'duration = "-1 ms"'), RUN, "stage.spin-up.duration", "positive"),
    ("unknown shape", _cfg('shape = "smoothstep"', 'shape = "wobbly"'), RUN, "stage.spin-up.f_rot.shape", "unknown shape"),
    ("rotation too fast", _cfg('to = "100 kHz"', 'to = "1.2 MHz"'), RUN, "stage.spin-up.f_rot",
     "faster than the radial confinement"),
    # 0.998 MHz is below f_radial = 1 MHz, but the quadrupole turning with the crystal takes
    # 2 Q c / m from one in-plane w^2: the limit is 0.99695 MHz (the run failed after
    # integrating, naming '<config>: crystal')
    ("rotation beyond the quadrupole-weakened confinement", _cfg('to = "100 kHz"', 'to = "0.998 MHz"'), RUN,
     "stage.spin-up.f_rot", "order-2 pinning"),
    ("discontinuous ramp", _cfg('pinning = { to = 0.0, shape = "cosine" }',
                                'pinning = { from = 0.5, to = 0.0, shape = "cosine" }'), RUN,
     "stage.release.pinning.from", "discontinuous"),
    ("voltage for a temperature", _cfg('temperature = "0.5 mK"', 'temperature = "0.5 mV"'), RUN,
     "initial.temperature", "temperature"),
    ("no trajectories", _cfg("trajectories = 10", "trajectories = 0"), RUN, "run.trajectories", ">= 1"),
    ("negative seed", _cfg("seed = 1", "seed = -3"), RUN, "run.seed", "seed"),
    ("section typo", _cfg("[run]", "[runn]"), RUN, "runn", "unknown section"),
    ("frequencies and (a, q)", _cfg('f_radial = "1.0 MHz"', 'f_radial = "1.0 MHz"\nf_drive = "30 MHz"\nq = [0.3, 0.3, 0.3]'),
     RUN, "trap", "give either"),
    ("unknown trap model", _cfg('f_axial = "2.5 MHz"', 'f_axial = "2.5 MHz"\nmodel = "magnetic"'), RUN, "trap.model",
     "'pseudo' or 'rf'"),
    # the axial frequency is the one above half the drive; the message names the drive too
    ("secular above half the drive", _cfg('f_axial = "2.5 MHz"', 'f_axial = "2.5 MHz"\nf_drive = "3 MHz"'), RUN,
     "trap.f_axial", "half the drive frequency (f_drive = '3 MHz'"),
    ("table times not increasing", _cfg('f_rot = { to = "100 kHz", shape = "smoothstep" }',
                                        'f_rot = { to = "50 kHz", shape = "table", points = [["0 ms", "0 Hz"], '
                                        '["0.7 ms", "10 kHz"], ["0.5 ms", "20 kHz"], ["1 ms", "50 kHz"]] }'), RUN,
     "stage.spin-up.f_rot.points", "increase"),
    ("repeated stage name", _cfg('name = "release"', 'name = "spin-up"'), RUN, "stage[1].name", "unique"),
    # --- non-finite values, for every kind of key ---
    ("nan strength", _cfg('strength = "5e4 V/m^2"', 'strength = "nan V/m^2"'), RUN, "pinning.strength", "finite"),
    ("inf strength", _cfg('strength = "5e4 V/m^2"', 'strength = "inf V/m^2"'), RUN, "pinning.strength", "finite"),
    ("inf duration", _cfg('duration = "1 ms"', 'duration = "inf ms"'), RUN, "stage.spin-up.duration", "finite"),
    ("inf temperature", _cfg('temperature = "0.5 mK"', 'temperature = "inf mK"'), RUN, "initial.temperature", "finite"),
    ("inf radial frequency", _cfg('f_radial = "1.0 MHz"', 'f_radial = "inf MHz"', DRIVEN), RUN, "trap.f_radial", "finite"),
    ("bare nan frequency", _cfg('f_radial = "1.0 MHz"', "f_radial = nan"), RUN, "trap.f_radial", "finite"),
    ("overflowing value", _cfg('f_axial = "2.5 MHz"', 'f_axial = "1e308 GHz"'), RUN, "trap.f_axial", "finite"),
    ("nan occupation", _cfg('temperature = "0.5 mK"', 'temperature = "0.5 mK"\noccupations = { com-x = nan }'), RUN,
     "initial.occupations.com-x", "finite"),
    # a selector that names no mode label, kind or plane was ignored: the run used the temperature
    ("occupation label typo", _cfg('temperature = "0.5 mK"', 'temperature = "0.5 mK"\noccupations = { librat = 1 }'),
     RUN, "initial.occupations.librat", "a mode label"),
    ("occupation of an axis that has no mode", _cfg('temperature = "0.5 mK"',
                                                   'temperature = "0.5 mK"\noccupations = { com-x = 1 }'),
     RUN, "initial.occupations.com-x", "'com-xy'"),
    ("nan multiplier", _cfg("to = 0.0, shape", "to = nan, shape"), RUN, "stage.release.pinning.to", "finite"),
    ("nan Mathieu q", _cfg('f_radial = "1.0 MHz"\nf_axial = "2.5 MHz"', 'f_drive = "30 MHz"\nq = [0.1, 0.1, nan]'), RUN,
     "trap.q[2]", "finite"),
    ("inf stray field", _cfg('f_axial = "2.5 MHz"', 'f_axial = "2.5 MHz"\nstray_field = ["0 V/m", "inf V/m", "0 V/m"]'),
     RUN, "trap.stray_field[1]", "finite"),
    ("inf loss radius", {"c.toml": GOOD + '[observe]\nloss_radius = "inf um"\n'}, RUN, "observe.loss_radius", "finite"),
    ("nan time step", _cfg("seed = 1", 'seed = 1\ndt = "nan us"'), RUN, "run.dt", "finite"),
    ("inf custom mass", _cfg('ion = "40Ca+"', 'ion = "Xx+"\n[species.custom."Xx+"]\nmass = "inf u"'), RUN,
     "species.custom.Xx+.mass", "finite"),
    ("nan noise level", {"c.toml": GOOD + '[[noise.field]]\npsd = { kind = "white", level = "nan V^2/m^2/Hz" }\n'}, RUN,
     "noise.field[0].psd.level", "finite"),
    ("inf tone frequency", {"c.toml": GOOD + '[[noise.tone]]\ntarget = "field"\naxis = "x"\namplitude = "1 V/m"\n'
                                             'frequency = "inf kHz"\n'}, RUN, "noise.tone[0].frequency", "finite"),
    ("--set nan", {"c.toml": GOOD}, RUN + ["--set", "trap.f_radial=nan"], "trap.f_radial", "finite"),
    ("--set inf angle", {"c.toml": GOOD}, RUN + ["--set", "pinning.angle=inf"], "pinning.angle", "finite"),
    # --- laser beams ---
    ("unknown laser species", _cfg('direction = [1, 0, 0]', 'direction = [1, 0, 0]\nspecies = "41Xx+"', LASER), RUN,
     "laser.cool.species", "unknown species"),
    ("laser species not in the crystal", _cfg('direction = [1, 0, 0]', 'direction = [1, 0, 0]\nspecies = "88Sr+"', LASER),
     RUN, "laser.cool.species", "no ion of species"),
    ("laser direction not a unit vector", _cfg("direction = [1, 0, 0]", "direction = [1, 1, 0]", LASER), RUN,
     "laser.cool.direction", "unit vector"),
    ("laser direction zero", _cfg("direction = [1, 0, 0]", "direction = [0, 0, 0]", LASER), RUN,
     "laser.cool.direction", "zero vector"),
    ("negative saturation", _cfg("saturation = 0.5", "saturation = -0.5", LASER), RUN, "laser.cool.saturation",
     "non-negative"),
    ("laser stage that does not exist", _cfg("direction = [1, 0, 0]", 'direction = [1, 0, 0]\nstages = ["cool"]', LASER),
     RUN, "laser.cool.stages[0]", "no stage named 'cool'"),
    # the laser's stages share the noise entries' parser (schedule.stage_scales)
    ("negative laser intensity multiplier", _cfg("direction = [1, 0, 0]",
                                                 'direction = [1, 0, 0]\nstages = { release = -1.0 }', LASER),
     RUN, "laser.cool.stages.release", "non-negative intensity multiplier"),
    ("laser stages neither table nor list", _cfg("direction = [1, 0, 0]", 'direction = [1, 0, 0]\nstages = "release"',
                                                 LASER), RUN, "laser.cool.stages", "{ stage = intensity multiplier }"),
    ("wavelength of the wrong dimension", _cfg("direction = [1, 0, 0]", 'direction = [1, 0, 0]\nwavelength = "397 MHz"',
                                               LASER), RUN, "laser.cool.wavelength", "wrong dimension"),
    ("nan detuning", _cfg('detuning = "-11 MHz"', 'detuning = "nan MHz"', LASER), RUN, "laser.cool.detuning", "finite"),
    ("unknown emission pattern", _cfg("direction = [1, 0, 0]", 'direction = [1, 0, 0]\nemission = "dipolar"', LASER),
     RUN, "laser.cool.emission", "pattern"),
    ("dipole pattern without its axis", _cfg("direction = [1, 0, 0]",
                                             'direction = [1, 0, 0]\nemission = { pattern = "linear" }', LASER),
     RUN, "laser.cool.emission.axis", "missing"),
    ("no cooling line for a custom ion", _cfg('ion = "40Ca+"', 'ion = "Xx+"\n[species.custom."Xx+"]\nmass = "40 u"', LASER),
     RUN, "laser.cool.wavelength", "no cooling line"),
    ("laser key typo", _cfg("saturation = 0.5", "saturaton = 0.5", LASER), RUN, "laser[0].saturaton", "unknown key"),
    ("--set negative saturation", {"c.toml": LASER}, RUN + ["--set", "laser.cool.saturation=-1"], "laser.cool.saturation",
     "non-negative"),
    ("rotor --drift-quanta 0", {"c.toml": LASER}, ["rotor", "c.toml", "--drift-quanta", "0"], "--drift-quanta", "positive"),
    # --- impossible traps, named by the key written ---
    ("trap too weak for the drive", _cfg('f_radial = "1.0 MHz"', 'f_radial = "1 Hz"', DRIVEN), RUN, "trap.f_radial",
     "too weak for this drive"),
    ("radial above half the drive", _cfg('f_radial = "1.0 MHz"', 'f_radial = "1 GHz"', DRIVEN), RUN, "trap.f_radial",
     "not below half the drive frequency"),
    # --- units that differ by case or spelling ---
    ("mk for mK", _cfg('temperature = "0.5 mK"', 'temperature = "0.5 mk"'), RUN, "initial.temperature",
     "did you mean '0.5 mK'?"),
    ("mhz for MHz", _cfg('f_radial = "1.0 MHz"', 'f_radial = "1.0 mhz"'), RUN, "trap.f_radial", "did you mean '1.0 MHz'?"),
    ("mS for ms", {"c.toml": GOOD}, RUN + ["--set", "stage.spin-up.duration='2 mS'"], "stage.spin-up.duration",
     "did you mean '2 ms'?"),
    # --- files that are not what they should be ---
    ("binary run config", {"c.toml": BINARY}, RUN, "", "not a text file"),
    ("folder as run config", {"c.toml/x": "folder"}, RUN, "", "it is a folder"),
    ("binary run config to rotor", {"c.toml": BINARY}, ["rotor", "c.toml"], "", "not a text file"),
    ("binary ramp table", {"c.toml": _edit(GOOD, 'f_rot = { to = "100 kHz", shape = "smoothstep" }',
                                           'f_rot = { to = "100 kHz", shape = "table", table = "ramp.csv" }'),
                           "ramp.csv": BINARY}, RUN, "stage.spin-up.f_rot.table", "not a text file"),
    ("nan in ramp table", {"c.toml": _edit(GOOD, 'f_rot = { to = "100 kHz", shape = "smoothstep" }',
                                           'f_rot = { to = "100 kHz", shape = "table", table = "ramp.csv" }'),
                           "ramp.csv": "t_s, f_hz\n0, 0\n0.0005, nan\n0.001, 100000\n"}, RUN,
     "stage.spin-up.f_rot.table", "not finite"),
    ("binary sweep file", {"s.toml": BINARY}, ["sweep", "s.toml", "-o", "out.h5", "--quiet"], "", "not a text file"),
    ("binary optimisation file", {"o.toml": BINARY}, ["optimize", "o.toml", "-o", "out.h5", "--quiet"], "",
     "not a text file"),
    ("binary layout", {"l.toml": BINARY}, ["electrodes", "l.toml"], "", "not a text file"),
    ("folder as layout", {"l.toml/x": "folder"}, ["electrodes", "l.toml"], "", "it is a folder"),
    ("report of a missing file", {}, ["report", "missing.h5", "-o", "rep"], "", "no such file"),
    ("report of a text file", {"r.h5": "not hdf5\n"}, ["report", "r.h5", "-o", "rep"], "", "not an HDF5 file"),
    ("report of a truncated file", {"r.h5": b"\x89HDF\r\n\x1a\n" + bytes(40)}, ["report", "r.h5", "-o", "rep"], "",
     "HDF5"),
    ("rotor of a missing result", {}, ["rotor", "missing.h5"], "", "no such file"),
    ("rotor of a text file", {"r.h5": "not hdf5\n"}, ["rotor", "r.h5"], "", "not an HDF5 file"),
    # --- sweep and optimisation files ---
    ("inf in a sweep range", {"good.toml": GOOD, "s.toml": _edit(SWEEP, 'values = ["0.5 ms", "1 ms"]',
                                                                 'range = { from = "0.5 ms", to = "inf ms", num = 3 }')},
     ["sweep", "s.toml", "-o", "out.h5", "--quiet"], "stage.spin-up.duration", "finite"),
    ("nan among sweep values", {"good.toml": GOOD, "s.toml": _edit(SWEEP, '"1 ms"]', '"nan ms"]')},
     ["sweep", "s.toml", "-o", "out.h5", "--quiet"], "stage.spin-up.duration", "finite"),
    ("sweep --set of a weak trap", {"good.toml": DRIVEN, "s.toml": SWEEP},
     ["sweep", "s.toml", "-o", "out.h5", "--quiet", "--set", "trap.f_radial='1 GHz'"], "trap.f_radial", "half the drive"),
    ("inf optimisation bound", {"good.toml": GOOD, "o.toml": _edit(OPTIMIZE, '"2 ms"]', '"inf ms"]')},
     ["optimize", "o.toml", "-o", "out.h5", "--quiet"], "stage.spin-up.duration", "finite"),
    # --- electrode layouts ---
    ("nan coordinate in a layout", {"l.toml": _edit(LAYOUT, "x = [-100, 100]", "x = [nan, 100]")},
     ["electrodes", "l.toml"], "electrode[0].rect.x[0]", "finite"),
    ("nan rf amplitude", {"l.toml": LAYOUT}, ["electrodes", "l.toml", "--set-layout", "rf.amplitude='nan V'"],
     "rf.amplitude", "finite"),
    ("inf design strength", {"l.toml": _edit(LAYOUT, 'strength = "1e6 V/m^2"', 'strength = "inf V/m^2"')},
     ["electrodes", "l.toml"], "design.strength", "finite"),
    # --- command line options ---
    ("inf --rate", {"l.toml": LAYOUT, "c.toml": GOOD},
     ["electrodes", "l.toml", "--config", "c.toml", "--waveform", "w.csv", "--rate", "inf MHz"], "--rate", "finite"),
    ("inf --f-rot", {"c.toml": GOOD}, ["crystal", "c.toml", "--f-rot", "inf kHz"], "--f-rot", "finite"),
    # the crystal command's own rotation beyond the quadrupole-weakened confinement (was
    # "crystal: the crystal is not bound", with no word of the rotation)
    ("crystal --f-rot beyond the quadrupole-weakened confinement", {"c.toml": GOOD},
     ["crystal", "c.toml", "--f-rot", "0.998 MHz"], "--f-rot", "order-2 pinning"),
    ("nan --diffusion", {"c.toml": GOOD}, ["rotor", "c.toml", "--diffusion", "nan"], "--diffusion", "finite"),
    ("run --split without --scheduler", {"c.toml": GOOD}, RUN + ["--split", "2"], "--split", "with --scheduler"),
    ("run --split 0", {"c.toml": GOOD}, RUN + ["--split", "0", "--scheduler", "tcp://127.0.0.1:1"], "--split",
     "positive number"),
    ("run with no scheduler at the address", {"c.toml": GOOD}, RUN + ["--scheduler", "tcp://127.0.0.1:1"], "--scheduler",
     "cannot reach a Dask scheduler"),
    ("compare-trap --set inf", {"c.toml": DRIVEN}, ["compare-trap", "c.toml", "--quiet", "--set",
                                                   "initial.temperature='inf mK'"], "initial.temperature", "finite"),
]


# cases whose bad value is blamed on another file than the command's argument
WHERE = {"sweep --set of a weak trap": "good.toml"}


def _write(folder: Path, files: dict) -> None:
    for name, content in files.items():
        p = folder / name
        p.parent.mkdir(parents=True, exist_ok=True)
        if isinstance(content, bytes):
            p.write_bytes(content)
        else:
            p.write_text(content)


def _listing(folder: Path) -> set:
    return {str(p.relative_to(folder)) for p in folder.rglob("*")}


def test_table_is_large_enough():
    assert len(BAD) >= 40
    assert len({case[0] for case in BAD}) == len(BAD)


@pytest.mark.parametrize("name,files,argv,key,words", BAD, ids=[case[0] for case in BAD])
def test_bad_input_one_line_exit_2(tmp_path, monkeypatch, capsys, name, files, argv, key, words):
    _write(tmp_path, files)
    before = _listing(tmp_path)
    monkeypatch.chdir(tmp_path)
    with warnings.catch_warnings(record=True) as caught:
        warnings.simplefilter("always")
        rc = main(list(argv))
    out = capsys.readouterr()
    err = out.err.strip()
    assert rc == 2, (rc, err)
    assert len(err.splitlines()) == 1 and "Traceback" not in err, err
    assert err.startswith("mdrotor: error: ")
    # the file the bad value came from (or the command line), the key, the words
    named = "command line" if key.startswith("--") else WHERE.get(name, argv[1])
    assert f"error: {named}" in err, err
    assert key in err and words in err, err
    # nothing printed first: no warning (numpy's overflow warnings, say)
    shown = [w for w in caught if not issubclass(w.category, (DeprecationWarning, PendingDeprecationWarning))]
    assert not shown, [str(w.message) for w in shown]
    # and nothing written
    assert _listing(tmp_path) == before


def test_good_config_passes(tmp_path, capsys):
    p = tmp_path / "c.toml"
    p.write_text(GOOD)
    assert main(["crystal", str(p), "--json"]) == 0


def test_override_errors(tmp_path, capsys):
    p = tmp_path / "c.toml"
    p.write_text(GOOD)
    assert main(["crystal", str(p), "--set", "trap.f_radial=3"]) == 2
    err = capsys.readouterr().err
    assert "trap.f_radial" in err and "needs a unit" in err
    assert main(["crystal", str(p), "--set", "stage.nosuch.duration='1 ms'"]) == 2
    assert "no item named 'nosuch'" in capsys.readouterr().err
    assert main(["crystal", str(p), "--f-rot", "3 V"]) == 2
    assert "--f-rot" in capsys.readouterr().err


def test_unbound_crystal_named(tmp_path, capsys):
    # an order-3 pinning so strong that the cubic term opens the trap
    p = tmp_path / "c.toml"
    p.write_text(GOOD.replace("order = 2", "order = 3").replace('strength = "5e4 V/m^2"', 'strength = "3e13 V/m^3"'))
    assert main(["crystal", str(p)]) == 2
    err = capsys.readouterr().err
    assert "crystal" in err and "not bound" in err


def test_missing_file_and_bad_toml(tmp_path, capsys):
    assert main(["crystal", str(tmp_path / "nope.toml")]) == 2
    assert "cannot read" in capsys.readouterr().err
    p = tmp_path / "c.toml"
    p.write_text("[trap\n")
    assert main(["crystal", str(p)]) == 2
    assert "not valid TOML" in capsys.readouterr().err


@pytest.mark.parametrize("files,argv", [
    ({"c.toml": GOOD.replace("ions = 2", "ions = 0")}, ["crystal", "c.toml"]),
    ({"c.toml": BINARY}, ["crystal", "c.toml"]),
    # numpy printed overflow warnings before the error for this one
    ({"c.toml": GOOD.replace('strength = "5e4 V/m^2"', 'strength = "inf V/m^2"')}, ["run", "c.toml", "-o", "o.h5"]),
])
def test_real_process_exit_status(tmp_path, files, argv):
    _write(tmp_path, files)
    r = subprocess.run([sys.executable, "-m", "mdrotor", *argv], capture_output=True, text=True, cwd=tmp_path)
    assert r.returncode == 2
    assert r.stderr.count("\n") == 1 and "Traceback" not in r.stderr, r.stderr
    assert not (tmp_path / "o.h5").exists()
