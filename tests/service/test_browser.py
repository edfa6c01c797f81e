"""The analyst pages in a real headless Chromium (Playwright driving the system's chromium).

``.ci/run`` installs Debian's ``chromium`` when it is missing, so in CI these tests run; on a
machine without it they skip with the reason.
"""

from __future__ import annotations

import shutil
from collections.abc import Iterator
from dataclasses import replace
from pathlib import Path
from typing import Any
from urllib.parse import urlsplit

import httpx
import pytest

from fusion.service.tokens import TokenBook
from tests.service.conftest import Server, ServiceStore, csv_bytes, start_server

CHROMIUM = shutil.which("chromium") or shutil.which("chromium-browser")

pytestmark = [
    pytest.mark.browser,
    pytest.mark.slow,
    pytest.mark.skipif(CHROMIUM is None, reason="no chromium installed (apt-get install chromium)"),
]


@pytest.fixture(scope="module")
def shared_store(
    service_store: ServiceStore, tmp_path_factory: pytest.TempPathFactory
) -> ServiceStore:
    """One copy of the learned store for this module's server (starting one costs seconds)."""
    root = tmp_path_factory.mktemp("browser") / "store"
    shutil.copytree(service_store.root, root)
    return replace(service_store, root=root)


@pytest.fixture(scope="module")
def server(shared_store: ServiceStore) -> Iterator[Server]:
    srv = start_server(shared_store.root, shared_store.config, shared_store.root.parent / "log")
    try:
        yield srv
    finally:
        srv.stop()


@pytest.fixture(scope="module")
def browser() -> Iterator[Any]:
    from playwright.sync_api import sync_playwright

    with sync_playwright() as p:
        b = p.chromium.launch(executable_path=CHROMIUM, args=["--no-sandbox"])
        try:
            yield b
        finally:
            b.close()


@pytest.fixture
def browser_page(browser: Any) -> Iterator[tuple[Any, list[str], list[str]]]:
    """A page, the console errors it logs and every URL it requests."""
    errors: list[str] = []
    requests: list[str] = []
    context = browser.new_context(viewport={"width": 1280, "height": 900})
    page = context.new_page()
    page.on("console", lambda m: errors.append(m.text) if m.type == "error" else None)
    page.on("pageerror", lambda e: errors.append(str(e)))
    page.on("request", lambda r: requests.append(r.url))
    try:
        yield page, errors, requests
    finally:
        context.close()


def _only_app(requests: list[str], base: str) -> list[str]:
    own = urlsplit(base).netloc
    return [
        u for u in requests if urlsplit(u).scheme not in ("data",) and urlsplit(u).netloc != own
    ]


def test_event_page_shows_the_fused_value_and_station_rows(
    server: Server, browser_page: tuple[Any, list[str], list[str]]
) -> None:
    page, errors, requests = browser_page
    with httpx.Client(base_url=server.url) as c:
        event_id = c.get("/v1/events", params={"limit": 1}).json()["events"][0]["event_id"]
        ev = c.get(f"/v1/events/{event_id}").json()
    page.goto(f"{server.url}/events/{event_id}")
    assert page.inner_text("#fused") == f"{ev['magnitude']:.2f}"
    assert page.locator("#stations tbody tr").count() == len(ev["contributions"])
    page.wait_for_function("document.querySelector('img').complete")
    assert page.evaluate("document.querySelector('img').naturalWidth") > 0
    assert errors == []
    assert _only_app(requests, server.url) == []


def test_live_list_gains_a_row_after_a_submission(
    server: Server, shared_store: ServiceStore, browser_page: tuple[Any, list[str], list[str]]
) -> None:
    page, errors, requests = browser_page
    page.goto(server.url + "/")
    page.wait_for_function("document.getElementById('live-status').textContent === 'Live.'")
    rows_before = page.locator("#events tbody tr").count()
    rows = shared_store.held_event(0)
    event_id = str(rows["event_id"].iloc[0])
    token = TokenBook(Path(shared_store.root)).add("feed", "submit")
    res = httpx.post(
        server.url + "/v1/submissions",
        content=csv_bytes(rows),
        headers={"Authorization": f"Bearer {token}"},
        timeout=60,
    )
    assert res.status_code == 201
    row = page.locator(f'#events tbody tr[data-event="{event_id}"]')
    row.wait_for(timeout=10_000)
    assert page.locator("#events tbody tr").count() == rows_before + 1
    assert row.locator("a").inner_text() == event_id
    assert errors == []
    assert _only_app(requests, server.url) == []


def test_every_page_renders_without_console_errors(
    server: Server, browser_page: tuple[Any, list[str], list[str]]
) -> None:
    page, errors, requests = browser_page
    for path in ("/", "/stations", "/models"):
        page.goto(server.url + path)
        assert "Advisory" in page.inner_text(".advisory")
    assert errors == []
    assert _only_app(requests, server.url) == []
