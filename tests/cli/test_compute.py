"""``ingest --compute`` and ``compute``: station magnitudes from amplitudes, end to end."""

from __future__ import annotations

from pathlib import Path

import pytest
from typer.testing import CliRunner

from fusion.cli.app import app
from stations.store import StationMagnitudeStore

HEADER = (
    "event_id,origin_time,network,station,location,channel,magnitude_type,magnitude,"
    "amplitude,amplitude_unit,hypocentral_distance_km\n"
)


def _csv(tmp_path: Path) -> Path:
    """Three Wood-Anderson readings without magnitudes (amplitudes in mm on a WA record)."""
    path = tmp_path / "amps.csv"
    path.write_text(
        HEADER
        + "e1,2025-03-01T00:00:00Z,ZZ,AAA,,HHE,ML,,1.0,mm_wa,100\n"
        + "e1,2025-03-01T00:00:00Z,ZZ,BBB,,HHN,ML,,1.0,mm_wa,10\n"
        + "e2,2025-03-02T00:00:00Z,ZZ,AAA,,HHE,ML,,10.0,mm_wa,300\n"
    )
    return path


def test_amplitudes_without_compute_are_quarantined(tmp_path: Path) -> None:
    store = tmp_path / "store"
    result = CliRunner().invoke(app, ["ingest", str(_csv(tmp_path)), "--store", str(store)])
    assert result.exit_code == 0, result.output
    assert "0 accepted (0 revised), 0 duplicate, 3 quarantined" in result.stdout
    reasons = StationMagnitudeStore.open(store).quarantine()["reason"]
    assert reasons.str.contains("ingest with --compute").all()


def test_compute_then_recompute_with_another_distance_correction(tmp_path: Path) -> None:
    store = tmp_path / "store"
    path = _csv(tmp_path)
    runner = CliRunner()
    result = runner.invoke(app, ["ingest", str(path), "--compute", "--store", str(store)])
    assert result.exit_code == 0, result.output
    assert "3 accepted" in result.stdout and "3 magnitudes computed" in result.stdout
    rows = (
        StationMagnitudeStore.open(store)
        .scan(magnitude_type="ML")
        .sort_values(["event_id", "station_id"])
    )
    # docs/check-values.md §4 table, IASPEI column (A_nm = A_mm 1e6/2080): 1 mm at 100 km -> 3.0009,
    # 1 mm at 10 km -> 1.7208, 10 mm at 300 km -> 4.9085 (computed from the IASPEI formula).
    assert rows["magnitude"].tolist() == pytest.approx([3.0009, 1.7208, 4.9085], abs=1e-4)
    assert set(rows["formula"]) == {"ML IASPEI-2013 HB87"}

    # The same file with --compute again adds nothing.
    again = runner.invoke(app, ["ingest", str(path), "--compute", "--store", str(store)])
    assert "same content as batch" in again.stdout

    cfg = tmp_path / "bj84.toml"
    cfg.write_text('[compute]\nml_distance_correction = "BJ84"\n')
    result = runner.invoke(
        app, ["compute", "--type", "ML", "--store", str(store), "--config", str(cfg)]
    )
    assert result.exit_code == 0, result.output
    assert "3 changed (new revision)" in result.stdout
    st = StationMagnitudeStore.open(store)
    now = st.scan(magnitude_type="ML").sort_values(["event_id", "station_id"])
    # docs/check-values.md §4, obspy estimate_magnitude = Bakun & Joyner (1984) eq. 3: 3.0000,
    # 1.7291, 5.0791 for the same amplitudes and distances (verified, run with obspy 1.5.1).
    assert now["magnitude"].tolist() == pytest.approx([3.0000, 1.7291, 5.0791], abs=1e-4)
    assert (now["revision"] == 2).all()
    every = st.scan(magnitude_type="ML", all_revisions=True)
    assert len(every) == 6 and sorted(every["revision"].unique()) == [1, 2]


def test_compute_with_unknown_table_is_a_one_line_error(tmp_path: Path) -> None:
    cfg = tmp_path / "bad.toml"
    cfg.write_text('[compute]\nml_distance_correction = "XYZ"\n')
    result = CliRunner().invoke(
        app,
        [
            "ingest",
            str(_csv(tmp_path)),
            "--compute",
            "--config",
            str(cfg),
            "--store",
            str(tmp_path / "s"),
        ],
    )
    assert result.exit_code == 1
    assert result.stderr.startswith("Error: ML distance correction 'XYZ' is neither one of")


def test_recompute_that_changes_nothing_beyond_stored_precision_writes_nothing(
    tmp_path: Path,
) -> None:
    """The demo CSV gives ML to 3 decimals, computed with HB87 from the amplitudes it also
    gives; recomputing with HB87 changes them by less than 0.0005 and must write nothing."""
    from tests.cli.conftest import demo_slice

    csv = demo_slice(tmp_path / "jan.csv", end="2025-01-10")
    store = tmp_path / "store"
    runner = CliRunner()
    assert runner.invoke(app, ["ingest", str(csv), "--store", str(store)]).exit_code == 0
    before = StationMagnitudeStore.open(store).summary()
    stations = Path(__file__).parents[2] / "sample_events" / "stations.csv"
    result = runner.invoke(
        app, ["compute", "--type", "ML", "--store", str(store), "--stations", str(stations)]
    )
    assert result.exit_code == 0, result.output
    assert "0 changed (new revision)" in result.stdout
    assert "nothing written" in result.stdout
    after = StationMagnitudeStore.open(store).summary()
    assert (after.batches, after.rows_all) == (before.batches, before.rows_all)
