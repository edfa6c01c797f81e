"""IMS1.0 bulletins (short form): station magnitudes of the phase lines.

Parsed with :func:`obspy.read_events` (format ``IMS10BULLETIN``); magfuse then completes what
ObsPy 1.5.1 leaves out, from the same lines. Phase-line columns used (IMS1.0 short form, as
documented in ObsPy 1.5.1 ``obspy/io/iaspei/core.py``; 1-based columns):

======= ====== ============================== ======================== =========================
columns format content                        unit                     record column
======= ====== ============================== ======================== =========================
1-5     a5     station code                   --                       station_id ``NET.STA.``
7-12    f6.2   station-to-event distance      degrees                  distance_deg
14-18   f5.1   event-to-station azimuth       degrees                  azimuth
29-40   time   arrival time hh:mm:ss.sss      --                       (identifies a phase line)
84-92   f9.1   amplitude                      nm (ObsPy: m, x 1e9)     amplitude, unit ``nm``
94-98   f5.2   period                         s                        period
104-108 a5     magnitude type                 --                       magnitude_type
109     a1     min/max indicator ``<``, ``>`` --                       ``>``: clipped (see below)
110-113 f4.1   station magnitude              magnitude units          magnitude
115-122 a8     arrival id                     --                       (links line and ObsPy)
======= ====== ============================== ======================== =========================

The origin (time, latitude, longitude, depth km) is the one ObsPy assigns to the phase block:
the prime origin of the event (``#PRIME`` / ``#OrigID`` comments, or the only origin).

What ObsPy 1.5.1 does and what this reader adds (checked by reading and running its source):

* **magnitude type** -- ObsPy passes the type to ``StationMagnitude`` under a name the class
  ignores, so ``station_magnitude_type`` is always empty. This reader takes the type from
  columns 104-108 of the line whose arrival id (columns 115-122) ends the station magnitude's
  resource id (``.../station_magnitude/<arrival id>``). A station magnitude without an arrival
  id gets no type and is rejected.
* **network code** -- IMS1.0 phase lines carry a bare station code and ObsPy leaves the network
  code empty. Every station gets ``default_network`` (:data:`~stations.readers.base.DEFAULT_NETWORK`
  unless given); pass the network when the bulletin covers one network.
* **event id** -- ObsPy builds ``smi:local/<random uuid>/event/<number>``, new on each read;
  magfuse keeps ``<number>``, the bulletin's event id (e.g. ``840268``).
* **dropped lines** -- ObsPy skips phase blocks it cannot tie to an origin (a warning) and
  station magnitudes of value 0.0 (it tests the value for truth). Every phase line with a
  magnitude and an arrival id that ObsPy did not deliver is listed in ``rejected`` with its line
  number; ObsPy's warnings are not repeated.
* **min/max indicator** -- ``>`` is read as "at least this magnitude" and stored as a clipped
  detection (a lower bound); ``<`` (an upper bound) cannot be stored as a detection and the row
  is rejected. That reading of the indicator is from memory, not from the standard's text.
* **complete message** -- an IMS1.0 message ends with a ``STOP`` line. A bulletin whose last
  non-blank line is not ``STOP`` was cut short (an interrupted transfer or a full disk) and is
  rejected whole with :class:`~stations.errors.MalformedFileError` naming the file and its
  last line, so that part of a bulletin is never stored as if it were all of it.

``distance_km`` and ``hypocentral_distance_km`` stay empty (the bulletin gives degrees).
``source_location`` is ``"line N"`` for lines with an arrival id, else
``"event i / station magnitude k"``.

Examples
--------
>>> from pathlib import Path
>>> import obspy
>>> from stations.readers.ims10 import is_ims10, read_ims10
>>> sample = (Path(obspy.__file__).parent / "io" / "iaspei" / "tests" / "data"
...           / "19670130012028.isf")
>>> is_ims10(sample)
True
>>> result = read_ims10(sample)
>>> len(result.records), len(result.rejected)
(15, 0)
>>> result.records[["event_id", "station_id", "magnitude_type", "magnitude"]].head(2)
  event_id    station_id magnitude_type  magnitude
0   840268  UNKNOWN.LJU.             mb        5.4
1   840268  UNKNOWN.KHC.             mb        5.5
"""

from __future__ import annotations

import json
import warnings
from pathlib import Path
from typing import Any, Final

import numpy as np
import pandas as pd

from stations.errors import MalformedFileError
from stations.readers import _sniff
from stations.readers._catalog import catalog_candidates, read_catalog
from stations.readers.base import (
    DEFAULT_NETWORK,
    ReadResult,
    check_default_network,
    display_path,
)
from stations.validation import DEFAULT_MAGNITUDE_RANGE, rejected_frame, validate_records

__all__ = ["check_complete", "is_ims10", "read_ims10", "scan_phase_magnitudes"]

_HEADER: Final = "DATA_TYPE BULLETIN IMS1.0"
_HEADER_LINES: Final = 40  # ObsPy 1.5.1 allows up to 40 lines of text before the header
_SM_MARK: Final = "/station_magnitude/"


def is_ims10(path: Any) -> bool:
    """True if one of the first 40 lines starts ``DATA_TYPE BULLETIN IMS1.0`` (short form).

    The long form (``IMS1.0:LONG``) is not recognised, as ObsPy 1.5.1 reads only the short
    one. Never raises; reads at most 8 KiB; restores the position of a file object.
    """
    lines = _sniff.head_lines(path)
    if not lines:
        return False
    for line in lines[:_HEADER_LINES]:
        upper = line.strip().upper()
        if upper.startswith(_HEADER):
            return "LONG" not in upper
    return False


def check_complete(text: str, shown: str) -> None:
    """Raise unless the last non-blank line of ``text`` is the closing ``STOP`` line.

    Raises
    ------
    MalformedFileError
        Naming the file, the number and text of its last non-blank line, and the fix.
    """
    lines = text.splitlines()
    last = len(lines)
    while last > 0 and not lines[last - 1].strip():
        last -= 1
    if last and lines[last - 1].strip().upper() == "STOP":
        return
    tail = lines[last - 1].strip()[:60] if last else ""
    raise MalformedFileError(
        f"{shown}: IMS1.0 bulletin has no closing STOP line (it ends at line {last}: "
        f"{tail!r}), so it was cut short; fetch the complete bulletin and ingest it again"
    )


def scan_phase_magnitudes(text: str) -> pd.DataFrame:
    """Phase lines that carry a station magnitude, found with vectorized column slices.

    A phase line has an arrival time ``hh:mm:ss`` in columns 29-36 and a number in columns
    110-113. Returns columns ``line`` (1-based), ``station``, ``magnitude_type``,
    ``indicator``, ``magnitude``, ``arrival_id`` and ``text``.
    """
    lines = pd.Series(text.splitlines(), dtype=object)
    if lines.empty:
        lines = pd.Series([""], dtype=object)
    is_phase = lines.str.slice(28, 36).str.fullmatch(r"\d\d:\d\d:\d\d").fillna(False)
    mag = pd.to_numeric(lines.str.slice(109, 113).str.strip(), errors="coerce")
    hit = (is_phase & mag.notna()).to_numpy(dtype=bool)
    idx = np.flatnonzero(hit)
    picked = lines.iloc[idx]
    return pd.DataFrame(
        {
            "line": idx + 1,
            "station": picked.str.slice(0, 5).str.strip().to_numpy(dtype=object),
            "magnitude_type": picked.str.slice(103, 108).str.strip().to_numpy(dtype=object),
            "indicator": picked.str.slice(108, 109).str.strip().to_numpy(dtype=object),
            "magnitude": mag.iloc[idx].to_numpy(dtype=np.float64),
            "arrival_id": picked.str.slice(114, 122).str.strip().to_numpy(dtype=object),
            "text": picked.to_numpy(dtype=object),
        }
    )


def _overrides(scan: pd.DataFrame) -> dict[str, dict[str, Any]]:
    """Per arrival id (unique in the file), what the line adds to ObsPy's station magnitude."""
    with_id = scan[scan["arrival_id"] != ""]
    unique = with_id[~with_id["arrival_id"].duplicated(keep=False)]
    out: dict[str, dict[str, Any]] = {}
    for arid, line, mtype, ind in zip(
        unique["arrival_id"],
        unique["line"],
        unique["magnitude_type"],
        unique["indicator"],
        strict=True,
    ):  # one entry per station-magnitude line
        more: dict[str, Any] = {"magnitude_type": mtype, "source_location": f"line {line}"}
        if ind == ">":
            more["clipped"] = True
        elif ind == "<":
            more["problems"] = (
                "magnitude marked '<' (an upper bound) cannot be stored as a detection; "
                "remove the row or give the measured value"
            )
        out[str(arid)] = more
    return out


def read_ims10(
    path: Path | str,
    *,
    magnitude_range: tuple[float, float] = DEFAULT_MAGNITUDE_RANGE,
    default_network: str = DEFAULT_NETWORK,
) -> ReadResult:
    """Read the station magnitudes of an IMS1.0 short-form bulletin (see the module docstring).

    Parameters
    ----------
    path : Path or str
        The bulletin.
    magnitude_range : (float, float), default=(-3.0, 10.0)
        Accepted magnitudes, magnitude units.
    default_network : str, default="UNKNOWN"
        Network code of every station (IMS1.0 phase lines name none).

    Returns
    -------
    ReadResult
        ``source_location`` is ``"line N"`` where the arrival id links the line.

    Raises
    ------
    MalformedFileError
        If the bulletin lacks its closing ``STOP`` line or ObsPy cannot parse it.
    ConfigError
        If ``default_network`` is not a network code.
    """
    shown = display_path(path)
    network = check_default_network(default_network)
    with open(path, "rb") as fh:
        text = fh.read().decode("utf-8", errors="replace")
    check_complete(text, shown)
    scan = scan_phase_magnitudes(text)
    by_arrival = _overrides(scan)
    with warnings.catch_warnings():
        # ObsPy warns about each phase block it skips; those lines are reported in `rejected`.
        warnings.simplefilter("ignore", UserWarning)
        catalog = read_catalog(
            path, "IMS10BULLETIN", shown, "check the IMS1.0 short-form layout of that part"
        )
    sm_ids = [str(sm.resource_id) for event in catalog for sm in event.station_magnitudes]
    arids = [s.rsplit(_SM_MARK, 1)[1] if _SM_MARK in s else "" for s in sm_ids]
    overrides = {
        sm_id: by_arrival[arid]
        for sm_id, arid in zip(sm_ids, arids, strict=True)
        if arid in by_arrival
    }
    candidates, raw = catalog_candidates(catalog, default_network=network, overrides=overrides)
    records, rejected = validate_records(
        candidates, source_file=shown, raw=raw, magnitude_range=magnitude_range
    )
    dropped = scan[(scan["arrival_id"] != "") & ~scan["arrival_id"].isin(set(arids))]
    if not dropped.empty:
        extra = rejected_frame(
            shown,
            [f"line {n}" for n in dropped["line"]],
            [
                "station magnitude not delivered by ObsPy's IMS1.0 reader (it skips phase "
                "blocks it cannot tie to an origin, and magnitudes of 0.0); check the "
                "block's origin reference (#PRIME / #OrigID)"
            ]
            * len(dropped),
            [json.dumps({"text": t}) for t in dropped["text"]],
        )
        rejected = pd.concat([rejected, extra], ignore_index=True)
    return ReadResult(source_file=shown, records=records, rejected=rejected)
