"""``magfuse ingest`` and ``magfuse store`` through the app's error boundary (CliRunner)."""

from __future__ import annotations

import json
import os
import re
from pathlib import Path

import pytest
from typer.testing import CliRunner

from fusion.advisory import ADVISORY
from fusion.cli import commands_store
from fusion.cli.app import app
from stations.readers import read_records
from stations.readers.csv import template_path
from stations.store import StationMagnitudeStore
from stations.store.lock import set_holder_command
from tests.datasets import YELLOWSTONE_CSV
from tests.stations.store.lock_holder import held_by_another_thread

runner = CliRunner()
BATCH = r"\d{8}T\d{12}Z-[0-9a-f]{6}"
YELLOWSTONE = YELLOWSTONE_CSV


def _malformed(tmp_path: Path) -> tuple[Path, str]:
    """A CSV lacking a required column, and the reader's own one-line message for it."""
    bad = tmp_path / "bad.csv"
    bad.write_text(
        "event_id,origin_time,network,station,magnitude_type\ne1,2024-01-01T00:00:00Z,XX,A,ML\n"
    )
    try:
        read_records(bad)
    except Exception as exc:  # the reader's MalformedFileError
        return bad, f"Error: {exc}"
    raise AssertionError("the reader accepted a malformed file")


def test_ingest_one_file_then_summary(tmp_path: Path) -> None:
    store = tmp_path / "store"
    src = template_path()
    res = runner.invoke(app, ["ingest", str(src), "--store", str(store)])
    assert res.exit_code == 0, res.stderr
    assert re.fullmatch(
        rf"{re.escape(str(src))}: 2 accepted \(0 revised\), 0 duplicate, 0 quarantined; "
        rf"batch {BATCH}\n",
        res.stdout,
    )
    assert res.stderr == ADVISORY + "\n"

    again = runner.invoke(app, ["ingest", str(src), "--store", str(store)])
    assert again.exit_code == 0
    batch = res.stdout.rsplit("batch ", 1)[1].strip()
    assert again.stdout == f"{src}: same content as batch {batch}; nothing added\n"

    js = runner.invoke(app, ["store", "--json", "--store", str(store)])
    assert js.exit_code == 0, js.stderr
    doc = json.loads(js.stdout)
    # The shipped template holds one detection and one non-detection of one ML event.
    assert (doc["rows_current"], doc["detected"], doc["not_detected"]) == (2, 1, 1)
    assert (doc["events"], doc["stations"], doc["batches"], doc["quarantined"]) == (1, 2, 1, 0)
    assert [t["magnitude_type"] for t in doc["by_type"]] == ["ML"]

    text = runner.invoke(app, ["store", "--store", str(store)])
    assert text.exit_code == 0
    lines = text.stdout.splitlines()
    assert lines[0] == f"store      {store}  (record schema 1)"
    assert lines[2] == "readings   2 current; 2 counting every revision; 0 revised"
    assert lines[3] == "           1 detected; 1 not detected"
    assert lines[-2].split()[:8] == [
        "type",
        "current",
        "all",
        "detected",
        "not",
        "det.",
        "revised",
        "events",
    ]
    assert lines[-1].split()[:8] == ["ML", "2", "2", "1", "1", "0", "1", "2"]


def test_a_malformed_file_does_not_stop_the_others(tmp_path: Path) -> None:
    bad, message = _malformed(tmp_path)
    good = template_path()
    res = runner.invoke(app, ["ingest", str(bad), str(good), "--store", str(tmp_path / "s")])
    assert res.exit_code == 0
    assert re.fullmatch(rf"{re.escape(str(good))}: 2 accepted .*; batch {BATCH}\n", res.stdout)
    err_lines = res.stderr.splitlines()
    assert message in err_lines
    assert err_lines[-1] == ADVISORY
    assert "Ingesting" in res.stderr  # the progress bar (stderr) for several files


def test_exit_1_when_nothing_could_be_read(tmp_path: Path) -> None:
    bad, message = _malformed(tmp_path)
    missing = tmp_path / "missing.csv"
    res = runner.invoke(app, ["ingest", str(bad), str(missing), "--store", str(tmp_path / "s")])
    assert res.exit_code == 1
    assert res.stdout == ""
    lines = res.stderr.splitlines()
    assert message in lines
    assert f"Error: {missing}: file not found; check the path" in lines

    unknown = runner.invoke(
        app, ["ingest", str(template_path()), "--format", "nosuch", "--store", str(tmp_path / "s")]
    )
    assert unknown.exit_code == 1
    assert unknown.stderr.splitlines()[0].startswith(
        f"Error: {template_path()}: unknown format 'nosuch'; use one of "
    )


def test_busy_store_fails_with_the_lock_message(tmp_path: Path) -> None:
    root = tmp_path / "store"
    cfg = tmp_path / "magfuse.toml"
    cfg.write_text(f'[store]\npath = "{root}"\nlock_timeout_s = 0.2\n')
    holder = StationMagnitudeStore.open(root)
    set_holder_command("magfuse nightly")  # what the lock file says about its holder
    with held_by_another_thread(holder):
        res = runner.invoke(app, ["ingest", str(template_path()), "--config", str(cfg)])
    assert res.exit_code == 1
    who = f"another magfuse process (pid {os.getpid()}, command magfuse nightly)"
    assert res.stderr == (
        f"{root}: waiting up to 0.2 s for {who} to release the store's writer lock\n"
        f"Error: {root} is busy: {who} holds its writer lock; try again later (waited 0.2 s; "
        "[store] lock_timeout_s sets the wait)\n"
    )
    assert holder.summary().batches == 0


def test_store_summary_of_a_missing_store(tmp_path: Path) -> None:
    res = runner.invoke(app, ["store", "--store", str(tmp_path / "nowhere")])
    assert res.exit_code == 1
    assert res.stdout == ""
    assert res.stderr == (
        f"Error: {tmp_path / 'nowhere'}: no magfuse store here (manifest.json is missing); "
        f"pass the right --store, or create one with 'magfuse ingest FILE --store "
        f"{tmp_path / 'nowhere'}'\n"
    )
    assert not (tmp_path / "nowhere").exists()  # a summary never creates a store


def test_ingest_the_yellowstone_table(tmp_path: Path) -> None:
    """Real data (Holt, Pechmann & Koper 2022): its README counts 7,728 rows and 20 stations."""
    store = tmp_path / "store"
    res = runner.invoke(app, ["ingest", str(YELLOWSTONE), "--store", str(store)])
    assert res.exit_code == 0, res.stderr
    m = re.fullmatch(
        rf"{re.escape(str(YELLOWSTONE))}: ([\d,]+) accepted \(0 revised\), 0 duplicate, "
        rf"([\d,]+) quarantined; batch {BATCH}\n",
        res.stdout,
    )
    assert m is not None, res.stdout
    accepted, quarantined = (int(g.replace(",", "")) for g in (m[1], m[2]))
    assert accepted + quarantined == 7728
    assert accepted >= 1000 and f"{accepted:,}" == m[1]  # human text: thousands separators
    doc = json.loads(runner.invoke(app, ["store", "--json", "--store", str(store)]).stdout)
    assert doc["rows_current"] == accepted and doc["quarantined"] == quarantined
    assert doc["stations"] == 20


def test_large_single_file_gets_a_progress_bar_and_empty_store_summary(
    tmp_path: Path, monkeypatch: pytest.MonkeyPatch
) -> None:
    monkeypatch.setattr(commands_store, "LARGE_FILE_BYTES", 1)
    store = tmp_path / "s"
    StationMagnitudeStore.open(store)
    empty = runner.invoke(app, ["store", "--store", str(store)])
    assert empty.exit_code == 0
    assert empty.stdout.splitlines()[2:] == [
        "readings   0 current; 0 counting every revision; 0 revised",
        "           0 detected; 0 not detected",
        "events     0; stations 0",
        "origins    - to -",
    ]
    res = runner.invoke(app, ["ingest", str(template_path()), "--store", str(store)])
    assert res.exit_code == 0
    assert res.stderr.startswith("Ingesting")
