"""Writing one batch: partitioned data files, quarantine, indexes, then the manifest commit.

Order of a commit (the caller holds the write lock):

1. each data file, the quarantine file and the new index files are written under temporary
   names, synced and renamed to their final names (:mod:`stations.store.atomic`);
2. the new manifest is written the same way; its rename is the commit point.

A crash before step 2 completes leaves files that no manifest lists: readers ignore them and
the next writer removes them (:func:`sweep`). A crash after it leaves the batch complete.

``_checkpoint`` is called between the steps with the name of the step just done; it does
nothing, and exists so that fault-injection tests can stop the process at a chosen moment.
"""

from __future__ import annotations

import dataclasses
import os
from collections.abc import Callable
from datetime import datetime
from pathlib import Path
from typing import Final

import numpy as np
import pyarrow as pa
import pyarrow.compute as pc
from numpy.typing import NDArray

from stations.schema import QUARANTINE_SCHEMA, RECORD_SCHEMA
from stations.store.atomic import ensure_dir, write_parquet_atomic
from stations.store.checksums import sha256_of
from stations.store.layout import (
    OWNED_DIRS,
    data_path,
    index_path,
    quarantine_path,
)
from stations.store.links import inside
from stations.store.manifest import BatchEntry, FileEntry, Manifest, save_manifest
from stations.store.reading import (
    EVENT_INDEX_SCHEMA,
    SUPERSEDED_SCHEMA,
    read_whole,
)

__all__ = ["ROW_GROUP_ROWS", "BatchCounts", "commit_batch", "sweep"]

#: Rows per Parquet row group of data and index files. A single-event look-up reads one row
#: group of the event index and one of each data file holding the event, so smaller groups read
#: less: on 3 million rows (bench/store_bench.py --rows 3000000, one run each) the median
#: look-up took 9.8 ms with 8,192 rows per group against 15 ms with 16,384 or 32,768, and the
#: month scan and the file size did not change.
ROW_GROUP_ROWS: Final = 8_192

_ROW_BITS = 40
_SORT_KEYS: Final = [
    ("event_id", "ascending", "at_end"),
    ("station_id", "ascending", "at_end"),
    ("channel", "ascending", "at_end"),
    ("revision", "ascending", "at_end"),
]


def _no_checkpoint(stage: str) -> None:
    """Default fault-injection hook: do nothing."""


_checkpoint: Callable[[str], None] = _no_checkpoint


@dataclasses.dataclass(frozen=True, slots=True)
class BatchCounts:
    """Counts recorded with a batch in the manifest."""

    accepted: int
    duplicate: int
    revised: int
    quarantined: int
    retracted: int = 0


def _iso(ts: pa.Scalar) -> str:
    value = ts.as_py()
    return f"{value:%Y-%m-%dT%H:%M:%S.%f}Z"


def _constant(n: int, value: datetime | str, typ: pa.DataType) -> pa.Array:
    return pa.repeat(pa.scalar(value, typ), n)


def _partitions(rows: pa.Table) -> list[tuple[str, str, NDArray[np.int64]]]:
    """(magnitude type, YYYY-MM, row indices) of each partition, sorted by type then month."""
    if rows.num_rows == 0:
        return []
    enc = pc.dictionary_encode(rows.column("magnitude_type").combine_chunks())
    t_code = enc.indices.to_numpy(zero_copy_only=False).astype(np.int64)
    t_names = enc.dictionary.to_pylist()
    origin = rows.column("origin_time").combine_chunks().cast(pa.timestamp("us"))
    months = origin.to_numpy(zero_copy_only=False).astype("datetime64[M]")
    m_code = months.astype(np.int64)
    m0 = int(m_code.min())
    part = t_code * (int(m_code.max()) - m0 + 1) + (m_code - m0)
    order = np.argsort(part, kind="stable")
    p_sorted = part[order]
    cuts = np.flatnonzero(np.diff(p_sorted)) + 1
    out = []
    for chunk in np.split(order, cuts):  # loop over partitions (types x months), not rows
        first = int(chunk[0])
        month = str(months[first])  # 'YYYY-MM'
        out.append((str(t_names[t_code[first]]), month, chunk))
    out.sort(key=lambda p: (p[0], p[1]))
    return out


def _write_data(
    root: Path,
    rows: pa.Table,
    *,
    batch_id: str,
    first_file_no: int,
    sums: dict[str, str],
) -> tuple[list[FileEntry], pa.Table]:
    """Write one file per partition; return the entries and the new event-index pairs.

    The SHA-256 of each file written goes into ``sums`` (relative path -> digest).
    """
    entries: list[FileEntry] = []
    pairs: list[pa.Table] = []
    file_no = first_file_no
    for mtype, month, idx in _partitions(rows):
        part = rows.take(pa.array(idx))
        part = part.take(pc.sort_indices(part, sort_keys=_SORT_KEYS))
        rel = data_path(mtype, month, batch_id, file_no)
        path = root / rel
        ensure_dir(path.parent, root)
        size = write_parquet_atomic(path, part, RECORD_SCHEMA, row_group_size=ROW_GROUP_ROWS)
        sums[rel] = sha256_of(path)
        t_range = pc.min_max(part.column("origin_time"))
        e_range = pc.min_max(part.column("event_id"))
        entries.append(
            FileEntry(
                file_no=file_no,
                path=rel,
                batch_id=batch_id,
                magnitude_type=mtype,
                month=month,
                rows=part.num_rows,
                detected=int(pc.sum(part.column("detected")).as_py() or 0),
                superseded=0,
                max_revision=int(pc.max(part.column("revision")).as_py()),
                min_origin_time=_iso(t_range["min"]),
                max_origin_time=_iso(t_range["max"]),
                min_event_id=str(e_range["min"].as_py()),
                max_event_id=str(e_range["max"].as_py()),
                bytes=size,
            )
        )
        events = pc.unique(part.column("event_id"))
        pairs.append(
            pa.Table.from_arrays(
                [events, pa.array(np.full(len(events), file_no, np.int32))],
                schema=EVENT_INDEX_SCHEMA,
            )
        )
        file_no += 1
    new_pairs = pa.concat_tables(pairs) if pairs else EVENT_INDEX_SCHEMA.empty_table()
    return entries, new_pairs


def _rewrite_index(
    root: Path,
    old: str | None,
    new_rows: pa.Table,
    schema: pa.Schema,
    kind: str,
    generation: int,
    sort_keys: list[tuple[str, str]],
    sums: dict[str, str],
    old_digest: str | None = None,
) -> str:
    """Write ``old`` index plus ``new_rows``, sorted, as generation ``generation``.

    ``old`` is checked against ``old_digest`` first; the new file's SHA-256 goes into ``sums``.
    """
    parts = [new_rows]
    if old is not None:
        parts.insert(0, read_whole(root / old, schema, digest=old_digest))
    table = pa.concat_tables([p.select(schema.names).cast(schema) for p in parts])
    table = table.take(pc.sort_indices(table, sort_keys=sort_keys))
    rel = index_path(kind, generation)
    path = root / rel
    ensure_dir(path.parent, root)
    write_parquet_atomic(path, table, schema, row_group_size=ROW_GROUP_ROWS)
    sums[rel] = sha256_of(path)
    return rel


def commit_batch(
    root: Path,
    manifest: Manifest,
    *,
    batch_id: str,
    now: datetime,
    source_file: str,
    content_hash: str | None,
    rows: pa.Table,
    quarantine: pa.Table,
    superseded: NDArray[np.int64],
    counts: BatchCounts,
) -> Manifest:
    """Write a batch and commit it; return the new manifest.

    Parameters
    ----------
    root : Path
        Store root; the caller holds the write lock and ``manifest`` is the committed one.
    rows : pyarrow.Table
        Input columns plus ``revision``; ``batch_id`` and ``ingest_time`` are added here.
    quarantine : pyarrow.Table
        Columns ``source_file, source_location, reason, raw``.
    superseded : ndarray of int64
        Position keys of rows that this batch's revisions replace.
    """
    utc = pa.timestamp("us", tz="UTC")
    n = rows.num_rows
    full = rows.append_column("batch_id", _constant(n, batch_id, pa.string()))
    full = full.append_column("ingest_time", _constant(n, now, utc))
    full = full.select(RECORD_SCHEMA.names).cast(RECORD_SCHEMA)
    generation = manifest.generation + 1

    sums: dict[str, str] = {}
    entries, pairs = _write_data(
        root, full, batch_id=batch_id, first_file_no=manifest.next_file_no, sums=sums
    )
    _checkpoint("data_written")

    q_rel: str | None = None
    if quarantine.num_rows:
        q = quarantine.append_column(
            "batch_id", _constant(quarantine.num_rows, batch_id, pa.string())
        )
        q = q.append_column("ingest_time", _constant(quarantine.num_rows, now, utc))
        q = q.select(QUARANTINE_SCHEMA.names).cast(QUARANTINE_SCHEMA)
        q_rel = quarantine_path(batch_id)
        ensure_dir((root / q_rel).parent, root)
        write_parquet_atomic(root / q_rel, q, QUARANTINE_SCHEMA, row_group_size=ROW_GROUP_ROWS)
        sums[q_rel] = sha256_of(root / q_rel)
        _checkpoint("quarantine_written")

    retired: list[str] = []
    event_index = manifest.event_index
    if pairs.num_rows:
        event_index = _rewrite_index(
            root,
            manifest.event_index,
            pairs,
            EVENT_INDEX_SCHEMA,
            "events",
            generation,
            [("event_id", "ascending"), ("file_no", "ascending")],
            sums,
            manifest.checksum(manifest.event_index) if manifest.event_index else None,
        )
        if manifest.event_index:
            retired.append(manifest.event_index)

    files = list(manifest.files)
    superseded_index = manifest.superseded_index
    if superseded.size:
        s_file = (superseded >> _ROW_BITS).astype(np.int32)
        s_row = superseded & ((1 << _ROW_BITS) - 1)
        new_s = pa.Table.from_arrays(
            [pa.array(s_file, pa.int32()), pa.array(s_row, pa.int64())], schema=SUPERSEDED_SCHEMA
        )
        superseded_index = _rewrite_index(
            root,
            manifest.superseded_index,
            new_s,
            SUPERSEDED_SCHEMA,
            "superseded",
            generation,
            [("file_no", "ascending"), ("row", "ascending")],
            sums,
            manifest.checksum(manifest.superseded_index) if manifest.superseded_index else None,
        )
        if manifest.superseded_index:
            retired.append(manifest.superseded_index)
        per_file = np.bincount(s_file, minlength=manifest.next_file_no)
        files = [
            dataclasses.replace(f, superseded=f.superseded + int(per_file[f.file_no]))
            if f.file_no < per_file.size and per_file[f.file_no]
            else f
            for f in files
        ]
    _checkpoint("index_written")

    batch = BatchEntry(
        batch_id=batch_id,
        source_file=source_file,
        content_hash=content_hash,
        ingest_time=f"{now:%Y-%m-%dT%H:%M:%S.%f}Z",
        accepted=counts.accepted,
        duplicate=counts.duplicate,
        revised=counts.revised,
        quarantined=counts.quarantined,
        file_nos=tuple(e.file_no for e in entries),
        quarantine_path=q_rel,
        retracted=counts.retracted,
    )
    new = Manifest(
        generation=generation,
        next_file_no=manifest.next_file_no + len(entries),
        files=(*files, *entries),
        batches=(*manifest.batches, batch),
        event_index=event_index,
        superseded_index=superseded_index,
        retired_index=tuple(retired),
        checksums={**manifest.checksums, **sums},
    )
    kept = new.referenced_paths()
    new = dataclasses.replace(new, checksums={k: v for k, v in new.checksums.items() if k in kept})
    save_manifest(root, new)
    _checkpoint("committed")
    return new


def sweep(root: Path, manifest: Manifest) -> list[str]:
    """Remove files under the store's own folders that ``manifest`` does not reference.

    These are leftovers of a writer that died before its commit (temporary and renamed files)
    and index files retired more than one commit ago. Only ``data/``, ``quarantine/`` and
    ``index/`` are looked at. Returns the removed paths (relative, POSIX). The caller holds the
    write lock.

    Names are compared per top folder by file name, which is unique within the store (batch
    id, file number, generation), so a case-insensitive file system cannot make a committed
    file look unlisted.
    """
    keep = {(p.split("/", 1)[0], p.rsplit("/", 1)[-1]) for p in manifest.referenced_paths()}
    removed: list[str] = []
    real_root = Path(os.path.realpath(root))
    for top in OWNED_DIRS:
        base = root / top
        if not base.is_dir() or not inside(base, real_root):
            continue
        for dirpath, _dirs, names in os.walk(base):
            for name in names:
                if (top, name) not in keep:
                    path = Path(dirpath) / name
                    if path.is_symlink() or not inside(path, real_root):
                        continue  # never delete through a link (stations.store.links)
                    path.unlink(missing_ok=True)
                    removed.append(path.relative_to(root).as_posix())
    return removed
