"""The registry and dispatcher (stations.readers): every reader directly and through
``read_records``, detectors false on the other formats' samples, errors, documentation.

Samples: ObsPy 1.5.1's bundled test files for QuakeML, IMS1.0 and mchedr; magfuse's CSV
template; a Parquet file written from it; a two-line file in the Yellowstone table layout with
invented values (the real table is tested in test_reader_yellowstone.py).
"""

from __future__ import annotations

import doctest
import importlib
import io
from pathlib import Path

import obspy
import pandas as pd
import pytest

from stations.errors import MalformedFileError, UnknownFormatError
from stations.readers import REGISTRY, detect_format, read_records, supported_formats
from stations.readers.base import FormatSpec
from stations.readers.csv import read_csv, template_path
from stations.readers.parquet import write_parquet
from stations.readers.yellowstone import HEADER

OBSPY_IO = Path(obspy.__file__).parent / "io"
OBSPY_SAMPLES = {
    "quakeml": OBSPY_IO / "quakeml" / "tests" / "data" / "quakeml_1.2_stationmagnitude.xml",
    "ims10": OBSPY_IO / "iaspei" / "tests" / "data" / "19670130012028.isf",
    "mchedr": OBSPY_IO / "pde" / "tests" / "data" / "mchedr.dat",
}
#: Expected (records, rejected) per sample, from the per-format tests.
COUNTS = {
    "parquet": (2, 0),
    "quakeml": (0, 1),
    "ims10": (15, 0),
    "mchedr": (19, 0),
    "yellowstone": (1, 0),
    "csv": (2, 0),
}
YELLOWSTONE_ROW = (  # invented values in the published layout
    "1,2001-02-03,04:05:06.70,44.5,-110.5,8.0,2.0,2.0,3,5.0,1.0,0.5,WY,YXX,HH,"
    "44.6,-110.6,2.0,12.0,14.4,2.31,0.20,1.0,mm,,9.0,1.2,mm,,9.0,0.55,2.0,1.0,True"
)


@pytest.fixture(scope="module")
def samples(tmp_path_factory: pytest.TempPathFactory) -> dict[str, Path]:
    missing = [str(p) for p in OBSPY_SAMPLES.values() if not p.exists()]
    if missing:
        pytest.skip(f"obspy test files not installed: {missing}")
    folder = tmp_path_factory.mktemp("samples")
    parquet = folder / "records.parquet"
    write_parquet(read_csv(template_path()).records, parquet)
    table = folder / "yellowstone.csv"
    table.write_text(",".join(HEADER) + "\n" + YELLOWSTONE_ROW + "\n", encoding="utf-8")
    return {
        "parquet": parquet,
        **OBSPY_SAMPLES,
        "yellowstone": table,
        "csv": template_path(),
    }


def test_supported_formats_in_probe_order() -> None:
    assert supported_formats() == ("parquet", "quakeml", "ims10", "mchedr", "yellowstone", "csv")
    assert tuple(spec.name for spec in REGISTRY) == supported_formats()


@pytest.mark.parametrize("spec", REGISTRY, ids=lambda s: s.name)
def test_each_detector_claims_only_its_own_sample(
    spec: FormatSpec, samples: dict[str, Path]
) -> None:
    for other, path in samples.items():
        assert spec.detect(path) is (other == spec.name), f"is_{spec.name}({other} sample)"
        assert spec.detect(str(path)) is (other == spec.name)


@pytest.mark.parametrize("spec", REGISTRY, ids=lambda s: s.name)
def test_detectors_take_a_file_object_and_restore_its_position(
    spec: FormatSpec, samples: dict[str, Path]
) -> None:
    buf = io.BytesIO(samples[spec.name].read_bytes())
    buf.seek(3)
    assert spec.detect(buf) is True
    assert buf.tell() == 3


@pytest.mark.parametrize("spec", REGISTRY, ids=lambda s: s.name)
def test_detectors_never_raise(spec: FormatSpec, tmp_path: Path) -> None:
    """A missing file, a directory, an empty file and a text-mode handle all give False."""
    empty = tmp_path / "empty"
    empty.write_bytes(b"")
    with open(empty, encoding="utf-8") as text_handle:
        for source in (tmp_path / "missing", tmp_path, empty, text_handle, 42):
            assert spec.detect(source) is False


@pytest.mark.parametrize("name", list(COUNTS))
def test_direct_and_dispatched_reads_agree(name: str, samples: dict[str, Path]) -> None:
    path = samples[name]
    spec = next(s for s in REGISTRY if s.name == name)
    direct = spec.read(path)
    assert detect_format(path) == name
    probed = read_records(path)
    named = read_records(path, format=name.upper())
    for result in (probed, named):
        pd.testing.assert_frame_equal(result.records, direct.records)
        pd.testing.assert_frame_equal(result.rejected, direct.rejected)
        assert result.source_file == str(path)
    assert (len(direct.records), len(direct.rejected)) == COUNTS[name]


def test_obspy_format_name_is_an_alias(samples: dict[str, Path]) -> None:
    result = read_records(samples["ims10"], format="IMS10BULLETIN")
    assert len(result.records) == 15


def test_options_are_forwarded(samples: dict[str, Path]) -> None:
    ims = read_records(samples["ims10"], default_network="xy")
    assert ims.records["station_id"].str.startswith("XY.").all()
    csv = read_records(samples["csv"], magnitude_range=(2.0, 10.0))
    assert csv.records["station_id"].tolist() == ["XX.STA01."]  # magnitude 2.37
    assert csv.rejected["source_location"].tolist() == ["line 3"]  # noise threshold 1.9
    assert (
        "noise_threshold 1.9 is outside the accepted range [2, 10]"
        in csv.rejected["reason"].iloc[0]
    )


def test_missing_file_is_checked_first(tmp_path: Path) -> None:
    with pytest.raises(FileNotFoundError, match=r"nothing\.csv"):
        read_records(tmp_path / "nothing.csv", format="no-such-format")


def test_unknown_format_name_lists_the_formats(samples: dict[str, Path]) -> None:
    with pytest.raises(UnknownFormatError, match=r"unknown format 'sac'; use one of parquet, "):
        read_records(samples["csv"], format="sac")


def test_unrecognised_file_lists_the_formats(tmp_path: Path) -> None:
    path = tmp_path / "notes.txt"
    path.write_text("station magnitudes, to be typed in later\n", encoding="utf-8")
    with pytest.raises(UnknownFormatError) as info:
        read_records(path)
    message = str(info.value)
    assert message.startswith(f"{path}: no reader recognises this file")
    assert "parquet, quakeml, ims10, mchedr, yellowstone, csv" in message


def test_directory_is_refused(tmp_path: Path) -> None:
    with pytest.raises(UnknownFormatError, match="is a directory"):
        read_records(tmp_path)


def test_named_format_that_does_not_fit_is_malformed(samples: dict[str, Path]) -> None:
    """The IMS1.0 bulletin forced through the CSV reader: its line 1 is no CSV header."""
    with pytest.raises(MalformedFileError, match=r"19670130012028\.isf: line 1: required"):
        read_records(samples["ims10"], format="csv")


@pytest.mark.parametrize(
    "module",
    [
        "stations.readers",
        "stations.readers.csv",
        "stations.readers.parquet",
        "stations.readers.quakeml",
        "stations.readers.ims10",
        "stations.readers.mchedr",
        "stations.readers.yellowstone",
        "stations.readers._catalog",
    ],
)
def test_documentation_examples_run(module: str, samples: dict[str, Path]) -> None:
    """The usage example in each format's docstring is a doctest and passes."""
    outcome = doctest.testmod(importlib.import_module(module), optionflags=doctest.ELLIPSIS)
    assert outcome.attempted > 0
    assert outcome.failed == 0
