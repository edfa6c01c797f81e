"""Station magnitudes of an ObsPy :class:`~obspy.core.event.Catalog` as candidate rows.

Shared by the QuakeML, IMS1.0 and NEIC "mchedr" readers, which all parse through
:func:`obspy.read_events` (ObsPy's event model mirrors QuakeML 1.2). One candidate row per
``StationMagnitude``:

=========================== ================================================================
record column               taken from
=========================== ================================================================
event_id                    ``Event.resource_id`` without ObsPy's per-read prefix
                            ``smi:local/<uuid>/`` (see :func:`stable_event_id`); validation
                            then keeps its last ``/`` segment (one rule for every format)
origin_time, event_latitude the origin named by ``StationMagnitude.origin_id``; if that id
event_longitude             resolves to no origin of the event, the event's preferred origin;
event_depth                 if none, its only origin. Depth: ``Origin.depth`` (m) / 1000 -> km
network, station, location, the first ``WaveformStreamID`` with a station code among the
channel                     station magnitude's, its amplitude's and that amplitude's pick's;
                            a blank network code becomes ``default_network``
magnitude_type              ``StationMagnitude.station_magnitude_type``; if empty, the type
                            of the network ``Magnitude`` that lists it among its
                            ``station_magnitude_contributions`` (when they agree)
magnitude                   ``StationMagnitude.mag``
amplitude, amplitude_unit   ``Amplitude.generic_amplitude`` (``StationMagnitude.amplitude_id``)
                            in unit ``m`` -> nm, ``m/s`` -> nm/s; other QuakeML units (``s``,
                            ``m/(s*s)``, ``m*s``, ``dimensionless``, ``other``) are not carried
period                      ``Amplitude.period`` (s)
distance_deg, azimuth       the origin's ``Arrival`` whose pick is the amplitude's pick; else
                            the first arrival of that origin at the same station with a
                            distance. ``Arrival.distance`` is epicentral, degrees;
                            ``Arrival.azimuth`` is event-to-station, degrees (QuakeML 1.2)
source_weight               ``StationMagnitudeContribution.weight`` matched by
                            ``station_magnitude_id``; the preferred magnitude's first
source_location             ``"event i / station magnitude k"`` (1-based, file order), unless
                            the format reader knows the line
=========================== ================================================================

``distance_km``, ``hypocentral_distance_km``, ``noise_threshold`` and ``formula`` stay empty;
``detected`` is true and ``clipped`` false unless the format reader says otherwise.
"""

from __future__ import annotations

import json
import re
from collections.abc import Mapping
from pathlib import Path
from typing import Any, Final

import numpy as np
import pandas as pd

from stations.errors import MalformedFileError

__all__ = ["catalog_candidates", "read_catalog", "stable_event_id"]

_LOCAL_PREFIX: Final = re.compile(
    r"^smi:local/[0-9a-fA-F]{8}-[0-9a-fA-F]{4}-[0-9a-fA-F]{4}-[0-9a-fA-F]{4}-[0-9a-fA-F]{12}/"
    r"(?:event/)?(?P<tail>.+)$"
)
_UNIT_TO_NANO: Final = {"m": "nm", "m/s": "nm/s"}


def stable_event_id(resource_id: str) -> str:
    """The event id magfuse stores for an ObsPy event resource id.

    Kept as given (e.g. ``smi:ch.ethz.sed/event/historical/1165``), except ids of the form
    ``smi:local/<uuid>/event/<tail>``: ObsPy's IMS1.0 reader invents a new random uuid on every
    read, so such ids become ``<tail>``, the bulletin's own event number (e.g. ``840268``), and
    a re-read file gives the same ids.

    Examples
    --------
    >>> stable_event_id("smi:local/eb743af4-8ac5-4a09-a746-15c6134731f3/event/840268")
    '840268'
    >>> stable_event_id("quakeml:us.anss.org/event/20120101052755.98")
    'quakeml:us.anss.org/event/20120101052755.98'
    """
    match = _LOCAL_PREFIX.match(resource_id)
    return match.group("tail") if match else resource_id


def _xml_position(path: Path | str) -> str | None:
    """``"line L, column C: message"`` of the first XML syntax error, or None if well-formed."""
    from lxml import etree  # an ObsPy dependency

    try:
        etree.parse(str(path))
    except etree.XMLSyntaxError as exc:
        line, column = exc.position
        return f"line {line}, column {column}: {exc.msg}"
    except OSError:
        return None
    return None


def _quoted_position(path: Path | str, message: str) -> str | None:
    """``"line N"`` of the first line holding a value that ``message`` quotes, if any.

    Only quoted texts that look like data are tried (no surrounding blanks, a digit inside),
    so type names and phrases of an error message are not mistaken for file content.
    """
    try:
        with open(path, "rb") as fh:
            lines = fh.read().decode("utf-8", errors="replace").splitlines()
    except OSError:
        return None
    for fragment in re.findall(r"'([^'\s][^']{2,}[^'\s])'", message):
        if not any(ch.isdigit() for ch in fragment):
            continue
        for number, line in enumerate(lines, start=1):  # only after a failure, not per row
            if fragment in line:
                return f"line {number}"
    return None


def read_catalog(path: Path | str, obspy_format: str, shown: str, fix: str) -> Any:
    """:func:`obspy.read_events` with ObsPy's failures turned into :class:`MalformedFileError`.

    The message carries ObsPy's first line and, where it can be found, the position: the XML
    syntax error's line and column for QuakeML, else the line holding a value ObsPy's message
    quotes. ``fix`` completes the message. Warnings ObsPy issues are left to the caller.
    """
    from obspy import read_events

    try:
        return read_events(str(path), format=obspy_format)
    except Exception as exc:  # third-party parser boundary: any failure means a malformed file
        detail = str(exc).strip().splitlines()[0] if str(exc).strip() else type(exc).__name__
        where = _xml_position(path) if obspy_format == "QUAKEML" else None
        where = where or _quoted_position(path, detail)
        at = f" at {where}" if where else ""
        raise MalformedFileError(
            f"{shown}: cannot be read as {obspy_format}{at} ({detail}); {fix}"
        ) from exc


def _text(value: Any) -> str:
    return "" if value is None else str(value).strip()


def _rid(value: Any) -> str:
    return "" if value is None else str(getattr(value, "id", value))


def _float(value: Any) -> float:
    return np.nan if value is None else float(value)


def _stream(chain: list[Any], default_network: str) -> tuple[str, str, str, str]:
    """(network, station, location, channel) from the first stream id that names a station."""
    ids = [w for w in chain if w is not None]
    station = next((_text(w.station_code) for w in ids if _text(w.station_code)), "")
    same = [w for w in ids if _text(w.station_code) in ("", station)]

    def first(attr: str) -> str:
        return next((_text(getattr(w, attr)) for w in same if _text(getattr(w, attr))), "")

    network = first("network_code") or (default_network if station else "")
    return network, station, first("location_code"), first("channel_code")


def _contributions(event: Any) -> tuple[dict[str, float], dict[str, str]]:
    """Weight and network-magnitude type per station-magnitude id (preferred magnitude first)."""
    preferred = _rid(event.preferred_magnitude_id)
    mags = sorted(event.magnitudes, key=lambda m: _rid(m.resource_id) != preferred)
    weight: dict[str, float] = {}
    types: dict[str, set[str]] = {}
    for mag in mags:
        for contrib in mag.station_magnitude_contributions:
            sm_id = _rid(contrib.station_magnitude_id)
            if contrib.weight is not None:
                weight.setdefault(sm_id, float(contrib.weight))
            if _text(mag.magnitude_type):
                types.setdefault(sm_id, set()).add(_text(mag.magnitude_type))
    unique = {k: next(iter(v)) for k, v in types.items() if len(v) == 1}
    return weight, unique


def _arrivals(origin: Any, picks: Mapping[str, Any]) -> tuple[dict[str, Any], dict[str, Any]]:
    """Arrivals of ``origin`` by pick id, and the first one with a distance by station code."""
    by_pick: dict[str, Any] = {}
    by_station: dict[str, Any] = {}
    if origin is None:
        return by_pick, by_station
    for arrival in origin.arrivals:
        pick_id = _rid(arrival.pick_id)
        by_pick.setdefault(pick_id, arrival)
        pick = picks.get(pick_id)
        if pick is not None and pick.waveform_id is not None and arrival.distance is not None:
            by_station.setdefault(_text(pick.waveform_id.station_code), arrival)
    return by_pick, by_station


def _origin_of(event: Any, origin_id: str, origins: Mapping[str, Any]) -> Any:
    if origin_id in origins:
        return origins[origin_id]
    preferred = _rid(event.preferred_origin_id)
    if preferred in origins:
        return origins[preferred]
    return event.origins[0] if len(event.origins) == 1 else None


def catalog_candidates(
    catalog: Any,
    *,
    default_network: str,
    overrides: Mapping[str, Mapping[str, Any]] | None = None,
) -> tuple[pd.DataFrame, list[str]]:
    """Candidate rows (for :func:`stations.validation.validate_records`) and their raw JSON.

    Parameters
    ----------
    catalog : obspy.core.event.Catalog
        As returned by :func:`obspy.read_events`.
    default_network : str
        Network code for stream ids without one.
    overrides : mapping, optional
        Per station-magnitude resource id, values that replace or complete what ObsPy
        delivered: ``magnitude_type`` (used when ObsPy has none), ``source_location``,
        ``clipped``, ``problems``.

    Returns
    -------
    candidates : DataFrame
        One row per station magnitude, file order.
    raw : list of str
        Each row as read (the ObsPy values before validation), JSON text.
    """
    extra = overrides or {}
    rows: list[dict[str, Any]] = []
    for i, event in enumerate(catalog, start=1):
        event_id = stable_event_id(_rid(event.resource_id))
        origins = {_rid(o.resource_id): o for o in event.origins}
        amplitudes = {_rid(a.resource_id): a for a in event.amplitudes}
        picks = {_rid(p.resource_id): p for p in event.picks}
        weights, contrib_types = _contributions(event)
        arrivals_cache: dict[str, tuple[dict[str, Any], dict[str, Any]]] = {}
        for k, sm in enumerate(event.station_magnitudes, start=1):
            sm_id = _rid(sm.resource_id)
            more = extra.get(sm_id, {})
            origin = _origin_of(event, _rid(sm.origin_id), origins)
            amp = amplitudes.get(_rid(sm.amplitude_id))
            pick = picks.get(_rid(amp.pick_id)) if amp is not None else None
            network, station, location, channel = _stream(
                [
                    sm.waveform_id,
                    amp.waveform_id if amp is not None else None,
                    pick.waveform_id if pick is not None else None,
                ],
                default_network,
            )
            mtype = (
                _text(sm.station_magnitude_type)
                or _text(more.get("magnitude_type"))
                or contrib_types.get(sm_id, "")
            )
            okey = _rid(origin.resource_id) if origin is not None else ""
            if okey not in arrivals_cache:
                arrivals_cache[okey] = _arrivals(origin, picks)
            by_pick, by_station = arrivals_cache[okey]
            arrival = by_pick.get(_rid(amp.pick_id)) if amp is not None else None
            if arrival is None or arrival.distance is None:
                arrival = by_station.get(station)
            unit = _UNIT_TO_NANO.get(_text(amp.unit)) if amp is not None else None
            amplitude = (
                float(amp.generic_amplitude) * 1e9
                if unit is not None and amp is not None and amp.generic_amplitude is not None
                else np.nan
            )
            time = origin.time if origin is not None else None
            depth = origin.depth if origin is not None else None
            rows.append(
                {
                    "event_id": event_id,
                    "origin_time": np.datetime64(time.ns // 1000, "us")
                    if time is not None
                    else np.datetime64("NaT", "us"),
                    "event_latitude": _float(origin.latitude if origin is not None else None),
                    "event_longitude": _float(origin.longitude if origin is not None else None),
                    "event_depth": _float(depth) / 1000.0,
                    "network": network,
                    "station": station,
                    "location": location,
                    "channel": channel,
                    "magnitude_type": mtype,
                    "magnitude": _float(sm.mag),
                    "clipped": bool(more.get("clipped", False)),
                    "amplitude": amplitude,
                    "amplitude_unit": unit if np.isfinite(amplitude) else None,
                    "period": _float(amp.period) if amp is not None else np.nan,
                    "distance_deg": _float(arrival.distance if arrival is not None else None),
                    "azimuth": _float(arrival.azimuth if arrival is not None else None),
                    "source_weight": weights.get(sm_id, np.nan),
                    "source_location": more.get(
                        "source_location", f"event {i} / station magnitude {k}"
                    ),
                    "problems": more.get("problems", ""),
                    "_sm_id": sm_id,
                    "_origin_time": str(time) if time is not None else None,
                }
            )
    return _frame(rows)


def _frame(rows: list[dict[str, Any]]) -> tuple[pd.DataFrame, list[str]]:
    raw = [
        json.dumps(
            {
                "station_magnitude": r["_sm_id"],
                "event_id": r["event_id"],
                "origin_time": r["_origin_time"],
                "network": r["network"],
                "station": r["station"],
                "location": r["location"],
                "channel": r["channel"],
                "magnitude_type": r["magnitude_type"],
                "magnitude": None if np.isnan(r["magnitude"]) else r["magnitude"],
            }
        )
        for r in rows
    ]
    frame = pd.DataFrame(rows).drop(columns=["_sm_id", "_origin_time"], errors="ignore")
    if not rows:
        frame = pd.DataFrame({"event_id": pd.Series([], dtype=object)})
    else:
        frame["origin_time"] = pd.to_datetime(frame["origin_time"]).dt.tz_localize("UTC")
    return frame, raw
