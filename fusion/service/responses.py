"""Strict JSON responses and the one table that maps magfuse errors to HTTP.

Every JSON body the service sends goes through :func:`stations.strict_json.dumps` (no NaN or
Infinity; missing values are ``null``). An expected failure (:class:`stations.errors.MagfuseError`)
becomes ``{"error": {"code": ..., "message": ...}}`` whose message is the same one line the
command line prints after ``Error:``.
"""

from __future__ import annotations

from typing import Any

from starlette.responses import JSONResponse

from stations import errors as E
from stations.strict_json import dumps

__all__ = ["ERROR_TABLE", "StrictJSONResponse", "error_body", "error_response", "status_of"]


class StrictJSONResponse(JSONResponse):
    """A JSON response rendered with magfuse's strict JSON writer."""

    def render(self, content: Any) -> bytes:
        return dumps(content, ensure_ascii=False, separators=(",", ":")).encode("utf-8")


#: MagfuseError subclass -> (stable code, HTTP status); the first matching row wins, so
#: subclasses come before their bases.
ERROR_TABLE: tuple[tuple[type[E.MagfuseError], str, int], ...] = (
    (E.EventNotFoundError, "event_not_found", 404),
    (E.StationNotFoundError, "station_not_found", 404),
    (E.ModelNotFoundError, "model_not_found", 404),
    (E.StoreBusyError, "store_busy", 503),
    (E.StoreCorruptError, "store_corrupt", 500),
    (E.UnknownFormatError, "unknown_format", 415),
    (E.MalformedFileError, "malformed_body", 422),
    (E.SchemaError, "schema_error", 422),
    (E.UnitError, "unit_error", 422),
    (E.DomainError, "outside_domain", 422),
    (E.InsufficientDataError, "insufficient_data", 409),
    (E.NotFittedError, "not_fitted", 409),
    (E.ConfigError, "bad_request", 400),
    (E.MagfuseError, "magfuse_error", 400),
)


def status_of(exc: E.MagfuseError) -> tuple[str, int]:
    """The stable code and HTTP status of an expected failure."""
    for cls, code, status in ERROR_TABLE:
        if isinstance(exc, cls):
            return code, status
    return "magfuse_error", 400  # pragma: no cover - MagfuseError row matches everything


def error_body(code: str, message: str) -> dict[str, Any]:
    """The JSON error document."""
    return {"error": {"code": code, "message": message}}


def error_response(
    code: str, message: str, status: int, headers: dict[str, str] | None = None
) -> StrictJSONResponse:
    """A strict-JSON error response."""
    return StrictJSONResponse(error_body(code, message), status_code=status, headers=headers)
