"""The station-magnitude store: an append-only, partitioned Parquet dataset with a manifest.

Layout of a store folder (paths relative to the root)::

    manifest.json                    committed state: files, batches, index files, versions
    .lock                            write lock (flock); holds the writer's process id
    data/<type>/<YYYY-MM>/<batch>-<file no>.parquet
                                     station magnitudes of one type and origin month of one
                                     batch, RECORD_SCHEMA, sorted by event id, row-group stats
    quarantine/<batch>.parquet       rejected rows of one batch, QUARANTINE_SCHEMA
    index/events-<generation>.parquet       event id -> file number, sorted by event id
    index/superseded-<generation>.parquet   positions (file number, row) replaced by revisions
    models/, fused/                  reserved for other writers (model versions, fused
                                     magnitudes); they take the same lock, the store never
                                     touches them

``data/``, ``quarantine/``, ``index/``, ``manifest.json`` and ``.lock`` belong to the store.

**Commit.** An ingest holds the lock, writes each new file under a temporary name, syncs and
renames it, then replaces ``manifest.json`` the same way; that rename is the commit. Readers
take no lock and see only what the manifest lists, so a crash at any moment leaves either all
of a batch or none of it; the next writer deletes the unlisted leftovers. Index files are
rewritten (under a new generation number) at each commit and the replaced ones are kept for one
more commit, so a reader on the previous manifest can finish; a reader that still misses one
re-reads the manifest.

**Keys and revisions.** A reading is identified by :data:`~stations.schema.RECORD_KEY`.
Re-ingesting equal values (:data:`~stations.schema.VALUE_COLUMNS`, NaN equal to NaN) adds
nothing; a changed value is written as ``revision = previous + 1`` and the old row's position
goes into the superseded index. The current view hides superseded positions;
``all_revisions=True`` shows them. Data files are never modified. A reading that should not
be there at all (e.g. one filed under a wrong channel code) is withdrawn by
:meth:`~StationMagnitudeStore.retract`: a batch of its own that supersedes the position without
writing a replacement, so the reading stays readable with ``all_revisions=True``.

**Checksums.** Every file the store writes has its SHA-256 in the manifest (``checksums``),
checked before a whole-file read, and Parquet page checksums, checked on every read; a damaged
file is a one-line error naming it (:mod:`stations.store.checksums`, ``magfuse verify``).

**Partitions.** A window scan opens only the files whose type matches and whose origin-time
range (from the manifest) meets the window; a single-event look-up reads one row group of the
event index and the matching row groups of the files it names.

Examples
--------
>>> import tempfile
>>> from pathlib import Path
>>> store = StationMagnitudeStore.open(Path(tempfile.mkdtemp()) / "store")
>>> store.summary().rows_current
0
"""

from stations.store.batch import CONFLICT_REASON
from stations.store.store import IngestReport, RetractReport, StationMagnitudeStore, file_digest
from stations.store.summary import StoreSummary, TypeSummary

__all__ = [
    "CONFLICT_REASON",
    "IngestReport",
    "RetractReport",
    "StationMagnitudeStore",
    "StoreSummary",
    "TypeSummary",
    "file_digest",
]
