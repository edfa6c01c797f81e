"""Label-free comparison of network estimators: split-half agreement and held-out stations.

No event's true magnitude is known, but two network magnitudes of the same event built from
disjoint station sets measure the same M_j. Split each event's usable stations at random into
two halves A and B, estimate the event from each half, and take d_j = M̂_j^A − M̂_j^B. If the
half estimates are unbiased with independent errors, Var(d_j) = Var(M̂_j^A − M_j) +
Var(M̂_j^B − M_j), so the SD of d over events (the *agreement SD*) is smaller for the estimator
with the smaller error: it ranks estimators without ground truth. The halves are the stations
in alternate places of a random order within each event, so their sizes differ by at most one.
Repeating with several random splits (seeds) gives a spread across seeds that shows how much of
a difference between two estimators is split noise. Every estimator is scored on the same events
and the same split in each seed, so ratios are paired.

Estimators (docs/validation.md):

- a model version: GLS of the half's bias-corrected readings m_ij − b̂_u with the version's
  error variances σ̂_u² and its flagged correlated pairs (:func:`fusion.network.event_gls.event_gls`;
  Aitken 1935);
- the station-corrected mean: the equal-weight mean of m_ij − c_i, with the classical station
  correction c_i = mean over the station's readings of m_ij − m̄_j (m̄_j the plain event mean of
  all usable readings; one pass, common practice, no source).

Only detected, unclipped, finite readings take part (non-detections and clipped readings carry
bounds, not values); an event enters when it has ``min_stations`` readings usable by every
estimator compared, so each half has at least ``min_stations // 2``.

References
----------
Aitken A. C. (1935). On least squares and linear combination of observations. Proc. R. Soc.
Edinburgh 55:42–48.
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import Any

import numpy as np
from numpy.typing import NDArray

from fusion.network.event_gls import event_gls
from fusion.network.gls_blocks import PairCovariance
from stations.errors import ConfigError, InsufficientDataError

__all__ = [
    "AgreementResult",
    "RowEstimator",
    "half_difference",
    "random_halves",
    "split_half_network_agreement",
    "station_corrections",
]


@dataclass(frozen=True, slots=True, eq=False)
class RowEstimator:
    """One network estimator as per-row inputs of a GLS.

    Attributes
    ----------
    name : str
    y : ndarray, shape (nnz,)
        Corrected station magnitude of each row (magnitude units); NaN where the estimator
        cannot use the row (unknown station or epoch).
    s2 : ndarray, shape (nnz,)
        Row variance (magnitude units²); equal values give the plain mean.
    unit : ndarray of int, shape (nnz,)
        Unit (station or station epoch) of each row, indexing ``pairs``.
    pairs : PairCovariance or None
        Flagged pairs of the units.
    """

    name: str
    y: NDArray[np.float64]
    s2: NDArray[np.float64]
    unit: NDArray[np.int64]
    pairs: PairCovariance | None = None


@dataclass(frozen=True, slots=True, eq=False)
class AgreementResult:
    """Result of :func:`split_half_network_agreement`.

    Attributes
    ----------
    names : tuple of str
        Estimators, in the order given.
    sd : ndarray, shape (n_seeds, n_estimators)
        Agreement SD (SD over events of M̂^A − M̂^B, ddof 1; magnitude units) per seed.
    n_events : int
        Events scored (the same in every seed and for every estimator).
    n_rows : int
        Readings used.
    seeds : tuple of int
    """

    names: tuple[str, ...]
    sd: NDArray[np.float64]
    n_events: int
    n_rows: int
    seeds: tuple[int, ...]

    def column(self, name: str) -> NDArray[np.float64]:
        """Agreement SD of one estimator, per seed."""
        return np.asarray(self.sd[:, self.names.index(name)], dtype=np.float64)

    def ratio(self, name: str, reference: str) -> NDArray[np.float64]:
        """Per-seed ratio of two estimators' agreement SDs (paired: same split)."""
        return self.column(name) / self.column(reference)

    def summary(self, reference: str | None = None) -> list[dict[str, Any]]:
        """One dict per estimator: mean and spread (SD across seeds, ddof 1) of the agreement
        SD, and of its ratio to ``reference`` when given."""
        out = []
        n = self.sd.shape[0]
        for name in self.names:
            col = self.column(name)
            row: dict[str, Any] = {
                "estimator": name,
                "agreement_sd": float(col.mean()),
                "agreement_sd_spread": float(col.std(ddof=1)) if n > 1 else None,
            }
            if reference is not None:
                r = self.ratio(name, reference)
                row["ratio"] = float(r.mean())
                row["ratio_spread"] = float(r.std(ddof=1)) if n > 1 else None
            out.append(row)
        return out


def random_halves(event: NDArray[np.int64], rng: np.random.Generator) -> NDArray[np.int8]:
    """Half (0 or 1) of every row: alternate places of a random order within each event.

    Parameters
    ----------
    event : ndarray of int, shape (n,)
        Event code of each row (any order).
    rng : numpy.random.Generator

    Returns
    -------
    ndarray of int8, shape (n,)
        Within every event the two halves differ in size by at most one.
    """
    n = event.shape[0]
    order = np.lexsort((np.asarray(rng.random(n), dtype=np.float64), event))
    ev_sorted = event[order]
    start = np.r_[True, ev_sorted[1:] != ev_sorted[:-1]]
    first = np.maximum.accumulate(np.where(start, np.arange(n), 0))
    rank = np.arange(n) - first
    half = np.empty(n, dtype=np.int8)
    half[order] = (rank % 2).astype(np.int8)
    return half


def half_difference(
    event: NDArray[np.int64],
    unit: NDArray[np.int64],
    y: NDArray[np.float64],
    s2: NDArray[np.float64],
    half: NDArray[np.int8],
    n_events: int,
    pairs: PairCovariance | None = None,
) -> NDArray[np.float64]:
    """M̂_j^A − M̂_j^B per event: GLS of each half (NaN where a half is empty).

    Rows must be sorted by event. A flagged pair split across the halves is treated as two
    independent readings (each half sees one of them); within a half its covariance is used.
    """
    est = []
    for h in (0, 1):
        sel = half == h
        g = event_gls(event[sel], unit[sel], y[sel], s2[sel], n_events, pairs)
        est.append(g.magnitude)
    return np.asarray(est[0] - est[1], dtype=np.float64)


def station_corrections(
    event: NDArray[np.int64],
    station: NDArray[np.int64],
    m: NDArray[np.float64],
    n_events: int,
    n_stations: int,
) -> NDArray[np.float64]:
    """Classical station corrections c_i = mean of m_ij − m̄_j over the station's readings.

    m̄_j is the plain mean of event j's readings; events with one reading do not count.
    Stations without a counted reading get 0.
    """
    n_j = np.bincount(event, minlength=n_events)
    mbar = np.bincount(event, weights=m, minlength=n_events) / np.maximum(n_j, 1)
    use = n_j[event] >= 2
    num = np.bincount(station[use], weights=(m - mbar[event])[use], minlength=n_stations)
    cnt = np.bincount(station[use], minlength=n_stations)
    return np.asarray(np.where(cnt > 0, num / np.maximum(cnt, 1), 0.0), dtype=np.float64)


def split_half_network_agreement(
    event: NDArray[np.int64],
    n_events: int,
    estimators: list[RowEstimator],
    *,
    seeds: int | list[int] = 10,
    min_stations: int = 4,
) -> AgreementResult:
    """Split-half agreement SD of several estimators on the same events and splits.

    Parameters
    ----------
    event : ndarray of int, shape (nnz,)
        Event code of each row, sorted.
    n_events : int
    estimators : list of RowEstimator
        Rows where any estimator has a non-finite ``y`` or ``s2`` are dropped for all.
    seeds : int or list of int, default=10
        Number of random splits (seeds 0 .. n−1) or the seeds themselves.
    min_stations : int, default=4
        Events with fewer usable readings are not scored (at least 2).

    Returns
    -------
    AgreementResult

    Raises
    ------
    ConfigError
        On an empty estimator list, fewer than 1 seed or ``min_stations`` < 2.
    InsufficientDataError
        If fewer than 3 events have ``min_stations`` usable readings.
    """
    if not estimators:
        raise ConfigError("split_half_network_agreement: pass at least one estimator")
    seed_list = list(range(int(seeds))) if isinstance(seeds, int | np.integer) else list(seeds)
    if not seed_list:
        raise ConfigError("split_half_network_agreement: seeds must be at least 1")
    if int(min_stations) < 2:
        raise ConfigError(
            f"split_half_network_agreement: min_stations must be at least 2, got {min_stations}"
        )
    ok = np.ones(event.shape[0], dtype=bool)
    for e in estimators:
        ok &= np.isfinite(e.y) & np.isfinite(e.s2) & (e.s2 > 0) & (e.unit >= 0)
    n_j = np.bincount(event[ok], minlength=n_events)
    ok &= n_j[event] >= int(min_stations)
    scored = np.flatnonzero(n_j >= int(min_stations))
    if scored.shape[0] < 3:
        raise InsufficientDataError(
            f"split-half agreement: {scored.shape[0]} events have {min_stations} or more usable "
            "station magnitudes; need at least 3 (use a longer window)"
        )
    ev = event[ok]
    sd = np.empty((len(seed_list), len(estimators)))
    for s, seed in enumerate(seed_list):  # a handful of seeds, each vectorized over all events
        half = random_halves(ev, np.random.default_rng(seed))
        for k, e in enumerate(estimators):
            d = half_difference(ev, e.unit[ok], e.y[ok], e.s2[ok], half, n_events, e.pairs)
            sd[s, k] = float(np.std(d[scored], ddof=1))
    return AgreementResult(
        names=tuple(e.name for e in estimators),
        sd=sd,
        n_events=int(scored.shape[0]),
        n_rows=int(ok.sum()),
        seeds=tuple(int(s) for s in seed_list),
    )
