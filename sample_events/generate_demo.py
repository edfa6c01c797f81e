"""Seeded generator of the invented demo network (the files of ``sample_events/``).

Everything here is invented: the region (the "Quorvale Archipelago"), the network codes
``QV``, ``QS`` and ``QT``, the station codes, the coordinates (an open-ocean box around
47°S, 20°W with no land in it), the events and every reading. The generator writes the data
and, beside it, the truth that produced it, so that station biases, error SDs, correlated pairs,
a bias step and outlier readings can be recovered and checked. Run::

    python -m sample_events.generate_demo            # rewrite the committed files
    python -m sample_events.generate_demo --out DIR  # write them elsewhere

The same seed reproduces the files byte for byte (numpy ``default_rng`` streams spawned from
one ``SeedSequence``, fixed rounding, fixed text formats).

Model
-----
Stations ``i`` (40 station-location codes in three networks) have a bias ``b_i``, an error SD
``σ_i``, a median noise amplitude and a clip amplitude (both nm on a Wood-Anderson record of
magnification 1). Candidate events ``j`` get Gutenberg-Richter magnitudes above ``M_min = 0.8``
with ``b = 1``, i.e. ``M = M_min + Exp(rate b ln 10)`` (Gutenberg & Richter 1944), epicentres
in two seismic zones, a background and one aftershock sequence (Omori-Utsu decay, Utsu 1961),
depths uniform in 2-15 km and origin times in calendar year 2025. Each station reading is

    m_ij = M_j + b_i(t_j) + e_ij (+ o_ij),   e_ij ~ N(0, σ_i²)

where ``b_i(t)`` steps by +0.3 at a stated instrument change for one station, two station pairs
share part of their errors (``Cov(e_kj, e_lj) = ρ σ_k σ_l``, built from a common N(0, 1) term
with weights √ρ and √(1 − ρ)), and about 1 % of the readings get an outlier term
``o_ij ~ N(0, 1²)`` (a wrong phase or a glitch). The Wood-Anderson amplitude follows from the
IASPEI standard ML formula (IASPEI standard procedures for magnitude determination, ML
section; docs/check-values.md §1):

    ML = log10(A_nm) + 1.11 log10(R) + 0.00189 R - 2.09,   R hypocentral distance, km,

solved for ``A_nm`` after rounding ``m_ij`` (3 decimals) and ``R`` (0.1 km), so the stored
amplitude (4 significant digits) gives back the stored magnitude to within 2.2e-4 (that is
log10(1 + 5e-4)). The pre-event noise amplitude of a reading (the station's median times a
log-normal factor) goes through the same formula to give ``noise_threshold``. A station reports
when it was operating (installed and not in an outage: about 92 % of the time), lies within
250 km of the epicentre, and its rounded reading clears its rounded noise threshold; operating
stations within 250 km that did not report give a non-detection row (docs/model.md §2.1;
docs/censoring.md). A reading whose amplitude exceeds the station's clip amplitude is stored at the
clip level with ``clipped = true`` (the magnitude is a lower bound). Events that no station reported
are dropped.

References
----------
Gutenberg, B., & Richter, C. F. (1944). BSSA 34(4), 185-188 (the frequency-magnitude
relation).
Utsu, T. (1961). A statistical study on the occurrence of aftershocks. Geophys. Mag. 30,
521-605.
IASPEI (2013). Summary of magnitude working group recommendations on standard procedures for
determining earthquake magnitudes from digital data (ML formula; docs/check-values.md §1
[IASPEI-web]).
"""

from __future__ import annotations

import argparse
import hashlib
from collections.abc import Sequence
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any, Final

import numpy as np
import pandas as pd
from numpy.typing import ArrayLike, NDArray

from sample_events import FILE_NAMES, demo_text
from sample_events.demo_text import CSV_COLUMNS

__all__ = [
    "CSV_COLUMNS",
    "DEMO_SEED",
    "DemoConfig",
    "DemoData",
    "DemoPaths",
    "file_sha256",
    "generate_demo",
    "main",
    "ml_from_amplitude",
    "simulate_demo",
    "wood_anderson_amplitude_nm",
    "write_demo",
]

#: Seed of the committed files.
DEMO_SEED: Final = 47_2025

_KM_PER_DEG: Final = 111.195  # km per degree of latitude on a 6371-km sphere (2π·6371/360)


# -- the ML formula -------------------------------------------------------------------------


def _ml_distance_term(r_km: NDArray[np.float64]) -> NDArray[np.float64]:
    """IASPEI ML distance term 1.11 log10(R) + 0.00189 R − 2.09 (R hypocentral, km)."""
    return np.asarray(1.11 * np.log10(r_km) + 0.00189 * r_km - 2.09, dtype=np.float64)


def ml_from_amplitude(amplitude_nm: ArrayLike, r_km: ArrayLike) -> NDArray[np.float64]:
    """IASPEI standard ML from a Wood-Anderson amplitude.

    Parameters
    ----------
    amplitude_nm : array_like of float
        Zero-to-peak amplitude, nm, on a Wood-Anderson-simulated horizontal record of static
        magnification 1.
    r_km : array_like of float
        Hypocentral distance, km (> 0).

    Returns
    -------
    ndarray of float64
        ``log10(A) + 1.11 log10(R) + 0.00189 R − 2.09`` (IASPEI standard; docs/check-values.md §1).
    """
    a = np.asarray(amplitude_nm, dtype=np.float64)
    return np.asarray(np.log10(a) + _ml_distance_term(np.asarray(r_km, dtype=np.float64)))


def wood_anderson_amplitude_nm(ml: ArrayLike, r_km: ArrayLike) -> NDArray[np.float64]:
    """Inverse of :func:`ml_from_amplitude`: the amplitude (nm) that gives ``ml`` at ``r_km``."""
    m = np.asarray(ml, dtype=np.float64)
    return np.asarray(10.0 ** (m - _ml_distance_term(np.asarray(r_km, dtype=np.float64))))


# -- configuration ----------------------------------------------------------------------------


@dataclass(frozen=True, slots=True)
class DemoConfig:
    """Knobs of the demo network; the defaults produce the committed files.

    Units: distances in km (along and across the archipelago's long axis, which points
    ``axis_angle_deg`` counter-clockwise from east), magnitudes in magnitude units, amplitudes
    as log10 of nm on a Wood-Anderson record of magnification 1, times as ISO 8601 UTC text
    without zone (read as UTC), fractions as fractions (not percent).
    """

    year: int = 2025
    centre_latitude: float = -47.0
    centre_longitude: float = -20.0
    #: Direction of the archipelago's long axis, degrees counter-clockwise from east.
    axis_angle_deg: float = 18.0
    station_half_length_km: float = 580.0
    station_half_width_km: float = 90.0
    min_station_spacing_km: float = 24.0
    n_candidate_events: int = 2400
    m_min: float = 0.8
    b_value: float = 1.0
    m_max: float = 5.0
    depth_min_km: float = 2.0
    depth_max_km: float = 15.0
    #: Fractions of candidate events in zone A, zone B and the background; the aftershock
    #: sequence takes the rest.
    zone_fractions: tuple[float, float, float] = (0.50, 0.17, 0.23)
    mainshock_magnitude: float = 4.4
    mainshock_time: str = "2025-09-14T03:17:42.350"
    omori_c_days: float = 0.02
    omori_p: float = 1.1
    bias_sd: float = 0.16
    network_bias: tuple[tuple[str, float], ...] = (("QV", 0.0), ("QS", 0.08), ("QT", -0.05))
    sigma_median: float = 0.22
    sigma_log_sd: float = 0.35
    sigma_range: tuple[float, float] = (0.10, 0.50)
    noise_log10_median_nm: float = 0.5
    noise_log10_sd: float = 0.18
    noise_event_log10_sd: float = 0.10
    outlier_rate: float = 0.01
    outlier_sd: float = 1.0
    processing_radius_km: float = 250.0
    down_fraction: float = 0.08
    outages_per_station: int = 5
    step_size: float = 0.3
    step_time: str = "2025-07-02T10:30:00"
    step_outage_start: str = "2025-07-01T08:00:00"
    new_station_start: str = "2025-04-15T00:00:00"
    pair_rhos: tuple[float, float] = (0.6, 0.5)


# -- the station layout ------------------------------------------------------------------------

#: (network, station, location, channel, kind). Codes are invented: letters and digits that
#: spell no word. ``VB05`` carries a broadband sensor (00) and an accelerometer (10) at one
#: site (correlated pair 1); ``S207`` and ``TK33`` are two sites 5 km apart on one path
#: (correlated pair 2); ``S211`` has the instrument change; ``TK38`` opens in April.
_STATION_CODES: Final[tuple[tuple[str, str, str, str, str], ...]] = (
    *(("QV", f"VB{k:02d}", "00", "HHN", "broadband") for k in range(1, 15)),
    ("QV", "VB05", "10", "HNN", "accelerometer"),
    *(("QS", f"S2{k:02d}", "", "EHN", "short-period") for k in range(1, 18)),
    *(("QT", f"TK{k}", "", "HHE", "broadband") for k in range(31, 39)),
)
_PAIR_COLOCATED: Final = (("QV", "VB05", "00"), ("QV", "VB05", "10"))
_PAIR_PATH: Final = (("QS", "S207", ""), ("QT", "TK33", ""))
_STEP_STATION: Final = ("QS", "S211", "")
_NEW_STATION: Final = ("QT", "TK38", "")
#: Stations placed near the middle of the archipelago so that they see many events.
_CENTRAL: Final = ("VB05", "S207", "S211")


def _station_id(network: str, station: str, location: str) -> str:
    return f"{network}.{station}.{location}"


@dataclass(frozen=True, slots=True, eq=False)
class DemoData:
    """The generated tables (pandas DataFrames), before formatting.

    Attributes
    ----------
    stations : DataFrame
        One row per station-location: codes, coordinates (deg, m), truth (bias, sigma, noise
        and clip amplitudes in nm) and notes.
    epochs : DataFrame
        Station metadata epochs (network, station, location, latitude, longitude, elevation,
        start, end).
    events : DataFrame
        Kept events, time-ordered: event_id, origin_time, latitude, longitude, depth (km),
        magnitude (true M).
    readings : DataFrame
        One row per station reading (detections and non-detections): the CSV columns (origin
        time as ``time_ms``, milliseconds after the start of the year) plus the truth columns
        ``station_id``, ``true_bias`` (b_i at the event time), ``error`` (e_ij) and
        ``outlier_offset`` (o_ij, 0 for most).
    pairs, steps, outliers : DataFrame
        Truth tables of the correlated pairs, the bias step and the outlier readings.
    seed : int
        The seed the data came from.
    """

    stations: pd.DataFrame
    epochs: pd.DataFrame
    events: pd.DataFrame
    readings: pd.DataFrame
    pairs: pd.DataFrame
    steps: pd.DataFrame
    outliers: pd.DataFrame
    seed: int
    config: DemoConfig = field(default_factory=DemoConfig)


@dataclass(frozen=True, slots=True)
class DemoPaths:
    """Paths of the written files (names: :data:`sample_events.FILE_NAMES`)."""

    csv: Path
    quakeml: Path
    stations: Path
    truth_stations: Path
    truth_events: Path
    truth_pairs: Path
    truth_steps: Path
    truth_outliers: Path

    def all(self) -> tuple[Path, ...]:
        """Every written file, in a fixed order."""
        return (
            self.csv,
            self.quakeml,
            self.stations,
            self.truth_stations,
            self.truth_events,
            self.truth_pairs,
            self.truth_steps,
            self.truth_outliers,
        )


# -- geometry helpers --------------------------------------------------------------------------


def _to_geographic(
    cfg: DemoConfig, x_km: NDArray[np.float64], y_km: NDArray[np.float64]
) -> tuple[NDArray[np.float64], NDArray[np.float64]]:
    """Local east/north offsets (km) from the centre to latitude/longitude (deg), on a sphere.

    The coordinates are invented; this only has to place points plausibly, not survey them.
    """
    lat = cfg.centre_latitude + y_km / _KM_PER_DEG
    lon = cfg.centre_longitude + x_km / (_KM_PER_DEG * np.cos(np.radians(lat)))
    return lat, lon


def _axis_to_local(
    cfg: DemoConfig, along: NDArray[np.float64], across: NDArray[np.float64]
) -> tuple[NDArray[np.float64], NDArray[np.float64]]:
    """Coordinates along/across the archipelago axis (km) to local east/north (km)."""
    th = np.radians(cfg.axis_angle_deg)
    return along * np.cos(th) - across * np.sin(th), along * np.sin(th) + across * np.cos(th)


def _year_seconds(cfg: DemoConfig) -> tuple[np.datetime64, float]:
    start = np.datetime64(f"{cfg.year}-01-01T00:00:00", "ms")
    end = np.datetime64(f"{cfg.year + 1}-01-01T00:00:00", "ms")
    return start, float((end - start) / np.timedelta64(1, "s"))


def _seconds_since(cfg: DemoConfig, iso: str) -> float:
    start, _ = _year_seconds(cfg)
    return float((np.datetime64(iso, "ms") - start) / np.timedelta64(1, "s"))


# -- stations ------------------------------------------------------------------------------------


def _place_stations(cfg: DemoConfig, rng: np.random.Generator) -> NDArray[np.float64]:
    """Along/across positions (km) of the distinct sites, spaced at least the minimum apart.

    Returns an array of shape (n_codes, 2) aligned with ``_STATION_CODES``. Co-located codes
    share a site; the shared-path pair is 5 km apart. Sequential rejection sampling over about
    forty sites (not a hot path).
    """
    n = len(_STATION_CODES)
    pos = np.full((n, 2), np.nan)
    index = {(net, sta, loc): k for k, (net, sta, loc, _, _) in enumerate(_STATION_CODES)}
    central_along = {"VB05": -110.0, "S207": 40.0, "S211": 5.0}
    placed: list[NDArray[np.float64]] = []
    for k, (net, sta, loc, _, _) in enumerate(_STATION_CODES):
        if (net, sta, loc) == _PAIR_COLOCATED[1]:
            pos[k] = pos[index[_PAIR_COLOCATED[0]]]
            continue
        if (net, sta, loc) == _PAIR_PATH[1]:
            other = pos[index[_PAIR_PATH[0]]]
            pos[k] = other + np.array([4.0, 3.0])
            placed.append(pos[k])
            continue
        for _ in range(10_000):
            if sta in _CENTRAL:
                cand = np.array(
                    [central_along[sta] + rng.uniform(-15.0, 15.0), rng.uniform(-30.0, 30.0)]
                )
            else:
                cand = np.array(
                    [
                        rng.uniform(-cfg.station_half_length_km, cfg.station_half_length_km),
                        rng.uniform(-cfg.station_half_width_km, cfg.station_half_width_km),
                    ]
                )
            if not placed or np.min(np.hypot(*(np.asarray(placed) - cand).T)) >= (
                cfg.min_station_spacing_km
            ):
                break
        else:  # pragma: no cover - the box has room for several hundred sites
            raise RuntimeError("could not place the demo stations; enlarge the box")
        pos[k] = cand
        placed.append(cand)
    return pos


def _build_stations(cfg: DemoConfig, rng: np.random.Generator) -> pd.DataFrame:
    pos = _place_stations(cfg, rng)
    x, y = _axis_to_local(cfg, pos[:, 0], pos[:, 1])
    lat, lon = _to_geographic(cfg, x, y)
    n = len(_STATION_CODES)
    codes = np.array(_STATION_CODES, dtype=object)
    net = codes[:, 0].astype(str)
    kind = codes[:, 4].astype(str)
    net_bias = dict(cfg.network_bias)
    bias = rng.normal(0.0, cfg.bias_sd, size=n) + np.array([net_bias[c] for c in net])
    sigma = np.clip(
        np.exp(rng.normal(np.log(cfg.sigma_median), cfg.sigma_log_sd, size=n)), *cfg.sigma_range
    )
    noise_log = rng.normal(cfg.noise_log10_median_nm, cfg.noise_log10_sd, size=n)
    # An accelerometer resolves far less: its noise floor is four times higher
    # (common practice, no source).
    noise_log = noise_log + np.where(kind == "accelerometer", 0.6, 0.0)
    # Clip levels, nm on the simulated Wood-Anderson record: short-period sensors saturate first,
    # accelerometers practically never (common practice, no source; values invented).
    clip_log = np.where(
        kind == "short-period",
        rng.uniform(4.3, 4.7, size=n),
        np.where(kind == "accelerometer", 7.5, rng.uniform(4.9, 5.3, size=n)),
    )
    elevation = np.round(rng.uniform(8.0, 640.0, size=n))
    # Co-located sensors share the site's coordinates and elevation.
    sid = [_station_id(a, b, c) for a, b, c, _, _ in _STATION_CODES]
    k0 = sid.index(_station_id(*_PAIR_COLOCATED[0]))
    k1 = sid.index(_station_id(*_PAIR_COLOCATED[1]))
    elevation[k1] = elevation[k0]
    install_year = rng.integers(2012, 2024, size=n)
    install_doy = rng.integers(0, 365, size=n)
    start = (
        np.array([f"{yr}-01-01" for yr in install_year], dtype="datetime64[D]")
        + install_doy.astype("timedelta64[D]")
    ).astype("datetime64[s]")
    start[k1] = start[k0]
    new_k = sid.index(_station_id(*_NEW_STATION))
    start[new_k] = np.datetime64(cfg.new_station_start, "s")
    notes = np.array([f"{k} sensor" for k in kind], dtype=object)
    frame = pd.DataFrame(
        {
            "station_id": sid,
            "network": net,
            "station": codes[:, 1].astype(str),
            "location": codes[:, 2].astype(str),
            "channel": codes[:, 3].astype(str),
            "kind": kind,
            "latitude": np.round(lat, 4),
            "longitude": np.round(lon, 4),
            "elevation": elevation,
            "bias": bias,
            "sigma": sigma,
            "noise_amplitude_nm": 10.0**noise_log,
            "clip_amplitude_nm": 10.0**clip_log,
            "start": start,
            "notes": notes,
        }
    )
    return frame


# -- events ------------------------------------------------------------------------------------


def _gutenberg_richter(
    rng: np.random.Generator, n: int, m_min: float, m_max: float, b_value: float
) -> NDArray[np.float64]:
    """Magnitudes with a Gutenberg-Richter (truncated exponential) distribution.

    Inverse-CDF draw of M in [m_min, m_max) with density ∝ 10^(−b M) (Gutenberg & Richter 1944).
    """
    u = rng.uniform(size=n)
    span = 1.0 - 10.0 ** (-b_value * (m_max - m_min))
    return np.asarray(m_min - np.log10(1.0 - u * span) / b_value, dtype=np.float64)


def _build_candidate_events(cfg: DemoConfig, rng: np.random.Generator) -> dict[str, NDArray[Any]]:
    """Candidate events (before the detection cut): time (s of the year), position, M, depth."""
    n = cfg.n_candidate_events
    _, year_s = _year_seconds(cfg)
    n_a, n_b, n_bg = (round(f * n) for f in cfg.zone_fractions)
    n_after = n - n_a - n_b - n_bg
    # Zone A: the archipelago's axial fault zone along 3/4 of its length, 9 km wide (SD).
    half_a = 0.75 * cfg.station_half_length_km
    a_along = rng.uniform(-half_a, half_a, size=n_a)
    a_across = rng.normal(0.0, 9.0, size=n_a)
    # Zone B: a transverse zone crossing the axis at along = +120 km, angled 60 degrees.
    t = rng.uniform(-120.0, 120.0, size=n_b)
    off = rng.normal(0.0, 7.0, size=n_b)
    ang = np.radians(60.0)
    b_along = 120.0 + t * np.cos(ang) - off * np.sin(ang)
    b_across = t * np.sin(ang) + off * np.cos(ang)
    # Background: uniform over the station box enlarged by 60 km.
    g_along = rng.uniform(
        -cfg.station_half_length_km - 60.0, cfg.station_half_length_km + 60.0, size=n_bg
    )
    g_across = rng.uniform(
        -cfg.station_half_width_km - 60.0, cfg.station_half_width_km + 60.0, size=n_bg
    )
    # Aftershock sequence: mainshock at along = -150 km on zone A, Omori-Utsu decay in time
    # (rate ∝ (t + c)^(−p), Utsu 1961) drawn by inverse CDF up to the end of the year.
    t_main = _seconds_since(cfg, cfg.mainshock_time)
    main_along, main_across = -150.0, 2.0
    c = cfg.omori_c_days * 86400.0
    p = cfg.omori_p
    horizon = year_s - t_main
    f_end = (c ** (1.0 - p) - (horizon + c) ** (1.0 - p)) / (p - 1.0)
    u = rng.uniform(0.0, f_end, size=n_after - 1)
    dt = (c ** (1.0 - p) - u * (p - 1.0)) ** (1.0 / (1.0 - p)) - c
    f_along = main_along + rng.normal(0.0, 6.0, size=n_after - 1)
    f_across = main_across + rng.normal(0.0, 3.0, size=n_after - 1)

    along = np.concatenate([a_along, b_along, g_along, [main_along], f_along])
    across = np.concatenate([a_across, b_across, g_across, [main_across], f_across])
    time_s = np.concatenate(
        [rng.uniform(0.0, year_s, size=n_a + n_b + n_bg), [t_main], t_main + dt]
    )
    mag = np.concatenate(
        [
            _gutenberg_richter(rng, n_a + n_b + n_bg, cfg.m_min, cfg.m_max, cfg.b_value),
            [cfg.mainshock_magnitude],
            _gutenberg_richter(
                rng, n_after - 1, cfg.m_min, cfg.mainshock_magnitude - 0.2, cfg.b_value
            ),
        ]
    )
    depth = rng.uniform(cfg.depth_min_km, cfg.depth_max_km, size=n)
    zone = np.concatenate(
        [
            np.full(n_a, "zone A", dtype=object),
            np.full(n_b, "zone B", dtype=object),
            np.full(n_bg, "background", dtype=object),
            np.array(["mainshock"], dtype=object),
            np.full(n_after - 1, "aftershock", dtype=object),
        ]
    )
    x, y = _axis_to_local(cfg, along, across)
    lat, lon = _to_geographic(cfg, x, y)
    # Origin times to the millisecond; the order of events is their time order.
    time_ms = np.round(time_s * 1000.0).astype(np.int64)
    order = np.argsort(time_ms, kind="stable")
    return {
        "time_ms": time_ms[order],
        "latitude": np.round(lat, 4)[order],
        "longitude": np.round(lon, 4)[order],
        "depth": np.round(depth, 1)[order],
        "magnitude": mag[order],
        "zone": zone[order],
    }


# -- availability ------------------------------------------------------------------------------


def _operating(
    cfg: DemoConfig,
    rng: np.random.Generator,
    stations: pd.DataFrame,
    time_s: NDArray[np.float64],
) -> tuple[NDArray[np.bool_], pd.DataFrame]:
    """Operating mask, shape (N, K): installed and not inside one of the station's outages.

    Each station has ``outages_per_station`` outages with uniform start times and exponential
    lengths whose mean gives an expected down time of ``down_fraction`` of the year; the step
    station is also down for its instrument change. Returns the mask and the outage table.
    """
    k = len(stations)
    _, year_s = _year_seconds(cfg)
    m = cfg.outages_per_station
    mean_len = cfg.down_fraction * year_s / m
    starts = rng.uniform(-mean_len, year_s, size=(k, m))
    ends = starts + rng.exponential(mean_len, size=(k, m))
    sid = stations["station_id"].tolist()
    step_k = sid.index(_station_id(*_STEP_STATION))
    extra_start = np.full((k, 1), -np.inf)
    extra_end = np.full((k, 1), -np.inf)
    extra_start[step_k, 0] = _seconds_since(cfg, cfg.step_outage_start)
    extra_end[step_k, 0] = _seconds_since(cfg, cfg.step_time)
    starts = np.concatenate([starts, extra_start], axis=1)
    ends = np.concatenate([ends, extra_end], axis=1)
    t = time_s[:, None, None]
    down = np.any((t >= starts[None, :, :]) & (t < ends[None, :, :]), axis=2)
    year_start, _ = _year_seconds(cfg)
    installed_s = (
        (stations["start"].to_numpy(dtype="datetime64[s]") - year_start) / np.timedelta64(1, "s")
    ).astype(np.float64)
    installed = time_s[:, None] >= installed_s[None, :]
    rows = np.repeat(np.arange(k), starts.shape[1])
    outages = pd.DataFrame(
        {
            "station_id": np.asarray(sid, dtype=object)[rows],
            "start_s": starts.ravel(),
            "end_s": ends.ravel(),
        }
    )
    outages = outages[np.isfinite(outages["start_s"])]
    return installed & ~down, outages


# -- readings ----------------------------------------------------------------------------------


def _errors(
    cfg: DemoConfig, rng: np.random.Generator, stations: pd.DataFrame, n_events: int
) -> NDArray[np.float64]:
    """Errors e_ij, shape (N, K): independent N(0, σ_i²) except the two correlated pairs.

    A pair (k, l) with correlation ρ shares a common N(0, 1) term z0:
    e_k = σ_k (√ρ z0 + √(1 − ρ) z_k), e_l likewise, so Cov(e_k, e_l) = ρ σ_k σ_l.
    """
    k = len(stations)
    sigma = stations["sigma"].to_numpy()
    z = rng.standard_normal(size=(n_events, k))
    common = rng.standard_normal(size=(n_events, len(cfg.pair_rhos)))
    sid = stations["station_id"].tolist()
    for p, (pair, rho) in enumerate(zip((_PAIR_COLOCATED, _PAIR_PATH), cfg.pair_rhos, strict=True)):
        for code in pair:
            col = sid.index(_station_id(*code))
            z[:, col] = np.sqrt(rho) * common[:, p] + np.sqrt(1.0 - rho) * z[:, col]
    return np.asarray(z * sigma[None, :], dtype=np.float64)


def _geometry(
    ev_lat: NDArray[np.float64],
    ev_lon: NDArray[np.float64],
    st_lat: NDArray[np.float64],
    st_lon: NDArray[np.float64],
) -> tuple[NDArray[np.float64], NDArray[np.float64], NDArray[np.float64]]:
    """Epicentral distance (km, WGS84 geodesic), azimuth (deg) and distance (deg), (N, K)."""
    from stations.geometry import geodesic_inverse, great_circle_degrees

    la1, lo1 = ev_lat[:, None], ev_lon[:, None]
    la2, lo2 = st_lat[None, :], st_lon[None, :]
    geo = geodesic_inverse(la1, lo1, la2, lo2)
    deg = great_circle_degrees(la1, lo1, la2, lo2)
    return geo.distance_km, geo.azimuth, deg


def simulate_demo(config: DemoConfig | None = None, *, seed: int = DEMO_SEED) -> DemoData:
    """Draw the demo network, its events and every station reading (see module docstring).

    Parameters
    ----------
    config : DemoConfig, optional
        Defaults to :class:`DemoConfig` (), the committed files.
    seed : int, default=DEMO_SEED
        Root of a ``numpy.random.SeedSequence``; each stage (stations, events, availability,
        errors, outliers, noise, periods) draws from its own spawned stream.

    Returns
    -------
    DemoData
    """
    cfg = config or DemoConfig()
    streams = [np.random.default_rng(s) for s in np.random.SeedSequence(seed).spawn(7)]
    rng_sta, rng_ev, rng_op, rng_err, rng_out, rng_noise, rng_per = streams

    stations = _build_stations(cfg, rng_sta)
    cand = _build_candidate_events(cfg, rng_ev)
    n, k = cand["magnitude"].shape[0], len(stations)
    time_s = cand["time_ms"].astype(np.float64) / 1000.0
    operating, _ = _operating(cfg, rng_op, stations, time_s)
    err = _errors(cfg, rng_err, stations, n)
    outlier = rng_out.uniform(size=(n, k)) < cfg.outlier_rate
    outlier_offset = np.where(outlier, rng_out.normal(0.0, cfg.outlier_sd, size=(n, k)), 0.0)
    noise_factor = rng_noise.normal(0.0, cfg.noise_event_log10_sd, size=(n, k))
    period_scatter = rng_per.normal(0.0, 0.08, size=(n, k))

    epi, azimuth, deg = _geometry(
        cand["latitude"],
        cand["longitude"],
        stations["latitude"].to_numpy(),
        stations["longitude"].to_numpy(),
    )
    epi_r = np.round(epi, 1)
    r_hyp = np.round(np.hypot(epi_r, cand["depth"][:, None]), 1)
    r_hyp = np.maximum(r_hyp, 0.1)

    sid = stations["station_id"].tolist()
    bias_t = np.broadcast_to(stations["bias"].to_numpy()[None, :], (n, k)).copy()
    step_k = sid.index(_station_id(*_STEP_STATION))
    after_step = time_s >= _seconds_since(cfg, cfg.step_time)
    bias_t[after_step, step_k] += cfg.step_size

    reading = cand["magnitude"][:, None] + bias_t + err + outlier_offset
    m_read = np.round(reading, 3)
    noise_nm = stations["noise_amplitude_nm"].to_numpy()[None, :] * 10.0**noise_factor
    threshold = np.round(ml_from_amplitude(noise_nm, r_hyp), 3)
    in_range = epi_r <= cfg.processing_radius_km
    candidate = operating & in_range
    detected = candidate & (m_read >= threshold)

    clip_nm = stations["clip_amplitude_nm"].to_numpy()[None, :]
    clipped = detected & (wood_anderson_amplitude_nm(m_read, r_hyp) > clip_nm)
    m_stored = np.where(clipped, np.round(ml_from_amplitude(clip_nm, r_hyp), 3), m_read)

    keep_event = detected.any(axis=1)
    ev_idx = np.flatnonzero(keep_event)
    events = pd.DataFrame(
        {
            "event_id": [f"qv2025-{j + 1:05d}" for j in range(ev_idx.shape[0])],
            "time_ms": cand["time_ms"][ev_idx],
            "latitude": cand["latitude"][ev_idx],
            "longitude": cand["longitude"][ev_idx],
            "depth": cand["depth"][ev_idx],
            "magnitude": cand["magnitude"][ev_idx],
            "zone": cand["zone"][ev_idx],
        }
    )
    code_of = np.full(n, -1, dtype=np.int64)
    code_of[ev_idx] = np.arange(ev_idx.shape[0])

    # Long format: one row per candidate cell of a kept event; rows ordered by event, then by
    # hypocentral distance (the order an analyst reads a station list).
    row_mask = candidate & keep_event[:, None]
    jj, ii = np.nonzero(row_mask)
    order = np.lexsort((ii, r_hyp[jj, ii], code_of[jj]))
    jj, ii = jj[order], ii[order]
    det = detected[jj, ii]
    m_row = np.where(det, m_stored[jj, ii], np.nan)
    amp = np.where(det, wood_anderson_amplitude_nm(m_row, r_hyp[jj, ii]), np.nan)
    log_t = (
        -0.9
        + 0.12 * cand["magnitude"][jj]
        + 0.25 * np.log10(r_hyp[jj, ii] / 10.0)
        + period_scatter[jj, ii]
    )
    period = np.where(det, np.round(np.clip(10.0**log_t, 0.05, 2.0), 2), np.nan)
    ev_codes = code_of[jj]
    readings = pd.DataFrame(
        {
            "event_id": events["event_id"].to_numpy()[ev_codes],
            "time_ms": events["time_ms"].to_numpy()[ev_codes],
            "event_latitude": events["latitude"].to_numpy()[ev_codes],
            "event_longitude": events["longitude"].to_numpy()[ev_codes],
            "event_depth": events["depth"].to_numpy()[ev_codes],
            "network": stations["network"].to_numpy()[ii],
            "station": stations["station"].to_numpy()[ii],
            "location": stations["location"].to_numpy()[ii],
            "channel": stations["channel"].to_numpy()[ii],
            "magnitude_type": "ML",
            "magnitude": m_row,
            "detected": det,
            "noise_threshold": threshold[jj, ii],
            "amplitude": amp,
            "amplitude_unit": np.where(det, "nm", ""),
            "period": period,
            "distance_km": epi_r[jj, ii],
            "distance_deg": np.round(deg[jj, ii], 3),
            "hypocentral_distance_km": r_hyp[jj, ii],
            "azimuth": np.round(azimuth[jj, ii], 1) % 360.0,
            "source_weight": np.nan,
            "clipped": clipped[jj, ii],
            "station_id": np.asarray(sid, dtype=object)[ii],
            "true_bias": bias_t[jj, ii],
            "error": err[jj, ii],
            "outlier_offset": outlier_offset[jj, ii],
        }
    )

    pairs = pd.DataFrame(
        {
            "station_id_1": [_station_id(*_PAIR_COLOCATED[0]), _station_id(*_PAIR_PATH[0])],
            "station_id_2": [_station_id(*_PAIR_COLOCATED[1]), _station_id(*_PAIR_PATH[1])],
            "rho": list(cfg.pair_rhos),
            "kind": ["co-located", "shared path"],
            "notes": [
                "broadband sensor and accelerometer at one site",
                "two sites 5 km apart on one island; errors share the path",
            ],
        }
    )
    step_bias = float(stations["bias"].iloc[step_k])
    steps = pd.DataFrame(
        {
            "station_id": [sid[step_k]],
            "time": [cfg.step_time],
            "step": [cfg.step_size],
            "bias_before": [step_bias],
            "bias_after": [step_bias + cfg.step_size],
            "notes": [
                f"instrument change; station down from {cfg.step_outage_start}Z to {cfg.step_time}Z"
            ],
        }
    )
    out_rows = readings["outlier_offset"].to_numpy() != 0.0
    outliers = readings.loc[out_rows, ["event_id", "station_id", "outlier_offset", "detected"]]
    outliers = outliers.rename(columns={"outlier_offset": "offset"}).reset_index(drop=True)

    stations = stations.copy()
    notes = stations["notes"].to_numpy().copy()
    for code, text in (
        (_PAIR_COLOCATED[0], "; correlated pair 1 (co-located)"),
        (_PAIR_COLOCATED[1], "; correlated pair 1 (co-located)"),
        (_PAIR_PATH[0], "; correlated pair 2 (shared path)"),
        (_PAIR_PATH[1], "; correlated pair 2 (shared path)"),
        (
            _STEP_STATION,
            f"; bias {cfg.step_size:+.1f} from {cfg.step_time}Z (instrument change)",
        ),
        (_NEW_STATION, f"; installed {cfg.new_station_start}Z"),
    ):
        notes[sid.index(_station_id(*code))] += text
    stations["notes"] = notes
    epochs = _epochs(cfg, stations)
    return DemoData(
        stations=stations,
        epochs=epochs,
        events=events,
        readings=readings.reset_index(drop=True),
        pairs=pairs,
        steps=steps,
        outliers=outliers,
        seed=seed,
        config=cfg,
    )


def _epochs(cfg: DemoConfig, stations: pd.DataFrame) -> pd.DataFrame:
    """Station metadata epochs; the step station has two (split at its instrument change)."""
    base = stations[["network", "station", "location", "latitude", "longitude", "elevation"]]
    frame = base.copy()
    frame["start"] = stations["start"].to_numpy(dtype="datetime64[s]")
    frame["end"] = np.datetime64("NaT", "s")
    sid = stations["station_id"].tolist()
    step_k = sid.index(_station_id(*_STEP_STATION))
    second = frame.iloc[[step_k]].copy()
    change = np.datetime64(cfg.step_time, "s")
    frame.loc[frame.index[step_k], "end"] = change
    second["start"] = change
    out = pd.concat([frame, second], ignore_index=True)
    out = out.sort_values(["network", "station", "location", "start"], kind="stable")
    return out.reset_index(drop=True)


# -- writing -----------------------------------------------------------------------------------


def write_demo(data: DemoData, out_dir: Path) -> DemoPaths:
    """Write every demo file into ``out_dir`` (created if missing) and return their paths.

    Text formats (column order, digits, time format) are those of
    :mod:`sample_events.demo_text`.
    """
    out = Path(out_dir)
    out.mkdir(parents=True, exist_ok=True)
    paths = DemoPaths(**{key: out / name for key, name in FILE_NAMES.items()})
    year_start, _ = _year_seconds(data.config)
    demo_text.write_readings_csv(data.readings, paths.csv, year_start=year_start)
    demo_text.write_truth_tables(
        paths,
        stations=data.stations,
        events=data.events,
        pairs=data.pairs,
        steps=data.steps,
        outliers=data.outliers,
        epochs=data.epochs,
        year_start=year_start,
    )
    demo_text.write_quakeml_month(
        data.readings, paths.quakeml, year=data.config.year, month=12, year_start=year_start
    )
    return paths


def generate_demo(
    out_dir: Path, *, seed: int = DEMO_SEED, config: DemoConfig | None = None
) -> DemoPaths:
    """Simulate (:func:`simulate_demo`) and write (:func:`write_demo`) the demo files."""
    return write_demo(simulate_demo(config, seed=seed), out_dir)


def file_sha256(path: Path) -> str:
    """SHA-256 hex digest of a file's bytes."""
    return hashlib.sha256(Path(path).read_bytes()).hexdigest()


def main(argv: Sequence[str] | None = None) -> int:
    """Command-line entry point: ``python -m sample_events.generate_demo [--out DIR]``."""
    parser = argparse.ArgumentParser(
        prog="python -m sample_events.generate_demo",
        description="Write the invented demo network files (data and truth).",
    )
    parser.add_argument(
        "--out",
        type=Path,
        default=Path(__file__).resolve().parent,
        help="output folder (default: the sample_events package folder)",
    )
    parser.add_argument("--seed", type=int, default=DEMO_SEED, help="generator seed")
    args = parser.parse_args(argv)
    paths = generate_demo(args.out, seed=args.seed)
    for p in paths.all():
        print(f"{p.stat().st_size:>10,d} B  {file_sha256(p)}  {p.name}")
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
