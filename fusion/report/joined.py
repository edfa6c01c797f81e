"""The report window and the contribution rows joined to their unit and event, once.

Every table and figure of the report reads the same integer codes: the unit (row of
``stations``) and the event (row of ``events``) of each contribution row, and the row arrays the
residual analysis uses. They are computed here once, vectorized (hash look-ups per category or
per value, no loop over rows).
"""

from __future__ import annotations

import dataclasses
from dataclasses import dataclass
from typing import Any

import numpy as np
import pandas as pd
from numpy.typing import NDArray

from fusion.report.inputs import ReportInputs, as_bool, codes_in
from stations.errors import ConfigError

__all__ = ["JoinedRows", "apply_window", "join_rows", "to_utc_timestamp"]


def to_utc_timestamp(value: Any, name: str = "since") -> pd.Timestamp:
    """A time as a UTC :class:`pandas.Timestamp` (naive values are UTC).

    Raises
    ------
    ConfigError
        If ``value`` is not a time (the message names the parameter and shows the form).
    """
    try:
        ts = pd.Timestamp(value)
    except (ValueError, TypeError):
        raise ConfigError(
            f"The {name!r} parameter must be a date or time such as 2025-01-31 or "
            f"2025-01-31T12:00Z. Got {value!r} instead."
        ) from None
    if ts is pd.NaT:
        raise ConfigError(f"The {name!r} parameter must be a date or time. Got NaT instead.")
    return ts.tz_localize("UTC") if ts.tzinfo is None else ts.tz_convert("UTC")


def apply_window(inputs: ReportInputs, since: Any = None) -> ReportInputs:
    """Keep the events with origin time >= ``since`` and their contribution rows.

    Parameters
    ----------
    inputs : ReportInputs
        Validated inputs.
    since : date, time or str, optional
        Start of the window (UTC when no zone is given); None keeps everything.

    Returns
    -------
    ReportInputs
        A copy with ``events`` and ``contributions`` cut; stations, pairs and drift alarms
        belong to the model and are kept whole.

    Raises
    ------
    ConfigError
        If ``since`` is not a time.
    """
    if since is None:
        return inputs
    start = to_utc_timestamp(since)
    ev = inputs.events
    times = pd.to_datetime(ev["origin_time"], utc=True)
    keep = (times >= start).to_numpy()
    events = ev.loc[keep].reset_index(drop=True)
    code = codes_in(inputs.contributions["event_id"], pd.Index(events["event_id"].astype(str)))
    contributions = inputs.contributions.loc[code >= 0].reset_index(drop=True)
    return dataclasses.replace(inputs, events=events, contributions=contributions)


@dataclass(frozen=True, slots=True, eq=False)
class JoinedRows:
    """Contribution rows with their unit and event codes and the arrays the report uses.

    Attributes
    ----------
    unit, event : ndarray of int, shape (n_rows,)
        Row of ``stations`` / ``events`` of each contribution row (−1: not in the table).
    detected : ndarray of bool
        Detection rows (``detected`` column, else a finite ``corrected_magnitude``).
    residual, weight, robust_weight, z : ndarray of float
        As in the contributions; ``robust_weight`` is 1 and ``z`` NaN where the column is
        absent.
    distance_km : ndarray of float
        Epicentral distance (NaN if unknown).
    event_magnitude : ndarray of float
        Network magnitude of the row's event.
    event_time : ndarray of datetime64[us]
        Origin time of the row's event (UTC, naive).
    analysable : ndarray of bool
        Rows that carry information on the station: detected, a known unit, a finite residual,
        an event with at least two stations (with one station the residual is 0 by
        construction), and not selection-prone: where the reading's noise threshold t is
        known, the network magnitude plus the station bias is at least 2σ above it (a reading
        near its threshold was reported because its error was high; docs/censoring.md §9).
    order : ndarray of int
        Row indices sorted by unit (stable), and ``unit_start`` the first position of each
        unit in it (length K + 1), for per-unit slices without a scan.
    """

    unit: NDArray[np.int64]
    event: NDArray[np.int64]
    detected: NDArray[np.bool_]
    residual: NDArray[np.float64]
    weight: NDArray[np.float64]
    robust_weight: NDArray[np.float64]
    z: NDArray[np.float64]
    distance_km: NDArray[np.float64]
    event_magnitude: NDArray[np.float64]
    event_time: NDArray[np.datetime64]
    analysable: NDArray[np.bool_]
    order: NDArray[np.int64]
    unit_start: NDArray[np.int64]

    def rows_of_unit(self, k: int) -> NDArray[np.int64]:
        """Row indices of unit ``k`` (all rows, analysable or not)."""
        return self.order[self.unit_start[k] : self.unit_start[k + 1]]


def _column(frame: pd.DataFrame, name: str, fill: float) -> NDArray[np.float64]:
    if name not in frame.columns:
        return np.full(len(frame), fill)
    return np.asarray(pd.to_numeric(frame[name], errors="coerce"), dtype=np.float64)


def join_rows(inputs: ReportInputs) -> JoinedRows:
    """Join contributions to units and events.

    Parameters
    ----------
    inputs : ReportInputs
        Validated inputs, already cut to the report window.

    Returns
    -------
    JoinedRows
        Row codes and arrays (see the class); one hash look-up per category (categorical
        id columns) or per value, one stable argsort by unit.
    """
    st, ev, co = inputs.stations, inputs.events, inputs.contributions
    K = len(st)
    unit = codes_in(co["unit_id"], pd.Index(st["unit_id"].astype(str)))
    event = codes_in(co["event_id"], pd.Index(ev["event_id"].astype(str)))
    corrected = _column(co, "corrected_magnitude", np.nan)
    if "detected" in co.columns:
        detected = as_bool(co["detected"], "contributions", "detected") & np.isfinite(corrected)
    else:
        detected = np.isfinite(corrected)
    residual = _column(co, "residual", np.nan)
    weight = _column(co, "weight", np.nan)
    robust = _column(co, "robust_weight", 1.0)
    z = _column(co, "z", np.nan)
    dist = _column(co, "distance_km", np.nan)
    ev_mag = np.asarray(pd.to_numeric(ev["magnitude"], errors="coerce"), dtype=np.float64)
    ev_n = np.asarray(pd.to_numeric(ev["n_stations"], errors="coerce"), dtype=np.float64)
    ev_t = (
        pd.to_datetime(ev["origin_time"], utc=True)
        .dt.tz_localize(None)
        .to_numpy(dtype="datetime64[us]")
    )
    has_ev = event >= 0
    safe = np.where(has_ev, event, 0)
    row_mag = np.where(has_ev, ev_mag[safe] if len(ev) else np.nan, np.nan)
    row_n = np.where(has_ev, ev_n[safe] if len(ev) else 0.0, 0.0)
    if len(ev):
        row_t = np.where(has_ev, ev_t[safe], np.datetime64("NaT", "us"))
    else:
        row_t = np.full(len(co), np.datetime64("NaT", "us"))
    # Detections that were likely only because their error was high (the network magnitude
    # plus the station bias within 2 sigma of the reading's noise threshold) have residuals
    # biased upward by the selection, not by the station: leave them out of the station
    # statistics (docs/censoring.md §9). Unknown thresholds keep the
    # row.
    threshold = _column(co, "threshold", np.nan)
    u_safe = np.where(unit >= 0, unit, 0)
    bias = _column(st, "bias", 0.0)[u_safe] if K else np.zeros(len(co))
    sigma = _column(st, "sigma", np.nan)[u_safe] if K else np.full(len(co), np.nan)
    with np.errstate(invalid="ignore"):
        selection_prone = row_mag + bias - threshold < 2.0 * sigma
    analysable = (
        detected & (unit >= 0) & np.isfinite(residual) & has_ev & (row_n >= 2) & ~selection_prone
    )
    order = np.argsort(np.where(unit >= 0, unit, K), kind="stable").astype(np.int64)
    counts = np.bincount(np.where(unit >= 0, unit, K), minlength=K + 1)[:K]
    unit_start = np.concatenate(([0], np.cumsum(counts))).astype(np.int64)
    return JoinedRows(
        unit=unit,
        event=event,
        detected=detected,
        residual=residual,
        weight=weight,
        robust_weight=robust,
        z=z,
        distance_km=dist,
        event_magnitude=row_mag,
        event_time=row_t.astype("datetime64[us]"),
        analysable=analysable,
        order=order,
        unit_start=unit_start,
    )
