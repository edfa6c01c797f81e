"""magfuse as an always-on service: JSON API, FDSN event query, analyst pages, access tokens.

:func:`create_app` builds the ASGI app over one store (:mod:`fusion.service.app`);
``magfuse serve`` runs it with uvicorn (:mod:`fusion.service.server`).
"""

from __future__ import annotations

from fusion.service.app import create_app

__all__ = ["create_app"]
