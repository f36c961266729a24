"""--set overrides address stages, pinning terms and laser beams by name
(docs/config.md), whether the config writes one table or an array of them
and whether the name is written or the default (n<order>, stage<i>, laser<i>)."""

import pytest
from conftest import two_ion_config

from mdrotor.config.parse import from_dict, set_path
from mdrotor.errors import InputError


def _cfg(raw, *overrides):
    for key, value in overrides:
        set_path(raw, key, value, "<test>")
    return from_dict(raw, "<test>")


def test_single_pinning_table_by_its_default_name():
    # `--set pinning.n2.strength=...` on a config with one [pinning] table was
    # refused as "pinning.n2: unknown key", though the reference shows it
    cfg = _cfg(two_ion_config(), ("pinning.n2.strength", "3e5 V/m^2"))
    assert cfg.pinning[0].strength == pytest.approx(3e5, rel=1e-12)
    raw = two_ion_config()
    raw["pinning"]["name"] = "quad"
    assert _cfg(raw, ("pinning.quad.angle", "10 deg")).pinning[0].angle_rad == pytest.approx(0.17453292519943295)


def test_array_items_by_their_default_names():
    raw = two_ion_config()
    raw["pinning"] = [dict(raw["pinning"]), {"order": 4, "strength": "1e14 V/m^4"}]
    for st in raw["stage"]:
        st.pop("name")
    cfg = _cfg(raw, ("pinning.n4.strength", "2e14 V/m^4"), ("stage.stage1.duration", "7 us"))
    assert cfg.pinning[1].strength == pytest.approx(2e14, rel=1e-12)
    assert cfg.schedule.stages[1].duration_s == pytest.approx(7e-6, rel=1e-12)


def test_a_name_that_is_not_there_is_refused():
    with pytest.raises(InputError) as exc:
        _cfg(two_ion_config(), ("pinning.n3.strength", "1e9 V/m^3"))
    assert "pinning.n3" in str(exc.value) and "'n2'" in str(exc.value)
