"""Option bundles shared by commands, so flag names and help texts stay identical."""

from __future__ import annotations

from contextlib import AbstractContextManager
from datetime import UTC, datetime
from pathlib import Path
from typing import TYPE_CHECKING, Annotated, Any, Literal

import typer

from fusion.advisory import ADVISORY

if TYPE_CHECKING:
    from fusion.settings import MagfuseConfig
    from fusion.versions.model_registry import ModelRegistry
    from stations.formulas import ComputeOptions
    from stations.metadata import StationMetadata
    from stations.store import StationMagnitudeStore

ConfigOption = Annotated[
    Path | None,
    typer.Option(
        "--config", help="TOML configuration file (default: the shipped one).", dir_okay=False
    ),
]
StoreOption = Annotated[
    Path | None,
    typer.Option(
        "--store",
        metavar="FOLDER",
        help="Store folder (default: [store] path of the configuration).",
    ),
]
JsonOption = Annotated[bool, typer.Option("--json", help="Print JSON for machines.")]
TypeOption = Annotated[
    str | None,
    typer.Option(
        "--type",
        metavar="TYPE",
        help=(
            "Magnitude type: ML, mb, mB_BB, Ms_20, Ms_BB, mb_Lg, Mw (IASPEI standard names) "
            "or MLv, mB, Ms, Md, Mc, Mwp, Me (accepted as reported); default: [learn] "
            "magnitude_type."
        ),
    ),
]
SinceOption = Annotated[
    str | None,
    typer.Option("--since", metavar="TIME", help="Start of the window, ISO 8601 UTC (inclusive)."),
]
UntilOption = Annotated[
    str | None,
    typer.Option("--until", metavar="TIME", help="End of the window, ISO 8601 UTC (exclusive)."),
]
VersionOption = Annotated[
    str | None,
    typer.Option(
        "--version", metavar="VERSION", help="Model version to use (default: the active one)."
    ),
]
ComputeFlag = Annotated[
    bool,
    typer.Option(
        "--compute",
        help="Compute station magnitudes from amplitudes where a row has none (IASPEI formulas).",
    ),
]
StationsOption = Annotated[
    Path | None,
    typer.Option(
        "--stations",
        help="StationXML or station CSV used to fill missing distances "
        "(default: [compute] stations).",
        dir_okay=False,
    ),
]
DefaultNetworkOption = Annotated[
    str | None,
    typer.Option(
        "--default-network",
        metavar="CODE",
        help="Network code for stations named without one (IMS1.0, NEIC mchedr).",
    ),
]


def load(config: Path | None) -> MagfuseConfig:
    """Load and validate the configuration once, at the command boundary."""
    from fusion.settings import load_config

    return load_config(config)


def check_override(cfg: MagfuseConfig, section: str, field: str, value: Any, option: str) -> Any:
    """A command-line value that overrides ``[section] field``, checked by the same rule.

    The settings model (:mod:`fusion.settings`) holds each setting's range; an option that
    overrides it must meet that range too, or ``--top 0`` would list nothing and
    ``--window -1`` would read no data and blame the store.

    Returns
    -------
    The value (``None`` passes through: the configuration's value applies).

    Raises
    ------
    ConfigError
        One line naming the option, the value and the rule.
    """
    if value is None:
        return None
    from pydantic import ValidationError

    from stations.errors import ConfigError

    current = getattr(cfg, section)
    try:
        type(current).model_validate({**current.model_dump(), field: value})
    except ValidationError as exc:
        rule = exc.errors()[0]["msg"]
        rule = rule[0].lower() + rule[1:]
        raise ConfigError(
            f"{option} {value!r}: {rule} (the rule of [{section}] {field}); give a value in "
            "range or leave the option out to use the configuration's"
        ) from None
    return value


def compute_setup(
    cfg: MagfuseConfig, stations: Path | None
) -> tuple[ComputeOptions, StationMetadata | None]:
    """Compute options from ``[compute]`` and the station metadata to fill distances."""
    from stations.ingest import build_compute_options
    from stations.metadata import StationMetadata

    options = build_compute_options(**cfg.compute.model_dump(exclude={"stations"}))
    path = (
        stations
        if stations is not None
        else (Path(cfg.compute.stations) if cfg.compute.stations else None)
    )
    return options, (StationMetadata.read(path) if path is not None else None)


def parse_time(text: str | None, option: str) -> datetime | None:
    """An ISO 8601 time from the command line as an aware UTC datetime (naive means UTC).

    Raises
    ------
    ConfigError
        If ``text`` is not ISO 8601; the message names the option.
    """
    if text is None:
        return None
    from stations.errors import ConfigError

    try:
        value = datetime.fromisoformat(text.replace("Z", "+00:00"))
    except ValueError:
        raise ConfigError(
            f"{option} {text!r} is not an ISO 8601 time; give e.g. 2025-06-01 or "
            "2025-06-01T12:00:00Z"
        ) from None
    return value.replace(tzinfo=UTC) if value.tzinfo is None else value.astimezone(UTC)


def open_store(
    cfg: MagfuseConfig, option: Path | None, *, create: bool = False
) -> StationMagnitudeStore:
    """The station-magnitude store of ``--store`` (or the configuration)."""
    from stations.store import StationMagnitudeStore

    return StationMagnitudeStore.open(
        store_path(cfg.store.path, option), create=create, lock_timeout_s=cfg.store.lock_timeout_s
    )


def open_registry(store: StationMagnitudeStore) -> ModelRegistry:
    """The model registry of a store, writing under the store's lock."""
    from fusion.versions.model_registry import ModelRegistry

    return ModelRegistry(store.root, lock=store.write_lock)


def writing(store: StationMagnitudeStore) -> AbstractContextManager[None]:
    """Hold the store's writer lock for a whole command that reads, then writes.

    A command that reads the store and writes what it computed (``fuse``, ``compute``) holds
    the lock from its first read to its commit, so no other writer changes the data in between
    and the rows it writes are newer than every row it read (the nightly catch-up relies on
    this). A second process waits up to ``[store] lock_timeout_s``, saying so on stderr.
    """
    return store.write_lock(on_wait=lambda msg: typer.echo(msg, err=True))


def store_path(config_store: Path, option: Path | None) -> Path:
    """The store directory: ``--store`` if given, else the configuration's."""
    return option if option is not None else config_store


def output_path(path: Path, *, option: str, kind: Literal["file", "folder"]) -> Path:
    """Check an output path before any work is done; create its missing folder and say so.

    Every command that writes files (``event --html/--png``, ``report --out``, ``export --out``,
    ``learn --csv``) calls this first, so they all behave the same way: a missing folder is
    created (one line on stderr names it), and a path of the wrong kind (a folder where a file
    is expected, or a file where a folder is) is a one-line error before anything is computed
    or saved.

    Parameters
    ----------
    path : Path
        The path given on the command line.
    option : str
        The option's name for messages, e.g. ``"--html"``.
    kind : {'file', 'folder'}
        What the command writes at ``path``.

    Returns
    -------
    Path
        ``path``, whose folder (``kind='file'``) or itself (``kind='folder'``) now exists.

    Raises
    ------
    ConfigError
        ``path`` (or a folder on the way to it) exists as the wrong kind.
    """
    from stations.errors import ConfigError

    folder = path.parent if kind == "file" else path
    if kind == "file" and path.is_dir():
        raise ConfigError(f"{option} {path} is a folder; give a file name, e.g. {path / 'out'}")
    if kind == "folder" and path.exists() and not path.is_dir():
        raise ConfigError(f"{option} {path} is a file; give a folder for the output files")
    missing = folder
    while not missing.exists() and missing.parent != missing:
        missing = missing.parent
    if missing.exists() and not missing.is_dir():
        raise ConfigError(
            f"{option} {path}: {missing} is a file, not a folder; choose another path"
        )
    if not folder.exists():
        try:
            folder.mkdir(parents=True, exist_ok=True)
        except OSError as exc:
            raise ConfigError(
                f"{option} {path}: cannot create the folder {folder} "
                f"({exc.strerror or exc}); choose a writable path"
            ) from None
        typer.echo(f"created folder {folder} for {option}", err=True)
    return path


def echo_json(value: object) -> None:
    """Print ``value`` as strict JSON (RFC 8259: no NaN or Infinity; missing values are null)."""
    from stations.strict_json import dumps

    typer.echo(dumps(value, indent=2))


def print_advisory() -> None:
    """Print the advisory caution on stderr (so JSON on stdout stays machine-readable)."""
    typer.echo(ADVISORY, err=True)
