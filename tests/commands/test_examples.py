"""Every example config loads, has a crystal, and runs in both trap models."""

import tomllib
from pathlib import Path

import numpy as np
import pytest

import mdrotor
from mdrotor.config.parse import from_dict

CONFIGS = Path(__file__).resolve().parents[2] / "configs"
EXAMPLES = sorted(CONFIGS.glob("*.toml"))


@pytest.mark.parametrize("path", EXAMPLES, ids=[p.stem for p in EXAMPLES])
@pytest.mark.parametrize("model", ["pseudo", "rf"])
def test_example_runs(path, model):
    raw = tomllib.loads(path.read_text())
    for st in raw["stage"]:
        st["duration"] = "6 us"  # short: this checks that everything runs, not the physics
    raw["trap"]["model"] = model
    cfg = from_dict(raw, str(path), base_dir=CONFIGS)
    res = mdrotor.run(cfg, trajectories=3)
    assert np.all(np.isfinite(res.final.arrays["L_hbar"]))
    assert (res.final.arrays["status"] & 8).sum() == 0  # nothing non-finite
