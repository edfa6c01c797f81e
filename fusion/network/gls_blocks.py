"""Row weights Σ_j⁻¹1 for event covariance matrices that are diagonal apart from 2×2 blocks.

For event j the station-error covariance is Σ_j = diag(s_i²) plus c_kl at (k, l) and (l, k) for
every flagged pair (k, l) whose both stations observed j (docs/model.md §2;
docs/network-magnitude.md §2). Stations belong to at most one flagged pair (a partner map), so Σ_j
is block diagonal with 1×1 and 2×2 blocks and

    (Σ_j⁻¹1)_i = 1/s_i²                                      (unpaired row)
    (Σ_j⁻¹1)_k = (s_l² − c_kl) / (s_k² s_l² − c_kl²)          (row k of a present pair, partner l)

[derived: inverse of a 2×2 matrix]. The GLS event estimate is then
M̂_j = Σ_i a_i (m_i − b_i) / P_j with a = Σ_j⁻¹1 and P_j = 1'Σ_j⁻¹1 (Aitken 1935), and
V_j = 1/P_j. All of it is vectorized over rows; a pair counts only where both partners have a
row in the same event.
"""

from __future__ import annotations

import numpy as np
from numpy.typing import NDArray

__all__ = ["PairCovariance", "pair_partner_rows", "precision_row_weights"]


class PairCovariance:
    """Flagged pairs as arrays: stations ``k[p]``, ``l[p]`` and error covariance ``c[p]``.

    Each station may appear in at most one pair (the pair search, docs/pairs.md §3, builds partner
    maps that way).

    Parameters
    ----------
    k, l : array_like of int, shape (n_pairs,)
        Station codes; order inside a pair does not matter.
    c : array_like of float, shape (n_pairs,)
        Error covariance c_kl in magnitude units squared.
    n_stations : int
        K, the size of the station table.
    """

    __slots__ = ("c", "k", "l", "partner", "partner_cov")

    def __init__(
        self, k: NDArray[np.int64], l: NDArray[np.int64], c: NDArray[np.float64], n_stations: int
    ) -> None:
        self.k = np.asarray(k, dtype=np.int64)
        self.l = np.asarray(l, dtype=np.int64)
        self.c = np.asarray(c, dtype=np.float64)
        stations = np.concatenate([self.k, self.l])
        if np.unique(stations).shape[0] != stations.shape[0]:
            raise ValueError("a station may belong to at most one flagged pair")
        self.partner = np.full(n_stations, -1, dtype=np.int64)
        self.partner[self.k] = self.l
        self.partner[self.l] = self.k
        self.partner_cov = np.zeros(n_stations)
        self.partner_cov[self.k] = self.c
        self.partner_cov[self.l] = self.c

    @classmethod
    def empty(cls, n_stations: int) -> PairCovariance:
        """No flagged pairs."""
        z = np.zeros(0, dtype=np.int64)
        return cls(z, z, np.zeros(0), n_stations)

    @property
    def n_pairs(self) -> int:
        """Number of flagged pairs."""
        return int(self.k.shape[0])


def pair_partner_rows(
    event: NDArray[np.int64], station: NDArray[np.int64], partner: NDArray[np.int64]
) -> NDArray[np.int64]:
    """For each row, the row index of its pair partner in the same event, or -1.

    Parameters
    ----------
    event, station : ndarray of int, shape (nnz,)
        Row codes (any order).
    partner : ndarray of int, shape (K,)
        Partner station of each station, -1 if none.
    """
    nnz = event.shape[0]
    out = np.full(nnz, -1, dtype=np.int64)
    has = partner[station] >= 0
    if not np.any(has) or nnz == 0:
        return out
    n_st = int(partner.shape[0])
    key = event.astype(np.int64) * n_st + station
    order = np.argsort(key, kind="stable")
    sorted_key = key[order]
    rows = np.flatnonzero(has)
    want = event[rows].astype(np.int64) * n_st + partner[station[rows]]
    pos = np.searchsorted(sorted_key, want)
    pos_ok = pos < nnz
    found = np.zeros(rows.shape[0], dtype=bool)
    found[pos_ok] = sorted_key[pos[pos_ok]] == want[pos_ok]
    out[rows[found]] = order[pos[found]]
    return out


def precision_row_weights(
    event: NDArray[np.int64],
    station: NDArray[np.int64],
    s2: NDArray[np.float64],
    pairs: PairCovariance | None = None,
    *,
    partner_row: NDArray[np.int64] | None = None,
) -> NDArray[np.float64]:
    """a = Σ_j⁻¹1 row by row (see module docstring); sums over an event give P_j.

    Parameters
    ----------
    event, station : ndarray of int, shape (nnz,)
    s2 : ndarray of float, shape (nnz,)
        Row variance s_i² (magnitude units squared), already divided by any robust weight.
    pairs : PairCovariance, optional
        Flagged pairs; ``None`` gives the diagonal case a = 1/s².
    partner_row : ndarray of int, optional
        Precomputed :func:`pair_partner_rows`; computed when omitted.

    Returns
    -------
    ndarray of float, shape (nnz,)
        Unnormalised GLS weights; can be negative for a strongly correlated pair whose partner
        is much more precise (docs/network-magnitude.md §2, worked example E3).
    """
    a = 1.0 / s2
    if pairs is None or pairs.n_pairs == 0:
        return a
    if partner_row is None:
        partner_row = pair_partner_rows(event, station, pairs.partner)
    rows = np.flatnonzero(partner_row >= 0)
    if rows.shape[0] == 0:
        return a
    other = partner_row[rows]
    c = pairs.partner_cov[station[rows]]
    det = s2[rows] * s2[other] - c * c
    a[rows] = (s2[other] - c) / det
    return a
