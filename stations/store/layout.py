"""Names and relative paths inside a store directory (the layout is drawn in the package docstring).

Paths are POSIX strings relative to the store root, as they appear in the manifest. File names
carry the batch id and a store-wide file number, so two committed files never share a name even
where a case-insensitive file system folds the ``mb`` and ``mB`` folders into one.
"""

from __future__ import annotations

import secrets
from datetime import datetime
from typing import Final

__all__ = [
    "DATA_DIR",
    "INDEX_DIR",
    "LAYOUT_VERSION",
    "LOCK_NAME",
    "MANIFEST_NAME",
    "OWNED_DIRS",
    "QUARANTINE_DIR",
    "RESERVED_FOR_OTHERS",
    "TMP_SUFFIX",
    "data_path",
    "index_path",
    "new_batch_id",
    "quarantine_path",
]

MANIFEST_NAME: Final = "manifest.json"
LOCK_NAME: Final = ".lock"
DATA_DIR: Final = "data"
QUARANTINE_DIR: Final = "quarantine"
INDEX_DIR: Final = "index"
#: Folders whose uncommitted files a writer removes (never anything outside them).
OWNED_DIRS: Final = (DATA_DIR, QUARANTINE_DIR, INDEX_DIR)
#: Folders other writers keep under the same root and the same lock; the store never touches them.
RESERVED_FOR_OTHERS: Final = ("models", "fused", "nightly", "service")
#: Version of the directory layout and manifest format (the record schema has its own version).
LAYOUT_VERSION: Final = 1
#: Suffix of a file being written; it is renamed to its final name once complete and synced.
TMP_SUFFIX: Final = ".tmp"


def new_batch_id(now: datetime) -> str:
    """A sortable, unique batch id: UTC ingest time to the microsecond plus 6 random hex digits."""
    return f"{now:%Y%m%dT%H%M%S%f}Z-{secrets.token_hex(3)}"


def data_path(magnitude_type: str, month: str, batch_id: str, file_no: int) -> str:
    """``data/<magnitude type>/<YYYY-MM>/<batch id>-<file number>.parquet``."""
    return f"{DATA_DIR}/{magnitude_type}/{month}/{batch_id}-{file_no:06d}.parquet"


def quarantine_path(batch_id: str) -> str:
    """``quarantine/<batch id>.parquet``."""
    return f"{QUARANTINE_DIR}/{batch_id}.parquet"


def index_path(kind: str, generation: int) -> str:
    """``index/<kind>-<generation>.parquet``; ``kind`` is ``events`` or ``superseded``."""
    return f"{INDEX_DIR}/{kind}-{generation:08d}.parquet"
