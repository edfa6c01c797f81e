"""``magfuse nightly``: the unattended run for a scheduler (exit 0 success, 1 failure, 3 review)."""

from __future__ import annotations

import json
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
    open_store,
    print_advisory,
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
            "--apply", help="Adopt the candidate when the dry run is within the policy limits."
        ),
    ] = False,
    stations: StationsOption = None,
    json_out: JsonOption = False,
    store: StoreOption = None,
    config: ConfigOption = None,
) -> None:
    """Ingest the inbox, learn a candidate, dry-run it, adopt within policy, re-fuse.

    Exit status: 0 success; 1 failure (nothing reliable was done); 3 needs review (a rejected
    file, or a candidate outside the adoption policy). Without --apply nothing is adopted.
    """
    from fusion.workflows.nightly import run_nightly
    from stations.metadata import StationMetadata

    cfg = load(config)
    st = open_store(cfg, store, create=True)
    meta_path = stations or (Path(cfg.compute.stations) if cfg.compute.stations else None)
    report = run_nightly(
        st,
        open_registry(st),
        cfg,
        inbox=inbox if inbox is not None else cfg.nightly.inbox,
        apply=apply,
        metadata=StationMetadata.read(meta_path) if meta_path else None,
    )
    if json_out:
        typer.echo(json.dumps(report.to_dict(), indent=2, default=str))
    else:
        typer.echo(report.render_text())
    print_advisory()
    raise typer.Exit(code=int(report.outcome))
