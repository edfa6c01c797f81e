"""Long-format station magnitudes of one magnitude type: the array contract of the estimators.

Every numerical routine in :mod:`fusion` works on an :class:`ObservationSet`: flat arrays of
length ``nnz`` (one entry per station-event cell that has a row), sorted by event, with integer
codes into the event table (length ``N``) and the station table (length ``K``). Per-event sums
are ``np.bincount(obs.event, weights=x, minlength=obs.n_events)`` and broadcast back with
``[obs.event]``; per-station sums use ``obs.station`` likewise (docs/estimator.md §4). No routine
loops over events or rows in Python.

Cell states (docs/model.md §2.1): ``detected`` rows carry a magnitude (``clipped`` ones a lower
bound); non-detections have ``magnitude = NaN`` and a ``threshold`` if the noise level is known;
unavailable cells have no row.
"""

from __future__ import annotations

from dataclasses import dataclass, field
from typing import TYPE_CHECKING, Any

import numpy as np
from numpy.typing import ArrayLike, NDArray

from stations.errors import InsufficientDataError

if TYPE_CHECKING:
    import pandas as pd

__all__ = ["ObservationSet", "index_of"]


@dataclass(frozen=True, slots=True, eq=False)
class ObservationSet:
    """Station magnitudes of one magnitude type in long format, sorted by event.

    Attributes
    ----------
    magnitude_type : str
        The magnitude type all rows share (``ML``, ``mb``, ...).
    event_ids : ndarray of str, shape (N,)
        Event identifiers; ``event`` indexes into this.
    event_time : ndarray of datetime64[us], shape (N,)
        Origin times, UTC (timezone-naive ``datetime64`` holding UTC).
    station_ids : ndarray of str, shape (K,)
        Station identifiers (``NET.STA.LOC``, or a station-epoch key); ``station`` indexes here.
    event, station : ndarray of int64, shape (nnz,)
        Codes of each row; ``event`` is non-decreasing.
    magnitude : ndarray of float64, shape (nnz,)
        Station magnitude (magnitude units); NaN for non-detections.
    detected : ndarray of bool, shape (nnz,)
        True for a detection, False for "operating, no detection".
    clipped : ndarray of bool, shape (nnz,)
        True where a detection is clipped: ``magnitude`` is then a lower bound.
    threshold : ndarray of float64, shape (nnz,)
        Noise-threshold magnitude of a non-detection (magnitude units); NaN if unknown.
    distance_km : ndarray of float64, shape (nnz,)
        Epicentral distance in km; NaN if unknown.
    """

    magnitude_type: str
    event_ids: NDArray[Any]
    event_time: NDArray[np.datetime64]
    station_ids: NDArray[Any]
    event: NDArray[np.int64]
    station: NDArray[np.int64]
    magnitude: NDArray[np.float64]
    detected: NDArray[np.bool_]
    clipped: NDArray[np.bool_] = field(default_factory=lambda: np.zeros(0, bool))
    threshold: NDArray[np.float64] = field(default_factory=lambda: np.zeros(0))
    distance_km: NDArray[np.float64] = field(default_factory=lambda: np.zeros(0))

    def __post_init__(self) -> None:
        nnz = self.event.shape[0]
        # Optional columns default to "not clipped", "threshold unknown", "distance unknown".
        if self.clipped.shape[0] != nnz:
            object.__setattr__(self, "clipped", np.zeros(nnz, dtype=bool))
        if self.threshold.shape[0] != nnz:
            object.__setattr__(self, "threshold", np.full(nnz, np.nan))
        if self.distance_km.shape[0] != nnz:
            object.__setattr__(self, "distance_km", np.full(nnz, np.nan))
        for name in ("station", "magnitude", "detected"):
            if getattr(self, name).shape[0] != nnz:
                raise ValueError(
                    f"ObservationSet: {name} has length "
                    f"{getattr(self, name).shape[0]}, expected {nnz}"
                )
        if self.event_time.shape[0] != self.event_ids.shape[0]:
            raise ValueError("ObservationSet: event_time and event_ids differ in length")
        if nnz and np.any(np.diff(self.event) < 0):
            raise ValueError("ObservationSet: rows must be sorted by event")

    # -- sizes ---------------------------------------------------------------------------
    @property
    def n_events(self) -> int:
        """N, the number of events in the event table (some may have no detection)."""
        return int(self.event_ids.shape[0])

    @property
    def n_stations(self) -> int:
        """K, the number of stations in the station table."""
        return int(self.station_ids.shape[0])

    @property
    def n_obs(self) -> int:
        """nnz, the number of rows."""
        return int(self.event.shape[0])

    # -- construction ----------------------------------------------------------------------
    @classmethod
    def from_rows(
        cls,
        *,
        magnitude_type: str,
        event_id: ArrayLike,
        station_id: ArrayLike,
        magnitude: ArrayLike,
        origin_time: ArrayLike | None = None,
        detected: ArrayLike | None = None,
        clipped: ArrayLike | None = None,
        threshold: ArrayLike | None = None,
        distance_km: ArrayLike | None = None,
        station_ids: ArrayLike | None = None,
    ) -> ObservationSet:
        """Build from per-row columns (any order); codes events by first origin time.

        Parameters
        ----------
        event_id, station_id : array_like of str, shape (nnz,)
        magnitude : array_like of float, shape (nnz,)
            NaN where the row is a non-detection.
        origin_time : array_like of datetime64, shape (nnz,), optional
            Origin time of each row's event; events are ordered by time, then id.
        detected : array_like of bool, optional
            Default: ``~isnan(magnitude)``.
        station_ids : array_like of str, optional
            Fix the station table (and its order), e.g. to match a fitted model; rows whose
            station is not in it raise ``ValueError``.
        """
        ev_raw = np.asarray(event_id).astype(str)
        st_raw = np.asarray(station_id).astype(str)
        mag = np.asarray(magnitude, dtype=np.float64)
        nnz = ev_raw.shape[0]
        if nnz == 0:
            raise InsufficientDataError(f"no {magnitude_type} station magnitudes to work on")
        t_row = (
            np.zeros(nnz, dtype="datetime64[us]")
            if origin_time is None
            else np.asarray(origin_time).astype("datetime64[us]")
        )
        event_ids, first, ev_code = np.unique(ev_raw, return_index=True, return_inverse=True)
        ev_time = t_row[first]
        order_events = np.lexsort((event_ids, ev_time))
        rank = np.empty_like(order_events)
        rank[order_events] = np.arange(order_events.shape[0])
        ev = rank[ev_code].astype(np.int64)
        if station_ids is None:
            sta_table, st = np.unique(st_raw, return_inverse=True)
        else:
            sta_table = np.asarray(station_ids).astype(str)
            sorter = np.argsort(sta_table)
            pos = np.searchsorted(sta_table, st_raw, sorter=sorter)
            pos = np.clip(pos, 0, sta_table.shape[0] - 1)
            st = sorter[pos]
            unknown = sta_table[st] != st_raw
            if np.any(unknown):
                raise ValueError(f"station {st_raw[unknown][0]!r} is not in station_ids")
        det = ~np.isnan(mag) if detected is None else np.asarray(detected, dtype=bool)
        row_order = np.argsort(ev, kind="stable")

        def _opt(values: ArrayLike | None, dtype: Any, fill: Any) -> NDArray[Any]:
            if values is None:
                return np.full(nnz, fill, dtype=dtype)[row_order]
            return np.asarray(values, dtype=dtype)[row_order]

        return cls(
            magnitude_type=magnitude_type,
            event_ids=event_ids[order_events].astype(object),
            event_time=ev_time[order_events],
            station_ids=sta_table.astype(object),
            event=ev[row_order],
            station=np.asarray(st, dtype=np.int64)[row_order],
            magnitude=mag[row_order],
            detected=det[row_order],
            clipped=_opt(clipped, bool, False),
            threshold=_opt(threshold, np.float64, np.nan),
            distance_km=_opt(distance_km, np.float64, np.nan),
        )

    @classmethod
    def from_frame(
        cls, frame: pd.DataFrame, *, magnitude_type: str | None = None
    ) -> ObservationSet:
        """Build from a store frame (columns of :data:`stations.schema.RECORD_SCHEMA`).

        The frame must hold one magnitude type (or pass ``magnitude_type`` to select it) and
        only current revisions.
        """
        if magnitude_type is not None:
            frame = frame[frame["magnitude_type"] == magnitude_type]
        types = frame["magnitude_type"].unique()
        if len(types) != 1:
            raise InsufficientDataError(
                f"expected rows of one magnitude type, found {sorted(map(str, types))}; "
                "choose one with --type"
            )
        origin = frame["origin_time"]
        if getattr(origin.dtype, "tz", None) is not None:
            origin = origin.dt.tz_convert("UTC").dt.tz_localize(None)

        def col(name: str) -> Any:
            return frame[name].to_numpy(dtype=float, na_value=np.nan) if name in frame else None

        return cls.from_rows(
            magnitude_type=str(types[0]),
            event_id=frame["event_id"].to_numpy(dtype=str),
            station_id=frame["station_id"].to_numpy(dtype=str),
            magnitude=col("magnitude"),
            origin_time=origin.to_numpy(dtype="datetime64[us]"),
            detected=frame["detected"].to_numpy(dtype=bool),
            clipped=frame["clipped"].to_numpy(dtype=bool) if "clipped" in frame else None,
            threshold=col("noise_threshold"),
            distance_km=col("distance_km"),
        )

    # -- views -----------------------------------------------------------------------------
    def subset(self, mask: NDArray[np.bool_]) -> ObservationSet:
        """Rows where ``mask`` holds; the event and station tables (and codes) are unchanged."""
        return ObservationSet(
            magnitude_type=self.magnitude_type,
            event_ids=self.event_ids,
            event_time=self.event_time,
            station_ids=self.station_ids,
            event=self.event[mask],
            station=self.station[mask],
            magnitude=self.magnitude[mask],
            detected=self.detected[mask],
            clipped=self.clipped[mask],
            threshold=self.threshold[mask],
            distance_km=self.distance_km[mask],
        )

    def detections(self) -> ObservationSet:
        """Only the detected rows (clipped ones included, still flagged)."""
        return self.subset(self.detected)

    def event_counts(self) -> NDArray[np.int64]:
        """n_j: rows per event, shape (N,)."""
        return np.bincount(self.event, minlength=self.n_events).astype(np.int64)

    def station_counts(self) -> NDArray[np.int64]:
        """n_i: rows per station, shape (K,)."""
        return np.bincount(self.station, minlength=self.n_stations).astype(np.int64)


def index_of(table: NDArray[Any], keys: NDArray[Any]) -> NDArray[np.int64]:
    """Index of each key in ``table`` (unique ids), -1 when absent; vectorized (one sort).

    Parameters
    ----------
    table : ndarray of str, shape (T,)
        Unique ids (event, station or unit ids).
    keys : ndarray of str, shape (n,)
        Ids to look up.

    Returns
    -------
    ndarray of int64, shape (n,)
    """
    if table.shape[0] == 0:
        return np.full(keys.shape[0], -1, dtype=np.int64)
    sorter = np.argsort(table)
    pos = np.clip(np.searchsorted(table, keys, sorter=sorter), 0, table.shape[0] - 1)
    idx = sorter[pos]
    return np.where(table[idx] == keys, idx, -1).astype(np.int64)
