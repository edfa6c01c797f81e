"""Benchmark of the fused-magnitude store over hundreds of nightly runs,, compacted or not.

Simulates the nightly job of the issue: every night it marks final the events older than the
revision horizon (:meth:`FusedStore.finalize`) and re-fuses the events of the horizon
(:meth:`FusedStore.write_run`), so each night adds two runs. The fused results come from one
:func:`fusion.network.network_magnitude.fuse_events` call on a seeded synthetic network
(docs/simulation.md),
sliced per night; the store cost does not depend on the values.

Two stores get the same nights side by side: one never compacts (``compact_after=None``), one
compacts on its own (the default). Printed, measured in one run, with ``--nights`` nights
(default 400, so about 800 file pairs in the first store):

- the nightly write (finalize + write_run) at the start and at the end of the period, for both;
- the readers at the end: ``current`` (all events and a 7-day window), ``contributions`` of one
  event, ``current_contributions`` of the window, ``history`` of one event: without
  compaction, after a manual :meth:`FusedStore.compact`, and in the self-compacting store,
  with the ratios to the first;
- the compaction time, and the floor: every event file read once with plain
  ``pyarrow.parquet.read_table``.

Usage::

    python bench/fused_store_bench.py                  # 400 nights
    python bench/fused_store_bench.py --nights 60      # quick run
"""

from __future__ import annotations

import argparse
import statistics
import sys
import tempfile
import time
import warnings
from collections.abc import Callable
from datetime import UTC, datetime, timedelta
from pathlib import Path

import numpy as np
import pyarrow.parquet as pq

from fusion.model.parameters import StationParameters
from fusion.model.simulation import SimulationConfig, simulate_network
from fusion.network.network_magnitude import FusedMagnitudes, fuse_events
from fusion.versions.fused_store import FusedStore

START = datetime(2025, 1, 1, tzinfo=UTC)


def _fused(nights: int, per_day: int, stations: int) -> FusedMagnitudes:
    cfg = SimulationConfig(
        n_stations=stations,
        n_events=nights * per_day,
        duration_days=float(nights),
        start=START.strftime("%Y-%m-%dT%H:%M:%S"),
        max_distance_km=150.0,
    )
    net = simulate_network(cfg, seed=1)
    k = net.observations.n_stations
    ids = net.observations.station_ids
    nat = np.full(k, np.datetime64("NaT", "us"))
    params = StationParameters(
        "ML", ids, ids, nat, nat, net.bias, np.full(k, 1e-3), net.sigma**2,
        np.zeros(k, bool), net.pairs, 0.04, 0.05,
    )  # fmt: skip
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        return fuse_events(net.observations, params)


def _night_slices(fused: FusedMagnitudes, horizon_days: int, nights: int) -> list[FusedMagnitudes]:
    """Events of [night - horizon, night) and their rows, by searchsorted (no row loop)."""
    t = fused.events["origin_time"].dt.tz_localize(None).to_numpy(dtype="datetime64[us]")
    start = np.datetime64(START.replace(tzinfo=None), "us")
    codes = np.asarray(fused.contributions["event_id"].cat.codes)
    out = []
    for night in range(1, nights + 1):
        hi_t = start + np.timedelta64(night, "D")
        lo_t = start + np.timedelta64(max(0, night - horizon_days), "D")
        lo, hi = np.searchsorted(t, lo_t), np.searchsorted(t, hi_t)
        a, b = np.searchsorted(codes, lo), np.searchsorted(codes, hi)
        out.append(
            FusedMagnitudes(
                events=fused.events.iloc[lo:hi].reset_index(drop=True),
                contributions=fused.contributions.iloc[a:b].reset_index(drop=True),
            )
        )
    return out


def _median_time(fn: Callable[[], object], repeat: int) -> float:
    times = []
    for _ in range(repeat):
        t0 = time.perf_counter()
        fn()
        times.append(time.perf_counter() - t0)
    return statistics.median(times)


def main(argv: list[str] | None = None) -> int:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--nights", type=int, default=400)
    ap.add_argument("--per-day", type=int, default=30, help="events per day")
    ap.add_argument("--stations", type=int, default=40)
    ap.add_argument("--horizon", type=int, default=7, help="revision horizon in days")
    ap.add_argument("--repeat", type=int, default=5)
    args = ap.parse_args(argv)

    t0 = time.perf_counter()
    fused = _fused(args.nights, args.per_day, args.stations)
    nights = _night_slices(fused, args.horizon, args.nights)
    print(
        f"input: {len(fused.events)} events, {len(fused.contributions)} rows; "
        f"{np.mean([len(n.events) for n in nights]):.0f} events and "
        f"{np.mean([len(n.contributions) for n in nights]):.0f} rows per nightly run "
        f"(prepared in {time.perf_counter() - t0:.1f} s)"
    )
    with tempfile.TemporaryDirectory() as tmp:
        plain = FusedStore(Path(tmp, "plain"), compact_after=None)
        auto = FusedStore(Path(tmp, "auto"))  # default compact_after
        times: dict[str, list[float]] = {"plain": [], "auto": []}
        for i, batch in enumerate(nights):
            now = START + timedelta(days=i + 1, hours=2)
            for name, store in (("plain", plain), ("auto", auto)):
                t1 = time.perf_counter()
                store.finalize("ML", before=now - timedelta(days=args.horizon), now=now)
                store.write_run(batch, model_version=f"ML-night-{i:04d}", now=now)
                times[name].append(time.perf_counter() - t1)
        print(
            f"{args.nights} nights -> {len(plain.runs('ML'))} runs; file pairs: "
            f"{plain.segments('ML')} without compaction, {auto.segments('ML')} with "
            f"compact_after={auto.compact_after}"
        )
        for name, ts in times.items():
            print(
                f"nightly write (finalize + write_run), {name:>5}: first 10 nights median "
                f"{statistics.median(ts[:10]) * 1e3:.1f} ms, last 10 "
                f"{statistics.median(ts[-10:]) * 1e3:.1f} ms, max {max(ts) * 1e3:.0f} ms, "
                f"total {sum(ts):.1f} s"
            )

        end = START + timedelta(days=args.nights)
        week = end - timedelta(days=args.horizon)
        cur = plain.current("ML")
        one = str(cur["event_id"].iloc[len(cur) // 2])
        recent = plain.current("ML", start=week)

        def measure(store: FusedStore) -> dict[str, float]:
            return {
                "current (all events)": _median_time(lambda: store.current("ML"), args.repeat),
                "current (7-day window)": _median_time(
                    lambda: store.current("ML", start=week), args.repeat
                ),
                "contributions (1 event)": _median_time(
                    lambda: store.contributions("ML", one), args.repeat
                ),
                "current_contributions (window)": _median_time(
                    lambda: store.current_contributions("ML", recent), args.repeat
                ),
                "history (1 event)": _median_time(lambda: store.history(one), args.repeat),
            }

        before = measure(plain)
        automatic = measure(auto)
        files = sorted(Path(tmp, "plain", "fused", "ML").glob("*-events.parquet"))
        floor = _median_time(lambda: [pq.read_table(f) for f in files], args.repeat)
        t2 = time.perf_counter()
        report = plain.compact("ML")
        t_compact = time.perf_counter() - t2
        after = measure(plain)
        now = end + timedelta(hours=2)
        t3 = time.perf_counter()
        plain.finalize("ML", before=now - timedelta(days=args.horizon), now=now)
        plain.write_run(nights[-1], model_version="ML-after", now=now)
        t_night_after = time.perf_counter() - t3

        print(
            f"manual compaction: {report.segments_before} -> {report.segments_after} file "
            f"pairs, {report.event_rows} event rows, {report.contribution_rows} contribution "
            f"rows, {t_compact:.2f} s"
        )
        print(f"plain pyarrow read_table of the {len(files)} event files: {floor * 1e3:.1f} ms")
        print(
            f"{'reader (median of ' + str(args.repeat) + ')':<32} {'none':>9} {'compacted':>10}"
            f" {'ratio':>6} {'auto':>9} {'ratio':>6}"
        )
        for name, b in before.items():
            a, c = after[name], automatic[name]
            print(
                f"{name:<32} {b * 1e3:>7.1f}ms {a * 1e3:>8.1f}ms {b / a:>6.1f} "
                f"{c * 1e3:>7.1f}ms {b / c:>6.1f}"
            )
        print(
            f"nightly write after manual compaction: {t_night_after * 1e3:.1f} ms "
            f"(before: {statistics.median(times['plain'][-10:]) * 1e3:.1f} ms)"
        )
    return 0


if __name__ == "__main__":
    sys.exit(main())
