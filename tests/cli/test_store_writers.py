"""Every command that changes the store: one writer at a time, store-side failures in one line,
no store made by accident, no leftovers of a killed ``learn``, no duplicate model versions.

Data: the first quarter of the invented demo network (``learned_store`` in ``conftest.py``);
each test works on a copy. A second process that holds the writer lock is a real subprocess
(:class:`tests.cli.conftest.LockHolder`). A read-only or full disk is simulated by making
``os.open`` / ``os.replace`` raise ``OSError(EROFS / ENOSPC)``: the tests run as root, and root
ignores permission bits.
"""

from __future__ import annotations

import errno
import os
import subprocess
import sys
from pathlib import Path

import pytest
from typer.testing import Result

from fusion.versions.model_registry import ModelRegistry
from stations.store import StationMagnitudeStore
from tests.cli.conftest import (
    FAST_CONFIG,
    REPO,
    LearnedStore,
    LockHolder,
    busy_line,
    copy_store,
    demo_slice,
    invoke,
    tree_digest,
    write_config,
)


def _store_files(root: Path) -> dict[str, tuple[int, str]]:
    """The store's files except the lock file (its holder writes its name there)."""
    return {k: v for k, v in tree_digest(root).items() if k != ".lock"}


def _one_error_line(res: Result) -> str:
    """The command failed with exit 1 and one ``Error:`` line, no traceback."""
    assert res.exit_code == 1, res.stdout + res.stderr
    assert res.exception is None or isinstance(res.exception, SystemExit), res.exception
    errors = [line for line in res.stderr.splitlines() if line.startswith("Error: ")]
    assert len(errors) == 1, res.stderr
    assert "Traceback" not in res.stderr + res.stdout
    return errors[0]


# -- a store that does not exist ------------------------------------------------------------------


@pytest.mark.parametrize(
    "args",
    [
        ["store"],
        ["fuse"],
        ["learn"],
        ["models"],
        ["adopt", "ML-20250101T000000Z-0123abcd"],
        ["rollback"],
        ["finalize", "--before", "2025-01-01"],
        ["nightly", "--inbox", "."],
        ["nightly", "--inbox", ".", "--apply"],
    ],
    ids=lambda a: " ".join(a),
)
def test_missing_store_is_an_error_that_names_the_fix(args: list[str], tmp_path: Path) -> None:
    root = tmp_path / "nowhere"
    res = invoke(*args, "--store", root)
    line = _one_error_line(res)
    assert line.startswith(f"Error: {root}: no magfuse store here (manifest.json is missing); ")
    assert f"create one with 'magfuse ingest FILE --store {root}'" in line
    assert not root.exists()  # nothing was created


def test_nightly_in_an_empty_folder_creates_nothing_without_create(tmp_path: Path) -> None:
    inbox = tmp_path / "empty"
    inbox.mkdir()
    root = tmp_path / "store"
    line = _one_error_line(invoke("nightly", "--inbox", inbox, "--apply", "--store", root))
    assert line.endswith("or add --create to let nightly make it")
    assert not root.exists()
    # Asked for, the store and the inbox are made.
    made = tmp_path / "new-inbox"
    res = invoke("nightly", "--inbox", made, "--apply", "--create", "--store", root)
    assert res.exit_code == 0, res.stdout + res.stderr
    assert made.is_dir() and (root / "manifest.json").is_file()
    assert len(list((root / "nightly").glob("*.json"))) == 1


def test_nightly_with_a_missing_inbox_is_an_error(
    learned_store: LearnedStore, tmp_path: Path
) -> None:
    root = copy_store(learned_store.root, tmp_path / "store")
    before = _store_files(root)
    for extra in ([], ["--apply"]):
        res = invoke("nightly", "--inbox", tmp_path / "no-inbox", "--store", root, *extra)
        line = _one_error_line(res)
        assert line == (
            f"Error: inbox {tmp_path / 'no-inbox'} is not a folder; pass the right --inbox, or "
            "add --create to make it"
        )
    assert _store_files(root) == before and not (tmp_path / "no-inbox").exists()


# -- one writer at a time -------------------------------------------------------------------------


def test_every_writer_waits_for_the_lock_then_fails_with_one_line(
    learned_store: LearnedStore, tmp_path: Path
) -> None:
    root = copy_store(learned_store.root, tmp_path / "store")
    config = write_config(tmp_path / "busy.toml", f"[store]\nlock_timeout_s = 0.2\n{FAST_CONFIG}")
    inbox = tmp_path / "inbox"
    extra = demo_slice(inbox / "apr.csv", "2025-04-01", "2025-04-08")
    commands = [
        ["ingest", extra],
        ["compute"],
        ["learn"],
        ["adopt", learned_store.v2],
        ["rollback"],
        ["fuse"],
        ["finalize", "--before", "2025-02-01"],
        ["nightly", "--inbox", inbox, "--apply"],
    ]
    before, inbox_before = _store_files(root), tree_digest(inbox)
    with LockHolder(root, "magfuse fuse") as pid:
        for args in commands:
            res = invoke(*args, "--store", root, "--config", config)
            assert _one_error_line(res) == busy_line(root, pid, "magfuse fuse", "0.2"), args
    assert _store_files(root) == before
    assert tree_digest(inbox) == inbox_before


def test_nightly_holds_one_lock_for_every_step(learned_store: LearnedStore, tmp_path: Path) -> None:
    """Nested writers (ingest, model save, adopt, fuse, finalize, log) re-enter the lock the
    run holds: with no wait allowed at all, a second lock anywhere would fail the run."""
    root = copy_store(learned_store.root, tmp_path / "store")
    inbox = tmp_path / "inbox"
    demo_slice(inbox / "apr.csv", "2025-04-01", "2025-04-08")
    config = write_config(
        tmp_path / "c.toml",
        f"[store]\nlock_timeout_s = 0.0\n{FAST_CONFIG}[nightly]\nmax_bias_change = 10.0\n"
        "max_weight_share_change = 1.0\n",
    )
    res = invoke("nightly", "--inbox", inbox, "--apply", "--store", root, "--config", config)
    assert res.exit_code == 0, res.stdout + res.stderr
    assert "ingested apr.csv" in res.stdout


def test_two_nightly_runs_at_once_ingest_each_file_once(tmp_path: Path) -> None:
    inbox = tmp_path / "inbox"
    demo_slice(inbox / "a_jan.csv", end="2025-01-16")
    demo_slice(inbox / "b_jan.csv", "2025-01-16", "2025-02-01")
    root = tmp_path / "store"
    config = write_config(tmp_path / "c.toml", f"[store]\nlock_timeout_s = 300\n{FAST_CONFIG}")
    StationMagnitudeStore.open(root)  # an empty store; both runs start on it
    env = {**os.environ, "PYTHONPATH": str(REPO)}
    cmd = [
        sys.executable,
        "-c",
        "from fusion.cli.app import main; main()",
        "nightly",
        "--inbox",
        str(inbox),
        "--apply",
        "--store",
        str(root),
        "--config",
        str(config),
    ]
    procs = [
        subprocess.Popen(cmd, stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True, env=env)
        for _ in range(2)
    ]
    outs = [p.communicate(timeout=600) for p in procs]
    for p, (out, err) in zip(procs, outs, strict=True):
        assert "Traceback" not in out + err, err
        assert p.returncode in (0, 3), out + err
    joined = "".join(out for out, _ in outs)
    assert joined.count("ingested a_jan.csv") == 1 and joined.count("ingested b_jan.csv") == 1
    assert StationMagnitudeStore.open(root).summary().batches == 2
    processed = sorted(p.name for p in (inbox / "processed").rglob("*.csv"))
    assert processed == ["a_jan.csv", "b_jan.csv"]


# -- a store that cannot be written ---------------------------------------------------------------


def _read_only_lock(monkeypatch: pytest.MonkeyPatch) -> None:
    """Opening a lock file for writing fails as on a read-only file system."""
    real_open = os.open

    def fake_open(path: object, flags: int, *args: object, **kwargs: object) -> int:
        if str(path).endswith(".lock") and flags & (os.O_RDWR | os.O_WRONLY):
            raise OSError(errno.EROFS, os.strerror(errno.EROFS), str(path))
        return real_open(path, flags, *args, **kwargs)  # type: ignore[arg-type]

    monkeypatch.setattr(os, "open", fake_open)


def test_read_only_store_fails_every_writer_with_one_line(
    learned_store: LearnedStore, tmp_path: Path, monkeypatch: pytest.MonkeyPatch
) -> None:
    root = copy_store(learned_store.root, tmp_path / "store")
    inbox = tmp_path / "inbox"
    extra = demo_slice(inbox / "apr.csv", "2025-04-01", "2025-04-08")
    config = learned_store.config
    before, inbox_before = _store_files(root), tree_digest(inbox)
    _read_only_lock(monkeypatch)
    for args in (
        ["ingest", extra],
        ["learn", "--half-life", "45"],  # a new input: it fits, then cannot save
        ["adopt", learned_store.v2],
        ["rollback"],
        ["fuse"],
        ["finalize", "--before", "2025-02-01"],
        ["compute"],
        ["nightly", "--inbox", inbox, "--apply"],
    ):
        line = _one_error_line(invoke(*args, "--store", root, "--config", config))
        assert line.startswith(f"Error: {root}: cannot write the store: Read-only file system"), (
            args,
            line,
        )
        assert str(extra) not in line  # the store is to blame, not the input file
    # Readers take no lock: a read-only store can still be looked at.
    for args in (["store"], ["models"], ["nightly", "--inbox", inbox]):
        res = invoke(*args, "--store", root, "--config", config)
        assert res.exit_code == 0, (args, res.stdout + res.stderr)
    monkeypatch.undo()
    assert _store_files(root) == before
    assert tree_digest(inbox) == inbox_before  # nothing moved to rejected/


def test_full_disk_during_nightly_leaves_the_inbox_file_where_it_is(
    learned_store: LearnedStore, tmp_path: Path, monkeypatch: pytest.MonkeyPatch
) -> None:
    root = copy_store(learned_store.root, tmp_path / "store")
    inbox = tmp_path / "inbox"
    demo_slice(inbox / "apr.csv", "2025-04-01", "2025-04-08")
    inbox_before = tree_digest(inbox)

    def full(src: object, dst: object) -> None:
        raise OSError(errno.ENOSPC, os.strerror(errno.ENOSPC), str(src))

    monkeypatch.setattr(os, "replace", full)
    res = invoke("nightly", "--inbox", inbox, "--apply", "--store", root)
    monkeypatch.undo()
    assert res.exit_code == 1, res.stdout + res.stderr
    assert "Traceback" not in res.stdout + res.stderr and res.exception is not None
    errors = [line for line in res.stdout.splitlines() if line.startswith("  error: ")]
    assert len(errors) == 1 and errors[0].startswith(
        f"  error: {root}: cannot write the store: No space left on device"
    )
    assert tree_digest(inbox) == inbox_before  # not moved, not rejected
    assert StationMagnitudeStore.open(root).summary().batches == 1  # the fixture's one batch


# -- learn: leftovers of a killed run, identical versions -----------------------------------------

#: Runs ``magfuse learn`` and dies by SIGKILL at the rename that would publish the version.
_KILLED_LEARN = """
import os, signal, sys
sys.path.insert(0, {repo!r})
real_rename = os.rename
def rename(src, dst, *a, **k):
    if os.path.basename(str(src)).startswith(".") and "versions" in str(src):
        os.kill(os.getpid(), signal.SIGKILL)
    return real_rename(src, dst, *a, **k)
os.rename = rename
from fusion.cli.app import main
sys.argv = ["magfuse", "learn", "--half-life", "45", "--store", sys.argv[1], "--config",
            sys.argv[2]]
main()
"""


def test_killed_learn_leaves_no_temporary_folder_behind(
    learned_store: LearnedStore, tmp_path: Path
) -> None:
    root = copy_store(learned_store.root, tmp_path / "store")
    versions = root / "models" / "ML" / "versions"
    listed = [v.version_id for v in ModelRegistry(root).versions("ML")]
    proc = subprocess.run(
        [
            sys.executable,
            "-c",
            _KILLED_LEARN.format(repo=str(REPO)),
            str(root),
            str(learned_store.config),
        ],
        capture_output=True,
        text=True,
        timeout=600,
    )
    assert proc.returncode == -9, proc.stderr
    leftovers = [p for p in versions.iterdir() if p.name.startswith(".")]
    assert len(leftovers) == 1 and (leftovers[0] / "units.parquet").is_file()
    # An older leftover, as if from a learn killed long ago.
    (versions / ".ML-20240101T000000Z-0badf00d.abc123").mkdir()
    # The next writer (here: adopt) removes both under the lock.
    res = invoke("adopt", learned_store.v1, "--store", root)
    assert res.exit_code == 0, res.stdout + res.stderr
    assert [p.name for p in versions.iterdir() if p.name.startswith(".")] == []
    assert [v.version_id for v in ModelRegistry(root).versions("ML")] == listed


def test_learn_on_unchanged_input_stores_no_new_version(
    learned_store: LearnedStore, tmp_path: Path
) -> None:
    root = copy_store(learned_store.root, tmp_path / "store")
    reg = ModelRegistry(root)
    learn = ("learn", "--half-life", "45", "--store", root, "--config", learned_store.config)
    first = invoke(*learn)
    assert first.exit_code == 0, first.stdout + first.stderr
    stored = [v.version_id for v in reg.versions("ML")]
    new = stored[-1]
    assert first.stdout.startswith(f"candidate  {new}  ")
    again = invoke(*learn)
    assert again.exit_code == 0, again.stdout + again.stderr
    assert again.stdout == (
        f"identical to version {new} (stored); nothing stored: same data window, settings "
        "and anchor\n"
    )
    assert [v.version_id for v in reg.versions("ML")] == stored
    # New data in the window is a new input: a new version.
    assert invoke("ingest", demo_slice(tmp_path / "apr.csv", "2025-04-01", "2025-04-08"),
                  "--store", root).exit_code == 0  # fmt: skip
    third = invoke(*learn)
    assert third.exit_code == 0 and third.stdout.startswith("candidate  ")
    assert len(reg.versions("ML")) == len(stored) + 1
