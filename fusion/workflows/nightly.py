"""The unattended nightly run (``magfuse nightly``): ingest, learn, dry run, adopt, re-fuse.

Steps, each recorded in a :class:`NightlyReport`:

1. **Ingest the inbox.** Every regular file in the inbox (sorted by name) becomes one batch
   (:func:`stations.ingest.ingest_file`). A file is moved to ``<inbox>/processed/<day>/`` only
   after its batch is committed; a file no reader accepts goes to ``<inbox>/rejected/<day>/``
   with ``<name>.reason.txt`` beside it. Rows that fail validation go to the store's
   quarantine as at any ingest.
2. **Learn a candidate** for each magnitude type that received data (and the configured
   default type), on the rolling window ending at the latest origin time
   (:func:`fusion.workflows.learning.learn_candidate`).
3. **Dry run** the candidate against the active model (:func:`fusion.workflows.dry_run.dry_run`).
4. **Adopt** only with ``apply`` and only when the dry run stays within the ``[nightly]``
   limits (largest weight-share change, largest bias change); the first model of a type is
   checked against the plain mean.
5. **Freeze and re-fuse.** Network magnitudes of events older than the revision horizon are
   marked final (QuakeML ``final``; never changed afterwards); events inside the horizon are
   fused again with the active model and recorded with its version, and so are events that
   arrived in this run with older origin times (late readings) and have no final magnitude
   yet. On the first run of a type every event is fused.

Outcome (:class:`NightlyOutcome`, the process exit status): ``success`` (0), ``failure`` (1:
something could not run, e.g. a busy or damaged store), ``needs_review`` (3: a rejected file,
a candidate outside the adoption policy, or a candidate that waits for adoption because
``apply`` was not given and it is outside policy). A scheduler alerts on anything but 0.
"""

from __future__ import annotations

import shutil
from dataclasses import asdict, dataclass, field
from datetime import UTC, datetime, timedelta
from enum import IntEnum
from pathlib import Path
from typing import TYPE_CHECKING, Any

from stations import strict_json
from stations.errors import (
    InsufficientDataError,
    MagfuseError,
    StoreBusyError,
    StoreCorruptError,
)

if TYPE_CHECKING:
    from fusion.settings import MagfuseConfig
    from fusion.versions.model_registry import ModelRegistry
    from stations.metadata import StationMetadata
    from stations.store import StationMagnitudeStore

__all__ = ["NightlyOutcome", "NightlyReport", "run_nightly"]

PROCESSED_DIR = "processed"
REJECTED_DIR = "rejected"
LOG_DIR = "nightly"


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
    active_before: str | None = None
    active_after: str | None = None
    adopted: bool = False
    within_policy: bool | None = None
    policy_reasons: list[str] = field(default_factory=list)
    changes: dict[str, Any] = field(default_factory=dict)
    finalized: int = 0
    fused: int = 0
    skipped_final: int = 0
    note: str = ""


@dataclass
class NightlyReport:
    """Everything one nightly run did; serialised into ``<store>/nightly/<time>.json``."""

    started: str
    inbox: str
    apply: bool
    ingested: list[dict[str, Any]] = field(default_factory=list)
    rejected_files: list[dict[str, str]] = field(default_factory=list)
    types: list[TypeResult] = field(default_factory=list)
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
        lines = [f"nightly run {self.started} ({'apply' if self.apply else 'dry run only'})"]
        for f in self.ingested:
            lines.append(
                f"  ingested {Path(f['file']).name}: {f['accepted']} accepted, "
                f"{f['duplicate']} duplicate, {f['quarantined']} quarantined"
            )
        for f in self.rejected_files:
            lines.append(f"  rejected {Path(f['file']).name}: {f['reason']}")
        for t in self.types:
            verdict = (
                "adopted"
                if t.adopted
                else ("within policy, not adopted" if t.within_policy else "outside policy")
            )
            if t.candidate is None:
                verdict = t.note or "no candidate"
            lines.append(
                f"  {t.magnitude_type}: candidate {t.candidate or '-'} {verdict}; "
                f"active {t.active_after or '-'}; {t.fused} events fused, "
                f"{t.finalized} made final"
            )
            lines += [f"    {r}" for r in t.policy_reasons]
        lines += [f"  error: {e}" for e in self.errors]
        lines.append(f"outcome: {self.outcome.name} (exit {int(self.outcome)})")
        return "\n".join(lines)


def _inbox_files(inbox: Path) -> list[Path]:
    if not inbox.is_dir():
        from stations.errors import ConfigError

        raise ConfigError(f"inbox {inbox} is not a folder; create it or pass --inbox DIR")
    return sorted(p for p in inbox.iterdir() if p.is_file() and not p.name.startswith("."))


def _move(path: Path, folder: Path) -> Path:
    folder.mkdir(parents=True, exist_ok=True)
    target = folder / path.name
    n = 1
    while target.exists():
        target = folder / f"{path.stem}.{n}{path.suffix}"
        n += 1
    shutil.move(str(path), target)
    return target


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
) -> NightlyReport:
    """Run the nightly steps (module docstring) and return what happened.

    Expected failures are caught and recorded (outcome ``failure``); the report is also
    written to ``<store>/nightly/`` for audit.
    """
    from fusion.versions.fused_store import FusedStore
    from fusion.workflows.dry_run import dry_run
    from fusion.workflows.fusing import fuse_window
    from fusion.workflows.learning import _latest_origin, learn_candidate
    from stations.ingest import build_compute_options, ingest_file

    started = (now or datetime.now(UTC)).astimezone(UTC)
    day = started.strftime("%Y-%m-%d")
    report = NightlyReport(started=started.isoformat(), inbox=str(inbox), apply=apply)
    types = {cfg.learn.magnitude_type}
    first_new: datetime | None = None  # earliest origin time among rows ingested now
    try:
        options = (
            build_compute_options(**cfg.compute.model_dump(exclude={"stations"}))
            if compute
            else None
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
            except (StoreBusyError, StoreCorruptError):
                raise
            except (MagfuseError, OSError) as exc:
                moved = _move(path, inbox / REJECTED_DIR / day)
                moved.with_name(moved.name + ".reason.txt").write_text(f"{exc}\n")
                report.rejected_files.append({"file": str(moved), "reason": str(exc)})
                continue
            r = outcome.report
            _move(path, inbox / PROCESSED_DIR / day)
            if outcome.first_origin is not None and r.accepted:
                first_new = min(first_new or outcome.first_origin, outcome.first_origin)
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
        if report.ingested:
            types |= {t.magnitude_type for t in store.summary().by_type}

        fused_store = FusedStore(store.root, lock=store.write_lock)
        for mtype in sorted(types):
            tr = TypeResult(mtype, active_before=registry.active_id(mtype))
            report.types.append(tr)
            try:
                as_of = _latest_origin(store, mtype)
            except InsufficientDataError as exc:
                tr.note = str(exc)
                continue
            learned = learn_candidate(store, registry, cfg, magnitude_type=mtype, now=started)
            tr.candidate = learned.version.version_id
            dr = dry_run(store, registry, cfg, magnitude_type=mtype, candidate=tr.candidate)
            tr.within_policy, tr.policy_reasons = dr.within_policy(
                max_weight_share_change=cfg.nightly.max_weight_share_change,
                max_bias_change=cfg.nightly.max_bias_change,
            )
            tr.changes = dr.changes
            if apply and tr.within_policy:
                registry.adopt(tr.candidate)
                tr.adopted = True
            tr.active_after = registry.active_id(mtype)
            if tr.active_after is None:
                tr.note = "no active model yet; adopt one with 'magfuse adopt'"
                continue
            horizon = as_of - timedelta(days=cfg.nightly.revision_horizon_days)
            first_run = fused_store.current(mtype).empty
            tr.finalized = 0 if first_run else fused_store.finalize(mtype, before=horizon)
            # Re-fuse the horizon, and fuse late or first-time arrivals older than it too
            # (final rows are skipped by write_run, so nothing final changes).
            start = None if first_run else min(horizon, first_new or horizon)
            res = fuse_window(
                store,
                registry,
                cfg,
                magnitude_type=mtype,
                start=start,
                end=as_of + timedelta(microseconds=1),
            )
            run = fused_store.write_run(res.fused, model_version=res.version.version_id)
            tr.fused, tr.skipped_final = run.events_written, run.skipped_final
    except MagfuseError as exc:
        report.errors.append(str(exc))

    if report.errors:
        report.outcome = NightlyOutcome.failure
    elif report.rejected_files or any(
        t.candidate is not None and not t.within_policy for t in report.types
    ):
        report.outcome = NightlyOutcome.needs_review
    _write_log(store.root, report, started)
    return report


def _write_log(root: Path, report: NightlyReport, started: datetime) -> None:
    folder = root / LOG_DIR
    folder.mkdir(parents=True, exist_ok=True)
    path = folder / f"{started:%Y%m%dT%H%M%S%fZ}.json"
    path.write_text(strict_json.dumps(report.to_dict(), indent=2) + "\n")
