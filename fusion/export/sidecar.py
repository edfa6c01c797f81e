"""The README sidecar written next to every export: ``<file>.README.txt``.

A plain CSV file has no place for the advisory caution or for units (a comment line would
break CSV readers), so every export, whatever its format, gets a plain-text sidecar with:

- the advisory caution (:data:`fusion.advisory.ADVISORY`);
- what the file holds, its format conventions and row count;
- provenance: model versions, magnitude type, export time, magfuse version;
- a column table with units (for QuakeML: the mapping of elements to magfuse columns).

Formats with a place of their own carry the caution there as well: Parquet in the file's
key-value metadata (``magfuse.advisory``), QuakeML as a comment of ``eventParameters``.
"""

from __future__ import annotations

from collections.abc import Sequence
from datetime import datetime
from pathlib import Path
from typing import Final

from fusion.advisory import ADVISORY
from fusion.export.formats import ExportFormat
from stations.store.atomic import write_bytes_atomic

__all__ = ["FORMAT_NOTES", "readme_path", "readme_text", "write_readme"]

#: What a reader of each format needs to know, in one paragraph.
FORMAT_NOTES: Final[dict[ExportFormat, str]] = {
    ExportFormat.csv: (
        "CSV (RFC 4180): UTF-8, comma-separated, one header row of column names; text and "
        "times are in double quotes, numbers and booleans are not. An empty field is a "
        "missing value or empty text. Times are ISO 8601 UTC (YYYY-MM-DDTHH:MM:SS.ffffffZ); "
        "booleans are true/false; numbers carry full double precision (shortest round-trip "
        "form)."
    ),
    ExportFormat.parquet: (
        "Apache Parquet with a declared schema. Each field's metadata holds its unit (key "
        "'unit') and description (key 'doc'); the file's key-value metadata holds the advisory "
        "and the provenance (keys 'magfuse.*'). A missing value is null; times are UTC "
        "timestamps in microseconds."
    ),
    ExportFormat.quakeml: (
        "QuakeML 1.2 (Basic Event Description), UTF-8 XML, written with ObsPy. The advisory "
        "is the first comment of eventParameters. Identifiers of magfuse's own objects use "
        "the authority 'magfuse.invalid' (a reserved, never-resolving name, RFC 2606)."
    ),
}


def readme_path(path: Path) -> Path:
    """The sidecar of ``path``: same folder, name plus ``.README.txt``."""
    return path.with_name(path.name + ".README.txt")


def _table(header: tuple[str, str, str], rows: Sequence[tuple[str, str, str]]) -> list[str]:
    w0 = max(len(header[0]), *(len(r[0]) for r in rows)) if rows else len(header[0])
    w1 = max(len(header[1]), *(len(r[1]) for r in rows)) if rows else len(header[1])
    lines = [f"{header[0]:<{w0}}  {header[1]:<{w1}}  {header[2]}"]
    lines.append(f"{'-' * w0}  {'-' * w1}  {'-' * len(header[2])}")
    lines.extend(f"{a:<{w0}}  {b:<{w1}}  {c}" for a, b, c in rows)
    return lines


def readme_text(
    *,
    title: str,
    data_name: str,
    fmt: ExportFormat,
    rows: int,
    provenance: Sequence[tuple[str, str]],
    columns: Sequence[tuple[str, str, str]],
    columns_header: tuple[str, str, str] = ("column", "unit", "description"),
    notes: Sequence[str] = (),
) -> str:
    """The sidecar's text (see module docstring).

    Parameters
    ----------
    title : str
        What the file holds, e.g. ``"network magnitudes (ML)"``.
    data_name : str
        File name of the data file.
    fmt : ExportFormat
    rows : int
        Data rows (QuakeML: events).
    provenance : sequence of (str, str)
        ``(label, value)`` lines, e.g. model versions and export time.
    columns : sequence of (str, str, str)
        ``(name, unit, description)`` rows of the column table.
    columns_header : (str, str, str)
        Header of that table.
    notes : sequence of str
        Extra paragraphs (one line each).
    """
    heading = f"magfuse export: {title}"
    lines = [heading, "=" * len(heading), "", ADVISORY, ""]
    facts = [("File", data_name), ("Rows", str(rows)), *provenance]
    width = max(len(k) for k, _ in facts) + 1
    lines.extend(f"{k + ':':<{width}} {v}" for k, v in facts)
    lines += ["", "Format", "------", FORMAT_NOTES[fmt], ""]
    for note in notes:
        lines += [note, ""]
    lines += ["Columns" if fmt is not ExportFormat.quakeml else "Mapping", "-------"]
    lines += _table(columns_header, columns)
    return "\n".join(lines) + "\n"


def write_readme(path: Path, text: str) -> Path:
    """Write the sidecar of ``path`` atomically and return its path."""
    target = readme_path(path)
    write_bytes_atomic(target, text.encode("utf-8"))
    return target


def stamp(now: datetime) -> str:
    """ISO 8601 UTC with a ``Z``, to the second."""
    return now.strftime("%Y-%m-%dT%H:%M:%SZ")
