"""What a store holds, in numbers: the result objects of ``StationMagnitudeStore.summary``."""

from __future__ import annotations

from dataclasses import asdict, dataclass
from datetime import datetime
from typing import Any

__all__ = ["StoreSummary", "TypeSummary"]


def _iso(value: datetime | None) -> str | None:
    return None if value is None else value.isoformat().replace("+00:00", "Z")


@dataclass(frozen=True, slots=True)
class TypeSummary:
    """Rows of one magnitude type.

    Attributes
    ----------
    magnitude_type : str
    rows_current : int
        Rows in the current view (latest revision of each key).
    rows_all : int
        Rows of every revision.
    detected, not_detected : int
        Current rows that are detections / non-detections (``detected`` false).
    revised : int
        Rows (of every revision) with ``revision`` above 1.
    events, stations : int
        Distinct ``event_id`` / ``station_id`` in the current view.
    first_origin_time, last_origin_time : datetime or None
        UTC range of ``origin_time`` in the current view.
    """

    magnitude_type: str
    rows_current: int
    rows_all: int
    detected: int
    not_detected: int
    revised: int
    events: int
    stations: int
    first_origin_time: datetime | None
    last_origin_time: datetime | None

    def to_dict(self) -> dict[str, Any]:
        """Plain JSON-ready dict (times as ISO 8601 UTC strings)."""
        d = asdict(self)
        d["first_origin_time"] = _iso(self.first_origin_time)
        d["last_origin_time"] = _iso(self.last_origin_time)
        return d


@dataclass(frozen=True, slots=True)
class StoreSummary:
    """The whole store; the per-type figures are in ``by_type`` (sorted by type).

    Attributes
    ----------
    root : str
        Store folder.
    schema_version : str
        Record schema version of the store.
    batches, files : int
        Committed ingest batches and data files.
    rows_current, rows_all, detected, not_detected, revised : int
        Sums over ``by_type`` (see :class:`TypeSummary`).
    events, stations : int
        Distinct events and stations over all types (current view).
    first_origin_time, last_origin_time : datetime or None
        UTC range over all types (current view).
    quarantined : int
        Rows in quarantine.
    by_type : tuple of TypeSummary
    """

    root: str
    schema_version: str
    batches: int
    files: int
    rows_current: int
    rows_all: int
    detected: int
    not_detected: int
    revised: int
    events: int
    stations: int
    first_origin_time: datetime | None
    last_origin_time: datetime | None
    quarantined: int
    by_type: tuple[TypeSummary, ...]

    def to_dict(self) -> dict[str, Any]:
        """Plain JSON-ready dict (times as ISO 8601 UTC strings)."""
        d = {k: getattr(self, k) for k in self.__dataclass_fields__ if k != "by_type"}
        d["first_origin_time"] = _iso(self.first_origin_time)
        d["last_origin_time"] = _iso(self.last_origin_time)
        d["by_type"] = [t.to_dict() for t in self.by_type]
        return d
