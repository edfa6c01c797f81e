"""Profiled REML-type EM for station biases and error variances (docs/estimator.md §2, §3).

Model (docs/model.md §2): m_ij = M_j + b_i + e_ij, Var e_ij = σ_i², Cov(e_kj, e_lj) = c_kl for
flagged pairs, errors independent across events. The event magnitudes are integrated out under a
flat prior (REML for this model, Harville 1977 [from memory]), which removes the Neyman–Scott bias
of treating M_j as free parameters (naive reweighting collapses, worked examples E8, E9).

One iteration (an ECM sequence, docs/estimator.md §4):

1. **b-step.** W_j = Σ_j⁻¹ with s_i² = σ_i²/ω_ij on the diagonal and c_kl for a flagged pair
   present in the event (closed-form 2×2 inverses). Profiling M_j out gives the Schur
   complement L_j = W_j − W_j11'W_j/(1'W_j1), L_j1 = 0, and the normal equations

       A b = r,  A = Σ_j γ_j L_j + diag(1/τ_b²),  r = Σ_j γ_j L_j m_j + μ0/τ_b²,

   solved under one level constraint per connected component (:mod:`fusion.model.anchors`) by the
   bordered system [A C; C' 0][b; λ] = [r; B]. With X the sparse N×K matrix of the row
   weights a_ij = (W_j1)_i, A = diag(Σγ W_ii) + (pair off-diagonals) − X' diag(γ/P) X: either
   one sparse product and a dense factorisation (``solver="direct"``) or projected
   preconditioned conjugate gradients on the implicit operator, O(nnz) per product
   (``solver="pcg"``, Gould, Hribar & Nocedal 2001 [from memory]).
   Reference events (anchor A3) add a prior precision π_j on M_j: L_j uses P_j + π_j and r
   gains γ_j a_ij π_j M*_j/(P_j + π_j); a hard constraint (π = ∞) makes L_j = W_j.
2. **E-step.** P_j = 1'W_j1, M̂_j = 1'W_j(m_j − b)/P_j, V_j = 1/P_j (with π_j as above).
3. **Robust weights** (events with n_j >= 3 only, docs/estimator.md §6): leave-one-station-out
   u_ij = (m_ij − b_i − M̂_j^(−i))/sqrt(σ_i² + V_j^(−i)), ω_ij = (ν + 1)/(ν + u_ij²); a flagged
   pair is left out as a block. The first weights are centred on the per-event weighted median
   instead of M̂^(−i) (docs/estimator.md §6: start robust IRLS from the weighted median).
4. **σ-step.** σ_i² = (d0 s0² + Σ_j γ_j (q_ij + V_j)) / (d0 + Σ_j γ_j), q_ij = r_ij² for
   unweighted rows and ω_ij r_ij²/κ_ν for robust rows; flagged covariances
   c_kl = Σ γ (r_kj r_lj + V_j)/Σ γ over shared events, shrunk by n/(n + n0) and capped at
   |ρ| <= 0.9 min(σ_k/σ_l, σ_l/σ_k) (docs/pairs.md §4).
5. Every ``eb_every`` iterations (and once after the first) the priors (d0, s0², τ_b²) are
   refreshed by :mod:`fusion.model.eb_priors`.

Convergence: the estimated distances to the fixed point of b and log σ (the last step
max|Δb|, max|Δ log σ| scaled by ρ/(1 − ρ), ρ the observed linear rate, at least the step itself)
fall below ``tol_bias`` and ``tol_log_sigma``, with the priors stable (σ of stations in
bipartite components, which the data do not identify, get the plain step test); otherwise a
:class:`~stations.errors.ConvergenceWarning` at ``max_iter``. The plain step test
(docs/estimator.md §7.2) stops a slowly converging fit (small networks with very unequal σ,
ρ ≈ 0.96) about 3 % short in σ (measured), hence the rate correction. When the observed rate exceeds
0.6, log σ² is extrapolated from three consecutive iterates by SQUAREM (Varadhan & Roland 2008,
scheme S3, the acceleration docs/estimator.md §4 names); the following EM step is the stabilising
step, and an overshoot (a next step more than twice the last) halves the largest extrapolation
allowed. Extrapolation changes the path, not the fixed point.

**Scale consistency of the robust σ-step** (a deliberate refinement of the textbook step,
docs/estimator.md §7.1, which writes Σγω(r² + V)). With Gaussian errors the Student-t EM scale
converges to about 0.69 σ² for ν = 4 (the fixed point c = E[(ν+1)X²/(ν + X²/c)], X ~ N(0, 1),
computed by quadrature), so σ̂/σ ≈ 0.83 and the event SEs shrink (measured on the simulator of
docs/simulation.md: median σ̂/σ 0.85, 68 % coverage 0.59). In the diagonal case
r_ij = (1 − w_ij)(y_ij − M̂_j^(−i)), so r_ij² = σ_i²(1 − w_ij) u_ij² [derived],
E[ω r²] = κ_ν (σ_i² − V_j) with κ_ν = E[ω(X)X²] (0.7863 for ν = 4), and
E[ω r²/κ_ν + V_j] = σ_i² at the Gaussian truth (Fisher consistency of a weighted scale estimate:
Huber 1981 [from memory]). ``scale_consistency=False`` gives the textbook form for comparison.

Fixed point [derived]: without robust weights the σ-step settles where
σ_i² = (d0 s0² + d_i s_i²)/(d0 + d_i) with d_i = Σγ(1 − w_ij) and s_i² = Σγ r²/d_i, i.e. at
Smyth's moderated variance (docs/estimator.md §5); with two stations only it leaves any split of
σ_1² + σ_2² unchanged (E8).

No Python loop runs over events or rows: rows are sorted by event, so per-event sums are
``np.add.reduceat`` segment sums, per-station sums ``np.bincount`` over station codes, products
with X CSR/CSC mat-vecs (loops run over iterations, CG steps and components only).

References
----------
Harville D. A. (1977). Maximum likelihood approaches to variance component estimation and to
related problems. JASA 72:320–338 [from memory].
Neyman J., Scott E. L. (1948). Consistent estimates based on partially consistent
observations. Econometrica 16:1–32 [from memory].
Smyth G. K. (2004). Statistical Applications in Genetics and Molecular Biology 3(1), Art. 3.
Lange K. L., Little R. J. A., Taylor J. M. G. (1989). Robust statistical modeling using the t
distribution. JASA 84:881–896 (EM for the t model) [from memory].
Huber P. J. (1981). Robust Statistics. Wiley [from memory].
Varadhan R., Roland C. (2008). Simple and globally convergent methods for accelerating the
convergence of any EM algorithm. Scand. J. Stat. 35:335–353 [from memory].
Dempster A. P., Laird N. M., Rubin D. B. (1977). Maximum likelihood from incomplete data via the
EM algorithm. JRSS-B 39:1–38 [from memory].
Gould N. I. M., Hribar M. E., Nocedal J. (2001). On the solution of equality constrained
quadratic programming problems arising in optimization. SIAM J. Sci. Comput. 23:1376–1395
[from memory].
"""

from __future__ import annotations

import dataclasses
import warnings
from collections.abc import Callable
from dataclasses import dataclass
from typing import Any, Literal

import numpy as np
from numpy.typing import NDArray
from scipy import linalg, sparse

from fusion.model.anchors import (
    Anchor,
    AnchorKind,
    AnchorResult,
    LevelConstraints,
    level_constraints,
    recentre_median,
    reference_event_priors,
)
from fusion.model.connectivity import Connectivity, connectivity_report
from fusion.model.eb_priors import (
    DEFAULT_D0,
    DEFAULT_TAU_B2,
    EBPrior,
    initial_error_variance,
    prior_stable,
)
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
from fusion.model.forgetting import WarmStart, match_previous_units, unit_station_ids, warm_start
from fusion.model.parameters import StationParameters
from fusion.network.gls_blocks import PairCovariance, pair_partner_rows
from fusion.observations import ObservationSet
from stations.errors import ConfigError, ConvergenceWarning, InsufficientDataError

__all__ = ["RemlEmFit", "fit_reml_em", "t_weight_consistency"]  # κ_ν: fusion.model.fit_steps

Solver = Literal["auto", "direct", "pcg"]

#: Largest |ρ| of a flagged pair as a fraction of min(σ_k/σ_l, σ_l/σ_k)
#: (docs/pairs.md §4).
RHO_CAP = 0.9
#: Inside one event a 2×2 block must stay positive definite after robust reweighting:
#: |c| <= this × sqrt(s_k² s_l²).
_BLOCK_CAP = 0.95
#: Solver "auto" uses the direct solver while the sparse product X'GX costs at most this many
#: multiply-adds (Σ n_j²) ...
_DIRECT_MAX_PAIRS = 5_000_000
#: ... and K' is at most this (one dense Cholesky per iteration).
_DIRECT_MAX_UNITS = 1000
#: The PCG preconditioner is built from a sample of events when Σ n_j² exceeds this.
_PRECONDITIONER_PAIRS = 25_000_000
#: Rebuild the PCG preconditioner when a solve needed more iterations than this.
_PCG_REFRESH_ITER = 20


@dataclass(frozen=True, slots=True, eq=False)
class RemlEmFit(StationFitResult):
    """Result of :func:`fit_reml_em`.

    Per-station arrays have shape (K,) and follow ``station_ids`` (station units); per-event
    arrays shape (N,) follow the observation set's event table; per-row arrays shape (nnz,)
    follow its rows. Units: magnitude units and their squares.

    Attributes
    ----------
    station_ids : ndarray of str, shape (K,)
    bias : ndarray
        b̂_i relative to the anchor; units without data get the prior mean μ0.
    bias_var : ndarray
        Var(b̂_i): diagonal of the top-left block of the bordered inverse (relative to the
        anchor); τ_b² for units without data. With ``bias_cov`` None it is the approximation
        σ_i²/Σγω(1 − w) of docs/estimator.md §5.2 (with the ridge).
    bias_cov : ndarray, shape (K, K), or None
        Full Cov(b̂) when K <= ``dense_cov_max``.
    sigma2 : ndarray
        Moderated error variance σ̃_i² (the σ-step at convergence); s0² without data.
    raw_s2 : ndarray
        s_i² = Σγ q/d_i, the data-only residual variance; NaN where d_i = 0.
    dof : ndarray
        Effective degrees of freedom d_i = Σ_j γ_j (1 − w_ij).
    n_events : ndarray of int
        Readings of the unit used by the fit.
    weight_sum : ndarray
        Σ_j γ_j over those readings.
    outlier_rate : ndarray
        Fraction of the unit's readings with robust weight below ``outlier_weight``.
    prior_dominated : ndarray of bool
        d_i < d0 (docs/estimator.md §5.3).
    uncalibrated : ndarray of bool
        Unit in a component without anchor, or without data (:mod:`fusion.model.connectivity`).
    event_magnitude, event_variance : ndarray, shape (N,)
        M̂_j and V_j of the fitted events (robust-weighted GLS given b̂, σ̃); NaN elsewhere.
    event_used : ndarray of bool, shape (N,)
    row_weight : ndarray, shape (nnz,)
        Robust weight ω_ij (1 where not robust-weighted); NaN for rows the fit did not use.
    row_gls_weight : ndarray, shape (nnz,)
        GLS weight w_ij of the row in its event; NaN for unused rows.
    residual : ndarray, shape (nnz,)
        r_ij = m_ij − b̂_i − M̂_j; NaN for unused rows.
    prior : EBPrior
        Final (d0, s0², τ_b²).
    pairs : PairCovariance or None
        Flagged pairs with the covariances of the last σ-step (station codes of this fit).
    anchor : AnchorResult
    connectivity : Connectivity
    n_iter : int
    converged : bool
    solver : str
        "direct" or "pcg".
    gamma : ndarray, shape (N,)
        Event weights used.
    """

    station_ids: NDArray[Any]
    bias: NDArray[np.float64]
    bias_var: NDArray[np.float64]
    bias_cov: NDArray[np.float64] | None
    sigma2: NDArray[np.float64]
    raw_s2: NDArray[np.float64]
    dof: NDArray[np.float64]
    n_events: NDArray[np.int64]
    weight_sum: NDArray[np.float64]
    outlier_rate: NDArray[np.float64]
    prior_dominated: NDArray[np.bool_]
    uncalibrated: NDArray[np.bool_]
    event_magnitude: NDArray[np.float64]
    event_variance: NDArray[np.float64]
    event_used: NDArray[np.bool_]
    row_weight: NDArray[np.float64]
    row_gls_weight: NDArray[np.float64]
    residual: NDArray[np.float64]
    prior: EBPrior
    pairs: PairCovariance | None
    anchor: AnchorResult
    connectivity: Connectivity
    n_iter: int
    converged: bool
    solver: str
    gamma: NDArray[np.float64]


# ------------------------------------------------------------------------------------------
# Fixed structure of one fit
# ------------------------------------------------------------------------------------------


@dataclass(slots=True, eq=False)
class _Design:
    """Rows, codes and sparse structure that stay fixed during the iterations.

    Rows are sorted by event, so per-event sums are segment sums (``np.add.reduceat`` over
    ``starts``; every fitted event has a row). ``X`` is the N'×K' CSR matrix whose data are the
    current row weights a_ij = (W_j1)_i (overwritten in place each iteration); ``XT`` is its
    CSC transpose sharing the data; ``ones_T`` the K'×N' incidence matrix with unit data.
    """

    rows: NDArray[np.int64]  # indices into the observation set
    ev: NDArray[np.int64]  # compressed event codes 0..N'-1 (sorted)
    st: NDArray[np.int64]  # compressed station codes 0..K'-1
    m: NDArray[np.float64]
    g_row: NDArray[np.float64] | None  # γ of the row's event; None when all γ = 1
    g_ev: NDArray[np.float64]  # γ per fitted event
    g_count: NDArray[np.float64]  # Σγ per station
    starts: NDArray[np.int64]  # first row of each fitted event
    counts: NDArray[np.int64]  # rows per fitted event
    n_ev: int
    n_st: int
    events: NDArray[np.int64]  # fitted event -> obs event code
    stations: NDArray[np.int64]  # active station -> obs station code
    robust_row: NDArray[np.bool_]  # row in an event with n_j >= 3
    nonrobust_row: NDArray[np.bool_]
    any_prior: bool
    prior_mean: NDArray[np.float64]  # M*_j (0 where none)
    prior_prec: NDArray[np.float64]  # finite prior precision (0 for hard or none)
    hard: NDArray[np.bool_]  # hard reference events
    X: sparse.csr_matrix
    XT: sparse.csc_matrix
    ones_T: sparse.csc_matrix
    partner_row: NDArray[np.int64] | None  # partner's row for rows of a present pair, else -1
    pair_id_row: NDArray[np.int64] | None  # pair index of k-side rows, else -1
    pair_of_station: NDArray[np.int64]  # pair index of each station, -1 if none
    pair_k: NDArray[np.int64]
    pair_l: NDArray[np.int64]
    pair_src: NDArray[np.int64]  # index of each fitted pair in the given PairCovariance
    sum_n2: int

    @property
    def a(self) -> NDArray[np.float64]:
        """Current row weights (the data of X)."""
        return np.asarray(self.X.data)

    def seg(self, x: NDArray[np.float64]) -> NDArray[np.float64]:
        """Per-event sums of a row array."""
        return np.asarray(np.add.reduceat(x, self.starts), dtype=np.float64)

    def per_station(self, x: NDArray[np.float64]) -> NDArray[np.float64]:
        """Per-station sums of a row array."""
        return np.asarray(np.bincount(self.st, weights=x, minlength=self.n_st), dtype=np.float64)

    def gamma_rows(self, x: NDArray[np.float64]) -> NDArray[np.float64]:
        """γ_j x_ij (x itself when every γ is 1)."""
        return x if self.g_row is None else self.g_row * x


def _build_design(
    obs: ObservationSet,
    gamma: NDArray[np.float64],
    ref_prior_mean: NDArray[np.float64],
    ref_prior_prec: NDArray[np.float64],
    pairs: PairCovariance | None,
) -> _Design:
    usable = obs.detected & ~obs.clipped & np.isfinite(obs.magnitude)
    if np.any(gamma <= 0):
        usable &= gamma[obs.event] > 0
    n_j = np.bincount(obs.event[usable], minlength=obs.n_events)
    fit_event = (n_j >= 2) | ((ref_prior_prec > 0) & (n_j >= 1))
    keep = usable & fit_event[obs.event]
    rows = np.flatnonzero(keep)
    if rows.shape[0] == 0:
        raise InsufficientDataError(
            f"no {obs.magnitude_type} event has two or more usable station magnitudes "
            "in the fit window; widen window_days or check the magnitude type"
        )
    events = np.flatnonzero(fit_event)
    all_rows = rows.shape[0] == obs.n_obs
    ev = obs.event if all_rows and events.shape[0] == obs.n_events else None
    if ev is None:
        ev_code = np.full(obs.n_events, -1, dtype=np.int64)
        ev_code[events] = np.arange(events.shape[0])
        ev = ev_code[obs.event[rows]]
    st_raw = obs.station if all_rows else obs.station[rows]
    has_rows = np.bincount(st_raw, minlength=obs.n_stations) > 0
    stations = np.flatnonzero(has_rows)
    if stations.shape[0] == obs.n_stations:
        st = st_raw
    else:
        st_code = np.full(obs.n_stations, -1, dtype=np.int64)
        st_code[stations] = np.arange(stations.shape[0])
        st = st_code[st_raw]
    n_ev, n_st = int(events.shape[0]), int(stations.shape[0])
    counts = np.bincount(ev, minlength=n_ev).astype(np.int64)
    indptr = np.concatenate([[0], np.cumsum(counts)]).astype(np.int64)
    indices = st.astype(np.int32)
    X = sparse.csr_matrix((np.ones(rows.shape[0]), indices, indptr), shape=(n_ev, n_st))
    XT = X.T
    ones_T = sparse.csr_matrix((np.ones(rows.shape[0]), indices, indptr), shape=(n_ev, n_st)).T
    g_ev = gamma[events].astype(np.float64)
    g_row = None if np.all(g_ev == 1.0) else g_ev[ev]
    g_count = (
        np.bincount(st, minlength=n_st).astype(np.float64)
        if g_row is None
        else np.asarray(np.bincount(st, weights=g_row, minlength=n_st), dtype=np.float64)
    )
    prec = ref_prior_prec[events]
    hard = np.isinf(prec)
    partner_row = pair_id_row = None
    pair_k = pair_l = pair_src = np.zeros(0, dtype=np.int64)
    pair_of_station = np.full(n_st, -1, dtype=np.int64)
    if pairs is not None and pairs.n_pairs:
        code = np.full(obs.n_stations, -1, dtype=np.int64)
        code[stations] = np.arange(n_st)
        pk, pl = code[pairs.k], code[pairs.l]
        both = (pk >= 0) & (pl >= 0)
        pair_k, pair_l, pair_src = pk[both], pl[both], np.flatnonzero(both)
        pair_of_station[pair_k] = np.arange(pair_k.shape[0])
        pair_of_station[pair_l] = np.arange(pair_l.shape[0])
        partner = np.full(n_st, -1, dtype=np.int64)
        partner[pair_k] = pair_l
        partner[pair_l] = pair_k
        pr = pair_partner_rows(ev, st, partner)
        if np.any(pr >= 0):
            partner_row = pr
            is_k = np.zeros(n_st, dtype=bool)
            is_k[pair_k] = True
            pair_id_row = np.where((pr >= 0) & is_k[st], pair_of_station[st], -1)
    return _Design(
        rows=rows,
        ev=ev,
        st=st,
        m=obs.magnitude[rows].astype(np.float64),
        g_row=g_row,
        g_ev=g_ev,
        g_count=g_count,
        starts=indptr[:-1],
        counts=counts,
        n_ev=n_ev,
        n_st=n_st,
        events=events,
        stations=stations,
        robust_row=counts[ev] >= 3,
        nonrobust_row=counts[ev] < 3,
        any_prior=bool(np.any(prec > 0)),
        prior_mean=np.nan_to_num(ref_prior_mean[events]),
        prior_prec=np.where(hard, 0.0, prec),
        hard=hard,
        X=X,
        XT=XT,
        ones_T=ones_T,
        partner_row=partner_row,
        pair_id_row=pair_id_row,
        pair_of_station=pair_of_station,
        pair_k=pair_k,
        pair_l=pair_l,
        pair_src=pair_src,
        sum_n2=int(np.sum(counts * counts)),
    )


# ------------------------------------------------------------------------------------------
# Per-iteration kernels (all O(nnz))
# ------------------------------------------------------------------------------------------


@dataclass(slots=True, eq=False)
class _Weights:
    """Event precision W_j per row: a = W_j1 lives in X.data; pairs add their 2×2 entries."""

    P: NDArray[np.float64]  # 1'W_j1 per event (without the reference prior)
    pair_rows: NDArray[np.int64]  # rows of present pairs
    Wd: NDArray[np.float64]  # diagonal W_pp on those rows
    Wo: NDArray[np.float64]  # off-diagonal W_pq on those rows


def _row_weights(
    d: _Design,
    sigma2: NDArray[np.float64],
    omega: NDArray[np.float64] | None,
    c_pair: NDArray[np.float64],
) -> _Weights:
    """a_ij = (Σ_j⁻¹1)_i with s_i² = σ_i²/ω_ij and closed-form 2×2 blocks (gls_blocks)."""
    a = d.a
    np.take(1.0 / sigma2, d.st, out=a)
    if omega is not None:
        a *= omega
    rows = np.zeros(0, dtype=np.int64)
    Wd = Wo = np.zeros(0)
    if d.partner_row is not None:
        rows = np.flatnonzero(d.partner_row >= 0)
        other = d.partner_row[rows]
        sp, sq = 1.0 / a[rows], 1.0 / a[other]
        c = c_pair[d.pair_of_station[d.st[rows]]]
        lim = _BLOCK_CAP * np.sqrt(sp * sq)
        c = np.clip(c, -lim, lim)
        det = sp * sq - c * c
        Wd, Wo = sq / det, -c / det
        a[rows] = (sq - c) / det
    return _Weights(P=d.seg(a), pair_rows=rows, Wd=Wd, Wo=Wo)


@dataclass(slots=True, eq=False)
class _Normal:
    """Pieces of A = diag(D + ridge) + O − X'diag(g)X and the right-hand side r."""

    D: NDArray[np.float64]
    ridge: NDArray[np.float64]
    off: NDArray[np.float64]  # (k, l) entry of O per pair
    g: NDArray[np.float64]  # γ_j/(P_j + π_j), 0 for hard events
    rhs: NDArray[np.float64]
    am: NDArray[np.float64]  # Σ_i a_ij m_ij per event


def _normal_pieces(d: _Design, w: _Weights, ridge: float, mu0: float) -> _Normal:
    a = d.a
    Pp = w.P + d.prior_prec if d.any_prior else w.P
    g = d.g_ev / Pp
    if d.any_prior:
        g[d.hard] = 0.0
    am_row = a * d.m
    am = d.seg(am_row)
    D = d.per_station(d.gamma_rows(a))
    Wm_row = am_row
    off = np.zeros(d.pair_k.shape[0])
    if w.pair_rows.shape[0]:
        rows = w.pair_rows
        assert d.partner_row is not None and d.pair_id_row is not None
        gr = d.g_ev[d.ev[rows]]
        # Replace a by the block diagonal W_pp on pair rows and add W_pq m_q.
        D += np.bincount(d.st[rows], weights=gr * (w.Wd - a[rows]), minlength=d.n_st)
        Wm_row = am_row.copy()
        Wm_row[rows] = w.Wd * d.m[rows] + w.Wo * d.m[d.partner_row[rows]]
        ks = d.pair_id_row[rows] >= 0
        off = np.asarray(
            np.bincount(d.pair_id_row[rows][ks], weights=(gr * w.Wo)[ks], minlength=off.shape[0]),
            dtype=np.float64,
        )
    ev_term = g * am
    if d.any_prior:
        h = np.where(d.hard, 1.0, d.prior_prec / Pp)
        ev_term = ev_term + d.g_ev * h * d.prior_mean
    rhs = d.per_station(d.gamma_rows(Wm_row)) - np.asarray(d.XT @ ev_term)
    ridge_v = np.full(d.n_st, ridge)
    return _Normal(D=D, ridge=ridge_v, off=off, g=g, rhs=rhs + ridge_v * mu0, am=am)


def _matvec(d: _Design, nm: _Normal, v: NDArray[np.float64]) -> NDArray[np.float64]:
    out = (nm.D + nm.ridge) * v - np.asarray(d.XT @ (nm.g * np.asarray(d.X @ v)))
    if nm.off.shape[0]:
        out[d.pair_k] += nm.off * v[d.pair_l]
        out[d.pair_l] += nm.off * v[d.pair_k]
    return np.asarray(out, dtype=np.float64)


def _dense_normal(
    d: _Design, w: _Weights, nm: _Normal, event_mask: NDArray[np.bool_] | None = None
) -> NDArray[np.float64]:
    """A as a dense K'×K' array: one sparse product of Σ n_j² multiply-adds.

    With ``event_mask`` only those events enter (the Laplacian part of a sampled A), without
    the ridge and without rescaling.
    """
    if event_mask is None:
        X, g = d.X, nm.g
        D = nm.D + nm.ridge
        off = nm.off
    else:
        X = d.X[event_mask]
        g = nm.g[event_mask]
        row_mask = np.repeat(event_mask, d.counts)
        a = d.a[row_mask]
        gr = np.repeat(d.g_ev[event_mask], d.counts[event_mask])
        D = np.asarray(np.bincount(d.st[row_mask], weights=gr * a, minlength=d.n_st))
        off = np.zeros(0)
        if w.pair_rows.shape[0]:
            sel = row_mask[w.pair_rows]
            rows = w.pair_rows[sel]
            D += np.bincount(
                d.st[rows], weights=d.g_ev[d.ev[rows]] * (w.Wd[sel] - d.a[rows]), minlength=d.n_st
            )
    Xg = X.copy()
    Xg.data = Xg.data * np.repeat(g, np.diff(X.indptr))
    A = -(X.T @ Xg).toarray()
    A[np.diag_indices_from(A)] += D
    if event_mask is None and off.shape[0]:
        A[d.pair_k, d.pair_l] += off
        A[d.pair_l, d.pair_k] += off
    return np.asarray(A, dtype=np.float64)


# ------------------------------------------------------------------------------------------
# Constrained solves
# ------------------------------------------------------------------------------------------


def _constraint_matrix(
    weight: NDArray[np.float64], group: NDArray[np.int64], n_c: int
) -> NDArray[np.float64]:
    C = np.zeros((weight.shape[0], n_c))
    sel = group >= 0
    C[np.flatnonzero(sel), group[sel]] = weight[sel]
    return C


def _solve_direct(
    A: NDArray[np.float64],
    rhs: NDArray[np.float64],
    C: NDArray[np.float64],
    B: NDArray[np.float64],
    *,
    want_cov: bool,
) -> tuple[NDArray[np.float64], NDArray[np.float64] | None]:
    """Solve [A C; C' 0][b; λ] = [r; B]; optionally the top-left block of the inverse.

    Cholesky of A and the Schur complement S = C'A⁻¹C when A is positive definite (ridge or
    hard reference events); LU of the bordered matrix otherwise.
    """
    n, n_c = A.shape[0], C.shape[1]
    try:
        factor = linalg.cho_factor(A, lower=True, check_finite=False)
    except linalg.LinAlgError:
        factor = None
    if factor is not None:
        Y = linalg.cho_solve(factor, np.column_stack([rhs, C]), check_finite=False)
        y_r, Y_C = Y[:, 0], Y[:, 1:]
        b = y_r
        if n_c:
            S = C.T @ Y_C
            b = y_r - Y_C @ np.linalg.solve(S, C.T @ y_r - B)
        cov = None
        if want_cov:
            Ainv = linalg.cho_solve(factor, np.eye(n), check_finite=False)
            cov = Ainv - Y_C @ np.linalg.solve(S, Y_C.T) if n_c else Ainv
            cov = 0.5 * (cov + cov.T)
        return np.asarray(b, dtype=np.float64), cov
    bordered = np.zeros((n + n_c, n + n_c))
    bordered[:n, :n] = A
    bordered[:n, n:] = C
    bordered[n:, :n] = C.T
    lu = linalg.lu_factor(bordered, check_finite=False)
    sol = linalg.lu_solve(lu, np.concatenate([rhs, B]), check_finite=False)
    cov = None
    if want_cov:
        inv = linalg.lu_solve(lu, np.eye(n + n_c)[:, :n], check_finite=False)[:n]
        cov = 0.5 * (inv + inv.T)
    return np.asarray(sol[:n], dtype=np.float64), cov


class _ConstrainedPreconditioner:
    """z = M⁻¹r − M⁻¹C S⁻¹C'M⁻¹r with S = C'M⁻¹C, so that C'z = 0 (Gould et al. 2001)."""

    def __init__(
        self, minv: Callable[[NDArray[np.float64]], NDArray[np.float64]], C: NDArray[np.float64]
    ) -> None:
        self.minv = minv
        self.C = C
        self.MC = minv(C) if C.shape[1] else C
        self.S_inv = np.linalg.inv(C.T @ self.MC) if C.shape[1] else np.zeros((0, 0))

    def __call__(self, r: NDArray[np.float64]) -> NDArray[np.float64]:
        z = self.minv(r)
        if self.C.shape[1]:
            z = z - self.MC @ (self.S_inv @ (self.C.T @ z))
        return z


def _solve_pcg(
    d: _Design,
    nm: _Normal,
    x0: NDArray[np.float64],
    precond: _ConstrainedPreconditioner,
    *,
    step_tol: float,
    max_iter: int = 500,
) -> tuple[NDArray[np.float64], int]:
    """Projected preconditioned CG from a feasible x0 (C'x0 = B); iterates stay feasible.

    Stops when the last step and the preconditioned residual (an estimate of the remaining
    error in b, magnitude units) are both below ``step_tol``.
    """
    x = x0.copy()
    r = _matvec(d, nm, x) - nm.rhs
    z = precond(r)
    rz = float(r @ z)
    if not rz > 0 or np.max(np.abs(z)) < step_tol:
        return x, 0
    p = -z
    for it in range(1, max_iter + 1):
        Ap = _matvec(d, nm, p)
        pAp = float(p @ Ap)
        if not pAp > 0:
            return x, it
        alpha = rz / pAp
        x += alpha * p
        r += alpha * Ap
        z = precond(r)
        rz_new = float(r @ z)
        if (np.max(np.abs(alpha * p)) < step_tol and np.max(np.abs(z)) < step_tol) or not (
            rz_new > 0
        ):
            return x, it
        p = -z + (rz_new / rz) * p
        rz = rz_new
    return x, max_iter


def _make_feasible(
    b: NDArray[np.float64],
    C: NDArray[np.float64],
    B: NDArray[np.float64],
    component: NDArray[np.int64],
    comp_of_constraint: NDArray[np.int64],
) -> NDArray[np.float64]:
    """Shift each constrained component by one constant so that C'b = B."""
    out = b.copy()
    if C.shape[1] == 0:
        return out
    shift = (B - C.T @ out) / C.sum(axis=0)
    delta = np.zeros(int(component.max()) + 1)
    delta[comp_of_constraint] = shift
    return out + delta[component]


def _preconditioner_inverse(
    d: _Design, w: _Weights, nm: _Normal, *, budget: int
) -> Callable[[NDArray[np.float64]], NDArray[np.float64]]:
    """M⁻¹ for PCG: Cholesky of A, or of a sampled A when Σ n_j² exceeds ``budget``.

    The sampled matrix keeps each event with probability p = budget/Σ n_j² and scales its
    Laplacian by 1/p (a spectral sparsifier of the co-observation Laplacian); a non-negative
    diagonal then lifts every diagonal entry to at least the exact one, which keeps M
    positive definite. Only the speed of CG depends on M, never the solution.
    """
    if d.sum_n2 <= budget:
        A = _dense_normal(d, w, nm)
    else:
        p = budget / d.sum_n2
        mask = np.random.default_rng(20240601).random(d.n_ev) < p
        A = _dense_normal(d, w, nm, event_mask=mask) / p
        exact = _diag_data_information(d, w, nm)
        lift = np.maximum(exact - np.diag(A), 0.0)
        A[np.diag_indices_from(A)] += lift + nm.ridge
    scale = float(np.mean(np.abs(np.diag(A)))) or 1.0
    diag = np.diag_indices_from(A)
    added = 0.0
    for eps in (0.0, 1e-10, 1e-8, 1e-6, 1e-4):
        A[diag] += (eps - added) * scale
        added = eps
        try:
            factor = linalg.cho_factor(A, lower=True, overwrite_a=True, check_finite=False)
            break
        except linalg.LinAlgError:
            continue
    else:  # pragma: no cover - a Laplacian plus 1e-4·mean diag is positive definite
        raise InsufficientDataError("the normal matrix of the b-step is not positive semi-definite")

    def minv(R: NDArray[np.float64]) -> NDArray[np.float64]:
        return np.asarray(linalg.cho_solve(factor, R, check_finite=False), dtype=np.float64)

    return minv


# ------------------------------------------------------------------------------------------
# E-step, robust weights, σ-step
# ------------------------------------------------------------------------------------------


def _event_estimate(
    d: _Design, P: NDArray[np.float64], num: NDArray[np.float64]
) -> tuple[NDArray[np.float64], NDArray[np.float64], NDArray[np.float64]]:
    """M̂_j, V_j and the total precision P_j + π_j (inf for hard reference events)."""
    if not d.any_prior:
        return num / P, 1.0 / P, P
    Pp = P + d.prior_prec
    M = np.where(d.hard, d.prior_mean, (num + d.prior_prec * d.prior_mean) / Pp)
    V = np.where(d.hard, 0.0, 1.0 / Pp)
    return M, V, np.where(d.hard, np.inf, Pp)


def _weighted_event_median(d: _Design, y: NDArray[np.float64]) -> NDArray[np.float64]:
    """Lower weighted median of y per event, weights a (one radix argsort of an int64 key).

    y is quantised to 2^30 levels over its range only to order rows inside an event; the
    median value is the exact y of the selected row.
    """
    a = d.a
    lo, span = float(np.min(y)), float(np.ptp(y))
    q = np.zeros(y.shape[0], dtype=np.int64)
    if span > 0:
        q = ((y - lo) * ((2**30 - 1) / span)).astype(np.int64)
    order = np.argsort((d.ev << 31) | q, kind="stable")
    cw = np.cumsum(a[order])
    total = d.seg(a)
    end = np.cumsum(total)
    idx = np.searchsorted(cw, end - 0.5 * total, side="left")
    return np.asarray(y[order][np.minimum(idx, y.shape[0] - 1)], dtype=np.float64)


@dataclass(slots=True, eq=False)
class _SigmaSums:
    """Per-station sums of one σ-step (reused by the empirical-Bayes refresh)."""

    q: NDArray[np.float64]  # Σγ q_ij
    v: NDArray[np.float64]  # Σγ V_j (Σγ ω V_j in the literal form)


def _robust_weights(
    d: _Design,
    w: _Weights,
    r: NDArray[np.float64],
    Pf: NDArray[np.float64],
    V: NDArray[np.float64],
    sigma2: NDArray[np.float64],
    nu: float,
    kappa: float,
    literal: bool,
    *,
    median_start: NDArray[np.float64] | None,
) -> tuple[NDArray[np.float64], NDArray[np.float64]]:
    """Student-t weights ω = (ν+1)/(ν+u²) from leave-one-out residuals (docs/estimator.md §6).

    With P'_j = P_j + π_j and the row's removed precision a_out (a_p, or a_p + a_q for a pair
    block), y − M̂^(−i) = (P'_j r_ij − a_q(r_p − r_q))/(P'_j − a_out) [derived from
    P'M̂ = P^(−i)M̂^(−i) + a_p y_p (+ a_q y_q)], so u² = (P'_j r − ...)²/(P^(−i)(σ² P^(−i) + 1));
    a hard reference event gives u = r/σ. ``median_start`` (y minus the event's weighted
    median) replaces y − M̂^(−i) in the first iteration, with V_j for V^(−i).

    Returns
    -------
    omega : ndarray, shape (n,)
        1 on rows that are not robust-weighted (n_j < 3, or nothing left without the row).
    qfac : ndarray, shape (n,)
        Factor of r² in the σ-step: ω/κ on weighted rows, 1 elsewhere (ω in the literal form).
    """
    s2 = np.take(sigma2, d.st)
    notok = d.nonrobust_row
    if median_start is not None:
        s2 += np.take(V, d.ev)
        u2 = np.square(median_start)
        u2 /= s2
    else:
        Pe = np.take(Pf if not d.any_prior else np.where(d.hard, 0.0, Pf), d.ev)
        p_loo = Pe - d.a
        e = Pe * r
        if w.pair_rows.shape[0]:
            assert d.partner_row is not None
            rows = w.pair_rows
            other = d.partner_row[rows]
            p_loo[rows] -= d.a[other]
            e[rows] -= d.a[other] * (r[rows] - r[other])
        if w.pair_rows.shape[0] or d.any_prior:
            notok = notok | (p_loo <= 1e-12 * Pe)
        del Pe
        u2 = np.square(e, out=e)
        s2 *= p_loo
        s2 += 1.0
        s2 *= p_loo
        with np.errstate(invalid="ignore", divide="ignore"):
            u2 /= s2
        if d.any_prior:
            hard = np.take(d.hard, d.ev)
            np.copyto(u2, r * r / np.take(sigma2, d.st), where=hard)
            notok = np.where(hard, d.nonrobust_row, notok)
    del s2
    omega = student_t_weight(u2, nu, out=u2, overwrite_u2=True)
    np.copyto(omega, 1.0, where=notok)
    if literal:
        return omega, omega
    qfac = omega / kappa
    np.copyto(qfac, 1.0, where=notok)
    return omega, qfac


def _sigma_sums(
    d: _Design,
    r: NDArray[np.float64],
    V: NDArray[np.float64],
    qfac: NDArray[np.float64] | None,
    vfac: NDArray[np.float64] | None,
) -> _SigmaSums:
    """Σγ q_ij (q = qfac·r²) and Σγ V_j (Σγ ω V_j in the literal form) per station."""
    q_row = np.square(r)
    if qfac is not None:
        q_row *= qfac
    q = d.per_station(d.gamma_rows(q_row))
    if vfac is not None:
        v = d.per_station(d.gamma_rows(vfac * np.take(V, d.ev)))
    else:
        v = np.asarray(d.ones_T @ (d.g_ev * V), dtype=np.float64)
    return _SigmaSums(q=q, v=v)


def _pair_step(
    d: _Design,
    r: NDArray[np.float64],
    V: NDArray[np.float64],
    sigma2: NDArray[np.float64],
    c_pair: NDArray[np.float64],
    n0: float,
) -> NDArray[np.float64]:
    """c_kl = Σγ(r_k r_l + V)/Σγ over shared events, shrunk by n/(n + n0) and capped."""
    if d.pair_id_row is None or d.partner_row is None:
        return c_pair
    n_p = d.pair_k.shape[0]
    rows = np.flatnonzero(d.pair_id_row >= 0)
    pid = d.pair_id_row[rows]
    other = d.partner_row[rows]
    gm = d.g_ev[d.ev[rows]]
    num = np.bincount(pid, weights=gm * (r[rows] * r[other] + V[d.ev[rows]]), minlength=n_p)
    s1 = np.bincount(pid, weights=gm, minlength=n_p)
    s2 = np.bincount(pid, weights=gm * gm, minlength=n_p)
    with np.errstate(invalid="ignore", divide="ignore"):
        n_eff = np.where(s2 > 0, s1 * s1 / s2, 0.0)
        c = np.where(s1 > 0, num / s1 * n_eff / (n_eff + n0), c_pair)
    cap = RHO_CAP * np.minimum(sigma2[d.pair_k], sigma2[d.pair_l])
    return np.asarray(np.clip(c, -cap, cap), dtype=np.float64)


def _diag_data_information(d: _Design, w: _Weights, nm: _Normal) -> NDArray[np.float64]:
    """Diagonal of Σ_j γ_j L_j: Σγ W_ii − Σ g_j a_ij² (docs/estimator.md §5.2: Var b̂ ≈ 1/this)."""
    a = d.a
    return np.asarray(nm.D - d.per_station(nm.g[d.ev] * a * a), dtype=np.float64)


def _dof(d: _Design, nm: _Normal) -> NDArray[np.float64]:
    """d_i = Σ_j γ_j (1 − w_ij) = Σγ − Σ_j γ_j a_ij/(P_j + π_j) (= X'g)."""
    return effective_dof(d.g_count, np.asarray(d.XT @ nm.g, dtype=np.float64))


def _ridge(prior: EBPrior) -> float:
    return 1.0 / prior.tau_b2 if np.isfinite(prior.tau_b2) else 0.0


# ------------------------------------------------------------------------------------------
# The fit
# ------------------------------------------------------------------------------------------


def _check_params(
    nu: float, max_iter: int, tol_bias: float, tol_log_sigma: float, solver: str
) -> None:
    check_iteration_parameters(
        "fit_reml_em", nu=nu, max_iter=max_iter, tol_bias=tol_bias, tol_log_sigma=tol_log_sigma
    )
    if solver not in ("auto", "direct", "pcg"):
        raise parameter_error("fit_reml_em", "solver", "one of 'auto', 'direct', 'pcg'", solver)


def fit_reml_em(
    obs: ObservationSet,
    *,
    anchor: Anchor,
    gamma: NDArray[np.float64] | None = None,
    pairs: PairCovariance | None = None,
    init: WarmStart | StationParameters | None = None,
    nu: float = 4.0,
    robust: bool = True,
    max_iter: int = 100,
    tol_bias: float = 1e-4,
    tol_log_sigma: float = 1e-3,
    prior: EBPrior | None = None,
    eb_every: int = 10,
    shrink_n0: float = 20.0,
    unit_station: NDArray[Any] | None = None,
    solver: Solver = "auto",
    scale_consistency: bool = True,
    dense_cov_max: int = 3000,
    outlier_weight: float = 0.3,
    accelerate: bool = True,
) -> RemlEmFit:
    """Fit station biases, error variances and flagged-pair covariances (docs/estimator.md §3).

    Parameters
    ----------
    obs : ObservationSet
        Station magnitudes of one type; the station table holds the units to fit (stations
        or station epochs). Detected, unclipped rows with a finite magnitude are used, in
        events with at least two of them (or one, for an A3 reference event).
    anchor : Anchor
        Level constraint (:mod:`fusion.model.anchors`).
    gamma : ndarray, shape (N,), optional
        Event weights γ_j >= 0 (:func:`fusion.model.forgetting.time_weights`), frequency weights
        in every sum; 0 drops an event. Default 1.
    pairs : PairCovariance, optional
        Flagged pairs (station codes of ``obs``); their covariances start from the given
        values and are re-estimated in the σ-step.
    init : WarmStart or StationParameters, optional
        Starting values (a previous model is matched by unit id).
    nu : float, default=4.0
        Student-t degrees of freedom of the robust weights.
    robust : bool, default=True
        False fixes ω = 1 (Gaussian model).
    max_iter : int, default=100
    tol_bias : float, default=1e-4
        Stop when max|Δb| (magnitude units) ...
    tol_log_sigma : float, default=1e-3
        ... and max|Δ log σ| fall below these (and the priors are stable).
    prior : EBPrior, optional
        Starting hyperparameters; default d0 = 4, s0² = median event (1.4826 MAD)², a weak
        τ_b² = 1 (docs/estimator.md §5, :mod:`fusion.model.eb_priors`).
    eb_every : int, default=10
        Refresh the priors after the second iteration, then every ``eb_every`` iterations
        and at convergence; 0 keeps ``prior`` fixed.
    shrink_n0 : float, default=20.0
        Pair covariances are shrunk by n/(n + n0) (docs/pairs.md §4).
    unit_station : ndarray of str, shape (K,), optional
        Station id of each unit (reference-set membership); default: the part of the unit id
        before ``@``.
    solver : {"auto", "direct", "pcg"}, default="auto"
        "direct" forms A by one sparse product and factorises it every iteration; "pcg" runs
        projected CG on the implicit operator, preconditioned by a Cholesky factor of A (of a
        sampled A when Σ n_j² > 2.5e7) refreshed when needed. "auto" takes "direct" when
        Σ n_j² <= 5e6 and K <= 1000 (measured in ``bench/fit_speed.py``).
    scale_consistency : bool, default=True
        Divide robust-weighted squared residuals by κ_ν (module docstring); False gives the
        textbook σ-step (docs/estimator.md §7.1).
    dense_cov_max : int, default=3000
        Up to this many units the exact Cov(b̂) is returned (one more sparse product and a
        dense inverse); beyond, Var(b̂) is the approximation of docs/estimator.md §5.2.
    outlier_weight : float, default=0.3
        Rows with ω below this count as outliers (docs/estimator.md §6).
    accelerate : bool, default=True
        SQUAREM-type extrapolation of log σ² when the iteration crawls (observed rate > 0.6);
        the fixed point is the same (module docstring).

    Returns
    -------
    RemlEmFit

    Raises
    ------
    InsufficientDataError
        No event has two usable station magnitudes.
    ConfigError
        A parameter is out of range or ``gamma``/``init`` do not fit ``obs``.

    Warns
    -----
    ConvergenceWarning
        ``max_iter`` reached before the tolerances.

    Notes
    -----
    Units without usable data keep b = μ0 (the prior mean), Var b = τ_b², σ² = s0², and are
    reported uncalibrated and prior-dominated. Two rows of one station in one event (two
    channels) are treated as two independent readings.
    """
    _check_params(nu, max_iter, tol_bias, tol_log_sigma, solver)
    N = obs.n_events
    g_all = np.ones(N) if gamma is None else np.asarray(gamma, dtype=np.float64)
    if g_all.shape != (N,) or not np.all(np.isfinite(g_all) & (g_all >= 0)):
        raise ConfigError(f"gamma must hold {N} finite weights >= 0, one per event")
    unit_ids = np.asarray(obs.station_ids).astype(str)
    u_station = unit_station_ids(unit_ids) if unit_station is None else np.asarray(unit_station)
    s = _setup(obs, anchor, g_all, pairs, unit_ids, u_station)
    st = _starting_values(s, obs, init, prior, pairs, unit_ids, u_station)
    d = s.d
    opt = _Options(
        nu=float(nu),
        robust=robust,
        kappa=t_weight_consistency(float(nu)) if (robust and scale_consistency) else 1.0,
        literal=robust and not scale_consistency,
        use_direct=solver == "direct"
        or (solver == "auto" and d.sum_n2 <= _DIRECT_MAX_PAIRS and d.n_st <= _DIRECT_MAX_UNITS),
        max_iter=max_iter,
        tol_bias=tol_bias,
        tol_log_sigma=tol_log_sigma,
        eb_every=eb_every,
        shrink_n0=shrink_n0,
        accelerate=accelerate,
    )
    _iterate(s, st, opt)
    if not st.converged:
        warnings.warn(
            f"fit_reml_em stopped at max_iter={max_iter} before max|Δb| < {tol_bias} and "
            f"max|Δ log σ| < {tol_log_sigma}; raise max_iter or loosen the tolerances",
            ConvergenceWarning,
            stacklevel=2,
        )
    final = _final_estimates(s, st, opt, dense_cov_max)
    return _scatter_result(
        obs, s, st, opt, final, anchor, pairs, g_all, dense_cov_max, outlier_weight
    )


# ------------------------------------------------------------------------------------------
# Steps of the fit
# ------------------------------------------------------------------------------------------


@dataclass(slots=True, eq=False)
class _Setup:
    """What stays fixed during the iterations: design, connectivity, level constraints.

    ``constraints(w)`` gives the constraint columns C, targets B and the component of each
    constraint for the current row weights (A4 adds one weight-dependent column per component).
    """

    d: _Design
    conn: Connectivity
    cons: LevelConstraints
    cons_c: LevelConstraints  # restricted to the active units
    comp: NDArray[np.int64]  # component of each active unit
    sigma_identified: NDArray[np.bool_]
    mu0: float
    C_fixed: NDArray[np.float64]
    B_fixed: NDArray[np.float64]
    comp_of_c: NDArray[np.int64]
    a4: bool
    a4_comps: NDArray[np.int64]
    ev_comp_fit: NDArray[np.int64]  # component of each fitted event
    weight_sum_full: NDArray[np.float64]
    match: Callable[[StationParameters], NDArray[np.int64]]

    def constraints(
        self, w: _Weights
    ) -> tuple[NDArray[np.float64], NDArray[np.float64], NDArray[np.int64]]:
        """C, B and the constraint components for the row weights ``w``."""
        if not self.a4:
            return self.C_fixed, self.B_fixed, self.comp_of_c
        return _append_mean_magnitude(
            self.d,
            w,
            self.C_fixed,
            self.B_fixed,
            self.comp_of_c,
            self.comp,
            self.ev_comp_fit,
            self.a4_comps,
            self.cons.mean_magnitude,
        )


@dataclass(slots=True, eq=False)
class _Options:
    """Numerical options of one fit (validated by :func:`_check_params`)."""

    nu: float
    robust: bool
    kappa: float
    literal: bool
    use_direct: bool
    max_iter: int
    tol_bias: float
    tol_log_sigma: float
    eb_every: int
    shrink_n0: float
    accelerate: bool


@dataclass(slots=True, eq=False)
class _State:
    """The iterate (active units only) and the solver's reusable pieces."""

    b: NDArray[np.float64]
    sigma2: NDArray[np.float64]
    prior: EBPrior
    c_pair: NDArray[np.float64]
    omega: NDArray[np.float64] | None = None
    qfac: NDArray[np.float64] | None = None
    minv: Callable[[NDArray[np.float64]], NDArray[np.float64]] | None = None
    last_db: float = 1.0
    n_iter: int = 0
    converged: bool = False


@dataclass(slots=True, eq=False)
class _Step:
    """The result of steps 1–4 of one iteration."""

    b: NDArray[np.float64]
    sigma2: NDArray[np.float64]
    omega: NDArray[np.float64] | None
    qfac: NDArray[np.float64] | None
    c_pair: NDArray[np.float64]
    w: _Weights
    nm: _Normal
    sums: _SigmaSums


def _setup(
    obs: ObservationSet,
    anchor: Anchor,
    g_all: NDArray[np.float64],
    pairs: PairCovariance | None,
    unit_ids: NDArray[Any],
    u_station: NDArray[Any],
) -> _Setup:
    """Build the design, the connectivity report and the anchor's level constraints."""
    K, N = obs.n_stations, obs.n_events
    # Reference events (A3) decide which one-station events are fitted.
    ref_mean, ref_prec = reference_event_priors(anchor, obs.event_ids)
    ref_prec = np.where(g_all > 0, ref_prec, 0.0)
    d = _build_design(obs, g_all, ref_mean, ref_prec, pairs)
    # Connectivity and level constraints (station codes of obs).
    ev_rows = d.events[d.ev]
    st_rows = d.stations[d.st]
    weight_sum_full = np.zeros(K)
    weight_sum_full[d.stations] = d.g_count
    conn = connectivity_report(ev_rows, st_rows, N, K)
    event_comp = np.full(N, -1, dtype=np.int64)
    event_comp[d.events] = conn.component[st_rows[d.starts]]
    # Previous model(s): match units through their readings' times (forgetting module).
    matches: dict[int, NDArray[np.int64]] = {}

    def match(previous: StationParameters) -> NDArray[np.int64]:
        if id(previous) not in matches:
            matches[id(previous)] = match_previous_units(
                previous,
                unit_ids,
                unit_station=u_station,
                row_unit=st_rows,
                row_time=obs.event_time[ev_rows],
                row_weight=d.g_ev[d.ev] if d.g_row is not None else None,
            )
        return matches[id(previous)]

    cons = level_constraints(
        anchor,
        unit_ids=unit_ids,
        unit_station=u_station,
        weight_sum=weight_sum_full,
        component=conn.component,
        n_components=conn.n_components,
        event_ids=obs.event_ids,
        event_in_component=event_comp,
        previous_match=match(anchor.previous) if anchor.previous is not None else None,
    )
    conn = _with_anchors(conn, cons.component_anchored)
    comp = conn.component[d.stations]
    cons_c = _compress(cons, d.stations)
    comp_of_c = np.full(cons_c.n_constraints, -1, dtype=np.int64)
    comp_of_c[cons_c.group[cons_c.group >= 0]] = comp[cons_c.group >= 0]
    a4 = anchor.kind is AnchorKind.MEAN_MAGNITUDE
    return _Setup(
        d=d,
        conn=conn,
        cons=cons,
        cons_c=cons_c,
        comp=comp,
        sigma_identified=conn.sigma_identifiable[d.stations],
        mu0=cons.prior_mean,
        C_fixed=_constraint_matrix(cons_c.weight, cons_c.group, cons_c.n_constraints),
        B_fixed=cons_c.target,
        comp_of_c=comp_of_c,
        a4=a4,
        a4_comps=np.flatnonzero(cons.component_anchored) if a4 else np.zeros(0, dtype=np.int64),
        ev_comp_fit=event_comp[d.events],
        weight_sum_full=weight_sum_full,
        match=match,
    )


def _starting_values(
    s: _Setup,
    obs: ObservationSet,
    init: WarmStart | StationParameters | None,
    prior: EBPrior | None,
    pairs: PairCovariance | None,
    unit_ids: NDArray[Any],
    u_station: NDArray[Any],
) -> _State:
    """Start from ``init`` (a previous model matched by unit) or from μ0 and s0² (module doc)."""
    d, K = s.d, obs.n_stations
    if isinstance(init, StationParameters):
        init = warm_start(init, unit_ids, unit_station=u_station, match=s.match(init))
    if init is not None and (init.bias.shape != (K,) or init.sigma2.shape != (K,)):
        raise ConfigError(f"init must hold {K} biases and variances, one per station unit")
    if prior is None:
        if init is not None and init.prior is not None:
            prior = init.prior
        else:
            s0 = initial_error_variance(d.ev, d.m, d.n_ev)
            prior = EBPrior(d0=DEFAULT_D0, s0_2=s0, tau_b2=DEFAULT_TAU_B2)
    b = np.full(d.n_st, s.mu0)
    sigma2 = np.full(d.n_st, prior.s0_2)
    if init is not None:
        ib, is2 = init.bias[d.stations], init.sigma2[d.stations]
        b = np.where(np.isfinite(ib), ib, b)
        sigma2 = np.where(np.isfinite(is2) & (is2 > 0), is2, sigma2)
    c_pair = np.asarray(pairs.c, dtype=np.float64)[d.pair_src] if pairs is not None else np.zeros(0)
    return _State(b=b, sigma2=sigma2, prior=prior, c_pair=c_pair)


def _b_step(
    s: _Setup,
    st: _State,
    opt: _Options,
    w: _Weights,
    nm: _Normal,
) -> NDArray[np.float64]:
    """Step 1: the constrained normal equations, direct or by projected PCG (module doc)."""
    d = s.d
    C, B, comp_c = s.constraints(w)
    if opt.use_direct:
        b_new, _ = _solve_direct(_dense_normal(d, w, nm), nm.rhs, C, B, want_cov=False)
    else:
        if st.minv is None:
            st.minv = _preconditioner_inverse(d, w, nm, budget=_PRECONDITIONER_PAIRS)
        precond = _ConstrainedPreconditioner(st.minv, C)
        x0 = _make_feasible(st.b, C, B, s.comp, comp_c)
        # Inexact ECM: early b-steps need not be solved beyond 1 % of the last change.
        step_tol = max(1e-3 * opt.tol_bias, 1e-2 * st.last_db)
        b_new, cg_it = _solve_pcg(d, nm, x0, precond, step_tol=step_tol)
        if cg_it > _PCG_REFRESH_ITER:
            st.minv = None
    if s.cons.median:
        b_new = recentre_median(b_new, s.cons_c, s.comp)
    return b_new


def _em_step(s: _Setup, st: _State, opt: _Options, it: int) -> _Step:
    """Steps 1–4 of iteration ``it``: b-step, E-step, robust weights, σ-step and pairs."""
    d = s.d
    w = _row_weights(d, st.sigma2, st.omega, st.c_pair)
    nm = _normal_pieces(d, w, _ridge(st.prior), s.mu0)
    b_new = _b_step(s, st, opt, w, nm)
    # 2. E-step
    num = nm.am - np.asarray(d.X @ b_new)
    M, V, Pf = _event_estimate(d, w.P, num)
    y = d.m - b_new[d.st]
    r = y - M[d.ev]
    # 3. robust weights
    omega, qfac = st.omega, st.qfac
    if opt.robust:
        start = None
        if it == 0:
            start = y - _weighted_event_median(d, y)[d.ev]
        omega, qfac = _robust_weights(
            d, w, r, Pf, V, st.sigma2, opt.nu, opt.kappa, opt.literal, median_start=start
        )
        del start
    del y
    # 4. σ-step (and flagged-pair covariances)
    sums = _sigma_sums(d, r, V, qfac, omega if opt.literal else None)
    sigma2 = moderated_variance(st.prior, (sums.q, sums.v), d.g_count)
    c_pair = st.c_pair
    if d.pair_k.shape[0]:
        c_pair = _pair_step(d, r, V, sigma2, c_pair, opt.shrink_n0)
    return _Step(
        b=b_new, sigma2=sigma2, omega=omega, qfac=qfac, c_pair=c_pair, w=w, nm=nm, sums=sums
    )


def _iterate(s: _Setup, st: _State, opt: _Options) -> None:
    """Iterate to convergence (module docstring): EM steps, EB refreshes, SQUAREM jumps."""
    tracker = ConvergenceTracker()
    extrapolation = Extrapolation(tracker, enabled=opt.accelerate)
    eb_on = opt.eb_every > 0
    for it in range(opt.max_iter):
        st.n_iter = it + 1
        step = _em_step(s, st, opt, it)
        db = float(np.max(np.abs(step.b - st.b)))
        st.last_db = db
        dlog = np.abs(0.5 * np.log(step.sigma2 / st.sigma2))
        dls = float(np.max(dlog))
        # σ of a station in a bipartite component is not identified (docs/model.md): only the
        # prior fixes the split and EM crawls along it, so the rate correction uses the
        # identified σ only and the others get the plain step test.
        dls_id = float(np.max(dlog, where=s.sigma_identified, initial=0.0))
        tracker.add(db, dls_id)
        st.b, st.sigma2, st.omega, st.qfac, st.c_pair = (
            step.b,
            step.sigma2,
            step.omega,
            step.qfac,
            step.c_pair,
        )
        # 5. empirical-Bayes refresh
        err_b, err_s = tracker.distance()
        done = (
            it >= 2
            and err_b < opt.tol_bias
            and err_s < opt.tol_log_sigma
            and dls < opt.tol_log_sigma
        )
        if refresh_due(it, opt.eb_every) or (done and eb_on):
            stable = _refresh_step(s, st, step, opt, it)
            if not stable:
                extrapolation.reset()  # the map changed: do not extrapolate across it
                if done:
                    continue
        if done:
            st.converged = True
            return
        # 6. SQUAREM-type extrapolation of log σ² when EM crawls (module docstring).
        jumped = extrapolation.after_step(dls, np.log(st.sigma2), tracker.rate)
        if jumped is not None:
            log_s0 = np.log(st.prior.s0_2)
            st.sigma2 = np.exp(np.clip(jumped, log_s0 - 12.0, log_s0 + 12.0))


def _refresh_step(s: _Setup, st: _State, step: _Step, opt: _Options, it: int) -> bool:
    """Step 5: refresh the EB priors; True when they are stable (shared :mod:`fit_steps`)."""
    d = s.d
    new_prior = refresh_prior(
        step.sums.q,
        _dof(d, step.nm),
        _diag_data_information(d, step.w, step.nm),
        st.b,
        d.g_count,
        st.prior,
        s.mu0,
    )
    stable = prior_stable(st.prior, new_prior, opt.tol_log_sigma)
    if it == 1 and not stable:
        st.minv = None  # the first refresh moves s0² and τ_b² far from their start
    st.prior = new_prior
    return stable


@dataclass(slots=True, eq=False)
class _Final:
    """Quantities at the final parameters (active units and fitted events)."""

    b: NDArray[np.float64]
    M: NDArray[np.float64]
    V: NDArray[np.float64]
    w: _Weights
    residual: NDArray[np.float64]
    gls_weight: NDArray[np.float64]
    dof: NDArray[np.float64]
    raw_s2: NDArray[np.float64]
    var: NDArray[np.float64]
    cov: NDArray[np.float64] | None


def _final_estimates(s: _Setup, st: _State, opt: _Options, dense_cov_max: int) -> _Final:
    """Event estimates, residuals, d_i, raw s_i² and Cov(b̂) with the final parameters."""
    d = s.d
    w = _row_weights(d, st.sigma2, st.omega, st.c_pair)
    nm = _normal_pieces(d, w, _ridge(st.prior), s.mu0)
    num = nm.am - np.asarray(d.X @ st.b)
    M, V, Pf = _event_estimate(d, w.P, num)
    b = st.b
    if s.a4:
        b, M = _restore_mean_magnitude(s, b, M)
    r = d.m - b[d.st] - M[d.ev]
    gls_w = d.a / Pf[d.ev]
    dof = _dof(d, nm)
    sums = _sigma_sums(d, r, V, st.qfac, st.omega if opt.literal else None)
    raw_s2 = raw_variance(sums.q, dof)
    cov_act: NDArray[np.float64] | None = None
    if dense_cov_max >= d.n_st:
        C, B, _ = s.constraints(w)
        _, cov_act = _solve_direct(_dense_normal(d, w, nm), nm.rhs, C, B, want_cov=True)
        assert cov_act is not None
        var_act = np.diag(cov_act).copy()
    else:
        var_act = 1.0 / (_diag_data_information(d, w, nm) + nm.ridge)
    return _Final(
        b=b,
        M=M,
        V=V,
        w=w,
        residual=r,
        gls_weight=gls_w,
        dof=dof,
        raw_s2=raw_s2,
        var=var_act,
        cov=cov_act,
    )


def _restore_mean_magnitude(
    s: _Setup, b: NDArray[np.float64], M: NDArray[np.float64]
) -> tuple[NDArray[np.float64], NDArray[np.float64]]:
    """Restore the A4 constraint for the final weights by one shift per component.

    The A4 constraint held for the last b-step's weights; any anchor allows the one-constant
    shift per component that makes it hold exactly for the final ones (docs/model.md).
    """
    d, comp, ev_comp_fit = s.d, s.comp, s.ev_comp_fit
    n_c = int(comp.max()) + 1
    ok = ev_comp_fit >= 0
    g_sum = np.bincount(ev_comp_fit[ok], weights=d.g_ev[ok], minlength=n_c)
    level = np.bincount(ev_comp_fit[ok], weights=(d.g_ev * M)[ok], minlength=n_c)
    shift = np.zeros(n_c)
    has = g_sum > 0
    shift[has] = level[has] / g_sum[has] - s.cons.mean_magnitude
    return b + shift[comp], M - np.where(ok, shift[np.maximum(ev_comp_fit, 0)], 0.0)


def _scatter_result(
    obs: ObservationSet,
    s: _Setup,
    st: _State,
    opt: _Options,
    f: _Final,
    anchor: Anchor,
    pairs: PairCovariance | None,
    g_all: NDArray[np.float64],
    dense_cov_max: int,
    outlier_weight: float,
) -> RemlEmFit:
    """Scatter the active units and fitted events to the full unit, event and row tables."""
    d, K, N = s.d, obs.n_stations, obs.n_events
    prior = st.prior
    omega_rows = np.ones(d.m.shape[0]) if st.omega is None else st.omega
    bias = _scatter(K, d.stations, f.b, s.mu0)
    bias_var = _scatter(K, d.stations, np.maximum(f.var, 0.0), prior.tau_b2)
    bias_cov: NDArray[np.float64] | None = None
    if f.cov is not None and dense_cov_max >= K:
        bias_cov = np.diag(bias_var)
        bias_cov[np.ix_(d.stations, d.stations)] = f.cov
    dof_full = _scatter(K, d.stations, f.dof, 0.0)
    n_rows = np.zeros(K, dtype=np.int64)
    n_rows[d.stations] = np.bincount(d.st, minlength=d.n_st)
    n_out = _scatter(
        K, d.stations, d.per_station((omega_rows < outlier_weight).astype(np.float64)), 0.0
    )
    with np.errstate(invalid="ignore", divide="ignore"):
        outlier_rate = np.where(n_rows > 0, n_out / np.maximum(n_rows, 1), np.nan)
    used = np.zeros(N, dtype=bool)
    used[d.events] = True
    out_pairs: PairCovariance | None = pairs
    if d.pair_k.shape[0]:
        out_pairs = PairCovariance(d.stations[d.pair_k], d.stations[d.pair_l], st.c_pair, K)
    return RemlEmFit(
        station_ids=obs.station_ids,
        bias=bias,
        bias_var=bias_var,
        bias_cov=bias_cov,
        sigma2=_scatter(K, d.stations, st.sigma2, prior.s0_2),
        raw_s2=_scatter(K, d.stations, f.raw_s2, np.nan),
        dof=dof_full,
        n_events=n_rows,
        weight_sum=s.weight_sum_full,
        outlier_rate=outlier_rate,
        prior_dominated=dof_full < prior.d0,
        uncalibrated=s.conn.uncalibrated,
        event_magnitude=_scatter(N, d.events, f.M, np.nan),
        event_variance=_scatter(N, d.events, f.V, np.nan),
        event_used=used,
        row_weight=_scatter(obs.n_obs, d.rows, omega_rows, np.nan),
        row_gls_weight=_scatter(obs.n_obs, d.rows, f.gls_weight, np.nan),
        residual=_scatter(obs.n_obs, d.rows, f.residual, np.nan),
        prior=prior,
        pairs=out_pairs,
        anchor=_anchor_result(anchor, s.cons, bias, prior, d, f.w.P, f.V),
        connectivity=s.conn,
        n_iter=st.n_iter,
        converged=st.converged,
        solver="direct" if opt.use_direct else "pcg",
        gamma=g_all,
    )


def _scatter(
    size: int, index: NDArray[np.int64], values: NDArray[np.float64], fill: float
) -> NDArray[np.float64]:
    """An array of ``size`` filled with ``fill`` and ``values`` at ``index``."""
    out = np.full(size, fill)
    out[index] = values
    return out


# ------------------------------------------------------------------------------------------
# Helpers of the fit
# ------------------------------------------------------------------------------------------


def _with_anchors(conn: Connectivity, anchored: NDArray[np.bool_]) -> Connectivity:
    comp_ok = conn.component >= 0
    uncal = np.ones(conn.component.shape[0], dtype=bool)
    uncal[comp_ok] = ~anchored[conn.component[comp_ok]]
    return dataclasses.replace(conn, anchored=anchored.copy(), uncalibrated=uncal)


def _compress(cons: LevelConstraints, stations: NDArray[np.int64]) -> LevelConstraints:
    return dataclasses.replace(
        cons,
        weight=cons.weight[stations],
        group=cons.group[stations],
        offset=cons.offset[stations],
        reference_weight=cons.reference_weight[stations],
    )


def _append_mean_magnitude(
    d: _Design,
    w: _Weights,
    C_fixed: NDArray[np.float64],
    B_fixed: NDArray[np.float64],
    comp_of_c: NDArray[np.int64],
    comp: NDArray[np.int64],
    ev_comp: NDArray[np.int64],
    a4_comps: NDArray[np.int64],
    mean_magnitude: float,
) -> tuple[NDArray[np.float64], NDArray[np.float64], NDArray[np.int64]]:
    """A4 per component: Σ_k b_k Σ_j γ_j w_kj = Σ_j γ_j Σ_k w_kj m_kj − μ Σ_j γ_j."""
    g = d.g_ev / w.P
    coef = np.asarray(d.XT @ g, dtype=np.float64)  # Σ_j γ_j a_kj / P_j
    n_a4 = a4_comps.shape[0]
    col = np.full(int(max(comp.max(initial=0), a4_comps.max(initial=0))) + 1, -1)
    col[a4_comps] = np.arange(n_a4)
    C_a4 = np.zeros((d.n_st, n_a4))
    has = col[comp] >= 0
    C_a4[np.flatnonzero(has), col[comp[has]]] = coef[has]
    ev_col = col[ev_comp]
    ok = ev_col >= 0
    wm = g * d.seg(d.a * d.m)
    B_a4 = np.bincount(ev_col[ok], weights=wm[ok], minlength=n_a4) - mean_magnitude * (
        np.bincount(ev_col[ok], weights=d.g_ev[ok], minlength=n_a4)
    )
    return (
        np.column_stack([C_fixed, C_a4]),
        np.concatenate([B_fixed, B_a4]),
        np.concatenate([comp_of_c, a4_comps]).astype(np.int64),
    )


def _anchor_result(
    anchor: Anchor,
    cons: LevelConstraints,
    bias: NDArray[np.float64],
    prior: EBPrior,
    d: _Design,
    P: NDArray[np.float64],
    V: NDArray[np.float64],
) -> AnchorResult:
    """Value and calibration uncertainty of the anchor (:mod:`fusion.model.anchors`)."""
    ref_w = cons.reference_weight
    in_ref = ref_w > 0
    n_ref = int(in_ref.sum())
    kind = anchor.kind
    tau = float(np.sqrt(prior.tau_b2))
    value = anchor_level(kind, ref_w, bias, float(cons.prior_mean))
    nan = float("nan")
    if kind is AnchorKind.REFERENCE_SET:
        se = tau * float(np.sqrt(np.sum(ref_w**2))) if n_ref else nan
    elif kind is AnchorKind.MEDIAN:
        se = tau * float(np.sqrt(np.pi / (2.0 * n_ref))) if n_ref else nan
    elif kind is AnchorKind.REFERENCE_EVENTS:
        ref = (d.prior_prec > 0) | d.hard
        n_ref = int(ref.sum())
        safe = np.where(d.hard[ref], 1.0, d.prior_prec[ref])
        s_star2 = np.where(d.hard[ref], 0.0, 1.0 / safe)
        se = float(1.0 / np.sqrt(np.sum(1.0 / (1.0 / P[ref] + s_star2)))) if n_ref else nan
    else:
        n_ref = d.n_ev
        se = float(np.sqrt(np.sum(d.g_ev**2 * V)) / np.sum(d.g_ev))
    return AnchorResult(
        kind=kind, value=value, se=se, n_reference=n_ref, continuity=cons.continuity
    )
