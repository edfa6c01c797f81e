"""What the service holds between requests, and the library calls behind each endpoint.

One :class:`ServiceState` per app: the store, a model registry that caches the parameters of
immutable versions (the active pointer is read on every request, so a version adopted by the API,
the command line or the nightly run is used at once, without a restart), the fused store, the
token book and the hub of fused-event updates.

A submission is the same path as ``magfuse ingest``: the body is written to a temporary file and
:func:`stations.ingest.ingest_file` reads, validates, quarantines and commits it as one batch.
Every event touched by the batch is then fused with the active model of its type and recorded as
a preliminary run (:meth:`fusion.versions.fused_store.FusedStore.write_run`; final rows are left
alone). Both steps run under the store's write lock, so a command-line writer waits for them (or
fails with the lock's one-line message) and the fused value always reflects the committed rows.
"""

from __future__ import annotations

import hashlib
import logging
import tempfile
import threading
import time
from collections import deque
from dataclasses import dataclass, field
from functools import lru_cache
from pathlib import Path
from typing import TYPE_CHECKING, Any

import pandas as pd

from fusion.advisory import ADVISORY
from fusion.versions.fused_store import FusedStore
from fusion.versions.model_registry import ModelRegistry, ModelVersion
from stations.errors import MagfuseError, MalformedFileError, SchemaError, UnknownFormatError
from stations.strict_json import to_jsonable

if TYPE_CHECKING:
    from fusion.model.parameters import StationParameters
    from fusion.service.tokens import TokenBook
    from fusion.settings import MagfuseConfig
    from stations.ingest import IngestOutcome
    from stations.store import StationMagnitudeStore

log = logging.getLogger("magfuse.service")

__all__ = [
    "LIST_COLUMNS",
    "CachedRegistry",
    "ServiceState",
    "UpdateHub",
    "body_to_file",
    "update_rows",
]

#: Rejected rows listed in a submission's response (all are in the quarantine).
MAX_REJECTED_LISTED = 1000
#: Event ids listed in a submission's response.
MAX_EVENTS_LISTED = 1000
#: Explanations kept in memory (oldest dropped first).
MAX_CACHED_EVENTS = 20_000


class CachedRegistry(ModelRegistry):
    """A :class:`ModelRegistry` that keeps loaded parameters and tables in memory.

    Versions are immutable once saved, so caching by version id is safe; the active pointer is
    still read from disk on every call.
    """

    def __init__(self, store_root: Path, **kwargs: Any) -> None:
        super().__init__(store_root, **kwargs)
        self._params = lru_cache(maxsize=16)(self._load_params_uncached)
        self._tables = lru_cache(maxsize=64)(self._load_table_uncached)

    def _load_params_uncached(self, version_id: str) -> StationParameters:
        return super().load_parameters(version_id)

    def _load_table_uncached(self, version_id: str, name: str) -> pd.DataFrame:
        return super().load_table(version_id, name)

    def load_parameters(self, version: ModelVersion | str) -> StationParameters:
        vid = version if isinstance(version, str) else version.version_id
        return self._params(vid)

    def load_table(self, version: ModelVersion | str, name: str) -> pd.DataFrame:
        vid = version if isinstance(version, str) else version.version_id
        return self._tables(vid, name).copy()


@dataclass
class UpdateHub:
    """Fused-event updates of this process, for the event stream (server-sent events).

    Writers append under a lock; each stream remembers the last sequence number it sent and
    polls :meth:`since` (cheap), so no thread ever blocks on a slow client.
    """

    keep: int = 1000
    _items: deque[tuple[int, dict[str, Any]]] = field(default_factory=deque)
    _seq: int = 0
    _lock: threading.Lock = field(default_factory=threading.Lock)

    def publish(self, items: list[dict[str, Any]]) -> None:
        """Append updates (one per fused event)."""
        with self._lock:
            for item in items:
                self._seq += 1
                self._items.append((self._seq, item))
            while len(self._items) > self.keep:
                self._items.popleft()

    @property
    def last(self) -> int:
        """Sequence number of the newest update (0: none yet)."""
        return self._seq

    def since(self, seq: int) -> list[tuple[int, dict[str, Any]]]:
        """Updates newer than ``seq``, oldest first."""
        with self._lock:
            return [(s, item) for s, item in self._items if s > seq]


def _sniff(body: bytes) -> str:
    """``json``, ``xml`` or ``csv`` from the first non-blank byte of a body."""
    head = body.lstrip()[:1]
    if head == b"[":
        return "json"
    if head == b"<":
        return "xml"
    return "csv"


def _json_records_csv(body: bytes) -> bytes:
    """A JSON list of records (keys = magfuse CSV column names) as magfuse CSV bytes.

    Raises
    ------
    MalformedFileError
        If the body is not a JSON list of objects with known columns.
    """
    import json

    from stations.readers.csv import CSV_COLUMNS

    where = "request body"
    try:
        data = json.loads(body)
    except (ValueError, UnicodeDecodeError) as exc:
        raise MalformedFileError(
            f"{where}: not valid JSON ({exc}); send a JSON list of records"
        ) from None
    if not isinstance(data, list) or not data or not all(isinstance(r, dict) for r in data):
        raise MalformedFileError(
            f"{where}: expected a non-empty JSON list of objects, one per station magnitude; "
            "see the CSV template for the keys"
        )
    keys = list(dict.fromkeys(k for r in data for k in r))
    unknown = [k for k in keys if k not in CSV_COLUMNS]
    if unknown:
        raise MalformedFileError(
            f"{where}: unknown key {unknown[0]!r}; the keys are {', '.join(CSV_COLUMNS)}"
        )
    frame = pd.DataFrame.from_records(data, columns=keys)
    for col in frame.columns:
        if frame[col].map(lambda v: isinstance(v, bool)).any():
            frame[col] = frame[col].map(
                lambda v: ("true" if v else "false") if isinstance(v, bool) else v
            )
    return frame.to_csv(index=False).encode("utf-8")


def body_to_file(body: bytes, folder: Path, kind: str | None = None) -> Path:
    """Write a submission body to ``folder`` as the file ``magfuse ingest`` would read.

    ``kind`` is ``csv``, ``xml`` or ``json`` (None: recognised from the body). A JSON list of
    records becomes magfuse CSV. The file is named after the body's SHA-256, so the same body
    always gives the same file content (and is recognised as a duplicate by the store).
    """
    kind = kind or _sniff(body)
    data = _json_records_csv(body) if kind == "json" else body
    suffix = ".xml" if kind == "xml" else ".csv"
    path = folder / f"submission-{hashlib.sha256(data).hexdigest()[:16]}{suffix}"
    path.write_bytes(data)
    return path


class ServiceState:
    """The service's handles on one store (see module docstring).

    Parameters
    ----------
    store : StationMagnitudeStore
    config : MagfuseConfig
    """

    def __init__(self, store: StationMagnitudeStore, config: MagfuseConfig) -> None:
        from fusion.service.tokens import TokenBook

        self.store = store
        self.cfg = config
        self.registry = CachedRegistry(store.root, lock=store.write_lock)
        self.fused = FusedStore(store.root, lock=store.write_lock)
        self.tokens: TokenBook = TokenBook(store.root, lock=store.write_lock)
        self.hub = UpdateHub()
        self.started = time.time()
        self._event_cache: dict[
            tuple[str, str | None, bool], tuple[tuple[Any, ...], dict[str, Any]]
        ] = {}
        self._cache_lock = threading.Lock()
        self._cache_seq = 0
        self._cleared_at = 0
        self._evicted_at: dict[str, int] = {}
        self._commits_seen: tuple[Any, ...] = ()

    # -- submissions -----------------------------------------------------------------------
    def submit(
        self, body: bytes, *, kind: str | None = None, fmt: str | None = None, compute: bool = False
    ) -> dict[str, Any]:
        """Ingest one body as one batch and fuse the events it touched (module docstring).

        Returns
        -------
        dict
            JSON-ready: batch id, counts, rejected rows with reasons, events, fusion summary.
        """
        from fusion.cli.common import compute_setup
        from stations.ingest import ingest_file

        cfg = self.cfg
        options, metadata = compute_setup(cfg, None) if compute else (None, None)
        with tempfile.TemporaryDirectory(prefix="magfuse-submission-") as tmp:
            path = body_to_file(body, Path(tmp), kind)
            try:
                with self.store.write_lock():
                    before = self._commits()
                    outcome = ingest_file(
                        self.store,
                        path,
                        format=fmt,
                        magnitude_range=(cfg.ingest.magnitude_min, cfg.ingest.magnitude_max),
                        compute=options,
                        metadata=metadata,
                    )
                    touched = self._touched(outcome.report.batch_id)
                    fused = self.fuse_events(touched)
                    # Still under the lock: only this submission wrote since ``before``; if
                    # another writer committed earlier, forget every cached explanation.
                    ids = touched["event_id"].astype(str).tolist()
                    known = before == self._commits_seen
                    self._forget(ids if known else None, self._commits())
            except (MalformedFileError, UnknownFormatError, SchemaError) as exc:
                # The temporary file means nothing to the client: name the body instead.
                raise type(exc)(str(exc).replace(str(path), "request body")) from None
        return self._submission_body(outcome, touched, fused)

    def _touched(self, batch_id: str | None) -> pd.DataFrame:
        """``event_id, magnitude_type`` of the rows a batch wrote (unique)."""
        import pyarrow.parquet as pq

        cols = ["event_id", "magnitude_type"]
        if batch_id is None:
            return pd.DataFrame(columns=cols)
        m = self.store.manifest()
        batch = next(b for b in m.batches if b.batch_id == batch_id)
        parts = [
            pq.read_table(self.store.root / m.file(no).path, columns=cols).to_pandas()
            for no in batch.file_nos
        ]
        if not parts:
            return pd.DataFrame(columns=cols)
        return pd.concat(parts, ignore_index=True).drop_duplicates(ignore_index=True)

    def _rejected(self, batch_id: str | None) -> list[dict[str, str]]:
        """Location and reason of a batch's quarantined rows."""
        import pyarrow.parquet as pq

        if batch_id is None:
            return []
        m = self.store.manifest()
        batch = next(b for b in m.batches if b.batch_id == batch_id)
        if not batch.quarantine_path:
            return []
        table = pq.read_table(
            self.store.root / batch.quarantine_path, columns=["source_location", "reason"]
        ).slice(0, MAX_REJECTED_LISTED)
        return [
            {"location": str(loc), "reason": str(reason)}
            for loc, reason in zip(
                table.column("source_location").to_pylist(),
                table.column("reason").to_pylist(),
                strict=True,
            )
        ]

    def _submission_body(
        self, outcome: IngestOutcome, touched: pd.DataFrame, fused: dict[str, Any]
    ) -> dict[str, Any]:
        r = outcome.report
        same = r.same_content_as
        ids = sorted(touched["event_id"].astype(str).unique().tolist())
        return {
            "batch_id": same if same is not None else r.batch_id,
            "duplicate_submission": same is not None,
            "accepted": r.accepted,
            "duplicate": r.duplicate,
            "revised": r.revised,
            "quarantined": r.quarantined,
            "computed": outcome.computed,
            "rejected": self._rejected(r.batch_id),
            "events": ids[:MAX_EVENTS_LISTED],
            "events_touched": len(ids),
            "fusion": fused,
            "advisory": ADVISORY,
        }

    # -- fusion on arrival -----------------------------------------------------------------
    def fuse_events(self, touched: pd.DataFrame) -> dict[str, Any]:
        """Fuse the touched events of each magnitude type with its active model and record them.

        Types without an active model are reported and left unfused.
        """
        from fusion.observations import ObservationSet
        from fusion.workflows.fusing import fuse_with_version

        out: dict[str, Any] = {}
        for mtype, group in touched.groupby("magnitude_type", sort=True):
            mtype = str(mtype)
            vid = self.registry.active_id(mtype)
            if vid is None:
                out[mtype] = {"model_version": None, "events_written": 0, "left_final": 0}
                continue
            version = self.registry.get(vid)
            frame = self.store.events(group["event_id"].tolist(), magnitude_type=mtype)
            try:
                obs = ObservationSet.from_frame(frame, magnitude_type=mtype)
                result = fuse_with_version(obs, self.registry, version, self.cfg)
                report = self.fused.write_run(result, model_version=vid)
            except Exception as exc:  # the batch is committed: say so, whatever failed here
                if not isinstance(exc, MagfuseError):
                    log.exception("fusion on arrival failed for %s events of a batch", mtype)
                out[mtype] = {
                    "model_version": vid,
                    "events_written": 0,
                    "left_final": 0,
                    "error": " ".join(str(exc).split())[:500] or type(exc).__name__,
                }
                continue
            out[mtype] = {
                "model_version": vid,
                "events_written": report.events_written,
                "left_final": report.skipped_final,
            }
            ev = result.events
            if report.skipped_final_ids:
                ev = ev[~ev["event_id"].isin(report.skipped_final_ids)]
            self.hub.publish(update_rows(ev, vid))
        return out

    # -- reading ---------------------------------------------------------------------------
    def _commits(self) -> tuple[int, tuple[int, int]]:
        """Generation of the station store and stamp of the fused store's manifest."""
        m = self.store.manifest()
        try:
            fst = (self.fused.root / "manifest.json").stat()
            fused_stamp = (fst.st_ino, fst.st_mtime_ns)
        except FileNotFoundError:
            fused_stamp = (0, 0)
        return m.generation, fused_stamp

    def _forget(self, event_ids: list[str] | None, commits: tuple[Any, ...]) -> None:
        """Drop cached explanations (of ``event_ids``, or all) and note the commits seen."""
        with self._cache_lock:
            self._cache_seq += 1
            if event_ids is None:
                self._event_cache.clear()
                self._evicted_at.clear()
                self._cleared_at = self._cache_seq
            else:
                for eid in event_ids:
                    self._evicted_at[eid] = self._cache_seq
                    for key in [k for k in self._event_cache if k[0] == eid]:
                        del self._event_cache[key]
            self._commits_seen = commits

    def model_types(self) -> list[str]:
        """Magnitude types that have a model folder."""
        root = self.registry.root
        return sorted(p.name for p in root.glob("*") if p.is_dir()) if root.is_dir() else []

    def event(
        self, event_id: str, magnitude_type: str | None, *, recompute: bool = False
    ) -> dict[str, Any]:
        """``magfuse event --json`` of one event, plus its stored (recorded) network magnitude.

        Explanations are cached per event and model version. A submission through this service
        forgets the events it touched; a commit by any other writer (command line, nightly
        run, another worker) forgets them all, since it may have touched any event.
        """
        from fusion.workflows.event_view import explain_event

        commits = self._commits()
        if commits != self._commits_seen:
            self._forget(None, commits)
        types = [magnitude_type] if magnitude_type else self.model_types()
        active = tuple(self.registry.active_id(t) for t in types)
        key = (event_id, magnitude_type, recompute)
        with self._cache_lock:
            hit = self._event_cache.get(key)
            started = self._cache_seq
        if hit is not None and hit[0] == active:
            return hit[1]
        ex = explain_event(
            self.store,
            self.registry,
            self.cfg,
            event_id,
            magnitude_type=magnitude_type,
            recompute=recompute,
        )
        body = to_jsonable(ex.to_dict())
        stored = self.fused.current(ex.estimate.magnitude_type, event_ids=[event_id])
        row = {str(k): v for k, v in stored.iloc[0].to_dict().items()} if len(stored) else None
        body["recorded"] = to_jsonable(_record(row)) if row is not None else None
        with self._cache_lock:
            stale = self._evicted_at.get(event_id, 0) > started or self._cleared_at > started
            if not stale:
                if len(self._event_cache) >= MAX_CACHED_EVENTS:
                    self._event_cache.pop(next(iter(self._event_cache)))
                self._event_cache[key] = (active, body)
        return body


#: Columns of an event in lists, the stream and the live page.
LIST_COLUMNS: tuple[str, ...] = (
    "event_id",
    "origin_time",
    "magnitude_type",
    "magnitude",
    "se",
    "ci_low",
    "ci_high",
    "plain_mean",
    "median",
    "n_stations",
    "method",
    "flags",
)


def update_rows(
    events: pd.DataFrame, version_id: str | None = None, status: str = "preliminary"
) -> list[dict[str, Any]]:
    """Events as JSON-ready dicts of :data:`LIST_COLUMNS` plus status and model version.

    ``events`` is a fused event table or a fused-store frame (which carries its own status and
    model version; the arguments fill them when absent).
    """
    cols = [c for c in LIST_COLUMNS if c in events.columns]
    extra = [c for c in ("evaluation_status", "model_version") if c in events.columns]
    frame = events.loc[:, cols + extra].copy()
    frame["origin_time"] = _iso(frame["origin_time"])
    if "evaluation_status" not in frame:
        frame["evaluation_status"] = status
    if "model_version" not in frame:
        frame["model_version"] = version_id
    records: list[dict[str, Any]] = to_jsonable(frame.to_dict(orient="records"))
    return records


def _iso(times: pd.Series) -> pd.Series:
    t = pd.to_datetime(times, utc=True)
    text = t.dt.strftime("%Y-%m-%dT%H:%M:%S.%fZ").astype(object)
    return text.where(t.notna(), None)


def _record(row: dict[str, Any]) -> dict[str, Any]:
    """A stored fused row with times as ISO 8601 text."""
    return {k: (v.isoformat() if hasattr(v, "isoformat") else v) for k, v in row.items()}
