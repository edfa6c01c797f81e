"""Option bundles shared by commands, so flag names and help texts stay identical."""

from __future__ import annotations

from pathlib import Path
from typing import TYPE_CHECKING, Annotated

import typer

from fusion.advisory import ADVISORY

if TYPE_CHECKING:
    from config.model import MagfuseConfig

ConfigOption = Annotated[
    Path | None,
    typer.Option(
        "--config", help="TOML configuration file (default: the shipped one).", dir_okay=False
    ),
]
StoreOption = Annotated[
    Path | None,
    typer.Option("--store", help="Store directory (default: [store] path of the configuration)."),
]
JsonOption = Annotated[bool, typer.Option("--json", help="Print JSON for machines.")]


def load(config: Path | None) -> MagfuseConfig:
    """Load and validate the configuration once, at the command boundary."""
    from config import load_config

    return load_config(config)


def store_path(config_store: Path, option: Path | None) -> Path:
    """The store directory: ``--store`` if given, else the configuration's."""
    return option if option is not None else config_store


def print_advisory() -> None:
    """Print the advisory caution on stderr (so JSON on stdout stays machine-readable)."""
    typer.echo(ADVISORY, err=True)
