"""Fusing with a stored model version: its detection curves reach the network estimate."""

from __future__ import annotations

import dataclasses
import warnings
from pathlib import Path

import numpy as np

from fusion.model.simulation import SimulationConfig, simulate_network
from fusion.model.station_model import StationModel
from fusion.settings import MagfuseConfig
from fusion.versions.model_registry import ModelRegistry
from fusion.workflows.fusing import fuse_observations, fuse_with_version


def test_version_curves_give_missing_thresholds_to_the_network_estimate(tmp_path: Path) -> None:
    """Non-detections stored without a threshold (docs/censoring.md §7): the model
    learns detection curves, stores them with the version, and fusing with that version uses
    the non-detections with estimated thresholds, which pulls the detected-only estimate of
    small events down (Ringdal 1976: the detecting stations' average is biased high)."""
    net = simulate_network(SimulationConfig(n_stations=20, n_events=1500, mode="censor"), seed=3)
    obs = net.observations
    hidden = dataclasses.replace(obs, threshold=np.full(obs.n_obs, np.nan))
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        model = StationModel(anchor="median", global_test_replicates=0, random_state=0).fit(hidden)
    curves = model.nondetections_.curves
    assert curves is not None
    reg = ModelRegistry(tmp_path)
    version = reg.save(
        model.parameters_,
        {"nondetections": model.nondetections_.summary()},
        {"detection_curves": curves.table()},
    )
    cfg = MagfuseConfig()
    with_curves = fuse_with_version(hidden, reg, version, cfg).events
    without = fuse_observations(hidden, reg.load_parameters(version), cfg).events
    used = with_curves["n_nondetections_used"].to_numpy() > 0
    assert used.mean() > 0.3
    assert (without["n_nondetections_used"].to_numpy() == 0).all()
    # Against the truth (after one common level offset, the anchor): less bias at small M.
    small = net.magnitude < 1.5
    err_with = with_curves["magnitude"].to_numpy() - net.magnitude
    err_without = without["magnitude"].to_numpy() - net.magnitude
    off = np.nanmedian(err_with[~small]), np.nanmedian(err_without[~small])
    bias_with = np.nanmean(err_with[small] - off[0])
    bias_without = np.nanmean(err_without[small] - off[1])
    assert bias_without > 0.1
    assert abs(bias_with) < bias_without / 2
