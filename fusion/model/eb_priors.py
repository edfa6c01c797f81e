"""Empirical-Bayes priors of the station model: error variances and biases (docs/estimator.md §5).

Error variances
---------------
Each station unit i has a residual variance s_i² on d_i effective degrees of freedom,
d_i = Σ_j γ_j (1 − w_ij) (the information spent on the event magnitudes is subtracted, because
E r_ij² = σ_i²(1 − w_ij) [derived, docs/estimator.md §2]). Following Smyth (2004) the true variances
are drawn from a scaled inverse-χ² prior with d0 degrees of freedom and scale s0², and the
posterior (moderated) variance is

    σ̃_i² = (d0 s0² + d_i s_i²) / (d0 + d_i).

The hyperparameters come from the moments of log s² (Smyth 2004, §6.2):

    e_i = log s_i² − ψ(d_i/2) + log(d_i/2),   ē = mean e_i,
    ψ'(d0/2) = mean_i [(e_i − ē)² K/(K − 1) − ψ'(d_i/2)],
    s0² = exp(ē + ψ(d0/2) − log(d0/2)),

with d0 = ∞ (and s0² = exp ē) when the right-hand side is ≤ 0, i.e. when the observed spread
of log s² is no larger than sampling alone explains. ψ is the digamma function, ψ' the
trigamma function, inverted by Smyth's Newton iteration (:func:`trigamma_inverse`). Only
stations with d_i ≥ 5 enter the fit (docs/estimator.md §5.1).

Biases
------
Biases relative to the anchor get the prior b_i ~ N(μ0, τ_b²). Given unshrunk estimates b̂_i with
sampling variances v_i, the moment estimator over stations with at least 30 events (Σγ ≥ 30) is
τ̂_b² = max(0, mean (b̂_i − μ0)² − mean v_i) (docs/estimator.md §5.2). In the fit the prior is the
ridge 1/τ_b² on the normal matrix, so the fitted b̂ are already shrunk by τ_b²/(τ_b² + v_i);
:func:`fit_bias_prior` undoes that shrinkage before taking moments (otherwise the moment
iteration would drift to 0) [derived].

References
----------
Smyth G. K. (2004). Linear models and empirical Bayes methods for assessing differential
expression in microarray experiments. Statistical Applications in Genetics and Molecular
Biology 3(1), Article 3 (moderated variances, §6.2 hyperparameter estimation).
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
from numpy.typing import ArrayLike, NDArray
from scipy import special

__all__ = [
    "MAD_TO_SD",
    "EBPrior",
    "fit_bias_prior",
    "fit_variance_prior",
    "initial_error_variance",
    "moderated_variance",
    "prior_stable",
    "refreshed_prior",
    "trigamma_inverse",
]

#: Consistency factor of the median absolute deviation for the normal distribution,
#: 1/Φ⁻¹(3/4) = 1.4826 (Hampel 1974 [from memory]; common practice).
MAD_TO_SD = float(1.0 / special.ndtri(0.75))

#: Prior degrees of freedom before the first empirical-Bayes fit (docs/estimator.md §5.1).
DEFAULT_D0 = 4.0
#: Prior bias variance before the first empirical-Bayes fit, magnitude units squared: a weak
#: prior (SD 1 magnitude unit) that only keeps the normal matrix positive definite.
DEFAULT_TAU_B2 = 1.0
#: Smallest τ_b² the moment estimator returns (magnitude units squared); τ̂_b² = 0 would make
#: the ridge infinite.
TAU_B2_FLOOR = 1e-6


@dataclass(frozen=True, slots=True)
class EBPrior:
    """Hyperparameters of the station model's priors (docs/estimator.md §5).

    Attributes
    ----------
    d0 : float
        Prior degrees of freedom of the error variances; ``inf`` pins every σ_i² to s0², 0 turns
        the variance prior off.
    s0_2 : float
        Prior error variance s0², magnitude units squared.
    tau_b2 : float
        Prior variance of a bias about the anchor level, magnitude units squared; ``inf`` turns
        the bias ridge off.
    """

    d0: float = DEFAULT_D0
    s0_2: float = 0.04
    tau_b2: float = DEFAULT_TAU_B2

    def __post_init__(self) -> None:
        if not (self.d0 >= 0.0):
            raise ValueError(f"EBPrior: d0 must be >= 0 (inf allowed); got {self.d0}")
        if not (self.s0_2 > 0.0 and np.isfinite(self.s0_2)):
            raise ValueError(f"EBPrior: s0_2 must be finite and > 0; got {self.s0_2}")
        if not (self.tau_b2 > 0.0):
            raise ValueError(f"EBPrior: tau_b2 must be > 0 (inf allowed); got {self.tau_b2}")


def moderated_variance(s2: ArrayLike, d: ArrayLike, d0: float, s0_2: float) -> NDArray[np.float64]:
    """Posterior error variance σ̃² = (d0 s0² + d s²)/(d0 + d) (Smyth 2004; docs/check-values.md §7).

    Parameters
    ----------
    s2 : array_like
        Raw residual variances s_i², magnitude units squared; ignored where ``d`` is 0.
    d : array_like
        Residual degrees of freedom d_i >= 0.
    d0, s0_2 : float
        Prior degrees of freedom (``inf`` allowed) and prior variance.

    Returns
    -------
    ndarray
        σ̃_i²; s0² where d_i = 0 or d0 = ∞.

    Examples
    --------
    docs/check-values.md §7: d0 = 4, s0² = 0.04, d = 6, s² = 0.09 gives 0.07.

    >>> float(moderated_variance(0.09, 6.0, 4.0, 0.04))
    0.07
    """
    s2a = np.asarray(s2, dtype=np.float64)
    da = np.asarray(d, dtype=np.float64)
    if np.isinf(d0):
        return np.full(np.broadcast(s2a, da).shape, float(s0_2))
    num = d0 * s0_2 + np.where(da > 0, da * np.nan_to_num(s2a), 0.0)
    den = d0 + da
    with np.errstate(invalid="ignore", divide="ignore"):
        out = np.where(den > 0, num / np.where(den > 0, den, 1.0), s0_2)
    return np.asarray(out, dtype=np.float64)


def trigamma_inverse(x: ArrayLike, *, tol: float = 1e-8, max_iter: int = 50) -> NDArray[np.float64]:
    """Solve ψ'(y) = x for y > 0 by Newton's method (Smyth 2004, §6.2).

    The iteration starts at y = 1/2 + 1/x, on which Newton's method for 1/ψ'(y) converges
    monotonically; for x > 1e7 the asymptote y ≈ 1/sqrt(x), for x < 1e-6 y ≈ 1/x are used.

    Parameters
    ----------
    x : array_like
        Values > 0.

    Returns
    -------
    ndarray
        y with trigamma(y) = x (NaN where x <= 0).
    """
    xa = np.atleast_1d(np.asarray(x, dtype=np.float64))
    y = np.full(xa.shape, np.nan)
    big = xa > 1e7
    small = (xa > 0) & (xa < 1e-6)
    mid = (xa > 0) & ~big & ~small
    y[big] = 1.0 / np.sqrt(xa[big])
    y[small] = 1.0 / xa[small]
    if np.any(mid):
        xm = xa[mid]
        ym = 0.5 + 1.0 / xm
        for _ in range(max_iter):
            tri = special.polygamma(1, ym)
            step = tri * (1.0 - tri / xm) / special.polygamma(2, ym)
            ym = ym + step
            if np.max(-step / ym) < tol:
                break
        y[mid] = ym
    return y.reshape(np.shape(x))


def fit_variance_prior(
    s2: ArrayLike, d: ArrayLike, *, min_dof: float = 5.0, min_stations: int = 3
) -> tuple[float, float] | None:
    """Hyperparameters (d0, s0²) from the moments of log s² (Smyth 2004, §6.2).

    Parameters
    ----------
    s2 : array_like, shape (K,)
        Raw residual variances s_i² > 0, magnitude units squared.
    d : array_like, shape (K,)
        Residual degrees of freedom d_i.
    min_dof : float, default=5.0
        Only stations with d_i >= this enter the fit (docs/estimator.md §5.1).
    min_stations : int, default=3
        Fewer eligible stations return ``None`` (keep the current prior).

    Returns
    -------
    (d0, s0_2) or None
        ``d0`` may be ``inf``.
    """
    s2a = np.asarray(s2, dtype=np.float64)
    da = np.asarray(d, dtype=np.float64)
    use = (da >= min_dof) & np.isfinite(s2a) & (s2a > 0)
    n = int(use.sum())
    if n < max(min_stations, 2):
        return None
    half = da[use] / 2.0
    e = np.log(s2a[use]) - special.digamma(half) + np.log(half)
    e_mean = float(e.mean())
    target = float(np.sum((e - e_mean) ** 2) / (n - 1) - np.mean(special.polygamma(1, half)))
    if target <= 0.0:
        return float("inf"), float(np.exp(e_mean))
    d0 = 2.0 * float(trigamma_inverse(target))
    s0_2 = float(np.exp(e_mean + special.digamma(d0 / 2.0) - np.log(d0 / 2.0)))
    return d0, s0_2


def fit_bias_prior(
    bias: ArrayLike,
    bias_var: ArrayLike,
    weight_sum: ArrayLike,
    *,
    prior_mean: float = 0.0,
    current_tau_b2: float = np.inf,
    min_events: float = 30.0,
) -> float | None:
    """Moment estimate τ̂_b² = max(0, mean (b̂ − μ0)² − mean v) over well-observed stations.

    Parameters
    ----------
    bias : array_like, shape (K,)
        Fitted (ridge-shrunk) biases b̂_i, magnitude units.
    bias_var : array_like, shape (K,)
        Their data-only sampling variances v_i (no prior), magnitude units squared.
    weight_sum : array_like, shape (K,)
        Σ_j γ_j per station; only stations with at least ``min_events`` enter.
    prior_mean : float, default=0.0
        μ0, the level the ridge pulls toward.
    current_tau_b2 : float, default=inf
        The τ_b² the biases were fitted with; the shrinkage τ²/(τ² + v) is undone first.
    min_events : float, default=30.0
        docs/estimator.md §5.2: n_i >= 30.

    Returns
    -------
    float or None
        τ̂_b² (at least :data:`TAU_B2_FLOOR`), or ``None`` with fewer than 3 eligible stations.
    """
    b = np.asarray(bias, dtype=np.float64) - prior_mean
    v = np.asarray(bias_var, dtype=np.float64)
    n = np.asarray(weight_sum, dtype=np.float64)
    use = (n >= min_events) & np.isfinite(b) & np.isfinite(v)
    if int(use.sum()) < 3:
        return None
    b, v = b[use], v[use]
    if np.isfinite(current_tau_b2):
        b = b * (current_tau_b2 + v) / current_tau_b2
    tau2 = float(np.mean(b * b) - np.mean(v))
    return max(tau2, TAU_B2_FLOOR)


def initial_error_variance(
    event: NDArray[np.int64],
    magnitude: NDArray[np.float64],
    n_events: int,
    *,
    max_events: int = 20_000,
) -> float:
    """Start value s0² = median over events of (1.4826·MAD_j)² (docs/estimator.md §3, start values).

    Uses events with at least 3 readings when there are any, else events with 2; the MAD of
    each event is taken about its median (vectorized: one sort by (event, value) per pass).

    Parameters
    ----------
    event : ndarray of int, shape (n,)
        Event code of each reading (any order).
    magnitude : ndarray of float, shape (n,)
        Station magnitudes, magnitude units.
    n_events : int
        Size of the event table.
    max_events : int, default=20000
        At most this many events (evenly spaced in the event table) are used.

    Returns
    -------
    float
        Magnitude units squared; 0.04 (σ = 0.2, the trade's ML scatter, Hutton & Boore 1987)
        when no event has two readings or every MAD is 0.
    """
    counts = np.bincount(event, minlength=n_events)
    min_n = 3 if np.any(counts >= 3) else 2
    eligible = np.flatnonzero(counts >= min_n)
    if eligible.shape[0] == 0:
        return 0.04
    if eligible.shape[0] > max_events:  # a start value: an evenly spaced subset suffices
        eligible = eligible[np.linspace(0, eligible.shape[0] - 1, max_events).astype(np.int64)]
    chosen = np.zeros(n_events, dtype=bool)
    chosen[eligible] = True
    keep = chosen[event]
    ev, x = event[keep], magnitude[keep]
    med = _event_median(ev, x, n_events)
    dev = np.abs(x - med[ev])
    mad = _event_median(ev, dev, n_events)[eligible]
    value = float(np.median((MAD_TO_SD * mad) ** 2))
    return value if value > 0 else 0.04


def _event_median(
    event: NDArray[np.int64], x: NDArray[np.float64], n_events: int
) -> NDArray[np.float64]:
    """Median of ``x`` per event (NaN for events without rows); one lexsort."""
    order = np.lexsort((x, event))
    xs = x[order]
    counts = np.bincount(event, minlength=n_events)
    start = np.concatenate([[0], np.cumsum(counts)[:-1]])
    out = np.full(n_events, np.nan)
    has = counts > 0
    lo = start[has] + (counts[has] - 1) // 2
    hi = start[has] + counts[has] // 2
    out[has] = 0.5 * (xs[lo] + xs[hi])
    return out


def refreshed_prior(
    s2: NDArray[np.float64],
    dof: NDArray[np.float64],
    bias: NDArray[np.float64],
    bias_var: NDArray[np.float64],
    weight_sum: NDArray[np.float64],
    prior: EBPrior,
    prior_mean: float,
) -> EBPrior:
    """The empirical-Bayes refresh of (d0, s0², τ_b²) shared by both fits (docs/estimator.md §5).

    Parameters
    ----------
    s2, dof : ndarray, shape (K,)
        Raw residual variances and their effective degrees of freedom
        (:func:`fit_variance_prior`).
    bias, bias_var, weight_sum : ndarray, shape (K,)
        Current biases, their sampling variances and Σγ per station (:func:`fit_bias_prior`).
    prior : EBPrior
        The current priors; a part that cannot be fitted keeps its current value.
    prior_mean : float
        μ0 of the bias prior.
    """
    fitted = fit_variance_prior(s2, dof)
    d0, s0_2 = fitted if fitted is not None else (prior.d0, prior.s0_2)
    tau = fit_bias_prior(
        bias, bias_var, weight_sum, prior_mean=prior_mean, current_tau_b2=prior.tau_b2
    )
    return EBPrior(d0=d0, s0_2=s0_2, tau_b2=prior.tau_b2 if tau is None else tau)


def prior_stable(old: EBPrior, new: EBPrior, tol_log_sigma: float) -> bool:
    """The refreshed priors moved by less than the tolerances (relative): s0² by
    2·``tol_log_sigma`` in log, d0 by 5 %, τ_b² by 2 %."""

    def close(x: float, y: float, rtol: float) -> bool:
        if np.isinf(x) or np.isinf(y) or x == 0 or y == 0:
            return x == y
        return bool(abs(np.log(x / y)) < rtol)

    return (
        close(old.s0_2, new.s0_2, 2.0 * tol_log_sigma)
        and close(old.d0, new.d0, 0.05)
        and close(old.tau_b2, new.tau_b2, 0.02)
    )
