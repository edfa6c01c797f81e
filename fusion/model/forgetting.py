"""Rolling fit: exponential forgetting, the hard window and warm starts (docs/rolling-fit.md §1).

The nightly refit is exact, with event weights

    γ_j = 0.5 ** (age_j / h),   age_j = (as_of − t_j) in days,

inside a hard window of ``window_days`` (about three half-lives); events after ``as_of`` are
left out (a fit "as of" a time never sees later data). The weights enter every sum of the fit
as frequency weights, so Σγ plays the role of the sample size in the empirical-Bayes step.
A plain sliding window would make b and σ jump when a burst of events leaves it; exponential
weights adapt smoothly within about one half-life (docs/rolling-fit.md §1).

A warm start (and the anchor's continuity) takes the previous model's parameters unit by unit.
:func:`match_previous_units` pairs each current unit with the previous unit that holds most of
its (γ-weighted) readings, using the previous epochs' time bounds; this stays right when a
station's epochs are split differently in the new fit (e.g. a station-level unit whose window
now lies after an instrument change). Without readings the match falls back to the unit id,
then to the station's latest previous epoch.
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import Any

import numpy as np
from numpy.typing import NDArray

from fusion.model.eb_priors import EBPrior
from fusion.model.parameters import StationParameters
from fusion.observations import index_of

__all__ = [
    "TimeWeights",
    "WarmStart",
    "match_previous_units",
    "time_weights",
    "unit_station_ids",
    "warm_start",
]

_US_PER_DAY = 86_400e6


@dataclass(frozen=True, slots=True, eq=False)
class TimeWeights:
    """Event weights of one rolling fit.

    Attributes
    ----------
    gamma : ndarray of float, shape (N,)
        γ_j in (0, 1] inside the window, 0 outside.
    in_window : ndarray of bool, shape (N,)
        Events with as_of − window <= t_j <= as_of.
    age_days : ndarray of float, shape (N,)
        (as_of − t_j) in days (negative for events after ``as_of``).
    as_of : numpy.datetime64
        The reference time, UTC.
    """

    gamma: NDArray[np.float64]
    in_window: NDArray[np.bool_]
    age_days: NDArray[np.float64]
    as_of: np.datetime64


def time_weights(
    event_time: NDArray[np.datetime64],
    *,
    as_of: np.datetime64 | str | None = None,
    half_life_days: float = np.inf,
    window_days: float = np.inf,
) -> TimeWeights:
    """γ_j = 0.5 ** (age_j / h) inside the hard window (docs/rolling-fit.md §1).

    Parameters
    ----------
    event_time : ndarray of datetime64, shape (N,)
        Origin times, UTC.
    as_of : datetime64 or ISO string, optional
        Reference time; default the latest origin time.
    half_life_days : float, default=inf
        h in days; ``inf`` gives γ = 1 (no forgetting).
    window_days : float, default=inf
        Events older than this (days) get γ = 0.

    Returns
    -------
    TimeWeights

    Examples
    --------
    >>> t = np.array(["2025-01-01", "2025-04-01", "2025-07-01"], dtype="datetime64[us]")
    >>> w = time_weights(t, half_life_days=90.0, window_days=365.0)
    >>> [round(float(g), 4) for g in w.gamma]
    [0.2481, 0.4962, 1.0]
    """
    if not half_life_days > 0:
        raise ValueError(f"half_life_days must be > 0; got {half_life_days}")
    if not window_days > 0:
        raise ValueError(f"window_days must be > 0; got {window_days}")
    t = np.asarray(event_time).astype("datetime64[us]")
    if as_of is None:
        ref = t.max() if t.shape[0] else np.datetime64("1970-01-01", "us")
    else:
        ref = np.asarray(as_of).astype("datetime64[us]")[()]
    age = (ref - t).astype(np.int64) / _US_PER_DAY
    in_window = (age >= 0.0) & (age <= window_days)
    gamma = np.where(in_window, np.exp2(-age / half_life_days), 0.0)
    return TimeWeights(gamma=gamma, in_window=in_window, age_days=age, as_of=ref)


def unit_station_ids(unit_ids: NDArray[Any]) -> NDArray[Any]:
    """Station id of each unit id: the part before ``@`` (see ``epoch_unit_id``)."""
    ids = np.asarray(unit_ids).astype(str)
    return np.char.partition(ids, "@")[:, 0].astype(object)


@dataclass(frozen=True, slots=True, eq=False)
class WarmStart:
    """Starting values of a fit, aligned with its station-unit table.

    Attributes
    ----------
    bias : ndarray of float, shape (K,)
        Starting b_i (magnitude units); NaN where unknown (the prior mean is used).
    sigma2 : ndarray of float, shape (K,)
        Starting σ_i² (magnitude units squared); NaN where unknown (s0² is used).
    prior : EBPrior or None
        Starting hyperparameters; ``None`` starts from the defaults of docs/estimator.md §3.
    """

    bias: NDArray[np.float64]
    sigma2: NDArray[np.float64]
    prior: EBPrior | None = None


def match_previous_units(
    previous: StationParameters,
    unit_ids: NDArray[Any],
    *,
    unit_station: NDArray[Any] | None = None,
    row_unit: NDArray[np.int64] | None = None,
    row_time: NDArray[np.datetime64] | None = None,
    row_weight: NDArray[np.float64] | None = None,
) -> NDArray[np.int64]:
    """Index of the previous unit that corresponds to each current unit, -1 if none.

    Parameters
    ----------
    previous : StationParameters
    unit_ids : ndarray of str, shape (K,)
        Current units.
    unit_station : ndarray of str, shape (K,), optional
        Station of each current unit; default: :func:`unit_station_ids`.
    row_unit, row_time, row_weight : ndarray, shape (n,), optional
        Current unit code, origin time and weight (γ) of the readings. When given, a unit is
        matched to the previous epoch (of its station) that holds the largest weight of its
        readings, found with ``searchsorted`` on (station, epoch start); vectorized.

    Returns
    -------
    ndarray of int, shape (K,)
        Units without readings, or whose readings fall in no previous epoch, are matched by
        unit id, then by station (latest previous epoch).
    """
    ids = np.asarray(unit_ids).astype(str)
    stations = (unit_station_ids(ids) if unit_station is None else np.asarray(unit_station)).astype(
        str
    )
    K, Kp = ids.shape[0], previous.n_units
    prev_ids = previous.unit_ids.astype(str)
    prev_st = previous.station_ids.astype(str)
    out = index_of(prev_ids, ids)
    # Fallback: the station's latest previous epoch.
    start = previous.epoch_start.astype("datetime64[us]").astype(np.int64)
    order = np.lexsort((start, prev_st))
    last = order[np.r_[prev_st[order][1:] != prev_st[order][:-1], True]] if Kp else order
    spos = index_of(prev_st[last], stations)
    miss = (out < 0) & (spos >= 0)
    out[miss] = last[spos[miss]]
    if row_unit is None or row_time is None or Kp == 0 or K * Kp > 50_000_000:
        return out
    # Station code (in the current station list) of every previous unit.
    st_names, st_code = np.unique(stations, return_inverse=True)
    pos = np.searchsorted(st_names, prev_st)
    pos = np.clip(pos, 0, max(st_names.shape[0] - 1, 0))
    prev_code = np.where(st_names[pos] == prev_st, pos, -1)
    lowest = np.iinfo(np.int64).min
    p_start = np.where(start == lowest, 0, start)  # NaT start = open
    t_row = np.asarray(row_time).astype("datetime64[us]").astype(np.int64)
    t0 = min(int(t_row.min(initial=0)), int(p_start.min(initial=0)))
    p_end = previous.epoch_end.astype("datetime64[us]").astype(np.int64)
    p_end = np.where(p_end == lowest, np.iinfo(np.int64).max, p_end)
    shift = np.int64(52)
    valid = prev_code >= 0
    pkey = (prev_code[valid].astype(np.int64) << shift) | (p_start[valid] - t0)
    pidx = np.flatnonzero(valid)
    srt = np.argsort(pkey)
    pkey, pidx = pkey[srt], pidx[srt]
    r_code = st_code[row_unit]
    rkey = (r_code.astype(np.int64) << shift) | (t_row - t0)
    cand = np.searchsorted(pkey, rkey, side="right") - 1
    ok = cand >= 0
    cidx = pidx[np.maximum(cand, 0)]
    ok &= (prev_code[cidx] == r_code) & (t_row < p_end[cidx]) & (t_row >= p_start[cidx])
    w = np.ones(t_row.shape[0]) if row_weight is None else np.asarray(row_weight, float)
    score = np.bincount(row_unit[ok] * Kp + cidx[ok], weights=w[ok], minlength=K * Kp).reshape(
        K, Kp
    )
    best = np.argmax(score, axis=1)
    has = score[np.arange(K), best] > 0
    out[has] = best[has]
    return out


def warm_start(
    previous: StationParameters,
    unit_ids: NDArray[Any],
    *,
    unit_station: NDArray[Any] | None = None,
    match: NDArray[np.int64] | None = None,
    d0: float = 4.0,
) -> WarmStart:
    """Starting values from a previous model (docs/rolling-fit.md §3), unit by unit.

    Parameters
    ----------
    previous : StationParameters
        The previous model.
    unit_ids : ndarray of str, shape (K,)
        Units of the new fit.
    unit_station : ndarray of str, shape (K,), optional
        Station of each new unit; default: :func:`unit_station_ids`.
    match : ndarray of int, shape (K,), optional
        Precomputed :func:`match_previous_units`.
    d0 : float, default=4.0
        Prior degrees of freedom to start from (a :class:`StationParameters` does not carry it).

    Returns
    -------
    WarmStart
        Units are matched by ``match`` (default :func:`match_previous_units` by id, then by
        station); unmatched units get NaN (the fit starts them from the priors).
    """
    if match is None:
        match = match_previous_units(previous, unit_ids, unit_station=unit_station)
    hit = match >= 0
    bias = np.full(match.shape[0], np.nan)
    sigma2 = np.full(match.shape[0], np.nan)
    bias[hit] = previous.bias[match[hit]]
    sigma2[hit] = previous.sigma2[match[hit]]
    prior = EBPrior(d0=d0, s0_2=float(previous.s0_2), tau_b2=float(previous.tau_b2))
    return WarmStart(bias=bias, sigma2=sigma2, prior=prior)
