"""The FDSN event service read by obspy's FDSN client (obspy.clients.fdsn.Client)."""

from __future__ import annotations

import pandas as pd
import pytest
from obspy import UTCDateTime
from obspy.clients.fdsn import Client
from obspy.clients.fdsn.header import FDSNNoDataException

from fusion.export.quakeml import event_id_from_resource_id
from fusion.versions.fused_store import FusedStore
from tests.service.conftest import Server, ServiceStore, make_client

pytestmark = pytest.mark.filterwarnings("ignore::DeprecationWarning")


def test_obspy_client_reads_fused_magnitudes_by_window_and_by_id(
    store_copy: ServiceStore, server: Server
) -> None:
    # Expected values straight from the fused store (independent of the HTTP path).
    current = FusedStore(store_copy.root).current("ML")
    t = pd.to_datetime(current["origin_time"], utc=True)
    window = current[
        (t >= pd.Timestamp("2025-03-01", tz="UTC"))
        & (t < pd.Timestamp("2025-03-03", tz="UTC"))
        & current["magnitude"].notna()
    ]
    assert len(window) >= 2
    client = Client(server.url)  # discovers the event service from application.wadl
    cat = client.get_events(starttime=UTCDateTime("2025-03-01"), endtime=UTCDateTime("2025-03-03"))
    got = {
        event_id_from_resource_id(str(ev.resource_id)): ev.preferred_magnitude().mag for ev in cat
    }
    want = dict(zip(window["event_id"], window["magnitude"], strict=True))
    assert got.keys() == want.keys()
    for k, mag in want.items():
        assert got[k] == pytest.approx(mag, abs=1e-9)

    one = window.iloc[0]
    cat = client.get_events(eventid=str(one["event_id"]))
    assert len(cat) == 1
    pref = cat[0].preferred_magnitude()
    assert pref.mag == pytest.approx(float(one["magnitude"]), abs=1e-9)
    assert pref.magnitude_type == "ML"
    rows = FusedStore(store_copy.root).contributions("ML", str(one["event_id"]))
    with_magnitude = rows[rows["detected"] & rows["corrected_magnitude"].notna()]
    assert len(pref.station_magnitude_contributions) == len(with_magnitude) > 0
    assert len(cat[0].station_magnitudes) == len(pref.station_magnitude_contributions)

    top = client.get_events(orderby="magnitude", limit=1, minmagnitude=-5)
    assert top[0].preferred_magnitude().mag == pytest.approx(current["magnitude"].max(), abs=1e-9)
    # a box around the first event's stored location (read from the demo CSV with pandas)
    from tests.cli.conftest import demo_frame

    demo = demo_frame()
    row = demo[demo["event_id"] == str(one["event_id"])].iloc[0]
    lat, lon = float(row["event_latitude"]), float(row["event_longitude"])
    boxed = client.get_events(
        starttime=UTCDateTime("2025-03-01"),
        endtime=UTCDateTime("2025-03-03"),
        minlatitude=lat - 1e-4,
        maxlatitude=lat + 1e-4,
        minlongitude=lon - 1e-4,
        maxlongitude=lon + 1e-4,
    )
    assert [event_id_from_resource_id(str(e.resource_id)) for e in boxed] == [one["event_id"]]
    with pytest.raises(FDSNNoDataException):
        client.get_events(eventid="no-such-event")


def test_fdsn_version_wadl_and_errors(service_store: ServiceStore) -> None:
    client = make_client(service_store, loopback=True)
    assert client.get("/fdsnws/event/1/version").text == "1.2.0"
    wadl = client.get("/fdsnws/event/1/application.wadl")
    assert wadl.status_code == 200 and 'name="eventid"' in wadl.text
    res = client.get("/fdsnws/event/1/query", params={"latitude": 10, "maxradius": 5})
    assert res.status_code == 400 and res.text.startswith("Error 400: Bad Request")
    res = client.get("/fdsnws/event/1/query", params={"starttime": "soon"})
    assert res.status_code == 400
    res = client.get("/fdsnws/event/1/query", params={"eventid": "none", "nodata": 404})
    assert res.status_code == 404
    res = client.get("/fdsnws/event/1/query", params={"eventid": "none"})
    assert res.status_code == 204
