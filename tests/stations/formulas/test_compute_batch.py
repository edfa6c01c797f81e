"""The batch entry point on record-schema frames: values, distances, rejections, flags."""

from __future__ import annotations

import json
from typing import Any

import numpy as np
import pandas as pd
import pytest
from obspy.geodetics import gps2dist_azimuth, locations2degrees

from stations.errors import SchemaError
from stations.formulas import (
    OUT_OF_DOMAIN_FLAG,
    REJECTED_COLUMNS,
    ComputeOptions,
    compute_station_magnitudes,
    mb,
    ml,
)
from stations.metadata import StationMetadata
from stations.schema import INPUT_COLUMNS

_FLOATS = (
    "event_latitude", "event_longitude", "event_depth", "magnitude", "noise_threshold",
    "amplitude", "period", "distance_km", "distance_deg", "hypocentral_distance_km", "azimuth",
    "source_weight",
)  # fmt: skip


def _records(*rows: dict[str, Any]) -> pd.DataFrame:
    """Record-schema rows as a reader returns them (typed columns, tz-aware UTC times)."""
    base: dict[str, Any] = dict.fromkeys(INPUT_COLUMNS)
    base.update(
        event_id="ev1",
        origin_time="2020-06-01T12:00:00Z",
        station_id="XX.AAA.",
        magnitude_type="ML",
        detected=True,
        clipped=False,
        source_file="readings.csv",
    )
    filled = [{**base, "source_location": f"line {i + 2}", **row} for i, row in enumerate(rows)]
    frame = pd.DataFrame(filled, columns=list(INPUT_COLUMNS))
    frame["origin_time"] = pd.to_datetime(frame["origin_time"], utc=True).astype(
        "datetime64[us, UTC]"
    )
    for column in _FLOATS:
        frame[column] = frame[column].astype("float64")
    for column in ("detected", "clipped"):
        frame[column] = frame[column].astype(bool)
    return frame


@pytest.fixture
def metadata() -> StationMetadata:
    """XX.AAA moved on 2015-01-01 (about 11 km north); XX.BBB has one open epoch."""
    return StationMetadata.from_frame(
        pd.DataFrame(
            {
                "network": ["XX", "XX", "XX"],
                "station": ["AAA", "AAA", "BBB"],
                "location": ["", "", "00"],
                "latitude": [44.50, 44.60, 45.00],
                "longitude": [-110.40, -110.40, -111.00],
                "elevation": [2400.0, 2500.0, 1800.0],
                "start": ["2005-01-01", "2015-01-01", ""],
                "end": ["2015-01-01", "", ""],
            }
        ),
        source="stations.csv",
    )


def test_ml_from_wood_anderson_millimetres_with_given_distance() -> None:
    """docs/check-values.md §3 #1 through the batch: 1 mm at 100 km -> 3.0009, formula recorded."""
    result = compute_station_magnitudes(
        _records(dict(amplitude=1.0, amplitude_unit="mm_wa", hypocentral_distance_km=100.0))
    )
    row = result.records.iloc[0]
    assert row["magnitude"] == pytest.approx(3.0009, abs=1e-4)
    assert row["formula"] == "ML IASPEI-2013 HB87"
    assert result.rejected.empty and list(result.rejected.columns) == list(REJECTED_COLUMNS)
    assert (result.n_computed, result.n_out_of_domain, result.n_distances_filled) == (1, 0, 0)


def test_distances_filled_from_metadata_match_obspy(metadata: StationMetadata) -> None:
    """Event 44.0 N 110.0 W, 10 km deep; station epoch by time; obspy geodetics as reference."""
    frame = _records(
        dict(event_latitude=44.0, event_longitude=-110.0, event_depth=10.0, amplitude=2.0,
             amplitude_unit="mm_wa", channel="HHN"),
        dict(origin_time="2010-06-01T00:00:00Z", event_latitude=44.0, event_longitude=-110.0,
             event_depth=10.0, amplitude=2.0, amplitude_unit="mm_wa", channel="HHE"),
    )  # fmt: skip
    result = compute_station_magnitudes(frame, metadata=metadata)
    rec = result.records
    assert result.rejected.empty and result.n_distances_filled == 2
    for i, st_lat in enumerate((44.60, 44.50)):  # after and before the move
        dist_m, az, _ = gps2dist_azimuth(44.0, -110.0, st_lat, -110.40)
        assert rec["distance_km"].iloc[i] == pytest.approx(dist_m / 1000.0, abs=1e-6)
        assert rec["azimuth"].iloc[i] == pytest.approx(az, abs=1e-6)
        deg = locations2degrees(44.0, -110.0, st_lat, -110.40)
        assert rec["distance_deg"].iloc[i] == pytest.approx(deg, abs=1e-9)
        hyp = np.hypot(dist_m / 1000.0, 10.0)
        assert rec["hypocentral_distance_km"].iloc[i] == pytest.approx(hyp, abs=1e-6)
        assert rec["magnitude"].iloc[i] == pytest.approx(float(ml(2.0, hyp, unit="mm_wa")))
    assert rec["distance_km"].iloc[0] != pytest.approx(rec["distance_km"].iloc[1], abs=1.0)


def test_station_elevation_enters_only_when_asked(metadata: StationMetadata) -> None:
    frame = _records(
        dict(event_latitude=44.6, event_longitude=-110.4, event_depth=5.0, amplitude=1.0,
             amplitude_unit="mm_wa")
    )  # fmt: skip
    plain = compute_station_magnitudes(frame, metadata=metadata).records
    with_elev = compute_station_magnitudes(
        frame, metadata=metadata, options=ComputeOptions(use_station_elevation=True)
    ).records
    assert plain["hypocentral_distance_km"].iloc[0] == pytest.approx(5.0, abs=1e-9)
    assert with_elev["hypocentral_distance_km"].iloc[0] == pytest.approx(7.5, abs=1e-9)


def test_given_distances_are_never_overwritten(metadata: StationMetadata) -> None:
    frame = _records(
        dict(event_latitude=44.0, event_longitude=-110.0, event_depth=10.0, amplitude=1.0,
             amplitude_unit="mm_wa", distance_km=33.0, hypocentral_distance_km=40.0)
    )  # fmt: skip
    rec = compute_station_magnitudes(frame, metadata=metadata).records.iloc[0]
    assert rec["distance_km"] == 33.0 and rec["hypocentral_distance_km"] == 40.0
    assert np.isfinite(rec["azimuth"])  # the missing azimuth is filled
    assert rec["magnitude"] == pytest.approx(float(ml(1.0, 40.0, unit="mm_wa")))


def test_location_code_fallback(metadata: StationMetadata) -> None:
    """A bulletin without location code finds XX.BBB.00 (the only XX.BBB)."""
    frame = _records(
        dict(station_id="XX.BBB.", event_latitude=44.0, event_longitude=-110.0, event_depth=0.0,
             amplitude=1.0, amplitude_unit="mm_wa")
    )  # fmt: skip
    rec = compute_station_magnitudes(frame, metadata=metadata).records.iloc[0]
    dist_m, _, _ = gps2dist_azimuth(44.0, -110.0, 45.0, -111.0)
    assert rec["distance_km"] == pytest.approx(dist_m / 1000.0, abs=1e-6)


def test_time_outside_every_epoch_is_rejected_naming_station_and_time(
    metadata: StationMetadata,
) -> None:
    frame = _records(
        dict(origin_time="2001-03-04T05:06:07Z", event_latitude=44.0, event_longitude=-110.0,
             event_depth=10.0, amplitude=1.0, amplitude_unit="mm_wa"),
        dict(station_id="YY.ZZZ.", event_latitude=44.0, event_longitude=-110.0,
             event_depth=10.0, amplitude=1.0, amplitude_unit="mm_wa"),
    )  # fmt: skip
    result = compute_station_magnitudes(frame, metadata=metadata)
    assert result.records.empty
    first, second = result.rejected["reason"]
    assert first == (
        "ML IASPEI-2013 HB87: hypocentral distance is missing: station 'XX.AAA.' has no metadata "
        "epoch valid at 2001-03-04T05:06:07Z (epochs: 2005-01-01T00:00:00Z..2015-01-01T00:00:00Z "
        "2015-01-01T00:00:00Z..open); add or extend an epoch in stations.csv"
    )
    assert "station 'YY.ZZZ.' is not in the station metadata (stations.csv)" in second
    assert list(result.rejected["source_location"]) == ["line 2", "line 3"]


def test_missing_distance_without_metadata_says_how_to_fix() -> None:
    result = compute_station_magnitudes(_records(dict(amplitude=1.0, amplitude_unit="mm_wa")))
    assert (
        result.rejected["reason"]
        .iloc[0]
        .startswith(
            "ML IASPEI-2013 HB87: hypocentral distance is missing: give hypocentral_distance_km"
        )
    )


def test_mb_from_kilometres_converts_to_degrees() -> None:
    """A row with distance_km only: Δ = km / (2π·6371/360) (obspy kilometers2degrees)."""
    from obspy.geodetics import kilometers2degrees

    frame = _records(
        dict(magnitude_type="mb", amplitude=100.0, amplitude_unit="nm", period=1.0,
             distance_km=5559.75, event_depth=0.0, channel="BHZ")
    )  # fmt: skip
    rec = compute_station_magnitudes(frame).records.iloc[0]
    deg = kilometers2degrees(5559.75)
    assert rec["distance_deg"] == pytest.approx(deg, abs=1e-12)
    assert rec["magnitude"] == pytest.approx(float(mb(100.0, 1.0, deg, 0.0)), abs=1e-12)
    assert rec["formula"] == "mb IASPEI-2013 GR56-Q"


def test_out_of_domain_rejected_by_default_and_flagged_when_allowed() -> None:
    frame = _records(
        dict(magnitude_type="Ms_20", amplitude=1000.0, amplitude_unit="nm", period=25.0,
             distance_deg=50.0, event_depth=10.0),
        dict(magnitude_type="Ms_20", amplitude=1000.0, amplitude_unit="nm", period=20.0,
             distance_deg=50.0, event_depth=10.0),
    )  # fmt: skip
    strict = compute_station_magnitudes(frame)
    assert len(strict.records) == 1 and strict.records["magnitude"].iloc[0] == pytest.approx(
        4.8193, abs=1e-4
    )  # docs/check-values.md §3 #8
    assert strict.rejected["reason"].iloc[0] == (
        "Ms_20 IASPEI-2013: period 25 s is above 22 s (IASPEI standard range); outside the "
        "standard's validity domain: set allow_out_of_domain to compute it with a flag"
    )
    loose = compute_station_magnitudes(frame, options=ComputeOptions(allow_out_of_domain=True))
    assert loose.rejected.empty and (loose.n_computed, loose.n_out_of_domain) == (2, 1)
    assert loose.flagged.to_dict("records") == [
        {
            "source_file": "readings.csv",
            "source_location": "line 2",
            "reason": strict.rejected["reason"].iloc[0],
        }
    ]
    assert strict.flagged.empty
    assert list(loose.records["formula"]) == [
        "Ms_20 IASPEI-2013" + OUT_OF_DOMAIN_FLAG,
        "Ms_20 IASPEI-2013",
    ]
    expected = np.log10(1000.0 / 25.0) + 1.66 * np.log10(50.0) + 0.3
    assert loose.records["magnitude"].iloc[0] == pytest.approx(expected, abs=1e-12)


def test_not_computable_rows_are_rejected_even_when_out_of_domain_is_allowed() -> None:
    frame = _records(
        dict(magnitude_type="mb", amplitude=100.0, amplitude_unit="nm", period=1.0,
             distance_deg=120.0, event_depth=10.0)
    )  # fmt: skip
    result = compute_station_magnitudes(frame, options=ComputeOptions(allow_out_of_domain=True))
    assert result.records.empty
    assert (
        "distance 120 deg is above 109 deg (the GR56-Q table has no Q there)"
        in (result.rejected["reason"].iloc[0])
    )


def test_wrong_or_missing_unit_is_rejected_with_the_unit_error_text() -> None:
    frame = _records(
        dict(amplitude=1.0, amplitude_unit="nm/s", hypocentral_distance_km=50.0),
        dict(magnitude_type="Ms_BB", amplitude=1.0, amplitude_unit="um", distance_deg=50.0,
             event_depth=10.0),
        dict(amplitude=1.0, amplitude_unit=None, hypocentral_distance_km=50.0),
    )  # fmt: skip
    result = compute_station_magnitudes(frame)
    reasons = list(result.rejected["reason"])
    assert reasons[0].startswith(
        "ML needs a Wood-Anderson displacement in nm, um, mm_wa; got 'nm/s'"
    )
    assert reasons[1].startswith("Ms_BB needs a ground velocity in nm/s, um/s; got 'um'")
    assert reasons[2] == (
        "ML: amplitude_unit is missing; give the unit of the amplitude (nm, um, mm_wa, nm/s, um/s)"
    )


def test_non_detection_amplitude_becomes_the_noise_threshold() -> None:
    """docs/model.md §2.1: the noise amplitude goes through the same formula to noise_threshold."""
    frame = _records(
        dict(detected=False, amplitude=0.01, amplitude_unit="mm_wa", hypocentral_distance_km=100.0)
    )
    rec = compute_station_magnitudes(frame).records.iloc[0]
    assert np.isnan(rec["magnitude"]) and not rec["detected"]
    assert rec["noise_threshold"] == pytest.approx(1.0009, abs=1e-4)  # 3.0009 - 2
    assert rec["formula"] == "ML IASPEI-2013 HB87"


def test_rows_with_a_magnitude_are_left_alone_unless_recompute() -> None:
    frame = _records(
        dict(magnitude=2.5, amplitude=1.0, amplitude_unit="mm_wa", hypocentral_distance_km=100.0,
             formula=None),
        dict(magnitude=2.5),
    )  # fmt: skip
    kept = compute_station_magnitudes(frame).records
    assert list(kept["magnitude"]) == [2.5, 2.5] and kept["formula"].isna().all()
    redone = compute_station_magnitudes(frame, options=ComputeOptions(recompute=True)).records
    assert redone["magnitude"].iloc[0] == pytest.approx(3.0009, abs=1e-4)
    assert redone["magnitude"].iloc[1] == 2.5  # no amplitude: nothing to recompute from


def test_types_without_an_amplitude_formula_and_mb_lg_without_gamma() -> None:
    frame = _records(
        dict(magnitude_type="Md", amplitude=1.0, amplitude_unit="nm"),
        dict(magnitude_type="mb_Lg", amplitude=100.0, amplitude_unit="nm", distance_km=300.0),
    )
    result = compute_station_magnitudes(frame)
    assert (
        result.rejected["reason"]
        .iloc[0]
        .startswith("no amplitude formula for magnitude type Md in magfuse")
    )
    assert "set ComputeOptions.mb_lg_gamma_per_km" in result.rejected["reason"].iloc[1]
    with_gamma = compute_station_magnitudes(
        frame.iloc[[1]], options=ComputeOptions(mb_lg_gamma_per_km=0.0)
    )
    assert with_gamma.records["magnitude"].iloc[0] == pytest.approx(3.1934, abs=1e-4)  # #11


def test_component_letter_checked_against_the_formula() -> None:
    """IASPEI: ML on horizontal components, mb on the vertical (docs/check-values.md §1)."""
    frame = _records(
        dict(amplitude=1.0, amplitude_unit="mm_wa", hypocentral_distance_km=100.0, channel="HHZ"),
        dict(magnitude_type="mb", amplitude=100.0, amplitude_unit="nm", period=1.0,
             distance_deg=50.0, event_depth=0.0, channel="BHN"),
        dict(amplitude=1.0, amplitude_unit="mm_wa", hypocentral_distance_km=100.0, channel="HH"),
    )  # fmt: skip
    result = compute_station_magnitudes(frame)
    assert list(result.rejected["reason"].str.split(";").str[0]) == [
        "ML IASPEI-2013 HB87: channel HHZ is vertical",
        "mb IASPEI-2013 GR56-Q: channel BHN is horizontal",
    ]
    assert len(result.records) == 1  # a band code alone ("HH") says nothing about the component
    off = compute_station_magnitudes(frame, options=ComputeOptions(check_component=False))
    assert off.rejected.empty


def test_rejected_raw_is_the_input_row_as_json() -> None:
    frame = _records(
        dict(amplitude=-1.0, amplitude_unit="nm", hypocentral_distance_km=10.0),
        dict(event_id="line\nbreak \u2028 é", amplitude=1.0, amplitude_unit="nm/s"),
    )
    rejected = compute_station_magnitudes(frame).rejected
    assert len(rejected) == 2
    raw = json.loads(rejected["raw"].iloc[0])
    assert raw["amplitude"] == -1.0 and raw["event_id"] == "ev1"
    assert json.loads(rejected["raw"].iloc[1])["event_id"] == "line\nbreak \u2028 é"
    assert raw["origin_time"].startswith("2020-06-01T12:00:00")
    assert "amplitude -1 nm is not > 0; fix or complete the row" in rejected["reason"].iloc[0]


def test_missing_column_is_a_schema_error() -> None:
    with pytest.raises(SchemaError, match="column 'amplitude_unit' is missing"):
        compute_station_magnitudes(_records(dict(amplitude=1.0)).drop(columns="amplitude_unit"))


def test_options_validate() -> None:
    from stations.errors import ConfigError

    with pytest.raises(ConfigError, match="mb_lg_gamma_per_km"):
        ComputeOptions(mb_lg_gamma_per_km=-1.0)
    with pytest.raises(ConfigError, match="ms_bb_period_range_s"):
        ComputeOptions(ms_bb_period_range_s=(60.0, 2.0))


def test_many_rows_are_vectorized_and_agree_with_the_scalar_formula() -> None:
    """50,000 rows in one call; values equal the element-wise formula."""
    rng = np.random.default_rng(7)
    n = 50_000
    frame = _records(dict(amplitude=1.0, amplitude_unit="nm", hypocentral_distance_km=10.0))
    frame = frame.loc[np.zeros(n, dtype=int)].reset_index(drop=True)
    amp = 10 ** rng.uniform(-1, 5, n)
    r = rng.uniform(1.0, 1200.0, n)
    frame["amplitude"] = amp
    frame["hypocentral_distance_km"] = r
    result = compute_station_magnitudes(frame)
    inside = r <= 1000.0
    assert len(result.records) == int(inside.sum()) and len(result.rejected) == int((~inside).sum())
    np.testing.assert_allclose(
        result.records["magnitude"].to_numpy(), ml(amp[inside], r[inside]), rtol=0, atol=1e-12
    )


def test_empty_frame_gives_empty_results() -> None:
    result = compute_station_magnitudes(_records(dict(amplitude=1.0)).iloc[:0])
    assert result.records.empty and result.rejected.empty and result.flagged.empty
    assert list(result.rejected.columns) == list(REJECTED_COLUMNS)
    assert (result.n_computed, result.n_out_of_domain, result.n_distances_filled) == (0, 0, 0)
