"""The unattended nightly run (``magfuse nightly``): ingest, learn, dry run, adopt, fuse, freeze.

**Plan or apply.** Without ``apply`` the run writes nothing at all (no ingest, no file moves, no
model version, no fused or final magnitude, no log): it reads the inbox files and the store and
says what ``apply`` would do (:func:`plan_nightly`). With ``apply`` it holds the store's writer
lock for the whole run (``stations.store.lock``), so no other magfuse writer (``ingest``,
``learn``, ``adopt``, ``fuse``, ``finalize``, another nightly run) changes the store or the
active model in between; a second run waits up to ``[store] lock_timeout_s`` and then fails
with one line naming the holder.

Steps with ``apply``, each recorded in a :class:`NightlyReport`:

1. **Ingest the inbox.** Every regular file in the inbox (sorted by name) becomes one batch
   (:func:`stations.ingest.ingest_file`). A file is moved to ``<inbox>/processed/<day>/`` only
   after its batch is committed; a file no reader accepts goes to ``<inbox>/rejected/<day>/``
   with ``<name>.reason.txt`` beside it. Rows that fail validation go to the store's
   quarantine as at any ingest. A file that disappears meanwhile (moved by someone else) is
   skipped. A store that cannot be written (read-only or full disk) stops the run: the file
   stays in the inbox, untouched, for the next run.
2. **Learn a candidate** for each magnitude type that received data (and the configured
   default type), on the rolling window ending at the latest origin time
   (:func:`fusion.workflows.learning.learn_candidate`; unchanged input reuses the stored
   version it is identical to).
3. **Dry run** the candidate against the active model (:func:`fusion.workflows.dry_run.dry_run`).
4. **Adopt** only when the dry run stays within the ``[nightly]`` limits (largest
   weight-share change, largest bias change); the first model of a type is checked against
   the plain mean.
5. **Fuse (catch up).** Every event that is not final is fused with the active model when its
   station magnitudes are newer than its network magnitude (a stored reading's
   ``ingest_time`` is later than the fused row's ``fused_at``, or the event has no network
   magnitude yet), when its origin time is inside the revision horizon
   (``[nightly] revision_horizon_days`` before the latest origin time), or when it is about to
   be frozen and was fused with another model than the active one. The comparison is made per
   event against what is stored, so a run killed after its ingest, or part-way through, is
   caught up by the next one whatever happened before. ``fuse`` and ``nightly`` read and write
   under one lock hold, so a fused row is newer than every reading it used.
6. **Freeze.** Network magnitudes of events older than the revision horizon are then marked
   final (QuakeML ``final``; never changed afterwards), with two exceptions: nothing is
   frozen on the first night a type is fused (the operator sees the first values before any
   becomes final), and **nothing is frozen on a night that needs review**: when the type's
   candidate is outside the adoption policy, the pending decision could change every one of
   those magnitudes; when a file was rejected, its corrected version could hold readings of
   them. Freezing waits for a later run in which no decision is pending (the operator adopted
   or rejected the candidate, or a new candidate is within policy; the file was fixed and
   resubmitted, or dropped).

Outcome (:class:`NightlyOutcome`, the process exit status): ``success`` (0), ``failure`` (1:
something could not run, e.g. a store that cannot be written), ``needs_review`` (3: a rejected
file, or a candidate outside the adoption policy). A plan without ``apply`` ends in 3 when a
file would be rejected, else 0. A scheduler alerts on anything but 0.
"""

from __future__ import annotations

import shutil
from dataclasses import asdict, dataclass, field
from datetime import UTC, datetime, timedelta
from enum import IntEnum
from pathlib import Path
from typing import TYPE_CHECKING, Any

import numpy as np
import pandas as pd

from stations.errors import (
    ConfigError,
    InsufficientDataError,
    MagfuseError,
    StoreBusyError,
    StoreCorruptError,
    StoreWriteError,
)

if TYPE_CHECKING:
    from collections.abc import Callable

    from fusion.network.network_magnitude import FusedMagnitudes
    from fusion.settings import MagfuseConfig
    from fusion.versions.fused_store import FusedStore
    from fusion.versions.model_registry import ModelRegistry
    from stations.metadata import StationMetadata
    from stations.store import StationMagnitudeStore

__all__ = ["NightlyOutcome", "NightlyReport", "event_state", "plan_nightly", "run_nightly"]

PROCESSED_DIR = "processed"
REJECTED_DIR = "rejected"
LOG_DIR = "nightly"
#: Why a type's magnitudes were not frozen tonight (module docstring, step 6).
DEFERRED_CANDIDATE = (
    "nothing made final: the candidate waits for a decision ('magfuse adopt' or not)"
)
DEFERRED_FILES = "nothing made final: a rejected file waits for a decision (fix and resubmit it)"


class NightlyOutcome(IntEnum):
    """Exit status of ``magfuse nightly`` (see module docstring)."""

    success = 0
    failure = 1
    needs_review = 3


@dataclass
class TypeResult:
    """What the nightly run did for one magnitude type."""

    magnitude_type: str
    candidate: str | None = None
    identical_to: str | None = None
    active_before: str | None = None
    active_after: str | None = None
    adopted: bool = False
    within_policy: bool | None = None
    policy_reasons: list[str] = field(default_factory=list)
    changes: dict[str, Any] = field(default_factory=dict)
    finalized: int = 0
    fused: int = 0
    caught_up: int = 0
    skipped_final: int = 0
    freeze_deferred: str = ""
    note: str = ""

    def verdict(self) -> str:
        """One phrase: what became of the candidate."""
        if self.candidate is None:
            return self.note or "no candidate"
        if self.adopted:
            return "adopted"
        if self.within_policy and self.candidate == self.active_before:
            return "is the active model"
        return "within policy, not adopted" if self.within_policy else "outside policy"


@dataclass
class NightlyReport:
    """Everything one nightly run did (or, without ``apply``, would do).

    With ``apply`` it is serialised into ``<store>/nightly/<time>.json``.
    """

    started: str
    inbox: str
    apply: bool
    ingested: list[dict[str, Any]] = field(default_factory=list)
    rejected_files: list[dict[str, str]] = field(default_factory=list)
    skipped_files: list[str] = field(default_factory=list)
    types: list[TypeResult] = field(default_factory=list)
    plan: list[str] = field(default_factory=list)
    errors: list[str] = field(default_factory=list)
    outcome: NightlyOutcome = NightlyOutcome.success

    def to_dict(self) -> dict[str, Any]:
        """JSON-ready form."""
        out = asdict(self)
        out["outcome"] = self.outcome.name
        out["exit_status"] = int(self.outcome)
        return out

    def render_text(self) -> str:
        """Summary lines for the log of a scheduler."""
        if not self.apply:
            lines = [f"nightly run {self.started} (plan only: nothing written; --apply does it)"]
            lines += [f"  {p}" for p in self.plan]
            lines.append(f"outcome: {self.outcome.name} (exit {int(self.outcome)})")
            return "\n".join(lines)
        lines = [f"nightly run {self.started} (apply)"]
        for f in self.ingested:
            lines.append(
                f"  ingested {Path(f['file']).name}: {f['accepted']} accepted, "
                f"{f['duplicate']} duplicate, {f['quarantined']} quarantined"
            )
        for f in self.rejected_files:
            lines.append(f"  rejected {Path(f['file']).name}: {f['reason']}")
        lines += [f"  skipped {Path(s).name}: gone from the inbox" for s in self.skipped_files]
        for t in self.types:
            shown = t.candidate or "-"
            if t.identical_to:
                shown += " (identical to a stored version; nothing new stored)"
            lines.append(
                f"  {t.magnitude_type}: candidate {shown} {t.verdict()}; "
                f"active {t.active_after or '-'}; {t.fused} events fused, "
                f"{t.finalized} made final"
            )
            lines += [f"    {r}" for r in t.policy_reasons]
            if t.freeze_deferred:
                lines.append(f"    {t.freeze_deferred}")
        lines += [f"  error: {e}" for e in self.errors]
        lines.append(f"outcome: {self.outcome.name} (exit {int(self.outcome)})")
        return "\n".join(lines)

    def settle(self) -> None:
        """Set :attr:`outcome` from what was recorded (module docstring)."""
        if self.errors:
            self.outcome = NightlyOutcome.failure
        elif self.rejected_files or any(
            t.candidate is not None and not t.within_policy for t in self.types
        ):
            self.outcome = NightlyOutcome.needs_review
        else:
            self.outcome = NightlyOutcome.success


def _inbox_files(inbox: Path) -> list[Path]:
    if not inbox.is_dir():
        raise ConfigError(
            f"inbox {inbox} is not a folder; pass the right --inbox, or add --create to make it"
        )
    return sorted(p for p in inbox.iterdir() if p.is_file() and not p.name.startswith("."))


def _move(path: Path, folder: Path) -> Path:
    """Move an inbox file into ``folder`` (a free name); inbox problems name the inbox."""
    try:
        folder.mkdir(parents=True, exist_ok=True)
        target = folder / path.name
        n = 1
        while target.exists():
            target = folder / f"{path.stem}.{n}{path.suffix}"
            n += 1
        shutil.move(str(path), target)
    except FileNotFoundError:
        raise
    except OSError as exc:
        raise ConfigError(
            f"inbox {path.parent}: cannot move {path.name} to {folder} ({exc.strerror}); make "
            "the inbox writable (what was ingested is stored; the next run skips it as a "
            "duplicate)"
        ) from None
    return target


# -- event state: what is fused, and what is newer --------------------------------------------


def event_state(
    store: StationMagnitudeStore, fused_store: FusedStore, magnitude_type: str
) -> pd.DataFrame:
    """Per stored event: origin time, newest reading and its current network magnitude.

    Returns
    -------
    pandas.DataFrame
        One row per event of ``magnitude_type`` in the station store: ``event_id``,
        ``origin_time`` (the latest of its readings), ``first_origin`` (the earliest; readings
        of one event from different sources may differ), ``newest_ingest`` (latest
        ``ingest_time`` of its current readings, UTC), and from the fused store ``fused_at``,
        ``evaluation_status`` and ``model_version`` (missing when the event has no network
        magnitude), plus ``stale``:
        not final and either never fused or holding a reading ingested after ``fused_at``.
    """
    rows = store.scan(
        magnitude_type=magnitude_type, columns=["event_id", "origin_time", "ingest_time"]
    )
    per_event = (
        rows.groupby("event_id", sort=True, observed=True)
        .agg(
            origin_time=("origin_time", "max"),
            first_origin=("origin_time", "min"),
            newest_ingest=("ingest_time", "max"),
        )
        .reset_index()
    )
    cur = fused_store.current(magnitude_type)
    cols = ["event_id", "fused_at", "evaluation_status", "model_version"]
    fused = cur[cols] if len(cur) else pd.DataFrame({c: pd.Series(dtype=object) for c in cols})
    state = per_event.merge(fused, on="event_id", how="left")
    fused_at = pd.to_datetime(state["fused_at"], utc=True)
    final = state["evaluation_status"].eq("final").to_numpy()
    never = fused_at.isna().to_numpy()
    newer = (pd.to_datetime(state["newest_ingest"], utc=True) > fused_at).to_numpy()
    state["stale"] = ~final & (never | newer)
    return state


def _only_events(fused: FusedMagnitudes, event_ids: np.ndarray) -> FusedMagnitudes:
    """The part of a fuse result that belongs to ``event_ids``."""
    from fusion.network.network_magnitude import FusedMagnitudes

    ev = fused.events[fused.events["event_id"].astype(str).isin(event_ids)]
    co = fused.contributions[fused.contributions["event_id"].astype(str).isin(event_ids)]
    return FusedMagnitudes(ev.reset_index(drop=True), co.reset_index(drop=True))


def _fuse_and_freeze(
    store: StationMagnitudeStore,
    registry: ModelRegistry,
    fused_store: FusedStore,
    cfg: MagfuseConfig,
    tr: TypeResult,
    *,
    as_of: datetime,
    files_rejected: bool,
) -> None:
    """Steps 5 and 6 of the module docstring for one type with an active model."""
    from fusion.workflows.fusing import fuse_window

    mtype = tr.magnitude_type
    horizon = as_of - timedelta(days=cfg.nightly.revision_horizon_days)
    state = event_state(store, fused_store, mtype)
    first_run = bool(state["fused_at"].isna().all())
    if not first_run and not tr.within_policy:
        tr.freeze_deferred = DEFERRED_CANDIDATE
    elif not first_run and files_rejected:
        tr.freeze_deferred = DEFERRED_FILES
    freeze = not first_run and not tr.freeze_deferred
    origin = pd.to_datetime(state["origin_time"], utc=True)
    not_final = ~state["evaluation_status"].eq("final").to_numpy()
    recent = not_final & (origin >= horizon).to_numpy()
    todo = state["stale"].to_numpy() | recent
    if freeze:  # what becomes final tonight must carry the active model
        active = str(tr.active_after)
        other_model = state["model_version"].notna() & state["model_version"].ne(active)
        todo |= not_final & ~recent & other_model.to_numpy()
    tr.caught_up = int(np.count_nonzero(state["stale"].to_numpy() & ~recent))
    if todo.any():
        res = fuse_window(
            store,
            registry,
            cfg,
            magnitude_type=mtype,
            start=pd.to_datetime(state["first_origin"], utc=True)[todo].min().to_pydatetime(),
            end=as_of + timedelta(microseconds=1),
        )
        wanted = state["event_id"].to_numpy(dtype=str)[todo]
        run = fused_store.write_run(
            _only_events(res.fused, wanted), model_version=res.version.version_id
        )
        tr.fused, tr.skipped_final = run.events_written, run.skipped_final
    if freeze:
        tr.finalized = fused_store.finalize(mtype, before=horizon)


# -- one type ----------------------------------------------------------------------------------


def _night_for_type(
    store: StationMagnitudeStore,
    registry: ModelRegistry,
    fused_store: FusedStore,
    cfg: MagfuseConfig,
    tr: TypeResult,
    started: datetime,
    *,
    files_rejected: bool,
) -> None:
    """Steps 2-6 of the module docstring for one magnitude type."""
    from fusion.workflows.dry_run import dry_run
    from fusion.workflows.learning import _latest_origin, learn_candidate

    mtype = tr.magnitude_type
    try:
        as_of = _latest_origin(store, mtype)
    except InsufficientDataError as exc:
        tr.note = str(exc)
        return
    learned = learn_candidate(store, registry, cfg, magnitude_type=mtype, now=started)
    tr.candidate = learned.version.version_id
    tr.identical_to = learned.identical_to
    dr = dry_run(store, registry, cfg, magnitude_type=mtype, candidate=tr.candidate)
    tr.within_policy, tr.policy_reasons = dr.within_policy(
        max_weight_share_change=cfg.nightly.max_weight_share_change,
        max_bias_change=cfg.nightly.max_bias_change,
    )
    tr.changes = dr.changes
    if tr.within_policy and tr.candidate != tr.active_before:
        registry.adopt(tr.candidate)
        tr.adopted = True
    tr.active_after = registry.active_id(mtype)
    if tr.active_after is None:
        tr.note = "no active model yet; adopt one with 'magfuse adopt'"
        return
    _fuse_and_freeze(
        store, registry, fused_store, cfg, tr, as_of=as_of, files_rejected=files_rejected
    )


# -- the run -----------------------------------------------------------------------------------


def _ingest_inbox(
    store: StationMagnitudeStore,
    cfg: MagfuseConfig,
    report: NightlyReport,
    inbox: Path,
    *,
    day: str,
    compute: bool,
    metadata: StationMetadata | None,
) -> None:
    """Step 1 of the module docstring (the caller holds the store's writer lock)."""
    from stations.ingest import build_compute_options, ingest_file

    options = (
        build_compute_options(**cfg.compute.model_dump(exclude={"stations"})) if compute else None
    )
    for path in _inbox_files(inbox):
        try:
            outcome = ingest_file(
                store,
                path,
                magnitude_range=(cfg.ingest.magnitude_min, cfg.ingest.magnitude_max),
                compute=options,
                metadata=metadata,
            )
        except (StoreBusyError, StoreCorruptError, StoreWriteError):
            raise  # the store's problem: the file stays in the inbox as it is
        except (MagfuseError, OSError) as exc:
            if not path.exists():  # moved away meanwhile by someone else
                report.skipped_files.append(str(path))
                continue
            try:
                moved = _move(path, inbox / REJECTED_DIR / day)
            except FileNotFoundError:
                report.skipped_files.append(str(path))
                continue
            _write_reason(moved, exc)
            report.rejected_files.append({"file": str(moved), "reason": str(exc)})
            continue
        r = outcome.report
        try:
            _move(path, inbox / PROCESSED_DIR / day)
        except FileNotFoundError:
            report.skipped_files.append(str(path))
        report.ingested.append(
            {
                "file": str(path),
                "batch": r.batch_id,
                "accepted": r.accepted,
                "duplicate": r.duplicate,
                "revised": r.revised,
                "quarantined": r.quarantined,
                "same_content_as": r.same_content_as,
            }
        )


def _write_reason(moved: Path, exc: BaseException) -> None:
    reason = moved.with_name(moved.name + ".reason.txt")
    try:
        reason.write_text(f"{exc}\n", encoding="utf-8")
    except OSError as err:
        raise ConfigError(
            f"inbox {moved.parent}: cannot write {reason.name} ({err.strerror}); make the "
            "inbox writable"
        ) from None


def run_nightly(
    store: StationMagnitudeStore,
    registry: ModelRegistry,
    cfg: MagfuseConfig,
    *,
    inbox: Path,
    apply: bool = False,
    compute: bool = True,
    metadata: StationMetadata | None = None,
    now: datetime | None = None,
    on_wait: Callable[[str], None] | None = None,
) -> NightlyReport:
    """Run the nightly steps (module docstring) and return what happened.

    Without ``apply`` this is :func:`plan_nightly`: nothing is written. With ``apply`` the
    store's writer lock is held for the whole run; expected failures inside the run are
    recorded (outcome ``failure``) and the report is written to ``<store>/nightly/``.

    Raises
    ------
    ConfigError
        If the inbox is not a folder (nothing is done).
    StoreBusyError
        If another writer holds the store's lock longer than its timeout (nothing is done).
    StoreWriteError
        If not even the lock can be taken because the store cannot be written.
    """
    from fusion.versions.fused_store import FusedStore

    started = (now or datetime.now(UTC)).astimezone(UTC)
    if not apply:
        return plan_nightly(store, registry, cfg, inbox=inbox, started=started)
    _inbox_files(inbox)  # a missing inbox is an error before anything is locked or written
    report = NightlyReport(started=started.isoformat(), inbox=str(inbox), apply=True)
    with store.write_lock(on_wait):
        try:
            _ingest_inbox(
                store,
                cfg,
                report,
                inbox,
                day=started.strftime("%Y-%m-%d"),
                compute=compute,
                metadata=metadata,
            )
            types = {cfg.learn.magnitude_type} | {t.magnitude_type for t in store.summary().by_type}
            fused_store = FusedStore(store.root, lock=store.write_lock)
            for mtype in sorted(types):
                tr = TypeResult(mtype, active_before=registry.active_id(mtype))
                report.types.append(tr)
                _night_for_type(
                    store,
                    registry,
                    fused_store,
                    cfg,
                    tr,
                    started,
                    files_rejected=bool(report.rejected_files),
                )
        except MagfuseError as exc:
            report.errors.append(str(exc))
        except OSError as exc:  # a store write that failed (read-only or full disk)
            from stations.store.lock import store_write_error

            err = store_write_error(store.root, exc)
            if err is None:
                raise
            report.errors.append(str(err))
        report.settle()
        _write_log(store.root, report, started)
    return report


def _write_log(root: Path, report: NightlyReport, started: datetime) -> None:
    """Write the run's JSON log; a store that cannot take it is recorded as a failure."""
    from stations.store.lock import store_write_error
    from stations.strict_json import dumps

    folder = root / LOG_DIR
    path = folder / f"{started:%Y%m%dT%H%M%S%fZ}.json"
    try:
        folder.mkdir(parents=True, exist_ok=True)
        path.write_text(dumps(report.to_dict(), indent=2) + "\n", encoding="utf-8")
    except OSError as exc:
        err = store_write_error(root, exc)
        if err is None:
            raise
        report.errors.append(f"{err} (the run's log {path.name} was not written)")
        report.settle()


# -- the plan (no --apply) -----------------------------------------------------------------------


def plan_nightly(
    store: StationMagnitudeStore | None,
    registry: ModelRegistry | None,
    cfg: MagfuseConfig,
    *,
    inbox: Path,
    started: datetime,
) -> NightlyReport:
    """What ``apply`` would do, read-only: nothing is ingested, moved, learned, fused or logged.

    Parameters
    ----------
    store, registry
        The store and its model versions; None when the store does not exist yet (``--create``
        would make it).
    inbox : Path
        The inbox; when it does not exist the plan says ``--create`` would make it.
    """
    from stations.readers import read_records

    report = NightlyReport(started=started.isoformat(), inbox=str(inbox), apply=False)
    plan = report.plan
    if store is None:
        plan.append("would create the store (it does not exist yet)")
    files = _inbox_files(inbox) if inbox.is_dir() else []
    if not inbox.is_dir():
        plan.append(f"would create the inbox {inbox} (it does not exist yet)")
    types = {cfg.learn.magnitude_type}
    for path in files:
        try:
            res = read_records(
                path, magnitude_range=(cfg.ingest.magnitude_min, cfg.ingest.magnitude_max)
            )
        except (MagfuseError, OSError) as exc:
            report.rejected_files.append({"file": str(path), "reason": str(exc)})
            plan.append(f"would reject {path.name}: {exc}")
            continue
        types |= set(res.records["magnitude_type"].astype(str))
        plan.append(
            f"would ingest {path.name}: {len(res.records)} rows read, "
            f"{len(res.rejected)} to quarantine; then move it to {PROCESSED_DIR}/"
        )
    if store is not None:
        types |= {t.magnitude_type for t in store.summary().by_type}
    for mtype in sorted(types):
        plan += _plan_type(store, registry, cfg, mtype)
    if report.rejected_files:
        report.outcome = NightlyOutcome.needs_review
    return report


def _plan_type(
    store: StationMagnitudeStore | None,
    registry: ModelRegistry | None,
    cfg: MagfuseConfig,
    mtype: str,
) -> list[str]:
    """Plan lines of one magnitude type."""
    from fusion.versions.fused_store import FusedStore

    active = registry.active_id(mtype) if registry is not None else None
    lines = [
        f"{mtype}: would learn a candidate and adopt it only within the [nightly] limits; "
        f"active {active or '-'}"
    ]
    if store is None or not any(t.magnitude_type == mtype for t in store.summary().by_type):
        return lines
    state = event_state(store, FusedStore(store.root), mtype)
    stale = int(state["stale"].sum())
    lines.append(
        f"  {stale} stored events have station magnitudes newer than their network magnitude "
        "(or none yet) and would be fused, with the new files' events and those inside the "
        f"{cfg.nightly.revision_horizon_days:g}-day revision horizon"
    )
    lines.append(
        "  events older than the horizon would be made final, unless the candidate needs "
        "review (then nothing is made final)"
    )
    return lines
