"""Configuration: the shipped example equals the defaults; bad values name the key."""

from __future__ import annotations

from pathlib import Path

import pytest

from tocsin.errors import ConfigError
from tocsin.model.config import EngineConfig, load_engine_config

ROOT = Path(__file__).resolve().parents[1]


def test_shipped_config_is_the_defaults() -> None:
    assert load_engine_config(ROOT / "deploy" / "tocsin.toml") == EngineConfig()


@pytest.mark.parametrize(
    ("text", "needle"),
    [
        ("[engine]\ncandidate_far_per_year = -1\n", "engine.candidate_far_per_year"),
        ("[engine.rate]\nbin_s = 0\n", "engine.rate.bin_s"),
        ("[engine.coincidence]\nscales = [1]\n", "engine.coincidence.scales"),
        ("[engine\n", "not valid TOML"),
    ],
)
def test_bad_config_names_the_key(tmp_path: Path, text: str, needle: str) -> None:
    p = tmp_path / "c.toml"
    p.write_text(text)
    with pytest.raises(ConfigError, match=needle.replace(".", r"\.")):
        load_engine_config(p)
