"""The station-magnitude store: ingest batches, scan windows, look up events, summarise."""

from __future__ import annotations

import hashlib
import json
from collections.abc import Callable, Sequence
from contextlib import AbstractContextManager
from dataclasses import asdict, dataclass
from datetime import UTC, datetime
from pathlib import Path
from typing import Any, Final, TypeVar

import numpy as np
import pandas as pd
import pyarrow as pa
import pyarrow.compute as pc

from stations.errors import (
    ConfigError,
    EventNotFoundError,
    NearDuplicateEventError,
    SchemaError,
    StoreCorruptError,
)
from stations.schema import (
    INPUT_COLUMNS,
    QUARANTINE_SCHEMA,
    RECORD_SCHEMA,
    SCHEMA_VERSION,
    canonical_event_ids,
    normalise_magnitude_type,
)
from stations.store.batch import (
    INPUT_SCHEMA,
    collapse,
    compare,
    records_table,
    rejected_table,
    screen,
)
from stations.store.commit import BatchCounts, commit_batch, sweep
from stations.store.duplicates import NEAR_SECONDS, distinct_events, near_duplicates
from stations.store.layout import (
    LOCK_NAME,
    MANIFEST_NAME,
    OWNED_DIRS,
    RESERVED_FOR_OTHERS,
    TMP_SUFFIX,
    new_batch_id,
)
from stations.store.links import check_no_outside_links
from stations.store.lock import shared_lock
from stations.store.manifest import FileEntry, Manifest, load_manifest, save_manifest
from stations.store.reading import (
    EVENT_INDEX_SCHEMA,
    FILE_NO,
    ROW,
    SUPERSEDED_SCHEMA,
    IndexGoneError,
    candidate_row_groups,
    open_checked,
    position_keys,
    read_rows,
    read_whole,
)
from stations.store.summary import StoreSummary, TypeSummary
from stations.store.verify import Problem, verify_manifest

__all__ = ["IngestReport", "RetractReport", "StationMagnitudeStore", "file_digest"]

_T = TypeVar("_T")
#: Times a reader re-reads the manifest when an index file it named was retired meanwhile.
_READ_RETRIES: Final = 5
_UTC_US = pa.timestamp("us", tz="UTC")
#: Rows a batch writes: the input columns and the revision (none for a retraction).
INPUT_SCHEMA_WITH_REVISION = INPUT_SCHEMA.append(pa.field("revision", pa.int32(), nullable=False))


def file_digest(path: Path, *, chunk_bytes: int = 1 << 20) -> str:
    """SHA-256 of a file's bytes, as ``sha256:<hex>`` (the content hash of an ingest)."""
    h = hashlib.sha256()
    with open(path, "rb") as fh:
        while block := fh.read(chunk_bytes):
            h.update(block)
    return f"sha256:{h.hexdigest()}"


@dataclass(frozen=True, slots=True)
class RetractReport:
    """What :meth:`StationMagnitudeStore.retract` withdrew.

    Attributes
    ----------
    batch_id : str
        The retraction's batch.
    event_id, station_id, magnitude_type : str
    channel : str or None
    revision : int
        Revision of the withdrawn reading (still readable with ``all_revisions``).
    """

    batch_id: str
    event_id: str
    station_id: str
    magnitude_type: str
    channel: str | None
    revision: int


@dataclass(frozen=True, slots=True)
class IngestReport:
    """What one ingest did.

    Every input row lands in exactly one count: ``len(records) + len(rejected) ==
    accepted + duplicate + quarantined`` (except for a skipped batch, below).

    Attributes
    ----------
    source_file : str
    batch_id : str or None
        The committed batch; None when the content was already in the store.
    accepted : int
        Rows written: new keys and new revisions.
    duplicate : int
        Rows equal to the current revision of their key, or identical repeats in the batch.
    revised : int
        Of ``accepted``, the rows that are a new revision of an existing key.
    quarantined : int
        Rows rejected by the reader, rows the store cannot keep, and rows of keys with
        conflicting values in the batch.
    same_content_as : str or None
        Set when a committed batch had the same ``content_hash``: nothing was written, all
        records count as duplicates (their rejected rows are already quarantined with that
        batch).
    no_rows : bool
        True when the file held no rows at all (e.g. only a header): no batch is created.
    """

    source_file: str
    batch_id: str | None
    accepted: int
    duplicate: int
    revised: int
    quarantined: int
    same_content_as: str | None = None
    no_rows: bool = False

    def to_dict(self) -> dict[str, Any]:
        """Plain dict of the fields."""
        return asdict(self)


def _to_us(value: datetime | None, name: str) -> int | None:
    """Microseconds since 1970 UTC; a naive datetime is taken as UTC."""
    if value is None:
        return None
    if not isinstance(value, datetime):
        raise TypeError(f"{name} must be a datetime, got {type(value).__name__}")
    if value.tzinfo is None:
        value = value.replace(tzinfo=UTC)
    delta = value.astimezone(UTC) - datetime(1970, 1, 1, tzinfo=UTC)
    return (delta.days * 86_400 + delta.seconds) * 1_000_000 + delta.microseconds


def _check_type(magnitude_type: str) -> str:
    """The canonical spelling of ``magnitude_type`` (aliases allowed), else ConfigError."""
    try:
        return normalise_magnitude_type(magnitude_type).value
    except ValueError as exc:
        raise ConfigError(str(exc)) from None


def _check_columns(columns: Sequence[str] | None) -> list[str] | None:
    if columns is None:
        return None
    cols = list(columns)
    unknown = [c for c in cols if c not in RECORD_SCHEMA.names]
    if unknown:
        raise SchemaError(
            f"unknown store column {unknown[0]!r}; choose from {', '.join(RECORD_SCHEMA.names)}"
        )
    return cols


def _utc(value: Any) -> datetime | None:
    if value is None:
        return None
    return value.astimezone(UTC) if isinstance(value, datetime) else None


class StationMagnitudeStore:
    """An append-only Parquet store of station magnitudes (layout: :mod:`stations.store`).

    Open it with :meth:`open`. Readers (:meth:`scan`, :meth:`event`, :meth:`summary`, ...)
    take no lock: they read the committed manifest and the files it lists. Writers take the
    store's write lock (:meth:`write_lock`); :meth:`ingest` does so itself.

    Parameters
    ----------
    root : Path
        Store folder.
    lock_timeout_s : float, default=30.0
        Longest wait for another writer's lock, in seconds.
    """

    def __init__(self, root: Path, *, lock_timeout_s: float = 30.0) -> None:
        self.root = Path(root)
        self.lock_timeout_s = lock_timeout_s
        self._lock = shared_lock(self.root / LOCK_NAME, lock_timeout_s)
        self._cached: tuple[tuple[int, int, int], Manifest] | None = None

    # -- opening ---------------------------------------------------------------------------
    @classmethod
    def open(
        cls, root: Path, *, create: bool = True, lock_timeout_s: float = 30.0
    ) -> StationMagnitudeStore:
        """Open the store in ``root``, creating an empty one there if ``create``.

        Raises
        ------
        StoreCorruptError
            If ``root`` holds no store and ``create`` is false, if ``root`` is a file, if it is
            a non-empty folder that is not a store, if any entry below it is a symbolic link
            pointing outside the store (:mod:`stations.store.links`), or if the manifest is
            unreadable.
        SchemaError
            If the store was written with another schema version.
        """
        root = Path(root)
        if root.exists() and not root.is_dir():
            raise StoreCorruptError(f"{root}: is a file, not a store folder; pass a folder")
        store = cls(root, lock_timeout_s=lock_timeout_s)
        check_no_outside_links(root)
        if not (root / MANIFEST_NAME).exists() and create:
            store._create()
        load_manifest(root)  # checks format and schema version
        return store

    def _create(self) -> None:
        allowed = {LOCK_NAME, MANIFEST_NAME, MANIFEST_NAME + TMP_SUFFIX, *OWNED_DIRS}
        allowed.update(RESERVED_FOR_OTHERS)
        if self.root.is_dir():
            foreign = sorted(p.name for p in self.root.iterdir() if p.name not in allowed)
            if foreign:
                raise StoreCorruptError(
                    f"{self.root}: folder is not empty and holds no store (found "
                    f"{foreign[0]!r}); choose a new or empty folder for --store"
                )
        self.root.mkdir(parents=True, exist_ok=True)
        with self._lock.hold(timeout_s=self.lock_timeout_s):
            if not (self.root / MANIFEST_NAME).exists():
                save_manifest(self.root, Manifest())

    # -- locking and manifest --------------------------------------------------------------
    def write_lock(
        self, on_wait: Callable[[str], None] | None = None
    ) -> AbstractContextManager[None]:
        """The store's exclusive write lock, for every writer under the store root.

        Re-entrant for the thread that holds it, through this or any other store object of
        the same folder in this process (``stations.store.lock.shared_lock``). Waits up to
        ``lock_timeout_s``; ``on_wait`` receives one message if it has to wait.

        Raises
        ------
        StoreBusyError
            If another writer holds the lock longer than ``lock_timeout_s``.
        """
        return self._lock.hold(on_wait, timeout_s=self.lock_timeout_s)

    def manifest(self) -> Manifest:
        """The committed manifest.

        Re-read whenever ``manifest.json`` changed: every commit replaces the file by a rename,
        so its inode, size or modification time differ from the cached copy's.
        """
        path = self.root / MANIFEST_NAME
        try:
            st = path.stat()
        except FileNotFoundError:
            return load_manifest(self.root)  # raises the "no store here" error
        stamp = (st.st_ino, st.st_size, st.st_mtime_ns)
        if self._cached is None or self._cached[0] != stamp:
            self._cached = (stamp, load_manifest(self.root))
        return self._cached[1]

    def _with_manifest(self, fn: Callable[[Manifest], _T]) -> _T:
        for _ in range(_READ_RETRIES):
            try:
                return fn(self.manifest())
            except IndexGoneError:
                self._cached = None  # a writer retired the index it named; read the new one
                continue
        raise StoreCorruptError(
            f"{self.root}: index files keep disappearing under the reader; check that only "
            "magfuse writes to this folder"
        )

    def batch_with_content(self, content_hash: str) -> str | None:
        """The id of a committed batch ingested from content ``content_hash``, if any."""
        for b in self.manifest().batches:
            if b.content_hash == content_hash:
                return b.batch_id
        return None

    # -- file selection --------------------------------------------------------------------
    def _window_entries(
        self,
        m: Manifest,
        magnitude_type: str | None,
        start: datetime | None,
        end: datetime | None,
    ) -> list[FileEntry]:
        lo = _to_us(start, "start")
        hi = _to_us(end, "end")
        if not m.files:
            return []
        r = m.file_ranges()
        keep = np.ones(len(m.files), dtype=bool)
        if magnitude_type is not None:
            keep &= r["magnitude_type"] == _check_type(magnitude_type)
        if lo is not None:
            keep &= r["max_us"] >= lo
        if hi is not None:
            keep &= r["min_us"] < hi
        chosen = [m.files[i] for i in np.flatnonzero(keep)]
        return sorted(chosen, key=lambda f: (f.magnitude_type, f.month, f.file_no))

    def window_files(
        self,
        *,
        magnitude_type: str | None = None,
        start: datetime | None = None,
        end: datetime | None = None,
    ) -> list[Path]:
        """Data files a :meth:`scan` of this window opens (and no others).

        Parameters are those of :meth:`scan`.
        """
        m = self.manifest()
        return [self.root / f.path for f in self._window_entries(m, magnitude_type, start, end)]

    def fingerprint(
        self,
        *,
        magnitude_type: str | None = None,
        start: datetime | None = None,
        end: datetime | None = None,
    ) -> str:
        """Hash of the committed content of a window, for model versions.

        The SHA-256 of the schema version and, for every data file the window reads, its
        path, row count and superseded-row count. Any ingest that adds or revises rows in the
        window changes it; ingests elsewhere do not.
        """
        m = self.manifest()
        files = self._window_entries(m, magnitude_type, start, end)
        doc = [SCHEMA_VERSION, [[f.path, f.rows, f.superseded] for f in files]]
        text = json.dumps(doc, separators=(",", ":")).encode("utf-8")
        return f"sha256:{hashlib.sha256(text).hexdigest()}"

    # -- reading ---------------------------------------------------------------------------
    def _superseded_keys(self, m: Manifest, file_nos: Sequence[int]) -> np.ndarray:
        if m.superseded_index is None or not file_nos:
            return np.zeros(0, np.int64)
        table = read_whole(
            self.root / m.superseded_index,
            SUPERSEDED_SCHEMA,
            index=True,
            digest=m.checksum(m.superseded_index),
        )
        keep = pc.is_in(table.column("file_no"), value_set=pa.array(file_nos, pa.int32()))
        table = table.filter(keep)
        return position_keys(table.column("file_no").to_numpy(), table.column("row").to_numpy())

    def _drop_superseded(self, m: Manifest, table: pa.Table, files: list[FileEntry]) -> pa.Table:
        touched = [f.file_no for f in files if f.superseded]
        if not touched or table.num_rows == 0:
            return table
        gone = self._superseded_keys(m, touched)
        pos = position_keys(table.column(FILE_NO).to_numpy(), table.column(ROW).to_numpy())
        return table.filter(pa.array(~np.isin(pos, gone)))

    def _read_files(
        self,
        m: Manifest,
        files: list[FileEntry],
        columns: list[str] | None,
        event_ids: np.ndarray | None = None,
    ) -> pa.Table:
        # A whole-file read checks the file's SHA-256 first; a look-up of a few events reads
        # only some row groups and relies on their page checksums (stations.store.checksums).
        tables = [
            read_rows(
                open_checked(
                    self.root / f.path,
                    RECORD_SCHEMA,
                    digest=m.checksum(f.path) if event_ids is None else None,
                ),
                f.file_no,
                columns=columns,
                event_ids=event_ids,
                where=self.root / f.path,
            )
            for f in files
        ]
        if not tables:
            empty = RECORD_SCHEMA.empty_table()
            if columns is not None:
                empty = empty.select(columns)
            empty = empty.append_column(FILE_NO, pa.array([], pa.int32()))
            return empty.append_column(ROW, pa.array([], pa.int64()))
        return pa.concat_tables(tables)

    def scan(
        self,
        *,
        magnitude_type: str | None = None,
        start: datetime | None = None,
        end: datetime | None = None,
        columns: Sequence[str] | None = None,
        all_revisions: bool = False,
    ) -> pd.DataFrame:
        """Rows of a magnitude type and origin-time window.

        Parameters
        ----------
        magnitude_type : str, optional
            Only this type (exact spelling, e.g. ``"mb"``); default all.
        start, end : datetime, optional
            Half-open UTC window ``start <= origin_time < end``; a naive datetime is UTC.
        columns : sequence of str, optional
            Columns of :data:`~stations.schema.RECORD_SCHEMA` to return (default all).
        all_revisions : bool, default=False
            Return every revision instead of the current one of each key.

        Returns
        -------
        pandas.DataFrame
            Rows ordered by magnitude type, origin month, batch, then event id. Only the
            files of :meth:`window_files` are opened.
        """
        cols = _check_columns(columns)
        lo, hi = _to_us(start, "start"), _to_us(end, "end")

        def run(m: Manifest) -> pa.Table:
            files = self._window_entries(m, magnitude_type, start, end)
            read_cols = None
            if cols is not None:
                read_cols = cols + (["origin_time"] if "origin_time" not in cols else [])
            table = self._read_files(m, files, read_cols)
            if lo is not None or hi is not None:
                t = table.column("origin_time").cast(pa.int64())
                mask = pa.array(np.ones(table.num_rows, bool))
                if lo is not None:
                    mask = pc.and_(mask, pc.greater_equal(t, lo))
                if hi is not None:
                    mask = pc.and_(mask, pc.less(t, hi))
                table = table.filter(mask)
            if not all_revisions:
                table = self._drop_superseded(m, table, files)
            return table

        table = self._with_manifest(run)
        keep = cols if cols is not None else list(RECORD_SCHEMA.names)
        return table.select(keep).to_pandas()

    def event(
        self,
        event_id: str,
        *,
        magnitude_type: str | None = None,
        all_revisions: bool = False,
    ) -> pd.DataFrame:
        """All rows of one event (optionally one magnitude type); empty if unknown.

        Reads the event index (one row group) and, in each data file holding the event, only
        the row groups whose event-id range contains it. Rows are sorted by magnitude type,
        station, channel and revision.
        """
        # the same id rule as ingest, so a full QuakeML resource id finds the event too
        ids = np.array([canonical_event_ids(pa.array([str(event_id)]))[0].as_py()], dtype=object)

        def run(m: Manifest) -> pa.Table:
            file_nos = self._files_of_events(m, ids)
            files = [m.file(no) for no in file_nos]
            if magnitude_type is not None:
                wanted = _check_type(magnitude_type)
                files = [f for f in files if f.magnitude_type == wanted]
            table = self._read_files(m, files, None, ids)
            if not all_revisions:
                table = self._drop_superseded(m, table, files)
            return table

        table = self._with_manifest(run).select(RECORD_SCHEMA.names)
        order = pc.sort_indices(
            table,
            sort_keys=[
                ("magnitude_type", "ascending", "at_end"),
                ("station_id", "ascending", "at_end"),
                ("channel", "ascending", "at_end"),
                ("revision", "ascending", "at_end"),
            ],
        )
        return table.take(order).to_pandas()

    def events(
        self, event_ids: Sequence[str], *, magnitude_type: str | None = None
    ) -> pd.DataFrame:
        """Current rows of several events at once (the indexed look-up of :meth:`event`).

        Unknown ids are ignored. Rows are sorted by event id, magnitude type and station.
        """
        ids = np.unique(np.asarray([str(e) for e in event_ids], dtype=object))

        def run(m: Manifest) -> pa.Table:
            files = [m.file(no) for no in self._files_of_events(m, ids)]
            if magnitude_type is not None:
                wanted = _check_type(magnitude_type)
                files = [f for f in files if f.magnitude_type == wanted]
            return self._drop_superseded(m, self._read_files(m, files, None, ids), files)

        table = self._with_manifest(run).select(RECORD_SCHEMA.names)
        order = pc.sort_indices(
            table,
            sort_keys=[
                ("event_id", "ascending"),
                ("magnitude_type", "ascending", "at_end"),
                ("station_id", "ascending", "at_end"),
            ],
        )
        return table.take(order).to_pandas()

    def _files_of_events(self, m: Manifest, ids_sorted: np.ndarray) -> list[int]:
        """File numbers holding rows of any of ``ids_sorted`` (sorted unique event ids)."""
        if m.event_index is None or ids_sorted.size == 0:
            return []
        path = self.root / m.event_index
        pf = open_checked(path, EVENT_INDEX_SCHEMA, index=True)
        groups = candidate_row_groups(pf, "event_id", ids_sorted)
        if not groups:
            return []
        table = read_whole(path, EVENT_INDEX_SCHEMA, index=True, row_groups=groups)
        keep = pc.is_in(table.column("event_id"), value_set=pa.array(ids_sorted, pa.string()))
        nos = pc.unique(table.filter(keep).column("file_no")).to_numpy()
        return [int(x) for x in np.sort(nos)]

    def quarantine(self) -> pd.DataFrame:
        """Every quarantined row (columns of :data:`~stations.schema.QUARANTINE_SCHEMA`)."""
        m = self.manifest()
        tables = [
            read_whole(
                self.root / b.quarantine_path,
                QUARANTINE_SCHEMA,
                digest=m.checksum(b.quarantine_path),
            )
            for b in m.batches
            if b.quarantine_path
        ]
        if not tables:
            return QUARANTINE_SCHEMA.empty_table().to_pandas()
        return pa.concat_tables(tables).select(QUARANTINE_SCHEMA.names).to_pandas()

    def summary(self) -> StoreSummary:
        """Counts of the store: rows per type (current and all), detections, time range, etc."""

        def run(m: Manifest) -> StoreSummary:
            cols = ["event_id", "station_id", "detected", "origin_time", "revision"]
            per_type: list[TypeSummary] = []
            ev_parts: list[pa.ChunkedArray] = []
            st_parts: list[pa.ChunkedArray] = []
            for mtype in sorted({f.magnitude_type for f in m.files}):
                files = [f for f in m.files if f.magnitude_type == mtype]
                table = self._read_files(m, files, cols)
                revised = int(pc.sum(pc.greater(table.column("revision"), 1)).as_py() or 0)
                cur = self._drop_superseded(m, table, files)
                detected = int(pc.sum(cur.column("detected")).as_py() or 0)
                t_range = pc.min_max(cur.column("origin_time"))
                events = pc.unique(cur.column("event_id"))
                stations = pc.unique(cur.column("station_id"))
                ev_parts.append(events)
                st_parts.append(stations)
                per_type.append(
                    TypeSummary(
                        magnitude_type=mtype,
                        rows_current=cur.num_rows,
                        rows_all=table.num_rows,
                        detected=detected,
                        not_detected=cur.num_rows - detected,
                        revised=revised,
                        events=len(events),
                        stations=len(stations),
                        first_origin_time=_utc(t_range["min"].as_py()),
                        last_origin_time=_utc(t_range["max"].as_py()),
                    )
                )
            firsts = [t.first_origin_time for t in per_type if t.first_origin_time]
            lasts = [t.last_origin_time for t in per_type if t.last_origin_time]
            return StoreSummary(
                root=str(self.root),
                schema_version=m.schema_version,
                batches=len(m.batches),
                files=len(m.files),
                rows_current=sum(t.rows_current for t in per_type),
                rows_all=sum(t.rows_all for t in per_type),
                detected=sum(t.detected for t in per_type),
                not_detected=sum(t.not_detected for t in per_type),
                revised=sum(t.revised for t in per_type),
                events=_count_distinct(ev_parts),
                stations=_count_distinct(st_parts),
                first_origin_time=min(firsts) if firsts else None,
                last_origin_time=max(lasts) if lasts else None,
                quarantined=sum(b.quarantined for b in m.batches),
                by_type=tuple(per_type),
            )

        return self._with_manifest(run)

    def verify(self) -> tuple[int, list[Problem]]:
        """Check every file the manifest lists against its checksum and read every page.

        Returns the number of files checked and the damaged or missing ones
        (:func:`stations.store.verify.verify_manifest`).
        """
        return verify_manifest(self.root, self.manifest())

    # -- writing ---------------------------------------------------------------------------
    def _current_rows(self, m: Manifest, unique: pa.Table) -> pa.Table:
        """Current rows of the events of ``unique`` (input columns, revision, positions)."""
        ids = np.asarray(pc.unique(unique.column("event_id")).to_pylist(), dtype=object)
        ids.sort()
        try:
            files = [m.file(no) for no in self._files_of_events(m, ids)]
        except IndexGoneError as exc:
            raise StoreCorruptError(
                f"{exc}: event index listed in the manifest is missing; restore it from a backup"
            ) from None
        table = self._read_files(m, files, [*INPUT_COLUMNS, "revision"], ids)
        try:
            return self._drop_superseded(m, table, files)
        except IndexGoneError as exc:
            raise StoreCorruptError(
                f"{exc}: superseded index listed in the manifest is missing; restore it from a "
                "backup"
            ) from None

    def retract(
        self,
        event_id: str,
        station_id: str,
        *,
        magnitude_type: str,
        channel: str | None = None,
        reason: str,
        on_wait: Callable[[str], None] | None = None,
    ) -> RetractReport:
        """Withdraw the current reading of one station for one event (e.g. a wrong channel).

        The reading leaves the current view, as if a later revision had replaced it with
        nothing; it stays readable with ``all_revisions=True`` and the retraction is a batch
        of its own in the manifest (source ``retract: <reason>``). Nothing is deleted.

        Parameters
        ----------
        event_id, station_id : str
            The reading's event and FDSN ``NET.STA.LOC`` station id.
        magnitude_type : str
            Its magnitude type.
        channel : str, optional
            Its channel code; may be omitted when the station has one current reading of that
            type for the event.
        reason : str
            Why, recorded with the batch.

        Raises
        ------
        EventNotFoundError
            If no current reading matches; the message lists the station's channels.
        ConfigError
            If ``channel`` is omitted and the station has several current readings.
        """
        mtype = _check_type(magnitude_type)
        ev = canonical_event_ids(pa.array([str(event_id)]))[0].as_py()
        sta = str(station_id).strip().upper()
        if not reason.strip():
            raise ConfigError("retract needs a reason (--reason TEXT), recorded with the batch")
        with self._lock.hold(on_wait):
            m = load_manifest(self.root)
            sweep(self.root, m)
            probe = pa.table({"event_id": pa.array([ev], pa.string())})
            cur = self._current_rows(m, probe).to_pandas()
            cur = cur[(cur["station_id"] == sta) & (cur["magnitude_type"] == mtype)]
            chans = sorted(str(c) if c is not None and c == c else "(none)" for c in cur["channel"])
            if channel is not None:
                want = channel.strip().upper()
                cur = cur[cur["channel"].fillna("").str.upper() == want]
            if cur.empty:
                raise EventNotFoundError(
                    f"no current {mtype} reading of station {sta} for event {ev!r}"
                    + (f" on channel {channel!r}" if channel is not None else "")
                    + (f"; its channels: {', '.join(chans)}" if chans else "")
                    + "; check the ids with 'magfuse event'"
                )
            if len(cur) > 1:
                raise ConfigError(
                    f"station {sta} has {len(cur)} current {mtype} readings for event {ev!r} "
                    f"(channels {', '.join(chans)}); name one with --channel"
                )
            gone = position_keys(cur[FILE_NO].to_numpy(), cur[ROW].to_numpy())
            now = datetime.now(UTC)
            batch_id = new_batch_id(now)
            commit_batch(
                self.root,
                m,
                batch_id=batch_id,
                now=now,
                source_file=f"retract: {reason.strip()}",
                content_hash=None,
                rows=INPUT_SCHEMA_WITH_REVISION.empty_table(),
                quarantine=rejected_table(None, "retract"),
                superseded=gone,
                counts=BatchCounts(0, 0, 0, 0, retracted=1),
            )
        channel_text = cur["channel"].iloc[0]
        return RetractReport(
            batch_id,
            ev,
            sta,
            mtype,
            channel_text if channel_text == channel_text else None,
            int(cur["revision"].iloc[0]),
        )

    def _refuse_near_duplicates(self, m: Manifest, unique: pa.Table, source_file: str) -> None:
        """Raise if a batch event coincides with a stored event under another id."""
        cols = ["event_id", "origin_time", "event_latitude", "event_longitude"]
        batch = distinct_events(unique.select(cols).to_pandas())
        if batch.empty or not m.files:
            return
        tol = int(NEAR_SECONDS * 1e6)
        lo, hi = int(batch["t_us"].min()) - tol, int(batch["t_us"].max()) + tol
        r = m.file_ranges()
        keep = (r["max_us"] >= lo) & (r["min_us"] <= hi)
        files = [m.files[i] for i in np.flatnonzero(keep)]
        if not files:
            return
        table = self._read_files(m, files, cols)
        t = table.column("origin_time").cast(pa.int64())
        table = table.filter(pc.and_(pc.greater_equal(t, lo), pc.less_equal(t, hi)))
        found = near_duplicates(batch, distinct_events(table.select(cols).to_pandas()))
        if not found:
            return
        first = found[0]
        where = "" if first.km is None else f", {first.km:.1f} km"
        more = len({f.new_id for f in found}) - 1
        raise NearDuplicateEventError(
            f"{source_file}: event {first.new_id!r} coincides with stored event "
            f"{first.stored_id!r} ({first.seconds:.2f} s{where} apart)"
            + (f", and {more} more event(s) likewise" if more else "")
            + "; the same event under two ids would count twice. Use the stored ids in the "
            "file, or ingest with --allow-near-duplicates if they are different events"
        )

    def ingest(
        self,
        records: pd.DataFrame,
        rejected: pd.DataFrame | None = None,
        *,
        source_file: str,
        content_hash: str | None = None,
        on_wait: Callable[[str], None] | None = None,
        check_near_duplicates: bool = False,
    ) -> IngestReport:
        """Add one batch: a reader's accepted ``records`` and ``rejected`` rows of one file.

        The batch is committed atomically or not at all. Rows equal to the current revision
        of their key (:data:`~stations.schema.RECORD_KEY`; values
        :data:`~stations.schema.VALUE_COLUMNS`, NaN equal to NaN) are duplicates, and so are
        rows that only restate it with fewer values (every value they carry agrees within
        the stored precision; source annotations only they carry are not merged in; see
        :mod:`stations.store.batch`); a changed value becomes the next revision and the previous
        one stays readable with ``all_revisions``. Rejected rows, rows the store cannot keep
        and keys with conflicting values inside the batch go to quarantine in the same commit.

        Parameters
        ----------
        records : pandas.DataFrame
            Columns :data:`~stations.schema.INPUT_COLUMNS` with the record schema's types
            (``origin_time`` time-zone aware).
        rejected : pandas.DataFrame, optional
            Columns ``source_file, source_location, reason, raw``.
        source_file : str
            The file the batch came from (recorded with the batch).
        content_hash : str, optional
            Hash of the file's bytes (:func:`file_digest`); if a committed batch has the same
            hash, nothing is written and the report says which batch it was.
        on_wait : callable, optional
            Receives one message if the ingest has to wait for another writer.
        check_near_duplicates : bool, default=False
            Refuse the batch if one of its events coincides in origin time and epicentre with
            a stored event under another id (:mod:`stations.store.duplicates`). Every file
            ingest (:func:`stations.ingest.ingest_file`, so ``magfuse ingest`` and the nightly
            run) turns it on unless the operator allows near duplicates; callers that write
            rows of events already stored (recomputation, tests) leave it off.

        Returns
        -------
        IngestReport

        Raises
        ------
        NearDuplicateEventError
            If ``check_near_duplicates`` and an event of the batch coincides with a stored
            event under another id; nothing is written.
        SchemaError
            If ``records`` lacks a column or a column cannot take its declared type.
        StoreBusyError
            If another writer holds the lock longer than ``lock_timeout_s``.
        """
        table = records_table(records, source_file)
        rejected_rows = rejected_table(rejected, source_file)
        if table.num_rows == 0 and rejected_rows.num_rows == 0:
            return IngestReport(source_file, None, 0, 0, 0, 0, no_rows=True)
        kept, screened = screen(table)
        collapsed = collapse(kept)
        with self._lock.hold(on_wait, timeout_s=self.lock_timeout_s):
            m = load_manifest(self.root)
            if content_hash is not None:
                for b in m.batches:
                    if b.content_hash == content_hash:
                        return IngestReport(
                            source_file, None, 0, table.num_rows, 0, 0, same_content_as=b.batch_id
                        )
            sweep(self.root, m)
            if check_near_duplicates:
                self._refuse_near_duplicates(m, collapsed.unique, source_file)
            current = self._current_rows(m, collapsed.unique)
            cmp = compare(collapsed.unique, current)
            quarantine = pa.concat_tables([rejected_rows, screened, collapsed.conflicts])
            counts = BatchCounts(
                accepted=cmp.rows.num_rows,
                duplicate=collapsed.duplicate + cmp.duplicate,
                revised=cmp.revised,
                quarantined=quarantine.num_rows,
            )
            now = datetime.now(UTC)
            batch_id = new_batch_id(now)
            commit_batch(
                self.root,
                m,
                batch_id=batch_id,
                now=now,
                source_file=source_file,
                content_hash=content_hash,
                rows=cmp.rows,
                quarantine=quarantine,
                superseded=cmp.superseded,
                counts=counts,
            )
        return IngestReport(
            source_file=source_file,
            batch_id=batch_id,
            accepted=counts.accepted,
            duplicate=counts.duplicate,
            revised=counts.revised,
            quarantined=counts.quarantined,
        )


def _count_distinct(parts: list[pa.ChunkedArray]) -> int:
    if not parts:
        return 0
    return int(pc.count_distinct(pa.chunked_array([c for p in parts for c in _chunks(p)])).as_py())


def _chunks(arr: pa.Array | pa.ChunkedArray) -> list[pa.Array]:
    return list(arr.chunks) if isinstance(arr, pa.ChunkedArray) else [arr]
