"""Per-event network magnitudes: GLS, robust weights, rules, diagnostics.

See docs/network-magnitude.md, docs/censoring.md §3 and docs/worked-examples.md.
"""

from __future__ import annotations

import dataclasses
import json
import warnings
from collections.abc import Sequence

import numpy as np
import pandas as pd
import pytest
import statsmodels.api as sm
from numpy.typing import NDArray
from scipy import stats

from fusion.model.parameters import StationParameters
from fusion.model.simulation import (
    SimulatedNetwork,
    SimulationConfig,
    oracle_estimate,
    simulate_network,
)
from fusion.network.gls_blocks import PairCovariance
from fusion.network.network_magnitude import (
    EstimateMethod,
    FusedMagnitudes,
    NetworkEstimate,
    fuse_events,
)
from fusion.observations import ObservationSet
from stations.errors import (
    ConfigError,
    DegenerateDataWarning,
    DomainError,
    EventNotFoundError,
    ModelNotFoundError,
)
from tests.datasets import YELLOWSTONE
from tests.reference import network as ref
from tests.reference.network import E_TOL, printed_tol

NAT = np.datetime64("NaT", "us")
DATA = YELLOWSTONE


def _params(
    stations: Sequence[str],
    sigma: Sequence[float],
    *,
    bias: Sequence[float] | None = None,
    bias_var: Sequence[float] | None = None,
    pairs: tuple[Sequence[int], Sequence[int], Sequence[float]] | None = None,
    prior: Sequence[bool] | None = None,
    tau_b2: float = 0.04,
    s0_2: float = 0.09,
    magnitude_type: str = "ML",
) -> StationParameters:
    K = len(stations)
    ids = np.array(stations, dtype=object)
    pc = PairCovariance.empty(K) if pairs is None else PairCovariance(*map(np.asarray, pairs), K)
    return StationParameters(
        magnitude_type=magnitude_type,
        unit_ids=ids,
        station_ids=ids.copy(),
        epoch_start=np.full(K, NAT),
        epoch_end=np.full(K, NAT),
        bias=np.zeros(K) if bias is None else np.asarray(bias, float),
        bias_var=np.zeros(K) if bias_var is None else np.asarray(bias_var, float),
        sigma2=np.asarray(sigma, float) ** 2,
        prior_dominated=np.zeros(K, bool) if prior is None else np.asarray(prior, bool),
        pairs=pc,
        tau_b2=tau_b2,
        s0_2=s0_2,
    )


def _obs(
    event: Sequence[str],
    station: Sequence[str],
    magnitude: Sequence[float],
    **kw: object,
) -> ObservationSet:
    return ObservationSet.from_rows(
        magnitude_type="ML", event_id=event, station_id=station, magnitude=magnitude, **kw
    )


def _one_event(values: Sequence[float], sigma: Sequence[float], **kw: object) -> FusedMagnitudes:
    st = [f"XX.S{i}." for i in range(len(values))]
    return fuse_events(_obs(["e"] * len(values), st, values), _params(st, sigma), **kw)


def _num(text: str | Sequence[str]) -> NDArray[np.float64]:
    return np.asarray([float(t) for t in ([text] if isinstance(text, str) else text)])


# -- docs/worked-examples.md E1 --------------------------------------------------------------------


@pytest.fixture(scope="module")
def e1() -> FusedMagnitudes:
    # robust weights off: E1 is the plain GLS example.
    return _one_event(ref.E1_READINGS, ref.E1_SIGMA, robust_min_stations=4)


def test_e1_weights_magnitude_variance(e1: FusedMagnitudes) -> None:
    """E1: w, M̂, V, SE (docs/worked-examples.md, tolerance 1e-6)."""
    ev, c = e1.events.iloc[0], e1.contributions
    np.testing.assert_allclose(c["weight"], _num(ref.E1_WEIGHTS), atol=E_TOL)
    assert ev["magnitude"] == pytest.approx(float(ref.E1_MAGNITUDE), abs=E_TOL)
    assert ev["se"] ** 2 == pytest.approx(float(ref.E1_VARIANCE), abs=printed_tol("0.00000001"))
    assert ev["se"] == pytest.approx(float(ref.E1_SE), abs=printed_tol(ref.E1_SE))
    assert ev["n_eff"] == pytest.approx(1.0 / np.sum(_num(ref.E1_WEIGHTS) ** 2), rel=1e-5)
    assert ev["method"] == EstimateMethod.gls


def test_e1_plain_mean_se_and_variance_ratio(e1: FusedMagnitudes) -> None:
    """E1: plain-mean SE 0.124722 and GLS/mean variance ratio 0.472303 = n²/(Σσ² Σσ⁻²)."""
    sigma = np.asarray(ref.E1_SIGMA)
    plain_se = np.sqrt(np.sum(sigma**2)) / sigma.shape[0]
    assert plain_se == pytest.approx(float(ref.E1_PLAIN_MEAN_SE), abs=E_TOL)
    ratio = e1.events["se"].iloc[0] ** 2 / plain_se**2
    assert ratio == pytest.approx(float(ref.E1_VARIANCE_RATIO), abs=E_TOL)
    assert e1.events["plain_mean"].iloc[0] == pytest.approx(np.mean(ref.E1_READINGS), abs=1e-12)
    assert e1.events["median"].iloc[0] == pytest.approx(4.0, abs=1e-12)


def test_e1_chi2_and_p_value(e1: FusedMagnitudes) -> None:
    """E1: χ² = 3.20408 on 2 dof; p = 0.2015 from scipy.stats.chi2.sf (docs/worked-examples.md)."""
    ev = e1.events.iloc[0]
    assert ev["chi2"] == pytest.approx(float(ref.E1_CHI2), abs=printed_tol(ref.E1_CHI2))
    p = stats.chi2.sf(ev["chi2"], df=ev["n_stations"] - 1)
    assert p == pytest.approx(float(ref.E1_CHI2_P), abs=printed_tol(ref.E1_CHI2_P))
    assert ev["birge_ratio"] == pytest.approx(np.sqrt(ev["chi2"] / 2.0), rel=1e-12)
    assert ev["se_scaled"] == pytest.approx(ev["se"] * ev["birge_ratio"], rel=1e-12)


def test_e1_against_statsmodels_wls(e1: FusedMagnitudes) -> None:
    """statsmodels WLS on a constant: params = M̂; bse with fixed scale = SE; default bse
    (scale χ²/(n−1)) = SE·R_B, the Birge-scaled SE."""
    X = np.ones((3, 1))
    w = 1.0 / np.asarray(ref.E1_SIGMA) ** 2
    fixed = sm.WLS(np.asarray(ref.E1_READINGS), X, weights=w).fit(cov_type="fixed scale")
    free = sm.WLS(np.asarray(ref.E1_READINGS), X, weights=w).fit()
    ev = e1.events.iloc[0]
    assert ev["magnitude"] == pytest.approx(fixed.params[0], abs=1e-12)
    assert ev["se"] == pytest.approx(fixed.bse[0], rel=1e-12)
    assert ev["se"] * ev["birge_ratio"] == pytest.approx(free.bse[0], rel=1e-12)


def test_e1_loso_z_and_influence(e1: FusedMagnitudes) -> None:
    """E1: LOSO z and influence per station, and their max |·| in the event table."""
    c, ev = e1.contributions, e1.events.iloc[0]
    np.testing.assert_allclose(c["z"], _num(ref.E1_LOSO_Z), atol=printed_tol("0.00001"))
    np.testing.assert_allclose(c["influence"], _num(ref.E1_INFLUENCE), atol=E_TOL)
    # The event table keeps the sign of the row (influence = with minus without the station).
    assert ev["max_influence"] == pytest.approx(float(ref.E1_INFLUENCE[0]), abs=E_TOL)
    assert ev["max_influence_station"] == "XX.S0."
    assert ev["max_abs_z"] == pytest.approx(abs(float(ref.E1_LOSO_Z[1])), abs=5e-6)
    assert np.isnan(ev["jackknife_se"])  # n_j = 3 < 4


def test_jackknife_matches_brute_force_refits() -> None:
    """SE_jack² = ((n−1)/n) Σ (M̂^(−i) − mean)² (Efron & Tibshirani 1993, ch. 11 [from
    memory]), checked against explicit leave-one-out refits with numpy.average."""
    y = np.array([3.9, 4.3, 4.0, 4.15, 3.8])
    s = np.array([0.1, 0.2, 0.3, 0.15, 0.25])
    fused = _one_event(y, s, robust_min_stations=10)
    loo = np.array([np.average(np.delete(y, i), weights=np.delete(s**-2, i)) for i in range(5)])
    want = np.sqrt(4 / 5 * np.sum((loo - loo.mean()) ** 2))
    assert fused.events["jackknife_se"].iloc[0] == pytest.approx(want, rel=1e-10)
    infl = fused.events["magnitude"].iloc[0] - loo
    np.testing.assert_allclose(fused.contributions["influence"], infl, atol=1e-12)


# -- E2, E3: flagged pairs ------------------------------------------------------------------------


def test_e2_correlated_pair_weights() -> None:
    """E2: w = (0.277778, 0.277778, 0.444444), V = 0.0177778; ignoring ρ claims 0.0133333."""
    st = ["XX.A.", "XX.B.", "XX.C."]
    c = ref.E2_RHO * ref.E2_SIGMA**2
    params = _params(st, [ref.E2_SIGMA] * 3, pairs=([0], [1], [c]))
    obs = _obs(["e"] * 3, st, [2.0, 2.1, 2.4])
    fused = fuse_events(obs, params, robust_min_stations=10)
    np.testing.assert_allclose(fused.contributions["weight"], _num(ref.E2_WEIGHTS), atol=E_TOL)
    assert fused.events["se"].iloc[0] ** 2 == pytest.approx(float(ref.E2_VARIANCE), abs=E_TOL)
    naive = fuse_events(obs, _params(st, [ref.E2_SIGMA] * 3), robust_min_stations=10)
    claimed = naive.events["se"].iloc[0] ** 2
    assert claimed == pytest.approx(float(ref.E2_EQUAL_CLAIMED_VARIANCE), abs=E_TOL)
    cov = np.full((3, 3), 0.0) + np.diag([ref.E2_SIGMA**2] * 3)
    cov[0, 1] = cov[1, 0] = c
    true_var = np.ones(3) @ cov @ np.ones(3) / 9.0
    assert true_var == pytest.approx(float(ref.E2_EQUAL_TRUE_VARIANCE), abs=E_TOL)
    # ignoring a real correlation shrinks the SE (docs/network-magnitude.md §8)
    assert claimed < true_var


def test_e3_negative_weight_is_flagged() -> None:
    """E3: σ = (0.1, 0.3), ρ = 0.5: w = (1.071429, −0.071429), V = 0.00964286; flagged."""
    st = ["XX.A.", "XX.B."]
    s1, s2 = ref.E3_SIGMA
    params = _params(st, ref.E3_SIGMA, pairs=([0], [1], [ref.E3_RHO * s1 * s2]))
    fused = fuse_events(_obs(["e", "e"], st, [3.0, 3.1]), params)
    np.testing.assert_allclose(fused.contributions["weight"], _num(ref.E3_WEIGHTS), atol=E_TOL)
    ev = fused.events.iloc[0]
    assert ev["se"] ** 2 == pytest.approx(float(ref.E3_VARIANCE), abs=E_TOL)
    assert "negative-weight" in ev["flags"].split(";")
    assert fused.contributions["flags"].iloc[1] == "negative-weight"
    # Two stations of one pair: z of the difference uses Var(y1 − y2) = s1² + s2² − 2c.
    z = (3.0 - 3.1) / np.sqrt(s1**2 + s2**2 - 2 * ref.E3_RHO * s1 * s2)
    assert fused.contributions["z"].iloc[0] == pytest.approx(z, rel=1e-12)


def test_pairs_agree_with_explicit_gls() -> None:
    """Events with a flagged pair equal dense GLS (numpy.linalg.solve) with the 2×2 block."""
    rng = np.random.default_rng(7)
    st = [f"XX.S{i}." for i in range(6)]
    sigma = rng.uniform(0.1, 0.4, size=6)
    c = 0.5 * sigma[2] * sigma[3]
    params = _params(st, sigma, pairs=([2], [3], [c]), bias=rng.normal(0, 0.2, 6))
    m = rng.normal(3.0, 0.3, size=6)
    fused = fuse_events(_obs(["e"] * 6, st, m), params, robust_min_stations=10)
    cov = np.diag(sigma**2)
    cov[2, 3] = cov[3, 2] = c
    a = np.linalg.solve(cov, np.ones(6))
    M = a @ (m - params.bias) / a.sum()
    assert fused.events["magnitude"].iloc[0] == pytest.approx(M, abs=1e-12)
    assert fused.events["se"].iloc[0] == pytest.approx(1 / np.sqrt(a.sum()), rel=1e-12)
    r = m - params.bias - M
    assert fused.events["chi2"].iloc[0] == pytest.approx(r @ np.linalg.solve(cov, r), rel=1e-10)


# -- E6 -------------------------------------------------------------------------------------------


def test_e6_gutenberg_richter_posterior_shift() -> None:
    """E6: posterior mean − M̂ = −b ln10 s² = −0.0230, −0.0921, −0.2072 (b = 1)."""
    st = ["XX.A.", "XX.B.", "XX.C."]
    params = _params(st, ref.E6_SE)
    fused = fuse_events(_obs(["a", "b", "c"], st, [2.0, 2.0, 2.0]), params, gr_b_value=1.0)
    ev = fused.events
    np.testing.assert_allclose(ev["se"], ref.E6_SE, rtol=1e-12)
    shift = (ev["gr_posterior_mean"] - ev["magnitude"]).to_numpy()
    np.testing.assert_allclose(shift, _num(ref.E6_SHIFT), atol=printed_tol("0.0001"))
    assert (
        fuse_events(_obs(["a"], ["XX.A."], [2.0]), params).events["gr_posterior_mean"].isna().all()
    )


# -- E5 through fuse_events --------------------------------------------------------------------


def _e5_obs() -> tuple[ObservationSet, StationParameters]:
    st = [f"XX.S{i}." for i in range(5)]
    obs = _obs(
        ["e"] * 5,
        st,
        [*ref.E5_DETECTIONS, np.nan, np.nan],
        threshold=[np.nan, np.nan, np.nan, *ref.E5_THRESHOLDS],
    )
    return obs, _params(st, [ref.E5_SIGMA] * 5)


def test_e5_through_fuse_events() -> None:
    """E5 via fuse_events: Tobit 2.002124 ± 0.123919; 2 non-detections used."""
    obs, params = _e5_obs()
    ev = fuse_events(obs, params, use_nondetections=True).events.iloc[0]
    assert ev["magnitude"] == pytest.approx(float(ref.E5_MAGNITUDE), abs=E_TOL)
    assert ev["se"] == pytest.approx(float(ref.E5_SE), abs=E_TOL)
    assert ev["n_nondetections_used"] == 2
    assert ev["censoring_shift"] == pytest.approx(float(ref.E5_MAGNITUDE) - 2.1, abs=E_TOL)
    assert ev["method"] == EstimateMethod.censored_likelihood
    assert "censoring-used" in ev["flags"]
    soft = fuse_events(obs, params, use_nondetections=True, soft_threshold_sd=ref.E5_SOFT_SD)
    assert soft.events["magnitude"].iloc[0] == pytest.approx(
        float(ref.E5_SOFT_MAGNITUDE), abs=E_TOL
    )


def test_e5_detected_only_and_flagged_uncorrected() -> None:
    """Without use_nondetections: mean 2.1, SE 0.1443, flag censoring-uncorrected.

    docs/network-magnitude.md §9.
    """
    obs, params = _e5_obs()
    fused = fuse_events(obs, params)
    ev = fused.events.iloc[0]
    assert ev["magnitude"] == pytest.approx(2.1, abs=1e-12)
    assert ev["se"] == pytest.approx(float(ref.E5_DETECTED_ONLY_SE), abs=5e-5)
    assert "censoring-uncorrected" in ev["flags"]
    assert ev["n_nondetections_used"] == 0


def test_censored_weights_sum_to_one() -> None:
    """For a censoring-used event the row weights ∂M̂/∂v sum to 1 over all its rows."""
    obs, params = _e5_obs()
    c = fuse_events(obs, params, use_nondetections=True).contributions
    assert c["weight"].sum() == pytest.approx(1.0, abs=1e-12)
    assert (c["weight"].iloc[3:] > 0).all()
    assert list(c["flags"].iloc[3:]) == ["non-detection;censoring-used"] * 2


def test_uninformative_nondetection_is_left_out() -> None:
    """A non-detection whose station would almost surely have missed the event is not used."""
    st = [f"XX.S{i}." for i in range(4)]
    obs = _obs(
        ["e"] * 4, st, [2.1, 2.3, 1.9, np.nan], threshold=[np.nan, np.nan, np.nan, 3.5]
    )  # Φ((2.1 − 3.5)/0.25) ≈ 1e-8 < 0.01
    ev = fuse_events(obs, _params(st, [0.25] * 4), use_nondetections=True).events.iloc[0]
    assert ev["n_nondetections_used"] == 0
    assert ev["method"] == EstimateMethod.robust_gls
    assert ev["censoring_shift"] == 0.0


def test_clipped_reading_is_a_lower_bound() -> None:
    """A clipped reading never enters the GLS; with censoring it pulls M̂ up (1 − Φ term)."""
    st = [f"XX.S{i}." for i in range(4)]
    obs = _obs(["e"] * 4, st, [2.1, 2.3, 1.9, 2.6], clipped=[False, False, False, True])
    params = _params(st, [0.25] * 4)
    plain = fuse_events(obs, params)
    assert plain.events["n_stations"].iloc[0] == 3
    assert plain.contributions["flags"].iloc[3] == "clipped"
    assert plain.contributions["weight"].iloc[3] == 0.0
    cens = fuse_events(obs, params, use_nondetections=True)
    assert cens.events["magnitude"].iloc[0] > plain.events["magnitude"].iloc[0]
    assert cens.events["n_nondetections_used"].iloc[0] == 0


# -- station-count rules --------------------------------------------------------------------------


def test_single_station_rule() -> None:
    """n = 1: M̂ = m − b̂, SE = sqrt(σ̃² + Var b̂), single-station (docs/network-magnitude.md §5)."""
    params = _params(["XX.A."], [0.2], bias=[0.15], bias_var=[0.01])
    fused = fuse_events(_obs(["e"], ["XX.A."], [3.0]), params)
    ev = fused.events.iloc[0]
    assert ev["magnitude"] == pytest.approx(2.85, abs=1e-12)
    assert ev["se"] == pytest.approx(np.sqrt(0.04 + 0.01), rel=1e-12)
    assert ev["flags"] == "single-station"
    assert ev["method"] == EstimateMethod.single_station
    assert np.isnan(ev["chi2"]) and np.isnan(ev["birge_ratio"])
    assert ev["se_scaled"] == ev["se"]
    assert fused.contributions["correction"].iloc[0] == pytest.approx(-0.15)


@pytest.mark.parametrize(("second", "flagged"), [(2.5, False), (4.0, True)])
def test_two_station_rule(second: float, flagged: bool) -> None:
    """n = 2: no robust weights; z of the difference; |z| > 3 → inconsistent, SE·|z|."""
    st = ["XX.A.", "XX.B."]
    sigma = [0.2, 0.3]
    fused = fuse_events(_obs(["e", "e"], st, [2.3, second]), _params(st, sigma))
    ev, c = fused.events.iloc[0], fused.contributions
    z = (2.3 - second) / np.hypot(*sigma)
    np.testing.assert_allclose(c["z"], [z, -z], rtol=1e-12)
    np.testing.assert_array_equal(c["robust_weight"], [1.0, 1.0])
    se_gls = 1.0 / np.sqrt(np.sum(np.asarray(sigma) ** -2.0))
    assert ev["method"] == EstimateMethod.gls
    assert ("inconsistent" in ev["flags"]) is flagged
    assert ev["se"] == pytest.approx(se_gls * (abs(z) if flagged else 1.0), rel=1e-12)


def test_unknown_station_gets_prior_bias_and_variance() -> None:
    """A station missing from the model: b̂ = 0 ± τ_b, σ̃² = s0² (docs/estimator.md §5); flagged."""
    params = _params(["XX.A.", "XX.B."], [0.2, 0.2], bias=[0.3, -0.1], tau_b2=0.05, s0_2=0.07)
    obs = _obs(["e"] * 3, ["XX.A.", "XX.B.", "YY.NEW."], [3.3, 2.9, 3.2])
    fused = fuse_events(obs, params, robust_min_stations=10)
    c, ev = fused.contributions, fused.events.iloc[0]
    assert pd.isna(c["unit_id"].iloc[2])
    assert c["correction"].iloc[2] == 0.0
    a = np.array([1 / 0.04, 1 / 0.04, 1 / (0.07 + 0.05)])
    np.testing.assert_allclose(c["weight"], a / a.sum(), rtol=1e-12)
    assert "unknown-station" in ev["flags"]
    assert c["flags"].iloc[2] == "unknown-station"
    assert ev["prior_weight_share"] == pytest.approx(a[2] / a.sum(), rel=1e-12)


def test_station_epochs_map_by_time() -> None:
    """A two-epoch station uses the epoch of the origin time; outside every epoch: unknown."""
    t1, t2 = np.datetime64("2024-06-01", "us"), np.datetime64("2025-01-01", "us")
    params = StationParameters(
        magnitude_type="ML",
        unit_ids=np.array(["XX.A.", "XX.A.@2024-06-01", "XX.B."], dtype=object),
        station_ids=np.array(["XX.A.", "XX.A.", "XX.B."], dtype=object),
        epoch_start=np.array([NAT, t1, NAT]),
        epoch_end=np.array([t1, t2, NAT]),
        bias=np.array([0.1, 0.4, 0.0]),
        bias_var=np.zeros(3),
        sigma2=np.full(3, 0.04),
        prior_dominated=np.zeros(3, bool),
        pairs=PairCovariance.empty(3),
        tau_b2=0.04,
        s0_2=0.09,
    )
    times = np.array(["2024-01-01", "2024-01-01", "2024-09-01", "2024-09-01", "2025-03-01"])
    obs = _obs(
        ["a", "a", "b", "b", "c"],
        ["XX.A.", "XX.B.", "XX.A.", "XX.B.", "XX.A."],
        [3.0] * 5,
        origin_time=times.astype("datetime64[us]"),
    )
    c = fuse_events(obs, params).contributions
    assert list(c["unit_id"].astype(object).fillna("-")) == [
        "XX.A.",
        "XX.B.",
        "XX.A.@2024-06-01",
        "XX.B.",
        "-",
    ]
    np.testing.assert_allclose(c["correction"], [-0.1, 0.0, -0.4, 0.0, 0.0])


def test_unit_mapping_equals_assign_units_row_by_row() -> None:
    """The fast path (single open-epoch stations skip the time lookup) gives exactly
    StationParameters.assign_units on every row."""
    rng = np.random.default_rng(21)
    names = np.array([f"XX.S{i:02d}." for i in range(12)], dtype=object)
    cut = np.datetime64("2025-06-01", "us")
    # S00–S07 one open unit, S08–S09 two epochs, S10 bounded, S11 not in the model.
    unit_station = np.r_[np.arange(10), [8, 9, 10]]
    start = np.full(13, NAT)
    end = np.full(13, NAT)
    end[[8, 9]] = cut
    start[[10, 11]] = cut
    start[12], end[12] = np.datetime64("2025-03-01", "us"), np.datetime64("2025-09-01", "us")
    params = StationParameters(
        magnitude_type="ML",
        unit_ids=np.array([f"u{i}" for i in range(13)], dtype=object),
        station_ids=names[unit_station],
        epoch_start=start,
        epoch_end=end,
        bias=rng.normal(0, 0.2, 13),
        bias_var=np.zeros(13),
        sigma2=np.full(13, 0.04),
        prior_dominated=np.zeros(13, bool),
        pairs=PairCovariance.empty(13),
        tau_b2=0.04,
        s0_2=0.09,
    )
    n = 400
    days = rng.uniform(0, 365, n).astype("timedelta64[D]")
    obs = _obs(
        rng.integers(0, 80, n).astype(str),
        names[rng.integers(0, 12, n)],
        rng.normal(3, 0.3, n),
        origin_time=np.datetime64("2025-01-01", "us") + days,
    )
    got = fuse_events(obs, params).contributions["unit_id"].cat.codes.to_numpy()
    want = params.assign_units(obs.station_ids[obs.station], obs.event_time[obs.event])
    np.testing.assert_array_equal(got, want)
    assert (want == -1).any() and (want >= 10).any()


# -- robust weights -----------------------------------------------------------------------------


def test_robust_weights_downweight_a_planted_outlier() -> None:
    """Student-t weights push a +1.0 outlier below outlier_weight and cut its influence."""
    rng = np.random.default_rng(11)
    y = 3.0 + 0.2 * rng.standard_normal(6)
    y[2] += 1.0
    robust = _one_event(y, [0.2] * 6)
    plain = _one_event(y, [0.2] * 6, robust_min_stations=10)
    c = robust.contributions
    assert c["robust_weight"].iloc[2] < 0.3
    assert "outlier" in c["flags"].iloc[2]
    assert (np.delete(c["robust_weight"].to_numpy(), 2) > 0.3).all()
    assert "outlier" in robust.events["flags"].iloc[0]
    clean = np.mean(np.delete(y, 2))
    assert abs(robust.events["magnitude"].iloc[0] - clean) < 0.5 * abs(
        plain.events["magnitude"].iloc[0] - clean
    )
    assert robust.events["method"].iloc[0] == EstimateMethod.robust_gls
    assert robust.events["converged"].iloc[0]


def test_robust_fixed_point_is_consistent() -> None:
    """At convergence ω = min(1, (ν+1)/(ν+z²)) with the reported LOSO z (docs/estimator.md §6)."""
    rng = np.random.default_rng(12)
    y = 2.0 + 0.25 * rng.standard_normal(8)
    y[[1, 5]] += [0.9, -0.7]
    fused = _one_event(y, rng.uniform(0.15, 0.35, 8), robust_tol=1e-12, robust_max_iter=500)
    c = fused.contributions
    want = np.minimum(1.0, 5.0 / (4.0 + c["z"] ** 2))
    np.testing.assert_allclose(c["robust_weight"], want, atol=1e-8)


def test_robust_weights_do_nothing_with_two_stations() -> None:
    st = ["XX.A.", "XX.B."]
    c = fuse_events(_obs(["e", "e"], st, [2.0, 5.0]), _params(st, [0.2, 0.2])).contributions
    np.testing.assert_array_equal(c["robust_weight"], [1.0, 1.0])


# -- simulations (docs/simulation.md) --------------------------------------------------------------


def _true_params(net: SimulatedNetwork) -> StationParameters:
    K = net.bias.shape[0]
    ids = net.observations.station_ids
    return StationParameters(
        magnitude_type="ML",
        unit_ids=ids,
        station_ids=ids,
        epoch_start=np.full(K, NAT),
        epoch_end=np.full(K, NAT),
        bias=net.bias,
        bias_var=np.zeros(K),
        sigma2=net.sigma**2,
        prior_dominated=np.zeros(K, bool),
        pairs=net.pairs,
        tau_b2=net.config.bias_sd**2,
        s0_2=net.config.sigma_median**2,
    )


@pytest.mark.parametrize("seed", [1, 2])
def test_simulation_mar_rmse_and_coverage(seed: int) -> None:
    """MAR mode, true parameters: RMSE ≤ 1.02 × oracle; 68 % coverage in [0.64, 0.72]."""
    net = simulate_network(SimulationConfig(mode="mar"), seed=seed)
    fused = fuse_events(net.observations, _true_params(net), confidence_level=0.68)
    M = fused.events["magnitude"].to_numpy()
    oracle, _ = oracle_estimate(net)
    rmse = np.sqrt(np.mean((M - net.magnitude) ** 2))
    rmse_oracle = np.sqrt(np.mean((oracle - net.magnitude) ** 2))
    assert rmse <= ref.SIM_RMSE_RATIO_MAX * rmse_oracle
    inside = (fused.events["ci_low"] <= net.magnitude) & (net.magnitude <= fused.events["ci_high"])
    lo, hi = ref.SIM_COVERAGE_68
    assert lo <= inside.mean() <= hi
    # Beats the plain mean and the median (acceptance, docs/simulation.md §4).
    for col in ("plain_mean", "median"):
        other = fused.events[col].to_numpy() - net.bias.mean()
        assert rmse < np.sqrt(np.mean((other - net.magnitude) ** 2))


@pytest.fixture(scope="module")
def censor_net() -> SimulatedNetwork:
    return simulate_network(SimulationConfig(mode="censor"), seed=1)


def _bin_bias(fused: FusedMagnitudes, truth: NDArray[np.float64]) -> list[tuple[float, int]]:
    err = fused.events["magnitude"].to_numpy() - truth
    idx = np.digitize(truth, ref.SIM_BIN_EDGES)
    return [
        (float(np.mean(err[idx == k])), int(np.sum(idx == k)))
        for k in range(1, len(ref.SIM_BIN_EDGES))
    ]


def test_simulation_censor_tobit_removes_the_bias(censor_net: SimulatedNetwork) -> None:
    """Censor mode, true thresholds: detected-only GLS is biased > +0.15 in the lowest bin with
    ≥ 100 events; the censored estimate's |bias| ≤ 0.03 there and in every bin ≥ 100 events."""
    params = _true_params(censor_net)
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", DegenerateDataWarning)
        det_only = _bin_bias(fuse_events(censor_net.observations, params), censor_net.magnitude)
        tobit = _bin_bias(
            fuse_events(censor_net.observations, params, use_nondetections=True),
            censor_net.magnitude,
        )
    lowest = next(k for k, (_, n) in enumerate(det_only) if n >= 100)
    assert det_only[lowest][0] > ref.SIM_DETECTED_ONLY_MIN_BIAS
    for bias, n in tobit:
        if n >= 100:
            assert abs(bias) <= ref.SIM_TOBIT_MAX_ABS_BIAS


@pytest.mark.parametrize(
    ("shift", "planned_bias"),
    [(0.1, ref.SIM_THRESHOLD_PLUS_BIAS), (-0.1, ref.SIM_THRESHOLD_MINUS_BIAS)],
)
def test_simulation_censor_threshold_error(
    censor_net: SimulatedNetwork, shift: float, planned_bias: float
) -> None:
    """Thresholds off by ±0.1: the bias has the sign of the shift and stays within the planned
    size of docs/censoring.md §10 (+0.066 / −0.051) plus a margin, in every bin with ≥ 100
    events."""
    obs = censor_net.observations
    shifted = dataclasses.replace(obs, threshold=obs.threshold + shift)
    fused = fuse_events(shifted, _true_params(censor_net), use_nondetections=True)
    overall = float(np.mean(fused.events["magnitude"].to_numpy() - censor_net.magnitude))
    assert np.sign(overall) == np.sign(shift)
    for bias, n in _bin_bias(fused, censor_net.magnitude):
        if n >= 100:
            assert abs(bias) <= abs(planned_bias) + ref.SIM_THRESHOLD_MARGIN


# -- vectorisation and invariances ---------------------------------------------------------------


def test_many_events_equal_events_fused_one_by_one() -> None:
    """No leakage between events: fusing all events at once equals fusing each alone."""
    net = simulate_network(SimulationConfig(mode="mar", n_events=60, n_stations=12), seed=5)
    obs, params = net.observations, _true_params(net)
    together = fuse_events(obs, params).events
    for j in range(0, obs.n_events, 7):
        with warnings.catch_warnings():
            warnings.simplefilter("ignore", DegenerateDataWarning)  # the other events are empty
            alone = fuse_events(obs.subset(obs.event == j), params).events.iloc[j]
        for col in ("magnitude", "se", "chi2", "max_abs_z", "jackknife_se", "median"):
            assert alone[col] == pytest.approx(together[col].iloc[j], abs=1e-9, nan_ok=True)


def test_shift_equivariance_and_station_order() -> None:
    """Adding δ to every reading adds δ to M̂ and leaves SE and weights; row order is free."""
    rng = np.random.default_rng(3)
    y, s = 3.0 + 0.3 * rng.standard_normal(7), rng.uniform(0.1, 0.4, 7)
    base = _one_event(y, s)
    shifted = _one_event(y + 1.7, s)
    assert shifted.events["magnitude"].iloc[0] == pytest.approx(
        base.events["magnitude"].iloc[0] + 1.7, abs=1e-9
    )
    assert shifted.events["se"].iloc[0] == pytest.approx(base.events["se"].iloc[0], rel=1e-9)
    perm = rng.permutation(7)
    st = np.array([f"XX.S{i}." for i in range(7)])
    permuted = fuse_events(_obs(["e"] * 7, st[perm], y[perm]), _params(list(st), s))
    assert permuted.events["magnitude"].iloc[0] == pytest.approx(
        base.events["magnitude"].iloc[0], abs=1e-12
    )


def test_mean_and_median_against_pandas_groupby() -> None:
    """plain_mean and median equal pandas groupby mean / median of the raw detections."""
    net = simulate_network(SimulationConfig(mode="mar", n_events=300), seed=9)
    obs = net.observations
    fused = fuse_events(obs, _true_params(net))
    frame = pd.DataFrame({"ev": obs.event, "m": obs.magnitude})
    g = frame.groupby("ev")["m"]
    np.testing.assert_allclose(fused.events["plain_mean"], g.mean().to_numpy(), rtol=1e-12)
    np.testing.assert_allclose(fused.events["median"], g.median().to_numpy(), rtol=1e-12)


# -- edge cases (docs/conventions.md item 6) -------------------------------------------------------


@pytest.mark.parametrize(
    ("values", "policy", "expect_mag", "flag"),
    [
        ([2.0, 2.0, 2.0], "omit", 2.0, ""),  # identical values
        ([2.0, np.nan, 2.4], "omit", "gls2", "invalid-magnitude"),  # NaN row dropped
        ([2.0, np.inf, 2.4], "omit", "gls2", "invalid-magnitude"),  # inf row dropped
        ([2.0, np.nan, 2.4], "propagate", np.nan, "invalid-magnitude"),
        ([2.0, -np.inf, 2.4], "propagate", np.nan, "invalid-magnitude"),
    ],
)
def test_edge_cases(values: list[float], policy: str, expect_mag: object, flag: str) -> None:
    st = ["XX.A.", "XX.B.", "XX.C."]
    obs = _obs(["e"] * 3, st, values, detected=[True] * 3)
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", DegenerateDataWarning)
        ev = fuse_events(obs, _params(st, [0.2, 0.2, 0.2]), nan_policy=policy).events.iloc[0]
    if expect_mag == "gls2":
        assert ev["magnitude"] == pytest.approx(2.2, abs=1e-12)
        assert ev["n_stations"] == 2
    elif isinstance(expect_mag, float) and np.isnan(expect_mag):
        assert np.isnan(ev["magnitude"]) and np.isnan(ev["se"]) and np.isnan(ev["ci_low"])
        assert ev["flags"] == "invalid-magnitude"
        assert ev["method"] == EstimateMethod.none
    else:
        assert ev["magnitude"] == pytest.approx(expect_mag, abs=1e-12)
        assert ev["chi2"] == 0.0 and ev["birge_ratio"] == 0.0
        assert ev["se_scaled"] == ev["se"] == pytest.approx(0.2 / np.sqrt(3), rel=1e-12)
    assert (flag in ev["flags"].split(";")) if flag else ev["flags"] == ""


def test_nan_policy_raise_names_the_row() -> None:
    st = ["XX.A.", "XX.B."]
    obs = _obs(["e", "e"], st, [2.0, np.nan], detected=[True, True])
    with pytest.raises(DomainError, match=r"row 1 \(event 'e', station 'XX.B.'\).*nan_policy"):
        fuse_events(obs, _params(st, [0.2, 0.2]), nan_policy="raise")


def test_event_without_rows_and_event_with_only_nondetections() -> None:
    """An event in the table with 0 rows, and one with only non-detections: NaN, flagged."""
    st = np.array(["XX.A.", "XX.B."], dtype=object)
    obs = ObservationSet(
        magnitude_type="ML",
        event_ids=np.array(["a", "b", "c"], dtype=object),
        event_time=np.zeros(3, dtype="datetime64[us]"),
        station_ids=st,
        event=np.array([0, 0, 2], dtype=np.int64),
        station=np.array([0, 1, 0], dtype=np.int64),
        magnitude=np.array([2.0, 2.2, np.nan]),
        detected=np.array([True, True, False]),
        threshold=np.array([np.nan, np.nan, 1.5]),
    )
    with pytest.warns(DegenerateDataWarning, match="2 of 3 events have no usable detection"):
        fused = fuse_events(obs, _params(list(st), [0.2, 0.2]), use_nondetections=True)
    ev = fused.events
    assert ev["n_stations"].tolist() == [2, 0, 0]
    assert np.isnan(ev["magnitude"].iloc[1]) and np.isnan(ev["magnitude"].iloc[2])
    assert ev["flags"].iloc[1] == ev["flags"].iloc[2] == "no-usable-detection"
    assert ev["method"].iloc[1] == EstimateMethod.none
    assert fused.event("b").contributions == ()
    assert np.isnan(fused.event("c").magnitude)


# -- parameters and errors -----------------------------------------------------------------------


@pytest.mark.parametrize(
    ("kw", "message"),
    [
        ({"confidence_level": 68}, "'confidence_level' parameter of fuse_events must be a float"),
        ({"robust_min_stations": 1}, "'robust_min_stations'.*range \\[2, inf\\). Got 1"),
        ({"nu": 0.0}, "'nu'"),
        ({"outlier_weight": 1.5}, "'outlier_weight'"),
        ({"soft_threshold_sd": -0.1}, "'soft_threshold_sd'"),
        ({"min_detection_probability": 1.0}, "'min_detection_probability'"),
        ({"gr_b_value": 0.0}, "'gr_b_value'"),
        ({"nan_policy": "drop"}, "'nan_policy'.*Got 'drop' instead"),
    ],
)
def test_bad_parameters_raise_config_error(kw: dict[str, object], message: str) -> None:
    obs = _obs(["e"], ["XX.A."], [2.0])
    with pytest.raises(ConfigError, match=message):
        fuse_events(obs, _params(["XX.A."], [0.2]), **kw)  # type: ignore[arg-type]


def test_magnitude_type_mismatch() -> None:
    with pytest.raises(ModelNotFoundError, match=r"parameters are for mb.*observations are ML"):
        fuse_events(_obs(["e"], ["XX.A."], [2.0]), _params(["XX.A."], [0.2], magnitude_type="mb"))


def test_bad_station_parameters() -> None:
    with pytest.raises(DomainError, match=r"station unit 'XX\.A\.'.*sigma2 0\.0"):
        fuse_events(_obs(["e"], ["XX.A."], [2.0]), _params(["XX.A."], [0.0]))


# -- result objects ----------------------------------------------------------------------------


def test_network_estimate_object(e1: FusedMagnitudes) -> None:
    """event() mirrors the tables; the interval uses scipy.stats.norm.ppf; to_dict is JSON."""
    est = e1.event("e")
    assert isinstance(est, NetworkEstimate)
    ev = e1.events.iloc[0]
    assert est.magnitude == ev["magnitude"] and est.uncertainty == ev["se"]
    assert est.n_stations == 3 and est.method == "gls" and est.converged
    assert [c.station_id for c in est.contributions] == ["XX.S0.", "XX.S1.", "XX.S2."]
    assert est.contributions[0].weight == pytest.approx(float(ref.E1_WEIGHTS[0]), abs=E_TOL)
    lo, hi = est.confidence_interval(0.95)
    half = stats.norm.ppf(0.975) * est.uncertainty
    assert (lo, hi) == pytest.approx((est.magnitude - half, est.magnitude + half), rel=1e-12)
    lo68, hi68 = est.confidence_interval(est.confidence_level)
    assert (lo68, hi68) == pytest.approx((ev["ci_low"], ev["ci_high"]), rel=1e-12)
    text = json.dumps(est.to_dict())
    assert json.loads(text)["contributions"][1]["station_id"] == "XX.S1."
    with pytest.raises(ConfigError, match="'level'"):
        est.confidence_interval(95)
    with pytest.raises(EventNotFoundError, match="event 'nope'"):
        e1.event("nope")
    with pytest.raises(dataclasses.FrozenInstanceError):
        est.magnitude = 1.0  # type: ignore[misc]


# -- real data --------------------------------------------------------------------------------


def test_yellowstone_network_corrections_reproduce_station_ml_means() -> None:
    """UUSS Yellowstone (Holt et al. 2022 data): with b̂ = −Corr (the network's own station
    corrections, two epochs for five stations) and equal σ, the fused magnitude equals the
    per-event mean of the network's corrected station ML (SML) from pandas groupby."""
    d = pd.read_csv(DATA / "station_ml_geobalanced.csv")
    d = d[d["Corr"].notna()]  # 30 rows carry no correction: their raw station ML is unknown
    d["sid"] = d["Net"] + "." + d["Sta"] + "."
    d["t"] = pd.to_datetime(d["Date"] + "T" + d["Time"]).astype("datetime64[us]")
    # One unit per (station, Corr) epoch, from the first use of that Corr to the next one's.
    ep = d.groupby(["sid", "Corr"])["t"].min().reset_index().sort_values(["sid", "t"])
    # Real-data quirk: YUF's two corrections overlap in 2012-07..2013-01; keep the rows whose
    # Corr is the one of their epoch (pandas merge_asof), i.e. drop a handful of stragglers.
    epoch_corr = pd.merge_asof(
        d.sort_values("t"),
        ep.rename(columns={"Corr": "epoch_corr"}).sort_values("t"),
        on="t",
        by="sid",
    )
    consistent = epoch_corr["Corr"] == epoch_corr["epoch_corr"]
    assert (~consistent).sum() < 0.01 * len(d)
    d = epoch_corr[consistent]
    m_raw = d["SML"] - d["Corr"]  # station ML before the network's correction
    nxt = ep.groupby("sid")["t"].shift(-1)
    first = ep.groupby("sid").cumcount() == 0
    start = np.where(first, NAT, ep["t"].to_numpy().astype("datetime64[us]"))
    end = np.where(nxt.isna(), NAT, nxt.to_numpy().astype("datetime64[us]"))
    K = len(ep)
    assert K == 25
    params = StationParameters(
        magnitude_type="ML",
        unit_ids=(ep["sid"] + "#" + np.arange(K).astype(str)).to_numpy(dtype=object),
        station_ids=ep["sid"].to_numpy(dtype=object),
        epoch_start=start,
        epoch_end=end,
        bias=-ep["Corr"].to_numpy(),
        bias_var=np.zeros(K),
        sigma2=np.full(K, 0.21**2),  # HB87 residual SD, docs/check-values.md §8
        prior_dominated=np.zeros(K, bool),
        pairs=PairCovariance.empty(K),
        tau_b2=0.04,
        s0_2=0.0441,
    )
    obs = ObservationSet.from_rows(
        magnitude_type="ML",
        event_id=d["Evid"].astype(str),
        station_id=d["sid"],
        magnitude=m_raw,
        origin_time=d["t"].to_numpy(),
    )
    fused = fuse_events(obs, params, robust_min_stations=1000)
    by_event = d.assign(m_raw=m_raw).groupby(d["Evid"].astype(str))
    want = by_event["SML"].mean().reindex(obs.event_ids).to_numpy()
    np.testing.assert_allclose(fused.events["magnitude"], want, atol=1e-9)
    raw = by_event["m_raw"]
    np.testing.assert_allclose(fused.events["plain_mean"], raw.mean().reindex(obs.event_ids))
    np.testing.assert_allclose(fused.events["median"], raw.median().reindex(obs.event_ids))
    assert not fused.contributions["unit_id"].isna().any()
