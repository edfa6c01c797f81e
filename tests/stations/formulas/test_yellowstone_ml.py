"""ML from the real Yellowstone amplitude table against the network's own station ML.

Data: tests/data/yellowstone-uuss/station_ml_geobalanced.csv (Holt, Pechmann & Koper 2022,
BSSA 112(2), 905-920; MIT licence), read in place, never copied; the test skips when absent.
Provenance and the measured bounds are in tests/reference/formulas.py.
"""

from __future__ import annotations

import numpy as np
import pandas as pd
import pytest

from stations.formulas import ComputeOptions, compute_station_magnitudes, ml
from stations.metadata import StationMetadata
from stations.schema import INPUT_COLUMNS
from tests.datasets import YELLOWSTONE_CSV
from tests.reference import formulas as ref

DATA = YELLOWSTONE_CSV


@pytest.fixture(scope="module")
def table() -> pd.DataFrame:
    return pd.read_csv(DATA)


def _robust(diff: np.ndarray) -> tuple[float, float]:
    median = float(np.median(diff))
    return median, float(1.4826 * np.median(np.abs(diff - median)))


def test_table_is_the_one_described(table: pd.DataFrame) -> None:
    """README counts; halfAmpH = (AmpE + AmpN)/4 (Holt's cleanamps.py) on every row."""
    assert len(table) == ref.YELLOWSTONE_ROWS
    assert table["Evid"].nunique() == ref.YELLOWSTONE_EVENTS
    assert table.groupby(["Net", "Sta"]).ngroups == ref.YELLOWSTONE_STATIONS
    np.testing.assert_allclose(table["halfAmpH"], (table["AmpE"] + table["AmpN"]) / 4, rtol=1e-12)
    assert set(table["UnE"]) == {"mm"} and set(table["UnN"]) == {"mm"}


def test_iaspei_ml_against_network_station_ml(table: pd.DataFrame) -> None:
    """IASPEI/HB87 ML from halfAmpH (mm on Wood-Anderson) and Rhyp vs SML - Corr.

    The network's own distance curve differs from Hutton & Boore's: the check bounds the shift
    (median) and the scatter (1.4826 MAD) around the values measured on this file.
    """
    rows = table.loc[table["Corr"].notna()]
    ours = ml(rows["halfAmpH"].to_numpy(), rows["Rhyp"].to_numpy(), unit="mm_wa")
    network = (rows["SML"] - rows["Corr"]).to_numpy()
    offset, scatter = _robust(ours - network)
    print(f"\nYellowstone IASPEI ML - (SML - Corr), {len(rows)} rows: "
          f"median {offset:+.4f}, robust SD {scatter:.4f}")  # fmt: skip
    assert ref.YELLOWSTONE_OFFSET_BOUNDS[0] <= offset <= ref.YELLOWSTONE_OFFSET_BOUNDS[1]
    assert ref.YELLOWSTONE_SCATTER_BOUNDS[0] <= scatter <= ref.YELLOWSTONE_SCATTER_BOUNDS[1]


def _as_records(table: pd.DataFrame, *, with_distances: bool) -> pd.DataFrame:
    n = len(table)
    frame = pd.DataFrame({c: [None] * n for c in INPUT_COLUMNS})
    frame["event_id"] = table["Evid"].astype(str).to_numpy()
    frame["origin_time"] = pd.to_datetime(table["Date"] + "T" + table["Time"], utc=True).to_numpy()
    frame["event_latitude"] = table["EqLat"].to_numpy()
    frame["event_longitude"] = table["EqLon"].to_numpy()
    frame["event_depth"] = table["EqDep"].to_numpy()
    frame["station_id"] = (table["Net"] + "." + table["Sta"] + ".").to_numpy()
    frame["channel"] = table["Cmp"].to_numpy()
    frame["magnitude_type"] = "ML"
    frame["detected"] = True
    frame["clipped"] = False
    frame["amplitude"] = table["halfAmpH"].to_numpy()
    frame["amplitude_unit"] = "mm_wa"
    frame["source_file"] = str(DATA)
    frame["source_location"] = [f"line {i + 2}" for i in range(n)]
    for column in ("magnitude", "noise_threshold", "period", "distance_km", "distance_deg",
                   "hypocentral_distance_km", "azimuth", "source_weight"):  # fmt: skip
        frame[column] = np.nan
    if with_distances:
        frame["distance_km"] = table["Repi"].to_numpy()
        frame["hypocentral_distance_km"] = table["Rhyp"].to_numpy()
    return frame


def test_batch_equals_the_formula_on_every_real_row(table: pd.DataFrame) -> None:
    result = compute_station_magnitudes(_as_records(table, with_distances=True))
    assert result.rejected.empty and result.n_computed == ref.YELLOWSTONE_ROWS
    expected = ml(table["halfAmpH"].to_numpy(), table["Rhyp"].to_numpy(), unit="mm_wa")
    np.testing.assert_allclose(result.records["magnitude"], expected, rtol=0, atol=1e-12)
    assert set(result.records["formula"]) == {"ML IASPEI-2013 HB87"}


def test_distances_from_station_metadata_reproduce_the_table(table: pd.DataFrame) -> None:
    """Metadata built from the table's station coordinates; Rhyp filled by magfuse.

    Measured on this file: |Rhyp_magfuse - Rhyp| has median 0.04 km and, outside station BOZ,
    max 0.34 km (Repi is printed to 0.1 km). 65 BOZ rows of 2012-10 .. 2013 differ by 3-5.6 km:
    the network located BOZ elsewhere then, while the table carries one position per station.
    The magnitudes then agree to 0.003 (median |difference|).
    """
    stations = table.groupby(["Net", "Sta"], as_index=False)[["SLat", "SLon", "SElev"]].first()
    metadata = StationMetadata.from_frame(
        pd.DataFrame(
            {
                "network": stations["Net"],
                "station": stations["Sta"],
                "location": "",
                "latitude": stations["SLat"],
                "longitude": stations["SLon"],
                "elevation": stations["SElev"] * 1000.0,  # SElev is in km (2.4 for LKWY)
                "start": "",
                "end": "",
            }
        ),
        source="Yellowstone station columns",
    )
    result = compute_station_magnitudes(
        _as_records(table, with_distances=False),
        metadata=metadata,
        options=ComputeOptions(check_component=False),
    )
    assert result.rejected.empty
    gap = result.records["hypocentral_distance_km"].to_numpy() - table["Rhyp"].to_numpy()
    boz = (table["Sta"] == "BOZ").to_numpy()
    assert float(np.median(np.abs(gap))) < 0.1
    assert float(np.max(np.abs(gap[~boz]))) < 0.5
    assert int(np.count_nonzero(np.abs(gap) > 0.5)) == 65
    direct = ml(table["halfAmpH"].to_numpy(), table["Rhyp"].to_numpy(), unit="mm_wa")
    assert float(np.median(np.abs(result.records["magnitude"].to_numpy() - direct))) < 0.003
