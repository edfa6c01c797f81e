"""StationModel: the estimator contract and the whole nightly fit (issue 3).

Contract: docs/conventions.md items 1–7 and 20.
"""

from __future__ import annotations

import copy
import functools
from pathlib import Path

import numpy as np
import pandas as pd
import pytest
from sklearn.base import clone

from fusion.model.anchors import AnchorKind
from fusion.model.parameters import StationParameters
from fusion.model.simulation import SimulatedNetwork, SimulationConfig, simulate_network
from fusion.model.station_model import STATION_TABLE_COLUMNS, StationModel, leave_one_out_z
from fusion.network.gls_blocks import PairCovariance
from fusion.settings import EpochConfig, LearnConfig, PairConfig
from stations.errors import ConfigError, InsufficientDataError, NotFittedError


@functools.lru_cache(maxsize=4)
def _net(seed: int, step: float = 0.0, pairs: bool = True) -> SimulatedNetwork:
    cfg = SimulationConfig(
        n_events=2000,
        pair_rhos=(0.4, 0.5, 0.6) if pairs else (),
        bias_step=step,
        bias_step_station=10,
    )
    return simulate_network(cfg, seed=seed)


def _quick(**kw: object) -> StationModel:
    params: dict[str, object] = {
        "half_life_days": np.inf,
        "window_days": np.inf,
        "detect_pairs": False,
        "detect_epochs": False,
        "global_test_replicates": 0,
    }
    params.update(kw)
    return StationModel(**params)  # type: ignore[arg-type]


# --- the estimator contract --------------------------------------------------------------------


def test_init_only_assigns_and_get_params() -> None:
    est = StationModel(nu=5.0, reference_stations=("XX.A.",))
    assert set(vars(est)) == set(est.get_params())
    assert est.get_params()["nu"] == 5.0
    assert est.set_params(cusum_h=8.0) is est and est.cusum_h == 8.0
    with pytest.raises(ConfigError, match="Invalid parameter 'bogus' for estimator StationModel"):
        est.set_params(bogus=1)
    assert repr(est).startswith("StationModel(") and "cusum_h=8.0" in repr(est)


def test_sklearn_clone() -> None:
    """sklearn.base.clone rebuilds the estimator from get_params (docs/conventions.md item 20)."""
    est = StationModel(half_life_days=90.0, anchor="median", random_state=3)
    twin = clone(est)
    assert twin is not est
    assert twin.get_params() == est.get_params()
    fitted = _quick().fit(_net(1).observations)
    unfitted = clone(fitted)
    assert not hasattr(unfitted, "parameters_")


def test_not_fitted_error() -> None:
    est = StationModel()
    with pytest.raises(NotFittedError, match="This StationModel instance is not fitted yet"):
        _ = est.parameters_
    assert not hasattr(est, "station_table_")
    assert issubclass(NotFittedError, ValueError) and issubclass(NotFittedError, AttributeError)
    with pytest.raises(AttributeError):
        _ = est._private_thing


def test_fit_returns_self_and_keeps_params() -> None:
    est = _quick(reference_stations=("ZZ.S001.", "ZZ.S002."))
    before = copy.deepcopy(est.get_params())
    assert est.fit(_net(1).observations) is est
    assert est.get_params() == before


@pytest.mark.parametrize(
    ("param", "value", "rule"),
    [
        ("nu", 0.0, "a float in the range (0, inf)"),
        ("half_life_days", -1.0, "a float in the range (0, inf]"),
        ("fdr_q", 1.5, "a float in the range (0, 1)"),
        ("min_shared_events", 2, "an int in the range [4, inf)"),
        ("max_iter", 0, "an int in the range [1, inf)"),
        ("anchor", "sideways", "one of"),
        ("detect_pairs", "yes", "a bool"),
        ("shrink_n0", -1.0, "a float in the range [0, inf)"),
    ],
)
def test_parameter_validation(param: str, value: object, rule: str) -> None:
    """docs/conventions.md item 3: "The 'x' parameter of StationModel must be ... Got ..."."""
    est = _quick(**{param: value})
    with pytest.raises(ConfigError, match=rf"The '{param}' parameter of StationModel must be"):
        est.fit(_net(1).observations)
    with pytest.raises(ConfigError) as info:
        est.fit(_net(1).observations)
    assert rule in str(info.value) and "instead." in str(info.value)


def test_from_config(tmp_path: Path) -> None:
    csv = tmp_path / "ref.csv"
    csv.write_text("event_id,magnitude\nsim0001,1.5\n", encoding="utf-8")
    learn = LearnConfig(
        half_life_days=90.0, anchor="reference_events", reference_events_csv=str(csv)
    )
    est = StationModel.from_config(
        learn, PairConfig(min_shared_events=40), EpochConfig(cusum_h=7.0)
    )
    assert est.half_life_days == 90.0 and est.window_days == 360.0
    assert est.min_shared_events == 40 and est.cusum_h == 7.0 and est.detect_epochs
    assert est.anchor == "reference_events"
    assert est.reference_events is not None and est.reference_events.event_id.tolist() == [
        "sim0001"
    ]
    assert StationModel.from_config(LearnConfig(), PairConfig(), EpochConfig()).nu == 4.0


# --- the nightly fit -----------------------------------------------------------------------------


def test_fit_outputs_and_parameters() -> None:
    net = _net(1)
    est = _quick().fit(net.observations)
    params = est.parameters_
    assert isinstance(params, StationParameters)
    assert params.n_units == net.observations.n_stations
    assert list(est.station_table_.columns) == list(STATION_TABLE_COLUMNS)
    assert np.allclose(est.station_table_["bias"], params.bias)
    assert np.allclose(est.station_table_["bias_se"] ** 2, params.bias_var)
    assert est.anchor_.kind is AnchorKind.REFERENCE_SET
    assert est.converged_ and est.n_iter_ == est.fit_.n_iter
    assert est.pair_table_.empty and est.epoch_table_.empty and est.global_test_ is None
    assert params.tau_b2 == est.fit_.prior.tau_b2 and params.s0_2 == est.fit_.prior.s0_2


def test_fit_flags_the_correlated_pairs() -> None:
    """docs/pairs.md via model.pair_tests: the three co-located pairs are flagged and modelled."""
    net = _net(2)
    est = _quick(detect_pairs=True).fit(net.observations)
    flagged = est.pair_table_[est.pair_table_["flagged"]]
    found = {
        tuple(sorted((int(k), int(l)))) for k, l in zip(flagged["k"], flagged["l"], strict=True)
    }
    truth = {(int(k), int(l)) for k, l in zip(net.pairs.k, net.pairs.l, strict=True)}
    assert truth <= found and len(found - truth) <= 1
    pairs = est.parameters_.pairs
    assert pairs.n_pairs == len(found)
    table = est.station_table_.set_index("unit_id")
    for k, l in zip(pairs.k, pairs.l, strict=True):
        assert (
            table.loc[net.observations.station_ids[k], "partner"] == net.observations.station_ids[l]
        )
    assert np.all(pairs.c > 0)


def test_fit_splits_a_stepped_station() -> None:
    """docs/epochs.md: a +0.3 bias step mid-year opens a new epoch with its own bias."""
    net = _net(3, step=0.3, pairs=False)
    est = _quick(detect_epochs=True, cusum_h=8.0).fit(net.observations)
    steps = est.epoch_table_
    mine = steps[steps["station_id"] == "ZZ.S010."]
    assert len(mine) == 1
    step_time = np.datetime64("2025-01-01T00:00", "us") + np.timedelta64(int(182.5 * 86400e6), "us")
    lag = (pd.Timestamp(mine["change_time"].iloc[0]) - pd.Timestamp(step_time)).days
    assert abs(lag) <= 20
    units = est.station_table_[est.station_table_["station_id"] == "ZZ.S010."]
    assert len(units) == 2
    first, second = units.sort_values("epoch_start", na_position="first")["bias"].to_numpy()
    assert second - first == pytest.approx(0.3, abs=0.08)
    # The hand-over assigns readings to the right epoch.
    t = np.array([step_time - np.timedelta64(30, "D"), step_time + np.timedelta64(30, "D")])
    idx = est.parameters_.assign_units(np.array(["ZZ.S010.", "ZZ.S010."]), t)
    assert est.parameters_.unit_ids[idx].tolist() == units["unit_id"].tolist()


def test_leave_one_out_z_is_standard_normal_under_the_model() -> None:
    """LOSO z (docs/network-magnitude.md §7): mean ≈ 0, SD ≈ 1 on model data without outliers."""
    cfg = SimulationConfig(n_events=2000, pair_rhos=(), outlier_rate=0.0)
    net = simulate_network(cfg, seed=4)
    est = _quick().fit(net.observations)
    z = leave_one_out_z(net.observations, est.fit_)
    z = z[np.isfinite(z)]
    assert abs(np.mean(z)) < 0.03
    assert np.std(z) == pytest.approx(1.0, abs=0.05)


def test_global_test_runs() -> None:
    net = _net(2)
    est = _quick(detect_pairs=True, global_test_replicates=9, random_state=0).fit(net.observations)
    g = est.global_test_
    assert g is not None and g.replicates == 9
    assert 0.1 <= g.p_value <= 1.0  # flagged pairs are in the null model (p uniform on k/10)


def test_rolling_fit_continuity_and_warm_start() -> None:
    """docs/rolling-fit.md §4: a later refit keeps the anchor level over the overlap."""
    net = _net(1)
    obs = net.observations
    first = StationModel(
        half_life_days=90.0, window_days=240.0, detect_pairs=False, detect_epochs=False,
        global_test_replicates=0,
    ).fit(obs, as_of="2025-09-01")  # fmt: skip
    assert first.fit_.gamma[obs.event_time > np.datetime64("2025-09-01")].max() == 0.0
    second = clone(first).fit(obs, as_of="2025-12-31", previous=first.parameters_)
    assert second.anchor_.continuity
    assert np.mean(second.parameters_.bias - first.parameters_.bias) == pytest.approx(
        0.0, abs=1e-10
    )
    assert second.anchor_.value == pytest.approx(first.anchor_.value, abs=1e-10)
    # Warm start: fewer iterations than a cold fit, same relative biases (level aside).
    cold = clone(first).fit(obs, as_of="2025-12-31")
    assert second.n_iter_ < cold.n_iter_
    rel = second.parameters_.bias - cold.parameters_.bias
    assert np.ptp(rel) < 1e-4
    # A reference station retires: the level comes from the stations present in both fits.
    keep = obs.station != 7
    third = StationModel(
        half_life_days=90.0, window_days=240.0, detect_pairs=False, detect_epochs=False,
        global_test_replicates=0,
    ).fit(obs.subset(keep), as_of="2025-12-31", previous=first.parameters_)  # fmt: skip
    overlap = np.arange(obs.n_stations) != 7
    diff = third.parameters_.bias[overlap] - first.parameters_.bias[overlap]
    assert np.mean(diff) == pytest.approx(0.0, abs=1e-10)


def test_empty_window_raises() -> None:
    with pytest.raises(InsufficientDataError, match="window"):
        _quick(window_days=10.0).fit(_net(1).observations, as_of="2024-01-01")


# --- forgetting and unit matching (docs/rolling-fit.md §1) ----------------------------------------


def test_time_weights() -> None:
    """γ = 0.5**(age/h) inside the window, 0 outside and after as_of (docs/rolling-fit.md §1)."""
    from fusion.model.forgetting import time_weights

    t = np.array(["2025-01-01", "2025-06-30", "2025-12-27", "2026-02-01"], dtype="datetime64[us]")
    w = time_weights(t, as_of="2025-12-27", half_life_days=90.0, window_days=300.0)
    assert w.gamma[0] == 0.0 and w.gamma[3] == 0.0  # too old; after as_of
    assert w.gamma[1] == pytest.approx(0.5 ** (180.0 / 90.0))
    assert w.gamma[2] == 1.0
    assert w.in_window.tolist() == [False, True, True, False]


def test_match_previous_units_by_reading_times() -> None:
    """A station-level unit is matched to the previous epoch that holds its readings."""
    from fusion.model.forgetting import match_previous_units, warm_start

    nat = np.datetime64("NaT", "us")
    change = np.datetime64("2025-06-01", "us")
    prev = StationParameters(
        magnitude_type="ML",
        unit_ids=np.array(["XX.A.", "XX.A.@2025-06-01", "XX.B."], dtype=object),
        station_ids=np.array(["XX.A.", "XX.A.", "XX.B."], dtype=object),
        epoch_start=np.array([nat, change, nat]),
        epoch_end=np.array([change, nat, nat]),
        bias=np.array([0.0, 0.3, -0.1]),
        bias_var=np.full(3, 1e-4),
        sigma2=np.array([0.04, 0.05, 0.06]),
        prior_dominated=np.zeros(3, dtype=bool),
        pairs=PairCovariance.empty(3),
        tau_b2=0.04,
        s0_2=0.05,
    )
    units = np.array(["XX.A.", "XX.B.", "XX.C."], dtype=object)
    # All readings of unit 0 (station A) fall after the change: it is the second epoch now.
    row_unit = np.array([0, 0, 0, 1, 1])
    row_time = np.array(["2025-07-01", "2025-08-01", "2025-09-01", "2025-07-01", "2025-08-01"],
                        dtype="datetime64[us]")  # fmt: skip
    match = match_previous_units(prev, units, row_unit=row_unit, row_time=row_time)
    assert match.tolist() == [1, 2, -1]
    by_id = match_previous_units(prev, units)
    assert by_id.tolist() == [0, 2, -1]
    warm = warm_start(prev, units, match=match)
    assert warm.bias[:2].tolist() == [0.3, -0.1] and np.isnan(warm.bias[2])
    assert warm.prior is not None and warm.prior.s0_2 == 0.05
