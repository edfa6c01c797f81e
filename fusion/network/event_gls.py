"""Per-event GLS sums and leave-one-station-out quantities, vectorized over all events.

Given bias-corrected readings y_ij = m_ij − b_i and row variances s_i² (error variance over any
robust weight, plus the bias variance where wanted), the GLS event estimate is
(docs/network-magnitude.md §2)

    P_j = Σ_i a_i,   M̂_j = Σ_i a_i y_ij / P_j,   V_j = 1/P_j,   w_ij = a_i / P_j,

with a = Σ_j⁻¹1 (:func:`fusion.network.gls_blocks.precision_row_weights`; a_i = 1/s_i² without
pairs).
Leaving station i out costs O(1) per row from the event sums (docs/network-magnitude.md §7):

    P^(−i) = P_j − a_i,   M̂^(−i) = (P_j M̂_j − a_i y_ij)/P^(−i),   V^(−i) = 1/P^(−i),
    influence_ij = M̂_j − M̂^(−i),   z_ij = (y_ij − M̂^(−i)) / sqrt(s_i² + V^(−i)).

A row of a flagged pair whose partner observed the same event leaves out the whole 2×2 block
(both rows), as docs/network-magnitude.md §7 asks (correlated readings leave together); its z then
compares the row with the estimate from the independent stations only.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
from numpy.typing import NDArray

from fusion.network.gls_blocks import PairCovariance, pair_partner_rows, precision_row_weights

__all__ = ["EventGLS", "event_gls"]


@dataclass(frozen=True, slots=True, eq=False)
class EventGLS:
    """GLS event estimates and leave-one-out quantities (see module docstring).

    Per-event arrays have shape (N,), per-row arrays shape (nnz,). Leave-one-out values are NaN
    where nothing is left (a one-station event, or a pair that is the whole event).
    """

    precision: NDArray[np.float64]
    magnitude: NDArray[np.float64]
    variance: NDArray[np.float64]
    weight: NDArray[np.float64]
    residual: NDArray[np.float64]
    loo_magnitude: NDArray[np.float64]
    loo_variance: NDArray[np.float64]
    loo_z: NDArray[np.float64]
    influence: NDArray[np.float64]


def event_gls(
    event: NDArray[np.int64],
    station: NDArray[np.int64],
    y: NDArray[np.float64],
    s2: NDArray[np.float64],
    n_events: int,
    pairs: PairCovariance | None = None,
    *,
    partner_row: NDArray[np.int64] | None = None,
) -> EventGLS:
    """GLS estimate per event and leave-one-(block-)out quantities per row.

    Parameters
    ----------
    event, station : ndarray of int, shape (nnz,)
        Row codes.
    y : ndarray of float, shape (nnz,)
        Bias-corrected station magnitudes m_ij − b_i (magnitude units).
    s2 : ndarray of float, shape (nnz,)
        Row variances (magnitude units squared), > 0.
    n_events : int
        N; events without rows get NaN.
    pairs : PairCovariance, optional
        Flagged pairs (covariances in magnitude units squared).
    partner_row : ndarray of int, optional
        Precomputed :func:`fusion.network.gls_blocks.pair_partner_rows`.

    Returns
    -------
    EventGLS
    """
    if pairs is not None and pairs.n_pairs and partner_row is None:
        partner_row = pair_partner_rows(event, station, pairs.partner)
    a = precision_row_weights(event, station, s2, pairs, partner_row=partner_row)
    P = np.asarray(np.bincount(event, weights=a, minlength=n_events), dtype=np.float64)
    num = np.bincount(event, weights=a * y, minlength=n_events)
    with np.errstate(invalid="ignore", divide="ignore"):
        M = num / P
        V = 1.0 / P
    P_row, num_row = P[event], num[event]
    a_out, ay_out = a.copy(), a * y
    if partner_row is not None:
        paired = partner_row >= 0
        other = partner_row[paired]
        a_out[paired] += a[other]
        ay_out[paired] += a[other] * y[other]
    P_loo = P_row - a_out
    # Guard cancellation: with nothing left P_loo is ~0 relative to P.
    empty = P_loo <= 1e-12 * np.abs(P_row)
    with np.errstate(invalid="ignore", divide="ignore"):
        M_loo = np.where(empty, np.nan, (num_row - ay_out) / P_loo)
        V_loo = np.where(empty, np.nan, 1.0 / P_loo)
        z = (y - M_loo) / np.sqrt(s2 + V_loo)
    return EventGLS(
        precision=P,
        magnitude=M,
        variance=V,
        weight=a / P_row,
        residual=y - M[event],
        loo_magnitude=M_loo,
        loo_variance=V_loo,
        loo_z=z,
        influence=M[event] - M_loo,
    )
