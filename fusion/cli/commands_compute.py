"""``magfuse compute``: recompute station magnitudes of one type from stored amplitudes."""

from __future__ import annotations

from datetime import datetime

import typer

from fusion.cli.common import (
    ConfigOption,
    SinceOption,
    StationsOption,
    StoreOption,
    TypeOption,
    UntilOption,
    compute_setup,
    load,
    open_store,
    parse_time,
    print_advisory,
    writing,
)

__all__ = ["compute_command", "register"]


def register(app: typer.Typer) -> None:
    """Mount ``compute`` on the ``magfuse`` app."""
    app.command("compute")(compute_command)


def compute_command(
    type: TypeOption = None,
    since: SinceOption = None,
    until: UntilOption = None,
    stations: StationsOption = None,
    store: StoreOption = None,
    config: ConfigOption = None,
) -> None:
    """Recompute station magnitudes of one type from their amplitudes after a table change.

    Uses the formulas and tables of the [compute] configuration section. Changed values
    become a new store revision; the old ones stay retrievable. A value that differs from the
    stored one by less than half a unit in the stored value's last decimal place is unchanged,
    and when nothing changed nothing is written.
    """
    from stations.ingest import recompute_window

    cfg = load(config)
    mtype = type or cfg.learn.magnitude_type
    options, metadata = compute_setup(cfg, stations)
    st = open_store(cfg, store)
    start: datetime | None = parse_time(since, "--since")
    end: datetime | None = parse_time(until, "--until")
    with writing(st):
        outcome = recompute_window(
            st,
            magnitude_type=mtype,
            options=options,
            metadata=metadata,
            start=start,
            end=end,
        )
    from fusion.wording import number

    r = outcome.report
    typer.echo(
        f"{mtype}: {number(outcome.computed)} recomputed with {options.ml_correction.name} / "
        f"{options.q_table.name}; {number(r.revised)} changed (new revision), "
        f"{number(r.duplicate)} unchanged, {number(r.quarantined)} quarantined; "
        + (f"batch {r.batch_id}" if r.batch_id else "nothing written (no value changed)")
    )
    print_advisory()
