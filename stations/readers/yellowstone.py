"""The Yellowstone station-ML amplitude table of Holt, Pechmann & Koper (2022).

Layout of ``catalogs/amplitudes/yellowstone.amps.clean.geobalanced.csv`` in the repository
``sgjholt/ynp_local_magnitude_recalibration`` (MIT licence): University of Utah Seismograph
Stations (UUSS) Yellowstone network, one row per event and station, 1998-2020. Reference:
Holt, J., J. C. Pechmann and K. D. Koper (2022), Recalibration of the local magnitude (ML)
scale for earthquakes in the Yellowstone volcanic region, BSSA 112(2), 905-920,
doi:10.1785/0120210240.

Detection is strict: line 1 must be exactly the published header of 34 columns
(:data:`HEADER`). The columns read:

========== =================================== ============ ===================================
column     content                             unit         record column
========== =================================== ============ ===================================
Evid       UUSS event id                       --           event_id (as given, e.g. 50154140)
Date, Time origin date and time of day         UTC [1]_     origin_time
EqLat/Lon  epicentre                           deg          event_latitude, event_longitude
EqDep      hypocentre depth                    km           event_depth
Net, Sta   FDSN network and station codes      --           station_id ``NET.STA.`` (no
                                                            location code in the table)
Cmp        band and instrument code, e.g. BH   --           channel, as given (two letters: no
                                                            orientation, the reading combines
                                                            both horizontals)
Repi       epicentral distance                 km           distance_km
Rhyp       hypocentral distance                km           hypocentral_distance_km
SML        station ML as the network computed  mag. units   magnitude = SML - Corr, rounded to
Corr       it, and the station correction it   mag. units   0.01 (the table's precision)
           applied
halfAmpH   amplitude the ML uses               mm on WA     amplitude, unit ``mm_wa``
========== =================================== ============ ===================================

**Station magnitude.** ``SML`` includes the network's station correction ``Corr`` (README of
the data set), so the uncorrected station magnitude is ``SML - Corr``: magfuse learns station
biases itself and must not see them removed. A row with an empty ``Corr`` cannot give it and
is rejected (30 rows of the published file).

**Amplitude.** In every row of the published file ``halfAmpH = (AmpE + AmpN) / 4`` to 1e-13
(computed): half the mean of the two horizontal Wood-Anderson amplitudes ``AmpE``, ``AmpN``
(unit column ``mm``). Read as a zero-to-peak Wood-Anderson amplitude in mm: Hutton & Boore's
(1987) ML of ``halfAmpH`` lies nearer ``SML - Corr`` than that of the mean ``(AmpE + AmpN)/2``
(checked on the whole table in the tests; computed, not stated by the authors).

``magnitude_type`` is ML; ``detected`` true; ``clipped`` false; periods, azimuth and weights
stay empty. ``source_location`` is ``"line N"``.

.. [1] UTC is assumed for Date and Time (ANSS catalogues publish UTC): from memory, not stated
   in the table.

Examples
--------
The reader on a two-line file in the published layout (invented values):

>>> import tempfile
>>> from pathlib import Path
>>> from stations.readers.yellowstone import HEADER, is_yellowstone, read_yellowstone
>>> row = ("1,2001-02-03,04:05:06.70,44.5,-110.5,8.0,2.0,2.0,3,5.0,1.0,0.5,WY,YXX,HH,"
...        "44.6,-110.6,2.0,12.0,14.4,2.31,0.20,1.0,mm,,9.0,1.2,mm,,9.0,0.55,2.0,1.0,True")
>>> sample = Path(tempfile.mkdtemp()) / "table.csv"
>>> _ = sample.write_text(",".join(HEADER) + "\\n" + row + "\\n")
>>> is_yellowstone(sample)
True
>>> read_yellowstone(sample).records[["station_id", "magnitude", "amplitude", "channel"]]
  station_id  magnitude  amplitude channel
0    WY.YXX.       2.11       0.55      HH
"""

from __future__ import annotations

from pathlib import Path
from typing import Any, Final

import numpy as np
import pandas as pd
import pyarrow.compute as pc

from stations.errors import MalformedFileError
from stations.readers import _sniff
from stations.readers._text_table import (
    line_locations,
    parse_numbers,
    parse_times,
    read_header,
    read_string_table,
    sort_by_line,
)
from stations.readers.base import ReadResult, display_path
from stations.validation import DEFAULT_MAGNITUDE_RANGE, Reasons, validate_records

__all__ = ["HEADER", "is_yellowstone", "read_yellowstone"]

#: The published header, in order.
HEADER: Final = (
    "Evid",
    "Date",
    "Time",
    "EqLat",
    "EqLon",
    "EqDep",
    "EqML",
    "EqMC",
    "N",
    "Dmin",
    "ErrZ",
    "ErrR",
    "Net",
    "Sta",
    "Cmp",
    "SLat",
    "SLon",
    "SElev",
    "Repi",
    "Rhyp",
    "SML",
    "Corr",
    "AmpE",
    "UnE",
    "PerE",
    "SnrE",
    "AmpN",
    "UnN",
    "PerN",
    "SnrN",
    "halfAmpH",
    "CatMag",
    "H",
    "GoodDep",
)
_NUMBERS: Final = {
    "EqLat": "event_latitude",
    "EqLon": "event_longitude",
    "EqDep": "event_depth",
    "Repi": "distance_km",
    "Rhyp": "hypocentral_distance_km",
    "halfAmpH": "amplitude",
}


def is_yellowstone(path: Any) -> bool:
    """True if line 1 is exactly the published header (:data:`HEADER`).

    Never raises; reads at most 8 KiB; restores the position of a file object.
    """
    lines = _sniff.head_lines(path)
    return lines is not None and len(lines) > 0 and lines[0].strip() == ",".join(HEADER)


def read_yellowstone(
    path: Path | str, *, magnitude_range: tuple[float, float] = DEFAULT_MAGNITUDE_RANGE
) -> ReadResult:
    """Read the Yellowstone station-ML table (see the module docstring).

    Parameters
    ----------
    path : Path or str
        The table.
    magnitude_range : (float, float), default=(-3.0, 10.0)
        Accepted magnitudes ``SML - Corr``, magnitude units.

    Returns
    -------
    ReadResult
        ``source_location`` is ``"line N"``.

    Raises
    ------
    MalformedFileError
        If line 1 is not the published header.
    """
    shown = display_path(path)
    file = Path(path)
    names = read_header(file, shown, hint="line 1 must be the published header")
    if tuple(names) != HEADER:
        differ = next(
            (
                f"column {i + 1} is {got!r}, expected {want!r}"
                for i, (got, want) in enumerate(zip(names, HEADER, strict=False))
                if got != want
            ),
            f"{len(names)} columns, expected {len(HEADER)}",
        )
        raise MalformedFileError(
            f"{shown}: line 1: not the Holt et al. (2022) table header ({differ}); restore "
            "the published header"
        )
    body = read_string_table(file, shown, names)
    table = body.table
    reasons = Reasons(table.num_rows)
    frame: dict[str, Any] = {
        new: parse_numbers(table.column(old), old, reasons) for old, new in _NUMBERS.items()
    }
    sml = parse_numbers(table.column("SML"), "SML", reasons)
    corr = parse_numbers(table.column("Corr"), "Corr", reasons)
    no_corr = np.isnan(corr) & ~np.isnan(sml)
    reasons.add(
        no_corr,
        "Corr is empty, so SML - Corr (the station magnitude without the network's station "
        "correction) cannot be formed; fill Corr or drop the row",
    )
    # A row without Corr is rejected above; its SML stands in so the reason stays one sentence.
    frame["magnitude"] = np.where(no_corr, sml, np.round(sml - corr, 2))
    stamp = pc.binary_join_element_wise(table.column("Date"), table.column("Time"), "T")
    frame["origin_time"] = parse_times(stamp)
    text = table.select(["Evid", "Net", "Sta", "Cmp"]).to_pandas()
    frame["event_id"] = text["Evid"]
    frame["network"] = text["Net"]
    frame["station"] = text["Sta"]
    frame["channel"] = text["Cmp"]
    n = table.num_rows
    frame["magnitude_type"] = np.full(n, "ML", dtype=object)
    frame["amplitude_unit"] = np.where(np.isnan(frame["amplitude"]), "", "mm_wa").astype(object)
    frame["problems"] = reasons.text
    frame["source_location"] = line_locations(body.lines)
    records, rejected = validate_records(
        pd.DataFrame(frame), source_file=shown, raw=body.raw, magnitude_range=magnitude_range
    )
    if not body.rejected.empty:
        rejected = sort_by_line(pd.concat([rejected, body.rejected], ignore_index=True))
    return ReadResult(source_file=shown, records=records, rejected=rejected)
