"""Label-free validation (docs/validation.md): held-out prediction, split halves, scatter."""

from __future__ import annotations

import numpy as np
import pandas as pd
import pytest
from scipy import stats

from fusion.model.simulation import SimulationConfig, simulate_network
from fusion.model.validation import (
    held_out_prediction,
    loo_median,
    scatter_checks,
    split_half_agreement,
    split_half_sigma_check,
)
from fusion.network.event_gls import event_gls
from fusion.network.gls_blocks import PairCovariance, pair_partner_rows
from fusion.observations import ObservationSet
from stations.errors import ConfigError, InsufficientDataError
from tests.datasets import YELLOWSTONE

DATA = YELLOWSTONE
METHODS = ("gls", "bias_corrected_mean", "plain_mean", "median")


@pytest.fixture(scope="module")
def clean_net():  # type: ignore[no-untyped-def]
    return simulate_network(SimulationConfig(outlier_rate=0.0), seed=3)


def test_held_out_identity_recovers_true_mse(clean_net) -> None:  # type: ignore[no-untyped-def]
    # docs/validation.md §2 (derived; [sim] 0.0051/0.0051, 0.0072/0.0073, 0.0130/0.0131): held-out
    # MSE minus σ² equals each method's true MSE E[(M̃^(−i) − M)²]. The simulator knows M.
    net = clean_net
    obs = net.observations
    res = held_out_prediction(net.bias, net.sigma**2, net.pairs, obs, random_state=1)
    pooled = res.pooled.set_index("method")
    idx = {e: j for j, e in enumerate(obs.event_ids.tolist())}
    j = np.array([idx[e] for e in res.rows["event_id"]])
    excess = []
    for m in METHODS:
        pred = res.rows["target"] - res.rows[f"error_{m}"]
        true_mse = np.mean((pred - net.magnitude[j]) ** 2)
        assert pooled.loc[m, "excess"] == pytest.approx(true_mse, rel=0.05, abs=2e-4)
        excess.append(pooled.loc[m, "excess"])
    # Ranking of docs/estimator.md §6; docs/validation.md: GLS < bias-corrected mean < plain mean,
    # median.
    assert excess[0] < excess[1] < excess[2] < excess[3]
    assert (pooled["diff_ci_low"].iloc[1:] > 0).all()


def test_held_out_z_is_standard_normal_with_true_parameters(clean_net) -> None:  # type: ignore[no-untyped-def]
    net = clean_net
    res = held_out_prediction(net.bias, net.sigma**2, net.pairs, net.observations, replicates=0)
    z = res.rows["z"].to_numpy()
    assert abs(z.mean()) < 0.02 and z.std() == pytest.approx(1.0, abs=0.02)
    ps = res.per_station
    assert ps["coverage"].mean() == pytest.approx(0.95, abs=0.01)
    assert ps["z_sd"].between(0.85, 1.15).all()
    assert res.n_events > 3000 and res.level == 0.95
    # σ̂ too small by a factor 1.5² in variance shows up as z SD > 1.
    bad = held_out_prediction(
        net.bias, net.sigma**2 / 2.25, net.pairs, net.observations, replicates=0
    )
    assert bad.rows["z"].std() > 1.3


def test_paired_bootstrap_se_matches_ratio_estimator(clean_net) -> None:  # type: ignore[no-untyped-def]
    # Reference: linearised standard error of a ratio of event sums (Cochran 1977, §6.3
    # [from memory]): SE(D) ≈ sqrt(J/(J−1) Σ_j (d_j − D n_j)²)/Σ_j n_j over the J events.
    net = clean_net
    res = held_out_prediction(
        net.bias, net.sigma**2, net.pairs, net.observations, replicates=400, random_state=7
    )
    rows = res.rows
    d = rows["error_plain_mean"] ** 2 - rows["error_gls"] ** 2
    per_event = d.groupby(rows["event_id"]).sum()
    n_j = rows.groupby("event_id").size().reindex(per_event.index)
    D = per_event.sum() / n_j.sum()
    J = per_event.size
    se = np.sqrt(J / (J - 1) * ((per_event - D * n_j) ** 2).sum()) / n_j.sum()
    row = res.pooled.set_index("method").loc["plain_mean"]
    assert row["diff_vs_gls"] == pytest.approx(D, rel=1e-9)
    assert row["diff_se"] == pytest.approx(se, rel=0.15)
    assert row["diff_ci_low"] < D < row["diff_ci_high"]


def test_correlated_pair_is_held_out_as_a_whole() -> None:
    # docs/validation.md §2 caveat: with a flagged partner in the event, no method uses the partner
    # to predict its pair mate: changing the partner's reading leaves the mate's errors unchanged.
    net = simulate_network(SimulationConfig(n_stations=12, n_events=300), seed=4)
    obs = net.observations
    res0 = held_out_prediction(net.bias, net.sigma**2, net.pairs, obs, replicates=0)
    k, l = int(net.pairs.k[0]), int(net.pairs.l[0])
    changed = obs.magnitude.copy()
    changed[obs.station == l] += 0.7
    obs1 = ObservationSet(
        magnitude_type="ML",
        event_ids=obs.event_ids,
        event_time=obs.event_time,
        station_ids=obs.station_ids,
        event=obs.event,
        station=obs.station,
        magnitude=changed,
        detected=obs.detected,
    )
    res1 = held_out_prediction(net.bias, net.sigma**2, net.pairs, obs1, replicates=0)
    prow = pair_partner_rows(obs.event, obs.station, net.pairs.partner)
    both = np.unique(obs.event[(obs.station == k) & (prow >= 0)])
    sel = (res0.rows["station_id"] == obs.station_ids[k]) & res0.rows["event_id"].isin(
        obs.event_ids[both]
    )
    assert sel.sum() > 10
    for m in METHODS:
        np.testing.assert_allclose(
            res0.rows.loc[sel, f"error_{m}"], res1.rows.loc[sel, f"error_{m}"], atol=1e-12
        )


def test_loo_median_equals_brute_force() -> None:
    # Reference: numpy.median of each event's other readings, computed one row at a time.
    rng = np.random.default_rng(0)
    ev = np.sort(rng.integers(0, 40, size=300))
    vals = rng.normal(size=300)
    vals[::17] = vals[::13][: vals[::17].size]  # ties
    partner = np.full(300, -1)
    for j in range(40):
        rows = np.flatnonzero(ev == j)
        if rows.size >= 4:
            partner[rows[0]], partner[rows[1]] = rows[1], rows[0]
    got = loo_median(ev, vals, 40, partner)
    for i in range(300):
        rows = np.flatnonzero(ev == ev[i])
        keep = rows[(rows != i) & (rows != partner[i])]
        want = np.median(vals[keep]) if keep.size else np.nan
        np.testing.assert_allclose(got[i], want, atol=1e-15)


def test_held_out_needs_events_with_three_stations() -> None:
    net = simulate_network(SimulationConfig(n_stations=8, n_events=50), seed=1)
    with pytest.raises(InsufficientDataError, match="no event has 30 usable readings"):
        held_out_prediction(net.bias, net.sigma**2, None, net.observations, min_stations=30)
    with pytest.raises(ConfigError, match="'min_stations'"):
        held_out_prediction(net.bias, net.sigma**2, None, net.observations, min_stations=2)
    with pytest.raises(ConfigError, match="'sigma2' parameter of held_out_prediction"):
        held_out_prediction(net.bias, net.sigma[:3], None, net.observations)


# -- split halves -----------------------------------------------------------------------------


def test_split_half_correlation_matches_its_expectation() -> None:
    # docs/validation.md §3: corr(b̂_odd, b̂_even) ≈ τ²/(τ² + Var b̂) for independent halves
    # (derived; 0.04/(0.04 + 0.01) = 0.8 here).
    rng = np.random.default_rng(9)
    K, tau2, v = 2000, 0.04, 0.01
    b = rng.normal(0, np.sqrt(tau2), K)
    a_half = b + rng.normal(0, np.sqrt(v), K)
    b_half = b + rng.normal(0, np.sqrt(v), K)
    vv = np.full(K, v)
    res = split_half_agreement(a_half, b_half, vv, vv, tau_b2=tau2)
    assert res.expected_correlation == pytest.approx(0.8, abs=1e-12)
    assert res.correlation == pytest.approx(0.8, abs=0.02)
    est = split_half_agreement(a_half, b_half, vv, vv)
    assert est.tau_b2 == pytest.approx(tau2, rel=0.1)
    assert est.n_stations == K
    with pytest.raises(InsufficientDataError):
        split_half_agreement(a_half[:2], b_half[:2], vv[:2], vv[:2])


def test_split_half_sigma_ratio_follows_f() -> None:
    # Gaussian sample variances of two halves: their ratio is F(d_a, d_b) [from memory /
    # derived]; wrongly scaled halves are rejected.
    rng = np.random.default_rng(2)
    K = 300
    sigma2 = rng.uniform(0.02, 0.1, K)
    d_a = rng.integers(20, 200, K).astype(float)
    d_b = rng.integers(20, 200, K).astype(float)
    s_a = sigma2 * rng.chisquare(d_a) / d_a
    s_b = sigma2 * rng.chisquare(d_b) / d_b
    ks, p = split_half_sigma_check(s_a, s_b, d_a, d_b)
    assert p > 0.01
    ks_bad, p_bad = split_half_sigma_check(1.3 * s_a, s_b, d_a, d_b)
    assert p_bad < 1e-6 and ks_bad > ks


# -- scatter checks ---------------------------------------------------------------------------


def test_chi2_quadratic_form_with_pairs_matches_direct_inverse() -> None:
    # Reference: r'Σ⁻¹r per event with numpy.linalg.inv of the full event covariance.
    net = simulate_network(SimulationConfig(n_stations=10, n_events=60, outlier_rate=0.0), seed=8)
    obs = net.observations
    s2 = net.sigma**2
    res = scatter_checks(obs, net.bias, s2, pairs=net.pairs, bins=1)
    y = obs.magnitude - net.bias[obs.station]
    g = event_gls(obs.event, obs.station, y, s2[obs.station], obs.n_events, net.pairs)
    u = []
    for j in range(obs.n_events):
        rows = np.flatnonzero(obs.event == j)
        if rows.size < 2:
            continue
        sts = obs.station[rows]
        S = np.diag(s2[sts])
        for a, sa in enumerate(sts):
            for b, sb in enumerate(sts):
                if a != b and net.pairs.partner[sa] == sb:
                    S[a, b] = net.pairs.partner_cov[sa]
        r = y[rows] - g.magnitude[j]
        u.append(stats.chi2.cdf(r @ np.linalg.inv(S) @ r, rows.size - 1))
    want = stats.kstest(np.asarray(u), "uniform")
    assert res.ks_statistic == pytest.approx(want.statistic, rel=1e-9)
    assert res.n_events == len(u)


def test_scatter_checks_under_the_model_and_misspecified(clean_net) -> None:  # type: ignore[no-untyped-def]
    # Under the model χ²_j/(n_j − 1) follows χ²_{n−1}/(n−1) (docs/network-magnitude.md §4;
    # docs/validation.md §4).
    net = clean_net
    good = scatter_checks(net.observations, net.bias, net.sigma**2, pairs=net.pairs)
    assert good.ks_pvalue > 0.01
    assert good.by_magnitude["mean_chi2_ratio"].between(0.9, 1.1).all()
    assert good.by_magnitude["residual_skewness"].abs().max() < 0.06
    assert good.by_magnitude["n_events"].sum() == good.n_events
    bad = scatter_checks(net.observations, net.bias, 1.3 * net.sigma**2, pairs=net.pairs)
    assert bad.ks_statistic > 5 * good.ks_statistic
    assert (bad.by_magnitude["mean_chi2_ratio"] < 0.9).all()


def test_censoring_shows_as_residual_skewness_at_small_magnitude() -> None:
    # docs/censoring.md §1: detection on the reading skews small events' residuals (Ringdal 1976);
    # the same data without censoring (mar mode) show none. Measured: −0.14…−0.16 in the three
    # lowest M̂ bins, +0.03 in the highest.
    cens = simulate_network(SimulationConfig(outlier_rate=0.0, mode="censor"), seed=3)
    res = scatter_checks(cens.observations, cens.bias, cens.sigma**2, pairs=cens.pairs)
    skew = res.by_magnitude["residual_skewness"].to_numpy()
    assert np.all(np.abs(skew[:3]) > 0.08)
    assert abs(skew[-1]) < abs(skew[0])


# -- real data: Yellowstone ML (Holt, Pechmann & Koper 2022) ----------------------------------


def test_yellowstone_held_out_check_flags_the_network_correction_table() -> None:
    # Real data (Holt, Pechmann & Koper 2022 data set; Corr fixed for every station from 2014):
    # scoring the network's own station corrections (b = −Corr) by held-out prediction of the
    # uncorrected station ML (SML − Corr) on 2014–2020 events, without any label, shows they
    # predict worse than no correction (measured: plain mean − GLS = −0.0102 magnitude units²,
    # 95 % CI −0.0118…−0.0086). The labelled view agrees: per-station medians of m − EqML
    # (EqML the published event ML) differ from −Corr by 0.22 on average.
    frame = pd.read_csv(DATA / "station_ml_geobalanced.csv", dtype={"Evid": str})
    t = pd.to_datetime(frame["Date"] + "T" + frame["Time"], format="ISO8601")
    keep = (t >= "2014-01-01").to_numpy()
    frame, t = frame[keep], t[keep]
    sid = (frame["Net"] + "." + frame["Sta"] + ".").to_numpy()
    m = (frame["SML"] - frame["Corr"]).to_numpy()
    obs = ObservationSet.from_rows(
        magnitude_type="ML",
        event_id=frame["Evid"].to_numpy(),
        station_id=sid,
        magnitude=m,
        origin_time=t.to_numpy(),
    )
    names = obs.station_ids.astype(str)
    corr = frame.groupby(sid)["Corr"].agg(["min", "max"]).reindex(names)
    assert (corr["min"] == corr["max"]).all()
    bias = -corr["min"].to_numpy()
    res = held_out_prediction(
        bias,
        np.full(obs.n_stations, 0.3**2),
        PairCovariance.empty(obs.n_stations),
        obs,
        random_state=0,
    )
    pooled = res.pooled.set_index("method")
    assert res.n_events > 300
    assert pooled.loc["plain_mean", "diff_ci_high"] < 0
    assert pooled.loc["plain_mean", "diff_ci_low"] < pooled.loc["plain_mean", "diff_vs_gls"]
    labelled = pd.Series(m - frame["EqML"].to_numpy()).groupby(sid).median().reindex(names)
    assert np.mean(np.abs(labelled.to_numpy() - bias)) > 0.1
