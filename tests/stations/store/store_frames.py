"""Frames shaped like a reader's ``ReadResult`` (records and rejected), built directly.

The store takes the frames, not the readers, so its tests build them here: columns
``stations.schema.INPUT_COLUMNS`` with the dtypes readers give (``origin_time`` as
``datetime64[us, UTC]``, floats, bools, pandas strings).
"""

from __future__ import annotations

import json

import numpy as np
import pandas as pd

from stations.schema import INPUT_COLUMNS
from tests.datasets import YELLOWSTONE_CSV

#: The real open data set of the project (Holt, Pechmann & Koper 2022, BSSA 112(2)), read in
#: place from the folder next to the repository.
YELLOWSTONE = YELLOWSTONE_CSV


def _str(values: object) -> pd.Series:
    return pd.Series(pd.array(np.asarray(values, dtype=object), dtype="str"))


def records(
    event_id: list[str] | np.ndarray,
    station_id: list[str] | np.ndarray,
    magnitude: list[float] | np.ndarray,
    *,
    origin_time: list[str] | np.ndarray | pd.DatetimeIndex | None = None,
    magnitude_type: str | list[str] | np.ndarray = "ML",
    channel: str | list[str | None] | None = "HHZ",
    detected: list[bool] | np.ndarray | None = None,
    noise_threshold: list[float] | np.ndarray | None = None,
    source_file: str = "test.csv",
) -> pd.DataFrame:
    """A records frame; by default every event's origin is 2024-01-01 plus its index hours."""
    ev = np.asarray(event_id, dtype=object)
    n = ev.size
    if origin_time is None:
        codes, _ = pd.factorize(ev)
        origin = pd.Timestamp("2024-01-01T00:00:00Z") + pd.to_timedelta(codes, unit="h")
    else:
        origin = pd.to_datetime(np.asarray(origin_time), utc=True)
    mag = np.asarray(magnitude, dtype=float)
    det = ~np.isnan(mag) if detected is None else np.asarray(detected, dtype=bool)
    mtype = np.broadcast_to(np.asarray(magnitude_type, dtype=object), (n,))
    chan: object = np.broadcast_to(np.asarray(channel, dtype=object), (n,)) if n else []
    nan = np.full(n, np.nan)
    frame = pd.DataFrame(
        {
            "event_id": _str(ev),
            "origin_time": pd.Series(origin).astype("datetime64[us, UTC]"),
            "event_latitude": np.full(n, 44.5),
            "event_longitude": np.full(n, -110.6),
            "event_depth": np.full(n, 5.0),
            "station_id": _str(station_id),
            "channel": _str(chan),
            "magnitude_type": _str(mtype),
            "magnitude": mag,
            "detected": det,
            "clipped": np.zeros(n, dtype=bool),
            "noise_threshold": nan if noise_threshold is None else np.asarray(noise_threshold),
            "amplitude": nan,
            "amplitude_unit": _str([None] * n),
            "period": nan,
            "distance_km": np.full(n, 50.0),
            "distance_deg": nan,
            "hypocentral_distance_km": nan,
            "azimuth": nan,
            "source_weight": nan,
            "formula": _str([None] * n),
            "source_file": _str([source_file] * n),
            "source_location": _str([f"line {i + 2}" for i in range(n)]),
        }
    )
    return frame[list(INPUT_COLUMNS)]


def rejected(
    locations: list[str], reasons: list[str], source_file: str = "test.csv"
) -> pd.DataFrame:
    """A rejected frame (``source_file, source_location, reason, raw``)."""
    return pd.DataFrame(
        {
            "source_file": [source_file] * len(locations),
            "source_location": locations,
            "reason": reasons,
            "raw": [json.dumps({"where": loc}) for loc in locations],
        }
    )


def random_records(
    rng: np.random.Generator,
    n_events: int,
    *,
    n_stations: int = 40,
    start: str = "2024-01-01",
    days: float = 90.0,
    types: tuple[str, ...] = ("ML",),
    prefix: str = "ev",
) -> pd.DataFrame:
    """Several stations per event, unique keys, events spread over ``days`` from ``start``."""
    k = rng.integers(2, 8, n_events)
    ev_of_row = np.repeat(np.arange(n_events), k)
    within = np.arange(ev_of_row.size) - np.repeat(np.cumsum(k) - k, k)
    station = (rng.integers(0, n_stations, n_events)[ev_of_row] + within) % n_stations
    t0 = pd.Timestamp(start, tz="UTC")
    offsets = np.sort(rng.uniform(0, days * 86_400, n_events))
    origin = t0 + pd.to_timedelta(offsets[ev_of_row], unit="s")
    mtype = np.asarray(types, dtype=object)[rng.integers(0, len(types), n_events)][ev_of_row]
    mag = rng.normal(2.0, 0.5, ev_of_row.size)
    mag[rng.random(ev_of_row.size) < 0.1] = np.nan  # some non-detections
    frame = records(
        [f"{prefix}{e:05d}" for e in ev_of_row],
        [f"XX.S{s:03d}." for s in station],
        mag,
        origin_time=origin.to_numpy(),
        magnitude_type=mtype,
        noise_threshold=np.where(np.isnan(mag), 1.5, np.nan),
    )
    return frame
