"""``magfuse event`` and ``magfuse diff``: one event explained; what a candidate would change."""

from __future__ import annotations

from pathlib import Path
from typing import Annotated

import typer

from fusion.cli.common import (
    ConfigOption,
    JsonOption,
    StoreOption,
    TypeOption,
    VersionOption,
    check_override,
    echo_json,
    load,
    open_registry,
    open_store,
    output_path,
    print_advisory,
)

__all__ = ["register"]


def register(app: typer.Typer) -> None:
    """Mount ``event`` and ``diff``."""
    app.command("event")(event_command)
    app.command("diff")(diff_command)


HtmlOption = Annotated[
    Path | None,
    typer.Option("--html", metavar="FILE", help="Also write a self-contained HTML page here."),
]
PngOption = Annotated[
    Path | None, typer.Option("--png", metavar="FILE", help="Also write the picture as PNG.")
]


RecomputeOption = Annotated[
    bool,
    typer.Option(
        "--recompute",
        help="Also fuse the event now with the active model (or --version) and show that "
        "value beside the recorded one.",
    ),
]


def event_command(
    event_id: Annotated[str, typer.Argument(help="Event id as stored.", metavar="EVENT_ID")],
    type: TypeOption = None,
    version: VersionOption = None,
    recompute: RecomputeOption = False,
    json_out: JsonOption = False,
    html: HtmlOption = None,
    png: PngOption = None,
    store: StoreOption = None,
    config: ConfigOption = None,
) -> None:
    """Explain one event's network magnitude: weights, residuals, leave-one-out checks.

    Shows the value on record (status and model version) when the event was fused; the
    active model's value only with --recompute (or --version).
    """
    from fusion.workflows.event_view import explain_event, render_event

    cfg = load(config)
    st = open_store(cfg, store)
    for path, option in ((html, "--html"), (png, "--png")):
        if path is not None:
            output_path(path, option=option, kind="file")
    ex = explain_event(
        st,
        open_registry(st),
        cfg,
        event_id,
        magnitude_type=type,
        version=version,
        recompute=recompute,
    )
    if html is not None or png is not None:
        from fusion.report import write_event_figure

        for path, fmt in ((html, "html"), (png, "png")):
            if path is not None:
                write_event_figure(ex, path, fmt=fmt)
    if json_out:
        echo_json(ex.to_dict())
    else:
        typer.echo(render_event(ex))


CandidateArgument = Annotated[
    str | None,
    typer.Argument(
        help="Candidate version (default: the newest version created after the active one)."
    ),
]
DaysOption = Annotated[
    float | None,
    typer.Option(
        "--days",
        metavar="DAYS",
        help="Recent events compared, days, > 0 ([nightly] dry_run_days).",
    ),
]
TopOption = Annotated[
    int | None,
    typer.Option(
        "--top",
        metavar="N",
        help="Number of most-moved events listed, >= 1 ([nightly] dry_run_top).",
    ),
]


def diff_command(
    candidate: CandidateArgument = None,
    type: TypeOption = None,
    days: DaysOption = None,
    top: TopOption = None,
    json_out: JsonOption = False,
    store: StoreOption = None,
    config: ConfigOption = None,
) -> None:
    """Dry run: how weights and recent magnitudes would change if a candidate were adopted.

    Writes nothing.
    """
    from fusion.workflows.dry_run import dry_run, newer_candidate, no_candidate_message

    cfg = load(config)
    check_override(cfg, "nightly", "dry_run_days", days, "--days")
    check_override(cfg, "nightly", "dry_run_top", top, "--top")
    st = open_store(cfg, store)
    registry = open_registry(st)
    if candidate is None:
        mtype = type or cfg.learn.magnitude_type
        newer = newer_candidate(registry, mtype)
        if newer is None:
            message = no_candidate_message(registry, mtype)
            if json_out:
                echo_json({"magnitude_type": mtype, "candidate_version": None, "note": message})
            else:
                typer.echo(message)
            print_advisory()
            return
        candidate = newer.version_id
    report = dry_run(
        st, registry, cfg, magnitude_type=type, candidate=candidate, days=days, top=top
    )
    ok, reasons = report.within_policy(
        max_weight_share_change=cfg.nightly.max_weight_share_change,
        max_bias_change=cfg.nightly.max_bias_change,
    )
    if json_out:
        payload = report.to_dict()
        payload["within_policy"] = ok
        payload["policy_reasons"] = reasons
        echo_json(payload)
    else:
        typer.echo(report.render_text())
        typer.echo("")
        typer.echo(
            "within the adoption policy"
            if ok
            else "outside the adoption policy: " + "; ".join(reasons)
        )
    print_advisory()
