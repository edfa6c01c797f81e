"""Fused network magnitudes as CSV, Parquet or QuakeML.

The tabular exports have one row per event (the current row of the fused-magnitude store) and
these columns, in this order (names follow QuakeML where it has a term: ``mag``,
``station_count``, ``evaluation_status``; docs/conventions.md item 11). Each entry gives the name,
the unit and the fused-store column it comes from:

``event_id`` (-; from ``event_id``)
    event identifier of the source bulletin
``origin_time`` (UTC; from ``origin_time``)
    origin time
``magnitude_type`` (-; from ``magnitude_type``)
    ML, mb, Ms, ... (IASPEI names)
``mag`` (magnitude units; from ``magnitude``)
    fused network magnitude (GLS); empty without a usable detection
``mag_uncertainty`` (magnitude units; from ``se``)
    standard error of mag (1 sigma); station-calibration (anchor) uncertainty not included
``mag_ci_low`` (magnitude units; from ``ci_low``)
    lower end of the normal interval at confidence_level
``mag_ci_high`` (magnitude units; from ``ci_high``)
    upper end of that interval
``confidence_level`` (1; from ``confidence_level``)
    level of the interval as a fraction (0.68 = 68 %), not percent
``station_count`` (1; from ``n_stations``)
    station magnitudes used (detections)
``n_eff`` (1; from ``n_eff``)
    effective number of stations, 1 / sum of squared weights
``plain_mean`` (magnitude units; from ``plain_mean``)
    plain mean of the station magnitudes as read (no correction)
``median`` (magnitude units; from ``median``)
    median of the station magnitudes as read
``model_version`` (-; from ``model_version``)
    station model that made mag
``evaluation_status`` (-; from ``evaluation_status``)
    preliminary, reviewed or final (QuakeML EvaluationStatus)
``flags`` (-; from ``flags``)
    ';'-joined event flags; each is explained in the README sidecar
``method`` (-; from ``method``)
    gls, robust-gls, censored-likelihood, single-station or none (README sidecar)
``mag_minus_plain_mean`` (magnitude units; from ``minus_plain_mean``)
    mag - plain_mean
``mag_uncertainty_scaled`` (magnitude units; from ``se_scaled``)
    mag_uncertainty * max(1, birge_ratio)
``birge_ratio`` (1; from ``birge_ratio``)
    sqrt(chi2 / (station_count - 1)) (Birge 1932)
``chi2`` (1; from ``chi2``)
    GLS residual chi-square, station_count - 1 degrees of freedom
``mag_uncertainty_jackknife`` (magnitude units; from ``jackknife_se``)
    jackknife standard error (station_count >= 4; Efron & Stein 1981)
``max_influence`` (magnitude units; from ``max_influence``)
    mag with minus mag without the station whose |influence| is largest (signed)
``max_influence_station`` (-; from ``max_influence_station``)
    station of max_influence (NET.STA.LOC)
``max_abs_z`` (1; from ``max_abs_z``)
    largest leave-one-station-out z score
``prior_weight_share`` (1; from ``prior_weight_share``)
    weight share of prior-dominated and unknown stations (fraction)
``n_nondetections_used`` (1; from ``n_nondetections_used``)
    non-detections used by the censored likelihood
``censoring_shift`` (magnitude units; from ``censoring_shift``)
    censored minus GLS magnitude
``converged`` (-; from ``converged``)
    true if the iterations met their tolerance
``n_iter`` (1; from ``n_iter``)
    iterations (robust weights plus Newton steps)
``gr_posterior_mean`` (magnitude units; from ``gr_posterior_mean``)
    mag shrunk by a Gutenberg-Richter prior: never publish it, never fit a b value on it
``run_id`` (-; from ``run_id``)
    fused-store run that wrote the row
``fused_at`` (UTC; from ``fused_at``)
    when mag was computed

"magnitude units" are those of the magnitude type; "1" marks dimensionless numbers and counts.
A missing value is an empty CSV field or a Parquet null. The advisory caution and these
descriptions travel in the README sidecar (:mod:`fusion.export.sidecar`) and, for Parquet, in
the file and field metadata. QuakeML: :mod:`fusion.export.quakeml`.

References
----------
Birge R. T. (1932). The calculation of errors by the method of least squares. Phys. Rev.
40:207-227. Efron B., Stein C. (1981). The jackknife estimate of variance. Ann. Stat.
9(3):586-596.
"""

from __future__ import annotations

import dataclasses
from collections.abc import Sequence
from datetime import UTC, datetime
from pathlib import Path
from typing import TYPE_CHECKING, Final, Literal

import numpy as np
import pandas as pd
import pyarrow as pa

from fusion.export.formats import ColumnSpec, ExportFormat, ExportReport, check_format, schema_of
from fusion.export.quakeml import write_quakeml
from fusion.export.tabular import export_table
from fusion.versions.fused_store import frame_to_table
from stations.errors import SchemaError

if TYPE_CHECKING:
    from fusion.versions.fused_store import FusedStore

__all__ = [
    "MAGNITUDE_COLUMNS",
    "export_magnitudes",
    "magnitude_table",
    "write_magnitudes",
]

_MU: Final = "magnitude units"
_UTC: Final = pa.timestamp("us", tz="UTC")
_F: Final = pa.float64()
_I: Final = pa.int64()
_S: Final = pa.string()
_B: Final = pa.bool_()

#: The exported columns (module docstring), in file order.
MAGNITUDE_COLUMNS: Final = (
    ColumnSpec("event_id", "event_id", _S, "-", "event identifier of the source bulletin"),
    ColumnSpec("origin_time", "origin_time", _UTC, "UTC", "origin time"),
    ColumnSpec("magnitude_type", "magnitude_type", _S, "-", "ML, mb, Ms, ... (IASPEI names)"),
    ColumnSpec(
        "mag",
        "magnitude",
        _F,
        _MU,
        "fused network magnitude (GLS); empty without a usable detection",
    ),
    ColumnSpec(
        "mag_uncertainty",
        "se",
        _F,
        _MU,
        "standard error of mag (1 sigma); station-calibration (anchor) uncertainty not included",
    ),
    ColumnSpec(
        "mag_ci_low", "ci_low", _F, _MU, "lower end of the normal interval at confidence_level"
    ),
    ColumnSpec("mag_ci_high", "ci_high", _F, _MU, "upper end of that interval"),
    ColumnSpec(
        "confidence_level",
        "confidence_level",
        _F,
        "1",
        "level of the interval as a fraction (0.68 = 68 %), not percent",
    ),
    ColumnSpec("station_count", "n_stations", _I, "1", "station magnitudes used (detections)"),
    ColumnSpec(
        "n_eff", "n_eff", _F, "1", "effective number of stations, 1 / sum of squared weights"
    ),
    ColumnSpec(
        "plain_mean",
        "plain_mean",
        _F,
        _MU,
        "plain mean of the station magnitudes as read (no correction)",
    ),
    ColumnSpec("median", "median", _F, _MU, "median of the station magnitudes as read"),
    ColumnSpec("model_version", "model_version", _S, "-", "station model that made mag"),
    ColumnSpec(
        "evaluation_status",
        "evaluation_status",
        _S,
        "-",
        "preliminary, reviewed or final (QuakeML EvaluationStatus)",
    ),
    ColumnSpec(
        "flags",
        "flags",
        _S,
        "-",
        "';'-joined event flags; each is explained in the README sidecar",
    ),
    ColumnSpec(
        "method",
        "method",
        _S,
        "-",
        "gls, robust-gls, censored-likelihood, single-station or none (README sidecar)",
    ),
    ColumnSpec("mag_minus_plain_mean", "minus_plain_mean", _F, _MU, "mag - plain_mean"),
    ColumnSpec(
        "mag_uncertainty_scaled", "se_scaled", _F, _MU, "mag_uncertainty * max(1, birge_ratio)"
    ),
    ColumnSpec(
        "birge_ratio", "birge_ratio", _F, "1", "sqrt(chi2 / (station_count - 1)) (Birge 1932)"
    ),
    ColumnSpec(
        "chi2", "chi2", _F, "1", "GLS residual chi-square, station_count - 1 degrees of freedom"
    ),
    ColumnSpec(
        "mag_uncertainty_jackknife",
        "jackknife_se",
        _F,
        _MU,
        "jackknife standard error (station_count >= 4; Efron & Stein 1981)",
    ),
    ColumnSpec(
        "max_influence",
        "max_influence",
        _F,
        _MU,
        "mag with minus mag without the station whose |influence| is largest (signed)",
    ),
    ColumnSpec(
        "max_influence_station",
        "max_influence_station",
        _S,
        "-",
        "station of max_influence (NET.STA.LOC)",
    ),
    ColumnSpec("max_abs_z", "max_abs_z", _F, "1", "largest leave-one-station-out z score"),
    ColumnSpec(
        "prior_weight_share",
        "prior_weight_share",
        _F,
        "1",
        "weight share of prior-dominated and unknown stations (fraction)",
    ),
    ColumnSpec(
        "n_nondetections_used",
        "n_nondetections_used",
        _I,
        "1",
        "non-detections used by the censored likelihood",
    ),
    ColumnSpec("censoring_shift", "censoring_shift", _F, _MU, "censored minus GLS magnitude"),
    ColumnSpec("converged", "converged", _B, "-", "true if the iterations met their tolerance"),
    ColumnSpec("n_iter", "n_iter", _I, "1", "iterations (robust weights plus Newton steps)"),
    ColumnSpec(
        "gr_posterior_mean",
        "gr_posterior_mean",
        _F,
        _MU,
        "mag shrunk by a Gutenberg-Richter prior: never publish it, never fit a b value on it",
    ),
    ColumnSpec("run_id", "run_id", _S, "-", "fused-store run that wrote the row"),
    ColumnSpec("fused_at", "fused_at", _UTC, "UTC", "when mag was computed"),
)

#: Store columns a frame not read from the store may lack; they are then filled as stated.
_FILLABLE: Final = ("model_version", "evaluation_status", "run_id", "fused_at")


def magnitude_table(
    events: pd.DataFrame,
    *,
    model_version: str | None = None,
    evaluation_status: str | None = None,
) -> pa.Table:
    """The export table of fused events (columns :data:`MAGNITUDE_COLUMNS`).

    Parameters
    ----------
    events : pandas.DataFrame
        A :meth:`FusedStore.current <fusion.versions.fused_store.FusedStore.current>` frame, or the
        ``events`` of a :class:`~fusion.network.network_magnitude.FusedMagnitudes` not stored yet.
    model_version, evaluation_status : str, optional
        Fill these columns when ``events`` lacks them (unstored results); ``run_id`` and
        ``fused_at`` are then empty.

    Raises
    ------
    SchemaError
        A column is missing (``model_version`` without the parameter included) or cannot take
        its declared type.
    """
    n = len(events)
    fill: dict[str, object] = {
        "model_version": model_version,
        "evaluation_status": evaluation_status,
        "run_id": None,
        "fused_at": None,
    }
    data: dict[str, object] = {}
    for spec in MAGNITUDE_COLUMNS:
        if spec.source in events.columns:
            data[spec.name] = events[spec.source].to_numpy()
        elif spec.source in _FILLABLE and (
            fill[spec.source] is not None or spec.source in ("run_id", "fused_at")
        ):
            value = fill[spec.source]
            if spec.source == "fused_at":
                data[spec.name] = pd.DatetimeIndex(np.full(n, np.datetime64("NaT", "us")), tz="UTC")
            else:
                data[spec.name] = np.full(n, value, dtype=object)
        else:
            hint = (
                f"; pass {spec.source}= for results that are not stored"
                if spec.source in _FILLABLE
                else ""
            )
            raise SchemaError(f"fused events: column {spec.source!r} is missing{hint}")
    frame = pd.DataFrame(data, index=pd.RangeIndex(n))
    schema = schema_of(MAGNITUDE_COLUMNS, {})
    return frame_to_table(frame, schema, where="fused events")


def _versions(table: pa.Table) -> tuple[str, ...]:
    col = table.column("model_version").drop_null()
    return tuple(sorted(set(col.to_pylist())))


def flag_notes(*, rows: bool = False) -> list[str]:
    """Sidecar paragraphs: every ``method`` value and event flag (and station-magnitude flag
    with ``rows``) with its meaning (:mod:`fusion.flags`)."""
    from fusion.flags import EVENT_FLAGS, METHODS, ROW_FLAGS

    def block(title: str, table: dict[str, str]) -> str:
        width = max(len(k) for k in table)
        return "\n".join([title, *(f"  {k:<{width}}  {v}" for k, v in table.items())])

    notes = [
        block("method (how the network magnitude was computed):", METHODS),
        block("Event flags (';'-joined in flags):", EVENT_FLAGS),
    ]
    if rows:
        notes.append(block("Station-magnitude flags:", ROW_FLAGS))
    return notes


def write_magnitudes(
    events: pd.DataFrame,
    path: Path,
    *,
    format: str = "csv",
    contributions: pd.DataFrame | None = None,
    readings: pd.DataFrame | None = None,
    uncertainty: Literal["se", "interval"] = "se",
    model_version: str | None = None,
    evaluation_status: str | None = None,
    now: datetime | None = None,
) -> ExportReport:
    """Write fused events to ``path`` as CSV, Parquet or QuakeML, with a README sidecar.

    Parameters
    ----------
    events : pandas.DataFrame
        Current rows of the fused store (or unstored events with ``model_version``).
    path : Path
        The data file; its folder must exist. The sidecar is ``<path>.README.txt``.
    format : {'csv', 'parquet', 'quakeml'}, default='csv'
    contributions : pandas.DataFrame, optional
        Needed for QuakeML (:meth:`FusedStore.current_contributions`).
    readings : pandas.DataFrame, optional
        QuakeML only: station-store rows with event locations and channels.
    uncertainty : {'se', 'interval'}, default='se'
        QuakeML only (:mod:`fusion.export.quakeml`).
    model_version, evaluation_status : str, optional
        CSV/Parquet: fill these columns when ``events`` lacks them.
    now : datetime, optional
        Export time (default: the clock).

    Returns
    -------
    ExportReport

    Raises
    ------
    UnknownFormatError
        Unknown ``format``.
    SchemaError
        A needed column is missing; QuakeML without ``contributions``.
    ConfigError
        The folder of ``path`` does not exist.
    """
    fmt = check_format(format, tuple(ExportFormat), what="magnitudes")
    created = (now or datetime.now(UTC)).astimezone(UTC)
    if fmt is ExportFormat.quakeml:
        if contributions is None:
            raise SchemaError(
                "QuakeML needs the station contributions; pass contributions= "
                "(FusedStore.current_contributions)"
            )
        return write_quakeml(
            events, contributions, path, readings=readings, uncertainty=uncertainty, now=created
        )
    table = magnitude_table(
        events, model_version=model_version, evaluation_status=evaluation_status
    )
    types = sorted(set(table.column("magnitude_type").to_pylist()))
    report = export_table(
        table,
        path,
        fmt,
        kind="magnitudes",
        title=f"network magnitudes ({', '.join(types) or 'none'})",
        model_versions=_versions(table),
        provenance=[("Magnitude types", ", ".join(types) or "-")],
        now=created,
        notes=flag_notes(),
    )
    # the command line prints a report's notes: they are for what needs attention only
    return dataclasses.replace(report, notes=())


def export_magnitudes(
    store: FusedStore,
    magnitude_type: str,
    path: Path,
    *,
    format: str = "csv",
    start: datetime | None = None,
    end: datetime | None = None,
    event_ids: Sequence[str] | None = None,
    readings: pd.DataFrame | None = None,
    uncertainty: Literal["se", "interval"] = "se",
    now: datetime | None = None,
) -> ExportReport:
    """Export the current fused magnitudes of one type from the store (``magfuse export
    magnitudes``).

    Parameters
    ----------
    store : FusedStore
    magnitude_type : str
    path : Path
        The data file; the sidecar is ``<path>.README.txt``.
    format : {'csv', 'parquet', 'quakeml'}, default='csv'
    start, end : datetime, optional
        Half-open UTC origin-time window (:meth:`FusedStore.current`).
    event_ids : sequence of str, optional
        Only these events.
    readings : pandas.DataFrame, optional
        QuakeML: station-store rows with event locations and channels, e.g.
        ``StationMagnitudeStore.scan(magnitude_type=..., start=..., end=..., columns=[
        "event_id", "station_id", "channel", "event_latitude", "event_longitude",
        "event_depth"])``.
    uncertainty : {'se', 'interval'}, default='se'
        QuakeML only.
    now : datetime, optional
        Export time.

    Returns
    -------
    ExportReport
    """
    fmt = check_format(format, tuple(ExportFormat), what="magnitudes")
    events = store.current(magnitude_type, start=start, end=end, event_ids=event_ids)
    contributions = (
        store.current_contributions(magnitude_type, events) if fmt is ExportFormat.quakeml else None
    )
    return write_magnitudes(
        events,
        path,
        format=fmt.value,
        contributions=contributions,
        readings=readings,
        uncertainty=uncertainty,
        now=now,
    )
