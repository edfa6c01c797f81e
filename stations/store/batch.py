"""Turning a reader's frames into one store batch: typed columns, screening, duplicates, revisions.

Pure functions on Arrow tables; nothing here touches the disk. The store calls them in order:

1. :func:`records_table` / :func:`rejected_table` cast the reader's pandas frames to the declared
   Arrow types (a frame that cannot be cast is a :class:`~stations.errors.SchemaError`, naming
   the column).
2. :func:`screen` sends rows the store cannot keep (a required value missing, a magnitude type
   outside :class:`~stations.schema.MagnitudeType`) to quarantine.
3. :func:`collapse` handles repeats of one key (:data:`~stations.schema.RECORD_KEY`) inside the
   batch: identical repeats collapse to one row, differing ones are all quarantined.
4. :func:`compare` matches the batch against the current revision of each key in the store:
   equal values (:data:`~stations.schema.VALUE_COLUMNS`, NaN equal to NaN) are duplicates, a
   changed value becomes revision ``previous + 1`` and supersedes the old row's position.

Restatements are duplicates. A row that restates the stored reading of its key in a format
that carries fewer values (e.g. QuakeML after CSV: no noise threshold, distances or azimuth)
is a duplicate when every value it does carry agrees with the stored one, floating-point
values within half a unit in the last decimal place of the stored value
(:func:`~stations.store.keys.rows_restate`). It does not replace the fuller stored reading.
Annotations of the source that only the restatement carries
(:data:`~stations.store.keys.ANNOTATION_COLUMNS`: a QuakeML contribution weight, a formula
name) are not merged into it: the stored reading stays exactly as it was, so
fused magnitudes and the fusion catch-up are not disturbed by a file that says nothing new.
The restating batch is still recorded in the manifest with its counts (its rows count as
duplicates). A real change (a magnitude or amplitude beyond the stored precision, a flag
flipped, a value that differs, a measured value such as a noise threshold where the stored
row had none) is a revision as before.
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import Final

import numpy as np
import pandas as pd
import pyarrow as pa
import pyarrow.compute as pc
from numpy.typing import NDArray

from stations.errors import SchemaError, StoreCorruptError
from stations.schema import (
    INPUT_COLUMNS,
    RECORD_KEY,
    RECORD_SCHEMA,
    VALUE_COLUMNS,
    MagnitudeType,
    accepted_types_text,
)
from stations.store.keys import row_codes, rows_equal, rows_restate
from stations.store.reading import FILE_NO, ROW, position_keys

__all__ = [
    "CONFLICT_REASON",
    "INPUT_SCHEMA",
    "REJECTED_COLUMNS",
    "Collapsed",
    "Comparison",
    "collapse",
    "compare",
    "records_table",
    "rejected_table",
    "screen",
]

#: The reader's columns with their declared types (RECORD_SCHEMA without the store's columns).
INPUT_SCHEMA: Final = pa.schema([RECORD_SCHEMA.field(n) for n in INPUT_COLUMNS])
#: Columns of a reader's ``rejected`` frame.
REJECTED_COLUMNS: Final = ("source_file", "source_location", "reason", "raw")
#: Quarantine reason of rows sharing a key with different values inside one batch.
CONFLICT_REASON: Final = "conflicting values for one key in one batch"

_REJECTED_SCHEMA = pa.schema([pa.field(n, pa.string(), nullable=False) for n in REJECTED_COLUMNS])
_REQUIRED: Final = tuple(f.name for f in INPUT_SCHEMA if not f.nullable)
_TYPES: Final = tuple(m.value for m in MagnitudeType)


def _cast_column(series: pd.Series, field: pa.Field, source_file: str) -> pa.Array:
    where = f"{source_file}: column {field.name!r}"
    typ = field.type
    dtype = series.dtype
    if pa.types.is_timestamp(typ):
        if not isinstance(dtype, pd.DatetimeTZDtype):
            raise SchemaError(
                f"{where} has dtype {dtype}, expected time-zone-aware UTC datetimes; the reader "
                "must convert origin times to UTC"
            )
    elif (pa.types.is_floating(typ) or pa.types.is_boolean(typ)) and (
        pd.api.types.is_string_dtype(dtype) and not series.isna().all()
    ):
        raise SchemaError(f"{where} holds text, expected {typ}; the reader must parse it")
    try:
        return pa.array(series, type=typ, from_pandas=True)
    except (pa.ArrowInvalid, pa.ArrowTypeError, TypeError, ValueError) as exc:
        raise SchemaError(
            f"{where} cannot be stored as {typ} ({exc}); the reader must give that type"
        ) from None


def records_table(records: pd.DataFrame, source_file: str) -> pa.Table:
    """Cast a reader's ``records`` frame to :data:`INPUT_SCHEMA` (column order of the schema).

    Raises
    ------
    SchemaError
        If a column of :data:`~stations.schema.INPUT_COLUMNS` is missing or cannot take its
        declared type; the message names ``source_file`` and the column.
    """
    missing = [n for n in INPUT_COLUMNS if n not in records.columns]
    if missing:
        raise SchemaError(
            f"{source_file}: records lack column {missing[0]!r}; a reader must supply every "
            "column of stations.schema.INPUT_COLUMNS"
        )
    arrays = [_cast_column(records[f.name], f, source_file) for f in INPUT_SCHEMA]
    return pa.Table.from_arrays(arrays, schema=INPUT_SCHEMA)


def rejected_table(rejected: pd.DataFrame | None, source_file: str) -> pa.Table:
    """A reader's ``rejected`` frame as four string columns; missing positions get a placeholder.

    Raises
    ------
    SchemaError
        If a column of :data:`REJECTED_COLUMNS` is missing.
    """
    if rejected is None or len(rejected) == 0:
        return _REJECTED_SCHEMA.empty_table()
    missing = [n for n in REJECTED_COLUMNS if n not in rejected.columns]
    if missing:
        raise SchemaError(
            f"{source_file}: rejected rows lack column {missing[0]!r}; a reader must give "
            f"{', '.join(REJECTED_COLUMNS)}"
        )
    fill = {
        "source_file": source_file,
        "source_location": "position not given",
        "reason": "rejected by the reader (no reason given)",
        "raw": "{}",
    }
    arrays = []
    for name in REJECTED_COLUMNS:
        col = rejected[name].astype(object).where(rejected[name].notna(), fill[name])
        arrays.append(pa.array(col.astype(str), type=pa.string()))
    return pa.Table.from_arrays(arrays, schema=_REJECTED_SCHEMA)


def _raw_json(table: pa.Table) -> pa.Array:
    """Each row as one line of JSON text (ISO 8601 times), for the quarantine's ``raw``."""
    if table.num_rows == 0:
        return pa.array([], pa.string())
    text = table.to_pandas().to_json(
        orient="records", lines=True, date_format="iso", date_unit="us", force_ascii=False
    )
    lines = text.split("\n")  # JSON escapes newlines inside values
    return pa.array(lines[: table.num_rows], pa.string())


def _quarantine_rows(table: pa.Table, reasons: NDArray[np.object_]) -> pa.Table:
    """Quarantine rows (the four :data:`REJECTED_COLUMNS`) for ``table`` with ``reasons``."""
    file_col = pc.fill_null(table.column("source_file"), "source file not given")
    loc_col = pc.fill_null(table.column("source_location"), "position not given")
    return pa.Table.from_arrays(
        [
            file_col.combine_chunks().cast(pa.string()),
            loc_col.combine_chunks().cast(pa.string()),
            pa.array(reasons, pa.string()),
            _raw_json(table),
        ],
        schema=_REJECTED_SCHEMA,
    )


def screen(table: pa.Table) -> tuple[pa.Table, pa.Table]:
    """Split off rows the store cannot keep.

    A row is quarantined when a non-nullable column of the record schema is null or its
    ``magnitude_type`` is not a :class:`~stations.schema.MagnitudeType` value. Readers normally
    reject such rows themselves; this is the store's own guard.

    Returns
    -------
    kept : pyarrow.Table
    quarantined : pyarrow.Table
        The four :data:`REJECTED_COLUMNS`, one row per quarantined input row.
    """
    n = table.num_rows
    reasons = np.full(n, None, dtype=object)
    known = pc.fill_null(
        pc.is_in(table.column("magnitude_type"), value_set=pa.array(_TYPES)), True
    ).to_numpy(zero_copy_only=False)
    if not known.all():
        bad = np.flatnonzero(~known)
        values = table.column("magnitude_type").take(bad).to_numpy(zero_copy_only=False)
        reasons[bad] = (
            "magnitude type '"
            + values.astype(object)
            + f"' is unknown; use one of {accepted_types_text()}"
        )
    for name in reversed(_REQUIRED):  # the first missing column wins
        null = table.column(name).is_null().to_numpy(zero_copy_only=False)
        if null.any():
            reasons[null] = f"{name} is missing; fill it in the source row"
    bad_mask = reasons != None  # noqa: E711 (element-wise comparison on an object array)
    if not bad_mask.any():
        return table, _REJECTED_SCHEMA.empty_table()
    quarantined = _quarantine_rows(table.filter(pa.array(bad_mask)), reasons[bad_mask])
    return table.filter(pa.array(~bad_mask)), quarantined


@dataclass(frozen=True, slots=True)
class Collapsed:
    """Result of :func:`collapse`."""

    unique: pa.Table
    duplicate: int
    conflicts: pa.Table


def collapse(table: pa.Table) -> Collapsed:
    """One row per key: collapse identical repeats, quarantine keys with differing values.

    Of identical repeats the first row (in reader order) is kept, the others count as
    duplicates. When the rows of one key differ in any of
    :data:`~stations.schema.VALUE_COLUMNS`, every row of that key is quarantined with reason
    :data:`CONFLICT_REASON`: the batch does not say which value is right.
    """
    n = table.num_rows
    key = row_codes(table, RECORD_KEY)
    counts = np.bincount(key) if n else np.zeros(0, np.int64)
    multi = counts[key] > 1
    if not multi.any():
        return Collapsed(table, 0, _REJECTED_SCHEMA.empty_table())
    idx = np.flatnonzero(multi)
    order = idx[np.argsort(key[idx], kind="stable")]
    k_sorted = key[order]
    same = k_sorted[1:] == k_sorted[:-1]
    prev, cur = order[:-1][same], order[1:][same]
    equal = rows_equal(table.take(prev), table.take(cur), VALUE_COLUMNS)
    bad_keys = np.unique(k_sorted[1:][same][~equal])
    conflict = np.zeros(counts.size, dtype=bool)
    conflict[bad_keys] = True
    conflict_row = conflict[key]
    _, first = np.unique(key, return_index=True)
    keep = np.zeros(n, dtype=bool)
    keep[first] = True
    keep &= ~conflict_row
    duplicate = int(n - keep.sum() - conflict_row.sum())
    conflicts = _quarantine_rows(
        table.filter(pa.array(conflict_row)),
        np.full(int(conflict_row.sum()), CONFLICT_REASON, dtype=object),
    )
    return Collapsed(table.filter(pa.array(keep)), duplicate, conflicts)


@dataclass(frozen=True, slots=True)
class Comparison:
    """Result of :func:`compare`.

    Attributes
    ----------
    rows : pyarrow.Table
        Rows to write: new keys (revision 1) and changed values (previous revision + 1), with
        the input columns and ``revision`` (int32).
    duplicate : int
        Rows equal to, or restating (module docstring), the current revision of their key
        (not written).
    revised : int
        Rows of ``rows`` that are new revisions of an existing key.
    superseded : ndarray of int64
        Position keys (:func:`~stations.store.reading.position_keys`) of the rows replaced.
    """

    rows: pa.Table
    duplicate: int
    revised: int
    superseded: NDArray[np.int64]


def compare(unique: pa.Table, current: pa.Table) -> Comparison:
    """Match a batch (one row per key) against the store's current rows of the same events.

    Parameters
    ----------
    unique : pyarrow.Table
        Output of :func:`collapse` (input columns, unique keys).
    current : pyarrow.Table
        Current rows of the store for the batch's events: input columns plus ``revision``,
        ``__file_no`` and ``__row``; at most one row per key.

    Raises
    ------
    StoreCorruptError
        If ``current`` holds two rows for one key (the store's invariant is broken).
    """
    n_new = unique.num_rows
    revision = np.ones(n_new, dtype=np.int32)
    if current.num_rows == 0 or n_new == 0:
        rows = unique.append_column("revision", pa.array(revision, pa.int32()))
        return Comparison(rows, 0, 0, np.zeros(0, np.int64))
    keys = pa.concat_tables(
        [
            unique.select(list(RECORD_KEY)),
            current.select(list(RECORD_KEY)).cast(unique.select(list(RECORD_KEY)).schema),
        ]
    )
    code = row_codes(keys, RECORD_KEY)
    c_new, c_cur = code[:n_new], code[n_new:]
    if np.bincount(c_cur).max() > 1:
        raise StoreCorruptError(
            "store holds two current revisions of one key; restore the manifest from a backup"
        )
    where = np.full(int(code.max()) + 1, -1, dtype=np.int64)
    where[c_cur] = np.arange(c_cur.size)
    match = where[c_new]
    bi = np.flatnonzero(match >= 0)
    ei = match[bi]
    new_rows, stored_rows = unique.take(bi), current.take(ei)
    equal = rows_equal(new_rows, stored_rows, VALUE_COLUMNS)
    equal |= rows_restate(new_rows, stored_rows, VALUE_COLUMNS)
    rev_b, rev_e = bi[~equal], ei[~equal]
    old_rev = current.column("revision").to_numpy().astype(np.int32)
    revision[rev_b] = old_rev[rev_e] + 1
    keep = np.ones(n_new, dtype=bool)
    keep[bi[equal]] = False
    rows = unique.append_column("revision", pa.array(revision, pa.int32())).filter(pa.array(keep))
    superseded = position_keys(
        current.column(FILE_NO).to_numpy()[rev_e], current.column(ROW).to_numpy()[rev_e]
    )
    return Comparison(rows, int(equal.sum()), int(rev_b.size), superseded)
