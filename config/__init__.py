"""Configuration: one pydantic model, one default TOML file, loaded once at the CLI boundary.

Library code never reads files or environment variables for settings; it receives a validated
:class:`~config.model.MagfuseConfig` (or plain keyword parameters) from the caller.
"""

from config.model import MagfuseConfig, default_config_path, load_config

__all__ = ["MagfuseConfig", "default_config_path", "load_config"]
