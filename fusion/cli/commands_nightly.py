"""``magfuse nightly``: the unattended run for a scheduler (exit 0 success, 1 failure, 3 review)."""

from __future__ import annotations

from datetime import UTC, datetime
from pathlib import Path
from typing import Annotated

import typer

from fusion.cli.common import (
    ConfigOption,
    JsonOption,
    StationsOption,
    StoreOption,
    load,
    open_registry,
    print_advisory,
    store_path,
)

__all__ = ["register"]


def register(app: typer.Typer) -> None:
    """Mount ``nightly``."""
    app.command("nightly")(nightly_command)


def nightly_command(
    inbox: Annotated[
        Path | None,
        typer.Option(
            "--inbox", metavar="FOLDER", help="Folder of new files (default: [nightly] inbox)."
        ),
    ] = None,
    apply: Annotated[
        bool,
        typer.Option(
            "--apply",
            help="Do the work: ingest, learn, adopt within policy, fuse, make old magnitudes "
            "final. Without it the run only prints what it would do and writes nothing.",
        ),
    ] = False,
    create: Annotated[
        bool,
        typer.Option(
            "--create",
            help="Create the store and the inbox if they do not exist (with --apply); "
            "without it a missing store or inbox is an error.",
        ),
    ] = False,
    stations: StationsOption = None,
    json_out: JsonOption = False,
    store: StoreOption = None,
    config: ConfigOption = None,
) -> None:
    """Ingest the inbox, learn a candidate, dry-run it, adopt within policy, fuse, freeze.

    Without --apply nothing is written: the run reads the inbox and the store and prints
    what --apply would do. A night whose candidate needs review makes nothing final.
    Exit status: 0 success; 1 failure; 3 needs review (a rejected file, or a candidate
    outside the adoption policy).
    """
    from fusion.workflows.nightly import plan_nightly, run_nightly
    from stations.metadata import StationMetadata
    from stations.store import StationMagnitudeStore
    from stations.strict_json import dumps

    cfg = load(config)
    folder = inbox if inbox is not None else cfg.nightly.inbox
    root = store_path(cfg.store.path, store)
    _check_exists(root, folder, create=create)
    exists = (root / "manifest.json").exists()
    if not apply and not exists:  # plan against the store --create would make
        report = plan_nightly(None, None, cfg, inbox=folder, started=datetime.now(UTC))
    else:
        if create and apply:
            folder.mkdir(parents=True, exist_ok=True)
        st = StationMagnitudeStore.open(
            root, create=create and apply, lock_timeout_s=cfg.store.lock_timeout_s
        )
        meta_path = stations or (Path(cfg.compute.stations) if cfg.compute.stations else None)
        report = run_nightly(
            st,
            open_registry(st),
            cfg,
            inbox=folder,
            apply=apply,
            metadata=StationMetadata.read(meta_path) if meta_path and apply else None,
            on_wait=lambda msg: typer.echo(msg, err=True),
        )
    typer.echo(dumps(report.to_dict(), indent=2) if json_out else report.render_text())
    print_advisory()
    raise typer.Exit(code=int(report.outcome))


def _check_exists(root: Path, inbox: Path, *, create: bool) -> None:
    """A missing store or inbox is an error unless ``--create`` asks for it."""
    from stations.errors import ConfigError, StoreCorruptError

    if create:
        return
    if not (root / "manifest.json").exists():
        raise StoreCorruptError(
            f"{root}: no magfuse store here (manifest.json is missing); pass the right "
            f"--store, create one with 'magfuse ingest FILE --store {root}', or add --create "
            "to let nightly make it"
        )
    if not inbox.is_dir():
        raise ConfigError(
            f"inbox {inbox} is not a folder; pass the right --inbox, or add --create to make it"
        )
