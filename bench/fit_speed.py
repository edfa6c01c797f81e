"""Speed and peak memory of the station-model fit (docs/estimator.md §4) at 1 M and 10 M readings.

A synthetic network of K stations on a square grid (unit spacing) records N events; each event
is seen by the stations inside a w×w window around its epicentre (w uniform in 2..7, so ~23
stations before a 90 % availability), which gives the spatially local co-observation graph of
a real network (the hard case for iterative solvers). Magnitudes follow docs/simulation.md:
M = 1 + Exp(β = ln 10), b ~ N(0, 0.2²), σ = exp(N(log 0.22, 0.4²)), 1 % outlier cells N(0, 1).
Generation is vectorized (no loop over events).

Every size runs in its own subprocess so ``ru_maxrss`` is that fit's peak. The reference cost
is 30 "plain numpy passes" over the same rows measured in the same process: one pass is
``np.bincount(event, weights=magnitude, minlength=N)`` plus ``np.bincount(station,
weights=magnitude, minlength=K)`` (a per-event and a per-station weighted sum over all rows).

Usage::

    python bench/fit_speed.py                 # 1 M and 10 M rows (about 2 minutes)
    python bench/fit_speed.py --quick         # 1 M rows only
    python bench/fit_speed.py --rows 2e6 --solver direct
    python bench/fit_speed.py --rows 1e5 1e6 --stations 200 --solver pcg   # solver crossover
    python bench/fit_speed.py --blas-threads 1   # steadier on a shared machine

Targets (issue 3): 10 M rows in <= 60 s and <= 3 GB peak; cost linear in rows.
"""

from __future__ import annotations

import argparse
import json
import os
import resource
import subprocess
import sys
import time
from typing import Any

import numpy as np

TARGET_SECONDS_10M = 60.0
TARGET_PEAK_GB_10M = 3.0


def generate(n_rows: int, n_stations: int = 2000, seed: int = 0) -> Any:
    """A synthetic ObservationSet with about ``n_rows`` readings (see module docstring)."""
    from fusion.observations import ObservationSet

    rng = np.random.default_rng(seed)
    side = int(np.ceil(np.sqrt(n_stations)))
    mean_cells = np.mean(np.arange(2, 8) ** 2) * 0.9
    n_events = round(n_rows / mean_cells)
    width = rng.integers(2, 8, size=n_events)
    x0 = np.floor(rng.uniform(0, side, n_events) - width / 2).astype(np.int64)
    y0 = np.floor(rng.uniform(0, side, n_events) - width / 2).astype(np.int64)
    x0 = np.clip(x0, 0, side - width)
    y0 = np.clip(y0, 0, side - width)
    cells = width * width
    ev = np.repeat(np.arange(n_events, dtype=np.int64), cells)
    k = np.arange(ev.shape[0], dtype=np.int64) - np.repeat(np.cumsum(cells) - cells, cells)
    w_row = width[ev]
    st = (x0[ev] + k % w_row) * side + (y0[ev] + k // w_row)
    del k, w_row
    keep = (st < n_stations) & (rng.random(ev.shape[0]) < 0.9)
    ev, st = ev[keep], st[keep]
    # Drop events left with fewer than one row and renumber.
    counts = np.bincount(ev, minlength=n_events)
    present = np.flatnonzero(counts > 0)
    code = np.full(n_events, -1, dtype=np.int64)
    code[present] = np.arange(present.shape[0])
    ev = code[ev]
    n_ev = present.shape[0]
    mag = 1.0 + rng.exponential(1.0 / np.log(10.0), size=n_ev)
    bias = rng.normal(0.0, 0.2, size=n_stations)
    sigma = np.exp(rng.normal(np.log(0.22), 0.4, size=n_stations))
    err = sigma[st] * rng.standard_normal(st.shape[0])
    out = rng.random(st.shape[0]) < 0.01
    err[out] += rng.normal(0.0, 1.0, size=int(out.sum()))
    m = mag[ev] + bias[st] + err
    del err, out
    t0 = np.datetime64("2025-01-01T00:00:00", "us")
    times = t0 + np.sort(rng.uniform(0, 365 * 86_400e6, n_ev)).astype("timedelta64[us]")
    return (
        ObservationSet(
            magnitude_type="ML",
            event_ids=np.array([f"e{j}" for j in range(n_ev)], dtype=object),
            event_time=times,
            station_ids=np.array([f"XX.S{i:04d}." for i in range(n_stations)], dtype=object),
            event=ev,
            station=st,
            magnitude=m,
            detected=np.ones(st.shape[0], dtype=bool),
        ),
        bias,
        sigma,
    )


def _plain_passes(obs: Any, n: int = 30) -> float:
    t = time.perf_counter()
    for _ in range(n):
        np.bincount(obs.event, weights=obs.magnitude, minlength=obs.n_events)
        np.bincount(obs.station, weights=obs.magnitude, minlength=obs.n_stations)
    return time.perf_counter() - t


def run_one(n_rows: int, solver: str, seed: int, n_stations: int = 2000) -> dict[str, Any]:
    """Generate, time 30 plain passes, fit once; returns the measurements."""
    from fusion.model.anchors import Anchor
    from fusion.model.reml_em import fit_reml_em

    t = time.perf_counter()
    obs, bias, sigma = generate(n_rows, n_stations=n_stations, seed=seed)
    t_gen = time.perf_counter() - t
    rss_data = resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1e6
    t_plain = _plain_passes(obs)
    t = time.perf_counter()
    fit = fit_reml_em(obs, anchor=Anchor(), solver=solver)  # type: ignore[arg-type]
    t_fit = time.perf_counter() - t
    peak = resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1e6  # KiB -> GB (Linux)
    b_err = (fit.bias - fit.bias.mean()) - (bias - bias.mean())
    return {
        "rows": obs.n_obs,
        "events": obs.n_events,
        "stations": obs.n_stations,
        "solver": fit.solver,
        "n_iter": fit.n_iter,
        "converged": fit.converged,
        "t_generate_s": t_gen,
        "t_plain30_s": t_plain,
        "t_fit_s": t_fit,
        "ratio_to_plain30": t_fit / t_plain,
        "peak_gb": peak,
        "peak_after_data_gb": rss_data,
        "bias_rmse": float(np.sqrt(np.mean(b_err**2))),
        "median_sigma_ratio": float(np.median(fit.sigma / sigma)),
    }


def main(argv: list[str] | None = None) -> None:
    parser = argparse.ArgumentParser(description=__doc__.split("\n")[0])
    parser.add_argument("--quick", action="store_true", help="1 M rows only")
    parser.add_argument("--rows", type=float, nargs="*", help="row counts to run")
    parser.add_argument("--solver", default="auto", choices=["auto", "direct", "pcg"])
    parser.add_argument("--seed", type=int, default=0)
    parser.add_argument("--stations", type=int, default=2000, help="K (default 2000)")
    parser.add_argument(
        "--blas-threads",
        type=int,
        default=None,
        help="BLAS threads of the child (OPENBLAS_NUM_THREADS); default: as installed",
    )
    parser.add_argument("--child", type=float, help=argparse.SUPPRESS)
    args = parser.parse_args(argv)
    if args.child is not None:
        print(json.dumps(run_one(int(args.child), args.solver, args.seed, args.stations)))
        return
    sizes = args.rows or ([1e6] if args.quick else [1e6, 1e7])
    results = []
    for n in sizes:
        cmd = [sys.executable, __file__, "--child", str(n), "--solver", args.solver]
        cmd += ["--seed", str(args.seed), "--stations", str(args.stations)]
        env = dict(os.environ)
        if args.blas_threads is not None:
            for var in ("OPENBLAS_NUM_THREADS", "OMP_NUM_THREADS", "MKL_NUM_THREADS"):
                env[var] = str(args.blas_threads)
        out = subprocess.run(cmd, check=True, capture_output=True, text=True, env=env).stdout
        results.append(json.loads(out.strip().splitlines()[-1]))
    threads = args.blas_threads if args.blas_threads is not None else "as installed"
    print(f"BLAS threads: {threads}; one subprocess per size (peak = ru_maxrss of that fit)")
    head = (
        f"{'rows':>10} {'events':>8} {'K':>5} {'solver':>6} {'iter':>4} {'fit s':>7} "
        f"{'30 pass s':>9} {'ratio':>6} {'peak GB':>7} {'b RMSE':>7} {'med s/s':>7}"
    )
    print(head)
    for r in results:
        print(
            f"{r['rows']:>10d} {r['events']:>8d} {r['stations']:>5d} {r['solver']:>6} "
            f"{r['n_iter']:>4d} {r['t_fit_s']:>7.1f} {r['t_plain30_s']:>9.2f} "
            f"{r['ratio_to_plain30']:>6.1f} {r['peak_gb']:>7.2f} {r['bias_rmse']:>7.4f} "
            f"{r['median_sigma_ratio']:>7.3f}"
        )
    if len(results) >= 2:
        a, b = results[0], results[-1]
        growth = (b["t_fit_s"] / a["t_fit_s"]) / (b["rows"] / a["rows"])
        print(f"cost per row, largest / smallest: {growth:.2f} (1.00 = linear)")
    big = [r for r in results if r["rows"] >= 9e6]
    for r in big:
        print(
            f"targets at 10 M: time {r['t_fit_s']:.1f} s (<= {TARGET_SECONDS_10M:.0f}), "
            f"peak {r['peak_gb']:.2f} GB (<= {TARGET_PEAK_GB_10M:.0f})"
        )


if __name__ == "__main__":
    main()
