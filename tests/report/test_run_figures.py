"""Run figures name the pinning terms from the parsed config (the stored
text read back by config.parse), so a damaged text gives plain labels, not
a traceback."""

import h5py
from conftest import two_ion_config

import mdrotor
from mdrotor.report.run_figures import schedule_figure


def _result(tmp_path, text=None):
    p = tmp_path / "r.h5"
    mdrotor.save(mdrotor.run(mdrotor.load_config(two_ion_config(pinning={"order": 2, "strength": "2e5 V/m^2",
                                                                            "name": "quad"})), progress=False), p)
    if text is not None:
        with h5py.File(p, "a") as f:
            f.attrs["config_text"] = text
    return p


def test_pinning_term_named_from_the_config(tmp_path):
    fig = schedule_figure(_result(tmp_path))
    assert fig.axes[1].get_ylabel() == "pinning c₂ (quad) (V/m²)"


def test_damaged_config_text_gives_plain_labels(tmp_path):
    """A config text that does not parse: the term is numbered, its unit the general V/mⁿ."""
    fig = schedule_figure(_result(tmp_path, 'stage = "x"\npinning = [1, 2]\n'))
    assert fig.axes[1].get_ylabel() == "pinning term 1 (V/mⁿ)"
