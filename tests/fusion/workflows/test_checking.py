"""Label-free check (fusion.workflows.checking) on simulated networks with known truth."""

from __future__ import annotations

import json

import numpy as np
import pytest

from fusion.model.parameters import StationParameters
from fusion.model.simulation import SimulationConfig, simulate_network
from fusion.network.gls_blocks import PairCovariance
from fusion.workflows.checking import CORRECTED_MEAN, check_observations
from stations.strict_json import dumps


def _params(ids: np.ndarray, bias: np.ndarray, sigma2: np.ndarray) -> StationParameters:
    n = ids.shape[0]
    nat = np.full(n, np.datetime64("NaT", "us"))
    return StationParameters(
        magnitude_type="ML",
        unit_ids=ids.astype(object),
        station_ids=ids.astype(object),
        epoch_start=nat,
        epoch_end=nat.copy(),
        bias=bias,
        bias_var=np.zeros(n),
        sigma2=sigma2,
        prior_dominated=np.zeros(n, dtype=bool),
        pairs=PairCovariance.empty(n),
        tau_b2=float(np.var(bias)),
        s0_2=float(np.median(sigma2)),
    )


@pytest.fixture(scope="module")
def sim():  # type: ignore[no-untyped-def]
    return simulate_network(
        SimulationConfig(n_stations=30, n_events=1500, pair_rhos=(), outlier_rate=0.0), seed=4
    )


def test_true_parameters_agree_better_than_the_corrected_mean_and_a_wrong_model_worse(
    sim,  # type: ignore[no-untyped-def]
) -> None:
    ids = np.asarray(sim.observations.station_ids)
    truth = _params(ids, sim.bias, sim.sigma**2)
    rng = np.random.default_rng(0)
    # Wrong model: biases off by N(0, 0.3²) and error variances permuted across stations.
    wrong = _params(ids, sim.bias + rng.normal(0, 0.3, ids.shape[0]), rng.permutation(sim.sigma**2))
    rep = check_observations(
        sim.observations,
        {"wrong": wrong, "truth": truth},
        examined="wrong",
        active="truth",
        seeds=5,
    )
    s = {r["estimator"]: r["agreement_sd"] for r in rep.agreement.summary()}
    assert s["truth"] < s[CORRECTED_MEAN] < s["wrong"]
    worse, reason = rep.candidate_worse()
    assert worse and "worse than the active model" in reason
    mse = rep.held_out.set_index("estimator")["mse"]
    assert mse["truth"] < mse[CORRECTED_MEAN] < mse["wrong"]
    # Per-station predictive scores of the examined version, one row per station.
    assert len(rep.per_station) == ids.shape[0]


def test_same_model_twice_is_not_worse_than_itself(sim) -> None:  # type: ignore[no-untyped-def]
    ids = np.asarray(sim.observations.station_ids)
    truth = _params(ids, sim.bias, sim.sigma**2)
    rep = check_observations(
        sim.observations, {"a": truth, "b": truth}, examined="a", active="b", seeds=4
    )
    assert rep.candidate_worse() == (False, "")


def test_check_json_is_strict_even_with_missing_values(sim) -> None:  # type: ignore[no-untyped-def]
    ids = np.asarray(sim.observations.station_ids)
    truth = _params(ids, sim.bias, sim.sigma**2)
    rep = check_observations(sim.observations, {"t": truth}, examined="t", seeds=2)
    text = dumps(rep.to_dict())

    def refuse(name: str) -> None:
        raise AssertionError(f"non-strict JSON constant {name}")

    payload = json.loads(text, parse_constant=refuse)
    names = [e["estimator"] for e in payload["split_half"]["estimators"]]
    assert names == ["t", CORRECTED_MEAN]
    # The corrected mean has no variance model: its coverage is null, not NaN.
    held = {r["estimator"]: r for r in payload["held_out"]}
    assert held[CORRECTED_MEAN]["coverage"] is None
