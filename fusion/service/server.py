"""Run the service with uvicorn (``magfuse serve``).

One log line per request comes from :class:`fusion.service.app.RequestLog` (uvicorn's own access log
is off so lines are not doubled). uvicorn stops accepting connections on SIGTERM or SIGINT, lets
running requests finish (at most ``graceful_s`` seconds; event streams are closed) and the process
exits with status 0. With ``workers > 1`` uvicorn starts that many processes, each building the app
from the store and configuration passed in environment variables.

With several workers, each keeps its own cache of event explanations (emptied whenever another
process commits) and its own stream of updates: a client of ``/v1/updates`` sees the events fused
by submissions its worker received. Use one worker for a duty screen that must see every update.
"""

from __future__ import annotations

import logging
import os
import signal
import sys
from pathlib import Path
from typing import Any

from fastapi import FastAPI

from fusion.advisory import ADVISORY

__all__ = ["app_from_env", "serve"]

_STORE_ENV = "MAGFUSE_SERVICE_STORE"
_CONFIG_ENV = "MAGFUSE_SERVICE_CONFIG"


def _configure_logging() -> None:
    logging.basicConfig(
        level=logging.INFO, format="%(asctime)s %(name)s %(message)s", stream=sys.stderr
    )


def app_from_env() -> FastAPI:
    """App factory for worker processes: store and configuration from the environment."""
    from fusion.service.app import create_app
    from fusion.settings import load_config

    _configure_logging()  # worker processes start fresh
    config = os.environ.get(_CONFIG_ENV) or None
    return create_app(Path(os.environ[_STORE_ENV]), load_config(Path(config) if config else None))


def serve(
    store: Path,
    config: Path | None,
    *,
    host: str,
    port: int,
    workers: int = 1,
    graceful_s: float = 5.0,
) -> None:
    """Serve ``store`` until SIGTERM/SIGINT (blocks).

    Raises
    ------
    StoreCorruptError
        If ``store`` holds no store (checked before the port is opened).
    """
    import uvicorn

    from fusion.service.app import create_app
    from fusion.settings import load_config

    _configure_logging()
    log = logging.getLogger("magfuse.service")
    app = create_app(store, load_config(config))  # fails early, with a one-line error
    log.info("serving %s on http://%s:%d (%d worker(s)); %s", store, host, port, workers, ADVISORY)
    common: dict[str, Any] = {
        "host": host,
        "port": port,
        "access_log": False,
        "log_level": "info",
        "timeout_graceful_shutdown": graceful_s,
    }
    # uvicorn re-raises a captured SIGTERM after its shutdown; with a handler that only logs, the
    # process then leaves by returning, with status 0, which supervisors read as a clean stop.
    for sig in (signal.SIGTERM, signal.SIGINT):
        signal.signal(sig, lambda signum, _frame: log.info("stopped by signal %d", signum))
    if workers > 1:
        os.environ[_STORE_ENV] = str(Path(store).resolve())
        os.environ[_CONFIG_ENV] = str(Path(config).resolve()) if config else ""
        uvicorn.run("fusion.service.server:app_from_env", factory=True, workers=workers, **common)
    else:
        uvicorn.run(app, **common)
