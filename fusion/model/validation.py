"""Label-free validation of the station model and the network estimate (docs/validation.md).

No true event magnitude is known, so the checks compare the model with itself on data it was not
fitted to, or with the distributions it implies.

Held-out station prediction [derived, docs/validation.md §2]
-------------------------------------------------
Let M̃_j^(−i) be any network estimate built without station i, with parameters fitted on an
earlier, disjoint period. If e_ij is independent of the other stations' errors,

    E[(m_ij − b̂_i − M̃_j^(−i))²] = σ_i² + E[(M̃_j^(−i) − M_j)²]   (+ Var b̂_i and a small
                                                                  cross-term for biased methods)

so the held-out mean squared error ranks methods by their true MSE up to a constant that does not
depend on the method. :func:`held_out_prediction` predicts every evaluation reading of an event
with n_j ≥ 3 stations by b̂_i + M̃_j^(−i) for four methods,

- ``gls``: GLS with the fitted parameters (Aitken 1935; docs/network-magnitude.md §2), leave-one-out
  from :func:`fusion.network.event_gls.event_gls`;
- ``bias_corrected_mean``: mean of m_kj − b̂_k over the other stations;
- ``plain_mean``: mean of m_kj over the other stations (the classical network magnitude);
- ``median``: median of m_kj over the other stations,

against the common target m_ij − b̂_i. A correlated pair is held out as a whole: when i has a
flagged partner in the event, the partner leaves every method's reference too. For GLS it also
reports z = (m_ij − b̂_i − M̃)/sqrt(σ̂_i² + Var b̂_i + Ṽ), which should have mean ≈ 0, SD ≈ 1 and
95 % coverage. Method differences get a paired bootstrap over events (events resampled with
replacement, every method scored on the same resample; Efron & Tibshirani 1993, ch. 6
[from memory]).

Other checks
------------
:func:`split_half_agreement` compares bias vectors fitted on odd and even events:
corr(b̂_odd, b̂_even) ≈ τ_b²/(τ_b² + Var b̂) [derived: two independent noisy measurements of the
same b]. :func:`split_half_sigma_check` compares the two halves' σ̂²: their ratio follows
F(d_odd, d_even) under a constant σ [from memory / derived]. :func:`scatter_checks` tests
χ²_j/(n_j − 1) against χ²_{n_j−1}/(n_j − 1) (Kolmogorov–Smirnov on the probability integral
transform) and reports the Birge ratio and the residual skewness by M̂ bin (censoring makes the
residuals of small events skewed, docs/censoring.md §1; Ringdal 1976).

References
----------
Aitken A. C. (1935). Proc. R. Soc. Edinburgh 55:42–48.
Efron B., Tibshirani R. J. (1993). An Introduction to the Bootstrap. Chapman & Hall
[from memory].
Ringdal F. (1976). Maximum-likelihood estimation of seismic magnitude. BSSA 66(3):789–802.
Birge R. T. (1932). The calculation of errors by the method of least squares. Phys. Rev.
40:207–227 [from memory].
"""

from __future__ import annotations

from dataclasses import dataclass
from enum import StrEnum
from typing import Any

import numpy as np
import pandas as pd
from numpy.typing import ArrayLike, NDArray
from scipy import special, stats

from fusion.network.event_gls import event_gls
from fusion.network.gls_blocks import PairCovariance, pair_partner_rows
from fusion.observations import ObservationSet
from stations.errors import ConfigError, InsufficientDataError

__all__ = [
    "HeldOutMethod",
    "HeldOutResult",
    "ScatterCheckResult",
    "SplitHalfResult",
    "held_out_prediction",
    "loo_median",
    "scatter_checks",
    "split_half_agreement",
    "split_half_sigma_check",
]


class HeldOutMethod(StrEnum):
    """Network estimates compared by :func:`held_out_prediction` (module docstring)."""

    GLS = "gls"
    BIAS_CORRECTED_MEAN = "bias_corrected_mean"
    PLAIN_MEAN = "plain_mean"
    MEDIAN = "median"


_METHODS = tuple(HeldOutMethod)


@dataclass(frozen=True, slots=True, eq=False)
class HeldOutResult:
    """Result of :func:`held_out_prediction`.

    Attributes
    ----------
    rows : pandas.DataFrame
        One row per scored reading: ``event_id``, ``station_id``, ``target`` (m − b̂, magnitude
        units), ``error_<method>`` (target − M̃^(−i)), ``gls_variance`` (Ṽ), ``z``.
    pooled : pandas.DataFrame
        One row per method: ``method``, ``n_obs``, ``mse`` (magnitude units²), ``excess``
        (mse − mean(σ̂² + Var b̂), the estimate of the method's own MSE), ``diff_vs_gls``
        (mse − mse of GLS), ``diff_se``, ``diff_ci_low``, ``diff_ci_high`` (paired bootstrap
        over events, percentile interval at ``level``).
    per_station : pandas.DataFrame
        One row per station with scored readings: ``station_id``, ``n_obs``, ``mse_<method>``,
        ``z_mean``, ``z_sd``, ``coverage`` (fraction of |z| ≤ z_{(1+level)/2}).
    n_events : int
        Events scored (n_j ≥ ``min_stations``).
    replicates : int
        Bootstrap replicates.
    level : float
        Confidence level of the intervals and the coverage (fraction).
    """

    rows: pd.DataFrame
    pooled: pd.DataFrame
    per_station: pd.DataFrame
    n_events: int
    replicates: int
    level: float


@dataclass(frozen=True, slots=True, eq=False)
class SplitHalfResult:
    """Result of :func:`split_half_agreement`.

    Attributes
    ----------
    correlation : float
        Pearson correlation of the two bias vectors over stations fitted in both halves.
    expected_correlation : float
        τ_b²/sqrt((τ_b² + mean Var b̂_a)(τ_b² + mean Var b̂_b)); equals τ_b²/(τ_b² + Var b̂)
        for equal halves (docs/validation.md §3).
    tau_b2 : float
        The τ_b² used (magnitude units²).
    n_stations : int
    """

    correlation: float
    expected_correlation: float
    tau_b2: float
    n_stations: int


@dataclass(frozen=True, slots=True, eq=False)
class ScatterCheckResult:
    """Result of :func:`scatter_checks`.

    Attributes
    ----------
    ks_statistic, ks_pvalue : float
        Kolmogorov–Smirnov distance of u_j = F_{χ²_{n_j−1}}(χ²_j) from U(0, 1), and its p-value.
    n_events : int
        Events with n_j ≥ 2 entering the test.
    by_magnitude : pandas.DataFrame
        One row per M̂ bin: ``magnitude_low``, ``magnitude_high``, ``n_events``, ``n_rows``,
        ``mean_chi2_ratio`` (mean χ²_j/(n_j − 1), 1 under the model), ``median_birge``
        (median sqrt(χ²_j/(n_j − 1))), ``residual_skewness`` (sample skewness of the
        standardised residuals of events with n_j ≥ 3).
    """

    ks_statistic: float
    ks_pvalue: float
    n_events: int
    by_magnitude: pd.DataFrame


# -- helpers ----------------------------------------------------------------------------------


def _station_vector(x: ArrayLike, name: str, K: int, func: str) -> NDArray[np.float64]:
    arr = np.asarray(x, dtype=np.float64)
    if arr.shape != (K,):
        raise ConfigError(
            f"The {name!r} parameter of {func} must have shape ({K},), one value per station "
            f"of the observation set. Got shape {arr.shape} instead."
        )
    return arr


def _usable(
    obs: ObservationSet, bias: NDArray[np.float64], s2: NDArray[np.float64]
) -> NDArray[np.bool_]:
    """Detected, unclipped, finite rows of stations with finite parameters and s² > 0."""
    good_station = np.isfinite(bias) & np.isfinite(s2) & (s2 > 0.0)
    return obs.detected & ~obs.clipped & np.isfinite(obs.magnitude) & good_station[obs.station]


def loo_median(
    event: NDArray[np.int64],
    values: NDArray[np.float64],
    n_events: int,
    also_remove: NDArray[np.int64] | None = None,
) -> NDArray[np.float64]:
    """Median of each row's event without that row (and optionally one more row).

    Parameters
    ----------
    event : ndarray of int, shape (n,)
        Event code of each row.
    values : ndarray of float, shape (n,)
    n_events : int
    also_remove : ndarray of int, shape (n,), optional
        A second row of the same event to leave out with each row (e.g. its pair partner),
        -1 for none.

    Returns
    -------
    ndarray of float, shape (n,)
        NaN where nothing is left.

    Notes
    -----
    Vectorized: one ``lexsort`` by (event, value) gives each row's rank r inside its event; the
    t-th remaining value has original rank t' obtained by stepping t over the removed ranks in
    increasing order (t' ← t' + 1 for every removed rank ≤ t'). Even counts average the two
    middle values.
    """
    n = event.shape[0]
    order = np.lexsort((values, event))
    v_sorted = values[order]
    counts = np.bincount(event, minlength=n_events)
    start = np.cumsum(counts) - counts
    rank = np.empty(n, dtype=np.int64)
    rank[order] = np.arange(n, dtype=np.int64) - start[event[order]]
    r_a = rank
    if also_remove is None:
        r_b = np.full(n, -1, dtype=np.int64)
    else:
        r_b = np.where(also_remove >= 0, rank[np.maximum(also_remove, 0)], -1)
    lo_r = np.where(r_b >= 0, np.minimum(r_a, r_b), r_a)
    hi_r = np.where(r_b >= 0, np.maximum(r_a, r_b), -1)
    n_left = counts[event] - 1 - (r_b >= 0)

    def original(t: NDArray[np.int64]) -> NDArray[np.int64]:
        t = t + (t >= lo_r)
        return np.asarray(t + ((hi_r >= 0) & (t >= hi_r)), dtype=np.int64)

    ok = n_left >= 1
    t_lo = np.where(ok, (n_left - 1) // 2, 0)
    t_hi = np.where(ok, n_left // 2, 0)
    base = start[event]
    i_lo = np.clip(base + original(t_lo), 0, max(n - 1, 0))
    i_hi = np.clip(base + original(t_hi), 0, max(n - 1, 0))
    out = 0.5 * (v_sorted[i_lo] + v_sorted[i_hi])
    return np.where(ok, out, np.nan)


def _loo_mean(
    event: NDArray[np.int64],
    values: NDArray[np.float64],
    n_events: int,
    partner_row: NDArray[np.int64],
) -> NDArray[np.float64]:
    total = np.bincount(event, weights=values, minlength=n_events)[event] - values
    count = np.bincount(event, minlength=n_events)[event] - 1.0
    has = partner_row >= 0
    total[has] -= values[partner_row[has]]
    count[has] -= 1.0
    with np.errstate(invalid="ignore", divide="ignore"):
        return np.where(count > 0, total / count, np.nan)


# -- held-out prediction -----------------------------------------------------------------------


def held_out_prediction(
    bias: ArrayLike,
    sigma2: ArrayLike,
    pairs: PairCovariance | None,
    obs: ObservationSet,
    *,
    bias_var: ArrayLike | None = None,
    min_stations: int = 3,
    replicates: int = 1000,
    level: float = 0.95,
    random_state: int | np.random.Generator | None = None,
) -> HeldOutResult:
    """Score network estimates by predicting each held-out station reading (docs/validation.md §2).

    Parameters
    ----------
    bias, sigma2 : array_like, shape (K,)
        Station parameters fitted on the training period (magnitude units, units²); a station
        with a non-finite value is not scored and not used.
    pairs : PairCovariance or None
        Flagged pairs of the training fit (used by GLS; partners are held out together).
    obs : ObservationSet
        Evaluation period (disjoint from the training period), same station table.
    bias_var : array_like, shape (K,), optional
        Var(b̂_i) of the training fit; added to σ̂² in the GLS weights and in z.
    min_stations : int, default=3
        Events with fewer usable readings are not scored.
    replicates : int, default=1000
        Paired-bootstrap replicates over events (0 disables the intervals).
    level : float, default=0.95
        Confidence level (fraction) of the intervals and of the z coverage.
    random_state : int or numpy.random.Generator, optional

    Returns
    -------
    HeldOutResult

    Raises
    ------
    ConfigError
        On wrong shapes or ranges.
    InsufficientDataError
        If no event has ``min_stations`` usable readings.
    """
    func = "held_out_prediction"
    K = obs.n_stations
    b = _station_vector(bias, "bias", K, func)
    s2 = _station_vector(sigma2, "sigma2", K, func)
    bv = np.zeros(K) if bias_var is None else _station_vector(bias_var, "bias_var", K, func)
    if int(min_stations) != min_stations or min_stations < 3:
        raise ConfigError(
            f"The 'min_stations' parameter of {func} must be an int in the range [3, inf). "
            f"Got {min_stations!r} instead."
        )
    if not 0.0 < level < 1.0:
        raise ConfigError(
            f"The 'level' parameter of {func} must be a float in the range (0, 1). "
            f"Got {level!r} instead."
        )
    if int(replicates) != replicates or replicates < 0:
        raise ConfigError(
            f"The 'replicates' parameter of {func} must be an int in the range [0, inf). "
            f"Got {replicates!r} instead."
        )
    use = _usable(obs, b, s2 + bv)
    ev_all = obs.event[use]
    n_j = np.bincount(ev_all, minlength=obs.n_events)
    use[use] = n_j[ev_all] >= min_stations
    if not np.any(use):
        raise InsufficientDataError(
            f"{func}: no event has {min_stations} usable readings in the evaluation data; "
            "use a longer evaluation period or check that its stations are in the fit"
        )
    ev, st = obs.event[use], obs.station[use]
    m = obs.magnitude[use]
    y = m - b[st]
    s2_row = s2[st] + bv[st]
    N = obs.n_events
    pairs_used = pairs if pairs is not None and pairs.n_pairs else None
    if pairs_used is not None:
        prow = pair_partner_rows(ev, st, pairs_used.partner)
    else:
        prow = np.full(ev.shape[0], -1, dtype=np.int64)
    gls = event_gls(ev, st, y, s2_row, N, pairs_used, partner_row=prow)
    pred = {
        HeldOutMethod.GLS: gls.loo_magnitude,
        HeldOutMethod.BIAS_CORRECTED_MEAN: _loo_mean(ev, y, N, prow),
        HeldOutMethod.PLAIN_MEAN: _loo_mean(ev, m, N, prow),
        HeldOutMethod.MEDIAN: loo_median(ev, m, N, prow),
    }
    err = {meth: y - pred[meth] for meth in _METHODS}
    z = err[HeldOutMethod.GLS] / np.sqrt(s2_row + gls.loo_variance)
    ok = np.ones(ev.shape[0], dtype=bool)
    for meth in _METHODS:
        ok &= np.isfinite(err[meth])
    ev, st, y, s2_row, z = ev[ok], st[ok], y[ok], s2_row[ok], z[ok]
    err = {meth: e[ok] for meth, e in err.items()}
    rows = pd.DataFrame(
        {
            "event_id": obs.event_ids[ev].astype(str),
            "station_id": obs.station_ids[st].astype(str),
            "target": y,
            **{f"error_{meth.value}": err[meth] for meth in _METHODS},
            "gls_variance": gls.loo_variance[ok],
            "z": z,
        }
    )
    crit = float(special.ndtri(0.5 + level / 2.0))
    pooled, J = _pooled_comparison(ev, err, s2_row, level, int(replicates), random_state)
    per_station = _per_station_errors(obs, st, err, z, crit)
    return HeldOutResult(
        rows=rows,
        pooled=pooled,
        per_station=per_station,
        n_events=int(J),
        replicates=int(replicates),
        level=float(level),
    )


def _pooled_comparison(
    ev: NDArray[np.int64],
    err: dict[HeldOutMethod, NDArray[np.float64]],
    s2_row: NDArray[np.float64],
    level: float,
    replicates: int,
    random_state: int | np.random.Generator | None,
) -> tuple[pd.DataFrame, int]:
    """Pooled MSE of every method and its difference to GLS with a paired event bootstrap."""
    ev_codes, ev_local = np.unique(ev, return_inverse=True)
    J = ev_codes.shape[0]
    n_ev = np.bincount(ev_local, minlength=J).astype(np.float64)
    sq = np.column_stack(
        [np.bincount(ev_local, weights=err[m_] ** 2, minlength=J) for m_ in _METHODS]
    )
    mse = sq.sum(axis=0) / n_ev.sum()
    diff = mse - mse[0]
    diff_se = np.full(len(_METHODS), np.nan)
    lo = np.full(len(_METHODS), np.nan)
    hi = np.full(len(_METHODS), np.nan)
    if replicates > 0:
        d_boot = _bootstrap_mse_differences(sq, n_ev, replicates, random_state)
        diff_se = d_boot.std(axis=0, ddof=1) if replicates > 1 else np.zeros(len(_METHODS))
        lo = np.quantile(d_boot, 0.5 - level / 2.0, axis=0)
        hi = np.quantile(d_boot, 0.5 + level / 2.0, axis=0)
    pooled = pd.DataFrame(
        {
            "method": [m_.value for m_ in _METHODS],
            "n_obs": int(ev.shape[0]),
            "mse": mse,
            "excess": mse - float(np.mean(s2_row)),
            "diff_vs_gls": diff,
            "diff_se": diff_se,
            "diff_ci_low": lo,
            "diff_ci_high": hi,
        }
    )
    return pooled, int(J)


def _bootstrap_mse_differences(
    sq: NDArray[Any],
    n_ev: NDArray[np.float64],
    replicates: int,
    random_state: int | np.random.Generator | None,
) -> NDArray[np.float64]:
    """Bootstrap replicates (events drawn with replacement) of MSE(method) − MSE(GLS).

    ``sq`` holds each event's sum of squared errors per method (J × methods), ``n_ev`` its
    readings; the draws are counted in chunks of about two million cells.
    """
    J = sq.shape[0]
    rng = np.random.default_rng(random_state)
    boot = np.empty((replicates, len(_METHODS)))
    chunk = max(1, int(2_000_000 // max(J, 1)))
    for s0 in range(0, replicates, chunk):
        B = min(chunk, replicates - s0)
        draw = rng.integers(0, J, size=(B, J))
        counts = np.bincount((draw + (np.arange(B) * J)[:, None]).ravel(), minlength=B * J).reshape(
            B, J
        )
        boot[s0 : s0 + B] = (counts @ sq) / (counts @ n_ev)[:, None]
    return np.asarray(boot - boot[:, :1], dtype=np.float64)


def _per_station_errors(
    obs: ObservationSet,
    st: NDArray[np.int64],
    err: dict[HeldOutMethod, NDArray[np.float64]],
    z: NDArray[np.float64],
    crit: float,
) -> pd.DataFrame:
    """Per station: MSE of every method, mean and SD of z, and the coverage |z| <= crit."""
    st_codes, st_local = np.unique(st, return_inverse=True)
    n_st = np.bincount(st_local).astype(np.float64)
    z_mean = np.bincount(st_local, weights=z) / n_st
    with np.errstate(invalid="ignore", divide="ignore"):
        z_var = (np.bincount(st_local, weights=z * z) - n_st * z_mean**2) / (n_st - 1.0)
    return pd.DataFrame(
        {
            "station_id": obs.station_ids[st_codes].astype(str),
            "n_obs": n_st.astype(np.int64),
            **{
                f"mse_{m_.value}": np.bincount(st_local, weights=err[m_] ** 2) / n_st
                for m_ in _METHODS
            },
            "z_mean": z_mean,
            "z_sd": np.sqrt(np.maximum(z_var, 0.0)),
            "coverage": np.bincount(st_local, weights=np.abs(z) <= crit) / n_st,
        }
    )


# -- split-half checks -------------------------------------------------------------------------


def split_half_agreement(
    bias_a: ArrayLike,
    bias_b: ArrayLike,
    bias_var_a: ArrayLike,
    bias_var_b: ArrayLike,
    *,
    tau_b2: float | None = None,
) -> SplitHalfResult:
    """Correlation of biases fitted on two halves of the events, and its expected value.

    Parameters
    ----------
    bias_a, bias_b : array_like, shape (K,)
        b̂ from the two halves (e.g. odd and even events), anchored the same way; NaN for a
        station not fitted in a half.
    bias_var_a, bias_var_b : array_like, shape (K,)
        Var(b̂_i) of each half (magnitude units²).
    tau_b2 : float, optional
        Spread of the true biases (the fit's τ_b², docs/estimator.md §5). If omitted, estimated by
        the covariance of the two halves (their errors are independent), floored at 0.

    Returns
    -------
    SplitHalfResult

    Raises
    ------
    InsufficientDataError
        With fewer than 3 stations fitted in both halves.
    """
    a = np.asarray(bias_a, dtype=np.float64)
    b = np.asarray(bias_b, dtype=np.float64)
    va = np.asarray(bias_var_a, dtype=np.float64)
    vb = np.asarray(bias_var_b, dtype=np.float64)
    if not (a.shape == b.shape == va.shape == vb.shape) or a.ndim != 1:
        raise ConfigError(
            "split_half_agreement: bias_a, bias_b, bias_var_a and bias_var_b must be 1-d arrays "
            f"of one length; got shapes {a.shape}, {b.shape}, {va.shape}, {vb.shape}"
        )
    ok = np.isfinite(a) & np.isfinite(b) & np.isfinite(va) & np.isfinite(vb)
    n = int(ok.sum())
    if n < 3:
        raise InsufficientDataError(
            f"split_half_agreement: {n} stations are fitted in both halves; need at least 3"
        )
    a, b, va, vb = a[ok], b[ok], va[ok], vb[ok]
    corr = float(np.corrcoef(a, b)[0, 1])
    tau2 = float(max(0.0, np.cov(a, b)[0, 1])) if tau_b2 is None else float(tau_b2)
    denom = np.sqrt((tau2 + va.mean()) * (tau2 + vb.mean()))
    expected = float(tau2 / denom) if denom > 0 else float("nan")
    return SplitHalfResult(
        correlation=corr, expected_correlation=expected, tau_b2=tau2, n_stations=n
    )


def split_half_sigma_check(
    sigma2_a: ArrayLike, sigma2_b: ArrayLike, dof_a: ArrayLike, dof_b: ArrayLike
) -> tuple[float, float]:
    """KS test of σ̂²_a/σ̂²_b against F(d_a, d_b) across stations (docs/validation.md §3).

    Parameters
    ----------
    sigma2_a, sigma2_b : array_like, shape (K,)
        Raw (unmoderated) variance estimates of the two halves.
    dof_a, dof_b : array_like, shape (K,)
        Their degrees of freedom d_i (docs/estimator.md §5); stations with d ≤ 0 or NaN are skipped.

    Returns
    -------
    ks_statistic, ks_pvalue : float

    Notes
    -----
    Under a constant σ_i and Gaussian errors d σ̂²/σ² ~ χ²_d, so the ratio of two independent
    halves is F(d_a, d_b) [from memory / derived]; the probability integral transform of each
    station's ratio is U(0, 1). Moderated variances (docs/estimator.md §5) are shrunk and do not
    follow F.
    """
    s_a = np.asarray(sigma2_a, dtype=np.float64)
    s_b = np.asarray(sigma2_b, dtype=np.float64)
    d_a = np.asarray(dof_a, dtype=np.float64)
    d_b = np.asarray(dof_b, dtype=np.float64)
    ok = np.isfinite(s_a) & np.isfinite(s_b) & (s_a > 0) & (s_b > 0) & (d_a > 0) & (d_b > 0)
    if int(ok.sum()) < 3:
        raise InsufficientDataError(
            f"split_half_sigma_check: {int(ok.sum())} stations have both variances; need 3"
        )
    u = stats.f.cdf(s_a[ok] / s_b[ok], d_a[ok], d_b[ok])
    res = stats.kstest(u, "uniform")
    return float(res.statistic), float(res.pvalue)


# -- scatter checks ----------------------------------------------------------------------------


def scatter_checks(
    obs: ObservationSet,
    bias: ArrayLike,
    sigma2: ArrayLike,
    *,
    pairs: PairCovariance | None = None,
    bias_var: ArrayLike | None = None,
    bins: int | ArrayLike = 5,
) -> ScatterCheckResult:
    """Event scatter against its model distribution, and residual shape by magnitude.

    Parameters
    ----------
    obs : ObservationSet
    bias, sigma2 : array_like, shape (K,)
        Station parameters (magnitude units, units²).
    pairs : PairCovariance, optional
        Flagged pairs: χ²_j = r'Σ_j⁻¹r with their 2×2 blocks.
    bias_var : array_like, shape (K,), optional
        Added to σ̂² (s² = σ̂² + Var b̂, docs/network-magnitude.md §2).
    bins : int or array_like, default=5
        Number of equal-count M̂ bins, or bin edges (magnitude units).

    Returns
    -------
    ScatterCheckResult

    Notes
    -----
    Under the model with Gaussian errors, χ²_j ~ χ²_{n_j−1} (docs/network-magnitude.md §2), so
    u_j = F_{χ²_{n_j−1}}(χ²_j) is U(0, 1) whatever n_j; the KS test pools all events. The
    standardised residual is r_ij/sqrt(s_i² − V_j) (E r² = s²(1 − w) in the diagonal case,
    [derived]; approximate inside a flagged pair).
    """
    func = "scatter_checks"
    K = obs.n_stations
    b = _station_vector(bias, "bias", K, func)
    s2 = _station_vector(sigma2, "sigma2", K, func)
    bv = np.zeros(K) if bias_var is None else _station_vector(bias_var, "bias_var", K, func)
    use = _usable(obs, b, s2 + bv)
    ev, st = obs.event[use], obs.station[use]
    N = obs.n_events
    y = obs.magnitude[use] - b[st]
    s2_row = s2[st] + bv[st]
    pairs_used = pairs if pairs is not None and pairs.n_pairs else None
    if pairs_used is not None:
        prow = pair_partner_rows(ev, st, pairs_used.partner)
    else:
        prow = np.full(ev.shape[0], -1, dtype=np.int64)
    gls = event_gls(ev, st, y, s2_row, N, pairs_used, partner_row=prow)
    r = gls.residual
    contrib = r * r / s2_row
    has = prow >= 0
    if np.any(has) and pairs_used is not None:
        o = prow[has]
        c = pairs_used.partner_cov[st[has]]
        det = s2_row[has] * s2_row[o] - c * c
        contrib[has] = (s2_row[o] * r[has] ** 2 - c * r[has] * r[o]) / det
    chi2 = np.bincount(ev, weights=contrib, minlength=N)
    n_j = np.bincount(ev, minlength=N)
    events = np.flatnonzero(n_j >= 2)
    if events.shape[0] == 0:
        raise InsufficientDataError(f"{func}: no event has two usable readings")
    dof = n_j[events] - 1
    u = stats.chi2.cdf(chi2[events], dof)
    ks = stats.kstest(u, "uniform")
    ratio = chi2[events] / dof
    mag = gls.magnitude[events]
    if np.ndim(bins) == 0:
        nb = int(np.asarray(bins))
        if nb < 1:
            raise ConfigError(f"The 'bins' parameter of {func} must be >= 1. Got {nb} instead.")
        edges = np.quantile(mag, np.linspace(0.0, 1.0, nb + 1))
    else:
        edges = np.asarray(bins, dtype=np.float64)
    which = np.clip(np.searchsorted(edges, mag, side="right") - 1, 0, edges.shape[0] - 2)
    inside = (mag >= edges[0]) & (mag <= edges[-1])
    nb_total = edges.shape[0] - 1
    ev_bin = np.full(N, -1, dtype=np.int64)
    ev_bin[events[inside]] = which[inside]
    # Standardised residuals of events with n_j >= 3, by bin of their event.
    with np.errstate(invalid="ignore", divide="ignore"):
        std_res = r / np.sqrt(s2_row - gls.variance[ev])
    row_bin = ev_bin[ev]
    row_ok = (row_bin >= 0) & (n_j[ev] >= 3) & np.isfinite(std_res)
    n_rows = np.bincount(row_bin[row_ok], minlength=nb_total)
    mean_r: NDArray[np.float64] = np.asarray(
        np.bincount(row_bin[row_ok], weights=std_res[row_ok], minlength=nb_total),
        dtype=np.float64,
    )
    with np.errstate(invalid="ignore", divide="ignore"):
        mean_r = mean_r / n_rows
        dev = std_res[row_ok] - mean_r[row_bin[row_ok]]
        m2 = np.bincount(row_bin[row_ok], weights=dev**2, minlength=nb_total) / n_rows
        m3 = np.bincount(row_bin[row_ok], weights=dev**3, minlength=nb_total) / n_rows
        g1 = m3 / m2**1.5
        # Adjusted Fisher-Pearson coefficient (scipy.stats.skew(bias=False)).
        nr = n_rows.astype(np.float64)
        skew = np.where(nr >= 3, g1 * np.sqrt(nr * (nr - 1.0)) / (nr - 2.0), np.nan)
    eb = ev_bin[events]
    n_ev_bin = np.bincount(eb[eb >= 0], minlength=nb_total)
    with np.errstate(invalid="ignore", divide="ignore"):
        mean_ratio = np.bincount(eb[eb >= 0], weights=ratio[eb >= 0], minlength=nb_total) / n_ev_bin
    birge = np.sqrt(ratio)
    median_birge = _grouped_median(eb[eb >= 0], birge[eb >= 0], nb_total)
    table = pd.DataFrame(
        {
            "magnitude_low": edges[:-1],
            "magnitude_high": edges[1:],
            "n_events": n_ev_bin.astype(np.int64),
            "n_rows": n_rows.astype(np.int64),
            "mean_chi2_ratio": mean_ratio,
            "median_birge": median_birge,
            "residual_skewness": skew,
        }
    )
    return ScatterCheckResult(
        ks_statistic=float(ks.statistic),
        ks_pvalue=float(ks.pvalue),
        n_events=int(events.shape[0]),
        by_magnitude=table,
    )


def _grouped_median(group: NDArray[np.int64], x: NDArray[np.float64], n: int) -> NDArray[Any]:
    """Median of x per group label 0..n-1 (NaN for an empty group), by one lexsort."""
    out = np.full(n, np.nan)
    if group.shape[0] == 0:
        return out
    order = np.lexsort((x, group))
    xs, gs = x[order], group[order]
    counts = np.bincount(gs, minlength=n)
    start = np.cumsum(counts) - counts
    full = counts > 0
    lo = start[full] + (counts[full] - 1) // 2
    hi = start[full] + counts[full] // 2
    out[full] = 0.5 * (xs[lo] + xs[hi])
    return out
