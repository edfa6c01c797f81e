"""A real ``magfuse serve`` process on 127.0.0.1: requests, SIGTERM, kill -9, concurrency."""

from __future__ import annotations

import os
import signal
import threading
import time
from pathlib import Path

import httpx
import numpy as np
import pandas as pd
import pytest

from fusion.service.tokens import TokenBook
from stations.schema import RECORD_KEY
from stations.store import StationMagnitudeStore
from tests.service.conftest import Server, ServiceStore, csv_bytes, start_server

pytestmark = pytest.mark.slow


def _submit_token(store: ServiceStore) -> dict[str, str]:
    return {
        "Authorization": f"Bearer {TokenBook(store.root).add('feed', 'submit')}",
        "Content-Type": "text/csv",
    }


def _bodies(rows: pd.DataFrame, n: int) -> list[bytes]:
    """``rows`` dealt round-robin into ``n`` distinct CSV bodies."""
    idx = np.arange(len(rows))
    return [csv_bytes(rows.iloc[idx[idx % n == k]]) for k in range(n)]


def _current_rows(root: Path) -> pd.DataFrame:
    return StationMagnitudeStore.open(root, create=False).scan(magnitude_type="ML")


def test_served_submission_is_readable_at_once_and_logged(
    store_copy: ServiceStore, server: Server
) -> None:
    rows = store_copy.held_event(0)
    event_id = str(rows["event_id"].iloc[0])
    with httpx.Client(base_url=server.url, timeout=30) as c:
        assert c.get(f"/v1/events/{event_id}").status_code == 404
        res = c.post("/v1/submissions", content=csv_bytes(rows), headers=_submit_token(store_copy))
        assert res.status_code == 201, res.text
        ev = c.get(f"/v1/events/{event_id}")
        assert ev.status_code == 200 and ev.json()["recorded"]["evaluation_status"] == "preliminary"
    server.stop()
    assert server.proc.returncode == 0  # SIGTERM: clean exit
    log = server.log.read_text()
    assert f'"GET /v1/events/{event_id}" 404' in log
    assert '"POST /v1/submissions" 201' in log
    assert f'"GET /v1/events/{event_id}" 200' in log


def test_twenty_concurrent_clients_store_every_row_once(
    store_copy: ServiceStore, server: Server
) -> None:
    rows = store_copy.held_back
    bodies = _bodies(rows, 20)
    headers = _submit_token(store_copy)
    results: list[int] = []
    lock = threading.Lock()

    def client(body: bytes, times: int) -> None:
        with httpx.Client(base_url=server.url, timeout=120) as c:
            # the second send of a body is a duplicate submission
            for _ in range(times):
                r = c.post("/v1/submissions", content=body, headers=headers)
                with lock:
                    results.append(r.status_code)

    threads = [
        threading.Thread(target=client, args=(b, 2 if k < 4 else 1)) for k, b in enumerate(bodies)
    ]
    for t in threads:
        t.start()
    for t in threads:
        t.join()
    assert sorted(results) == [200] * 4 + [201] * 20
    stored = _current_rows(store_copy.root)
    held_ids = set(rows["event_id"])
    mine = stored[stored["event_id"].isin(held_ids)]
    assert len(mine) == len(rows)
    assert not mine.duplicated(list(RECORD_KEY)).any()


def test_kill_9_during_submissions_loses_no_acknowledged_batch_and_doubles_none(
    store_copy: ServiceStore, tmp_path: Path
) -> None:
    rows = store_copy.held_back
    bodies = _bodies(rows, 12)
    headers = _submit_token(store_copy)
    log = tmp_path / "server.log"
    srv = start_server(store_copy.root, store_copy.config, log)
    acked: list[str] = []
    sent: list[int] = []

    def feed() -> None:
        with httpx.Client(base_url=srv.url, timeout=30) as c:
            for k, body in enumerate(bodies):
                try:
                    r = c.post("/v1/submissions", content=body, headers=headers)
                except httpx.HTTPError:
                    return
                sent.append(k)
                if r.status_code in (200, 201):
                    acked.append(r.json()["batch_id"])

    t = threading.Thread(target=feed)
    t.start()
    deadline = time.monotonic() + 60
    while len(acked) < 3 and time.monotonic() < deadline:
        time.sleep(0.02)
    os.kill(srv.proc.pid, signal.SIGKILL)
    srv.proc.wait()
    t.join()
    assert 3 <= len(acked) < len(bodies)
    # restart; every acknowledged batch is there, and resubmitting everything adds each row once
    srv = start_server(store_copy.root, store_copy.config, log)
    try:
        batches = {
            b.batch_id for b in StationMagnitudeStore.open(store_copy.root).manifest().batches
        }
        assert set(acked) <= batches
        with httpx.Client(base_url=srv.url, timeout=60) as c:
            for body in bodies:
                assert c.post("/v1/submissions", content=body, headers=headers).status_code in (
                    200,
                    201,
                )
    finally:
        srv.stop()
    stored = _current_rows(store_copy.root)
    mine = stored[stored["event_id"].isin(set(rows["event_id"]))]
    assert len(mine) == len(rows)
    assert not mine.duplicated(list(RECORD_KEY)).any()
