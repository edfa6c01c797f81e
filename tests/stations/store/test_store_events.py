"""``StationMagnitudeStore.events``: the indexed look-up of several events at once."""

from __future__ import annotations

from pathlib import Path

import numpy as np
import pandas as pd

from stations.store import StationMagnitudeStore
from tests.stations.store.store_frames import random_records


def test_events_equals_the_single_event_lookups_and_ignores_unknown_ids(tmp_path: Path) -> None:
    rng = np.random.default_rng(3)
    store = StationMagnitudeStore.open(tmp_path / "s")
    frame = random_records(rng, 60, types=("ML", "mb"))
    store.ingest(frame.iloc[: len(frame) // 2], source_file="a.csv")
    store.ingest(frame.iloc[len(frame) // 2 :], source_file="b.csv")
    # a new revision of one event's first row: only the current value may come back
    first = frame.iloc[[0]].copy()
    first["magnitude"] = first["magnitude"] + 0.7
    store.ingest(first, source_file="c.csv")
    ml = frame[frame["magnitude_type"] == "ML"]
    wanted = sorted(set(ml["event_id"].iloc[[0, 5, -1]]) | {str(frame["event_id"].iloc[0])})
    got = store.events([*wanted, "not-there"], magnitude_type="ML")
    single = pd.concat([store.event(e, magnitude_type="ML") for e in wanted], ignore_index=True)
    key = ["event_id", "station_id", "channel"]
    pd.testing.assert_frame_equal(
        got.sort_values(key).reset_index(drop=True),
        single.sort_values(key).reset_index(drop=True),
    )
    assert (
        len(got) > 0
        and set(got["event_id"]) <= set(wanted)
        and (got["magnitude_type"] == "ML").all()
    )
    assert not got.duplicated(["event_id", "station_id", "channel", "magnitude_type"]).any()
