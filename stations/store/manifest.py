"""The manifest: the one file that says what the store holds.

``manifest.json`` lists every committed data file (with its partition, row counts, time and
event-id range), every batch, and the current index files. Replacing it (atomically, under the
write lock) is the commit of a batch: a file that the manifest does not list does not exist for
readers, whatever lies on disk. The manifest is rewritten in full at each commit, so per-file
counters such as ``superseded`` may change while the data files themselves never do.
"""

from __future__ import annotations

import json
from collections.abc import Mapping
from dataclasses import asdict, dataclass, field
from pathlib import Path
from typing import Any

import numpy as np
from numpy.typing import NDArray

from stations import strict_json
from stations.errors import SchemaError, StoreCorruptError
from stations.schema import SCHEMA_VERSION
from stations.store.atomic import write_bytes_atomic
from stations.store.layout import LAYOUT_VERSION, MANIFEST_NAME

__all__ = ["BatchEntry", "FileEntry", "Manifest", "load_manifest", "save_manifest"]

_FORMAT = "magfuse station-magnitude store"


@dataclass(frozen=True, slots=True)
class FileEntry:
    """One committed data file: one magnitude type and one origin month of one batch.

    Attributes
    ----------
    file_no : int
        Store-wide file number; positions of rows are ``(file_no, row)``.
    path : str
        POSIX path relative to the store root.
    batch_id, magnitude_type, month : str
        Batch and partition (``month`` is ``YYYY-MM`` of the UTC origin time).
    rows, detected : int
        Rows in the file, and how many of them are detections.
    superseded : int
        Rows of this file that a later revision replaced (0 for most files).
    max_revision : int
        Largest ``revision`` in the file.
    min_origin_time, max_origin_time : str
        ISO 8601 UTC range of ``origin_time`` in the file (microseconds, ``Z``).
    min_event_id, max_event_id : str
        Range of ``event_id``; rows are sorted by event id.
    bytes : int
        File size.
    """

    file_no: int
    path: str
    batch_id: str
    magnitude_type: str
    month: str
    rows: int
    detected: int
    superseded: int
    max_revision: int
    min_origin_time: str
    max_origin_time: str
    min_event_id: str
    max_event_id: str
    bytes: int


@dataclass(frozen=True, slots=True)
class BatchEntry:
    """One committed ingest batch and its counts (see :class:`~stations.store.IngestReport`)."""

    batch_id: str
    source_file: str
    content_hash: str | None
    ingest_time: str
    accepted: int
    duplicate: int
    revised: int
    quarantined: int
    file_nos: tuple[int, ...]
    quarantine_path: str | None
    retracted: int = 0  # readings withdrawn by 'magfuse retract' (no new row written)


@dataclass(frozen=True, slots=True)
class Manifest:
    """The committed state of a store (see module docstring).

    ``retired_index`` lists the index files of the previous generation; they are kept one more
    commit so that a reader holding the previous manifest can still open them. ``checksums``
    maps the path of every file written by this magfuse (data, quarantine, index) to the
    SHA-256 of its bytes (:mod:`stations.store.checksums`); a store written before checksums
    existed has none for its older files.
    """

    generation: int = 0
    next_file_no: int = 0
    files: tuple[FileEntry, ...] = ()
    batches: tuple[BatchEntry, ...] = ()
    event_index: str | None = None
    superseded_index: str | None = None
    retired_index: tuple[str, ...] = ()
    schema_version: str = SCHEMA_VERSION
    layout_version: int = LAYOUT_VERSION
    checksums: Mapping[str, str] = field(default_factory=dict)
    _by_no: dict[int, FileEntry] = field(
        default_factory=dict, init=False, repr=False, compare=False
    )
    _ranges: dict[str, NDArray[Any]] = field(
        default_factory=dict, init=False, repr=False, compare=False
    )

    def __post_init__(self) -> None:
        self._by_no.update({f.file_no: f for f in self.files})

    def file_ranges(self) -> dict[str, NDArray[Any]]:
        """Per-file arrays (in ``files`` order) for vectorised selection, computed once.

        Keys: ``min_us`` and ``max_us`` (origin-time range, int64 microseconds since 1970
        UTC) and ``magnitude_type`` (object).
        """
        if not self._ranges:
            self._ranges["min_us"] = np.array(
                [f.min_origin_time.rstrip("Z") for f in self.files], dtype="datetime64[us]"
            ).astype(np.int64)
            self._ranges["max_us"] = np.array(
                [f.max_origin_time.rstrip("Z") for f in self.files], dtype="datetime64[us]"
            ).astype(np.int64)
            self._ranges["magnitude_type"] = np.array(
                [f.magnitude_type for f in self.files], dtype=object
            )
        return self._ranges

    def file(self, file_no: int) -> FileEntry:
        """The entry of file number ``file_no``."""
        return self._by_no[file_no]

    def checksum(self, path: str) -> str | None:
        """The recorded SHA-256 of ``path`` (relative, POSIX), or None if none was recorded."""
        return self.checksums.get(path)

    def referenced_paths(self) -> set[str]:
        """Every path the store must keep: data, quarantine, current and retired index files."""
        paths = {f.path for f in self.files}
        paths.update(b.quarantine_path for b in self.batches if b.quarantine_path)
        paths.update(p for p in (self.event_index, self.superseded_index) if p)
        paths.update(self.retired_index)
        return paths

    def to_json(self) -> bytes:
        """Canonical JSON text of the manifest (UTF-8, sorted keys)."""
        doc: dict[str, Any] = {
            "format": _FORMAT,
            "schema_version": self.schema_version,
            "layout_version": self.layout_version,
            "generation": self.generation,
            "next_file_no": self.next_file_no,
            "event_index": self.event_index,
            "superseded_index": self.superseded_index,
            "retired_index": list(self.retired_index),
            "batches": [asdict(b) for b in self.batches],
            "files": [asdict(f) for f in self.files],
            "checksums": dict(sorted(self.checksums.items())),
        }
        return strict_json.dumps(doc, sort_keys=True, indent=1).encode("utf-8")


def _parse(doc: Any, where: Path) -> Manifest:
    if not isinstance(doc, dict) or doc.get("format") != _FORMAT:
        raise StoreCorruptError(
            f"{where}: not a magfuse store manifest; point --store at a magfuse store folder"
        )
    if doc.get("schema_version") != SCHEMA_VERSION:
        raise SchemaError(
            f"{where}: store schema version {doc.get('schema_version')!r}, this magfuse reads "
            f"version {SCHEMA_VERSION!r}; use a matching magfuse or a new store folder"
        )
    if doc.get("layout_version") != LAYOUT_VERSION:
        raise SchemaError(
            f"{where}: store layout version {doc.get('layout_version')!r}, this magfuse reads "
            f"version {LAYOUT_VERSION}; use a matching magfuse or a new store folder"
        )
    try:
        files = tuple(FileEntry(**f) for f in doc["files"])
        batches = tuple(
            BatchEntry(**{**b, "file_nos": tuple(b["file_nos"])}) for b in doc["batches"]
        )
        return Manifest(
            generation=int(doc["generation"]),
            next_file_no=int(doc["next_file_no"]),
            files=files,
            batches=batches,
            event_index=doc["event_index"],
            superseded_index=doc["superseded_index"],
            retired_index=tuple(doc["retired_index"]),
            checksums={str(k): str(v) for k, v in dict(doc.get("checksums", {})).items()},
        )
    except (KeyError, TypeError, ValueError) as exc:
        raise StoreCorruptError(
            f"{where}: manifest entry is malformed ({exc!r}); restore manifest.json from a backup"
        ) from None


def load_manifest(root: Path) -> Manifest:
    """Read and check ``root/manifest.json``.

    Raises
    ------
    StoreCorruptError
        If the file is missing, is not JSON or lacks a field; the message names the file.
    SchemaError
        If it was written for another record schema or layout version.
    """
    path = root / MANIFEST_NAME
    try:
        text = path.read_bytes()
    except FileNotFoundError:
        raise StoreCorruptError(
            f"{root}: no magfuse store here ({MANIFEST_NAME} is missing); pass the right "
            f"--store, or create one with 'magfuse ingest FILE --store {root}'"
        ) from None
    try:
        doc = json.loads(text)
    except (json.JSONDecodeError, UnicodeDecodeError) as exc:
        raise StoreCorruptError(
            f"{path}: not valid JSON ({exc}); restore it from a backup"
        ) from None
    return _parse(doc, path)


def save_manifest(root: Path, manifest: Manifest) -> None:
    """Commit ``manifest`` (atomic replace of ``root/manifest.json``)."""
    write_bytes_atomic(root / MANIFEST_NAME, manifest.to_json())
