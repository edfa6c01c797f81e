"""Station epochs: CUSUM detection of bias steps and the split into epochs (docs/epochs.md).

A station whose bias steps (an instrument or gain change) shows it in its time-ordered
leave-one-station-out z scores z_ij = (y_ij − M̂_j^(−i))/sqrt(s_i² + V_j^(−i)), which are
N(0, 1) under the model (docs/network-magnitude.md §7). A two-sided CUSUM (Page 1954) accumulates
evidence:

    S⁺_t = max(0, S⁺_{t−1} + x_t − k),   S⁻_t = max(0, S⁻_{t−1} − x_t − k),   S_0 = 0,

with alarm at the first t where S⁺_t ≥ h or S⁻_t ≥ h (k = 0.5, h = 5 by default, docs/epochs.md
[from memory]). The change time is estimated as the start of the run that crossed: the row after
the last time the alarming sum was 0 before the alarm (Page 1954; Montgomery, *Introduction to
Statistical Quality Control*, §9.1 [from memory]).

What is monitored
-----------------
``reference="running"`` (default): x_t = (z_t − z̄_{<t})/sqrt(1 + 1/n_{<t}), the deviation of z from
the mean of the segment's earlier rows, standardised. For z iid N(μ, 1) these recursive
residuals are iid N(0, 1) whatever μ (Brown, Durbin & Evans 1975), so the chart needs no
in-control mean: this matters because a bias fitted over a window that contains the step lies
between the two levels, and both halves of the series then sit off zero (a "self-starting" CUSUM,
Hawkins 1987 [from memory]). ``reference="model"``: x_t = z_t in the first segment (the CUSUM of the
design taken literally, right when b̂ is the pre-step bias); later segments are always centred on
their own past, because after a step the fitted model no longer describes the station.

Each segment (the whole series, then the rows from each accepted change point on) starts with a
burn-in of ``min_events`` rows that are not monitored, so every change has at least
``min_events`` rows before it; an alarm whose change point leaves fewer than ``min_events`` rows
after it is not accepted (and monitoring of that station stops). After an accepted alarm the
CUSUM restarts at the change point; at most ``max_steps`` changes per station.

Outliers
--------
x is winsorised at ±``clip`` (default 3) before the CUSUM, so one wild reading moves a sum by at
most clip − k = 2.5 < h (a robustified CUSUM in the spirit of Lucas & Crosier 1982
[from memory]); for Gaussian z this changes almost nothing (P(|x| > 3) = 0.27 %).

False alarms (measured)
-----------------------
Under the model the monitored x are iid N(0, 1), so the in-control average run length is that of
a CUSUM on N(0, 1): for k = 0.5 the Siegmund (1985) approximation
ARL0 = (e^{2kb} − 2kb − 1)/(2k²), b = h + 1.166 [from memory], gives 938 readings one-sided and
469 two-sided at h = 5, 9.6e3 two-sided at h = 8. On the simulator of docs/simulation.md (K = 40,
N = 4000, true parameters as the fit, no step, seeds 0–3, ~1,260 readings per station) the detector
raised 1.66 false alarms per 1,000 readings at h = 5 and 0.089 at h = 8 (Siegmund: 2.13 and 0.105;
restarts and burn-ins remove monitored readings). With 1 % outlier cells: 2.05 (h = 5) and
0.19 (h = 8) with clip = 3, against 2.29 and 1.29 without clipping.
**At the default h = 5 a station with ~1,000 readings a year raises about two false alarms a
year**, which can use up ``max_steps`` before a real step: of ten simulated +0.3 steps
(seeds 100–109) four were missed at h = 5 with max_steps = 3, none with max_steps = 10
(alarm 2–15 readings after the step), none at h = 8 with max_steps = 3 (4–21 readings after).
For dense networks use h ≈ 8; every alarm is a candidate to confirm (station metadata, a refit
of both epochs), not a verdict. On real data, event swarms (e.g. the Yellowstone Lake swarm of
December 2008) shift distance-dependent station residuals and raise alarms too.

Serially correlated scores
--------------------------
The false-alarm rates above hold for independent z. Real seismicity clusters: events of a swarm
share source region and path, so a station's consecutive leave-one-out z are correlated (lag-1
autocorrelation median 0.32 over the stations of the Yellowstone table, tests/fusion/
test_yellowstone_model.py), a random walk of correlated increments drifts further, and the chart
alarms at swarms. With ``serial_correlation`` each station's x is scaled by
sqrt((1 − ρ)/(1 + ρ)), which turns the long-run variance (1 + ρ)/(1 − ρ) of an AR(1) series
back to 1 (the usual variance-inflation correction for autocorrelated data in control charts;
Montgomery, §10.4 [from memory]); ρ comes from first differences so that the step itself does
not inflate it (:func:`lag1_scale`). For independent z the scaling is close to 1.

Decisions on evidence
---------------------
The CUSUM only proposes (with ``confirm``, the default). Each proposed change is re-estimated
between its neighbouring proposals by maximum likelihood: the profile likelihood of a single
mean shift (Hinkley 1970, :func:`profile_change_points`), with a likelihood-ratio interval for
the change time (:func:`change_interval_cutoff`), not the alarm time. The split is kept only
if its likelihood-ratio statistic, deflated for dependent readings, exceeds ``penalty`` ·
log(n), n the station's readings: 2 log n is the Schwarz (BIC) penalty of the two parameters
a split adds; the default 3 log n also pays for the search over alarms (measured:
bench/epoch_accuracy.py; with 2 log n about one station in ten of the simulator kept a false
epoch). Dependence: the statistic is divided by the larger of the AR(1) long-run variance
factor and the weekly-block design effect of the residuals, and each epoch must span readings
of at least ``min_blocks`` weeks, so an aftershock sequence or a swarm of a few days is not an
epoch (docs/epochs.md). Weak proposals are dropped one per station per round and the rest
re-estimated over wider segments. After the refit the station model merges adjacent epochs
whose biases agree (:mod:`fusion.model.station_model`).

Vectorisation
-------------
Rows are grouped by station with one ``np.lexsort`` (station, event time). A CUSUM with reset at
zero is S_t = W_t − min(0, min_{s≤t} W_s) with W the running sum of (x − k) [derived; a reflected
random walk], so per station it needs a grouped cumulative sum (a global ``np.cumsum`` minus the
sum before each segment) and a grouped running minimum (one global ``np.minimum.accumulate``
after shifting each segment below all earlier ones). Steps are found in at most ``max_steps``
rounds, each vectorized over all stations; nothing loops over rows.

References
----------
Page E. S. (1954). Continuous inspection schemes. Biometrika 41(1/2):100–115.
Brown R. L., Durbin J., Evans J. M. (1975). Techniques for testing the constancy of regression
relationships over time. JRSS-B 37(2):149–192.
Hawkins D. M. (1987). Self-starting CUSUM charts for location and scale. The Statistician
36:299–316 [from memory].
Siegmund D. (1985). Sequential Analysis. Springer [from memory].
Lucas J. M., Crosier R. B. (1982). Robust CUSUM: a robustness study for CUSUM quality control
schemes. Commun. Stat. Theory Methods 11(23):2669–2687 [from memory].
Hinkley D. V. (1970). Inference about the change-point in a sequence of random variables.
Biometrika 57(1):1–17.
Kish L. (1965). Survey Sampling. Wiley [from memory].
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import Any, Literal

import numpy as np
import pandas as pd
from numpy.typing import ArrayLike, NDArray

from fusion.model.parameters import epoch_unit_id
from fusion.observations import ObservationSet
from stations.errors import ConfigError

__all__ = [
    "BiasStepResult",
    "ChangePoints",
    "EpochSplit",
    "change_interval_cutoff",
    "detect_bias_steps",
    "lag1_scale",
    "profile_change_points",
    "split_epochs",
    "two_sided_cusum",
]

STEP_COLUMNS = (
    "station_id",
    "station",
    "change_time",
    "alarm_time",
    "direction",
    "n_before",
    "n_after",
    "peak",
    "shift_z",
    "change_time_low",
    "change_time_high",
    "evidence",
    "threshold",
    "inflation",
    "bias_before",
    "bias_after",
    "step",
    "step_se",
)
PATH_COLUMNS = (
    "station_id",
    "segment",
    "event_id",
    "time",
    "z",
    "x",
    "cusum_pos",
    "cusum_neg",
)


@dataclass(frozen=True, slots=True, eq=False)
class BiasStepResult:
    """Result of :func:`detect_bias_steps`.

    Attributes
    ----------
    table : pandas.DataFrame
        One row per accepted step, ordered by station then time: ``station_id``, ``station``
        (code), ``change_time`` (event time of the first row of the new epoch, UTC),
        ``alarm_time`` (event time of the alarm row), ``direction`` (+1 bias up, −1 down),
        ``n_before``, ``n_after`` (rows of the epochs before and after the change),
        ``peak`` (largest value of the alarming CUSUM in its excursion), ``shift_z``
        (mean z after minus mean z before, over those epochs), ``change_time_low`` and
        ``change_time_high`` (the change-time interval: last reading possibly before, first
        reading surely after the change), ``evidence`` (deflated likelihood-ratio statistic),
        ``threshold`` (evidence required), ``inflation`` (dependence factor; all NaN without
        ``confirm``), and ``bias_before``, ``bias_after``, ``step``, ``step_se`` (NaN here;
        the station model fills them from the fitted epochs). With ``confirm`` the direction
        is the sign of the estimated shift.
    paths : pandas.DataFrame
        The monitored series for plotting, one row per (segment, row): ``station_id``,
        ``segment`` (0 for the first epoch), ``event_id``, ``time``, ``z``, ``x``,
        ``cusum_pos``, ``cusum_neg`` (NaN in the burn-in). A segment that alarmed runs to its
        alarm row, so rows between a change point and its alarm appear in two segments.
    k, h : float
        Reference value and alarm level used.
    min_events : int
    reference : str
    """

    table: pd.DataFrame
    paths: pd.DataFrame
    k: float
    h: float
    min_events: int
    reference: str

    def path(self, station_id: str) -> pd.DataFrame:
        """The CUSUM paths of one station (all its segments), in time order."""
        return self.paths[self.paths["station_id"] == station_id].reset_index(drop=True)


@dataclass(frozen=True, slots=True, eq=False)
class EpochSplit:
    """Result of :func:`split_epochs`.

    Attributes
    ----------
    observations : ObservationSet
        The input rows with the station table replaced by station units (epochs); unit ids are
        :func:`fusion.model.parameters.epoch_unit_id` (station_id, start).
    unit_station : ndarray of str, shape (K',)
        Station id of each unit.
    unit_start, unit_end : ndarray of datetime64[us], shape (K',)
        UTC bounds, NaT meaning open; a row at time t belongs to the unit with
        start <= t < end.
    """

    observations: ObservationSet
    unit_station: NDArray[Any]
    unit_start: NDArray[np.datetime64]
    unit_end: NDArray[np.datetime64]


# -- grouped running sums and minima -----------------------------------------------------------


def _segment_bounds(group: NDArray[np.int64]) -> tuple[NDArray[np.int64], NDArray[np.int64]]:
    """First row of each contiguous run of equal labels, and the run id of every row."""
    n = group.shape[0]
    if n == 0:
        return np.zeros(0, dtype=np.int64), np.zeros(0, dtype=np.int64)
    first = np.flatnonzero(np.r_[True, group[1:] != group[:-1]]).astype(np.int64)
    seg = np.cumsum(np.r_[True, group[1:] != group[:-1]]).astype(np.int64) - 1
    return first, seg


def _grouped_cumsum(
    x: NDArray[np.float64], seg: NDArray[np.int64], first: NDArray[np.int64]
) -> NDArray[np.float64]:
    """Running sum restarted at each segment."""
    cs = np.cumsum(x)
    before = cs[first] - x[first]
    return np.asarray(cs - before[seg], dtype=np.float64)


def _grouped_cummin(
    w: NDArray[np.float64], seg: NDArray[np.int64], first: NDArray[np.int64]
) -> tuple[NDArray[np.float64], NDArray[np.bool_]]:
    """Running minimum restarted at each segment, by one global ``minimum.accumulate``.

    Segment g + 1 is shifted so that its largest value lies below the smallest value of
    segment g (after its own shift): earlier segments then never win the running minimum.
    Also returns where w itself is the running minimum, decided exactly in the shifted domain
    (undoing the shift may round).
    """
    lo = np.minimum.reduceat(w, first)
    hi = np.maximum.reduceat(w, first)
    inc = np.zeros(first.shape[0])
    inc[1:] = lo[:-1] - hi[1:] - 1.0
    off = np.cumsum(inc)
    shifted = w + off[seg]
    run = np.minimum.accumulate(shifted)
    return np.asarray(run - off[seg], dtype=np.float64), shifted <= run


def two_sided_cusum(
    x: ArrayLike, group: ArrayLike, k: float = 0.5
) -> tuple[NDArray[np.float64], NDArray[np.float64]]:
    """Two-sided CUSUM paths of many series at once.

    Parameters
    ----------
    x : array_like of float, shape (n,)
        Standardised observations, series after series.
    group : array_like of int, shape (n,)
        Series label; each series must be contiguous (e.g. sorted by label).
    k : float, default=0.5
        Reference value (allowance), in units of x.

    Returns
    -------
    s_pos, s_neg : ndarray of float, shape (n,)
        S⁺_t = max(0, S⁺_{t−1} + x_t − k) and S⁻_t = max(0, S⁻_{t−1} − x_t − k), S_0 = 0, each
        series starting afresh (Page 1954).

    Notes
    -----
    Computed as W_t − min(0, min_{s≤t} W_s) with W the grouped running sum of ±x − k, without a
    loop over rows (module docstring). Agrees with the recursion to rounding (~1e-12).
    """
    xa = np.asarray(x, dtype=np.float64)
    g = np.asarray(group)
    if xa.shape[0] == 0:
        return np.zeros(0), np.zeros(0)
    first, seg = _segment_bounds(g)
    out = []
    for sign in (1.0, -1.0):
        w = _grouped_cumsum(sign * xa - k, seg, first)
        run, at_min = _grouped_cummin(w, seg, first)
        s_path = w - np.minimum(0.0, run)
        # S is exactly 0 where W is at its running minimum and not above 0 (the recursion's
        # reset); the change-point estimate relies on exact zeros.
        s_path[at_min & (w <= 0.0)] = 0.0
        out.append(np.maximum(s_path, 0.0))
    return out[0], out[1]


# -- change-point estimate and evidence ----------------------------------------------------------


def change_interval_cutoff(level: float) -> float:
    """Cut-off c of the likelihood-ratio interval of a change time at confidence ``level``.

    For a single mean shift the profile log-likelihood ratio 2(ℓ(τ̂) − ℓ(τ₀)) at the true
    change τ₀ behaves, for small shifts observed over many readings, like 2 max over t of
    (W(t) − |t|/2) with W a two-sided standard Brownian motion (Hinkley 1970; Siegmund 1988
    [from memory]). Each side's maximum of W(t) − t/2 is Exp(1) [derived: P(max W(t) − μt > y) =
    e^{−2μy}, μ = 1/2], and the two sides are independent, so P(LR ≤ x) = (1 − e^{−x/2})² and
    c = −2 log(1 − √level) [derived]; 7.35 at 95 %. In discrete time the maximum is over fewer
    points, so the interval is conservative.
    """
    if not 0.0 < level < 1.0:
        raise ConfigError(f"change-time interval level must be in (0, 1), got {level!r}")
    return float(-2.0 * np.log(1.0 - np.sqrt(level)))


@dataclass(frozen=True, slots=True, eq=False)
class ChangePoints:
    """Result of :func:`profile_change_points`, one entry per segment.

    Attributes
    ----------
    tau : ndarray of int, shape (P,)
        Position (within the segment, 0-based) of the first reading after the change; −1 where
        the segment is shorter than 2 ``min_events``.
    low, high : ndarray of int, shape (P,)
        Smallest and largest position in the likelihood-ratio interval.
    statistic : ndarray, shape (P,)
        max over τ of 2(ℓ(τ) − ℓ₀) = n₁n₂/n (x̄₂ − x̄₁)²/σ̂², divided by ``inflation``.
    shift : ndarray, shape (P,)
        x̄₂ − x̄₁ at τ̂ (units of x).
    sigma2 : ndarray, shape (P,)
        Pooled within-epoch variance of x at τ̂.
    inflation : ndarray, shape (P,)
        Variance inflation for dependent readings (>= 1).
    n : ndarray of int, shape (P,)
        Readings in the segment.
    """

    tau: NDArray[np.int64]
    low: NDArray[np.int64]
    high: NDArray[np.int64]
    statistic: NDArray[np.float64]
    shift: NDArray[np.float64]
    sigma2: NDArray[np.float64]
    inflation: NDArray[np.float64]
    n: NDArray[np.int64]


def _block_inflation(
    r: NDArray[np.float64], seg: NDArray[np.int64], block: NDArray[np.int64], n_seg: int
) -> NDArray[np.float64]:
    """Σ_b (Σ_{i∈b} r_i)² / Σ_i r_i² per segment: the cluster-robust over the naive variance
    of a mean (Kish 1965 design effect; Liang & Zeger 1986 [from memory]); ~1 for
    independent r, large when readings of one time block share an offset."""
    key_change = np.r_[True, (seg[1:] != seg[:-1]) | (block[1:] != block[:-1])]
    first = np.flatnonzero(key_change)
    sums = np.add.reduceat(r, first) if r.shape[0] else np.zeros(0)
    num = np.bincount(seg[first], weights=sums**2, minlength=n_seg)
    den = np.bincount(seg, weights=r**2, minlength=n_seg)
    with np.errstate(invalid="ignore", divide="ignore"):
        out = np.where(den > 0, num / den, 1.0)
    return np.asarray(out, dtype=np.float64)


def profile_change_points(
    x: ArrayLike,
    segment: ArrayLike,
    *,
    min_events: int = 20,
    level: float = 0.95,
    block: ArrayLike | None = None,
    serial_correlation: bool = True,
    min_blocks: int = 1,
) -> ChangePoints:
    """Maximum-likelihood time of a single mean shift in each segment, with its interval.

    For x_1..x_n with mean μ₁ before τ and μ₂ from τ on and common variance σ², the profile
    log-likelihood ratio against no change is n₁n₂/n (x̄₂ − x̄₁)²/σ² (Hinkley 1970); τ̂
    maximises it (the least-squares split, the same as a two-segment ``l2`` fit). σ² is the
    pooled within-epoch variance at τ̂. The interval holds every τ whose ratio lies within
    :func:`change_interval_cutoff` of the maximum.

    Dependent readings (docs/epochs.md): the statistic and the interval width are divided by
    an inflation factor, the larger of the AR(1) long-run variance factor (1 + ρ)/(1 − ρ)
    (ρ from first differences, :func:`lag1_scale`) and the time-block design effect
    (:func:`_block_inflation` of the within-epoch residuals, blocks given by ``block``, e.g.
    weeks): an aftershock sequence or swarm whose readings share an offset counts as one
    block, not as many independent readings.

    Parameters
    ----------
    x : array_like, shape (n,)
        Scores, segment after segment, time-ordered within a segment.
    segment : array_like of int, shape (n,)
        Segment label (non-decreasing, 0..P−1, every label present).
    min_events : int, default=20
        Readings required on each side of a change.
    level : float, default=0.95
        Confidence level of the interval.
    block : array_like of int, shape (n,), optional
        Time-block label (non-decreasing within a segment); None: every reading its own block.
    serial_correlation : bool, default=True
        Apply the AR(1) factor.
    min_blocks : int, default=1
        Time blocks required on each side of a change: with weekly blocks and 3, an epoch
        spans readings of at least three weeks, so a burst of a few days (an aftershock
        sequence, a swarm) cannot be an epoch of its own, however many readings it has.

    Returns
    -------
    ChangePoints

    References
    ----------
    Hinkley D. V. (1970). Inference about the change-point in a sequence of random variables.
    Biometrika 57(1):1–17.
    Siegmund D. (1988). Confidence sets in change-point problems. Int. Stat. Rev. 56:31–48
    [from memory].
    """
    xa = np.asarray(x, dtype=np.float64)
    seg = np.asarray(segment, dtype=np.int64)
    m = int(min_events)
    cut = change_interval_cutoff(level)
    n_all = xa.shape[0]
    P = int(seg.max()) + 1 if n_all else 0
    first, _ = _segment_bounds(seg)
    L = np.bincount(seg, minlength=P).astype(np.int64)
    q = np.arange(n_all, dtype=np.int64) - first[seg]
    cs = _grouped_cumsum(xa, seg, first)
    total = np.bincount(seg, weights=xa, minlength=P)
    total2 = np.bincount(seg, weights=xa * xa, minlength=P)
    n1 = q.astype(np.float64)
    n2 = (L[seg] - q).astype(np.float64)
    s1 = cs - xa
    blk = np.arange(n_all, dtype=np.int64) if block is None else np.asarray(block, np.int64)
    new_block = np.r_[True, (seg[1:] != seg[:-1]) | (blk[1:] != blk[:-1])] if n_all else blk
    bidx = np.cumsum(new_block) - 1  # running block number, global
    b_first = bidx[first] if n_all else bidx
    b_pos = bidx - b_first[seg]  # block number within the segment
    n_blocks = np.bincount(seg, weights=new_block, minlength=P).astype(np.int64)
    blocks_before = b_pos + np.where(new_block, 0, 1)
    blocks_after = n_blocks[seg] - b_pos
    valid = (q >= m) & (L[seg] - q >= m)
    valid &= (blocks_before >= int(min_blocks)) & (blocks_after >= int(min_blocks))
    with np.errstate(invalid="ignore", divide="ignore"):
        d = (total[seg] - s1) / n2 - s1 / n1
        D = np.where(valid, n1 * n2 / L[seg] * d * d, -np.inf)
    tau = np.full(P, -1, dtype=np.int64)
    low = np.full(P, -1, dtype=np.int64)
    high = np.full(P, -1, dtype=np.int64)
    stat = np.zeros(P)
    shift = np.zeros(P)
    sigma2 = np.full(P, np.nan)
    infl = np.ones(P)
    if n_all == 0:
        return ChangePoints(tau, low, high, stat, shift, sigma2, infl, L)
    dmax = np.maximum.reduceat(D, first)
    ok = np.isfinite(dmax)
    hit = np.flatnonzero(dmax[seg] == D)
    g_hit, at = np.unique(seg[hit], return_index=True)
    tau[g_hit] = q[hit[at]]
    okg = np.flatnonzero(ok)
    t_row = first[okg] + tau[okg]
    n1g = tau[okg].astype(np.float64)
    n2g = (L[okg] - tau[okg]).astype(np.float64)
    m1 = (cs[t_row] - xa[t_row]) / n1g
    m2 = (total[okg] - (cs[t_row] - xa[t_row])) / n2g
    shift[okg] = m2 - m1
    sse = total2[okg] - n1g * m1 * m1 - n2g * m2 * m2
    sigma2[okg] = np.maximum(sse / np.maximum(L[okg] - 2, 1), 1e-12)
    # Inflation for dependent readings, from the residuals of the fitted two-epoch model.
    mean_row = np.zeros(P), np.zeros(P)
    mean_row[0][okg], mean_row[1][okg] = m1, m2
    after = q >= np.where(tau >= 0, tau, 0)[seg]
    r = xa - np.where(after, mean_row[1][seg], mean_row[0][seg])
    deff = _block_inflation(r, seg, blk, P)
    ar = np.ones(P)
    if serial_correlation:
        ar = 1.0 / lag1_scale(r, seg, P) ** 2
    infl = np.maximum(1.0, np.maximum(deff, ar))
    scale = sigma2 * infl
    stat[okg] = dmax[okg] / scale[okg]
    with np.errstate(invalid="ignore"):
        inside = valid & ((dmax[seg] - D) / scale[seg] <= cut)
    pos_in = np.where(inside, q, n_all)
    pos_hi = np.where(inside, q, -1)
    low[okg] = np.minimum.reduceat(pos_in, first)[okg]
    high[okg] = np.maximum.reduceat(pos_hi, first)[okg]
    return ChangePoints(tau, low, high, stat, shift, sigma2, infl, L)


# -- detection ------------------------------------------------------------------------------


def _check(value: float, name: str, low: float, func: str, *, integer: bool = False) -> None:
    kind = "an int" if integer else "a float"
    ok = value >= low and (not integer or int(value) == value)
    if not ok or not np.isfinite(value):
        raise ConfigError(
            f"The {name!r} parameter of {func} must be {kind} in the range [{low}, inf). "
            f"Got {value!r} instead."
        )


def _row_z(obs: ObservationSet, loo_z: ArrayLike) -> NDArray[np.float64]:
    z = np.asarray(loo_z, dtype=np.float64)
    if z.shape == (obs.n_obs,):
        return np.where(obs.detected, z, np.nan)
    n_det = int(obs.detected.sum())
    if z.shape == (n_det,):
        full = np.full(obs.n_obs, np.nan)
        full[obs.detected] = z
        return full
    raise ConfigError(
        f"The 'loo_z' parameter of detect_bias_steps must have shape ({obs.n_obs},) (all rows) "
        f"or ({n_det},) (detected rows). Got shape {z.shape} instead."
    )


def lag1_scale(
    z: NDArray[np.float64], group: NDArray[np.int64], n_groups: int
) -> NDArray[np.float64]:
    """Per group, sqrt((1 − ρ)/(1 + ρ)) with ρ the lag-1 autocorrelation of ``z``.

    ρ is estimated from first differences d_t = z_t − z_{t−1}: for an AR(1) series
    corr(d_t, d_{t−1}) = −(1 − ρ)/2 [derived], so ρ̂ = 1 + 2 r_d. A level shift touches one
    difference only, so a real bias step barely inflates ρ̂ (the plain lag-1 autocorrelation
    of a series with a step of δ SDs in its middle is about δ²/(4 + δ²)). ρ̂ is clipped to
    [0, 0.9]: negative dependence is not corrected, and 0.9 caps the scaling at 0.23.

    Parameters
    ----------
    z : ndarray, shape (n,)
        Scores, grouped contiguously and time-ordered within each group.
    group : ndarray of int, shape (n,)
        Group code of each row (non-decreasing).
    """
    same = group[1:] == group[:-1]
    d = np.where(same, np.diff(z), np.nan)  # d[t] = z[t+1] - z[t] inside a group
    pair = np.isfinite(d[1:]) & np.isfinite(d[:-1])
    g_pair = group[2:][pair]
    num = np.bincount(g_pair, weights=(d[1:] * d[:-1])[pair], minlength=n_groups)
    g_d = group[1:][np.isfinite(d)]
    den = np.bincount(g_d, weights=d[np.isfinite(d)] ** 2, minlength=n_groups)
    with np.errstate(invalid="ignore", divide="ignore"):
        rho = np.clip(1.0 + 2.0 * num / den, 0.0, 0.9)
    rho = np.where(np.isfinite(rho), rho, 0.0)
    return np.asarray(np.sqrt((1.0 - rho) / (1.0 + rho)), dtype=np.float64)


def detect_bias_steps(
    obs: ObservationSet,
    loo_z: ArrayLike,
    *,
    k: float = 0.5,
    h: float = 5.0,
    min_events: int = 20,
    max_steps: int = 3,
    reference: Literal["running", "model"] = "running",
    clip: float | None = 3.0,
    serial_correlation: bool = True,
    confirm: bool = True,
    penalty: float = 3.0,
    level: float = 0.95,
    block_days: float = 7.0,
    min_blocks: int = 3,
) -> BiasStepResult:
    """Find bias steps per station with a two-sided CUSUM on its leave-one-out z (docs/epochs.md).

    Parameters
    ----------
    obs : ObservationSet
        Observations; rows are ordered per station by event time (ties by row order).
    loo_z : array_like, shape (nnz,)
        Leave-one-out z of each row (:attr:`fusion.network.event_gls.EventGLS.loo_z`), for all rows
        of
        ``obs`` or for its detected rows; NaN rows (one-station events) are skipped.
    k : float, default=0.5
        Reference value, z units.
    h : float, default=5.0
        Alarm level.
    min_events : int, default=20
        Rows required on each side of a change (the burn-in of each segment).
    max_steps : int, default=3
        Most changes accepted per station.
    reference : {'running', 'model'}, default='running'
        What the CUSUM monitors (module docstring).
    clip : float or None, default=3.0
        Winsorise x at ±clip before the CUSUM; None disables it.
    serial_correlation : bool, default=True
        Scale each station's x by sqrt((1 − ρ)/(1 + ρ)), ρ its lag-1 autocorrelation estimated
        from first differences (module docstring, "Serially correlated scores").
    confirm : bool, default=True
        Keep an alarm only on evidence (module docstring, "Decisions on evidence"): the
        change time is re-estimated by maximum likelihood between the neighbouring changes
        (:func:`profile_change_points`) and the split is kept when its likelihood-ratio
        statistic, deflated for dependent readings, exceeds ``penalty`` · log(n).
    penalty : float, default=3.0
        Penalty per log(n), n the readings of the station (unit): the Schwarz (BIC) penalty
        of the two parameters a split adds (change time and new bias) is 2 log n; the third
        log n pays for the search over alarms and change times (module docstring).
    level : float, default=0.95
        Confidence level of the change-time interval.
    block_days : float, default=7.0
        Length of the time blocks of the design effect (readings of one block may share an
        offset, as in an aftershock sequence or a swarm).
    min_blocks : int, default=3
        Time blocks each epoch must span (:func:`profile_change_points`).

    Returns
    -------
    BiasStepResult

    Raises
    ------
    ConfigError
        If a parameter is out of range or ``loo_z`` has the wrong length.
    """
    func = "detect_bias_steps"
    _check(k, "k", 0.0, func)
    _check(h, "h", 1e-12, func)
    _check(min_events, "min_events", 1, func, integer=True)
    _check(max_steps, "max_steps", 1, func, integer=True)
    if clip is not None:
        _check(clip, "clip", 1e-12, func)
    if reference not in ("running", "model"):
        raise ConfigError(
            f"The 'reference' parameter of {func} must be one of 'running', 'model'. "
            f"Got {reference!r} instead."
        )
    m = int(min_events)
    z_all = _row_z(obs, loo_z)
    rows = np.flatnonzero(np.isfinite(z_all))
    t_int = obs.event_time.astype("datetime64[us]").astype(np.int64)
    st_r = obs.station[rows]
    order = np.lexsort((rows, t_int[obs.event[rows]], st_r))
    rows = rows[order]
    st = obs.station[rows]
    ev = obs.event[rows]
    z = z_all[rows]
    n = rows.shape[0]
    g_first, grp = _segment_bounds(st)
    g_end = np.r_[g_first[1:], n].astype(np.int64)
    n_groups = g_first.shape[0]
    scale = (
        lag1_scale(z if clip is None else np.clip(z, -clip, clip), grp, n_groups)
        if serial_correlation
        else np.ones(n_groups)
    )
    seg_start = g_first.copy()
    segment_no = np.zeros(n_groups, dtype=np.int64)
    active = np.ones(n_groups, dtype=bool)
    idx = np.arange(n, dtype=np.int64)
    changes: list[tuple[int, int, int, int, float]] = []  # group, change, alarm, dir, peak
    pieces: list[pd.DataFrame] = []
    while True:
        active &= (g_end - seg_start) >= 2 * m
        if not np.any(active):
            break
        sel = np.flatnonzero(active[grp] & (idx >= seg_start[grp]))
        gs = grp[sel]
        pos = sel - seg_start[gs]
        x = _standardised_increments(
            z[sel],
            gs,
            pos,
            seg_start[gs] == g_first[gs],
            scale[gs],
            reference=reference,
            clip=clip,
        )
        msel = np.flatnonzero(pos >= m)  # rows monitored (m readings before them)
        mg = gs[msel]
        s_pos, s_neg = two_sided_cusum(x[msel], mg, k)
        cus_p = np.full(sel.shape[0], np.nan)
        cus_n = np.full(sel.shape[0], np.nan)
        cus_p[msel], cus_n[msel] = s_pos, s_neg
        # First alarm per group (monitored rows of a group are contiguous in msel).
        alarm_rows = np.flatnonzero((s_pos >= h) | (s_neg >= h))
        a_groups, a_first = np.unique(mg[alarm_rows], return_index=True)
        a_loc = alarm_rows[a_first]  # index into msel
        up = s_pos[a_loc] >= s_neg[a_loc]
        change_loc, peak = _alarm_extent(s_pos, s_neg, a_loc, a_groups, up, mg, n_groups)
        change_abs = sel[msel[change_loc]]
        alarm_abs = sel[msel[a_loc]]
        accepted = (g_end[a_groups] - change_abs) >= m
        # Record the paths of this round: alarmed groups up to the alarm row.
        cut = np.full(n_groups, n, dtype=np.int64)
        cut[a_groups] = alarm_abs + 1
        keep_rows = sel < cut[gs]
        kr = sel[keep_rows]
        pieces.append(
            _path_piece(
                obs, st, ev, z, kr, segment_no[gs[keep_rows]], x[keep_rows], cus_p, cus_n, keep_rows
            )
        )
        changes.extend(
            zip(
                a_groups[accepted].tolist(),
                change_abs[accepted].tolist(),
                alarm_abs[accepted].tolist(),
                np.where(up, 1, -1)[accepted].tolist(),
                peak[accepted].tolist(),
                strict=True,
            )
        )
        alarmed_ok = np.zeros(n_groups, dtype=bool)
        alarmed_ok[a_groups[accepted]] = True
        seg_start[a_groups[accepted]] = change_abs[accepted]
        segment_no[a_groups[accepted]] += 1
        active &= alarmed_ok & (segment_no < int(max_steps))
    extra: list[tuple[int, int, float, float, float]] = []
    if confirm and changes:
        _check(penalty, "penalty", 0.0, func)
        _check(block_days, "block_days", 1e-9, func)
        xz = z if clip is None else np.clip(z, -clip, clip)
        block = t_int[ev] // np.int64(round(float(block_days) * 86_400e6))
        changes, extra = _confirm_changes(
            changes, xz, block, g_first, g_end, m, penalty, level, serial_correlation, min_blocks
        )
    table = _step_table(obs, changes, st, ev, z, g_first, g_end, extra)
    paths = _joined_paths(pieces)
    return BiasStepResult(
        table=table, paths=paths, k=float(k), h=float(h), min_events=m, reference=reference
    )


def _standardised_increments(
    zs: NDArray[np.float64],
    gs: NDArray[np.int64],
    pos: NDArray[np.int64],
    literal: NDArray[np.bool_],
    scale_rows: NDArray[np.float64],
    *,
    reference: str,
    clip: float | None,
) -> NDArray[np.float64]:
    """CUSUM increments x of the rows of the open segments (module docstring).

    z minus the running mean of the segment's earlier z, divided by sqrt(1 + 1/pos) so that
    x ~ N(0, 1) under no step; with ``reference="model"`` the first segment uses z itself.
    Scaled by the serial-correlation factor and clipped at ±``clip``.
    """
    s_first, s_seg = _segment_bounds(gs)
    prev_sum = _grouped_cumsum(zs, s_seg, s_first) - zs
    with np.errstate(invalid="ignore", divide="ignore"):
        x = (zs - prev_sum / pos) / np.sqrt(1.0 + 1.0 / pos)
    if reference == "model":
        x = np.where(literal, zs, x)
    x = x * scale_rows
    if clip is not None:
        x = np.clip(x, -clip, clip)
    return np.asarray(x, dtype=np.float64)


def _alarm_extent(
    s_pos: NDArray[np.float64],
    s_neg: NDArray[np.float64],
    a_loc: NDArray[np.int64],
    a_groups: NDArray[np.int64],
    up: NDArray[np.bool_],
    mg: NDArray[np.int64],
    n_groups: int,
) -> tuple[NDArray[np.int64], NDArray[np.float64]]:
    """Change point and peak of every first alarm (indices into the monitored rows).

    The change is the row after the alarming sum last left zero (within the group's monitored
    rows); the peak is the largest value of that sum from the alarm to the end of its
    excursion (the next zero or the group's end); Page (1954) for the CUSUM.
    """
    m_first, _ = _segment_bounds(mg)
    grp_mfirst = np.full(n_groups, -1, dtype=np.int64)
    grp_mfirst[mg[m_first]] = m_first
    grp_mend = np.full(n_groups, -1, dtype=np.int64)
    grp_mend[mg[m_first]] = np.r_[m_first[1:], mg.shape[0]]
    local = np.arange(mg.shape[0], dtype=np.int64)
    big = np.int64(mg.shape[0])
    change_loc = np.empty(a_loc.shape[0], dtype=np.int64)
    end_loc = np.empty(a_loc.shape[0], dtype=np.int64)
    for s_arr, pick in ((s_pos, up), (s_neg, ~up)):
        zero = s_arr == 0.0
        last_zero = np.maximum.accumulate(np.where(zero, local, -1))
        next_zero = np.minimum.accumulate(np.where(zero, local, big)[::-1])[::-1]
        al = a_loc[pick]
        ag = a_groups[pick]
        change_loc[pick] = np.maximum(last_zero[al], grp_mfirst[ag] - 1) + 1
        end_loc[pick] = np.minimum(next_zero[al], grp_mend[ag])
    # Peak of the alarming sum over [alarm, end of its excursion).
    peak = np.empty(a_loc.shape[0])
    for s_arr, pick in ((s_pos, up), (s_neg, ~up)):
        if np.any(pick):
            bounds = np.c_[a_loc[pick], end_loc[pick]].ravel()
            padded = np.r_[s_arr, -np.inf]
            peak[pick] = np.maximum.reduceat(padded, bounds)[::2]
    return change_loc, peak


def _joined_paths(pieces: list[pd.DataFrame]) -> pd.DataFrame:
    """The paths of all rounds, by station, segment and time (empty with its columns)."""
    if not pieces:
        return pd.DataFrame({c: pd.Series(dtype=object) for c in PATH_COLUMNS})
    paths = pd.concat(pieces, ignore_index=True)
    paths = paths.sort_values(["station_id", "segment", "time"], kind="stable")
    return paths.reset_index(drop=True)


def _path_piece(
    obs: ObservationSet,
    st: NDArray[np.int64],
    ev: NDArray[np.int64],
    z: NDArray[np.float64],
    kr: NDArray[np.int64],
    segment: NDArray[np.int64],
    x: NDArray[np.float64],
    cus_p: NDArray[np.float64],
    cus_n: NDArray[np.float64],
    keep_rows: NDArray[np.bool_],
) -> pd.DataFrame:
    """The CUSUM paths of one round (rows ``kr``), columns :data:`PATH_COLUMNS`."""
    return pd.DataFrame(
        {
            "station_id": obs.station_ids[st[kr]].astype(str),
            "segment": segment,
            "event_id": obs.event_ids[ev[kr]].astype(str),
            "time": obs.event_time[ev[kr]],
            "z": z[kr],
            "x": x,
            "cusum_pos": cus_p[keep_rows],
            "cusum_neg": cus_n[keep_rows],
        }
    )


def _confirm_changes(
    changes: list[tuple[int, int, int, int, float]],
    x: NDArray[np.float64],
    block: NDArray[np.int64],
    g_first: NDArray[np.int64],
    g_end: NDArray[np.int64],
    m: int,
    penalty: float,
    level: float,
    serial_correlation: bool,
    min_blocks: int,
) -> tuple[list[tuple[int, int, int, int, float]], list[tuple[int, int, float, float, float]]]:
    """Re-estimate each proposed change between its neighbours and keep it on evidence.

    Rounds drop the proposals whose deflated likelihood-ratio statistic is below
    ``penalty`` · log(n) (n the readings of the station's unit) and re-evaluate
    the rest with wider segments, until none is dropped (at most one round per proposal;
    each round is vectorized over all proposals).
    """
    arr = np.array([c[:4] for c in changes], dtype=np.int64)
    peak = np.array([c[4] for c in changes])
    order = np.lexsort((arr[:, 1], arr[:, 0]))
    arr, peak = arr[order], peak[order]
    keep = np.ones(arr.shape[0], dtype=bool)
    for _ in range(arr.shape[0] + 1):
        g, c = arr[keep, 0], arr[keep, 1]
        same_prev = np.r_[False, g[1:] == g[:-1]]
        same_next = np.r_[g[1:] == g[:-1], False]
        lo = np.where(same_prev, np.r_[0, c[:-1]], g_first[g])
        hi = np.where(same_next, np.r_[c[1:], 0], g_end[g])
        L = hi - lo
        seg = np.repeat(np.arange(g.shape[0], dtype=np.int64), L)
        idx = np.arange(int(L.sum()), dtype=np.int64) - np.repeat(np.cumsum(L) - L, L)
        idx += np.repeat(lo, L)
        cp = profile_change_points(
            x[idx],
            seg,
            min_events=m,
            level=level,
            block=block[idx],
            serial_correlation=serial_correlation,
            min_blocks=min_blocks,
        )
        thr = penalty * np.log(np.maximum(g_end[g] - g_first[g], 2).astype(np.float64))
        ok = (cp.tau >= 0) & (cp.statistic > thr)
        if ok.all():
            break
        # Drop only the weakest failing proposal of each station; the others get wider
        # segments next round.
        fail = np.flatnonzero(~ok)
        margin = (cp.statistic - thr)[fail]
        o = np.lexsort((margin, g[fail]))
        first_of_g = np.r_[True, g[fail][o][1:] != g[fail][o][:-1]]
        drop = fail[o][first_of_g]
        kept_idx = np.flatnonzero(keep)
        keep[kept_idx[drop]] = False
        if not keep.any():
            return [], []
    kept = np.flatnonzero(keep)
    new_c = lo + cp.tau
    direction = np.where(cp.shift >= 0.0, 1, -1)
    out = [
        (int(gg), int(cc), int(a), int(d), float(p))
        for gg, cc, a, d, p in zip(g, new_c, arr[kept, 2], direction, peak[kept], strict=True)
    ]
    extra = [
        (int(lo_ + a_ - 1), int(lo_ + b_), float(s_), float(t_), float(f_))
        for lo_, a_, b_, s_, t_, f_ in zip(
            lo, cp.low, cp.high, cp.statistic, thr, cp.inflation, strict=True
        )
    ]
    return out, extra


def _step_table(
    obs: ObservationSet,
    changes: list[tuple[int, int, int, int, float]],
    st: NDArray[np.int64],
    ev: NDArray[np.int64],
    z: NDArray[np.float64],
    g_first: NDArray[np.int64],
    g_end: NDArray[np.int64],
    extra: list[tuple[int, int, float, float, float]],
) -> pd.DataFrame:
    """Assemble the step table; epoch sizes and z shifts use the final change points.

    ``extra`` (aligned with ``changes``, or empty when not confirmed) holds the interval rows
    (last reading possibly before, first reading surely after the change), the evidence, its
    threshold and the inflation factor.
    """
    if not changes:
        return pd.DataFrame({c: pd.Series(dtype=object) for c in STEP_COLUMNS})
    arr = np.array([c[:4] for c in changes], dtype=np.int64)
    peak = np.array([c[4] for c in changes])
    if extra:
        iv = np.array([e[:2] for e in extra], dtype=np.int64)
        ev_stats = np.array([e[2:] for e in extra], dtype=np.float64)
    else:
        iv = np.c_[arr[:, 1] - 1, arr[:, 1]]
        ev_stats = np.full((arr.shape[0], 3), np.nan)
    order = np.lexsort((arr[:, 1], arr[:, 0]))
    arr, peak, iv, ev_stats = arr[order], peak[order], iv[order], ev_stats[order]
    g, change, alarm, direction = arr.T
    same_prev = np.r_[False, g[1:] == g[:-1]]
    same_next = np.r_[g[1:] == g[:-1], False]
    prev_bound = np.where(same_prev, np.r_[0, change[:-1]], g_first[g])
    next_bound = np.where(same_next, np.r_[change[1:], 0], g_end[g])
    cz = np.r_[0.0, np.cumsum(z)]
    mean_before = (cz[change] - cz[prev_bound]) / (change - prev_bound)
    mean_after = (cz[next_bound] - cz[change]) / (next_bound - change)
    return pd.DataFrame(
        {
            "station_id": obs.station_ids[st[change]].astype(str),
            "station": st[change],
            "change_time": obs.event_time[ev[change]],
            "alarm_time": obs.event_time[ev[alarm]],
            "direction": direction,
            "n_before": change - prev_bound,
            "n_after": next_bound - change,
            "peak": peak,
            "shift_z": mean_after - mean_before,
            "change_time_low": obs.event_time[ev[iv[:, 0]]],
            "change_time_high": obs.event_time[ev[iv[:, 1]]],
            "evidence": ev_stats[:, 0],
            "threshold": ev_stats[:, 1],
            "inflation": ev_stats[:, 2],
            # Filled by the station model from the fitted epochs (fusion.model.station_model).
            "bias_before": np.nan,
            "bias_after": np.nan,
            "step": np.nan,
            "step_se": np.nan,
        }
    )


# -- epochs ---------------------------------------------------------------------------------


def split_epochs(obs: ObservationSet, steps: BiasStepResult | pd.DataFrame) -> EpochSplit:
    """Replace each station that stepped by one unit per epoch.

    Parameters
    ----------
    obs : ObservationSet
        All rows (detections and non-detections); each row goes to its station's epoch by
        its event time.
    steps : BiasStepResult or pandas.DataFrame
        Accepted steps; a frame needs columns ``station_id`` and ``change_time``.

    Returns
    -------
    EpochSplit
        Units are ordered by station table order, then epoch start; a station without steps
        keeps one unit whose id is its station id.

    Raises
    ------
    ConfigError
        If a step names a station that is not in ``obs``, or the frame lacks a column.
    """
    table = steps.table if isinstance(steps, BiasStepResult) else steps
    for col in ("station_id", "change_time"):
        if col not in table.columns:
            raise ConfigError(
                f"split_epochs: the steps table has no column {col!r}; pass the result of "
                "detect_bias_steps or a frame with station_id and change_time"
            )
    K = obs.n_stations
    sid_table = obs.station_ids.astype(str)
    lookup = {s: i for i, s in enumerate(sid_table.tolist())}
    step_sid = table["station_id"].astype(str).to_numpy()
    missing = [s for s in step_sid.tolist() if s not in lookup]
    if missing:
        raise ConfigError(
            f"split_epochs: station {missing[0]!r} of the steps table is not in the "
            "observation set; detect steps on the same observations"
        )
    step_st = np.array([lookup[s] for s in step_sid.tolist()], dtype=np.int64)
    step_t = np.asarray(
        pd.to_datetime(table["change_time"]).to_numpy(dtype="datetime64[us]")
    ).astype("datetime64[us]")
    order = np.lexsort((step_t, step_st))
    step_st, step_t = step_st[order], step_t[order]
    keep = np.r_[True, (step_st[1:] != step_st[:-1]) | (step_t[1:] != step_t[:-1])]
    keep = keep[: step_st.shape[0]]  # no steps (all merged away): no extra units
    step_st, step_t = step_st[keep], step_t[keep]
    nat = np.datetime64("NaT", "us")
    # Units: every station's first epoch, plus one per step; sorted by (station, start).
    u_station = np.r_[np.arange(K, dtype=np.int64), step_st]
    u_start = np.r_[np.full(K, nat), step_t]
    first_epoch = np.r_[np.ones(K, dtype=bool), np.zeros(step_st.shape[0], dtype=bool)]
    u_key = np.where(first_epoch, np.iinfo(np.int64).min, u_start.astype(np.int64))
    u_order = np.lexsort((u_key, u_station))
    u_station, u_start = u_station[u_order], u_start[u_order]
    same_next = np.r_[u_station[1:] == u_station[:-1], False]
    u_end = np.where(same_next, np.r_[u_start[1:], nat], nat).astype("datetime64[us]")
    unit_first = np.searchsorted(u_station, np.arange(K, dtype=np.int64), side="left")
    n_steps = np.bincount(step_st, minlength=K)
    # Row → unit: first unit of the station plus the number of its steps at or before t.
    t_row = obs.event_time[obs.event].astype("datetime64[us]")
    step_pos = np.searchsorted(step_st, np.arange(K, dtype=np.int64), side="left")
    count = np.zeros(obs.n_obs, dtype=np.int64)
    for e in range(int(n_steps.max(initial=0))):  # loop over epochs per station, not rows
        has = n_steps[obs.station] > e
        cand = step_pos[obs.station[has]] + e
        count[has] += (step_t[cand] <= t_row[has]).astype(np.int64)
    unit_row = unit_first[obs.station] + count
    unit_sid = sid_table[u_station]
    unit_ids = np.array(
        [epoch_unit_id(s, t) for s, t in zip(unit_sid.tolist(), u_start, strict=True)],
        dtype=object,
    )
    split = ObservationSet(
        magnitude_type=obs.magnitude_type,
        event_ids=obs.event_ids,
        event_time=obs.event_time,
        station_ids=unit_ids,
        event=obs.event,
        station=unit_row.astype(np.int64),
        magnitude=obs.magnitude,
        detected=obs.detected,
        clipped=obs.clipped,
        threshold=obs.threshold,
        distance_km=obs.distance_km,
    )
    return EpochSplit(
        observations=split,
        unit_station=unit_sid.astype(object),
        unit_start=u_start,
        unit_end=u_end,
    )
