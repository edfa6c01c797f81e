"""Rejection rate of the global independence test under the model, and on the demo generator.

Part 1 (under the model): networks from :func:`fusion.model.simulation.simulate_network` with
Gaussian errors, no correlated pairs, no outliers, readings missing at random (``mode="mar"``);
the whole :class:`fusion.model.station_model.StationModel` fit (epochs off, pair detection on)
followed by its global test with B = 39 replicates, so that p <= 0.05 is an exact level-0.05
rule ((1 + #{G* >= G})/40 <= 0.05 iff at most one replicate reaches G). Target: rejection rate
within [0.03, 0.08] (issue 14).

Part 2 (what the demo does on purpose): the demo generator (sample_events/generate_demo.py)
with its defaults, and with its two departures from the model switched off: detection
thresholds (``noise_log10_median_nm`` lowered so that almost every reading clears its
threshold) and the 1 % outlier readings (``outlier_rate = 0``). The fit behind the global test
uses detected readings only, so the threshold truncation and the outliers are what the test sees.

Run: ``python bench/global_test_rate.py [N_NULL_SEEDS] [N_DEMO_SEEDS]`` (defaults 200 and 5;
about 2 s per null seed and 15 s per demo fit on 2 cores).
"""

from __future__ import annotations

import dataclasses
import sys
import tempfile
import time
import warnings
from pathlib import Path

import numpy as np


def _null_rate(n_seeds: int) -> None:
    from fusion.model.simulation import SimulationConfig, simulate_network
    from fusion.model.station_model import StationModel

    cfg = SimulationConfig(n_stations=25, n_events=1000, pair_rhos=(), outlier_rate=0.0)
    p = np.empty(n_seeds)
    t0 = time.perf_counter()
    for s in range(n_seeds):
        sim = simulate_network(cfg, seed=1000 + s)
        with warnings.catch_warnings():
            warnings.simplefilter("ignore")
            model = StationModel(
                detect_epochs=False,
                use_nondetections=False,
                global_test_replicates=39,
                random_state=s,
            ).fit(sim.observations)
        p[s] = model.global_test_.p_value if model.global_test_ is not None else np.nan
    ok = np.isfinite(p)
    rate = float(np.mean(p[ok] <= 0.05))
    se = float(np.sqrt(rate * (1 - rate) / ok.sum()))
    print(
        f"under the model: {ok.sum()} networks, rejection rate at 0.05 = {rate:.3f} "
        f"(binomial SE {se:.3f}; target [0.03, 0.08]); mean p {np.mean(p[ok]):.3f}; "
        f"{time.perf_counter() - t0:.0f} s"
    )


def _demo(n_seeds: int) -> None:
    from fusion.model.station_model import StationModel
    from fusion.observations import ObservationSet
    from sample_events.generate_demo import DemoConfig, simulate_demo, write_demo
    from stations.readers.csv import read_csv

    variants = {
        "demo as generated": {},
        "no outliers": {"outlier_rate": 0.0},
        "no detection thresholds": {"noise_log10_median_nm": -1.5},
        "neither": {"outlier_rate": 0.0, "noise_log10_median_nm": -1.5},
    }
    for name, change in variants.items():
        cfg = dataclasses.replace(DemoConfig(), **change)
        ps, ratio = [], []
        for seed in range(n_seeds):
            with tempfile.TemporaryDirectory() as d:
                paths = write_demo(simulate_demo(cfg, seed=seed), Path(d))
                rec = read_csv(paths.csv).records
            obs = ObservationSet.from_frame(rec, magnitude_type="ML")
            with warnings.catch_warnings():
                warnings.simplefilter("ignore")
                m = StationModel(
                    detect_epochs=False,
                    use_nondetections=False,
                    global_test_replicates=39,
                    random_state=seed,
                ).fit(obs)
            g = m.global_test_
            if g is None:
                continue
            ps.append(g.p_value)
            ratio.append(g.statistic / float(np.mean(g.null_statistics)))
        pa = np.asarray(ps)
        print(
            f"{name:<26} seeds {len(ps)}: rejected at 0.05 in {int(np.sum(pa <= 0.05))}; "
            f"G / mean G* = {np.mean(ratio):.3f} (per seed {', '.join(f'{r:.2f}' for r in ratio)})"
        )


def main() -> None:
    n_null = int(sys.argv[1]) if len(sys.argv) > 1 else 200
    n_demo = int(sys.argv[2]) if len(sys.argv) > 2 else 5
    _null_rate(n_null)
    if n_demo:
        _demo(n_demo)


if __name__ == "__main__":
    main()
