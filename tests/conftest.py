import os
import sys
from pathlib import Path

import pytest

ROOT = Path(__file__).resolve().parents[1]
CONFIGS = ROOT / "configs"


@pytest.fixture
def configs_dir():
    return CONFIGS


def write_toml(tmp_path, text, name="bad.toml"):
    p = tmp_path / name
    p.write_text(text)
    return p
