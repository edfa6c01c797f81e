"""The fused-magnitude store: every network magnitude magfuse made, with its model version.

Fused magnitudes live under the store root next to the station magnitudes, in the folder
``fused/`` that the station store reserves for this module::

    fused/manifest.json                        committed state of every magnitude type
    fused/<magnitude_type>/<run>-events.parquet          one fuse run: FUSED_EVENTS_SCHEMA
    fused/<magnitude_type>/<run>-contributions.parquet   its rows: FUSED_CONTRIBUTIONS_SCHEMA
    fused/<magnitude_type>/compacted-<seq>-<hex>-*.parquet   many runs merged by compact()

**Runs and commits.** A run (:meth:`FusedStore.write_run`, :meth:`FusedStore.finalize`)
writes its two files under temporary names, syncs and renames them (``stations.store.atomic``),
then commits by replacing ``fused/manifest.json`` atomically (``os.replace`` after ``fsync``,
POSIX ``rename(2)``). A crash at any moment leaves the run absent or complete: readers see only
the files the manifest lists, and the next writer deletes unlisted leftovers. The manifest is
one file for all magnitude types (the list of runs of each type, with file names that are
unique store-wide), so ``mb`` and ``mB`` never collide even where a case-insensitive file
system folds their folders into one. Writers hold the store's write lock (the caller passes
``StationMagnitudeStore.write_lock``); readers take no lock.

**Rows are never rewritten.** Every run appends rows with its ``run_id`` and a store-wide,
increasing ``run_seq``. The current row of an event is its latest row, except that a row whose
``evaluation_status`` is ``final`` wins over any later one (there is none in practice:
:meth:`~FusedStore.write_run` skips events whose current row is final and counts them).
:meth:`~FusedStore.finalize` marks current rows final by writing copies of them (and of their
contributions) as a new run. :meth:`~FusedStore.history` returns every row of an event for
audit. ``evaluation_status`` uses the QuakeML 1.2 EvaluationStatus vocabulary (``preliminary``,
``reviewed``, ``final``; QuakeML BED 1.2 specification, EvaluationStatus); only ``final``
protects a row, ``reviewed`` is a label that a later run may replace.

**Compaction.** Each run adds two files and readers open every listed file of a type: with
800 run files (400 nights of finalize + re-fuse) reading the current magnitudes takes about a
second. :meth:`~FusedStore.compact` merges run files into one pair of files sorted by event id
(row-group statistics then prune event look-ups); writers do it on their own once
``compact_after`` run files exist (``bench/fused_store_bench.py`` prints both). Rows are kept,
not collapsed, so history stays complete. Replaced files stay on disk for one more commit so
a reader holding the previous manifest can finish; a reader that still misses one re-reads
the manifest.

**Schemas.** :data:`FUSED_EVENTS_SCHEMA` holds the columns of
:attr:`FusedMagnitudes.events <fusion.network.network_magnitude.FusedMagnitudes>` plus
``model_version``,
``run_id``, ``run_seq``, ``fused_at``, ``recorded_at`` and ``evaluation_status``;
:data:`FUSED_CONTRIBUTIONS_SCHEMA` the contribution columns plus ``run_id`` and ``run_seq``.
Units are in field metadata (key ``unit``), schema name and version in the file metadata.
Columns of the fused frames that the schemas do not declare are not stored.

Examples
--------
>>> import tempfile
>>> from pathlib import Path
>>> store = FusedStore(Path(tempfile.mkdtemp()))
>>> store.current("ML").shape[0]
0
"""

from __future__ import annotations

import contextlib
import hashlib
import json
import os
import secrets
from collections.abc import Callable, Iterator, Sequence
from contextlib import AbstractContextManager
from dataclasses import asdict, dataclass, field, replace
from datetime import UTC, datetime
from enum import StrEnum
from pathlib import Path
from typing import TYPE_CHECKING, Any, Final, TypeVar

import numpy as np
import pandas as pd
import pyarrow as pa
import pyarrow.compute as pc
import pyarrow.parquet as pq

from stations import strict_json
from stations.errors import ConfigError, SchemaError, StoreCorruptError
from stations.schema import check_schema, normalise_magnitude_type
from stations.store.atomic import ensure_dir, write_bytes_atomic
from stations.store.checksums import damaged
from stations.store.layout import TMP_SUFFIX, new_batch_id
from stations.store.links import inside
from stations.store.reading import candidate_row_groups
from stations.store.verify import Problem, verify_files

if TYPE_CHECKING:
    from fusion.network.network_magnitude import FusedMagnitudes

__all__ = [
    "FUSED_CONTRIBUTIONS_SCHEMA",
    "FUSED_EVENTS_SCHEMA",
    "FUSED_SCHEMA_VERSION",
    "CompactionReport",
    "EvaluationStatus",
    "FusedRun",
    "FusedRunReport",
    "FusedStore",
]

FUSED_SCHEMA_VERSION: Final = "1"
FUSED_DIR: Final = "fused"
MANIFEST_NAME: Final = "manifest.json"
_FORMAT: Final = "magfuse fused-magnitude store"
_LAYOUT_VERSION: Final = 1
#: QuakeML CreationInfo.version holds at most 64 characters (QuakeML BED 1.2 XSD); the model
#: version travels there in exports, so the store enforces the same limit.
MAX_MODEL_VERSION_CHARS: Final = 64
#: Row groups of compacted files: small enough that an event look-up reads little.
_COMPACT_ROW_GROUP: Final = 65_536
_RUN_ROW_GROUP: Final = 1 << 20
#: Codec of run files. A nightly run file holds a few hundred rows in 34 columns; opening a
#: zstd decoder per column chunk made reading one 3.4x slower than snappy (24-row file,
#: 1.7 ms vs 0.5 ms, pyarrow 26; bench/fused_store_bench.py). Compacted files keep zstd.
_RUN_CODEC: Final = "snappy"
_COMPACT_CODEC: Final = "zstd"
#: Automatic compaction: once this many compacted files exist, the next compaction is full.
_MAX_COMPACTED: Final = 8
#: Files with fewer rows are read on one thread (thread start-up costs more than it saves).
_THREADED_ROWS: Final = 100_000
#: Times a reader re-reads the manifest when a file it named was removed meanwhile.
_READ_RETRIES: Final = 5
_UTC_US: Final = pa.timestamp("us", tz="UTC")
_MU: Final = "magnitude units"

_T = TypeVar("_T")


class EvaluationStatus(StrEnum):
    """Status of a fused magnitude; values of QuakeML 1.2 EvaluationStatus.

    QuakeML also defines ``confirmed`` and ``rejected``; magfuse uses the three below.
    """

    preliminary = "preliminary"  #: made by an automatic run; may be re-fused
    reviewed = "reviewed"  #: looked at by an analyst; may still be re-fused
    final = "final"  #: frozen: never re-fused, never changed


def _field(
    name: str, typ: pa.DataType, *, nullable: bool, unit: str | None = None, doc: str = ""
) -> pa.Field:
    meta = {"doc": doc}
    if unit is not None:
        meta["unit"] = unit
    return pa.field(name, typ, nullable=nullable, metadata=meta)


_RUN_FIELDS: Final = (
    _field("run_id", pa.string(), nullable=False, doc="run that wrote the row"),
    _field("run_seq", pa.int64(), nullable=False, unit="1", doc="store-wide run order"),
)

FUSED_EVENTS_SCHEMA: Final = pa.schema(
    [
        _field("event_id", pa.string(), nullable=False, doc="event identifier of the source"),
        _field("origin_time", _UTC_US, nullable=False, unit="UTC", doc="event origin time"),
        _field("magnitude_type", pa.string(), nullable=False, doc="MagnitudeType value"),
        _field("magnitude", pa.float64(), nullable=True, unit=_MU, doc="network magnitude"),
        _field("se", pa.float64(), nullable=True, unit=_MU, doc="standard error (1 sigma)"),
        _field("ci_low", pa.float64(), nullable=True, unit=_MU, doc="interval lower bound"),
        _field("ci_high", pa.float64(), nullable=True, unit=_MU, doc="interval upper bound"),
        _field(
            "confidence_level",
            pa.float64(),
            nullable=False,
            unit="1",
            doc="level of ci_low..ci_high as a fraction (0.68 = 68 %)",
        ),
        _field("n_stations", pa.int64(), nullable=False, unit="1", doc="detections used"),
        _field("n_eff", pa.float64(), nullable=True, unit="1", doc="1 / sum of squared weights"),
        _field("chi2", pa.float64(), nullable=True, unit="1", doc="r' inv(Sigma) r, n-1 dof"),
        _field("birge_ratio", pa.float64(), nullable=True, unit="1", doc="sqrt(chi2/(n-1))"),
        _field("se_scaled", pa.float64(), nullable=True, unit=_MU, doc="se * max(1, birge)"),
        _field("plain_mean", pa.float64(), nullable=True, unit=_MU, doc="mean of raw values"),
        _field("median", pa.float64(), nullable=True, unit=_MU, doc="median of raw values"),
        _field("minus_plain_mean", pa.float64(), nullable=True, unit=_MU, doc="mag - mean"),
        _field(
            "max_influence",
            pa.float64(),
            nullable=True,
            unit=_MU,
            doc="signed influence of the largest |influence| row",
        ),
        _field("max_influence_station", pa.string(), nullable=True, doc="its station"),
        _field("max_abs_z", pa.float64(), nullable=True, unit="1", doc="largest |LOSO z|"),
        _field("jackknife_se", pa.float64(), nullable=True, unit=_MU, doc="n >= 4 only"),
        _field("prior_weight_share", pa.float64(), nullable=True, unit="1", doc="fraction"),
        _field("n_nondetections_used", pa.int64(), nullable=False, unit="1", doc=""),
        _field("censoring_shift", pa.float64(), nullable=True, unit=_MU, doc="censored - GLS"),
        _field("flags", pa.string(), nullable=False, doc="';'-joined EventFlag values"),
        _field("method", pa.string(), nullable=False, doc="EstimateMethod value"),
        _field("converged", pa.bool_(), nullable=False, doc=""),
        _field("n_iter", pa.int64(), nullable=False, unit="1", doc=""),
        _field(
            "gr_posterior_mean",
            pa.float64(),
            nullable=True,
            unit=_MU,
            doc="contains the Gutenberg-Richter prior: never publish, never fit b on it",
        ),
        _field("model_version", pa.string(), nullable=False, doc="station model that fused"),
        *_RUN_FIELDS,
        _field("fused_at", _UTC_US, nullable=False, unit="UTC", doc="when it was computed"),
        _field("recorded_at", _UTC_US, nullable=False, unit="UTC", doc="when the row was written"),
        _field("evaluation_status", pa.string(), nullable=False, doc="EvaluationStatus value"),
    ],
    metadata={"magfuse.schema": "fused_events", "magfuse.schema_version": FUSED_SCHEMA_VERSION},
)

FUSED_CONTRIBUTIONS_SCHEMA: Final = pa.schema(
    [
        _field("event_id", pa.string(), nullable=False, doc=""),
        _field("station_id", pa.string(), nullable=False, doc="FDSN NET.STA.LOC"),
        _field("unit_id", pa.string(), nullable=True, doc="model unit; null: unknown station"),
        _field("detected", pa.bool_(), nullable=False, doc="false: non-detection"),
        _field("magnitude", pa.float64(), nullable=True, unit=_MU, doc="station magnitude read"),
        _field("threshold", pa.float64(), nullable=True, unit=_MU, doc="noise threshold"),
        _field("correction", pa.float64(), nullable=True, unit=_MU, doc="station correction"),
        _field("corrected_magnitude", pa.float64(), nullable=True, unit=_MU, doc=""),
        _field("weight", pa.float64(), nullable=True, unit="1", doc="d(network mag)/d(value)"),
        _field("robust_weight", pa.float64(), nullable=True, unit="1", doc="Student-t weight"),
        _field("residual", pa.float64(), nullable=True, unit=_MU, doc="corrected - network"),
        _field("influence", pa.float64(), nullable=True, unit=_MU, doc="M - M without row"),
        _field("z", pa.float64(), nullable=True, unit="1", doc="leave-one-out z score"),
        _field("flags", pa.string(), nullable=False, doc="';'-joined RowFlag values"),
        *_RUN_FIELDS,
    ],
    metadata={
        "magfuse.schema": "fused_contributions",
        "magfuse.schema_version": FUSED_SCHEMA_VERSION,
    },
)

#: Columns a fused frame must bring; the store adds the others.
_STORE_EVENT_COLUMNS: Final = (
    "model_version",
    "run_id",
    "run_seq",
    "fused_at",
    "recorded_at",
    "evaluation_status",
)
_STORE_ROW_COLUMNS: Final = ("run_id", "run_seq")


# ---------------------------------------------------------------------------------------------
# Result objects
# ---------------------------------------------------------------------------------------------


@dataclass(frozen=True, slots=True)
class FusedRunReport:
    """What one committed run did.

    Attributes
    ----------
    run_id : str or None
        The committed run; None when nothing was left to write (every event final).
    magnitude_type : str
    evaluation_status : str
        Status of the rows written.
    model_versions : tuple of str
        Model versions of the rows written (one for a fuse run).
    events_written, contributions_written : int
        Rows written to the two tables.
    skipped_final : int
        Events left out because their current row is final.
    skipped_final_ids : tuple of str
        Their ids, in input order.
    segments : int
        File pairs of this magnitude type after the commit (see :meth:`FusedStore.compact`).
    compacted : bool
        The writer compacted the type's files after the commit (``compact_after``).
    """

    run_id: str | None
    magnitude_type: str
    evaluation_status: str
    model_versions: tuple[str, ...]
    events_written: int
    contributions_written: int
    skipped_final: int
    skipped_final_ids: tuple[str, ...]
    segments: int
    compacted: bool = False

    def to_dict(self) -> dict[str, Any]:
        """Plain, JSON-ready dict of the fields."""
        out = asdict(self)
        out["model_versions"] = list(self.model_versions)
        out["skipped_final_ids"] = list(self.skipped_final_ids)
        return out


@dataclass(frozen=True, slots=True)
class FusedRun:
    """One committed run, as listed in the manifest (for audit).

    Attributes
    ----------
    run_id : str
    run_seq : int
        Store-wide order of commits.
    kind : str
        ``fuse`` (:meth:`FusedStore.write_run`) or ``status`` (:meth:`FusedStore.finalize`).
    created : str
        Commit time, ISO 8601 UTC.
    evaluation_status : str
    model_versions : tuple of str
    events, contributions : int
        Rows written.
    skipped_final : int
        Events left out because they were final.
    """

    run_id: str
    run_seq: int
    kind: str
    created: str
    evaluation_status: str
    model_versions: tuple[str, ...]
    events: int
    contributions: int
    skipped_final: int


@dataclass(frozen=True, slots=True)
class CompactionReport:
    """What :meth:`FusedStore.compact` did.

    Attributes
    ----------
    magnitude_type : str
    segments_before, segments_after : int
        File pairs of the type before and after.
    event_rows, contribution_rows : int
        Rows in the merged files (0 when nothing was merged).
    """

    magnitude_type: str
    segments_before: int
    segments_after: int
    event_rows: int
    contribution_rows: int


# ---------------------------------------------------------------------------------------------
# Manifest
# ---------------------------------------------------------------------------------------------


@dataclass(frozen=True, slots=True)
class _Segment:
    """A pair of committed files holding the rows of runs ``seq_min`` .. ``seq_max``."""

    kind: str  # "run" or "compacted"
    seq_min: int
    seq_max: int
    events: str  # POSIX path relative to the store root
    contributions: str
    event_rows: int
    contribution_rows: int
    final_rows: int
    events_sha256: str = ""  # "" in manifests written before checksums
    contributions_sha256: str = ""


@dataclass(frozen=True, slots=True)
class _TypeState:
    segments: tuple[_Segment, ...] = ()
    runs: tuple[FusedRun, ...] = ()


@dataclass(frozen=True, slots=True)
class _Manifest:
    next_seq: int = 1
    types: dict[str, _TypeState] = field(default_factory=dict)
    retired: tuple[str, ...] = ()

    def state(self, magnitude_type: str) -> _TypeState:
        return self.types.get(magnitude_type, _TypeState())

    def listed_names(self) -> set[str]:
        names = {Path(p).name for p in self.retired}
        for st in self.types.values():
            for s in st.segments:
                names.update((Path(s.events).name, Path(s.contributions).name))
        return names

    def to_json(self) -> bytes:
        doc = {
            "format": _FORMAT,
            "layout_version": _LAYOUT_VERSION,
            "schema_version": FUSED_SCHEMA_VERSION,
            "next_seq": self.next_seq,
            "types": {
                t: {
                    "segments": [asdict(s) for s in st.segments],
                    "runs": [asdict(r) for r in st.runs],
                }
                for t, st in sorted(self.types.items())
            },
            "retired": list(self.retired),
        }
        return strict_json.dumps(doc, indent=1, sort_keys=True).encode("utf-8")


def _load_manifest(path: Path) -> _Manifest:
    try:
        raw = path.read_bytes()
    except FileNotFoundError:
        return _Manifest()
    try:
        doc = json.loads(raw)
        if doc.get("format") != _FORMAT:
            raise StoreCorruptError(
                f"{path}: not a fused-magnitude manifest; only magfuse may write to this folder"
            )
        if doc.get("schema_version") != FUSED_SCHEMA_VERSION:
            raise SchemaError(
                f"{path}: fused-magnitude schema version {doc.get('schema_version')!r}, this "
                f"magfuse reads version {FUSED_SCHEMA_VERSION!r}; use the magfuse that wrote it"
            )
        types = {
            t: _TypeState(
                segments=tuple(_Segment(**s) for s in st["segments"]),
                runs=tuple(
                    FusedRun(**{**r, "model_versions": tuple(r["model_versions"])})
                    for r in st["runs"]
                ),
            )
            for t, st in doc["types"].items()
        }
        return _Manifest(int(doc["next_seq"]), types, tuple(doc["retired"]))
    except (ValueError, KeyError, TypeError) as exc:
        raise StoreCorruptError(
            f"{path}: unreadable fused-magnitude manifest ({exc}); restore it from a backup"
        ) from None


# ---------------------------------------------------------------------------------------------
# Conversions and checks
# ---------------------------------------------------------------------------------------------


def _check_type(magnitude_type: str) -> str:
    try:
        return normalise_magnitude_type(str(magnitude_type)).value
    except ValueError as exc:
        raise ConfigError(str(exc)) from None


def _check_status(status: str) -> EvaluationStatus:
    try:
        return EvaluationStatus(status)
    except ValueError:
        allowed = ", ".join(s.value for s in EvaluationStatus)
        raise ConfigError(
            f"The 'evaluation_status' parameter of FusedStore must be one of {allowed}. "
            f"Got {status!r} instead."
        ) from None


def _check_model_version(model_version: str) -> str:
    if not isinstance(model_version, str) or not model_version.strip():
        raise ConfigError(
            "The 'model_version' parameter of FusedStore.write_run must be a non-empty str "
            f"(the id of the model that fused). Got {model_version!r} instead."
        )
    if len(model_version) > MAX_MODEL_VERSION_CHARS:
        raise ConfigError(
            f"model version {model_version!r} has {len(model_version)} characters; QuakeML "
            f"creation info holds at most {MAX_MODEL_VERSION_CHARS}: shorten the version id"
        )
    return model_version


def _utc(value: datetime | None) -> datetime:
    if value is None:
        return datetime.now(UTC)
    if not isinstance(value, datetime):
        raise ConfigError(f"expected a datetime, got {type(value).__name__} {value!r}")
    return value.replace(tzinfo=UTC) if value.tzinfo is None else value.astimezone(UTC)


def _to_us(value: datetime | None) -> int | None:
    if value is None:
        return None
    delta = _utc(value) - datetime(1970, 1, 1, tzinfo=UTC)
    return (delta.days * 86_400 + delta.seconds) * 1_000_000 + delta.microseconds


def frame_to_table(frame: pd.DataFrame, schema: pa.Schema, *, where: str) -> pa.Table:
    """Convert ``frame`` to an Arrow table of exactly ``schema`` (docs/conventions.md item 14).

    Each column is converted on its own and cast to the declared type (NaN becomes null);
    categorical columns are decoded. Columns of ``frame`` not in ``schema`` are left out.

    Raises
    ------
    SchemaError
        If a column is missing, cannot take its declared type, or holds a null where the
        schema forbids one; the message names ``where``, the column and the first bad row.
    """
    arrays: list[pa.Array] = []
    for f in schema:
        if f.name not in frame.columns:
            raise SchemaError(f"{where}: column {f.name!r} is missing; expected {f.type}")
        col = frame[f.name]
        try:
            arr = pa.array(col, from_pandas=True)
            if pa.types.is_dictionary(arr.type):
                arr = arr.dictionary_decode()
            if pa.types.is_timestamp(arr.type) and arr.type.tz is None:
                arr = arr.cast(pa.timestamp(arr.type.unit, tz="UTC"))
            arr = arr.cast(f.type)
        except (pa.ArrowInvalid, pa.ArrowTypeError, pa.ArrowNotImplementedError) as exc:
            raise SchemaError(
                f"{where}: column {f.name!r} cannot be stored as {f.type} ({exc})"
            ) from None
        if not f.nullable and arr.null_count:
            row = int(np.flatnonzero(arr.is_null().to_numpy(zero_copy_only=False))[0])
            raise SchemaError(
                f"{where}: column {f.name!r} is empty in row {row}; it must always be set"
            )
        arrays.append(arr)
    return pa.Table.from_arrays(arrays, schema=schema)


def _const(value: Any, n: int, typ: pa.DataType) -> pa.Array:
    return pa.array([value], typ).take(pa.array(np.zeros(n, dtype=np.int64)))


def _set_columns(table: pa.Table, values: dict[str, Any], schema: pa.Schema) -> pa.Table:
    """Replace (or add) columns by constants, then order the table as ``schema``."""
    n = table.num_rows
    cols = {
        name: (
            _const(values[name], n, schema.field(name).type)
            if name in values
            else table.column(name)
        )
        for name in schema.names
    }
    return pa.Table.from_arrays(list(cols.values()), schema=schema)


def _write_parquet(
    path: Path, table: pa.Table, schema: pa.Schema, *, codec: str, row_group_size: int
) -> str:
    """Write ``table`` through ``schema`` (docs/conventions.md item 14) into memory, then to
    ``path`` with
    :func:`stations.store.atomic.write_bytes_atomic` (temporary name, fsync, rename).

    Pages carry checksums; returns the SHA-256 of the bytes written (``sha256:<hex>``).
    """
    sink = pa.BufferOutputStream()
    with pq.ParquetWriter(
        sink, schema, compression=codec, write_statistics=True, write_page_checksum=True
    ) as writer:
        writer.write_table(table, row_group_size=row_group_size)
    data = sink.getvalue().to_pybytes()
    write_bytes_atomic(path, data)
    return f"sha256:{hashlib.sha256(data).hexdigest()}"


# ---------------------------------------------------------------------------------------------
# The store
# ---------------------------------------------------------------------------------------------


def _upgrade_names(table: pa.Table) -> pa.Table:
    """Method and flag names written by earlier versions, read as today's (fusion.flags)."""
    from fusion.flags import upgrade_flags, upgrade_methods

    for name, upgrade in (("method", upgrade_methods), ("flags", upgrade_flags)):
        if name in table.column_names:
            i = table.column_names.index(name)
            table = table.set_column(i, table.schema.field(i), upgrade(table.column(i)))
    return table


class FusedStore:
    """Fused network magnitudes of one store (layout and rules: module docstring).

    Parameters
    ----------
    store_root : Path
        The store directory; fused magnitudes live in ``store_root/fused``.
    lock : callable returning a context manager, optional
        The store's write lock (``StationMagnitudeStore.write_lock``); writers hold it while
        they commit. Without it no locking is done (single-writer use, tests).
    compact_after : int or None, default=32
        A writer that leaves this many run files of a type merges them (:meth:`compact`) in
        the same lock hold; once 8 compacted files would exist the merge is full. None turns
        automatic compaction off. Readers open every listed file, so this bounds their cost.

    Raises
    ------
    ConfigError
        If ``compact_after`` is not None or an int >= 2.
    """

    def __init__(
        self,
        store_root: Path,
        *,
        lock: Callable[[], AbstractContextManager[Any]] | None = None,
        compact_after: int | None = 32,
    ) -> None:
        if compact_after is not None and (
            isinstance(compact_after, bool)
            or not isinstance(compact_after, int)
            or compact_after < 2
        ):
            raise ConfigError(
                "The 'compact_after' parameter of FusedStore must be None or an int in the "
                f"range [2, inf). Got {compact_after!r} instead."
            )
        self.store_root = Path(store_root)
        self.root = self.store_root / FUSED_DIR
        self.compact_after = compact_after
        self._lock = lock
        self._cached: tuple[tuple[int, int, int], _Manifest] | None = None

    # -- manifest and locking --------------------------------------------------------------
    @contextlib.contextmanager
    def _locked(self) -> Iterator[None]:
        if self._lock is None:
            yield
        else:
            with self._lock():
                yield

    @property
    def _manifest_path(self) -> Path:
        return self.root / MANIFEST_NAME

    def _manifest(self) -> _Manifest:
        """The committed manifest, re-read whenever the file was replaced."""
        try:
            st = self._manifest_path.stat()
        except FileNotFoundError:
            self._cached = None
            return _Manifest()
        stamp = (st.st_ino, st.st_size, st.st_mtime_ns)
        if self._cached is None or self._cached[0] != stamp:
            self._cached = (stamp, _load_manifest(self._manifest_path))
        return self._cached[1]

    def _with_manifest(self, fn: Callable[[_Manifest], _T]) -> _T:
        for _ in range(_READ_RETRIES):
            try:
                return fn(self._manifest())
            except FileNotFoundError:
                self._cached = None  # a compaction retired a file; read the new manifest
        raise StoreCorruptError(
            f"{self.root}: files listed in the manifest keep disappearing; check that only "
            "magfuse writes to this folder"
        )

    def _commit(self, m: _Manifest) -> None:
        ensure_dir(self.root, self.store_root)
        write_bytes_atomic(self._manifest_path, m.to_json())
        self._cached = None

    def _sweep(self, m: _Manifest) -> _Manifest:
        """Delete files of crashed writers and files retired one commit ago (under the lock).

        Commits the manifest without the retired list if it had one, and returns it.
        """
        keep = m.listed_names() - {Path(p).name for p in m.retired}
        real_root = Path(os.path.realpath(self.store_root))
        for path in m.retired:
            if not inside(self.store_root / path, real_root):
                continue  # never delete through a link out of the store (stations.store.links)
            with contextlib.suppress(FileNotFoundError):
                (self.store_root / path).unlink()
        if self.root.is_dir() and inside(self.root, real_root):
            for folder in self.root.iterdir():
                if not folder.is_dir() or not inside(folder, real_root):
                    continue
                for f in folder.iterdir():
                    ours = f.name.endswith((".parquet", ".parquet" + TMP_SUFFIX))
                    if ours and f.name not in keep and inside(f, real_root):
                        with contextlib.suppress(FileNotFoundError):
                            f.unlink()
        if not m.retired:
            return m
        cleaned = replace(m, retired=())
        self._commit(cleaned)
        return cleaned

    def verify(self) -> tuple[int, list[Problem]]:
        """Check every file the fused manifest lists: present, SHA-256, every page readable.

        Returns the number of files checked and the problems (paths relative to the store
        root). Segments written before checksums existed are checked for readability only.
        """
        try:
            m = self._manifest()
        except StoreCorruptError as exc:
            return 1, [Problem(f"{FUSED_DIR}/{MANIFEST_NAME}", str(exc).split(": ", 1)[-1])]
        items = [
            (rel, digest or None, schema)
            for st in m.types.values()
            for seg in st.segments
            for rel, digest, schema in (
                (seg.events, seg.events_sha256, FUSED_EVENTS_SCHEMA),
                (seg.contributions, seg.contributions_sha256, FUSED_CONTRIBUTIONS_SCHEMA),
            )
        ]
        return len(items), verify_files(self.store_root, items)

    # -- reading helpers -------------------------------------------------------------------
    def _read(
        self,
        rel: str,
        schema: pa.Schema,
        *,
        columns: Sequence[str] | None = None,
        event_ids: np.ndarray | None = None,
    ) -> pa.Table:
        """One committed file, checked against ``schema``; only row groups that can hold
        ``event_ids`` (sorted) when given. ``FileNotFoundError`` propagates (retry)."""
        path = self.store_root / rel
        try:
            pf = pq.ParquetFile(path, page_checksum_verification=True)
        except FileNotFoundError:
            raise
        except (OSError, pa.ArrowInvalid) as exc:
            raise damaged(path, f"not readable Parquet: {str(exc).splitlines()[0]}") from None
        check_schema(pf.schema_arrow, schema, where=str(path))
        cols = list(schema.names) if columns is None else list(columns)
        threads = pf.metadata.num_rows >= _THREADED_ROWS
        try:
            if event_ids is None:
                table = pf.read(columns=cols, use_threads=threads)
            else:
                groups = candidate_row_groups(pf, "event_id", event_ids)
                table = (
                    pf.read_row_groups(groups, columns=cols, use_threads=threads)
                    if groups
                    else None
                )
        except (OSError, pa.ArrowException) as exc:
            raise damaged(path, f"a page cannot be read: {str(exc).splitlines()[0]}") from None
        if event_ids is not None:
            if table is None:
                return pa.schema([schema.field(c) for c in cols]).empty_table()
            keep = pc.is_in(table.column("event_id"), value_set=pa.array(event_ids, pa.string()))
            table = table.filter(keep)
        return table.select(cols)  # types checked above; metadata stays that of the file

    def _events_table(
        self,
        m: _Manifest,
        magnitude_type: str,
        *,
        columns: Sequence[str] | None = None,
        event_ids: np.ndarray | None = None,
        only_with_finals: bool = False,
    ) -> pa.Table:
        segs = m.state(magnitude_type).segments
        if only_with_finals:
            segs = tuple(s for s in segs if s.final_rows)
        cols = list(FUSED_EVENTS_SCHEMA.names) if columns is None else list(columns)
        parts = [
            self._read(s.events, FUSED_EVENTS_SCHEMA, columns=cols, event_ids=event_ids)
            for s in segs
        ]
        if not parts:
            return pa.schema([FUSED_EVENTS_SCHEMA.field(c) for c in cols]).empty_table()
        return _upgrade_names(pa.concat_tables(parts))

    @staticmethod
    def _latest(table: pa.Table) -> pa.Table:
        """The current row of each event: final rows first, then the highest ``run_seq``."""
        if table.num_rows == 0:
            return table
        final = pc.equal(table.column("evaluation_status"), EvaluationStatus.final.value)
        keys = pa.table(
            {
                "e": table.column("event_id"),
                "f": pc.cast(final, pa.int8()),
                "s": table.column("run_seq"),
            }
        )
        order = pc.sort_indices(keys, [("e", "ascending"), ("f", "ascending"), ("s", "ascending")])
        ids = pc.take(table.column("event_id"), order)
        last = np.ones(len(ids), dtype=bool)
        if len(ids) > 1:
            differs = pc.not_equal(ids.slice(0, len(ids) - 1), ids.slice(1))
            last[:-1] = np.asarray(differs.to_numpy(zero_copy_only=False), dtype=bool)
        return table.take(pc.array_filter(order, pa.array(last)))

    @staticmethod
    def _sorted_ids(event_ids: Sequence[str] | None) -> np.ndarray | None:
        if event_ids is None:
            return None
        if isinstance(event_ids, str):
            raise ConfigError(
                f"event_ids must be a sequence of ids, got the string {event_ids!r}; "
                "wrap one id in a list"
            )
        return np.unique(np.asarray([str(e) for e in event_ids], dtype=object))

    # -- reading ---------------------------------------------------------------------------
    def magnitude_types(self) -> list[str]:
        """Magnitude types with at least one committed run."""
        return sorted(t for t, st in self._manifest().types.items() if st.runs)

    def runs(self, magnitude_type: str) -> tuple[FusedRun, ...]:
        """Committed runs of a type, oldest first (kept after compaction, for audit)."""
        return self._manifest().state(_check_type(magnitude_type)).runs

    def segments(self, magnitude_type: str) -> int:
        """File pairs a reader of ``magnitude_type`` opens (compaction lowers it)."""
        return len(self._manifest().state(_check_type(magnitude_type)).segments)

    def current(
        self,
        magnitude_type: str,
        *,
        start: datetime | None = None,
        end: datetime | None = None,
        event_ids: Sequence[str] | None = None,
    ) -> pd.DataFrame:
        """The current row of each event (final rows win over later ones).

        Parameters
        ----------
        magnitude_type : str
            E.g. ``"ML"`` (aliases such as ``"MS"`` allowed).
        start, end : datetime, optional
            Half-open UTC window ``start <= origin_time < end`` on the current row's origin
            time; a naive datetime is UTC.
        event_ids : sequence of str, optional
            Only these events (unknown ids are ignored).

        Returns
        -------
        pandas.DataFrame
            Columns of :data:`FUSED_EVENTS_SCHEMA`, sorted by origin time, then event id.
        """
        mtype = _check_type(magnitude_type)
        ids = self._sorted_ids(event_ids)
        lo, hi = _to_us(start), _to_us(end)

        def run(m: _Manifest) -> pa.Table:
            return self._latest(self._events_table(m, mtype, event_ids=ids))

        table = self._with_manifest(run)
        if lo is not None or hi is not None:
            t = table.column("origin_time").cast(pa.int64())
            mask = pa.array(np.ones(table.num_rows, dtype=bool))
            if lo is not None:
                mask = pc.and_(mask, pc.greater_equal(t, lo))
            if hi is not None:
                mask = pc.and_(mask, pc.less(t, hi))
            table = table.filter(mask)
        order = pc.sort_indices(table, [("origin_time", "ascending"), ("event_id", "ascending")])
        return table.take(order).to_pandas()

    def history(self, event_id: str, *, magnitude_type: str | None = None) -> pd.DataFrame:
        """Every stored row of one event (all types, or one), for audit.

        Returns
        -------
        pandas.DataFrame
            Columns of :data:`FUSED_EVENTS_SCHEMA`, sorted by magnitude type, then ``run_seq``;
            empty if the event is unknown.
        """
        ids = np.array([str(event_id)], dtype=object)

        def run(m: _Manifest) -> pa.Table:
            types = [_check_type(magnitude_type)] if magnitude_type else sorted(m.types)
            parts = [self._events_table(m, t, event_ids=ids) for t in types]
            return pa.concat_tables(parts) if parts else FUSED_EVENTS_SCHEMA.empty_table()

        table = self._with_manifest(run)
        order = pc.sort_indices(table, [("magnitude_type", "ascending"), ("run_seq", "ascending")])
        return table.take(order).to_pandas()

    def contributions(
        self, magnitude_type: str, event_id: str, *, run_id: str | None = None
    ) -> pd.DataFrame:
        """Station contributions of one event's current row (or of its row in ``run_id``).

        Returns
        -------
        pandas.DataFrame
            Columns of :data:`FUSED_CONTRIBUTIONS_SCHEMA` in the order the run wrote them;
            empty if the event (or its row in ``run_id``) is unknown.
        """
        mtype = _check_type(magnitude_type)
        ids = np.array([str(event_id)], dtype=object)

        def run(m: _Manifest) -> pa.Table:
            rows = self._events_table(m, mtype, columns=_KEY_COLUMNS, event_ids=ids)
            if run_id is None:
                rows = self._latest(rows)
            else:
                rows = rows.filter(pc.equal(rows.column("run_id"), run_id))
            return self._contributions_of(m, mtype, rows)

        return self._with_manifest(run).to_pandas()

    def current_contributions(self, magnitude_type: str, events: pd.DataFrame) -> pd.DataFrame:
        """Contributions of many current rows at once (e.g. a :meth:`current` frame).

        Parameters
        ----------
        magnitude_type : str
        events : pandas.DataFrame
            Columns ``event_id`` and ``run_seq`` (one row per event).

        Returns
        -------
        pandas.DataFrame
            Columns of :data:`FUSED_CONTRIBUTIONS_SCHEMA`, grouped by event in the order of
            ``events``, each event's rows in run order.
        """
        mtype = _check_type(magnitude_type)
        for col in ("event_id", "run_seq"):
            if col not in events.columns:
                raise SchemaError(f"events: column {col!r} is missing; pass a current() frame")
        rows = pa.table(
            {
                "event_id": pa.array(events["event_id"].astype(str).to_numpy(), pa.string()),
                "evaluation_status": _const("", len(events), pa.string()),
                "run_id": _const("", len(events), pa.string()),
                "run_seq": pa.array(events["run_seq"].to_numpy(dtype=np.int64), pa.int64()),
            }
        )
        return self._with_manifest(lambda m: self._contributions_of(m, mtype, rows)).to_pandas()

    def _contributions_of(self, m: _Manifest, mtype: str, rows: pa.Table) -> pa.Table:
        """Contribution rows matching ``rows`` (``event_id``, ``run_seq``), grouped as ``rows``."""
        if rows.num_rows == 0:
            return FUSED_CONTRIBUTIONS_SCHEMA.empty_table()
        want_ids = rows.column("event_id").to_numpy(zero_copy_only=False).astype(object)
        want_seq = rows.column("run_seq").to_numpy()
        segs = [
            s
            for s in m.state(mtype).segments
            if np.any((want_seq >= s.seq_min) & (want_seq <= s.seq_max))
        ]
        few = want_ids.shape[0] <= 1024  # then prune row groups by event id
        ids_sorted = np.unique(want_ids) if few else None
        parts = [
            self._read(s.contributions, FUSED_CONTRIBUTIONS_SCHEMA, event_ids=ids_sorted)
            for s in segs
        ]
        if not parts:
            return FUSED_CONTRIBUTIONS_SCHEMA.empty_table()
        table = pa.concat_tables(parts)
        pos = pc.index_in(table.column("event_id"), value_set=pa.array(want_ids, pa.string()))
        p = pos.to_numpy(zero_copy_only=False)
        found = ~pd.isna(p)
        p_int = np.where(found, p, 0).astype(np.int64)
        match = found & (want_seq[p_int] == table.column("run_seq").to_numpy())
        table = table.filter(pa.array(match))
        # Group by the order of ``rows``, keep the run's own row order inside (stable sort).
        key = pa.table({"p": pa.array(p_int[match]), "s": table.column("run_seq")})
        order = pc.sort_indices(key, [("p", "ascending"), ("s", "ascending")])
        return _upgrade_names(table.take(order))

    def _final_ids(self, m: _Manifest, mtype: str) -> pa.Array:
        t = self._events_table(
            m, mtype, columns=("event_id", "evaluation_status"), only_with_finals=True
        )
        t = t.filter(pc.equal(t.column("evaluation_status"), EvaluationStatus.final.value))
        return pc.unique(t.column("event_id"))

    # -- writing ---------------------------------------------------------------------------
    def write_run(
        self,
        fused: FusedMagnitudes,
        *,
        model_version: str,
        evaluation_status: str = "preliminary",
        now: datetime | None = None,
    ) -> FusedRunReport:
        """Store the result of one fuse run; events whose current row is final are skipped.

        Parameters
        ----------
        fused : FusedMagnitudes
            Output of :func:`~fusion.network.network_magnitude.fuse_events` (one magnitude type).
        model_version : str
            Id of the station model that fused (``ModelRegistry`` version id), at most 64
            characters.
        evaluation_status : {'preliminary', 'reviewed', 'final'}, default='preliminary'
        now : datetime, optional
            Time recorded as ``fused_at`` and ``recorded_at`` (default: the clock); naive is
            UTC.

        Returns
        -------
        FusedRunReport
            ``run_id`` is None (and nothing is committed) when every event was final.

        Raises
        ------
        ConfigError
            Unknown status or magnitude type, empty or over-long model version.
        SchemaError
            A column is missing or mistyped, an event appears twice, the table mixes
            magnitude types, or a contribution names an event the table does not hold.
        StoreBusyError
            From the lock, if another writer holds it too long.
        """
        status = _check_status(evaluation_status)
        version = _check_model_version(model_version)
        stamp = _utc(now)
        events = frame_to_table(
            _with_placeholders(fused.events, _STORE_EVENT_COLUMNS),
            FUSED_EVENTS_SCHEMA,
            where="fused events",
        )
        rows = frame_to_table(
            _with_placeholders(fused.contributions, _STORE_ROW_COLUMNS),
            FUSED_CONTRIBUTIONS_SCHEMA,
            where="fused contributions",
        )
        mtype = _single_type(events)
        _check_unique_events(events)
        known = pc.is_in(rows.column("event_id"), value_set=events.column("event_id"))
        if rows.num_rows and not pc.all(known).as_py():
            bad = int(np.flatnonzero(~known.to_numpy(zero_copy_only=False))[0])
            raise SchemaError(
                f"fused contributions: row {bad} names event "
                f"{rows.column('event_id')[bad].as_py()!r}, which the event table lacks; "
                "pass the events and contributions of one fuse_events result"
            )
        with self._locked():
            m = self._sweep(_load_manifest(self._manifest_path))
            finals = self._final_ids(m, mtype)
            skip = pc.is_in(events.column("event_id"), value_set=finals)
            skipped = tuple(events.column("event_id").filter(skip).to_pylist())
            events = events.filter(pc.invert(skip))
            rows = rows.filter(pc.invert(pc.is_in(rows.column("event_id"), value_set=finals)))
            report = self._commit_run(
                m,
                mtype,
                events,
                rows,
                kind="fuse",
                status=status,
                stamp=stamp,
                fixed={"model_version": version, "fused_at": stamp},
                skipped=skipped,
            )
            merged = self._auto_compact(mtype) if report.run_id is not None else None
        if merged is not None and merged.event_rows:
            report = replace(report, segments=merged.segments_after, compacted=True)
        return report

    def finalize(
        self,
        magnitude_type: str,
        *,
        before: datetime | None = None,
        event_ids: Sequence[str] | None = None,
        now: datetime | None = None,
    ) -> int:
        """Mark current rows final: copies with status ``final`` are written as a new run.

        Selects the current rows that are not final yet, whose origin time is before
        ``before`` (if given) and whose event is in ``event_ids`` (if given). The copies keep
        magnitude, model version and ``fused_at``; ``recorded_at`` is ``now``.

        Parameters
        ----------
        magnitude_type : str
        before : datetime, optional
            Only events with ``origin_time < before`` (UTC; naive is UTC), e.g. now minus
            the revision horizon.
        event_ids : sequence of str, optional
            Only these events.
        now : datetime, optional
            Commit time (default: the clock).

        Returns
        -------
        int
            Events marked final by this call (0 if none; nothing is committed then).

        Raises
        ------
        ConfigError
            If neither ``before`` nor ``event_ids`` is given (finalising everything must be
            asked for explicitly, e.g. with ``before=now``).
        """
        mtype = _check_type(magnitude_type)
        if before is None and event_ids is None:
            raise ConfigError(
                "FusedStore.finalize needs before= or event_ids=; to finalise every event "
                "pass before= a time after the last origin"
            )
        ids = self._sorted_ids(event_ids)
        cutoff = _to_us(before)
        stamp = _utc(now)
        with self._locked():
            m = self._sweep(_load_manifest(self._manifest_path))
            cur = self._latest(self._events_table(m, mtype, event_ids=ids))
            mask = pc.not_equal(cur.column("evaluation_status"), EvaluationStatus.final.value)
            if cutoff is not None:
                mask = pc.and_(mask, pc.less(cur.column("origin_time").cast(pa.int64()), cutoff))
            picked = cur.filter(mask)
            if picked.num_rows == 0:
                return 0
            rows = self._contributions_of(m, mtype, picked)
            report = self._commit_run(
                m,
                mtype,
                picked,
                rows,
                kind="status",
                status=EvaluationStatus.final,
                stamp=stamp,
                fixed={},
                skipped=(),
            )
            self._auto_compact(mtype)
        return report.events_written

    def _commit_run(
        self,
        m: _Manifest,
        mtype: str,
        events: pa.Table,
        rows: pa.Table,
        *,
        kind: str,
        status: EvaluationStatus,
        stamp: datetime,
        fixed: dict[str, Any],
        skipped: tuple[str, ...],
    ) -> FusedRunReport:
        """Write a run's files, then commit the manifest (caller holds the lock)."""
        state = m.state(mtype)
        if events.num_rows == 0:
            versions = (str(fixed["model_version"]),) if "model_version" in fixed else ()
            return FusedRunReport(
                None, mtype, status.value, versions, 0, 0, len(skipped), skipped,
                len(state.segments),
            )  # fmt: skip
        seq = m.next_seq
        run_id = new_batch_id(stamp)
        events = _set_columns(
            events,
            {
                **fixed,
                "run_id": run_id,
                "run_seq": seq,
                "recorded_at": stamp,
                "evaluation_status": status.value,
            },
            FUSED_EVENTS_SCHEMA,
        )
        rows = _set_columns(rows, {"run_id": run_id, "run_seq": seq}, FUSED_CONTRIBUTIONS_SCHEMA)
        folder = self.root / mtype
        self.store_root.mkdir(parents=True, exist_ok=True)
        ensure_dir(folder, self.store_root)
        ev_rel = f"{FUSED_DIR}/{mtype}/{run_id}-events.parquet"
        co_rel = f"{FUSED_DIR}/{mtype}/{run_id}-contributions.parquet"
        sums = [
            _write_parquet(
                self.store_root / rel,
                table,
                schema,
                codec=_RUN_CODEC,
                row_group_size=_RUN_ROW_GROUP,
            )
            for rel, table, schema in (
                (ev_rel, events, FUSED_EVENTS_SCHEMA),
                (co_rel, rows, FUSED_CONTRIBUTIONS_SCHEMA),
            )
        ]
        versions = tuple(sorted(set(events.column("model_version").to_pylist())))
        segment = _Segment(
            kind="run",
            seq_min=seq,
            seq_max=seq,
            events=ev_rel,
            contributions=co_rel,
            event_rows=events.num_rows,
            contribution_rows=rows.num_rows,
            final_rows=events.num_rows if status is EvaluationStatus.final else 0,
            events_sha256=sums[0],
            contributions_sha256=sums[1],
        )
        entry = FusedRun(
            run_id=run_id,
            run_seq=seq,
            kind=kind,
            created=stamp.isoformat(),
            evaluation_status=status.value,
            model_versions=versions,
            events=events.num_rows,
            contributions=rows.num_rows,
            skipped_final=len(skipped),
        )
        new_state = _TypeState((*state.segments, segment), (*state.runs, entry))
        self._commit(replace(m, next_seq=seq + 1, types={**m.types, mtype: new_state}))
        return FusedRunReport(
            run_id=run_id,
            magnitude_type=mtype,
            evaluation_status=status.value,
            model_versions=versions,
            events_written=events.num_rows,
            contributions_written=rows.num_rows,
            skipped_final=len(skipped),
            skipped_final_ids=skipped,
            segments=len(new_state.segments),
        )

    def compact(self, magnitude_type: str, *, full: bool = False) -> CompactionReport:
        """Merge the run files of a type into one pair of files sorted by event id.

        By default the files of single runs are merged (earlier compacted files stay, so the
        cost does not grow with the whole history); ``full=True`` merges everything into one
        pair. Rows are kept as they are: current view and history do not change. Replaced
        files are deleted at the next commit.

        Returns
        -------
        CompactionReport
        """
        mtype = _check_type(magnitude_type)
        with self._locked():
            m = self._sweep(_load_manifest(self._manifest_path))
            return self._compact_locked(m, mtype, full=full)

    def _auto_compact(self, mtype: str) -> CompactionReport | None:
        """Compact after a commit once ``compact_after`` run files exist (caller holds the
        lock); full once :data:`_MAX_COMPACTED` compacted files would exist."""
        if self.compact_after is None:
            return None
        m = _load_manifest(self._manifest_path)
        kinds = [s.kind for s in m.state(mtype).segments]
        if kinds.count("run") < self.compact_after:
            return None
        full = kinds.count("compacted") + 1 >= _MAX_COMPACTED
        return self._compact_locked(self._sweep(m), mtype, full=full)

    def _compact_locked(self, m: _Manifest, mtype: str, *, full: bool) -> CompactionReport:
        state = m.state(mtype)
        chosen = [s for s in state.segments if full or s.kind == "run"]
        before = len(state.segments)
        if len(chosen) < 2:
            return CompactionReport(mtype, before, before, 0, 0)
        ev = pa.concat_tables([self._read(s.events, FUSED_EVENTS_SCHEMA) for s in chosen])
        co = pa.concat_tables(
            [self._read(s.contributions, FUSED_CONTRIBUTIONS_SCHEMA) for s in chosen]
        )
        by_event = [("event_id", "ascending"), ("run_seq", "ascending")]
        ev = ev.take(pc.sort_indices(ev, by_event))
        co = co.take(pc.sort_indices(co, by_event))  # stable: run row order is kept
        lo, hi = min(s.seq_min for s in chosen), max(s.seq_max for s in chosen)
        stem = f"{FUSED_DIR}/{mtype}/compacted-{hi:010d}-{secrets.token_hex(3)}"
        ensure_dir(self.root / mtype, self.store_root)
        sums = [
            _write_parquet(
                self.store_root / f"{stem}-{suffix}.parquet",
                table,
                schema,
                codec=_COMPACT_CODEC,
                row_group_size=_COMPACT_ROW_GROUP,
            )
            for suffix, table, schema in (
                ("events", ev, FUSED_EVENTS_SCHEMA),
                ("contributions", co, FUSED_CONTRIBUTIONS_SCHEMA),
            )
        ]
        merged = _Segment(
            kind="compacted",
            seq_min=lo,
            seq_max=hi,
            events=f"{stem}-events.parquet",
            contributions=f"{stem}-contributions.parquet",
            event_rows=ev.num_rows,
            contribution_rows=co.num_rows,
            final_rows=sum(s.final_rows for s in chosen),
            events_sha256=sums[0],
            contributions_sha256=sums[1],
        )
        rest = [s for s in state.segments if s not in chosen]
        segments = tuple(sorted([*rest, merged], key=lambda s: s.seq_min))
        retired = tuple(p for s in chosen for p in (s.events, s.contributions))
        types = {**m.types, mtype: replace(state, segments=segments)}
        self._commit(replace(m, types=types, retired=retired))
        return CompactionReport(mtype, before, len(segments), ev.num_rows, co.num_rows)


_KEY_COLUMNS: Final = ("event_id", "evaluation_status", "run_id", "run_seq")


def _with_placeholders(frame: pd.DataFrame, names: Sequence[str]) -> pd.DataFrame:
    """``frame`` plus typed placeholder columns the store fills in at commit."""
    n = len(frame)
    extra: dict[str, Any] = {}
    for name in names:
        if name == "run_seq":
            extra[name] = np.zeros(n, dtype=np.int64)
        elif name in ("fused_at", "recorded_at"):
            extra[name] = pd.DatetimeIndex(np.zeros(n, dtype="datetime64[us]"), tz="UTC")
        else:
            extra[name] = np.full(n, "", dtype=object)
    return frame.assign(**extra)


def _single_type(events: pa.Table) -> str:
    types = pc.unique(events.column("magnitude_type")).to_pylist()
    if len(types) != 1:
        raise SchemaError(
            f"fused events: expected one magnitude type per run, found {sorted(types)}; "
            "fuse and store each type separately"
        )
    canonical = _check_type(types[0])
    if canonical != types[0]:
        raise SchemaError(
            f"fused events: magnitude type {types[0]!r} is not canonical; use {canonical!r}"
        )
    return canonical


def _check_unique_events(events: pa.Table) -> None:
    ids = events.column("event_id")
    if len(pc.unique(ids)) == events.num_rows:
        return
    values = np.asarray(ids.to_pylist(), dtype=object)
    _, first, counts = np.unique(values, return_index=True, return_counts=True)
    dup = values[first[counts > 1][0]]
    rows = np.flatnonzero(values == dup)[:2].tolist()
    raise SchemaError(
        f"fused events: event {dup!r} appears in rows {rows[0]} and {rows[1]}; fuse each "
        "event once per run"
    )
