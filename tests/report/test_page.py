"""The report page of a sweep names its failed points and why they failed."""

from conftest import FORCED_OSCILLATOR_TOML

from mdrotor.engine.executors import SerialExecutor
from mdrotor.report.page import write_report
from mdrotor.studies.sweep import load_sweep, run_sweep
from mdrotor.studies.tasks import Outcome, run_task


class _FailSecond(SerialExecutor):
    def run(self, tasks):
        for t in tasks:
            yield Outcome(t.name, None, "crystal not bound (test)") if t.name.endswith("000001") else run_task(t)


def test_failed_points_listed_with_their_message(tmp_path):
    (tmp_path / "base.toml").write_text(FORCED_OSCILLATOR_TOML)
    sw = tmp_path / "s.toml"
    sw.write_text('base = "base.toml"\n[[axis]]\nkey = "stage.spin-up.duration"\nvalues = ["3 us", "4 us", "5 us"]\n')
    out = tmp_path / "s.h5"
    run_sweep(load_sweep(sw), out, executor=_FailSecond())
    rep = write_report(out, tmp_path / "rep")
    page = (tmp_path / "rep" / "summary.md").read_text()
    assert "| points | 2 finished, 1 failed, 3 in all |" in page
    assert "## Failed points" in page
    assert "- #1 ('spin-up': duration = 4 us): crystal not bound (test)" in page
    assert rep["figures"]


def test_output_folder_that_cannot_be_made_is_refused(tmp_path, capsys):
    """-o under a plain file (or a read-only place): one line naming -o, exit 2, no traceback."""
    from mdrotor.commands.main import main

    (tmp_path / "base.toml").write_text(FORCED_OSCILLATOR_TOML)
    sw = tmp_path / "s.toml"
    sw.write_text('base = "base.toml"\n[[axis]]\nkey = "stage.spin-up.duration"\nvalues = ["4 us"]\n')
    out = tmp_path / "s.h5"
    run_sweep(load_sweep(sw), out, workers=1)
    (tmp_path / "plain").write_text("x")
    assert main(["report", str(out), "-o", str(tmp_path / "plain" / "rep")]) == 2
    err = capsys.readouterr().err.strip().splitlines()
    assert len(err) == 1 and "-o" in err[0], err
