"""Speed of :func:`fusion.network.network_magnitude.fuse_events` next to one pass over the columns.

Builds a synthetic observation set (default 500,000 events, about 20 rows each, 300 stations,
three flagged pairs, two stations with two epochs, a few rows of a station the model does not
know, non-detections below per-station noise thresholds, 1 % outlier readings) and times, in
the same run:

- one bincount mean of the magnitudes per event (a lower bound: one pass over the columns);
- ``fuse_events`` with defaults (GLS + robust weights + diagnostics + tables);
- ``fuse_events(use_nondetections=True)`` (adds the censored likelihood).

Prints seconds and the ratio to the bincount pass. Issue target: ≤ 20 s for the default call.

Run: ``python bench/fuse_speed.py`` (``--events 50000`` for a quick look).
"""

from __future__ import annotations

import argparse
import os
import time
import warnings

import numpy as np

from fusion.model.parameters import StationParameters
from fusion.network.gls_blocks import PairCovariance
from fusion.network.network_magnitude import fuse_events
from fusion.observations import ObservationSet


def build(n_events: int, rows_per_event: float, n_stations: int, seed: int):
    """Synthetic observations and the matching station parameters (model m = M + b + e)."""
    rng = np.random.default_rng(seed)
    n_draw = rng.poisson(rows_per_event, size=n_events) + 1
    ev = np.repeat(np.arange(n_events, dtype=np.int64), n_draw)
    st = rng.integers(0, n_stations + 1, size=ev.shape[0])  # code n_stations: unknown station
    st = np.where(rng.random(ev.shape[0]) < 0.002, n_stations, st % n_stations)
    key = np.unique(ev * (n_stations + 1) + st)  # one row per (event, station)
    ev, st = key // (n_stations + 1), key % (n_stations + 1)
    mag = 1.0 + rng.exponential(1.0 / np.log(10.0), size=n_events)
    bias = rng.normal(0.0, 0.2, size=n_stations + 1)
    sigma = np.exp(rng.normal(np.log(0.22), 0.4, size=n_stations + 1))
    m = mag[ev] + bias[st] + sigma[st] * rng.standard_normal(ev.shape[0])
    outlier = rng.random(ev.shape[0]) < 0.01
    m[outlier] += rng.normal(0.0, 1.0, size=int(outlier.sum()))
    t0 = rng.uniform(0.8, 1.4, size=n_stations + 1) + bias
    threshold = t0[st] + rng.normal(0.0, 0.1, size=ev.shape[0])
    detected = m >= threshold
    detected[np.r_[True, ev[1:] != ev[:-1]]] = True  # every event keeps one detection
    days = np.sort(rng.uniform(0.0, 365.0, size=n_events))
    t = np.datetime64("2025-01-01T00:00:00", "us") + (days * 86_400e6).astype("timedelta64[us]")
    names = np.array([f"ZZ.S{i:04d}." for i in range(n_stations + 1)], dtype=object)
    obs = ObservationSet(
        magnitude_type="ML",
        event_ids=np.array([f"ev{j:07d}" for j in range(n_events)], dtype=object),
        event_time=t,
        station_ids=names,
        event=ev,
        station=st,
        magnitude=np.where(detected, m, np.nan),
        detected=detected,
        threshold=np.where(detected, np.nan, threshold),
    )
    # Model: stations 0..K-1 (station K is unknown); stations 10 and 11 have two epochs.
    known = np.arange(n_stations)
    split = np.datetime64("2025-07-01T00:00:00", "us")
    nat = np.datetime64("NaT", "us")
    two = np.array([10, 11])
    unit_station = np.concatenate([known, two])
    start = np.full(unit_station.shape[0], nat)
    end = np.full(unit_station.shape[0], nat)
    end[two] = split
    start[n_stations:] = split
    unit_ids = names[unit_station].copy()
    unit_ids[n_stations:] = [f"{s}@2025-07-01" for s in names[two]]
    params = StationParameters(
        magnitude_type="ML",
        unit_ids=unit_ids,
        station_ids=names[unit_station],
        epoch_start=start,
        epoch_end=end,
        bias=bias[unit_station],
        bias_var=np.full(unit_station.shape[0], 1e-4),
        sigma2=sigma[unit_station] ** 2,
        prior_dominated=np.zeros(unit_station.shape[0], dtype=bool),
        pairs=PairCovariance(
            np.array([0, 2, 4]),
            np.array([1, 3, 5]),
            0.4 * sigma[[0, 2, 4]] * sigma[[1, 3, 5]],
            unit_station.shape[0],
        ),
        tau_b2=0.04,
        s0_2=0.22**2,
    )
    return obs, params, mag


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--events", type=int, default=500_000)
    ap.add_argument("--rows", type=float, default=22.0, help="mean draws per event")
    ap.add_argument("--stations", type=int, default=300)
    ap.add_argument("--seed", type=int, default=20240601)
    args = ap.parse_args()
    obs, params, truth = build(args.events, args.rows, args.stations, args.seed)
    print(
        f"events {obs.n_events:,}  rows {obs.n_obs:,}  "
        f"(detections {int(obs.detected.sum()):,}, mean {obs.n_obs / obs.n_events:.1f} per event)"
    )

    clock = time.perf_counter
    c0, t0 = time.process_time(), clock()
    det = obs.detected
    n = np.bincount(obs.event[det], minlength=obs.n_events)
    mean = np.bincount(obs.event[det], weights=obs.magnitude[det], minlength=obs.n_events) / n
    t_pass, c_pass = clock() - t0, time.process_time() - c0

    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        c0, t0 = time.process_time(), clock()
        fused = fuse_events(obs, params)
        t_fuse, c_fuse = clock() - t0, time.process_time() - c0
        c0, t0 = time.process_time(), clock()
        cens = fuse_events(obs, params, use_nondetections=True)
        t_cens, c_cens = clock() - t0, time.process_time() - c0

    ev = fused.events
    print("                                    wall s  ratio    cpu s  ratio")
    for name, t, c in (
        ("bincount mean (one pass)", t_pass, c_pass),
        ("fuse_events", t_fuse, c_fuse),
        ("fuse_events(use_nondetections)", t_cens, c_cens),
    ):
        print(f"{name:34s} {t:8.3f} {t / t_pass:6.0f}x {c:8.3f} {c / c_pass:6.0f}x")
    print(f"load average during the run: {os.getloadavg()[0]:.1f} (other work skews wall time)")
    print(f"target: fuse_events <= 20 s: {'met' if t_fuse <= 20.0 else 'NOT met'}")
    rmse = lambda x: float(np.sqrt(np.nanmean((x - truth) ** 2)))  # noqa: E731
    print(
        f"RMSE vs truth: fused {rmse(ev['magnitude'].to_numpy()):.4f}, "
        f"censored {rmse(cens.events['magnitude'].to_numpy()):.4f}, "
        f"plain mean {rmse(mean):.4f}"
    )
    print(
        f"robust iterations: median {int(ev['n_iter'].median())}, max {int(ev['n_iter'].max())}; "
        f"not converged: {int((~ev['converged']).sum())} of {len(ev):,} events; censoring used "
        f"on {(cens.events['method'] == 'censored-likelihood').mean():.3f} of events"
    )


if __name__ == "__main__":
    main()
