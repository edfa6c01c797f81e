"""Fixtures of the service tests: one learned demo store per session, copied per test.

The store holds the first quarter of the invented demo year (``sample_events/``) except the
events of its last week, which the tests submit through the API; two models are learned, the first
adopted and the store fused, exactly as the command-line tests build theirs.
"""

from __future__ import annotations

import os
import shutil
import socket
import subprocess
import sys
import time
from collections.abc import Iterator
from dataclasses import dataclass
from pathlib import Path

import httpx
import pandas as pd
import pytest
from fastapi.testclient import TestClient

from fusion.service import create_app
from fusion.settings import load_config
from tests.cli.conftest import (
    demo_frame,
    demo_slice,
    invoke,
    origin_times,
    version_of,
    write_config,
)

#: Events with origin in the last week of March 2025 (UTC) are left out of the store and
#: submitted by tests.
HELD_BACK_FROM = "2025-03-25"
HELD_BACK_TO = "2025-04-01"
REPO = Path(__file__).resolve().parents[2]


@dataclass(frozen=True)
class ServiceStore:
    """A learned store and the demo rows held back from it."""

    root: Path
    config: Path
    v1: str
    v2: str
    held_back: pd.DataFrame  # demo rows (text columns) of the held-back day

    def held_event(self, n: int = 0) -> pd.DataFrame:
        """The rows of the n-th held-back event."""
        ids = sorted(self.held_back["event_id"].unique())
        return self.held_back[self.held_back["event_id"] == ids[n]]


@pytest.fixture(scope="session")
def service_store(tmp_path_factory: pytest.TempPathFactory) -> ServiceStore:
    base = tmp_path_factory.mktemp("service")
    frame = demo_frame()
    t = origin_times(frame)
    t0, t1 = pd.Timestamp(HELD_BACK_FROM, tz="UTC"), pd.Timestamp(HELD_BACK_TO, tz="UTC")
    stored = frame[t < t0]
    held = frame[(t >= t0) & (t < t1)]
    csv = demo_slice(base / "q1.csv", frame=stored)
    config = write_config(base / "fast.toml")
    root = base / "store"
    assert invoke("ingest", csv, "--store", root).exit_code == 0
    v1 = version_of(invoke("learn", "--as-of", "2025-02-15", "--store", root, "--config", config))
    v2 = version_of(invoke("learn", "--store", root, "--config", config))
    assert invoke("adopt", v1, "--store", root, "--config", config).exit_code == 0
    assert invoke("fuse", "--store", root, "--config", config).exit_code == 0
    assert not held.empty
    return ServiceStore(root, config, v1, v2, held.reset_index(drop=True))


@pytest.fixture
def store_copy(service_store: ServiceStore, tmp_path: Path) -> ServiceStore:
    """A private copy of the learned store, for tests that write."""
    dst = tmp_path / "store"
    shutil.copytree(service_store.root, dst)
    return ServiceStore(
        dst, service_store.config, service_store.v1, service_store.v2, service_store.held_back
    )


def make_client(store: ServiceStore, *, loopback: bool = False, toml: str = "") -> TestClient:
    """An in-process client; ``loopback`` makes it look like a client on 127.0.0.1."""
    cfg_path = store.config
    if toml:
        cfg_path = store.root.parent / "extra.toml"
        cfg_path.write_text(store.config.read_text() + toml)
    app = create_app(store.root, load_config(cfg_path))
    client = ("127.0.0.1", 50000) if loopback else ("192.0.2.10", 50000)
    return TestClient(app, client=client)


def csv_bytes(rows: pd.DataFrame) -> bytes:
    """Demo rows (text columns) as magfuse CSV."""
    return rows.to_csv(index=False).encode()


def free_port() -> int:
    with socket.socket() as s:
        s.bind(("127.0.0.1", 0))
        return int(s.getsockname()[1])


@dataclass
class Server:
    """A real ``magfuse serve`` process on 127.0.0.1."""

    proc: subprocess.Popen[bytes]
    url: str
    log: Path

    def stop(self) -> None:
        if self.proc.poll() is None:
            self.proc.terminate()
            try:
                self.proc.wait(timeout=10)
            except subprocess.TimeoutExpired:
                self.proc.kill()
                self.proc.wait()


def start_server(store: Path, config: Path, log: Path, port: int | None = None) -> Server:
    """Start ``magfuse serve`` and wait until /v1/ready answers (at most 30 s)."""
    port = port or free_port()
    env = {**os.environ, "PYTHONPATH": str(REPO)}
    fh = log.open("ab")
    proc = subprocess.Popen(
        [
            sys.executable,
            "-c",
            "from fusion.cli.app import main; main()",
            "serve",
            "--store",
            str(store),
            "--config",
            str(config),
            "--port",
            str(port),
        ],
        stdout=fh,
        stderr=subprocess.STDOUT,
        env=env,
        cwd=REPO,
    )
    url = f"http://127.0.0.1:{port}"
    deadline = time.monotonic() + 30
    while time.monotonic() < deadline:
        if proc.poll() is not None:
            raise AssertionError(f"server exited: {log.read_text()[-2000:]}")
        try:
            if httpx.get(url + "/v1/ready", timeout=1).status_code == 200:
                return Server(proc, url, log)
        except httpx.HTTPError:
            pass
        time.sleep(0.1)
    proc.kill()
    raise AssertionError(f"server did not become ready: {log.read_text()[-2000:]}")


@pytest.fixture
def server(store_copy: ServiceStore, tmp_path: Path) -> Iterator[Server]:
    srv = start_server(store_copy.root, store_copy.config, tmp_path / "server.log")
    try:
        yield srv
    finally:
        srv.stop()
