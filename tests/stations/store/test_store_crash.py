"""Crash safety: an ingest killed with SIGKILL at any moment leaves all of its batch or none."""

from __future__ import annotations

import os
import signal
import subprocess
import sys
import time
from pathlib import Path

import numpy as np
import pytest

from stations.store import StationMagnitudeStore
from stations.store.layout import OWNED_DIRS
from tests.stations.store.store_frames import random_records

REPO = Path(__file__).resolve().parents[3]

# The child ingests one batch of events "<prefix>NNNNN" plus two rejected rows. With a stage
# name it kills itself with SIGKILL when the store reaches that step of the commit
# (stations.store.commit._checkpoint is the fault-injection hook).
_CHILD = """
import os, signal, sys
sys.path.insert(0, {repo!r})
from pathlib import Path
import numpy as np
import stations.store.commit as commit
from stations.store import StationMagnitudeStore
from tests.stations.store.store_frames import random_records, rejected

root, stage, prefix, n_events = sys.argv[1], sys.argv[2], sys.argv[3], int(sys.argv[4])
if stage != "none":
    def hook(step):
        if step == stage:
            os.kill(os.getpid(), signal.SIGKILL)
    commit._checkpoint = hook
frame = random_records(np.random.default_rng(len(prefix)), n_events, prefix=prefix,
                       start="2024-01-01", days=90)
bad = rejected(["line 1", "line 2"], ["unparseable", "unparseable"], source_file=prefix)
store = StationMagnitudeStore.open(Path(root))
print(len(frame), flush=True)
store.ingest(frame, bad, source_file=prefix)
print("done", flush=True)
"""


def _child(root: Path, stage: str, prefix: str, n_events: int) -> subprocess.Popen[str]:
    return subprocess.Popen(
        [
            sys.executable,
            "-c",
            _CHILD.format(repo=str(REPO)),
            str(root),
            stage,
            prefix,
            str(n_events),
        ],
        stdout=subprocess.PIPE,
        stderr=subprocess.PIPE,
        text=True,
    )


def _counts(root: Path) -> tuple[int, int, int]:
    store = StationMagnitudeStore.open(root, create=False)
    s = store.summary()
    assert len(store.scan(all_revisions=True)) == s.rows_all  # every listed file reads
    return s.rows_current, s.quarantined, s.batches


def _unlisted(root: Path) -> set[str]:
    store = StationMagnitudeStore.open(root, create=False)
    listed = {p.casefold() for p in store.manifest().referenced_paths()}
    on_disk = {
        p.relative_to(root).as_posix().casefold()
        for top in OWNED_DIRS
        for p in (root / top).rglob("*")
        if p.is_file()
    }
    return on_disk - listed


@pytest.mark.slow
def test_kill_at_each_commit_step(tmp_path: Path) -> None:
    root = tmp_path / "store"
    store = StationMagnitudeStore.open(root)
    base = random_records(np.random.default_rng(0), 200, prefix="base")
    store.ingest(base, None, source_file="base")
    rows, quarantined, batches = _counts(root)

    stages = ["data_written", "quarantine_written", "index_written", "committed"]
    for i, stage in enumerate(stages):
        proc = _child(root, stage, f"k{i}x", 300)
        out, err = proc.communicate(timeout=120)
        assert proc.returncode == -signal.SIGKILL, err
        n_new = int(out.split()[0])
        got = _counts(root)
        if stage == "committed":  # killed after the manifest rename: the batch is complete
            assert got == (rows + n_new, quarantined + 2, batches + 1)
            rows, quarantined, batches = got
        else:  # killed before it: the batch is absent, its files are leftovers
            assert got == (rows, quarantined, batches)
            assert _unlisted(root), "the killed writer should have left files behind"

    # The next writer removes the leftovers and the store stays consistent.
    extra = random_records(np.random.default_rng(9), 50, prefix="after")
    rep = StationMagnitudeStore.open(root).ingest(extra, None, source_file="after")
    assert rep.accepted == len(extra)
    assert _counts(root) == (rows + len(extra), quarantined, batches + 1)
    # Left on disk unlisted: at most index files retired by the previous commit (kept one
    # commit for readers on the older manifest); no data, quarantine or temporary file.
    left = _unlisted(root)
    assert all(p.startswith("index/") and p.endswith(".parquet") for p in left), left


@pytest.mark.slow
def test_kill_at_random_moments(tmp_path: Path) -> None:
    root = tmp_path / "store"
    StationMagnitudeStore.open(root)
    rng = np.random.default_rng(20240601)
    rows, quarantined, batches = _counts(root)
    outcomes = set()
    for i in range(4):
        proc = _child(root, "none", f"r{i}y", 40_000)  # ~180,000 rows, ~0.2 s to ingest
        assert proc.stdout is not None
        n_new = int(proc.stdout.readline())  # the frame is built; the ingest starts now
        time.sleep(rng.uniform(0.0, 0.3))
        os.kill(proc.pid, signal.SIGKILL)
        proc.communicate(timeout=60)
        got = _counts(root)
        if got == (rows, quarantined, batches):
            outcomes.add("absent")
        else:
            assert got == (rows + n_new, quarantined + 2, batches + 1)
            outcomes.add("complete")
        rows, quarantined, batches = got
    assert outcomes  # each kill left the store either without the batch or with all of it
