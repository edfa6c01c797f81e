"""The configuration model: defaults, unknown keys, ranges, one-line errors."""

from __future__ import annotations

from pathlib import Path

import pytest

from config import MagfuseConfig, default_config_path, load_config
from stations.errors import ConfigError


def test_shipped_file_equals_the_model_defaults() -> None:
    """The TOML file documents the defaults; it must not drift from the model."""
    assert load_config() == MagfuseConfig()
    assert default_config_path().name == "magfuse.toml"


def test_unknown_key_is_an_error_naming_the_key(tmp_path: Path) -> None:
    path = tmp_path / "c.toml"
    path.write_text("[learn]\nhalf_lfe_days = 90\n")
    with pytest.raises(ConfigError, match=r"key 'learn.half_lfe_days': Extra inputs"):
        load_config(path)


@pytest.mark.parametrize(
    ("text", "key"),
    [
        ("[learn]\nhalf_life_days = 0\n", "learn.half_life_days"),
        ("[pairs]\nfdr_q = 1.5\n", "pairs.fdr_q"),
        ("[network]\nconfidence_level = 68\n", "network.confidence_level"),
        ("[learn]\nanchor = 'centre'\n", "learn.anchor"),
    ],
)
def test_out_of_range_values_are_errors(tmp_path: Path, text: str, key: str) -> None:
    path = tmp_path / "c.toml"
    path.write_text(text)
    with pytest.raises(ConfigError, match=key.replace(".", r"\.")):
        load_config(path)


def test_missing_and_malformed_files(tmp_path: Path) -> None:
    with pytest.raises(ConfigError, match="configuration file not found"):
        load_config(tmp_path / "nope.toml")
    bad = tmp_path / "bad.toml"
    bad.write_text("[learn\n")
    with pytest.raises(ConfigError, match="not valid TOML"):
        load_config(bad)


def test_config_is_frozen() -> None:
    cfg = MagfuseConfig()
    with pytest.raises(ValueError, match="frozen"):
        cfg.learn.half_life_days = 10.0  # type: ignore[misc]
