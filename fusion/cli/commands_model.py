"""``magfuse learn``, ``models``, ``adopt`` and ``rollback``: model versions from the CLI."""

from __future__ import annotations

from pathlib import Path
from typing import TYPE_CHECKING, Annotated, Any

import typer

from fusion.cli.common import (
    ConfigOption,
    JsonOption,
    StoreOption,
    TypeOption,
    check_override,
    echo_json,
    load,
    open_registry,
    open_store,
    output_path,
    parse_time,
    print_advisory,
    writing,
)
from fusion.wording import count, number

if TYPE_CHECKING:
    from fusion.versions.model_registry import ModelVersion

__all__ = ["register"]


def register(app: typer.Typer) -> None:
    """Mount the model-version commands."""
    app.command("learn")(learn_command)
    app.command("models")(models_command)
    app.command("adopt")(adopt_command)
    app.command("rollback")(rollback_command)


AsOfOption = Annotated[
    str | None,
    typer.Option(
        "--as-of",
        metavar="TIME",
        help="End of the learning window, ISO 8601 UTC (default: latest origin time stored).",
    ),
]
HalfLifeOption = Annotated[
    float | None,
    typer.Option(
        "--half-life", metavar="DAYS", help="Half-life of the event weights, days ([learn])."
    ),
]
WindowOption = Annotated[
    float | None,
    typer.Option("--window", metavar="DAYS", help="Hard window, days, > 0 ([learn])."),
]
CsvDirOption = Annotated[
    Path | None,
    typer.Option(
        "--csv",
        metavar="FOLDER",
        help=(
            "Also write the station, pair and epoch tables into this folder as CSV files, "
            "each with a README, as 'magfuse export' writes them."
        ),
    ),
]


def _summary_lines(v: ModelVersion) -> list[str]:
    m = v.meta
    anchor = m.get("anchor", {})
    gt = m.get("global_test")
    lines = [
        f"candidate  {v.version_id}  (not adopted; adopt with 'magfuse adopt {v.version_id}')",
        f"window     {m.get('window_start') or '-'} .. {m.get('window_end')}  "
        f"half-life {m.get('half_life_days'):g} d",
        f"data       {count(m.get('n_events', 0), 'event')}, "
        f"{count(m.get('n_readings', 0), 'station magnitude')}, "
        f"{count(m.get('n_nondetections', 0), 'non-detection')}",
        f"stations   {number(m.get('n_stations', 0))} "
        f"({count(m.get('n_units', 0), 'station epoch')}); "
        f"{number(m.get('n_prior_dominated', 0))} prior-dominated, "
        f"{number(m.get('n_uncalibrated', 0))} uncalibrated",
        f"pairs      {number(m.get('n_pairs_flagged', 0))} correlated of "
        f"{number(m.get('n_pairs_tested', 0))} tested; "
        f"{count(m.get('n_epoch_splits', 0), 'bias step')} split into epochs",
        f"anchor     {anchor.get('kind')}: level {anchor.get('value', float('nan')):+.3f}, "
        f"calibration uncertainty {anchor.get('se', float('nan')):.3f}",
        f"fit        {m.get('n_iter')} iterations, "
        + ("converged" if m.get("converged") else "NOT converged (see warnings)"),
    ]
    if gt:
        lines.append(
            f"global test of uncorrelated errors: p = {gt['p_value']:.3f} "
            f"({gt['replicates']} bootstrap replicates)"
        )
    return lines


def learn_command(
    type: TypeOption = None,
    as_of: AsOfOption = None,
    half_life: HalfLifeOption = None,
    window: WindowOption = None,
    csv: CsvDirOption = None,
    json_out: JsonOption = False,
    store: StoreOption = None,
    config: ConfigOption = None,
) -> None:
    """Learn station biases, error SDs and correlated pairs; store a candidate model.

    The candidate is not adopted: compare it with 'magfuse diff' and switch with
    'magfuse adopt'. Its station, pair and epoch tables are stored with it (Parquet).
    """
    from fusion.export import export_model_table
    from fusion.workflows.learning import learn_candidate

    cfg = load(config)
    check_override(cfg, "learn", "half_life_days", half_life, "--half-life")
    check_override(cfg, "learn", "window_days", window, "--window")
    st = open_store(cfg, store)
    if csv is not None:
        output_path(csv, option="--csv", kind="folder")
    reg = open_registry(st)
    outcome = learn_candidate(
        st,
        reg,
        cfg,
        magnitude_type=type,
        as_of=parse_time(as_of, "--as-of"),
        half_life_days=half_life,
        window_days=window,
    )
    v = outcome.version
    if csv is not None:
        for name in ("stations", "pairs", "epochs"):
            # the same files as 'magfuse export NAME': plain column names and a README sidecar
            export_model_table(reg, v, name, csv / f"{v.version_id}-{name}.csv", format="csv")
    if json_out:
        echo_json({**v.meta, "identical_to": outcome.identical_to})
    elif outcome.identical_to is not None:
        state = "the active model" if reg.active_id(v.magnitude_type) == v.version_id else "stored"
        typer.echo(
            f"identical to version {v.version_id} ({state}); nothing stored: same data window, "
            "settings and anchor"
        )
    else:
        typer.echo("\n".join(_summary_lines(v)))
    print_advisory()


def _version_row(v: ModelVersion, active: str | None) -> dict[str, Any]:
    m = v.meta
    return {
        "version": v.version_id,
        "active": v.version_id == active,
        "created": v.created,
        "window_end": m.get("window_end"),
        "stations": m.get("n_stations"),
        "pairs": m.get("n_pairs_flagged"),
        "events": m.get("n_events"),
        "anchor": (m.get("anchor") or {}).get("kind"),
    }


def models_command(
    type: TypeOption = None,
    json_out: JsonOption = False,
    store: StoreOption = None,
    config: ConfigOption = None,
) -> None:
    """List stored model versions; the active one is marked with '*'."""
    cfg = load(config)
    reg = open_registry(open_store(cfg, store))
    versions = reg.versions(type)
    actives = {v.magnitude_type: reg.active_id(v.magnitude_type) for v in versions}
    rows = [_version_row(v, actives[v.magnitude_type]) for v in versions]
    print_advisory()  # on stderr, so the JSON below stays machine-readable
    if json_out:
        echo_json(rows)
        return
    if not rows:
        typer.echo("no model versions yet; run 'magfuse learn'")
        return
    typer.echo(
        f"  {'version':<34} {'created (UTC)':<20} {'window end (UTC)':<20} stations pairs events"
    )
    for r in rows:
        mark = "*" if r["active"] else " "
        typer.echo(
            f"{mark} {r['version']:<34} {_seconds(r['created']):<20} "
            f"{_seconds(r['window_end']):<20} {_count(r['stations']):>8} {_count(r['pairs']):>5} "
            f"{_count(r['events']):>6}"
        )


def _count(value: Any) -> str:
    """A count for the table (thousands separators), '-' when the version does not say."""
    return number(value) if isinstance(value, int) else "-" if value is None else str(value)


def _seconds(iso: Any) -> str:
    """An ISO 8601 time to whole seconds, without the zone (the header says UTC)."""
    return str(iso or "-").replace("T", " ")[:19]


VersionArgument = Annotated[
    str, typer.Argument(help="Model version id (see 'magfuse models').", metavar="VERSION")
]


def adopt_command(
    version: VersionArgument, store: StoreOption = None, config: ConfigOption = None
) -> None:
    """Make a model version the active one of its magnitude type (atomic switch)."""
    cfg = load(config)
    st = open_store(cfg, store)
    with writing(st):
        v = open_registry(st).adopt(version)
    typer.echo(f"active {v.magnitude_type} model: {v.version_id}")
    print_advisory()


def rollback_command(
    type: TypeOption = None, store: StoreOption = None, config: ConfigOption = None
) -> None:
    """Re-activate the model version that was active before the current one."""
    cfg = load(config)
    st = open_store(cfg, store)
    with writing(st):
        v = open_registry(st).rollback(type or cfg.learn.magnitude_type)
    typer.echo(f"active {v.magnitude_type} model: {v.version_id} (rolled back)")
    print_advisory()
