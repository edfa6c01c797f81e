"""IMS1.0 bulletins (stations.readers.ims10) on the two bulletins bundled with obspy 1.5.1.

Values were read by eye from the files; file and line are given beside each check. The column
layout is the IMS1.0 short form as documented in obspy 1.5.1 ``obspy/io/iaspei/core.py``.
"""

from __future__ import annotations

import json
from pathlib import Path

import obspy
import pandas as pd
import pytest

from stations.errors import MalformedFileError
from stations.readers.ims10 import is_ims10, read_ims10, scan_phase_magnitudes

IASPEI = Path(obspy.__file__).parent / "io" / "iaspei" / "tests" / "data"


def _sample(name: str) -> Path:
    path = IASPEI / name
    if not path.exists():
        pytest.skip(f"obspy test file {path} is not installed with this obspy")
    return path


def test_isc_bulletin_of_1967() -> None:
    """obspy 1.5.1 test data, 19670130012028.isf: event 840268 (line 3), prime origin ISC
    (line 15: 1967/01/30 01:20:28.70, 41.0900 N, 44.3100 E, depth 11.0 km) and 15 phase lines
    with an mb station magnitude (lines 129 ... 287)."""
    result = read_ims10(_sample("19670130012028.isf"))
    assert result.rejected.empty
    rec = result.records
    assert len(rec) == 15
    assert set(rec["event_id"]) == {"840268"}
    assert set(rec["magnitude_type"]) == {"mb"}
    assert (rec["origin_time"] == pd.Timestamp("1967-01-30T01:20:28.70Z")).all()
    assert (rec["event_latitude"] == 41.09).all() and (rec["event_longitude"] == 44.31).all()
    assert (rec["event_depth"] == 11.0).all()
    by_line = rec.set_index("source_location")
    # line 129: "LJU    22.07 293.0 P ... _e mb     5.4 27631202"
    assert by_line.loc["line 129", "station_id"] == "UNKNOWN.LJU."
    assert by_line.loc["line 129", "magnitude"] == 5.4
    assert by_line.loc["line 129", "distance_deg"] == 22.07
    assert by_line.loc["line 129", "azimuth"] == 293.0
    # line 179: "STU    25.84 299.0 P ... ci mb     5.5 27631252"
    assert by_line.loc["line 179", "station_id"] == "UNKNOWN.STU."
    assert by_line.loc["line 179", "magnitude"] == 5.5
    # line 287: "EUR    97.82 345.0 P ... _i mb     5.2 27631360"
    assert by_line.loc["line 287", "magnitude"] == 5.2
    assert by_line.loc["line 287", "distance_deg"] == 97.82
    # the 1967 bulletin gives no amplitudes
    assert rec["amplitude"].isna().all()
    # magnitudes by eye, lines 129, 143, 179, 238, 240, 241, 242, 244, 246, 262, 268, 284-287
    assert rec["magnitude"].tolist() == [
        5.4,
        5.5,
        5.5,
        4.9,
        4.8,
        4.8,
        4.5,
        4.8,
        4.6,
        5.5,
        4.9,
        5.1,
        4.9,
        4.9,
        5.2,
    ]


def test_regional_bulletin_with_an_orphan_block() -> None:
    """obspy 1.5.1 test data, ipe202409sel_ims.txt: three events. Event 2032257 has ML station
    magnitudes on lines 33, 37, 39; event 2032696's phase block (lines 52-59) carries an
    #OrigID that matches no origin (line 50), so ObsPy skips it and its three station
    magnitudes (lines 53, 56, 58) come back as rejects."""
    result = read_ims10(_sample("ipe202409sel_ims.txt"), default_network="cz")
    rec = result.records.set_index("source_location")
    assert rec.index.tolist() == ["line 33", "line 37", "line 39"]
    assert set(rec["event_id"]) == {"2032257"}
    # line 26: 2024/09/01 12:33:19.91, 49.8219, 18.5593, depth 1.0f km
    assert (rec["origin_time"] == pd.Timestamp("2024-09-01T12:33:19.91Z")).all()
    assert (rec["event_depth"] == 1.0).all()
    # line 33: "MORC    0.66 266.5 Sg ... 4.7  0.20 m_q ML     1.0 19692975"
    morc = rec.loc["line 33"]
    assert morc["station_id"] == "CZ.MORC."
    assert morc["magnitude_type"] == "ML"
    assert morc["magnitude"] == 1.0
    assert morc["amplitude"] == pytest.approx(4.7, rel=1e-12)  # nm
    assert morc["amplitude_unit"] == "nm"
    assert morc["period"] == 0.2
    assert (morc["distance_deg"], morc["azimuth"]) == (0.66, 266.5)
    # line 37: VRAC ML 1.3, amplitude 3.0 nm, period 0.23 s
    assert rec.loc["line 37", "magnitude"] == 1.3
    assert rec.loc["line 37", "period"] == 0.23
    # line 39: KRUC ML 1.3, amplitude 2.3 nm
    assert rec.loc["line 39", "amplitude"] == pytest.approx(2.3, rel=1e-12)
    rej = result.rejected
    assert rej["source_location"].tolist() == ["line 53", "line 56", "line 58"]
    assert all("not delivered by ObsPy" in r for r in rej["reason"])
    assert json.loads(rej["raw"].iloc[1])["text"].startswith("VRAC    1.38 248.5 Sg")


def test_scan_finds_the_station_magnitude_lines() -> None:
    """The vectorized column scan finds exactly the phase lines with a magnitude."""
    text = _sample("ipe202409sel_ims.txt").read_text(encoding="utf-8")
    scan = scan_phase_magnitudes(text)
    assert scan["line"].tolist() == [33, 37, 39, 53, 56, 58]  # line 59 has a type, no value
    assert scan["arrival_id"].iloc[0] == "19692975"
    assert scan["magnitude"].tolist() == [1.0, 1.3, 1.3, 1.0, 0.4, 1.1]


def test_min_max_indicator(tmp_path: Path) -> None:
    """Variant of ipe202409sel_ims.txt: column 109 of line 37 set to '>' (a lower bound,
    stored as clipped) and of line 39 to '<' (an upper bound, rejected)."""
    lines = _sample("ipe202409sel_ims.txt").read_text(encoding="utf-8").splitlines()
    for number, mark in ((37, ">"), (39, "<")):
        line = lines[number - 1]
        assert line[108] == " "
        lines[number - 1] = line[:108] + mark + line[109:]
    path = tmp_path / "bounds.txt"
    path.write_text("\n".join(lines) + "\n", encoding="utf-8")
    result = read_ims10(path)
    rec = result.records.set_index("source_location")
    assert rec.index.tolist() == ["line 33", "line 37"]
    assert bool(rec.loc["line 37", "clipped"]) and not bool(rec.loc["line 33", "clipped"])
    reasons = dict(zip(result.rejected["source_location"], result.rejected["reason"], strict=True))
    assert "upper bound" in reasons["line 39"]


def test_zero_magnitude_dropped_by_obspy_is_reported(tmp_path: Path) -> None:
    """Variant of ipe202409sel_ims.txt: line 33's magnitude set to 0.0, which obspy 1.5.1
    drops (it tests the value for truth); the line comes back as a reject."""
    lines = _sample("ipe202409sel_ims.txt").read_text(encoding="utf-8").splitlines()
    line = lines[32]
    assert line[109:113] == " 1.0"
    lines[32] = line[:109] + " 0.0" + line[113:]
    path = tmp_path / "zero.txt"
    path.write_text("\n".join(lines) + "\n", encoding="utf-8")
    result = read_ims10(path)
    assert result.records["source_location"].tolist() == ["line 37", "line 39"]
    assert result.rejected["source_location"].tolist()[0] == "line 33"


def test_reading_twice_gives_identical_records() -> None:
    """ObsPy invents a new smi:local/<uuid> prefix per read; the stored ids do not change."""
    path = _sample("19670130012028.isf")
    pd.testing.assert_frame_equal(read_ims10(path).records, read_ims10(path).records)


@pytest.mark.parametrize(
    "text",
    [
        "DATA_TYPE BULLETIN IMS1.0:LONG\n",
        "DATA_TYPE WAVEFORM IMS1.0\n",
        "\n" * 45 + "DATA_TYPE BULLETIN IMS1.0:short\n",
    ],
)
def test_is_ims10_is_strict(tmp_path: Path, text: str) -> None:
    path = tmp_path / "x.txt"
    path.write_text(text, encoding="utf-8")
    assert not is_ims10(path)


def test_garbled_origin_date_names_the_line(tmp_path: Path) -> None:
    """Variant of 19670130012028.isf: the month of the prime origin (line 15) is 'XX'."""
    lines = _sample("19670130012028.isf").read_text(encoding="latin-1").splitlines()
    assert lines[14].startswith("1967/01/30 01:20:28.70")
    lines[14] = lines[14][:5] + "XX" + lines[14][7:]
    path = tmp_path / "garbled.isf"
    path.write_text("\n".join(lines) + "\n", encoding="latin-1")
    assert is_ims10(path)
    with pytest.raises(
        MalformedFileError, match=r"garbled\.isf: cannot be read as IMS10BULLETIN at line 15 "
    ):
        read_ims10(path)


def test_bulletin_without_stop_line_is_rejected_naming_its_last_line(tmp_path: Path) -> None:
    """19670130012028.isf: line 294 is 'STOP', line 295 blank; without them it was cut short
    and the error names its last non-blank line."""
    lines = _sample("19670130012028.isf").read_text(encoding="latin-1").splitlines()
    assert lines[293] == "STOP" and not lines[294].strip()
    path = tmp_path / "cut.isf"
    path.write_text("\n".join(lines[:293]) + "\n", encoding="latin-1")
    last = max(i for i in range(293) if lines[i].strip()) + 1
    with pytest.raises(
        MalformedFileError, match=rf"cut\.isf: .*no closing STOP line .*ends at line {last}:"
    ):
        read_ims10(path)


def test_bulletin_cut_at_every_line_boundary_is_refused_in_one_line(tmp_path: Path) -> None:
    """ipe202409sel_ims.txt (62 lines, ends with STOP) cut after each of its lines 1-61 and
    ingested through the command line: one 'Error:' line per file, nothing stored."""
    from tests.cli.conftest import invoke

    lines = _sample("ipe202409sel_ims.txt").read_text(encoding="utf-8").splitlines(keepends=True)
    assert lines[-1].strip() == "STOP"
    paths = []
    for n in range(1, len(lines)):
        path = tmp_path / f"cut{n:02d}.txt"
        path.write_text("".join(lines[:n]), encoding="utf-8")
        paths.append(path)
    res = invoke("ingest", *paths, "--store", tmp_path / "store")
    assert res.exit_code == 1
    assert "Traceback" not in res.stderr
    errors = [line for line in res.stderr.splitlines() if line.startswith("Error: ")]
    assert len(errors) == len(paths), res.stderr
    assert "accepted" not in res.stdout
