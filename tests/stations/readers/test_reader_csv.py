"""magfuse's CSV layout (stations.readers.csv): the template, a round trip, faulty variants.

Each faulty file is a few lines written into ``tmp_path`` by its test; the test's docstring
says what is wrong with it. Values of the good rows are invented (magfuse's own layout has no
outside source); the checks are that the reader keeps what the file says, line by line.
"""

from __future__ import annotations

import json
from pathlib import Path

import numpy as np
import pandas as pd
import pytest

from stations.errors import MalformedFileError
from stations.ingest import hold_uncomputed
from stations.readers import read_records
from stations.readers.csv import (
    CSV_COLUMNS,
    REQUIRED_COLUMNS,
    is_csv,
    read_csv,
    template_path,
    write_csv,
)
from stations.schema import INPUT_COLUMNS

HEADER = ",".join(CSV_COLUMNS)
#: One valid detection in CSV_COLUMNS order (invented values).
GOOD = (
    "ev1,2024-05-01T12:00:00Z,46.5,8.2,7.5,XX,ABC,,HHZ,ML,2.1,0.5,mm_wa,0.3,40.0,,41.0,"
    "120.0,1.0,false,true,"
)


def _write(tmp_path: Path, text: str, name: str = "in.csv") -> Path:
    path = tmp_path / name
    path.write_text(text, encoding="utf-8")
    return path


def _body(*rows: str, header: str = HEADER) -> str:
    return "\n".join([header, *rows]) + "\n"


def _with(column: str, value: str) -> str:
    """GOOD with one field replaced."""
    fields = GOOD.split(",")
    fields[CSV_COLUMNS.index(column)] = value
    return ",".join(fields)


def test_template_has_a_detection_and_a_non_detection() -> None:
    """The shipped template reads without rejects; row 2 is a censored cell (docs/model.md §2.1)."""
    result = read_csv(template_path())
    assert result.rejected.empty
    rec = result.records
    assert list(rec.columns) == list(INPUT_COLUMNS)
    assert rec["station_id"].tolist() == ["XX.STA01.", "XX.STA02.00"]
    assert rec["detected"].tolist() == [True, False]
    assert rec["magnitude"].iloc[0] == 2.37
    assert np.isnan(rec["magnitude"].iloc[1])
    assert rec["noise_threshold"].iloc[1] == 1.9
    assert rec["amplitude_unit"].iloc[0] == "mm_wa"
    assert rec["origin_time"].iloc[0] == pd.Timestamp("2024-05-01T12:00:03.250Z")
    assert rec["source_location"].tolist() == ["line 2", "line 3"]
    header = template_path().read_text(encoding="utf-8").splitlines()[0].split(",")
    assert tuple(header) == CSV_COLUMNS


def test_round_trip_write_then_read_gives_equal_records(tmp_path: Path) -> None:
    """read -> write_csv -> read: equal frames except where the rows were read from."""
    first = read_csv(template_path()).records
    extra = _write(
        tmp_path,
        _body(
            GOOD,
            _with("origin_time", "2024-05-01T14:00:00.123456+02:00")
            .replace("ABC", "DEF")
            .replace(",2.1,", ",0.1234567890123,"),
        ),
        "extra.csv",
    )
    both = pd.concat([first, read_csv(extra).records], ignore_index=True)
    target = tmp_path / "back.csv"
    write_csv(both, target)
    again = read_csv(target)
    assert again.rejected.empty
    drop = ["source_file", "source_location"]
    pd.testing.assert_frame_equal(again.records.drop(columns=drop), both.drop(columns=drop))
    assert again.records["magnitude"].iloc[3] == 0.1234567890123
    assert again.records["origin_time"].iloc[3] == pd.Timestamp("2024-05-01T12:00:00.123456Z")


def test_time_offsets_are_converted_to_utc(tmp_path: Path) -> None:
    """ISO 8601 with Z, an offset, or neither (taken as UTC) give the same instant."""
    path = _write(
        tmp_path,
        _body(
            _with("origin_time", "2024-05-01T12:00:00Z"),
            _with("origin_time", "2024-05-01T14:00:00+02:00").replace("ABC", "ABD"),
            _with("origin_time", "2024-05-01T12:00:00").replace("ABC", "ABE"),
        ),
    )
    times = read_csv(path).records["origin_time"]
    assert (times == pd.Timestamp("2024-05-01T12:00:00Z")).all()


def test_non_detection_rows_in_the_same_file(tmp_path: Path) -> None:
    """A `detected` column with false, an empty magnitude and a noise threshold: censored."""
    header = (
        "event_id,origin_time,network,station,magnitude_type,magnitude,detected,noise_threshold"
    )
    path = _write(
        tmp_path,
        _body(
            "e1,2024-01-01T00:00:00Z,XX,AAA,ML,1.5,true,",
            "e1,2024-01-01T00:00:00Z,XX,BBB,ML,,false,1.2",
            "e1,2024-01-01T00:00:00Z,XX,CCC,ML,,FALSE,",
            "e1,2024-01-01T00:00:00Z,XX,DDD,ML,1.1,,",
            header=header,
        ),
    )
    result = read_csv(path)
    assert result.rejected.empty
    assert result.records["detected"].tolist() == [True, False, False, True]
    assert result.records["noise_threshold"].iloc[1] == 1.2
    assert np.isnan(result.records["noise_threshold"].iloc[2])


def test_required_columns_only(tmp_path: Path) -> None:
    path = _write(
        tmp_path,
        _body("e1,2024-01-01T00:00:00Z,XX,AAA,mb,4.2", header=",".join(REQUIRED_COLUMNS)),
    )
    rec = read_csv(path).records.iloc[0]
    assert rec["magnitude_type"] == "mb"
    assert rec["detected"]
    assert not rec["clipped"]
    assert pd.isna(rec["channel"])


def test_missing_column_names_it(tmp_path: Path) -> None:
    """Faulty: the `station` column was left out of the header and the rows."""
    names = [c for c in CSV_COLUMNS if c != "station"]
    path = _write(tmp_path, _body("", header=",".join(names)))
    with pytest.raises(MalformedFileError, match=r"in\.csv: line 1: required column 'station'"):
        read_csv(path)


def test_renamed_header_is_reported_with_the_missing_name(tmp_path: Path) -> None:
    """Faulty: `magnitude` renamed to `mag`; the message names both."""
    path = _write(tmp_path, _body(GOOD, header=HEADER.replace(",magnitude,", ",mag,")))
    assert is_csv(path)  # still recognised, so the dispatcher gives this precise message
    with pytest.raises(
        MalformedFileError,
        match=r"required column 'magnitude' missing \(found unknown column 'mag'",
    ):
        read_records(path)


def test_unknown_extra_column_is_an_error(tmp_path: Path) -> None:
    """Faulty: a misspelt optional column (`amplitde`) would otherwise be silently lost."""
    path = _write(tmp_path, _body(GOOD + ",x", header=HEADER + ",amplitde"))
    with pytest.raises(MalformedFileError, match="unknown column 'amplitde'"):
        read_csv(path)


def test_duplicate_column_is_an_error(tmp_path: Path) -> None:
    """Faulty: `channel` appears twice."""
    path = _write(tmp_path, _body(GOOD + ",HHE", header=HEADER + ",channel"))
    with pytest.raises(MalformedFileError, match="column 'channel' appears twice"):
        read_csv(path)


def test_empty_file_is_malformed(tmp_path: Path) -> None:
    """Faulty: zero bytes."""
    path = _write(tmp_path, "")
    with pytest.raises(MalformedFileError, match="line 1: no header line"):
        read_csv(path)


def test_latin1_file_is_malformed(tmp_path: Path) -> None:
    """Faulty: saved as Latin-1, with a byte that is not UTF-8 in a data line."""
    path = tmp_path / "latin.csv"
    path.write_bytes(_body(_with("event_id", "\xe9v1")).encode("latin-1"))
    with pytest.raises(MalformedFileError, match="UTF-8"):
        read_csv(path)


def test_unknown_station_code_is_rejected_with_its_line(tmp_path: Path) -> None:
    """Faulty: station code `AB_C` holds a character outside A-Z 0-9 (FDSN v1.0)."""
    path = _write(tmp_path, _body(GOOD, _with("station", "AB_C")))
    result = read_csv(path)
    assert len(result.records) == 1
    assert result.rejected["source_location"].tolist() == ["line 3"]
    assert "'XX.AB_C.' is not an FDSN NET.STA.LOC identifier" in result.rejected["reason"].iloc[0]
    assert json.loads(result.rejected["raw"].iloc[0])["station"] == "AB_C"


def test_nan_magnitude_of_a_detection_is_held_for_computation(tmp_path: Path) -> None:
    """Faulty: a detection whose magnitude is the text NaN but which carries an amplitude.

    The reader keeps it (``ingest --compute`` can compute the magnitude); the ingest gate
    quarantines it when nothing computes it.
    """
    path = _write(tmp_path, _body(_with("magnitude", "NaN")))
    result = read_csv(path)
    assert len(result.records) == 1 and result.records["magnitude"].isna().all()
    assert result.records["amplitude"].notna().all()
    kept, held = hold_uncomputed(result.records, source_file=str(path))
    assert kept.empty
    assert "ingest with --compute" in held["reason"].iloc[0]


def test_nan_magnitude_without_amplitude_is_rejected(tmp_path: Path) -> None:
    """Faulty: a detection with neither a magnitude nor an amplitude."""
    fields = GOOD.split(",")
    for column in ("magnitude", "amplitude", "amplitude_unit", "period"):
        fields[CSV_COLUMNS.index(column)] = ""
    path = _write(tmp_path, _body(",".join(fields)))
    result = read_csv(path)
    assert result.records.empty
    assert "detection without a magnitude or an amplitude" in result.rejected["reason"].iloc[0]


def test_unknown_magnitude_type_is_rejected(tmp_path: Path) -> None:
    """Faulty: `MB` (ambiguous between mb and mB, left out of the alias table on purpose)."""
    path = _write(tmp_path, _body(_with("magnitude_type", "MB")))
    reason = read_csv(path).rejected["reason"].iloc[0]
    assert reason.startswith("unknown magnitude type 'MB'; use one of ML, mb, mB_BB")


def test_text_in_a_number_column_is_rejected(tmp_path: Path) -> None:
    """Faulty: distance written with a unit (`40 km`)."""
    path = _write(tmp_path, _body(GOOD, _with("distance_km", "40 km")))
    result = read_csv(path)
    assert len(result.records) == 1
    assert result.rejected["reason"].iloc[0] == "distance_km '40 km' is not a number; correct it"


def test_bad_boolean_is_rejected(tmp_path: Path) -> None:
    """Faulty: clipped = `maybe`."""
    path = _write(tmp_path, _body(_with("clipped", "maybe")))
    assert "clipped 'maybe' is not true or false" in read_csv(path).rejected["reason"].iloc[0]


def test_wrong_field_count_and_blank_lines_keep_line_numbers(tmp_path: Path) -> None:
    """Faulty: line 4 lacks a field, line 6 has one too many; lines 3 and 7 are blank."""
    short = GOOD.rsplit(",", 1)[0]
    path = _write(
        tmp_path,
        _body(GOOD, "", short, _with("station", "BBB"), GOOD + ",9", "", _with("magnitude", "11")),
    )
    result = read_csv(path)
    assert result.records["source_location"].tolist() == ["line 2", "line 5"]
    assert result.rejected["source_location"].tolist() == ["line 4", "line 6", "line 8"]
    reasons = result.rejected["reason"].tolist()
    assert reasons[0].startswith("line has 21 fields, expected 22")
    assert reasons[1].startswith("line has 23 fields, expected 22")
    assert reasons[2].startswith("magnitude 11 is outside the accepted range [-3, 10]")
    assert json.loads(result.rejected["raw"].iloc[0]) == {"text": short}


def test_quoted_fields_and_byte_order_mark(tmp_path: Path) -> None:
    """A BOM before the header and a quoted event id with a comma are fine."""
    path = tmp_path / "bom.csv"
    path.write_bytes(("\ufeff" + _body(_with("event_id", '"ev,1"'))).encode("utf-8"))
    assert is_csv(path)
    rec = read_csv(path).records
    assert rec["event_id"].tolist() == ["ev,1"]


@pytest.mark.parametrize(
    "text",
    [
        "",
        "a,b,c\n1,2,3\n",
        "event_id,origin_time\n",
        "PAR1\x00\x00binary",
    ],
)
def test_is_csv_is_strict(tmp_path: Path, text: str) -> None:
    assert not is_csv(_write(tmp_path, text))


def test_header_only_file_gives_empty_typed_frames(tmp_path: Path) -> None:
    """A header with no data lines is a valid, empty file."""
    path = _write(tmp_path, ",".join(REQUIRED_COLUMNS) + "\n")
    result = read_csv(path)
    assert result.records.empty and result.rejected.empty
    assert list(result.records.columns) == list(INPUT_COLUMNS)
    assert str(result.records["origin_time"].dtype) == "datetime64[us, UTC]"
