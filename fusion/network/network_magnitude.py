"""Network magnitudes for a whole :class:`~fusion.observations.ObservationSet` in one pass.

For each event j the station magnitudes m_ij (one magnitude type) are corrected by the learned
station biases b̂_i and combined by generalised least squares (Aitken 1935;
docs/network-magnitude.md §2):

    s_i² = σ̃_i²/ω_ij + Var(b̂_i),     Σ_j = diag(s²) + c_kl for flagged pairs (2×2 blocks),
    w = Σ_j⁻¹1 / (1'Σ_j⁻¹1),          M̂_j = w'(m − b̂),          SE_j = 1/sqrt(1'Σ_j⁻¹1).

``weight`` is therefore the normalised GLS (inverse-variance in the diagonal case) weight: the
weights of an event's detections sum to 1 and say how much each corrected station magnitude
moves M̂_j (∂M̂_j/∂m_ij). ``residual`` is the corrected station magnitude minus the event's
reported magnitude (QuakeML's station-magnitude residual, after the station correction).

Rules (docs/network-magnitude.md §5, §6, §10):

- **Robust weights.** Events with n_j ≥ max(3, ``robust_min_stations``) detections get
  Student-t weights ω = min(1, (ν + 1)/(ν + u²)) from the leave-one-station-out (LOSO) residual
  u_ij = (m_ij − b̂_i − M̂_j^(−i))/sqrt(σ̃_i² + Var b̂_i + V_j^(−i)) (Lange, Little & Taylor 1989;
  docs/estimator.md §6). The iteration starts from the weighted median (the t likelihood can be
  multimodal for small n_j) and repeats GLS → LOSO → ω until M̂_j moves less than
  ``robust_tol``, for all events at once. The weights are capped at 1 so that they only
  down-weight: an inlier keeps its model variance σ̃_i² and the SE keeps its meaning under the
  Gaussian model. Rows with ω < ``outlier_weight`` are flagged ``outlier``.
- **One station:** M̂ = m − b̂ (or the censored estimate when non-detections are used),
  flag ``single-station``, and SE = max(SE_model, sqrt(σ̃² + Var b̂)): the interval is never
  narrower than the one reading's own. Non-detections only bound M̂ from above; with a single
  reading the observed information they add rests on the threshold model in its tail, and on
  the demo network the censored SE alone covered 53 % of the true magnitudes at 68 %
  (docs/network-magnitude.md; measured on ``sample_events`` with the true station parameters).
  The floor brings that to 70 %; on the simulator's censor mode, whose single-station events
  are less extreme, it is conservative (86–90 % instead of 71–74 %).
- **Two stations:** no robust weights (an outlier cannot be attributed); z = (y_1 − y_2) /
  sqrt(s_1² + s_2² − 2c_12) with y = m − b̂; |z| > ``inconsistent_z`` flags ``inconsistent``
  and the SE is multiplied by max(1, |z|).
- **Negative weights** come only from the capped pair covariances (worked example E3) and flag
  ``negative-weight``.
- **Unknown stations** (not in the model, or outside every epoch) get b̂ = 0 with
  Var b̂ = τ_b² and σ̃² = s0² (docs/estimator.md §5) and flag ``unknown-station``.

Diagnostics per event: χ²_j = r'Σ_j⁻¹r (n_j − 1 degrees of freedom), the Birge ratio
R_B = sqrt(χ²_j/(n_j − 1)) (Birge 1932) with SE·max(1, R_B) beside the SE, n_eff = 1/Σw², the
weight share of prior-dominated (and unknown) stations, the influence M̂_j − M̂_j^(−i) (signed;
positive: the station pulls the network magnitude up) of the station with the largest
|influence| and that station, the largest |z| with
z_ij = (y_ij − M̂^(−i))/sqrt(σ̃_i² + Var b̂_i + V^(−i))
(docs/network-magnitude.md §7), and for n_j ≥ 4 the jackknife SE, SE_jack² = ((n − 1)/n) Σ_i
(M̂^(−i) − M̄^(−·))²
(Efron & Tibshirani 1993, ch. 11). The plain mean and the median of the raw (uncorrected)
detections are reported beside M̂ with the difference M̂ − mean (docs/network-magnitude.md §8).

With ``use_nondetections`` the events holding informative non-detections (noise threshold known
and detection probability Φ((M̂ + b̂ − t)/s) above ``min_detection_probability``) or clipped
readings are re-estimated by the censored likelihood of :mod:`fusion.network.censoring`, started
from
the GLS value (docs/censoring.md §3). Their ``weight`` is then ∂M̂/∂v for the row's value v
(magnitude, threshold or clipped bound), which again sums to 1 over the event's rows.

Edge cases (docs/conventions.md item 6): an event with no usable detection (no row, only
non-detections, or
only non-finite magnitudes) gets NaN and flag ``no-usable-detection``. Identical values give M̂ equal
to them, χ² = 0, R_B = 0 and the model SE. A detected row with a NaN or infinite magnitude is
handled by ``nan_policy``: ``"omit"`` drops it (row and event flag ``invalid-magnitude``),
``"propagate"`` makes its event's magnitude NaN (same flag), ``"raise"`` raises
:class:`~stations.errors.DomainError` naming the row. Clipped detections are lower bounds: they
never enter the GLS and count only in the censored likelihood.

References
----------
Bibliographic details marked [from memory] were not re-read.

Aitken A. C. (1935). On least squares and linear combination of observations. Proc. R. Soc.
Edinb. 55:42–48.
Birge R. T. (1932). The calculation of errors by the method of least squares. Phys. Rev.
40:207–227 [from memory].
Efron B., Tibshirani R. J. (1993). An Introduction to the Bootstrap, ch. 11 (the jackknife)
[from memory].
Lange K. L., Little R. J. A., Taylor J. M. G. (1989). Robust statistical modeling using the t
distribution. JASA 84(408):881–896 [from memory].
Ringdal F. (1976). Maximum-likelihood estimation of seismic magnitude. BSSA 66(3):789–802.
"""

from __future__ import annotations

import math
import warnings
from dataclasses import asdict, dataclass
from enum import StrEnum
from typing import Any, Final, Literal

import numpy as np
import pandas as pd
from numpy.typing import NDArray
from scipy import special

from fusion.model.fit_steps import student_t_weight
from fusion.model.parameters import StationParameters
from fusion.network.censoring import CensoredEventData, fit_censored, row_sensitivities
from fusion.network.event_gls import EventGLS, event_gls
from fusion.network.gls_blocks import PairCovariance, pair_partner_rows, precision_row_weights
from fusion.observations import ObservationSet
from stations.errors import (
    ConfigError,
    ConvergenceWarning,
    DegenerateDataWarning,
    DomainError,
    EventNotFoundError,
    ModelNotFoundError,
)

__all__ = [
    "EstimateMethod",
    "EventFlag",
    "FusedMagnitudes",
    "NetworkEstimate",
    "RowFlag",
    "StationContribution",
    "fuse_events",
    "interval_name",
]

NanPolicy = Literal["omit", "propagate", "raise"]


class EstimateMethod(StrEnum):
    """How an event's network magnitude was computed."""

    none = "none"  #: no usable detection
    single_station = "single-station"  #: m − b̂ of the only station
    gls = "gls"  #: GLS without robust weights (2 stations, or fewer than robust_min_stations)
    robust_gls = "robust-gls"  #: GLS with Student-t weights from LOSO residuals
    #: maximum likelihood with non-detections / clipped readings (named so that it cannot be
    #: read as "ML", the local magnitude; stores with the old "censored_ml" are read through
    #: fusion.flags.upgrade_methods)
    censored_likelihood = "censored-likelihood"


class EventFlag(StrEnum):
    """Short names joined by ';' in the ``flags`` column of the event table."""

    no_detection = "no-usable-detection"
    single_station = "single-station"
    inconsistent = "inconsistent"
    negative_weight = "negative-weight"
    unknown_station = "unknown-station"
    outlier = "outlier"
    not_converged = "not-converged"
    censoring_used = "censoring-used"
    censoring_uncorrected = "censoring-uncorrected"
    invalid_magnitude = "invalid-magnitude"
    #: Detections only, and a detection model expects them biased high (fusion.model.thresholds).
    likely_biased_high = "likely-biased-high"


class RowFlag(StrEnum):
    """Short names joined by ';' in the ``flags`` column of the contribution table."""

    outlier = "outlier"
    unknown_station = "unknown-station"
    prior_dominated = "prior-dominated"
    negative_weight = "negative-weight"
    clipped = "clipped"
    non_detection = "non-detection"
    censoring_used = "censoring-used"
    invalid_magnitude = "invalid-magnitude"


_EVENT_FLAGS: Final = tuple(EventFlag)
_ROW_FLAGS: Final = tuple(RowFlag)


def _bit(flag: EventFlag | RowFlag) -> int:
    names = _EVENT_FLAGS if isinstance(flag, EventFlag) else _ROW_FLAGS
    return 1 << names.index(flag)


def interval_name(level: float) -> str:
    """The words for the network-magnitude interval at ``level`` (a fraction): "68 % interval".

    One wording for every output that shows the interval of a network magnitude (event text,
    JSON, event page, report); the standard error itself is called "SE", never the interval.
    """
    return f"{100.0 * float(level):.4g} % interval"


# ---------------------------------------------------------------------------------------------
# Result objects
# ---------------------------------------------------------------------------------------------


@dataclass(frozen=True, slots=True)
class StationContribution:
    """One row's part in an event's network magnitude (QuakeML StationMagnitudeContribution).

    Attributes
    ----------
    station_id : str
        ``NET.STA.LOC`` as read.
    unit_id : str or None
        Model unit (station epoch) the row was mapped to; None for an unknown station.
    magnitude : float
        Station magnitude as read (magnitude units); NaN for a non-detection.
    correction : float
        Station correction −b̂_i (magnitude units); 0 for an unknown station.
    corrected_magnitude : float
        magnitude + correction.
    weight : float
        Normalised weight, ∂(network magnitude)/∂(row value); 0 for rows that were not used.
    robust_weight : float
        Student-t weight ω in [0, 1]; 1 without robust weighting; NaN for rows not in the GLS.
    residual : float
        corrected_magnitude − network magnitude (magnitude units).
    influence : float
        M̂ − M̂^(−i), the change of the GLS estimate when this station (or its flagged pair) is
        left out; NaN when nothing would be left.
    z : float
        LOSO z score of the row (≈ N(0, 1) under the model).
    flags : tuple of str
        :class:`RowFlag` values.
    detected : bool
        False for a non-detection.
    threshold : float
        Noise-threshold magnitude of a non-detection; NaN otherwise or if unknown.
    """

    station_id: str
    unit_id: str | None
    magnitude: float
    correction: float
    corrected_magnitude: float
    weight: float
    robust_weight: float
    residual: float
    influence: float
    z: float
    flags: tuple[str, ...]
    detected: bool = True
    threshold: float = math.nan


@dataclass(frozen=True, slots=True)
class NetworkEstimate:
    """The network magnitude of one event with its uncertainty and station contributions.

    Attributes
    ----------
    magnitude : float
        M̂_j (magnitude units); NaN when the event has no usable detection.
    uncertainty : float
        Standard error (1σ) of ``magnitude``, magnitude units; the station-calibration (anchor)
        uncertainty is not included (docs/model.md §3; docs/network-magnitude.md §2).
    confidence_level : float
        Level of the interval reported in the event table, as a fraction (0.68 = 68 %).
    n_stations : int
        Detections used (n_j).
    method : str
        An :class:`EstimateMethod` value.
    converged : bool
        The iterative parts (robust weights, censored likelihood) met their tolerance.
    n_iter : int
        Robust-weight iterations plus Newton steps.
    contributions : tuple of StationContribution
        Every row of the event, detections and non-detections.
    flags : tuple of str
        :class:`EventFlag` values.
    plain_mean, median : float
        Mean and median of the raw detected station magnitudes, no correction.
    event_id, magnitude_type : str
        Identify the estimate.
    """

    magnitude: float
    uncertainty: float
    confidence_level: float
    n_stations: int
    method: str
    converged: bool
    n_iter: int
    contributions: tuple[StationContribution, ...]
    flags: tuple[str, ...]
    plain_mean: float
    median: float
    event_id: str = ""
    magnitude_type: str = ""

    def confidence_interval(self, level: float = 0.95) -> tuple[float, float]:
        """Normal interval M̂ ± Φ⁻¹((1 + level)/2)·uncertainty.

        Parameters
        ----------
        level : float, default=0.95
            Coverage as a fraction in (0, 1).

        Raises
        ------
        ConfigError
            If ``level`` is not in (0, 1).
        """
        _check_open_unit("level", level, "NetworkEstimate.confidence_interval")
        half = float(special.ndtri(0.5 + 0.5 * level)) * self.uncertainty
        return (self.magnitude - half, self.magnitude + half)

    def to_dict(self) -> dict[str, Any]:
        """Plain, JSON-ready dictionary (contributions as a list of dicts, flags as lists)."""
        out = asdict(self)
        out["flags"] = list(self.flags)
        out["contributions"] = [{**asdict(c), "flags": list(c.flags)} for c in self.contributions]
        return out


@dataclass(frozen=True, slots=True, eq=False)
class FusedMagnitudes:
    """Network magnitudes of many events: an event table and a row table.

    Attributes
    ----------
    events : pandas.DataFrame
        One row per event of the observation set, in its order. Columns: ``event_id``,
        ``origin_time`` (UTC), ``magnitude_type``, ``magnitude``, ``se`` (1σ), ``ci_low``,
        ``ci_high`` (normal interval at ``confidence_level``, a fraction), ``n_stations``,
        ``n_eff``, ``chi2``, ``birge_ratio``, ``se_scaled`` (se·max(1, R_B)), ``plain_mean``,
        ``median``, ``minus_plain_mean`` (magnitude − plain_mean), ``max_influence`` (the signed
        influence of the row with the largest |influence|), ``max_influence_station``,
        ``max_abs_z``, ``jackknife_se`` (n ≥ 4),
        ``prior_weight_share``, ``n_nondetections_used``, ``censoring_shift`` (censored − GLS
        magnitude), ``flags`` (';'-joined :class:`EventFlag` values), ``method``,
        ``converged``, ``n_iter`` and ``gr_posterior_mean``. Magnitudes in magnitude units.
        χ², R_B, n_eff, influence, z and the jackknife describe the GLS of the detections.
    contributions : pandas.DataFrame
        One row per observation row, in the observation set's order. Columns ``event_id``,
        ``station_id``, ``unit_id`` and ``flags`` are categoricals; then ``detected``,
        ``magnitude``, ``threshold``, ``correction``, ``corrected_magnitude``, ``weight``,
        ``robust_weight``, ``residual``, ``influence``, ``z`` (see
        :class:`StationContribution`).
    """

    events: pd.DataFrame
    contributions: pd.DataFrame

    def event(self, event_id: str) -> NetworkEstimate:
        """The :class:`NetworkEstimate` of one event.

        Raises
        ------
        EventNotFoundError
            If the event is not in this result.
        """
        ids = self.events["event_id"].to_numpy()
        hit = np.flatnonzero(ids == event_id)
        if hit.shape[0] == 0:
            raise EventNotFoundError(
                f"event {event_id!r} is not in these fused magnitudes; "
                "check the id or fuse a window that contains it"
            )
        j = int(hit[0])
        ev = self.events.iloc[j]
        codes = np.asarray(self.contributions["event_id"].cat.codes)
        lo, hi = np.searchsorted(codes, j, "left"), np.searchsorted(codes, j, "right")
        records: list[dict[Any, Any]] = self.contributions.iloc[lo:hi].to_dict("records")
        contributions = tuple(
            StationContribution(
                station_id=str(r["station_id"]),
                unit_id=None if pd.isna(r["unit_id"]) else str(r["unit_id"]),
                magnitude=float(r["magnitude"]),
                correction=float(r["correction"]),
                corrected_magnitude=float(r["corrected_magnitude"]),
                weight=float(r["weight"]),
                robust_weight=float(r["robust_weight"]),
                residual=float(r["residual"]),
                influence=float(r["influence"]),
                z=float(r["z"]),
                flags=_split(str(r["flags"])),
                detected=bool(r["detected"]),
                threshold=float(r["threshold"]),
            )
            for r in records
        )
        return NetworkEstimate(
            magnitude=float(ev["magnitude"]),
            uncertainty=float(ev["se"]),
            confidence_level=float(ev["confidence_level"]),
            n_stations=int(ev["n_stations"]),
            method=str(ev["method"]),
            converged=bool(ev["converged"]),
            n_iter=int(ev["n_iter"]),
            contributions=contributions,
            flags=_split(str(ev["flags"])),
            plain_mean=float(ev["plain_mean"]),
            median=float(ev["median"]),
            event_id=str(ev["event_id"]),
            magnitude_type=str(ev["magnitude_type"]),
        )


def _split(text: str) -> tuple[str, ...]:
    return tuple(t for t in text.split(";") if t)


# ---------------------------------------------------------------------------------------------
# Parameter checks (docs/conventions.md item 3)
# ---------------------------------------------------------------------------------------------


def _fail(name: str, where: str, what: str, value: object) -> ConfigError:
    return ConfigError(f"The {name!r} parameter of {where} must be {what}. Got {value!r} instead.")


def _check_open_unit(name: str, value: float, where: str) -> None:
    if not (isinstance(value, (int, float)) and 0.0 < float(value) < 1.0):
        raise _fail(name, where, "a float in the range (0, 1)", value)


def _validate(
    *,
    confidence_level: float,
    robust_min_stations: int,
    nu: float,
    inconsistent_z: float,
    outlier_weight: float,
    soft_threshold_sd: float,
    min_detection_probability: float,
    gr_b_value: float | None,
    nan_policy: str,
    robust_max_iter: int,
    robust_tol: float,
    censoring_max_iter: int,
) -> None:
    where = "fuse_events"
    _check_open_unit("confidence_level", confidence_level, where)
    _check_open_unit("outlier_weight", outlier_weight, where)
    for name, value, low in (
        ("robust_min_stations", robust_min_stations, 2),
        ("robust_max_iter", robust_max_iter, 1),
        ("censoring_max_iter", censoring_max_iter, 1),
    ):
        if isinstance(value, bool) or not isinstance(value, (int, np.integer)) or value < low:
            raise _fail(name, where, f"an int in the range [{low}, inf)", value)
    for name, fvalue in (
        ("nu", nu),
        ("inconsistent_z", inconsistent_z),
        ("robust_tol", robust_tol),
    ):
        if not (isinstance(fvalue, (int, float)) and 0.0 < float(fvalue) < math.inf):
            raise _fail(name, where, "a float in the range (0, inf)", fvalue)
    if not (isinstance(soft_threshold_sd, (int, float)) and 0.0 <= soft_threshold_sd < math.inf):
        raise _fail("soft_threshold_sd", where, "a float in the range [0, inf)", soft_threshold_sd)
    if not (
        isinstance(min_detection_probability, (int, float))
        and 0.0 <= min_detection_probability < 1.0
    ):
        raise _fail(
            "min_detection_probability",
            where,
            "a float in the range [0, 1)",
            min_detection_probability,
        )
    if gr_b_value is not None and not (
        isinstance(gr_b_value, (int, float)) and 0.0 < gr_b_value < math.inf
    ):
        raise _fail("gr_b_value", where, "None or a float in the range (0, inf)", gr_b_value)
    if nan_policy not in ("omit", "propagate", "raise"):
        raise _fail("nan_policy", where, "a str among {'omit', 'propagate', 'raise'}", nan_policy)


# ---------------------------------------------------------------------------------------------
# Grouped helpers (rows sorted by event; no Python loop over events or rows)
# ---------------------------------------------------------------------------------------------


def _group_starts(
    event: NDArray[np.int64], n_events: int
) -> tuple[NDArray[np.int64], NDArray[np.int64]]:
    """Row count and first row of each event, for rows sorted by event."""
    counts = np.bincount(event, minlength=n_events).astype(np.int64)
    starts = np.cumsum(counts) - counts
    return counts, starts


def _group_reduce(
    ufunc: np.ufunc,
    values: NDArray[np.float64],
    counts: NDArray[np.int64],
    starts: NDArray[np.int64],
    fill: float,
) -> NDArray[np.float64]:
    """``ufunc.reduceat`` over each non-empty event; ``fill`` for empty ones."""
    out = np.full(counts.shape[0], fill, dtype=np.float64)
    nonempty = counts > 0
    if values.shape[0]:
        out[nonempty] = ufunc.reduceat(values, starts[nonempty])
    return out


def _order_within_events(
    event: NDArray[np.int64],
    values: NDArray[np.float64],
    counts: NDArray[np.int64],
    starts: NDArray[np.int64],
) -> NDArray[np.int64]:
    """Row permutation sorting finite ``values`` inside each event (events stay in order).

    One ``argsort`` of the key j + ½(v − min_j)/(max_j − min_j) instead of a two-key
    ``lexsort`` (5× faster on 10⁷ rows). The key resolves values that differ by more than
    about 4.4e-16·N of the event's range (2e-10 of it for N = 5·10⁵ events); closer values may
    swap, which moves a median by less than that.
    """
    lo = _group_reduce(np.minimum, values, counts, starts, 0.0)
    hi = _group_reduce(np.maximum, values, counts, starts, 0.0)
    span = np.where(hi > lo, hi - lo, 1.0)
    key = event + 0.5 * (values - lo[event]) / span[event]
    return np.argsort(key).astype(np.int64)


def _group_median(
    event: NDArray[np.int64],
    values: NDArray[np.float64],
    counts: NDArray[np.int64],
    starts: NDArray[np.int64],
) -> NDArray[np.float64]:
    """Median of ``values`` per event (mean of the two middle values for even n); NaN if empty."""
    out = np.full(counts.shape[0], np.nan)
    if values.shape[0] == 0:
        return out
    v = values[_order_within_events(event, values, counts, starts)]
    ok = counts > 0
    s, n = starts[ok], counts[ok]
    out[ok] = 0.5 * (v[s + (n - 1) // 2] + v[s + n // 2])
    return out


def _weighted_median(
    event: NDArray[np.int64],
    values: NDArray[np.float64],
    weights: NDArray[np.float64],
    counts: NDArray[np.int64],
    starts: NDArray[np.int64],
) -> NDArray[np.float64]:
    """Lower weighted median per event: the first sorted value whose cumulative weight reaches
    half the event's total weight (weights > 0)."""
    n_events = counts.shape[0]
    out = np.full(n_events, np.nan)
    if values.shape[0] == 0:
        return out
    order = _order_within_events(event, values, counts, starts)
    v, w = values[order], weights[order]
    cw = np.cumsum(w)
    before = np.concatenate(([0.0], cw))[starts]
    total = np.bincount(event, weights=w, minlength=n_events)
    within = cw - before[event]
    below = np.bincount(event, weights=within < 0.5 * total[event], minlength=n_events)
    k = np.minimum(below.astype(np.int64), np.maximum(counts - 1, 0))
    ok = counts > 0
    out[ok] = v[(starts + k)[ok]]
    return out


def _group_argmax(
    event: NDArray[np.int64],
    values: NDArray[np.float64],
    counts: NDArray[np.int64],
    starts: NDArray[np.int64],
) -> tuple[NDArray[np.float64], NDArray[np.int64]]:
    """Largest finite value per event and the (first) row holding it; NaN and −1 if none."""
    v = np.where(np.isfinite(values), values, -np.inf)
    best = _group_reduce(np.maximum, v, counts, starts, -np.inf)
    row = np.full(counts.shape[0], -1, dtype=np.int64)
    hit = np.flatnonzero((v == best[event]) & np.isfinite(v))
    if hit.shape[0]:
        ev_hit = event[hit]
        first = np.concatenate(([True], ev_hit[1:] != ev_hit[:-1]))
        row[ev_hit[first]] = hit[first]
    best[~np.isfinite(best)] = np.nan
    return best, row


def _student_t_weight(u: NDArray[np.float64], nu: float) -> NDArray[np.float64]:
    """min(1, (ν + 1)/(ν + u²)); 1 where u is NaN (nothing to compare with)."""
    w = student_t_weight(u * u, nu, cap_at_one=True)
    return np.where(np.isnan(u), 1.0, w)


def _partner_rows(
    event: NDArray[np.int64], code: NDArray[np.int64], pairs: PairCovariance | None
) -> NDArray[np.int64] | None:
    """Row of each row's flagged-pair partner in the same event (−1 if none); None if no row
    has one. Only rows of paired stations are searched."""
    if pairs is None or pairs.n_pairs == 0:
        return None
    idx = np.flatnonzero(pairs.partner[code] >= 0)
    if idx.shape[0] == 0:
        return None
    sub = pair_partner_rows(event[idx], code[idx], pairs.partner)
    if not np.any(sub >= 0):
        return None
    out = np.full(event.shape[0], -1, dtype=np.int64)
    ok = sub >= 0
    out[idx[ok]] = idx[sub[ok]]
    return out


def _compress_partner(
    partner: NDArray[np.int64] | None, keep: NDArray[np.bool_]
) -> NDArray[np.int64] | None:
    """Re-index partner rows after keeping the rows where ``keep`` (pairs are kept whole)."""
    if partner is None:
        return None
    kept = np.flatnonzero(keep)
    prow = np.flatnonzero(partner >= 0)
    prow = prow[keep[prow]]
    out = np.full(kept.shape[0], -1, dtype=np.int64)
    if prow.shape[0]:
        out[np.searchsorted(kept, prow)] = np.searchsorted(kept, partner[prow])
    return out


# ---------------------------------------------------------------------------------------------
# Steps of fuse_events
# ---------------------------------------------------------------------------------------------


def _row_units(obs: ObservationSet, params: StationParameters) -> NDArray[np.int64]:
    """Model unit of every row (−1 unknown), via :meth:`StationParameters.assign_units`.

    Stations whose only unit is open at both ends map without looking at time; only the rows
    of multi-epoch or time-bounded stations go through ``assign_units`` (same result, far
    fewer string comparisons).
    """
    n_st = obs.n_stations
    direct = np.full(n_st, -1, dtype=np.int64)
    timed = np.zeros(n_st, dtype=bool)
    if params.n_units:
        unit_sid = params.station_ids.astype(str)
        uniq, first, counts = np.unique(unit_sid, return_index=True, return_counts=True)
        sid = obs.station_ids.astype(str)
        pos = np.clip(np.searchsorted(uniq, sid), 0, uniq.shape[0] - 1)
        found = uniq[pos] == sid
        open_ = np.isnat(params.epoch_start) & np.isnat(params.epoch_end)
        simple = found & (counts[pos] == 1) & open_[first[pos]]
        direct[simple] = first[pos[simple]]
        timed = found & ~simple
    unit = direct[obs.station]
    rows = np.flatnonzero(timed[obs.station])
    if rows.shape[0]:
        unit[rows] = params.assign_units(
            obs.station_ids[obs.station[rows]], obs.event_time[obs.event[rows]]
        )
    return unit


@dataclass(frozen=True, slots=True, eq=False)
class _RobustResult:
    omega: NDArray[np.float64]  # per GLS row
    n_iter: NDArray[np.int64]  # per event
    converged: NDArray[np.bool_]  # per event


def _loo_t_weights(
    ev: NDArray[np.int64],
    code: NDArray[np.int64],
    y: NDArray[np.float64],
    sigma2: NDArray[np.float64],
    bias_var: NDArray[np.float64],
    base: NDArray[np.float64],
    omega: NDArray[np.float64],
    partner: NDArray[np.int64] | None,
    pairs: PairCovariance | None,
    n_events: int,
    nu: float,
) -> tuple[NDArray[np.float64], NDArray[np.float64]]:
    """One robust step: GLS with s² = σ̃²/ω + Var b̂, then new ω from the LOSO residuals.

    The GLS and leave-one-(block-)out formulas are those of
    :func:`fusion.network.event_gls.event_gls`
    (docs/network-magnitude.md §2, §7), written with in-place buffers because this runs once per
    iteration on every robust row. Returns the event magnitudes (shape (n_events,)) and the new
    weights (``omega`` is overwritten).
    """
    buf = np.divide(sigma2, omega)
    buf += bias_var
    if partner is not None and pairs is not None:
        a = precision_row_weights(ev, code, buf, pairs, partner_row=partner)
    else:
        a = np.reciprocal(buf, out=buf)
    P: NDArray[np.float64] = np.bincount(ev, weights=a, minlength=n_events).astype(
        np.float64, copy=False
    )
    ay = np.multiply(a, y, out=omega)  # omega's buffer is free until the end
    num: NDArray[np.float64] = np.bincount(ev, weights=ay, minlength=n_events).astype(
        np.float64, copy=False
    )
    with np.errstate(invalid="ignore", divide="ignore"):
        M = num / P
    p_loo = np.take(P, ev)
    m_loo = np.take(num, ev)
    if partner is not None:
        rows = np.flatnonzero(partner >= 0)
        other = partner[rows]
        p_loo[rows] -= a[other]
        m_loo[rows] -= ay[other]
    p_loo -= a
    m_loo -= ay
    # u = (y − M^(−i)) / sqrt(σ̃² + Var b̂ + V^(−i)); nothing left (P^(−i) ≤ 0) gives u = 0.
    empty = p_loo <= 0.0
    p_loo[empty] = 1.0
    m_loo /= p_loo
    np.subtract(y, m_loo, out=m_loo)
    m_loo[empty] = 0.0
    np.reciprocal(p_loo, out=p_loo)
    p_loo += base
    np.sqrt(p_loo, out=p_loo)
    m_loo /= p_loo
    np.multiply(m_loo, m_loo, out=m_loo)
    student_t_weight(m_loo, nu, cap_at_one=True, out=omega, overwrite_u2=True)
    return np.asarray(M, dtype=np.float64), omega


def _robust_weights(
    ev: NDArray[np.int64],
    code: NDArray[np.int64],
    y: NDArray[np.float64],
    sigma2: NDArray[np.float64],
    bias_var: NDArray[np.float64],
    partner: NDArray[np.int64] | None,
    pairs: PairCovariance | None,
    robust_event: NDArray[np.bool_],
    *,
    nu: float,
    max_iter: int,
    tol: float,
) -> _RobustResult:
    """IRLS for Student-t weights from LOSO residuals, all robust events at once.

    Starts from the weighted median (weights 1/(σ̃² + Var b̂)) with ω from the residuals
    against it; each iteration is one GLS with s² = σ̃²/ω + Var b̂, the LOSO residuals, and new
    ω (:func:`_loo_t_weights`). An event has converged when its M̂ moves less than ``tol``.
    Converged events leave the working arrays (compacted once a sixth of the rows has
    converged), so later iterations touch only the events still moving.
    """
    n_events = robust_event.shape[0]
    omega = np.ones(y.shape[0])
    n_iter = np.zeros(n_events, dtype=np.int64)
    converged = np.ones(n_events, dtype=bool)
    sel = np.flatnonzero(robust_event[ev])
    if sel.shape[0] == 0:
        return _RobustResult(omega, n_iter, converged)
    ev_s = ev[sel]
    change = np.concatenate(([True], ev_s[1:] != ev_s[:-1]))
    ev_ids = ev_s[change]
    n_r = ev_ids.shape[0]
    # Working arrays (compacted as events converge); ``w_pos`` maps them back to ``sel``.
    w_ev = np.cumsum(change) - 1
    w_y, w_sig2, w_bvar, w_code = y[sel], sigma2[sel], bias_var[sel], code[sel]
    w_base = w_sig2 + w_bvar
    w_part = None
    if partner is not None:
        in_sel = np.zeros(y.shape[0], dtype=bool)
        in_sel[sel] = True
        w_part = _compress_partner(partner, in_sel)
        if w_part is not None and not np.any(w_part >= 0):
            w_part = None
    w_pos = np.arange(sel.shape[0])
    counts, starts = _group_starts(w_ev, n_r)
    M = _weighted_median(w_ev, w_y, 1.0 / w_base, counts, starts)
    w_om = _student_t_weight((w_y - M[w_ev]) / np.sqrt(w_base), nu)
    om_sel = np.ones(sel.shape[0])
    done = np.zeros(n_r, dtype=bool)
    iters = np.zeros(n_r, dtype=np.int64)
    for it in range(1, max_iter + 1):
        M_new, w_om = _loo_t_weights(
            w_ev, w_code, w_y, w_sig2, w_bvar, w_base, w_om, w_part, pairs, n_r, nu
        )
        act = ~done
        act[act] = np.isfinite(M_new[act])
        delta = np.abs(M_new[act] - M[act])
        M[act] = M_new[act]
        iters[act] = it
        newly = np.zeros(n_r, dtype=bool)
        newly[act] = delta < tol
        done |= newly
        done[~np.isfinite(M)] = True
        if done.all():
            break
        keep = ~done[w_ev]
        if np.count_nonzero(keep) < 0.85 * keep.shape[0]:
            om_sel[w_pos[~keep]] = w_om[~keep]
            w_part = _compress_partner(w_part, keep)
            w_ev, w_code, w_y = w_ev[keep], w_code[keep], w_y[keep]
            w_sig2, w_bvar, w_base = w_sig2[keep], w_bvar[keep], w_base[keep]
            w_om, w_pos = w_om[keep], w_pos[keep]
    om_sel[w_pos] = w_om
    omega[sel] = om_sel
    n_iter[ev_ids] = iters
    converged[ev_ids] = done & np.isfinite(M)
    return _RobustResult(omega, n_iter, converged)


def _sigma_inverse_residual(
    r: NDArray[np.float64],
    s2: NDArray[np.float64],
    code: NDArray[np.int64],
    partner: NDArray[np.int64] | None,
    pairs: PairCovariance | None,
) -> NDArray[np.float64]:
    """(Σ_j⁻¹ r)_i row by row for block-diagonal Σ_j (1×1 and 2×2 blocks)."""
    q = r / s2
    if partner is None or pairs is None:
        return q
    rows = np.flatnonzero(partner >= 0)
    other = partner[rows]
    c = pairs.partner_cov[code[rows]]
    det = s2[rows] * s2[other] - c * c
    q[rows] = (s2[other] * r[rows] - c * r[other]) / det
    return q


def _flag_text(bits: NDArray[np.int64], names: tuple[str, ...]) -> tuple[list[str], NDArray[Any]]:
    """Distinct flag masks as ';'-joined strings, and each entry's index into them.

    Masks are small non-negative ints, so the distinct ones come from a bincount (no sort).
    """
    present = np.flatnonzero(np.bincount(bits, minlength=1))
    lookup = np.zeros(int(present[-1]) + 1, dtype=np.int64)
    lookup[present] = np.arange(present.shape[0])
    text = [";".join(n for k, n in enumerate(names) if int(u) >> k & 1) for u in present]
    return text, lookup[bits]


# ---------------------------------------------------------------------------------------------
# The public entry point
# ---------------------------------------------------------------------------------------------


def fuse_events(
    obs: ObservationSet,
    params: StationParameters,
    *,
    confidence_level: float = 0.68,
    robust_min_stations: int = 3,
    nu: float = 4.0,
    inconsistent_z: float = 3.0,
    outlier_weight: float = 0.3,
    use_nondetections: bool = False,
    soft_threshold_sd: float = 0.0,
    min_detection_probability: float = 0.01,
    gr_b_value: float | None = None,
    nan_policy: NanPolicy = "omit",
    robust_max_iter: int = 100,
    robust_tol: float = 1e-6,
    censoring_max_iter: int = 20,
) -> FusedMagnitudes:
    """Network magnitude, uncertainty and diagnostics of every event of ``obs``.

    Parameters
    ----------
    obs : ObservationSet
        Station magnitudes of one magnitude type; ``station_ids`` are raw ``NET.STA.LOC`` ids.
    params : StationParameters
        Fitted station units of the same magnitude type.
    confidence_level : float, default=0.68
        Level of the normal interval ``ci_low``–``ci_high``, a fraction in (0, 1).
    robust_min_stations : int, default=3
        Student-t weights only for events with at least max(3, this) detections.
    nu : float, default=4.0
        Degrees of freedom ν of the Student-t weights (docs/estimator.md §6).
    inconsistent_z : float, default=3.0
        Two-station events with |z| above this are flagged ``inconsistent``.
    outlier_weight : float, default=0.3
        Rows with a robust weight below this are flagged ``outlier``.
    use_nondetections : bool, default=False
        Re-estimate events with informative non-detections or clipped readings by the
        censored likelihood (:mod:`fusion.network.censoring`).
    soft_threshold_sd : float, default=0.0
        g of the soft detection threshold, magnitude units (0: hard threshold).
    min_detection_probability : float, default=0.01
        Non-detections whose station would have detected the GLS event with at most this
        probability are left out (they carry almost no information).
    gr_b_value : float, optional
        Gutenberg–Richter b value; if given, ``gr_posterior_mean`` = M̂ − b ln(10)·SE²
        (docs/network-magnitude.md §8, worked example E6), else NaN. That column is never the
        magnitude to publish and must never be fed to a b-value fit: it already contains the G–R
        prior.
    nan_policy : {'omit', 'propagate', 'raise'}, default='omit'
        What a detected row with a NaN or infinite magnitude does (see module docstring).
    robust_max_iter : int, default=100
        Iterations of the robust weights at most.
    robust_tol : float, default=1e-6
        The robust iteration stops for an event when M̂ moves less than this (magnitude units).
    censoring_max_iter : int, default=20
        Newton steps of the censored likelihood at most.

    Returns
    -------
    FusedMagnitudes

    Raises
    ------
    ConfigError
        A parameter is out of range; the message names it and the allowed range.
    ModelNotFoundError
        ``params`` is for another magnitude type.
    DomainError
        A station unit has a non-positive or non-finite variance or a non-finite bias, or
        (``nan_policy='raise'``) a detected row has a non-finite magnitude.

    Warns
    -----
    DegenerateDataWarning
        Some events have no usable detection (their magnitude is NaN).
    ConvergenceWarning
        The robust weights or the censored likelihood did not converge for some events; those
        keep their last robust iterate, or their GLS value, and are flagged ``not-converged``.

    Notes
    -----
    See the module docstring for the formulas, rules and edge cases. Per-event work is done
    with ``np.bincount`` sums over rows sorted by event and with ``reduceat``; the only loops
    are over iterations. The SE excludes the anchor (network calibration) uncertainty.
    """
    _validate(
        confidence_level=confidence_level,
        robust_min_stations=robust_min_stations,
        nu=nu,
        inconsistent_z=inconsistent_z,
        outlier_weight=outlier_weight,
        soft_threshold_sd=soft_threshold_sd,
        min_detection_probability=min_detection_probability,
        gr_b_value=gr_b_value,
        nan_policy=nan_policy,
        robust_max_iter=robust_max_iter,
        robust_tol=robust_tol,
        censoring_max_iter=censoring_max_iter,
    )
    if str(obs.magnitude_type) != str(params.magnitude_type):
        raise ModelNotFoundError(
            f"the station parameters are for {params.magnitude_type}, the observations are "
            f"{obs.magnitude_type}; fit or load a model for {obs.magnitude_type}"
        )
    rp = _row_parameters(obs, params)
    rs = _row_states(obs, params, rp, nan_policy)
    est = _gls_estimate(
        rs,
        obs.n_events,
        robust_min_stations=robust_min_stations,
        nu=nu,
        inconsistent_z=inconsistent_z,
        robust_max_iter=robust_max_iter,
        robust_tol=robust_tol,
    )
    diag = _event_diagnostics(obs, rp, rs, est, outlier_weight)
    cen = _censored_step(
        obs,
        rp,
        rs,
        est,
        use_nondetections=use_nondetections,
        soft_threshold_sd=soft_threshold_sd,
        min_detection_probability=min_detection_probability,
        censoring_max_iter=censoring_max_iter,
    )
    # One detecting station: the interval is never narrower than the reading's own SD.
    single = rs.counts == 1
    cen.se[single] = np.maximum(cen.se[single], np.sqrt(rs.base[rs.starts[single]]))
    propagate_bad = np.zeros(obs.n_events, dtype=bool)
    if nan_policy == "propagate":
        propagate_bad[obs.event[rs.invalid]] = True
        cen.magnitude[propagate_bad] = np.nan
        cen.se[propagate_bad] = np.nan
        cen.method[propagate_bad] = EstimateMethod.none.value
    flags = _flags(obs, rp, rs, est, diag, cen, propagate_bad)
    _warn_events(obs, flags.no_detection, cen.not_converged & (rs.counts > 0))
    events = _event_table(
        obs, rs, est, diag, cen, flags, confidence_level=confidence_level, gr_b_value=gr_b_value
    )
    contributions = _contribution_table(obs, params, rp, rs, est, cen, flags)
    return FusedMagnitudes(events=events, contributions=contributions)


# ------------------------------------------------------------------------------------------
# Steps of fuse_events
# ------------------------------------------------------------------------------------------


@dataclass(slots=True, eq=False)
class _RowParameters:
    """Station parameters looked up for every row (unknown units: b = 0, τ_b², s0²)."""

    unit: NDArray[np.int64]  # unit index of the row, -1 when unknown
    known: NDArray[np.bool_]
    bias: NDArray[np.float64]
    bias_var: NDArray[np.float64]
    sigma2: NDArray[np.float64]
    prior_row: NDArray[np.bool_]  # unknown or prior-dominated unit


@dataclass(slots=True, eq=False)
class _RowStates:
    """Which rows enter the GLS, and those rows' values (``rows`` index the observation set)."""

    det: NDArray[np.bool_]
    finite: NDArray[np.bool_]
    invalid: NDArray[np.bool_]  # detected with a non-finite magnitude
    clipped: NDArray[np.bool_]
    rows: NDArray[np.int64]
    ev: NDArray[np.int64]
    code: NDArray[np.int64]  # unit code of the GLS rows (n_units for unknown)
    y: NDArray[np.float64]  # corrected magnitude m − b̂
    sig2_u: NDArray[np.float64]
    bvar_u: NDArray[np.float64]
    base: NDArray[np.float64]  # σ̃² + Var b̂
    counts: NDArray[np.int64]
    starts: NDArray[np.int64]
    pairs: PairCovariance | None
    partner: NDArray[np.int64] | None


@dataclass(slots=True, eq=False)
class _GlsEstimate:
    """Robust weights, the final GLS and the leave-one-out z of the GLS rows."""

    robust_event: NDArray[np.bool_]
    rob: _RobustResult
    s2: NDArray[np.float64]
    gls: EventGLS
    se: NDArray[np.float64]
    z: NDArray[np.float64]
    z_two: NDArray[np.float64]
    inconsistent: NDArray[np.bool_]


@dataclass(slots=True, eq=False)
class _Diagnostics:
    """Per-event diagnostics of the GLS (module docstring)."""

    chi2: NDArray[Any]  # float
    birge: NDArray[np.float64]
    n_eff: NDArray[np.float64]
    prior_share: NDArray[Any]  # float
    max_infl: NDArray[np.float64]
    infl_row: NDArray[np.int64]
    max_abs_z: NDArray[np.float64]
    jack: NDArray[np.float64]
    plain_mean: NDArray[np.float64]
    median: NDArray[np.float64]
    neg_w: NDArray[np.bool_]
    outlier_row: NDArray[np.bool_]


@dataclass(slots=True, eq=False)
class _Censored:
    """Magnitudes after the optional censored re-estimate, and its bookkeeping."""

    magnitude: NDArray[np.float64]
    se: NDArray[np.float64]
    weight_row: NDArray[np.float64]
    method: NDArray[Any]
    n_iter: NDArray[np.int64]
    converged: NDArray[np.bool_]
    not_converged: NDArray[np.bool_]
    shift: NDArray[np.float64]
    n_cens_used: NDArray[np.int64]
    used_nd_row: NDArray[np.bool_]
    uncorrected: NDArray[np.bool_]


@dataclass(slots=True, eq=False)
class _Flags:
    """Event and row flags as text categories and codes."""

    no_detection: NDArray[np.bool_]
    event_text: list[str]
    event_codes: NDArray[Any]
    row_text: list[str]
    row_codes: NDArray[Any]


def _row_parameters(obs: ObservationSet, params: StationParameters) -> _RowParameters:
    """b̂, Var b̂ and σ̃² of every row's unit; an unknown unit gets 0, τ_b² and s0²."""
    n_units = params.n_units
    unit = _row_units(obs, params)
    known = unit >= 0
    _check_parameters(params)
    if n_units:
        uidx = np.where(known, unit, 0)
        bias = np.where(known, params.bias[uidx], 0.0)
        bias_var = np.where(known, params.bias_var[uidx], params.tau_b2)
        sigma2 = np.where(known, params.sigma2[uidx], params.s0_2)
        prior_row = ~known | params.prior_dominated[uidx]
    else:
        bias = np.zeros(obs.n_obs)
        bias_var = np.full(obs.n_obs, float(params.tau_b2))
        sigma2 = np.full(obs.n_obs, float(params.s0_2))
        prior_row = np.ones(obs.n_obs, dtype=bool)
    if not (params.tau_b2 >= 0.0 and params.s0_2 > 0.0):
        raise DomainError(
            f"station parameters have tau_b2 = {params.tau_b2}, s0_2 = {params.s0_2}; "
            "unknown stations need tau_b2 >= 0 and s0_2 > 0: refit the station model"
        )
    return _RowParameters(
        unit=unit, known=known, bias=bias, bias_var=bias_var, sigma2=sigma2, prior_row=prior_row
    )


def _row_states(
    obs: ObservationSet, params: StationParameters, rp: _RowParameters, nan_policy: NanPolicy
) -> _RowStates:
    """Select the GLS rows (detected, finite, not clipped) and apply ``nan_policy='raise'``."""
    n_units = params.n_units
    event, mag, det = obs.event, obs.magnitude, obs.detected
    finite = np.isfinite(mag)
    invalid = det & ~finite
    if nan_policy == "raise" and np.any(invalid):
        i = int(np.flatnonzero(invalid)[0])
        raise DomainError(
            f"row {i} (event {obs.event_ids[event[i]]!r}, station "
            f"{obs.station_ids[obs.station[i]]!r}): detected magnitude {mag[i]} is not finite; "
            "drop the row or pass nan_policy='omit'"
        )
    clipped = det & finite & obs.clipped
    use = det & finite & ~obs.clipped
    rows = np.flatnonzero(use)
    ev = event[rows]
    code = np.where(rp.known, rp.unit, n_units)[rows]
    sig2_u, bvar_u = rp.sigma2[rows], rp.bias_var[rows]
    counts, starts = _group_starts(ev, obs.n_events)
    pairs: PairCovariance | None = None
    if params.pairs.n_pairs:
        pairs = PairCovariance(params.pairs.k, params.pairs.l, params.pairs.c, n_units + 1)
    return _RowStates(
        det=det,
        finite=finite,
        invalid=invalid,
        clipped=clipped,
        rows=rows,
        ev=ev,
        code=code,
        y=mag[rows] - rp.bias[rows],
        sig2_u=sig2_u,
        bvar_u=bvar_u,
        base=sig2_u + bvar_u,
        counts=counts,
        starts=starts,
        pairs=pairs,
        partner=_partner_rows(ev, code, pairs),
    )


def _gls_estimate(
    rs: _RowStates,
    n_events: int,
    *,
    robust_min_stations: int,
    nu: float,
    inconsistent_z: float,
    robust_max_iter: int,
    robust_tol: float,
) -> _GlsEstimate:
    """Robust weights, the final GLS, LOSO z and the two-station rule (module docstring)."""
    ev, code, y, partner, pairs = rs.ev, rs.code, rs.y, rs.partner, rs.pairs
    robust_event = rs.counts >= max(3, int(robust_min_stations))
    rob = _robust_weights(
        ev,
        code,
        y,
        rs.sig2_u,
        rs.bvar_u,
        partner,
        pairs,
        robust_event,
        nu=float(nu),
        max_iter=int(robust_max_iter),
        tol=float(robust_tol),
    )
    s2 = rs.sig2_u / rob.omega + rs.bvar_u
    gls = event_gls(
        ev, code, y, s2, n_events, pairs if partner is not None else None, partner_row=partner
    )
    se = np.sqrt(gls.variance)
    z = (y - gls.loo_magnitude) / np.sqrt(rs.base + gls.loo_variance)
    # Two stations: z of the difference (also for a flagged pair, whose LOSO is empty).
    two = np.flatnonzero(rs.counts == 2)
    z_two = np.full(n_events, np.nan)
    if two.shape[0]:
        a, b = rs.starts[two], rs.starts[two] + 1
        c12 = np.zeros(two.shape[0])
        if partner is not None and pairs is not None:
            paired = partner[a] == b
            c12[paired] = pairs.partner_cov[code[a[paired]]]
        zd = (y[a] - y[b]) / np.sqrt(rs.base[a] + rs.base[b] - 2.0 * c12)
        z[a], z[b] = zd, -zd
        z_two[two] = zd
    inconsistent = np.abs(z_two) > inconsistent_z
    se = np.where(inconsistent, se * np.abs(z_two), se)
    return _GlsEstimate(
        robust_event=robust_event,
        rob=rob,
        s2=s2,
        gls=gls,
        se=se,
        z=z,
        z_two=z_two,
        inconsistent=inconsistent,
    )


def _event_diagnostics(
    obs: ObservationSet,
    rp: _RowParameters,
    rs: _RowStates,
    est: _GlsEstimate,
    outlier_weight: float,
) -> _Diagnostics:
    """χ², Birge ratio, n_eff, prior share, influence, |z|, jackknife SE, mean and median."""
    n_events = obs.n_events
    ev, counts, starts, gls = rs.ev, rs.counts, rs.starts, est.gls
    w = gls.weight
    r = gls.residual
    chi2 = np.bincount(
        ev,
        weights=r * _sigma_inverse_residual(r, est.s2, rs.code, rs.partner, rs.pairs),
        minlength=n_events,
    )
    with np.errstate(invalid="ignore", divide="ignore"):
        birge = np.where(counts >= 2, np.sqrt(chi2 / (counts - 1)), np.nan)
        n_eff = 1.0 / np.bincount(ev, weights=w * w, minlength=n_events)
    chi2 = np.where(counts >= 2, chi2, np.nan)
    n_eff[counts == 0] = np.nan
    # float even when no event has a detection (bincount of nothing is an int array)
    prior_share = np.bincount(ev, weights=w * rp.prior_row[rs.rows], minlength=n_events).astype(
        float
    )
    prior_share[counts == 0] = np.nan
    _, infl_row = _group_argmax(ev, np.abs(gls.influence), counts, starts)
    # Signed, as in the rows: influence = M̂ − M̂^(−i) of the station with the largest |influence|.
    max_infl = np.full(n_events, np.nan)
    has_row = infl_row >= 0
    max_infl[has_row] = gls.influence[infl_row[has_row]]
    max_abs_z, _ = _group_argmax(ev, np.abs(est.z), counts, starts)
    loo = gls.loo_magnitude
    mag_rows = obs.magnitude[rs.rows]
    with np.errstate(invalid="ignore", divide="ignore"):
        loo_mean = np.bincount(ev, weights=np.nan_to_num(loo), minlength=n_events) / counts
        jack_ss = np.bincount(
            ev, weights=np.nan_to_num((loo - loo_mean[ev]) ** 2), minlength=n_events
        )
        jack = np.where(counts >= 4, np.sqrt((counts - 1) / counts * jack_ss), np.nan)
        plain_mean = np.bincount(ev, weights=mag_rows, minlength=n_events) / counts
    return _Diagnostics(
        chi2=chi2,
        birge=birge,
        n_eff=n_eff,
        prior_share=prior_share,
        max_infl=max_infl,
        infl_row=infl_row,
        max_abs_z=max_abs_z,
        jack=jack,
        plain_mean=plain_mean,
        median=_group_median(ev, mag_rows, counts, starts),
        neg_w=np.bincount(ev, weights=w < 0.0, minlength=n_events) > 0,
        outlier_row=est.rob.omega < outlier_weight,
    )


def _censored_step(
    obs: ObservationSet,
    rp: _RowParameters,
    rs: _RowStates,
    est: _GlsEstimate,
    *,
    use_nondetections: bool,
    soft_threshold_sd: float,
    min_detection_probability: float,
    censoring_max_iter: int,
) -> _Censored:
    """Informative non-detections and clipped readings; with ``use_nondetections`` the
    censored likelihood re-estimates their events (module docstring)."""
    n_events, event = obs.n_events, obs.event
    M_gls = est.gls.magnitude
    w = est.gls.weight
    method = np.full(n_events, EstimateMethod.gls.value, dtype=object)
    method[est.robust_event] = EstimateMethod.robust_gls.value
    method[rs.counts == 1] = EstimateMethod.single_station.value
    method[rs.counts == 0] = EstimateMethod.none.value
    weight_row = np.zeros(obs.n_obs)
    weight_row[rs.rows] = w
    out = _Censored(
        magnitude=M_gls.copy(),
        se=est.se,
        weight_row=weight_row,
        method=method,
        n_iter=est.rob.n_iter.copy(),
        converged=est.rob.converged.copy(),
        not_converged=~est.rob.converged,
        shift=np.zeros(n_events),
        n_cens_used=np.zeros(n_events, dtype=np.int64),
        used_nd_row=np.zeros(obs.n_obs, dtype=bool),
        uncorrected=np.zeros(n_events, dtype=bool),
    )
    has_estimate = np.isfinite(M_gls)
    nd = ~rs.det & np.isfinite(obs.threshold) & has_estimate[event]
    scale_nd = np.sqrt(rp.sigma2 + rp.bias_var + float(soft_threshold_sd) ** 2)
    p_detect = np.zeros(obs.n_obs)
    nd_idx = np.flatnonzero(nd)
    p_detect[nd_idx] = special.ndtr(
        (M_gls[event[nd_idx]] + rp.bias[nd_idx] - obs.threshold[nd_idx]) / scale_nd[nd_idx]
    )
    informative = nd & (p_detect > min_detection_probability)
    clip_ok = rs.clipped & has_estimate[event]
    if not use_nondetections:
        out.uncorrected[event[informative]] = True
        out.uncorrected[event[clip_ok]] = True
        return out
    cen_idx = np.flatnonzero(informative)
    clip_idx = np.flatnonzero(clip_ok)
    tob_ev = np.zeros(n_events, dtype=bool)
    tob_ev[event[cen_idx]] = True
    tob_ev[event[clip_idx]] = True
    if not np.any(tob_ev):
        return out
    ev, rows = rs.ev, rs.rows
    drow = np.flatnonzero(tob_ev[ev])
    data = CensoredEventData(
        n_events=n_events,
        det_event=ev[drow],
        det_value=rs.y[drow],
        det_precision=w[drow] * est.gls.precision[ev[drow]],
        cen_event=event[cen_idx],
        cen_value=obs.threshold[cen_idx] - rp.bias[cen_idx],
        cen_scale=scale_nd[cen_idx],
        clip_event=event[clip_idx],
        clip_value=obs.magnitude[clip_idx] - rp.bias[clip_idx],
        clip_scale=np.sqrt(rp.sigma2[clip_idx] + rp.bias_var[clip_idx]),
    )
    fit = fit_censored(data, np.where(tob_ev, M_gls, np.nan), max_iter=int(censoring_max_iter))
    ok = tob_ev & fit.converged
    failed = tob_ev & ~fit.converged
    out.magnitude[ok] = fit.magnitude[ok]
    out.se[ok] = np.where(est.inconsistent[ok], fit.se[ok] * np.abs(est.z_two[ok]), fit.se[ok])
    out.shift[ok] = fit.magnitude[ok] - M_gls[ok]
    out.method[ok] = EstimateMethod.censored_likelihood.value
    out.n_iter[tob_ev] += fit.n_iter[tob_ev]
    out.converged[failed] = False
    out.not_converged |= failed
    out.uncorrected |= failed
    # Row weights ∂M̂/∂v (they sum to 1 over the event's rows).
    w_det, w_cen, w_clip = row_sensitivities(data, np.where(ok, out.magnitude, 0.0))
    out.weight_row[rows[drow]] = np.where(ok[ev[drow]], w_det, w[drow])
    for idx, w_i in ((cen_idx, w_cen), (clip_idx, w_clip)):
        ok_i = ok[event[idx]]
        out.weight_row[idx] = np.where(ok_i, w_i, 0.0)
        out.used_nd_row[idx] = ok_i
    out.n_cens_used = np.bincount(event[cen_idx[ok[event[cen_idx]]]], minlength=n_events)
    return out


def _flags(
    obs: ObservationSet,
    rp: _RowParameters,
    rs: _RowStates,
    est: _GlsEstimate,
    diag: _Diagnostics,
    cen: _Censored,
    propagate_bad: NDArray[np.bool_],
) -> _Flags:
    """Event and row flags (module docstring) as text categories."""
    n_events, event, counts = obs.n_events, obs.event, rs.counts
    unknown_ev = np.zeros(n_events, dtype=bool)
    unknown_ev[event[~rp.known & rs.det & rs.finite]] = True
    outlier_ev = np.bincount(rs.ev, weights=diag.outlier_row, minlength=n_events) > 0
    invalid_ev = np.zeros(n_events, dtype=bool)
    invalid_ev[event[rs.invalid]] = True
    no_det = ~np.isfinite(cen.magnitude) & ~propagate_bad
    ebits = np.zeros(n_events, dtype=np.int64)
    for flag, mask in (
        (EventFlag.no_detection, no_det),
        (EventFlag.single_station, counts == 1),
        (EventFlag.inconsistent, est.inconsistent),
        (EventFlag.negative_weight, diag.neg_w),
        (EventFlag.unknown_station, unknown_ev),
        (EventFlag.outlier, outlier_ev),
        (EventFlag.not_converged, cen.not_converged & (counts > 0)),
        (EventFlag.censoring_used, cen.method == EstimateMethod.censored_likelihood.value),
        (EventFlag.censoring_uncorrected, cen.uncorrected),
        (EventFlag.invalid_magnitude, invalid_ev),
    ):
        ebits |= np.where(mask, _bit(flag), 0)
    etext, einv = _flag_text(ebits, tuple(str(f) for f in _EVENT_FLAGS))
    rbits = np.zeros(obs.n_obs, dtype=np.int64)
    out_full = np.zeros(obs.n_obs, dtype=bool)
    out_full[rs.rows] = diag.outlier_row
    for rflag, rmask in (
        (RowFlag.outlier, out_full),
        (RowFlag.unknown_station, ~rp.known),
        (RowFlag.prior_dominated, rp.prior_row & rp.known),
        (RowFlag.negative_weight, cen.weight_row < 0.0),
        (RowFlag.clipped, rs.clipped),
        (RowFlag.non_detection, ~rs.det),
        (RowFlag.censoring_used, cen.used_nd_row),
        (RowFlag.invalid_magnitude, rs.invalid),
    ):
        rbits |= np.where(rmask, _bit(rflag), 0)
    rtext, rinv = _flag_text(rbits, tuple(str(f) for f in _ROW_FLAGS))
    return _Flags(
        no_detection=no_det, event_text=etext, event_codes=einv, row_text=rtext, row_codes=rinv
    )


def _warn_events(
    obs: ObservationSet, no_det: NDArray[np.bool_], bad_conv: NDArray[np.bool_]
) -> None:
    """Warn about events without a usable detection and events that did not converge."""
    if np.any(no_det):
        warnings.warn(
            f"{int(no_det.sum())} of {obs.n_events} events have no usable detection; their "
            "magnitude is NaN (flag 'no-usable-detection')",
            DegenerateDataWarning,
            stacklevel=3,
        )
    if np.any(bad_conv):
        first = obs.event_ids[int(np.flatnonzero(bad_conv)[0])]
        warnings.warn(
            f"{int(bad_conv.sum())} events did not converge (first: {first!r}); they keep "
            "their last iterate or GLS value and are flagged 'not-converged'",
            ConvergenceWarning,
            stacklevel=3,
        )


def _event_table(
    obs: ObservationSet,
    rs: _RowStates,
    est: _GlsEstimate,
    diag: _Diagnostics,
    cen: _Censored,
    flags: _Flags,
    *,
    confidence_level: float,
    gr_b_value: float | None,
) -> pd.DataFrame:
    """The event table of :class:`FusedMagnitudes` (columns: ``EVENT_COLUMNS``)."""
    n_events = obs.n_events
    magnitude, se = cen.magnitude, cen.se
    half = float(special.ndtri(0.5 + 0.5 * confidence_level)) * se
    gr_post = np.full(n_events, np.nan)
    if gr_b_value is not None:
        gr_post = magnitude - float(gr_b_value) * math.log(10.0) * se * se
    se_scaled = se * np.where(np.isfinite(diag.birge), np.maximum(1.0, diag.birge), 1.0)
    infl_station = np.full(n_events, None, dtype=object)
    has_infl = diag.infl_row >= 0
    infl_station[has_infl] = obs.station_ids[obs.station[rs.rows[diag.infl_row[has_infl]]]]
    origin = pd.DatetimeIndex(obs.event_time.astype("datetime64[us]")).tz_localize("UTC")
    return pd.DataFrame(
        {
            "event_id": obs.event_ids.astype(object),
            "origin_time": origin,
            "magnitude_type": np.full(n_events, str(obs.magnitude_type), dtype=object),
            "magnitude": magnitude,
            "se": se,
            "ci_low": magnitude - half,
            "ci_high": magnitude + half,
            "confidence_level": np.full(n_events, float(confidence_level)),
            "n_stations": rs.counts,
            "n_eff": diag.n_eff,
            "chi2": diag.chi2,
            "birge_ratio": diag.birge,
            "se_scaled": se_scaled,
            "plain_mean": diag.plain_mean,
            "median": diag.median,
            "minus_plain_mean": magnitude - diag.plain_mean,
            "max_influence": diag.max_infl,
            "max_influence_station": infl_station,
            "max_abs_z": diag.max_abs_z,
            "jackknife_se": diag.jack,
            "prior_weight_share": diag.prior_share,
            "n_nondetections_used": np.asarray(cen.n_cens_used, dtype=np.int64),
            "censoring_shift": np.where(np.isfinite(magnitude), cen.shift, np.nan),
            "flags": np.asarray(flags.event_text, dtype=object)[flags.event_codes],
            "method": cen.method,
            "converged": cen.converged,
            "n_iter": cen.n_iter,
            "gr_posterior_mean": gr_post,
        },
        copy=False,
    )


def _contribution_table(
    obs: ObservationSet,
    params: StationParameters,
    rp: _RowParameters,
    rs: _RowStates,
    est: _GlsEstimate,
    cen: _Censored,
    flags: _Flags,
) -> pd.DataFrame:
    """The contribution table of :class:`FusedMagnitudes`, one row per observation."""
    mag, det, rows = obs.magnitude, rs.det, rs.rows
    corrected = mag - rp.bias
    residual = np.where(det & rs.finite, corrected - cen.magnitude[obs.event], np.nan)
    robust_row = np.full(obs.n_obs, np.nan)
    robust_row[rows] = est.rob.omega
    influence_row = np.full(obs.n_obs, np.nan)
    influence_row[rows] = est.gls.influence
    z_row = np.full(obs.n_obs, np.nan)
    z_row[rows] = est.z
    n_units = params.n_units
    unit_ids = pd.Index(params.unit_ids.astype(str)) if n_units else pd.Index([], dtype=object)
    return pd.DataFrame(
        {
            "event_id": pd.Categorical.from_codes(obs.event, categories=pd.Index(obs.event_ids)),
            "station_id": pd.Categorical.from_codes(
                obs.station, categories=pd.Index(obs.station_ids)
            ),
            "unit_id": pd.Categorical.from_codes(rp.unit, categories=unit_ids),
            "detected": det.copy(),
            "magnitude": mag.copy(),
            "threshold": obs.threshold.copy(),
            "correction": 0.0 - rp.bias + 0.0,
            "corrected_magnitude": corrected,
            "weight": cen.weight_row,
            "robust_weight": robust_row,
            "residual": residual,
            "influence": influence_row,
            "z": z_row,
            "flags": pd.Categorical.from_codes(
                flags.row_codes, categories=pd.Index(flags.row_text)
            ),
        },
        copy=False,  # every array here is freshly computed or copied: no consolidation copy
    )


def _check_parameters(params: StationParameters) -> None:
    """Every unit needs a finite bias and positive, finite variances."""
    if params.n_units == 0:
        return
    total = params.sigma2 + params.bias_var
    bad = ~np.isfinite(params.bias) | ~np.isfinite(total) | ~(params.sigma2 > 0.0)
    bad |= ~(params.bias_var >= 0.0)
    if np.any(bad):
        i = int(np.flatnonzero(bad)[0])
        raise DomainError(
            f"station unit {params.unit_ids[i]!r}: bias {params.bias[i]}, sigma2 "
            f"{params.sigma2[i]}, bias_var {params.bias_var[i]} (need finite bias, sigma2 > 0, "
            "bias_var >= 0); refit or repair the station model"
        )
