"""Row validation shared by every reader: one vectorized pass splits rows into records and rejects.

A reader turns its file into a *candidate* frame (one row per station magnitude, the columns
below, values already converted to numbers and times) and calls :func:`validate_records`. Rows
that pass become records in the column order and types of :data:`INPUT_SCHEMA` (the columns of
:data:`stations.schema.RECORD_SCHEMA` that a reader supplies); every other row goes to the
rejected table with its source location and one sentence that says what is wrong and how to fix
it. Conflicts between rows of the same key are the store's business, not this module's.

Candidate columns
-----------------
=========================== ============================= =======================================
column                      type                          missing means
=========================== ============================= =======================================
event_id                    str                           reject: "event id missing"
origin_time                 datetime64, UTC (or naive UTC) reject: missing or unparseable time
event_latitude, _longitude  float64, deg                  unknown (NaN)
event_depth                 float64, km below sea level   unknown
station_id                  str ``NET.STA.LOC``           -- give either this ...
network, station, location  str                           ... or these three (location optional)
channel                     str, SEED code (1-3 chars)    unknown
magnitude_type              str, any spelling accepted by reject: type missing
                            :func:`~stations.schema.normalise_magnitude_type`
magnitude                   float64                       required for a detection
detected                    bool                          True
clipped                     bool                          False
noise_threshold             float64, magnitude units      unknown
amplitude                   float64, see amplitude_unit   unknown
amplitude_unit              str, :class:`~stations.schema.AmplitudeUnit` value
period                      float64, s                    unknown
distance_km                 float64, km, epicentral       unknown
distance_deg                float64, deg, epicentral      unknown
hypocentral_distance_km     float64, km                   unknown
azimuth                     float64, deg from north       unknown
source_weight               float64, >= 0                 unknown
formula                     str                           none (magfuse did not compute it)
source_location             str, e.g. ``"line 12"``       required
problems                    str, reader's own parse notes none ("")
=========================== ============================= =======================================

Rules (each failing rule adds one sentence to the row's ``reason``)
------------------------------------------------------------------
* the event id follows one rule for every format (:func:`stations.schema.canonical_event_ids`:
  the last ``/``-separated segment of a resource id, so QuakeML's
  ``smi:.../event/qv2025-02198`` and the CSV's ``qv2025-02198`` are one event);
* event id, origin time, station code and magnitude type present; network code present;
* the station id passes :func:`stations.schema.normalise_station_id` (FDSN source identifier
  specification v1.0 character set) and the channel is 1-3 characters ``A-Z 0-9``;
* the magnitude type is canonical or an unambiguous alias (``MB`` is ambiguous and rejected);
* a detection has a finite magnitude within ``magnitude_range`` (default [-3, 10], the
  ``[ingest]`` section of the configuration); a non-detection has *no* magnitude and is not
  clipped; a noise threshold, when given, lies within the same range;
* an amplitude carries a unit from :class:`~stations.schema.AmplitudeUnit` and is > 0; a unit
  without an amplitude is an error too;
* ranges: latitude [-90, 90], longitude [-180, 180], depth below 800 km (no earthquake is known
  deeper than about 700 km: common practice, no source; a larger value is almost always a depth
  in metres), distances >= 0, distance_deg <= 180, azimuth [0, 360], period > 0, source weight
  >= 0; an infinite value is never accepted;
* the origin time lies between :data:`EARLIEST_ORIGIN` (1900) and one day after now (UTC).

The loop runs over rules (about twenty), never over rows: numbers are numpy masks, text goes
through ``pyarrow.compute`` kernels, and station ids, magnitude types and units are checked once
per distinct value (``dictionary_encode``). Reason sentences that quote a value are formatted
for the rejected rows only, so a file of millions of rows costs a few array passes.
"""

from __future__ import annotations

from collections.abc import Callable, Sequence
from dataclasses import dataclass
from datetime import UTC, datetime
from typing import Any, Final

import numpy as np
import pandas as pd
import pyarrow as pa
import pyarrow.compute as pc
from numpy.typing import NDArray

from stations import strict_json
from stations.errors import ConfigError
from stations.schema import (
    INPUT_COLUMNS,
    RECORD_SCHEMA,
    AmplitudeUnit,
    canonical_event_ids,
    normalise_magnitude_type,
    normalise_station_id,
)

__all__ = [
    "DEFAULT_MAGNITUDE_RANGE",
    "INPUT_SCHEMA",
    "REJECTED_COLUMNS",
    "REJECTED_SCHEMA",
    "RawRows",
    "Reasons",
    "check_magnitude_range",
    "empty_records",
    "empty_rejected",
    "json_rows",
    "rejected_frame",
    "validate_records",
]

#: Accepted station magnitudes, magnitude units; mirrors ``[ingest] magnitude_min/max``.
DEFAULT_MAGNITUDE_RANGE: Final = (-3.0, 10.0)

#: Arrow schema of the records a reader returns: the reader-supplied columns of RECORD_SCHEMA.
INPUT_SCHEMA: Final = pa.schema(
    [RECORD_SCHEMA.field(name) for name in INPUT_COLUMNS], metadata=RECORD_SCHEMA.metadata
)

REJECTED_COLUMNS: Final = ("source_file", "source_location", "reason", "raw")
REJECTED_SCHEMA: Final = pa.schema(
    [pa.field(name, pa.string(), nullable=False) for name in REJECTED_COLUMNS]
)

#: The raw rows of a candidate frame: JSON strings aligned with it, or a function that returns
#: the JSON text of the rows at the given positions (so large files serialise only rejects).
RawRows = Sequence[str] | pd.Series | Callable[[NDArray[np.int64]], Sequence[str]]

_MAX_DEPTH_KM: Final = 800.0
_CHANNEL_PATTERN: Final = r"^[A-Z0-9]{1,3}$"
_UNITS: Final = {u.value: u.value for u in AmplitudeUnit}
_FLOAT_COLUMNS: Final = (
    "event_latitude",
    "event_longitude",
    "event_depth",
    "magnitude",
    "noise_threshold",
    "amplitude",
    "period",
    "distance_km",
    "distance_deg",
    "hypocentral_distance_km",
    "azimuth",
    "source_weight",
)


def check_magnitude_range(magnitude_range: tuple[float, float]) -> tuple[float, float]:
    """Return ``(low, high)`` as floats after checking ``low < high``, both finite.

    Raises
    ------
    ConfigError
        If the range is not two finite numbers in increasing order.
    """
    try:
        low, high = (float(v) for v in magnitude_range)
    except (TypeError, ValueError):
        raise ConfigError(
            f"magnitude_range {magnitude_range!r} must be two numbers (low, high); "
            "set [ingest] magnitude_min and magnitude_max"
        ) from None
    if not (np.isfinite(low) and np.isfinite(high) and low < high):
        raise ConfigError(
            f"magnitude_range ({low}, {high}) must be finite with low < high; "
            "fix [ingest] magnitude_min and magnitude_max"
        )
    return low, high


class Reasons:
    """Per-row reason text, built one rule at a time (only flagged rows are touched).

    ``add(mask, message)`` appends ``message`` (a string, or an array aligned with the rows) to
    the flagged rows, separated by ``"; "``; ``ok`` is True where no rule fired. Readers use it
    for their own parse problems and hand ``text`` to :func:`validate_records` as the
    ``problems`` column.
    """

    def __init__(self, n: int) -> None:
        self.text: NDArray[np.object_] = np.full(n, "", dtype=object)

    def add(self, mask: Any, message: str | NDArray[Any] | pd.Series) -> None:
        """Append ``message`` (one string, or an array aligned with the rows) where ``mask``."""
        flagged = np.asarray(mask, dtype=bool)
        if not flagged.any():
            return
        idx = np.flatnonzero(flagged)
        if isinstance(message, str):
            self._append(idx, message)
        else:
            self._append(idx, np.asarray(message, dtype=object)[idx])

    def add_each(
        self, mask: Any, values: Any, template: str, fmt: Callable[[Any], str] = repr
    ) -> None:
        """Append ``template.format(fmt(value))`` where ``mask``; formats flagged rows only."""
        flagged = np.asarray(mask, dtype=bool)
        if not flagged.any():
            return
        idx = np.flatnonzero(flagged)
        if isinstance(values, (pa.Array, pa.ChunkedArray)):
            picked: Any = values.take(pa.array(idx)).to_pylist()
        else:
            picked = np.asarray(values, dtype=object)[idx]
        self._append(idx, np.array([template.format(fmt(v)) for v in picked], dtype=object))

    def _append(self, idx: NDArray[np.int64], new: Any) -> None:
        current = self.text[idx]
        self.text[idx] = np.where(current == "", new, current + "; " + new)

    @property
    def ok(self) -> NDArray[np.bool_]:
        return np.asarray(self.text == "", dtype=bool)


def _text(frame: pd.DataFrame, name: str, n: int) -> pa.Array:
    """Column ``name`` as an Arrow string array, whitespace-trimmed, ``""`` for missing.

    String columns (pandas' Arrow-backed ``str`` dtype, or object holding ``str``/``None``)
    convert without a Python loop; anything else goes through ``astype(str)``.
    """
    if name not in frame:
        return pa.array(np.full(n, "", dtype=object), type=pa.string())
    col = frame[name]
    try:
        arr: Any = pa.array(col, type=pa.string(), from_pandas=True)
    except (pa.ArrowInvalid, pa.ArrowTypeError):
        obj = col.astype(object)
        arr = pa.array(obj.where(obj.notna(), "").astype(str), type=pa.string())
    if isinstance(arr, pa.ChunkedArray):
        arr = arr.combine_chunks()
    return pc.utf8_trim_whitespace(pc.fill_null(arr, ""))


def _mask(arr: Any) -> NDArray[np.bool_]:
    """A boolean Arrow array (nulls as False) as a numpy mask."""
    return np.asarray(pc.fill_null(arr, False).to_numpy(zero_copy_only=False), dtype=bool)


def _empty(arr: pa.Array) -> NDArray[np.bool_]:
    return _mask(pc.equal(arr, ""))


def _null_if_empty(arr: pa.Array) -> pa.Array:
    return pc.if_else(pc.equal(arr, ""), pa.scalar(None, pa.string()), arr)


def _float(frame: pd.DataFrame, name: str, n: int) -> NDArray[np.float64]:
    if name not in frame:
        return np.full(n, np.nan)
    return pd.to_numeric(frame[name], errors="coerce").to_numpy(dtype=np.float64, na_value=np.nan)


def _bool(frame: pd.DataFrame, name: str, n: int, default: bool) -> NDArray[np.bool_]:
    if name not in frame:
        return np.full(n, default, dtype=bool)
    col = frame[name]
    if col.dtype == bool:
        return col.to_numpy(dtype=bool)
    return col.astype(object).where(col.notna(), default).to_numpy(dtype=bool)


#: Earliest origin time accepted (UTC): instrumental station magnitudes begin in the 20th
#: century (common practice, no source); an earlier date is almost always a typing error.
EARLIEST_ORIGIN: Final = "1900-01-01T00:00:00"


def plausible_origin_range() -> tuple[np.datetime64, np.datetime64]:
    """Accepted origin times: from :data:`EARLIEST_ORIGIN` to one day after now (UTC).

    A day of slack allows for clocks and time zones that are a little off; a later origin
    time (e.g. the year 9999) is a typing error, not a future event.
    """
    now = np.datetime64(datetime.now(UTC).replace(tzinfo=None), "us")
    return np.datetime64(EARLIEST_ORIGIN, "us"), now + np.timedelta64(1, "D")


def _utc_times(frame: pd.DataFrame, n: int) -> NDArray[np.datetime64]:
    """Origin times as naive ``datetime64[us]`` holding UTC; NaT where missing."""
    if "origin_time" not in frame:
        return np.full(n, np.datetime64("NaT"), dtype="datetime64[us]")
    col = frame["origin_time"]
    if not pd.api.types.is_datetime64_any_dtype(col.dtype):
        col = pd.to_datetime(col, utc=True, format="ISO8601", errors="coerce")
    if getattr(col.dtype, "tz", None) is not None:
        col = col.dt.tz_convert("UTC").dt.tz_localize(None)
    return col.to_numpy(dtype="datetime64[us]")


@dataclass(frozen=True, slots=True)
class _Lookup:
    """A check applied once per distinct value: results and errors per row by code."""

    result: pa.Array  # canonical value per row, null where the check failed
    codes: NDArray[np.intp]
    errors: NDArray[np.object_]  # one per distinct value, "" when it passed

    @property
    def failed(self) -> NDArray[np.bool_]:
        return np.asarray(self.errors != "", dtype=bool)[self.codes]

    def error_per_row(self) -> NDArray[np.object_]:
        return self.errors[self.codes]


def _lookup_unique(values: pa.Array, check: Callable[[str], str]) -> _Lookup:
    """Apply ``check`` to each distinct value (a ``ValueError`` marks it as failed)."""
    encoded = pc.dictionary_encode(values)
    uniques = encoded.dictionary.to_pylist()
    codes = np.asarray(encoded.indices.to_numpy(zero_copy_only=False), dtype=np.intp)
    result: list[str | None] = []
    errors = np.full(len(uniques), "", dtype=object)
    for k, value in enumerate(uniques):  # distinct spellings, not rows
        try:
            result.append(check(str(value)))
        except ValueError as exc:
            result.append(None)
            errors[k] = str(exc)
    mapped = pa.array(result, type=pa.string()).take(pa.array(codes))
    return _Lookup(mapped, codes, errors)


def _num(value: Any) -> str:
    return f"{float(value):g}"


def _split_station_id(text: str) -> str:
    parts = text.split(".")
    if len(parts) != 3:
        raise ValueError(
            f"station id {text!r} is not NET.STA.LOC (two dots; an empty location is written "
            "'NET.STA.')"
        )
    return normalise_station_id(*parts)


def _station_ids(frame: pd.DataFrame, n: int, reasons: Reasons) -> pa.Array:
    if "station_id" in frame and "station" not in frame:
        sid = _text(frame, "station_id", n)
        missing = _empty(sid)
        reasons.add(
            missing, "station id missing; give NET.STA.LOC (an empty location as 'NET.STA.')"
        )
        checked = ~missing
        lookup = _lookup_unique(sid, _split_station_id)
    else:
        net, sta, loc = (_text(frame, c, n) for c in ("network", "station", "location"))
        no_sta, no_net = _empty(sta), _empty(net)
        reasons.add(no_sta, "station code missing; fill the station column")
        reasons.add(
            no_net & ~no_sta, "network code missing; fill the network column (FDSN network code)"
        )
        checked = ~no_sta & ~no_net
        key = pc.binary_join_element_wise(net, sta, loc, "\x1f")
        lookup = _lookup_unique(key, lambda k: normalise_station_id(*k.split("\x1f")))
    bad = checked & lookup.failed
    reasons.add_each(bad, lookup.error_per_row(), "{}; correct the code", str)
    return pc.if_else(pa.array(checked & ~bad), lookup.result, pa.scalar(None, pa.string()))


def _magnitude_types(frame: pd.DataFrame, n: int, reasons: Reasons) -> pa.Array:
    raw = _text(frame, "magnitude_type", n)
    missing = _empty(raw)
    reasons.add(missing, "magnitude type missing; give one, e.g. ML or mb")
    lookup = _lookup_unique(raw, lambda t: normalise_magnitude_type(t).value)
    bad = ~missing & lookup.failed
    reasons.add_each(bad, lookup.error_per_row(), "{}", str)
    return pc.if_else(pa.array(~missing & ~bad), lookup.result, pa.scalar(None, pa.string()))


def _unit(text: str) -> str:
    unit = _UNITS.get(text.lower())
    if unit is None:
        raise ValueError(text)
    return unit


def _units(
    frame: pd.DataFrame, n: int, amplitude: NDArray[np.float64], reasons: Reasons
) -> pa.Array:
    raw = _text(frame, "amplitude_unit", n)
    given = ~_empty(raw)
    lookup = _lookup_unique(raw, _unit)
    unknown = given & lookup.failed
    allowed = ", ".join(_UNITS)
    reasons.add_each(unknown, raw, "amplitude unit {} is unknown; use one of " + allowed)
    has_amp = ~np.isnan(amplitude)
    reasons.add(has_amp & ~given, f"amplitude given without amplitude_unit; add one of {allowed}")
    reasons.add(
        given & ~has_amp,
        "amplitude_unit given without an amplitude; fill the amplitude or clear the unit",
    )
    return pc.if_else(pa.array(given & ~unknown), lookup.result, pa.scalar(None, pa.string()))


def _range_rule(
    reasons: Reasons,
    values: NDArray[np.float64],
    name: str,
    bad: NDArray[np.bool_],
    expectation: str,
) -> None:
    reasons.add_each(bad, values, name + " {} is out of range; " + expectation, _num)


def _numeric_rules(cols: dict[str, NDArray[np.float64]], reasons: Reasons) -> None:
    for name, values in cols.items():
        if name == "magnitude":
            continue  # its own rules
        reasons.add(np.isinf(values), f"{name} is infinite; give a finite number or leave it empty")
    with np.errstate(invalid="ignore"):
        lat, lon, dep = cols["event_latitude"], cols["event_longitude"], cols["event_depth"]
        _range_rule(reasons, lat, "event_latitude", np.abs(lat) > 90, "use degrees in [-90, 90]")
        _range_rule(
            reasons, lon, "event_longitude", np.abs(lon) > 180, "use degrees in [-180, 180]"
        )
        _range_rule(
            reasons,
            dep,
            "event_depth",
            np.isfinite(dep) & (dep > _MAX_DEPTH_KM),
            f"give the depth in km (below {_MAX_DEPTH_KM:g} km), not in metres",
        )
        for name in ("distance_km", "hypocentral_distance_km"):
            v = cols[name]
            _range_rule(reasons, v, name, v < 0, "give a distance >= 0 km")
        deg = cols["distance_deg"]
        _range_rule(
            reasons, deg, "distance_deg", (deg < 0) | (deg > 180), "give degrees in [0, 180]"
        )
        az = cols["azimuth"]
        _range_rule(reasons, az, "azimuth", (az < 0) | (az > 360), "give degrees in [0, 360]")
        per = cols["period"]
        _range_rule(reasons, per, "period", per <= 0, "give a period > 0 s")
        amp = cols["amplitude"]
        _range_rule(reasons, amp, "amplitude", amp <= 0, "give a zero-to-peak amplitude > 0")
        w = cols["source_weight"]
        _range_rule(reasons, w, "source_weight", w < 0, "give a weight >= 0")


def _magnitude_rules(
    cols: dict[str, NDArray[np.float64]],
    detected: NDArray[np.bool_],
    clipped: NDArray[np.bool_],
    low: float,
    high: float,
    reasons: Reasons,
) -> None:
    mag = cols["magnitude"]
    has_mag = ~np.isnan(mag)
    span = f"[{low:g}, {high:g}]"
    # A detection with an amplitude but no magnitude is kept: the ingest step computes its
    # magnitude (``magfuse ingest --compute``) or quarantines it (stations.ingest).
    reasons.add(
        detected & ~has_mag & np.isnan(cols["amplitude"]),
        "detection without a magnitude or an amplitude; give the magnitude (or the amplitude "
        "with --compute), or mark the row detected=false if the station saw nothing",
    )
    with np.errstate(invalid="ignore"):
        out = detected & has_mag & ((mag < low) | (mag > high))
    reasons.add_each(
        out,
        mag,
        "magnitude {} is outside the accepted range " + span + "; correct it or widen "
        "[ingest] magnitude_min/magnitude_max",
        _num,
    )
    reasons.add(
        ~detected & has_mag,
        "non-detection with a magnitude; clear the magnitude (put the noise level in "
        "noise_threshold) or mark the row detected=true",
    )
    reasons.add(
        ~detected & clipped,
        "non-detection marked clipped; clipping applies to detections only",
    )
    thr = cols["noise_threshold"]
    with np.errstate(invalid="ignore"):
        thr_out = np.isfinite(thr) & ((thr < low) | (thr > high))
    reasons.add_each(
        thr_out,
        thr,
        "noise_threshold {} is outside the accepted range " + span + "; give it in magnitude units",
        _num,
    )


def _raw_json(raw: RawRows, idx: NDArray[np.int64]) -> list[str]:
    if callable(raw):
        return [str(t) for t in raw(idx)]
    values = raw.to_numpy(dtype=object) if isinstance(raw, pd.Series) else np.asarray(raw, object)
    return [str(t) for t in values[idx]]


def _table_frame(columns: dict[str, Any], schema: pa.Schema) -> pd.DataFrame:
    """Build a pandas frame through Arrow so dtypes equal those of a Parquet read-back."""
    arrays = [
        values.cast(f.type)
        if isinstance(values, pa.Array)
        else pa.array(values, type=f.type, from_pandas=True)
        for f in schema
        for values in (columns[f.name],)
    ]
    return pa.Table.from_arrays(arrays, schema=schema).to_pandas()


def empty_records() -> pd.DataFrame:
    """A zero-row record frame with the columns and dtypes of :data:`INPUT_SCHEMA`."""
    return INPUT_SCHEMA.empty_table().to_pandas()


def empty_rejected() -> pd.DataFrame:
    """A zero-row rejected frame (columns :data:`REJECTED_COLUMNS`, all text)."""
    return REJECTED_SCHEMA.empty_table().to_pandas()


def rejected_frame(
    source_file: str, locations: Sequence[str], reasons: Sequence[str], raw: Sequence[str]
) -> pd.DataFrame:
    """Assemble a rejected frame from aligned sequences (for rows a reader could not parse)."""
    n = len(locations)
    return _table_frame(
        {
            "source_file": [source_file] * n,
            "source_location": list(locations),
            "reason": list(reasons),
            "raw": list(raw),
        },
        REJECTED_SCHEMA,
    )


def validate_records(
    candidates: pd.DataFrame,
    *,
    source_file: str,
    raw: RawRows,
    magnitude_range: tuple[float, float] = DEFAULT_MAGNITUDE_RANGE,
) -> tuple[pd.DataFrame, pd.DataFrame]:
    """Split candidate rows into validated records and rejected rows.

    Parameters
    ----------
    candidates : DataFrame
        One row per station magnitude with the candidate columns of the module docstring.
    source_file : str
        The path as given by the caller; copied into both outputs.
    raw : sequence of str, Series, or callable
        The rows as read, JSON text, aligned with ``candidates``; or a function returning the
        JSON text of the rows at given positions (called for rejected rows only).
    magnitude_range : (float, float), default=(-3.0, 10.0)
        Accepted station magnitudes (and noise thresholds), magnitude units, inclusive.

    Returns
    -------
    records : DataFrame
        Rows that passed, columns :data:`stations.schema.INPUT_COLUMNS` in order, dtypes of
        :data:`INPUT_SCHEMA` as pandas reads them from Arrow (``origin_time``
        ``datetime64[us, UTC]``; floats ``float64``; ``detected``/``clipped`` ``bool``; text
        columns pandas' default string dtype, missing as NaN). Station ids, magnitude types and
        amplitude units are in canonical form; the input order is kept.
    rejected : DataFrame
        Columns ``source_file, source_location, reason, raw``; ``reason`` holds one sentence per
        failed rule, joined with ``"; "``.

    Raises
    ------
    ConfigError
        If ``magnitude_range`` is not finite and increasing.
    """
    low, high = check_magnitude_range(magnitude_range)
    frame = candidates.reset_index(drop=True)
    n = len(frame)
    if n == 0:
        return empty_records(), empty_rejected()
    reasons = Reasons(n)

    problems = _text(frame, "problems", n)
    reasons.add_each(~_empty(problems), problems, "{}", str)

    event_id = canonical_event_ids(_text(frame, "event_id", n))  # one rule for every format
    reasons.add(_empty(event_id), "event id missing; fill event_id")
    times = _utc_times(frame, n)
    reasons.add(
        np.isnat(times),
        "origin time missing or not an ISO 8601 time; give e.g. 2024-05-01T12:00:00Z",
    )
    earliest, latest = plausible_origin_range()
    implausible = ~np.isnat(times) & ((times < earliest) | (times > latest))
    reasons.add_each(
        implausible,
        times,
        f"origin time {{}} is outside {EARLIEST_ORIGIN[:4]} .. one day from now (UTC); "
        "correct the date (a typing error in the year?)",
        lambda t: f"{np.datetime_as_string(np.datetime64(t, 's'))}Z",
    )
    station_id = _station_ids(frame, n, reasons)
    channel = pc.utf8_upper(_text(frame, "channel", n))
    bad_channel = ~_empty(channel) & ~_mask(pc.match_substring_regex(channel, _CHANNEL_PATTERN))
    reasons.add_each(
        bad_channel,
        channel,
        "channel {} is not a SEED channel code (1-3 characters A-Z 0-9); correct or clear it",
    )
    magnitude_type = _magnitude_types(frame, n, reasons)

    cols = {name: _float(frame, name, n) for name in _FLOAT_COLUMNS}
    detected = _bool(frame, "detected", n, True)
    clipped = _bool(frame, "clipped", n, False)
    _magnitude_rules(cols, detected, clipped, low, high, reasons)
    unit = _units(frame, n, cols["amplitude"], reasons)
    _numeric_rules(cols, reasons)

    ok = reasons.ok
    keep = pa.array(np.flatnonzero(ok))
    location = _text(frame, "source_location", n)
    columns: dict[str, Any] = {
        "event_id": event_id.take(keep),
        "origin_time": times[ok],
        "station_id": station_id.take(keep),
        "channel": _null_if_empty(channel).take(keep),
        "magnitude_type": magnitude_type.take(keep),
        "detected": detected[ok],
        "clipped": clipped[ok],
        "amplitude_unit": unit.take(keep),
        "formula": _null_if_empty(_text(frame, "formula", n)).take(keep),
        "source_file": np.full(len(keep), source_file, dtype=object),
        "source_location": location.take(keep),
    }
    for name, values in cols.items():
        columns[name] = values[ok]
    records = _table_frame(columns, INPUT_SCHEMA)

    bad = np.flatnonzero(~ok)
    if bad.shape[0] == 0:
        return records, empty_rejected()
    rejected = rejected_frame(
        source_file,
        location.take(pa.array(bad)).to_pylist(),
        [str(v) for v in reasons.text[bad]],
        _raw_json(raw, bad),
    )
    return records, rejected


def json_rows(frame: pd.DataFrame) -> Callable[[NDArray[np.int64]], list[str]]:
    """A :data:`RawRows` function that serialises rows of ``frame`` (by position) as JSON."""

    def rows(idx: NDArray[np.int64]) -> list[str]:
        subset = frame.iloc[idx].astype(object)
        subset = subset.where(subset.notna(), None)
        return [strict_json.dumps(rec) for rec in subset.to_dict(orient="records")]

    return rows
