"""magfuse's own CSV layout of station magnitudes: one row per station, event and magnitude type.

The file is UTF-8 text (a byte-order mark is allowed), comma-separated, one record per line,
with a header line naming the columns in any order. Fields may be quoted with ``"``; a quoted
field must not contain a line break. Blank lines are skipped (line numbers in messages still
count them). Unknown column names are an error, so a misspelt optional column cannot be
silently lost. A template with a detection and a non-detection row ships with the package:
:func:`template_path`.

========================= ======== ========================================= ======================
column                    required unit / form                               record column
========================= ======== ========================================= ======================
event_id                  yes      text, the source's event identifier       event_id
origin_time               yes      ISO 8601; ``Z`` or an offset is converted origin_time (UTC)
                                   to UTC; a time without either is UTC
event_latitude            no       degrees, WGS84, [-90, 90]                 event_latitude
event_longitude           no       degrees, WGS84, [-180, 180]               event_longitude
event_depth               no       km below sea level                        event_depth
network                   yes      FDSN network code                         station_id ``NET.``
station                   yes      FDSN station code                         station_id ``.STA.``
location                  no       FDSN location code; empty or ``--`` = none station_id ``.LOC``
channel                   no       SEED channel code, e.g. ``HHZ``           channel
magnitude_type            yes      ML, MLv, mb, mB, mB_BB, mb_Lg, Ms, Ms_20, magnitude_type
                                   Ms_BB, Md, Mc, Mw, Mwp, Me, or an alias
                                   of :data:`~stations.schema.MAGNITUDE_TYPE_ALIASES`
magnitude                 yes      magnitude units; empty for a non-detection magnitude
amplitude                 no       zero-to-peak, in ``amplitude_unit``       amplitude
amplitude_unit            with amp nm, um, mm_wa, nm/s, um/s                 amplitude_unit
period                    no       s                                         period
distance_km               no       km, epicentral                            distance_km
distance_deg              no       degrees, epicentral                       distance_deg
hypocentral_distance_km   no       km                                        hypocentral_distance_km
azimuth                   no       degrees, event to station, from north     azimuth
source_weight             no       the source network's weight, >= 0         source_weight
clipped                   no       true/false; empty = false                 clipped
detected                  no       true/false; empty or no column = true     detected
noise_threshold           no       magnitude units                           noise_threshold
========================= ======== ========================================= ======================

Booleans accept ``true/false``, ``t/f``, ``yes/no``, ``y/n`` and ``1/0`` in any case. Numbers
use a decimal point; ``nan`` or an empty field means unknown.

**Non-detections** (a station that was operating and saw nothing) are rows of the same file with
``detected`` false, an empty ``magnitude`` and, if known, the noise level through the same
magnitude formula in ``noise_threshold``. There is no separate format: the optional
``detected`` and ``noise_threshold`` columns are all it takes. Without a ``detected`` column
every row is a detection, so an empty magnitude is rejected rather than taken as a
non-detection.

Each row's ``source_location`` is ``"line N"`` (the header is line 1). A line with the wrong
number of fields, a number that does not parse, or a row failing
:func:`stations.validation.validate_records` goes to ``rejected``; a missing required column,
an unknown or duplicate column, an empty file or text that is not UTF-8 raise
:class:`~stations.errors.MalformedFileError`.

Examples
--------
>>> from stations.readers.csv import read_csv, template_path
>>> result = read_csv(template_path())
>>> result.records[["station_id", "magnitude_type", "magnitude", "detected"]]
    station_id magnitude_type  magnitude  detected
0    XX.STA01.             ML       2.37      True
1  XX.STA02.00             ML        NaN     False
>>> len(result.rejected)
0
"""

from __future__ import annotations

from pathlib import Path
from typing import Any, Final

import numpy as np
import pandas as pd
import pyarrow as pa

from stations.errors import MalformedFileError
from stations.readers import _sniff
from stations.readers._text_table import (
    line_locations,
    parse_booleans,
    parse_numbers,
    parse_times,
    read_header,
    read_string_table,
    sort_by_line,
)
from stations.readers.base import ReadResult, display_path
from stations.schema import INPUT_COLUMNS
from stations.validation import DEFAULT_MAGNITUDE_RANGE, Reasons, validate_records

__all__ = [
    "CSV_COLUMNS",
    "REQUIRED_COLUMNS",
    "is_csv",
    "read_csv",
    "template_path",
    "write_csv",
]

#: Every column the layout knows, in the order :func:`write_csv` writes them.
CSV_COLUMNS: Final = (
    "event_id",
    "origin_time",
    "event_latitude",
    "event_longitude",
    "event_depth",
    "network",
    "station",
    "location",
    "channel",
    "magnitude_type",
    "magnitude",
    "amplitude",
    "amplitude_unit",
    "period",
    "distance_km",
    "distance_deg",
    "hypocentral_distance_km",
    "azimuth",
    "source_weight",
    "clipped",
    "detected",
    "noise_threshold",
)
REQUIRED_COLUMNS: Final = (
    "event_id",
    "origin_time",
    "network",
    "station",
    "magnitude_type",
    "magnitude",
)
#: Columns whose presence in a header makes :func:`is_csv` claim the file.
_SIGNATURE: Final = frozenset({"event_id", "origin_time", "magnitude_type"})
_NUMERIC: Final = (
    "event_latitude",
    "event_longitude",
    "event_depth",
    "magnitude",
    "amplitude",
    "period",
    "distance_km",
    "distance_deg",
    "hypocentral_distance_km",
    "azimuth",
    "source_weight",
    "noise_threshold",
)
_TEXT: Final = (
    "event_id",
    "network",
    "station",
    "location",
    "channel",
    "magnitude_type",
    "amplitude_unit",
)


def template_path() -> Path:
    """Path of the shipped template: the header and two example rows (invented values)."""
    return Path(__file__).with_name("templates") / "station_magnitudes.csv"


def is_csv(path: Any) -> bool:
    """True if line 1 is a header naming ``event_id``, ``origin_time`` and ``magnitude_type``.

    Never raises; reads at most 8 KiB; restores the position of a file object.
    """
    lines = _sniff.head_lines(path)
    if not lines:
        return False
    names = {name.strip().strip('"').strip() for name in lines[0].split(",")}
    return names >= _SIGNATURE


def _check_header(names: list[str], shown: str) -> None:
    where = f"{shown}: line 1"
    if "" in names:
        raise MalformedFileError(
            f"{where}: column {names.index('') + 1} has no name; name it or remove the extra comma"
        )
    dupes = sorted({n for n in names if names.count(n) > 1})
    if dupes:
        raise MalformedFileError(f"{where}: column {dupes[0]!r} appears twice; keep one")
    unknown = [n for n in names if n not in CSV_COLUMNS]
    missing = [n for n in REQUIRED_COLUMNS if n not in names]
    if missing:
        hint = f" (found unknown column {unknown[0]!r}: rename it?)" if unknown else ""
        listed = ", ".join(repr(m) for m in missing)
        noun = "column" if len(missing) == 1 else "columns"
        raise MalformedFileError(
            f"{where}: required {noun} {listed} missing{hint}; see the template {template_path()}"
        )
    if unknown:
        raise MalformedFileError(
            f"{where}: unknown column {unknown[0]!r}; the columns are {', '.join(CSV_COLUMNS)}"
        )


def _candidates(table: pa.Table, names: list[str]) -> pd.DataFrame:
    reasons = Reasons(table.num_rows)
    frame = table.select([n for n in _TEXT if n in names]).to_pandas()
    frame["origin_time"] = parse_times(table.column("origin_time"))
    for name in _NUMERIC:
        if name in names:
            frame[name] = parse_numbers(table.column(name), name, reasons)
    if "clipped" in names:
        frame["clipped"] = parse_booleans(table.column("clipped"), "clipped", False, reasons)
    if "detected" in names:
        frame["detected"] = parse_booleans(table.column("detected"), "detected", True, reasons)
    frame["problems"] = reasons.text
    return frame


def read_csv(
    path: Path | str, *, magnitude_range: tuple[float, float] = DEFAULT_MAGNITUDE_RANGE
) -> ReadResult:
    """Read a station-magnitude CSV file in magfuse's layout (see the module docstring).

    Parameters
    ----------
    path : Path or str
        The file.
    magnitude_range : (float, float), default=(-3.0, 10.0)
        Accepted magnitudes, magnitude units; others are rejected.

    Returns
    -------
    ReadResult
        Validated records and rejected rows; ``source_location`` is ``"line N"``.

    Raises
    ------
    MalformedFileError
        Empty file, no header, a missing required column, an unknown or duplicate column, or
        text that is not UTF-8. The message names the file and line and says what to fix.
    """
    shown = display_path(path)
    file = Path(path)
    names = read_header(
        file, shown, hint=f"start the file with the column names of the template {template_path()}"
    )
    _check_header(names, shown)
    body = read_string_table(file, shown, names)
    frame = _candidates(body.table, names)
    frame["source_location"] = line_locations(body.lines)
    records, rejected = validate_records(
        frame, source_file=shown, raw=body.raw, magnitude_range=magnitude_range
    )
    if not body.rejected.empty:
        rejected = sort_by_line(pd.concat([rejected, body.rejected], ignore_index=True))
    return ReadResult(source_file=shown, records=records, rejected=rejected)


def write_csv(records: pd.DataFrame, path: Path | str) -> None:
    """Write records (columns of :data:`~stations.schema.INPUT_COLUMNS`) in this layout.

    ``station_id`` is split into network, station and location; times are written as
    ``YYYY-MM-DDTHH:MM:SS.ffffffZ``; numbers with the shortest text that reads back to the same
    float; ``formula``, ``source_file`` and ``source_location`` are not written (the reader
    sets the last two from the new file).

    Raises
    ------
    KeyError
        If a column of :data:`~stations.schema.INPUT_COLUMNS` is missing from ``records``.
    """
    missing = [c for c in INPUT_COLUMNS if c not in records]
    if missing:
        raise KeyError(f"records lack column {missing[0]!r}; pass a ReadResult.records frame")
    parts = (
        records["station_id"]
        .astype(object)
        .str.split(".", n=2, expand=True)
        .reindex(columns=range(3))
    )
    out = pd.DataFrame(
        {
            "event_id": records["event_id"].astype(object),
            "origin_time": records["origin_time"]
            .dt.tz_convert("UTC")
            .dt.strftime("%Y-%m-%dT%H:%M:%S.%fZ"),
            "network": parts[0],
            "station": parts[1],
            "location": parts[2],
        }
    )
    for name in CSV_COLUMNS:
        if name in out:
            continue
        col = records[name]
        if name in ("clipped", "detected"):
            out[name] = np.where(col.to_numpy(dtype=bool), "true", "false")
        else:
            out[name] = col.astype(object)
    out = out[list(CSV_COLUMNS)]
    out.to_csv(path, index=False, na_rep="", lineterminator="\n")
