"""Analyst pages rendered on the server: advisory, escaping, content, no outside resources."""

from __future__ import annotations

import re
from urllib.parse import quote

import pytest

from fusion.advisory import ADVISORY
from fusion.service.tokens import TokenBook
from tests.service.conftest import ServiceStore, csv_bytes, make_client

pytestmark = pytest.mark.filterwarnings("ignore::DeprecationWarning")

EVIL = '<script>alert("x")</script>&<img src=x onerror=alert(1)>'


def _outside_refs(html: str) -> list[str]:
    """src/href values that point outside the app (scheme or protocol-relative URL)."""
    refs = re.findall(r'(?:src|href)\s*=\s*"([^"]*)"', html)
    return [
        r
        for r in refs
        if re.match(r"^(?:[a-z][a-z0-9+.-]*:|//)", r, re.I) and not r.startswith("data:")
    ]


def test_every_page_carries_the_advisory_and_loads_nothing_from_outside(
    service_store: ServiceStore,
) -> None:
    client = make_client(service_store, loopback=True)
    event_id = client.get("/v1/events", params={"limit": 1}).json()["events"][0]["event_id"]
    for path in ("/", f"/events/{quote(event_id, safe='')}", "/stations", "/models"):
        res = client.get(path)
        assert res.status_code == 200, path
        assert ADVISORY in res.text, path
        assert _outside_refs(res.text) == [], path
        assert "default-src 'self'" in res.headers["content-security-policy"]


def test_event_page_shows_the_fused_value_and_every_station(service_store: ServiceStore) -> None:
    client = make_client(service_store, loopback=True)
    event_id = client.get("/v1/events", params={"limit": 1}).json()["events"][0]["event_id"]
    ev = client.get(f"/v1/events/{event_id}").json()
    html = client.get(f"/events/{event_id}").text
    assert f'<td id="fused">{ev["magnitude"]:.2f}</td>' in html
    for c in ev["contributions"]:
        assert f'<td class="text">{c["station_id"]}</td>' in html


def test_ids_with_html_come_back_escaped_in_every_page(store_copy: ServiceStore) -> None:
    client = make_client(store_copy, loopback=True)
    rows = store_copy.held_event(0).copy()
    rows["event_id"] = EVIL
    token = TokenBook(store_copy.root).add("s", "submit")
    res = client.post(
        "/v1/submissions", content=csv_bytes(rows), headers={"Authorization": f"Bearer {token}"}
    )
    assert res.status_code == 201 and res.json()["events"] == [EVIL]
    pages = {
        "/": client.get("/").text,
        "event": client.get("/events/" + quote(EVIL, safe="")).text,
        "missing": client.get("/events/" + quote(EVIL + "nope", safe="")).text,
    }
    for name, html in pages.items():
        assert EVIL not in html, name
        assert "<img src=x" not in html and 'alert("x")</script>' not in html, name
    assert "&lt;script&gt;alert(&#34;x&#34;)&lt;/script&gt;&amp;&lt;img" in pages["event"]
    assert "&lt;script&gt;" in pages["/"]


def test_event_figure_is_a_png(service_store: ServiceStore) -> None:
    client = make_client(service_store, loopback=True)
    event_id = client.get("/v1/events", params={"limit": 1}).json()["events"][0]["event_id"]
    res = client.get(f"/events/{event_id}/figure.png")
    assert res.status_code == 200 and res.content[:8] == b"\x89PNG\r\n\x1a\n"


def test_models_page_shows_the_dry_run_of_the_newest_candidate(
    service_store: ServiceStore,
) -> None:
    html = make_client(service_store, loopback=True).get("/models").text
    assert service_store.v1 in html and service_store.v2 in html
    assert "dry run (ML): nothing is written" in html
    assert f"after   {service_store.v2}" in html


def test_pages_need_a_read_token_off_loopback(service_store: ServiceStore) -> None:
    assert make_client(service_store).get("/").status_code == 401


def test_station_report_of_the_active_model_is_served(service_store: ServiceStore) -> None:
    res = make_client(service_store, loopback=True).get("/stations/report")
    assert res.status_code == 200
    assert ADVISORY in res.text and service_store.v1 in res.text
    assert _outside_refs(res.text) == []
