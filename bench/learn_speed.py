"""The whole station-model fit as ``magfuse learn`` runs it, against the core fit, at scale.

Data: :func:`bench.fit_speed.generate` with 200 stations (constant biases, Gaussian errors,
1 % outlier cells), one year; readings below a per-reading detection threshold
(1.3 + N(0, 0.2²) magnitude units) become non-detections that keep the threshold, so the
censored refit runs too. The learn fit is
:meth:`fusion.model.station_model.StationModel.from_config` with every default of
:class:`fusion.settings.MagfuseConfig` (pairs, global test, epochs, non-detections); the core fit
is :func:`fusion.model.reml_em.fit_reml_em` on the same readings, in the same process, first.
Reported: seconds, peak resident memory of the process (``ru_maxrss``), the ratio learn/core,
and the epochs split (none is right: the biases are constant).

Usage::

    python bench/learn_speed.py                # 1 M and 10 M readings, each in a subprocess
    python bench/learn_speed.py --rows 1e6     # one size
    python bench/learn_speed.py --global-test-replicates 0   # without the global test

Targets (issue 14): 10 M readings within 120 s and 3 GB; no false epoch at either size.
"""

from __future__ import annotations

import argparse
import json
import resource
import subprocess
import sys
import time
import warnings
from pathlib import Path
from typing import Any

import numpy as np


def _data(n_rows: int, seed: int = 0) -> Any:
    sys.path.insert(0, str(Path(__file__).resolve().parent.parent))
    from bench.fit_speed import generate

    obs, _, _ = generate(n_rows, n_stations=200, seed=seed)
    rng = np.random.default_rng(seed + 1)
    threshold = 1.3 + rng.normal(0.0, 0.2, obs.n_obs)
    detected = obs.magnitude >= threshold
    from dataclasses import replace

    return replace(
        obs,
        detected=detected,
        magnitude=np.where(detected, obs.magnitude, np.nan),
        threshold=threshold,
        clipped=np.zeros(obs.n_obs, dtype=bool),
        distance_km=np.full(obs.n_obs, np.nan),
    )


def run_one(n_rows: int, replicates: int | None = None) -> dict[str, Any]:
    from fusion.model.anchors import Anchor
    from fusion.model.reml_em import fit_reml_em
    from fusion.model.station_model import StationModel
    from fusion.settings import MagfuseConfig

    obs = _data(n_rows)
    cfg = MagfuseConfig()
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        t = time.perf_counter()
        fit_reml_em(obs.subset(obs.detected), anchor=Anchor())
        t_core = time.perf_counter() - t
        model = StationModel.from_config(
            cfg.learn, cfg.pairs, cfg.epochs, censoring=cfg.censoring, random_state=0
        )
        if replicates is not None:
            model.set_params(global_test_replicates=replicates)
        t = time.perf_counter()
        model.fit(obs)
        t_learn = time.perf_counter() - t
    peak = resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1e6
    return {
        "rows": int(obs.n_obs),
        "detected": int(obs.detected.sum()),
        "stations": int(obs.n_stations),
        "t_core_s": t_core,
        "t_learn_s": t_learn,
        "ratio": t_learn / t_core,
        "peak_gb": peak,
        "epochs": len(model.epoch_table_),
        "global_test_p": None if model.global_test_ is None else model.global_test_.p_value,
    }


def main(argv: list[str] | None = None) -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--rows", type=float, nargs="*", default=[1e6, 1e7])
    ap.add_argument(
        "--global-test-replicates",
        type=int,
        default=None,
        help="override [pairs] global_test_replicates (0: no global test)",
    )
    ap.add_argument("--child", action="store_true", help=argparse.SUPPRESS)
    a = ap.parse_args(argv)
    if a.child:
        print(json.dumps(run_one(int(a.rows[0]), a.global_test_replicates)))
        return
    for n in a.rows:
        out = subprocess.run(
            [sys.executable, __file__, "--child", "--rows", str(n)]
            + (
                ["--global-test-replicates", str(a.global_test_replicates)]
                if a.global_test_replicates is not None
                else []
            ),
            capture_output=True,
            text=True,
            check=False,
        )
        if out.returncode != 0:
            print(f"{int(n):,} readings: failed\n{out.stderr[-2000:]}")
            continue
        r = json.loads(out.stdout.strip().splitlines()[-1])
        print(
            f"{r['rows']:,} readings ({r['detected']:,} detected, {r['stations']} stations): "
            f"learn {r['t_learn_s']:.1f} s = {r['ratio']:.1f} x core fit ({r['t_core_s']:.1f} s); "
            f"peak {r['peak_gb']:.2f} GB; epochs split {r['epochs']} (0 is right); "
            f"global test p {r['global_test_p']}",
            flush=True,
        )


if __name__ == "__main__":
    main()
