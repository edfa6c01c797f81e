"""What the store keeps and refuses: links out of the store, checksums, damaged files."""

from __future__ import annotations

from pathlib import Path

import pytest

from stations.errors import StoreCorruptError
from stations.store import StationMagnitudeStore
from stations.store.commit import sweep
from tests.stations.store.store_frames import records


def _store(tmp_path: Path) -> StationMagnitudeStore:
    st = StationMagnitudeStore.open(tmp_path / "store")
    st.ingest(records(["e1", "e2"], ["XX.AAA.", "XX.BBB."], [2.0, 2.5]), source_file="a.csv")
    return st


def test_sweep_never_deletes_through_a_link_out_of_the_store(tmp_path: Path) -> None:
    st = _store(tmp_path)
    outside = tmp_path / "outside"
    outside.mkdir()
    (outside / "leftover.parquet").write_bytes(b"someone else's")
    assert not (st.root / "quarantine").exists()  # no row was quarantined
    (st.root / "quarantine").symlink_to(outside, target_is_directory=True)
    sweep(st.root, st.manifest())
    assert (outside / "leftover.parquet").read_bytes() == b"someone else's"
    with pytest.raises(StoreCorruptError, match=r"symbolic link to .*outside the store"):
        StationMagnitudeStore.open(st.root)


def test_link_inside_the_store_is_allowed(tmp_path: Path) -> None:
    st = _store(tmp_path)
    (st.root / "data" / "alias").symlink_to(st.root / "data" / "ML", target_is_directory=True)
    assert StationMagnitudeStore.open(st.root).summary().rows_current == 2
