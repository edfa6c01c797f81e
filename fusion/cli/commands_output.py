"""``magfuse fuse``, ``finalize``, ``export``, ``report``: network magnitudes and their outputs."""

from __future__ import annotations

from enum import StrEnum
from pathlib import Path
from typing import Annotated

import typer

from fusion.cli.common import (
    ConfigOption,
    SinceOption,
    StoreOption,
    TypeOption,
    UntilOption,
    VersionOption,
    load,
    open_registry,
    open_store,
    output_path,
    parse_time,
    print_advisory,
    writing,
)
from fusion.wording import count, number

__all__ = ["register"]


def register(app: typer.Typer) -> None:
    """Mount ``fuse``, ``finalize``, ``export`` and ``report``."""
    app.command("fuse")(fuse_command)
    app.command("finalize")(finalize_command)
    app.command("export")(export_command)
    app.command("report")(report_command)


def fuse_command(
    type: TypeOption = None,
    since: SinceOption = None,
    until: UntilOption = None,
    version: VersionOption = None,
    store: StoreOption = None,
    config: ConfigOption = None,
) -> None:
    """Compute network magnitudes for a window and record them with the model version.

    Events whose stored magnitude is marked final are left as they are.
    """
    from fusion.versions.fused_store import FusedStore
    from fusion.workflows.fusing import fuse_window

    cfg = load(config)
    st = open_store(cfg, store)
    mtype = type or cfg.learn.magnitude_type
    with writing(st):
        res = fuse_window(
            st,
            open_registry(st),
            cfg,
            magnitude_type=mtype,
            start=parse_time(since, "--since"),
            end=parse_time(until, "--until"),
            version=version,
        )
        report = FusedStore(st.root, lock=st.write_lock).write_run(
            res.fused, model_version=res.version.version_id
        )
    ev = res.fused.events
    moved = (ev["magnitude"] - ev["plain_mean"]).abs()
    typer.echo(
        f"{mtype}: {count(report.events_written, 'event')} fused with "
        f"{res.version.version_id}; {number(report.skipped_final)} left alone (final); "
        f"median |fused - plain mean| {moved.median():.3f}, largest {moved.max():.3f}"
    )
    print_advisory()


def finalize_command(
    event_ids: Annotated[
        list[str] | None,
        typer.Argument(help="Events to mark final.", show_default=False, metavar="EVENT_ID"),
    ] = None,
    before: Annotated[
        str | None,
        typer.Option(
            "--before",
            metavar="TIME",
            help="Mark final every event with origin before this time (ISO 8601 UTC).",
        ),
    ] = None,
    type: TypeOption = None,
    store: StoreOption = None,
    config: ConfigOption = None,
) -> None:
    """Mark fused magnitudes final: later runs never change them."""
    from fusion.versions.fused_store import FusedStore
    from stations.errors import ConfigError

    if not event_ids and before is None:
        raise ConfigError("name events to finalize or give --before DATE")
    cfg = load(config)
    st = open_store(cfg, store)
    mtype = type or cfg.learn.magnitude_type
    with writing(st):
        n = FusedStore(st.root, lock=st.write_lock).finalize(
            mtype, before=parse_time(before, "--before"), event_ids=event_ids or None
        )
    typer.echo(f"{mtype}: {count(n, 'network magnitude')} marked final")
    print_advisory()


class ExportWhat(StrEnum):
    """What ``magfuse export`` writes."""

    magnitudes = "magnitudes"
    stations = "stations"
    pairs = "pairs"
    epochs = "epochs"


class ExportFormatChoice(StrEnum):
    """Export file formats."""

    csv = "csv"
    parquet = "parquet"
    quakeml = "quakeml"


def export_command(
    what: Annotated[
        ExportWhat,
        typer.Argument(
            metavar="WHAT",
            help=(
                "magnitudes (network magnitudes from 'magfuse fuse'), or a model version's "
                "stations, pairs or epochs table."
            ),
        ),
    ],
    out: Annotated[Path, typer.Option("--out", metavar="FILE", help="File to write.")],
    format: Annotated[
        ExportFormatChoice,
        typer.Option(
            "--format",
            help="csv, parquet or quakeml (QuakeML 1.2; magnitudes only).",
        ),
    ] = ExportFormatChoice.csv,
    type: TypeOption = None,
    since: SinceOption = None,
    until: UntilOption = None,
    version: VersionOption = None,
    store: StoreOption = None,
    config: ConfigOption = None,
) -> None:
    """Export fused magnitudes (from 'magfuse fuse') or a model version's tables.

    Every export writes a README sidecar (FILE.README.txt) with the advisory caution and
    every column with its unit.
    """
    from fusion.export import export_magnitudes, export_model_table
    from fusion.versions.fused_store import FusedStore
    from fusion.workflows.fusing import resolve_version
    from stations.errors import ConfigError

    cfg = load(config)
    st = open_store(cfg, store)
    mtype = type or cfg.learn.magnitude_type
    if what is not ExportWhat.magnitudes and format is ExportFormatChoice.quakeml:
        raise ConfigError(f"{what.value} tables export as csv or parquet, not quakeml")
    output_path(out, option="--out", kind="file")
    if what is ExportWhat.magnitudes:
        start, end = parse_time(since, "--since"), parse_time(until, "--until")
        readings = None
        if format is ExportFormatChoice.quakeml:
            readings = st.scan(magnitude_type=mtype, start=start, end=end)
        report = export_magnitudes(
            FusedStore(st.root, lock=st.write_lock),
            mtype,
            out,
            format=format.value,
            start=start,
            end=end,
            readings=readings,
        )
    else:
        reg = open_registry(st)
        v = resolve_version(reg, mtype, version)
        report = export_model_table(reg, v, what.value, out, format=format.value)
    typer.echo(f"wrote {count(report.rows, 'row')} to {out} (and {Path(report.readme).name})")
    for note in getattr(report, "notes", ()):
        typer.echo(f"note: {note}")
    print_advisory()


ReportStationsOption = Annotated[
    Path | None,
    typer.Option(
        "--stations",
        help=(
            "StationXML or station CSV with station positions: draws the stations on the "
            "report's map of correlated pairs (default: [compute] stations; without it, "
            "no map)."
        ),
        dir_okay=False,
    ),
]


def report_command(
    out: Annotated[
        Path, typer.Option("--out", metavar="FOLDER", help="Folder for the report files.")
    ],
    type: TypeOption = None,
    since: SinceOption = None,
    version: VersionOption = None,
    stations: ReportStationsOption = None,
    store: StoreOption = None,
    config: ConfigOption = None,
) -> None:
    """Write the per-station reliability report (HTML with plots, CSV and Parquet tables)."""
    from fusion.workflows.reporting import write_model_report
    from stations.metadata import StationMetadata

    cfg = load(config)
    st = open_store(cfg, store)
    output_path(out, option="--out", kind="folder")
    meta_path = stations or (Path(cfg.compute.stations) if cfg.compute.stations else None)
    files = write_model_report(
        st,
        open_registry(st),
        cfg,
        out,
        magnitude_type=type,
        version=version,
        since=parse_time(since, "--since"),
        metadata=StationMetadata.read(meta_path) if meta_path else None,
    )
    typer.echo(f"report   {files.html}")
    typer.echo(f"tables   {files.station_csv}, {files.station_parquet}")
    print_advisory()
