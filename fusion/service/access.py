"""Who may do what: bearer tokens with scopes, anonymous reading on loopback, body size limit.

Reading needs a ``read`` token unless ``[service] anonymous_read_on_loopback`` is on and the
client connects from the loopback address; submitting needs ``submit``; adopting and rolling
back need ``admin`` (:mod:`fusion.service.tokens`). A refused request changes nothing: the check
runs before the endpoint.

:class:`BodyLimit` refuses a request body above ``[service] max_body_bytes`` with 413 before it is
read: at once when ``Content-Length`` says so, and while streaming (chunked bodies) as soon as the
count passes the limit.
"""

from __future__ import annotations

from collections.abc import Callable
from typing import Any

from fastapi import Request

from fusion.service.responses import error_body
from fusion.service.tokens import scope_allows
from stations.strict_json import dumps

__all__ = ["LOOPBACK", "AccessDenied", "BodyLimit", "require"]

#: Client addresses counted as this machine.
LOOPBACK = frozenset({"127.0.0.1", "::1", "::ffff:127.0.0.1"})


class AccessDenied(Exception):
    """A request without the needed token (401) or scope (403)."""

    def __init__(self, status: int, code: str, message: str) -> None:
        super().__init__(message)
        self.status, self.code, self.message = status, code, message


def _bearer(request: Request) -> str | None:
    header = request.headers.get("authorization", "")
    scheme, _, token = header.partition(" ")
    return token.strip() if scheme.lower() == "bearer" and token.strip() else None


def require(scope: str) -> Callable[[Request], None]:
    """A FastAPI dependency that refuses requests lacking ``scope``."""

    def check(request: Request) -> None:
        state = request.app.state.magfuse
        token = _bearer(request)
        if token is None:
            client = request.client.host if request.client else ""
            if (
                scope == "read"
                and state.cfg.service.anonymous_read_on_loopback
                and client in LOOPBACK
            ):
                return
            raise AccessDenied(
                401,
                "token_required",
                f"this request needs a token with scope {scope!r}; send 'Authorization: Bearer "
                "TOKEN' (create one with 'magfuse token add NAME --scope " + scope + "')",
            )
        info = state.tokens.verify(token)
        if info is None:
            raise AccessDenied(
                401,
                "token_invalid",
                "the token is unknown or revoked; ask an operator for a valid one "
                "('magfuse token list')",
            )
        if not scope_allows(info.scope, scope):
            raise AccessDenied(
                403,
                "scope_insufficient",
                f"token {info.name!r} has scope {info.scope!r}, this request needs {scope!r}; "
                "use a token with that scope",
            )

    return check


class BodyLimit:
    """ASGI middleware: 413 for bodies above ``max_bytes`` (see module docstring)."""

    def __init__(self, app: Any, max_bytes: int) -> None:
        self.app = app
        self.max_bytes = max_bytes

    async def _refuse(self, send: Any) -> None:
        body = dumps(
            error_body(
                "body_too_large",
                f"request body is larger than {self.max_bytes} bytes; split the submission or "
                "raise [service] max_body_bytes",
            )
        ).encode()
        await send(
            {
                "type": "http.response.start",
                "status": 413,
                "headers": [
                    (b"content-type", b"application/json"),
                    (b"content-length", str(len(body)).encode()),
                    (b"connection", b"close"),
                ],
            }
        )
        await send({"type": "http.response.body", "body": body})

    async def __call__(self, scope: Any, receive: Any, send: Any) -> None:
        if scope["type"] != "http":
            await self.app(scope, receive, send)
            return
        for name, value in scope.get("headers", []):
            if name == b"content-length":
                try:
                    too_big = int(value) > self.max_bytes
                except ValueError:
                    too_big = False
                if too_big:
                    await self._refuse(send)
                    return
        if scope.get("method") not in ("POST", "PUT", "PATCH"):
            await self.app(scope, receive, send)
            return
        # Read the body here, counting, so a too-large one never reaches an endpoint.
        chunks: list[bytes] = []
        seen = 0
        while True:
            message = await receive()
            if message["type"] != "http.request":
                return  # client went away
            chunk = message.get("body", b"")
            seen += len(chunk)
            if seen > self.max_bytes:
                await self._refuse(send)
                return
            chunks.append(chunk)
            if not message.get("more_body", False):
                break
        replayed = False

        async def replay() -> Any:
            nonlocal replayed
            if not replayed:
                replayed = True
                return {"type": "http.request", "body": b"".join(chunks), "more_body": False}
            return await receive()

        await self.app(scope, replay, send)
