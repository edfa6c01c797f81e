"""Station metadata with epochs: station CSV, StationXML (obspy), look-up by time."""

from __future__ import annotations

from pathlib import Path

import numpy as np
import obspy
import pandas as pd
import pytest
from obspy import UTCDateTime

from stations.errors import MalformedFileError, StationNotFoundError
from stations.metadata import CSV_COLUMNS, StationMetadata

HEADER = ",".join(CSV_COLUMNS)


def _csv(tmp_path: Path, body: str, header: str = HEADER) -> Path:
    path = tmp_path / "stations.csv"
    path.write_text(f"{header}\n{body}", encoding="utf-8")
    return path


@pytest.fixture
def moved(tmp_path: Path) -> StationMetadata:
    """XX.MOV moved on 2015-01-01; XX.FIX has one open epoch and a blank line after it."""
    return StationMetadata.read_csv(
        _csv(
            tmp_path,
            "XX,MOV,,44.50,-110.40,2400,2005-01-01T00:00:00Z,2015-01-01T00:00:00Z\n"
            "XX,MOV,,44.60,-110.40,2500,2015-01-01T00:00:00Z,\n"
            "XX,FIX,00,45.00,249.00,,,\n"
            "\n",
        )
    )


def test_csv_epochs_and_lookup_by_time(moved: StationMetadata) -> None:
    assert moved.station_ids == ("XX.FIX.00", "XX.MOV.")
    assert len(moved) == 3
    before = moved.locate("XX.MOV.", "2014-12-31T23:59:59Z")
    after = moved.locate("XX.MOV.", "2015-01-01T00:00:00Z")  # end is exclusive
    assert (before.latitude, before.elevation_m) == (44.50, 2400.0)
    assert (after.latitude, after.elevation_m) == (44.60, 2500.0)
    assert after.end is None and after.source_location == "line 3"
    fixed = moved.locate("XX.FIX.00", "1970-01-01")
    assert fixed.longitude == pytest.approx(-111.0)  # 249 E stored in [-180, 180)
    assert np.isnan(fixed.elevation_m)


def test_vectorized_lookup_mixes_hits_and_misses(moved: StationMetadata) -> None:
    found = moved.lookup(
        ["XX.MOV.", "XX.MOV.", "XX.FIX.", "XX.NOP.", "XX.MOV."],
        pd.to_datetime(
            ["2010-01-01", "2020-01-01", "2020-01-01", "2020-01-01", "2001-02-03T04:05:06"],
            utc=True,
            format="ISO8601",
        ),
    )
    assert list(found.found) == [True, True, True, False, False]
    np.testing.assert_allclose(found.latitude[:3], [44.50, 44.60, 45.00])
    assert found.problem[3] == (
        "station 'XX.NOP.' is not in the station metadata (" + str(moved.epochs["source"][0])
        + "); add it there or correct the station code"
    )  # fmt: skip
    assert (
        "station 'XX.MOV.' has no metadata epoch valid at 2001-02-03T04:05:06Z"
        in (found.problem[4])
    )
    assert (
        "2005-01-01T00:00:00Z..2015-01-01T00:00:00Z 2015-01-01T00:00:00Z..open"
        in (found.problem[4])
    )


def test_time_outside_every_epoch_raises_station_not_found(moved: StationMetadata) -> None:
    with pytest.raises(StationNotFoundError, match=r"'XX.MOV.' has no metadata epoch valid at "
                       r"2001-01-01T00:00:00Z") as info:  # fmt: skip
        moved.locate("XX.MOV.", "2001-01-01")
    assert isinstance(info.value, KeyError)  # the error hierarchy: StationNotFoundError(KeyError)
    with pytest.raises(StationNotFoundError, match=r"\(and 1 more rows\)"):
        moved.coordinates(["XX.NOP.", "XX.MOV."], ["2020-01-01", "1990-01-01"])


def test_overlapping_epochs_with_other_coordinates_are_ambiguous(tmp_path: Path) -> None:
    meta = StationMetadata.read_csv(
        _csv(
            tmp_path,
            "XX,AMB,,44.0,-110.0,100,2000-01-01,2012-01-01\n"
            "XX,AMB,,44.5,-110.0,100,2010-01-01,\n"
            "XX,AMB,10,44.0,-110.0,100,2010-01-01,\n",
        )
    )
    found = meta.lookup(
        ["XX.AMB.", "XX.AMB.", "XX.AMB."], ["2005-01-01", "2011-01-01", "2013-01-01"]
    )
    assert list(found.found) == [True, False, True]
    assert found.problem[1].startswith(
        "station 'XX.AMB.' has several metadata epochs valid at 2011-01-01T00:00:00Z with "
        "different coordinates (line 2, line 3); remove the overlap in "
    )


def test_agreeing_overlaps_and_location_fallback(tmp_path: Path) -> None:
    """Two location codes within 0.001 deg and 100 m agree: the smallest code is used."""
    meta = StationMetadata.read_csv(
        _csv(tmp_path, "XX,TWO,10,44.0004,-110.0,1050,,\nXX,TWO,00,44.0,-110.0,1000,,\n")
    )
    epoch = meta.locate("XX.TWO.", "2020-01-01")  # no exact 'XX.TWO.': NET.STA fallback
    assert epoch.station_id == "XX.TWO.00"
    assert meta.locate("XX.TWO.10", "2020-01-01").latitude == 44.0004  # exact id wins
    with pytest.raises(StationNotFoundError, match=r"'XX\.ONE\.' is not in the station metadata"):
        meta.locate("XX.ONE.", "2020-01-01")


@pytest.mark.parametrize(
    ("header", "body", "message"),
    [
        (HEADER.replace("latitude", "lat"), "XX,A,,1,2,3,,\n", "column 'latitude' is missing"),
        (HEADER, "XX,A,,north,2,3,,\n", "line 2: column 'latitude' needs a number, got 'north'"),
        (HEADER, "XX,A,,1,2,3,,\nXX,B,,95,2,3,,\n", r"line 3: latitude 95 is outside \[-90, 90\]"),
        (HEADER, "XX,A,,1,2,3,yesterday,\n", "line 2: column 'start' needs an ISO 8601 time"),
        (HEADER, "XX,A,,1,2,3,2020-01-01,2019-01-01\n", "line 2: epoch end 2019-01-01 is not"),
        (HEADER, "XX,A_B,,1,2,3,,\n", "line 2: station code 'XX.A_B.' is not an FDSN"),
        (HEADER, "XX,A,,,2,3,,\n", "line 2: column 'latitude' needs a number, got ''"),
    ],
    ids=["renamed-header", "text-latitude", "latitude-range", "bad-time", "end-before-start",
         "bad-code", "empty-latitude"],
)  # fmt: skip
def test_faulty_station_csv(tmp_path: Path, header: str, body: str, message: str) -> None:
    """Each faulty file gives one MalformedFileError naming the file, the line and the fix."""
    path = _csv(tmp_path, body, header)
    with pytest.raises(MalformedFileError, match=message) as info:
        StationMetadata.read_csv(path)
    assert str(info.value).startswith(str(path))


def test_missing_file() -> None:
    for reader in (StationMetadata.read, StationMetadata.read_csv, StationMetadata.read_stationxml):
        with pytest.raises(FileNotFoundError, match="not found"):
            reader(Path("/nonexistent/stations.csv"))


def test_read_tells_stationxml_from_csv(tmp_path: Path) -> None:
    xml = tmp_path / "inventory.xml"
    obspy.read_inventory().write(str(xml), format="STATIONXML")
    assert StationMetadata.read(xml).station_ids == ("BW.RJOB.", "GR.FUR.", "GR.WET.")
    csv_path = _csv(tmp_path, "XX,A,,1,2,3,,\n")
    assert StationMetadata.read(csv_path).station_ids == ("XX.A.",)


def test_stationxml_example_inventory_matches_obspy_get_coordinates(tmp_path: Path) -> None:
    """obspy 1.5.1's bundled example inventory (read_inventory() without arguments: BW.RJOB in
    three epochs, GR.FUR, GR.WET), written to StationXML and read back through our reader;
    coordinates compared with obspy's own Inventory.get_coordinates at the same times."""
    inventory = obspy.read_inventory()
    path = tmp_path / "example.xml"
    inventory.write(str(path), format="STATIONXML")
    meta = StationMetadata.read_stationxml(path)
    assert meta.station_ids == ("BW.RJOB.", "GR.FUR.", "GR.WET.")
    assert len(meta) == 5  # RJOB's three epochs (identical channel epochs collapsed), FUR, WET
    cases = [
        ("BW.RJOB..EHZ", "2003-01-01"),
        ("BW.RJOB..EHZ", "2007-06-01"),
        ("BW.RJOB..EHZ", "2010-01-01"),
        ("GR.FUR..BHZ", "2010-01-01"),
        ("GR.WET..HHN", "2010-01-01"),
    ]
    ids = [c[0].rsplit(".", 1)[0] for c in cases]
    found = meta.coordinates(ids, [c[1] for c in cases])
    for k, (seed, when) in enumerate(cases):
        expected = inventory.get_coordinates(seed, UTCDateTime(when))
        assert found.latitude[k] == pytest.approx(expected["latitude"], abs=1e-9)
        assert found.longitude[k] == pytest.approx(expected["longitude"], abs=1e-9)
        assert found.elevation_m[k] == pytest.approx(expected["elevation"], abs=1e-9)
    with pytest.raises(StationNotFoundError, match=r"'GR\.FUR\.' has no metadata epoch valid at"):
        meta.locate("GR.FUR.", "2000-01-01")  # before the station opened (2006-12-16)


def test_inventory_station_without_channels_uses_station_coordinates() -> None:
    from obspy.core.inventory import Inventory, Network, Station

    station = Station("NOC", latitude=10.0, longitude=20.0, elevation=5.0,
                      start_date=UTCDateTime("2001-01-01"))  # fmt: skip
    inventory = Inventory(networks=[Network("XX", stations=[station])], source="test")
    meta = StationMetadata.from_inventory(inventory)
    epoch = meta.locate("XX.NOC.", "2020-01-01")
    assert (epoch.latitude, epoch.longitude, epoch.elevation_m) == (10.0, 20.0, 5.0)
    assert epoch.source_location == "station XX.NOC"


def test_unreadable_stationxml_is_malformed(tmp_path: Path) -> None:
    path = tmp_path / "broken.xml"
    path.write_text("<FDSNStationXML><Network", encoding="utf-8")
    with pytest.raises(MalformedFileError, match="not a readable StationXML file"):
        StationMetadata.read_stationxml(path)


def test_concat_combines_sources(moved: StationMetadata, tmp_path: Path) -> None:
    other = StationMetadata.from_inventory(obspy.read_inventory(), source="example")
    both = StationMetadata.concat([moved, other])
    assert len(both) == len(moved) + len(other)
    assert both.locate("GR.WET.", "2020-01-01").source == "example"
    assert "example" in repr(both.epochs["source"].tolist())


def test_docstring_example_runs() -> None:
    import doctest

    import stations.metadata

    result = doctest.testmod(stations.metadata)
    assert result.failed == 0 and result.attempted > 0
