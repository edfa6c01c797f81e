"""The /v1 JSON API through the in-process ASGI client."""

from __future__ import annotations

import json
import re
from pathlib import Path

import pandas as pd
import pytest

from fusion.advisory import ADVISORY
from fusion.service.tokens import TokenBook
from stations.store import StationMagnitudeStore
from tests.cli.conftest import invoke
from tests.service.conftest import ServiceStore, csv_bytes, make_client

pytestmark = pytest.mark.filterwarnings("ignore::DeprecationWarning")


def _token(store: ServiceStore, scope: str, name: str | None = None) -> dict[str, str]:
    token = TokenBook(store.root).add(name or f"t-{scope}", scope)
    return {"Authorization": f"Bearer {token}"}


def _strict(text: str) -> object:
    """Parse refusing NaN/Infinity (RFC 8259)."""

    def bad(name: str) -> None:
        raise AssertionError(f"non-strict JSON constant {name}")

    return json.loads(text, parse_constant=bad)


def test_submission_commits_one_batch_and_fuses_the_touched_event(store_copy: ServiceStore) -> None:
    client = make_client(store_copy)
    rows = store_copy.held_event(0)
    event_id = str(rows["event_id"].iloc[0])
    headers = {**_token(store_copy, "submit"), "Content-Type": "text/csv"}
    res = client.post("/v1/submissions", content=csv_bytes(rows), headers=headers)
    assert res.status_code == 201, res.text
    body = _strict(res.text)
    assert isinstance(body, dict)
    assert body["accepted"] == len(rows) and body["duplicate"] == 0
    assert body["events"] == [event_id]
    assert body["fusion"]["ML"]["model_version"] == store_copy.v1
    assert body["fusion"]["ML"]["events_written"] == 1
    # committed: the store has the rows, the fused store the event
    st = StationMagnitudeStore.open(store_copy.root, create=False)
    assert len(st.event(event_id)) == len(rows)
    assert body["batch_id"] in [b.batch_id for b in st.manifest().batches]
    read = client.get(f"/v1/events/{event_id}", headers=_token(store_copy, "read"))
    assert read.status_code == 200
    ev = read.json()
    assert ev["recorded"]["evaluation_status"] == "preliminary"
    assert ev["recorded"]["magnitude"] == pytest.approx(ev["magnitude"], abs=1e-9)


def test_same_body_twice_is_a_duplicate_not_a_second_batch(store_copy: ServiceStore) -> None:
    client = make_client(store_copy)
    headers = {**_token(store_copy, "submit"), "Content-Type": "text/csv"}
    body = csv_bytes(store_copy.held_event(1))
    first = client.post("/v1/submissions", content=body, headers=headers)
    n_batches = len(StationMagnitudeStore.open(store_copy.root, create=False).manifest().batches)
    second = client.post("/v1/submissions", content=body, headers=headers)
    assert first.status_code == 201 and second.status_code == 200
    assert second.json()["duplicate_submission"] is True
    assert second.json()["batch_id"] == first.json()["batch_id"]
    st = StationMagnitudeStore.open(store_copy.root, create=False)
    assert len(st.manifest().batches) == n_batches


def test_json_records_submission_equals_csv_content(store_copy: ServiceStore) -> None:
    client = make_client(store_copy)
    rows = store_copy.held_event(2)
    records = []
    for r in rows.to_dict(orient="records"):
        rec = {k: v for k, v in r.items() if v != ""}
        rec["detected"] = r["detected"] == "true"
        rec["clipped"] = r["clipped"] == "true"
        rec["magnitude"] = float(r["magnitude"]) if r["magnitude"] else None
        records.append(rec)
    headers = {**_token(store_copy, "submit"), "Content-Type": "application/json"}
    res = client.post("/v1/submissions", json=records, headers=headers)
    assert res.status_code == 201, res.text
    assert res.json()["accepted"] == len(rows)
    st = StationMagnitudeStore.open(store_copy.root, create=False)
    stored = st.event(str(rows["event_id"].iloc[0]))
    sent = rows.loc[rows["magnitude"] != "", "magnitude"].astype(float)
    assert sorted(stored["magnitude"].dropna().round(3)) == sorted(sent)


def test_rejected_rows_come_back_with_their_reason(store_copy: ServiceStore) -> None:
    client = make_client(store_copy)
    rows = store_copy.held_event(3).copy()
    rows.loc[rows.index[0], "magnitude"] = "42.0"  # outside [ingest] magnitude range
    headers = {**_token(store_copy, "submit"), "Content-Type": "text/csv"}
    res = client.post("/v1/submissions", content=csv_bytes(rows), headers=headers)
    assert res.status_code == 201, res.text
    body = res.json()
    assert body["quarantined"] == 1 and body["accepted"] == len(rows) - 1
    assert len(body["rejected"]) == 1
    assert "magnitude" in body["rejected"][0]["reason"]


def test_malformed_body_is_a_json_error_with_the_cli_wording(store_copy: ServiceStore) -> None:
    client = make_client(store_copy)
    headers = {**_token(store_copy, "submit"), "Content-Type": "application/json"}
    res = client.post("/v1/submissions", content=b"[1, 2", headers=headers)
    assert res.status_code == 422
    err = res.json()["error"]
    assert err["code"] == "malformed_body"
    assert err["message"].startswith("request body: not valid JSON")
    assert "\n" not in err["message"]


def test_event_matches_the_event_command_json(service_store: ServiceStore) -> None:
    client = make_client(service_store, loopback=True)
    fused = client.get("/v1/events", params={"limit": 1}).json()["events"][0]
    event_id = fused["event_id"]
    res = client.get(f"/v1/events/{event_id}")
    assert res.status_code == 200
    cli = invoke(
        "event", event_id, "--json", "--store", service_store.root, "--config", service_store.config
    )
    expected = json.loads(cli.stdout)
    got = res.json()
    for key in (
        "event_id",
        "magnitude",
        "uncertainty",
        "plain_mean",
        "median",
        "method",
        "flags",
        "model_version",
        "advisory",
    ):
        assert got[key] == expected[key], key
    assert [c["station_id"] for c in got["contributions"]] == [
        c["station_id"] for c in expected["contributions"]
    ]


def test_unknown_event_is_404_with_the_cli_message(service_store: ServiceStore) -> None:
    client = make_client(service_store, loopback=True)
    res = client.get("/v1/events/no-such-event")
    assert res.status_code == 404
    cli = invoke("event", "no-such-event", "--store", service_store.root)
    assert res.json()["error"] == {
        "code": "event_not_found",
        "message": cli.stderr.strip().removeprefix("Error: "),
    }


def test_event_list_pages_with_a_cursor_cover_the_window_once(service_store: ServiceStore) -> None:
    client = make_client(service_store, loopback=True)
    params = {"start": "2025-02-01", "end": "2025-03-01", "min_magnitude": 1.0, "limit": 7}
    seen: list[str] = []
    cursor = None
    for _ in range(1000):
        res = client.get("/v1/events", params={**params, **({"cursor": cursor} if cursor else {})})
        assert res.status_code == 200
        page = res.json()
        assert len(page["events"]) <= 7
        seen += [e["event_id"] for e in page["events"]]
        cursor = page["next_cursor"]
        if cursor is None:
            break
    # independent count straight from the fused store's Parquet rows via pandas
    from fusion.versions.fused_store import FusedStore

    cur = FusedStore(service_store.root).current("ML")
    t = pd.to_datetime(cur["origin_time"], utc=True)
    want = cur[
        (t >= pd.Timestamp("2025-02-01", tz="UTC"))
        & (t < pd.Timestamp("2025-03-01", tz="UTC"))
        & (cur["magnitude"] >= 1.0)
    ]
    assert len(seen) == len(set(seen)) == len(want)
    assert set(seen) == set(want["event_id"])


def test_bad_cursor_and_bad_time_are_400(service_store: ServiceStore) -> None:
    client = make_client(service_store, loopback=True)
    assert (
        client.get("/v1/events", params={"cursor": "%%%"}).json()["error"]["code"] == "bad_request"
    )
    res = client.get("/v1/events", params={"start": "yesterday"})
    assert res.status_code == 400 and "ISO 8601" in res.json()["error"]["message"]


def test_models_stations_and_dry_run(service_store: ServiceStore) -> None:
    client = make_client(service_store, loopback=True)
    models = client.get("/v1/models").json()
    assert models["active"] == service_store.v1
    assert {v["version_id"] for v in models["versions"]} == {service_store.v1, service_store.v2}
    stations = client.get("/v1/stations").json()
    assert stations["model_version"] == service_store.v1 and len(stations["stations"]) > 10
    dry = client.get(f"/v1/models/{service_store.v2}/dry-run")
    assert dry.status_code == 200, dry.text
    _strict(dry.text)
    assert dry.json()["advisory"] == ADVISORY


def test_adopt_and_rollback_switch_the_model_used_for_reads(store_copy: ServiceStore) -> None:
    client = make_client(store_copy, loopback=True)
    admin = _token(store_copy, "admin")
    event_id = client.get("/v1/events", params={"limit": 1}).json()["events"][0]["event_id"]
    assert client.get(f"/v1/events/{event_id}").json()["model_version"] == store_copy.v1
    res = client.put("/v1/active-models/ML", json={"version_id": store_copy.v2}, headers=admin)
    assert res.status_code == 200, res.text
    # the recorded value keeps the version that made it; a recomputation uses the adopted one
    doc = client.get(f"/v1/events/{event_id}", params={"recompute": "true"}).json()
    assert doc["model_version"] == store_copy.v1
    assert doc["recomputed"]["model_version"] == store_copy.v2
    res = client.post("/v1/active-models/ML/rollback", headers=admin)
    assert res.json()["active"] == store_copy.v1
    doc = client.get(f"/v1/events/{event_id}", params={"recompute": "true"}).json()
    assert doc["recomputed"]["model_version"] == store_copy.v1


def test_model_adopted_by_the_cli_is_used_without_restart(store_copy: ServiceStore) -> None:
    client = make_client(store_copy, loopback=True)
    event_id = client.get("/v1/events", params={"limit": 1}).json()["events"][0]["event_id"]
    assert client.get(f"/v1/events/{event_id}").json()["model_version"] == store_copy.v1
    assert invoke("adopt", store_copy.v2, "--store", store_copy.root).exit_code == 0
    doc = client.get(f"/v1/events/{event_id}", params={"recompute": "true"}).json()
    assert doc["recomputed"]["model_version"] == store_copy.v2


def test_health_ready_and_openapi(service_store: ServiceStore) -> None:
    client = make_client(service_store)
    assert client.get("/v1/health").json() == {"status": "ok"}
    ready = client.get("/v1/ready").json()
    assert ready["status"] == "ready" and ready["active_models"] == {"ML": service_store.v1}
    doc = client.get("/v1/openapi.json").json()
    assert "/v1/submissions" in doc["paths"] and "/v1/events/{event_id}" in doc["paths"]


def test_unknown_path_is_a_json_404(service_store: ServiceStore) -> None:
    res = make_client(service_store).get("/v1/nothing-here")
    assert res.status_code == 404 and res.json()["error"]["code"] == "not_found"


def _revised(store: ServiceStore, event_id: str, shift: float) -> bytes:
    """The stored demo rows of one event with every magnitude shifted (a new revision)."""
    from tests.cli.conftest import demo_frame

    frame = demo_frame()
    rows = frame[frame["event_id"] == event_id].copy()
    has = rows["magnitude"] != ""
    rows.loc[has, "magnitude"] = (rows.loc[has, "magnitude"].astype(float) + shift).map(
        lambda v: f"{v:.3f}"
    )
    return csv_bytes(rows)


def test_cached_event_is_read_anew_after_a_submission_revises_it(store_copy: ServiceStore) -> None:
    client = make_client(store_copy, loopback=True)
    event_id = client.get("/v1/events", params={"limit": 1}).json()["events"][0]["event_id"]
    before = client.get(f"/v1/events/{event_id}").json()["magnitude"]
    assert client.get(f"/v1/events/{event_id}").json()["magnitude"] == before  # cached
    headers = {**_token(store_copy, "submit"), "Content-Type": "text/csv"}
    res = client.post(
        "/v1/submissions", content=_revised(store_copy, event_id, 0.5), headers=headers
    )
    assert res.status_code == 201 and res.json()["revised"] > 0
    after = client.get(f"/v1/events/{event_id}").json()
    fresh = json.loads(invoke("event", event_id, "--json", "--store", store_copy.root).stdout)
    assert after["magnitude"] == pytest.approx(fresh["magnitude"], abs=1e-9)
    assert after["magnitude"] > before + 0.2
    assert after["recorded"]["magnitude"] == pytest.approx(after["magnitude"], abs=1e-9)


def test_cached_event_is_read_anew_after_a_command_line_ingest(
    store_copy: ServiceStore, tmp_path
) -> None:
    client = make_client(store_copy, loopback=True)
    event_id = client.get("/v1/events", params={"limit": 1}).json()["events"][0]["event_id"]
    before = client.get(f"/v1/events/{event_id}").json()["magnitude"]
    path = tmp_path / "revision.csv"
    path.write_bytes(_revised(store_copy, event_id, -0.4))
    assert invoke("ingest", path, "--store", store_copy.root).exit_code == 0
    # the ingest is not fused yet: the record stands, a recomputation sees the new reading
    doc = client.get(f"/v1/events/{event_id}", params={"recompute": "true"}).json()
    assert doc["magnitude"] == pytest.approx(before, abs=1e-9)
    after = doc["recomputed"]["magnitude"]
    fresh = json.loads(
        invoke("event", event_id, "--json", "--recompute", "--store", store_copy.root).stdout
    )
    assert after == pytest.approx(fresh["recomputed"]["magnitude"], abs=1e-9)
    assert after < before - 0.2


def test_quakeml_submission_counts_equal_those_of_the_ingest_command(
    store_copy: ServiceStore, tmp_path
) -> None:
    import shutil

    import sample_events

    xml = Path(sample_events.__file__).parent / "demo_network_2025_december.xml"
    other = tmp_path / "other"
    shutil.copytree(store_copy.root, other)
    cli = invoke("ingest", xml, "--store", other)
    m = re.search(
        r"([\d,]+) accepted \(([\d,]+) revised\), ([\d,]+) duplicate, ([\d,]+) quarantined",
        cli.stdout,
    )
    assert m is not None, cli.stdout + cli.stderr
    client = make_client(store_copy)
    headers = {**_token(store_copy, "submit"), "Content-Type": "application/xml"}
    res = client.post("/v1/submissions", content=xml.read_bytes(), headers=headers)
    assert res.status_code == 201, res.text
    body = res.json()
    assert [body["accepted"], body["revised"], body["duplicate"], body["quarantined"]] == [
        int(g.replace(",", "")) for g in m.groups()
    ]
    assert body["fusion"]["ML"]["events_written"] == body["events_touched"] > 100


def test_submission_waits_for_another_writer_then_fails_with_the_lock_message(
    store_copy: ServiceStore,
) -> None:
    client = make_client(store_copy, toml="\n[store]\nlock_timeout_s = 0.3\n")
    other = StationMagnitudeStore.open(store_copy.root, create=False, lock_timeout_s=0.3)
    headers = {**_token(store_copy, "submit"), "Content-Type": "text/csv"}
    with other.write_lock():  # e.g. a nightly run started from cron
        res = client.post(
            "/v1/submissions", content=csv_bytes(store_copy.held_event(0)), headers=headers
        )
    assert res.status_code == 503
    err = res.json()["error"]
    assert err["code"] == "store_busy" and "holds its writer lock" in err["message"]
    after = client.post(
        "/v1/submissions", content=csv_bytes(store_copy.held_event(0)), headers=headers
    )
    assert after.status_code == 201


def test_event_with_only_non_detections_is_committed_and_fused(store_copy: ServiceStore) -> None:
    """An event nobody detected has no network magnitude, and the submission still succeeds."""
    client = make_client(store_copy, loopback=True)
    rows = store_copy.held_event(0).copy()
    rows["event_id"] = "seen-by-nobody"
    rows["detected"] = "false"
    rows["magnitude"] = ""
    headers = {**_token(store_copy, "submit"), "Content-Type": "text/csv"}
    res = client.post("/v1/submissions", content=csv_bytes(rows), headers=headers)
    assert res.status_code == 201, res.text
    assert res.json()["fusion"]["ML"]["events_written"] == 1
    assert "error" not in res.json()["fusion"]["ML"]
    ev = client.get("/v1/events/seen-by-nobody").json()
    assert ev["magnitude"] is None and ev["n_stations"] == 0
