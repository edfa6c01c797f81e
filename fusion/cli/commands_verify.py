"""``magfuse verify``: check every file of a store against its recorded checksum."""

from __future__ import annotations

import typer

from fusion.cli.common import (
    ConfigOption,
    JsonOption,
    StoreOption,
    load,
    open_store,
    print_advisory,
)

__all__ = ["register", "verify_command"]


def register(app: typer.Typer) -> None:
    """Mount ``verify`` on the ``magfuse`` app."""
    app.command("verify")(verify_command)


def verify_command(
    json_out: JsonOption = False,
    store: StoreOption = None,
    config: ConfigOption = None,
) -> None:
    """Check every file of the store: station magnitudes, quarantine, model versions, fused runs.

    Recomputes each file's SHA-256, compares it with the one recorded when the file was
    written, and reads every page. Names each damaged or missing file; exit status 1 if any.
    """
    from fusion.workflows.verify import verify_store
    from stations.strict_json import dumps

    cfg = load(config)
    report = verify_store(open_store(cfg, store))
    if json_out:
        typer.echo(dumps(report.to_dict(), indent=2))
    else:
        parts = ", ".join(f"{n:,} {part}" for part, n in report.checked.items())
        typer.echo(f"checked {sum(report.checked.values()):,} files ({parts})")
        for p in report.problems:
            typer.echo(f"DAMAGED {p.path}: {p.problem}")
        if report.ok:
            typer.echo("every file is intact")
        else:
            typer.echo(
                f"{len(report.problems):,} damaged or missing; restore them from a backup of the "
                "store, or re-ingest the source files into a new store"
            )
    print_advisory()
    if not report.ok:
        raise typer.Exit(code=1)
