"""Text formats of the demo files: fixed digits, fixed time format, fixed line ends.

The writers take the generator's tables (pandas DataFrames) and produce byte-identical text for
identical input: numbers are formatted one column at a time with a fixed number of decimals (or
significant digits for amplitudes), times as ISO 8601 UTC with ``Z``, booleans as ``true`` /
``false``, missing values as empty fields, lines end in ``\\n``, files are UTF-8. QuakeML goes
through obspy's writer with every resource identifier set, so no random identifier enters.

============================ ==================================== ============================
quantity                     text                                 example
============================ ==================================== ============================
magnitude, noise threshold   3 decimals                           ``1.214``
latitude, longitude          4 decimals (about 11 m)              ``-46.4706``
distances, depth, azimuth    0.1 km / 0.1 deg; degrees 3 decimals ``39.6``, ``0.357``
amplitude                    4 significant digits, positional     ``69.27``, ``13650``
period                       0.01 s                               ``0.20``
origin time                  ISO 8601, milliseconds, ``Z``        ``2025-01-01T03:38:28.557Z``
============================ ==================================== ============================
"""

from __future__ import annotations

import itertools
from pathlib import Path
from typing import TYPE_CHECKING, Final

import numpy as np
import pandas as pd
from numpy.typing import ArrayLike

if TYPE_CHECKING:
    from sample_events.generate_demo import DemoPaths

__all__ = [
    "CSV_COLUMNS",
    "RESOURCE_PREFIX",
    "bools",
    "fixed",
    "iso_ms",
    "iso_s",
    "significant",
    "write_quakeml_month",
    "write_readings_csv",
    "write_table",
    "write_truth_tables",
]

#: Header of the demo CSV, in this order (a column set ``stations.readers.csv`` reads).
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
    "detected",
    "noise_threshold",
    "amplitude",
    "amplitude_unit",
    "period",
    "distance_km",
    "distance_deg",
    "hypocentral_distance_km",
    "azimuth",
    "source_weight",
    "clipped",
)

#: Prefix of every QuakeML resource identifier. The authority ends in ``.invalid``, a name
#: reserved by RFC 2606 that can never belong to a real organisation.
RESOURCE_PREFIX: Final = "smi:magfuse.invalid/demo2025"


# -- text of one column ----------------------------------------------------------------------


def fixed(values: ArrayLike, decimals: int) -> list[str]:
    """Fixed-point text with ``decimals`` decimals; NaN becomes an empty field."""
    arr = np.asarray(values, dtype=np.float64)
    return ["" if np.isnan(v) else f"{v:.{decimals}f}" for v in arr.tolist()]


def significant(values: ArrayLike, digits: int = 4) -> list[str]:
    """Positional text with ``digits`` significant digits, trailing zeros trimmed; NaN is ''.

    ``numpy.format_float_positional`` with ``fractional=False`` rounds to significant digits
    (round half to even on the binary value), e.g. 123456 -> ``123500``, 0.012345 -> ``0.01235``.
    """
    arr = np.asarray(values, dtype=np.float64)
    return [
        ""
        if np.isnan(v)
        else np.format_float_positional(
            v, precision=digits, unique=False, fractional=False, trim="-"
        )
        for v in arr.tolist()
    ]


def bools(values: ArrayLike) -> list[str]:
    """``true`` / ``false``."""
    return ["true" if v else "false" for v in np.asarray(values, dtype=bool).tolist()]


def iso_ms(time_ms: ArrayLike, year_start: np.datetime64) -> list[str]:
    """ISO 8601 UTC text with milliseconds and ``Z`` of times given in ms after ``year_start``."""
    t = year_start + np.asarray(time_ms, dtype=np.int64).astype("timedelta64[ms]")
    return [f"{s}Z" for s in np.datetime_as_string(t, unit="ms").tolist()]


def iso_s(times: ArrayLike) -> list[str]:
    """ISO 8601 UTC text to the second with ``Z``; NaT becomes an empty field."""
    t = np.asarray(times, dtype="datetime64[s]")
    text = np.datetime_as_string(t, unit="s").tolist()
    return ["" if s == "NaT" else f"{s}Z" for s in text]


def write_table(path: Path, columns: dict[str, list[str]]) -> None:
    """Write text columns as comma-separated UTF-8 with a header and ``\\n`` line ends.

    Raises
    ------
    ValueError
        If a field holds a comma, a double quote or a line break (the demo never quotes).
    """
    for name, col in columns.items():
        if any(("," in v or '"' in v or "\n" in v) for v in col):
            raise ValueError(f"{path.name}: column {name!r} holds a comma, quote or line break")
    lines = [",".join(columns)]
    lines.extend(",".join(row) for row in zip(*columns.values(), strict=True))
    with Path(path).open("w", encoding="utf-8", newline="\n") as fh:
        fh.write("\n".join(lines) + "\n")


# -- the files -------------------------------------------------------------------------------


def write_readings_csv(readings: pd.DataFrame, path: Path, *, year_start: np.datetime64) -> None:
    """The station-magnitude CSV: :data:`CSV_COLUMNS` in order, one row per reading.

    ``readings`` holds the CSV columns (``origin_time`` as ``time_ms``, milliseconds after
    ``year_start``); extra truth columns are not written.
    """
    r = readings
    cols: dict[str, list[str]] = {
        "event_id": r["event_id"].tolist(),
        "origin_time": iso_ms(r["time_ms"], year_start),
        "event_latitude": fixed(r["event_latitude"], 4),
        "event_longitude": fixed(r["event_longitude"], 4),
        "event_depth": fixed(r["event_depth"], 1),
        "network": r["network"].tolist(),
        "station": r["station"].tolist(),
        "location": r["location"].tolist(),
        "channel": r["channel"].tolist(),
        "magnitude_type": r["magnitude_type"].tolist(),
        "magnitude": fixed(r["magnitude"], 3),
        "detected": bools(r["detected"]),
        "noise_threshold": fixed(r["noise_threshold"], 3),
        "amplitude": significant(r["amplitude"], 4),
        "amplitude_unit": r["amplitude_unit"].tolist(),
        "period": fixed(r["period"], 2),
        "distance_km": fixed(r["distance_km"], 1),
        "distance_deg": fixed(r["distance_deg"], 3),
        "hypocentral_distance_km": fixed(r["hypocentral_distance_km"], 1),
        "azimuth": fixed(r["azimuth"], 1),
        "source_weight": fixed(r["source_weight"], 3),
        "clipped": bools(r["clipped"]),
    }
    if tuple(cols) != CSV_COLUMNS:  # pragma: no cover - guards an edit of this function
        raise RuntimeError("demo CSV columns drifted from CSV_COLUMNS")
    write_table(path, cols)


def write_truth_tables(
    paths: DemoPaths,
    *,
    stations: pd.DataFrame,
    events: pd.DataFrame,
    pairs: pd.DataFrame,
    steps: pd.DataFrame,
    outliers: pd.DataFrame,
    epochs: pd.DataFrame,
    year_start: np.datetime64,
) -> None:
    """The five truth tables and the station-metadata CSV (columns: ``sample_events`` docs)."""
    s = stations
    write_table(
        paths.truth_stations,
        {
            "station_id": s["station_id"].tolist(),
            "bias": fixed(s["bias"], 4),
            "sigma": fixed(s["sigma"], 4),
            "latitude": fixed(s["latitude"], 4),
            "longitude": fixed(s["longitude"], 4),
            "elevation": fixed(s["elevation"], 0),
            "noise_amplitude_nm": significant(s["noise_amplitude_nm"], 4),
            "clip_amplitude_nm": significant(s["clip_amplitude_nm"], 4),
            "notes": s["notes"].tolist(),
        },
    )
    e = events
    write_table(
        paths.truth_events,
        {
            "event_id": e["event_id"].tolist(),
            "origin_time": iso_ms(e["time_ms"], year_start),
            "latitude": fixed(e["latitude"], 4),
            "longitude": fixed(e["longitude"], 4),
            "depth": fixed(e["depth"], 1),
            "magnitude": fixed(e["magnitude"], 4),
            "zone": e["zone"].tolist(),
        },
    )
    write_table(
        paths.truth_pairs,
        {
            "station_id_1": pairs["station_id_1"].tolist(),
            "station_id_2": pairs["station_id_2"].tolist(),
            "rho": fixed(pairs["rho"], 2),
            "kind": pairs["kind"].tolist(),
            "notes": pairs["notes"].tolist(),
        },
    )
    write_table(
        paths.truth_steps,
        {
            "station_id": steps["station_id"].tolist(),
            "time": [f"{t}Z" for t in steps["time"].tolist()],
            "step": fixed(steps["step"], 2),
            "bias_before": fixed(steps["bias_before"], 4),
            "bias_after": fixed(steps["bias_after"], 4),
            "notes": steps["notes"].tolist(),
        },
    )
    write_table(
        paths.truth_outliers,
        {
            "event_id": outliers["event_id"].tolist(),
            "station_id": outliers["station_id"].tolist(),
            "offset": fixed(outliers["offset"], 4),
            "detected": bools(outliers["detected"]),
        },
    )
    write_table(
        paths.stations,
        {
            "network": epochs["network"].tolist(),
            "station": epochs["station"].tolist(),
            "location": epochs["location"].tolist(),
            "latitude": fixed(epochs["latitude"], 4),
            "longitude": fixed(epochs["longitude"], 4),
            "elevation": fixed(epochs["elevation"], 0),
            "start": iso_s(epochs["start"]),
            "end": iso_s(epochs["end"]),
        },
    )


def write_quakeml_month(
    readings: pd.DataFrame,
    path: Path,
    *,
    year: int,
    month: int,
    year_start: np.datetime64,
) -> int:
    """QuakeML 1.2 (obspy ``Catalog.write(format="QUAKEML")``) of the events of one month.

    Each event gets its origin (depth in m), one Amplitude per detection
    (``generic_amplitude`` in m, unit ``"m"``, period in s, waveform id, type ``IAML``: the
    IASPEI standard amplitude name for ML, from memory), one StationMagnitude per detection
    and one network ML: the plain mean of the unclipped station magnitudes, rounded to 3
    decimals, with one contribution per station magnitude (residual = station magnitude −
    network magnitude; weight 1, or 0 for a clipped reading, which also carries a comment).
    Non-detections have no QuakeML counterpart and are left out. Every resource identifier is
    set explicitly (obspy would otherwise draw random ones), so the file is reproducible.

    Returns
    -------
    int
        The number of events written.
    """
    from obspy import UTCDateTime
    from obspy.core.event import (
        Amplitude,
        Catalog,
        Comment,
        Event,
        Magnitude,
        Origin,
        ResourceIdentifier,
        StationMagnitude,
        StationMagnitudeContribution,
        WaveformStreamID,
    )

    month_start = np.datetime64(f"{year}-{month:02d}-01T00:00:00", "ms")
    month_end = (
        np.datetime64(f"{year + 1}-01-01T00:00:00", "ms")
        if month == 12
        else np.datetime64(f"{year}-{month + 1:02d}-01T00:00:00", "ms")
    )
    lo = int((month_start - year_start) / np.timedelta64(1, "ms"))
    hi = int((month_end - year_start) / np.timedelta64(1, "ms"))
    r = readings
    rows = r[(r["time_ms"] >= lo) & (r["time_ms"] < hi) & r["detected"]].reset_index(drop=True)
    amp_text = significant(rows["amplitude"], 4)
    mag_text = fixed(rows["magnitude"], 3)
    mag_value = np.array([float(t) for t in mag_text])
    time_text = iso_ms(rows["time_ms"], year_start)
    clipped_all = rows["clipped"].to_numpy(dtype=bool)
    catalog = Catalog(
        resource_id=ResourceIdentifier(f"{RESOURCE_PREFIX}/catalog/{year}-{month:02d}"),
        description=(
            "Invented demo network (synthetic data; region, codes and coordinates are fictional)"
        ),
    )
    ev_col = rows["event_id"].to_numpy()
    starts = np.flatnonzero(np.r_[True, ev_col[1:] != ev_col[:-1]])
    # One obspy object per reading: building the object model is inherently per item.
    for a, b in itertools.pairwise([*starts.tolist(), len(rows)]):
        first = rows.iloc[a]
        ev_id = str(first["event_id"])
        base = f"{RESOURCE_PREFIX}/{ev_id}"
        origin = Origin(
            resource_id=ResourceIdentifier(f"{base}/origin"),
            time=UTCDateTime(time_text[a]),
            latitude=float(first["event_latitude"]),
            longitude=float(first["event_longitude"]),
            depth=float(round(float(first["event_depth"]) * 1000.0)),
            evaluation_mode="manual",
        )
        clipped = clipped_all[a:b]
        used = ~clipped if (~clipped).any() else np.ones_like(clipped)
        network_mag = round(float(np.mean(mag_value[a:b][used])), 3)
        amplitudes, station_mags, contributions = [], [], []
        for q in range(a, b):
            row = rows.iloc[q]
            code = f"{row['network']}.{row['station']}.{row['location']}.{row['channel']}"
            wid = WaveformStreamID(
                network_code=str(row["network"]),
                station_code=str(row["station"]),
                location_code=str(row["location"]),
                channel_code=str(row["channel"]),
            )
            amp = Amplitude(
                resource_id=ResourceIdentifier(f"{base}/amplitude/{code}"),
                generic_amplitude=float(amp_text[q] + "e-9"),
                type="IAML",
                unit="m",
                period=float(row["period"]),
                waveform_id=wid,
                magnitude_hint="ML",
            )
            if clipped_all[q]:
                amp.comments.append(
                    Comment(
                        resource_id=ResourceIdentifier(f"{base}/amplitude/{code}/comment"),
                        text="clipped: the amplitude is a lower bound",
                    )
                )
            amplitudes.append(amp)
            sm = StationMagnitude(
                resource_id=ResourceIdentifier(f"{base}/stationmagnitude/{code}"),
                origin_id=origin.resource_id,
                mag=float(mag_text[q]),
                station_magnitude_type="ML",
                amplitude_id=amp.resource_id,
                waveform_id=wid,
            )
            station_mags.append(sm)
            contributions.append(
                StationMagnitudeContribution(
                    station_magnitude_id=sm.resource_id,
                    residual=round(float(mag_value[q]) - network_mag, 3),
                    weight=1.0 if used[q - a] else 0.0,
                )
            )
        magnitude = Magnitude(
            resource_id=ResourceIdentifier(f"{base}/magnitude/ML"),
            mag=network_mag,
            magnitude_type="ML",
            origin_id=origin.resource_id,
            method_id=ResourceIdentifier(f"{RESOURCE_PREFIX}/method/plain_mean"),
            station_count=int(used.sum()),
            station_magnitude_contributions=contributions,
            evaluation_mode="manual",
        )
        event = Event(
            resource_id=ResourceIdentifier(f"{RESOURCE_PREFIX}/event/{ev_id}"),
            event_type="earthquake",
            origins=[origin],
            magnitudes=[magnitude],
            station_magnitudes=station_mags,
            amplitudes=amplitudes,
        )
        event.preferred_origin_id = origin.resource_id
        event.preferred_magnitude_id = magnitude.resource_id
        catalog.append(event)
    catalog.write(str(path), format="QUAKEML")
    return len(catalog)
