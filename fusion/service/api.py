"""The ``/v1`` JSON API (resource names and conventions: module :mod:`fusion.service.app`).

Endpoints are thin: parse, check access, call :class:`fusion.service.state.ServiceState` or one
workflow, return strict JSON. Blocking library work runs in the thread pool.
"""

from __future__ import annotations

import asyncio
import base64
import binascii
from typing import Annotated, Any

import numpy as np
import pandas as pd
from fastapi import APIRouter, Body, Depends, Path, Query, Request
from starlette.concurrency import run_in_threadpool
from starlette.responses import StreamingResponse

from fusion.advisory import ADVISORY
from fusion.service.access import require
from fusion.service.responses import StrictJSONResponse
from fusion.service.state import ServiceState, update_rows
from stations.errors import ConfigError
from stations.strict_json import dumps, to_jsonable

__all__ = ["router"]

router = APIRouter(prefix="/v1", default_response_class=StrictJSONResponse)

READ = [Depends(require("read"))]
SUBMIT = [Depends(require("submit"))]
ADMIN = [Depends(require("admin"))]

TypeQuery = Annotated[
    str | None,
    Query(alias="type", max_length=16, description="Magnitude type (default: [learn] type)."),
]
EventIdPath = Annotated[str, Path(min_length=1, max_length=200, description="Event id.")]
VersionPath = Annotated[
    str,
    Path(
        max_length=100,
        pattern=r"^[A-Za-z0-9_]{1,16}-[A-Za-z0-9_-]{1,80}$",
        description="Model version id (TYPE-YYYYMMDDTHHMMSSZ-hash).",
    ),
]


def _state(request: Request) -> ServiceState:
    state: ServiceState = request.app.state.magfuse
    return state


def _mtype(state: ServiceState, value: str | None) -> str:
    from stations.schema import normalise_magnitude_type

    text = value or state.cfg.learn.magnitude_type
    try:
        return normalise_magnitude_type(text).value
    except ValueError as exc:
        raise ConfigError(f"type {text!r}: {exc}") from None


# -- supervisor --------------------------------------------------------------------------------
@router.get("/health", summary="The process is alive.")
def health() -> dict[str, Any]:
    return {"status": "ok"}


@router.get("/ready", summary="The store is readable; active model of each type.")
def ready(request: Request) -> StrictJSONResponse:
    state = _state(request)
    try:
        generation = state.store.manifest().generation
        active = {t: state.registry.active_id(t) for t in state.model_types()}
    except Exception as exc:  # readiness must answer, whatever broke
        return StrictJSONResponse(
            {"status": "not ready", "reason": str(exc).splitlines()[0][:300]}, status_code=503
        )
    return StrictJSONResponse(
        {"status": "ready", "store_generation": generation, "active_models": active}
    )


# -- submissions -------------------------------------------------------------------------------
_SUBMISSION_BODY = {
    "requestBody": {
        "required": True,
        "description": "Station magnitudes: magfuse CSV, QuakeML 1.2, or a JSON list of records "
        "keyed by the CSV template's column names.",
        "content": {
            "text/csv": {"schema": {"type": "string"}},
            "application/xml": {"schema": {"type": "string"}},
            "application/json": {"schema": {"type": "array", "items": {"type": "object"}}},
        },
    }
}


def _kind(content_type: str) -> str | None:
    ct = content_type.split(";")[0].strip().lower()
    if ct.endswith("json"):
        return "json"
    if ct.endswith("xml"):
        return "xml"
    if ct in ("text/csv", "text/plain"):
        return "csv"
    return None


@router.post(
    "/submissions",
    dependencies=SUBMIT,
    status_code=201,
    summary="Submit station magnitudes: one atomic batch, then fusion of the touched events.",
    openapi_extra=_SUBMISSION_BODY,
)
async def submit(
    request: Request,
    format: Annotated[
        str | None, Query(max_length=32, description="Reader format (default: recognised).")
    ] = None,
    compute: Annotated[
        bool, Query(description="Compute magnitudes from amplitudes (IASPEI formulas).")
    ] = False,
) -> StrictJSONResponse:
    body = await request.body()
    if not body.strip():
        raise ConfigError("request body is empty; send station magnitudes as CSV, QuakeML or JSON")
    state = _state(request)
    kind = _kind(request.headers.get("content-type", ""))
    result = await run_in_threadpool(state.submit, body, kind=kind, fmt=format, compute=compute)
    status = 200 if result["duplicate_submission"] else 201
    return StrictJSONResponse(result, status_code=status)


# -- events ------------------------------------------------------------------------------------
def _encode_cursor(origin_us: int, event_id: str) -> str:
    return base64.urlsafe_b64encode(f"{origin_us}|{event_id}".encode()).decode().rstrip("=")


def _decode_cursor(cursor: str) -> tuple[int, str]:
    try:
        text = base64.urlsafe_b64decode(cursor + "=" * (-len(cursor) % 4)).decode()
        us, _, event_id = text.partition("|")
        return int(us), event_id
    except (ValueError, binascii.Error, UnicodeDecodeError):
        raise ConfigError(
            f"cursor {cursor[:40]!r} is not one this service gave out; pass the 'next_cursor' "
            "of the previous page"
        ) from None


def list_events(
    state: ServiceState,
    *,
    magnitude_type: str,
    start: str | None,
    end: str | None,
    min_magnitude: float | None,
    max_magnitude: float | None,
    limit: int,
    cursor: str | None,
    newest_first: bool = False,
) -> dict[str, Any]:
    """One page of current network magnitudes (oldest first, or newest first)."""
    from fusion.cli.common import parse_time

    t0, t1 = parse_time(start, "start"), parse_time(end, "end")
    frame = state.fused.current(magnitude_type, start=t0, end=t1)
    mag = frame["magnitude"].to_numpy(dtype=float)
    keep = np.ones(len(frame), dtype=bool)
    if min_magnitude is not None:
        keep &= mag >= min_magnitude
    if max_magnitude is not None:
        keep &= mag <= max_magnitude
    us = pd.to_datetime(frame["origin_time"], utc=True).astype("int64").to_numpy() // 1000
    ids = frame["event_id"].astype(str).to_numpy()
    if newest_first:
        order = np.lexsort((ids, us))[::-1]
        frame, us, ids, keep = frame.iloc[order], us[order], ids[order], keep[order]
    if cursor is not None:
        c_us, c_id = _decode_cursor(cursor)
        if newest_first:
            keep &= (us < c_us) | ((us == c_us) & (ids < c_id))
        else:
            keep &= (us > c_us) | ((us == c_us) & (ids > c_id))
    idx = np.flatnonzero(keep)
    page = idx[:limit]
    more = idx.shape[0] > limit
    rows = update_rows(frame.iloc[page])
    next_cursor = _encode_cursor(int(us[page[-1]]), str(ids[page[-1]])) if more else None
    return {
        "magnitude_type": magnitude_type,
        "events": rows,
        "next_cursor": next_cursor,
        "advisory": ADVISORY,
    }


@router.get("/events", dependencies=READ, summary="Network magnitudes by time and magnitude.")
def events(
    request: Request,
    type: TypeQuery = None,
    start: Annotated[
        str | None, Query(max_length=40, description="ISO 8601 UTC, inclusive.")
    ] = None,
    end: Annotated[str | None, Query(max_length=40, description="ISO 8601 UTC, exclusive.")] = None,
    min_magnitude: Annotated[float | None, Query(ge=-10, le=15)] = None,
    max_magnitude: Annotated[float | None, Query(ge=-10, le=15)] = None,
    limit: Annotated[int | None, Query(ge=1, le=10_000)] = None,
    cursor: Annotated[str | None, Query(max_length=400)] = None,
    order: Annotated[str, Query(pattern="^(time|time-desc)$")] = "time",
) -> dict[str, Any]:
    state = _state(request)
    return list_events(
        state,
        magnitude_type=_mtype(state, type),
        start=start,
        end=end,
        min_magnitude=min_magnitude,
        max_magnitude=max_magnitude,
        limit=min(limit or state.cfg.service.page_size, 10_000),
        cursor=cursor,
        newest_first=order == "time-desc",
    )


@router.get(
    "/events/{event_id:path}",
    dependencies=READ,
    summary="One event explained (as 'magfuse event --json') with its recorded magnitude.",
)
def event(
    request: Request, event_id: EventIdPath, type: TypeQuery = None, recompute: bool = False
) -> dict[str, Any]:
    """The recorded network magnitude; ``recompute=true`` adds the active model's value now."""
    state = _state(request)
    return state.event(event_id, _mtype(state, type) if type else None, recompute=recompute)


# -- models ------------------------------------------------------------------------------------
@router.get("/stations", dependencies=READ, summary="Station table of the active model.")
def stations(request: Request, type: TypeQuery = None) -> dict[str, Any]:
    state = _state(request)
    mtype = _mtype(state, type)
    version = state.registry.active(mtype)
    table = state.registry.load_table(version, "stations")
    return {
        "magnitude_type": mtype,
        "model_version": version.version_id,
        "stations": to_jsonable(_iso_frame(table).to_dict(orient="records")),
        "advisory": ADVISORY,
    }


def _iso_frame(frame: pd.DataFrame) -> pd.DataFrame:
    out = frame.copy()
    for col in out.columns:
        if pd.api.types.is_datetime64_any_dtype(out[col]):
            out[col] = out[col].map(lambda v: None if pd.isna(v) else v.isoformat())
    return out


def _version_dict(v: Any, active: str | None) -> dict[str, Any]:
    return {
        "version_id": v.version_id,
        "magnitude_type": v.magnitude_type,
        "created": v.created,
        "active": v.version_id == active,
        "meta": v.meta,
    }


@router.get("/models", dependencies=READ, summary="Model versions, oldest first.")
def models(request: Request, type: TypeQuery = None) -> dict[str, Any]:
    state = _state(request)
    mtype = _mtype(state, type)
    active = state.registry.active_id(mtype)
    return {
        "magnitude_type": mtype,
        "active": active,
        "versions": [_version_dict(v, active) for v in state.registry.versions(mtype)],
        "advisory": ADVISORY,
    }


@router.get(
    "/models/{version_id}/dry-run",
    dependencies=READ,
    summary="What adopting this version would change on the recent events (writes nothing).",
)
def model_dry_run(request: Request, version_id: VersionPath) -> dict[str, Any]:
    from fusion.workflows.dry_run import dry_run

    state = _state(request)
    version = state.registry.get(version_id)
    report = dry_run(
        state.store,
        state.registry,
        state.cfg,
        magnitude_type=version.magnitude_type,
        candidate=version_id,
    )
    out = report.to_dict()
    out["advisory"] = ADVISORY
    return out


@router.get("/active-models/{type}", dependencies=READ, summary="The active model of a type.")
def active_model(request: Request, type: Annotated[str, Path(max_length=16)]) -> dict[str, Any]:
    state = _state(request)
    mtype = _mtype(state, type)
    version = state.registry.active(mtype)
    return _version_dict(version, version.version_id)


@router.put(
    "/active-models/{type}",
    dependencies=ADMIN,
    summary="Adopt a version: make it the active model of its type.",
)
def adopt(
    request: Request,
    type: Annotated[str, Path(max_length=16)],
    body: Annotated[
        dict[str, str], Body(examples=[{"version_id": "ML-20250101T000000Z-0a1b2c3d"}])
    ],
) -> dict[str, Any]:
    state = _state(request)
    mtype = _mtype(state, type)
    version_id = str(body.get("version_id", ""))
    if not version_id:
        raise ConfigError('body needs "version_id": the version to adopt')
    version = state.registry.get(version_id)
    if version.magnitude_type != mtype:
        raise ConfigError(
            f"model {version_id} is for {version.magnitude_type}, not {mtype}; "
            f"PUT it to /v1/active-models/{version.magnitude_type}"
        )
    previous = state.registry.active_id(mtype)
    state.registry.adopt(version_id)
    return {"magnitude_type": mtype, "active": version_id, "previous": previous}


@router.post(
    "/active-models/{type}/rollback",
    dependencies=ADMIN,
    summary="Re-activate the version that was active before the current one.",
)
def rollback(request: Request, type: Annotated[str, Path(max_length=16)]) -> dict[str, Any]:
    state = _state(request)
    mtype = _mtype(state, type)
    previous = state.registry.active_id(mtype)
    version = state.registry.rollback(mtype)
    return {"magnitude_type": mtype, "active": version.version_id, "previous": previous}


# -- event stream ------------------------------------------------------------------------------
@router.get(
    "/updates",
    dependencies=READ,
    summary="Server-sent events: one 'fused' message per event fused by this service.",
    response_class=StreamingResponse,
)
async def updates(request: Request) -> StreamingResponse:
    state = _state(request)
    heartbeat = state.cfg.service.stream_heartbeat_s
    last_id = request.headers.get("last-event-id", "")
    start = int(last_id) if last_id.isdigit() else state.hub.last

    async def stream() -> Any:
        seq = start
        quiet = 0.0
        yield b"retry: 2000\n\n"
        while not await request.is_disconnected():
            items = state.hub.since(seq)
            for s, item in items:
                yield f"id: {s}\nevent: fused\ndata: {dumps(item)}\n\n".encode()
                seq = s
            if items:
                quiet = 0.0
            elif quiet >= heartbeat:
                yield b": keep-alive\n\n"
                quiet = 0.0
            await asyncio.sleep(0.2)
            quiet += 0.2

    return StreamingResponse(
        stream(),
        media_type="text/event-stream",
        headers={"Cache-Control": "no-cache", "X-Accel-Buffering": "no"},
    )
