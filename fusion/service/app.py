"""The magfuse service: one ASGI app over one store (``magfuse serve`` runs it with uvicorn).

Stack: FastAPI on Starlette, served by uvicorn, pages by Jinja2. FastAPI gives typed parameter
checking and the OpenAPI document from the same declarations; Starlette is a small, widely used
ASGI toolkit; uvicorn is its reference server with clean SIGTERM handling.

Resources (JSON, strict; errors ``{"error": {"code", "message"}}``)::

    GET  /v1/health, /v1/ready                      supervisor probes
    POST /v1/submissions                            station magnitudes in (submit scope)
    GET  /v1/events[?type&start&end&min_magnitude&max_magnitude&limit&cursor&order]
    GET  /v1/events/{event_id}[?type]               one event explained
    GET  /v1/stations[?type]                        station table of the active model
    GET  /v1/models[?type], /v1/models/{id}/dry-run model versions, dry run of one
    GET  /v1/active-models/{type}                   the active model
    PUT  /v1/active-models/{type}                   adopt ({"version_id": ...}; admin scope)
    POST /v1/active-models/{type}/rollback          roll back (admin scope)
    GET  /v1/updates                                server-sent events of fused events
    GET  /v1/openapi.json                           this API's OpenAPI document
    GET  /fdsnws/event/1/query|version|application.wadl   FDSN event web service
    GET  /, /events/{id}, /stations, /models        analyst pages (HTML)
    GET  /static/magfuse.css                        the pages' style sheet
"""

from __future__ import annotations

import logging
import time
from pathlib import Path
from typing import TYPE_CHECKING, Any

from fastapi import FastAPI, Request
from fastapi.exceptions import RequestValidationError
from starlette.exceptions import HTTPException as StarletteHTTPException

from fusion.advisory import ADVISORY
from fusion.service.access import AccessDenied, BodyLimit
from fusion.service.responses import StrictJSONResponse, error_response, status_of
from fusion.service.state import ServiceState
from stations.errors import MagfuseError

if TYPE_CHECKING:
    from fusion.settings import MagfuseConfig
    from stations.store import StationMagnitudeStore

__all__ = ["create_app"]

log = logging.getLogger("magfuse.service")


class RequestLog:
    """ASGI middleware: one log line per request (method, path, status, milliseconds)."""

    def __init__(self, app: Any) -> None:
        self.app = app

    async def __call__(self, scope: Any, receive: Any, send: Any) -> None:
        if scope["type"] != "http":
            await self.app(scope, receive, send)
            return
        t0 = time.perf_counter()
        status = [0]

        async def send_status(message: Any) -> None:
            if message["type"] == "http.response.start":
                status[0] = message["status"]
                client = scope.get("client") or ("-", 0)
                log.info(
                    '%s "%s %s" %d %.1f ms',
                    client[0],
                    scope["method"],
                    scope["path"],
                    status[0],
                    1000 * (time.perf_counter() - t0),
                )
            await send(message)

        await self.app(scope, receive, send_status)


def _one_line(text: str) -> str:
    return " ".join(str(text).split())[:500]


def _install_error_handlers(app: FastAPI) -> None:
    @app.exception_handler(MagfuseError)
    async def magfuse_error(_request: Request, exc: MagfuseError) -> StrictJSONResponse:
        code, status = status_of(exc)
        return error_response(code, _one_line(str(exc)), status)

    @app.exception_handler(AccessDenied)
    async def denied(_request: Request, exc: AccessDenied) -> StrictJSONResponse:
        headers = {"WWW-Authenticate": "Bearer"} if exc.status == 401 else None
        return error_response(exc.code, exc.message, exc.status, headers)

    @app.exception_handler(RequestValidationError)
    async def invalid(_request: Request, exc: RequestValidationError) -> StrictJSONResponse:
        err = exc.errors()[0] if exc.errors() else {"loc": (), "msg": "invalid request"}
        where = ".".join(str(p) for p in err.get("loc", ()))
        return error_response(
            "invalid_parameter",
            _one_line(f"{where}: {err.get('msg', 'invalid')}; see /v1/openapi.json"),
            422,
        )

    @app.exception_handler(StarletteHTTPException)
    async def http_error(_request: Request, exc: StarletteHTTPException) -> StrictJSONResponse:
        code = {404: "not_found", 405: "method_not_allowed"}.get(exc.status_code, "http_error")
        message = "no such resource; see /v1/openapi.json" if exc.status_code == 404 else exc.detail
        headers = dict(exc.headers) if exc.headers else None
        return error_response(code, _one_line(str(message)), exc.status_code, headers)


def create_app(store: StationMagnitudeStore | Path, config: MagfuseConfig | None = None) -> FastAPI:
    """The service's ASGI app over ``store`` (a store or its folder, which must exist).

    Parameters
    ----------
    store : StationMagnitudeStore or Path
    config : MagfuseConfig, optional
        Default: the shipped defaults.
    """
    from fusion.settings import MagfuseConfig
    from stations.store import StationMagnitudeStore

    cfg = config if config is not None else MagfuseConfig()
    if not isinstance(store, StationMagnitudeStore):
        store = StationMagnitudeStore.open(
            Path(store), create=False, lock_timeout_s=cfg.store.lock_timeout_s
        )
    app = FastAPI(
        title="magfuse",
        version="1",
        description=f"Network magnitudes fused from station magnitudes.\n\n{ADVISORY}",
        openapi_url="/v1/openapi.json",
        docs_url=None,  # the bundled API browser loads scripts from outside the app
        redoc_url=None,
        default_response_class=StrictJSONResponse,
    )
    app.state.magfuse = ServiceState(store, cfg)
    _install_error_handlers(app)

    from fusion.service import api, fdsn, pages

    app.include_router(api.router)
    app.include_router(fdsn.router)
    app.include_router(pages.router)
    from starlette.staticfiles import StaticFiles

    app.mount("/static", StaticFiles(packages=[("fusion.service", "static")]), name="static")
    app.add_middleware(BodyLimit, max_bytes=cfg.service.max_body_bytes)
    app.add_middleware(RequestLog)
    return app
