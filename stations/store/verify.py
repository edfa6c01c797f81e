"""Check every file of a station-magnitude store against its manifest (``magfuse verify``)."""

from __future__ import annotations

from collections.abc import Sequence
from dataclasses import dataclass
from pathlib import Path

import pyarrow as pa

from stations.errors import MagfuseError
from stations.schema import QUARANTINE_SCHEMA, RECORD_SCHEMA
from stations.store.checksums import sha256_of
from stations.store.manifest import Manifest
from stations.store.reading import EVENT_INDEX_SCHEMA, SUPERSEDED_SCHEMA, read_whole

__all__ = ["Problem", "verify_files", "verify_manifest"]


@dataclass(frozen=True, slots=True)
class Problem:
    """One damaged or missing file: its path and what is wrong."""

    path: str
    problem: str


def verify_files(
    root: Path, items: Sequence[tuple[str, str | None, pa.Schema | None]]
) -> list[Problem]:
    """Check files: present, SHA-256 as recorded, and (for Parquet) every page readable.

    Parameters
    ----------
    root : Path
        Folder the relative paths start from.
    items : list of (path, digest, schema)
        Relative POSIX path, recorded ``sha256:<hex>`` (None: not recorded) and the Arrow
        schema to read the file with (None: not Parquet, only the digest is checked).

    Returns
    -------
    list of Problem
        Empty when every file is intact.
    """
    out: list[Problem] = []
    for rel, digest, schema in items:  # loop over files, not rows
        path = root / rel
        if not path.is_file():
            out.append(Problem(rel, "missing"))
            continue
        if digest and sha256_of(path) != digest:
            out.append(Problem(rel, "SHA-256 differs from the one recorded when it was written"))
            continue
        if schema is not None:
            try:
                read_whole(path, schema)
            except MagfuseError as exc:
                out.append(Problem(rel, str(exc).split(": ", 1)[-1]))
    return out


def verify_manifest(root: Path, m: Manifest) -> tuple[int, list[Problem]]:
    """Check every file the station store's manifest lists (data, quarantine, indexes).

    Returns
    -------
    checked : int
        Files looked at.
    problems : list of Problem
    """
    items: list[tuple[str, str | None, pa.Schema | None]] = [
        (f.path, m.checksum(f.path), RECORD_SCHEMA) for f in m.files
    ]
    items += [
        (b.quarantine_path, m.checksum(b.quarantine_path), QUARANTINE_SCHEMA)
        for b in m.batches
        if b.quarantine_path
    ]
    for rel, schema in (
        (m.event_index, EVENT_INDEX_SCHEMA),
        (m.superseded_index, SUPERSEDED_SCHEMA),
    ):
        if rel:
            items.append((rel, m.checksum(rel), schema))
    return len(items), verify_files(root, items)
