"""Every flag and method name magfuse writes, with its meaning: one spelling each.

Flags are short lowercase words joined by hyphens (``censoring-used``), never underscores;
several flags in one field are joined by ``;``. The same spelling is used in every table, export,
report and JSON body. The ``method`` values of network magnitudes follow the same style.

=========================  ====================================================================
where                      flags
=========================  ====================================================================
event (``flags`` of a      :data:`EVENT_FLAGS` (:class:`fusion.network.network_magnitude.EventFlag`)
network magnitude)
station magnitude          :data:`ROW_FLAGS` (:class:`fusion.network.network_magnitude.RowFlag`)
(contribution rows)
station unit (report)      :data:`STATION_FLAGS` (:class:`fusion.report.station_table.StationFlag`)
=========================  ====================================================================

Names written by earlier magfuse versions are mapped to today's on read
(:data:`RENAMED`, :func:`upgrade_methods`, :func:`upgrade_flags`): stored files are never
rewritten for a rename, and every reader sees one spelling.
"""

from __future__ import annotations

from typing import Final

import pyarrow as pa
import pyarrow.compute as pc

__all__ = [
    "EVENT_FLAGS",
    "METHODS",
    "RENAMED",
    "ROW_FLAGS",
    "STATION_FLAGS",
    "flag_table",
    "upgrade_flags",
    "upgrade_methods",
]

#: How a network magnitude was computed (``method`` column).
METHODS: Final[dict[str, str]] = {
    "gls": "generalised least squares of the corrected station magnitudes (docs/estimator.md)",
    "robust-gls": "the same with Student-t weights that down-weight outlying stations",
    "single-station": "one detecting station: its corrected magnitude",
    "censored-likelihood": (
        "maximum likelihood that also uses the non-detections (the event was below those "
        "stations' noise thresholds) and clipped readings (Ringdal 1976; docs/censoring.md)"
    ),
    "none": "no usable detection: no magnitude",
}

#: Flags of a network magnitude (event table ``flags``).
EVENT_FLAGS: Final[dict[str, str]] = {
    "no-usable-detection": "no detecting station with a finite magnitude: no magnitude",
    "single-station": "one detecting station; the magnitude rests on it alone",
    "inconsistent": "the station magnitudes disagree more than their errors allow; SE widened",
    "negative-weight": "a station has a negative weight (strongly correlated pair)",
    "unknown-station": "a station the model does not know contributed (default bias and error)",
    "outlier": "a station magnitude was down-weighted as an outlier",
    "not-converged": "the iterations did not meet their tolerance",
    "censoring-used": "the non-detections entered the magnitude (censored likelihood)",
    "censoring-uncorrected": (
        "informative non-detections or clipped readings exist, but the magnitude is from the "
        "detections alone (censoring off, or its fit failed): likely biased high"
    ),
    "invalid-magnitude": "a station magnitude was not a finite number and was left out",
    "likely-biased-high": (
        "detections only, and the detection model expects them biased high (small event seen "
        "only by the stations whose reading happened to be high)"
    ),
}

#: Flags of a station magnitude (contribution table ``flags``).
ROW_FLAGS: Final[dict[str, str]] = {
    "outlier": "down-weighted as an outlier (low robust weight)",
    "unknown-station": "station not in the model: default bias and error used",
    "prior-dominated": "the station's parameters rest mostly on the prior (few readings)",
    "negative-weight": "the station's weight is negative (strongly correlated pair)",
    "clipped": "the reading was clipped: the true value is at least this large",
    "non-detection": "the station was operating and saw nothing (below its noise threshold)",
    "censoring-used": "this non-detection or clipped reading entered the censored likelihood",
    "invalid-magnitude": "the magnitude was not a finite number and was left out",
}

#: Flags of a station unit in the station report (``flags`` of the reliability table).
STATION_FLAGS: Final[dict[str, str]] = {
    "distance-trend": "residuals trend with log10 epicentral distance (|t| > 3)",
    "magnitude-trend": "residuals trend with the network magnitude (|t| > 3)",
    "residual-offset": "the mean residual in the report window differs from 0 (|t| > 3)",
    "many-outliers": "the outlier rate in the window is above the alert rate",
    "drift-alarm": "a bias-step alarm in the unit's epoch",
    "correlated-pair": "the unit has a flagged partner with correlated errors",
    "uncalibrated": "no reference station reaches the unit: its bias has no common level",
    "prior-dominated": "the prior carries more information than the unit's few readings",
}

#: Old spelling -> today's, for values read from stores written by earlier versions.
RENAMED: Final[dict[str, str]] = {
    "censored_ml": "censored-likelihood",
    "robust_gls": "robust-gls",
    "single_station": "single-station",
    "no-detection": "no-usable-detection",
    "correlated": "correlated-pair",
}


_OLD_METHODS: Final = ("censored_ml", "robust_gls", "single_station")
#: Old flag names that stores hold (station flags are computed by each report, never stored).
_OLD_STORED_FLAGS: Final = ("no-detection",)


def _may_contain(values: pa.Array | pa.ChunkedArray, needle: bytes) -> bool:
    """Whether the text bytes of ``values`` may hold ``needle`` (a fast search of the raw
    string buffers; true on any doubt, e.g. a type without a plain data buffer)."""
    chunks = values.chunks if isinstance(values, pa.ChunkedArray) else [values]
    for chunk in chunks:
        if not (pa.types.is_string(chunk.type) or pa.types.is_large_string(chunk.type)):
            return True
        data = chunk.buffers()[2]
        if data is not None and needle in data.to_pybytes():
            return True
    return False


def flag_table(flags: dict[str, str]) -> list[tuple[str, str, str]]:
    """``(flag, "-", meaning)`` rows for an export sidecar's table."""
    return [(name, "-", meaning) for name, meaning in flags.items()]


def upgrade_methods(values: pa.Array | pa.ChunkedArray) -> pa.Array | pa.ChunkedArray:
    """``method`` values with old spellings replaced (exact matches; vectorised)."""
    if not _may_contain(values, b"_"):  # today's names have no underscore; the old ones do
        return values
    out = values
    for old in _OLD_METHODS:
        out = pc.if_else(pc.equal(out, old), pa.scalar(RENAMED[old]), out)
    return out


def upgrade_flags(values: pa.Array | pa.ChunkedArray) -> pa.Array | pa.ChunkedArray:
    """``;``-joined flag lists with old spellings replaced (whole flags only; vectorised)."""
    out = values
    for old in _OLD_STORED_FLAGS:
        if not _may_contain(out, old.encode()):
            continue  # the usual case: nothing to rename
        out = pc.replace_substring_regex(
            out, pattern=rf"(^|;){old}(;|$)", replacement=rf"\1{RENAMED[old]}\2"
        )
    return out
