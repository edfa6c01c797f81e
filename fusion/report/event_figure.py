"""The event picture: every station's corrected magnitude with its interval and weight, the
network magnitude with its interval, and the plain mean, as PNG or as a self-contained page.

Left panel: corrected station magnitudes m − b̂ against epicentral distance (or, without
distances, in order of size), each with the interval ± z·s_i at the event's confidence level,
z = Φ⁻¹((1 + level)/2); marker **area proportional to the station's weight** in the network
magnitude (hollow markers for negative weights, docs/network-magnitude.md §5, E3); raw station
magnitudes as grey dots; non-detections as triangles at their noise threshold (corrected like the
readings); outliers (robust weight below 0.3) as crosses. The network magnitude is the black line
with its interval shaded; the plain mean of the raw station magnitudes is the dashed orange line.
Right panel (when coordinates are known): the stations on a longitude-latitude plot, area again
proportional to weight, up-triangles for positive and down-triangles for negative residuals.

Station intervals: s_i = sqrt(σ̃_i² + SE(b̂_i)²) from the station table when given (the model
SD of a corrected station magnitude as a measurement of M, docs/network-magnitude.md §2); otherwise
s_i = SE/sqrt(w_i), which is exact for the diagonal GLS (w_i = s_i⁻²/Σ_k s_k⁻² and
SE² = 1/Σ_k s_k⁻², so SE²/w_i = s_i²) and includes the robust down-weighting; rows with
w_i <= 0 then get no interval.
"""

from __future__ import annotations

import math
from collections.abc import Mapping
from dataclasses import dataclass
from pathlib import Path
from typing import Any, Literal, Protocol

import numpy as np
import pandas as pd
from numpy.typing import NDArray
from scipy import special

from fusion.advisory import ADVISORY
from fusion.network.network_magnitude import interval_name
from fusion.report.drawing import new_figure, png_bytes
from fusion.report.html_page import esc, fmt, img, page, table
from fusion.report.inputs import as_bool, codes_in
from fusion.report.palette import ROLE
from stations.errors import ConfigError

__all__ = [
    "EventPicture",
    "draw_event",
    "event_figure_png",
    "event_page_html",
    "event_picture",
    "event_picture_from_tables",
    "render_event_figure",
    "write_event_figure",
]

_MAG = "magnitude units"
#: Largest marker area in points² (the station with the largest weight).
MAX_AREA = 420.0


class _Contribution(Protocol):
    station_id: str
    unit_id: str | None
    magnitude: float
    correction: float
    corrected_magnitude: float
    weight: float
    robust_weight: float
    residual: float
    flags: tuple[str, ...]
    detected: bool
    threshold: float


class _Estimate(Protocol):
    """What :func:`event_picture` reads: the fields of
    :class:`~fusion.network.network_magnitude.NetworkEstimate`."""

    magnitude: float
    uncertainty: float
    confidence_level: float
    n_stations: int
    plain_mean: float
    event_id: str
    magnitude_type: str

    @property
    def contributions(self) -> tuple[Any, ...]: ...


@dataclass(frozen=True, slots=True, eq=False)
class EventPicture:
    """Everything the event picture draws (arrays over the event's rows).

    Attributes
    ----------
    event_id, magnitude_type : str
    magnitude, se : float
        Network magnitude and its 1σ standard error.
    level : float
        Confidence level of every interval drawn, a fraction.
    plain_mean : float
        Plain mean of the raw detected station magnitudes.
    station_id, unit_id : ndarray of str
    raw, correction, corrected : ndarray
        Station magnitude as read, −b̂, and their sum (magnitude units).
    sd : ndarray
        s_i of the corrected magnitude (module docstring); NaN: no interval.
    weight, robust_weight, residual : ndarray
    influence : ndarray
        Network magnitude with the station minus without it (magnitude units; NaN: not
        available), the sign of the event text and JSON.
    detected, outlier : ndarray of bool
    threshold : ndarray
        Noise threshold of a non-detection, magnitude units (NaN if unknown).
    distance_km, longitude, latitude : ndarray
        NaN where unknown.
    epicenter : (float, float) or None
        (longitude, latitude) of the event, degrees.
    flags : ndarray of str
        ';'-joined row flags.
    """

    event_id: str
    magnitude_type: str
    magnitude: float
    se: float
    level: float
    plain_mean: float
    station_id: NDArray[np.object_]
    unit_id: NDArray[np.object_]
    raw: NDArray[np.float64]
    correction: NDArray[np.float64]
    corrected: NDArray[np.float64]
    sd: NDArray[np.float64]
    weight: NDArray[np.float64]
    robust_weight: NDArray[np.float64]
    residual: NDArray[np.float64]
    influence: NDArray[np.float64]
    detected: NDArray[np.bool_]
    outlier: NDArray[np.bool_]
    threshold: NDArray[np.float64]
    distance_km: NDArray[np.float64]
    longitude: NDArray[np.float64]
    latitude: NDArray[np.float64]
    epicenter: tuple[float, float] | None
    flags: NDArray[np.object_]

    @property
    def z(self) -> float:
        """Normal quantile of the interval level."""
        return float(special.ndtri(0.5 + 0.5 * self.level))


def _num(frame: pd.DataFrame, name: str, fill: float) -> NDArray[np.float64]:
    if name not in frame.columns:
        return np.full(len(frame), fill)
    return np.asarray(pd.to_numeric(frame[name], errors="coerce"), dtype=np.float64)


def event_picture_from_tables(
    event: Mapping[str, Any],
    rows: pd.DataFrame,
    *,
    stations: pd.DataFrame | None = None,
    coordinates: pd.DataFrame | None = None,
    epicenter: tuple[float, float] | None = None,
    outlier_weight: float = 0.3,
) -> EventPicture:
    """An :class:`EventPicture` from one row of the events table and its contribution rows.

    Parameters
    ----------
    event : Mapping
        ``event_id``, ``magnitude``, ``se``, ``plain_mean``; optional ``confidence_level``
        (default 0.68), ``magnitude_type``.
    rows : pandas.DataFrame
        The event's contribution rows (columns of ``ReportInputs.contributions``).
    stations : pandas.DataFrame, optional
        Station table with ``unit_id``, ``station_id``, ``sigma``, ``bias_se`` (intervals).
    coordinates : pandas.DataFrame, optional
        ``station_id``, ``latitude``, ``longitude``.
    epicenter : (float, float), optional
        (longitude, latitude) in degrees.
    outlier_weight : float, default=0.3
        Rows with a robust weight below this are drawn as outliers.

    Returns
    -------
    EventPicture
    """
    n = len(rows)
    sid = rows["station_id"].astype(str).to_numpy(dtype=object)
    uid = rows["unit_id"].astype(object).where(rows["unit_id"].notna(), "").astype(str)
    uid_arr = uid.to_numpy(dtype=object)
    corrected = _num(rows, "corrected_magnitude", np.nan)
    correction = _num(rows, "correction", np.nan)
    raw = _num(rows, "magnitude", np.nan)
    raw = np.where(np.isfinite(raw), raw, corrected - np.nan_to_num(correction))
    weight = _num(rows, "weight", np.nan)
    rw = _num(rows, "robust_weight", 1.0)
    if "detected" in rows.columns:
        detected = as_bool(rows["detected"], "contributions", "detected") & np.isfinite(corrected)
    else:
        detected = np.isfinite(corrected)
    se = float(event["se"])
    sd = np.full(n, np.nan)
    if stations is not None and len(stations):
        pos = codes_in(pd.Series(uid_arr), pd.Index(stations["unit_id"].astype(str)))
        # A station without its unit id (unknown unit) takes its station's last unit.
        last = pd.Series(np.arange(len(stations)), index=stations["station_id"].astype(str))
        last = last[~last.index.duplicated(keep="last")]
        by_station = codes_in(pd.Series(sid), pd.Index(last.index))
        by_station = np.where(by_station >= 0, last.to_numpy()[np.maximum(by_station, 0)], -1)
        pos = np.where(pos >= 0, pos, by_station)
        s_all = np.hypot(_num(stations, "sigma", np.nan), _num(stations, "bias_se", 0.0))
        sd = np.where(pos >= 0, s_all[np.maximum(pos, 0)], np.nan)
    else:
        with np.errstate(invalid="ignore", divide="ignore"):
            sd = np.where(detected & (weight > 0.0), se / np.sqrt(weight), np.nan)
    dist = _num(rows, "distance_km", np.nan)
    lon = np.full(n, np.nan)
    lat = np.full(n, np.nan)
    if coordinates is not None and len(coordinates):
        cpos = codes_in(pd.Series(sid), pd.Index(coordinates["station_id"].astype(str)))
        got = cpos >= 0
        lon[got] = _num(coordinates, "longitude", np.nan)[cpos[got]]
        lat[got] = _num(coordinates, "latitude", np.nan)[cpos[got]]
    flags = (
        rows["flags"].astype(str).to_numpy(dtype=object)
        if "flags" in rows.columns
        else np.full(n, "", dtype=object)
    )
    return EventPicture(
        event_id=str(event["event_id"]),
        magnitude_type=str(event.get("magnitude_type", "") or ""),
        magnitude=float(event["magnitude"]),
        se=se,
        level=float(event.get("confidence_level", 0.68) or 0.68),
        plain_mean=float(event["plain_mean"]),
        station_id=sid,
        unit_id=uid_arr,
        raw=raw,
        correction=correction,
        corrected=corrected,
        sd=sd,
        weight=weight,
        robust_weight=rw,
        residual=_num(rows, "residual", np.nan),
        influence=_num(rows, "influence", np.nan),
        detected=detected,
        outlier=detected & (rw < outlier_weight),
        threshold=_num(rows, "threshold", np.nan),
        distance_km=dist,
        longitude=lon,
        latitude=lat,
        epicenter=epicenter,
        flags=flags,
    )


def event_picture(
    estimate: _Estimate,
    *,
    stations: pd.DataFrame | None = None,
    coordinates: pd.DataFrame | None = None,
    distance_km: Mapping[str, float] | None = None,
    epicenter: tuple[float, float] | None = None,
    outlier_weight: float = 0.3,
) -> EventPicture:
    """An :class:`EventPicture` from a :class:`~fusion.network.network_magnitude.NetworkEstimate`.

    Parameters
    ----------
    estimate : NetworkEstimate
        The event's estimate with its contributions.
    stations, coordinates : pandas.DataFrame, optional
        As in :func:`event_picture_from_tables`.
    distance_km : Mapping of str to float, optional
        Epicentral distance (km) per station id.
    epicenter : (float, float), optional
        (longitude, latitude) in degrees.
    outlier_weight : float, default=0.3
        Rows with a robust weight below this are drawn as outliers.

    Returns
    -------
    EventPicture
    """
    cs = estimate.contributions
    rows = pd.DataFrame(
        {
            "station_id": [c.station_id for c in cs],
            "unit_id": [c.unit_id for c in cs],
            "magnitude": [c.magnitude for c in cs],
            "correction": [c.correction for c in cs],
            "corrected_magnitude": [c.corrected_magnitude for c in cs],
            "weight": [c.weight for c in cs],
            "robust_weight": [c.robust_weight for c in cs],
            "residual": [c.residual for c in cs],
            "influence": [c.influence for c in cs],
            "detected": [bool(c.detected) for c in cs],
            "threshold": [c.threshold for c in cs],
            "flags": [";".join(c.flags) for c in cs],
        }
    )
    if distance_km is not None:
        rows["distance_km"] = rows["station_id"].map(dict(distance_km)).astype(float)
    event = {
        "event_id": estimate.event_id,
        "magnitude_type": estimate.magnitude_type,
        "magnitude": estimate.magnitude,
        "se": estimate.uncertainty,
        "plain_mean": estimate.plain_mean,
        "confidence_level": estimate.confidence_level,
    }
    return event_picture_from_tables(
        event,
        rows,
        stations=stations,
        coordinates=coordinates,
        epicenter=epicenter,
        outlier_weight=outlier_weight,
    )


def _areas(weight: NDArray[np.float64]) -> tuple[NDArray[np.float64], float]:
    """Marker areas ∝ |weight| (points²) and the weight that gets MAX_AREA."""
    w = np.abs(np.nan_to_num(weight))
    top = float(w.max()) if w.shape[0] and w.max() > 0 else 1.0
    return MAX_AREA * w / top, top


def event_figure_png(pic: EventPicture) -> bytes:
    """Draw the event picture (module docstring) and return PNG bytes."""
    has_map = bool(np.any(np.isfinite(pic.longitude) & np.isfinite(pic.latitude)))
    with new_figure(14.0 if has_map else 10.5, 5.4, right=0.3, top=0.45, wspace=0.12) as fig:
        draw_event(fig, pic)
        return png_bytes(fig)


def draw_event(fig: Any, pic: EventPicture) -> None:
    """Draw the event picture on an empty :class:`~matplotlib.figure.Figure`.

    The corrected station magnitudes are the first scatter collections of the left axes; the
    area of each marker is ``MAX_AREA·|w_i|/max|w|`` points² (tested).
    """
    det = pic.detected
    has_map = bool(np.any(np.isfinite(pic.longitude) & np.isfinite(pic.latitude)))
    has_dist = bool(np.any(np.isfinite(pic.distance_km[det]))) if np.any(det) else False
    area, top = _areas(np.where(det | (pic.weight != 0), pic.weight, 0.0))
    z = pic.z
    ratios = [1.7, 0.75, 1.1] if has_map else [1.7, 0.75]
    axes = fig.subplots(1, len(ratios), width_ratios=ratios)
    axes[1].axis("off")
    ax = axes[0]
    if has_dist:
        x = pic.distance_km
        xlabel = "epicentral distance (km)"
    else:
        order = np.argsort(np.where(det, pic.corrected, np.inf), kind="stable")
        x = np.empty(order.shape[0])
        x[order] = np.arange(order.shape[0], dtype=float)
        xlabel = "station (sorted by corrected magnitude)"
    lo = pic.magnitude - z * pic.se
    hi = pic.magnitude + z * pic.se
    if np.isfinite(pic.magnitude):
        ax.axhspan(
            lo,
            hi,
            color=ROLE["model"],
            alpha=0.25,
            label=f"network {interval_name(pic.level)}",
        )
        ax.axhline(
            pic.magnitude,
            color=ROLE["network"],
            lw=1.8,
            label=f"network {pic.magnitude_type} {pic.magnitude:.2f} (SE {pic.se:.2f})",
        )
    if np.isfinite(pic.plain_mean):
        ax.axhline(
            pic.plain_mean,
            color=ROLE["plain_mean"],
            lw=1.6,
            ls="--",
            label=f"plain mean (raw) {pic.plain_mean:.2f}",
        )
    okx = np.isfinite(x)
    d = det & okx
    if np.any(d):
        ax.plot(x[d], pic.raw[d], ".", ms=4, color=ROLE["raw"], label="raw station magnitude")
        ci = d & np.isfinite(pic.sd)
        ax.errorbar(
            x[ci],
            pic.corrected[ci],
            yerr=z * pic.sd[ci],
            fmt="none",
            ecolor=ROLE["station"],
            elinewidth=1.0,
            capsize=2,
            label=f"station {interval_name(pic.level)}",
        )
        pos = d & (pic.weight >= 0) & ~pic.outlier
        neg = d & (pic.weight < 0)
        ax.scatter(
            x[pos],
            pic.corrected[pos],
            s=area[pos],
            color=ROLE["station"],
            edgecolors="white",
            linewidths=0.5,
            zorder=3,
            label="corrected (area ∝ weight)",
            gid="corrected",
        )
        if np.any(neg):
            ax.scatter(
                x[neg],
                pic.corrected[neg],
                s=area[neg],
                facecolors="none",
                edgecolors=ROLE["station"],
                zorder=3,
                label="negative weight",
                gid="negative",
            )
        out = d & pic.outlier
        if np.any(out):
            ax.scatter(
                x[out],
                pic.corrected[out],
                s=area[out],
                color=ROLE["outlier"],
                zorder=4,
                gid="outlier",
            )
            ax.plot(
                x[out],
                pic.corrected[out],
                "x",
                ms=8,
                mew=1.5,
                color=ROLE["outlier"],
                zorder=5,
                label="outlier (down-weighted)",
            )
        # Weight key: two reference areas.
        for ref in (0.5 * top, 0.1 * top):
            ax.scatter(
                [], [], s=MAX_AREA * ref / top, color=ROLE["station"], label=f"weight {ref:.2f}"
            )
    nd = ~det & okx & np.isfinite(pic.threshold)
    if np.any(nd):
        thr = pic.threshold[nd] + np.nan_to_num(pic.correction[nd])
        ax.plot(
            x[nd],
            thr,
            "v",
            ms=6,
            mfc="none",
            color=ROLE["nondetection"],
            label="non-detection (threshold)",
        )
    if not has_dist and np.any(d) and int(np.count_nonzero(d)) <= 40:
        ax.set_xticks(x[d], [str(s) for s in pic.station_id[d]], rotation=90, fontsize=7)
    if has_dist:
        ax.margins(x=0.05)
    ax.set_xlabel(xlabel)
    ax.set_ylabel(f"magnitude {pic.magnitude_type} ({_MAG})")
    ax.set_title(f"Event {pic.event_id}: station magnitudes and the network magnitude")
    handles, labels = ax.get_legend_handles_labels()
    axes[1].legend(handles, labels, loc="center", fontsize=7, frameon=False)
    if has_map:
        _map_panel(axes[2], pic, area)


def _map_panel(ax: Any, pic: EventPicture, area: NDArray[np.float64]) -> None:
    ok = np.isfinite(pic.longitude) & np.isfinite(pic.latitude)
    det = ok & pic.detected
    up = det & (pic.residual >= 0)
    down = det & (pic.residual < 0)
    ax.plot(
        pic.longitude[det], pic.latitude[det], ".", ms=3, color=ROLE["raw"], label="station used"
    )
    ax.scatter(
        pic.longitude[up],
        pic.latitude[up],
        s=area[up],
        marker="^",
        color=ROLE["positive"],
        label="residual ≥ 0",
    )
    ax.scatter(
        pic.longitude[down],
        pic.latitude[down],
        s=area[down],
        marker="v",
        color=ROLE["negative"],
        label="residual < 0",
    )
    nd = ok & ~pic.detected
    if np.any(nd):
        ax.scatter(
            pic.longitude[nd],
            pic.latitude[nd],
            s=12,
            marker="o",
            facecolors="none",
            edgecolors=ROLE["raw"],
            label="no detection",
        )
    if pic.epicenter is not None:
        ax.plot(
            [pic.epicenter[0]],
            [pic.epicenter[1]],
            "*",
            ms=14,
            color=ROLE["network"],
            label="epicentre",
        )
    ax.margins(0.1)
    lat = pic.latitude[ok]
    if lat.shape[0]:
        ax.set_aspect(1.0 / max(math.cos(math.radians(float(np.mean(lat)))), 0.05))
    ax.set_xlabel("longitude (degrees east)")
    ax.set_ylabel("latitude (degrees north)")
    ax.set_title("Stations (area ∝ weight)")
    ax.legend(loc="upper left", fontsize=7)


def _corrected_text(pic: EventPicture) -> NDArray[Any]:
    """Corrected magnitudes; a non-detection shows "< threshold + correction" as plotted."""
    out = fmt(pic.corrected, ".3f")
    nd = ~pic.detected & np.isfinite(pic.threshold)
    bound = pic.threshold[nd] + np.nan_to_num(pic.correction[nd])
    out[nd] = np.array([f"&lt; {v:.3f}" for v in bound], dtype=object)
    return out


def event_rows_table(pic: EventPicture) -> str:
    """HTML table of the event's rows, heaviest weight first."""
    order = np.argsort(-np.abs(np.nan_to_num(pic.weight)), kind="stable")
    z = pic.z
    return table(
        [
            ("station", np.array([esc(s) for s in pic.station_id[order]], dtype=object), True),
            ("unit", np.array([esc(s) for s in pic.unit_id[order]], dtype=object), True),
            ("distance (km)", fmt(pic.distance_km[order], ".1f"), False),
            ("raw", fmt(pic.raw[order], ".3f"), False),
            ("correction", fmt(pic.correction[order], "+.3f"), False),
            ("corrected", _corrected_text(pic)[order], False),
            (f"± ({interval_name(pic.level)})", fmt(z * pic.sd[order], ".3f"), False),
            ("weight", fmt(pic.weight[order], ".3f"), False),
            ("robust weight", fmt(pic.robust_weight[order], ".2f"), False),
            ("residual", fmt(pic.residual[order], "+.3f"), False),
            ("influence", fmt(pic.influence[order], "+.3f"), False),
            ("flags", np.array([esc(s) for s in pic.flags[order]], dtype=object), True),
        ]
    )


def event_page_html(pic: EventPicture, png: bytes, *, model_version: str = "") -> str:
    """A self-contained page: summary, the picture, the table of rows, the advisory."""
    ci = (pic.magnitude - pic.z * pic.se, pic.magnitude + pic.z * pic.se)
    model = f" Station model {esc(model_version)}." if model_version else ""
    body = (
        f"<h1>Event {esc(pic.event_id)}: network magnitude {esc(pic.magnitude_type)}</h1>\n"
        f'<p class="caution">{esc(ADVISORY)}</p>\n'
        f"<p>Network magnitude <b>{pic.magnitude:.2f}</b>, SE {pic.se:.2f}; "
        f"{interval_name(pic.level)} [{ci[0]:.2f}, {ci[1]:.2f}]. Plain mean of the raw "
        f"station magnitudes {pic.plain_mean:.2f}; difference "
        f"{pic.magnitude - pic.plain_mean:+.2f}. "
        f"Detections used: {int(np.count_nonzero(pic.detected))}.{model}</p>\n"
        + img(png, f"station and network magnitudes of event {pic.event_id}")
        + "\n<h2>Stations</h2>\n"
        + "<p>corrected = station magnitude + correction; for a non-detection the noise "
        "threshold + correction (an upper bound, drawn as a triangle). influence = network "
        "magnitude with the station minus network magnitude without it.</p>\n"
        + event_rows_table(pic)
    )
    return page(f"Event {pic.event_id}", body)


def render_event_figure(
    estimate: _Estimate,
    *,
    fmt: Literal["png", "html"] = "png",
    stations: pd.DataFrame | None = None,
    coordinates: pd.DataFrame | None = None,
    distance_km: Mapping[str, float] | None = None,
    epicenter: tuple[float, float] | None = None,
    out: Path | None = None,
) -> bytes:
    """The event picture of one network estimate as PNG or as a self-contained HTML page.

    Parameters
    ----------
    estimate : NetworkEstimate
        From :meth:`fusion.network.network_magnitude.FusedMagnitudes.event` (or an object with the
        same fields).
    fmt : {'png', 'html'}, default='png'
        Output form; the HTML page embeds the PNG and adds a table of the station rows.
    stations : pandas.DataFrame, optional
        Station table (``unit_id``, ``station_id``, ``sigma``, ``bias_se``) for the station
        intervals; without it they come from the weights (module docstring).
    coordinates : pandas.DataFrame, optional
        ``station_id``, ``latitude``, ``longitude``: adds the map panel.
    distance_km : Mapping of str to float, optional
        Epicentral distance per station id, km: the x axis of the left panel.
    epicenter : (float, float), optional
        (longitude, latitude) in degrees, drawn on the map.
    out : Path, optional
        Also write the bytes to this file.

    Returns
    -------
    bytes
        PNG bytes, or the UTF-8 HTML page.

    Raises
    ------
    ConfigError
        If ``fmt`` is not 'png' or 'html'.
    """
    if fmt not in ("png", "html"):
        raise ConfigError(
            f"The 'fmt' parameter of render_event_figure must be a str among {{'png', 'html'}}. "
            f"Got {fmt!r} instead."
        )
    pic = event_picture(
        estimate,
        stations=stations,
        coordinates=coordinates,
        distance_km=distance_km,
        epicenter=epicenter,
    )
    png = event_figure_png(pic)
    data = png if fmt == "png" else event_page_html(pic, png).encode("utf-8")
    if out is not None:
        Path(out).write_bytes(data)
    return data


def write_event_figure(
    explanation: Any,
    path: Path,
    *,
    fmt: str = "png",
    stations: pd.DataFrame | None = None,
    coordinates: pd.DataFrame | None = None,
) -> Path:
    """Write the event picture of an explained event (``magfuse event --png/--html``).

    Parameters
    ----------
    explanation : EventExplanation or NetworkEstimate
        :class:`fusion.workflows.event_view.EventExplanation` (its ``estimate``; epicentral
        distances
        and the epicentre come from its ``readings``, columns ``distance_km``,
        ``event_longitude``, ``event_latitude`` of the store schema; its ``model_version`` is
        named on the page), or a bare :class:`~fusion.network.network_magnitude.NetworkEstimate`.
    path : Path
        File to write (replaced).
    fmt : {'png', 'html'}, default='png'
        Output form (checked at run time, so a command line can pass its option text).
    stations, coordinates : pandas.DataFrame, optional
        As in :func:`render_event_figure`.

    Returns
    -------
    Path
        ``path``.

    Raises
    ------
    ConfigError
        If ``fmt`` is not 'png' or 'html'.
    """
    if fmt not in ("png", "html"):
        raise ConfigError(
            f"The 'fmt' parameter of write_event_figure must be a str among {{'png', 'html'}}. "
            f"Got {fmt!r} instead."
        )
    estimate = getattr(explanation, "estimate", explanation)
    readings = getattr(explanation, "readings", None)
    distance: dict[str, float] | None = None
    epicenter: tuple[float, float] | None = None
    if isinstance(readings, pd.DataFrame) and len(readings):
        if "distance_km" in readings.columns:
            d = pd.to_numeric(readings["distance_km"], errors="coerce")
            ok = d.notna().to_numpy()
            if ok.any():
                first = d[ok].groupby(readings["station_id"].astype(str)[ok]).first()
                distance = {str(k): float(v) for k, v in first.items()}
        if {"event_longitude", "event_latitude"} <= set(readings.columns):
            lon = pd.to_numeric(readings["event_longitude"], errors="coerce").iloc[0]
            lat = pd.to_numeric(readings["event_latitude"], errors="coerce").iloc[0]
            if np.isfinite(lon) and np.isfinite(lat):
                epicenter = (float(lon), float(lat))
    pic = event_picture(
        estimate,
        stations=stations,
        coordinates=coordinates,
        distance_km=distance,
        epicenter=epicenter,
    )
    png = event_figure_png(pic)
    if fmt == "png":
        data = png
    else:
        version = str(getattr(explanation, "model_version", "") or "")
        data = event_page_html(pic, png, model_version=version).encode("utf-8")
    out = Path(path)
    out.write_bytes(data)
    return out
