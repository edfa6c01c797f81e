"""One writer at a time: simultaneous ingests, waiting, timeouts, re-entrant lock."""

from __future__ import annotations

import json
import os
import subprocess
import sys
import threading
import time
from pathlib import Path

import numpy as np
import pytest

import stations.store.commit as commit_mod
import stations.store.lock as lock_mod
from stations.errors import StoreBusyError
from stations.store import StationMagnitudeStore
from tests.stations.store.lock_holder import held_by_another_thread
from tests.stations.store.store_frames import random_records, records

REPO = Path(__file__).resolve().parents[3]

# Builds its own rows plus the rows shared by both children, waits for the "go" file, ingests.
# The commit pauses 0.3 s after writing its data files (fault-injection hook), so the two
# ingests certainly overlap: one of them must wait for the other's lock.
_CHILD = """
import json, sys, time
sys.path.insert(0, {repo!r})
from pathlib import Path
import numpy as np, pandas as pd
import stations.store.commit as commit
from stations.store import StationMagnitudeStore
from tests.stations.store.store_frames import random_records

commit._checkpoint = lambda step: time.sleep(0.3) if step == "data_written" else None

root, prefix, go = Path(sys.argv[1]), sys.argv[2], Path(sys.argv[3])
own = random_records(np.random.default_rng(1), 3000, prefix=prefix)
shared = random_records(np.random.default_rng(2), 500, prefix="shared")
frame = pd.concat([own, shared], ignore_index=True)
store = StationMagnitudeStore.open(root, lock_timeout_s=60)
while not go.exists():
    time.sleep(0.005)
waits = []
rep = store.ingest(frame, None, source_file=prefix, on_wait=waits.append)
print(json.dumps({{**rep.to_dict(), "waited": len(waits)}}), flush=True)
"""


@pytest.mark.slow
def test_two_simultaneous_ingests_store_every_row_once(tmp_path: Path) -> None:
    root = tmp_path / "store"
    StationMagnitudeStore.open(root)
    go = tmp_path / "go"
    procs = [
        subprocess.Popen(
            [sys.executable, "-c", _CHILD.format(repo=str(REPO)), str(root), prefix, str(go)],
            stdout=subprocess.PIPE,
            stderr=subprocess.PIPE,
            text=True,
        )
        for prefix in ("alpha", "beta")
    ]
    time.sleep(0.5)
    go.touch()
    reports = []
    for p in procs:
        out, err = p.communicate(timeout=120)
        assert p.returncode == 0, err
        reports.append(json.loads(out.strip().splitlines()[-1]))

    own = len(random_records(np.random.default_rng(1), 3000, prefix="alpha"))
    shared = len(random_records(np.random.default_rng(2), 500, prefix="shared"))
    store = StationMagnitudeStore.open(root, create=False)
    rows = store.scan()
    assert len(rows) == 2 * own + shared
    assert not rows.duplicated(["event_id", "station_id", "channel", "magnitude_type"]).any()
    assert len(store.scan(all_revisions=True)) == 2 * own + shared
    # Whichever came second found the shared rows already stored.
    assert sorted(int(r["duplicate"]) for r in reports) == [0, shared]
    assert sum(int(r["accepted"]) for r in reports) == 2 * own + shared
    assert store.summary().batches == 2
    assert sorted(r["waited"] for r in reports) == [0, 1]


def test_second_writer_times_out_with_one_message(tmp_path: Path) -> None:
    holder = StationMagnitudeStore.open(tmp_path / "store")
    other = StationMagnitudeStore.open(tmp_path / "store", lock_timeout_s=0.3)
    frame = records(["e1"], ["XX.A."], [2.0])
    messages: list[str] = []
    with held_by_another_thread(holder):
        t0 = time.monotonic()
        with pytest.raises(StoreBusyError) as err:
            other.ingest(frame, None, source_file="x.csv", on_wait=messages.append)
        waited = time.monotonic() - t0
    root = tmp_path / "store"
    holder_name = f"another magfuse process (pid {os.getpid()}, command {lock_mod._command})"
    assert str(err.value) == (
        f"{root} is busy: {holder_name} holds its writer lock; try again later (waited 0.3 s; "
        "[store] lock_timeout_s sets the wait)"
    )
    assert messages == [
        f"{root}: waiting up to 0.3 s for {holder_name} to release the store's writer lock"
    ]
    assert 0.3 <= waited < 2.0
    assert other.summary().batches == 0  # nothing half-written
    assert other.ingest(frame, None, source_file="x.csv").accepted == 1


def test_waiting_writer_goes_in_when_the_lock_is_released(tmp_path: Path) -> None:
    holder = StationMagnitudeStore.open(tmp_path / "store")
    waiter = StationMagnitudeStore.open(tmp_path / "store", lock_timeout_s=10)
    taken = threading.Event()

    def hold() -> None:
        with holder.write_lock():
            taken.set()
            time.sleep(0.3)

    thread = threading.Thread(target=hold)
    thread.start()
    taken.wait()
    messages: list[str] = []
    rep = waiter.ingest(
        records(["e1"], ["XX.A."], [2.0]), None, source_file="x", on_wait=messages.append
    )
    thread.join()
    assert rep.accepted == 1 and len(messages) == 1


def test_one_thread_holding_the_lock_never_waits_for_itself(tmp_path: Path) -> None:
    """Two store objects of one folder in one process share the lock: the thread that holds it
    through one of them re-enters it through the other instead of timing out on itself."""
    first = StationMagnitudeStore.open(tmp_path / "store", lock_timeout_s=0.0)
    second = StationMagnitudeStore.open(tmp_path / "store", lock_timeout_s=0.0)
    with first.write_lock():
        rep = second.ingest(records(["e1"], ["XX.A."], [2.0]), None, source_file="x")
    assert rep.accepted == 1
    with held_by_another_thread(first), pytest.raises(StoreBusyError):
        second.ingest(records(["e2"], ["XX.A."], [2.0]), None, source_file="y")


def test_write_lock_is_reentrant_for_one_store(tmp_path: Path) -> None:
    store = StationMagnitudeStore.open(tmp_path / "store", lock_timeout_s=0.1)
    with store.write_lock(), store.write_lock():
        rep = store.ingest(records(["e1"], ["XX.A."], [2.0]), None, source_file="x")
    assert rep.accepted == 1
    with store.write_lock():  # released again after the nested use
        pass


def test_threads_sharing_one_store_object_queue(tmp_path: Path) -> None:
    """The lock is re-entrant per thread only: two threads of one object do not both enter."""
    store = StationMagnitudeStore.open(tmp_path / "store", lock_timeout_s=30)
    frames = [random_records(np.random.default_rng(i), 300, prefix=f"t{i}x") for i in range(4)]
    inside = []
    active = threading.Semaphore(1)

    def hook(step: str) -> None:
        if step == "data_written":
            inside.append(active.acquire(blocking=False))  # False: two writers inside at once
            time.sleep(0.05)
            active.release()

    original = commit_mod._checkpoint
    commit_mod._checkpoint = hook
    try:
        threads = [
            threading.Thread(target=store.ingest, args=(f, None), kwargs={"source_file": str(i)})
            for i, f in enumerate(frames)
        ]
        for t in threads:
            t.start()
        for t in threads:
            t.join()
    finally:
        commit_mod._checkpoint = original
    assert inside == [True] * 4
    assert len(store.scan()) == sum(len(f) for f in frames)
    assert store.summary().batches == 4
