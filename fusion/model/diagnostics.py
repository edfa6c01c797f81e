"""Per-station residual diagnostics: trends, mean residual, SD interval; all units at once.

These are library statistics: the station reliability report (:mod:`fusion.report`) calls them,
and so can any other caller holding residuals per station unit.

**Trends.**
A station magnitude corrected by a constant bias should leave residuals with no trend against
epicentral distance or against event magnitude. A slope against log10(distance) points to a
distance-correction (−log A0) problem at that station; a slope against magnitude points to
saturation or clipping of large amplitudes (flattening at high M), or to a detection-threshold
effect at small M (docs/censoring.md §9).

Per group g the model is y = a_g + b_g x + e with Var e = s_g²/w (weighted least squares,
w = robust weight). With weighted means x̄, ȳ:

    S_xx = Σ w (x − x̄)²,   S_xy = Σ w (x − x̄)(y − ȳ),   b̂ = S_xy / S_xx,
    RSS = Σ w (y − ȳ − b̂ (x − x̄))²,   s² = RSS / (n − 2),   SE(b̂) = sqrt(s² / S_xx),
    t = b̂ / SE(b̂)

(Draper & Smith 1998, *Applied Regression Analysis*, 3rd ed., §9.2, weighted least squares
[from memory: section]); the same numbers as ``statsmodels.api.WLS(y, [1, x], weights=w)``
(``params[1]``, ``bse[1]``, ``tvalues[1]``), which the tests check. Sums are centred on the
group means before squaring (two passes of ``np.bincount``), which avoids the cancellation of
the one-pass formula Σwx² − (Σwx)²/Σw when x is large relative to its spread (e.g. magnitudes
around 5 with spread 0.1).

The alarm rule of the report is |t| > 3. For a single unit without a trend, t follows
Student's t with n − 2 degrees of freedom, so P(|t| > 3) is 0.27 % for large n
(normal tail 2Φ(−3)) and 0.40 % at n = 60; with K units and two trends each, about
2·K·0.0027 units are flagged by chance (5 of 1,000): a flag is a prompt to look, not a verdict.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
from numpy.typing import NDArray
from scipy import stats

__all__ = [
    "TREND_T_ALARM",
    "GroupedMean",
    "GroupedSlope",
    "UnitUsage",
    "chance_flag_rate",
    "grouped_weighted_mean",
    "grouped_wls_slope",
    "sigma_interval",
    "unit_usage",
]

#: |t| above this flags a trend (rule stated in the module docstring and in the report).
TREND_T_ALARM = 3.0


@dataclass(frozen=True, slots=True, eq=False)
class GroupedSlope:
    """Weighted least-squares line per group (arrays of shape (n_groups,)).

    Attributes
    ----------
    slope, se, t : ndarray
        b̂, SE(b̂) and b̂/SE(b̂); NaN for groups with fewer than ``min_rows`` usable rows or
        without spread in x.
    intercept : ndarray
        â = ȳ − b̂ x̄ (the fitted line is â + b̂ x).
    x_mean, y_mean : ndarray
        Weighted means x̄, ȳ.
    x_min, x_max : ndarray
        Range of x in the group (for drawing the line).
    n : ndarray of int
        Usable rows (finite x, y and weight > 0).
    """

    slope: NDArray[np.float64]
    se: NDArray[np.float64]
    t: NDArray[np.float64]
    intercept: NDArray[np.float64]
    x_mean: NDArray[np.float64]
    y_mean: NDArray[np.float64]
    x_min: NDArray[np.float64]
    x_max: NDArray[np.float64]
    n: NDArray[np.int64]


def grouped_wls_slope(
    group: NDArray[np.int64],
    x: NDArray[np.float64],
    y: NDArray[np.float64],
    weight: NDArray[np.float64],
    n_groups: int,
    *,
    min_rows: int = 20,
) -> GroupedSlope:
    """Weighted least-squares slope of ``y`` on ``x`` in every group (module docstring).

    Parameters
    ----------
    group : ndarray of int, shape (n,)
        Group code of each row in [0, n_groups); rows with a negative code are ignored.
    x, y : ndarray, shape (n,)
        Regressor and response (any units; the slope is in units of y per unit of x).
    weight : ndarray, shape (n,)
        Relative weights (inverse-variance up to a per-group factor); rows with a weight that
        is not > 0 or not finite are ignored.
    n_groups : int
        Number of groups.
    min_rows : int, default=20
        Fewer usable rows give NaN slope, SE and t (a line through a handful of residuals
        flags noise).

    Returns
    -------
    GroupedSlope

    Notes
    -----
    Vectorized: five ``np.bincount`` passes over the rows, no loop over groups. A group with
    exactly zero residual variance (a perfect line) gets SE 0 and t = ±inf, or NaN when the
    slope is 0 too.
    """
    g = np.asarray(group, dtype=np.int64)
    xv = np.asarray(x, dtype=np.float64)
    yv = np.asarray(y, dtype=np.float64)
    wv = np.asarray(weight, dtype=np.float64)
    ok = (g >= 0) & np.isfinite(xv) & np.isfinite(yv) & np.isfinite(wv) & (wv > 0.0)
    g, xv, yv, wv = g[ok], xv[ok], yv[ok], wv[ok]
    n = np.bincount(g, minlength=n_groups).astype(np.int64)
    sw = np.bincount(g, weights=wv, minlength=n_groups)
    with np.errstate(invalid="ignore", divide="ignore"):
        xm = np.bincount(g, weights=wv * xv, minlength=n_groups) / sw
        ym = np.bincount(g, weights=wv * yv, minlength=n_groups) / sw
        dx = xv - xm[g]
        dy = yv - ym[g]
        sxx = np.bincount(g, weights=wv * dx * dx, minlength=n_groups)
        sxy = np.bincount(g, weights=wv * dx * dy, minlength=n_groups)
        # Relative spread test: S_xx below ~1e-24 of Σw·x̄² is rounding noise, not spread.
        flat = ~(sxx > 1e-24 * sw * np.maximum(xm * xm, 1.0))
        slope = sxy / sxx
        res = dy - slope[g] * dx
        rss = np.bincount(g, weights=wv * res * res, minlength=n_groups)
        se = np.sqrt(rss / np.maximum(n - 2, 1) / sxx)
        t = slope / se
    bad = (n < max(int(min_rows), 3)) | flat
    slope = np.where(bad, np.nan, slope)
    se = np.where(bad, np.nan, se)
    t = np.where(bad, np.nan, t)
    intercept = ym - slope * xm
    x_min = np.full(n_groups, np.inf)
    x_max = np.full(n_groups, -np.inf)
    np.minimum.at(x_min, g, xv)
    np.maximum.at(x_max, g, xv)
    empty = n == 0
    x_min[empty] = np.nan
    x_max[empty] = np.nan
    return GroupedSlope(
        slope=slope,
        se=se,
        t=t,
        intercept=intercept,
        x_mean=xm,
        y_mean=ym,
        x_min=x_min,
        x_max=x_max,
        n=n,
    )


def chance_flag_rate(n_rows: NDArray[np.int64], t_alarm: float = TREND_T_ALARM) -> float:
    """Expected number of units flagged by chance by one trend test: Σ_g P(|T_{n_g−2}| > t).

    Parameters
    ----------
    n_rows : ndarray of int
        Usable rows per unit; units with fewer than 3 are not tested.
    t_alarm : float, default=3.0
        The alarm level.
    """
    n = np.asarray(n_rows, dtype=np.float64)
    n = n[n >= 3]
    if n.shape[0] == 0:
        return 0.0
    return float(np.sum(2.0 * stats.t.sf(t_alarm, n - 2.0)))


@dataclass(frozen=True, slots=True)
class GroupedMean:
    """Robust-weighted mean residual per group (:func:`grouped_weighted_mean`).

    Attributes
    ----------
    mean : ndarray, shape (G,)
        Σ w r / Σ w; NaN for a group without rows.
    sd : ndarray, shape (G,)
        Weighted SD sqrt(n/(n − 1) · Σ w (r − r̄)² / Σ w); NaN with fewer than 2 rows.
    t : ndarray, shape (G,)
        mean / SE, SE = sqrt(Σ w (r − r̄)² / ((n − 1) Σ w)); NaN with fewer than
        max(``min_rows``, 2) rows.
    n : ndarray of int, shape (G,)
        Rows of the group.
    """

    mean: NDArray[np.float64]
    sd: NDArray[np.float64]
    t: NDArray[np.float64]
    n: NDArray[np.int64]


def grouped_weighted_mean(
    group: NDArray[np.int64],
    residual: NDArray[np.float64],
    weight: NDArray[np.float64],
    n_groups: int,
    *,
    min_rows: int = 20,
) -> GroupedMean:
    """Weighted mean residual, its SD and t ratio for every group at once.

    Under the station model each residual has mean 0, so |t| > :data:`TREND_T_ALARM` says the
    unit's bias has moved since the fit (or its residuals are skewed by detection,
    docs/censoring.md). Weighted mean and variance with frequency-like weights (the weighted
    SD with the n/(n − 1) correction: common practice, no source).

    Parameters
    ----------
    group : ndarray of int, shape (n,)
        Group (station unit) of each row, 0..G−1; rows with a negative code are left out.
    residual : ndarray, shape (n,)
        Residuals, magnitude units.
    weight : ndarray, shape (n,)
        Weights > 0 (robust weights; 1 where none).
    n_groups : int
        G.
    min_rows : int, default=20
        Fewer rows give no t ratio (NaN).

    Returns
    -------
    GroupedMean
    """
    a = group >= 0
    g, r, w = group[a], residual[a], weight[a]
    sw = np.bincount(g, weights=w, minlength=n_groups)
    n_a = np.bincount(g, minlength=n_groups)
    with np.errstate(invalid="ignore", divide="ignore"):
        r_mean = np.bincount(g, weights=w * r, minlength=n_groups) / sw
        dr = r - r_mean[g]
        ss = np.bincount(g, weights=w * dr * dr, minlength=n_groups)
        r_sd = np.sqrt(ss / np.maximum(n_a - 1, 1) * n_a / sw)
        r_se = np.sqrt(ss / np.maximum(n_a - 1, 1) / sw)
        r_t = r_mean / r_se
    few = n_a < max(int(min_rows), 2)
    return GroupedMean(
        mean=np.where(n_a > 0, r_mean, np.nan),
        sd=np.where(n_a > 1, r_sd, np.nan),
        t=np.where(few, np.nan, r_t),
        n=n_a.astype(np.int64),
    )


def sigma_interval(
    sigma: NDArray[np.float64], dof: NDArray[np.float64], level: float
) -> tuple[NDArray[np.float64], NDArray[np.float64]]:
    """Chi-square interval of an SD estimated with ``dof`` degrees of freedom.

    (d s²/χ²_d(1 − α/2), d s²/χ²_d(α/2)) for σ², square-rooted; α = 1 − level. NaN where
    dof is not > 0. (The textbook interval for a normal variance, e.g. NIST/SEMATECH
    e-Handbook of Statistical Methods §7.2.6.1 [from memory: section number].)
    """
    d = np.asarray(dof, dtype=np.float64)
    ok = np.isfinite(d) & (d > 0.0)
    dd = np.where(ok, d, 1.0)
    alpha = 1.0 - float(level)
    hi_q = stats.chi2.ppf(1.0 - alpha / 2.0, dd)
    lo_q = stats.chi2.ppf(alpha / 2.0, dd)
    low = np.where(ok, sigma * np.sqrt(dd / hi_q), np.nan)
    with np.errstate(divide="ignore"):
        high = np.where(ok, sigma * np.sqrt(dd / lo_q), np.nan)
    return low, high


@dataclass(frozen=True, slots=True)
class UnitUsage:
    """How much each station unit contributed to the network magnitudes (:func:`unit_usage`).

    Attributes
    ----------
    n_readings : ndarray of int, shape (K,)
        Detections of the unit.
    weight_share : ndarray, shape (K,)
        Σ weight of the unit's rows / number of events with a magnitude (shares sum to 1 over
        units plus stations the model does not know); NaN without events.
    mean_weight : ndarray, shape (K,)
        Σ weight / n_readings, the unit's typical weight when it reports; NaN without readings.
    outlier_rate : ndarray, shape (K,)
        Readings with robust weight below ``outlier_weight`` / readings with a robust weight.
    """

    n_readings: NDArray[np.int64]
    weight_share: NDArray[np.float64]
    mean_weight: NDArray[np.float64]
    outlier_rate: NDArray[np.float64]


def unit_usage(
    unit: NDArray[np.int64],
    detected: NDArray[np.bool_],
    weight: NDArray[np.float64],
    robust_weight: NDArray[np.float64],
    n_units: int,
    n_events: int,
    *,
    outlier_weight: float = 0.3,
) -> UnitUsage:
    """Readings, weight share, mean weight and outlier rate of every unit at once.

    Parameters
    ----------
    unit : ndarray of int, shape (n,)
        Unit code of each contribution row, −1 for stations the model does not know.
    detected : ndarray of bool, shape (n,)
    weight : ndarray, shape (n,)
        Normalised GLS weight of the row in its event (NaN: none).
    robust_weight : ndarray, shape (n,)
        Robust weight ω of the row (NaN: none).
    n_units : int
        K.
    n_events : int
        Events with a network magnitude.
    outlier_weight : float, default=0.3
        A reading with ω below this is an outlier (docs/estimator.md).

    Returns
    -------
    UnitUsage
    """
    K = n_units
    known = unit >= 0
    det = known & detected
    n_read = np.bincount(unit[det], minlength=K).astype(np.int64)
    w_ok = known & np.isfinite(weight)
    w_sum = np.bincount(unit[w_ok], weights=weight[w_ok], minlength=K)
    with np.errstate(invalid="ignore", divide="ignore"):
        weight_share = w_sum / n_events if n_events else np.full(K, np.nan)
        mean_weight = np.where(n_read > 0, w_sum / np.maximum(n_read, 1), np.nan)
    has_rw = det & np.isfinite(robust_weight)
    n_rw = np.bincount(unit[has_rw], minlength=K)
    n_out = np.bincount(unit[has_rw & (robust_weight < outlier_weight)], minlength=K)
    with np.errstate(invalid="ignore", divide="ignore"):
        outlier_rate = np.where(n_rw > 0, n_out / np.maximum(n_rw, 1), np.nan)
    return UnitUsage(
        n_readings=n_read,
        weight_share=weight_share,
        mean_weight=mean_weight,
        outlier_rate=outlier_rate,
    )
