"""Parquet files already in the record layout, e.g. an export of the store or of another tool.

The file must hold every column of :data:`stations.schema.INPUT_COLUMNS` with the Arrow type of
:data:`stations.schema.RECORD_SCHEMA`; extra columns (the store's ``batch_id``,
``ingest_time``, ``revision``) are ignored. The schema is checked with ``pq.read_schema`` before
any data is read (docs/conventions.md item 14). A few encodings that hold exactly the same values
are accepted and cast: ``large_string``/``string_view``/dictionary-encoded text for ``string``
(pandas writes those), a timestamp in s, ms, us or ns with time zone UTC for ``origin_time``
(ns only if no value has sub-microsecond digits), and the ``null`` type for an all-empty column.

===================== ================================= ==========================================
column                type (unit)                       notes
===================== ================================= ==========================================
event_id              string                            as in the file
origin_time           timestamp[us, UTC]                see above for other units
event_latitude, ...   double (deg, km, s, ...)          units of RECORD_SCHEMA field metadata
station_id            string ``NET.STA.LOC``            re-checked, canonical upper case
magnitude_type        string                            canonical name or unambiguous alias
detected, clipped     bool                              null read as true / false
source_file,          string                            **replaced**: the Parquet path and
source_location                                         ``"row N"`` (1-based), i.e. where magfuse
                                                        read the row
===================== ================================= ==========================================

Rows go through :func:`stations.validation.validate_records` like those of every other format.

**Damaged files are rejected whole.** Pages are read with their checksums verified (files that
magfuse writes, the store's and its exports, carry a CRC-32 per page: Apache Parquet format,
``PageHeader.crc``), and every decoded column of every row group must lie within the minimum
and maximum that the file's own statistics record for it. A file failing either check is a
:class:`~stations.errors.MalformedFileError` and no row of it is stored: a damaged file would
otherwise enter the store as "revisions" of readings it never changed.

Examples
--------
>>> import tempfile
>>> from pathlib import Path
>>> from stations.readers.csv import read_csv, template_path
>>> from stations.readers.parquet import read_parquet, write_parquet
>>> records = read_csv(template_path()).records
>>> target = Path(tempfile.mkdtemp()) / "export.parquet"
>>> write_parquet(records, target)
>>> back = read_parquet(target)
>>> back.records["source_location"].tolist()
['row 1', 'row 2']
>>> back.records["magnitude"].equals(records["magnitude"])
True
"""

from __future__ import annotations

from pathlib import Path
from typing import Any, Final

import numpy as np
import pandas as pd
import pyarrow as pa
import pyarrow.compute as pc
import pyarrow.parquet as pq
from numpy.typing import NDArray

from stations import strict_json
from stations.errors import MalformedFileError
from stations.readers import _sniff
from stations.readers.base import ReadResult, display_path
from stations.schema import INPUT_COLUMNS
from stations.validation import DEFAULT_MAGNITUDE_RANGE, INPUT_SCHEMA, validate_records

__all__ = ["is_parquet", "read_parquet", "write_parquet"]

_MAGIC: Final = b"PAR1"
_UTC_NAMES: Final = frozenset({"UTC", "Etc/UTC", "+00:00", "Z"})


def is_parquet(path: Any) -> bool:
    """True if the file starts and ends with the Parquet magic bytes ``PAR1``.

    Never raises; reads 8 bytes; restores the position of a file object.
    """
    head = _sniff.head_bytes(path, 4)
    tail = _sniff.tail_bytes(path, 4)
    return head == _MAGIC and tail == _MAGIC


def _same_values(found: pa.DataType, expected: pa.DataType) -> bool:
    """True if ``found`` holds the values of ``expected`` without loss of meaning."""
    if found.equals(expected) or pa.types.is_null(found):
        return True
    if pa.types.is_string(expected):
        if pa.types.is_dictionary(found):
            found = found.value_type
        return (
            pa.types.is_string(found)
            or pa.types.is_large_string(found)
            or pa.types.is_string_view(found)
        )
    if pa.types.is_timestamp(expected):
        return pa.types.is_timestamp(found) and found.tz in _UTC_NAMES
    return False


def _check_schema(schema: pa.Schema, shown: str) -> None:
    for field in INPUT_SCHEMA:
        idx = schema.get_field_index(field.name)
        if idx < 0:
            raise MalformedFileError(
                f"{shown}: column {field.name!r} is missing (expected {field.type}); write "
                "every column of stations.schema.INPUT_COLUMNS"
            )
        found = schema.field(idx).type
        if not _same_values(found, field.type):
            raise MalformedFileError(
                f"{shown}: column {field.name!r} has type {found}, expected {field.type}; "
                "cast it before writing"
            )


def _check_statistics(pf: pq.ParquetFile, table: pa.Table, shown: str) -> None:
    """Raise if a decoded column leaves the min/max its row group's statistics record.

    Loops over row groups and columns (tens), never rows; columns without statistics, and
    text and time columns whose statistics are not comparable after decoding, are skipped.
    """
    md = pf.metadata
    names = pf.schema_arrow.names
    start = 0
    for g in range(md.num_row_groups):
        rg = md.row_group(g)
        part = table.slice(start, rg.num_rows)
        start += rg.num_rows
        for c in range(rg.num_columns):
            col = rg.column(c)
            name = col.path_in_schema
            st = col.statistics
            if name not in part.column_names or name not in names or st is None:
                continue
            arr = part.column(name)
            if not st.has_min_max or not (
                pa.types.is_floating(arr.type) or pa.types.is_integer(arr.type)
            ):
                continue
            mm = pc.min_max(arr)
            lo, hi = mm["min"].as_py(), mm["max"].as_py()
            if lo is None:
                continue
            if lo < st.min or hi > st.max:
                raise MalformedFileError(
                    f"{shown}: damaged, column {name!r} of row group {g + 1} holds values "
                    f"outside the range the file records for it ({st.min} .. {st.max}); "
                    "nothing of it was stored, write or fetch the file again"
                )


def read_parquet(
    path: Path | str, *, magnitude_range: tuple[float, float] = DEFAULT_MAGNITUDE_RANGE
) -> ReadResult:
    """Read a Parquet file of records (see the module docstring).

    Parameters
    ----------
    path : Path or str
        The file.
    magnitude_range : (float, float), default=(-3.0, 10.0)
        Accepted magnitudes, magnitude units.

    Returns
    -------
    ReadResult
        ``source_location`` is ``"row N"``, 1-based.

    Raises
    ------
    MalformedFileError
        If the file is not readable Parquet, is damaged (page checksum, values outside its
        own statistics), lacks a column, or a column has another type.
    """
    shown = display_path(path)
    try:
        schema = pq.read_schema(path)
    except (pa.ArrowException, OSError) as exc:
        raise MalformedFileError(
            f"{shown}: not a readable Parquet file ({exc}); write it again"
        ) from None
    _check_schema(schema, shown)
    try:
        pf = pq.ParquetFile(path, page_checksum_verification=True)
        table = pf.read(columns=list(INPUT_COLUMNS))
    except (pa.ArrowException, OSError) as exc:
        raise MalformedFileError(
            f"{shown}: damaged, a page cannot be read ({str(exc).splitlines()[0]}); nothing "
            "of it was stored, write or fetch the file again"
        ) from None
    _check_statistics(pf, table, shown)
    try:
        table = table.cast(INPUT_SCHEMA, safe=True)
    except (pa.ArrowException, OSError) as exc:
        raise MalformedFileError(
            f"{shown}: {str(exc).splitlines()[0]}; write the columns with the types of "
            "stations.schema.RECORD_SCHEMA"
        ) from None
    frame = table.to_pandas()
    n = len(frame)
    frame["source_location"] = np.char.add("row ", np.arange(1, n + 1).astype(str)).astype(object)
    frame = frame.drop(columns=["source_file"])

    def raw(idx: NDArray[np.int64]) -> list[str]:
        rows = table.take(pa.array(idx)).to_pylist()
        return [strict_json.dumps(row) for row in rows]

    records, rejected = validate_records(
        frame, source_file=shown, raw=raw, magnitude_range=magnitude_range
    )
    return ReadResult(source_file=shown, records=records, rejected=rejected)


def write_parquet(records: pd.DataFrame, path: Path | str) -> None:
    """Write records (columns of :data:`~stations.schema.INPUT_COLUMNS`) through the schema.

    Raises
    ------
    KeyError
        If a column of :data:`~stations.schema.INPUT_COLUMNS` is missing.
    pyarrow.ArrowInvalid
        If a column cannot be cast to its declared type.
    """
    missing = [c for c in INPUT_COLUMNS if c not in records]
    if missing:
        raise KeyError(f"records lack column {missing[0]!r}; pass a ReadResult.records frame")
    table = pa.Table.from_pandas(
        records[list(INPUT_COLUMNS)], schema=INPUT_SCHEMA, preserve_index=False
    )
    pq.write_table(table, path, write_page_checksum=True)
