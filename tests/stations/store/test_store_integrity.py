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


def _bigger_store(tmp_path: Path) -> StationMagnitudeStore:
    import numpy as np

    rng = np.random.default_rng(7)
    n = 3000
    ev = [f"e{i // 10:05d}" for i in range(n)]
    sta = [f"XX.S{i % 10:03d}." for i in range(n)]
    st = StationMagnitudeStore.open(tmp_path / "store")
    st.ingest(records(ev, sta, rng.normal(2.0, 0.5, n).round(3)), source_file="big.csv")
    return st


def test_flipped_bytes_in_a_stored_file_are_refused_naming_the_file(tmp_path: Path) -> None:
    """24 spots spread over a data file, 200 bytes overwritten at each: a scan never returns
    changed values, it fails naming the file."""
    import numpy as np

    st = _bigger_store(tmp_path)
    entry = st.manifest().files[0]
    path = st.root / entry.path
    good = path.read_bytes()
    expected = st.scan()
    for pos in np.linspace(4, len(good) - 210, 24).astype(int):
        bad = bytearray(good)
        bad[pos : pos + 200] = bytes(np.random.default_rng(int(pos)).integers(0, 256, 200))
        path.write_bytes(bytes(bad))
        with pytest.raises(StoreCorruptError, match=rf"^{path}: damaged .*magfuse verify"):
            StationMagnitudeStore.open(st.root).scan()
    path.write_bytes(good)
    assert StationMagnitudeStore.open(st.root).scan().equals(expected)


def test_event_look_up_in_a_damaged_page_fails_instead_of_returning_other_values(
    tmp_path: Path,
) -> None:
    """An event look-up reads only some row groups (no whole-file digest); the page
    checksums written with every store file catch the damage."""
    st = _bigger_store(tmp_path)
    path = st.root / st.manifest().files[0].path
    good = path.read_bytes()
    mid = len(good) // 3
    bad = bytearray(good)
    bad[mid : mid + 200] = bytes(200)
    path.write_bytes(bytes(bad))
    with pytest.raises(StoreCorruptError, match=rf"^{path}: damaged"):
        StationMagnitudeStore.open(st.root).event("e00010")
