"""``magfuse nightly`` end to end: plan vs apply, inbox sorting, exit codes, adoption policy,
catch-up of unfused events, final magnitudes, missing and busy stores.

Data: slices of the invented demo network (``sample_events/``). The module fixture first runs
the night without ``--apply`` (a plan: nothing may be written), then two nights on one store:
night 1 (``--apply --create``) gets January-February and a garbage file; night 2 gets nothing
new. Later tests continue on copies of that store. Outside checks: row and event counts
recomputed with pandas from the demo CSV; the reader's own message for the garbage file;
byte-identical files (SHA-256).
"""

from __future__ import annotations

import hashlib
import json
import re
from dataclasses import dataclass
from datetime import timedelta
from pathlib import Path

import pandas as pd
import pytest
from typer.testing import Result

from fusion.versions.fused_store import FusedStore
from fusion.versions.model_registry import ModelRegistry
from stations.readers import read_records
from stations.store import StationMagnitudeStore
from tests.cli.conftest import (
    ADVISORY_LINE,
    FAST_CONFIG,
    VERSION_RE,
    LockHolder,
    busy_line,
    copy_store,
    demo_frame,
    demo_slice,
    invoke,
    origin_times,
    tree_digest,
    write_config,
)

#: Adoption limits ([nightly] in config/magfuse.toml): loose ones every candidate meets, and a
#: bias limit of 1e-6 magnitude units that any refit on new data exceeds.
LOOSE = FAST_CONFIG + "[nightly]\nmax_bias_change = 10.0\nmax_weight_share_change = 1.0\n"
TIGHT = FAST_CONFIG + "[nightly]\nmax_bias_change = 1e-6\nmax_weight_share_change = 1.0\n"

#: pandas 4 turns these deprecations into errors: the command paths must not rely on them.
pytestmark = pytest.mark.filterwarnings("error::pandas.errors.Pandas4Warning")

GARBAGE = b"\x00\x01\x02 not a bulletin \xff\xfe\n"


def _sha(path: Path) -> str:
    return hashlib.sha256(path.read_bytes()).hexdigest()


@dataclass(frozen=True)
class Night:
    """One ``magfuse nightly`` run: its output, its log and the inbox afterwards."""

    result: Result
    log: dict
    day: str
    inbox_files: frozenset[str]


@dataclass(frozen=True)
class Nights:
    root: Path
    inbox: Path
    loose: Path
    tight: Path
    csv_sha: str
    csv_rows: int
    garbage_reason: str
    plan: Result
    inbox_before_plan: dict[str, tuple[int, str]]
    first: Night
    second: Night


def _night(root: Path, inbox: Path, *args: object) -> Night:
    logs = root / "nightly"
    before = set(logs.glob("*.json")) if logs.is_dir() else set()
    res = invoke("nightly", "--inbox", inbox, "--store", root, *args)
    (new,) = set(logs.glob("*.json")) - before
    log = json.loads(new.read_text(encoding="utf-8"))
    files = frozenset(p.relative_to(inbox).as_posix() for p in inbox.rglob("*") if p.is_file())
    return Night(res, log, log["started"][:10], files)


@pytest.fixture(scope="module")
def nights(tmp_path_factory: pytest.TempPathFactory) -> Nights:
    base = tmp_path_factory.mktemp("nightly")
    inbox = base / "inbox"
    csv = demo_slice(inbox / "jan_feb.csv", end="2025-03-01")
    (inbox / "garbage.bin").write_bytes(GARBAGE)
    try:
        read_records(inbox / "garbage.bin")
    except Exception as exc:  # the dispatcher's own UnknownFormatError message
        reason = str(exc)
    else:
        raise AssertionError("a reader accepted the garbage file")
    loose = write_config(base / "loose.toml", LOOSE)
    tight = write_config(base / "tight.toml", TIGHT)
    root = base / "store"
    sha, rows = _sha(csv), len(pd.read_csv(csv))
    before = tree_digest(inbox)
    plan = invoke("nightly", "--inbox", inbox, "--store", root, "--create", "--config", loose)
    first = _night(root, inbox, "--apply", "--create", "--config", loose)
    second = _night(root, inbox, "--apply", "--config", loose)
    return Nights(root, inbox, loose, tight, sha, rows, reason, plan, before, first, second)


def test_nightly_without_apply_writes_nothing(nights: Nights) -> None:
    res = nights.plan
    assert res.exit_code == 3, res.stdout + res.stderr  # a file would be rejected
    lines = res.stdout.splitlines()
    assert lines[0].endswith("(plan only: nothing written; --apply does it)")
    assert "  would create the store (it does not exist yet)" in lines
    assert (
        f"  would ingest jan_feb.csv: {nights.csv_rows} rows read, 0 to quarantine; then move "
        "it to processed/"
    ) in lines
    assert f"  would reject garbage.bin: {nights.garbage_reason}" in lines
    assert lines[-1] == "outcome: needs_review (exit 3)"
    # The first --apply night found the inbox exactly as it was before the plan (the fixture
    # runs them in that order), and the plan left no store behind.
    assert nights.first.log["ingested"][0]["file"] == str(nights.inbox / "jan_feb.csv")
    assert nights.first.log["types"][0]["active_before"] is None


def test_nightly_without_apply_on_a_store_changes_no_file(nights: Nights, tmp_path: Path) -> None:
    root = copy_store(nights.root, tmp_path / "store")
    inbox = tmp_path / "inbox"
    demo_slice(inbox / "mar.csv", "2025-03-01", "2025-04-01")
    store_before, inbox_before = tree_digest(root), tree_digest(inbox)
    res = invoke("nightly", "--inbox", inbox, "--store", root, "--config", nights.loose)
    assert res.exit_code == 0, res.stdout + res.stderr
    assert "  would ingest mar.csv:" in "\n".join(res.stdout.splitlines())
    # No ingest, no file move, no model version, no fused or final magnitude, no log.
    assert tree_digest(root) == store_before
    assert tree_digest(inbox) == inbox_before


def test_first_night_sorts_the_inbox_and_asks_for_review(nights: Nights) -> None:
    n = nights.first
    res = n.result
    assert res.exit_code == 3, res.stdout + res.stderr
    assert res.stderr == ADVISORY_LINE
    lines = res.stdout.splitlines()
    assert lines[0] == f"nightly run {n.log['started']} (apply)"
    ingested = f"  ingested jan_feb.csv: {nights.csv_rows} accepted, 0 duplicate, 0 quarantined"
    assert lines[1] == ingested
    assert lines[2] == f"  rejected garbage.bin: {nights.garbage_reason}"
    frame = demo_frame()
    n_events = frame.loc[origin_times(frame) < pd.Timestamp("2025-03-01", tz="UTC"), "event_id"]
    m = re.fullmatch(
        rf"  ML: candidate ({VERSION_RE}) adopted; active \1; "
        rf"{n_events.nunique()} events fused, 0 made final",
        lines[3],
    )
    assert m is not None, lines[3]
    assert lines[4:] == ["outcome: needs_review (exit 3)"]
    # The good file moved, unchanged, once its batch was committed; the garbage file was
    # rejected with its reason beside it.
    assert n.inbox_files == {
        f"processed/{n.day}/jan_feb.csv",
        f"rejected/{n.day}/garbage.bin",
        f"rejected/{n.day}/garbage.bin.reason.txt",
    }
    assert _sha(nights.inbox / "processed" / n.day / "jan_feb.csv") == nights.csv_sha
    rejected = nights.inbox / "rejected" / n.day
    assert (rejected / "garbage.bin").read_bytes() == GARBAGE
    assert (rejected / "garbage.bin.reason.txt").read_text() == nights.garbage_reason + "\n"
    # The log (JSON under <store>/nightly/) says the same.
    log = n.log
    assert (log["outcome"], log["exit_status"], log["apply"]) == ("needs_review", 3, True)
    assert [f["accepted"] for f in log["ingested"]] == [nights.csv_rows]
    assert log["rejected_files"] == [
        {"file": str(rejected / "garbage.bin"), "reason": nights.garbage_reason}
    ]
    (t,) = log["types"]
    assert (t["candidate"], t["adopted"], t["active_after"]) == (m[1], True, m[1])
    assert (t["fused"], t["finalized"]) == (n_events.nunique(), 0)  # first run: none final


def test_clean_second_night_exits_0_and_moves_nothing(nights: Nights) -> None:
    n = nights.second
    res = n.result
    assert res.exit_code == 0, res.stdout + res.stderr
    assert res.stdout.splitlines()[0] == f"nightly run {n.log['started']} (apply)"
    assert res.stdout.splitlines()[-1] == "outcome: success (exit 0)"
    assert n.inbox_files == nights.first.inbox_files  # nothing new arrived, nothing moved
    assert (n.log["outcome"], n.log["ingested"], n.log["rejected_files"]) == ("success", [], [])
    (t,) = n.log["types"]
    assert t["within_policy"] is True
    assert ModelRegistry(nights.root).active_id("ML") == t["active_after"]
    cur = FusedStore(nights.root).current("ML")
    assert set(cur["model_version"]) == {t["active_after"]}  # what is final carries it


def test_busy_store_fails_with_one_line_and_leaves_the_inbox(
    nights: Nights, tmp_path: Path
) -> None:
    root = copy_store(nights.root, tmp_path / "store")
    inbox = tmp_path / "inbox"
    demo_slice(inbox / "mar.csv", "2025-03-01", "2025-04-01")
    config = write_config(tmp_path / "busy.toml", f"[store]\nlock_timeout_s = 0.2\n{FAST_CONFIG}")
    before, inbox_before = _store_files(root), tree_digest(inbox)
    with LockHolder(root) as pid:
        res = invoke("nightly", "--inbox", inbox, "--apply", "--store", root, "--config", config)
    assert res.exit_code == 1, res.stdout
    assert res.stdout == ""
    assert res.stderr.splitlines()[-1] == busy_line(root, pid, "magfuse nightly", "0.2")
    # Nothing was done: the file waits in the inbox for the next night, no log was written.
    assert tree_digest(inbox) == inbox_before
    assert _store_files(root) == before


def _store_files(root: Path) -> dict[str, tuple[int, str]]:
    """The store's files except the lock file (its holder writes its name there)."""
    return {k: v for k, v in tree_digest(root).items() if k != ".lock"}


def _revision(path: Path, event_ids: list[str], frame: pd.DataFrame) -> dict[str, str]:
    """Write the demo rows of ``event_ids`` with the first detected magnitude of each raised
    by 0.5 (a revised reading, same key); return event id -> revised station."""
    rows = frame[frame["event_id"].isin(event_ids)].copy()
    det = rows[rows["detected"] == "true"].groupby("event_id").head(1)
    rows.loc[det.index, "magnitude"] = (det["magnitude"].astype(float) + 0.5).map("{:.3f}".format)
    path.parent.mkdir(parents=True, exist_ok=True)
    rows.to_csv(path, index=False)
    return dict(zip(det["event_id"], det["station"], strict=True))


def test_policy_decides_adoption_and_final_magnitudes_never_change(
    nights: Nights, tmp_path: Path
) -> None:
    root = copy_store(nights.root, tmp_path / "store")
    inbox = tmp_path / "inbox"
    inbox.mkdir()
    fused = FusedStore(root)
    reg = ModelRegistry(root)
    frame = demo_frame()
    t = origin_times(frame)
    cur = fused.current("ML")
    # Two busy events inside the revision horizon (7 days before the latest origin time):
    # one marked final by hand, one left preliminary.
    last = t[t < pd.Timestamp("2025-03-01", tz="UTC")].max()
    recent = cur[(cur["origin_time"] >= last - timedelta(days=7)) & (cur["n_stations"] >= 4)]
    final_id, open_id = (str(e) for e in recent["event_id"].iloc[:2])
    res = invoke("finalize", final_id, "--store", root)
    assert (res.exit_code, res.stdout) == (0, "ML: 1 network magnitude marked final\n")
    frozen = fused.current("ML", event_ids=[final_id])
    assert frozen["evaluation_status"].tolist() == ["final"]
    history = len(fused.history(final_id))
    before_open = fused.current("ML", event_ids=[open_id])

    # Night 3: late revisions of both events, loose policy, --apply: adopted and re-fused.
    _revision(inbox / "revised.csv", [final_id, open_id], frame)
    res = invoke("nightly", "--inbox", inbox, "--apply", "--store", root, "--config", nights.loose)
    assert res.exit_code == 0, res.stdout + res.stderr
    assert re.search(r"ingested revised\.csv: 2 accepted, \d+ duplicate, 0 quarantined", res.stdout)
    adopted = reg.active_id("ML")
    assert f"candidate {adopted} adopted; active {adopted};" in res.stdout
    pd.testing.assert_frame_equal(fused.current("ML", event_ids=[final_id]), frozen)
    assert len(fused.history(final_id)) == history  # not even a skipped copy was written
    moved = fused.current("ML", event_ids=[open_id])
    assert moved["model_version"].tolist() == [adopted]
    assert moved["run_id"].tolist() != before_open["run_id"].tolist()
    assert moved["plain_mean"].iloc[0] != pytest.approx(before_open["plain_mean"].iloc[0])

    # Night 4: March arrives; a bias limit of 1e-6 puts the candidate outside the policy.
    demo_slice(inbox / "mar.csv", "2025-03-01", "2025-04-01", frame=frame)
    finals_before = set(_final_ids(fused))
    res = invoke("nightly", "--inbox", inbox, "--apply", "--store", root, "--config", nights.tight)
    assert res.exit_code == 3, res.stdout + res.stderr
    lines = res.stdout.splitlines()
    verdict = next(line for line in lines if line.startswith("  ML: candidate"))
    m = re.fullmatch(
        rf"  ML: candidate ({VERSION_RE}) outside policy; active {adopted}; \d+ events fused, "
        r"0 made final",
        verdict,
    )
    assert m is not None, verdict
    reason = lines[lines.index(verdict) + 1]
    assert re.fullmatch(r"    bias of \S+ moves by [+-]\d\.\d{3} \(limit 1e-06\)", reason)
    assert "    nothing made final: the candidate waits for a decision" in "\n".join(lines)
    assert lines[-1] == "outcome: needs_review (exit 3)"
    assert reg.active_id("ML") == adopted  # outside the policy: not adopted
    pd.testing.assert_frame_equal(fused.current("ML", event_ids=[final_id]), frozen)
    # The night that needs review froze nothing: once the operator adopts the reviewed
    # candidate, 'magfuse fuse' re-fuses every event that was not final before that night.
    assert set(_final_ids(fused)) == finals_before
    assert invoke("adopt", m[1], "--store", root).exit_code == 0
    res = invoke("fuse", "--store", root, "--config", nights.tight)
    assert res.exit_code == 0, res.stdout + res.stderr
    cur = fused.current("ML")
    open_rows = cur[~cur["event_id"].isin(finals_before)]
    assert len(open_rows) > 0 and set(open_rows["model_version"]) == {m[1]}


def _final_ids(fused: FusedStore) -> list[str]:
    cur = fused.current("ML")
    return cur.loc[cur["evaluation_status"] == "final", "event_id"].astype(str).tolist()


def test_run_killed_after_ingest_is_caught_up_by_the_next(nights: Nights, tmp_path: Path) -> None:
    """A run that committed its ingest and died before fusing (here: the ingest alone, through
    the library) leaves events without network magnitudes; the next run fuses every one."""
    from stations.ingest import ingest_file

    root = copy_store(nights.root, tmp_path / "store")
    inbox = tmp_path / "inbox"
    inbox.mkdir()
    frame = demo_frame()
    mar = demo_slice(tmp_path / "mar.csv", "2025-03-01", "2025-04-01", frame=frame)
    ingest_file(StationMagnitudeStore.open(root), mar)  # the killed night got this far
    apr_ids = set(
        pd.read_csv(demo_slice(inbox / "apr.csv", "2025-04-01", "2025-04-08", frame=frame))[
            "event_id"
        ].astype(str)
    )
    res = invoke("nightly", "--inbox", inbox, "--apply", "--store", root, "--config", nights.loose)
    assert res.exit_code == 0, res.stdout + res.stderr
    # Every stored event now has a network magnitude (event ids counted with pandas).
    t = origin_times(frame)
    stored = frame.loc[t < pd.Timestamp("2025-04-08", tz="UTC"), "event_id"].nunique()
    cur = FusedStore(root).current("ML")
    assert len(cur) == stored
    assert set(pd.read_csv(mar)["event_id"].astype(str)) <= set(cur["event_id"].astype(str))
    assert apr_ids <= set(cur["event_id"].astype(str))


def test_revised_reading_of_an_old_event_is_fused_again(nights: Nights, tmp_path: Path) -> None:
    """Catch-up is per event: a reading revised after its event was fused, far outside the
    revision horizon, is fused again by the next run (unless the event is final)."""
    from stations.ingest import ingest_file

    root = copy_store(nights.root, tmp_path / "store")
    inbox = tmp_path / "inbox"
    inbox.mkdir()
    fused = FusedStore(root)
    cur = fused.current("ML")
    old = cur[(cur["evaluation_status"] != "final") & (cur["n_stations"] >= 4)]
    old_id = str(old.sort_values("origin_time")["event_id"].iloc[0])
    before = fused.current("ML", event_ids=[old_id])
    _revision(tmp_path / "rev.csv", [old_id], demo_frame())
    ingest_file(StationMagnitudeStore.open(root), tmp_path / "rev.csv")
    # A candidate outside the policy (TIGHT) keeps the active model and freezes nothing, and a
    # zero-day horizon re-fuses nothing for being recent: only the newer reading can bring the
    # event back.
    config = write_config(
        tmp_path / "c.toml",
        TIGHT.replace("[nightly]\n", "[nightly]\nrevision_horizon_days = 0.0\n"),
    )
    res = invoke("nightly", "--inbox", inbox, "--apply", "--store", root, "--config", config)
    assert res.exit_code == 3, res.stdout + res.stderr
    after = fused.current("ML", event_ids=[old_id])
    assert after["run_id"].iloc[0] != before["run_id"].iloc[0]
    assert after["fused_at"].iloc[0] > before["fused_at"].iloc[0]
    # The plain mean of the detected station magnitudes, recomputed with pandas from the file.
    rev = pd.read_csv(tmp_path / "rev.csv")
    det = rev[(rev["event_id"].astype(str) == old_id) & rev["detected"]]
    assert after["plain_mean"].iloc[0] == pytest.approx(det["magnitude"].mean(), abs=1e-9)


def test_run_killed_while_fusing_is_caught_up_by_the_next(
    nights: Nights, tmp_path: Path, monkeypatch: pytest.MonkeyPatch
) -> None:
    """The fused commit dies (as under ``kill -9``: nothing committed) after the ingest and the
    model were committed; the next run, with nothing new in the inbox, fuses those events."""
    root = copy_store(nights.root, tmp_path / "store")
    inbox = tmp_path / "inbox"
    frame = demo_frame()
    mar_ids = set(
        pd.read_csv(demo_slice(inbox / "mar.csv", "2025-03-01", "2025-03-15", frame=frame))[
            "event_id"
        ].astype(str)
    )

    def killed(self: FusedStore, manifest: object) -> None:
        raise KeyboardInterrupt("killed while fusing")

    monkeypatch.setattr(FusedStore, "_commit", killed)
    res = invoke("nightly", "--inbox", inbox, "--apply", "--store", root, "--config", nights.loose)
    monkeypatch.undo()
    assert res.exit_code != 0
    assert not mar_ids & set(FusedStore(root).current("ML")["event_id"].astype(str))
    res = invoke("nightly", "--inbox", inbox, "--apply", "--store", root, "--config", nights.loose)
    assert res.exit_code == 0, res.stdout + res.stderr
    assert "ingested" not in res.stdout  # nothing new arrived
    assert mar_ids <= set(FusedStore(root).current("ML")["event_id"].astype(str))


def test_inbox_file_that_vanishes_is_skipped(
    nights: Nights, tmp_path: Path, monkeypatch: pytest.MonkeyPatch
) -> None:
    """Another process moves a file away between the listing and the ingest: skipped, said so,
    no traceback, and the other files go in."""
    import stations.ingest

    root = copy_store(nights.root, tmp_path / "store")
    inbox = tmp_path / "inbox"
    demo_slice(inbox / "a.csv", "2025-03-01", "2025-03-08")
    demo_slice(inbox / "b.csv", "2025-03-08", "2025-03-15")
    real = stations.ingest.ingest_file

    def moved_away_first(store: StationMagnitudeStore, path: Path, **kw: object) -> object:
        if path.name == "a.csv":
            path.rename(tmp_path / "a.csv")  # a concurrent mover got there first
        return real(store, path, **kw)  # type: ignore[arg-type]

    monkeypatch.setattr(stations.ingest, "ingest_file", moved_away_first)
    res = invoke("nightly", "--inbox", inbox, "--apply", "--store", root, "--config", nights.loose)
    assert res.exit_code == 0, res.stdout + res.stderr
    assert "  skipped a.csv: gone from the inbox" in res.stdout.splitlines()
    assert re.search(r"  ingested b\.csv: \d+ accepted", res.stdout)
    assert not (inbox / "rejected").exists()


def test_night_with_a_rejected_file_freezes_nothing(nights: Nights, tmp_path: Path) -> None:
    """A rejected file waits for the operator: its fixed version may hold readings of events
    that would otherwise become final tonight. The next clean night freezes them."""
    root = copy_store(nights.root, tmp_path / "store")
    inbox = tmp_path / "inbox"
    demo_slice(inbox / "mar.csv", "2025-03-01", "2025-04-01")
    (inbox / "garbage.bin").write_bytes(GARBAGE)
    fused = FusedStore(root)
    finals = set(_final_ids(fused))
    res = invoke("nightly", "--inbox", inbox, "--apply", "--store", root, "--config", nights.loose)
    assert res.exit_code == 3, res.stdout + res.stderr
    assert re.search(r"  ML: candidate .*; \d+ events fused, 0 made final", res.stdout)
    assert (
        "    nothing made final: a rejected file waits for a decision (fix and resubmit it)"
        in res.stdout.splitlines()
    )
    assert set(_final_ids(fused)) == finals
    res = invoke("nightly", "--inbox", inbox, "--apply", "--store", root, "--config", nights.loose)
    assert res.exit_code == 0, res.stdout + res.stderr
    assert len(set(_final_ids(fused))) > len(finals)
