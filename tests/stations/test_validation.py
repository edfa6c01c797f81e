"""Row validation (stations.validation): each rule on its own, output types, vectorized size.

Check values are the record schema and vocabularies of stations/schema.py (the FDSN source
identifier specification v1.0 character rules and the IASPEI magnitude names it cites); the
magnitude range [-3, 10] is the default of config/magfuse.toml.
"""

from __future__ import annotations

import json
import time

import numpy as np
import pandas as pd
import pyarrow as pa
import pytest

from stations.errors import ConfigError
from stations.schema import INPUT_COLUMNS, RECORD_SCHEMA, check_schema
from stations.validation import (
    INPUT_SCHEMA,
    REJECTED_COLUMNS,
    Reasons,
    check_magnitude_range,
    json_rows,
    validate_records,
)


def _row(**over: object) -> dict[str, object]:
    base: dict[str, object] = {
        "event_id": "ev1",
        "origin_time": pd.Timestamp("2024-05-01T12:00:00Z"),
        "event_latitude": 46.5,
        "event_longitude": 8.2,
        "event_depth": 7.5,
        "network": "xx",
        "station": "abc",
        "location": "",
        "channel": "hhz",
        "magnitude_type": "ML",
        "magnitude": 2.0,
        "detected": True,
        "clipped": False,
        "noise_threshold": np.nan,
        "amplitude": np.nan,
        "amplitude_unit": "",
        "period": np.nan,
        "distance_km": 40.0,
        "distance_deg": np.nan,
        "hypocentral_distance_km": np.nan,
        "azimuth": 120.0,
        "source_weight": np.nan,
        "source_location": "line 2",
    }
    base.update(over)
    return base


def _validate(rows: list[dict[str, object]], **kw: object) -> tuple[pd.DataFrame, pd.DataFrame]:
    frame = pd.DataFrame(rows)
    return validate_records(
        frame, source_file="in.csv", raw=[json.dumps({"i": i}) for i in range(len(rows))], **kw
    )


def test_good_row_becomes_a_record_with_canonical_codes() -> None:
    """Lower-case codes become upper case; the station id is NET.STA.LOC (FDSN v1.0)."""
    records, rejected = _validate([_row()])
    assert rejected.empty
    assert list(records.columns) == list(INPUT_COLUMNS)
    rec = records.iloc[0]
    assert rec["station_id"] == "XX.ABC."
    assert rec["channel"] == "HHZ"
    assert rec["origin_time"] == pd.Timestamp("2024-05-01T12:00:00Z")
    assert rec["source_file"] == "in.csv"
    assert rec["source_location"] == "line 2"


def test_output_dtypes_match_the_record_schema() -> None:
    """The frame converts to Arrow with RECORD_SCHEMA's types and back without change."""
    records, _ = _validate([_row(), _row(detected=False, magnitude=np.nan, noise_threshold=1.5)])
    table = pa.Table.from_pandas(records, schema=INPUT_SCHEMA, preserve_index=False)
    check_schema(
        table.schema, pa.schema([RECORD_SCHEMA.field(n) for n in INPUT_COLUMNS]), where="records"
    )
    pd.testing.assert_frame_equal(table.to_pandas(), records)
    assert str(records["origin_time"].dtype) == "datetime64[us, UTC]"
    assert records["detected"].dtype == bool
    assert records["clipped"].dtype == bool
    assert records["magnitude"].dtype == np.float64


@pytest.mark.parametrize(
    ("spelling", "canonical"),
    [
        ("MS", "Ms"),  # alias table of stations/schema.py (QuakeML file of obspy uses MS)
        ("Mb", "mb"),  # NEIC mchedr spelling, via obspy
        ("mb", "mb"),
        ("ML", "ML"),
        (" mB_BB ", "mB_BB"),
    ],
)
def test_magnitude_type_spellings(spelling: str, canonical: str) -> None:
    records, rejected = _validate([_row(magnitude_type=spelling)])
    assert rejected.empty
    assert records["magnitude_type"].iloc[0] == canonical


@pytest.mark.parametrize(
    ("over", "fragment"),
    [
        ({"magnitude_type": "MB"}, "unknown magnitude type 'MB'"),  # ambiguous mb/mB
        ({"magnitude_type": "Mx"}, "unknown magnitude type 'Mx'"),
        ({"magnitude_type": ""}, "magnitude type missing"),
        ({"magnitude": 10.5}, "magnitude 10.5 is outside the accepted range [-3, 10]"),
        ({"magnitude": -3.2}, "magnitude -3.2 is outside the accepted range [-3, 10]"),
        ({"magnitude": np.inf}, "is outside the accepted range"),
        ({"magnitude": np.nan}, "detection without a magnitude"),
        ({"station": ""}, "station code missing"),
        ({"network": ""}, "network code missing"),
        ({"station": "AB-C"}, "is not an FDSN NET.STA.LOC identifier"),
        ({"station": "ABCDEFGHI"}, "is not an FDSN NET.STA.LOC identifier"),
        ({"location": "ABC"}, "is not an FDSN NET.STA.LOC identifier"),
        ({"channel": "HHZZ"}, "is not a SEED channel code"),
        ({"origin_time": pd.NaT}, "origin time missing or not an ISO 8601 time"),
        ({"event_id": " "}, "event id missing"),
        ({"amplitude": 3.0, "amplitude_unit": "counts"}, "amplitude unit 'counts' is unknown"),
        ({"amplitude": 3.0}, "amplitude given without amplitude_unit"),
        ({"amplitude_unit": "nm"}, "amplitude_unit given without an amplitude"),
        ({"amplitude": -1.0, "amplitude_unit": "nm"}, "amplitude -1 is out of range"),
        ({"event_latitude": 91.0}, "event_latitude 91 is out of range"),
        ({"event_longitude": -181.0}, "event_longitude -181 is out of range"),
        ({"event_depth": 10000.0}, "give the depth in km"),
        ({"distance_km": -1.0}, "distance_km -1 is out of range"),
        ({"distance_deg": 181.0}, "distance_deg 181 is out of range"),
        ({"azimuth": 361.0}, "azimuth 361 is out of range"),
        ({"period": 0.0}, "period 0 is out of range"),
        ({"source_weight": -0.5}, "source_weight -0.5 is out of range"),
        ({"hypocentral_distance_km": np.inf}, "hypocentral_distance_km is infinite"),
        ({"detected": False}, "non-detection with a magnitude"),
        (
            {"detected": False, "magnitude": np.nan, "clipped": True},
            "non-detection marked clipped",
        ),
        (
            {"detected": False, "magnitude": np.nan, "noise_threshold": 11.0},
            "noise_threshold 11 is outside the accepted range",
        ),
        ({"problems": "distance_km 'x' is not a number; correct it"}, "'x' is not a number"),
    ],
)
def test_each_rule_rejects_with_a_sentence(over: dict[str, object], fragment: str) -> None:
    """One faulty row among good ones goes to `rejected`, with its location and raw row."""
    rows = [_row(source_location="line 2"), _row(source_location="line 3", **over)]
    records, rejected = _validate(rows)
    assert len(records) == 1
    assert records["source_location"].tolist() == ["line 2"]
    assert list(rejected.columns) == list(REJECTED_COLUMNS)
    assert len(rejected) == 1
    assert fragment in rejected["reason"].iloc[0]
    assert rejected["source_location"].iloc[0] == "line 3"
    assert json.loads(rejected["raw"].iloc[0]) == {"i": 1}


def test_several_failures_join_into_one_reason() -> None:
    _, rejected = _validate([_row(station="", magnitude_type="MB", magnitude=12.0)])
    reason = rejected["reason"].iloc[0]
    assert reason.count("; ") >= 2
    assert "station code missing" in reason
    assert "unknown magnitude type 'MB'" in reason
    assert "magnitude 12 is outside" in reason


def test_non_detection_without_magnitude_is_kept() -> None:
    """Censored cell (docs/model.md §2.1): detected=False, magnitude null, threshold optional."""
    records, rejected = _validate(
        [_row(detected=False, magnitude=np.nan, noise_threshold=1.7, channel="")]
    )
    assert rejected.empty
    rec = records.iloc[0]
    assert not rec["detected"]
    assert np.isnan(rec["magnitude"])
    assert rec["noise_threshold"] == 1.7
    assert pd.isna(rec["channel"])


def test_location_dashes_mean_empty_location() -> None:
    """FDSN: an empty location code is written '--' in some tools; both give 'NET.STA.'."""
    records, _ = _validate([_row(location="--")])
    assert records["station_id"].iloc[0] == "XX.ABC."


def test_station_id_column_is_checked_when_components_are_absent() -> None:
    rows = [_row(), _row(), _row(), _row()]
    for r in rows:
        for key in ("network", "station", "location"):
            r.pop(key)
    rows[0]["station_id"] = "xx.abc.00"
    rows[1]["station_id"] = "XX.ABC"
    rows[2]["station_id"] = ""
    rows[3]["station_id"] = "XX.A-B."
    records, rejected = _validate(rows)
    assert records["station_id"].tolist() == ["XX.ABC.00"]
    reasons = rejected["reason"].tolist()
    assert "is not NET.STA.LOC" in reasons[0]
    assert "station id missing" in reasons[1]
    assert "is not an FDSN NET.STA.LOC identifier" in reasons[2]


def test_magnitude_range_is_configurable_and_inclusive() -> None:
    rows = [_row(magnitude=4.0), _row(magnitude=4.5), _row(magnitude=5.0)]
    records, rejected = _validate(rows, magnitude_range=(4.5, 6.0))
    assert records["magnitude"].tolist() == [4.5, 5.0]
    assert "outside the accepted range [4.5, 6]" in rejected["reason"].iloc[0]


@pytest.mark.parametrize("bad", [(5.0, 1.0), (np.nan, 1.0), (0.0, np.inf), ("a", "b"), (1.0,)])
def test_bad_magnitude_range_is_a_config_error(bad: tuple[object, ...]) -> None:
    with pytest.raises(ConfigError, match="magnitude_range"):
        check_magnitude_range(bad)  # type: ignore[arg-type]


def test_empty_input_gives_typed_empty_frames() -> None:
    records, rejected = validate_records(pd.DataFrame({"event_id": []}), source_file="x", raw=[])
    assert records.empty
    assert list(records.columns) == list(INPUT_COLUMNS)
    assert str(records["origin_time"].dtype) == "datetime64[us, UTC]"
    assert list(rejected.columns) == list(REJECTED_COLUMNS)


def test_raw_callable_is_asked_for_rejected_rows_only() -> None:
    asked: list[list[int]] = []
    frame = pd.DataFrame([_row(), _row(magnitude=20.0), _row(), _row(station="")])

    def raw(idx: np.ndarray) -> list[str]:
        asked.append(idx.tolist())
        return json_rows(frame)(idx)

    _, rejected = validate_records(frame, source_file="f", raw=raw)
    assert asked == [[1, 3]]
    assert json.loads(rejected["raw"].iloc[0])["magnitude"] == 20.0


def test_reasons_accumulate_per_row() -> None:
    reasons = Reasons(3)
    reasons.add(np.array([True, False, True]), "a")
    reasons.add(np.array([True, True, False]), np.array(["b0", "b1", "b2"], dtype=object))
    assert reasons.text.tolist() == ["a; b0", "b1", "a"]
    assert reasons.ok.tolist() == [False, False, False]


def test_large_frame_is_validated_by_array_passes() -> None:
    """200,000 rows, 1 % faulty: a per-row Python loop would take far longer than 5 s."""
    n = 200_000
    rng = np.random.default_rng(7)
    frame = pd.DataFrame(
        {
            "event_id": np.char.add("ev", (np.arange(n) // 10).astype(str)),
            "origin_time": pd.Timestamp("2024-01-01T00:00:00Z")
            + pd.to_timedelta(np.arange(n) // 10, unit="s"),
            "network": "XX",
            "station": np.char.add("S", (np.arange(n) % 50).astype(str)),
            "magnitude_type": "ML",
            "magnitude": rng.uniform(0.0, 4.0, n),
            "source_location": np.char.add("line ", np.arange(2, n + 2).astype(str)),
        }
    )
    bad = rng.choice(n, n // 100, replace=False)
    frame.loc[bad, "magnitude"] = 15.0
    start = time.perf_counter()
    records, rejected = validate_records(frame, source_file="big", raw=json_rows(frame))
    elapsed = time.perf_counter() - start
    assert len(records) == n - bad.shape[0]
    assert len(rejected) == bad.shape[0]
    assert elapsed < 5.0


def test_origin_time_outside_plausible_years_is_rejected_with_its_reason() -> None:
    """Origin years 9999 and 1850 are typing errors; 1967 (the ISC bulletin bundled with
    obspy) and a time a few hours from now are kept."""
    now = np.datetime64("now", "us")
    times = np.array(
        [
            np.datetime64("1967-01-30T01:20:28"),
            np.datetime64("9999-05-01T12:00:00"),
            np.datetime64("1850-05-01T12:00:00"),
            now + np.timedelta64(3, "h"),
        ],
        dtype="datetime64[us]",
    )
    frame = pd.DataFrame([_row(source_location=f"line {i + 2}") for i in range(4)])
    frame["origin_time"] = times
    records, rejected = validate_records(frame, source_file="f.csv", raw=json_rows(frame))
    assert len(records) == 2
    assert rejected["source_location"].tolist() == ["line 3", "line 4"]
    assert rejected["reason"].iloc[0].startswith("origin time 9999-05-01T12:00:00Z is outside")
    assert "1850-05-01T12:00:00Z" in rejected["reason"].iloc[1]
