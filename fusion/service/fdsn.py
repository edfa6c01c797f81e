"""The FDSN event web service (FDSN specification fdsnws-event, version 1.2) over fused magnitudes.

``/fdsnws/event/1/query`` answers with QuakeML 1.2 (:func:`fusion.export.quakeml.build_catalog`):
one event per current network magnitude, the fused value as the event's preferred magnitude (the
file export leaves that choice to the publishing authority; a client of this endpoint asks for
magfuse's value) and its station magnitudes with their contributions. Supported parameters:
``starttime`` (``start``), ``endtime`` (``end``), ``minmagnitude`` (``minmag``), ``maxmagnitude``
(``maxmag``), ``magnitudetype``, ``eventid``, ``limit``, ``offset``, ``orderby`` (``time``, ``time-
asc``, ``magnitude``, ``magnitude-asc``), ``format`` (``xml``), ``nodata`` (204 or 404); the include
switches (``includeallorigins``, ``includeallmagnitudes``, ``includearrivals``) are accepted and
have nothing to add. The box parameters (``minlatitude``, ``maxlatitude``, ``minlongitude``,
``maxlongitude`` in degrees, ``mindepth``, ``maxdepth`` in km) select on the location stored with
the station magnitudes; an event without one is outside every box. Other parameters (the radial
search, ``updatedafter``, ``catalog``, ``contributor``) are refused with 400 as the specification
asks of unsupported parameters. Errors are plain text in the specification's layout
(``Error <code>: <reason>`` and details).
"""

from __future__ import annotations

import io
from datetime import UTC, datetime
from typing import Any

import numpy as np
import pandas as pd
from fastapi import APIRouter, Depends, Request
from starlette.concurrency import run_in_threadpool
from starlette.responses import PlainTextResponse, Response

from fusion.service.access import require
from fusion.service.state import ServiceState
from stations.errors import ConfigError, MagfuseError

__all__ = ["FDSN_VERSION", "router"]

#: Version of the fdsnws-event specification implemented.
FDSN_VERSION = "1.2.0"
_BASE = "/fdsnws/event/1"

router = APIRouter(prefix=_BASE, include_in_schema=True, tags=["fdsnws-event"])

_ALIASES = {
    "start": "starttime",
    "end": "endtime",
    "minmag": "minmagnitude",
    "maxmag": "maxmagnitude",
}
_ACCEPTED = {
    "starttime",
    "endtime",
    "minmagnitude",
    "maxmagnitude",
    "magnitudetype",
    "eventid",
    "limit",
    "offset",
    "orderby",
    "format",
    "nodata",
    "includeallorigins",
    "includeallmagnitudes",
    "includearrivals",
    "minlatitude",
    "maxlatitude",
    "minlongitude",
    "maxlongitude",
    "mindepth",
    "maxdepth",
}
_ALIASES.update(
    {
        "minlat": "minlatitude",
        "maxlat": "maxlatitude",
        "minlon": "minlongitude",
        "maxlon": "maxlongitude",
    }
)
#: Box parameters -> (store column, lower bound?).
_BOX = {
    "minlatitude": ("event_latitude", True),
    "maxlatitude": ("event_latitude", False),
    "minlongitude": ("event_longitude", True),
    "maxlongitude": ("event_longitude", False),
    "mindepth": ("event_depth", True),
    "maxdepth": ("event_depth", False),
}
_ORDERS = ("time", "time-asc", "magnitude", "magnitude-asc")


class FDSNError(Exception):
    """A request error reported in the FDSN plain-text layout."""

    def __init__(self, status: int, detail: str) -> None:
        super().__init__(detail)
        self.status, self.detail = status, detail


_REASONS = {400: "Bad Request", 404: "Not Found", 413: "Request Too Large", 503: "Unavailable"}


def fdsn_error(request: Request, status: int, detail: str) -> PlainTextResponse:
    """The specification's error document."""
    text = (
        f"Error {status}: {_REASONS.get(status, 'Error')}\n\n{detail}\n\n"
        f"Usage details are available from {_BASE}/application.wadl\n\n"
        f"Request:\n{request.url}\n\n"
        f"Request Submitted:\n{datetime.now(UTC).isoformat(timespec='seconds')}\n\n"
        f"Service version:\n{FDSN_VERSION}\n"
    )
    return PlainTextResponse(text, status_code=status)


def _params(request: Request) -> dict[str, str]:
    out: dict[str, str] = {}
    for key, value in request.query_params.multi_items():
        name = _ALIASES.get(key.lower(), key.lower())
        if name not in _ACCEPTED:
            raise FDSNError(400, f"parameter {key!r} is not supported by this service")
        out[name] = value
    return out


def _number(params: dict[str, str], name: str, kind: type = float) -> Any:
    if name not in params:
        return None
    try:
        value = kind(params[name])
    except ValueError:
        raise FDSNError(400, f"{name}={params[name]!r} is not a valid {kind.__name__}") from None
    if kind is float and not np.isfinite(value):
        raise FDSNError(400, f"{name}={params[name]!r} must be finite")
    return value


def _time(params: dict[str, str], name: str) -> datetime | None:
    from fusion.cli.common import parse_time

    try:
        return parse_time(params.get(name), name)
    except ConfigError as exc:
        raise FDSNError(400, str(exc)) from None


def select_events(state: ServiceState, params: dict[str, str]) -> pd.DataFrame:
    """Current fused rows matching the query, in the order and page asked for."""
    from stations.schema import normalise_magnitude_type

    mtype_text = params.get("magnitudetype") or state.cfg.learn.magnitude_type
    try:
        mtype = normalise_magnitude_type(mtype_text).value
    except ValueError as exc:
        raise FDSNError(400, f"magnitudetype: {exc}") from None
    if params.get("format", "xml").lower() not in ("xml", "quakeml"):
        raise FDSNError(400, f"format={params['format']!r} is not supported; use format=xml")
    order = params.get("orderby", "time")
    if order not in _ORDERS:
        raise FDSNError(400, f"orderby={order!r}; use one of {', '.join(_ORDERS)}")
    limit = _number(params, "limit", int)
    offset = _number(params, "offset", int) or 1
    if (limit is not None and limit < 1) or offset < 1:
        raise FDSNError(400, "limit and offset must be positive integers")
    t0, t1 = _time(params, "starttime"), _time(params, "endtime")
    lo, hi = _number(params, "minmagnitude"), _number(params, "maxmagnitude")
    ids = [params["eventid"]] if "eventid" in params else None
    frame = state.fused.current(mtype, start=t0, end=t1, event_ids=ids)
    mag = frame["magnitude"].to_numpy(dtype=float)
    keep = np.isfinite(mag)
    if lo is not None:
        keep &= mag >= lo
    if hi is not None:
        keep &= mag <= hi
    frame = frame[keep]
    box = {k: _number(params, k) for k in _BOX if k in params}
    if box and len(frame):
        frame = frame[_inside_box(state, mtype, frame, box)]
    if order.startswith("magnitude"):
        frame = frame.sort_values(
            ["magnitude", "event_id"], ascending=order == "magnitude-asc", kind="stable"
        )
    elif order == "time":  # the specification's default: newest first
        frame = frame.iloc[::-1]
    frame = frame.iloc[offset - 1 : (offset - 1 + limit) if limit is not None else None]
    return frame.reset_index(drop=True)


def _inside_box(
    state: ServiceState, mtype: str, frame: pd.DataFrame, box: dict[str, float]
) -> np.ndarray:
    """Which events of ``frame`` have a location inside the box (deg, km); unknown = outside."""
    times = pd.to_datetime(frame["origin_time"], utc=True)
    rows = state.store.scan(
        magnitude_type=mtype,
        start=times.min().to_pydatetime(),
        end=(times.max() + pd.Timedelta(microseconds=1)).to_pydatetime(),
        columns=["event_id", "event_latitude", "event_longitude", "event_depth"],
    )
    loc = rows.groupby("event_id", sort=False).first().reindex(frame["event_id"].astype(str))
    inside = np.ones(len(frame), dtype=bool)
    for name, value in box.items():
        column, lower = _BOX[name]
        v = loc[column].to_numpy(dtype=float)
        inside &= (v >= value) if lower else (v <= value)  # NaN compares False: outside
    return inside


def quakeml_bytes(state: ServiceState, events: pd.DataFrame) -> bytes:
    """QuakeML 1.2 of fused rows, with station magnitudes and event locations from the store."""
    from fusion.export.quakeml import build_catalog

    mtype = str(events["magnitude_type"].iloc[0])
    contributions = state.fused.current_contributions(mtype, events)
    readings = state.store.events(events["event_id"].astype(str).tolist(), magnitude_type=mtype)
    catalog, _ = build_catalog(events, contributions, readings=readings)
    # The file export leaves the preferred magnitude to the publishing authority; a client of
    # this service asked magfuse for its network magnitude, so here it is the preferred one.
    for event in catalog:
        if event.magnitudes:
            event.preferred_magnitude_id = event.magnitudes[0].resource_id
    buf = io.BytesIO()
    catalog.write(buf, format="QUAKEML")
    return buf.getvalue()


def _openapi_parameters() -> dict[str, Any]:
    """The query parameters in the OpenAPI document (the endpoint reads them itself)."""
    kinds = {
        "starttime": {"type": "string", "format": "date-time"},
        "endtime": {"type": "string", "format": "date-time"},
        "minmagnitude": {"type": "number"},
        "maxmagnitude": {"type": "number"},
        "magnitudetype": {"type": "string"},
        "eventid": {"type": "string"},
        "limit": {"type": "integer"},
        "offset": {"type": "integer"},
        "orderby": {"type": "string", "enum": list(_ORDERS)},
        "format": {"type": "string", "enum": ["xml"]},
        "nodata": {"type": "integer", "enum": [204, 404]},
        **{name: {"type": "number"} for name in _BOX},
    }
    return {
        "parameters": [
            {"name": name, "in": "query", "required": False, "schema": schema}
            for name, schema in kinds.items()
        ]
    }


@router.get(
    "/query",
    dependencies=[Depends(require("read"))],
    summary="FDSN event query.",
    openapi_extra=_openapi_parameters(),
)
async def query(request: Request) -> Response:
    state: ServiceState = request.app.state.magfuse
    try:
        params = _params(request)
        nodata = params.get("nodata", "204")
        if nodata not in ("204", "404"):
            raise FDSNError(400, "nodata must be 204 or 404")
        events = await run_in_threadpool(select_events, state, params)
        if events.empty:
            if nodata == "404":
                raise FDSNError(404, "no events match the request")
            return Response(status_code=204)
        body = await run_in_threadpool(quakeml_bytes, state, events)
    except FDSNError as exc:
        return fdsn_error(request, exc.status, exc.detail)
    except MagfuseError as exc:
        return fdsn_error(request, 400, str(exc))
    return Response(body, media_type="application/xml")


@router.get("/version", summary="Version of the fdsnws-event specification implemented.")
def version() -> PlainTextResponse:
    return PlainTextResponse(FDSN_VERSION)


def _wadl(base: str) -> str:
    params = "\n".join(
        f'        <param name="{name}" style="query" type="{kind}"/>'
        for name, kind in (
            ("starttime", "xs:dateTime"),
            ("endtime", "xs:dateTime"),
            ("minmagnitude", "xs:double"),
            ("maxmagnitude", "xs:double"),
            ("magnitudetype", "xs:string"),
            ("eventid", "xs:string"),
            ("minlatitude", "xs:double"),
            ("maxlatitude", "xs:double"),
            ("minlongitude", "xs:double"),
            ("maxlongitude", "xs:double"),
            ("mindepth", "xs:double"),
            ("maxdepth", "xs:double"),
            ("limit", "xs:int"),
            ("offset", "xs:int"),
            ("orderby", "xs:string"),
            ("format", "xs:string"),
            ("nodata", "xs:int"),
            ("includeallorigins", "xs:boolean"),
            ("includeallmagnitudes", "xs:boolean"),
            ("includearrivals", "xs:boolean"),
        )
    )
    return f"""<?xml version="1.0" encoding="UTF-8"?>
<application xmlns="http://wadl.dev.java.net/2009/02"
             xmlns:xs="http://www.w3.org/2001/XMLSchema">
  <resources base="{base}">
    <resource path="query">
      <method name="GET" id="query">
      <request>
{params}
      </request>
      <response status="200"><representation mediaType="application/xml"/></response>
      <response status="204 400 404 413 503"/>
      </method>
    </resource>
    <resource path="version">
      <method name="GET"><response><representation mediaType="text/plain"/></response></method>
    </resource>
    <resource path="application.wadl">
      <method name="GET"><response><representation mediaType="application/xml"/></response>
      </method>
    </resource>
  </resources>
</application>
"""


@router.get("/application.wadl", summary="WADL description of the FDSN event service.")
def wadl(request: Request) -> Response:
    from xml.sax.saxutils import quoteattr

    base = str(request.base_url).rstrip("/") + _BASE + "/"
    return Response(_wadl(quoteattr(base)[1:-1]), media_type="application/xml")
