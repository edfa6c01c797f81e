"""SHA-256 checksums of the files a store writes, and their verification on read.

Every file the station store commits (data, quarantine, index) is listed in ``manifest.json``
with the SHA-256 of its bytes; model versions keep theirs in ``checksums.json`` beside the
files, and the fused store in its own manifest. Parquet files are also written with page
checksums (CRC-32 per data page, Apache Parquet format specification, ``PageHeader.crc``) and
read with their verification on, so a damaged page is refused even where only part of a file
is read.

A whole-file read compares the SHA-256 with the manifest before the data is used; a damaged
file is a :class:`~stations.errors.StoreCorruptError` naming the file and the way to recover
(restore it from a backup; ``magfuse verify`` lists every damaged file). Digests of files
already verified in this process are remembered by (inode, size, modification time), so a
file read twice is hashed once.
"""

from __future__ import annotations

import hashlib
import os
from pathlib import Path
from typing import Final

from stations.errors import StoreCorruptError

__all__ = ["DAMAGED_FIX", "check_digest", "damaged", "sha256_of"]

#: How to recover from a damaged store file (the end of every such message).
DAMAGED_FIX: Final = (
    "restore it from a backup of the store, or re-ingest its source file into a new store; "
    "'magfuse verify' lists every damaged file"
)

_CHUNK: Final = 1 << 20
_verified: dict[str, tuple[int, int, int, str]] = {}


def sha256_of(path: Path) -> str:
    """``sha256:<hex>`` of the bytes of ``path``."""
    h = hashlib.sha256()
    with open(path, "rb") as fh:
        while block := fh.read(_CHUNK):
            h.update(block)
    return f"sha256:{h.hexdigest()}"


def damaged(path: Path, what: str) -> StoreCorruptError:
    """The one-line error of a damaged store file."""
    return StoreCorruptError(f"{path}: damaged ({what}); {DAMAGED_FIX}")


def check_digest(path: Path, expected: str | None) -> None:
    """Raise unless the SHA-256 of ``path`` equals ``expected`` (no-op when None).

    Raises
    ------
    StoreCorruptError
        If the bytes differ from what was written (names the file and the recovery).
    FileNotFoundError
        If the file is gone (the caller decides what that means).
    """
    if not expected:
        return
    st = os.stat(path)
    key = os.path.realpath(path)
    stamp = (st.st_ino, st.st_size, st.st_mtime_ns)
    seen = _verified.get(key)
    if seen is not None and seen[:3] == stamp and seen[3] == expected:
        return
    found = sha256_of(path)
    if found != expected:
        raise damaged(path, "its SHA-256 differs from the one recorded when it was written")
    _verified[key] = (*stamp, found)
