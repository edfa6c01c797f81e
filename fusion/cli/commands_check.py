"""``magfuse check``: label-free scores of a model version beside the active model and the
station-corrected mean (:mod:`fusion.workflows.checking`)."""

from __future__ import annotations

from typing import Annotated

import typer

from fusion.cli.common import (
    ConfigOption,
    JsonOption,
    StoreOption,
    TypeOption,
    load,
    open_registry,
    open_store,
    print_advisory,
)

__all__ = ["register"]


def register(app: typer.Typer) -> None:
    """Mount ``check``."""
    app.command("check")(check_command)


VersionArgument = Annotated[
    str | None,
    typer.Argument(
        help="Version to check (default: the newest version that is not active, else the "
        "active one)."
    ),
]
SeedsOption = Annotated[
    int, typer.Option("--seeds", min=2, help="Random station splits per event (at least 2).")
]
DaysOption = Annotated[
    float | None,
    typer.Option("--days", help="Days of readings before the latest origin ([learn] window_days)."),
]


def check_command(
    version: VersionArgument = None,
    type: TypeOption = None,
    seeds: SeedsOption = 10,
    days: DaysOption = None,
    json_out: JsonOption = False,
    store: StoreOption = None,
    config: ConfigOption = None,
) -> None:
    """Compare a model without ground truth: split-half agreement and held-out stations.

    Each event's stations are split at random into two halves; the better the network
    magnitude, the better the two halves agree. Writes nothing.
    """
    from fusion.workflows.checking import check_models
    from stations.strict_json import dumps

    cfg = load(config)
    st = open_store(cfg, store)
    report = check_models(
        st, open_registry(st), cfg, magnitude_type=type, version=version, seeds=seeds, days=days
    )
    if json_out:
        typer.echo(dumps(report.to_dict(), indent=2))
    else:
        typer.echo(report.render_text())
    print_advisory()
