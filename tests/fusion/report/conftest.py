"""Shared inputs of the report tests: a small simulated network with planted problems.

Network: ``fusion.model.simulation.simulate_network`` (the generator of docs/simulation.md), 24
stations, 1,500 events, three correlated pairs (stations 0-1, 2-3, 4-5 with ρ 0.4, 0.5, 0.6), a +0.4
bias step on station 10 at mid-year, 1 % outlier cells. Planted on top of the generator's
magnitudes:

- station 12: a distance trend, +0.5 magnitude units per decade of epicentral distance;
- station 13: saturation, −0.6 per magnitude unit above M 1.5 (large amplitudes read low).

The model is the truth (true biases, σ, pair covariances), so the only misfits are the planted
ones. Pair tests and drift alarms come from the project's own detectors
(:func:`fusion.model.pair_tests.detect_correlated_pairs`,
:func:`fusion.model.epochs.detect_bias_steps`).
"""

from __future__ import annotations

import dataclasses
import warnings

import numpy as np
import pandas as pd
import pytest

from fusion.model.epochs import detect_bias_steps
from fusion.model.pair_tests import detect_correlated_pairs
from fusion.model.parameters import StationParameters
from fusion.model.simulation import SimulatedNetwork, SimulationConfig, simulate_network
from fusion.network.network_magnitude import FusedMagnitudes, fuse_events
from fusion.report import ReportInputs, report_inputs_from_parameters
from tests.datasets import YELLOWSTONE

NAT = np.datetime64("NaT", "us")
DIST_TREND_STATION = 12
SATURATION_STATION = 13
STEP_STATION = 10
DATA = YELLOWSTONE


def true_parameters(net: SimulatedNetwork) -> StationParameters:
    obs = net.observations
    K = obs.n_stations
    return StationParameters(
        magnitude_type="ML",
        unit_ids=obs.station_ids.copy(),
        station_ids=obs.station_ids.copy(),
        epoch_start=np.full(K, NAT),
        epoch_end=np.full(K, NAT),
        bias=net.bias.copy(),
        bias_var=np.full(K, 4e-4),
        sigma2=net.sigma**2,
        prior_dominated=np.zeros(K, dtype=bool),
        pairs=net.pairs,
        tau_b2=0.04,
        s0_2=0.05,
    )


@dataclasses.dataclass(frozen=True)
class Planted:
    net: SimulatedNetwork
    params: StationParameters
    fused: FusedMagnitudes
    inputs: ReportInputs


@pytest.fixture(scope="session")
def planted() -> Planted:
    cfg = SimulationConfig(
        n_stations=24,
        n_events=1500,
        bias_step=0.4,
        bias_step_station=STEP_STATION,
        max_distance_km=150.0,
    )
    net = simulate_network(cfg, seed=11)
    obs = net.observations
    m = obs.magnitude.copy()
    truth = net.magnitude[obs.event]
    d = obs.station == DIST_TREND_STATION
    m[d] += 0.5 * (np.log10(obs.distance_km[d]) - 1.7)
    s = obs.station == SATURATION_STATION
    m[s] -= 0.6 * np.maximum(truth[s] - 1.5, 0.0)
    obs = dataclasses.replace(obs, magnitude=m)
    net = dataclasses.replace(net, observations=obs)
    params = true_parameters(net)
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        fused = fuse_events(obs, params)
    pairs = detect_correlated_pairs(obs, params.bias, params.sigma2, min_shared=30)
    # h = 8: the level the epochs module recommends for dense networks (few false alarms).
    steps = detect_bias_steps(obs, fused.contributions["z"].to_numpy(), h=8.0)
    coords = pd.DataFrame(
        {
            "station_id": obs.station_ids.astype(str),
            "latitude": -46.0 + net.station_xy[:, 1] / 111.2,
            "longitude": -20.0 + net.station_xy[:, 0] / 77.0,
        }
    )
    inputs = report_inputs_from_parameters(
        params,
        fused,
        model_meta={
            "version": "ML-20250101T000000Z-test0000",
            "window_start": "2025-01-01",
            "window_end": "2026-01-01",
            "as_of": "2026-01-01T00:00:00Z",
            "created": "2026-01-02T03:04:05Z",
            "anchor": {"kind": "reference_set", "value": 0.0, "se": 0.012},
        },
        pairs=pairs.table,
        epochs=steps.table,
        coordinates=coords,
        distance_km=obs.distance_km,
        dof=np.full(obs.n_stations, 150.0),
    )
    return Planted(net=net, params=params, fused=fused, inputs=inputs)
