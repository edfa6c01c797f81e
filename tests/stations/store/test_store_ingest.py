"""Ingest rules of the store: duplicates, revisions, in-batch conflicts, quarantine, schema."""

from __future__ import annotations

from pathlib import Path

import numpy as np
import pandas as pd
import pytest
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

from stations.errors import SchemaError
from stations.schema import RECORD_KEY, RECORD_SCHEMA
from stations.store import CONFLICT_REASON, StationMagnitudeStore, file_digest
from tests.stations.store.store_frames import random_records, records, rejected


@pytest.fixture
def store(tmp_path: Path) -> StationMagnitudeStore:
    return StationMagnitudeStore.open(tmp_path / "store")


def _conserved(report, n_records: int, n_rejected: int = 0) -> None:
    assert report.accepted + report.duplicate + report.quarantined == n_records + n_rejected


def test_same_content_twice_adds_nothing(store: StationMagnitudeStore) -> None:
    frame = random_records(np.random.default_rng(1), 60)
    first = store.ingest(frame, None, source_file="a.csv")
    assert (first.accepted, first.duplicate, first.revised) == (len(frame), 0, 0)
    second = store.ingest(frame, None, source_file="a.csv")
    assert (second.accepted, second.duplicate, second.revised) == (0, len(frame), 0)
    _conserved(second, len(frame))
    assert len(store.scan()) == len(frame)
    assert len(store.scan(all_revisions=True)) == len(frame)
    assert store.summary().batches == 2


def test_content_hash_skips_a_file_already_ingested(
    store: StationMagnitudeStore, tmp_path: Path
) -> None:
    src = tmp_path / "a.csv"
    src.write_text("any bytes\n")
    digest = file_digest(src)
    assert digest.startswith("sha256:") and len(digest) == 7 + 64
    frame = records(["e1", "e1"], ["XX.A.", "XX.B."], [2.0, 2.1])
    first = store.ingest(frame, None, source_file=str(src), content_hash=digest)
    again = store.ingest(frame, None, source_file=str(src), content_hash=digest)
    assert again.batch_id is None and again.same_content_as == first.batch_id
    assert again.duplicate == 2 and again.accepted == 0
    assert store.batch_with_content(digest) == first.batch_id
    assert store.summary().batches == 1


def test_changed_value_is_a_new_revision(store: StationMagnitudeStore) -> None:
    base = records(["e1", "e1", "e2"], ["XX.A.", "XX.B.", "XX.A."], [2.0, 2.1, 3.0])
    store.ingest(base, None, source_file="a.csv")
    changed = base.copy()
    changed.loc[1, "magnitude"] = 2.4
    rep = store.ingest(changed, None, source_file="b.csv")
    assert (rep.accepted, rep.revised, rep.duplicate) == (1, 1, 2)

    current = store.event("e1")
    assert list(current["station_id"]) == ["XX.A.", "XX.B."]
    assert list(current["magnitude"]) == [2.0, 2.4]
    assert list(current["revision"]) == [1, 2]

    every = store.event("e1", all_revisions=True)
    b_rows = every[every["station_id"] == "XX.B."]
    assert list(b_rows["magnitude"]) == [2.1, 2.4]
    assert list(b_rows["revision"]) == [1, 2]
    assert list(b_rows["source_file"]) == ["test.csv", "test.csv"]
    assert b_rows["batch_id"].nunique() == 2

    # Back to the first value: it differs from the current one, so it is revision 3.
    rep3 = store.ingest(base, None, source_file="c.csv")
    assert (rep3.accepted, rep3.revised) == (1, 1)
    assert store.event("e1").set_index("station_id").loc["XX.B.", "magnitude"] == 2.1
    assert store.event("e1").set_index("station_id").loc["XX.B.", "revision"] == 3
    scan = store.scan()
    assert len(scan) == 3 and len(store.scan(all_revisions=True)) == 5
    summary = store.summary()
    assert (summary.rows_current, summary.rows_all, summary.revised) == (3, 5, 2)


def test_nan_equals_nan_and_null_channel_is_a_key_value(store: StationMagnitudeStore) -> None:
    frame = records(
        ["e1", "e1", "e1"],
        ["XX.A.", "XX.A.", "XX.B."],
        [np.nan, 2.0, np.nan],
        channel=[None, "HHZ", None],
        noise_threshold=[1.2, np.nan, np.nan],
    )
    assert store.ingest(frame, None, source_file="a").accepted == 3
    again = store.ingest(frame, None, source_file="a")
    assert (again.accepted, again.duplicate) == (0, 3)
    # A value that appears where NaN was is a change.
    changed = frame.copy()
    changed.loc[2, "noise_threshold"] = 1.4
    rep = store.ingest(changed, None, source_file="b")
    assert (rep.accepted, rep.revised, rep.duplicate) == (1, 1, 2)
    row = store.event("e1").query("station_id == 'XX.B.'")
    assert row["noise_threshold"].item() == 1.4 and pd.isna(row["channel"].item())


def test_conflicting_rows_in_one_batch_are_both_quarantined(
    store: StationMagnitudeStore,
) -> None:
    frame = records(
        ["e1", "e1", "e1", "e2", "e2", "e3"],
        ["XX.A.", "XX.A.", "XX.B.", "XX.A.", "XX.A.", "XX.A."],
        [2.0, 2.3, 2.1, 3.0, 3.0, 1.0],
    )
    bad = rejected(["line 9"], ["magnitude 12.0 is above 10.0; check the amplitude unit"])
    rep = store.ingest(frame, bad, source_file="test.csv")
    # e1/XX.A. twice with different values: both quarantined; e2/XX.A. twice identical: one
    # kept, one duplicate; the reader's rejected row is quarantined too.
    assert (rep.accepted, rep.duplicate, rep.quarantined, rep.revised) == (3, 1, 3, 0)
    _conserved(rep, len(frame), len(bad))
    q = store.quarantine()
    assert list(q.columns) == [
        "source_file",
        "source_location",
        "reason",
        "raw",
        "batch_id",
        "ingest_time",
    ]
    conflict = q[q["reason"] == CONFLICT_REASON]
    assert sorted(conflict["source_location"]) == ["line 2", "line 3"]
    assert set(q["batch_id"]) == {rep.batch_id}
    assert q.loc[q["source_location"] == "line 9", "reason"].item().startswith("magnitude 12.0")
    assert '"magnitude":2.3' in conflict.loc[conflict["source_location"] == "line 3", "raw"].item()
    assert set(store.scan()["event_id"] + "/" + store.scan()["station_id"]) == {
        "e1/XX.B.",
        "e2/XX.A.",
        "e3/XX.A.",
    }
    assert store.summary().quarantined == 3


def test_rows_the_store_cannot_keep_are_quarantined(store: StationMagnitudeStore) -> None:
    frame = records(["e1", "e2", "e3"], ["XX.A.", "XX.A.", "XX.A."], [2.0, 2.0, 2.0])
    frame["magnitude_type"] = pd.array(["ML", "MB", "ML"], dtype="str")
    frame.loc[2, "event_id"] = None
    rep = store.ingest(frame, None, source_file="test.csv")
    assert (rep.accepted, rep.quarantined) == (1, 2)
    reasons = dict(
        zip(store.quarantine()["source_location"], store.quarantine()["reason"], strict=True)
    )
    assert reasons["line 3"].startswith("magnitude type 'MB' is unknown; use one of ML, mb")
    assert reasons["line 4"] == "event_id is missing; fill it in the source row"


def test_missing_column_is_a_schema_error(store: StationMagnitudeStore) -> None:
    frame = records(["e1"], ["XX.A."], [2.0]).drop(columns=["clipped"])
    with pytest.raises(SchemaError) as err:
        store.ingest(frame, None, source_file="x.csv")
    assert str(err.value) == (
        "x.csv: records lack column 'clipped'; a reader must supply every column of "
        "stations.schema.INPUT_COLUMNS"
    )


def test_naive_times_and_text_numbers_are_schema_errors(store: StationMagnitudeStore) -> None:
    frame = records(["e1"], ["XX.A."], [2.0])
    naive = frame.assign(origin_time=frame["origin_time"].dt.tz_localize(None))
    with pytest.raises(SchemaError, match=r"^x.csv: column 'origin_time' has dtype"):
        store.ingest(naive, None, source_file="x.csv")
    text = frame.assign(magnitude=pd.array(["2.0"], dtype="str"))
    with pytest.raises(SchemaError, match=r"^x.csv: column 'magnitude' holds text"):
        store.ingest(text, None, source_file="x.csv")
    assert store.summary().batches == 0


def test_stored_types_follow_the_record_schema(store: StationMagnitudeStore) -> None:
    frame = records(["e1"], ["XX.A."], [2.0])
    frame["origin_time"] = pd.Series(
        pd.to_datetime(["2024-03-01T02:00:00+02:00"], utc=False)
    ).dt.tz_convert("Europe/Helsinki")
    rep = store.ingest(frame, None, source_file="x.csv")
    out = store.scan()
    assert out["origin_time"].item() == pd.Timestamp("2024-03-01T00:00:00Z")
    assert str(out["origin_time"].dtype) == "datetime64[us, UTC]"
    assert out["batch_id"].item() == rep.batch_id
    assert out["revision"].dtype == np.int32
    assert list(out.columns) == RECORD_SCHEMA.names


def _reference(batches: list[pd.DataFrame]) -> dict[tuple, tuple[float, int]]:
    """Plain-Python model of the rules: key -> (current magnitude, revision)."""
    state: dict[tuple, tuple[float, int]] = {}
    for frame in batches:
        seen: dict[tuple, set] = {}
        for row in frame.itertuples(index=False):
            key = tuple(getattr(row, k) for k in RECORD_KEY)
            seen.setdefault(key, set()).add(row.magnitude)
        for key, values in seen.items():
            if len(values) > 1:
                continue  # conflicting in the batch: quarantined
            (value,) = values
            if key not in state:
                state[key] = (value, 1)
            elif state[key][0] != value:
                state[key] = (value, state[key][1] + 1)
    return state


@settings(
    max_examples=25,
    deadline=None,
    suppress_health_check=[HealthCheck.function_scoped_fixture],
)
@given(
    st.lists(
        st.lists(
            st.tuples(st.integers(0, 3), st.integers(0, 2), st.sampled_from([1.0, 2.0, 3.0])),
            min_size=0,
            max_size=12,
        ),
        min_size=1,
        max_size=4,
    )
)
def test_rules_match_a_plain_reference_model(tmp_path_factory, batches) -> None:
    """Random batches over a few keys: the current view equals a dict-based model of the rules."""
    store = StationMagnitudeStore.open(tmp_path_factory.mktemp("h") / "store")
    frames = []
    for rows in batches:
        ev = [f"e{r[0]}" for r in rows]
        sta = [f"XX.S{r[1]}." for r in rows]
        origin = pd.Timestamp("2024-01-01", tz="UTC") + pd.to_timedelta(
            [r[0] for r in rows], unit="h"
        )
        frame = records(ev, sta, [r[2] for r in rows], origin_time=origin)
        rep = store.ingest(frame, None, source_file="h.csv")
        _conserved(rep, len(frame))
        frames.append(frame)
    expected = _reference(frames)
    got = store.scan()
    got_map = {
        (r.event_id, r.station_id, r.channel, r.magnitude_type): (r.magnitude, r.revision)
        for r in got.itertuples(index=False)
    }
    assert got_map == expected
    assert len(store.scan(all_revisions=True)) == sum(rev for _, rev in expected.values())
