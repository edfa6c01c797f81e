"""Per-event censored (Tobit) likelihood of the network magnitude and its Newton maximiser.

A station that was operating but did not detect an event says the station magnitude would have
been below its noise threshold t_ij; a clipped record says it was above the clipped value u_ij.
Averaging only the detections is then biased high for small events (Ringdal 1976). For one event
with detections D, non-detections C and clipped readings U the log-likelihood of the event
magnitude M is (docs/censoring.md §3)

    ℓ(M) = Σ_D [log φ((y_i − M)/σ_i) − log σ_i] + Σ_C log Φ((t_i − M)/s_i)
           + Σ_U log[1 − Φ((u_i − M)/σ_i)],

with y_i = m_ij − b_i, and t_i, u_i likewise bias-corrected. Φ is the standard normal CDF and φ
its density (Tobin 1958; for magnitudes Ringdal 1976). With a soft threshold, a detection
probability Φ((x − t)/g) for a station magnitude x, the non-detection term keeps its form with
s_i = sqrt(σ_i² + g²) [derived: integrate Φ((x − t)/g) against N(M + b, σ²)]; the hard threshold
is g = 0. With z = (t − M)/s and the inverse Mills ratio λ(z) = φ(z)/Φ(z),

    ℓ'  = Σ_D a_i (y_i − M) − Σ_C λ(z_i)/s_i + Σ_U λ(z'_i)/σ_i,          z'_i = (M − u_i)/σ_i
    ℓ'' = −Σ_D a_i − Σ_C λ(z_i)(z_i + λ(z_i))/s_i² − Σ_U λ(z'_i)(z'_i + λ(z'_i))/σ_i²,

a_i = 1/σ_i². Each term is concave in M (the normal CDF is log-concave), so Newton's method from
the GLS value converges in a few steps; steps are clipped to ±1 magnitude unit. The standard
error is the observed-information one, SE = 1/sqrt(−ℓ''(M̂)).

Correlated detections: for a detection block with covariance Σ the Gaussian part of ℓ is
−½(y − M1)'Σ⁻¹(y − M1), whose M-derivatives are 1'Σ⁻¹(y − M1) = Σ_i a_i (y_i − M) and −1'Σ⁻¹1
with a = Σ⁻¹1 [derived]. Passing the GLS row precisions a_i of
:func:`fusion.network.gls_blocks.precision_row_weights` therefore treats flagged pairs exactly (a_i
may
be negative for a row of a pair); non-detections and clipped readings are taken as independent.

Everything is vectorized over all events at once: per-row derivative terms are summed per event
with ``np.bincount`` (no Python loop over events or rows).

References
----------
Bibliographic details marked [from memory] were not re-read.

Tobin J. (1958). Estimation of relationships for limited dependent variables. Econometrica
26(1):24–36 [from memory].
Ringdal F. (1976). Maximum-likelihood estimation of seismic magnitude. BSSA 66(3):789–802.
Johnson N. L., Kotz S., Balakrishnan N. (1994). Continuous Univariate Distributions, vol. 1,
2nd ed., ch. 13 (moments of the truncated normal distribution) [from memory].
"""

from __future__ import annotations

import math
from dataclasses import dataclass
from typing import Final

import numpy as np
from numpy.typing import ArrayLike, NDArray
from scipy import special

#: log sqrt(2 pi), the constant of the standard normal log density.
_HALF_LOG_2PI: Final = 0.5 * math.log(2.0 * math.pi)

__all__ = [
    "CensoredEstimate",
    "CensoredEventData",
    "detection_probability",
    "fit_censored",
    "inverse_mills_ratio",
    "nondetection_scale",
    "row_sensitivities",
    "tobit_derivatives",
    "tobit_loglik",
    "truncated_normal_moments",
]

#: Newton steps are clipped to this many magnitude units (docs/censoring.md §3).
MAX_STEP: Final = 1.0


def inverse_mills_ratio(z: ArrayLike) -> NDArray[np.float64]:
    """λ(z) = φ(z)/Φ(z), the inverse Mills ratio of the standard normal distribution.

    Computed as ``exp(norm.logpdf(z) − log_ndtr(z))`` so that it stays accurate far in the lower
    tail, where φ and Φ both underflow but λ(z) ≈ −z (Johnson, Kotz & Balakrishnan 1994, ch. 13).

    Parameters
    ----------
    z : array_like of float
        Standardised values (dimensionless).

    Returns
    -------
    ndarray of float
        λ(z) > 0; 0 at z = +inf.
    """
    z = np.asarray(z, dtype=np.float64)
    # log φ(z) written out: importing scipy.stats costs ~0.5 s of start-up on the event path.
    log_pdf = -0.5 * z * z - _HALF_LOG_2PI
    return np.asarray(np.exp(log_pdf - special.log_ndtr(z)), dtype=np.float64)


def _mills_curvature(z: NDArray[np.float64], lam: NDArray[np.float64]) -> NDArray[np.float64]:
    """λ(z)(z + λ(z)) = 1 − Var(X | X < z) for X ~ N(0, 1); clipped to its range [0, 1].

    The clip only removes rounding: for z below about −1e7, z + λ(z) cancels to 0 in floating
    point while the exact value tends to 1.
    """
    return np.clip(lam * (z + lam), 0.0, 1.0)


def truncated_normal_moments(
    mean: ArrayLike,
    sd: ArrayLike,
    *,
    lower: ArrayLike | None = None,
    upper: ArrayLike | None = None,
) -> tuple[NDArray[np.float64], NDArray[np.float64]]:
    """Mean and variance of N(mean, sd²) truncated on one side.

    Exactly one of ``lower`` (keep x > lower) and ``upper`` (keep x < upper) is given. With
    α = (upper − mean)/sd and λ = λ(α) (:func:`inverse_mills_ratio`),

        E[x | x < upper] = mean − sd λ,     Var[x | x < upper] = sd² (1 − αλ − λ²),

    and the mirror image for a lower bound (Johnson, Kotz & Balakrishnan 1994, ch. 13). These are
    the censored-cell expectations of the station step of the joint fit (docs/censoring.md §4).

    Parameters
    ----------
    mean, sd : array_like of float
        Location and scale of the untruncated normal (same units as the bound); sd > 0.
    lower, upper : array_like of float, optional
        The truncation point.

    Returns
    -------
    mean, variance : ndarray of float

    Raises
    ------
    ValueError
        If not exactly one of ``lower`` and ``upper`` is given.
    """
    if (lower is None) == (upper is None):
        raise ValueError("give exactly one of lower= and upper= to truncated_normal_moments")
    mu = np.asarray(mean, dtype=np.float64)
    s = np.asarray(sd, dtype=np.float64)
    sign = 1.0 if upper is not None else -1.0
    bound = np.asarray(upper if upper is not None else lower, dtype=np.float64)
    alpha = sign * (bound - mu) / s
    lam = inverse_mills_ratio(alpha)
    m = mu - sign * s * lam
    v = s * s * (1.0 - _mills_curvature(alpha, lam))
    return np.asarray(m, dtype=np.float64), np.asarray(v, dtype=np.float64)


def nondetection_scale(variance: ArrayLike, soft_sd: float = 0.0) -> NDArray[np.float64]:
    """s = sqrt(σ² + g²), the scale of a non-detection term (docs/censoring.md §3).

    Parameters
    ----------
    variance : array_like of float
        σ², the station-magnitude error variance of the row (magnitude units squared).
    soft_sd : float, default=0.0
        g, the width of the soft detection threshold (magnitude units); 0 is a hard threshold.
    """
    return np.sqrt(np.asarray(variance, dtype=np.float64) + float(soft_sd) ** 2)


def detection_probability(
    magnitude: ArrayLike, threshold: ArrayLike, scale: ArrayLike
) -> NDArray[np.float64]:
    """Φ((M + b − t)/s): the probability that a station would have detected the event.

    Parameters
    ----------
    magnitude : array_like of float
        M + b_i, the event magnitude plus the station bias (magnitude units).
    threshold : array_like of float
        t_ij, the noise threshold (magnitude units).
    scale : array_like of float
        s_i of :func:`nondetection_scale`.

    Notes
    -----
    docs/censoring.md §4 keeps in the censored set only non-detections with a probability above
    0.01: the others add log Φ(z) ≈ 0 to ℓ and cost work.
    """
    z = (np.asarray(magnitude, dtype=np.float64) - np.asarray(threshold, dtype=np.float64)) / (
        np.asarray(scale, dtype=np.float64)
    )
    return np.asarray(special.ndtr(z), dtype=np.float64)


@dataclass(frozen=True, slots=True, eq=False)
class CensoredEventData:
    """The rows of the censored likelihood, grouped by kind; event codes index ``n_events``.

    All values are bias-corrected (the station bias subtracted), in magnitude units.

    Attributes
    ----------
    n_events : int
        N; every ``*_event`` code is in ``[0, N)``.
    det_event, det_value, det_precision : ndarray, shape (n_D,)
        Detections: event code, y_i = m_ij − b_i, and precision a_i (1/σ_i² for independent
        errors, the GLS row weight Σ⁻¹1 for a correlated block; see module docstring).
    cen_event, cen_value, cen_scale : ndarray, shape (n_C,)
        Non-detections: event code, t_ij − b_i, and s_i (:func:`nondetection_scale`).
    clip_event, clip_value, clip_scale : ndarray, shape (n_U,)
        Clipped readings (lower bounds): event code, u_ij − b_i, and σ_i.
    """

    n_events: int
    det_event: NDArray[np.int64]
    det_value: NDArray[np.float64]
    det_precision: NDArray[np.float64]
    cen_event: NDArray[np.int64]
    cen_value: NDArray[np.float64]
    cen_scale: NDArray[np.float64]
    clip_event: NDArray[np.int64]
    clip_value: NDArray[np.float64]
    clip_scale: NDArray[np.float64]

    @classmethod
    def from_rows(
        cls,
        event: ArrayLike,
        value: ArrayLike,
        scale: ArrayLike,
        kind: ArrayLike,
        n_events: int,
    ) -> CensoredEventData:
        """Build from long rows with independent errors.

        Parameters
        ----------
        event : array_like of int, shape (n,)
            Event code of each row, in ``[0, n_events)``.
        value : array_like of float, shape (n,)
            Bias-corrected magnitude, threshold or clipped value (magnitude units).
        scale : array_like of float, shape (n,)
            σ_i for detections and clipped rows, s_i for non-detections (magnitude units, > 0).
        kind : array_like of str, shape (n,)
            ``"detected"``, ``"nondetected"`` or ``"clipped"``.
        n_events : int
            N.

        Raises
        ------
        ValueError
            If a kind is not one of the three names, or a scale is not positive and finite.
        """
        ev = np.asarray(event, dtype=np.int64)
        y = np.asarray(value, dtype=np.float64)
        s = np.asarray(scale, dtype=np.float64)
        k = np.asarray(kind).astype(str)
        names = ("detected", "nondetected", "clipped")
        bad = ~np.isin(k, names)
        if np.any(bad):
            raise ValueError(
                f"row {int(np.flatnonzero(bad)[0])}: kind {str(k[bad][0])!r} is not one of {names}"
            )
        if np.any(~np.isfinite(s) | (s <= 0.0)):
            row = int(np.flatnonzero(~np.isfinite(s) | (s <= 0.0))[0])
            raise ValueError(f"row {row}: scale {s[row]!r} must be positive and finite")
        d, c, u = (k == n for n in names)
        return cls(
            n_events=int(n_events),
            det_event=ev[d],
            det_value=y[d],
            det_precision=1.0 / s[d] ** 2,
            cen_event=ev[c],
            cen_value=y[c],
            cen_scale=s[c],
            clip_event=ev[u],
            clip_value=y[u],
            clip_scale=s[u],
        )

    def restrict(self, keep: NDArray[np.bool_]) -> CensoredEventData:
        """Only the rows of events where ``keep`` (shape (N,)) holds; codes are unchanged."""
        d, c, u = keep[self.det_event], keep[self.cen_event], keep[self.clip_event]
        return CensoredEventData(
            n_events=self.n_events,
            det_event=self.det_event[d],
            det_value=self.det_value[d],
            det_precision=self.det_precision[d],
            cen_event=self.cen_event[c],
            cen_value=self.cen_value[c],
            cen_scale=self.cen_scale[c],
            clip_event=self.clip_event[u],
            clip_value=self.clip_value[u],
            clip_scale=self.clip_scale[u],
        )


def tobit_loglik(data: CensoredEventData, magnitude: ArrayLike) -> NDArray[np.float64]:
    """ℓ_j(M_j) of the module docstring for every event, shape (N,).

    Parameters
    ----------
    data : CensoredEventData
    magnitude : array_like of float, shape (N,)
        Trial event magnitudes (magnitude units).

    Returns
    -------
    ndarray of float, shape (N,)
        The log-likelihood (natural log, densities per magnitude unit). A detection row with
        a_i ≤ 0 (only a row of a correlated pair can have one) contributes its M-dependent part
        −½ a_i (y_i − M)² without the constant ½ log(a_i/2π); for such events ℓ is correct up to
        a constant that does not depend on M.
    """
    M = np.asarray(magnitude, dtype=np.float64)
    n = data.n_events
    a, r = data.det_precision, data.det_value - M[data.det_event]
    with np.errstate(divide="ignore", invalid="ignore"):
        const = np.where(a > 0.0, 0.5 * np.log(np.abs(a) / (2.0 * np.pi)), 0.0)
    det = -0.5 * a * r * r + const
    cen = special.log_ndtr((data.cen_value - M[data.cen_event]) / data.cen_scale)
    clip = special.log_ndtr((M[data.clip_event] - data.clip_value) / data.clip_scale)
    return np.asarray(
        np.bincount(data.det_event, weights=det, minlength=n)
        + np.bincount(data.cen_event, weights=cen, minlength=n)
        + np.bincount(data.clip_event, weights=clip, minlength=n),
        dtype=np.float64,
    )


def tobit_derivatives(
    data: CensoredEventData, magnitude: ArrayLike
) -> tuple[NDArray[np.float64], NDArray[np.float64]]:
    """ℓ'_j and ℓ''_j of the module docstring at ``magnitude``, each shape (N,).

    Parameters
    ----------
    data : CensoredEventData
    magnitude : array_like of float, shape (N,)
        Trial event magnitudes (magnitude units).

    Returns
    -------
    gradient, curvature : ndarray of float, shape (N,)
        dℓ/dM (per magnitude unit) and d²ℓ/dM² (≤ 0 where the event has rows).
    """
    M = np.asarray(magnitude, dtype=np.float64)
    n = data.n_events
    a = data.det_precision
    g = np.bincount(
        data.det_event, weights=a * (data.det_value - M[data.det_event]), minlength=n
    ).astype(np.float64)
    h = -np.bincount(data.det_event, weights=a, minlength=n).astype(np.float64)
    if data.cen_event.shape[0]:
        s = data.cen_scale
        z = (data.cen_value - M[data.cen_event]) / s
        lam = inverse_mills_ratio(z)
        g -= np.bincount(data.cen_event, weights=lam / s, minlength=n)
        h -= np.bincount(data.cen_event, weights=_mills_curvature(z, lam) / (s * s), minlength=n)
    if data.clip_event.shape[0]:
        s = data.clip_scale
        z = (M[data.clip_event] - data.clip_value) / s
        lam = inverse_mills_ratio(z)
        g += np.bincount(data.clip_event, weights=lam / s, minlength=n)
        h -= np.bincount(data.clip_event, weights=_mills_curvature(z, lam) / (s * s), minlength=n)
    return np.asarray(g, dtype=np.float64), np.asarray(h, dtype=np.float64)


def row_sensitivities(
    data: CensoredEventData, magnitude: ArrayLike
) -> tuple[NDArray[np.float64], NDArray[np.float64], NDArray[np.float64]]:
    """∂M̂_j/∂v_i of every row at the maximum M̂_j: the weights of the censored estimate.

    At the maximum ℓ'(M̂; v) = 0, so ∂M̂/∂v_i = (∂ℓ'/∂v_i)/(−ℓ''(M̂)) by the implicit-function
    theorem [derived]. For a detection ∂ℓ'/∂y_i = a_i; for a non-detection or a clipped reading
    it is the row's curvature term c_i = λ(z_i)(z_i + λ(z_i))/s_i². Since −ℓ'' = Σ a_i + Σ c_i,
    the sensitivities of an event's rows sum to 1, as GLS weights do.

    Parameters
    ----------
    data : CensoredEventData
    magnitude : array_like of float, shape (N,)
        The fitted M̂_j (magnitude units).

    Returns
    -------
    detections, nondetections, clipped : ndarray of float
        Aligned with ``data.det_*``, ``data.cen_*`` and ``data.clip_*``.
    """
    M = np.asarray(magnitude, dtype=np.float64)
    _, h = tobit_derivatives(data, M)
    with np.errstate(divide="ignore", invalid="ignore"):
        info = -h
        det = data.det_precision / info[data.det_event]
        out = [det]
        for ev, z, s in (
            (data.cen_event, (data.cen_value - M[data.cen_event]) / data.cen_scale, data.cen_scale),
            (
                data.clip_event,
                (M[data.clip_event] - data.clip_value) / data.clip_scale,
                data.clip_scale,
            ),
        ):
            lam = inverse_mills_ratio(z)
            out.append(_mills_curvature(z, lam) / (s * s) / info[ev])
    return out[0], out[1], out[2]


@dataclass(frozen=True, slots=True, eq=False)
class CensoredEstimate:
    """Maximum-likelihood event magnitudes under censoring, one entry per event (shape (N,)).

    Attributes
    ----------
    magnitude : ndarray of float
        M̂_j (magnitude units); NaN where the event was not fitted.
    se : ndarray of float
        1/sqrt(−ℓ''(M̂_j)), the observed-information standard error (magnitude units).
    converged : ndarray of bool
        The last Newton step was below ``tol``.
    n_iter : ndarray of int
        Newton steps taken (0 for events not fitted).
    """

    magnitude: NDArray[np.float64]
    se: NDArray[np.float64]
    converged: NDArray[np.bool_]
    n_iter: NDArray[np.int64]


def fit_censored(
    data: CensoredEventData,
    start: ArrayLike,
    *,
    max_iter: int = 20,
    tol: float = 1e-7,
) -> CensoredEstimate:
    """Maximise every event's censored log-likelihood by Newton's method, all events at once.

    Parameters
    ----------
    data : CensoredEventData
    start : array_like of float, shape (N,)
        Starting magnitudes, normally the GLS estimates of the detections (docs/censoring.md §3).
        Events with a non-finite start are not fitted (NaN out).
    max_iter : int, default=20
        Newton steps at most. Events started near their maximum take 3–6 (docs/censoring.md §3); an
        event whose one detection lies far above its non-detections' thresholds starts far
        off, where ℓ is nearly quadratic only asymptotically and each step undershoots; such
        events take up to about 10 (measured on the censor simulation of docs/simulation.md).
    tol : float, default=1e-7
        An event has converged when its Newton step is below this (magnitude units).

    Returns
    -------
    CensoredEstimate

    Notes
    -----
    Each step is M ← M − ℓ'/ℓ'' clipped to ±1 (:data:`MAX_STEP`). The maximum exists when the
    event has at least one detection with positive total precision, or both a non-detection
    and a clipped reading; otherwise ℓ is monotone, M keeps drifting and the event is reported
    not converged. Only events still moving are evaluated in later iterations. The
    standard error is taken at the final point.
    """
    M = np.array(start, dtype=np.float64, copy=True)
    n = data.n_events
    se = np.full(n, np.nan)
    n_iter = np.zeros(n, dtype=np.int64)
    converged = np.zeros(n, dtype=bool)
    active = np.isfinite(M)
    M[~active] = np.nan
    sub = data.restrict(active)
    for it in range(max_iter + 1):
        g, h = tobit_derivatives(sub, np.where(active, M, 0.0))
        with np.errstate(divide="ignore", invalid="ignore"):
            step = np.clip(-g / h, -MAX_STEP, MAX_STEP)
            se_now = 1.0 / np.sqrt(-h)
        ok = active & (h < 0.0)
        se[ok] = se_now[ok]
        done = ok & (np.abs(step) < tol)
        converged[done] = True
        M[done] += step[done]  # the last, sub-tolerance step
        moving = ok & ~done
        if it == max_iter or not np.any(moving):
            break
        M[moving] += step[moving]
        n_iter[moving] += 1
        if np.count_nonzero(moving) < np.count_nonzero(active):
            sub = sub.restrict(moving)
        active = moving
    return CensoredEstimate(magnitude=M, se=se, converged=converged, n_iter=n_iter)
