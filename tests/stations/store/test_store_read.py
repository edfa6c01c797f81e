"""Reading the store: window scans open only their partitions, event look-ups, files, errors."""

from __future__ import annotations

import json
from datetime import UTC, datetime
from pathlib import Path

import numpy as np
import pandas as pd
import pyarrow as pa
import pyarrow.dataset as ds
import pyarrow.parquet as pq
import pytest

import stations.store.commit as commit_mod
import stations.store.reading as reading_mod
from stations.errors import ConfigError, SchemaError, StoreCorruptError
from stations.schema import RECORD_SCHEMA, check_schema
from stations.store import StationMagnitudeStore
from tests.stations.store.store_frames import YELLOWSTONE, random_records, records, rejected


@pytest.fixture
def filled(tmp_path: Path) -> tuple[StationMagnitudeStore, pd.DataFrame]:
    """Two types over four months (Jan-Apr 2024), ingested as two batches."""
    rng = np.random.default_rng(7)
    frame = random_records(rng, 400, start="2024-01-01", days=120, types=("ML", "mb"))
    store = StationMagnitudeStore.open(tmp_path / "store")
    half = frame["origin_time"] < pd.Timestamp("2024-02-15", tz="UTC")
    store.ingest(frame[half], None, source_file="a.csv")
    store.ingest(frame[~half], None, source_file="b.csv")
    return store, frame


class _OpenSpy:
    """Records every Parquet file the store's reader opens."""

    def __init__(self, monkeypatch: pytest.MonkeyPatch) -> None:
        self.paths: list[Path] = []
        real = reading_mod.pq.ParquetFile

        def spy(path, *a, **k):
            self.paths.append(Path(path))
            return real(path, *a, **k)

        monkeypatch.setattr(reading_mod.pq, "ParquetFile", spy)


def _key_set(frame: pd.DataFrame) -> set[tuple]:
    return set(zip(frame["event_id"], frame["station_id"], frame["magnitude_type"], strict=True))


def test_window_scan_opens_only_its_partitions(filled, monkeypatch) -> None:
    store, frame = filled
    start = datetime(2024, 2, 1, tzinfo=UTC)
    end = datetime(2024, 3, 1, tzinfo=UTC)
    files = store.window_files(magnitude_type="mb", start=start, end=end)
    # February mb rows were ingested in both batches (split on Feb 15): two files, both in
    # the mb/2024-02 partition, and nothing else.
    assert len(files) == 2
    assert {p.parent.relative_to(store.root).as_posix() for p in files} == {"data/mb/2024-02"}
    all_files = [store.root / f.path for f in store.manifest().files]
    assert len(all_files) == 10  # 2 types x 4 months + the two split months

    spy = _OpenSpy(monkeypatch)
    got = store.scan(magnitude_type="mb", start=start, end=end)
    assert sorted(spy.paths) == sorted(files)

    t = frame["origin_time"]
    want = frame[(frame["magnitude_type"] == "mb") & (t >= start) & (t < end)]
    assert len(got) == len(want) > 0
    assert _key_set(got) == _key_set(want)


def test_window_inside_a_month_and_columns(filled) -> None:
    store, frame = filled
    start = datetime(2024, 3, 10, 6, 30)  # naive: taken as UTC
    end = datetime(2024, 3, 20, tzinfo=UTC)
    got = store.scan(start=start, end=end, columns=["event_id", "station_id", "magnitude_type"])
    assert list(got.columns) == ["event_id", "station_id", "magnitude_type"]
    t = frame["origin_time"]
    want = frame[(t >= pd.Timestamp(start, tz="UTC")) & (t < end)]
    assert _key_set(got) == _key_set(want)
    with pytest.raises(SchemaError, match="unknown store column 'mag'"):
        store.scan(columns=["mag"])


def test_event_lookup_returns_exactly_that_event(filled, monkeypatch) -> None:
    store, frame = filled
    event_id = frame["event_id"].iloc[len(frame) // 2]
    spy = _OpenSpy(monkeypatch)
    got = store.event(event_id)
    want = frame[frame["event_id"] == event_id]
    assert len(got) == len(want) and set(got["event_id"]) == {event_id}
    assert _key_set(got) == _key_set(want)
    np.testing.assert_array_equal(
        got.sort_values("station_id")["magnitude"].to_numpy(),
        want.sort_values("station_id")["magnitude"].to_numpy(),
    )
    holding = {
        p.path
        for p in store.manifest().files
        if p.min_event_id <= event_id <= p.max_event_id
        and p.magnitude_type == want["magnitude_type"].iloc[0]
    }
    data_opened = [p for p in spy.paths if "data" in p.parts]
    # Only the file(s) the event index names, never the whole store.
    assert {p.relative_to(store.root).as_posix() for p in data_opened} <= holding
    assert len(data_opened) == 1
    assert store.event("no-such-event").empty
    other = "mb" if want["magnitude_type"].iloc[0] == "ML" else "ML"
    assert store.event(event_id, magnitude_type=other).empty


def test_event_lookup_reads_one_row_group(tmp_path: Path, monkeypatch) -> None:
    monkeypatch.setattr(commit_mod, "ROW_GROUP_ROWS", 64)
    rng = np.random.default_rng(3)
    frame = random_records(rng, 300, start="2024-05-01", days=20)
    store = StationMagnitudeStore.open(tmp_path / "store")
    store.ingest(frame, None, source_file="a.csv")
    (entry,) = store.manifest().files
    assert pq.ParquetFile(store.root / entry.path).metadata.num_row_groups > 10
    read_groups: list[list[int]] = []
    real = reading_mod.pq.ParquetFile.read_row_groups

    def spy(self, groups, *a, **k):
        read_groups.append(list(groups))
        return real(self, groups, *a, **k)

    monkeypatch.setattr(reading_mod.pq.ParquetFile, "read_row_groups", spy)
    event_id = sorted(frame["event_id"].unique())[150]
    got = store.event(event_id)
    assert len(got) == (frame["event_id"] == event_id).sum()
    # The data file read: at most the two row groups an event can straddle (of > 10).
    data_reads = [g for g in read_groups if len(g) <= 2]
    assert data_reads and all(len(g) <= 2 for g in read_groups)


def test_files_are_plain_parquet_with_the_declared_schema(filled) -> None:
    store, frame = filled
    m = store.manifest()
    for entry in m.files:
        schema = pq.read_schema(store.root / entry.path)
        check_schema(schema, RECORD_SCHEMA, where=entry.path)
        assert schema.metadata[b"magfuse.schema"] == b"station_magnitude"
        assert schema.field("origin_time").type == pa.timestamp("us", tz="UTC")
    # An independent reader (pyarrow.dataset over the listed files) sees every row.
    dataset = ds.dataset([str(store.root / f.path) for f in m.files], format="parquet")
    assert dataset.count_rows() == len(frame) == store.summary().rows_all
    doc = json.loads((store.root / "manifest.json").read_text())
    assert doc["schema_version"] == "1" and doc["generation"] == 2


def test_fingerprint_tracks_the_window(filled) -> None:
    store, frame = filled
    jan = {"magnitude_type": "ML", "start": datetime(2024, 1, 1), "end": datetime(2024, 2, 1)}
    apr = {"magnitude_type": "ML", "start": datetime(2024, 4, 1), "end": datetime(2024, 5, 1)}
    fp_jan, fp_apr = store.fingerprint(**jan), store.fingerprint(**apr)
    assert fp_jan != fp_apr and fp_jan.startswith("sha256:")
    # A new April reading changes April's fingerprint only.
    new = records(["new1"], ["XX.Z."], [2.2], origin_time=["2024-04-10T00:00:00Z"])
    store.ingest(new, None, source_file="c.csv")
    assert store.fingerprint(**jan) == fp_jan
    assert store.fingerprint(**apr) != fp_apr
    # A revision of a January reading changes January's.
    jan_row = (
        frame[
            (frame["magnitude_type"] == "ML")
            & (frame["origin_time"] < pd.Timestamp("2024-02-01", tz="UTC"))
            & frame["magnitude"].notna()
        ]
        .head(1)
        .copy()
    )
    jan_row["magnitude"] += 0.5
    assert store.ingest(jan_row, None, source_file="d.csv").revised == 1
    assert store.fingerprint(**jan) != fp_jan


def test_corrupt_and_foreign_files_are_named(filled) -> None:
    store, _ = filled
    entry = store.manifest().files[0]
    path = store.root / entry.path
    good = path.read_bytes()
    path.write_bytes(b"not parquet at all")
    with pytest.raises(StoreCorruptError, match=rf"^{path}: damaged \(its SHA-256 differs"):
        store.scan()
    pq.write_table(pa.table({"event_id": ["x"]}), path)
    with pytest.raises(StoreCorruptError, match=rf"^{path}: damaged .*'magfuse verify'"):
        store.scan()
    # A file without a recorded checksum (a store written before checksums) is still checked
    # for readability and columns.
    m = store.manifest()
    object.__setattr__(m, "checksums", {})
    with pytest.raises(SchemaError) as err:
        store.scan()
    assert str(err.value) == (
        f"{path}: column 'origin_time' is missing; expected timestamp[us, tz=UTC]"
    )
    path.write_bytes(b"not parquet at all")
    with pytest.raises(StoreCorruptError, match=rf"^{path}: damaged \(not a readable Parquet"):
        store.scan()
    path.unlink()
    with pytest.raises(StoreCorruptError, match="listed in the manifest but missing"):
        store.scan()
    path.write_bytes(good)
    assert len(store.scan()) > 0


def test_manifest_problems(tmp_path: Path) -> None:
    with pytest.raises(StoreCorruptError) as err:
        StationMagnitudeStore.open(tmp_path / "none", create=False)
    assert str(err.value) == (
        f"{tmp_path / 'none'}: no magfuse store here (manifest.json is missing); pass the right "
        f"--store, or create one with 'magfuse ingest FILE --store {tmp_path / 'none'}'"
    )
    (tmp_path / "home").mkdir()
    (tmp_path / "home" / "notes.txt").write_text("mine")
    with pytest.raises(StoreCorruptError, match="folder is not empty and holds no store"):
        StationMagnitudeStore.open(tmp_path / "home")
    store = StationMagnitudeStore.open(tmp_path / "s")
    manifest = tmp_path / "s" / "manifest.json"
    doc = json.loads(manifest.read_text())
    manifest.write_text(json.dumps({**doc, "schema_version": "0"}))
    with pytest.raises(SchemaError, match="store schema version '0', this magfuse reads"):
        store.scan()
    manifest.write_text("{")
    with pytest.raises(StoreCorruptError, match=r"manifest.json: not valid JSON"):
        store.summary()


def test_yellowstone_table_round_trip(tmp_path: Path) -> None:
    """Real data: Holt, Pechmann & Koper (2022), UUSS Yellowstone station MLs.

    Check values from the data set's README (7,728 rows, 1,383 events, 20 stations,
    1998-04 to 2020-06) and read by eye from the first two data lines of the CSV: event
    50154140, US.AHID SML 2.81 with Corr -0.43, US.LKWY SML 3.35 with Corr 0.06.
    """
    raw = pd.read_csv(YELLOWSTONE, dtype={"Evid": str})
    has_corr = raw["Corr"].notna()
    ok = raw[has_corr]
    frame = records(
        ok["Evid"].to_numpy(),
        (ok["Net"] + "." + ok["Sta"] + ".").to_numpy(),
        (ok["SML"] - ok["Corr"]).to_numpy(),
        origin_time=(ok["Date"] + "T" + ok["Time"] + "Z").to_numpy(),
        channel=(ok["Cmp"]).tolist(),
        source_file=str(YELLOWSTONE),
    )
    bad = raw[~has_corr]
    rej = rejected(
        [f"line {i + 2}" for i in bad.index],
        ["Corr is empty"] * len(bad),
        source_file=str(YELLOWSTONE),
    )
    rej["raw"] = bad.to_json(orient="records", lines=True).splitlines()
    store = StationMagnitudeStore.open(tmp_path / "store")
    rep = store.ingest(frame, rej, source_file=str(YELLOWSTONE))
    assert rep.accepted + rep.quarantined == 7728  # README: 7,728 (event, station) rows
    s = store.summary()
    assert s.rows_current + s.quarantined == 7728
    quarantined_events = {json.loads(r)["Evid"] for r in store.quarantine()["raw"]}
    stored_events = set(store.scan(columns=["event_id"])["event_id"])
    assert len(stored_events | quarantined_events) == 1383  # README: 1,383 events
    assert s.stations == 20  # README: 20 stations
    assert (
        f"{s.first_origin_time:%Y-%m}" == "1998-04" and f"{s.last_origin_time:%Y-%m}" == "2020-06"
    )
    ev = store.event("50154140").set_index("station_id")
    assert ev.loc["US.AHID.", "magnitude"] == pytest.approx(2.81 + 0.43, abs=1e-12)
    assert ev.loc["US.LKWY.", "magnitude"] == pytest.approx(3.35 - 0.06, abs=1e-12)
    assert ev["origin_time"].iloc[0] == pd.Timestamp("1998-04-05T18:23:26.47Z")
    again = store.ingest(frame, None, source_file=str(YELLOWSTONE))
    assert again.duplicate == len(frame) and again.accepted == 0


def test_magnitude_type_is_checked_and_aliases_resolve(filled) -> None:
    store, frame = filled
    with pytest.raises(ConfigError, match=r"^unknown magnitude type 'Ml'; use one of ML, mb"):
        store.scan(magnitude_type="Ml")
    with pytest.raises(ConfigError, match="unknown magnitude type 'MB'"):  # mb or mB: ambiguous
        store.event("x", magnitude_type="MB")
    # 'Mb' is an unambiguous alias of mb (stations.schema.MAGNITUDE_TYPE_ALIASES).
    assert len(store.scan(magnitude_type="Mb")) == (frame["magnitude_type"] == "mb").sum()


def test_reader_on_a_stale_manifest_retries(filled, monkeypatch) -> None:
    """Index files are replaced at each commit and deleted two commits later; a reader still
    holding the older manifest re-reads it instead of failing."""
    store, frame = filled
    stale = store.manifest()
    assert stale.event_index is not None
    for i in range(3):
        extra = records([f"late{i}"], ["XX.Q."], [1.0], origin_time=["2024-06-01T00:00:00Z"])
        store.ingest(extra, None, source_file=f"late{i}")
    assert not (store.root / stale.event_index).exists()
    calls: list[int] = []
    fresh = StationMagnitudeStore.manifest

    def manifest_once_stale(self: StationMagnitudeStore):
        calls.append(1)
        return stale if len(calls) == 1 else fresh(self)

    monkeypatch.setattr(StationMagnitudeStore, "manifest", manifest_once_stale)
    event_id = frame["event_id"].iloc[0]
    got = store.event(event_id)
    assert len(calls) == 2
    assert len(got) == (frame["event_id"] == event_id).sum()
