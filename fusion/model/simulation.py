"""Seeded synthetic station networks with known truth (docs/simulation.md), and the oracle estimate.

The generator follows the protocol of docs/simulation.md:

- K stations uniform in a square box; some stations form co-located pairs whose errors share a
  common N(0, 1) term with weights (√ρ, √(1 − ρ)), so Cov(e_k, e_l) = ρ σ_k σ_l;
- station biases b_i ~ N(0, bias_sd²) and error SDs σ_i = exp(N(log σ_med, log_sd²));
- N events with Gutenberg–Richter magnitudes M = M_min + Exp(rate β = b ln 10)
  (Gutenberg & Richter 1944), epicentres uniform in the box, origin times uniform over the
  duration;
- station magnitudes m_ij = M_j + b_i(t) + e_ij, with a fraction of outlier cells receiving an
  extra N(0, outlier_sd²) and optionally Student-t(4) noise scaled to SD σ_i;
- missingness by mode:

  ``mar``: available (probability ``availability``) and epicentral distance below
  ``max_distance_km``; ``select_m``: available and M_j + b_i ≥ t_ij with
  t_ij = t0_i + 1.2 log10(Δ_ij / 10 km), t0_i ~ U(0.3, 0.9); ``censor``: available and
  m_ij ≥ t_ij, available non-detections kept with t_ij (docs/censoring.md); ``soft``: available and
  detected with probability Φ((m_ij − t_ij)/g), g = ``soft_sd``;

- an optional bias step: one station's bias jumps by ``bias_step`` at ``bias_step_day``.

Every run is reproducible from its seed (numpy ``default_rng``); the seed is kept in the result.

The oracle (:func:`oracle_estimate`) is GLS with the true biases and the true error covariance
of the detecting stations (docs/simulation.md); its variance is the smallest any unbiased linear
combination of the detections can reach (Aitken 1935).
"""

from __future__ import annotations

from dataclasses import dataclass, field
from typing import Literal

import numpy as np
from numpy.typing import NDArray
from scipy import special

from fusion.network.gls_blocks import PairCovariance, precision_row_weights
from fusion.observations import ObservationSet

__all__ = ["SimulatedNetwork", "SimulationConfig", "oracle_estimate", "simulate_network"]

Mode = Literal["mar", "select_m", "censor", "soft"]


@dataclass(frozen=True, slots=True)
class SimulationConfig:
    """Parameters of one synthetic network (defaults: docs/simulation.md, K = 40, one year).

    Distances in km, magnitudes in magnitude units, times in days.
    """

    n_stations: int = 40
    n_events: int = 4000
    box_km: float = 300.0
    bias_sd: float = 0.2
    sigma_median: float = 0.22
    sigma_log_sd: float = 0.4
    pair_rhos: tuple[float, ...] = (0.4, 0.5, 0.6)
    b_value: float = 1.0
    m_min: float = 1.0
    outlier_rate: float = 0.01
    outlier_sd: float = 1.0
    student_t_noise: bool = False
    mode: Mode = "mar"
    availability: float = 0.9
    max_distance_km: float = 120.0
    threshold_low: float = 0.3
    threshold_high: float = 0.9
    threshold_slope: float = 1.2
    soft_sd: float = 0.15
    duration_days: float = 365.0
    start: str = "2025-01-01T00:00:00"
    bias_step: float = 0.0
    bias_step_station: int = 0
    bias_step_day: float = 182.5
    network_code: str = "ZZ"


@dataclass(frozen=True, slots=True, eq=False)
class SimulatedNetwork:
    """A synthetic data set and its truth.

    Attributes
    ----------
    observations : ObservationSet
        Station magnitudes (and, in ``censor``/``soft`` modes, non-detections with thresholds).
        Events with no detection are dropped; station codes are ``ZZ.S001.`` ...
    magnitude : ndarray, shape (N,)
        True event magnitudes M_j, aligned with ``observations.event_ids``.
    bias : ndarray, shape (K,)
        True station biases b_i (before any bias step), aligned with ``observations.station_ids``.
    bias_row : ndarray, shape (nnz,)
        True bias of each row, including the bias step.
    sigma : ndarray, shape (K,)
        True error SDs σ_i.
    pairs : PairCovariance
        True correlated pairs with c_kl = ρ σ_k σ_l.
    pair_rho : ndarray, shape (n_pairs,)
        ρ of each true pair.
    station_xy, event_xy : ndarray, shape (K, 2), (N, 2)
        Coordinates in km in the box.
    outlier : ndarray of bool, shape (nnz,)
        Cells that received an outlier term.
    seed : int
        The generator seed.
    """

    observations: ObservationSet
    magnitude: NDArray[np.float64]
    bias: NDArray[np.float64]
    bias_row: NDArray[np.float64]
    sigma: NDArray[np.float64]
    pairs: PairCovariance
    pair_rho: NDArray[np.float64]
    station_xy: NDArray[np.float64]
    event_xy: NDArray[np.float64]
    outlier: NDArray[np.bool_]
    seed: int
    config: SimulationConfig = field(default_factory=SimulationConfig)


def simulate_network(config: SimulationConfig | None = None, *, seed: int = 0) -> SimulatedNetwork:
    """Draw one synthetic network following docs/simulation.md (see module docstring).

    Parameters
    ----------
    config : SimulationConfig, optional
        Defaults to :class:`SimulationConfig` ().
    seed : int
        Seed of ``numpy.random.default_rng``.
    """
    cfg = config or SimulationConfig()
    rng = np.random.default_rng(seed)
    K, N = cfg.n_stations, cfg.n_events
    n_pairs = len(cfg.pair_rhos)
    if 2 * n_pairs > K:
        raise ValueError("more correlated pairs than stations allow")

    # Stations; pair p uses stations 2p and 2p+1 placed at the same site (co-located).
    sxy = rng.uniform(0.0, cfg.box_km, size=(K, 2))
    pk = np.arange(n_pairs, dtype=np.int64) * 2
    pl = pk + 1
    sxy[pl] = sxy[pk] + rng.normal(0.0, 0.05, size=(n_pairs, 2))
    bias = rng.normal(0.0, cfg.bias_sd, size=K)
    sigma = np.exp(rng.normal(np.log(cfg.sigma_median), cfg.sigma_log_sd, size=K))
    rho = np.asarray(cfg.pair_rhos, dtype=float)
    t0 = rng.uniform(cfg.threshold_low, cfg.threshold_high, size=K)

    # Events.
    beta = cfg.b_value * np.log(10.0)
    mag = cfg.m_min + rng.exponential(1.0 / beta, size=N)
    exy = rng.uniform(0.0, cfg.box_km, size=(N, 2))
    days = np.sort(rng.uniform(0.0, cfg.duration_days, size=N))

    # All station-event cells, event-major.
    ev = np.repeat(np.arange(N, dtype=np.int64), K)
    st = np.tile(np.arange(K, dtype=np.int64), N)
    dist = np.hypot(*(exy[ev] - sxy[st]).T)
    dist = np.maximum(dist, 1.0)

    # Errors: independent part plus a shared part for pair members.
    if cfg.student_t_noise:
        u = rng.standard_t(4.0, size=N * K) / np.sqrt(2.0)  # t(4) has variance 2
    else:
        u = rng.standard_normal(N * K)
    pair_of = np.full(K, -1, dtype=np.int64)
    pair_of[pk] = np.arange(n_pairs)
    pair_of[pl] = np.arange(n_pairs)
    shared = rng.standard_normal((N, max(n_pairs, 1)))
    in_pair = pair_of[st] >= 0
    r = np.zeros(N * K)
    r[in_pair] = rho[pair_of[st[in_pair]]]
    z = np.sqrt(1.0 - r) * u
    z[in_pair] += np.sqrt(r[in_pair]) * shared[ev[in_pair], pair_of[st[in_pair]]]
    err = sigma[st] * z
    outlier = rng.random(N * K) < cfg.outlier_rate
    err[outlier] += rng.normal(0.0, cfg.outlier_sd, size=int(outlier.sum()))

    bias_row = bias[st].copy()
    if cfg.bias_step != 0.0:
        stepped = (st == cfg.bias_step_station) & (days[ev] >= cfg.bias_step_day)
        bias_row[stepped] += cfg.bias_step
    m = mag[ev] + bias_row + err

    available = rng.random(N * K) < cfg.availability
    threshold = t0[st] + cfg.threshold_slope * np.log10(dist / 10.0)
    keep_nondetection = np.zeros(N * K, dtype=bool)
    if cfg.mode == "mar":
        detected = available & (dist < cfg.max_distance_km)
    elif cfg.mode == "select_m":
        detected = available & (mag[ev] + bias_row >= threshold)
    elif cfg.mode == "censor":
        detected = available & (m >= threshold)
        keep_nondetection = available & ~detected
    elif cfg.mode == "soft":
        p = special.ndtr((m - threshold) / cfg.soft_sd)
        detected = available & (rng.random(N * K) < p)
        keep_nondetection = available & ~detected
    else:  # pragma: no cover - Literal guards this
        raise ValueError(f"unknown mode {cfg.mode!r}")

    # Keep events with at least one detection; keep detections and stored non-detections.
    seen = np.bincount(ev, weights=detected, minlength=N) > 0
    rows = (detected | keep_nondetection) & seen[ev]
    start = np.datetime64(cfg.start, "us")
    ev_time = start + (days * 86_400e6).astype("timedelta64[us]")
    width = max(4, len(str(N)))
    ev_names = np.array([f"sim{j:0{width}d}" for j in range(N)], dtype=object)
    st_names = np.array([f"{cfg.network_code}.S{i:03d}." for i in range(K)], dtype=object)

    kept_events = np.flatnonzero(seen)
    new_code = np.full(N, -1, dtype=np.int64)
    new_code[kept_events] = np.arange(kept_events.shape[0])
    obs = ObservationSet(
        magnitude_type="ML",
        event_ids=ev_names[kept_events],
        event_time=ev_time[kept_events],
        station_ids=st_names,
        event=new_code[ev[rows]],
        station=st[rows],
        magnitude=np.where(detected[rows], m[rows], np.nan),
        detected=detected[rows],
        threshold=np.where(keep_nondetection[rows], threshold[rows], np.nan),
        distance_km=dist[rows],
    )
    return SimulatedNetwork(
        observations=obs,
        magnitude=mag[kept_events],
        bias=bias,
        bias_row=bias_row[rows],
        sigma=sigma,
        pairs=PairCovariance(pk, pl, rho * sigma[pk] * sigma[pl], K),
        pair_rho=rho,
        station_xy=sxy,
        event_xy=exy[kept_events],
        outlier=outlier[rows],
        seed=seed,
        config=cfg,
    )


def oracle_estimate(
    net: SimulatedNetwork,
) -> tuple[NDArray[np.float64], NDArray[np.float64]]:
    """GLS event magnitudes with the true biases and true error covariance (docs/simulation.md).

    Uses detections only (clipped rows excluded) and the true per-row bias (including a bias
    step). Outlier terms are not part of the model covariance, as in the oracle of
    docs/simulation.md §3.

    Returns
    -------
    magnitude, variance : ndarray, shape (N,)
        M̂_j^orc and V_j^orc = 1/(1'Σ_j⁻¹1); NaN for events without a usable detection.
    """
    obs = net.observations
    use = obs.detected & ~obs.clipped
    ev, st = obs.event[use], obs.station[use]
    a = precision_row_weights(ev, st, net.sigma[st] ** 2, net.pairs)
    P = np.bincount(ev, weights=a, minlength=obs.n_events)
    num = np.bincount(
        ev, weights=a * (obs.magnitude[use] - net.bias_row[use]), minlength=obs.n_events
    )
    with np.errstate(invalid="ignore", divide="ignore"):
        return num / P, 1.0 / P
