"""Fused network magnitudes as QuakeML 1.2, through ObsPy's event model (``obspy.core.event``).

One ``Event`` per event with a finite fused magnitude; events without one (flag
``no-usable-detection``) are left out and counted. Field mapping (QuakeML BED 1.2 names; magfuse
columns of :class:`~fusion.versions.fused_store.FusedStore` frames):

=============================================== =========================== ==================
QuakeML element                                 magfuse column              unit
=============================================== =========================== ==================
event/@publicID                                 event_id (see Identifiers)  --
origin/time                                     origin_time                 UTC
origin/latitude, origin/longitude               event_latitude, _longitude  deg (WGS84)
origin/depth                                    event_depth × 1000          m
magnitude/mag/value                             magnitude                   magnitude units
magnitude/mag/uncertainty                       se (1σ standard error)      magnitude units
magnitude/mag/confidenceLevel                   68.2689… (see below)        percent (0–100)
magnitude/type                                  magnitude_type              --
magnitude/stationCount                          n_stations                  count
magnitude/methodID                              method → smi:…/method/<m>   --
magnitude/evaluationMode                        "automatic"                 --
magnitude/evaluationStatus                      evaluation_status           --
magnitude/creationInfo/version                  model_version               --
magnitude/creationInfo/creationTime             fused_at                    UTC
magnitude/comment                               flags, run_id               --
stationMagnitude/mag/value                      corrected_magnitude         magnitude units
stationMagnitude/type                           magnitude_type              --
stationMagnitude/waveformID                     station_id (+ channel)      NET.STA.LOC.CHA
stationMagnitude/methodID                       smi:…/method/station-corrected --
stationMagnitude/comment                        correction, magnitude, …    magnitude units
stationMagnitudeContribution/weight             weight                      1
stationMagnitudeContribution/residual           residual                    magnitude units
=============================================== =========================== ==================

**Uncertainty and its level.** QuakeML's ``RealQuantity`` gives one ``confidenceLevel`` (in
percent, 0–100; QuakeML BED 1.2) for its ``uncertainty``. With ``uncertainty="se"`` (default)
the uncertainty is the 1σ standard error, whose coverage under the Gaussian model is
100·erf(1/√2) = 68.2689 % (:data:`SE_CONFIDENCE_PERCENT`), and that is the level written.
With ``uncertainty="interval"`` it is the half-width of the fused interval,
(ci_high − ci_low)/2, with level 100 × ``confidence_level``. magfuse keeps levels as fractions
everywhere else; QuakeML is the one place where they are percent.

**Station magnitudes.** ``mag`` is the *corrected* station magnitude (as read plus the station
correction), so QuakeML's own relations hold: ``residual`` = station ``mag`` − network ``mag``,
and Σ weight·mag over the contributions equals the network magnitude for GLS estimates
(``weight`` is the normalised GLS weight; it may be negative, and QuakeML does not require
weights to sum to one). The ``methodID`` ``smi:magfuse.invalid/method/station-corrected`` says
so. The station correction goes into a ``comment`` of the station magnitude (a standard place
every QuakeML reader keeps), as ``key=value`` pairs separated by ``"; "``::

    station_correction=-0.134021; magnitude_as_read=2.332505; unit_id=ZZ.S009.; flags=outlier

(:func:`comment_fields` parses it.) Non-detections and rows without a finite magnitude have no
station magnitude; their weights (censored estimates) are in the CSV/Parquet exports only.

**Identifiers.** An event id that is already a QuakeML resource identifier (``smi:`` or
``quakeml:``) is used as the event's ``publicID``; any other id becomes
``smi:magfuse.invalid/event/<id>`` with characters outside ``A-Z a-z 0-9 - . _`` written as
``~HH`` (UTF-8 bytes in hex; :func:`event_id_from_resource_id` inverts it). Every other object
gets an id under ``smi:magfuse.invalid/``, derived from event, type and run, so the same input
gives the same file. ``magfuse.invalid`` uses the reserved top-level name ``.invalid``
(RFC 2606): these ids never resolve.

**Origins.** QuakeML 1.2 requires latitude and longitude on an origin, and an origin for every
station magnitude (``stationMagnitude/originID`` is mandatory). An origin is written for the
events whose location the caller gives (``readings``, columns of the station store); it is the
source's origin, copied, and becomes ``preferredOriginID``. An event without a known location
gets the network magnitude alone (with ``stationCount``), no station magnitudes, and its
origin time in an event comment ``origin_time=...``; its station rows stay in the CSV and
Parquet exports.

**Preferred magnitude.** Each event carries exactly one magnitude, the fused network magnitude,
and it is the event's ``preferredMagnitudeID``, so QuakeML readers (e.g. ObsPy's
``Event.preferred_magnitude()``) find it. It is preferred *within this file*: magfuse
magnitudes stay advisory, and the magnitude of record is the publishing authority's
(:data:`fusion.advisory.ADVISORY`, also the first comment of ``eventParameters``).

References
----------
QuakeML 1.2 Basic Event Description, schema ``QuakeML-BED-1.2.xsd`` (as shipped with ObsPy
1.5.1, ``obspy/io/quakeml/data``). Schorlemmer D. et al. (2011), QuakeML: status of the XML-based
seismological data exchange format, Annals of Geophysics 54(1):59–65. Eastlake D., Panitz A.
(1999), RFC 2606, Reserved Top Level DNS Names.
"""

from __future__ import annotations

import io
import math
import re
from collections.abc import Mapping
from dataclasses import dataclass
from datetime import UTC, datetime
from pathlib import Path
from typing import TYPE_CHECKING, Any, Final, Literal

import numpy as np
import pandas as pd
from numpy.typing import NDArray

from fusion import __version__
from fusion.advisory import ADVISORY
from fusion.export.formats import ExportFormat, ExportReport
from fusion.export.sidecar import readme_text, stamp, write_readme
from fusion.export.tabular import check_target
from stations.errors import ConfigError, SchemaError
from stations.store.atomic import write_bytes_atomic

if TYPE_CHECKING:
    from obspy.core.event import Catalog

__all__ = [
    "AUTHORITY",
    "QUAKEML_MAPPING",
    "SE_CONFIDENCE_PERCENT",
    "QuakeMLSummary",
    "build_catalog",
    "comment_fields",
    "event_id_from_resource_id",
    "event_locations",
    "event_resource_id",
    "write_quakeml",
]

#: Authority of magfuse's own QuakeML resource identifiers (RFC 2606 reserved name).
AUTHORITY: Final = "magfuse.invalid"
_PREFIX: Final = f"smi:{AUTHORITY}"
#: Coverage of ±1 standard error under the Gaussian model, in percent: 100·erf(1/√2).
SE_CONFIDENCE_PERCENT: Final = 100.0 * math.erf(1.0 / math.sqrt(2.0))

#: QuakeML ResourceIdentifier pattern (QuakeML-BED-1.2.xsd, type ResourceIdentifier).
_QUAKEML_ID: Final = re.compile(
    r"(smi|quakeml):[\w\d][\w\d\-\.\*\(\)_~']{2,}/[\w\d\-\.\*\(\)_~'][\w\d\-\.\*\(\)\+\?_~'=,;#/&]*"
)
_NAT: Final = np.iinfo(np.int64).min
_SAFE: Final = re.compile(r"[A-Za-z0-9._-]")
_ESCAPED: Final = re.compile(r"(?:~[0-9A-F]{2})+")

#: The sidecar's mapping table: (QuakeML element, source, unit). A source in the form of a
#: name is a column of the CSV/Parquet magnitude export
#: (:data:`fusion.export.magnitudes.MAGNITUDE_COLUMNS`); anything else is said in words.
QUAKEML_MAPPING: Final = (
    ("event/@publicID", "event_id", "-"),
    ("event/preferredMagnitudeID", "the network magnitude below", "-"),
    ("origin/time", "origin_time", "UTC"),
    ("origin/latitude, longitude", "event location of the input bulletin", "deg"),
    ("origin/depth", "event depth of the input bulletin, km * 1000", "m"),
    ("magnitude/mag/value", "mag", "magnitude units"),
    (
        "magnitude/mag/uncertainty",
        "mag_uncertainty (1 sigma) or interval half-width",
        "magnitude units",
    ),
    (
        "magnitude/mag/confidenceLevel",
        "68.27 for mag_uncertainty; 100 * confidence_level",
        "percent",
    ),
    ("magnitude/type", "magnitude_type", "-"),
    ("magnitude/stationCount", "station_count", "count"),
    ("magnitude/methodID", "method", "-"),
    ("magnitude/evaluationMode", "always 'automatic'", "-"),
    ("magnitude/evaluationStatus", "evaluation_status", "-"),
    ("magnitude/creationInfo/version", "model_version", "-"),
    ("magnitude/creationInfo/creationTime", "fused_at", "UTC"),
    ("magnitude/comment", "flags=...; run_id=...", "-"),
    (
        "stationMagnitude/mag/value",
        "station magnitude as read + station correction",
        "magnitude units",
    ),
    ("stationMagnitude/waveformID", "station code NET.STA.LOC (+ channel)", "-"),
    (
        "stationMagnitude/comment",
        "station_correction=...; magnitude_as_read=...",
        "magnitude units",
    ),
    ("stationMagnitudeContribution/weight", "normalised weight of the station magnitude", "1"),
    (
        "stationMagnitudeContribution/residual",
        "corrected station magnitude - mag",
        "magnitude units",
    ),
)

_EVENT_COLUMNS: Final = (
    "event_id",
    "origin_time",
    "magnitude_type",
    "magnitude",
    "se",
    "ci_low",
    "ci_high",
    "confidence_level",
    "n_stations",
    "method",
    "flags",
    "model_version",
    "evaluation_status",
    "fused_at",
    "run_id",
)
_ROW_COLUMNS: Final = (
    "event_id",
    "station_id",
    "unit_id",
    "detected",
    "magnitude",
    "correction",
    "corrected_magnitude",
    "weight",
    "residual",
    "flags",
)
_LOCATION_COLUMNS: Final = ("event_latitude", "event_longitude", "event_depth")


# ---------------------------------------------------------------------------------------------
# Identifiers and comments
# ---------------------------------------------------------------------------------------------


def _escape(text: str) -> str:
    """Characters outside ``A-Z a-z 0-9 . _ -`` as ``~HH`` per UTF-8 byte (reversible)."""
    return "".join(
        ch if _SAFE.fullmatch(ch) else "".join(f"~{b:02X}" for b in ch.encode("utf-8"))
        for ch in text
    )


def _unescape(text: str) -> str:
    return _ESCAPED.sub(lambda m: bytes.fromhex(m.group(0).replace("~", "")).decode(), text)


def event_resource_id(event_id: str) -> str:
    """The QuakeML ``publicID`` of an event (module docstring, Identifiers)."""
    text = str(event_id)
    if _QUAKEML_ID.fullmatch(text):
        return text
    return f"{_PREFIX}/event/{_escape(text)}"


def event_id_from_resource_id(resource_id: str) -> str:
    """Inverse of :func:`event_resource_id`."""
    text = str(resource_id)
    head = f"{_PREFIX}/event/"
    return _unescape(text[len(head) :]) if text.startswith(head) else text


def comment_fields(text: str) -> dict[str, str]:
    """The ``key=value`` pairs of a magfuse comment (separated by ``"; "``)."""
    out: dict[str, str] = {}
    for part in str(text).split("; "):
        key, sep, value = part.partition("=")
        if sep:
            out[key.strip()] = value
    return out


def _num(value: float) -> str:
    """Shortest text that reads back as the same float (Python's repr of a float)."""
    return repr(float(value))


# ---------------------------------------------------------------------------------------------
# Input preparation (vectorised)
# ---------------------------------------------------------------------------------------------


def _require(frame: pd.DataFrame, names: tuple[str, ...], where: str) -> None:
    for name in names:
        if name not in frame.columns:
            raise SchemaError(
                f"{where}: column {name!r} is missing; pass frames of FusedStore.current and "
                "FusedStore.current_contributions"
            )


def event_locations(readings: pd.DataFrame) -> pd.DataFrame:
    """Per-event location and per-(event, station) channel from station-store rows.

    Parameters
    ----------
    readings : pandas.DataFrame
        Rows of :data:`~stations.schema.RECORD_SCHEMA` (e.g. ``StationMagnitudeStore.scan``
        with columns ``event_id, station_id, channel, event_latitude, event_longitude,
        event_depth``); any of the last four may be absent.

    Returns
    -------
    pandas.DataFrame
        Index ``event_id``; columns ``event_latitude``, ``event_longitude`` (deg),
        ``event_depth`` (km): the first non-null value of each event.
    """
    _require(readings, ("event_id",), "readings")
    cols = [c for c in _LOCATION_COLUMNS if c in readings.columns]
    frame = readings[["event_id", *cols]].copy()
    frame["event_id"] = frame["event_id"].astype(str)
    out = frame.groupby("event_id", sort=False).first()
    for c in _LOCATION_COLUMNS:
        if c not in out.columns:
            out[c] = np.nan
    return out[list(_LOCATION_COLUMNS)].astype(float)


def _channels(readings: pd.DataFrame | None) -> dict[tuple[str, str], str]:
    """(event_id, station_id) -> channel where the readings name exactly one channel."""
    if readings is None or "channel" not in readings.columns or "station_id" not in readings:
        return {}
    rows = readings[["event_id", "station_id", "channel"]].dropna()
    rows = rows[rows["channel"].astype(str).str.len() > 0].astype(str)
    counts = rows.groupby(["event_id", "station_id"], sort=False)["channel"].nunique()
    first = rows.groupby(["event_id", "station_id"], sort=False)["channel"].first()
    single = first[counts == 1]
    return dict(zip(single.index.tolist(), single.tolist(), strict=True))


@dataclass(frozen=True, slots=True)
class QuakeMLSummary:
    """Counts of :func:`build_catalog`.

    Attributes
    ----------
    events : int
        Events written.
    without_magnitude : int
        Events left out: no finite fused magnitude.
    without_origin : int
        Events written without an origin, hence without station magnitudes (no location
        given).
    station_magnitudes : int
        Station magnitudes (and contributions) written.
    model_versions : tuple of str
    """

    events: int
    without_magnitude: int
    without_origin: int
    station_magnitudes: int
    model_versions: tuple[str, ...]


def _epoch_ns(values: pd.Series) -> np.ndarray:
    """Nanoseconds since 1970 UTC of a time column (any unit, naive is UTC); NaT -> int64 min."""
    t = pd.to_datetime(values, utc=True).dt.tz_localize(None)
    return t.to_numpy(dtype="datetime64[ns]").astype(np.int64)


def _station_parts(station_id: str, row: int) -> tuple[str, str, str]:
    parts = str(station_id).split(".")
    if len(parts) != 3 or not parts[0] or not parts[1]:
        raise SchemaError(
            f"contributions row {row}: station_id {station_id!r} is not FDSN NET.STA.LOC; "
            "fix the station code in the source and re-ingest"
        )
    return parts[0], parts[1], parts[2]


def build_catalog(
    events: pd.DataFrame,
    contributions: pd.DataFrame,
    *,
    readings: pd.DataFrame | None = None,
    uncertainty: Literal["se", "interval"] = "se",
    now: datetime | None = None,
) -> tuple[Catalog, QuakeMLSummary]:
    """An ObsPy :class:`~obspy.core.event.Catalog` of fused magnitudes (module docstring).

    Parameters
    ----------
    events : pandas.DataFrame
        Current rows (:meth:`FusedStore.current <fusion.versions.fused_store.FusedStore.current>`),
        one per event.
    contributions : pandas.DataFrame
        Their contributions (:meth:`FusedStore.current_contributions
        <fusion.versions.fused_store.FusedStore.current_contributions>`); an optional ``channel``
        column
        fills the waveform ids' channel codes.
    readings : pandas.DataFrame, optional
        Station-store rows giving event locations and channels (:func:`event_locations`).
    uncertainty : {'se', 'interval'}, default='se'
        What ``mag/uncertainty`` holds (module docstring).
    now : datetime, optional
        Creation time of the catalog (default: the clock).

    Returns
    -------
    catalog : obspy.core.event.Catalog
    summary : QuakeMLSummary

    Raises
    ------
    SchemaError
        A needed column is missing, or a station id is not ``NET.STA.LOC``.
    ConfigError
        Unknown ``uncertainty``.
    """
    from obspy import UTCDateTime
    from obspy.core.event import Catalog, Comment, CreationInfo, ResourceIdentifier

    if uncertainty not in ("se", "interval"):
        raise ConfigError(
            "The 'uncertainty' parameter of build_catalog must be a str among "
            f"{{'se', 'interval'}}. Got {uncertainty!r} instead."
        )
    _require(events, _EVENT_COLUMNS, "events")
    _require(contributions, _ROW_COLUMNS, "contributions")
    created = (now or datetime.now(UTC)).astimezone(UTC)
    ec = _event_columns(events, readings, uncertainty)
    rc = _row_columns(contributions, ec.ev_ids, readings)
    catalog = Catalog(
        resource_id=ResourceIdentifier(f"{_PREFIX}/catalog/{created:%Y%m%dT%H%M%S%fZ}"),
        creation_info=CreationInfo(
            author="magfuse", version=__version__, creation_time=UTCDateTime(created)
        ),
    )
    catalog.comments.append(
        Comment(text=ADVISORY, resource_id=ResourceIdentifier(f"{_PREFIX}/comment/advisory"))
    )
    n_sm = 0
    versions: set[str] = set()
    for j in np.flatnonzero(ec.keep):
        event, n_station_magnitudes = _event_object(ec, rc, int(j))
        versions.add(ec.text["model_version"][j])
        n_sm += n_station_magnitudes
        catalog.events.append(event)
    keep = ec.keep
    summary = QuakeMLSummary(
        events=int(keep.sum()),
        without_magnitude=int((~keep).sum()),
        without_origin=int((keep & ~ec.has_origin).sum()),
        station_magnitudes=n_sm,
        model_versions=tuple(sorted(v for v in versions if v)),
    )
    return catalog, summary


@dataclass(slots=True, eq=False)
class _EventColumns:
    """The event table's columns as arrays, once (ObsPy then needs one object per element)."""

    ev_ids: NDArray[Any]
    mag: NDArray[np.float64]
    keep: NDArray[np.bool_]  # events with a magnitude
    origin_ns: NDArray[np.int64]
    fused_ns: NDArray[np.int64]
    unc: NDArray[np.float64]
    unc_level: NDArray[np.float64]
    n_st: NDArray[np.int64]
    text: dict[str, NDArray[Any]]
    run_ids: NDArray[Any]
    lat: NDArray[np.float64]
    lon: NDArray[np.float64]
    dep: NDArray[np.float64]
    has_origin: NDArray[np.bool_]


@dataclass(slots=True, eq=False)
class _RowColumns:
    """Usable contribution rows grouped by event (``rows[bounds[j]:bounds[j + 1]]``)."""

    rows: NDArray[np.int64]
    bounds: NDArray[np.int64]
    mag: NDArray[np.float64]
    sid: NDArray[Any]
    unit: NDArray[Any]
    flags: NDArray[Any]
    raw: NDArray[np.float64]
    corr: NDArray[np.float64]
    weight: NDArray[np.float64]
    residual: NDArray[np.float64]
    chan: NDArray[Any] | None
    channels: Mapping[tuple[str, str], str]


def _event_columns(
    events: pd.DataFrame, readings: pd.DataFrame | None, uncertainty: str
) -> _EventColumns:
    """Event columns as arrays, the uncertainty chosen, and locations from ``readings``."""
    ev_ids = events["event_id"].astype(str).to_numpy()
    mag = events["magnitude"].to_numpy(dtype=float, na_value=np.nan)
    se = events["se"].to_numpy(dtype=float, na_value=np.nan)
    half = 0.5 * (
        events["ci_high"].to_numpy(dtype=float, na_value=np.nan)
        - events["ci_low"].to_numpy(dtype=float, na_value=np.nan)
    )
    level = events["confidence_level"].to_numpy(dtype=float, na_value=np.nan)
    loc = event_locations(readings) if readings is not None else None
    lat = lon = dep = np.full(ev_ids.shape, np.nan)
    if loc is not None:
        aligned = loc.reindex(ev_ids)
        lat = aligned["event_latitude"].to_numpy(dtype=float)
        lon = aligned["event_longitude"].to_numpy(dtype=float)
        dep = aligned["event_depth"].to_numpy(dtype=float)
    return _EventColumns(
        ev_ids=ev_ids,
        mag=mag,
        keep=np.isfinite(mag),
        origin_ns=_epoch_ns(events["origin_time"]),
        fused_ns=_epoch_ns(events["fused_at"]),
        unc=se if uncertainty == "se" else half,
        unc_level=(
            np.full(mag.shape, SE_CONFIDENCE_PERCENT) if uncertainty == "se" else 100 * level
        ),
        n_st=events["n_stations"].to_numpy(dtype=np.int64),
        text={
            c: events[c].astype(object).where(events[c].notna(), "").astype(str).to_numpy()
            for c in ("magnitude_type", "method", "flags", "model_version", "evaluation_status")
        },
        run_ids=(
            events["run_id"]
            .astype(object)
            .where(events["run_id"].notna(), "")
            .astype(str)
            .to_numpy()
        ),
        lat=lat,
        lon=lon,
        dep=dep,
        has_origin=np.isfinite(lat) & np.isfinite(lon),
    )


def _row_columns(
    contributions: pd.DataFrame, ev_ids: NDArray[Any], readings: pd.DataFrame | None
) -> _RowColumns:
    """Contribution columns as arrays; usable rows grouped by event with one stable sort."""
    c_ev = pd.Index(ev_ids).get_indexer(pd.Index(contributions["event_id"].astype(str)))
    c_mag = contributions["corrected_magnitude"].to_numpy(dtype=float, na_value=np.nan)
    c_det = contributions["detected"].to_numpy(dtype=bool)
    usable = (c_ev >= 0) & c_det & np.isfinite(c_mag)
    c_rows = np.flatnonzero(usable)
    c_rows = c_rows[np.argsort(c_ev[c_rows], kind="stable")]
    c_unit = contributions["unit_id"].astype(object).where(contributions["unit_id"].notna(), "")
    c_flags = contributions["flags"].astype(object).where(contributions["flags"].notna(), "")
    c_chan: np.ndarray | None = None
    if "channel" in contributions.columns:
        col = contributions["channel"].astype(object)
        c_chan = col.where(col.notna(), "").astype(str).to_numpy()
    return _RowColumns(
        rows=c_rows,
        bounds=np.searchsorted(c_ev[c_rows], np.arange(ev_ids.shape[0] + 1)),
        mag=c_mag,
        sid=contributions["station_id"].astype(str).to_numpy(),
        unit=c_unit.astype(str).to_numpy(),
        flags=c_flags.astype(str).to_numpy(),
        raw=contributions["magnitude"].to_numpy(dtype=float, na_value=np.nan),
        corr=contributions["correction"].to_numpy(dtype=float, na_value=np.nan),
        weight=contributions["weight"].to_numpy(dtype=float, na_value=np.nan),
        residual=contributions["residual"].to_numpy(dtype=float, na_value=np.nan),
        chan=c_chan,
        channels=_channels(readings),
    )


def _event_object(ec: _EventColumns, rc: _RowColumns, j: int) -> tuple[Any, int]:
    """One QuakeML event: origin (or a comment with the origin time), the network magnitude
    and its station magnitudes; returns the event and its number of station magnitudes."""
    from obspy import UTCDateTime
    from obspy.core.event import (
        Comment,
        CreationInfo,
        Event,
        Magnitude,
        Origin,
        QuantityError,
        ResourceIdentifier,
    )

    ev_ids = ec.ev_ids
    key = _escape(ev_ids[j])
    mtype = ec.text["magnitude_type"][j]
    run = _escape(str(ec.run_ids[j])) or "unstored"
    event = Event(resource_id=ResourceIdentifier(event_resource_id(ev_ids[j])))
    origin_id = None
    if ec.has_origin[j]:
        origin = Origin(
            resource_id=ResourceIdentifier(f"{_PREFIX}/origin/{key}"),
            time=UTCDateTime(ns=int(ec.origin_ns[j])),
            latitude=float(ec.lat[j]),
            longitude=float(ec.lon[j]),
            depth=float(ec.dep[j]) * 1000.0 if np.isfinite(ec.dep[j]) else None,
        )
        event.origins.append(origin)
        event.preferred_origin_id = origin.resource_id
        origin_id = origin.resource_id
    else:
        event.comments.append(
            Comment(
                resource_id=ResourceIdentifier(f"{_PREFIX}/comment/{key}/origin-time"),
                text=(
                    f"origin_time={UTCDateTime(ns=int(ec.origin_ns[j]))}; no location known, "
                    "so no QuakeML origin"
                ),
            )
        )
    mag_id = f"{_PREFIX}/magnitude/{_escape(mtype)}/{key}/{run}"
    errors = QuantityError()
    if np.isfinite(ec.unc[j]):
        errors = QuantityError(
            uncertainty=float(ec.unc[j]), confidence_level=float(ec.unc_level[j])
        )
    version = ec.text["model_version"][j]
    fused_ns = ec.fused_ns[j]
    magnitude = Magnitude(
        resource_id=ResourceIdentifier(mag_id),
        mag=float(ec.mag[j]),
        mag_errors=errors,
        magnitude_type=mtype,
        origin_id=origin_id,
        method_id=ResourceIdentifier(f"{_PREFIX}/method/{_escape(ec.text['method'][j])}"),
        station_count=int(ec.n_st[j]),
        evaluation_mode="automatic",
        evaluation_status=ec.text["evaluation_status"][j] or None,
        creation_info=CreationInfo(
            author="magfuse",
            version=version or None,
            creation_time=None if fused_ns == _NAT else UTCDateTime(ns=int(fused_ns)),
        ),
    )
    magnitude.comments.append(
        Comment(
            resource_id=ResourceIdentifier(f"{mag_id}/comment"),
            text=f"flags={ec.text['flags'][j]}; run_id={ec.run_ids[j]}",
        )
    )
    # stationMagnitude/originID is mandatory: no origin, no station magnitudes
    n_sm = 0
    if origin_id is not None:
        mine = rc.rows[rc.bounds[j] : rc.bounds[j + 1]]
        n_sm = _add_station_magnitudes(
            event,
            magnitude,
            rc,
            mine,
            str(ev_ids[j]),
            f"{_escape(mtype)}/{key}/{run}",
            mtype,
            origin_id,
        )
    event.magnitudes.append(magnitude)
    # the file holds magfuse's magnitudes only: the one per event is its preferred one here
    event.preferred_magnitude_id = magnitude.resource_id
    return event, n_sm


def _add_station_magnitudes(
    event: Any,
    magnitude: Any,
    rc: _RowColumns,
    mine: NDArray[np.int64],
    event_id: str,
    path: str,
    mtype: str,
    origin_id: Any,
) -> int:
    """Station magnitudes of one event and their contributions to ``magnitude``."""
    from obspy.core.event import (
        Comment,
        ResourceIdentifier,
        StationMagnitude,
        StationMagnitudeContribution,
        WaveformStreamID,
    )

    for k, i in enumerate(mine):
        net, sta, locc = _station_parts(rc.sid[i], int(i))
        chan = rc.chan[i] if rc.chan is not None else ""
        chan = chan or rc.channels.get((event_id, rc.sid[i]), "")
        sm_id = f"{_PREFIX}/stationmagnitude/{path}/{k}"
        fields: Mapping[str, str] = {
            "station_correction": _num(rc.corr[i]),
            "magnitude_as_read": _num(rc.raw[i]),
            "unit_id": rc.unit[i],
            "flags": rc.flags[i],
        }
        sm = StationMagnitude(
            resource_id=ResourceIdentifier(sm_id),
            origin_id=origin_id,
            mag=float(rc.mag[i]),
            station_magnitude_type=mtype,
            method_id=ResourceIdentifier(f"{_PREFIX}/method/station-corrected"),
            waveform_id=WaveformStreamID(
                network_code=net,
                station_code=sta,
                location_code=locc,
                channel_code=chan or None,
            ),
            comments=[
                Comment(
                    resource_id=ResourceIdentifier(f"{sm_id}/comment"),
                    text="; ".join(f"{a}={b}" for a, b in fields.items()),
                )
            ],
        )
        event.station_magnitudes.append(sm)
        magnitude.station_magnitude_contributions.append(
            StationMagnitudeContribution(
                station_magnitude_id=sm.resource_id,
                residual=float(rc.residual[i]) if np.isfinite(rc.residual[i]) else None,
                weight=float(rc.weight[i]) if np.isfinite(rc.weight[i]) else None,
            )
        )
    return int(mine.shape[0])


def _flag_notes() -> list[str]:
    """Methods and flags with their meanings (the magnitude export's sidecar paragraphs)."""
    from fusion.export.magnitudes import flag_notes  # imports this module: call time only

    return flag_notes(rows=True)


def write_quakeml(
    events: pd.DataFrame,
    contributions: pd.DataFrame,
    path: Path,
    *,
    readings: pd.DataFrame | None = None,
    uncertainty: Literal["se", "interval"] = "se",
    now: datetime | None = None,
) -> ExportReport:
    """Write fused magnitudes as a QuakeML 1.2 file (atomically) plus its README sidecar.

    Parameters are those of :func:`build_catalog`; ``path`` is the file (its folder must
    exist).

    Returns
    -------
    ExportReport
        ``rows`` counts events written, ``skipped`` events without a magnitude.
    """
    target = check_target(path)
    created = (now or datetime.now(UTC)).astimezone(UTC)
    catalog, summary = build_catalog(
        events, contributions, readings=readings, uncertainty=uncertainty, now=created
    )
    buf = io.BytesIO()
    catalog.write(buf, format="QUAKEML")
    notes: list[str] = []
    if summary.without_magnitude:
        notes.append(
            f"{summary.without_magnitude} events have no fused magnitude (no usable detection) "
            "and are not in the file."
        )
    if summary.without_origin:
        notes.append(
            f"{summary.without_origin} events have no known location: they have no origin and "
            "no station magnitudes (QuakeML requires an origin for both); their origin time is "
            "in an event comment. Pass the station-store rows with event locations."
        )
    mtypes = sorted(set(events["magnitude_type"].astype(str))) if len(events) else []
    level = "68.27 % (1 sigma)" if uncertainty == "se" else "100 x confidence_level"
    text = readme_text(
        title=f"network magnitudes ({', '.join(mtypes) or 'none'}) as QuakeML",
        data_name=target.name,
        fmt=ExportFormat.quakeml,
        rows=summary.events,
        provenance=[
            ("Model versions", ", ".join(summary.model_versions) or "-"),
            ("Station magnitudes", str(summary.station_magnitudes)),
            ("Uncertainty", f"{uncertainty}; confidenceLevel {level}, in percent"),
            ("Exported", f"{stamp(created)} by magfuse {__version__}"),
        ],
        columns=list(QUAKEML_MAPPING),
        columns_header=("QuakeML element", "source: magnitude export column, or in words", "unit"),
        notes=[
            "Station magnitudes are corrected (as read + station correction); the correction "
            "and the value as read are in each station magnitude's comment "
            "(station_correction=...; magnitude_as_read=...; unit_id=...; flags=...). unit_id "
            "is the station unit whose correction was applied: a station epoch, written "
            "NET.STA.LOC, plus @YYYY-MM-DD when the station's bias stepped and a later epoch "
            "began on that date. flags are the station magnitude's flags (see the magnitude "
            "export's sidecar).",
            "The one magnitude of each event is its preferredMagnitudeID within this file; "
            "the magnitude of record stays the publishing authority's.",
            *_flag_notes(),
            *notes,
        ],
    )
    readme = write_readme(target, text)
    write_bytes_atomic(target, buf.getvalue())
    return ExportReport(
        kind="magnitudes",
        format=ExportFormat.quakeml.value,
        path=str(target),
        readme=str(readme),
        rows=summary.events,
        model_versions=summary.model_versions,
        skipped=summary.without_magnitude,
        notes=tuple(notes),
    )
