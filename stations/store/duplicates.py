"""The near-duplicate guard: one event must not enter the store twice under two ids.

The same earthquake reported by two sources can carry two event ids that the event-id rule
(:func:`stations.schema.canonical_event_ids`) cannot unite, e.g. two agencies' own numbers.
Stored twice, its station magnitudes would count twice in every fit and move station biases.
Before a batch is committed, each of its events is compared with the stored events under
*other* ids: two events whose origin times differ by at most :data:`NEAR_SECONDS` and whose
epicentres lie at most :data:`NEAR_KM` apart are reported, and by default the batch is
refused (``magfuse ingest --allow-near-duplicates`` accepts it). Both limits are common
practice for catalogue association, no source; they are far below the origin-time and
epicentre differences of two real, distinct events in one region (aftershocks follow each
other by more than a second). When either event has no epicentre, the time alone decides.

The comparison is vectorized: stored events are sorted by origin time, each batch event finds
its window with ``np.searchsorted``, and the candidate pairs are expanded with ``np.repeat``.
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import Final

import numpy as np
import pandas as pd
from numpy.typing import NDArray

__all__ = ["NEAR_KM", "NEAR_SECONDS", "NearDuplicate", "distinct_events", "near_duplicates"]

#: Largest origin-time difference of two ids of one event, seconds.
NEAR_SECONDS: Final = 1.0
#: Largest epicentre distance of two ids of one event, km.
NEAR_KM: Final = 10.0
_EARTH_RADIUS_KM: Final = 6371.0  # mean Earth radius (IUGG), km


@dataclass(frozen=True, slots=True)
class NearDuplicate:
    """A batch event that coincides with a stored event under another id."""

    new_id: str
    stored_id: str
    seconds: float
    km: float | None


def distinct_events(frame: pd.DataFrame) -> pd.DataFrame:
    """One row per event id: ``event_id``, ``t_us`` (int64 µs UTC), ``lat``, ``lon`` (deg)."""
    if frame.empty:
        return pd.DataFrame({"event_id": [], "t_us": [], "lat": [], "lon": []})
    first = frame.drop_duplicates("event_id")
    t = pd.to_datetime(first["origin_time"], utc=True).dt.tz_localize(None)
    return pd.DataFrame(
        {
            "event_id": first["event_id"].astype(str).to_numpy(dtype=object),
            "t_us": t.to_numpy(dtype="datetime64[us]").astype(np.int64),
            "lat": first["event_latitude"].to_numpy(dtype=float),
            "lon": first["event_longitude"].to_numpy(dtype=float),
        }
    )


def _haversine_km(
    lat1: NDArray[np.float64],
    lon1: NDArray[np.float64],
    lat2: NDArray[np.float64],
    lon2: NDArray[np.float64],
) -> NDArray[np.float64]:
    """Great-circle distance on a sphere of the mean Earth radius, km (haversine formula)."""
    p1, p2 = np.radians(lat1), np.radians(lat2)
    dp, dl = p2 - p1, np.radians(lon2 - lon1)
    a = np.sin(dp / 2) ** 2 + np.cos(p1) * np.cos(p2) * np.sin(dl / 2) ** 2
    return 2 * _EARTH_RADIUS_KM * np.arcsin(np.sqrt(np.clip(a, 0.0, 1.0)))


def near_duplicates(
    batch: pd.DataFrame,
    stored: pd.DataFrame,
    *,
    seconds: float = NEAR_SECONDS,
    km: float = NEAR_KM,
) -> list[NearDuplicate]:
    """Pairs (batch event, stored event under another id) that coincide in time and place.

    Parameters
    ----------
    batch, stored : pandas.DataFrame
        Outputs of :func:`distinct_events`.
    seconds : float
        Largest origin-time difference, s.
    km : float
        Largest epicentre distance, km (not applied when either epicentre is unknown).

    Returns
    -------
    list of NearDuplicate
        Ordered by batch event, then time difference.
    """
    if batch.empty or stored.empty:
        return []
    order = np.argsort(stored["t_us"].to_numpy(), kind="stable")
    s_t = stored["t_us"].to_numpy()[order]
    tol = round(seconds * 1e6)
    b_t = batch["t_us"].to_numpy()
    lo = np.searchsorted(s_t, b_t - tol, side="left")
    hi = np.searchsorted(s_t, b_t + tol, side="right")
    counts = hi - lo
    if not counts.any():
        return []
    bi = np.repeat(np.arange(len(batch)), counts)
    starts = np.repeat(lo - np.concatenate([[0], np.cumsum(counts)[:-1]]), counts)
    si = order[starts + np.arange(bi.size)]
    b_ids = batch["event_id"].to_numpy(dtype=object)[bi]
    s_ids = stored["event_id"].to_numpy(dtype=object)[si]
    dist = _haversine_km(
        batch["lat"].to_numpy(dtype=float)[bi],
        batch["lon"].to_numpy(dtype=float)[bi],
        stored["lat"].to_numpy(dtype=float)[si],
        stored["lon"].to_numpy(dtype=float)[si],
    )
    keep = (b_ids != s_ids) & (np.isnan(dist) | (dist <= km))
    dt = np.abs(b_t[bi] - stored["t_us"].to_numpy()[si]) / 1e6
    idx = np.flatnonzero(keep)
    idx = idx[np.lexsort((dt[idx], bi[idx]))]
    return [
        NearDuplicate(
            str(b_ids[i]),
            str(s_ids[i]),
            float(dt[i]),
            None if np.isnan(dist[i]) else float(dist[i]),
        )
        for i in idx
    ]
