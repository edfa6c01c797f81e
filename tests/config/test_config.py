"""The configuration model: defaults, unknown keys, ranges, one-line errors."""

from __future__ import annotations

from pathlib import Path

import pytest

from fusion.settings import MagfuseConfig, load_config
from stations.errors import ConfigError

#: The annotated default file of the repository (``config/`` holds configuration files only).
SHIPPED = Path(__file__).resolve().parents[2] / "config" / "magfuse.toml"


def test_shipped_file_equals_the_model_defaults() -> None:
    """The TOML file documents the defaults; it must not drift from the model."""
    assert load_config() == MagfuseConfig()
    assert load_config(SHIPPED) == MagfuseConfig()


def test_shipped_file_names_every_setting() -> None:
    """Every field of every section appears in the shipped file (set or commented out)."""
    text = SHIPPED.read_text(encoding="utf-8")
    for section, field in MagfuseConfig.model_fields.items():
        assert f"[{section}]" in text, section
        annotation = field.annotation
        assert annotation is not None
        for key in annotation.model_fields:  # type: ignore[union-attr]
            assert f"{key} =" in text, f"{section}.{key} missing from {SHIPPED.name}"


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


@pytest.mark.parametrize(
    ("text", "key"),
    [
        ('[learn]\nhalf_life_days = "30"\n', "learn.half_life_days"),
        ('[censoring]\nenabled = "yes"\n', "censoring.enabled"),
        ("[pairs]\nmin_shared_events = 30.5\n", "pairs.min_shared_events"),
        ("[learn]\nmagnitude_type = 3\n", "learn.magnitude_type"),
        ('[compute]\nmb_bb_period_range_s = ["0.2", "30"]\n', "compute.mb_bb_period_range_s"),
    ],
)
def test_values_of_the_wrong_type_are_errors_not_converted(
    tmp_path: Path, text: str, key: str
) -> None:
    path = tmp_path / "c.toml"
    path.write_text(text)
    with pytest.raises(ConfigError, match=key.replace(".", r"\.") + "(\\.[0-9])?': Input should"):
        load_config(path)


def test_integer_for_a_decimal_setting_is_accepted(tmp_path: Path) -> None:
    """TOML writes 30 and 30.0 differently; an operator means the same number."""
    path = tmp_path / "c.toml"
    path.write_text(
        "[learn]\nhalf_life_days = 30\n[compute]\nmb_bb_period_range_s = [1, 20]\n"
        '[store]\npath = "somewhere"\n'
    )
    cfg = load_config(path)
    assert cfg.learn.half_life_days == 30.0
    assert cfg.compute.mb_bb_period_range_s == (1.0, 20.0)
    assert cfg.store.path == Path("somewhere")


def test_configuration_that_is_not_utf8_is_one_error(tmp_path: Path) -> None:
    path = tmp_path / "latin1.toml"
    path.write_bytes('[nightly]\n# r\xe9seau\ninbox = "in"\n'.encode("latin-1"))
    offset = path.read_bytes().index(b"\xe9")  # the first byte UTF-8 cannot decode
    with pytest.raises(ConfigError) as err:
        load_config(path)
    assert str(err.value) == (
        f"{path}: byte {offset} is not UTF-8 text; save the configuration as UTF-8 (TOML files "
        "are UTF-8)"
    )
