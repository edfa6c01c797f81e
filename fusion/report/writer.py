"""Write the station reliability report: station table (CSV, Parquet) and one HTML file.

The HTML page is self-contained (inline style, figures as inline PNG, no script, nothing
fetched), so it opens offline and can be mailed as one file. Its parts, in order:

1. the model (version, magnitude type, window, as-of, anchor, creation time) and the advisory
   caution (:data:`fusion.advisory.ADVISORY`);
2. the network summary: units ranked by error SD with intervals; the use of non-detections
   (events re-estimated with them and the distribution of the shift they caused); the network
   magnitude minus the plain mean over time; the events whose network magnitude moved most
   from the plain mean, and the event picture of the first few;
3. the station table, every unit, linked to its section where it has one;
4. station sections (selection rule: :mod:`fusion.report.sections`): four panels and the
   outlier readings with links to the events;
5. correlated pairs: table and a longitude-latitude map with a line per flagged pair;
6. drift alarms;
7. the events referred to above (link targets);
8. notes: how every number and flag is defined.
"""

from __future__ import annotations

import dataclasses
import re
import time
from collections.abc import Mapping
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import numpy as np
import pandas as pd
from numpy.typing import NDArray

from fusion.advisory import ADVISORY
from fusion.model.diagnostics import TREND_T_ALARM, chance_flag_rate, grouped_wls_slope
from fusion.network.network_magnitude import interval_name
from fusion.network.summaries import (
    censoring_summary,
    difference_summary,
    plain_mean_difference,
)
from fusion.report.event_figure import event_figure_png, event_picture_from_tables
from fusion.report.figures import (
    StationPanelData,
    fused_shift_figure,
    pair_map_figure,
    sigma_ranking_figure,
    station_figure,
)
from fusion.report.html_page import esc, fmt, img, page, table
from fusion.report.inputs import ReportInputs, as_bool
from fusion.report.joined import JoinedRows, apply_window, join_rows, to_utc_timestamp
from fusion.report.sections import attention_mask, select_section_stations
from fusion.report.station_table import (
    StationFlag,
    station_reliability_table,
    write_station_table,
)
from stations.errors import ConfigError

__all__ = ["ReportFiles", "write_station_report"]


@dataclass(frozen=True, slots=True)
class ReportFiles:
    """What :func:`write_station_report` wrote.

    Attributes
    ----------
    html, station_csv, station_parquet : Path
        The three files.
    n_figures : int
        Figures embedded in the HTML (equal to its ``<img>`` elements).
    section_stations : tuple of str
        Stations with a full section, in page order.
    n_units : int
        Rows of the station table.
    n_events : int
        Events in the report window.
    seconds : Mapping of str to float
        Wall time of the parts (``tables``, ``figures``, ``html``), for the benchmark.
    """

    html: Path
    station_csv: Path
    station_parquet: Path
    n_figures: int
    section_stations: tuple[str, ...]
    n_units: int
    n_events: int
    seconds: Mapping[str, float] = field(default_factory=dict)


def _slug(text: str) -> str:
    return re.sub(r"[^A-Za-z0-9_.-]+", "_", text) or "unknown"


def _check_count(name: str, value: int, low: int = 0) -> None:
    if isinstance(value, bool) or not isinstance(value, (int, np.integer)) or value < low:
        raise ConfigError(
            f"The {name!r} parameter of write_station_report must be an int in the range "
            f"[{low}, inf). Got {value!r} instead."
        )


def _ts(value: Any) -> str:
    if value is None or value == "":
        return ""
    try:
        t = to_utc_timestamp(value, "time")
    except ConfigError:
        return str(value)
    return t.strftime("%Y-%m-%d %H:%M UTC")


def _window_text(start: Any, end: Any) -> str:
    a, b = _ts(start), _ts(end)
    if not a and not b:
        return "(not given)"
    return esc(f"{a or '(open)'} to {b or '(open)'}")


def _anchor_text(anchor: Any) -> str:
    if anchor is None:
        return ""
    if isinstance(anchor, Mapping):
        kind = anchor.get("kind", "")
        value, se = anchor.get("value"), anchor.get("se")
        parts = [str(kind)]
        if value is not None:
            try:
                parts.append(f"value {float(value):+.3f}")
                if se is not None:
                    parts[-1] += f" (SE {float(se):.3f})"
            except (TypeError, ValueError):
                parts.append(f"value {value}")
        rest = {k: v for k, v in anchor.items() if k not in ("kind", "value", "se")}
        parts += [f"{k} {v}" for k, v in rest.items()]
        return ", ".join(p for p in parts if p)
    return str(anchor)


# -- the page's parts --------------------------------------------------------------------------


class _Page:
    """Collects HTML and counts figures (so the count always equals the ``<img>`` tags)."""

    def __init__(self) -> None:
        self.parts: list[str] = []
        self.n_figures = 0

    def add(self, html_text: str) -> None:
        self.parts.append(html_text)

    def figure(self, png: bytes, alt: str, caption: str = "") -> None:
        self.n_figures += 1
        cap = f'<p class="muted">{esc(caption)}</p>' if caption else ""
        self.add(img(png, alt) + cap)


def _event_index(jr: JoinedRows, n_events: int) -> tuple[NDArray[np.int64], NDArray[np.int64]]:
    key = np.where(jr.event >= 0, jr.event, n_events)
    order = np.argsort(key, kind="stable").astype(np.int64)
    counts = np.bincount(key, minlength=n_events + 1)[:n_events]
    return order, np.concatenate(([0], np.cumsum(counts))).astype(np.int64)


def _event_links(codes: NDArray[np.int64], ids: NDArray[np.object_]) -> NDArray[np.object_]:
    return np.array([f'<a href="#ev{c}">{esc(ids[c])}</a>' for c in codes.tolist()], dtype=object)


def _meta_block(inputs: ReportInputs, since: Any, level: float) -> str:
    m = inputs.model_meta
    rows = [
        ("model version", esc(m.get("version") or "(not given)")),
        ("magnitude type", esc(inputs.magnitude_type)),
        ("fit window", _window_text(m.get("window_start"), m.get("window_end"))),
        ("as of", esc(_ts(m.get("as_of")) or "(not given)")),
        ("anchor", esc(_anchor_text(m.get("anchor")) or "(not given)")),
        ("model created", esc(_ts(m.get("created")) or "(not given)")),
        ("report window", esc(f"events since {_ts(since)}" if since is not None else "all events")),
        ("intervals (bias, σ, network magnitudes)", esc(interval_name(level))),
    ]
    cells = "".join(f"<tr><th class='t'>{k}</th><td>{v}</td></tr>" for k, v in rows)
    return f'<table class="meta">{cells}</table>'


def _station_panel(
    station: str,
    units: NDArray[np.int64],
    st_table: pd.DataFrame,
    jr: JoinedRows,
    alarms: NDArray[np.datetime64],
    level: float,
    outlier_weight: float,
    min_trend_rows: int,
) -> tuple[StationPanelData, NDArray[np.int64]]:
    rows = np.concatenate([jr.rows_of_unit(int(k)) for k in units])
    rows = rows[jr.analysable[rows]]
    local = np.searchsorted(units, jr.unit[rows])  # units is sorted
    bias = st_table["bias"].to_numpy(dtype=float)[units]
    s2 = (
        st_table["sigma"].to_numpy(dtype=float)[units] ** 2
        + st_table["bias_se"].to_numpy(dtype=float)[units] ** 2
    )
    w = np.clip(np.nan_to_num(jr.weight[rows]), 0.0, 0.999)
    rw = np.where(np.isfinite(jr.robust_weight[rows]), jr.robust_weight[rows], 1.0)
    res = jr.residual[rows]
    with np.errstate(invalid="ignore", divide="ignore"):
        logd = np.log10(jr.distance_km[rows])
    U = units.shape[0]
    dl = grouped_wls_slope(local, logd, res, rw, U, min_rows=min_trend_rows)
    ml = grouped_wls_slope(local, jr.event_magnitude[rows], res, rw, U, min_rows=min_trend_rows)
    starts = pd.to_datetime(st_table["epoch_start"], utc=True).dt.tz_localize(None)
    ends = pd.to_datetime(st_table["epoch_end"], utc=True).dt.tz_localize(None)
    data = StationPanelData(
        station_id=station,
        time=jr.event_time[rows],
        offset=res + bias[local],
        residual=res,
        residual_var=s2[local] * (1.0 - w),
        distance_km=jr.distance_km[rows],
        magnitude=jr.event_magnitude[rows],
        outlier=rw < outlier_weight,
        unit=local,
        unit_bias=bias,
        unit_bias_low=st_table["bias_ci_low"].to_numpy(dtype=float)[units],
        unit_bias_high=st_table["bias_ci_high"].to_numpy(dtype=float)[units],
        unit_start=starts.to_numpy(dtype="datetime64[us]")[units],
        unit_end=ends.to_numpy(dtype="datetime64[us]")[units],
        dist_line=np.column_stack([dl.intercept, dl.slope, dl.x_min, dl.x_max]),
        mag_line=np.column_stack([ml.intercept, ml.slope, ml.x_min, ml.x_max]),
        alarms=alarms,
        level=level,
    )
    return data, rows


_FLAG_TEXT: dict[str, str] = {
    StationFlag.distance_trend: "residuals change with distance (|t| > 3): check the "
    "distance correction at this station",
    StationFlag.magnitude_trend: "residuals change with magnitude (|t| > 3): look for "
    "saturation or clipping at large events, or detection effects at small ones",
    StationFlag.residual_offset: "mean residual in the window differs from 0 (|t| > 3): the "
    "bias may have moved since the fit",
    StationFlag.many_outliers: "many readings were down-weighted as outliers",
    StationFlag.drift_alarm: "the drift monitor raised an alarm",
    StationFlag.correlated: "errors correlated with another station",
    StationFlag.uncalibrated: "no anchor in this station's part of the network",
    StationFlag.prior_dominated: "few readings: the prior outweighs the data",
}


def write_station_report(
    inputs: ReportInputs,
    out_dir: Path,
    *,
    since: Any = None,
    max_station_sections: int = 40,
    top_by_weight: int = 10,
    level: float = 0.68,
    n_affected_events: int = 20,
    n_event_pictures: int = 3,
    max_outliers_listed: int = 15,
    trend_t: float = TREND_T_ALARM,
    min_trend_rows: int = 20,
    outlier_weight: float = 0.3,
    outlier_rate_alert: float = 0.02,
    max_pairs_listed: int = 200,
) -> ReportFiles:
    """Write the station table (CSV, Parquet) and the self-contained HTML report.

    Parameters
    ----------
    inputs : ReportInputs
        Model, station, pair, drift, event and contribution tables (columns:
        :mod:`fusion.report.inputs`).
    out_dir : Path
        Folder for ``station_reliability_<TYPE>.csv``, ``.parquet`` and
        ``station_report_<TYPE>.html`` (created if missing; files replaced).
    since : date, time or str, optional
        Only events with origin time at or after this (UTC if no zone) enter the window
        figures and tables. The model's numbers (bias, σ, pairs) are shown whole.
    max_station_sections : int, default=40
        Full station sections at most (rule: :mod:`fusion.report.sections`).
    top_by_weight : int, default=10
        The heaviest stations always get a section.
    level : float, default=0.68
        Coverage of the bias and σ intervals, a fraction; ``magfuse report`` passes
        ``[network] confidence_level`` so that every interval magfuse shows has one level.
    n_affected_events : int, default=20
        Rows of the "events most affected" table.
    n_event_pictures : int, default=3
        Event pictures drawn for the most affected events.
    max_outliers_listed : int, default=15
        Outlier readings listed per station section (largest |z| first).
    trend_t, min_trend_rows, outlier_weight, outlier_rate_alert
        See :func:`~fusion.report.station_table.station_reliability_table`.
    max_pairs_listed : int, default=200
        Rows of the pair table (flagged pairs first, then by p-value).

    Returns
    -------
    ReportFiles

    Raises
    ------
    SchemaError, DomainError
        An input table lacks a column or holds a bad value (:meth:`ReportInputs.validated`).
    ConfigError
        A parameter is out of range, or ``since`` is not a time.

    Notes
    -----
    Cost: the tables are vectorized over contribution rows (``np.bincount``): 0.8 s for
    2,020 units and 1.6 million rows. Each drawn figure costs about 0.3 s, which is why
    station sections are capped: the whole report for that network, with 40 sections, takes
    about 15 s (``bench/report_speed.py``).
    """
    for name, value in (
        ("max_station_sections", max_station_sections),
        ("top_by_weight", top_by_weight),
        ("n_affected_events", n_affected_events),
        ("n_event_pictures", n_event_pictures),
        ("max_outliers_listed", max_outliers_listed),
        ("max_pairs_listed", max_pairs_listed),
    ):
        _check_count(name, value)
    _check_count("min_trend_rows", min_trend_rows, 3)
    t0 = time.perf_counter()
    inputs.validated()
    win = apply_window(inputs, since)
    jr = join_rows(win)
    st = station_reliability_table(
        win,
        level=level,
        trend_t=trend_t,
        min_trend_rows=min_trend_rows,
        outlier_weight=outlier_weight,
        outlier_rate_alert=outlier_rate_alert,
        joined=jr,
    )
    paths = _write_tables(inputs, st, Path(out_dir), since, level)
    t_tables = time.perf_counter() - t0

    t1 = time.perf_counter()
    ev = win.events
    cx = _Context(
        inputs=inputs,
        win=win,
        jr=jr,
        st=st,
        ev=ev,
        ev_ids=ev["event_id"].astype(str).to_numpy(dtype=object),
        sections=select_section_stations(
            st, max_sections=max_station_sections, top_by_weight=top_by_weight
        ),
        level=level,
        outlier_weight=outlier_weight,
        min_trend_rows=min_trend_rows,
    )
    title = f"Station reliability report, {inputs.magnitude_type or 'magnitude'}"
    _head_part(cx, title, since)
    _summary_part(cx, n_affected_events=n_affected_events, n_event_pictures=n_event_pictures)
    links = _station_table_part(cx, paths)
    _sections_part(
        cx,
        links,
        top_by_weight=top_by_weight,
        max_station_sections=max_station_sections,
        max_outliers_listed=max_outliers_listed,
    )
    _pairs_part(cx, max_pairs_listed)
    cx.pg.add('<h2 id="drift">Drift alarms</h2>')
    cx.pg.add(_drift_rows(win))
    _events_part(cx)
    _notes_part(cx, trend_t, min_trend_rows, outlier_weight, outlier_rate_alert)
    t_fig = time.perf_counter() - t1

    t2 = time.perf_counter()
    paths.html.write_text(page(title, "\n".join(cx.pg.parts)), encoding="utf-8")
    return ReportFiles(
        html=paths.html,
        station_csv=paths.csv,
        station_parquet=paths.parquet,
        n_figures=cx.pg.n_figures,
        section_stations=tuple(cx.sections),
        n_units=len(st),
        n_events=len(ev),
        seconds={"tables": t_tables, "figures": t_fig, "html": time.perf_counter() - t2},
    )


# -- the steps of write_station_report ---------------------------------------------------------


@dataclass(frozen=True, slots=True)
class _Paths:
    """The three output files."""

    csv: Path
    parquet: Path
    html: Path


@dataclass(slots=True, eq=False)
class _Context:
    """What every part of the page reads, and what the parts collect (page, event links)."""

    inputs: ReportInputs
    win: ReportInputs  # inputs cut to the report window
    jr: JoinedRows
    st: pd.DataFrame  # station reliability table
    ev: pd.DataFrame
    ev_ids: NDArray[np.object_]
    sections: list[str]
    level: float
    outlier_weight: float
    min_trend_rows: int
    pg: _Page = field(default_factory=lambda: _Page())
    referenced: set[int] = field(default_factory=set)


def _write_tables(
    inputs: ReportInputs, st: pd.DataFrame, out: Path, since: Any, level: float
) -> _Paths:
    """Write the station table as CSV and Parquet (with its metadata); name the HTML file."""
    out.mkdir(parents=True, exist_ok=True)
    mtype = _slug(inputs.magnitude_type)
    paths = _Paths(
        csv=out / f"station_reliability_{mtype}.csv",
        parquet=out / f"station_reliability_{mtype}.parquet",
        html=out / f"station_report_{mtype}.html",
    )
    meta = {
        "magfuse.model_version": str(inputs.model_meta.get("version", "")),
        "magfuse.magnitude_type": inputs.magnitude_type,
        "magfuse.interval_level": repr(float(level)),
        "magfuse.report_since": "" if since is None else str(to_utc_timestamp(since)),
    }
    write_station_table(st, paths.csv, paths.parquet, metadata=meta)
    return paths


def _head_part(cx: _Context, title: str, since: Any) -> None:
    """1. Title, caution, model block and navigation."""
    pg = cx.pg
    pg.add(f"<h1>{esc(title)}</h1>")
    pg.add(f'<p class="caution"><b>Caution.</b> {esc(ADVISORY)}</p>')
    pg.add(_meta_block(cx.inputs, since, cx.level))
    pg.add(
        '<nav><a href="#summary">Network summary</a><a href="#stations">Station table</a>'
        '<a href="#sections">Station sections</a><a href="#pairs">Correlated pairs</a>'
        '<a href="#drift">Drift alarms</a><a href="#events">Events</a>'
        '<a href="#notes">Notes</a></nav>'
    )


def _summary_part(cx: _Context, *, n_affected_events: int, n_event_pictures: int) -> None:
    """2. Network summary: text, censoring paragraph, σ ranking, shift over time, top events."""
    pg, ev, st, level = cx.pg, cx.ev, cx.st, cx.level
    n_events = len(ev)
    att = attention_mask(st)
    d = plain_mean_difference(ev)
    fin = np.isfinite(d)
    pg.add('<h2 id="summary">Network summary</h2>')
    summary = (
        f"{len(st)} station units ({st['station_id'].nunique()} stations), "
        f"{n_events} events in the report window, {int(np.count_nonzero(att))} units need "
        f"attention. Median error SD {np.nanmedian(st['sigma']):.3f}. "
    )
    ds = difference_summary(d)
    if ds["n"]:
        summary += (
            f"Network magnitude minus plain mean: median {ds['median']:+.3f}, "
            f"90 % of events within [{ds['q05']:+.3f}, {ds['q95']:+.3f}], "
            f"{ds['n_ge_0_1']} events moved by 0.1 or more."
        )
    pg.add(f"<p>{esc(summary)}</p>")
    cens_text = _censoring_text(ev)
    if cens_text:
        pg.add(f"<p>{esc(cens_text)}</p>")
    pg.figure(
        sigma_ranking_figure(st, level, att),
        "station units ranked by error SD",
        f"Error SD σ̃ of every unit with its {interval_name(level)} (chi-square) "
        "(no interval: degrees of freedom unknown). Crosses: units with an attention flag.",
    )
    if n_events:
        pg.figure(
            fused_shift_figure(ev),
            "network magnitude minus plain mean over time",
            "Positive: the network magnitude is above the plain mean of the raw station "
            "magnitudes.",
        )
    if np.any(fin) and n_affected_events:
        top = np.flatnonzero(fin)[np.argsort(-np.abs(d[fin]), kind="stable")][:n_affected_events]
        _affected_events(cx, top, d, n_event_pictures)


def _affected_events(
    cx: _Context, top: NDArray[np.int64], d: NDArray[np.float64], n_event_pictures: int
) -> None:
    """The events most affected (table) and the pictures of the first ``n_event_pictures``."""
    pg, ev, ev_ids = cx.pg, cx.ev, cx.ev_ids
    cx.referenced.update(int(c) for c in top)
    pg.add("<h3>Events most affected</h3>")
    pg.add(
        table(
            [
                ("event", _event_links(top, ev_ids), True),
                ("origin time (UTC)", _times(ev, top), True),
                ("network", fmt(pd.to_numeric(ev["magnitude"]).to_numpy()[top], ".2f"), False),
                ("SE", fmt(pd.to_numeric(ev["se"]).to_numpy()[top], ".2f"), False),
                (
                    "plain mean",
                    fmt(pd.to_numeric(ev["plain_mean"]).to_numpy()[top], ".2f"),
                    False,
                ),
                ("difference", fmt(d[top], "+.2f"), False),
                (
                    "stations",
                    fmt(pd.to_numeric(ev["n_stations"]).to_numpy()[top], ".0f"),
                    False,
                ),
                ("most influential", _text_col(ev, "max_influence_station", top), True),
                ("flags", _text_col(ev, "flags", top), True),
            ]
        )
    )
    if not n_event_pictures:
        return
    ev_order, ev_start = _event_index(cx.jr, len(ev))
    for c in top[:n_event_pictures].tolist():
        rows = ev_order[ev_start[c] : ev_start[c + 1]]
        pic = event_picture_from_tables(
            ev.iloc[c].to_dict(),
            cx.win.contributions.iloc[rows],
            stations=cx.win.stations,
            coordinates=cx.win.coordinates,
            outlier_weight=cx.outlier_weight,
        )
        pg.figure(event_figure_png(pic), f"event picture of {ev_ids[c]}")


def _station_table_part(cx: _Context, paths: _Paths) -> NDArray[np.object_]:
    """3. The station table, every unit; returns the station cells (links to sections)."""
    st = cx.st
    sec_of = {s: i for i, s in enumerate(cx.sections)}
    sid = st["station_id"].to_numpy(dtype=object)
    links = np.array(
        [
            f'<a href="#sec{sec_of[s]}">{esc(s)}</a>' if s in sec_of else esc(s)
            for s in sid.tolist()
        ],
        dtype=object,
    )
    order = np.argsort(st["sigma"].to_numpy(dtype=float), kind="stable")
    cx.pg.add('<h2 id="stations">Station table</h2>')
    cx.pg.add(
        f'<p class="muted">All {len(st)} units, smallest error SD first. Stations with a '
        "section are links. The same table, with more columns, is in "
        f"{esc(paths.csv.name)} and {esc(paths.parquet.name)}.</p>"
    )
    cx.pg.add(_station_rows(st, links, order, cx.level))
    return links


def _sections_part(
    cx: _Context,
    links: NDArray[np.object_],
    *,
    top_by_weight: int,
    max_station_sections: int,
    max_outliers_listed: int,
) -> None:
    """4. One section per selected station (rule: :mod:`fusion.report.sections`)."""
    st, sections = cx.st, cx.sections
    cx.pg.add('<h2 id="sections">Station sections</h2>')
    cx.pg.add(
        f'<p class="muted">{len(sections)} of {st["station_id"].nunique()} stations have a '
        f"section: the {min(top_by_weight, max_station_sections)} with the largest weight share, "
        "then stations with attention flags, most flags and strongest evidence first, up to "
        f"{max_station_sections} sections. The others are rows of the station table.</p>"
    )
    alarm_by_station = _alarms_by_station(cx.win)
    sid = st["station_id"].to_numpy(dtype=object)
    unit_order = np.argsort(sid.astype(str), kind="stable")
    sid_sorted = sid.astype(str)[unit_order]
    for i, s in enumerate(sections):
        lo, hi = np.searchsorted(sid_sorted, s, "left"), np.searchsorted(sid_sorted, s, "right")
        units = np.sort(unit_order[lo:hi]).astype(np.int64)
        alarms = alarm_by_station.get(s, np.array([], dtype="datetime64[us]"))
        _station_section(cx, i, s, units, links, alarms, max_outliers_listed)


def _station_section(
    cx: _Context,
    i: int,
    s: str,
    units: NDArray[np.int64],
    links: NDArray[np.object_],
    alarms: NDArray[np.datetime64],
    max_outliers_listed: int,
) -> None:
    """One station section: flags explained, its units' rows, the panels, outlier readings."""
    pg, st, jr, outlier_weight = cx.pg, cx.st, cx.jr, cx.outlier_weight
    data, rows = _station_panel(
        s, units, st, jr, alarms, cx.level, outlier_weight, cx.min_trend_rows
    )
    spans = _change_spans_by_station(cx.win)
    if s in spans:
        data = dataclasses.replace(data, change_spans=spans[s])
    pg.add(f'<h3 id="sec{i}">{esc(s)}</h3>')
    flags = sorted({f for u in units for f in str(st["flags"].iloc[u]).split(";") if f})
    if flags:
        items = "".join(
            f'<li><span class="flag">{esc(f)}</span>: {esc(_FLAG_TEXT.get(f, ""))}</li>'
            for f in flags
        )
        pg.add(f"<ul>{items}</ul>")
    else:
        pg.add('<p class="muted">No flags; shown for its weight share.</p>')
    pg.add(_station_rows(st, links, units, cx.level, compact=True))
    pg.figure(station_figure(data), f"station {s}: offsets, residuals and trends")
    out_rows = rows[data.outlier]
    if not (out_rows.shape[0] and max_outliers_listed):
        return
    zabs = np.abs(jr.z[out_rows])
    key = np.where(np.isfinite(zabs), zabs, np.abs(jr.residual[out_rows]))
    pick = out_rows[np.argsort(-key, kind="stable")][:max_outliers_listed]
    codes = jr.event[pick]
    cx.referenced.update(int(c) for c in codes)
    pg.add(
        f"<p>Outlier readings: {out_rows.shape[0]} (robust weight below "
        f"{outlier_weight:g}); the {pick.shape[0]} largest:</p>"
    )
    pg.add(
        table(
            [
                ("event", _event_links(codes, cx.ev_ids), True),
                ("origin time (UTC)", _times(cx.ev, codes), True),
                ("network magnitude", fmt(jr.event_magnitude[pick], ".2f"), False),
                ("residual", fmt(jr.residual[pick], "+.2f"), False),
                ("z", fmt(jr.z[pick], "+.1f"), False),
                ("robust weight", fmt(jr.robust_weight[pick], ".2f"), False),
                ("distance (km)", fmt(jr.distance_km[pick], ".0f"), False),
            ]
        )
    )


def _pairs_part(cx: _Context, max_pairs_listed: int) -> None:
    """5. Correlated pairs: the table (flagged first) and the map of flagged pairs."""
    pg, win, st = cx.pg, cx.win, cx.st
    pg.add('<h2 id="pairs">Correlated pairs</h2>')
    pairs = win.pairs
    if not len(pairs):
        pg.add("<p>No pair test results were given.</p>")
        return
    flagged = as_bool(pairs["flagged"], "pairs", "flagged")
    pv = (
        pd.to_numeric(pairs["p_value"]).to_numpy(dtype=float)
        if "p_value" in pairs.columns
        else np.zeros(len(pairs))
    )
    porder = np.lexsort((np.nan_to_num(pv, nan=2.0), ~flagged))[:max_pairs_listed]
    pg.add(
        f"<p>{int(flagged.sum())} flagged of {len(pairs)} tested pairs; intervals of ρ̂ "
        "as given by the pair test.</p>"
    )
    pg.add(_pair_rows(pairs, porder))
    if win.coordinates is not None and len(win.coordinates) and flagged.any():
        fl = pairs[flagged]
        pg.figure(
            pair_map_figure(
                win.coordinates,
                _station_of(fl["station_k"], st),
                _station_of(fl["station_l"], st),
                pd.to_numeric(fl["rho_hat"]).to_numpy(dtype=float),
            ),
            "map of stations and correlated pairs",
            "Plain longitude-latitude axes, no basemap.",
        )
    elif flagged.any():
        pg.add('<p class="muted">No station coordinates given: no map.</p>')


def _events_part(cx: _Context) -> None:
    """7. The events referred to above (link targets)."""
    pg, ev = cx.pg, cx.ev
    pg.add('<h2 id="events">Events referred to in this report</h2>')
    if not cx.referenced:
        pg.add("<p>None.</p>")
        return
    codes = np.array(sorted(cx.referenced), dtype=np.int64)
    pg.add(
        table(
            [
                ("event", np.array([esc(x) for x in cx.ev_ids[codes]], dtype=object), True),
                ("origin time (UTC)", _times(ev, codes), True),
                (
                    "network",
                    fmt(pd.to_numeric(ev["magnitude"]).to_numpy()[codes], ".2f"),
                    False,
                ),
                ("SE", fmt(pd.to_numeric(ev["se"]).to_numpy()[codes], ".2f"), False),
                (
                    "plain mean",
                    fmt(pd.to_numeric(ev["plain_mean"]).to_numpy()[codes], ".2f"),
                    False,
                ),
                (
                    "stations",
                    fmt(pd.to_numeric(ev["n_stations"]).to_numpy()[codes], ".0f"),
                    False,
                ),
                ("flags", _text_col(ev, "flags", codes), True),
            ],
            row_ids=[f"ev{c}" for c in codes.tolist()],
        )
    )


def _notes_part(
    cx: _Context,
    trend_t: float,
    min_trend_rows: int,
    outlier_weight: float,
    outlier_rate_alert: float,
) -> None:
    """8. Notes: how every number and flag is defined, and the closing caution."""
    st = cx.st
    n_dist = st["distance_n"].to_numpy()[np.isfinite(st["distance_t"].to_numpy(dtype=float))]
    n_mag = st["magnitude_n"].to_numpy()[np.isfinite(st["magnitude_t"].to_numpy(dtype=float))]
    cx.pg.add('<h2 id="notes">Notes</h2>')
    cx.pg.add(
        _notes(
            cx.level,
            trend_t,
            min_trend_rows,
            outlier_weight,
            outlier_rate_alert,
            chance_flag_rate(n_dist, trend_t) + chance_flag_rate(n_mag, trend_t),
        )
    )
    cx.pg.add(f'<p class="caution">{esc(ADVISORY)}</p>')


# -- table helpers -----------------------------------------------------------------------------


def _times(ev: pd.DataFrame, codes: NDArray[np.int64]) -> NDArray[np.object_]:
    t = pd.to_datetime(ev["origin_time"], utc=True).iloc[codes]
    return t.dt.strftime("%Y-%m-%d %H:%M:%S").fillna("").to_numpy(dtype=object)


def _text_col(ev: pd.DataFrame, name: str, codes: NDArray[np.int64]) -> NDArray[np.object_]:
    if name not in ev.columns:
        return np.full(codes.shape[0], "", dtype=object)
    vals = ev[name].astype(object).to_numpy()[codes]
    return np.array([esc(v) for v in vals], dtype=object)


def _station_rows(
    st: pd.DataFrame,
    links: NDArray[np.object_],
    rows: NDArray[np.int64],
    level: float,
    *,
    compact: bool = False,
) -> str:
    pct = interval_name(level)

    def col(name: str, spec: str) -> NDArray[np.object_]:
        return fmt(st[name].to_numpy()[rows], spec)

    def interval(lo: str, hi: str, spec: str) -> NDArray[np.object_]:
        a, b = col(lo, spec), col(hi, spec)
        return np.where(a != "", "[" + a + ", " + b + "]", "")

    def text(name: str) -> NDArray[np.object_]:
        return np.array([esc(v) for v in st[name].to_numpy()[rows]], dtype=object)

    start = pd.to_datetime(st["epoch_start"], utc=True).iloc[rows].dt.strftime("%Y-%m-%d")
    end = pd.to_datetime(st["epoch_end"], utc=True).iloc[rows].dt.strftime("%Y-%m-%d")
    a = start.fillna("").to_numpy(dtype=object)
    b = end.fillna("").to_numpy(dtype=object)
    epoch = np.where(
        (a == "") & (b == ""),
        "whole record",
        np.where(b == "", "from " + a, np.where(a == "", "until " + b, a + " to " + b)),
    ).astype(object)
    cols: list[tuple[str, Any, bool]] = [
        ("station", links[rows] if not compact else text("station_id"), True),
        ("unit", text("unit_id"), True),
        ("epoch", epoch, True),
        ("bias", col("bias", "+.3f"), False),
        (f"bias {pct}", interval("bias_ci_low", "bias_ci_high", "+.3f"), False),
        ("σ̃", col("sigma", ".3f"), False),
        (f"σ̃ {pct}", interval("sigma_ci_low", "sigma_ci_high", ".3f"), False),
        ("weight share", col("weight_share", ".4f"), False),
        ("readings", col("n_readings", ".0f"), False),
        ("outlier rate", col("outlier_rate", ".3f"), False),
        ("distance t", col("distance_t", "+.1f"), False),
        ("magnitude t", col("magnitude_t", "+.1f"), False),
        ("offset t", col("residual_mean_t", "+.1f"), False),
        ("flags", text("flags"), True),
        ("partners", text("partners"), True),
        ("drift alarms", text("drift_alarms"), True),
    ]
    ids = None if compact else [f"unit{k}" for k in rows.tolist()]
    return table(cols, row_ids=ids)


def _station_of(ids: pd.Series, st: pd.DataFrame) -> NDArray[np.object_]:
    """Station id of a pair member given as a unit or station id."""
    u2s = dict(zip(st["unit_id"].astype(str), st["station_id"].astype(str), strict=True))
    return np.array([u2s.get(str(x), str(x)) for x in ids], dtype=object)


def _pair_rows(pairs: pd.DataFrame, order: NDArray[np.int64]) -> str:
    def num(name: str, spec: str) -> NDArray[np.object_]:
        if name not in pairs.columns:
            return np.full(order.shape[0], "", dtype=object)
        return fmt(pd.to_numeric(pairs[name]).to_numpy()[order], spec)

    def text(name: str) -> NDArray[np.object_]:
        return np.array([esc(v) for v in pairs[name].to_numpy()[order]], dtype=object)

    lo, hi = num("rho_ci_low", "+.2f"), num("rho_ci_high", "+.2f")
    flagged = as_bool(pairs["flagged"], "pairs", "flagged")[order]
    return table(
        [
            ("station 1", text("station_k"), True),
            ("station 2", text("station_l"), True),
            ("shared events", num("n_shared", ".0f"), False),
            ("error correlation", num("rho_hat", "+.2f"), False),
            (
                "correlation interval (95 %)",
                np.where(lo != "", "[" + lo + ", " + hi + "]", ""),
                False,
            ),
            ("test statistic", num("statistic", "+.2f"), False),
            ("p", num("p_value", ".2g"), False),
            ("q", num("q_value", ".2g"), False),
            ("flagged", np.where(flagged, "yes", ""), True),
        ]
    )


def _alarms_by_station(inputs: ReportInputs) -> dict[str, NDArray[np.datetime64]]:
    ep = inputs.epochs
    if not len(ep):
        return {}
    t = pd.to_datetime(ep["alarm_time"], utc=True).dt.tz_localize(None)
    frame = pd.DataFrame({"s": ep["station_id"].astype(str).to_numpy(), "t": t.to_numpy()})
    return {
        str(k): g["t"].to_numpy(dtype="datetime64[us]") for k, g in frame.groupby("s", sort=True)
    }


def _change_spans_by_station(inputs: ReportInputs) -> dict[str, NDArray[np.datetime64]]:
    """Interval of each estimated change time per station (shape (n, 2)), when given."""
    ep = inputs.epochs
    if not len(ep) or "change_time_low" not in ep.columns:
        return {}
    lo = pd.to_datetime(ep["change_time_low"], utc=True).dt.tz_localize(None)
    hi = pd.to_datetime(ep["change_time_high"], utc=True).dt.tz_localize(None)
    frame = pd.DataFrame(
        {"s": ep["station_id"].astype(str).to_numpy(), "lo": lo.to_numpy(), "hi": hi.to_numpy()}
    )
    return {
        str(k): g[["lo", "hi"]].to_numpy(dtype="datetime64[us]")
        for k, g in frame.groupby("s", sort=True)
    }


def _drift_rows(inputs: ReportInputs) -> str:
    ep = inputs.epochs
    if not len(ep):
        return "<p>No drift alarms were given.</p>"
    order = np.lexsort(
        (
            pd.to_datetime(ep["change_time"], utc=True).to_numpy(dtype="datetime64[us]"),
            ep["station_id"].astype(str).to_numpy(),
        )
    )

    def tcol(name: str) -> NDArray[np.object_]:
        t = pd.to_datetime(ep[name], utc=True).iloc[order]
        return t.dt.strftime("%Y-%m-%d %H:%M").fillna("").to_numpy(dtype=object)

    def num(name: str, spec: str) -> NDArray[np.object_]:
        if name not in ep.columns:
            return np.full(order.shape[0], "", dtype=object)
        return fmt(pd.to_numeric(ep[name]).to_numpy()[order], spec)

    direction = pd.to_numeric(ep["direction"]).to_numpy()[order]
    has_span = "change_time_low" in ep.columns
    between = (
        tcol("change_time_low") + " – " + tcol("change_time_high")
        if has_span
        else np.full(order.shape[0], "", dtype=object)
    )
    if "step" in ep.columns:
        step = pd.to_numeric(ep["step"]).to_numpy()[order]
        step_se = pd.to_numeric(ep["step_se"]).to_numpy()[order]
        size = fmt(step, "+.3f") + " ± " + fmt(step_se, ".3f")
        direction = np.where(np.isfinite(step) & (step != 0), np.sign(step), direction)
    else:
        size = np.full(order.shape[0], "", dtype=object)
    return table(
        [
            (
                "station",
                np.array([esc(s) for s in ep["station_id"].to_numpy()[order]], dtype=object),
                True,
            ),
            ("most likely change (UTC)", tcol("change_time"), True),
            ("change between (95 %)", between, True),
            ("alarm fired (UTC)", tcol("alarm_time"), True),
            ("bias moved", np.where(direction > 0, "up", "down"), True),
            ("step (fitted epochs)", size, False),
            ("readings before", num("n_before", ".0f"), False),
            ("readings after", num("n_after", ".0f"), False),
            ("CUSUM peak", num("peak", ".1f"), False),
        ]
    )


def _censoring_text(ev: pd.DataFrame) -> str:
    """One paragraph on the use of non-detections (:mod:`fusion.network.summaries`)."""
    if not len(ev):
        return ""
    c = censoring_summary(ev)
    if not (c["n_used"] or c["n_uncorrected"] or c["n_likely_biased_high"]):
        return ""
    text = (
        f"Non-detections: {c['n_used']} of {c['n_events']} events were re-estimated with the "
        f"censored likelihood, using {c['n_nondetections']} non-detections (docs/censoring.md)."
    )
    sh = c["shift"]
    if "median" in sh:
        q = sh["quantiles"]
        text += (
            f" Shift censored minus GLS: median {sh['median']:+.3f}, quartiles "
            f"[{q['0.25']:+.3f}, {q['0.75']:+.3f}], 90 % within [{q['0.05']:+.3f}, "
            f"{q['0.95']:+.3f}], largest |shift| {sh['max_abs']:.3f}; {sh['n_ge_0_1']} events "
            "moved by 0.1 or more."
        )
    if c["n_uncorrected"]:
        text += (
            f" {c['n_uncorrected']} events had non-detections or clipped readings that were "
            "not used (flag censoring-uncorrected)."
        )
    if c["n_likely_biased_high"]:
        text += (
            f" {c['n_likely_biased_high']} events rest on detections only and are likely "
            "biased high (flag likely-biased-high)."
        )
    return text


def _notes(
    level: float,
    trend_t: float,
    min_rows: int,
    outlier_weight: float,
    outlier_rate_alert: float,
    chance: float,
) -> str:
    pct = interval_name(level)
    items = [
        "Unit: a station epoch, i.e. a station over a span of time in which its bias stayed the "
        "same. A station whose bias stepped has one unit per epoch; its unit id is the station "
        "code for the first epoch and station code@YYYY-MM-DD for an epoch that began that day.",
        "Bias b̂ is the station's offset from the network, relative to the anchor; a station "
        "correction is −b̂. Its interval (the same level as every interval in magfuse, "
        f"[network] confidence_level) is the {pct} b̂ ± z·SE, z the normal quantile.",
        "σ̃ is the station's error SD after the empirical-Bayes moderation of the fit; its "
        f"interval is the chi-square {pct} for an SD with the unit's degrees of freedom.",
        "Weight share: the sum of the station's normalised weights over the window's events, "
        "divided by the number of events with a network magnitude. Shares add up to 1 over "
        "all stations.",
        "Residual: corrected station magnitude minus network magnitude. Only events with two "
        "or more stations count (with one station the residual is 0).",
        f"Trend rule: a weighted least-squares line of residual on log10(distance in km) and "
        f"on network magnitude, weights = robust weights; a unit is flagged when |slope/SE| "
        f"> {trend_t:g} with at least {min_rows} readings. Under the model the ratio follows "
        "Student's t, so about 0.27 % of units are flagged by chance per test; for this "
        f"report that is {chance:.1f} units expected by chance over both tests.",
        f"Offset rule: the robust-weighted mean residual of the window with |mean/SE| > "
        f"{trend_t:g}; it says the bias has moved since the fit.",
        f"Outliers: readings with robust weight below {outlier_weight:g}; many-outliers when "
        f"more than {100 * outlier_rate_alert:g} % of a unit's readings are outliers.",
        "Non-detections: a station that was operating but did not detect an event says its "
        "station magnitude was below its noise threshold. Events holding such stations (or "
        "clipped readings) are re-estimated by the censored (Tobit) likelihood; the shift is "
        "the censored magnitude minus the GLS magnitude of the detections, negative when the "
        "detecting stations were the lucky ones (Ringdal 1976).",
        "Colours follow Okabe & Ito (2008), readable with the common colour-vision "
        "deficiencies; marker shapes repeat every colour distinction.",
    ]
    return "<ul>" + "".join(f"<li>{esc(t)}</li>" for t in items) + "</ul>"
