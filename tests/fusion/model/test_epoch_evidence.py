"""Epoch decisions on evidence: maximum-likelihood change time, interval, penalty, dependence."""

from __future__ import annotations

import numpy as np
import pandas as pd
import pytest

from fusion.model.epochs import (
    change_interval_cutoff,
    detect_bias_steps,
    profile_change_points,
)
from fusion.model.simulation import SimulationConfig, simulate_network
from fusion.network.event_gls import event_gls


def _hinkley_loop(x: np.ndarray, m: int) -> int:
    """Hinkley (1970) maximum-likelihood change point of one mean shift, by a plain loop:
    minimise the within-segment sum of squares over splits with >= m readings per side."""
    best, arg = np.inf, -1
    for t in range(m, x.shape[0] - m + 1):
        sse = np.sum((x[:t] - x[:t].mean()) ** 2) + np.sum((x[t:] - x[t:].mean()) ** 2)
        if sse < best:
            best, arg = sse, t
    return arg


def test_change_point_equals_ruptures_and_the_hinkley_loop() -> None:
    rpt = pytest.importorskip("ruptures")
    rng = np.random.default_rng(5)
    xs, labels = [], []
    for p in range(12):
        n = int(rng.integers(60, 250))
        x = rng.normal(0.0, 1.0, n)
        x[int(rng.integers(20, n - 20)) :] += rng.choice([-1.0, 0.6, 1.5])
        xs.append(x)
        labels.append(np.full(n, p))
    cp = profile_change_points(np.concatenate(xs), np.concatenate(labels), min_events=20)
    for p, x in enumerate(xs):
        # ruptures.Dynp(model="l2", min_size=20, jump=1).fit(x).predict(n_bkps=1)[0] is the
        # first index of the second segment of the exact two-segment least-squares fit.
        ref = rpt.Dynp(model="l2", min_size=20, jump=1).fit(x).predict(n_bkps=1)[0]
        assert cp.tau[p] == ref == _hinkley_loop(x, 20)


def test_change_interval_covers_the_true_change_in_most_series() -> None:
    # 400 series, a shift of 0.8 SD after 150 of 300 readings; nominal 95 % interval.
    rng = np.random.default_rng(11)
    P, n, t0 = 400, 300, 150
    x = rng.normal(0.0, 1.0, (P, n))
    x[:, t0:] += 0.8
    cp = profile_change_points(x.ravel(), np.repeat(np.arange(P), n), min_events=20)
    covered = (cp.low <= t0) & (t0 <= cp.high)
    assert covered.mean() >= 0.90
    # ... and the interval is informative, not the whole series.
    assert np.median(cp.high - cp.low) < 60


def test_interval_cutoff_follows_the_two_sided_exponential_law() -> None:
    # P(LR <= c) = (1 - exp(-c/2))^2 (derived in change_interval_cutoff's docstring).
    for level in (0.5, 0.9, 0.95, 0.99):
        c = change_interval_cutoff(level)
        assert (1.0 - np.exp(-c / 2.0)) ** 2 == pytest.approx(level, rel=1e-12)


def test_no_epoch_spans_fewer_than_min_blocks_time_blocks() -> None:
    # 300 quiet readings (three a day), then 60 readings within 4 days sharing an offset of
    # +1.2 (an aftershock-like burst). Counted in readings the burst is an epoch of its own;
    # with weekly blocks and min_blocks = 3 the new epoch must reach back over three weeks.
    rng = np.random.default_rng(3)
    x = np.r_[rng.normal(0.0, 1.0, 300), rng.normal(1.2, 1.0, 60)]
    day = np.r_[np.arange(300) // 3, 100 + np.arange(60) // 15]
    week = day // 7
    seg = np.zeros(360, dtype=np.int64)
    by_reading = profile_change_points(x, seg)
    by_week = profile_change_points(x, seg, block=week, min_blocks=3)
    assert abs(by_reading.tau[0] - 300) <= 10
    assert len(np.unique(week[by_week.tau[0] :])) >= 3
    assert len(np.unique(week[: by_week.tau[0]])) >= 3


def test_short_epoch_between_agreeing_epochs_is_a_transient() -> None:
    from fusion.model.station_model import transient_steps

    t = pd.to_datetime(
        ["2025-03-01", "2025-03-12", "2025-06-01", "2025-08-01", "2025-08-10"]
    ).to_numpy()
    steps = pd.DataFrame({"station_id": ["A", "A", "B", "C", "C"], "change_time": t})
    sized = pd.DataFrame(
        {
            # A: up 0.3 for 11 days, then back (a swarm); C: up for 9 days, then further up.
            "bias_before": [0.0, 0.3, 0.1, 0.0, 0.3],
            "bias_after": [0.3, 0.02, 0.4, 0.3, 0.6],
            "step_se": [0.05, 0.05, 0.05, 0.05, 0.05],
        }
    )
    drop = transient_steps(steps, sized, max_days=30.0, z=2.0)
    assert drop.tolist() == [True, True, False, False, False]


def test_real_step_before_a_swarm_is_not_taken_for_a_transient() -> None:
    from fusion.model.station_model import transient_steps

    # Real step up on 07-01; a swarm pulls the bias down from 08-25 to 09-11. The epochs before
    # 07-01 and after 08-25 happen to agree too, but the swarm's own steps are the transient.
    t = pd.to_datetime(["2025-07-01", "2025-08-25", "2025-09-11"]).to_numpy()
    steps = pd.DataFrame({"station_id": ["S", "S", "S"], "change_time": t})
    sized = pd.DataFrame(
        {
            "bias_before": [-0.209, 0.094, -0.179],
            "bias_after": [0.094, -0.179, 0.161],
            "step_se": [0.05, 0.05, 0.039],
        }
    )
    drop = transient_steps(steps, sized, max_days=60.0, z=2.0)
    assert drop.tolist() == [False, True, True]


def _true_z(net):  # type: ignore[no-untyped-def]
    obs = net.observations
    y = obs.magnitude - net.bias[obs.station]
    s2 = (net.sigma**2)[obs.station]
    return event_gls(obs.event, obs.station, y, s2, obs.n_events, net.pairs).loo_z


def test_cusum_false_alarms_are_not_kept_without_evidence() -> None:
    # No step, true parameters: the CUSUM at h = 5 raises many alarms (about 2 per 1,000
    # readings, test_epochs.py); confirmation keeps almost none of them.
    proposed = kept = 0
    for seed in range(3):
        net = simulate_network(SimulationConfig(outlier_rate=0.0), seed=seed)
        z = _true_z(net)
        proposed += len(detect_bias_steps(net.observations, z, confirm=False).table)
        kept += len(detect_bias_steps(net.observations, z).table)
    assert proposed >= 30
    assert kept <= 1


def test_confirmed_step_is_dated_by_maximum_likelihood_within_its_interval() -> None:
    hits = 0
    for seed in range(100, 105):
        net = simulate_network(SimulationConfig(bias_step=0.3), seed=seed)
        z = _true_z(net)
        tab = detect_bias_steps(net.observations, z).table
        cfg = net.config
        step = np.datetime64(cfg.start, "us") + np.timedelta64(
            int(cfg.bias_step_day * 86400e6), "us"
        )
        mine = tab[tab["station"] == cfg.bias_step_station]
        assert len(mine) == 1 and mine["direction"].iloc[0] == 1
        lo = mine["change_time_low"].to_numpy()[0]
        hi = mine["change_time_high"].to_numpy()[0]
        hits += int(lo < step <= hi)
    assert hits >= 4


def test_split_without_steps_keeps_one_unit_per_station() -> None:
    # After every proposed step is merged away the model re-splits with an empty step table.
    from fusion.model.epochs import split_epochs

    net = simulate_network(SimulationConfig(n_stations=6, n_events=200), seed=1)
    empty = pd.DataFrame(
        {"station_id": pd.Series(dtype=str), "change_time": pd.Series(dtype="datetime64[us]")}
    )
    split = split_epochs(net.observations, empty)
    assert list(split.observations.station_ids) == list(net.observations.station_ids)
    assert np.array_equal(split.observations.station, net.observations.station)
