"""The report's figures, each returned as PNG bytes.

Every axis is labelled with its unit; every colour has one meaning
(:data:`fusion.report.palette.ROLE`) and is doubled by a marker shape or line style.
"""

from __future__ import annotations

from dataclasses import dataclass, field
from typing import Any

import numpy as np
import pandas as pd
from numpy.typing import NDArray

from fusion.network.network_magnitude import interval_name
from fusion.report.drawing import binned_quantiles, new_figure, png_bytes
from fusion.report.palette import ROLE

__all__ = [
    "StationPanelData",
    "draw_station",
    "fused_shift_figure",
    "pair_map_figure",
    "sigma_ranking_figure",
    "station_figure",
]

_MAG = "magnitude units"


def sigma_ranking_figure(table: pd.DataFrame, level: float, attention: NDArray[np.bool_]) -> bytes:
    """Station units ranked by error SD σ̃ with their chi-square intervals.

    Units that need attention (any attention flag) are drawn as vermillion crosses, the
    others as blue dots.
    """
    order = np.argsort(table["sigma"].to_numpy(), kind="stable")
    s = table["sigma"].to_numpy()[order]
    lo = table["sigma_ci_low"].to_numpy()[order]
    hi = table["sigma_ci_high"].to_numpy()[order]
    att = attention[order]
    rank = np.arange(1, s.shape[0] + 1)
    with new_figure(9.0, 3.6) as fig:
        ax = fig.subplots()
        has_ci = np.isfinite(lo) & np.isfinite(hi)
        if np.any(has_ci):
            ax.vlines(
                rank[has_ci],
                lo[has_ci],
                hi[has_ci],
                color=ROLE["model"],
                linewidth=0.8 if s.shape[0] < 300 else 0.4,
                label=interval_name(level),
            )
        ax.plot(rank[~att], s[~att], "o", ms=3, color=ROLE["station"], label="station unit")
        if np.any(att):
            ax.plot(rank[att], s[att], "x", ms=5, color=ROLE["outlier"], label="needs attention")
        ax.set_xlabel("rank of station unit (1 = smallest error SD)")
        ax.set_ylabel(f"error SD σ̃ ({_MAG})")
        ax.set_title("Station units ranked by error SD")
        ax.set_ylim(bottom=0.0)
        ax.legend(loc="upper left")
        return png_bytes(fig)


def fused_shift_figure(events: pd.DataFrame) -> bytes:
    """Network magnitude minus the plain mean of the raw station magnitudes, against time.

    Every event is a grey dot; the black line is the median per time bin and the shaded band
    the 10-90 % range (bins with fewer than 5 events are left out).
    """
    t = pd.to_datetime(events["origin_time"], utc=True).dt.tz_localize(None)
    tv = t.to_numpy(dtype="datetime64[us]")
    if "minus_plain_mean" in events.columns:
        d = pd.to_numeric(events["minus_plain_mean"]).to_numpy(dtype=np.float64)
    else:
        d = pd.to_numeric(events["magnitude"]).to_numpy(dtype=np.float64) - pd.to_numeric(
            events["plain_mean"]
        ).to_numpy(dtype=np.float64)
    ok = np.isfinite(d) & ~np.isnat(tv)
    with new_figure(9.0, 3.4) as fig:
        ax = fig.subplots()
        if np.any(ok):
            import matplotlib.dates as mdates

            x = mdates.date2num(tv[ok])
            y = d[ok]
            ax.plot(
                tv[ok],
                y,
                ".",
                ms=2,
                color=ROLE["raw"],
                alpha=0.35,
                rasterized=True,
                label="event",
            )
            n_bins = int(np.clip(np.sqrt(x.shape[0]), 1, 60))
            if x.max() > x.min():
                edges = np.linspace(x.min(), x.max(), n_bins + 1)
                centre, q, _ = binned_quantiles(x, y, edges)
                cdates = mdates.num2date(centre)
                ax.fill_between(
                    cdates, q[0], q[2], color=ROLE["model"], alpha=0.3, label="10-90 % per bin"
                )
                ax.plot(cdates, q[1], "-", color=ROLE["network"], lw=1.5, label="median per bin")
        ax.axhline(0.0, color=ROLE["plain_mean"], ls="--", lw=1.0, label="no change")
        ax.set_xlabel("origin time (UTC)")
        ax.set_ylabel(f"network − plain mean ({_MAG})")
        ax.set_title("How far the network magnitude moved from the plain mean")
        ax.legend(loc="upper left", ncols=2)
        return png_bytes(fig)


@dataclass(frozen=True, slots=True, eq=False)
class StationPanelData:
    """What one station section draws (all arrays over the station's analysable readings).

    Attributes
    ----------
    station_id : str
    time : ndarray of datetime64[us]
        Origin times.
    offset : ndarray
        Station minus network magnitude before correction, m − M̂ = residual + b̂
        (magnitude units).
    residual : ndarray
        Corrected station magnitude minus network magnitude (magnitude units).
    residual_var : ndarray
        Model variance of each residual, (σ̃² + SE_b²)(1 − w) (magnitude units²).
    distance_km, magnitude : ndarray
        Epicentral distance (km) and network magnitude of each reading.
    outlier : ndarray of bool
        Robust weight below the outlier level.
    unit : ndarray of int
        Position of the reading's unit in ``units`` below.
    unit_bias, unit_bias_low, unit_bias_high : ndarray, shape (U,)
        Bias of each unit of the station and its interval.
    unit_start, unit_end : ndarray of datetime64[us], shape (U,)
        Epoch bounds (NaT open).
    dist_line, mag_line : ndarray, shape (U, 4)
        Per unit: intercept, slope, x_min, x_max of the fitted trend (NaN: none); distance in
        log10 km.
    alarms : ndarray of datetime64[us]
        Drift-alarm times of the station (when the alarm fired, after the change).
    level : float
        Level of the bias interval, a fraction.
    change_spans : ndarray of datetime64[us], shape (n, 2)
        Interval of each estimated change time (docs/epochs.md); the epoch line is drawn at
        the maximum-likelihood change time, the start of the new epoch.
    """

    station_id: str
    time: NDArray[np.datetime64]
    offset: NDArray[np.float64]
    residual: NDArray[np.float64]
    residual_var: NDArray[np.float64]
    distance_km: NDArray[np.float64]
    magnitude: NDArray[np.float64]
    outlier: NDArray[np.bool_]
    unit: NDArray[np.int64]
    unit_bias: NDArray[np.float64]
    unit_bias_low: NDArray[np.float64]
    unit_bias_high: NDArray[np.float64]
    unit_start: NDArray[np.datetime64]
    unit_end: NDArray[np.datetime64]
    dist_line: NDArray[np.float64]
    mag_line: NDArray[np.float64]
    alarms: NDArray[np.datetime64]
    level: float
    change_spans: NDArray[np.datetime64] = field(
        default_factory=lambda: np.zeros((0, 2), dtype="datetime64[us]")
    )


def _mixture_density(grid: NDArray[np.float64], var: NDArray[np.float64]) -> NDArray[np.float64]:
    """Mean of N(0, v) densities over the readings' variances (256 quantiles of v stand in
    for the readings when there are more)."""
    v = var[np.isfinite(var) & (var > 0.0)]
    if v.shape[0] == 0:
        return np.full(grid.shape, np.nan)
    if v.shape[0] > 256:
        v = np.quantile(v, (np.arange(256) + 0.5) / 256)
    dens = np.exp(-0.5 * grid[:, None] ** 2 / v[None, :]) / np.sqrt(2.0 * np.pi * v[None, :])
    return np.asarray(dens.mean(axis=1), dtype=np.float64)


def station_figure(d: StationPanelData) -> bytes:
    """Four panels for one station (:func:`draw_station`) as PNG bytes."""
    with new_figure(10.0, 6.8, top=0.6, bottom=0.65, wspace=0.28, hspace=0.62) as fig:
        draw_station(fig, d)
        return png_bytes(fig)


def draw_station(fig: Any, d: StationPanelData) -> None:
    """Draw the four station panels on an empty figure: offset over time with epochs and
    alarms; residual histogram against the model's distribution; residual against distance
    and against magnitude with the fitted trends."""
    (ax_t, ax_h), (ax_d, ax_m) = fig.subplots(2, 2)
    _offset_panel(ax_t, d)
    _residual_histogram(ax_h, d)
    # (c), (d) residual against distance and magnitude with the trends.
    for ax, x, line, xlabel, title, logx in (
        (
            ax_d,
            d.distance_km,
            d.dist_line,
            "epicentral distance (km)",
            "(c) residual against distance",
            True,
        ),
        (
            ax_m,
            d.magnitude,
            d.mag_line,
            f"network magnitude ({_MAG})",
            "(d) residual against magnitude",
            False,
        ),
    ):
        _trend_panel(ax, d, x, line, xlabel, title, logx=logx)
    fig.suptitle(f"Station {d.station_id}")


def _offset_panel(ax_t: Any, d: StationPanelData) -> None:
    """(a) Offset m − M̂ over time, the bias of each epoch with its interval, drift alarms."""
    ok_out = d.outlier
    inl = ~ok_out
    ax_t.plot(
        d.time[inl],
        d.offset[inl],
        ".",
        ms=2.5,
        color=ROLE["station"],
        alpha=0.5,
        rasterized=True,
        label="reading (m − M̂)",
    )
    if np.any(ok_out):
        ax_t.plot(
            d.time[ok_out], d.offset[ok_out], "x", ms=4, color=ROLE["outlier"], label="outlier"
        )
    tmin = d.time.min() if d.time.shape[0] else np.datetime64("NaT")
    tmax = d.time.max() if d.time.shape[0] else np.datetime64("NaT")
    for u in range(d.unit_bias.shape[0]):
        a = d.unit_start[u] if not np.isnat(d.unit_start[u]) else tmin
        b = d.unit_end[u] if not np.isnat(d.unit_end[u]) else tmax
        if np.isnat(a) or np.isnat(b):
            continue
        a, b = max(a, tmin), min(b, tmax)
        if a >= b:
            continue
        span = np.array([a, b], dtype="datetime64[us]")
        ax_t.fill_between(
            span, d.unit_bias_low[u], d.unit_bias_high[u], color=ROLE["model"], alpha=0.3
        )
        ax_t.plot(
            span,
            [d.unit_bias[u]] * 2,
            "-",
            color=ROLE["network"],
            lw=1.6,
            label="bias b̂ per epoch" if u == 0 else None,
        )
        if not np.isnat(d.unit_start[u]) and d.unit_start[u] > tmin:
            ax_t.axvline(
                d.unit_start[u],
                color=ROLE["epoch"],
                lw=0.8,
                label="epoch start" if u > 0 else None,
            )
    for i, (lo, hi) in enumerate(d.change_spans):
        if not (np.isnat(lo) or np.isnat(hi)):
            ax_t.axvspan(
                lo,
                hi,
                color=ROLE["epoch"],
                alpha=0.15,
                lw=0,
                label="likely change time (95 % interval)" if i == 0 else None,
            )
    for i, t in enumerate(d.alarms):
        ax_t.axvline(
            t, color=ROLE["alarm"], ls=":", lw=1.2, label="drift alarm fired" if i == 0 else None
        )
    ax_t.set_xlabel("origin time (UTC)")
    ax_t.set_ylabel(f"station − network ({_MAG})")
    ax_t.set_title(f"(a) offset over time, bias with {interval_name(d.level)}")
    if ax_t.get_legend_handles_labels()[0]:
        ax_t.legend(loc="upper left")
    for lab in ax_t.get_xticklabels():
        lab.set_rotation(20)


def _residual_histogram(ax_h: Any, d: StationPanelData) -> None:
    """(b) Histogram of the residuals against the model's distribution N(0, s²(1 − w))."""
    r = d.residual
    fin = r[np.isfinite(r)]
    if fin.shape[0]:
        lim = max(float(np.quantile(np.abs(fin), 0.995)), 1e-3) * 1.1
        bins = np.linspace(-lim, lim, int(np.clip(np.sqrt(fin.shape[0]), 8, 60)) + 1)
        ax_h.hist(
            np.clip(fin, -lim, lim),
            bins=bins,
            color=ROLE["station"],
            alpha=0.6,
            label=f"residuals (n = {fin.shape[0]})",
        )
        grid = np.linspace(-lim, lim, 241)
        width = bins[1] - bins[0]
        ax_h.plot(
            grid,
            fin.shape[0] * width * _mixture_density(grid, d.residual_var),
            "-",
            color=ROLE["network"],
            lw=1.5,
            label="model N(0, s²(1 − w))",
        )
    else:
        ax_h.text(0.5, 0.5, "no values", ha="center", va="center", transform=ax_h.transAxes)
    ax_h.set_xlabel(f"residual: corrected station − network ({_MAG})")
    ax_h.set_ylabel("readings per bin")
    ax_h.set_title("(b) residuals against the fitted distribution")
    if ax_h.get_legend_handles_labels()[0]:
        ax_h.legend(loc="upper left")


def _trend_panel(
    ax: Any,
    d: StationPanelData,
    x: NDArray[np.float64],
    line: NDArray[np.float64],
    xlabel: str,
    title: str,
    *,
    logx: bool,
) -> None:
    """(c), (d) Residual against distance or magnitude, with the fitted trend per unit."""
    r = d.residual
    ok_out = d.outlier
    inl = ~ok_out
    ok = np.isfinite(x) & np.isfinite(r) & (x > 0 if logx else True)
    if np.any(ok & inl):
        ax.plot(
            x[ok & inl],
            r[ok & inl],
            ".",
            ms=2.5,
            color=ROLE["station"],
            alpha=0.5,
            rasterized=True,
            label="reading",
        )
    if np.any(ok & ok_out):
        ax.plot(
            x[ok & ok_out],
            r[ok & ok_out],
            "x",
            ms=4,
            color=ROLE["outlier"],
            label="outlier",
        )
    for u in range(line.shape[0]):
        icp, slope, x0, x1 = line[u]
        if not np.isfinite(slope):
            continue
        xs = np.linspace(x0, x1, 20)
        xp = 10.0**xs if logx else xs
        ax.plot(
            xp,
            icp + slope * xs,
            "-.",
            color=ROLE["trend"],
            lw=1.6,
            label="fitted trend" if u == 0 else None,
        )
    ax.axhline(0.0, color=ROLE["network"], lw=0.8)
    if logx and np.any(ok):
        _log_distance_axis(ax)
    if not np.any(ok):
        ax.text(0.5, 0.5, "no values", ha="center", va="center", transform=ax.transAxes)
    ax.set_xlabel(xlabel)
    ax.set_ylabel(f"residual ({_MAG})")
    ax.set_title(title)
    if ax.get_legend_handles_labels()[0]:
        ax.legend(loc="upper right")


def _log_distance_axis(ax: Any) -> None:
    """Log x axis labelled 1, 2, 5, 10, 20, 50, ... km in plain numbers."""
    from matplotlib.ticker import FuncFormatter, LogLocator, NullLocator

    ax.set_xscale("log")
    ax.xaxis.set_major_locator(LogLocator(base=10.0, subs=(1.0, 2.0, 5.0)))
    ax.xaxis.set_major_formatter(FuncFormatter(lambda v, _pos: f"{v:g}"))
    ax.xaxis.set_minor_locator(NullLocator())


def pair_map_figure(
    coords: pd.DataFrame,
    pair_k: NDArray[np.object_],
    pair_l: NDArray[np.object_],
    rho: NDArray[np.float64],
) -> bytes:
    """Stations on a plain longitude-latitude plot with a line per correlated pair.

    No basemap: axes in degrees, aspect 1/cos(mean latitude) so that distances look right
    near the network (an equirectangular view). Line width grows with ρ̂.
    """
    lat = pd.to_numeric(coords["latitude"]).to_numpy(dtype=np.float64)
    lon = pd.to_numeric(coords["longitude"]).to_numpy(dtype=np.float64)
    ids = pd.Index(coords["station_id"].astype(str))
    with new_figure(7.0, 6.0) as fig:
        ax = fig.subplots()
        ax.plot(lon, lat, "^", ms=5, color=ROLE["station"], label="station")
        from matplotlib.collections import LineCollection

        ki = ids.get_indexer(pd.Index(pair_k.astype(str)))
        li = ids.get_indexer(pd.Index(pair_l.astype(str)))
        hit = np.flatnonzero((ki >= 0) & (li >= 0))
        drawn = int(hit.shape[0])
        if drawn:
            a, b = ki[hit], li[hit]
            segs = np.stack(
                [np.column_stack([lon[a], lat[a]]), np.column_stack([lon[b], lat[b]])], axis=1
            )
            widths = 1.0 + 4.0 * np.clip(np.nan_to_num(rho[hit]), 0.0, 1.0)
            ax.add_collection(
                LineCollection(
                    list(segs),
                    linewidths=widths,
                    colors=ROLE["outlier"],
                    label="correlated pair (width grows with ρ̂)",
                )
            )
            ends = np.concatenate([a, b])
            ax.plot(
                lon[ends],
                lat[ends],
                "o",
                ms=8,
                mfc="none",
                color=ROLE["outlier"],
                label="pair member",
            )
        ax.margins(0.08)
        if lat.shape[0]:
            mid = float(np.nanmean(lat))
            ax.set_aspect(1.0 / max(np.cos(np.radians(mid)), 0.05))
        ax.set_xlabel("longitude (degrees east)")
        ax.set_ylabel("latitude (degrees north)")
        ax.set_title(f"Stations and correlated pairs ({drawn} drawn)")
        ax.legend(loc="upper left")
        return png_bytes(fig)
