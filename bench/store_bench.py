"""Benchmark of the station-magnitude store: build, event look-up, month scan, full read.

Builds a synthetic store (default 10 million rows: 2,000 stations, 500,000 events, 10-30 rows
per event, origin times spread over two years), ingested as one batch per origin month (or as
one batch with ``--one-batch``), then prints, measured side by side in one run:

- ingest throughput;
- a single-event look-up (median over random events, in process, store already open);
- a one-month window scan of one magnitude type;
- reading every data file's columns once with plain ``pyarrow.parquet.read_table`` (no
  store logic), and the ratios of the two above to it;
- peak resident memory (``resource.getrusage``) and the store size on disk.

Usage::

    python bench/store_bench.py                 # 10 M rows (several minutes)
    python bench/store_bench.py --rows 200000   # quick run

The store goes to a temporary folder (removed at the end) unless ``--out DIR`` is given;
``bench/out/`` is git-ignored.
"""

from __future__ import annotations

import argparse
import resource
import shutil
import statistics
import sys
import tempfile
import time
from datetime import UTC, datetime, timedelta
from pathlib import Path
from typing import Any

import numpy as np
import pandas as pd
import pyarrow.parquet as pq

import stations.store.atomic as atomic
import stations.store.commit as commit
from stations.schema import INPUT_COLUMNS
from stations.store import StationMagnitudeStore

N_STATIONS = 2_000
ROWS_PER_EVENT = 20  # mean of the uniform 10..30
START = datetime(2023, 1, 1, tzinfo=UTC)
SPAN = timedelta(days=730)


def synthetic_month(
    rng: np.random.Generator,
    event_no: np.ndarray,
    event_time_us: np.ndarray,
    station_names: Any,
) -> pd.DataFrame:
    """Rows of the given events (vectorised): 10-30 distinct stations each."""
    n_ev = event_no.size
    k = rng.integers(10, 31, n_ev)
    ev_of_row = np.repeat(np.arange(n_ev), k)
    within = np.arange(ev_of_row.size) - np.repeat(np.cumsum(k) - k, k)
    # distinct stations per event: start + i * stride (mod 2000), stride odd and not a multiple
    # of 5, so coprime to 2000
    start = rng.integers(0, N_STATIONS, n_ev)
    stride = rng.choice(np.array([s for s in range(1, 400, 2) if s % 5]), n_ev)
    station = (start[ev_of_row] + within * stride[ev_of_row]) % N_STATIONS
    n = ev_of_row.size
    mag_ev = rng.exponential(0.5, n_ev) + 1.0
    detected = rng.random(n) > 0.1
    magnitude = np.where(detected, mag_ev[ev_of_row] + rng.normal(0, 0.25, n), np.nan)
    event_ids = pd.array(np.char.add("ev", event_no.astype("U7")), dtype="str")
    origin = pd.to_datetime(event_time_us, unit="us", utc=True)
    return pd.DataFrame(
        {
            "event_id": event_ids.take(ev_of_row),
            "origin_time": origin.take(ev_of_row),
            "event_latitude": rng.uniform(30, 50, n_ev)[ev_of_row],
            "event_longitude": rng.uniform(-120, -100, n_ev)[ev_of_row],
            "event_depth": rng.uniform(0, 20, n_ev)[ev_of_row],
            "station_id": station_names.take(station),
            "channel": pd.array(np.full(n, "HHZ"), dtype="str"),
            "magnitude_type": pd.array(np.full(n, "ML"), dtype="str"),
            "magnitude": magnitude,
            "detected": detected,
            "clipped": np.zeros(n, bool),
            "noise_threshold": np.where(detected, np.nan, mag_ev[ev_of_row] + 0.3),
            "amplitude": rng.lognormal(0, 1, n),
            "amplitude_unit": pd.array(np.full(n, "nm"), dtype="str"),
            "period": np.full(n, np.nan),
            "distance_km": rng.uniform(5, 500, n),
            "distance_deg": np.full(n, np.nan),
            "hypocentral_distance_km": np.full(n, np.nan),
            "azimuth": rng.uniform(0, 360, n),
            "source_weight": np.full(n, np.nan),
            "formula": pd.array([None] * n, dtype="str"),
            "source_file": pd.array(np.full(n, "synthetic.csv"), dtype="str"),
            "source_location": pd.array(np.char.add("row ", np.arange(n).astype("U9")), "str"),
        }
    )[list(INPUT_COLUMNS)]


def build(
    root: Path, rows: int, seed: int, *, one_batch: bool = False
) -> tuple[StationMagnitudeStore, float, np.ndarray]:
    rng = np.random.default_rng(seed)
    n_events = max(rows // ROWS_PER_EVENT, 1)
    span_us = int(SPAN.total_seconds() * 1e6)
    t0_us = int(START.timestamp() * 1e6)
    times = np.sort(rng.integers(0, span_us, n_events)) + t0_us
    month = times.astype("datetime64[us]").astype("datetime64[M]")
    cuts = np.flatnonzero(np.diff(month.astype(np.int64))) + 1
    station_names = pd.array([f"XX.S{i:04d}." for i in range(N_STATIONS)], dtype="str")
    store = StationMagnitudeStore.open(root)
    total = 0
    t_ingest = 0.0
    chunks = [np.arange(n_events)] if one_batch else np.split(np.arange(n_events), cuts)
    for chunk in chunks:  # one batch per origin month, or one batch
        frame = synthetic_month(rng, chunk, times[chunk], station_names)
        t = time.perf_counter()
        report = store.ingest(frame, None, source_file=f"month-{month[chunk[0]]}.csv")
        t_ingest += time.perf_counter() - t
        total += report.accepted
    print(f"built {total:,} rows, {n_events:,} events, {len(chunks)} batches")
    print(f"ingest: {t_ingest:.1f} s total, {total / t_ingest:,.0f} rows/s")
    return store, t_ingest, np.char.add("ev", np.arange(n_events).astype("U7"))


def timed(fn, repeat: int) -> float:
    times = []
    for _ in range(repeat):
        t = time.perf_counter()
        fn()
        times.append(time.perf_counter() - t)
    return statistics.median(times)


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--rows", type=int, default=10_000_000)
    ap.add_argument("--seed", type=int, default=20240601)
    ap.add_argument("--lookups", type=int, default=25)
    ap.add_argument("--out", type=Path, default=None, help="keep the store in this folder")
    ap.add_argument("--one-batch", action="store_true", help="ingest all rows as one batch")
    ap.add_argument("--compression", default=atomic.COMPRESSION, help="Parquet codec to try")
    ap.add_argument(
        "--row-group-rows", type=int, default=commit.ROW_GROUP_ROWS, help="row-group size to try"
    )
    args = ap.parse_args()
    # Trial settings for this run only (module constants the writer reads at call time).
    atomic.COMPRESSION = args.compression
    commit.ROW_GROUP_ROWS = args.row_group_rows  # type: ignore[misc]
    print(f"compression {args.compression}, row groups of {args.row_group_rows:,} rows")

    tmp = None
    if args.out is None:
        tmp = tempfile.mkdtemp(prefix="magfuse-store-bench-")
        root = Path(tmp) / "store"
    else:
        root = args.out
        if root.exists():
            sys.exit(f"{root} exists; pass a new folder")
    try:
        store, _, event_ids = build(root, args.rows, args.seed, one_batch=args.one_batch)
        rng = np.random.default_rng(args.seed + 1)

        picks = rng.choice(event_ids, args.lookups, replace=False)
        lookup_times = []
        n_rows = []
        for ev in picks:
            t = time.perf_counter()
            df = store.event(str(ev))
            lookup_times.append(time.perf_counter() - t)
            n_rows.append(len(df))
        t_lookup = statistics.median(lookup_times)

        mid = START + SPAN / 2
        m_start = datetime(mid.year, mid.month, 1, tzinfo=UTC)
        m_end = datetime(mid.year + (mid.month == 12), mid.month % 12 + 1, 1, tzinfo=UTC)
        month_rows = len(store.scan(magnitude_type="ML", start=m_start, end=m_end))
        t_month = timed(lambda: store.scan(magnitude_type="ML", start=m_start, end=m_end), repeat=3)
        t = time.perf_counter()
        summary = store.summary()
        t_summary = time.perf_counter() - t
        rss_before_full = resource.getrusage(resource.RUSAGE_SELF).ru_maxrss
        files = [store.root / f.path for f in store.manifest().files]
        t_raw = timed(lambda: [pq.read_table(p) for p in files], repeat=2)
        t_raw_pd = timed(lambda: [pq.read_table(p).to_pandas() for p in files], repeat=2)
        size = sum(p.stat().st_size for p in store.root.rglob("*") if p.is_file())
        rss = resource.getrusage(resource.RUSAGE_SELF).ru_maxrss  # KiB on Linux

        print(
            f"event look-up: median {t_lookup * 1e3:.1f} ms over {args.lookups} events "
            f"(max {max(lookup_times) * 1e3:.1f} ms; {int(np.median(n_rows))} rows each)"
        )
        print(f"one-month scan ({m_start:%Y-%m}, {month_rows:,} rows, to pandas): {t_month:.3f} s")
        print(
            f"read every data file once ({len(files)} files): {t_raw:.3f} s to Arrow, "
            f"{t_raw_pd:.3f} s to pandas"
        )
        print(f"ratio look-up / full read: {t_lookup / t_raw:.4f}")
        print(f"ratio month scan / full read (pandas): {t_month / t_raw_pd:.4f}")
        print(
            f"summary ({summary.rows_current:,} rows, {summary.events:,} events, "
            f"{summary.stations:,} stations): {t_summary:.2f} s"
        )
        print(
            f"store size {size / 2**20:,.1f} MiB; peak RSS {rss_before_full / 2**10:,.0f} MiB "
            f"before the full read, {rss / 2**10:,.0f} MiB after it"
        )
    finally:
        if tmp is not None:
            shutil.rmtree(tmp, ignore_errors=True)


if __name__ == "__main__":
    main()
