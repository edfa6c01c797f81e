"""The fused-magnitude store: round trip, final rows, finalize, crash safety, compaction."""

from __future__ import annotations

import json
import os
import signal
import subprocess
import sys
import time
import warnings
from collections.abc import Iterator
from contextlib import contextmanager
from dataclasses import replace
from datetime import UTC, datetime, timedelta
from pathlib import Path

import numpy as np
import pandas as pd
import pyarrow as pa
import pyarrow.parquet as pq
import pytest
from obspy.core.event import header as quakeml_header

from fusion.model.parameters import StationParameters
from fusion.model.simulation import SimulationConfig, simulate_network
from fusion.network.network_magnitude import FusedMagnitudes, fuse_events
from fusion.versions.fused_store import (
    FUSED_CONTRIBUTIONS_SCHEMA,
    FUSED_EVENTS_SCHEMA,
    EvaluationStatus,
    FusedStore,
)
from stations.errors import ConfigError, SchemaError, StoreCorruptError
from stations.store import StationMagnitudeStore

NAT = np.datetime64("NaT", "us")
T0 = datetime(2025, 6, 1, tzinfo=UTC)
V1 = "ML-20250601T000000Z-aaaaaaaa"
V2 = "ML-20250602T000000Z-bbbbbbbb"


def _truth_params(shift: float = 0.0, n_stations: int = 12, seed: int = 3) -> StationParameters:
    net = simulate_network(_config(n_stations), seed=seed)
    k = net.observations.n_stations
    ids = net.observations.station_ids
    return StationParameters(
        magnitude_type="ML",
        unit_ids=ids,
        station_ids=ids,
        epoch_start=np.full(k, NAT),
        epoch_end=np.full(k, NAT),
        bias=net.bias + shift,
        bias_var=np.full(k, 1e-3),
        sigma2=net.sigma**2,
        prior_dominated=np.zeros(k, bool),
        pairs=net.pairs,
        tau_b2=0.04,
        s0_2=0.05,
    )


def _config(n_stations: int = 12) -> SimulationConfig:
    return SimulationConfig(n_stations=n_stations, n_events=80, pair_rhos=(0.5,))


def _fuse(shift: float = 0.0) -> FusedMagnitudes:
    """Fused magnitudes of a seeded synthetic network (generator: docs/simulation.md); the station
    parameters are the true ones, ``shift`` moves every bias (so every magnitude moves by
    -shift)."""
    net = simulate_network(_config(), seed=3)
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        return fuse_events(net.observations, _truth_params(shift))


@pytest.fixture(scope="module")
def fused() -> FusedMagnitudes:
    return _fuse()


@pytest.fixture(scope="module")
def fused_shifted() -> FusedMagnitudes:
    return _fuse(0.1)


def _plain(frame: pd.DataFrame) -> pd.DataFrame:
    """Categoricals and strings as plain objects, for comparisons."""
    out = frame.copy()
    for c in out.columns:
        if (
            isinstance(out[c].dtype, pd.CategoricalDtype)
            or out[c].dtype.kind in "OTU"
            or (str(out[c].dtype) == "str")
        ):
            out[c] = out[c].astype(object).where(out[c].notna(), None)
    return out.reset_index(drop=True)


# -- schema -------------------------------------------------------------------------------------


def test_schemas_declare_every_column_fuse_events_returns(fused: FusedMagnitudes) -> None:
    """Drift guard: a column added to fuse_events' tables must be declared in the store."""
    assert set(fused.events.columns) <= set(FUSED_EVENTS_SCHEMA.names)
    assert set(fused.contributions.columns) <= set(FUSED_CONTRIBUTIONS_SCHEMA.names)
    for schema in (FUSED_EVENTS_SCHEMA, FUSED_CONTRIBUTIONS_SCHEMA):
        for f in schema:
            if pa.types.is_floating(f.type):
                assert b"unit" in f.metadata, f.name


def test_status_vocabulary_is_quakeml() -> None:
    """EvaluationStatus values are QuakeML 1.2 EvaluationStatus values (ObsPy's enum of the
    QuakeML BED vocabulary)."""
    assert {s.value for s in EvaluationStatus} <= set(quakeml_header.EvaluationStatus)


def test_run_files_carry_declared_schema(tmp_path: Path, fused: FusedMagnitudes) -> None:
    store = FusedStore(tmp_path)
    store.write_run(fused, model_version=V1, now=T0)
    files = sorted((tmp_path / "fused" / "ML").glob("*.parquet"))
    assert len(files) == 2
    for f in files:
        schema = pq.read_schema(f)  # pyarrow's own reader, not the store's
        expected = FUSED_EVENTS_SCHEMA if "events" in f.name else FUSED_CONTRIBUTIONS_SCHEMA
        assert schema.names == expected.names
        assert schema.metadata[b"magfuse.schema_version"] == b"1"
        assert schema.field("run_seq").metadata[b"unit"] == b"1"


# -- round trip ---------------------------------------------------------------------------------


def test_write_run_round_trip(tmp_path: Path, fused: FusedMagnitudes) -> None:
    store = FusedStore(tmp_path)
    report = store.write_run(fused, model_version=V1, now=T0)
    assert report.events_written == len(fused.events)
    assert report.contributions_written == len(fused.contributions)
    assert (report.skipped_final, report.segments, report.model_versions) == (0, 1, (V1,))

    cur = store.current("ML")
    want = _plain(fused.events.sort_values(["origin_time", "event_id"]))
    got = _plain(cur[list(fused.events.columns)])
    pd.testing.assert_frame_equal(got, want, check_dtype=False)
    assert set(cur["model_version"]) == {V1}
    assert set(cur["evaluation_status"]) == {"preliminary"}
    assert (cur["fused_at"] == pd.Timestamp(T0)).all()
    assert (cur["run_id"] == report.run_id).all()

    rows = store.current_contributions("ML", cur)
    order = pd.Index(cur["event_id"]).get_indexer(fused.contributions["event_id"].astype(str))
    want_rows = fused.contributions.iloc[np.argsort(order, kind="stable")]
    pd.testing.assert_frame_equal(
        _plain(rows[list(fused.contributions.columns)]), _plain(want_rows), check_dtype=False
    )
    one = cur["event_id"].iloc[5]
    single = store.contributions("ML", one)
    pd.testing.assert_frame_equal(
        _plain(single[list(fused.contributions.columns)]),
        _plain(fused.contributions[fused.contributions["event_id"] == one]),
        check_dtype=False,
    )
    assert store.contributions("ML", "no-such-event").empty


def test_current_window_matches_pandas_filter(tmp_path: Path, fused: FusedMagnitudes) -> None:
    """Half-open origin-time window, against a plain pandas filter of the same rows."""
    store = FusedStore(tmp_path)
    store.write_run(fused, model_version=V1, now=T0)
    t = fused.events["origin_time"]
    lo, hi = t.iloc[10], t.iloc[40]
    got = store.current("ML", start=lo.to_pydatetime(), end=hi.to_pydatetime())
    want = fused.events[(t >= lo) & (t < hi)].sort_values(["origin_time", "event_id"])
    assert list(got["event_id"]) == list(want["event_id"])
    assert len(got) == 30
    naive = lo.tz_localize(None).to_pydatetime()  # naive datetimes are UTC
    assert len(store.current("ML", start=naive)) == int((t >= lo).sum())
    first = str(want["event_id"].iloc[0])
    picked = store.current("ML", event_ids=[first, "unknown"])
    assert list(picked["event_id"]) == [first]


def test_latest_run_is_current_and_history_keeps_all(
    tmp_path: Path, fused: FusedMagnitudes, fused_shifted: FusedMagnitudes
) -> None:
    store = FusedStore(tmp_path)
    store.write_run(fused, model_version=V1, now=T0)
    store.write_run(fused_shifted, model_version=V2, now=T0 + timedelta(days=1))
    cur = store.current("ML").set_index("event_id")
    want = fused_shifted.events.set_index("event_id")["magnitude"]
    np.testing.assert_array_equal(cur["magnitude"].reindex(want.index), want)
    assert set(cur["model_version"]) == {V2}
    eid = str(fused.events["event_id"].iloc[0])
    hist = store.history(eid)
    assert list(hist["model_version"]) == [V1, V2]
    assert list(hist["run_seq"]) == [1, 2]
    # the older row's contributions stay readable by run id
    old = store.contributions("ML", eid, run_id=str(hist["run_id"].iloc[0]))
    np.testing.assert_array_equal(
        old["weight"], fused.contributions[fused.contributions["event_id"] == eid]["weight"]
    )
    assert [r.run_seq for r in store.runs("ML")] == [1, 2]
    assert store.magnitude_types() == ["ML"]


# -- final rows ---------------------------------------------------------------------------------


def test_final_rows_are_never_rewritten(
    tmp_path: Path, fused: FusedMagnitudes, fused_shifted: FusedMagnitudes
) -> None:
    """finalize freezes old events; a later run skips them, counts them and names them."""
    store = FusedStore(tmp_path)
    store.write_run(fused, model_version=V1, now=T0)
    t = fused.events["origin_time"]
    cutoff = t.iloc[20].to_pydatetime()
    n_final = store.finalize("ML", before=cutoff, now=T0 + timedelta(hours=1))
    old = fused.events[t < t.iloc[20]]
    assert n_final == len(old)
    assert store.finalize("ML", before=cutoff) == 0  # idempotent: nothing left to mark
    assert len(store.runs("ML")) == 2

    report = store.write_run(fused_shifted, model_version=V2, now=T0 + timedelta(days=1))
    assert report.skipped_final == len(old)
    assert set(report.skipped_final_ids) == set(old["event_id"])
    assert report.events_written == len(fused.events) - len(old)

    cur = store.current("ML").set_index("event_id")
    frozen = cur.loc[old["event_id"]]
    assert set(frozen["evaluation_status"]) == {"final"}
    assert set(frozen["model_version"]) == {V1}
    np.testing.assert_array_equal(frozen["magnitude"], old.set_index("event_id")["magnitude"])
    assert (frozen["fused_at"] == pd.Timestamp(T0)).all()  # the copy keeps when it was made
    assert (frozen["recorded_at"] == pd.Timestamp(T0 + timedelta(hours=1))).all()
    rest = cur.drop(index=old["event_id"])
    assert set(rest["evaluation_status"]) == {"preliminary"}
    assert set(rest["model_version"]) == {V2}
    # the final copy brought its contributions along
    eid = str(old["event_id"].iloc[0])
    np.testing.assert_array_equal(
        store.contributions("ML", eid)["weight"],
        fused.contributions[fused.contributions["event_id"] == eid]["weight"],
    )


def test_everything_final_commits_nothing(tmp_path: Path, fused: FusedMagnitudes) -> None:
    store = FusedStore(tmp_path)
    store.write_run(fused, model_version=V1, evaluation_status="final", now=T0)
    report = store.write_run(fused, model_version=V2, now=T0)
    assert report.run_id is None
    assert report.skipped_final == len(fused.events)
    assert len(store.runs("ML")) == 1


def test_finalize_by_event_ids_and_argument_checks(tmp_path: Path, fused: FusedMagnitudes) -> None:
    store = FusedStore(tmp_path)
    store.write_run(fused, model_version=V1, now=T0)
    ids = list(fused.events["event_id"].iloc[[3, 7]])
    assert store.finalize("ML", event_ids=[*ids, "unknown"]) == 2
    cur = store.current("ML").set_index("event_id")["evaluation_status"]
    assert set(cur[ids]) == {"final"} and (cur == "final").sum() == 2
    with pytest.raises(ConfigError, match="needs before= or event_ids="):
        store.finalize("ML")
    with pytest.raises(ConfigError, match="wrap one id in a list"):
        store.finalize("ML", event_ids=ids[0])


# -- input checks -------------------------------------------------------------------------------


def test_bad_inputs_raise_one_line_errors(tmp_path: Path, fused: FusedMagnitudes) -> None:
    store = FusedStore(tmp_path)
    with pytest.raises(ConfigError, match="preliminary, reviewed, final"):
        store.write_run(fused, model_version=V1, evaluation_status="confirmed")
    with pytest.raises(ConfigError, match="non-empty str"):
        store.write_run(fused, model_version=" ")
    with pytest.raises(ConfigError, match="at most 64"):
        store.write_run(fused, model_version="x" * 65)
    doubled = replace(fused, events=pd.concat([fused.events, fused.events.iloc[:1]]))
    with pytest.raises(SchemaError, match="appears in rows 0 and"):
        store.write_run(doubled, model_version=V1)
    missing = replace(fused, events=fused.events.drop(columns=["se"]))
    with pytest.raises(SchemaError, match="column 'se' is missing"):
        store.write_run(missing, model_version=V1)
    orphan = replace(fused, events=fused.events.iloc[1:])
    with pytest.raises(SchemaError, match="which the event table lacks"):
        store.write_run(orphan, model_version=V1)
    mixed = fused.events.copy()
    mixed.loc[mixed.index[0], "magnitude_type"] = "mb"
    with pytest.raises(SchemaError, match="one magnitude type per run"):
        store.write_run(replace(fused, events=mixed), model_version=V1)
    with pytest.raises(ConfigError, match="unknown magnitude type"):
        store.current("XX")
    assert not (tmp_path / "fused").exists()  # nothing was committed


def test_corrupt_files_raise_store_errors(tmp_path: Path, fused: FusedMagnitudes) -> None:
    store = FusedStore(tmp_path)
    store.write_run(fused, model_version=V1, now=T0)
    ev_file = next((tmp_path / "fused" / "ML").glob("*-events.parquet"))
    table = pq.read_table(ev_file).drop_columns(["se"])
    pq.write_table(table, ev_file)
    with pytest.raises(SchemaError, match="column 'se' is missing"):
        FusedStore(tmp_path).current("ML")
    (tmp_path / "fused" / "manifest.json").write_text("{not json")
    with pytest.raises(StoreCorruptError, match="unreadable fused-magnitude manifest"):
        FusedStore(tmp_path).current("ML")


# -- locking and crash safety -------------------------------------------------------------------


def test_writers_take_the_lock_readers_do_not(tmp_path: Path, fused: FusedMagnitudes) -> None:
    held: list[str] = []

    @contextmanager
    def lock() -> Iterator[None]:
        held.append("enter")
        yield
        held.append("exit")

    store = FusedStore(tmp_path, lock=lock)
    store.write_run(fused, model_version=V1, now=T0)
    store.current("ML")
    store.history("x")
    store.finalize("ML", before=T0)
    store.compact("ML")
    assert held == ["enter", "exit"] * 3


def test_shares_the_station_store_root_and_lock(tmp_path: Path, fused: FusedMagnitudes) -> None:
    """The station store reserves ``fused/``: it opens a root holding fused runs, and its
    write lock excludes a second writer (StoreBusyError after the timeout)."""
    from stations.errors import StoreBusyError
    from tests.stations.store.lock_holder import held_by_another_thread

    stations = StationMagnitudeStore.open(tmp_path / "s", lock_timeout_s=0.0)
    store = FusedStore(tmp_path / "s", lock=stations.write_lock)
    store.write_run(fused, model_version=V1, now=T0)
    assert StationMagnitudeStore.open(tmp_path / "s").summary().rows_current == 0
    other = StationMagnitudeStore(tmp_path / "s", lock_timeout_s=0.0)
    with held_by_another_thread(other), pytest.raises(StoreBusyError):
        store.finalize("ML", before=T0)


def test_crash_before_commit_leaves_no_run(
    tmp_path: Path,
    fused: FusedMagnitudes,
    fused_shifted: FusedMagnitudes,
    monkeypatch: pytest.MonkeyPatch,
) -> None:
    """Data files written, manifest not replaced: readers see the previous state, and the next
    writer deletes the orphaned files."""
    store = FusedStore(tmp_path)
    store.write_run(fused, model_version=V1, now=T0)
    before = store.current("ML")

    def crash(self: FusedStore, manifest: object) -> None:
        raise KeyboardInterrupt("simulated crash")

    monkeypatch.setattr(FusedStore, "_commit", crash)
    with pytest.raises(KeyboardInterrupt):
        store.write_run(fused_shifted, model_version=V2, now=T0)
    monkeypatch.undo()
    assert len(list((tmp_path / "fused" / "ML").glob("*.parquet"))) == 4
    pd.testing.assert_frame_equal(FusedStore(tmp_path).current("ML"), before)
    FusedStore(tmp_path).finalize("ML", event_ids=["nothing"])  # a writer that commits nothing
    assert len(list((tmp_path / "fused" / "ML").glob("*.parquet"))) == 2


_WRITE_LOOP = """
import sys, pickle
from fusion.versions.fused_store import FusedStore
fused = pickle.load(open(sys.argv[2], "rb"))
store = FusedStore(sys.argv[1])
print("ready", flush=True)
while True:
    store.write_run(fused, model_version="ML-loop")
"""


@pytest.mark.slow
def test_kill_during_write_runs_leaves_whole_runs(tmp_path: Path, fused: FusedMagnitudes) -> None:
    """SIGKILL at random moments of a tight write loop: every committed run is complete."""
    import pickle

    blob = tmp_path / "fused.pkl"
    blob.write_bytes(pickle.dumps(fused))
    rng = np.random.default_rng(11)
    for _ in range(3):
        proc = subprocess.Popen(
            [sys.executable, "-c", _WRITE_LOOP, str(tmp_path / "s"), str(blob)],
            stdout=subprocess.PIPE,
            cwd=Path(__file__).resolve().parents[3],
        )
        assert proc.stdout is not None
        assert proc.stdout.readline().strip() == b"ready"
        time.sleep(float(rng.uniform(0.1, 0.5)))
        os.kill(proc.pid, signal.SIGKILL)
        proc.wait()
        store = FusedStore(tmp_path / "s")
        runs = store.runs("ML")
        hist = store.history(str(fused.events["event_id"].iloc[0]))
        assert len(hist) == len(runs) > 0
        cur = store.current("ML")
        assert len(cur) == len(fused.events)
        assert (cur["run_seq"] == runs[-1].run_seq).all()
        assert len(store.current_contributions("ML", cur)) == len(fused.contributions)
    manifest = json.loads((tmp_path / "s" / "fused" / "manifest.json").read_text())
    assert manifest["next_seq"] == len(runs) + 1


# -- compaction ---------------------------------------------------------------------------------


def test_compaction_keeps_current_history_and_contributions(
    tmp_path: Path, fused: FusedMagnitudes, fused_shifted: FusedMagnitudes
) -> None:
    store = FusedStore(tmp_path)
    for k in range(6):
        store.write_run(
            fused if k % 2 == 0 else fused_shifted,
            model_version=f"ML-v{k}",
            now=T0 + timedelta(days=k),
        )
        if k == 2:
            store.finalize("ML", event_ids=list(fused.events["event_id"].iloc[:5]))
    eid = str(fused.events["event_id"].iloc[7])
    before = (store.current("ML"), store.history(eid), store.contributions("ML", eid))
    stale = FusedStore(tmp_path)._manifest()  # lists the run files, which compaction retires

    report = store.compact("ML")
    assert (report.segments_before, report.segments_after) == (7, 1)
    assert report.event_rows == 6 * len(fused.events) - 3 * 5 + 5  # 3 runs skip 5 finals
    after = (store.current("ML"), store.history(eid), store.contributions("ML", eid))
    for a, b in zip(before, after, strict=True):
        pd.testing.assert_frame_equal(a.reset_index(drop=True), b.reset_index(drop=True))
    assert store.compact("ML").segments_after == 1  # nothing left to merge

    store.write_run(fused, model_version="ML-v6", now=T0 + timedelta(days=9))
    names = {p.name for p in (tmp_path / "fused" / "ML").glob("*.parquet")}
    assert len(names) == 4  # retired run files deleted at this commit
    # A reader that read the manifest just before that commit finds its files gone, re-reads
    # the manifest and returns the new state (simulated by planting the stale manifest).
    st = (tmp_path / "fused" / "manifest.json").stat()
    gone = stale.state("ML").segments[0].events
    assert not (tmp_path / gone).exists()
    reader = FusedStore(tmp_path)
    reader._cached = ((st.st_ino, st.st_size, st.st_mtime_ns), stale)
    assert "ML-v6" in set(reader.current("ML")["model_version"])
    assert store.compact("ML", full=True).segments_after == 1


def test_writers_compact_on_their_own(tmp_path: Path, fused: FusedMagnitudes) -> None:
    """compact_after=3: every third run is merged in the writer's lock hold; once 8 compacted
    pairs would exist the merge is full. The current view never changes."""
    store = FusedStore(tmp_path, compact_after=3)
    reference = FusedStore(tmp_path / "ref", compact_after=None)
    reports = []
    for k in range(24):
        now = T0 + timedelta(days=k)
        reports.append(store.write_run(fused, model_version=f"ML-v{k}", now=now))
        reference.write_run(fused, model_version=f"ML-v{k}", now=now)
    assert [r.compacted for r in reports[:3]] == [False, False, True]
    assert reports[2].segments == 1
    assert reports[20].segments == 7  # seven merges of three runs each
    assert reports[23].segments == 1  # the eighth merge is full
    assert max(r.segments for r in reports) <= 2 + 7  # runs below the limit + compacted pairs
    assert reference.segments("ML") == 24
    pd.testing.assert_frame_equal(
        store.current("ML").drop(columns="run_id"), reference.current("ML").drop(columns="run_id")
    )
    assert len(store.history(str(fused.events["event_id"].iloc[0]))) == 24
    with pytest.raises(ConfigError, match="'compact_after' parameter"):
        FusedStore(tmp_path, compact_after=1)


def test_docstring_examples() -> None:
    import doctest

    import fusion.versions.fused_store

    result = doctest.testmod(fusion.versions.fused_store)
    assert result.failed == 0 and result.attempted > 0
