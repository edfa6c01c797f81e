"""Parquet files in the record layout (stations.readers.parquet): round trips and schema checks.

The reference is pyarrow itself: files are written by ``pq.write_table`` or by pandas'
``DataFrame.to_parquet`` (the usual export path), and read back through the reader.
"""

from __future__ import annotations

import io
from pathlib import Path

import numpy as np
import pandas as pd
import pyarrow as pa
import pyarrow.parquet as pq
import pytest

from stations.errors import MalformedFileError
from stations.readers.csv import read_csv, template_path
from stations.readers.parquet import is_parquet, read_parquet, write_parquet
from stations.schema import INPUT_COLUMNS
from stations.validation import INPUT_SCHEMA


@pytest.fixture
def records() -> pd.DataFrame:
    return read_csv(template_path()).records


def _compare(back: pd.DataFrame, records: pd.DataFrame) -> None:
    drop = ["source_file", "source_location"]
    pd.testing.assert_frame_equal(back.drop(columns=drop), records.drop(columns=drop))


def test_round_trip(tmp_path: Path, records: pd.DataFrame) -> None:
    """write_parquet -> read_parquet: equal frames; provenance becomes this file, row N."""
    target = tmp_path / "export.parquet"
    write_parquet(records, target)
    assert is_parquet(target)
    back = read_parquet(target)
    assert back.rejected.empty
    _compare(back.records, records)
    assert back.records["source_file"].tolist() == [str(target)] * 2
    assert back.records["source_location"].tolist() == ["row 1", "row 2"]


def test_pandas_export_with_large_strings_and_ns_times(
    tmp_path: Path, records: pd.DataFrame
) -> None:
    """DataFrame.to_parquet writes large_string text and may write ns timestamps: accepted."""
    frame = records.copy()
    frame["origin_time"] = frame["origin_time"].astype("datetime64[ns, UTC]")
    frame["batch_id"] = "b1"  # an extra store column is ignored
    target = tmp_path / "pandas.parquet"
    frame.to_parquet(target, index=False)
    schema = pq.read_schema(target)
    assert pa.types.is_large_string(schema.field("event_id").type) or pa.types.is_string(
        schema.field("event_id").type
    )
    back = read_parquet(target)
    assert back.rejected.empty
    _compare(back.records, records)


def test_missing_column_is_named(tmp_path: Path, records: pd.DataFrame) -> None:
    """Faulty: an export without `magnitude_type`."""
    target = tmp_path / "short.parquet"
    pq.write_table(
        pa.Table.from_pandas(records.drop(columns=["magnitude_type"]), preserve_index=False),
        target,
    )
    with pytest.raises(MalformedFileError, match="column 'magnitude_type' is missing"):
        read_parquet(target)


def test_wrong_type_is_named(tmp_path: Path, records: pd.DataFrame) -> None:
    """Faulty: magnitude stored as text."""
    frame = records.copy()
    frame["magnitude"] = frame["magnitude"].astype(str)
    target = tmp_path / "text.parquet"
    frame.to_parquet(target, index=False)
    with pytest.raises(MalformedFileError, match="column 'magnitude' has type"):
        read_parquet(target)


def test_local_time_zone_is_refused(tmp_path: Path, records: pd.DataFrame) -> None:
    """Faulty: origin_time in Europe/Zurich: the layout asks for UTC."""
    frame = records.copy()
    frame["origin_time"] = frame["origin_time"].dt.tz_convert("Europe/Zurich")
    target = tmp_path / "zurich.parquet"
    frame.to_parquet(target, index=False)
    with pytest.raises(MalformedFileError, match="column 'origin_time' has type"):
        read_parquet(target)


def test_rows_are_validated(tmp_path: Path, records: pd.DataFrame) -> None:
    """Faulty: row 2 carries an unknown type and a lower-case station id."""
    frame = records.copy()
    frame.loc[1, "magnitude_type"] = "MB"
    frame.loc[0, "station_id"] = "xx.sta01."
    target = tmp_path / "rows.parquet"
    write_parquet(frame, target)
    back = read_parquet(target)
    assert back.records["station_id"].tolist() == ["XX.STA01."]
    assert back.rejected["source_location"].tolist() == ["row 2"]
    assert "unknown magnitude type 'MB'" in back.rejected["reason"].iloc[0]


def test_not_parquet_is_malformed(tmp_path: Path) -> None:
    """Faulty: PAR1 at both ends but nothing valid between."""
    target = tmp_path / "fake.parquet"
    target.write_bytes(b"PAR1" + b"\x00" * 16 + b"PAR1")
    assert is_parquet(target)
    with pytest.raises(MalformedFileError, match="not a readable Parquet file"):
        read_parquet(target)


def test_detector_restores_the_file_position(records: pd.DataFrame) -> None:
    buf = io.BytesIO()
    pq.write_table(
        pa.Table.from_pandas(
            records[list(INPUT_COLUMNS)], schema=INPUT_SCHEMA, preserve_index=False
        ),
        buf,
    )
    buf.seek(7)
    assert is_parquet(buf)
    assert buf.tell() == 7
    assert not is_parquet(io.BytesIO(b"PAR1 but not at the end"))


def test_empty_export_reads_as_empty(tmp_path: Path) -> None:
    target = tmp_path / "empty.parquet"
    pq.write_table(INPUT_SCHEMA.empty_table(), target)
    back = read_parquet(target)
    assert back.records.empty
    assert list(back.records.columns) == list(INPUT_COLUMNS)
    assert back.records["magnitude"].dtype == np.float64
