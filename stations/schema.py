"""Declared Arrow schemas and controlled vocabularies of the station-magnitude store.

One row is one station-level reading for one event and one magnitude type. A cell of the
station-event table is in one of three states (docs/model.md §2.1):

========== ============================================= ==========================================
state      meaning                                       stored as
========== ============================================= ==========================================
detected   the station measured a magnitude              ``detected=True``, ``magnitude`` set;
                                                         ``clipped=True`` marks a lower bound
censored   the station was operating and saw nothing     ``detected=False``, ``magnitude`` null,
                                                         ``noise_threshold`` if known
unavailable down, out of range, no data, analyst skip     no row at all (ignorable)
========== ============================================= ==========================================

Vocabulary follows QuakeML 1.2 / ObsPy where a term exists (``magnitude_type``, ``azimuth``,
``weight``) and FDSN source identifiers for stations: ``station_id`` is ``NET.STA.LOC`` with an
empty location written as ``NET.STA.``; the channel code is a separate, nullable column.

Every table has one ``pa.schema`` constant here with units in field metadata (key ``unit``) and
the schema name and version in the schema's key-value metadata. Writers cast to the schema,
readers check ``pq.read_schema`` against it (:func:`check_schema`).
"""

from __future__ import annotations

import re
from enum import StrEnum
from typing import Final

import pyarrow as pa

from stations.errors import SchemaError

__all__ = [
    "IASPEI_STANDARD_TYPES",
    "INPUT_COLUMNS",
    "MAGNITUDE_TYPE_ALIASES",
    "QUARANTINE_SCHEMA",
    "RECORD_KEY",
    "RECORD_SCHEMA",
    "REPORTED_TYPES",
    "SCHEMA_VERSION",
    "VALUE_COLUMNS",
    "AmplitudeUnit",
    "MagnitudeType",
    "accepted_types_text",
    "canonical_event_ids",
    "check_schema",
    "normalise_magnitude_type",
    "normalise_station_id",
]

SCHEMA_VERSION: Final = "1"


class MagnitudeType(StrEnum):
    """Magnitude types magfuse accepts, with the trade's case distinctions kept.

    ``mb`` (short-period body wave) and ``mB``/``mB_BB`` (broadband body wave) are different
    scales, as are ``Ms``, ``Ms_20`` and ``Ms_BB``. Names follow the IASPEI standard
    (IASPEI 2013 recommendations; Bormann & Dewey 2014, NMSOP-2 IS 3.3) where it names the scale.
    """

    ML = "ML"
    MLv = "MLv"
    mb = "mb"
    mB = "mB"
    mB_BB = "mB_BB"
    mb_Lg = "mb_Lg"
    Ms = "Ms"
    Ms_20 = "Ms_20"
    Ms_BB = "Ms_BB"
    Md = "Md"
    Mc = "Mc"
    Mw = "Mw"
    Mwp = "Mwp"
    Me = "Me"


#: The IASPEI standard magnitude names (IASPEI 2013, Summary of Magnitude Working Group
#: recommendations on standard procedures for determining earthquake magnitudes from digital
#: data; Bormann & Dewey 2014, NMSOP-2 IS 3.3). ``--compute`` computes ML, mb, mB_BB, Ms_20
#: and Ms_BB from amplitudes (stations/formulas).
IASPEI_STANDARD_TYPES: Final[tuple[MagnitudeType, ...]] = (
    MagnitudeType.ML,
    MagnitudeType.mb,
    MagnitudeType.mB_BB,
    MagnitudeType.Ms_20,
    MagnitudeType.Ms_BB,
    MagnitudeType.mb_Lg,
    MagnitudeType.Mw,
)
#: Other names bulletins carry: accepted and kept as reported (magfuse computes none of them).
REPORTED_TYPES: Final[tuple[MagnitudeType, ...]] = tuple(
    m for m in MagnitudeType if m not in IASPEI_STANDARD_TYPES
)


def accepted_types_text() -> str:
    """The accepted magnitude types in words, IASPEI standard names first.

    >>> accepted_types_text().startswith("ML, mb, mB_BB, Ms_20, Ms_BB, mb_Lg, Mw (IASPEI")
    True
    """
    standard = ", ".join(m.value for m in IASPEI_STANDARD_TYPES)
    reported = ", ".join(m.value for m in REPORTED_TYPES)
    return f"{standard} (IASPEI standard names) or {reported} (other names, accepted as reported)"


#: Spellings met in bulletins that map to one canonical type without ambiguity. ``MB`` is left
#: out on purpose: it is used for both mb and mB, so a row carrying it is quarantined.
MAGNITUDE_TYPE_ALIASES: Final[dict[str, MagnitudeType]] = {
    "MS": MagnitudeType.Ms,
    "Mb": MagnitudeType.mb,
    "MD": MagnitudeType.Md,
    "MC": MagnitudeType.Mc,
    "MW": MagnitudeType.Mw,
    "MWP": MagnitudeType.Mwp,
    "MLV": MagnitudeType.MLv,
    "ME": MagnitudeType.Me,
    "mB_bb": MagnitudeType.mB_BB,
    "MS_20": MagnitudeType.Ms_20,
    "MS_BB": MagnitudeType.Ms_BB,
    "mb_lg": MagnitudeType.mb_Lg,
    "mbLg": MagnitudeType.mb_Lg,
    "MbLg": MagnitudeType.mb_Lg,
}


def normalise_magnitude_type(text: str) -> MagnitudeType:
    """Return the canonical :class:`MagnitudeType` for ``text``.

    Raises
    ------
    ValueError
        If ``text`` is neither a canonical name nor an unambiguous alias; the message lists the
        accepted names.
    """
    stripped = text.strip()
    try:
        return MagnitudeType(stripped)
    except ValueError:
        pass
    if stripped in MAGNITUDE_TYPE_ALIASES:
        return MAGNITUDE_TYPE_ALIASES[stripped]
    raise ValueError(f"unknown magnitude type {text!r}; use one of {accepted_types_text()}")


class AmplitudeUnit(StrEnum):
    """Units an amplitude reading may carry; the unit travels with the value.

    ``mm_wa`` is millimetres of trace on a Wood-Anderson seismogram of static magnification
    2080 (IASPEI standard; Uhrhammer & Collins 1990); ``nm`` is ground displacement (or
    Wood-Anderson-simulated displacement with magnification 1) in nanometres.
    """

    nm = "nm"
    um = "um"
    mm_wa = "mm_wa"
    nm_per_s = "nm/s"
    um_per_s = "um/s"


_STATION_ID = re.compile(r"^([A-Z0-9]{1,8})\.([A-Z0-9]{1,8})\.([A-Z0-9]{0,2}|--)$")


def normalise_station_id(network: str, station: str, location: str | None = None) -> str:
    """Build the FDSN ``NET.STA.LOC`` identifier; an empty or ``--`` location becomes ``''``.

    Raises
    ------
    ValueError
        If a code is empty or holds characters outside ``A-Z0-9`` (FDSN source identifier
        specification, v1.0).
    """
    loc = (location or "").strip().upper()
    if loc == "--":
        loc = ""
    text = f"{network.strip().upper()}.{station.strip().upper()}.{loc}"
    if not _STATION_ID.match(text):
        raise ValueError(
            f"station code {text!r} is not an FDSN NET.STA.LOC identifier "
            "(network 1-8 and station 1-8 characters A-Z 0-9, location 0-2)"
        )
    return text


#: The event-id rule: a resource id (``scheme:...``, as QuakeML's ``smi:`` and ``quakeml:``)
#: keeps its last non-empty ``/``-separated segment; other ids are kept whole.
_EVENT_ID_TAIL: Final = r"^[A-Za-z][A-Za-z0-9+.\-]*:(?:.*/)?([^/]+?)/*$"


def canonical_event_ids(values: pa.Array | pa.ChunkedArray) -> pa.Array:
    """The event id magfuse stores, from any format's event identifier (vectorized).

    **One rule for every format:** surrounding white space is dropped, and an identifier
    that is a resource id (it starts with a URI scheme such as ``smi:`` or ``quakeml:``, as
    QuakeML 1.2 requires of a publicID) keeps only its last non-empty ``/``-separated
    segment. So QuakeML's ``smi:magfuse.invalid/demo2025/event/qv2025-02198``, the CSV's
    ``qv2025-02198`` and an IMS1.0 bulletin's ``smi:local/<uuid>/event/qv2025-02198`` (as
    ObsPy builds it) are one event, ``qv2025-02198``. Any other id, also one with ``/`` such
    as ``2025/123``, is kept whole.
    Ids of different agencies that share a last segment would become one id; the
    near-duplicate guard of the store (``stations.store.duplicates``) reports events that
    coincide under different ids, not this case.

    Parameters
    ----------
    values : pyarrow string array
        Event identifiers as the reader found them (nulls stay null).

    Returns
    -------
    pyarrow.Array of string

    Examples
    --------
    >>> canonical_event_ids(pa.array([
    ...     "smi:magfuse.invalid/demo2025/event/qv2025-02198", " qv2025-02198 ",
    ...     "quakeml:us.anss.org/event/20120101052755.98", "2025/123", None])).to_pylist()
    ['qv2025-02198', 'qv2025-02198', '20120101052755.98', '2025/123', None]
    """
    import pyarrow.compute as pc

    arr = values.combine_chunks() if isinstance(values, pa.ChunkedArray) else values
    arr = pc.utf8_trim_whitespace(arr.cast(pa.string()))
    return pc.replace_substring_regex(arr, pattern=_EVENT_ID_TAIL, replacement=r"\1")


def _field(
    name: str, typ: pa.DataType, *, nullable: bool, unit: str | None = None, doc: str = ""
) -> pa.Field:
    meta = {"doc": doc}
    if unit is not None:
        meta["unit"] = unit
    return pa.field(name, typ, nullable=nullable, metadata=meta)


_UTC = pa.timestamp("us", tz="UTC")

RECORD_SCHEMA: Final = pa.schema(
    [
        _field("event_id", pa.string(), nullable=False, doc="event identifier of the source"),
        _field("origin_time", _UTC, nullable=False, unit="UTC", doc="event origin time"),
        _field("event_latitude", pa.float64(), nullable=True, unit="deg", doc="WGS84"),
        _field("event_longitude", pa.float64(), nullable=True, unit="deg", doc="WGS84"),
        _field("event_depth", pa.float64(), nullable=True, unit="km", doc="below sea level"),
        _field("station_id", pa.string(), nullable=False, doc="FDSN NET.STA.LOC"),
        _field("channel", pa.string(), nullable=True, doc="SEED channel code, e.g. HHZ"),
        _field("magnitude_type", pa.string(), nullable=False, doc="MagnitudeType value"),
        _field(
            "magnitude",
            pa.float64(),
            nullable=True,
            unit="magnitude units",
            doc="station magnitude; null for a non-detection",
        ),
        _field("detected", pa.bool_(), nullable=False, doc="false: operating, no detection"),
        _field(
            "clipped",
            pa.bool_(),
            nullable=False,
            doc="true: record clipped, magnitude is a lower bound",
        ),
        _field(
            "noise_threshold",
            pa.float64(),
            nullable=True,
            unit="magnitude units",
            doc="pre-event noise amplitude through the same magnitude formula",
        ),
        _field(
            "amplitude",
            pa.float64(),
            nullable=True,
            unit="see amplitude_unit",
            doc="zero-to-peak amplitude of the reading",
        ),
        _field("amplitude_unit", pa.string(), nullable=True, doc="AmplitudeUnit value"),
        _field("period", pa.float64(), nullable=True, unit="s", doc="period of the reading"),
        _field("distance_km", pa.float64(), nullable=True, unit="km", doc="epicentral"),
        _field("distance_deg", pa.float64(), nullable=True, unit="deg", doc="epicentral"),
        _field("hypocentral_distance_km", pa.float64(), nullable=True, unit="km", doc=""),
        _field(
            "azimuth",
            pa.float64(),
            nullable=True,
            unit="deg",
            doc="event-to-station, clockwise from north",
        ),
        _field(
            "source_weight",
            pa.float64(),
            nullable=True,
            unit="1",
            doc="the source network's own contribution weight",
        ),
        _field(
            "formula",
            pa.string(),
            nullable=True,
            doc="formula and table that computed magnitude from amplitude, if magfuse did",
        ),
        _field("source_file", pa.string(), nullable=False, doc="file the row was read from"),
        _field(
            "source_location",
            pa.string(),
            nullable=False,
            doc="position in the source file, e.g. 'line 12'",
        ),
        _field("batch_id", pa.string(), nullable=False, doc="ingest batch"),
        _field("ingest_time", _UTC, nullable=False, unit="UTC", doc=""),
        _field(
            "revision",
            pa.int32(),
            nullable=False,
            unit="1",
            doc="1 for the first value of a key, +1 for each changed value",
        ),
    ],
    metadata={"magfuse.schema": "station_magnitude", "magfuse.schema_version": SCHEMA_VERSION},
)

#: The identity of a reading: a changed value for the same key is a new revision.
RECORD_KEY: Final = ("event_id", "station_id", "channel", "magnitude_type")

#: Columns the store adds; readers supply all the others.
_STORE_COLUMNS: Final = ("batch_id", "ingest_time", "revision")
INPUT_COLUMNS: Final = tuple(n for n in RECORD_SCHEMA.names if n not in _STORE_COLUMNS)

#: Columns whose content decides whether a re-ingested row is a duplicate or a new revision.
VALUE_COLUMNS: Final = tuple(
    n for n in INPUT_COLUMNS if n not in (*RECORD_KEY, "source_file", "source_location")
)

QUARANTINE_SCHEMA: Final = pa.schema(
    [
        _field("source_file", pa.string(), nullable=False, doc=""),
        _field("source_location", pa.string(), nullable=False, doc="e.g. 'line 12'"),
        _field("reason", pa.string(), nullable=False, doc="why the row was rejected, and the fix"),
        _field("raw", pa.string(), nullable=False, doc="the row as read, JSON"),
        _field("batch_id", pa.string(), nullable=False, doc=""),
        _field("ingest_time", _UTC, nullable=False, unit="UTC", doc=""),
    ],
    metadata={"magfuse.schema": "quarantine", "magfuse.schema_version": SCHEMA_VERSION},
)


def check_schema(found: pa.Schema, expected: pa.Schema, *, where: str) -> None:
    """Raise :class:`SchemaError` naming the first missing or mistyped column.

    ``where`` names the file or table in the message. Extra columns are allowed; nullability
    is not compared (Parquet round trips do not keep it reliably).
    """
    for field in expected:
        idx = found.get_field_index(field.name)
        if idx < 0:
            raise SchemaError(f"{where}: column {field.name!r} is missing; expected {field.type}")
        got = found.field(idx).type
        if not got.equals(field.type):
            raise SchemaError(
                f"{where}: column {field.name!r} has type {got}, expected {field.type}"
            )
