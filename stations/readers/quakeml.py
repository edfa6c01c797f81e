"""QuakeML 1.2 event files: station magnitudes with their amplitudes, origins, arrivals and weights.

Parsed with :func:`obspy.read_events` (format ``QUAKEML``); the mapping from the event model to
record columns is the table of :mod:`stations.readers._catalog`, in short:

=========================================== ================ ================================
QuakeML element                             unit             record column
=========================================== ================ ================================
event/@publicID                             --               event_id (as given; see below)
origin time, latitude, longitude            UTC, deg         origin_time, event_latitude/_lon
origin depth                                m                event_depth (km)
stationMagnitude/waveformID                 --               station_id ``NET.STA.LOC``,
(or its amplitude's, or that pick's)                         channel
stationMagnitude/type                       --               magnitude_type (normalised)
stationMagnitude/mag/value                  magnitude units  magnitude
amplitude/genericAmplitude, unit m or m/s   m, m/s           amplitude in nm or nm/s
amplitude/period                            s                period
arrival/distance, arrival/azimuth           deg              distance_deg, azimuth
magnitude/stationMagnitudeContribution      --               source_weight
/weight (by stationMagnitudeID)
=========================================== ================ ================================

The event id is the last ``/``-separated segment of the event's ``publicID`` (e.g.
``1165`` for ``smi:ch.ethz.sed/event/historical/1165``), the rule every reader follows
(:func:`stations.schema.canonical_event_ids`), so a CSV of the same events names them alike;
rejected rows keep the full ``publicID`` in their raw text. A station
magnitude whose origin cannot be found (no ``originID`` match, no preferred origin, several
origins) has no origin time and is rejected; so is one without a type, unless the network
magnitude listing it in its contributions has one. A waveform id without a network code gets
``default_network`` (:data:`~stations.readers.base.DEFAULT_NETWORK` unless given).

Examples
--------
>>> from pathlib import Path
>>> import obspy
>>> from stations.readers.quakeml import is_quakeml, read_quakeml
>>> sample = (Path(obspy.__file__).parent / "io" / "quakeml" / "tests" / "data"
...           / "quakeml_1.2_stationmagnitude.xml")
>>> is_quakeml(sample)
True
>>> result = read_quakeml(sample)
>>> len(result.records), len(result.rejected)
(0, 1)
>>> result.rejected["reason"].iloc[0].split(";")[0]
'origin time missing or not an ISO 8601 time'
"""

from __future__ import annotations

import re
from pathlib import Path
from typing import Any, Final

from stations.readers import _sniff
from stations.readers._catalog import catalog_candidates, read_catalog
from stations.readers.base import (
    DEFAULT_NETWORK,
    ReadResult,
    check_default_network,
    display_path,
)
from stations.validation import DEFAULT_MAGNITUDE_RANGE, validate_records

__all__ = ["is_quakeml", "read_quakeml"]

_ROOT: Final = re.compile(r"<(?:[A-Za-z_][\w.-]*:)?quakeml[\s>]")
_NAMESPACE: Final = "http://quakeml.org/xmlns/bed/1.2"


def is_quakeml(path: Any) -> bool:
    """True if the head of the file opens a ``quakeml`` root element with the BED 1.2 namespace.

    Never raises; reads at most 8 KiB; restores the position of a file object.
    """
    data = _sniff.head_bytes(path)
    if data is None:
        return False
    text = data.decode("utf-8", errors="replace").removeprefix("\ufeff").lstrip()
    if not text.startswith("<"):
        return False
    return bool(_ROOT.search(text)) and _NAMESPACE in text


def _clipped_by_comment(catalog: Any) -> dict[str, dict[str, Any]]:
    """Station magnitudes whose amplitude carries a comment starting ``clipped``.

    QuakeML 1.2 has no clipping flag; magfuse's own QuakeML (the demo's December) marks a
    clipped amplitude with such a comment, so a re-read keeps ``clipped``.
    """
    out: dict[str, dict[str, Any]] = {}
    for event in catalog:
        clipped = {
            str(a.resource_id)
            for a in event.amplitudes
            if any(str(c.text or "").strip().lower().startswith("clipped") for c in a.comments)
        }
        for sm in event.station_magnitudes:
            if str(sm.amplitude_id) in clipped:
                out[str(sm.resource_id)] = {"clipped": True}
    return out


def read_quakeml(
    path: Path | str,
    *,
    magnitude_range: tuple[float, float] = DEFAULT_MAGNITUDE_RANGE,
    default_network: str = DEFAULT_NETWORK,
) -> ReadResult:
    """Read the station magnitudes of a QuakeML 1.2 file (see the module docstring).

    Parameters
    ----------
    path : Path or str
        The file.
    magnitude_range : (float, float), default=(-3.0, 10.0)
        Accepted magnitudes, magnitude units.
    default_network : str, default="UNKNOWN"
        Network code for waveform ids that carry none.

    Returns
    -------
    ReadResult
        ``source_location`` is ``"event i / station magnitude k"`` (1-based, file order).

    Raises
    ------
    MalformedFileError
        If ObsPy cannot parse the file (the message carries ObsPy's, with line and column for
        XML syntax errors).
    ConfigError
        If ``default_network`` is not a network code.
    """
    shown = display_path(path)
    network = check_default_network(default_network)
    catalog = read_catalog(
        path, "QUAKEML", shown, "check that it is well-formed QuakeML 1.2 (BED namespace)"
    )
    candidates, raw = catalog_candidates(
        catalog, default_network=network, overrides=_clipped_by_comment(catalog)
    )
    records, rejected = validate_records(
        candidates, source_file=shown, raw=raw, magnitude_range=magnitude_range
    )
    return ReadResult(source_file=shown, records=records, rejected=rejected)
