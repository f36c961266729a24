"""Bad input: one line naming file and key, exit status 2, no traceback."""

import subprocess
import sys

import pytest

from mdrotor.cli import main

GOOD = """
[species]
ion = "40Ca+"
[crystal]
ions = 2
[trap]
f_radial = "1.0 MHz"
f_axial = "2.5 MHz"
[pinning]
order = 2
strength = "5e4 V/m^2"
[[stage]]
name = "spin-up"
duration = "1 ms"
f_rot = { to = "100 kHz", shape = "smoothstep" }
[[stage]]
name = "release"
duration = "0.2 ms"
pinning = { to = 0.0, shape = "cosine" }
[initial]
temperature = "0.5 mK"
[run]
trajectories = 10
seed = 1
"""

# (replacement applied to GOOD, key path the message must name, words it must contain)
BAD = [
    ('ion = "40Ca+"', 'ion = "41Xx+"', "species.ion", "unknown species"),
    ("ions = 2", "ions = 0", "crystal.ions", "1 to 30"),
    ("ions = 2", "ions = 31", "crystal.ions", "1 to 30"),
    ('f_radial = "1.0 MHz"', 'f_radial = "1.0 ms"', "trap.f_radial", "frequency"),
    ('f_radial = "1.0 MHz"', 'f_radial = "-1.0 MHz"', "trap.f_radial", "positive"),
    ('f_axial = "2.5 MHz"', 'f_axil = "2.5 MHz"', "trap.f_axil", "unknown key"),
    ('f_axial = "2.5 MHz"', "", "trap.f_axial", "missing"),
    ('strength = "5e4 V/m^2"', 'strength = "5e4 V/m^3"', "pinning.strength", "V/m^2"),
    ("order = 2", "order = 1", "pinning.order", ">= 2"),
    ('duration = "1 ms"', 'duration = "-1 ms"', "stage.spin-up.duration", "positive"),
    ('shape = "smoothstep"', 'shape = "wobbly"', "stage.spin-up.f_rot.shape", "unknown shape"),
    ('to = "100 kHz"', 'to = "1.2 MHz"', "stage.spin-up.f_rot", "faster than the radial confinement"),
    ('pinning = { to = 0.0, shape = "cosine" }', 'pinning = { from = 0.5, to = 0.0, shape = "cosine" }', "stage.release.pinning.from", "discontinuous"),
    ('temperature = "0.5 mK"', 'temperature = "0.5 mV"', "initial.temperature", "temperature"),
    ("trajectories = 10", "trajectories = 0", "run.trajectories", ">= 1"),
    ("seed = 1", "seed = -3", "run.seed", "seed"),
    ("[run]", "[runn]", "runn", "unknown section"),
    ('f_radial = "1.0 MHz"', 'f_radial = "1.0 MHz"\nf_drive = "30 MHz"\nq = [0.3, 0.3, 0.3]', "trap", "give either"),
    ('f_axial = "2.5 MHz"', 'f_axial = "2.5 MHz"\nmodel = "magnetic"', "trap.model", "'pseudo' or 'rf'"),
    ('f_axial = "2.5 MHz"', 'f_axial = "2.5 MHz"\nf_drive = "3 MHz"', "trap.f_drive", "half the drive"),
    ('duration = "1 ms"\nf_rot', 'duration = "1 ms"\nf_rot = { to = "50 kHz", shape = "table", points = [["0 ms", "0 Hz"], ["0.7 ms", "10 kHz"], ["0.5 ms", "20 kHz"], ["1 ms", "50 kHz"]] }\nf_rot_unused', "stage.spin-up.f_rot.points", "increase"),
    ('name = "release"', 'name = "spin-up"', "stage[1].name", "unique"),
]


def _write(tmp_path, text):
    p = tmp_path / "bad.toml"
    p.write_text(text)
    return p


@pytest.mark.parametrize("old,new,key,words", BAD)
def test_bad_config_one_line_exit_2(tmp_path, capsys, old, new, key, words):
    assert old in GOOD
    text = GOOD.replace(old, new, 1)
    if "f_rot_unused" in text:
        text = text.replace('f_rot_unused = { to = "100 kHz", shape = "smoothstep" }', "")
    p = _write(tmp_path, text)
    rc = main(["crystal", str(p)])
    err = capsys.readouterr().err.strip()
    assert rc == 2
    assert len(err.splitlines()) == 1, err
    assert str(p) in err and key in err and words in err, err


def test_good_config_passes(tmp_path, capsys):
    p = _write(tmp_path, GOOD)
    assert main(["crystal", str(p), "--json"]) == 0


def test_override_errors(tmp_path, capsys):
    p = _write(tmp_path, GOOD)
    assert main(["crystal", str(p), "--set", "trap.f_radial=3"]) == 2
    err = capsys.readouterr().err
    assert "trap.f_radial" in err and "needs a unit" in err
    assert main(["crystal", str(p), "--set", "stage.nosuch.duration='1 ms'"]) == 2
    assert "no item named 'nosuch'" in capsys.readouterr().err
    assert main(["crystal", str(p), "--f-rot", "3 V"]) == 2
    assert "--f-rot" in capsys.readouterr().err


def test_unbound_crystal_named(tmp_path, capsys):
    # an order-3 pinning so strong that the cubic term opens the trap
    text = GOOD.replace("order = 2", "order = 3").replace('strength = "5e4 V/m^2"', 'strength = "3e13 V/m^3"')
    p = _write(tmp_path, text)
    assert main(["crystal", str(p)]) == 2
    err = capsys.readouterr().err
    assert "crystal" in err and "not bound" in err


def test_missing_file_and_bad_toml(tmp_path, capsys):
    assert main(["crystal", str(tmp_path / "nope.toml")]) == 2
    assert "cannot read" in capsys.readouterr().err
    p = _write(tmp_path, "[trap\n")
    assert main(["crystal", str(p)]) == 2
    assert "not valid TOML" in capsys.readouterr().err


def test_real_process_exit_status(tmp_path):
    p = _write(tmp_path, GOOD.replace("ions = 2", "ions = 0"))
    r = subprocess.run([sys.executable, "-m", "mdrotor", "crystal", str(p)], capture_output=True, text=True)
    assert r.returncode == 2
    assert r.stderr.count("\n") == 1 and "Traceback" not in r.stderr
