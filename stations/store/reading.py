"""Reading committed files: schema check, row-group pruning by event id, row positions.

Every row of a data file has a position ``(file_no, row)``; the superseded index lists the
positions that later revisions replaced, so the current view is "all rows minus superseded
positions" without any join on string keys. Data files are sorted by ``event_id`` and written
with row-group statistics, so a look-up of a few events reads only the row groups whose
``[min, max]`` event-id range can hold them.
"""

from __future__ import annotations

from collections.abc import Sequence
from pathlib import Path

import numpy as np
import pyarrow as pa
import pyarrow.compute as pc
import pyarrow.parquet as pq
from numpy.typing import NDArray

from stations.errors import StoreCorruptError
from stations.schema import check_schema
from stations.store.checksums import check_digest, damaged

__all__ = [
    "EVENT_INDEX_SCHEMA",
    "FILE_NO",
    "ROW",
    "SUPERSEDED_SCHEMA",
    "IndexGoneError",
    "candidate_row_groups",
    "open_checked",
    "position_keys",
    "read_rows",
    "read_whole",
]

#: Column names of the row position added to tables read from data files.
FILE_NO = "__file_no"
ROW = "__row"

#: Event index: one row per (event, data file holding rows of that event), sorted by event id.
EVENT_INDEX_SCHEMA = pa.schema(
    [
        pa.field("event_id", pa.string(), nullable=False),
        pa.field("file_no", pa.int32(), nullable=False),
    ],
    metadata={"magfuse.schema": "event_index", "magfuse.schema_version": "1"},
)

#: Superseded index: positions of rows that a later revision replaced, sorted.
SUPERSEDED_SCHEMA = pa.schema(
    [
        pa.field("file_no", pa.int32(), nullable=False),
        pa.field("row", pa.int64(), nullable=False),
    ],
    metadata={"magfuse.schema": "superseded_index", "magfuse.schema_version": "1"},
)

#: Bits of a position key kept for the row number (files hold far fewer than 2**40 rows).
_ROW_BITS = 40


class IndexGoneError(Exception):
    """An index file named by an older manifest was removed meanwhile; re-read the manifest."""


def position_keys(file_no: NDArray[np.integer], row: NDArray[np.integer]) -> NDArray[np.int64]:
    """One int64 per position: ``file_no * 2**40 + row``."""
    return (np.asarray(file_no, dtype=np.int64) << _ROW_BITS) + np.asarray(row, dtype=np.int64)


def open_checked(
    path: Path, schema: pa.Schema, *, index: bool = False, digest: str | None = None
) -> pq.ParquetFile:
    """Open a committed Parquet file and check its columns against ``schema``.

    Page checksums are verified on every later read of the file; with ``digest`` the SHA-256
    of the whole file is compared first (:mod:`stations.store.checksums`).

    Raises
    ------
    IndexGoneError
        If ``index`` and the file no longer exists (a reader on an old manifest).
    StoreCorruptError
        If the file is missing, damaged (checksum) or is not readable Parquet.
    SchemaError
        If a column is missing or has another type (names the file and the column).
    """
    try:
        check_digest(path, digest)
        pf = pq.ParquetFile(path, page_checksum_verification=True)
    except FileNotFoundError:
        if index:
            raise IndexGoneError(str(path)) from None
        raise StoreCorruptError(
            f"{path}: listed in the manifest but missing; restore it from a backup"
        ) from None
    except (pa.ArrowException, OSError) as exc:
        raise damaged(path, f"not a readable Parquet file: {str(exc).splitlines()[0]}") from None
    check_schema(pf.schema_arrow, schema, where=str(path))
    return pf


def read_whole(
    path: Path,
    schema: pa.Schema,
    *,
    index: bool = False,
    digest: str | None = None,
    row_groups: Sequence[int] | None = None,
    columns: Sequence[str] | None = None,
) -> pa.Table:
    """Read a committed file (or some of its row groups) with every check of :func:`open_checked`.

    Raises
    ------
    IndexGoneError, StoreCorruptError, SchemaError
        As :func:`open_checked`; a page whose checksum fails is a ``StoreCorruptError``.
    """
    pf = open_checked(path, schema, index=index, digest=digest)
    cols = None if columns is None else list(columns)
    try:
        if row_groups is None:
            return pf.read(columns=cols)
        return pf.read_row_groups(list(row_groups), columns=cols)
    except (pa.ArrowException, OSError) as exc:
        raise damaged(path, f"a page cannot be read: {str(exc).splitlines()[0]}") from None


def candidate_row_groups(
    pf: pq.ParquetFile, column: str, ids_sorted: NDArray[np.object_]
) -> list[int]:
    """Row groups whose min/max statistics of ``column`` admit at least one of ``ids_sorted``.

    A row group without usable statistics is always a candidate (never a false negative).
    """
    md = pf.metadata
    n_rg = md.num_row_groups
    if n_rg == 0 or ids_sorted.size == 0:
        return []
    col = pf.schema_arrow.get_field_index(column)
    lo = np.empty(n_rg, dtype=object)
    hi = np.empty(n_rg, dtype=object)
    unknown = np.zeros(n_rg, dtype=bool)
    for i in range(n_rg):  # loop over row groups (tens per file), not rows
        st = md.row_group(i).column(col).statistics
        if st is None or not st.has_min_max:
            unknown[i] = True
            lo[i], hi[i] = "", ""
        else:
            lo[i], hi[i] = st.min, st.max
    # For each row group, the number of ids <= max minus the number of ids < min.
    count = np.searchsorted(ids_sorted, hi, side="right") - np.searchsorted(
        ids_sorted, lo, side="left"
    )
    return [int(i) for i in np.flatnonzero((count > 0) | unknown)]


def read_rows(
    pf: pq.ParquetFile,
    file_no: int,
    *,
    columns: Sequence[str] | None = None,
    event_ids: NDArray[np.object_] | None = None,
    where: Path | None = None,
) -> pa.Table:
    """Read a data file (or only the rows of ``event_ids``) with its row positions.

    Parameters
    ----------
    pf : pyarrow.parquet.ParquetFile
        An open, checked data file.
    file_no : int
        Its file number, written into the ``__file_no`` column.
    columns : sequence of str, optional
        Columns to read (default all).
    event_ids : ndarray of str, optional
        Sorted, unique event ids; only row groups that may hold them are read and only their
        rows are returned.
    where : Path, optional
        The file's path, named when a page is damaged.

    Returns
    -------
    pyarrow.Table
        The columns plus ``__file_no`` (int32) and ``__row`` (int64, position in the file).
    """
    md = pf.metadata
    sizes = np.array([md.row_group(i).num_rows for i in range(md.num_row_groups)], np.int64)
    starts = np.concatenate([[0], np.cumsum(sizes)[:-1]]) if sizes.size else sizes
    read_cols = None if columns is None else list(columns)
    if event_ids is not None and read_cols is not None and "event_id" not in read_cols:
        read_cols.append("event_id")
    if event_ids is None:
        groups = list(range(md.num_row_groups))
    else:
        groups = candidate_row_groups(pf, "event_id", event_ids)
    if not groups:
        table = pf.schema_arrow.empty_table()
        if read_cols is not None:
            table = table.select(read_cols)
        rows = np.zeros(0, dtype=np.int64)
    else:
        try:
            table = pf.read_row_groups(groups, columns=read_cols)
        except (pa.ArrowException, OSError) as exc:
            raise damaged(
                where or Path("a data file"), f"a page cannot be read: {str(exc).splitlines()[0]}"
            ) from None
        rows = np.concatenate([np.arange(starts[g], starts[g] + sizes[g]) for g in groups])
    if event_ids is not None and table.num_rows:
        keep = pc.is_in(table.column("event_id"), value_set=pa.array(event_ids, pa.string()))
        mask = keep.to_numpy(zero_copy_only=False)
        table = table.filter(keep)
        rows = rows[mask]
    if columns is not None and "event_id" not in columns and event_ids is not None:
        table = table.drop_columns(["event_id"])
    table = table.append_column(FILE_NO, pa.array(np.full(table.num_rows, file_no, np.int32)))
    return table.append_column(ROW, pa.array(rows, pa.int64()))
