"""NEIC "mchedr" (machine-readable Earthquake Data Report) files of the PDE bulletin.

Parsed with :func:`obspy.read_events` (format ``MCHEDR``). Each event starts with an ``HY``
record; each station's primary phase is a ``P`` record, which ObsPy 1.5.1 turns into a pick, an
arrival and, when the body-wave amplitude field is filled, an amplitude and a station magnitude
of type ``Mb`` (normalised to ``mb``); ``M`` records give ``Ms`` station magnitudes. Fields of a
``P`` record used here (0-based slices as in ObsPy 1.5.1 ``obspy/io/pde/mchedr.py``):

============ ============================ ================== =================================
slice        content                      unit               record column
============ ============================ ================== =================================
[2:7]        station code                 --                 station_id ``NET.STA.``
[32:38]      distance                     degrees            distance_deg
[39:44]      azimuth                      degrees            azimuth
[44:48]      mb period                    s                  period
[48:55]      mb amplitude (see below)     nm (ObsPy: m)      amplitude, unit ``nm``
[56:59]      mb                           magnitude units    magnitude, type mb
============ ============================ ================== =================================

The origin is the ``HY`` hypocentre (time UTC, latitude, longitude, depth km); the event id is
the last segment of ObsPy's ``quakeml:us.anss.org/event/<date><time>``, ``<date><time>``
(the event-id rule of every reader, :func:`stations.schema.canonical_event_ids`). Station
codes carry no network: ObsPy writes a blank network code, and every station gets
``default_network`` (:data:`~stations.readers.base.DEFAULT_NETWORK` unless given). The mb
usage flag after the magnitude (column 60) is not read by ObsPy and not used here;
``source_weight`` stays empty.
In the bundled sample the amplitude field is eight characters wide with three decimals
(``3945.026``, ``  99.568``); ObsPy 1.5.1 reads seven of them, so the third decimal is lost
(3945.02 nm, 99.56 nm): at most 0.009 nm, far below the precision of the magnitude.
``source_location`` is ``"event i / station magnitude k"`` (1-based, file order).

Examples
--------
>>> from pathlib import Path
>>> import obspy
>>> from stations.readers.mchedr import is_mchedr, read_mchedr
>>> sample = Path(obspy.__file__).parent / "io" / "pde" / "tests" / "data" / "mchedr.dat"
>>> is_mchedr(sample)
True
>>> result = read_mchedr(sample)
>>> len(result.records)
19
>>> result.records[["station_id", "magnitude_type", "magnitude", "period"]].head(2)
     station_id magnitude_type  magnitude  period
0  UNKNOWN.MDJ.             mb        6.6     1.3
1  UNKNOWN.YOJ.             mb        7.0     1.4
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

__all__ = ["is_mchedr", "read_mchedr"]

#: ``HY`` record start: date YYYYMMDD, blank, time HHMMSS.SS (ObsPy 1.5.1 mchedr.py layout).
_HY: Final = re.compile(r"^HY\d{8} [ \d]\d{5}\.\d\d")


def is_mchedr(path: Any) -> bool:
    """True if the first non-blank line is an ``HY`` hypocentre record.

    Never raises; reads at most 8 KiB; restores the position of a file object.
    """
    lines = _sniff.head_lines(path)
    if not lines:
        return False
    first = next((line for line in lines if line.strip()), "")
    return bool(_HY.match(first))


def read_mchedr(
    path: Path | str,
    *,
    magnitude_range: tuple[float, float] = DEFAULT_MAGNITUDE_RANGE,
    default_network: str = DEFAULT_NETWORK,
) -> ReadResult:
    """Read the station magnitudes of a NEIC mchedr file (see the module docstring).

    Parameters
    ----------
    path : Path or str
        The file.
    magnitude_range : (float, float), default=(-3.0, 10.0)
        Accepted magnitudes, magnitude units.
    default_network : str, default="UNKNOWN"
        Network code of every station (the format names none).

    Returns
    -------
    ReadResult

    Raises
    ------
    MalformedFileError
        If ObsPy cannot parse the file.
    ConfigError
        If ``default_network`` is not a network code.
    """
    shown = display_path(path)
    network = check_default_network(default_network)
    catalog = read_catalog(path, "MCHEDR", shown, "check the record layout of that event")
    candidates, raw = catalog_candidates(catalog, default_network=network)
    records, rejected = validate_records(
        candidates, source_file=shown, raw=raw, magnitude_range=magnitude_range
    )
    return ReadResult(source_file=shown, records=records, rejected=rejected)
