"""Correlated station pairs without ground truth (docs/pairs.md).

Two stations whose errors share a term (co-located sites, a common path) break the independence
the GLS weights assume, and a plain residual correlation cannot find them: with all-station GLS
residuals and independent errors E[r_kj r_lj] = −V_j, a null correlation of −1/(n−1) for n
equal stations (docs/pairs.md §1, worked example E4).

Leave-two-out statistic
-----------------------
For a pair (k, l) and each event j holding both and at least one other station, the reference
M̃_j is the GLS estimate over S_j without k, l and their current flagged partners, with variance
Ṽ_j. With y_ij = m_ij − b̂_i and u_kj = y_kj − M̃_j [derived, docs/pairs.md §2]:

    E[u_k u_l] = c_kl + Ṽ_j,   Var u_k = σ_k² + Ṽ_j,
    q_j = u_kj u_lj − Ṽ_j,     ĉ_kl = Σ γ_j q_j / Σ γ_j,   ρ̂ = ĉ/(σ_k σ_l),
    T_self = Σ γ_j q_j / sqrt(Σ γ_j² (q_j − ĉ)²)                        (the test statistic)
    T_model = Σ γ_j q_j / sqrt(Σ γ_j² [(σ_k² + Ṽ_j)(σ_l² + Ṽ_j) + Ṽ_j²])  (reported only)

With γ ≡ 1, T_self = Σq/sqrt(Σq² − (Σq)²/n), as in docs/pairs.md §2. T ≈ N(0, 1) under H0: c_kl = 0;
p = 2(1 − Φ(|T|)). Pairs with fewer than ``min_shared`` eligible events are not tested.

Partner exclusion and flagging
------------------------------
A correlated partner left inside the reference of another pair induces a negative covariance
(the first pass of the planning simulation flagged three false negative-ρ pairs). The search
therefore iterates (at most ``max_rounds`` passes, no partners at the start): test all pairs,
control the family by Benjamini–Hochberg at ``fdr_q``, then choose partners among the rejected pairs
with ρ̂ > 0 **greedily by significance** (smallest p first, ties by larger |T|): a pair is taken
only if neither station is already in a taken pair, so each station is in at most one flagged
pair (the block structure :class:`fusion.network.gls_blocks.PairCovariance` needs). A rejected
positive
pair that loses to a more significant pair of one of its stations is kept in the table with
status ``paired_elsewhere``. The next pass builds references without those partners (and with
their covariance in the other references); the search stops when the partner set repeats.

The covariance handed on is shrunk and capped (docs/pairs.md §4):
c = ĉ·n/(n + n0) with n the effective number of events (Σγ)²/Σγ², then
|c| ≤ 0.9·min(σ_k², σ_l²), i.e. |ρ| ≤ 0.9·min(σ_k/σ_l, σ_l/σ_k), which keeps both GLS weights
of the pair positive (a larger ρ gives the noisier station a negative weight, example E3).

Robust weights
--------------
A fitter's Student-t weight ω_ij (docs/estimator.md §6) comes from a leave-one-out residual whose
reference holds the tested stations k and l; using every ω in the references therefore makes the
reference depend on e_k and e_l and biases ĉ negative. Measured on the simulator of
docs/simulation.md without pairs (K = 40, N = 4000, true parameters, ν = 4 weights, seeds 5 and 6):
mean T −0.72…−0.75 with all weights, −0.49…−0.52 with ω capped at 1, −0.03…+0.01 when only rows with
ω < 0.3 keep their weight; with 1 % outlier cells and no weights +0.41…+0.42 (outliers inflate the
true reference variance above Ṽ), with the rule −0.02…+0.03. So only gross outliers
(ω < ``outlier_weight`` = 0.3, the outlier-listing level of docs/estimator.md §6) are down-weighted
(s² = σ²/ω) in the references, and an event where k or l itself is a gross outlier does not
enter the pair's statistic (such a product only adds heavy-tailed noise); every other row counts
fully. Ṽ is the sandwich variance a'Σa/(1'a)² of the reference with the model covariance Σ and
weights a (= 1/P̃ without weights).

Performance (measured, §13 simulator, K = 40, N = 4000, mar mode, true parameters, ν = 4
weights, seeds 0–7): the three true pairs (ρ = 0.4, 0.5, 0.6) flagged in every run, one false
pair in 25 flags; ρ̂ 0.37–0.45, 0.44–0.62, 0.55–0.64; null SD(T) 0.97–1.08 after the partner
rounds; pairs sharing a station with a true pair read mean T −0.42…−0.73 in round 0 and
−0.11…+0.03 after, and rejected negative-ρ pairs fall from 9 to 3 (over the eight runs).
0.14–0.21 s per call (48k–55k readings).

Confidence interval on ρ
------------------------
The uncentred correlation of (u_k, u_l) is r_u = (c + V̄)/sqrt((σ_k² + V̄)(σ_l² + V̄)) with V̄ the
weighted mean Ṽ [derived]; its null value is ρ0 = V̄/sqrt((σ_k² + V̄)(σ_l² + V̄)) (+1/(n−1) for
equal stations, E4). The interval is Fisher's: atanh(r_u) ± z_{1−α/2}/sqrt(n_eff − 3) (Fisher
1921 [from memory]), mapped back to ρ through the same relation and clipped to [−1, 1].

Label-free global checks (docs/pairs.md §8)
-------------------------------------
:func:`global_independence_test` is a parametric bootstrap of G = Σ T² over the unflagged
pairs; :func:`difference_tetrads` is the model-free tetrad diagnostic.

All per-row work is vectorized over the within-event row pairs (size Σ_j n_j(n_j − 1)/2, built
once); sums per pair use ``np.bincount``.

References
----------
Benjamini Y., Hochberg Y. (1995). JRSS-B 57(1):289–300.
Fisher R. A. (1921). On the "probable error" of a coefficient of correlation deduced from a small
sample. Metron 1:3–32 [from memory].
Bollen K. A., Ting K. (1993). Confirmatory tetrad analysis. Sociological Methodology 23:147–175.
Aitken A. C. (1935). On least squares and linear combination of observations. Proc. R. Soc.
Edinburgh 55:42–48.
"""

from __future__ import annotations

import dataclasses
import itertools
import warnings
from collections.abc import Callable
from dataclasses import dataclass
from enum import StrEnum
from typing import Any, Literal

import numpy as np
import pandas as pd
from numpy.typing import ArrayLike, NDArray
from scipy import special, stats

from fusion.model.multiple_testing import fdr_control
from fusion.network.gls_blocks import PairCovariance, pair_partner_rows, precision_row_weights
from fusion.observations import ObservationSet
from stations.errors import ConfigError, DegenerateDataWarning

__all__ = [
    "GlobalTestResult",
    "PairDetection",
    "PairStatus",
    "TetradResult",
    "detect_correlated_pairs",
    "difference_tetrads",
    "fisher_z_interval",
    "global_independence_test",
    "min_shared_for_power",
]

#: Largest |ρ| allowed for a flagged pair, as a fraction of min(σ_k/σ_l, σ_l/σ_k)
#: (docs/pairs.md §4).
RHO_CAP_FRACTION = 0.9
#: Confidence level of the reported interval on ρ (fraction).
CI_LEVEL = 0.95

TABLE_COLUMNS = (
    "station_k",
    "station_l",
    "k",
    "l",
    "n_shared",
    "n_effective",
    "c_hat",
    "rho_hat",
    "rho_ci_low",
    "rho_ci_high",
    "rho_null",
    "r_raw",
    "statistic",
    "statistic_model",
    "p_value",
    "q_value",
    "rejected",
    "flagged",
    "status",
)


class PairStatus(StrEnum):
    """Outcome of one tested pair (column ``status`` of :attr:`PairDetection.table`)."""

    FLAGGED = "flagged"
    PAIRED_ELSEWHERE = "paired_elsewhere"  # rejected, ρ̂ > 0, a station is in a stronger pair
    NEGATIVE = "negative"  # rejected with ρ̂ ≤ 0: not used as a partner (docs/pairs.md §3)
    NOT_SIGNIFICANT = "not_significant"


@dataclass(frozen=True, slots=True, eq=False)
class PairDetection:
    """Result of :func:`detect_correlated_pairs`.

    Attributes
    ----------
    table : pandas.DataFrame
        One row per tested pair (n_shared ≥ ``min_shared``) of the last pass, sorted by
        p-value. Columns: ``station_k``, ``station_l`` (station ids, k < l in station-table
        order), ``k``, ``l`` (station codes), ``n_shared`` (eligible events),
        ``n_effective`` ((Σγ)²/Σγ²), ``c_hat`` (magnitude units²), ``rho_hat`` (ĉ/(σ_k σ_l)
        clipped to [−1, 1]),
        ``rho_ci_low``, ``rho_ci_high`` (95 % Fisher-z interval), ``rho_null`` (null
        correlation of the leave-two-out residuals), ``r_raw`` (their observed uncentred
        correlation), ``statistic`` (T_self), ``statistic_model`` (T_model), ``p_value``,
        ``q_value`` (BH or BY), ``rejected`` (at ``fdr_q``), ``flagged``, ``status``
        (:class:`PairStatus`).
    covariance : PairCovariance
        The flagged pairs with c shrunk by n/(n + n0) and capped (module docstring).
    n_rounds : int
        Test passes run.
    converged : bool
        True if the partner set of the last pass equals that of the pass before (or no pair
        was flagged); False if ``max_rounds`` stopped the search first.
    """

    table: pd.DataFrame
    covariance: PairCovariance
    n_rounds: int
    converged: bool


@dataclass(frozen=True, slots=True, eq=False)
class GlobalTestResult:
    """Result of :func:`global_independence_test`.

    Attributes
    ----------
    statistic : float
        G on the data.
    p_value : float
        (1 + #{G* ≥ G})/(B + 1).
    replicates : int
        B, the number of bootstrap data sets.
    method : str
        ``"sum_sq"`` (G = Σ T²) or ``"max_abs"`` (G = max |T|), over unflagged tested pairs.
    null_statistics : ndarray, shape (B,)
        G* of each replicate.
    n_pairs : int
        Number of pairs entering G on the data.
    """

    statistic: float
    p_value: float
    replicates: int
    method: str
    null_statistics: NDArray[np.float64]
    n_pairs: int


@dataclass(frozen=True, slots=True, eq=False)
class TetradResult:
    """Result of :func:`difference_tetrads`.

    Attributes
    ----------
    table : pandas.DataFrame
        One row per pair with ≥ ``min_shared`` events that hold two more stations: ``station_k``,
        ``station_l``, ``k``, ``l``, ``n_shared``, ``mean_product`` (mean tetrad product,
        magnitude units²; estimates c_kl when the other stations are independent),
        ``z`` (mean over its standard error), ``p_value`` (two-sided, normal).
    family_mean, family_z : float
        Per-event sum of the tetrad products of the ``family`` pairs, averaged over events,
        and its z; NaN without a family.
    family_n_events : int
        Events entering the family statistic.
    """

    table: pd.DataFrame
    family_mean: float
    family_z: float
    family_n_events: int


# -- small public helpers ----------------------------------------------------------------------


def fisher_z_interval(
    r: ArrayLike, n: ArrayLike, level: float = CI_LEVEL
) -> tuple[NDArray[np.float64], NDArray[np.float64]]:
    """Fisher-z confidence interval of a correlation: tanh(atanh r ± z_{(1+level)/2}/sqrt(n − 3)).

    Parameters
    ----------
    r : array_like of float
        Correlation coefficients in [−1, 1].
    n : array_like of float
        Sample sizes; n ≤ 3 gives the whole interval [−1, 1].
    level : float, default=0.95
        Confidence level, a fraction.

    Returns
    -------
    low, high : ndarray of float

    References
    ----------
    Fisher (1921) [from memory]; same construction as the default of
    ``scipy.stats.pearsonr(...).confidence_interval()``.
    """
    r_arr = np.clip(np.asarray(r, dtype=np.float64), -1.0, 1.0)
    n_arr = np.asarray(n, dtype=np.float64)
    crit = special.ndtri(0.5 + level / 2.0)
    with np.errstate(divide="ignore", invalid="ignore"):
        half = crit / np.sqrt(n_arr - 3.0)
        zr = np.arctanh(r_arr)
        low = np.tanh(zr - half)
        high = np.tanh(zr + half)
    small = ~(n_arr > 3.0)
    low = np.where(small, -1.0, low)
    high = np.where(small, 1.0, high)
    return np.asarray(low, dtype=np.float64), np.asarray(high, dtype=np.float64)


def min_shared_for_power(rho: ArrayLike, alpha: float = 0.05, power: float = 0.8) -> NDArray[Any]:
    """Shared events needed to detect correlation ρ, two-sided level α, given power (E11).

    n = ceil(((z_{1−α/2} + z_power)/atanh ρ)² + 3) (docs/pairs.md §6, Fisher-z approximation).

    Parameters
    ----------
    rho : array_like of float
        Correlations in (0, 1).
    alpha : float, default=0.05
        Two-sided significance level (fraction).
    power : float, default=0.8

    Returns
    -------
    ndarray of int
    """
    rho_arr = np.asarray(rho, dtype=np.float64)
    z = special.ndtri(1.0 - alpha / 2.0) + special.ndtri(power)
    return np.ceil((z / np.arctanh(rho_arr)) ** 2 + 3.0).astype(np.int64)


# -- input checks ------------------------------------------------------------------------------


def _station_vector(x: ArrayLike, name: str, K: int, func: str) -> NDArray[np.float64]:
    arr = np.asarray(x, dtype=np.float64)
    if arr.shape != (K,):
        raise ConfigError(
            f"The {name!r} parameter of {func} must have shape ({K},), one value per station "
            f"of the observation set. Got shape {arr.shape} instead."
        )
    return arr


def _check_sigma2(sigma2: NDArray[np.float64], func: str) -> None:
    bad = ~(np.isfinite(sigma2) & (sigma2 > 0.0))
    if np.any(bad):
        i = int(np.flatnonzero(bad)[0])
        raise ConfigError(
            f"The 'sigma2' parameter of {func} must be finite and > 0 for every station. "
            f"Got {sigma2[i]!r} at position {i} instead."
        )


def _check_int(value: int, name: str, low: int, func: str) -> None:
    if int(value) != value or value < low:
        raise ConfigError(
            f"The {name!r} parameter of {func} must be an int in the range [{low}, inf). "
            f"Got {value!r} instead."
        )


def _usable_rows(obs: ObservationSet) -> NDArray[np.bool_]:
    """Detected, unclipped rows with a finite magnitude (a clipped value is only a bound)."""
    return obs.detected & ~obs.clipped & np.isfinite(obs.magnitude)


def _row_vector(
    x: ArrayLike | None, obs: ObservationSet, use: NDArray[np.bool_], name: str, func: str
) -> NDArray[np.float64] | None:
    """Align a per-row vector given for all rows of ``obs`` or for its detected rows only."""
    if x is None:
        return None
    arr = np.asarray(x, dtype=np.float64)
    if arr.shape == (obs.n_obs,):
        return arr[use]
    n_det = int(obs.detected.sum())
    if arr.shape == (n_det,):
        return arr[use[obs.detected]]
    raise ConfigError(
        f"The {name!r} parameter of {func} must have shape ({obs.n_obs},) (all rows) or "
        f"({n_det},) (detected rows). Got shape {arr.shape} instead."
    )


# -- within-event row pairs ------------------------------------------------------------------

#: Within-event row pairs are generated and reduced in chunks of whole events holding about
#: this many pairs (memory stays bounded for dense networks; an event with more is one chunk).
PAIR_CHUNK = 1_000_000
#: Up to this many station pairs (K²), a dense key → pair-id table replaces a binary search.
_DENSE_KEYS = 4_000_000


@dataclass(frozen=True, slots=True, eq=False)
class _RowPairs:
    """Within-event row pairs of one chunk: rows ``first``, ``second`` (stations k < l)."""

    event: NDArray[np.int64]
    first: NDArray[np.int64]
    second: NDArray[np.int64]
    pair: NDArray[np.int64]


@dataclass(frozen=True, slots=True, eq=False)
class _PairIndex:
    """The station pairs co-observed in events with ≥ 3 rows, and the chunks that list them.

    Rows must be sorted by event. Pairs of two rows of the same station (two components of one
    station) are dropped: they are not a station pair.
    """

    counts: NDArray[np.int64]
    start: NDArray[np.int64]
    chunks: tuple[tuple[int, int], ...]
    pair_k: NDArray[np.int64]
    pair_l: NDArray[np.int64]
    dense: NDArray[np.int64] | None
    n_stations: int

    @property
    def n_pairs(self) -> int:
        return int(self.pair_k.shape[0])

    def _keys(
        self, event: NDArray[np.int64], station: NDArray[np.int64], lo: int, hi: int
    ) -> tuple[NDArray[np.int64], NDArray[np.int64], NDArray[np.int64]]:
        """Row pairs (r1 < r2 in row order) of rows [lo, hi) by repeat/offset arithmetic."""
        ev = event[lo:hi]
        cnt = self.counts[ev]
        pos = np.arange(lo, hi, dtype=np.int64) - self.start[ev]
        n_after = np.where(cnt >= 3, cnt - pos - 1, 0).astype(np.int64)
        first = np.repeat(np.arange(lo, hi, dtype=np.int64), n_after)
        base = np.cumsum(n_after) - n_after
        offset = np.arange(first.shape[0], dtype=np.int64) - np.repeat(base, n_after)
        second = first + 1 + offset
        s1, s2 = station[first], station[second]
        keep = s1 != s2
        first, second, s1, s2 = first[keep], second[keep], s1[keep], s2[keep]
        swap = s1 > s2
        first, second = np.where(swap, second, first), np.where(swap, first, second)
        key = np.minimum(s1, s2) * np.int64(self.n_stations) + np.maximum(s1, s2)
        return first, second, key

    def rows(
        self, event: NDArray[np.int64], station: NDArray[np.int64], chunk: tuple[int, int]
    ) -> _RowPairs:
        """The row pairs of one chunk with their pair ids."""
        first, second, key = self._keys(event, station, *chunk)
        if self.dense is not None:
            pid = self.dense[key]
        else:
            keys = self.pair_k * np.int64(self.n_stations) + self.pair_l
            pid = np.searchsorted(keys, key).astype(np.int64)
        return _RowPairs(event=event[first], first=first, second=second, pair=pid)


def _pair_index(
    event: NDArray[np.int64], station: NDArray[np.int64], n_events: int, n_stations: int
) -> _PairIndex:
    """Chunks of whole events and the table of co-observed station pairs (one pass)."""
    counts = np.bincount(event, minlength=n_events).astype(np.int64)
    start = (np.cumsum(counts) - counts).astype(np.int64)
    per_event = np.where(counts >= 3, counts * (counts - 1) // 2, 0)
    cum = np.cumsum(per_event)
    total = int(cum[-1]) if cum.shape[0] else 0
    cuts = np.unique(np.searchsorted(cum, np.arange(PAIR_CHUNK, total, PAIR_CHUNK), "right"))
    ev_bounds = np.r_[0, cuts, n_events].astype(np.int64)
    row_bounds = np.r_[start, event.shape[0]][ev_bounds]
    chunks = tuple((int(a), int(b)) for a, b in itertools.pairwise(row_bounds.tolist()) if b > a)
    K = int(n_stations)
    proto = _PairIndex(counts, start, chunks, np.zeros(0, np.int64), np.zeros(0, np.int64), None, K)
    if K * K <= _DENSE_KEYS:
        seen = np.zeros(K * K, dtype=bool)
        for ch in chunks:
            seen[proto._keys(event, station, *ch)[2]] = True
        keys = np.flatnonzero(seen).astype(np.int64)
        dense = np.full(K * K, -1, dtype=np.int64)
        dense[keys] = np.arange(keys.shape[0], dtype=np.int64)
    else:
        parts = [np.unique(proto._keys(event, station, *ch)[2]) for ch in chunks]
        keys = np.unique(np.concatenate(parts)) if parts else np.zeros(0, np.int64)
        dense = None
    return _PairIndex(counts, start, chunks, keys // K, keys % K, dense, K)


# -- one pass of the leave-two-out statistic ----------------------------------------------------


@dataclass(frozen=True, slots=True, eq=False)
class _PairStats:
    """Per-pair sums of one pass (arrays of length n_pairs of the index)."""

    n: NDArray[np.int64]
    n_eff: NDArray[np.float64]
    c_hat: NDArray[np.float64]
    t_self: NDArray[np.float64]
    t_model: NDArray[np.float64]
    v_bar: NDArray[np.float64]
    r_raw: NDArray[np.float64]


def _leave_two_out(
    index: _PairIndex,
    event: NDArray[np.int64],
    station: NDArray[np.int64],
    y: NDArray[np.float64],
    s2_row: NDArray[np.float64],
    sigma2: NDArray[np.float64],
    gamma: NDArray[np.float64],
    n_events: int,
    partners: PairCovariance | None,
    member: NDArray[np.bool_] | None = None,
) -> _PairStats:
    """Leave-two-out sums for every pair (module docstring), partners removed with the pair."""
    if partners is not None and partners.n_pairs:
        prow = pair_partner_rows(event, station, partners.partner)
    else:
        partners, prow = None, np.full(event.shape[0], -1, dtype=np.int64)
    a = precision_row_weights(event, station, s2_row, partners, partner_row=prow)
    # Row shares of a'Σa (sandwich variance with the model Σ: σ² on the diagonal and the
    # partners' c); sums to P when no robust weight is below the outlier level.
    v = a * a * sigma2[station]
    if partners is not None:
        has = prow >= 0
        v[has] += a[has] * a[prow[has]] * partners.partner_cov[station[has]]
    P = np.bincount(event, weights=a, minlength=n_events)
    Ny = np.bincount(event, weights=a * y, minlength=n_events)
    Vs = np.bincount(event, weights=v, minlength=n_events)
    cnt = index.counts
    m = index.n_pairs
    names = ("n", "sg", "sg2", "sq", "sgq2", "sq2", "sv", "sm", "suu", "skk", "sll")
    acc = {name: np.zeros(m) for name in names}
    sk2_all = sigma2[index.pair_k]
    sl2_all = sigma2[index.pair_l]
    for chunk in index.chunks:
        rp = index.rows(event, station, chunk)
        r1, r2, ev, pid = rp.first, rp.second, rp.event, rp.pair
        rm_a = a[r1] + a[r2]
        rm_ay = a[r1] * y[r1] + a[r2] * y[r2]
        rm_v = v[r1] + v[r2]
        rm_n = np.full(r1.shape[0], 2, dtype=np.int64)
        if partners is not None:
            for r, other in ((r1, r2), (r2, r1)):
                p = prow[r]
                extra = (p >= 0) & (p != other)
                pe = p[extra]
                rm_a[extra] += a[pe]
                rm_ay[extra] += a[pe] * y[pe]
                rm_v[extra] += v[pe]
                rm_n[extra] += 1
        P_ref = P[ev] - rm_a
        ok = ((cnt[ev] - rm_n) >= 1) & (P_ref > 1e-12 * P[ev])
        if member is not None:
            ok &= member[r1] & member[r2]
        P_ref = np.where(ok, P_ref, 1.0)
        M_ref = (Ny[ev] - rm_ay) / P_ref
        V_ref = np.maximum(Vs[ev] - rm_v, 0.0) / P_ref**2
        uk = y[r1] - M_ref
        ul = y[r2] - M_ref
        q = uk * ul - V_ref
        g = np.where(ok, gamma[ev], 0.0)
        gq = g * q
        var_model = (sk2_all[pid] + V_ref) * (sl2_all[pid] + V_ref) + V_ref**2
        terms = {
            "n": ok.astype(np.float64),
            "sg": g,
            "sg2": g * g,
            "sq": gq,
            "sgq2": g * gq,
            "sq2": gq * gq,
            "sv": g * V_ref,
            "sm": g * g * var_model,
            "suu": g * uk * ul,
            "skk": g * uk * uk,
            "sll": g * ul * ul,
        }
        for name, w in terms.items():
            acc[name] += np.bincount(pid, weights=w, minlength=m)
    with np.errstate(divide="ignore", invalid="ignore"):
        c_hat = acc["sq"] / acc["sg"]
        var_self = acc["sq2"] - 2.0 * c_hat * acc["sgq2"] + c_hat**2 * acc["sg2"]
        t_self = acc["sq"] / np.sqrt(np.maximum(var_self, 0.0))
        t_model = acc["sq"] / np.sqrt(acc["sm"])
        n_eff = acc["sg"] ** 2 / acc["sg2"]
        v_bar = acc["sv"] / acc["sg"]
        r_raw = acc["suu"] / np.sqrt(acc["skk"] * acc["sll"])
    return _PairStats(
        n=np.rint(acc["n"]).astype(np.int64),
        n_eff=n_eff,
        c_hat=c_hat,
        t_self=t_self,
        t_model=t_model,
        v_bar=v_bar,
        r_raw=r_raw,
    )


def _rho_interval(
    c_hat: NDArray[np.float64],
    v_bar: NDArray[np.float64],
    sk2: NDArray[np.float64],
    sl2: NDArray[np.float64],
    n_eff: NDArray[np.float64],
) -> tuple[NDArray[np.float64], NDArray[np.float64], NDArray[np.float64]]:
    """Null ρ0 of the leave-two-out residuals and the Fisher-z interval on ρ (module docstring)."""
    scale = np.sqrt((sk2 + v_bar) * (sl2 + v_bar))
    r_u = np.clip((c_hat + v_bar) / scale, -1.0 + 1e-12, 1.0 - 1e-12)
    low, high = fisher_z_interval(r_u, n_eff, CI_LEVEL)
    sd = np.sqrt(sk2 * sl2)
    rho_low = np.clip((low * scale - v_bar) / sd, -1.0, 1.0)
    rho_high = np.clip((high * scale - v_bar) / sd, -1.0, 1.0)
    return v_bar / scale, rho_low, rho_high


def _greedy_partners(
    candidates: NDArray[np.bool_],
    p_value: NDArray[np.float64],
    stat: NDArray[np.float64],
    k: NDArray[np.int64],
    l: NDArray[np.int64],
    n_stations: int,
) -> NDArray[np.bool_]:
    """Pick pairs by significance so that each station is in at most one (module docstring).

    A sequential choice over the (few) rejected pairs, not over rows or events.
    """
    chosen = np.zeros(k.shape[0], dtype=bool)
    idx = np.flatnonzero(candidates)
    order = idx[np.lexsort((-np.abs(stat[idx]), p_value[idx]))]
    used = np.zeros(n_stations, dtype=bool)
    for i in order:
        if not (used[k[i]] or used[l[i]]):
            chosen[i] = True
            used[k[i]] = used[l[i]] = True
    return chosen


def _shrunk_capped(
    c_hat: NDArray[np.float64],
    n_eff: NDArray[np.float64],
    sk2: NDArray[np.float64],
    sl2: NDArray[np.float64],
    n0: float,
) -> NDArray[np.float64]:
    """c = ĉ n/(n + n0), then |c| ≤ 0.9 min(σ_k², σ_l²) (docs/pairs.md §4)."""
    c = c_hat * n_eff / (n_eff + n0)
    cap = RHO_CAP_FRACTION * np.minimum(sk2, sl2)
    return np.clip(c, -cap, cap)


@dataclass(frozen=True, slots=True, eq=False)
class _Prepared:
    """Usable rows of an observation set, ready for the pair statistics."""

    event: NDArray[np.int64]
    station: NDArray[np.int64]
    y: NDArray[np.float64]
    s2_row: NDArray[np.float64]
    gamma: NDArray[np.float64]
    index: _PairIndex
    member: NDArray[np.bool_] | None = None


def _prepare(
    obs: ObservationSet,
    bias: NDArray[np.float64],
    sigma2: NDArray[np.float64],
    gamma: NDArray[np.float64] | None,
    omega: NDArray[np.float64] | None,
    func: str,
    index: _PairIndex | None = None,
    outlier_weight: float = 0.3,
) -> _Prepared:
    use = _usable_rows(obs)
    ev, st = obs.event[use], obs.station[use]
    om = _row_vector(omega, obs, use, "omega", func)
    member = None
    if om is None:
        s2_row = sigma2[st]
    else:
        # Only gross outliers keep their down-weight (see "Robust weights" in the module
        # docstring): the smooth part of ω depends on the tested stations.
        member = om >= outlier_weight
        om = np.where(member, 1.0, np.maximum(om, 1e-12))
        s2_row = sigma2[st] / om
    if gamma is None:
        g = np.ones(obs.n_events)
    else:
        g = np.asarray(gamma, dtype=np.float64)
        if g.shape != (obs.n_events,):
            raise ConfigError(
                f"The 'gamma' parameter of {func} must have shape ({obs.n_events},), one time "
                f"weight per event. Got shape {g.shape} instead."
            )
    if index is None:
        index = _pair_index(ev, st, obs.n_events, obs.n_stations)
    return _Prepared(
        event=ev,
        station=st,
        y=obs.magnitude[use] - bias[st],
        s2_row=s2_row,
        gamma=g,
        index=index,
        member=member,
    )


def _empty_table() -> pd.DataFrame:
    return pd.DataFrame({c: pd.Series(dtype=object) for c in TABLE_COLUMNS})


def detect_correlated_pairs(
    obs: ObservationSet,
    bias: ArrayLike,
    sigma2: ArrayLike,
    *,
    gamma: ArrayLike | None = None,
    omega: ArrayLike | None = None,
    min_shared: int = 30,
    fdr_q: float = 0.05,
    max_rounds: int = 3,
    shrink_n0: float = 20.0,
    outlier_weight: float = 0.3,
    fdr_method: str = "bh",
) -> PairDetection:
    """Find station pairs with correlated errors by the leave-two-out test (docs/pairs.md).

    Parameters
    ----------
    obs : ObservationSet
        Station magnitudes; only detected, unclipped rows with a finite magnitude are used.
    bias : array_like, shape (K,)
        Fitted station biases b̂_i (magnitude units).
    sigma2 : array_like, shape (K,)
        Fitted error variances σ̂_i² (magnitude units squared), > 0.
    gamma : array_like, shape (N,), optional
        Time weights γ_j of the events (1 without forgetting).
    omega : array_like, shape (nnz,), optional
        Robust weights ω_ij, for all rows of ``obs`` or for its detected rows; a reference
        built from down-weighted rows uses s² = σ²/ω, for rows with ω < ``outlier_weight``
        only (module docstring, "Robust weights").
    min_shared : int, default=30
        n_min: pairs with fewer eligible events (both stations plus at least one other) are
        not tested.
    fdr_q : float, default=0.05
        Benjamini–Hochberg FDR level of the family of pair tests.
    max_rounds : int, default=3
        Maximum number of test passes (partner-exclusion rounds).
    shrink_n0 : float, default=20.0
        n0 of the shrinkage ĉ·n/(n + n0) of the covariance handed on.
    outlier_weight : float, default=0.3
        Rows whose ω is below this are down-weighted in the references; the others count
        fully (the outlier-listing level of docs/estimator.md §6).
    fdr_method : {'bh', 'by'}, default='bh'
        Benjamini–Hochberg, or Benjamini–Yekutieli for an alarm level valid under any
        dependence between pair tests (docs/pairs.md §3; :mod:`fusion.model.multiple_testing`).

    Returns
    -------
    PairDetection

    Raises
    ------
    ConfigError
        If a parameter has the wrong shape or range (the message names it).

    Notes
    -----
    See the module docstring for the statistic, the partner rule (each station in at most one
    flagged pair, the most significant kept, the others marked ``paired_elsewhere``) and the
    shrinkage and cap of the covariance. Two rows of the same station in one event (two
    components) are not a pair and are not removed from each other's references.
    """
    func = "detect_correlated_pairs"
    K = obs.n_stations
    b = _station_vector(bias, "bias", K, func)
    s2 = _station_vector(sigma2, "sigma2", K, func)
    _check_sigma2(s2, func)
    _check_int(min_shared, "min_shared", 4, func)
    _check_int(max_rounds, "max_rounds", 1, func)
    if not 0.0 < fdr_q < 1.0:
        raise ConfigError(
            f"The 'fdr_q' parameter of {func} must be a float in the range (0, 1). "
            f"Got {fdr_q!r} instead."
        )
    if not shrink_n0 >= 0.0:
        raise ConfigError(
            f"The 'shrink_n0' parameter of {func} must be a float in the range [0, inf). "
            f"Got {shrink_n0!r} instead."
        )
    prep = _prepare(
        obs,
        b,
        s2,
        None if gamma is None else np.asarray(gamma, dtype=np.float64),
        None if omega is None else np.asarray(omega, dtype=np.float64),
        func,
        outlier_weight=float(outlier_weight),
    )
    partners: PairCovariance | None = None
    previous: frozenset[tuple[int, int]] | None = frozenset()
    converged = False
    n_rounds = 0
    table = _empty_table()
    covariance = PairCovariance.empty(K)
    for _ in range(int(max_rounds)):
        n_rounds += 1
        found = _test_round(
            obs,
            prep,
            s2,
            partners,
            min_shared=min_shared,
            fdr_q=fdr_q,
            fdr_method=fdr_method,
            shrink_n0=float(shrink_n0),
        )
        if found is None:
            converged = True
            break
        table, covariance = found
        current = frozenset(zip(covariance.k.tolist(), covariance.l.tolist(), strict=True))
        if current == previous:
            converged = True
            break
        previous = current
        partners = covariance
    return PairDetection(table=table, covariance=covariance, n_rounds=n_rounds, converged=converged)


def _test_round(
    obs: ObservationSet,
    prep: _Prepared,
    s2: NDArray[np.float64],
    partners: PairCovariance | None,
    *,
    min_shared: int,
    fdr_q: float,
    fdr_method: str,
    shrink_n0: float,
) -> tuple[pd.DataFrame, PairCovariance] | None:
    """One pass: leave-two-out statistics with the current partners excluded, FDR control,
    the partner rule and the shrunk covariances; None when no pair has ``min_shared`` events."""
    K = obs.n_stations
    index = prep.index
    ps = _leave_two_out(
        index,
        prep.event,
        prep.station,
        prep.y,
        prep.s2_row,
        s2,
        prep.gamma,
        obs.n_events,
        partners,
        prep.member,
    )
    idx = np.flatnonzero(ps.n >= min_shared)
    if idx.shape[0] == 0:
        return None
    k, l = index.pair_k[idx], index.pair_l[idx]
    sk2, sl2 = s2[k], s2[l]
    t = ps.t_self[idx]
    p = 2.0 * special.ndtr(-np.abs(t))
    p = np.where(np.isfinite(p), p, 1.0)
    fdr = fdr_control(p, fdr_q, method=fdr_method)
    # ĉ/(σ_k σ_l) can leave [-1, 1] by sampling error (or with a small σ̂); a correlation
    # is reported inside it. ``c_hat`` keeps the unclipped estimate.
    rho = np.clip(ps.c_hat[idx] / np.sqrt(sk2 * sl2), -1.0, 1.0)
    positive = fdr.reject & (rho > 0.0)
    chosen = _greedy_partners(positive, p, t, k, l, K)
    rho_null, lo, hi = _rho_interval(ps.c_hat[idx], ps.v_bar[idx], sk2, sl2, ps.n_eff[idx])
    status = np.full(idx.shape[0], PairStatus.NOT_SIGNIFICANT.value, dtype=object)
    status[fdr.reject & ~positive] = PairStatus.NEGATIVE.value
    status[positive & ~chosen] = PairStatus.PAIRED_ELSEWHERE.value
    status[chosen] = PairStatus.FLAGGED.value
    table = pd.DataFrame(
        {
            "station_k": obs.station_ids[k].astype(str),
            "station_l": obs.station_ids[l].astype(str),
            "k": k,
            "l": l,
            "n_shared": ps.n[idx],
            "n_effective": ps.n_eff[idx],
            "c_hat": ps.c_hat[idx],
            "rho_hat": rho,
            "rho_ci_low": lo,
            "rho_ci_high": hi,
            "rho_null": rho_null,
            "r_raw": ps.r_raw[idx],
            "statistic": t,
            "statistic_model": ps.t_model[idx],
            "p_value": p,
            "q_value": fdr.q_value,
            "rejected": fdr.reject,
            "flagged": chosen,
            "status": status,
        }
    )
    table = table.sort_values(["p_value", "station_k", "station_l"], kind="stable")
    table = table.reset_index(drop=True)
    c = _shrunk_capped(
        ps.c_hat[idx][chosen], ps.n_eff[idx][chosen], sk2[chosen], sl2[chosen], shrink_n0
    )
    return table, PairCovariance(k[chosen], l[chosen], c, K)


# -- global parametric bootstrap (docs/pairs.md §8) ----------------------------------------------


def _global_statistic(
    prep: _Prepared,
    sigma2: NDArray[np.float64],
    n_events: int,
    pairs: PairCovariance,
    min_shared: int,
    method: str,
) -> tuple[float, int]:
    ps = _leave_two_out(
        prep.index,
        prep.event,
        prep.station,
        prep.y,
        prep.s2_row,
        sigma2,
        prep.gamma,
        n_events,
        pairs,
        prep.member,
    )
    index = prep.index
    flagged = pairs.partner[index.pair_k] == index.pair_l
    use = (ps.n >= min_shared) & ~flagged & np.isfinite(ps.t_self)
    t = ps.t_self[use]
    if t.shape[0] == 0:
        return float("nan"), 0
    if method == "max_abs":
        return float(np.max(np.abs(t))), int(t.shape[0])
    return float(np.sum(t * t)), int(t.shape[0])


def _simulate_errors(
    event: NDArray[np.int64],
    station: NDArray[np.int64],
    sigma2: NDArray[np.float64],
    pairs: PairCovariance,
    rng: np.random.Generator,
) -> NDArray[np.float64]:
    """Gaussian errors with covariance diag(σ²) plus c on the rows of a present flagged pair."""
    sd: NDArray[np.float64] = np.sqrt(np.asarray(sigma2[station], dtype=np.float64))
    z: NDArray[np.float64] = np.asarray(rng.standard_normal(int(event.shape[0])))
    e: NDArray[np.float64] = sd * z
    if pairs.n_pairs:
        prow = pair_partner_rows(event, station, pairs.partner)
        second = np.flatnonzero((prow >= 0) & (station > pairs.partner[station]))
        first = prow[second]
        c = pairs.partner_cov[station[second]]
        s_first = sd[first]
        cond_var = sigma2[station[second]] - (c / s_first) ** 2
        e[second] = c / s_first * z[first] + np.sqrt(np.maximum(cond_var, 0.0)) * z[second]
    return e


def global_independence_test(
    obs: ObservationSet,
    fitted: Callable[[ObservationSet], tuple[NDArray[np.float64], NDArray[np.float64]]],
    bias: ArrayLike,
    sigma2: ArrayLike,
    magnitude: ArrayLike,
    pairs: PairCovariance,
    *,
    replicates: int = 200,
    random_state: int | np.random.Generator | None = None,
    min_shared: int = 30,
    statistic: Literal["sum_sq", "max_abs"] = "sum_sq",
    omega: ArrayLike | None = None,
    outlier_weight: float = 0.3,
) -> GlobalTestResult:
    """Parametric-bootstrap test of the independence assumption (docs/pairs.md §8).

    G = Σ T² over the tested pairs that are not flagged (T the leave-two-out T_self computed
    with the flagged pairs as partners, module docstring); ``statistic="max_abs"`` uses
    max |T| instead (more power against one strong pair, less against many weak ones). Each
    replicate draws m*_ij = M̂_j + b̂_i + e*_ij on the same (event, station) cells, e* Gaussian
    with covariance diag(σ̂²) plus the flagged c, refits (b*, σ²*) = ``fitted(obs*)`` and
    recomputes G* with the same flagged pairs. p = (1 + #{G* ≥ G})/(B + 1).

    Parameters
    ----------
    obs : ObservationSet
        The data; detected, unclipped, finite rows are used (the replicates hold only those).
    fitted : callable
        ``fitted(obs_star) -> (bias, sigma2)``, each of shape (K,), refitting the station model
        on a simulated data set.
    bias, sigma2 : array_like, shape (K,)
        Fitted b̂ (magnitude units) and σ̂² (magnitude units squared).
    magnitude : array_like, shape (N,)
        Fitted event magnitudes M̂_j; NaN entries (e.g. one-station events) are replaced by
        the event's bias-corrected mean reading.
    pairs : PairCovariance
        The currently flagged pairs (their c is used in the simulation and references).
    replicates : int, default=200
        B.
    random_state : int or numpy.random.Generator, optional
        Seed of the simulation.
    min_shared : int, default=30
        Pairs with fewer eligible events do not enter G.
    statistic : {'sum_sq', 'max_abs'}, default='sum_sq'
    omega : array_like, shape (nnz,), optional
        Robust weights of the data rows, used as in :func:`detect_correlated_pairs` for G on
        the data (the Gaussian replicates have no outliers and use none).
    outlier_weight : float, default=0.3

    Returns
    -------
    GlobalTestResult

    Raises
    ------
    ConfigError
        On wrong shapes or ranges.

    Warns
    -----
    DegenerateDataWarning
        If no pair enters G (p-value NaN).

    Notes
    -----
    The pair statistics do not depend on the event magnitudes (each reference estimate has
    weights summing to one, so M_j cancels), so with a ``fitted`` that returns the generating
    parameters G and G* are exchangeable under the model and p is exactly uniform on
    {1/(B+1), …, 1}. Flagged pairs are part of the null model, not of G.

    Measured (bench/global_test_rate.py): with the station model's own refits, 200 networks
    simulated under the model rejected at level 0.05 at rate 0.035 (B = 39). The test runs on
    the detected readings only, before non-detections enter the fit, so readings kept only
    above a detection threshold break its null: the demo generator does this on purpose
    (sample_events/generate_demo.py, ``detected = candidate & (m_read >= threshold)``), and
    the test rejects there (3 of 4 generator seeds, G/mean G* = 1.24); with the thresholds
    lowered so that almost every reading is kept it rejects in 0 of 4 (G/mean G* = 0.98), and
    without the outlier readings it still rejects (docs/validation.md).
    """
    func = "global_independence_test"
    K = obs.n_stations
    b = _station_vector(bias, "bias", K, func)
    s2 = _station_vector(sigma2, "sigma2", K, func)
    _check_sigma2(s2, func)
    _check_int(replicates, "replicates", 1, func)
    _check_int(min_shared, "min_shared", 4, func)
    if statistic not in ("sum_sq", "max_abs"):
        raise ConfigError(
            f"The 'statistic' parameter of {func} must be one of 'sum_sq', 'max_abs'. "
            f"Got {statistic!r} instead."
        )
    M = np.asarray(magnitude, dtype=np.float64)
    if M.shape != (obs.n_events,):
        raise ConfigError(
            f"The 'magnitude' parameter of {func} must have shape ({obs.n_events},), one value "
            f"per event. Got shape {M.shape} instead."
        )
    rng = np.random.default_rng(random_state)
    prep = _prepare(
        obs,
        b,
        s2,
        None,
        None if omega is None else np.asarray(omega, dtype=np.float64),
        func,
        outlier_weight=float(outlier_weight),
    )
    G, n_pairs = _global_statistic(prep, s2, obs.n_events, pairs, min_shared, statistic)
    if n_pairs == 0:
        warnings.warn(
            f"{func}: no unflagged pair has {min_shared} shared events; p-value is NaN "
            "(lower min_shared or use a longer window)",
            DegenerateDataWarning,
            stacklevel=2,
        )
        return GlobalTestResult(
            float("nan"), float("nan"), int(replicates), statistic, np.zeros(0), 0
        )
    use = _usable_rows(obs)
    base = obs.subset(use)
    ev, st = base.event, base.station
    cnt = np.bincount(ev, minlength=obs.n_events)
    with np.errstate(invalid="ignore", divide="ignore"):
        fill = np.bincount(ev, weights=base.magnitude - b[st], minlength=obs.n_events) / cnt
    M_sim = np.where(np.isfinite(M), M, np.nan_to_num(fill))
    mean_part = M_sim[ev] + b[st]
    null = np.empty(int(replicates))
    for r in range(int(replicates)):
        m_star = mean_part + _simulate_errors(ev, st, s2, pairs, rng)
        obs_star = dataclasses.replace(base, magnitude=m_star)
        b_star, s2_star = fitted(obs_star)
        b_star = _station_vector(b_star, "fitted(...)[0]", K, func)
        s2_star = _station_vector(s2_star, "fitted(...)[1]", K, func)
        prep_star = _Prepared(
            event=ev,
            station=st,
            y=m_star - b_star[st],
            s2_row=s2_star[st],
            gamma=prep.gamma,
            index=prep.index,
        )
        null[r], _ = _global_statistic(
            prep_star, s2_star, obs.n_events, pairs, min_shared, statistic
        )
    exceed = int(np.sum(null >= G))
    p = (1.0 + exceed) / (null.shape[0] + 1.0)
    return GlobalTestResult(
        statistic=G,
        p_value=float(p),
        replicates=int(replicates),
        method=statistic,
        null_statistics=null,
        n_pairs=n_pairs,
    )


# -- model-free difference tetrads (docs/pairs.md §8) ----------------------------------------------


def difference_tetrads(
    obs: ObservationSet,
    bias: ArrayLike,
    *,
    pairs: PairCovariance | None = None,
    family: PairCovariance | None = None,
    min_shared: int = 30,
) -> TetradResult:
    """Mean difference-tetrad products per station pair, a model-free correlation check.

    For distinct co-observed stations i, k, l, p and d_ik = m_i − m_k − (b_i − b_k),
    E[d_ik d_lp] = c_il − c_ip − c_kl + c_kp, zero under independence and free of the event
    magnitudes' distribution and of σ (docs/pairs.md §8). For a pair (i, l) and an event with the
    other stations O (|O| ≥ 2, flagged partners of i and l removed) the function averages
    d_ik d_lp over all ordered (k, p), k ≠ p in O, in closed form from event sums:

        t_j = [(n a − S)(n c − S) − (n a c − (a + c) S + Q)] / (n (n − 1)),

    a = y_i, c = y_l, n = |O|, S = Σ_O y, Q = Σ_O y², y = m − b̂ (centred per event). The pair's
    mean over events estimates c_il when the stations of O are mutually independent; z is the
    mean over its standard error (events are independent).

    Parameters
    ----------
    obs : ObservationSet
    bias : array_like, shape (K,)
        b̂ (magnitude units); only differences b_i − b_k matter.
    pairs : PairCovariance, optional
        Flagged partners to leave out of O.
    family : PairCovariance, optional
        A pre-chosen family of pairs (e.g. the flagged or co-located ones) whose per-event
        tetrad products are summed into one statistic.
    min_shared : int, default=30

    Returns
    -------
    TetradResult

    Notes
    -----
    Summed over **all** pairs of an event the averaged tetrads vanish identically (a
    translation-invariant symmetric quadratic form with zero expectation under independence
    [derived]); a global tetrad statistic therefore needs a family chosen in advance. Tetrads
    carry more noise than the leave-two-out statistic (each uses differences of four readings)
    but need no σ̂: a check of the model, not a replacement for :func:`detect_correlated_pairs`.

    References
    ----------
    Bollen & Ting (1993), confirmatory tetrad analysis (covariance tetrads; the difference form
    here is [derived], docs/pairs.md §8).
    """
    func = "difference_tetrads"
    K = obs.n_stations
    b = _station_vector(bias, "bias", K, func)
    _check_int(min_shared, "min_shared", 2, func)
    use = _usable_rows(obs)
    ev, st = obs.event[use], obs.station[use]
    N = obs.n_events
    y = obs.magnitude[use] - b[st]
    cnt = np.bincount(ev, minlength=N)
    with np.errstate(invalid="ignore", divide="ignore"):
        ybar = np.bincount(ev, weights=y, minlength=N) / cnt
    y = y - ybar[ev]
    S = np.bincount(ev, weights=y, minlength=N)
    Q = np.bincount(ev, weights=y * y, minlength=N)
    index = _pair_index(ev, st, N, K)
    if pairs is not None and pairs.n_pairs:
        prow = pair_partner_rows(ev, st, pairs.partner)
    else:
        prow = np.full(ev.shape[0], -1, dtype=np.int64)
    m = index.n_pairs
    n, st1, st2 = np.zeros(m), np.zeros(m), np.zeros(m)
    fam_sum = np.zeros(N)
    fam_has = np.zeros(N, dtype=bool)
    for chunk in index.chunks:
        rp = index.rows(ev, st, chunk)
        r1, r2, e, pid = rp.first, rp.second, rp.event, rp.pair
        s_o = S[e] - y[r1] - y[r2]
        q_o = Q[e] - y[r1] ** 2 - y[r2] ** 2
        n_o = cnt[e] - 2
        for r, other in ((r1, r2), (r2, r1)):
            p = prow[r]
            extra = (p >= 0) & (p != other)
            pe = p[extra]
            s_o[extra] -= y[pe]
            q_o[extra] -= y[pe] ** 2
            n_o[extra] -= 1
        ok = n_o >= 2
        a, c = y[r1], y[r2]
        n_f = n_o.astype(np.float64)
        with np.errstate(invalid="ignore", divide="ignore"):
            total = (n_f * a - s_o) * (n_f * c - s_o) - (n_f * a * c - (a + c) * s_o + q_o)
            t = np.where(ok, total / (n_f * (n_f - 1.0)), 0.0)
        n += np.bincount(pid, weights=ok, minlength=m)
        st1 += np.bincount(pid, weights=t, minlength=m)
        st2 += np.bincount(pid, weights=t * t, minlength=m)
        if family is not None and family.n_pairs:
            in_family = ok & (family.partner[index.pair_k[pid]] == index.pair_l[pid])
            fam_sum += np.bincount(e[in_family], weights=t[in_family], minlength=N)
            fam_has |= np.bincount(e[in_family], minlength=N) > 0
    keep = n >= min_shared
    with np.errstate(invalid="ignore", divide="ignore"):
        mean = st1 / n
        var = (st2 - n * mean**2) / (n - 1.0)
        z = mean / np.sqrt(var / n)
    idx = np.flatnonzero(keep)
    table = pd.DataFrame(
        {
            "station_k": obs.station_ids[index.pair_k[idx]].astype(str),
            "station_l": obs.station_ids[index.pair_l[idx]].astype(str),
            "k": index.pair_k[idx],
            "l": index.pair_l[idx],
            "n_shared": n[idx].astype(np.int64),
            "mean_product": mean[idx],
            "z": z[idx],
            "p_value": 2.0 * stats.norm.sf(np.abs(z[idx])),
        }
    )
    fam_mean, fam_z, fam_n = float("nan"), float("nan"), 0
    if family is not None and family.n_pairs:
        vals = fam_sum[fam_has]
        fam_n = int(vals.shape[0])
        if fam_n >= 2:
            fam_mean = float(vals.mean())
            fam_z = float(fam_mean / (vals.std(ddof=1) / np.sqrt(fam_n)))
    return TetradResult(table=table, family_mean=fam_mean, family_z=fam_z, family_n_events=fam_n)
