"""The Yellowstone station-ML table (stations.readers.yellowstone) on the real file.

Data: tests/data/yellowstone-uuss/station_ml_geobalanced.csv, real open data of Holt,
Pechmann & Koper (2022), BSSA 112(2), 905-920 (MIT licence), read in place and skipped when
absent. Counts are those of the data set's README (7,728 rows, 1,383 events, 20 stations);
single values were read by eye from the lines named beside each check. Independent counts
use Python's standard ``csv`` module on the same file.
"""

from __future__ import annotations

import csv
import json
from pathlib import Path

import numpy as np
import pandas as pd
import pytest

from stations.errors import MalformedFileError
from stations.readers import ReadResult, read_records
from stations.readers.yellowstone import HEADER, is_yellowstone, read_yellowstone
from tests.datasets import YELLOWSTONE_CSV

DATA = YELLOWSTONE_CSV


@pytest.fixture(scope="module")
def table() -> Path:
    return DATA


@pytest.fixture(scope="module")
def result(table: Path) -> ReadResult:
    return read_yellowstone(table)


@pytest.fixture(scope="module")
def rows(table: Path) -> list[dict[str, str]]:
    with open(table, newline="", encoding="utf-8") as fh:
        return list(csv.DictReader(fh))


def test_counts_match_the_readme(result: ReadResult, rows: list[dict[str, str]]) -> None:
    """README: 7,728 rows, 1,383 events, 20 stations. Rows with an empty Corr (counted here
    with the csv module) are rejected; together with the records they are every row."""
    assert len(rows) == 7728
    empty_corr = sum(1 for r in rows if r["Corr"] == "")
    assert empty_corr == 30
    assert len(result.records) == 7728 - empty_corr
    assert len(result.rejected) == empty_corr
    rejected_events = {json.loads(raw)["Evid"] for raw in result.rejected["raw"]}
    assert len(set(result.records["event_id"]) | rejected_events) == 1383
    assert result.records["station_id"].nunique() == 20
    assert all("Corr is empty" in r for r in result.rejected["reason"])


def test_line_2_and_3(result: ReadResult) -> None:
    """Line 2: 50154140,1998-04-05,18:23:26.47,44.227,-110.787,5.25,...,US,AHID,BH,...,
    164.3,164.383857176,2.81,-0.43,...,0.8750775 -> ML 2.81 - (-0.43) = 3.24.
    Line 3: same event, US.LKWY BH, SML 3.35, Corr 0.06 -> 3.29, halfAmpH 4.877975."""
    rec = result.records.set_index("source_location")
    two = rec.loc["line 2"]
    assert two["event_id"] == "50154140"
    assert two["origin_time"] == pd.Timestamp("1998-04-05T18:23:26.47Z")
    assert (two["event_latitude"], two["event_longitude"], two["event_depth"]) == (
        44.227,
        -110.787,
        5.25,
    )
    assert (two["station_id"], two["channel"], two["magnitude_type"]) == ("US.AHID.", "BH", "ML")
    assert two["magnitude"] == 3.24
    assert (two["amplitude"], two["amplitude_unit"]) == (0.8750775, "mm_wa")
    assert (two["distance_km"], two["hypocentral_distance_km"]) == (164.3, 164.383857176)
    three = rec.loc["line 3"]
    assert (three["station_id"], three["magnitude"], three["amplitude"]) == (
        "US.LKWY.",
        3.29,
        4.877975,
    )


def test_rejected_line_names_the_missing_correction(result: ReadResult) -> None:
    """Line 2812: event 60037062, US.BOZ, SML 0.17, Corr empty."""
    rej = result.rejected.set_index("source_location").loc["line 2812"]
    raw = json.loads(rej["raw"])
    assert (raw["Evid"], raw["Sta"], raw["SML"], raw["Corr"]) == ("60037062", "BOZ", "0.17", "")
    assert rej["reason"].startswith("Corr is empty, so SML - Corr")


def test_half_amp_is_a_quarter_of_the_two_horizontals(rows: list[dict[str, str]]) -> None:
    """halfAmpH = (AmpE + AmpN) / 4 in every row (computed; backs the module docstring)."""
    amp_e = np.array([float(r["AmpE"]) for r in rows])
    amp_n = np.array([float(r["AmpN"]) for r in rows])
    half = np.array([float(r["halfAmpH"]) for r in rows])
    assert np.max(np.abs(half - (amp_e + amp_n) / 4.0)) < 1e-12
    assert {r["UnE"] for r in rows} == {"mm"} == {r["UnN"] for r in rows}


def test_half_amp_is_the_zero_to_peak_amplitude_of_the_ml(result: ReadResult) -> None:
    """Hutton & Boore (1987) ML (docs/check-values.md §1, verified: log10 A_mm + 1.110 log10(r/100)
    + 0.00189 (r - 100) + 3.0, r hypocentral km) of halfAmpH lies within 0.2 (median) of
    SML - Corr, that of twice halfAmpH (the mean of AmpE and AmpN) 0.3 further away
    (log10 2 = 0.30). The network's own distance curve differs, so only the median gap is
    compared (computed on the real table: 0.13 against 0.42)."""
    rec = result.records
    amp = rec["amplitude"].to_numpy()
    r = rec["hypocentral_distance_km"].to_numpy()
    mag = rec["magnitude"].to_numpy()

    def hb87(a_mm: np.ndarray) -> np.ndarray:
        return np.log10(a_mm) + 1.110 * np.log10(r / 100.0) + 0.00189 * (r - 100.0) + 3.0

    gap_half = np.median(np.abs(hb87(amp) - mag))
    gap_full = np.median(np.abs(hb87(2.0 * amp) - mag))
    assert gap_half < 0.2
    assert gap_full - gap_half > 0.25


def test_dispatcher_recognises_the_table(table: Path) -> None:
    assert is_yellowstone(table)
    assert len(read_records(table).records) == 7698


def test_renamed_header_column_is_refused(tmp_path: Path, table: Path) -> None:
    """Faulty: a copy of the header (no data rows) with SML renamed to Sml."""
    path = tmp_path / "renamed.csv"
    names = list(HEADER)
    names[names.index("SML")] = "Sml"
    path.write_text(",".join(names) + "\n", encoding="utf-8")
    assert not is_yellowstone(path)
    with pytest.raises(MalformedFileError, match="column 21 is 'Sml', expected 'SML'"):
        read_yellowstone(path)
