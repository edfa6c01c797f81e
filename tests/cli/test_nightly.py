"""``magfuse nightly`` end to end: inbox sorting, exit codes, adoption policy, final magnitudes.

Data: slices of the invented demo network (``sample_events/``). The module fixture runs two
nights on one store: night 1 gets January-February and a garbage file without ``--apply``;
night 2 gets nothing new, with ``--apply``. Later tests continue on copies of that store.
Outside checks: row counts recomputed with pandas from the demo CSV; the reader's own message
for the garbage file; byte-identical moved files (SHA-256).
"""

from __future__ import annotations

import hashlib
import json
import os
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
    copy_store,
    demo_frame,
    demo_slice,
    invoke,
    origin_times,
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
    first = _night(root, inbox, "--config", loose)
    second = _night(root, inbox, "--apply", "--config", loose)
    return Nights(root, inbox, loose, tight, sha, rows, reason, first, second)


def test_first_night_sorts_the_inbox_and_asks_for_review(nights: Nights) -> None:
    n = nights.first
    res = n.result
    assert res.exit_code == 3, res.stdout + res.stderr
    assert res.stderr == ADVISORY_LINE
    lines = res.stdout.splitlines()
    assert lines[0] == f"nightly run {n.log['started']} (dry run only)"
    ingested = f"  ingested jan_feb.csv: {nights.csv_rows} accepted, 0 duplicate, 0 quarantined"
    assert lines[1] == ingested
    assert lines[2] == f"  rejected garbage.bin: {nights.garbage_reason}"
    m = re.fullmatch(
        rf"  ML: candidate ({VERSION_RE}) within policy, not adopted; active -; "
        r"0 events fused, 0 made final",
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
    assert (log["outcome"], log["exit_status"], log["apply"]) == ("needs_review", 3, False)
    assert [f["accepted"] for f in log["ingested"]] == [nights.csv_rows]
    assert log["rejected_files"] == [
        {"file": str(rejected / "garbage.bin"), "reason": nights.garbage_reason}
    ]
    (t,) = log["types"]
    assert (t["candidate"], t["adopted"], t["active_after"]) == (m[1], False, None)
    # Without --apply nothing is adopted: the next night found no active model.
    assert nights.second.log["types"][0]["active_before"] is None


def test_clean_second_night_adopts_within_policy_and_exits_0(nights: Nights) -> None:
    n = nights.second
    res = n.result
    assert res.exit_code == 0, res.stdout + res.stderr
    frame = demo_frame()
    n_events = frame.loc[origin_times(frame) < pd.Timestamp("2025-03-01", tz="UTC"), "event_id"]
    m = re.fullmatch(
        rf"  ML: candidate ({VERSION_RE}) adopted; active \1; "
        rf"{n_events.nunique()} events fused, 0 made final",
        res.stdout.splitlines()[1],
    )
    assert m is not None, res.stdout
    assert res.stdout.splitlines()[0] == f"nightly run {n.log['started']} (apply)"
    assert res.stdout.splitlines()[2:] == ["outcome: success (exit 0)"]
    assert n.inbox_files == nights.first.inbox_files  # nothing new arrived, nothing moved
    assert (n.log["outcome"], n.log["ingested"], n.log["rejected_files"]) == ("success", [], [])
    assert ModelRegistry(nights.root).active_id("ML") == m[1]
    cur = FusedStore(nights.root).current("ML")
    assert set(cur["model_version"]) == {m[1]}
    assert (cur["evaluation_status"] == "preliminary").all()  # first run of a type: none final


def test_busy_store_leaves_the_file_in_the_inbox(tmp_path: Path) -> None:
    root = tmp_path / "store"
    inbox = tmp_path / "inbox"
    csv = demo_slice(inbox / "jan.csv", end="2025-02-01")
    config = write_config(tmp_path / "busy.toml", f"[store]\nlock_timeout_s = 0.2\n{FAST_CONFIG}")
    holder = StationMagnitudeStore.open(root)
    with holder.write_lock():
        n = _night(root, inbox, "--apply", "--config", config)
    res = n.result
    assert res.exit_code == 1, res.stdout
    pid = os.getpid()
    busy = (
        f"{root}: another writer (pid {pid}) still holds the store lock after 0.2 s; "
        "run again when it has finished, or raise [store] lock_timeout_s"
    )
    assert res.stdout.splitlines()[1:] == [f"  error: {busy}", "outcome: failure (exit 1)"]
    # Not committed, so not moved: the file waits in the inbox for the next night.
    assert n.inbox_files == {"jan.csv"} and csv.is_file()
    assert holder.summary().batches == 0
    assert (n.log["outcome"], n.log["errors"]) == ("failure", [busy])


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
    res = invoke("nightly", "--inbox", inbox, "--apply", "--store", root, "--config", nights.tight)
    assert res.exit_code == 3, res.stdout + res.stderr
    lines = res.stdout.splitlines()
    verdict = next(line for line in lines if line.startswith("  ML: candidate"))
    assert re.fullmatch(
        rf"  ML: candidate {VERSION_RE} outside policy; active {adopted}; \d+ events fused, "
        r"\d+ made final",
        verdict,
    )
    reason = lines[lines.index(verdict) + 1]
    assert re.fullmatch(r"    bias of \S+ moves by [+-]\d\.\d{3} \(limit 1e-06\)", reason)
    assert lines[-1] == "outcome: needs_review (exit 3)"
    assert reg.active_id("ML") == adopted  # outside the policy: not adopted
    pd.testing.assert_frame_equal(fused.current("ML", event_ids=[final_id]), frozen)
