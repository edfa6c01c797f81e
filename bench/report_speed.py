"""Speed of the station report for a large network, beside the station tables alone.

Builds synthetic inputs of a 2,000-station network (default): station coordinates in a
1,000 × 1,000 km box, 100,000 events seen by the stations within 55 km (about 17 readings
each, ~1.7 million contribution rows), true biases and error SDs as the model, fused with
:func:`fusion.network.network_magnitude.fuse_events`; 1 % outlier readings; 30 stations with a
distance trend (slope 0.3 per decade) and 30 with a saturation trend; 40 flagged correlated
pairs; 25 drift alarms; two epochs for 20 stations. Then times, in the same run:

- ``tables``: :func:`fusion.report.station_reliability_table` plus writing the CSV and
  Parquet files (``write_station_table``);
- ``report``: :func:`fusion.report.write_station_report` (validation, tables, every figure,
  the HTML file), with its own split into tables / figures / HTML.

Prints seconds and ratios. Issue target: the whole report in under 60 s.

Run: ``python bench/report_speed.py`` (``--stations 200 --events 10000`` for a quick look).
"""

from __future__ import annotations

import argparse
import os
import tempfile
import time
import warnings
from pathlib import Path

import numpy as np
import pandas as pd

from fusion.model.parameters import StationParameters
from fusion.network.gls_blocks import PairCovariance
from fusion.network.network_magnitude import fuse_events
from fusion.observations import ObservationSet
from fusion.report import ReportInputs, station_reliability_table, write_station_report
from fusion.report.joined import join_rows
from fusion.report.station_table import write_station_table


def build(n_stations: int, n_events: int, seed: int) -> ReportInputs:
    """Synthetic report inputs (see the module docstring)."""
    rng = np.random.default_rng(seed)
    K, N = n_stations, n_events
    box = 1000.0
    sxy = rng.uniform(0.0, box, size=(K, 2))
    exy = rng.uniform(0.0, box, size=(N, 2))
    mag = 1.0 + rng.exponential(1.0 / np.log(10.0), size=N)
    # Stations within 55 km: grid the box in 55 km cells and look in the 3×3 neighbourhood.
    cell = 55.0
    ncell = int(np.ceil(box / cell))
    scell = (sxy // cell).astype(np.int64)
    skey = scell[:, 0] * ncell + scell[:, 1]
    sorder = np.argsort(skey, kind="stable")
    sk_sorted = skey[sorder]
    ecell = (exy // cell).astype(np.int64)
    ev_parts, st_parts = [], []
    for dx in (-1, 0, 1):
        for dy in (-1, 0, 1):
            cx, cy = ecell[:, 0] + dx, ecell[:, 1] + dy
            ok = (cx >= 0) & (cx < ncell) & (cy >= 0) & (cy < ncell)
            key = np.where(ok, cx * ncell + cy, -1)
            lo = np.searchsorted(sk_sorted, key, "left")
            hi = np.searchsorted(sk_sorted, key, "right")
            cnt = np.where(ok, hi - lo, 0)
            ev = np.repeat(np.arange(N), cnt)
            off = np.arange(cnt.sum()) - np.repeat(np.cumsum(cnt) - cnt, cnt)
            ev_parts.append(ev)
            st_parts.append(sorder[np.repeat(lo, cnt) + off])
    ev = np.concatenate(ev_parts)
    st = np.concatenate(st_parts)
    dist = np.hypot(*(exy[ev] - sxy[st]).T)
    keep = (dist < cell) & (rng.random(ev.shape[0]) < 0.9)
    ev, st, dist = ev[keep], st[keep], np.maximum(dist[keep], 1.0)
    order = np.lexsort((st, ev))
    ev, st, dist = ev[order], st[order], dist[order]
    bias = rng.normal(0.0, 0.2, size=K)
    sigma = np.exp(rng.normal(np.log(0.22), 0.4, size=K))
    m = mag[ev] + bias[st] + sigma[st] * rng.standard_normal(ev.shape[0])
    trend_d = np.arange(30)
    trend_m = np.arange(30, 60)
    td = np.isin(st, trend_d)
    m[td] += 0.3 * (np.log10(dist[td]) - 1.5)
    tm = np.isin(st, trend_m)
    m[tm] -= 0.3 * np.maximum(mag[ev[tm]] - 2.0, 0.0)
    out = rng.random(ev.shape[0]) < 0.01
    m[out] += rng.normal(0.0, 1.0, size=int(out.sum()))
    days = np.sort(rng.uniform(0.0, 365.0, size=N))
    t = np.datetime64("2025-01-01T00:00:00", "us") + (days * 86_400e6).astype("timedelta64[us]")
    names = np.array([f"ZZ.S{i:04d}." for i in range(K)], dtype=object)
    seen = np.bincount(ev, minlength=N) > 0
    new = np.cumsum(seen) - 1
    obs = ObservationSet(
        magnitude_type="ML",
        event_ids=np.array([f"ev{j:07d}" for j in np.flatnonzero(seen)], dtype=object),
        event_time=t[seen],
        station_ids=names,
        event=new[ev],
        station=st,
        magnitude=m,
        detected=np.ones(ev.shape[0], dtype=bool),
        distance_km=dist,
    )
    # Model: true parameters; stations 100..119 have two epochs split at mid-year.
    split = np.datetime64("2025-07-01T00:00:00", "us")
    nat = np.datetime64("NaT", "us")
    two = np.arange(100, 120)
    unit_station = np.concatenate([np.arange(K), two])
    start = np.full(unit_station.shape[0], nat)
    end = np.full(unit_station.shape[0], nat)
    end[two] = split
    start[K:] = split
    unit_ids = names[unit_station].copy()
    unit_ids[K:] = [f"{s}@2025-07-01" for s in names[two]]
    pk, pl = np.arange(200, 280, 2), np.arange(201, 281, 2)
    params = StationParameters(
        magnitude_type="ML",
        unit_ids=unit_ids,
        station_ids=names[unit_station],
        epoch_start=start,
        epoch_end=end,
        bias=bias[unit_station],
        bias_var=np.full(unit_station.shape[0], 1e-4),
        sigma2=sigma[unit_station] ** 2,
        prior_dominated=rng.random(unit_station.shape[0]) < 0.05,
        pairs=PairCovariance(pk, pl, 0.4 * sigma[pk] * sigma[pl], unit_station.shape[0]),
        tau_b2=0.04,
        s0_2=0.22**2,
    )
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        fused = fuse_events(obs, params)
    from fusion.report import report_inputs_from_parameters

    pairs = pd.DataFrame(
        {
            "station_k": names[pk],
            "station_l": names[pl],
            "n_shared": rng.integers(40, 400, size=pk.shape[0]),
            "rho_hat": rng.uniform(0.3, 0.7, size=pk.shape[0]),
            "rho_ci_low": 0.2,
            "rho_ci_high": 0.8,
            "statistic": rng.uniform(4.0, 9.0, size=pk.shape[0]),
            "p_value": 1e-6,
            "q_value": 1e-5,
            "flagged": True,
        }
    )
    alarm_st = rng.choice(K, size=25, replace=False)
    change = t[0] + (rng.uniform(30, 300, size=25) * 86_400e6).astype("timedelta64[us]")
    epochs = pd.DataFrame(
        {
            "station_id": names[alarm_st],
            "change_time": pd.to_datetime(change).tz_localize("UTC"),
            "alarm_time": pd.to_datetime(change + np.timedelta64(5 * 86_400, "s")).tz_localize(
                "UTC"
            ),
            "direction": rng.choice([-1, 1], size=25),
            "n_before": 100,
            "n_after": 80,
            "peak": 6.0,
        }
    )
    coords = pd.DataFrame(
        {"station_id": names, "latitude": 40.0 + sxy[:, 1] / 111.0, "longitude": sxy[:, 0] / 85.0}
    )
    return report_inputs_from_parameters(
        params,
        fused,
        model_meta={
            "version": "ML-bench",
            "window_start": "2025-01-01",
            "window_end": "2026-01-01",
            "anchor": {"kind": "reference_set", "value": 0.0, "se": 0.01},
        },
        pairs=pairs,
        epochs=epochs,
        coordinates=coords,
        distance_km=obs.distance_km,
        dof=np.full(unit_station.shape[0], 200.0),
    )


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--stations", type=int, default=2000)
    ap.add_argument("--events", type=int, default=100_000)
    ap.add_argument("--sections", type=int, default=40, help="max_station_sections")
    ap.add_argument("--seed", type=int, default=20240601)
    args = ap.parse_args()
    t0 = time.perf_counter()
    inputs = build(args.stations, args.events, args.seed)
    print(
        f"built inputs in {time.perf_counter() - t0:.1f} s: {len(inputs.stations):,} units, "
        f"{len(inputs.events):,} events, {len(inputs.contributions):,} contribution rows"
    )
    with tempfile.TemporaryDirectory() as tmp:
        out = Path(tmp)
        t0 = time.perf_counter()
        checked = inputs.validated()
        table = station_reliability_table(checked, joined=join_rows(checked))
        write_station_table(table, out / "t.csv", out / "t.parquet")
        t_tables = time.perf_counter() - t0

        t0 = time.perf_counter()
        files = write_station_report(inputs, out / "report", max_station_sections=args.sections)
        t_report = time.perf_counter() - t0
        size = files.html.stat().st_size

    print("                                   wall s   ratio")
    print(f"{'station tables + CSV/Parquet':34s} {t_tables:7.2f}   {1.0:5.1f}x")
    print(f"{'whole report (HTML + tables)':34s} {t_report:7.2f}   {t_report / t_tables:5.1f}x")
    for part, sec in files.seconds.items():
        print(f"  of which {part:24s} {sec:7.2f}")
    print(
        f"figures {files.n_figures}, station sections {len(files.section_stations)}, "
        f"HTML {size / 1e6:.1f} MB"
    )
    print(f"load average during the run: {os.getloadavg()[0]:.1f} (other work skews wall time)")
    print(f"target: report < 60 s: {'met' if t_report < 60.0 else 'NOT met'}")


if __name__ == "__main__":
    main()
