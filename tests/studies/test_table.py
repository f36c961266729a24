"""Reading a sweep / optimisation table back: a damaged file or one from
another layout is refused naming the file and the missing part (exit 2),
never a traceback."""

import h5py
import pytest
from conftest import FORCED_OSCILLATOR_TOML

from mdrotor.commands.main import main
from mdrotor.errors import InputError
from mdrotor.studies.sweep import load_sweep, run_sweep
from mdrotor.studies.table import read_table


@pytest.fixture(scope="module")
def sweep_file(tmp_path_factory):
    d = tmp_path_factory.mktemp("table")
    (d / "base.toml").write_text(FORCED_OSCILLATOR_TOML)
    (d / "s.toml").write_text('base = "base.toml"\n[[axis]]\nkey = "stage.spin-up.duration"\nvalues = ["3 us", "4 us"]\n')
    out = d / "s.h5"
    run_sweep(load_sweep(d / "s.toml"), out, workers=1)
    return out


@pytest.mark.parametrize("path, where", [("summary/error", "/summary/error"), ("summary/complete", "/summary/complete"),
                                         ("axes/stage.spin-up.duration/si", "/axes/stage.spin-up.duration/si"),
                                         ("summary/L_mean_hbar", "/summary/L_mean_hbar")])
def test_missing_part_is_named(sweep_file, tmp_path, capsys, path, where):
    p = tmp_path / "damaged.h5"
    p.write_bytes(sweep_file.read_bytes())
    with h5py.File(p, "a") as f:
        del f[path]
    with pytest.raises(InputError) as e:
        read_table(p)
    assert where in str(e.value) and "damaged.h5" in str(e.value)
    assert main(["report", str(p), "-o", str(tmp_path / "rep")]) == 2
    err = capsys.readouterr().err.strip().splitlines()
    assert len(err) == 1 and where in err[0], err
