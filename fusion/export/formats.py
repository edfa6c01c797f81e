"""Export formats, column specifications and the report every export returns."""

from __future__ import annotations

from collections.abc import Iterable, Mapping
from dataclasses import asdict, dataclass
from enum import StrEnum
from typing import Any, Final

import pyarrow as pa

from stations.errors import UnknownFormatError

__all__ = [
    "EXPORT_SCHEMA_VERSION",
    "ColumnSpec",
    "ExportFormat",
    "ExportReport",
    "check_format",
    "schema_of",
]

#: Version of the exported column sets (written into Parquet metadata and the README).
EXPORT_SCHEMA_VERSION: Final = "1"


class ExportFormat(StrEnum):
    """File formats of ``magfuse export``."""

    csv = "csv"  #: RFC 4180 CSV, UTF-8, one header row
    parquet = "parquet"  #: Apache Parquet, declared schema, units in field metadata
    quakeml = "quakeml"  #: QuakeML 1.2 (BED), written by ObsPy (magnitudes only)


def check_format(fmt: str, allowed: Iterable[ExportFormat], *, what: str) -> ExportFormat:
    """The :class:`ExportFormat` named by ``fmt`` (case-insensitive) if ``what`` supports it.

    Raises
    ------
    UnknownFormatError
        If ``fmt`` is not a format or ``what`` cannot be written in it; the message lists the
        formats ``what`` supports.
    """
    choices = tuple(allowed)
    names = ", ".join(f.value for f in choices)
    try:
        found = ExportFormat(str(fmt).strip().lower())
    except ValueError:
        raise UnknownFormatError(
            f"unknown export format {fmt!r} for {what}; choose one of {names}"
        ) from None
    if found not in choices:
        raise UnknownFormatError(f"{what} cannot be exported as {found.value}; choose {names}")
    return found


@dataclass(frozen=True, slots=True)
class ColumnSpec:
    """One documented export column.

    Attributes
    ----------
    name : str
        Column name in the exported file.
    source : str
        Column of the input frame it is copied from.
    type : pyarrow.DataType
        Declared type.
    unit : str
        Unit ("-" for identifiers and text, "1" for dimensionless numbers).
    doc : str
        One-line description (also in the Parquet field metadata and the README).
    """

    name: str
    source: str
    type: pa.DataType
    unit: str
    doc: str

    def field(self) -> pa.Field:
        """The Arrow field, with ``unit`` and ``doc`` in its metadata."""
        return pa.field(self.name, self.type, metadata={"unit": self.unit, "doc": self.doc})


def schema_of(specs: Iterable[ColumnSpec], metadata: Mapping[str, str]) -> pa.Schema:
    """Arrow schema of ``specs`` with file-level key-value ``metadata``."""
    return pa.schema([s.field() for s in specs], metadata=dict(metadata))


@dataclass(frozen=True, slots=True)
class ExportReport:
    """What one export wrote.

    Attributes
    ----------
    kind : str
        ``magnitudes``, ``stations``, ``pairs`` or another model table name.
    format : str
        An :class:`ExportFormat` value.
    path : str
        The data file.
    readme : str
        Its README sidecar (advisory, columns with units, provenance).
    rows : int
        Data rows written (QuakeML: events).
    model_versions : tuple of str
        Model versions the exported values come from.
    skipped : int
        Input rows left out (QuakeML: events without a magnitude).
    notes : tuple of str
        Anything else the caller should show (e.g. events written without an origin).
    """

    kind: str
    format: str
    path: str
    readme: str
    rows: int
    model_versions: tuple[str, ...]
    skipped: int = 0
    notes: tuple[str, ...] = ()

    def to_dict(self) -> dict[str, Any]:
        """Plain, JSON-ready dict of the fields."""
        out = asdict(self)
        out["model_versions"] = list(self.model_versions)
        out["notes"] = list(self.notes)
        return out
