"""Writing a documented Arrow table as CSV or Parquet, with its README sidecar.

Both writers are crash-safe in the same way as the store (temporary name, ``fsync``, rename):
an interrupted export leaves the previous file or the complete new one. The sidecar is written
first, so a data file never exists without its advisory.
"""

from __future__ import annotations

import contextlib
import os
from collections.abc import Sequence
from datetime import datetime
from pathlib import Path
from typing import Final

import pyarrow as pa
import pyarrow.compute as pc
import pyarrow.csv as pa_csv

from fusion import __version__
from fusion.advisory import ADVISORY
from fusion.export.formats import EXPORT_SCHEMA_VERSION, ExportFormat, ExportReport
from fusion.export.sidecar import readme_text, stamp, write_readme
from stations.errors import ConfigError
from stations.store.atomic import fsync_dir, write_parquet_atomic
from stations.store.layout import TMP_SUFFIX

__all__ = ["check_target", "csv_ready", "export_table", "file_metadata"]

#: Rows per Parquet row group of an export.
_ROW_GROUP: Final = 1 << 17
#: ISO 8601 with microseconds and a Z (Arrow's %S prints the fraction of a microsecond stamp).
_ISO_UTC: Final = "%Y-%m-%dT%H:%M:%SZ"


def check_target(path: Path) -> Path:
    """``path`` as a :class:`Path` whose folder exists and which is not a folder itself.

    Raises
    ------
    ConfigError
        Naming the path and the fix.
    """
    target = Path(path)
    if target.is_dir():
        raise ConfigError(f"{target}: is a folder; pass a file name to --out")
    if not target.parent.is_dir():
        raise ConfigError(f"{target.parent}: folder does not exist; create it or change --out")
    return target


def file_metadata(
    kind: str, model_versions: Sequence[str], now: datetime, extra: dict[str, str] | None = None
) -> dict[str, str]:
    """Key-value metadata of an exported Parquet file (advisory and provenance)."""
    meta = {
        "magfuse.advisory": ADVISORY,
        "magfuse.export": kind,
        "magfuse.export_schema_version": EXPORT_SCHEMA_VERSION,
        "magfuse.model_versions": ",".join(model_versions),
        "magfuse.exported_at": stamp(now),
        "magfuse.code_version": __version__,
    }
    meta.update(extra or {})
    return meta


def csv_ready(table: pa.Table) -> pa.Table:
    """Timestamps as ISO 8601 UTC text (``...Z``); every other column unchanged."""
    cols = []
    for f, col in zip(table.schema, table.columns, strict=True):
        if pa.types.is_timestamp(f.type):
            utc = col.cast(pa.timestamp("us", tz="UTC"))
            cols.append(pc.strftime(utc, format=_ISO_UTC))
        else:
            cols.append(col)
    return pa.Table.from_arrays(cols, names=table.column_names)


def _write_csv_atomic(path: Path, table: pa.Table) -> None:
    tmp = path.with_name(path.name + TMP_SUFFIX)
    try:
        options = pa_csv.WriteOptions(include_header=True, quoting_style="needed")
        pa_csv.write_csv(csv_ready(table), tmp, write_options=options)
        fd = os.open(tmp, os.O_RDONLY)
        try:
            os.fsync(fd)
        finally:
            os.close(fd)
        os.replace(tmp, path)
    except BaseException:
        with contextlib.suppress(FileNotFoundError):
            os.unlink(tmp)
        raise
    fsync_dir(path.parent)


def export_table(
    table: pa.Table,
    path: Path,
    fmt: ExportFormat,
    *,
    kind: str,
    title: str,
    model_versions: Sequence[str],
    provenance: Sequence[tuple[str, str]],
    now: datetime,
    notes: Sequence[str] = (),
) -> ExportReport:
    """Write ``table`` as CSV or Parquet plus its README sidecar.

    Parameters
    ----------
    table : pyarrow.Table
        Columns with ``unit`` and ``doc`` in their field metadata (they go into the README
        and, for Parquet, stay in the file).
    path : Path
        The data file (its folder must exist).
    fmt : ExportFormat
        ``csv`` or ``parquet``.
    kind, title : str
        What the table is (``"stations"``) and a README heading.
    model_versions : sequence of str
        Model versions the values come from.
    provenance : sequence of (str, str)
        Extra ``(label, value)`` lines for the README.
    now : datetime
        Export time (UTC).
    notes : sequence of str
        Extra README paragraphs.

    Returns
    -------
    ExportReport
    """
    target = check_target(path)
    if fmt not in (ExportFormat.csv, ExportFormat.parquet):
        raise ConfigError(f"export_table writes csv or parquet, not {fmt.value}")
    columns = [
        (
            f.name,
            (f.metadata or {}).get(b"unit", b"").decode() or "-",
            (f.metadata or {}).get(b"doc", b"").decode() or "(no description)",
        )
        for f in table.schema
    ]
    facts = [
        ("Model versions", ", ".join(model_versions) or "-"),
        *provenance,
        ("Exported", f"{stamp(now)} by magfuse {__version__}"),
    ]
    text = readme_text(
        title=title,
        data_name=target.name,
        fmt=fmt,
        rows=table.num_rows,
        provenance=facts,
        columns=columns,
        notes=notes,
    )
    readme = write_readme(target, text)
    if fmt is ExportFormat.csv:
        _write_csv_atomic(target, table)
    else:
        meta = file_metadata(kind, model_versions, now)
        with_meta = table.replace_schema_metadata(meta)
        write_parquet_atomic(target, with_meta, with_meta.schema, row_group_size=_ROW_GROUP)
    return ExportReport(
        kind=kind,
        format=fmt.value,
        path=str(target),
        readme=str(readme),
        rows=table.num_rows,
        model_versions=tuple(model_versions),
        notes=tuple(notes),
    )
