"""Re-ingesting the same readings from a poorer format is not a revision (issue 10, case 5)."""

from __future__ import annotations

from pathlib import Path

import numpy as np
import pandas as pd

import sample_events
from fusion.versions.fused_store import FusedStore
from stations.store import StationMagnitudeStore
from tests.cli.conftest import demo_slice, invoke, version_of, write_config

_DECEMBER_XML = Path(sample_events.__file__).parent / "demo_network_2025_december.xml"


def _december_store(tmp_path: Path) -> tuple[Path, pd.DataFrame]:
    csv = demo_slice(tmp_path / "december.csv", "2025-12-01", "2026-01-01")
    store = tmp_path / "store"
    res = invoke("ingest", csv, "--store", store)
    assert res.exit_code == 0, res.output
    before = StationMagnitudeStore.open(store).scan(magnitude_type="ML")
    return store, before


def _ingest_xml(store: Path, xml: Path) -> None:
    res = invoke("ingest", xml, "--store", store)
    assert res.exit_code == 0, res.output


def _fused(store: Path, config: Path) -> pd.Series:
    res = invoke("fuse", "--store", store, "--config", config)
    assert res.exit_code == 0, res.output
    cur = FusedStore(store).current("ML")
    return cur.set_index("event_id")["magnitude"].sort_index()


def test_same_readings_from_quakeml_after_csv_are_not_revisions(tmp_path: Path) -> None:
    store, before = _december_store(tmp_path)
    config = write_config(tmp_path / "fast.toml")
    learned = invoke("learn", "--store", store, "--config", config)
    assert learned.exit_code == 0, learned.output
    adopt = invoke("adopt", version_of(learned), "--store", store, "--config", config)
    assert adopt.exit_code == 0, adopt.output
    fused_before = _fused(store, config)
    _ingest_xml(store, _DECEMBER_XML)
    pd.testing.assert_series_equal(_fused(store, config), fused_before)
    s = StationMagnitudeStore.open(store)
    after = s.scan(magnitude_type="ML")
    assert len(after) == len(before)
    assert (after["revision"] == 1).all()
    assert set(after["event_id"]) == set(before["event_id"])
    # the CSV's thresholds, distances and azimuths are still the stored values
    for col in ("noise_threshold", "distance_km", "azimuth"):
        assert after[col].notna().sum() == before[col].notna().sum()
    # the restating batch is recorded with its counts
    last = s.manifest().batches[-1]
    assert last.source_file.endswith("demo_network_2025_december.xml")


def test_a_changed_magnitude_in_quakeml_is_still_a_revision(tmp_path: Path) -> None:
    store, _ = _december_store(tmp_path)
    text = _DECEMBER_XML.read_text(encoding="utf-8")
    head, sep, tail = text.partition("<stationMagnitude ")
    mag_at = tail.index("<mag>")
    val_at = tail.index("<value>", mag_at) + len("<value>")
    end = tail.index("</value>", val_at)
    new_value = float(tail[val_at:end]) + 0.3  # far beyond the stored three decimals
    changed = head + sep + tail[:val_at] + f"{new_value:.3f}" + tail[end:]
    xml = tmp_path / "changed.xml"
    xml.write_text(changed, encoding="utf-8")
    _ingest_xml(store, xml)
    after = StationMagnitudeStore.open(store).scan(magnitude_type="ML")
    revised = after[after["revision"] == 2]
    assert len(revised) == 1
    assert np.isclose(revised["magnitude"].iloc[0], new_value)


def test_a_value_only_the_restatement_carries_is_not_merged(tmp_path: Path) -> None:
    # documented rule (stations/store/batch.py): the stored reading stays as it was
    store, before = _december_store(tmp_path)
    assert before["source_weight"].isna().all()
    _ingest_xml(store, _DECEMBER_XML)
    after = StationMagnitudeStore.open(store).scan(magnitude_type="ML")
    assert after["source_weight"].isna().all()
    assert (after["revision"] == 1).all()
