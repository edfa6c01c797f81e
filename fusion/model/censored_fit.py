"""Joint fit of station biases and error variances with non-detections (docs/censoring.md §4).

A station that was operating but did not detect an event says its station magnitude was below
its noise threshold t_ij. At small magnitudes the detecting stations are those with positive
errors, so a fit on detections only biases the events high and the station parameters too
(docs/censoring.md §1 [sim]: detected-only b RMSE 0.094, median σ̂/σ 0.938 in the censoring mode).
This module fits (b_i, σ_i²) on the censored likelihood of all cells, with detections D,
non-detections C (threshold t_ij, hard or soft) and clipped readings U (lower bounds u_ij):

    ℓ = Σ_D [log φ((m_ij − b_i − M_j)/σ_i) − log σ_i] + Σ_C log Φ((t_ij − b_i − M_j)/s_i)
        + Σ_U log[1 − Φ((u_ij − b_i − M_j)/σ_i)],        s_i = sqrt(σ_i² + g²),

by a generalised ECM (Meng & Rubin 1993 [from memory]) started from the detections-only
profiled REML-EM fit (:func:`fusion.model.reml_em.fit_reml_em`). One iteration:

1. **Event step.** For every event, Newton's method for M_j given (b, σ)
   (:func:`fusion.network.censoring.fit_censored`; Tobin 1958, Ringdal 1976), warm-started from the
   previous M̂_j; V_j = 1/I_j, I_j = −ℓ''_j(M̂_j). Only non-detections with detection probability
   Φ((M̂_j + b_i − t_ij)/s_i) above ``min_detection_probability`` enter C (docs/censoring.md §4);
   the others add log Φ ≈ 0 and only slow the iteration. C is re-selected in the first five
   iterations and at every EB refresh and held fixed in between (a cell at the cut-off would
   otherwise flip in and out and the iteration cycle; measured: steps stalled at 2e-5 before
   this rule); cells below 1e-9 at the start are left out for good. Detections enter with the
   precision
   a_ij = ω_ij/σ_i² (flagged pairs: the GLS row precision Σ_j⁻¹1 of
   :func:`fusion.network.gls_blocks.precision_row_weights`).
2. **Outlier weights** ω_ij of the detections, in events with three or more detections (with
   fewer an outlier cannot be attributed, docs/estimator.md §6), from the leave-one-station-out
   residual linearised about M̂_j: e_ij = y_ij − M̂_j^(−i) = r_ij I_j/(I_j − a_ij) with variance
   v_ij = σ_i² + 1/(I_j − a_ij) [derived from one Newton step of ℓ_j without row i; in the GLS
   case it is the exact LOSO residual of docs/network-magnitude.md §7]. ``outliers`` chooses the
   model:

   - ``"mixture"`` (default), a contaminated normal (Tukey 1960 [from memory]): with
     probability ε a detection carries an extra N(0, τ²) error. The posterior outlier
     probability is π_ij = ε N(e; v + τ²)/[(1 − ε) N(e; v) + ε N(e; v + τ²)], the detection's
     precision becomes ((1 − π)/σ² + π/(σ² + τ²)), and only the clean part (1 − π) enters the
     σ-step. ε and τ² are network-wide and re-estimated every iteration by their EM updates
     (ε = mean π, τ² = Σπ(e² − v)/Σπ), with τ² >= 8 s0² so that the outlier component stays
     at least three clean SDs wide (two nearly equal components are not identifiable).
   - ``"student_t"``: ω = (ν + 1)/(ν + e²/v) and the σ-step term ω r²/κ_ν, the REML-EM's
     weights (Lange, Little & Taylor 1989; :mod:`fusion.model.reml_em`).
   - ``"none"``: ω = 1.

   Why the mixture: under censoring the outlying cells concentrate among the detections of
   small events (measured on the censor simulation of docs/simulation.md: 4.7 % of the detections of
   one-detection events are outlier cells, 1.7 % of all detections, 1 % of all cells). A
   Student-t(4) weight bounds an outlier's share of the σ-step only at (ν + 1)/κ_ν ≈ 6.4 clean
   cells; the mixture removes gross outliers from the σ-step. Median σ̂/σ over 5 seeds
   (``bench/censoring_accuracy.py``): mixture 0.993, Student-t 1.053, none 1.174.
3. **Station step**, one EM step of the censored-normal model x_ij = m_ij − M̂_j ~ N(b_i, σ_i²)
   (Dempster, Laird & Rubin 1977; docs/censoring.md §4). Detections: E x = x. Non-detections
   (x < t_ij − M̂_j): with α = (t_ij − M̂_j − b_i)/s_i and λ = φ(α)/Φ(α),

       E x = b_i − (σ_i²/s_i) λ,      Var x = σ_i² − (σ_i⁴/s_i²) λ(α + λ)

   [derived: x ~ N(b, σ²) seen through a detection probability Φ((x − c)/g); the hard threshold
   g = 0 gives the truncated-normal moments of docs/censoring.md §4, docs/check-values.md §7];
   clipped readings the mirror image above u_ij − M̂_j
   (:func:`fusion.network.censoring.truncated_normal_moments`). Then

       b_i  = (Σ_D γω x + Σ_{C∪U} γ E x + μ0 σ_i²/τ_b²) / (Σ_D γω + Σ_{C∪U} γ + σ_i²/τ_b²),
       σ_i² = (d0 s0² + Σ_D γ c_ij (r_ij² + V_j) + Σ_{C∪U} γ E(x − b_i)²) / (d0 + Σ γ c_ij),

   γ the forgetting weights, c_ij = 1 − π_ij for detections (mixture; 1 otherwise and for
   censored cells; ``student_t`` uses ω r²/κ_ν + V). V_j is the REML correction of
   docs/estimator.md §2: r_ij is measured from an estimate M̂_j that used r_ij. With a robust
   outlier model the σ-step uses the cells of events with three or more detections only, the events
   where an outlying detection can be recognised; the b-step uses every event.
4. **Re-anchor** with the REML-EM's constraints (:func:`fusion.model.anchors.level_constraints`,
   same
   reference units, weights and continuity): each component is shifted by one constant (A1,
   A4) or re-centred (A2); reference events (A3) enter the event step as a prior
   N(M*_j, s*_j²) (a hard one with precision 1e12) and need no shift.
5. Every ``eb_every`` iterations (and after the second) the priors (d0, s0², τ_b²) are refreshed
   (Smyth 2004, :mod:`fusion.model.eb_priors`) from raw s_i² = (σ-step sum)/d_i, with
   d_i = Σ γ (1 − w_ij) over the cells of the σ-step, w_ij the cell's share of its event's
   information (:func:`fusion.network.censoring.row_sensitivities`), an approximation used only for
   the hyperparameters.

Step 1 maximises ℓ over M exactly and step 3 is one EM step: a generalised ECM, which does not
decrease the (penalised) likelihood [from memory: ECM theory]. Convergence: the distance to
the fixed point of b and log σ (last step × ρ/(1 − ρ), ρ the observed linear rate, as in
:mod:`fusion.model.reml_em`) falls below ``tol_bias`` and ``tol_log_sigma``. When the observed rate
exceeds 0.6, (b, log σ²) are extrapolated by SQUAREM (Varadhan & Roland 2008, scheme S3) from
three consecutive iterates; extrapolation changes the path, not the fixed point.

**Bias variances** handed to the network estimate: the observed information of the censored
profile likelihood. With curvature weights h_ij = a_ij for detections and
h_ij = λ(z)(z + λ(z))/s_i² for censored and clipped cells (the per-row terms of −ℓ''), profiling
M_j out gives the Schur-complement normal matrix of the REML-EM b-step,

    A = diag(Σ_j γ_j h_ij) − X' diag(γ_j/I_j) X + diag(1/τ_b²),    X_ji = h_ij,

and Cov(b̂) is the top-left block of the inverse of the bordered matrix [A C; C' 0] with the
anchor columns C [derived: the same construction as the REML-EM's Var(b̂), docs/estimator.md §5]. It
is used instead of the REML-EM's Var(b̂) because it counts the information the non-detections add
and is evaluated at the censored estimates; without censored cells it is the REML-EM's formula.
Beyond ``dense_cov_max`` units the diagonal approximation 1/A_ii of docs/estimator.md §5 is
returned.

Simplifications (documented, not hidden): non-detections and clipped readings are independent
of the other stations' errors and are taken as clean (no outlier component); flagged-pair
covariances keep the REML-EM values and only enter the detection precisions; units that the
REML-EM did not fit (no event with two detections) keep its values and their rows are left out.

No Python loop runs over events or rows: per-event sums are ``np.bincount`` over event codes,
per-station sums over station codes; loops run over iterations and anchor components only.

References
----------
Bibliographic details marked [from memory] were not re-read.

Dempster A. P., Laird N. M., Rubin D. B. (1977). Maximum likelihood from incomplete data via
the EM algorithm. JRSS-B 39:1–38 [from memory].
Lange K. L., Little R. J. A., Taylor J. M. G. (1989). Robust statistical modeling using the t
distribution. JASA 84:881–896 [from memory].
Meng X.-L., Rubin D. B. (1993). Maximum likelihood estimation via the ECM algorithm: a general
framework. Biometrika 80:267–278 [from memory].
Ringdal F. (1976). Maximum-likelihood estimation of seismic magnitude. BSSA 66(3):789–802.
Smyth G. K. (2004). Statistical Applications in Genetics and Molecular Biology 3(1), Art. 3.
Tobin J. (1958). Estimation of relationships for limited dependent variables. Econometrica
26(1):24–36 [from memory].
Tukey J. W. (1960). A survey of sampling from contaminated distributions. In Contributions to
Probability and Statistics (Olkin, ed.), Stanford University Press [from memory].
Varadhan R., Roland C. (2008). Simple and globally convergent methods for accelerating the
convergence of any EM algorithm. Scand. J. Stat. 35:335–353 [from memory].
"""

from __future__ import annotations

import dataclasses
import warnings
from dataclasses import dataclass
from typing import TYPE_CHECKING, Any, Literal

import numpy as np
from numpy.typing import ArrayLike, NDArray
from scipy import linalg, sparse, special

from fusion.model.anchors import (
    Anchor,
    AnchorKind,
    AnchorResult,
    LevelConstraints,
    level_constraints,
    recentre_median,
    reference_event_priors,
)
from fusion.model.eb_priors import EBPrior, prior_stable
from fusion.model.fit_steps import (
    ConvergenceTracker,
    Extrapolation,
    StationFitResult,
    anchor_level,
    check_iteration_parameters,
    effective_dof,
    moderated_variance,
    parameter_error,
    raw_variance,
    refresh_due,
    refresh_prior,
    student_t_weight,
    t_weight_consistency,
)
from fusion.model.forgetting import match_previous_units, unit_station_ids
from fusion.model.reml_em import RemlEmFit
from fusion.network.censoring import (
    CensoredEventData,
    fit_censored,
    inverse_mills_ratio,
    row_sensitivities,
    tobit_derivatives,
    truncated_normal_moments,
)
from fusion.network.gls_blocks import PairCovariance, pair_partner_rows, precision_row_weights
from fusion.observations import ObservationSet
from stations.errors import ConfigError, ConvergenceWarning, InsufficientDataError

if TYPE_CHECKING:
    pass

__all__ = [
    "CensoredStationFit",
    "OutlierModel",
    "censoring_rows",
    "fit_censored_stations",
    "loo_predictor",
    "nondetection_moments",
]

OutlierModel = Literal["mixture", "student_t", "none"]

#: Precision of a hard reference event (A3) in the event step, 1/magnitude units²: it holds
#: M_j to 1e-6 of M*_j.
_HARD_PRECISION = 1e12
#: Largest SQUAREM extrapolation factor at the start (halved after an overshoot).
_MAX_ALPHA = 50.0
#: Smallest outlier-component excess variance, in units of s0² (module docstring, step 2).
_TAU2_FLOOR = 8.0
#: Range of the mixture's outlier share ε.
_EPS_RANGE = (1e-4, 0.5)
#: Non-detections with a standardised margin below this at the start (detection probability
#: under 1e-9; the warm start is within a few tenths of the answer) are left out for good: to
#: re-enter C (probability above ``min_detection_probability``, z > −2.3 for 0.01) their event
#: would have to move up by more than 3.5 σ.
_HOPELESS_Z = -6.0
#: Iterations that re-select the censored set C every time (then only at EB refreshes).
_RESELECT_ITERATIONS = 5
#: Detections with a REML-EM robust weight below this start as outliers (docs/estimator.md §6).
_OUTLIER_WEIGHT = 0.3


def censoring_rows(obs: ObservationSet) -> tuple[int, int]:
    """Rows that carry censoring information: (non-detections with a threshold, clipped).

    Parameters
    ----------
    obs : ObservationSet

    Returns
    -------
    n_nondetections, n_clipped : int
        Non-detection rows with a finite noise threshold, and clipped detections with a finite
        magnitude. The joint fit is worth running only when their sum is positive.
    """
    nd = int(np.count_nonzero(~obs.detected & np.isfinite(obs.threshold)))
    clip = int(np.count_nonzero(obs.detected & obs.clipped & np.isfinite(obs.magnitude)))
    return nd, clip


@dataclass(frozen=True, slots=True, eq=False)
class CensoredStationFit(StationFitResult):
    """Result of :func:`fit_censored_stations` (magnitude units and their squares).

    Per-unit arrays have shape (K,) and follow ``station_ids``; per-event arrays shape (N,);
    per-row arrays shape (nnz,) follow the rows of the observation set.

    Attributes
    ----------
    station_ids : ndarray of str, shape (K,)
    bias : ndarray
        b̂_i relative to the anchor; units the fit left out keep the warm start's value.
    bias_var : ndarray
        Var(b̂_i) from the observed information (module docstring).
    bias_cov : ndarray, shape (K, K), or None
        Cov(b̂) when K <= ``dense_cov_max``.
    sigma2 : ndarray
        Moderated error variance σ̃_i².
    raw_s2 : ndarray
        Data-only s_i² (σ-step sum over d_i); NaN where d_i = 0.
    dof : ndarray
        d_i = Σ γ (1 − w_ij) over the unit's cells in the σ-step.
    n_detections, n_nondetections, n_clipped : ndarray of int
        Cells of each kind in the final fit (non-detections: those kept in C).
    weight_sum : ndarray
        Σ γ over the unit's cells in the final fit.
    event_magnitude, event_variance : ndarray, shape (N,)
        M̂_j and V_j = 1/(−ℓ''_j) of the fitted events (NaN elsewhere).
    event_used : ndarray of bool, shape (N,)
    event_nondetections : ndarray of int, shape (N,)
        Non-detections in C per event at the end.
    row_kind : ndarray of int8, shape (nnz,)
        0 unused, 1 detection, 2 non-detection in C, 3 clipped.
    row_weight : ndarray, shape (nnz,)
        Outlier weight ω of detections (1 where not weighted); NaN on other rows.
    outlier_probability : ndarray, shape (nnz,)
        π of detections under the mixture model (0 where not weighted); NaN on other rows and
        for the other outlier models.
    row_sensitivity : ndarray, shape (nnz,)
        ∂M̂_j/∂v of each used row (sums to 1 over an event's rows); NaN for unused rows.
    residual : ndarray, shape (nnz,)
        m_ij − b̂_i − M̂_j on detections; NaN elsewhere.
    prior : EBPrior
        Final hyperparameters.
    outlier_share, outlier_variance : float
        ε and τ² of the mixture (NaN for the other models).
    anchor : AnchorResult
        The REML-EM's anchor with the value recomputed from the new biases.
    n_iter : int
    converged : bool
    soft_threshold_sd : float
        g used for the non-detections.
    """

    station_ids: NDArray[Any]
    bias: NDArray[np.float64]
    bias_var: NDArray[np.float64]
    bias_cov: NDArray[np.float64] | None
    sigma2: NDArray[np.float64]
    raw_s2: NDArray[np.float64]
    dof: NDArray[np.float64]
    n_detections: NDArray[np.int64]
    n_nondetections: NDArray[np.int64]
    n_clipped: NDArray[np.int64]
    weight_sum: NDArray[np.float64]
    event_magnitude: NDArray[np.float64]
    event_variance: NDArray[np.float64]
    event_used: NDArray[np.bool_]
    event_nondetections: NDArray[np.int64]
    row_kind: NDArray[np.int8]
    row_weight: NDArray[np.float64]
    outlier_probability: NDArray[np.float64]
    row_sensitivity: NDArray[np.float64]
    residual: NDArray[np.float64]
    prior: EBPrior
    outlier_share: float
    outlier_variance: float
    anchor: AnchorResult
    n_iter: int
    converged: bool
    soft_threshold_sd: float

    def as_reml_fit(self, base: RemlEmFit) -> RemlEmFit:
        """``base`` (the warm start) carrying this fit's parameters, events and detections.

        Code that reads a :class:`~fusion.model.reml_em.RemlEmFit` (station tables, leave-one-out z,
        reports) then sees the censored estimates. Row arrays stay defined on detections only:
        ``row_weight`` is finite exactly on the detections this fit used and
        ``row_gls_weight`` holds their sensitivities ∂M̂/∂m. ``n_events`` counts detections
        (the warm start's count where this fit used none).
        """
        det = self.row_kind == 1
        n_rows = np.where(self.n_detections > 0, self.n_detections, base.n_events)
        return dataclasses.replace(
            base,
            bias=self.bias,
            bias_var=self.bias_var,
            bias_cov=self.bias_cov,
            sigma2=self.sigma2,
            raw_s2=self.raw_s2,
            dof=self.dof,
            n_events=np.asarray(n_rows, dtype=np.int64),
            prior_dominated=self.dof < self.prior.d0,
            event_magnitude=self.event_magnitude,
            event_variance=self.event_variance,
            event_used=self.event_used,
            row_weight=np.where(det, self.row_weight, np.nan),
            row_gls_weight=np.where(det, self.row_sensitivity, np.nan),
            residual=self.residual,
            prior=self.prior,
            anchor=self.anchor,
            n_iter=base.n_iter + self.n_iter,
            converged=base.converged and self.converged,
        )


# ------------------------------------------------------------------------------------------
# Fixed structure
# ------------------------------------------------------------------------------------------


@dataclass(slots=True, eq=False)
class _Cells:
    """Row arrays of the three cell kinds, restricted to fitted events and units."""

    n_ev: int
    n_st: int
    events: NDArray[np.bool_]  # fitted events
    sigma_event: NDArray[np.bool_]  # events whose cells enter the σ-step
    g_ev: NDArray[np.float64]
    d_row: NDArray[np.int64]
    d_ev: NDArray[np.int64]
    d_st: NDArray[np.int64]
    d_m: NDArray[np.float64]
    d_g: NDArray[np.float64]
    d_weighted: NDArray[np.bool_]  # detection in an event with >= 3 detections
    partner_row: NDArray[np.int64] | None
    c_row: NDArray[np.int64]
    c_ev: NDArray[np.int64]
    c_st: NDArray[np.int64]
    c_t: NDArray[np.float64]
    c_g: NDArray[np.float64]
    u_row: NDArray[np.int64]
    u_ev: NDArray[np.int64]
    u_st: NDArray[np.int64]
    u_m: NDArray[np.float64]
    u_g: NDArray[np.float64]
    ref_ev: NDArray[np.int64]
    ref_mean: NDArray[np.float64]
    ref_prec: NDArray[np.float64]

    def per_station(self, st: NDArray[np.int64], x: NDArray[np.float64]) -> NDArray[np.float64]:
        """Per-unit sums of a row array."""
        return np.asarray(np.bincount(st, weights=x, minlength=self.n_st), dtype=np.float64)


def _drop_hopeless(
    c: _Cells,
    M: NDArray[np.float64],
    b: NDArray[np.float64],
    sigma2: NDArray[np.float64],
    soft_sd: float,
) -> _Cells:
    """``c`` without the non-detections that cannot matter (:data:`_HOPELESS_Z`)."""
    z = (M[c.c_ev] + b[c.c_st] - c.c_t) / np.sqrt(sigma2[c.c_st] + soft_sd * soft_sd)
    return _restrict_censored(c, ~(z < _HOPELESS_Z))


def _cells(
    obs: ObservationSet,
    gamma: NDArray[np.float64],
    unit_ok: NDArray[np.bool_],
    ref_mean: NDArray[np.float64],
    ref_prec: NDArray[np.float64],
    pairs: PairCovariance | None,
    sigma_all_events: bool,
) -> _Cells:
    N, K = obs.n_events, obs.n_stations
    g_row = gamma[obs.event]
    base = unit_ok[obs.station] & (g_row > 0)
    finite_m = np.isfinite(obs.magnitude)
    is_d = base & obs.detected & ~obs.clipped & finite_m
    is_c = base & ~obs.detected & np.isfinite(obs.threshold)
    is_u = base & obs.detected & obs.clipped & finite_m
    n_d = np.bincount(obs.event[is_d], minlength=N)
    n_other = np.bincount(obs.event[is_c | is_u], minlength=N)
    has_ref = ref_prec > 0
    events = (n_d >= 1) & ((n_d + n_other >= 2) | has_ref)
    keep_ev = events[obs.event]
    d_row = np.flatnonzero(is_d & keep_ev)
    c_row = np.flatnonzero(is_c & keep_ev)
    u_row = np.flatnonzero(is_u & keep_ev)
    d_ev, d_st = obs.event[d_row], obs.station[d_row]
    partner_row = None
    if pairs is not None and pairs.n_pairs:
        pr = pair_partner_rows(d_ev, d_st, pairs.partner)
        partner_row = pr if np.any(pr >= 0) else None
    ref_ev = np.flatnonzero(events & has_ref)
    return _Cells(
        n_ev=N,
        n_st=K,
        events=events,
        sigma_event=events if sigma_all_events else events & (n_d >= 3),
        g_ev=gamma,
        d_row=d_row,
        d_ev=d_ev,
        d_st=d_st,
        d_m=obs.magnitude[d_row].astype(np.float64),
        d_g=g_row[d_row],
        d_weighted=n_d[d_ev] >= 3,
        partner_row=partner_row,
        c_row=c_row,
        c_ev=obs.event[c_row],
        c_st=obs.station[c_row],
        c_t=obs.threshold[c_row].astype(np.float64),
        c_g=g_row[c_row],
        u_row=u_row,
        u_ev=obs.event[u_row],
        u_st=obs.station[u_row],
        u_m=obs.magnitude[u_row].astype(np.float64),
        u_g=g_row[u_row],
        ref_ev=ref_ev,
        ref_mean=ref_mean[ref_ev],
        ref_prec=np.where(np.isinf(ref_prec[ref_ev]), _HARD_PRECISION, ref_prec[ref_ev]),
    )


# ------------------------------------------------------------------------------------------
# Event step
# ------------------------------------------------------------------------------------------


@dataclass(slots=True, eq=False)
class _EventStep:
    """Result of the event step: M̂, information, precisions and the data it used."""

    M: NDArray[np.float64]
    info: NDArray[np.float64]  # I_j = −ℓ''_j(M̂_j)
    a: NDArray[np.float64]  # detection precisions
    scale_c: NDArray[np.float64]  # s of the non-detections in C
    data: CensoredEventData


def _select_censored(
    c_all: _Cells,
    M: NDArray[np.float64],
    b: NDArray[np.float64],
    sigma2: NDArray[np.float64],
    soft_sd: float,
    p_min: float,
) -> _Cells:
    """The cells with C restricted to non-detections of probability above ``p_min``."""
    z = (M[c_all.c_ev] + b[c_all.c_st] - c_all.c_t) / np.sqrt(
        sigma2[c_all.c_st] + soft_sd * soft_sd
    )
    return _restrict_censored(c_all, special.ndtr(z) > p_min)


def _restrict_censored(c: _Cells, keep: NDArray[np.bool_]) -> _Cells:
    if np.all(keep):
        return c
    return dataclasses.replace(
        c,
        c_row=c.c_row[keep],
        c_ev=c.c_ev[keep],
        c_st=c.c_st[keep],
        c_t=c.c_t[keep],
        c_g=c.c_g[keep],
    )


def _event_step(
    c: _Cells,
    b: NDArray[np.float64],
    sigma2: NDArray[np.float64],
    omega: NDArray[np.float64],
    M_start: NDArray[np.float64],
    pairs: PairCovariance | None,
    soft_sd: float,
    newton_max_iter: int,
) -> _EventStep:
    """Newton for every M_j given (b, σ), over the cells' current censored set C."""
    a = precision_row_weights(
        c.d_ev, c.d_st, sigma2[c.d_st] / omega, pairs, partner_row=c.partner_row
    )
    scale_c = np.sqrt(sigma2[c.c_st] + soft_sd * soft_sd)
    data = CensoredEventData(
        n_events=c.n_ev,
        det_event=np.concatenate([c.d_ev, c.ref_ev]),
        det_value=np.concatenate([c.d_m - b[c.d_st], c.ref_mean]),
        det_precision=np.concatenate([a, c.ref_prec]),
        cen_event=c.c_ev,
        cen_value=c.c_t - b[c.c_st],
        cen_scale=scale_c,
        clip_event=c.u_ev,
        clip_value=c.u_m - b[c.u_st],
        clip_scale=np.sqrt(sigma2[c.u_st]),
    )
    est = fit_censored(data, np.where(c.events, M_start, np.nan), max_iter=newton_max_iter)
    ok = c.events & np.isfinite(est.magnitude) & np.isfinite(est.se) & (est.se > 0)
    M = np.where(ok, est.magnitude, M_start)
    info = np.full(c.n_ev, np.nan)
    info[ok] = 1.0 / est.se[ok] ** 2
    bad = c.events & ~ok
    if np.any(bad):  # keep the previous M and take the information there
        _, h = tobit_derivatives(data, np.where(c.events, M, 0.0))
        info[bad] = np.maximum(-h[bad], np.finfo(float).tiny)
    return _EventStep(M=M, info=info, a=a, scale_c=scale_c, data=data)


# ------------------------------------------------------------------------------------------
# Outlier weights
# ------------------------------------------------------------------------------------------


@dataclass(slots=True, eq=False)
class _Outliers:
    """Detection weights of one iteration and the mixture's parameters."""

    omega: NDArray[np.float64]  # precision factor of each detection
    clean: NDArray[np.float64]  # weight of the detection in the σ-step sums
    qfac: NDArray[np.float64]  # factor of r² in the σ-step
    pi: NDArray[np.float64] | None  # mixture outlier probabilities
    eps: float
    tau2: float


def _loo_residuals(
    c: _Cells, es: _EventStep, b: NDArray[np.float64], sigma2: NDArray[np.float64]
) -> tuple[NDArray[np.float64], NDArray[np.float64], NDArray[np.bool_]]:
    """e = r I/(I − a) and v = σ² + 1/(I − a) of the detections (module docstring, step 2)."""
    r = c.d_m - b[c.d_st] - es.M[c.d_ev]
    info = es.info[c.d_ev]
    p_loo = info - es.a
    ok = c.d_weighted & (p_loo > 1e-12 * info)
    safe = np.where(ok, p_loo, 1.0)
    e = np.where(ok, r * info / safe, 0.0)
    v = sigma2[c.d_st] + 1.0 / safe
    return e, v, ok


def _outlier_weights(
    c: _Cells,
    es: _EventStep,
    b: NDArray[np.float64],
    sigma2: NDArray[np.float64],
    model: OutlierModel,
    nu: float,
    kappa: float,
    eps: float,
    tau2: float,
    tau2_floor: float,
) -> _Outliers:
    n = c.d_row.shape[0]
    ones = np.ones(n)
    if model == "none":
        return _Outliers(omega=ones, clean=ones, qfac=ones, pi=None, eps=eps, tau2=tau2)
    e, v, ok = _loo_residuals(c, es, b, sigma2)
    if model == "student_t":
        omega = np.where(ok, student_t_weight(e * e / v, nu), 1.0)
        qfac = np.where(ok, omega / kappa, 1.0)
        return _Outliers(omega=omega, clean=ones, qfac=qfac, pi=None, eps=eps, tau2=tau2)
    # Contaminated normal: posterior outlier probability, then the EM updates of ε and τ².
    s2 = sigma2[c.d_st]
    log_ratio = (
        np.log1p(-eps)
        - np.log(eps)
        - 0.5 * e * e / v
        - 0.5 * np.log(v)
        + 0.5 * e * e / (v + tau2)
        + 0.5 * np.log(v + tau2)
    )
    pi = np.where(ok, special.expit(-log_ratio), 0.0)
    omega = (1.0 - pi) + pi * s2 / (s2 + tau2)
    g = c.d_g * ok
    g_sum = float(g.sum())
    if g_sum > 0:
        gp = g * pi
        eps = float(np.clip(gp.sum() / g_sum, *_EPS_RANGE))
        if gp.sum() > 0:
            tau2 = max(float(np.sum(gp * (e * e - v)) / gp.sum()), tau2_floor)
    return _Outliers(omega=omega, clean=1.0 - pi, qfac=ones, pi=pi, eps=eps, tau2=tau2)


def _initial_mixture(
    c: _Cells, start: RemlEmFit, b: NDArray[np.float64], s0_2: float
) -> tuple[float, float]:
    """ε and τ² from the REML-EM's outliers (robust weight below 0.3, docs/estimator.md §6)."""
    w = start.row_weight[c.d_row]
    out = c.d_weighted & np.isfinite(w) & (w < _OUTLIER_WEIGHT)
    n_w = int(np.count_nonzero(c.d_weighted))
    eps = float(np.clip(out.sum() / max(n_w, 1), *_EPS_RANGE))
    tau2 = _TAU2_FLOOR * s0_2
    if np.any(out):
        r = c.d_m[out] - b[c.d_st[out]] - start.event_magnitude[c.d_ev[out]]
        tau2 = max(float(np.nanmean(r * r)) - s0_2, tau2)
    return eps, tau2


# ------------------------------------------------------------------------------------------
# Station step
# ------------------------------------------------------------------------------------------


@dataclass(slots=True, eq=False)
class _Moments:
    """E x and Var x of the kept non-detections and of the clipped cells."""

    ex_c: NDArray[np.float64]
    var_c: NDArray[np.float64]
    ex_u: NDArray[np.float64]
    var_u: NDArray[np.float64]


def nondetection_moments(
    mean: ArrayLike, sd: ArrayLike, bound: ArrayLike, soft_sd: float = 0.0
) -> tuple[NDArray[np.float64], NDArray[np.float64]]:
    """E x and Var x of x ~ N(mean, sd²) given a non-detection below ``bound``.

    With the soft threshold the detection probability of a value x is Φ((x − bound)/g), so a
    non-detection multiplies the density by Φ((bound − x)/g). With s = sqrt(sd² + g²),
    α = (bound − mean)/s and λ = φ(α)/Φ(α) [derived: the normal selection model; the
    skew-normal moments]:

        E x = mean − (sd²/s) λ,      Var x = sd² − (sd⁴/s²) λ(α + λ).

    ``soft_sd`` = 0 gives the truncated normal x < bound of docs/censoring.md §4 (Johnson, Kotz &
    Balakrishnan 1994, ch. 13 [from memory]; check values in docs/check-values.md §7).

    Parameters
    ----------
    mean, sd : array_like of float
        Location and scale of x (magnitude units); sd > 0.
    bound : array_like of float
        The threshold in the units of x.
    soft_sd : float, default=0.0
        g, the width of the soft threshold (magnitude units).

    Returns
    -------
    mean, variance : ndarray of float

    Examples
    --------
    docs/check-values.md §7 (verified against R mvrtn): N(100, 15²) below 80 has mean 73.02798 and
    variance 36.95043.

    >>> m, v = nondetection_moments(100.0, 15.0, 80.0)
    >>> round(float(m), 5), round(float(v), 5)
    (73.02798, 36.95043)
    """
    mu = np.asarray(mean, dtype=np.float64)
    s2 = np.asarray(sd, dtype=np.float64) ** 2
    s = np.sqrt(s2 + float(soft_sd) ** 2)
    alpha = (np.asarray(bound, dtype=np.float64) - mu) / s
    lam = inverse_mills_ratio(alpha)
    curv = np.clip(lam * (alpha + lam), 0.0, 1.0)
    ex = mu - (s2 / s) * lam
    var = np.maximum(s2 - (s2 * s2 / (s * s)) * curv, 0.0)
    return np.asarray(ex, dtype=np.float64), np.asarray(var, dtype=np.float64)


def _moments(
    c: _Cells, es: _EventStep, b: NDArray[np.float64], sigma2: NDArray[np.float64], soft_sd: float
) -> _Moments:
    st, ev = c.c_st, c.c_ev
    ex_c, var_c = nondetection_moments(b[st], np.sqrt(sigma2[st]), c.c_t - es.M[ev], soft_sd)
    if c.u_st.shape[0]:
        ex_u, var_u = truncated_normal_moments(
            b[c.u_st], np.sqrt(sigma2[c.u_st]), lower=c.u_m - es.M[c.u_ev]
        )
    else:
        ex_u = var_u = np.zeros(0)
    return _Moments(ex_c=ex_c, var_c=var_c, ex_u=ex_u, var_u=var_u)


def _b_step(
    c: _Cells,
    es: _EventStep,
    mom: _Moments,
    ow: _Outliers,
    sigma2: NDArray[np.float64],
    prior: EBPrior,
    mu0: float,
    active: NDArray[np.bool_],
    b_old: NDArray[np.float64],
) -> NDArray[np.float64]:
    cst, cg = c.c_st, c.c_g
    gw = c.d_g * ow.omega
    num = (
        c.per_station(c.d_st, gw * (c.d_m - es.M[c.d_ev]))
        + c.per_station(cst, cg * mom.ex_c)
        + c.per_station(c.u_st, c.u_g * mom.ex_u)
    )
    den = c.per_station(c.d_st, gw) + c.per_station(cst, cg) + c.per_station(c.u_st, c.u_g)
    ridge = sigma2 / prior.tau_b2 if np.isfinite(prior.tau_b2) else np.zeros_like(sigma2)
    tot = den + ridge
    ok = active & (tot > 0)
    b = b_old.copy()
    b[ok] = (num[ok] + ridge[ok] * mu0) / tot[ok]
    return b


@dataclass(slots=True, eq=False)
class _SigmaSums:
    """Per-unit sums of the σ-step: Σγ c (q + V) + Σγ E(x − b)², and Σγ c.

    ``q_data`` leaves out the REML term Σγ c V (the raw s² of the EB refresh).
    """

    q: NDArray[np.float64]
    q_data: NDArray[np.float64]
    n: NDArray[np.float64]


def _sigma_sums(
    c: _Cells,
    es: _EventStep,
    mom: _Moments,
    ow: _Outliers,
    b: NDArray[np.float64],
) -> _SigmaSums:
    in_c = c.sigma_event[c.c_ev]
    cst, cg = c.c_st[in_c], c.c_g[in_c]
    r = c.d_m - es.M[c.d_ev] - b[c.d_st]
    dg = c.d_g * ow.clean * c.sigma_event[c.d_ev]
    V = 1.0 / es.info[c.d_ev]
    q_det = c.per_station(c.d_st, dg * ow.qfac * r * r)
    v_det = c.per_station(c.d_st, dg * V)
    q_c = (mom.var_c + (mom.ex_c - b[c.c_st]) ** 2)[in_c]
    in_u = c.sigma_event[c.u_ev]
    q_u = (mom.var_u + (mom.ex_u - b[c.u_st]) ** 2)[in_u]
    ug = c.u_g[in_u]
    q = q_det + c.per_station(cst, cg * q_c) + c.per_station(c.u_st[in_u], ug * q_u)
    n = c.per_station(c.d_st, dg) + c.per_station(cst, cg) + c.per_station(c.u_st[in_u], ug)
    return _SigmaSums(q=q + v_det, q_data=q, n=n)


def _sensitivities(
    c: _Cells, es: _EventStep
) -> tuple[NDArray[np.float64], NDArray[np.float64], NDArray[np.float64]]:
    """Row shares w = ∂M̂_j/∂v of the detections (real rows only), kept C rows, clipped rows."""
    w_d, w_c, w_u = row_sensitivities(es.data, np.where(c.events, es.M, 0.0))
    return w_d[: c.d_row.shape[0]], w_c, w_u


def _dof(
    c: _Cells,
    es: _EventStep,
    ow: _Outliers,
    w: tuple[NDArray[np.float64], NDArray[np.float64], NDArray[np.float64]],
) -> NDArray[np.float64]:
    """d_i = Σ γ (1 − w_ij) over the cells of the σ-step (module docstring, step 5)."""
    w_d, w_c, w_u = w
    g_d = c.d_g * ow.clean * c.sigma_event[c.d_ev]
    g_c = c.c_g * c.sigma_event[c.c_ev]
    g_u = c.u_g * c.sigma_event[c.u_ev]
    weight = c.per_station(c.d_st, g_d) + c.per_station(c.c_st, g_c) + c.per_station(c.u_st, g_u)
    share = (
        c.per_station(c.d_st, g_d * w_d)
        + c.per_station(c.c_st, g_c * w_c)
        + c.per_station(c.u_st, g_u * w_u)
    )
    return effective_dof(weight, share)


# ------------------------------------------------------------------------------------------
# Anchoring and the information matrix
# ------------------------------------------------------------------------------------------


@dataclass(slots=True, eq=False)
class _Anchoring:
    cons: LevelConstraints
    component: NDArray[np.int64]  # per unit, -1 outside the fit
    event_component: NDArray[np.int64]
    kind: AnchorKind
    C: NDArray[np.float64]  # K × n_constraints
    B: NDArray[np.float64]


def _anchoring(
    obs: ObservationSet, start: RemlEmFit, anchor: Anchor, unit_station: NDArray[Any]
) -> _Anchoring:
    """The REML-EM's level constraints, rebuilt from the same inputs."""
    K, N = obs.n_stations, obs.n_events
    conn = start.connectivity
    comp = conn.component
    used = np.flatnonzero(np.isfinite(start.row_weight))
    ev_comp = np.full(N, -1, dtype=np.int64)
    ev_comp[obs.event[used]] = comp[obs.station[used]]
    unit_ids = np.asarray(obs.station_ids).astype(str)
    previous_match = None
    if anchor.previous is not None:
        previous_match = match_previous_units(
            anchor.previous,
            unit_ids,
            unit_station=unit_station,
            row_unit=obs.station[used],
            row_time=obs.event_time[obs.event[used]],
            row_weight=start.gamma[obs.event[used]],
        )
    cons = level_constraints(
        anchor,
        unit_ids=unit_ids,
        unit_station=unit_station,
        weight_sum=start.weight_sum,
        component=comp,
        n_components=conn.n_components,
        event_ids=obs.event_ids,
        event_in_component=ev_comp,
        previous_match=previous_match,
    )
    C = np.zeros((K, cons.n_constraints))
    sel = cons.group >= 0
    C[np.flatnonzero(sel), cons.group[sel]] = cons.weight[sel]
    return _Anchoring(
        cons=cons, component=comp, event_component=ev_comp, kind=anchor.kind, C=C, B=cons.target
    )


def _reanchor(
    b: NDArray[np.float64], M: NDArray[np.float64], an: _Anchoring, gamma: NDArray[np.float64]
) -> tuple[NDArray[np.float64], NDArray[np.float64]]:
    """Shift b (and M the opposite way) by one constant per component to meet the anchor."""
    comp, ec = an.component, an.event_component
    n_c = max(int(comp.max(initial=-1)) + 1, 1)
    shift = np.zeros(n_c)
    in_fit = comp >= 0
    if an.cons.median:
        moved = recentre_median(b, an.cons, comp) - b
        shift[comp[in_fit]] = moved[in_fit]
    elif an.C.shape[1]:
        g = an.cons.group
        sel = g >= 0
        wsum = np.bincount(g[sel], weights=an.cons.weight[sel], minlength=an.C.shape[1])
        delta = (an.B - an.C.T @ b) / np.where(wsum > 0, wsum, 1.0)
        shift[comp[sel]] = delta[g[sel]]
    if an.kind is AnchorKind.MEAN_MAGNITUDE:
        # A4: the γ-weighted mean of M̂ over each component's fitted events is the target.
        ok = (ec >= 0) & np.isfinite(M)
        gs = np.bincount(ec[ok], weights=gamma[ok], minlength=n_c)
        level = np.bincount(ec[ok], weights=(gamma * M)[ok], minlength=n_c)
        has = gs > 0
        shift[has] += level[has] / gs[has] - an.cons.mean_magnitude
    b_out = b.copy()
    b_out[in_fit] += shift[comp[in_fit]]
    M_out = M.copy()
    ok_e = ec >= 0
    M_out[ok_e] -= shift[ec[ok_e]]
    return b_out, M_out


def _information(
    c: _Cells, es: _EventStep
) -> tuple[NDArray[np.float64], sparse.csr_matrix, NDArray[np.float64]]:
    """D = diag(Σ_j γ h), X (events × units, entries h) and g_j = γ_j/I_j (module docstring)."""
    w_d, w_c, w_u = _sensitivities(c, es)
    ev = np.concatenate([c.d_ev, c.c_ev, c.u_ev])
    st = np.concatenate([c.d_st, c.c_st, c.u_st])
    h = np.concatenate([w_d, w_c, w_u]) * es.info[ev]
    D = c.per_station(st, c.g_ev[ev] * h)
    X = sparse.csr_matrix((h, (ev, st)), shape=(c.n_ev, c.n_st))
    g = np.zeros(c.n_ev)
    ok = c.events & (es.info > 0)
    g[ok] = c.g_ev[ok] / es.info[ok]
    return D, X, g


def _diagonal_information(c: _Cells, es: _EventStep) -> NDArray[np.float64]:
    """Diagonal of the profiled information, Σγh − Σ g h² per unit (docs/estimator.md §5.2)."""
    D, X, g = _information(c, es)
    return np.asarray(D - np.asarray(X.multiply(X).T @ g).ravel(), dtype=np.float64)


def _bias_covariance(
    c: _Cells,
    es: _EventStep,
    prior: EBPrior,
    active: NDArray[np.bool_],
    an: _Anchoring,
    dense_cov_max: int,
) -> tuple[NDArray[np.float64], NDArray[np.float64] | None]:
    """Var(b̂) (and Cov(b̂) up to ``dense_cov_max`` units) from the bordered information."""
    ridge = 1.0 / prior.tau_b2 if np.isfinite(prior.tau_b2) else 0.0
    idx = np.flatnonzero(active)
    var = np.full(c.n_st, np.nan)
    if idx.shape[0] > dense_cov_max:
        diag = _diagonal_information(c, es) + ridge
        var[idx] = 1.0 / np.maximum(diag[idx], np.finfo(float).tiny)
        return var, None
    D, X, g = _information(c, es)
    Xa = X[:, idx]
    Xg = Xa.multiply(g[:, None]).tocsr()
    A = -(Xa.T @ Xg).toarray()
    A[np.diag_indices_from(A)] += D[idx] + ridge
    Cc = an.C[idx]
    Cc = Cc[:, np.any(Cc != 0.0, axis=0)]
    n, m = A.shape[0], Cc.shape[1]
    bordered = np.zeros((n + m, n + m))
    bordered[:n, :n] = A
    bordered[:n, n:] = Cc
    bordered[n:, :n] = Cc.T
    inv = linalg.inv(bordered, check_finite=False)[:n, :n]
    cov_a = 0.5 * (inv + inv.T)
    var[idx] = np.maximum(np.diag(cov_a), 0.0)
    cov = np.diag(np.nan_to_num(var))
    cov[np.ix_(idx, idx)] = cov_a
    return var, cov


def _anchor_result(base: AnchorResult, an: _Anchoring, b: NDArray[np.float64]) -> AnchorResult:
    """The warm start's anchor result with the level recomputed from the new biases."""
    ref_w = an.cons.reference_weight
    if not np.any(ref_w > 0) or an.kind not in (AnchorKind.REFERENCE_SET, AnchorKind.MEDIAN):
        return base
    return dataclasses.replace(base, value=anchor_level(an.kind, ref_w, b, base.value))


# ------------------------------------------------------------------------------------------
# The fit (convergence and extrapolation: fusion.model.fit_steps)
# ------------------------------------------------------------------------------------------


def _check(
    soft_threshold_sd: float,
    min_detection_probability: float,
    outliers: str,
    nu: float,
    max_iter: int,
    tol_bias: float,
    tol_log_sigma: float,
    eb_every: int,
) -> None:
    where = "fit_censored_stations"
    if not (soft_threshold_sd >= 0 and np.isfinite(soft_threshold_sd)):
        raise parameter_error(
            where, "soft_threshold_sd", "a float in the range [0, inf)", soft_threshold_sd
        )
    if not (0 <= min_detection_probability < 1):
        raise parameter_error(
            where,
            "min_detection_probability",
            "a float in the range [0, 1)",
            min_detection_probability,
        )
    if outliers not in ("mixture", "student_t", "none"):
        raise parameter_error(where, "outliers", "one of 'mixture', 'student_t', 'none'", outliers)
    check_iteration_parameters(
        where, nu=nu, max_iter=max_iter, tol_bias=tol_bias, tol_log_sigma=tol_log_sigma
    )
    if not (isinstance(eb_every, int | np.integer) and eb_every >= 0):
        raise parameter_error(where, "eb_every", "an int in the range [0, inf)", eb_every)


def fit_censored_stations(
    obs: ObservationSet,
    start: RemlEmFit,
    *,
    anchor: Anchor,
    gamma: NDArray[np.float64] | None = None,
    unit_station: NDArray[Any] | None = None,
    soft_threshold_sd: float = 0.0,
    min_detection_probability: float = 0.01,
    outliers: OutlierModel = "mixture",
    nu: float = 4.0,
    max_iter: int = 200,
    tol_bias: float = 1e-4,
    tol_log_sigma: float = 1e-3,
    eb_every: int = 10,
    newton_max_iter: int = 20,
    dense_cov_max: int = 3000,
    accelerate: bool = True,
) -> CensoredStationFit:
    """Fit station biases and variances on detections, non-detections and clipped readings.

    Parameters
    ----------
    obs : ObservationSet
        The observations ``start`` was fitted on (same unit and event tables), with
        non-detection rows carrying ``threshold`` (magnitude units, same scale and bias
        convention as the station magnitudes) and clipped detections flagged.
    start : RemlEmFit
        The detections-only profiled REML-EM fit (:func:`fusion.model.reml_em.fit_reml_em`): warm
        start, priors, robust weights, flagged pairs, connectivity and anchor weights.
    anchor : Anchor
        The anchor ``start`` was fitted with (same reference set and previous model).
    gamma : ndarray, shape (N,), optional
        Event weights γ_j >= 0 (forgetting); default ``start.gamma``.
    unit_station : ndarray of str, shape (K,), optional
        Station of each unit; default the part of the unit id before ``@``.
    soft_threshold_sd : float, default=0.0
        g of the soft detection threshold, magnitude units (0: hard threshold).
    min_detection_probability : float, default=0.01
        Non-detections whose station would have detected the event (at the current M̂_j and
        b_i) with at most this probability are left out of C in that iteration.
    outliers : {"mixture", "student_t", "none"}, default="mixture"
        Model of outlying detections (module docstring, step 2).
    nu : float, default=4.0
        Degrees of freedom of the ``"student_t"`` weights.
    max_iter : int, default=200
    tol_bias, tol_log_sigma : float, default=1e-4, 1e-3
        Stop when the estimated distance to the fixed point of b (magnitude units) and of
        log σ falls below these.
    eb_every : int, default=10
        Refresh the EB priors after the second iteration and every ``eb_every``; 0 keeps
        ``start.prior``.
    newton_max_iter : int, default=20
        Newton steps per event step at most.
    dense_cov_max : int, default=3000
        Up to this many fitted units Cov(b̂) is exact (dense bordered inverse).
    accelerate : bool, default=True
        SQUAREM extrapolation when the iteration crawls (module docstring).

    Returns
    -------
    CensoredStationFit

    Raises
    ------
    ConfigError
        A parameter is out of range, or ``gamma`` / ``start`` do not match ``obs``.
    InsufficientDataError
        No event holds a detection of a fitted unit together with another cell.

    Warns
    -----
    ConvergenceWarning
        ``max_iter`` reached before the tolerances.

    Notes
    -----
    With neither non-detections nor clipped readings and ``outliers="none"`` the fixed point
    is the REML-EM's Gaussian one [derived: the event step is then the GLS and the station
    step the unprofiled EM of docs/estimator.md §4]; ``tests/fusion/model/test_censored_fit.py``
    checks it.
    """
    _check(
        soft_threshold_sd,
        min_detection_probability,
        outliers,
        nu,
        max_iter,
        tol_bias,
        tol_log_sigma,
        eb_every,
    )
    c, an, g_all = _cells_and_anchoring(obs, start, anchor, gamma, unit_station, outliers)
    opt = _Options(
        start=start,
        an=an,
        gamma=g_all,
        active=start.connectivity.component >= 0,
        mu0=float(an.cons.prior_mean),
        soft=float(soft_threshold_sd),
        p_min=float(min_detection_probability),
        outliers=outliers,
        nu=float(nu),
        kappa=t_weight_consistency(float(nu)) if outliers == "student_t" else 1.0,
        max_iter=max_iter,
        tol_bias=tol_bias,
        tol_log_sigma=tol_log_sigma,
        eb_every=eb_every,
        newton_max_iter=newton_max_iter,
        accelerate=accelerate,
    )
    st = _starting_state(c, opt)
    _iterate(st, opt)
    if not st.converged:
        warnings.warn(
            f"fit_censored_stations stopped at max_iter={max_iter} before the distance to the "
            f"fixed point fell below tol_bias={tol_bias} and tol_log_sigma={tol_log_sigma}; "
            "raise max_iter or loosen the tolerances",
            ConvergenceWarning,
            stacklevel=2,
        )
    return _result(obs, st, opt, dense_cov_max)


def _cells_and_anchoring(
    obs: ObservationSet,
    start: RemlEmFit,
    anchor: Anchor,
    gamma: NDArray[np.float64] | None,
    unit_station: NDArray[Any] | None,
    outliers: OutlierModel,
) -> tuple[_Cells, _Anchoring, NDArray[np.float64]]:
    """Check ``start`` and ``gamma`` against ``obs``; build the cells and the anchoring."""
    K, N = obs.n_stations, obs.n_events
    if start.bias.shape != (K,) or start.event_magnitude.shape != (N,):
        raise ConfigError(
            f"start was fitted on {start.bias.shape[0]} units and "
            f"{start.event_magnitude.shape[0]} events, obs has {K} and {N}; "
            "pass the REML-EM fit of the same observations"
        )
    g_all = start.gamma if gamma is None else np.asarray(gamma, dtype=np.float64)
    if g_all.shape != (N,) or not np.all(np.isfinite(g_all) & (g_all >= 0)):
        raise ConfigError(f"gamma must hold {N} finite weights >= 0, one per event")
    u_station = (
        unit_station_ids(obs.station_ids) if unit_station is None else np.asarray(unit_station)
    )
    active = start.connectivity.component >= 0
    ref_mean, ref_prec = reference_event_priors(anchor, obs.event_ids)
    ref_prec = np.where(g_all > 0, ref_prec, 0.0)
    c = _cells(obs, g_all, active, ref_mean, ref_prec, start.pairs, outliers == "none")
    if c.d_row.shape[0] == 0:
        raise InsufficientDataError(
            f"no {obs.magnitude_type} event holds a detection of a fitted station together "
            "with another reading or non-detection; the censored fit has nothing to use"
        )
    return c, _anchoring(obs, start, anchor, u_station), g_all


@dataclass(slots=True, eq=False)
class _Options:
    """Inputs and options that stay fixed during the iterations of one censored fit."""

    start: RemlEmFit
    an: _Anchoring
    gamma: NDArray[np.float64]
    active: NDArray[np.bool_]
    mu0: float
    soft: float
    p_min: float
    outliers: OutlierModel
    nu: float
    kappa: float
    max_iter: int
    tol_bias: float
    tol_log_sigma: float
    eb_every: int
    newton_max_iter: int
    accelerate: bool


@dataclass(slots=True, eq=False)
class _State:
    """The iterate of the censored fit; ``c`` holds the currently selected censored cells."""

    c_all: _Cells
    c: _Cells
    b: NDArray[np.float64]
    sigma2: NDArray[np.float64]
    M: NDArray[np.float64]
    omega: NDArray[np.float64]
    eps: float
    tau2: float
    prior: EBPrior
    tau2_floor: float
    n_iter: int = 0
    converged: bool = False


def _starting_state(c: _Cells, opt: _Options) -> _State:
    """Warm start from the REML-EM fit: b, σ², priors, mixture, weights and M̂ (module doc)."""
    start = opt.start
    b = start.bias.astype(np.float64).copy()
    sigma2 = start.sigma2.astype(np.float64).copy()
    prior = start.prior
    eps, tau2 = _initial_mixture(c, start, b, prior.s0_2)
    omega = np.ones(c.d_row.shape[0])
    if opt.outliers != "none":
        w0 = start.row_weight[c.d_row]
        omega = np.where(np.isfinite(w0), np.minimum(w0, 1.0), 1.0)
    M = _initial_magnitudes(c, start, b, sigma2, omega)
    if opt.p_min > 0.0:
        c = _drop_hopeless(c, M, b, sigma2, opt.soft)
    return _State(
        c_all=c,
        c=c,
        b=b,
        sigma2=sigma2,
        M=M,
        omega=omega,
        eps=eps,
        tau2=tau2,
        prior=prior,
        tau2_floor=_TAU2_FLOOR * prior.s0_2,
    )


def _event_and_outlier_step(st: _State, opt: _Options) -> tuple[_EventStep, _Outliers]:
    """Steps 1–2: event step, outlier weights, and the event step again with the new weights."""
    pairs = opt.start.pairs
    es = _event_step(st.c, st.b, st.sigma2, st.omega, st.M, pairs, opt.soft, opt.newton_max_iter)
    ow = _outlier_weights(
        st.c, es, st.b, st.sigma2, opt.outliers, opt.nu, opt.kappa, st.eps, st.tau2, st.tau2_floor
    )
    if opt.outliers != "none":
        es = _event_step(
            st.c, st.b, st.sigma2, ow.omega, es.M, pairs, opt.soft, opt.newton_max_iter
        )
    return es, ow


def _iterate(st: _State, opt: _Options) -> None:
    """The generalised ECM iterations with EB refreshes and SQUAREM jumps (module docstring)."""
    active = opt.active
    tracker = ConvergenceTracker()
    extrapolation = Extrapolation(tracker, enabled=opt.accelerate, max_alpha=_MAX_ALPHA)
    eb_on = opt.eb_every > 0
    for it in range(opt.max_iter):
        st.n_iter = it + 1
        # C is re-selected in the first iterations and at each EB refresh, and held fixed in
        # between: a non-detection near the probability cut-off would otherwise flip in and
        # out and the iteration would cycle instead of converging.
        if it < _RESELECT_ITERATIONS or (eb_on and (it + 1) % opt.eb_every == 0):
            st.c = _select_censored(st.c_all, st.M, st.b, st.sigma2, opt.soft, opt.p_min)
        es, ow = _event_and_outlier_step(st, opt)
        st.M, st.omega, st.eps, st.tau2 = es.M, ow.omega, ow.eps, ow.tau2
        c = st.c
        mom = _moments(c, es, st.b, st.sigma2, opt.soft)
        b_new = _b_step(c, es, mom, ow, st.sigma2, st.prior, opt.mu0, active, st.b)
        b_new, st.M = _reanchor(b_new, st.M, opt.an, opt.gamma)
        ss = _sigma_sums(c, es, mom, ow, b_new)
        sigma2_new = moderated_variance(st.prior, (ss.q,), ss.n, where=active, previous=st.sigma2)
        db = float(np.max(np.abs(b_new - st.b)[active], initial=0.0))
        dls = float(np.max(np.abs(0.5 * np.log(sigma2_new / st.sigma2))[active], initial=0.0))
        tracker.add(db, dls)
        st.b, st.sigma2 = b_new, sigma2_new
        err_b, err_s = tracker.distance()
        done = it >= 2 and err_b < opt.tol_bias and err_s < opt.tol_log_sigma
        if refresh_due(it, opt.eb_every) or (done and eb_on):
            new_prior = _refresh_prior(c, es, ow, ss, st.b, st.prior, opt.mu0, active)
            stable = prior_stable(st.prior, new_prior, opt.tol_log_sigma)
            st.prior = new_prior
            st.tau2_floor = _TAU2_FLOOR * new_prior.s0_2
            if not stable:
                extrapolation.reset()
                if done:
                    continue
        if done:
            st.converged = True
            return
        theta = np.concatenate([st.b[active], np.log(st.sigma2[active])])
        jumped = extrapolation.after_step(max(db, dls), theta, tracker.max_rate)
        if jumped is not None:
            _install_jump(st, opt, jumped)


def _install_jump(st: _State, opt: _Options, jumped: NDArray[np.float64]) -> None:
    """Set (b, log σ²) of the active units to a SQUAREM iterate and re-anchor."""
    active = opt.active
    n_a = int(active.sum())
    b = st.b.copy()
    b[active] = jumped[:n_a]
    log_s0 = np.log(st.prior.s0_2)
    sigma2 = st.sigma2.copy()
    sigma2[active] = np.exp(np.clip(jumped[n_a:], log_s0 - 12.0, log_s0 + 12.0))
    st.sigma2 = sigma2
    st.b, st.M = _reanchor(b, st.M, opt.an, opt.gamma)


def _result(
    obs: ObservationSet, st: _State, opt: _Options, dense_cov_max: int
) -> CensoredStationFit:
    """Final event step and the outputs at the final parameters (weights and C held fixed)."""
    c, start, an, active, outliers = st.c, opt.start, opt.an, opt.active, opt.outliers
    b, sigma2, M, omega, eps, tau2 = st.b, st.sigma2, st.M, st.omega, st.eps, st.tau2
    prior, soft, newton_max_iter, gamma, nu = (
        st.prior,
        opt.soft,
        opt.newton_max_iter,
        opt.gamma,
        opt.nu,
    )
    n_iter, converged = st.n_iter, st.converged
    K, N = obs.n_stations, obs.n_events
    es = _event_step(c, b, sigma2, omega, M, start.pairs, soft, newton_max_iter)
    # A4 holds for the final M̂ exactly after one more constant shift (M + b unchanged, so the
    # event step's data stay valid); for the other anchors the shift is zero.
    b, M = _reanchor(b, es.M, an, gamma)
    es.M = M
    kappa = t_weight_consistency(nu) if outliers == "student_t" else 1.0
    ow = _outlier_weights(c, es, b, sigma2, outliers, nu, kappa, eps, tau2, tau2)
    ow.omega = omega  # report the weights the final event step used
    mom = _moments(c, es, b, sigma2, soft)
    ss = _sigma_sums(c, es, mom, ow, b)
    w = _sensitivities(c, es)
    dof = _dof(c, es, ow, w)
    raw = raw_variance(ss.q_data, dof)
    bias_var, bias_cov = _bias_covariance(c, es, prior, active, an, dense_cov_max)
    out = ~active
    bias_var[out] = start.bias_var[out]
    if bias_cov is not None and np.any(out):
        idx = np.flatnonzero(out)
        bias_cov[idx, idx] = start.bias_var[idx]
    n_det = np.bincount(c.d_st, minlength=K).astype(np.int64)
    n_nd = np.bincount(c.c_st, minlength=K).astype(np.int64)
    n_clip = np.bincount(c.u_st, minlength=K).astype(np.int64)
    wsum = (
        c.per_station(c.d_st, c.d_g) + c.per_station(c.c_st, c.c_g) + c.per_station(c.u_st, c.u_g)
    )
    ev_var = np.full(N, np.nan)
    ev_var[c.events] = 1.0 / es.info[c.events]
    kind = np.zeros(obs.n_obs, dtype=np.int8)
    kind[c.d_row] = 1
    kind[c.c_row] = 2
    kind[c.u_row] = 3
    row_w = np.full(obs.n_obs, np.nan)
    row_w[c.d_row] = omega
    p_out = np.full(obs.n_obs, np.nan)
    if ow.pi is not None:
        p_out[c.d_row] = ow.pi
    sens = np.full(obs.n_obs, np.nan)
    sens[c.d_row] = w[0]
    sens[c.c_row] = w[1]
    sens[c.u_row] = w[2]
    resid = np.full(obs.n_obs, np.nan)
    resid[c.d_row] = c.d_m - b[c.d_st] - M[c.d_ev]
    mixture = outliers == "mixture"
    return CensoredStationFit(
        station_ids=obs.station_ids,
        bias=b,
        bias_var=bias_var,
        bias_cov=bias_cov,
        sigma2=sigma2,
        raw_s2=raw,
        dof=dof,
        n_detections=n_det,
        n_nondetections=n_nd,
        n_clipped=n_clip,
        weight_sum=wsum,
        event_magnitude=np.where(c.events, M, np.nan),
        event_variance=ev_var,
        event_used=c.events.copy(),
        event_nondetections=np.bincount(c.c_ev, minlength=N).astype(np.int64),
        row_kind=kind,
        row_weight=row_w,
        outlier_probability=p_out,
        row_sensitivity=sens,
        residual=resid,
        prior=prior,
        outlier_share=eps if mixture else float("nan"),
        outlier_variance=tau2 if mixture else float("nan"),
        anchor=_anchor_result(start.anchor, an, b),
        n_iter=n_iter,
        converged=converged,
        soft_threshold_sd=soft,
    )


def _initial_magnitudes(
    c: _Cells,
    start: RemlEmFit,
    b: NDArray[np.float64],
    sigma2: NDArray[np.float64],
    omega: NDArray[np.float64],
) -> NDArray[np.float64]:
    """The REML-EM's M̂_j, and the weighted mean of the detections for the other events."""
    a = omega / sigma2[c.d_st]
    P = np.bincount(c.d_ev, weights=a, minlength=c.n_ev)
    num = np.bincount(c.d_ev, weights=a * (c.d_m - b[c.d_st]), minlength=c.n_ev)
    gls = np.full(c.n_ev, np.nan)
    has = P > 0
    gls[has] = num[has] / P[has]
    M = np.where(np.isfinite(start.event_magnitude), start.event_magnitude, gls)
    if c.ref_ev.shape[0]:
        hard = c.ref_prec >= _HARD_PRECISION
        M[c.ref_ev[hard]] = c.ref_mean[hard]
    return np.asarray(np.where(c.events, M, np.nan), dtype=np.float64)


def _refresh_prior(
    c: _Cells,
    es: _EventStep,
    ow: _Outliers,
    ss: _SigmaSums,
    b: NDArray[np.float64],
    prior: EBPrior,
    mu0: float,
    active: NDArray[np.bool_],
) -> EBPrior:
    """EB refresh of (d0, s0², τ_b²) (module docstring, step 5)."""
    return refresh_prior(
        ss.q_data,
        _dof(c, es, ow, _sensitivities(c, es)),
        _diagonal_information(c, es),
        b,
        c.per_station(c.d_st, c.d_g),
        prior,
        mu0,
        where=active,
    )


# ------------------------------------------------------------------------------------------
# Leave-one-out predictors for the detection curves
# ------------------------------------------------------------------------------------------


def loo_predictor(obs: ObservationSet, fit: RemlEmFit | CensoredStationFit) -> NDArray[np.float64]:
    """μ_ij = M̂_j^(−i) + b̂_i for every row: the predictor of the detection curves.

    For a :class:`~fusion.model.reml_em.RemlEmFit` the detections get the exact GLS leave-one-out
    estimate (docs/network-magnitude.md §7) and the non-detections the event's M̂_j (which they did
    not enter). For a :class:`CensoredStationFit` a row's own likelihood term is removed by one
    Newton step, M̂^(−i) = M̂ − g_i/(I_j − h_i), g_i and h_i the row's score and curvature at M̂_j
    [derived]; rows whose event has nothing else get NaN.

    Parameters
    ----------
    obs : ObservationSet
        The observations the fit was made on.
    fit : RemlEmFit or CensoredStationFit

    Returns
    -------
    ndarray, shape (nnz,)
        Magnitude units; NaN where undefined.
    """
    from fusion.network.event_gls import event_gls

    out = np.full(obs.n_obs, np.nan)
    st_all = obs.station
    if isinstance(fit, RemlEmFit):
        rows = np.flatnonzero(np.isfinite(fit.row_weight))
        st = st_all[rows]
        s2 = fit.sigma2[st] / fit.row_weight[rows]
        g = event_gls(obs.event[rows], st, obs.magnitude[rows] - fit.bias[st], s2, obs.n_events)
        out[rows] = g.loo_magnitude + fit.bias[st]
        nd = np.flatnonzero(~obs.detected & fit.event_used[obs.event])
        out[nd] = fit.event_magnitude[obs.event[nd]] + fit.bias[st_all[nd]]
        return out
    M, V = fit.event_magnitude, fit.event_variance
    with np.errstate(invalid="ignore", divide="ignore"):
        info = 1.0 / V
    used = fit.event_used[obs.event]
    ev = obs.event
    b = fit.bias[st_all]
    s2 = fit.sigma2[st_all]
    soft2 = fit.soft_threshold_sd**2
    # Rows in the likelihood: detections (kind 1), kept non-detections (2), clipped (3).
    score = np.zeros(obs.n_obs)
    curv = np.zeros(obs.n_obs)
    det = fit.row_kind == 1
    a = np.where(det, fit.row_weight, 0.0) / s2
    r = obs.magnitude - b - M[ev]
    score[det] = (a * r)[det]
    curv[det] = a[det]
    cen = np.flatnonzero(fit.row_kind == 2)
    if cen.shape[0]:  # ℓ_i = log Φ(z), z = (t − b − M)/s: score −λ/s
        s_c = np.sqrt(s2[cen] + soft2)
        z = (obs.threshold[cen] - b[cen] - M[ev[cen]]) / s_c
        lam = inverse_mills_ratio(z)
        score[cen] = -lam / s_c
        curv[cen] = np.clip(lam * (z + lam), 0.0, 1.0) / s_c**2
    clip = np.flatnonzero(fit.row_kind == 3)
    if clip.shape[0]:  # ℓ_i = log Φ(z), z = (M + b − u)/σ: score +λ/σ
        s_u = np.sqrt(s2[clip])
        z = (M[ev[clip]] + b[clip] - obs.magnitude[clip]) / s_u
        lam = inverse_mills_ratio(z)
        score[clip] = lam / s_u
        curv[clip] = np.clip(lam * (z + lam), 0.0, 1.0) / s_u**2
    rest = info[ev] - curv
    ok = used & (rest > 1e-12 * info[ev])
    with np.errstate(invalid="ignore", divide="ignore"):
        loo = M[ev] - score / rest
    out[ok] = (loo + b)[ok]
    # Non-detections left out of C and other rows of the event: the event's M̂ as is.
    plain = used & (fit.row_kind == 0) & ~obs.detected
    out[plain] = (M[ev] + b)[plain]
    return out
