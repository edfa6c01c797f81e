"""Split-half network agreement (fusion.model.agreement) against direct numpy computations."""

from __future__ import annotations

import numpy as np
import pytest

from fusion.model.agreement import (
    RowEstimator,
    half_difference,
    random_halves,
    split_half_network_agreement,
    station_corrections,
)
from stations.errors import InsufficientDataError

# A small hand table: 4 events, 5 stations, rows sorted by event.
EVENT = np.array([0, 0, 0, 0, 1, 1, 1, 1, 1, 2, 2, 2, 2, 3, 3, 3, 3], dtype=np.int64)
STATION = np.array([0, 1, 2, 3, 0, 1, 2, 3, 4, 0, 2, 3, 4, 1, 2, 3, 4], dtype=np.int64)
MAG = np.array(
    [2.1, 2.4, 1.9, 2.2, 3.0, 3.3, 2.7, 3.1, 2.8, 1.2, 1.0, 1.5, 1.1, 2.6, 2.2, 2.9, 2.5]
)
BIAS = np.array([0.1, 0.3, -0.2, 0.05, -0.1])
SIGMA2 = np.array([0.04, 0.09, 0.02, 0.05, 0.1])


def _direct_sd(half: np.ndarray, y: np.ndarray, w: np.ndarray, events: list[int]) -> float:
    """Weighted mean of each half per event, by an explicit loop (reference)."""
    diffs = []
    for j in events:
        a = (j == EVENT) & (half == 0)
        b = (j == EVENT) & (half == 1)
        ma = np.sum(w[a] * y[a]) / np.sum(w[a])
        mb = np.sum(w[b] * y[b]) / np.sum(w[b])
        diffs.append(ma - mb)
    return float(np.std(diffs, ddof=1))


def test_half_difference_matches_direct_weighted_means() -> None:
    half = np.array([0, 1, 0, 1, 1, 0, 1, 0, 0, 0, 1, 1, 0, 1, 1, 0, 0], dtype=np.int8)
    y = MAG - BIAS[STATION]
    s2 = SIGMA2[STATION]
    d = half_difference(EVENT, STATION, y, s2, half, 4)
    ref = _direct_sd(half, y, 1.0 / s2, [0, 1, 2, 3])
    assert np.std(d, ddof=1) == pytest.approx(ref, rel=1e-12)


def test_split_half_agreement_sd_matches_numpy_for_each_seed() -> None:
    y = MAG - BIAS[STATION]
    s2 = SIGMA2[STATION]
    model = RowEstimator("model", y, s2, STATION)
    plain = RowEstimator("plain", MAG.copy(), np.ones_like(MAG), STATION)
    res = split_half_network_agreement(EVENT, 4, [model, plain], seeds=[3, 7], min_stations=4)
    for s, seed in enumerate((3, 7)):
        half = random_halves(EVENT, np.random.default_rng(seed))
        assert res.sd[s, 0] == pytest.approx(_direct_sd(half, y, 1 / s2, [0, 1, 2, 3]), rel=1e-12)
        assert res.sd[s, 1] == pytest.approx(
            _direct_sd(half, MAG, np.ones_like(MAG), [0, 1, 2, 3]), rel=1e-12
        )
    assert res.n_events == 4
    ratio = res.ratio("model", "plain")
    assert np.allclose(ratio, res.sd[:, 0] / res.sd[:, 1])


def test_random_halves_differ_in_size_by_at_most_one() -> None:
    rng = np.random.default_rng(0)
    event = np.sort(rng.integers(0, 50, size=400))
    half = random_halves(event, rng)
    n_a = np.bincount(event[half == 0], minlength=50)
    n_b = np.bincount(event[half == 1], minlength=50)
    assert np.all(np.abs(n_a - n_b) <= 1)
    # Different seeds give different splits.
    assert np.any(random_halves(event, np.random.default_rng(1)) != half)


def test_station_corrections_are_mean_residuals_from_the_plain_event_mean() -> None:
    c = station_corrections(EVENT, STATION, MAG, 4, 5)
    for i in range(5):
        res = [MAG[r] - MAG[EVENT[r] == EVENT].mean() for r in np.flatnonzero(i == STATION)]
        assert c[i] == pytest.approx(np.mean(res), rel=1e-12)


def test_events_below_min_stations_are_not_scored() -> None:
    model = RowEstimator("m", MAG.copy(), np.ones_like(MAG), STATION)
    # Only event 1 has 5 stations: too few events to score.
    with pytest.raises(InsufficientDataError):
        split_half_network_agreement(EVENT, 4, [model], seeds=2, min_stations=5)
