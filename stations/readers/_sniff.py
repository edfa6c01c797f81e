"""Cheap, exception-free looks at the start (and end) of a file, for the ``is_<format>`` detectors.

Detectors accept a path (``str`` or :class:`os.PathLike`) or an open binary file object. For a
file object the position is restored after the look; for a path the file is opened and closed.
Any failure (missing file, no permission, a directory, a text-mode handle) returns ``None``.
"""

from __future__ import annotations

import os
from typing import IO, Any, Final

__all__ = ["HEAD_BYTES", "head_bytes", "head_lines", "tail_bytes"]

#: How much of a file the detectors read.
HEAD_BYTES: Final = 8192


def _read_at(source: Any, size: int, *, from_end: bool) -> bytes | None:
    try:
        if isinstance(source, (str, os.PathLike)):
            with open(source, "rb") as fh:
                return _read_handle(fh, size, from_end=from_end)
        if hasattr(source, "read") and hasattr(source, "seek") and hasattr(source, "tell"):
            position = source.tell()
            try:
                return _read_handle(source, size, from_end=from_end)
            finally:
                source.seek(position)
    except (OSError, ValueError, TypeError):
        return None
    return None


def _read_handle(fh: IO[Any], size: int, *, from_end: bool) -> bytes | None:
    if from_end:
        fh.seek(0, os.SEEK_END)
        length = fh.tell()
        if length < size:
            return None
        fh.seek(length - size)
    else:
        fh.seek(0)
    data = fh.read(size)
    return data if isinstance(data, bytes) else None


def head_bytes(source: Any, size: int = HEAD_BYTES) -> bytes | None:
    """The first ``size`` bytes of ``source``, or ``None`` if it cannot be read."""
    return _read_at(source, size, from_end=False)


def tail_bytes(source: Any, size: int) -> bytes | None:
    """The last ``size`` bytes of ``source``, or ``None`` if it is shorter or unreadable."""
    return _read_at(source, size, from_end=True)


def head_lines(source: Any, size: int = HEAD_BYTES) -> list[str] | None:
    """Complete lines in the first ``size`` bytes, decoded as UTF-8 (BOM removed).

    Undecodable bytes become U+FFFD; a final partial line is dropped unless the whole file
    fits in ``size`` bytes. Returns ``None`` for an unreadable source or a binary file (NUL
    bytes in the head).
    """
    data = head_bytes(source, size)
    if data is None or b"\x00" in data:
        return None
    whole = len(data) < size
    text = data.decode("utf-8", errors="replace").removeprefix("\ufeff")
    lines = text.splitlines()
    if not whole and lines and not text.endswith(("\n", "\r")):
        lines = lines[:-1]
    return lines
