"""The study store refuses an output file of the other kind in words."""

from conftest import FORCED_OSCILLATOR_TOML

from mdrotor.commands.main import main


def test_output_of_the_other_kind_is_refused(tmp_path, capsys):
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
