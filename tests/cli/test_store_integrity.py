"""Command-line behaviour that keeps the store exactly what it was given (issue 10, store cases).

Ids and magnitude types are checked before they touch a path; damaged files are named; a store
folder that links out of the store is refused.
"""

from __future__ import annotations

from pathlib import Path

import pytest

from tests.cli.conftest import LearnedStore, demo_slice, invoke


@pytest.fixture(scope="module")
def small_store(tmp_path_factory: pytest.TempPathFactory) -> Path:
    """Two weeks of the demo ingested into a fresh store."""
    base = tmp_path_factory.mktemp("small")
    csv = demo_slice(base / "demo.csv", end="2025-01-15")
    root = base / "store"
    res = invoke("ingest", csv, "--store", root)
    assert res.exit_code == 0, res.stderr
    return root


def _one_error_line(stderr: str) -> str:
    errors = [line for line in stderr.splitlines() if line.startswith("Error:")]
    assert len(errors) == 1, stderr
    assert "Traceback" not in stderr
    return errors[0]


def test_adopt_of_a_path_like_version_id_is_refused_before_any_write(
    small_store: Path, tmp_path: Path
) -> None:
    outside = small_store.parent / "outside"
    res = invoke("adopt", "../../outside/x-y", "--store", small_store)
    assert res.exit_code == 1
    assert "not a version id" in _one_error_line(res.stderr)
    assert not outside.exists()
    assert not (small_store / "models").exists()


@pytest.mark.parametrize("command", ["rollback", "models"])
def test_type_option_naming_a_path_is_refused(small_store: Path, command: str) -> None:
    outside = small_store.parent / "elsewhere"
    (outside / "versions").mkdir(parents=True, exist_ok=True)
    (outside / "active.json").write_text('{"version": "ML-x", "history": ["ML-y"]}')
    res = invoke(command, "--type", "../../elsewhere", "--store", small_store)
    assert res.exit_code == 1
    assert "unknown magnitude type" in _one_error_line(res.stderr)
    assert (outside / "active.json").read_text() == '{"version": "ML-x", "history": ["ML-y"]}'


def test_header_only_file_creates_no_batch(tmp_path: Path) -> None:
    header = (Path(__file__).parents[2] / "sample_events" / "demo_network_2025.csv").open(
        encoding="utf-8"
    )
    with header:
        first = header.readline()
    path = tmp_path / "header_only.csv"
    path.write_text(first, encoding="utf-8")
    root = tmp_path / "store"
    res = invoke("ingest", path, "--store", root)
    assert res.exit_code == 0, res.stderr
    assert "no rows" in res.stdout
    from stations.store import StationMagnitudeStore

    assert StationMagnitudeStore.open(root).summary().batches == 0


@pytest.mark.parametrize("folder", ["quarantine", "data", "fused/ML"])
def test_store_folder_linking_outside_is_refused_and_nothing_there_is_deleted(
    small_store: Path, tmp_path: Path, folder: str
) -> None:
    from tests.cli.conftest import copy_store

    root = copy_store(small_store, tmp_path / "store")
    outside = tmp_path / "outside"
    outside.mkdir()
    precious = outside / "20250101T000000000000Z-abcdef.parquet"
    precious.write_bytes(b"not magfuse's")
    link = root / folder
    if link.exists():
        for p in sorted(link.rglob("*"), reverse=True):
            (p.rmdir if p.is_dir() else p.unlink)()
        link.rmdir()
    link.parent.mkdir(parents=True, exist_ok=True)
    link.symlink_to(outside, target_is_directory=True)
    csv = demo_slice(tmp_path / "more.csv", start="2025-01-15", end="2025-01-20")
    for args in (("ingest", csv), ("fuse",), ("store",)):
        res = invoke(*args, "--store", root)
        assert res.exit_code == 1, (args, res.stdout)
        line = _one_error_line(res.stderr)
        assert folder in line and "symbolic link" in line
    assert precious.read_bytes() == b"not magfuse's"
    assert [p.name for p in outside.iterdir()] == [precious.name]


def test_damaged_parquet_input_is_rejected_whole(small_store: Path, tmp_path: Path) -> None:
    """The stored readings written out as uncompressed Parquet with page checksums (as
    pyarrow writes them with write_page_checksum=True), then 16 bytes overwritten in the
    middle of the data of each float column: every such file is refused with one line and
    nothing is stored (before, the changed values came in as revisions)."""
    import pyarrow as pa
    import pyarrow.parquet as pq

    from stations.schema import INPUT_COLUMNS
    from stations.store import StationMagnitudeStore
    from stations.validation import INPUT_SCHEMA
    from tests.cli.conftest import copy_store

    root = copy_store(small_store, tmp_path / "store")
    st = StationMagnitudeStore.open(root)
    before = st.summary()
    export = tmp_path / "export.parquet"
    table = pa.Table.from_pandas(
        st.scan()[list(INPUT_COLUMNS)], schema=INPUT_SCHEMA, preserve_index=False
    )
    pq.write_table(table, export, compression="none", write_page_checksum=True)
    good = export.read_bytes()
    chunks = pq.ParquetFile(export).metadata.row_group(0)
    columns = ("magnitude", "azimuth", "distance_km")
    for name in columns:
        col = chunks.column(INPUT_SCHEMA.get_field_index(name))
        mid = col.data_page_offset + col.total_compressed_size // 2
        bad = bytearray(good)
        bad[mid : mid + 16] = (1.5).hex().encode()[:16]
        path = tmp_path / f"damaged_{name}.parquet"
        path.write_bytes(bytes(bad))
        res = invoke("ingest", path, "--format", "parquet", "--store", root)
        assert res.exit_code == 1, (name, res.stdout)
        assert "damaged" in _one_error_line(res.stderr)
    after = StationMagnitudeStore.open(root).summary()
    assert (after.rows_all, after.revised, after.batches) == (
        before.rows_all,
        before.revised,
        before.batches,
    )


def test_verify_names_each_damaged_file_in_every_part_of_the_store(
    learned_store: LearnedStore, tmp_path: Path
) -> None:
    """A learned and fused store is intact; then one byte range is overwritten in a data
    file, a model table and a fused file: verify names all three and exits 1."""
    import json

    from tests.cli.conftest import copy_store

    root = copy_store(learned_store.root, tmp_path / "store")
    ok = invoke("verify", "--store", root, "--json")
    assert ok.exit_code == 0, ok.stdout + ok.stderr
    doc = json.loads(ok.stdout)
    assert doc["ok"] and doc["damaged"] == []
    assert all(n > 0 for n in doc["checked"].values()), doc["checked"]

    manifest = json.loads((root / "manifest.json").read_text())
    data = manifest["files"][0]["path"]
    units = next((root / "models" / "ML" / "versions").glob("ML-*")) / "units.parquet"
    fused = next((root / "fused" / "ML").glob("*-events.parquet"))
    for path in (root / data, units, fused):
        raw = bytearray(path.read_bytes())
        mid = len(raw) // 2
        raw[mid : mid + 16] = bytes(16)
        path.write_bytes(bytes(raw))
    res = invoke("verify", "--store", root)
    assert res.exit_code == 1
    named = [line for line in res.stdout.splitlines() if line.startswith("DAMAGED ")]
    assert len(named) == 3, res.stdout
    for path in (root / data, units, fused):
        assert any(path.relative_to(root).as_posix() in line for line in named)
    assert "Traceback" not in res.stderr


def test_same_events_from_csv_and_quakeml_stay_one_event_each(tmp_path: Path) -> None:
    """The demo's December as CSV, then the same December as QuakeML
    (sample_events/demo_network_2025_december.xml, publicIDs smi:.../event/qv2025-NNNNN):
    the QuakeML adds no event."""
    import sample_events
    from stations.store import StationMagnitudeStore

    xml = Path(sample_events.__file__).parent / "demo_network_2025_december.xml"
    csv = demo_slice(tmp_path / "december.csv", start="2025-12-01")
    root = tmp_path / "store"
    assert invoke("ingest", csv, "--store", root).exit_code == 0
    before = StationMagnitudeStore.open(root).summary().events
    res = invoke("ingest", xml, "--store", root)
    assert res.exit_code == 0, res.stdout + res.stderr
    assert StationMagnitudeStore.open(root).summary().events == before


def test_events_under_other_ids_at_the_same_time_and_place_are_refused(
    small_store: Path, tmp_path: Path
) -> None:
    """The stored fortnight again with every event id renamed (an agency's own numbers):
    refused with one line naming both ids and the option; accepted with the option."""
    import pandas as pd

    from stations.store import StationMagnitudeStore
    from tests.cli.conftest import copy_store

    root = copy_store(small_store, tmp_path / "store")
    frame = pd.read_csv(demo_slice(tmp_path / "same.csv", end="2025-01-15"), dtype=str)
    first = frame["event_id"].iloc[0]
    frame["event_id"] = "other-" + frame["event_id"]
    renamed = tmp_path / "renamed.csv"
    frame.to_csv(renamed, index=False)
    before = StationMagnitudeStore.open(root).summary()
    res = invoke("ingest", renamed, "--store", root)
    assert res.exit_code == 1
    line = _one_error_line(res.stderr)
    assert f"'other-{first}'" in line and f"'{first}'" in line
    assert "--allow-near-duplicates" in line
    assert StationMagnitudeStore.open(root).summary().events == before.events
    ok = invoke("ingest", renamed, "--allow-near-duplicates", "--store", root)
    assert ok.exit_code == 0, ok.stderr
    assert StationMagnitudeStore.open(root).summary().events == 2 * before.events


def test_near_duplicate_pairs_by_time_and_distance() -> None:
    """Hand-made events: 0.5 s and 3 km apart is one event; 0.5 s and 50 km, or 5 s apart,
    are two; an unknown epicentre lets the time decide. Distances: 0.027 deg of latitude is
    3.0 km on the 6371 km sphere (2 pi 6371 / 360 = 111.19 km per degree)."""
    import numpy as np
    import pandas as pd

    from stations.store.duplicates import near_duplicates

    t0 = np.datetime64("2025-03-01T00:00:00", "us").astype(np.int64)
    stored = pd.DataFrame(
        {
            "event_id": ["a", "b", "c"],
            "t_us": [t0, t0 + 100_000_000, t0 + 200_000_000],
            "lat": [10.0, 10.0, np.nan],
            "lon": [20.0, 20.0, np.nan],
        }
    )
    batch = pd.DataFrame(
        {
            "event_id": ["x", "y", "z", "w", "a"],
            "t_us": [t0 + 500_000, t0 + 100_500_000, t0 + 205_000_000, t0 + 200_300_000, t0],
            "lat": [10.027, 10.45, 10.0, 5.0, 10.0],
            "lon": [20.0, 20.0, 20.0, 5.0, 20.0],
        }
    )
    found = near_duplicates(batch, stored)
    assert [(f.new_id, f.stored_id) for f in found] == [("x", "a"), ("w", "c")]
    assert found[0].km == pytest.approx(3.0, abs=0.01)
    assert found[1].km is None


def test_reading_under_a_wrong_channel_can_be_retracted_and_stays_on_record(
    small_store: Path, tmp_path: Path
) -> None:
    """A corrected channel code arrives as a second reading of one station; retracting the
    old one leaves one current reading, and the old one is still among all revisions."""
    import pandas as pd

    from stations.store import StationMagnitudeStore
    from tests.cli.conftest import copy_store

    root = copy_store(small_store, tmp_path / "store")
    frame = pd.read_csv(demo_slice(tmp_path / "d.csv", end="2025-01-15"), dtype=str)
    row = frame.iloc[[0]].copy()
    old_channel = row["channel"].iloc[0]
    row["channel"] = "HHZ" if old_channel != "HHZ" else "HHE"
    fixed = tmp_path / "fixed.csv"
    row.to_csv(fixed, index=False)
    assert invoke("ingest", fixed, "--store", root).exit_code == 0
    ev = row["event_id"].iloc[0]
    sta = f"{row['network'].iloc[0]}.{row['station'].iloc[0]}.{row['location'].iloc[0]}"
    st = StationMagnitudeStore.open(root)
    assert (st.event(ev)["station_id"] == sta).sum() == 2
    res = invoke(
        "retract",
        ev,
        "--station",
        sta,
        "--channel",
        old_channel,
        "--reason",
        "channel code corrected",
        "--store",
        root,
    )
    assert res.exit_code == 0, res.stderr
    current = StationMagnitudeStore.open(root).event(ev)
    mine = current[current["station_id"] == sta]
    assert mine["channel"].tolist() == [row["channel"].iloc[0]]
    every = StationMagnitudeStore.open(root).event(ev, all_revisions=True)
    assert old_channel in every[every["station_id"] == sta]["channel"].tolist()
    again = invoke(
        "retract",
        ev,
        "--station",
        sta,
        "--channel",
        old_channel,
        "--reason",
        "x",
        "--store",
        root,
    )
    assert again.exit_code == 1 and "no current ML reading" in _one_error_line(again.stderr)


def test_reference_stations_that_do_not_exist_are_an_error_at_learn_time(
    small_store: Path, tmp_path: Path
) -> None:
    from tests.cli.conftest import write_config

    config = write_config(
        tmp_path / "ref.toml",
        '[pairs]\nglobal_test_replicates = 20\n[learn]\nreference_stations = ["QV.NOPE.00"]\n',
    )
    res = invoke("learn", "--store", small_store, "--config", config)
    assert res.exit_code == 1
    line = _one_error_line(res.stderr)
    assert "'QV.NOPE.00'" in line and "known stations: " in line and "QV.VB01.00" in line
    assert not (small_store / "models").exists()
