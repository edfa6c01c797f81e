"""QuakeML 1.2 (stations.readers.quakeml) on ObsPy's own test files and on files ObsPy writes.

Outside references: the QuakeML test files bundled with obspy 1.5.1 (values read by eye, with
file and line beside each check) and ObsPy's QuakeML writer (``Catalog.write(format="QUAKEML")``)
for the full mapping of origin, amplitude, arrival and contribution fields.
"""

from __future__ import annotations

import json
from pathlib import Path

import numpy as np
import obspy
import pandas as pd
import pytest
from obspy.core.event import (
    Amplitude,
    Arrival,
    Catalog,
    Event,
    Magnitude,
    Origin,
    Pick,
    ResourceIdentifier,
    StationMagnitude,
    StationMagnitudeContribution,
    WaveformStreamID,
)

from stations.errors import ConfigError, MalformedFileError
from stations.readers.quakeml import is_quakeml, read_quakeml

QML = Path(obspy.__file__).parent / "io" / "quakeml" / "tests" / "data"
IASPEI = Path(obspy.__file__).parent / "io" / "iaspei" / "tests" / "data"


def _sample(folder: Path, name: str) -> Path:
    path = folder / name
    if not path.exists():
        pytest.skip(f"obspy test file {path} is not installed with this obspy")
    return path


def test_station_magnitude_file_without_origin_is_rejected_with_its_values() -> None:
    """obspy 1.5.1 test data, quakeml_1.2_stationmagnitude.xml: one station magnitude whose
    originID (line 7, smi:some/example/id) names no origin in the file, so no origin time."""
    path = _sample(QML, "quakeml_1.2_stationmagnitude.xml")
    result = read_quakeml(path)
    assert len(result.records) == 0
    assert len(result.rejected) == 1
    rej = result.rejected.iloc[0]
    assert rej["source_location"] == "event 1 / station magnitude 1"
    assert rej["reason"].startswith("origin time missing")
    raw = json.loads(rej["raw"])
    assert raw["event_id"] == "smi:ch.ethz.sed/event/historical/1165"  # line 5
    assert raw["magnitude"] == 6.5  # line 9
    assert raw["magnitude_type"] == "MS"  # line 12
    assert (raw["network"], raw["station"]) == ("BW", "FUR")  # line 15


def test_contributions_file_has_no_station_magnitudes() -> None:
    """obspy 1.5.1 test data, quakeml_1.2_stationmagnitudecontributions.xml: a network
    magnitude with two contributions (lines 11-20) and no stationMagnitude element."""
    result = read_quakeml(_sample(QML, "quakeml_1.2_stationmagnitudecontributions.xml"))
    assert result.records.empty
    assert result.rejected.empty


def test_the_two_obspy_files_joined_give_the_weight(tmp_path: Path) -> None:
    """The station magnitude of quakeml_1.2_stationmagnitude.xml and the contributions of
    quakeml_1.2_stationmagnitudecontributions.xml share the id
    smi:ch.ethz.sed/magnitude/station/881342 (lines 6 and 12); joined by ObsPy with an origin
    under the referenced id, the weight 0.77 (contributions file, line 13) is the row's
    source_weight."""
    sm_cat = obspy.read_events(str(_sample(QML, "quakeml_1.2_stationmagnitude.xml")))
    mag_cat = obspy.read_events(str(_sample(QML, "quakeml_1.2_stationmagnitudecontributions.xml")))
    event = sm_cat[0]
    event.magnitudes.extend(mag_cat[0].magnitudes)
    event.origins.append(
        Origin(
            resource_id=ResourceIdentifier("smi:some/example/id"),
            time=obspy.UTCDateTime("2010-02-03T04:05:06.5Z"),
            latitude=47.0,
            longitude=8.0,
            depth=12000.0,
        )
    )
    path = tmp_path / "joined.xml"
    sm_cat.write(str(path), format="QUAKEML")
    result = read_quakeml(path)
    assert result.rejected.empty
    rec = result.records.iloc[0]
    assert rec["station_id"] == "BW.FUR."
    assert rec["magnitude_type"] == "Ms"  # "MS", line 12, through the alias table
    assert rec["magnitude"] == 6.5
    assert rec["source_weight"] == 0.77
    assert rec["event_depth"] == 12.0
    assert rec["origin_time"] == pd.Timestamp("2010-02-03T04:05:06.5Z")


def test_obspy_written_catalog_maps_every_field(tmp_path: Path) -> None:
    """A catalog built and written by ObsPy's QuakeML writer; every mapped field read back."""
    origin = Origin(
        resource_id=ResourceIdentifier("smi:test/origin/1"),
        time=obspy.UTCDateTime("2021-07-08T09:10:11.25Z"),
        latitude=-33.5,
        longitude=151.25,
        depth=8500.0,
    )
    pick = Pick(
        resource_id=ResourceIdentifier("smi:test/pick/1"),
        time=obspy.UTCDateTime("2021-07-08T09:10:30Z"),
        waveform_id=WaveformStreamID("AU", "ABC", "00", "BHZ"),
    )
    origin.arrivals.append(
        Arrival(pick_id=pick.resource_id, phase="P", distance=1.25, azimuth=210.5)
    )
    amp_m = Amplitude(
        resource_id=ResourceIdentifier("smi:test/amp/1"),
        generic_amplitude=2.5e-7,
        unit="m",
        period=0.8,
        pick_id=pick.resource_id,
        waveform_id=WaveformStreamID("AU", "ABC", "00", "BHZ"),
    )
    amp_s = Amplitude(
        resource_id=ResourceIdentifier("smi:test/amp/2"),
        generic_amplitude=3.0,
        unit="s",
        waveform_id=WaveformStreamID("", "DEF", "", "HHE"),
    )
    sm1 = StationMagnitude(
        resource_id=ResourceIdentifier("smi:test/sm/1"),
        origin_id=origin.resource_id,
        mag=3.4,
        station_magnitude_type="ML",
        amplitude_id=amp_m.resource_id,
        waveform_id=WaveformStreamID("AU", "ABC", "00", "BHZ"),
    )
    sm2 = StationMagnitude(
        resource_id=ResourceIdentifier("smi:test/sm/2"),
        origin_id=origin.resource_id,
        mag=3.1,
        amplitude_id=amp_s.resource_id,
        waveform_id=WaveformStreamID("", "DEF", "", "HHE"),
    )
    amp_3 = Amplitude(
        resource_id=ResourceIdentifier("smi:test/amp/3"),
        generic_amplitude=1.5e-6,
        unit="m/s",
        waveform_id=WaveformStreamID("AU", "GHI", "10", "HHN"),
    )
    sm3 = StationMagnitude(
        resource_id=ResourceIdentifier("smi:test/sm/3"),
        origin_id=origin.resource_id,
        mag=2.9,
        station_magnitude_type="ML",
        amplitude_id=amp_3.resource_id,
        waveform_id=WaveformStreamID("", "GHI"),
    )
    magnitude = Magnitude(
        mag=3.3,
        magnitude_type="ML",
        station_magnitude_contributions=[
            StationMagnitudeContribution(station_magnitude_id=sm1.resource_id, weight=1.0),
            StationMagnitudeContribution(station_magnitude_id=sm2.resource_id, weight=0.5),
        ],
    )
    event = Event(
        resource_id=ResourceIdentifier("smi:test/event/42"),
        origins=[origin],
        picks=[pick],
        amplitudes=[amp_m, amp_s, amp_3],
        station_magnitudes=[sm1, sm2, sm3],
        magnitudes=[magnitude],
    )
    path = tmp_path / "written.xml"
    Catalog(events=[event]).write(str(path), format="QUAKEML")
    assert is_quakeml(path)
    result = read_quakeml(path, default_network="zz")
    assert result.rejected.empty
    a, b, c = (result.records.iloc[i] for i in range(3))
    assert a["event_id"] == "42"  # last segment of smi:test/event/42 (one rule, all formats)
    assert a["origin_time"] == pd.Timestamp("2021-07-08T09:10:11.25Z")
    assert (a["event_latitude"], a["event_longitude"], a["event_depth"]) == (-33.5, 151.25, 8.5)
    assert (a["station_id"], a["channel"]) == ("AU.ABC.00", "BHZ")
    assert a["amplitude"] == pytest.approx(250.0, rel=1e-12)  # 2.5e-7 m = 250 nm
    assert a["amplitude_unit"] == "nm"
    assert a["period"] == 0.8
    assert (a["distance_deg"], a["azimuth"]) == (1.25, 210.5)
    assert a["source_weight"] == 1.0
    assert a["source_location"] == "event 1 / station magnitude 1"
    # sm2: no type of its own -> the contributing ML; no network -> default; unit "s" dropped
    assert (b["station_id"], b["magnitude_type"], b["source_weight"]) == ("ZZ.DEF.", "ML", 0.5)
    assert np.isnan(b["amplitude"]) and pd.isna(b["amplitude_unit"])
    # sm3: network, location and channel completed from its amplitude's stream id; m/s -> nm/s
    assert (c["station_id"], c["channel"]) == ("AU.GHI.10", "HHN")
    assert c["amplitude"] == pytest.approx(1500.0, rel=1e-12)
    assert c["amplitude_unit"] == "nm/s"
    assert np.isnan(c["source_weight"])


def test_ims_rendition_without_types_is_rejected_but_keeps_the_event_number() -> None:
    """obspy 1.5.1 test data, 19670130012028.xml (QuakeML made from the ISF file): seven
    stationMagnitude elements without <type> (e.g. LJU 5.4, lines 280-286) and no
    contributions, so every row lacks a type; the event id smi:local/<uuid>/event/840268
    becomes 840268, the same id the IMS1.0 reader gives."""
    result = read_quakeml(_sample(IASPEI, "19670130012028.xml"))
    assert result.records.empty
    assert len(result.rejected) == 7
    assert set(result.rejected["reason"]) == {"magnitude type missing; give one, e.g. ML or mb"}
    first = json.loads(result.rejected["raw"].iloc[0])
    assert (first["event_id"], first["station"], first["magnitude"]) == ("840268", "LJU", 5.4)


def test_malformed_xml_names_file_and_position(tmp_path: Path) -> None:
    """Faulty: the quakeml element is never closed."""
    path = tmp_path / "broken.xml"
    path.write_text(
        '<?xml version="1.0"?>\n<q:quakeml xmlns="http://quakeml.org/xmlns/bed/1.2" '
        'xmlns:q="http://quakeml.org/xmlns/quakeml/1.2">\n<eventParameters publicID="smi:x">\n',
        encoding="utf-8",
    )
    assert is_quakeml(path)
    with pytest.raises(
        MalformedFileError, match=r"broken\.xml: cannot be read as QUAKEML at line 4, column 1: "
    ):
        read_quakeml(path)


def test_bad_default_network_is_a_config_error() -> None:
    with pytest.raises(ConfigError, match="default_network 'A-B'"):
        read_quakeml(_sample(QML, "quakeml_1.2_stationmagnitude.xml"), default_network="A-B")


@pytest.mark.parametrize(
    "text",
    [
        '<?xml version="1.0"?><root xmlns="http://quakeml.org/xmlns/bed/1.2"/>',
        '<?xml version="1.0"?><quakeml xmlns="http://example.org/other"/>',
        "quakeml http://quakeml.org/xmlns/bed/1.2 as plain text",
    ],
)
def test_is_quakeml_is_strict(tmp_path: Path, text: str) -> None:
    path = tmp_path / "x.xml"
    path.write_text(text, encoding="utf-8")
    assert not is_quakeml(path)
