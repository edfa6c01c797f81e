"""Shared helpers and fixtures of the end-to-end command-line tests.

The tests drive ``magfuse`` through :class:`typer.testing.CliRunner` on the invented demo network
(``sample_events/``, see its README): slices of its one-year CSV are what arrives at the store.
One learned store per test module (:func:`learned_store`) keeps the suite fast; a test that
changes the store works on a copy (:func:`copy_store`).
"""

from __future__ import annotations

import hashlib
import re
import shutil
import subprocess
import sys
from dataclasses import dataclass
from datetime import datetime
from pathlib import Path

import pandas as pd
import pytest
from typer.testing import CliRunner, Result

import sample_events
from fusion.advisory import ADVISORY
from fusion.cli.app import app
from tests.datasets import DATA_DIR

#: The committed open-data folder (``tests/data``, licence and provenance beside each set).
SHARED_DATA = DATA_DIR

#: The advisory caution as the commands print it on stderr.
ADVISORY_LINE = ADVISORY + "\n"

#: A configuration for fast tests: the global independence test (docs/pairs.md §8) with 20 bootstrap
#: replicates instead of the shipped 200 keeps ``learn`` near one second on a quarter of the demo
#: year. Every other key keeps its shipped value.
FAST_CONFIG = "[pairs]\nglobal_test_replicates = 20\n"

#: Version ids printed by ``magfuse learn``
#: (fusion.versions.model_registry: TYPE-YYYYMMDDTHHMMSSZ-hash).
VERSION_RE = r"ML-\d{8}T\d{6}Z-[0-9a-f]{8}"

_runner = CliRunner()


def invoke(*args: object) -> Result:
    """Run ``magfuse ARGS...`` in process; stdout and stderr are kept apart."""
    return _runner.invoke(app, [str(a) for a in args])


def demo_frame() -> pd.DataFrame:
    """The demo year as text columns (values exactly as written in the CSV)."""
    return pd.read_csv(sample_events.demo_csv_path(), dtype=str, keep_default_na=False)


def origin_times(frame: pd.DataFrame) -> pd.Series:
    """Origin times of a :func:`demo_frame` as aware UTC timestamps."""
    return pd.to_datetime(frame["origin_time"], utc=True, format="ISO8601")


def demo_slice(
    path: Path,
    start: str | None = None,
    end: str | None = None,
    *,
    frame: pd.DataFrame | None = None,
) -> Path:
    """Write the demo rows with ``start <= origin_time < end`` (ISO 8601, UTC) to ``path``."""
    frame = demo_frame() if frame is None else frame
    t = origin_times(frame)
    keep = pd.Series(True, index=frame.index)
    if start is not None:
        keep &= t >= pd.Timestamp(start, tz="UTC")
    if end is not None:
        keep &= t < pd.Timestamp(end, tz="UTC")
    path.parent.mkdir(parents=True, exist_ok=True)
    frame[keep].to_csv(path, index=False)
    return path


def write_config(path: Path, text: str = FAST_CONFIG) -> Path:
    """Write a TOML configuration file (keys not given keep their defaults)."""
    path.write_text(text, encoding="utf-8")
    return path


def tree_digest(root: Path) -> dict[str, tuple[int, str]]:
    """Every file under ``root``: relative path -> (size in bytes, SHA-256 of the content)."""
    out: dict[str, tuple[int, str]] = {}
    for p in sorted(root.rglob("*")):
        if p.is_file():
            data = p.read_bytes()
            out[p.relative_to(root).as_posix()] = (len(data), hashlib.sha256(data).hexdigest())
    return out


def copy_store(src: Path, dst: Path) -> Path:
    """A private copy of a store folder (the store keeps relative paths only)."""
    shutil.copytree(src, dst)
    return dst


def version_of(learn_result: Result) -> str:
    """The candidate version id from the first line of ``magfuse learn``."""
    m = re.match(rf"candidate  ({VERSION_RE})  ", learn_result.stdout)
    assert m is not None, learn_result.stdout + learn_result.stderr
    return m[1]


@dataclass(frozen=True)
class LearnedStore:
    """A store built through the command line, and what each step printed.

    ``v1`` was learned with ``--as-of`` :attr:`as_of_v1` and adopted, ``v2`` on the whole slice
    and left as a candidate; ``fuse`` ran with ``v1``.
    """

    root: Path
    config: Path
    csv: Path
    as_of_v1: datetime
    v1: str
    v2: str
    ingest: Result
    learn_v1: Result
    learn_v2: Result
    adopt_v1: Result
    fuse_v1: Result


@pytest.fixture(scope="module")
def learned_store(tmp_path_factory: pytest.TempPathFactory) -> LearnedStore:
    """The first quarter of the demo year ingested, two models learned, the first adopted, fused.

    Built once per test module through the command line (1-2 s).
    """
    base = tmp_path_factory.mktemp("learned")
    csv = demo_slice(base / "demo_q1.csv", end="2025-04-01")
    config = write_config(base / "fast.toml")
    root = base / "store"
    ingest = invoke("ingest", csv, "--store", root)
    as_of = datetime.fromisoformat("2025-02-15T00:00:00+00:00")
    learn_v1 = invoke("learn", "--as-of", "2025-02-15", "--store", root, "--config", config)
    learn_v2 = invoke("learn", "--store", root, "--config", config)
    v1, v2 = version_of(learn_v1), version_of(learn_v2)
    adopt_v1 = invoke("adopt", v1, "--store", root, "--config", config)
    fuse_v1 = invoke("fuse", "--store", root, "--config", config)
    return LearnedStore(
        root, config, csv, as_of, v1, v2, ingest, learn_v1, learn_v2, adopt_v1, fuse_v1
    )


#: The repository root (a subprocess puts it first on its path).
REPO = Path(__file__).resolve().parents[2]


#: Holds the store's writer lock in another process as ``magfuse CMD`` would, says "held",
#: and keeps it until its stdin closes.
_HOLDER = """
import sys
sys.path.insert(0, {repo!r})
from pathlib import Path
from stations.store import StationMagnitudeStore
from stations.store.lock import set_holder_command

set_holder_command(sys.argv[2])
store = StationMagnitudeStore.open(Path(sys.argv[1]), create=False)
with store.write_lock():
    print("held", flush=True)
    sys.stdin.read()
"""


class LockHolder:
    """Another process holding a store's writer lock (context manager)."""

    def __init__(self, root: Path, command: str = "magfuse nightly") -> None:
        self.proc = subprocess.Popen(
            [sys.executable, "-c", _HOLDER.format(repo=str(REPO)), str(root), command],
            stdin=subprocess.PIPE,
            stdout=subprocess.PIPE,
            text=True,
        )

    def __enter__(self) -> int:
        assert self.proc.stdout is not None
        assert self.proc.stdout.readline() == "held\n"
        return self.proc.pid

    def __exit__(self, *exc: object) -> None:
        assert self.proc.stdin is not None
        self.proc.stdin.close()
        self.proc.wait(timeout=30)


def busy_line(root: Path, pid: int, command: str, wait: str) -> str:
    """The one line a writer prints when another process keeps the lock."""
    return (
        f"Error: {root} is busy: another magfuse process (pid {pid}, command {command}) holds "
        f"its writer lock; try again later (waited {wait} s; [store] lock_timeout_s sets the "
        "wait)"
    )
