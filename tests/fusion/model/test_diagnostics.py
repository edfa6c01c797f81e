"""Grouped weighted residual trends (fusion.model.diagnostics) against statsmodels and real data."""

from __future__ import annotations

import numpy as np
import pandas as pd
import pytest
import statsmodels.api as sm
from scipy import stats

from fusion.model.diagnostics import TREND_T_ALARM, chance_flag_rate, grouped_wls_slope
from tests.datasets import YELLOWSTONE

DATA = YELLOWSTONE


def _statsmodels_wls(x: np.ndarray, y: np.ndarray, w: np.ndarray) -> tuple[float, float, float]:
    fit = sm.WLS(y, sm.add_constant(x), weights=w).fit()
    return float(fit.params[1]), float(fit.bse[1]), float(fit.tvalues[1])


def test_matches_statsmodels_wls_per_group() -> None:
    """Reference library: statsmodels WLS slope, SE and t for every group, including a
    group whose x sits far from 0 with a small spread (magnitudes near 6.0 ± 0.1), where the
    uncentred one-pass formula loses digits."""
    rng = np.random.default_rng(3)
    G, n = 6, 80
    g = np.repeat(np.arange(G), n)
    x = rng.normal(1.8, 0.3, size=G * n)
    x[g == 5] = rng.normal(6.0, 0.1, size=n)
    slope_true = np.array([0.0, 0.2, -0.4, 1.0, 0.05, 0.3])
    w = rng.uniform(0.2, 1.0, size=G * n)
    y = 0.1 + slope_true[g] * x + rng.normal(0.0, 0.2, size=G * n) / np.sqrt(w)
    res = grouped_wls_slope(g, x, y, w, G)
    for k in range(G):
        m = g == k
        b, se, t = _statsmodels_wls(x[m], y[m], w[m])
        # Both are exact least squares; agreement to rounding of a few hundred terms.
        assert res.slope[k] == pytest.approx(b, rel=1e-9, abs=1e-12)
        assert res.se[k] == pytest.approx(se, rel=1e-9)
        assert res.t[k] == pytest.approx(t, rel=1e-9)
        assert res.n[k] == n
        assert res.intercept[k] + res.slope[k] * res.x_mean[k] == pytest.approx(res.y_mean[k])


def test_row_order_and_ignored_rows_do_not_matter() -> None:
    rng = np.random.default_rng(4)
    g = rng.integers(0, 4, size=400)
    x, y, w = rng.normal(size=400), rng.normal(size=400), rng.uniform(0.5, 1.0, size=400)
    base = grouped_wls_slope(g, x, y, w, 4)
    perm = rng.permutation(400)
    shuffled = grouped_wls_slope(g[perm], x[perm], y[perm], w[perm], 4)
    np.testing.assert_allclose(shuffled.slope, base.slope, rtol=1e-12)
    # Rows with NaN, weight 0 or group −1 are ignored exactly.
    g2 = np.concatenate([g, [0, 1, -1, 2]])
    x2 = np.concatenate([x, [np.nan, 1.0, 1.0, 1.0]])
    y2 = np.concatenate([y, [1.0, 1.0, 1.0, np.inf]])
    w2 = np.concatenate([w, [1.0, 0.0, 1.0, 1.0]])
    padded = grouped_wls_slope(g2, x2, y2, w2, 4)
    np.testing.assert_allclose(padded.t, base.t, rtol=1e-12)
    np.testing.assert_array_equal(padded.n, base.n)


def test_too_few_rows_and_no_spread_give_nan() -> None:
    g = np.array([0] * 10 + [1] * 30 + [2] * 30)
    x = np.concatenate([np.arange(10.0), np.full(30, 2.0), np.arange(30.0)])
    y = np.concatenate([np.arange(10.0), np.arange(30.0), 0.5 * np.arange(30.0)])
    res = grouped_wls_slope(g, x, y, np.ones(70), 4, min_rows=20)
    assert np.isnan(res.t[0])  # 10 rows < 20
    assert np.isnan(res.slope[1])  # x constant
    assert res.slope[2] == pytest.approx(0.5)  # exact line: SE 0
    assert res.se[2] == pytest.approx(0.0, abs=1e-12)
    assert res.n[3] == 0 and np.isnan(res.x_min[3])


def test_false_flag_rate_matches_student_t() -> None:
    """Under no trend, |t| > 3 happens with probability 2·P(T_{n−2} > 3) (scipy.stats.t),
    0.27 % for large n (2Φ(−3) = 0.0026998, standard normal table; verified with
    scipy.stats.norm.sf). 20,000 groups of 50 rows: the observed flag count lies within
    4.5 binomial SDs of the expected count."""
    rng = np.random.default_rng(5)
    G, n = 20_000, 50
    g = np.repeat(np.arange(G), n)
    x = rng.normal(size=G * n)
    y = rng.normal(size=G * n)
    res = grouped_wls_slope(g, x, y, np.ones(G * n), G)
    p = 2.0 * stats.t.sf(TREND_T_ALARM, n - 2)
    flagged = int(np.count_nonzero(np.abs(res.t) > TREND_T_ALARM))
    sd = np.sqrt(G * p * (1 - p))
    assert abs(flagged - G * p) < 4.5 * sd
    assert chance_flag_rate(res.n) == pytest.approx(G * p)
    assert 2.0 * stats.norm.sf(3.0) == pytest.approx(0.0026998, abs=1e-7)
    assert chance_flag_rate(np.array([2, 1, 0])) == 0.0


def test_yellowstone_station_trends_match_statsmodels() -> None:
    """Real data (UUSS Yellowstone, Holt et al. 2022): the network's corrected station ML
    minus its event ML against log10 epicentral distance, per station, equals statsmodels
    WLS (unit weights) on the same rows."""
    d = pd.read_csv(DATA / "station_ml_geobalanced.csv")
    d = d[d["SML"].notna() & d["EqML"].notna() & (d["Repi"] > 0)]
    codes, stations = pd.factorize(d["Net"] + "." + d["Sta"])
    x = np.log10(d["Repi"].to_numpy())
    y = (d["SML"] - d["EqML"]).to_numpy()
    res = grouped_wls_slope(codes, x, y, np.ones(len(d)), len(stations), min_rows=20)
    checked = 0
    for k in range(len(stations)):
        m = codes == k
        if m.sum() < 20:
            assert np.isnan(res.t[k])
            continue
        b, se, t = _statsmodels_wls(x[m], y[m], np.ones(int(m.sum())))
        assert res.se[k] == pytest.approx(se, rel=1e-8)
        assert res.slope[k] == pytest.approx(b, rel=1e-8, abs=1e-12)
        assert res.t[k] == pytest.approx(t, rel=1e-8)
        checked += 1
    assert checked >= 15  # 20 stations in the file, nearly all with >= 20 readings


def test_unit_usage_counts_shares_and_outliers_by_hand() -> None:
    from fusion.model.diagnostics import unit_usage

    # Two events with a magnitude; unit 0 reads twice (weights 0.6, 0.5; one outlier at
    # ω = 0.1), unit 1 once (weight 0.4, ω = 1), an unknown station (−1) once with weight 0.5.
    unit = np.array([0, 1, 0, -1])
    detected = np.array([True, True, True, True])
    weight = np.array([0.6, 0.4, 0.5, 0.5])
    robust = np.array([1.0, 1.0, 0.1, 1.0])
    u = unit_usage(unit, detected, weight, robust, 3, 2, outlier_weight=0.3)
    np.testing.assert_array_equal(u.n_readings, [2, 1, 0])
    np.testing.assert_allclose(u.weight_share[:2], [1.1 / 2, 0.4 / 2])
    np.testing.assert_allclose(u.mean_weight[:2], [1.1 / 2, 0.4])
    np.testing.assert_allclose(u.outlier_rate[:2], [0.5, 0.0])
    assert np.isnan(u.mean_weight[2]) and np.isnan(u.outlier_rate[2])
