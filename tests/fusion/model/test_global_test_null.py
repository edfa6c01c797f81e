"""The global independence test of the station model: nominal under the model, and what it sees.

The full measurement (200 networks, rejection rate 0.035 at level 0.05) is
bench/global_test_rate.py; these are cheaper checks that still fail on a broken test.
"""

from __future__ import annotations

import warnings

import numpy as np

from fusion.model.simulation import SimulationConfig, simulate_network
from fusion.model.station_model import StationModel


def _p_value(mode: str, seed: int, replicates: int = 19) -> tuple[float, float]:
    cfg = SimulationConfig(
        n_stations=25,
        n_events=1000,
        pair_rhos=(),
        outlier_rate=0.0,
        mode=mode,  # type: ignore[arg-type]
    )
    sim = simulate_network(cfg, seed=seed)
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        m = StationModel(
            detect_epochs=False,
            use_nondetections=False,
            global_test_replicates=replicates,
            random_state=seed,
        ).fit(sim.observations)
    g = m.global_test_
    assert g is not None
    return g.p_value, g.statistic / float(np.mean(g.null_statistics))


def test_global_test_under_the_model_rarely_rejects() -> None:
    # 10 networks under the model, B = 19 (p <= 0.05 only when no replicate reaches G): at the
    # nominal 5 % four or more rejections have probability 0.001 (binomial(10, 0.05)).
    p = np.array([_p_value("mar", 2000 + s)[0] for s in range(10)])
    assert np.sum(p <= 0.05) <= 3
    assert 0.25 < p.mean() < 0.75


def test_global_test_sees_detection_threshold_truncation() -> None:
    # Readings kept only above a detection threshold (mode "censor", as in the demo generator)
    # while the fit behind the test uses the detections alone: the truncation makes residuals of
    # stations that detect the same small events depend on each other, and the test rejects.
    for seed in range(2):
        p, ratio = _p_value("censor", seed)
        assert p <= 0.05 and ratio > 1.1
