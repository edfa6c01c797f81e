"""User tables: -log A0 curves for ML and Q(Δ, h) grids; the shipped Q files."""

from __future__ import annotations

from pathlib import Path

import numpy as np
import pytest

from stations.errors import MalformedFileError
from stations.formulas import (
    GR56_Q,
    HB87_MM,
    DistanceCorrection,
    QTable,
    evaluate_ml,
    ml,
    read_distance_correction_csv,
)

TABLES = Path(__file__).resolve().parents[3] / "stations" / "formulas" / "tables"


def _write(tmp_path: Path, name: str, text: str) -> Path:
    path = tmp_path / name
    path.write_text(text, encoding="utf-8")
    return path


def test_user_table_sampled_from_hb87_reproduces_it_at_the_nodes(tmp_path: Path) -> None:
    """A table written from Hutton & Boore's -log A0 gives HB87's ML at its rows, exactly."""
    r = np.array([10.0, 50.0, 100.0, 300.0, 700.0])
    rows = "\n".join(f"{d:g},{v:.12f}" for d, v in zip(r, HB87_MM.minus_log_a0(r), strict=True))
    path = _write(tmp_path, "socal.csv", f"# HB87 sampled\ndistance_km,minus_log_a0\n{rows}\n")
    table = read_distance_correction_csv(path)
    assert table.name == "table:socal"
    np.testing.assert_allclose(
        ml(1.0, r, unit="mm_wa", correction=table),
        ml(1.0, r, unit="mm_wa", correction=HB87_MM),
        atol=1e-11,
    )
    # 1 mm at 100 km -> -log A0(100) = 3.0: Richter's anchor survives the table round trip
    assert float(ml(1.0, 100.0, unit="mm_wa", correction=table)) == pytest.approx(3.0, abs=1e-11)


def test_user_table_interpolates_linearly_and_never_extrapolates(tmp_path: Path) -> None:
    path = _write(tmp_path, "t.csv", "distance_km,minus_log_a0\n10,2.0\n30,3.0\n")
    table = read_distance_correction_csv(path, name="mine")
    assert float(table.minus_log_a0(20.0)) == pytest.approx(2.5, abs=1e-12)
    ev = evaluate_ml([1000.0, 1000.0], [20.0, 40.0], correction=table)
    assert ev.formula == "ML IASPEI-2013 mine"
    assert bool(ev.computable[0]) and not bool(ev.computable[1])
    assert "hypocentral distance 40 km is above 30 km" in ev.reason[1]


@pytest.mark.parametrize(
    ("text", "message"),
    [
        (
            "dist,minus_log_a0\n10,2\n20,3\n",
            "line 1: the header must be 'distance_km,minus_log_a0'",
        ),
        ("distance_km,minus_log_a0\n10,2\n20,x\n", "line 3: expected two numbers"),
        ("distance_km,minus_log_a0\n10,2\n5,3\n", "line 3: distance 5 km must be finite, > 0"),
        ("distance_km,minus_log_a0\n10,2\n", "the table needs at least two rows"),
        ("# only a comment\n", "line 1: the header must be"),
    ],
    ids=["renamed-header", "not-a-number", "unsorted", "one-row", "empty"],
)
def test_malformed_distance_table(tmp_path: Path, text: str, message: str) -> None:
    """Each faulty table names the file, the line and the fix."""
    path = _write(tmp_path, "bad.csv", text)
    with pytest.raises(MalformedFileError, match=message) as info:
        read_distance_correction_csv(path)
    assert str(path) in str(info.value)


def test_distance_correction_from_table_validates() -> None:
    with pytest.raises(ValueError, match="one word"):
        DistanceCorrection.from_table("two words", [1, 2], [1, 2], reference="x")
    with pytest.raises(ValueError, match="strictly increasing"):
        DistanceCorrection.from_table("t", [2, 1], [1, 2], reference="x")


def test_shipped_q_files_carry_source_and_status() -> None:
    """Header comment blocks name G&R (1956), the transcription page and the status."""
    for name in ("gr56_pz_q.csv", "gr56_pz_chart_q.csv"):
        text = (TABLES / name).read_text(encoding="utf-8")
        assert 'Gutenberg & C. F. Richter (1956), "Magnitude and energy of earthquakes"' in text
        assert "Annali di Geofisica 9(1), 1-15" in text
        assert "Lahr" in text and "Status: verified" in text
        assert "approximation" in text  # depth interpolation between two rows (brief)


def test_q_bilinear_midpoints() -> None:
    """Bilinear: at the centre of a cell, Q is the mean of its four corners."""
    q00, q01 = 6.7, 6.8  # shallow table at 50 and 60 deg
    q10, q11 = 6.2, 6.2  # chart at 500 km
    assert float(GR56_Q(55.0, 250.0)) == pytest.approx((q00 + q01 + q10 + q11) / 4, abs=1e-12)
    assert float(GR56_Q(55.0, 0.0)) == pytest.approx((q00 + q01) / 2, abs=1e-12)
    assert np.isnan(GR56_Q(55.0, 501.0)) and np.isnan(GR56_Q(15.0, 0.0))


def test_user_q_grid_round_trip(tmp_path: Path) -> None:
    lines = ["depth_km,distance_deg,q"]
    lines += [f"{h},{d},{GR56_Q(d, h):.3f}" for h in (0, 500) for d in GR56_Q.distance_deg]
    path = _write(tmp_path, "q.csv", "# copy of GR56-Q\n" + "\n".join(lines) + "\n")
    table = QTable.read_csv(path, name="copy")
    np.testing.assert_allclose(table.q, GR56_Q.q, atol=1e-12)
    np.testing.assert_allclose(table.distance_deg, GR56_Q.distance_deg)


@pytest.mark.parametrize(
    ("text", "message"),
    [
        ("depth,distance_deg,q\n", "the header must be 'depth_km,distance_deg,q'"),
        ("depth_km,distance_deg,q\n0,20,6\n0,30,6\n500,20,6\n", "must form a full grid"),
        ("depth_km,distance_deg,q\n0,20,6\n0,20,6.1\n500,20,6\n500,20,6\n", "exactly once"),
        ("depth_km,distance_deg,q\n0,20,six\n", "line 2: expected three numbers"),
    ],
    ids=["renamed-header", "hole", "duplicate", "not-a-number"],
)
def test_malformed_q_grid(tmp_path: Path, text: str, message: str) -> None:
    path = _write(tmp_path, "q.csv", text)
    with pytest.raises(MalformedFileError, match=message):
        QTable.read_csv(path, name="bad")
