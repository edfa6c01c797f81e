"""Analyst pages: server-rendered HTML (Jinja2), readable without JavaScript.

Pages: the live list of recent events (``/``; a few lines of inline script add rows from the
event stream ``/v1/updates``), one event (``/events/{id}``, with its figure), the station table
of the active model (``/stations``) with the full reliability report (``/stations/report``, the
page ``magfuse report`` writes), and the model versions with the dry run of the newest candidate
(``/models``). Every page carries :data:`fusion.advisory.ADVISORY`.

Safety: Jinja2 autoescaping is on for every template, so event ids, station codes and flags from
the data are escaped; ids in links are percent-encoded. Each page's Content-Security-Policy
allows only this app as a source (``default-src 'self'``) and only the page's own inline script
(a per-response nonce), so nothing is loaded from outside the app.
"""

from __future__ import annotations

import math
import secrets
import tempfile
import threading
from pathlib import Path
from typing import Any
from urllib.parse import quote

from fastapi import APIRouter, Depends, Request
from fastapi.responses import HTMLResponse, Response
from jinja2 import Environment, PackageLoader, select_autoescape
from starlette.concurrency import run_in_threadpool

from fusion.advisory import ADVISORY
from fusion.service.access import require
from fusion.service.state import ServiceState, update_rows
from stations.errors import MagfuseError

__all__ = ["router"]

router = APIRouter(include_in_schema=False, dependencies=[Depends(require("read"))])


def _num(value: Any, digits: int = 2, sign: bool = False) -> str:
    try:
        x = float(value)
    except (TypeError, ValueError):
        return "-"
    if not math.isfinite(x):
        return "-"
    return format(x, f"{'+' if sign else ''}.{digits}f")


def _cell(value: Any) -> str:
    """A table cell: floats to 3 decimals, missing values as '-'."""
    import pandas as pd

    if value is None or (not isinstance(value, str) and pd.isna(value)):
        return "-"
    if isinstance(value, float):
        return _num(value, 3)
    return str(value)


_env = Environment(
    loader=PackageLoader("fusion.service", "templates"),
    autoescape=select_autoescape(default=True, default_for_string=True),
    trim_blocks=True,
    lstrip_blocks=True,
)
_env.filters["num"] = _num
_env.filters["pathseg"] = lambda v: quote(str(v), safe="")


def _csp(nonce: str) -> str:
    return (
        "default-src 'self'; img-src 'self' data:; style-src 'self'; "
        f"script-src 'nonce-{nonce}'; connect-src 'self'; base-uri 'none'; form-action 'self'; "
        "frame-ancestors 'none'"
    )


def render(name: str, status: int = 200, **context: Any) -> HTMLResponse:
    """A page from ``templates/<name>`` with the advisory, a script nonce and the CSP header."""
    nonce = secrets.token_urlsafe(16)
    html = _env.get_template(name).render(advisory=ADVISORY, nonce=nonce, **context)
    return HTMLResponse(
        html,
        status_code=status,
        headers={
            "Content-Security-Policy": _csp(nonce),
            "X-Content-Type-Options": "nosniff",
            "Referrer-Policy": "no-referrer",
        },
    )


def _state(request: Request) -> ServiceState:
    state: ServiceState = request.app.state.magfuse
    return state


def _error_page(exc: MagfuseError) -> HTMLResponse:
    from fusion.service.responses import status_of

    _, status = status_of(exc)
    return render("error.html", status=status, title="Not available", message=str(exc))


@router.get("/favicon.ico")
def favicon() -> Response:
    """No icon (pages that name none, such as the report, make browsers ask for one)."""
    return Response(status_code=204)


@router.get("/", response_class=HTMLResponse)
def live(request: Request) -> HTMLResponse:
    state = _state(request)
    mtype = state.cfg.learn.magnitude_type
    frame = state.fused.current(mtype)
    frame = frame.iloc[::-1].head(state.cfg.service.recent_events)
    events = update_rows(frame)
    for e in events:
        m, p = e.get("magnitude"), e.get("plain_mean")
        e["minus"] = None if m is None or p is None else m - p
        e["flags"] = (e.get("flags") or "").replace(";", ", ")
    return render("live.html", title="Recent events", magnitude_type=mtype, events=events)


@router.get("/events/{event_id:path}/figure.png")
def event_figure(request: Request, event_id: str, type: str | None = None) -> Response:
    from fusion.report.event_figure import write_event_figure
    from fusion.workflows.event_view import explain_event

    state = _state(request)
    try:
        ex = explain_event(state.store, state.registry, state.cfg, event_id, magnitude_type=type)
    except MagfuseError as exc:
        return _error_page(exc)
    with tempfile.TemporaryDirectory(prefix="magfuse-figure-") as tmp:
        # the writer adds distances and the epicentre from the explanation's readings
        png = write_event_figure(ex, Path(tmp) / "event.png", fmt="png").read_bytes()
    return Response(png, media_type="image/png")


@router.get("/events/{event_id:path}", response_class=HTMLResponse)
def event_page(request: Request, event_id: str, type: str | None = None) -> HTMLResponse:
    state = _state(request)
    try:
        ev = state.event(event_id, type)
    except MagfuseError as exc:
        return _error_page(exc)
    level = ev.get("confidence_level") or state.cfg.network.confidence_level
    interval = ev.get("confidence_interval") or [ev.get("ci_low"), ev.get("ci_high")]
    lo, hi = [*interval, None, None][:2] if isinstance(interval, list) else (None, None)
    contributions = sorted(
        ev.get("contributions", []),
        key=lambda c: (not c.get("detected"), -abs(c.get("weight") or 0.0)),
    )
    return render(
        "event.html",
        title=f"Event {event_id}",
        ev=ev,
        level=round(100 * float(level)),
        lo=lo if lo is not None else ev.get("event", {}).get("ci_low"),
        hi=hi if hi is not None else ev.get("event", {}).get("ci_high"),
        recorded=ev.get("recorded"),
        contributions=contributions,
        type_query=f"?type={quote(type)}" if type else "",
    )


@router.get("/stations", response_class=HTMLResponse)
def stations_page(request: Request) -> HTMLResponse:
    state = _state(request)
    mtype = state.cfg.learn.magnitude_type
    try:
        version = state.registry.active(mtype)
    except MagfuseError as exc:
        return _error_page(exc)
    table = state.registry.load_table(version, "stations")
    cols = [
        c
        for c in (
            "station_id",
            "unit_id",
            "epoch_start",
            "bias",
            "bias_se",
            "sigma",
            "n_events",
            "outlier_rate",
            "prior_dominated",
            "uncalibrated",
            "partner",
        )
        if c in table.columns
    ]
    shown = table[cols].sort_values("sigma") if "sigma" in cols else table[cols]
    rows = [[_cell(v) for v in row] for row in shown.itertuples(index=False)]
    return render(
        "stations.html", title="Stations", version=version.version_id, columns=cols, rows=rows
    )


_report_lock = threading.Lock()
_report_dirs: list[Path] = []


def _report_root() -> Path:
    """This process's private folder of report pages (created on first use, removed at exit)."""
    if not _report_dirs:
        import atexit
        import shutil

        folder = Path(tempfile.mkdtemp(prefix="magfuse-service-report-"))
        atexit.register(shutil.rmtree, folder, ignore_errors=True)
        _report_dirs.append(folder)
    return _report_dirs[0]


def _report_html(state: ServiceState, version_id: str) -> bytes:
    """The report page of a version, written once per process into a private folder."""
    from fusion.workflows.reporting import write_model_report

    with _report_lock:
        out = _report_root() / version_id
        existing = sorted(out.glob("*.html")) if out.is_dir() else []
        if existing:
            return existing[0].read_bytes()
        files = write_model_report(state.store, state.registry, state.cfg, out, version=version_id)
        return files.html.read_bytes()


@router.get("/stations/report", response_class=HTMLResponse)
async def station_report(request: Request) -> Response:
    state = _state(request)
    mtype = state.cfg.learn.magnitude_type
    try:
        version = state.registry.active(mtype)
        body = await run_in_threadpool(_report_html, state, version.version_id)
    except MagfuseError as exc:
        return _error_page(exc)
    return HTMLResponse(
        body,
        headers={
            "Content-Security-Policy": "default-src 'self'; img-src 'self' data:; "
            "style-src 'unsafe-inline'; script-src 'none'"
        },
    )


@router.get("/models", response_class=HTMLResponse)
def models_page(request: Request) -> HTMLResponse:
    from fusion.workflows.dry_run import dry_run

    state = _state(request)
    mtype = state.cfg.learn.magnitude_type
    active = state.registry.active_id(mtype)
    versions = [
        {"version_id": v.version_id, "created": v.created, "active": v.version_id == active}
        for v in state.registry.versions(mtype)
    ]
    text, note = "", ""
    try:
        text = dry_run(state.store, state.registry, state.cfg, magnitude_type=mtype).render_text()
    except MagfuseError as exc:
        note = str(exc)
    return render(
        "models.html",
        title="Models",
        magnitude_type=mtype,
        versions=versions[::-1],
        dry_run=text,
        dry_run_note=note,
    )
