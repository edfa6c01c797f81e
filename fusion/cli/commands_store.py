"""``magfuse ingest`` and ``magfuse store``: adapters over :mod:`stations.store` and the readers."""

from __future__ import annotations

import sys
from dataclasses import dataclass
from pathlib import Path
from typing import TYPE_CHECKING, Annotated, Any

import typer

from fusion.cli.common import (
    ComputeFlag,
    ConfigOption,
    DefaultNetworkOption,
    JsonOption,
    StationsOption,
    StoreOption,
    TypeOption,
    compute_setup,
    echo_json,
    load,
    open_store,
    print_advisory,
    store_path,
)

if TYPE_CHECKING:
    from fusion.settings import MagfuseConfig
    from stations.ingest import IngestOutcome
    from stations.store import StationMagnitudeStore, StoreSummary

__all__ = ["ingest_command", "register", "retract_command", "store_command"]

#: A single file at least this large (bytes) gets a progress bar too.
LARGE_FILE_BYTES = 64 * 2**20

FormatOption = Annotated[
    str | None,
    typer.Option(
        "--format",
        metavar="FORMAT",
        help=(
            "Reader format of every FILE: parquet, quakeml, ims10, mchedr, yellowstone or csv "
            "(default: recognise each file by its content)."
        ),
    ),
]
NearDuplicatesFlag = Annotated[
    bool,
    typer.Option(
        "--allow-near-duplicates",
        help="Accept events that coincide in origin time (1 s) and epicentre (10 km) with "
        "stored events under other ids; by default such a file is refused.",
    ),
]
PathsArgument = Annotated[
    list[Path],
    typer.Argument(
        help="Files of station magnitudes; each becomes one batch.",
        show_default=False,
        metavar="FILE",
    ),
]


def register(app: typer.Typer) -> None:
    """Mount ``ingest`` and ``store`` on the ``magfuse`` app."""
    app.command("ingest")(ingest_command)
    app.command("store")(store_command)
    app.command("retract")(retract_command)


@dataclass(frozen=True, slots=True)
class _Outcome:
    """One file's result: a line for stdout, or an error line for stderr."""

    line: str
    error: bool


def _report_line(path: Path, outcome: IngestOutcome) -> str:
    report = outcome.report
    if report.same_content_as is not None:
        return f"{path}: same content as batch {report.same_content_as}; nothing added"
    if report.no_rows:
        return f"{path}: no rows (only a header?); nothing added, no batch created"
    from fusion.wording import count, number

    computed = f", {count(outcome.computed, 'magnitude')} computed" if outcome.computed else ""
    return (
        f"{path}: {number(report.accepted)} accepted ({number(report.revised)} revised), "
        f"{number(report.duplicate)} duplicate, {number(report.quarantined)} quarantined"
        f"{computed}; "
        f"batch {report.batch_id}"
    )


def _ingest_one(
    store: StationMagnitudeStore,
    path: Path,
    fmt: str | None,
    cfg: MagfuseConfig,
    advance: Any,
    compute: Any,
    metadata: Any,
    default_network: str | None,
    allow_near_duplicates: bool = False,
) -> _Outcome:
    """Read and store one file; per-file problems become an error line, store problems raise."""
    from stations.errors import (
        MagfuseError,
        StoreBusyError,
        StoreCorruptError,
        StoreWriteError,
    )
    from stations.ingest import ingest_file

    size = _size(path)
    try:
        outcome = ingest_file(
            store,
            path,
            format=fmt,
            magnitude_range=(cfg.ingest.magnitude_min, cfg.ingest.magnitude_max),
            default_network=default_network,
            compute=compute,
            metadata=metadata,
            on_wait=lambda msg: typer.echo(msg, err=True),
            allow_near_duplicates=allow_near_duplicates,
        )
        advance(2 * size)
    except (StoreBusyError, StoreCorruptError, StoreWriteError):
        raise
    except MagfuseError as exc:
        return _Outcome(f"Error: {exc}", True)
    except IsADirectoryError:
        return _Outcome(f"Error: {path}: is a folder; pass the files inside it", True)
    except FileNotFoundError:
        return _Outcome(f"Error: {path}: file not found; check the path", True)
    except OSError as exc:
        return _Outcome(f"Error: {path}: cannot be read ({exc.strerror}); check it", True)
    return _Outcome(_report_line(path, outcome), False)


def _size(path: Path) -> int:
    try:
        return max(path.stat().st_size, 1)
    except OSError:
        return 1


def ingest_command(
    paths: PathsArgument,
    format: FormatOption = None,
    compute: ComputeFlag = False,
    stations: StationsOption = None,
    default_network: DefaultNetworkOption = None,
    allow_near_duplicates: NearDuplicatesFlag = False,
    store: StoreOption = None,
    config: ConfigOption = None,
) -> None:
    """Add station-magnitude files to the store, one atomic batch per file.

    Prints one line per file with the rows accepted (new revisions among them), duplicates
    and quarantined rows. A file that cannot be read gets an error line and the others still
    go in; the exit status is 1 only when no file could be read. With --compute, rows that
    carry an amplitude but no magnitude get one from the IASPEI formulas ([compute] section
    of the configuration); without it they are quarantined. A file whose events coincide in
    origin time and epicentre with stored events under other ids is refused (the same event
    would count twice) unless --allow-near-duplicates is given.
    """
    from stations.store import StationMagnitudeStore

    cfg = load(config)
    options, metadata = compute_setup(cfg, stations) if compute else (None, None)
    st = StationMagnitudeStore.open(
        store_path(cfg.store.path, store), lock_timeout_s=cfg.store.lock_timeout_s
    )
    sizes = [_size(p) for p in paths]
    outcomes: list[_Outcome] = []
    if len(paths) > 1 or max(sizes) >= LARGE_FILE_BYTES:
        with typer.progressbar(length=2 * sum(sizes), label="Ingesting", file=sys.stderr) as bar:
            outcomes = [
                _ingest_one(
                    st,
                    p,
                    format,
                    cfg,
                    bar.update,
                    options,
                    metadata,
                    default_network,
                    allow_near_duplicates,
                )
                for p in paths
            ]
    else:
        outcomes = [
            _ingest_one(
                st,
                p,
                format,
                cfg,
                lambda _n: None,
                options,
                metadata,
                default_network,
                allow_near_duplicates,
            )
            for p in paths
        ]
    for out in outcomes:
        typer.echo(out.line, err=out.error)
    print_advisory()
    if all(o.error for o in outcomes):
        raise typer.Exit(code=1)


def _fmt_time(value: Any) -> str:
    return "-" if value is None else f"{value:%Y-%m-%dT%H:%M:%S}Z"


def render_summary(s: StoreSummary) -> str:
    """The summary as a text table for people."""
    lines = [
        f"store      {s.root}  (record schema {s.schema_version})",
        f"batches    {s.batches:,}; data files {s.files:,}; quarantined rows {s.quarantined:,}",
        f"readings   {s.rows_current:,} current; {s.rows_all:,} counting every revision; "
        f"{s.revised:,} revised",
        f"           {s.detected:,} detected; {s.not_detected:,} not detected",
        f"events     {s.events:,}; stations {s.stations:,}",
        f"origins    {_fmt_time(s.first_origin_time)} to {_fmt_time(s.last_origin_time)}",
    ]
    if s.by_type:
        head = (
            "type",
            "current",
            "all",
            "detected",
            "not det.",
            "revised",
            "events",
            "stations",
            "first origin",
            "last origin",
        )
        rows = [
            (
                t.magnitude_type,
                f"{t.rows_current:,}",
                f"{t.rows_all:,}",
                f"{t.detected:,}",
                f"{t.not_detected:,}",
                f"{t.revised:,}",
                f"{t.events:,}",
                f"{t.stations:,}",
                _fmt_time(t.first_origin_time),
                _fmt_time(t.last_origin_time),
            )
            for t in s.by_type
        ]
        widths = [max(len(r[i]) for r in (head, *rows)) for i in range(len(head))]

        def fmt(r: tuple[str, ...]) -> str:
            cells = [r[0].ljust(widths[0])] + [
                c.rjust(w) for c, w in zip(r[1:], widths[1:], strict=True)
            ]
            return "  ".join(cells)

        lines += ["", fmt(head), *(fmt(r) for r in rows)]
    return "\n".join(lines)


def store_command(
    json_out: JsonOption = False,
    store: StoreOption = None,
    config: ConfigOption = None,
) -> None:
    """Summarise the store: rows, detections, time range, events, stations, revisions.

    Rows are counted per magnitude type, in the current view (latest revision of each
    reading) and over every revision; also quarantined rows and batches. --json prints
    the same figures for machines.
    """
    from stations.store import StationMagnitudeStore

    cfg = load(config)
    st = StationMagnitudeStore.open(
        store_path(cfg.store.path, store), create=False, lock_timeout_s=cfg.store.lock_timeout_s
    )
    summary = st.summary()
    if json_out:
        echo_json(summary.to_dict())
    else:
        typer.echo(render_summary(summary))
    print_advisory()


def retract_command(
    event_id: Annotated[str, typer.Argument(help="Event id of the reading.", show_default=False)],
    station: Annotated[
        str, typer.Option("--station", help="Station id NET.STA.LOC of the reading.")
    ],
    reason: Annotated[
        str, typer.Option("--reason", help="Why it is withdrawn (kept with the batch).")
    ],
    channel: Annotated[
        str | None,
        typer.Option(
            "--channel",
            help="Channel code of the reading (needed when the station has several).",
        ),
    ] = None,
    type: TypeOption = None,
    store: StoreOption = None,
    config: ConfigOption = None,
) -> None:
    """Withdraw one station's current reading of an event, e.g. one filed under a wrong channel.

    The reading leaves the current view (fits and fusion no longer use it; re-fuse the event
    to update its network magnitude) but nothing is deleted: it stays readable among all
    revisions, and the retraction is a batch of its own with its reason.
    """
    cfg = load(config)
    st = open_store(cfg, store)
    r = st.retract(
        event_id,
        station,
        magnitude_type=type or cfg.learn.magnitude_type,
        channel=channel,
        reason=reason,
        on_wait=lambda msg: typer.echo(msg, err=True),
    )
    typer.echo(
        f"retracted the {r.magnitude_type} reading of {r.station_id} (channel "
        f"{r.channel or 'none'}, revision {r.revision}) for event {r.event_id}; batch "
        f"{r.batch_id}. It stays readable among all revisions; re-fuse the event to update "
        "its network magnitude"
    )
    print_advisory()
