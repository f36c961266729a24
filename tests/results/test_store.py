"""HDF5 storage of results (mdrotor.results.store): a round trip keeps every number bit for bit,
the file has the layout docs/results.md documents (read with h5py directly), and files
are written whole or not at all."""

import re

import h5py
import numpy as np
import pytest
from conftest import ROOT, assert_identical, two_ion_config

import mdrotor
from mdrotor.config import parse as config
from mdrotor.errors import InputError
from mdrotor.results import store


@pytest.fixture(scope="module")
def result():
    d = two_ion_config(run={"trajectories": 4, "seed": 2}, initial={"temperature": "0.2 mK"},
                       observe={"series_interval": "2 us"})
    return mdrotor.run(config.from_dict(d, "pair.toml"))


def _same_obs(a, b, where):
    assert (a.name, a.t_s, a.frame, a.frame_f_rot_hz) == (b.name, b.t_s, b.frame, b.frame_f_rot_hz), where
    assert_identical(a.arrays, b.arrays, f"{where}.arrays")
    assert_identical(a.modes, b.modes, f"{where}.modes")
    assert_identical(a.summary, b.summary, f"{where}.summary")


def test_round_trip_is_exact(result, tmp_path):
    p = tmp_path / "r.h5"
    mdrotor.save(result, p)
    back = mdrotor.load(p)
    assert_identical({k: v for k, v in result.attrs.items()}, {k: v for k, v in back.attrs.items() if k != "format_version"}, "attrs")
    _same_obs(result.initial, back.initial, "initial")
    assert list(back.stages) == list(result.stages)
    for name in result.stages:
        _same_obs(result.stages[name], back.stages[name], f"stages.{name}")
    _same_obs(result.final, back.final, "final")
    assert_identical(result.series, back.series, "series")
    assert_identical(result.schedule, back.schedule, "schedule")
    assert set(back.extra) == set(result.extra)
    # saved again, the file holds the same datasets and values
    q = tmp_path / "again.h5"
    mdrotor.save(back, q)
    with h5py.File(p) as f, h5py.File(q) as g:
        names_f, names_g = [], []
        f.visit(names_f.append)
        g.visit(names_g.append)
        assert names_f == names_g
        for n in names_f:
            if isinstance(f[n], h5py.Dataset):
                assert f[n].dtype == g[n].dtype, n
                if f[n].dtype.kind == "f":
                    np.testing.assert_array_equal(f[n][()], g[n][()], err_msg=n)


def _row(path):
    text = (ROOT / "docs" / "results.md").read_text()
    row = next(line for line in text.splitlines() if line.startswith(f"| `{path}`"))
    return row.split("|")[2]


def test_file_layout_is_the_documented_one(result, tmp_path):
    p = tmp_path / "r.h5"
    store.save_result(result, p)
    with h5py.File(p, "r") as f:  # h5py directly, not the project's reader
        assert f.attrs["format_version"] == store.FORMAT_VERSION
        for group in ("/final/", "/schedule/"):
            names = re.findall(r"`([A-Za-z_]+)`", re.sub(r"\([^)]*\)", "", _row(group)))
            assert names, group
            for n in names:
                assert n in f[group], f"{group}{n} documented but not in the file"
        for n in re.findall(r"`([a-z_]+)`", _row("/modes/").split(" of the final")[0]):
            if n not in ("com", "differential"):
                assert n in f["/modes"], n
        assert f["/modes"].attrs["frame"] in ("lab", "rotating")
        # per-trajectory arrays as the run holds them
        for k, v in result.final.arrays.items():
            np.testing.assert_array_equal(f["final"][k][()], v, err_msg=k)
        # the summary: attributes, and the fraction interval named
        s = f["summary"].attrs
        assert s["n_trajectories"] == 4 and "Wilson" in s["fraction_interval"]
        assert s["L_mean_hbar"] == result.summary["L_mean_hbar"]
        for name in result.stages:
            assert f"stages/{name}/summary" in f
        assert "t_s" in f["series"] and "initial" in f and "preflight" in f


def test_writing_is_whole_or_nothing(result, tmp_path):
    p = tmp_path / "r.h5"
    p.write_text("an older file")
    store.save_result(result, p)  # replaced by rename, no temporary file left behind
    assert sorted(x.name for x in tmp_path.iterdir()) == ["r.h5"]
    assert h5py.is_hdf5(p)


def test_refusals(tmp_path):
    with pytest.raises(InputError) as e:
        store.check_writable(tmp_path / "missing" / "r.h5")
    assert "-o" in e.value.line()
    (tmp_path / "t.h5").write_text("text")
    with pytest.raises(InputError) as e:
        store.load_result(tmp_path / "t.h5")
    assert "not an HDF5 file" in e.value.line()


@pytest.mark.parametrize("path, where", [("stages/hold", "/stages/hold"), ("final/modes/label", "/final/modes/label"),
                                         ("stages/spin-up/summary", "/stages/spin-up/summary")])
def test_missing_group_is_named(result, tmp_path, path, where):
    """A result file missing a part (damaged, or another layout) is refused
    naming the HDF5 path and the file, never h5py's KeyError."""
    p = tmp_path / "r.h5"
    store.save_result(result, p)
    with h5py.File(p, "a") as f:
        if path in f:
            del f[path]
        else:  # /final is a link to the last stage in some layouts: damage the stage itself
            del f[path.replace("final", "stages/hold")]
            where = where.replace("final", "stages/hold")
    with pytest.raises(InputError) as e:
        store.load_result(p)
    assert e.value.key == where and "r.h5" in str(e.value)


@pytest.mark.parametrize("attr", ["config_text", "dt_s", "seed"])
def test_missing_root_attribute_is_named(result, tmp_path, attr):
    """A root attribute every reader relies on (docs/results.md) missing: refused
    naming it (the report died on a KeyError in the rotor analysis or the summary text)."""
    p = tmp_path / "r.h5"
    store.save_result(result, p)
    with h5py.File(p, "a") as f:
        del f.attrs[attr]
    with pytest.raises(InputError) as e:
        store.load_result(p)
    assert e.value.key == f"/ (attribute {attr})" and "r.h5" in str(e.value)


def test_missing_trajectory_array_is_named(result, tmp_path):
    p = tmp_path / "r.h5"
    store.save_result(result, p)
    with h5py.File(p, "a") as f:
        del f["stages/hold/L_hbar"]
    with pytest.raises(InputError) as e:
        store.load_result(p)
    assert e.value.key == "/stages/hold/L_hbar"
