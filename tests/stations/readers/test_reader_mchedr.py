"""NEIC "mchedr" files (stations.readers.mchedr) on the file bundled with obspy 1.5.1.

obspy 1.5.1 test data ``io/pde/tests/data/mchedr.dat``: the "NEIC file with 19 mb station
magnitudes". Values were read by eye; field positions are those of obspy 1.5.1
``obspy/io/pde/mchedr.py`` (``_parse_record_p``).
"""

from __future__ import annotations

from pathlib import Path

import obspy
import pandas as pd
import pytest

from stations.errors import MalformedFileError
from stations.readers.mchedr import is_mchedr, read_mchedr

SAMPLE = Path(obspy.__file__).parent / "io" / "pde" / "tests" / "data" / "mchedr.dat"


@pytest.fixture
def sample() -> Path:
    if not SAMPLE.exists():
        pytest.skip(f"obspy test file {SAMPLE} is not installed with this obspy")
    return SAMPLE


def test_nineteen_mb_station_magnitudes(sample: Path) -> None:
    """Line 1: HY20120101 052755.98 31.456N 138.072E 365.3 (origin, depth km); 19 P records
    with an mb amplitude (lines 24 ... 64)."""
    result = read_mchedr(sample)
    assert result.rejected.empty
    rec = result.records
    assert len(rec) == 19
    assert set(rec["magnitude_type"]) == {"mb"}  # "Mb" in obspy, alias of mb
    # resource id quakeml:us.anss.org/event/20120101052755.98; stored as its last segment
    assert set(rec["event_id"]) == {"20120101052755.98"}
    assert (rec["origin_time"] == pd.Timestamp("2012-01-01T05:27:55.98Z")).all()
    assert (rec["event_latitude"] == 31.456).all()
    assert (rec["event_longitude"] == 138.072).all()
    assert rec["event_depth"].iloc[0] == pytest.approx(365.3, abs=1e-9)
    assert rec["amplitude_unit"].eq("nm").all()


def test_values_of_single_stations(sample: Path) -> None:
    """Line 24: "P MDJ  eP 053106.64 -0.1 14.73 335.5 1.33945.0266.6" -> distance 14.73 deg,
    azimuth 335.5, period 1.3 s, amplitude 3945.026 nm of which obspy reads 3945.02, mb 6.6.
    Line 28: YSS mb 7.6. Line 62: "P QIZ ... 28.28 250.8 0.8  99.5685.2" -> QIZ mb 5.2."""
    rec = read_mchedr(sample, default_network="ab").records.set_index("station_id")
    mdj = rec.loc["AB.MDJ."]
    assert (mdj["distance_deg"], mdj["azimuth"], mdj["period"]) == (14.73, 335.5, 1.3)
    assert mdj["amplitude"] == pytest.approx(3945.02, rel=1e-12)
    assert mdj["magnitude"] == 6.6
    assert rec.loc["AB.YSS.", "magnitude"] == 7.6
    assert rec.loc["AB.QIZ.", "magnitude"] == 5.2
    assert rec.loc["AB.QIZ.", "period"] == 0.8
    # the field is "  99.568" ([48:56]); obspy 1.5.1 reads [48:55] and drops the last digit
    assert rec.loc["AB.QIZ.", "amplitude"] == pytest.approx(99.56, rel=1e-12)
    assert rec["source_weight"].isna().all()
    assert rec.index[0] == "AB.MDJ."
    assert rec["source_location"].tolist()[:2] == [
        "event 1 / station magnitude 1",
        "event 1 / station magnitude 2",
    ]


@pytest.mark.parametrize(
    "text",
    [
        "",
        "\n\nE  0.27   1.72\nHY20120101 052755.98\n",
        "HY2012-01-01 052755.98 31.456N\n",
        "HYPOCENTRE 20120101\n",
    ],
)
def test_is_mchedr_is_strict(tmp_path: Path, text: str) -> None:
    path = tmp_path / "x.dat"
    path.write_text(text, encoding="utf-8")
    assert not is_mchedr(path)


def test_leading_blank_lines_are_allowed(tmp_path: Path, sample: Path) -> None:
    path = tmp_path / "blank_first.dat"
    path.write_text("\n\n" + sample.read_text(encoding="utf-8"), encoding="utf-8")
    assert is_mchedr(path)


def test_garbled_distance_is_malformed(tmp_path: Path, sample: Path) -> None:
    """Variant of mchedr.dat: MDJ's distance field (line 24, [32:38]) reads '14.7x3'."""
    lines = sample.read_text(encoding="utf-8").splitlines()
    assert lines[23][32:38] == " 14.73"
    lines[23] = lines[23][:32] + "14.7x3" + lines[23][38:]
    path = tmp_path / "garbled.dat"
    path.write_text("\n".join(lines) + "\n", encoding="utf-8")
    assert is_mchedr(path)
    with pytest.raises(MalformedFileError, match=r"garbled\.dat: cannot be read as MCHEDR"):
        read_mchedr(path)
